"""The command line on public panels, as a researcher runs it (issue 15), each path through
``bayespanel.app.cli.main`` with its exit code and printed output (in this process, see
tests/conftest.py ``run_main``; ``run_cli`` below is the real subprocess that
tests/test_cli_habits.py uses): occasion effects with the within-between and Mundlak
models, a failed model that does not lose the others, specification tests that do not
apply, transformed outcomes, and the command line's habits (version, help, delimiter,
progress, warnings).

Outside sources, named beside each check:

* the state production panel of Munnell (1990) and the wage panel of Vella and Verbeek
  (1998), both shipped by linearmodels.datasets;
* the Grunfeld investment panel shipped by statsmodels.datasets;
* statsmodels OLS (two-way dummies) and linearmodels PanelOLS for the reference values.
"""

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

sys.path.insert(0, str(Path(__file__).parent))
from test_public_panels import MUNNELL, SLOPES, munnell_frame  # noqa: E402

SMALL = ["--draws", "100", "--tune", "150", "--chains", "2"]


def run_cli(*args, env=None):
    """``python -m bayespanel ARGS`` in a subprocess."""
    cmd = [sys.executable, "-m", "bayespanel", *map(str, args)]
    return subprocess.run(cmd, capture_output=True, text=True,
                          env={**os.environ, **(env or {})}, timeout=900)


@pytest.fixture(scope="module")
def munnell_csv(tmp_path_factory):
    path = tmp_path_factory.mktemp("munnell") / "munnell.csv"
    munnell_frame().to_csv(path, index=False)
    return path


@pytest.fixture(scope="module")
def grunfeld_csv(tmp_path_factory, grunfeld):
    path = tmp_path_factory.mktemp("grunfeld") / "grunfeld.csv"
    grunfeld.to_csv(path, index=False)
    return path


@pytest.fixture(scope="module")
def munnell_run(munnell_csv, tmp_path_factory, cli_in_process):
    out = tmp_path_factory.mktemp("munnell_run")
    p = cli_in_process("fit", munnell_csv, "--unit", "state", "--time", "year", "--formula",
                       MUNNELL, "--occasion-effects", "--models",
                       "within_between,correlated_effects", "--reference",
                       "within_between,mundlak", "--level", "unit", *SMALL, "--out", out)
    return p, out, json.loads((out / "results.json").read_text("utf-8"))


def test_occasion_effects_with_hybrid_and_mundlak_from_the_command_line(munnell_run):
    import statsmodels.formula.api as smf

    p, out, res = munnell_run
    # crashed after sampling before (KeyError 'occasion[1971] (between)'), writing nothing
    assert p.returncode == 0, p.stderr
    assert "failed" not in res
    models = {m["name"]: m for m in res["models"]}
    for name in ("within_between", "correlated_effects"):
        assert [c["covariate"] for c in models[name]["contrasts"]] == SLOPES
        assert models[name]["variance_partition"] is not None
        assert (out / "posteriors" / f"{name}.nc").exists()
    # outside check: the hybrid reference's within slopes are two-way fixed effects
    # (statsmodels OLS with state and year dummies) in this balanced panel
    d = munnell_frame()
    d = d.assign(lpcap=np.log(d["pcap"]), lpc=np.log(d["pc"]), lemp=np.log(d["emp"]))
    ols = smf.ols("gsp ~ lpcap + lpc + lemp + unemp + C(state) + C(year)", data=d).fit()
    wb = next(f for f in res["reference"] if f["name"] == "within_between")
    got = {c["term"]: c["estimate"] for c in wb["coefficients"]}
    for t, o in zip(SLOPES, ("lpcap", "lpc", "lemp", "unemp")):
        assert got[f"{t} (within)"] == pytest.approx(ols.params[o], rel=1e-8)
    # the two models are reparametrisations: the same plug-in ICC beside both posteriors
    icc = {n: next(q["reference"] for q in m["variance_partition"]["summary"]
                   if q["quantity"] == "ICC") for n, m in models.items()}
    assert icc["within_between"] == pytest.approx(icc["correlated_effects"], rel=1e-9)
    # the console shows the reference estimates and the tests it computed
    assert "Within-between (GLS) (reference, cluster covariance" in p.stdout
    assert "16 occasion terms" in p.stdout
    assert "Mundlak unit-mean terms (cluster-robust Wald): statistic" in p.stdout


def test_a_failed_model_does_not_lose_the_others(grunfeld_csv, tmp_path, cli_in_process,
                                                  monkeypatch):
    # a fault injected into one builder's sampler (the run must go on without it)
    import bayespanel.bayes as m

    def boom(self, *a, **k):
        raise FloatingPointError("log density is not finite at the start")

    monkeypatch.setattr(m.WithinBetween, "sample", boom)
    p = cli_in_process("fit", grunfeld_csv, "--unit", "firm", "--time", "year", "--formula",
                       "invest ~ value + capital", "--models", "random_intercept,within_between",
                       "--reference", "within", *SMALL, "--out", tmp_path)
    assert p.returncode == 1, p.stderr  # docs/cli.md: 1 when a fit failed
    res = json.loads((tmp_path / "results.json").read_text("utf-8"))
    assert res["failed"] == [{"name": "within_between", "title": "Within-between (hybrid)",
                              "stage": "Bayesian fit", "error": "FloatingPointError: log "
                              "density is not finite at the start"}]
    assert [m["name"] for m in res["models"]] == ["random_intercept"]
    assert (tmp_path / "posteriors" / "random_intercept.nc").exists()
    assert not (tmp_path / "posteriors" / "within_between.nc").exists()
    assert [r["model"] for r in res["comparison"]["rows"]] != []
    # outside check: the finished reference fit is linearmodels' PanelOLS
    from linearmodels.panel import PanelOLS

    g = pd.read_csv(grunfeld_csv).set_index(["firm", "year"])
    fe = PanelOLS(g["invest"], g[["value", "capital"]], entity_effects=True).fit()
    within = {c["term"]: c["estimate"] for c in res["reference"][0]["coefficients"]}
    assert within["value"] == pytest.approx(fe.params["value"], rel=1e-8)
    assert "failed (1)" in p.stdout and "log density is not finite" in p.stdout
    assert "within_between" in p.stderr and "Traceback" not in p.stderr
    html = (tmp_path / "report.html").read_text("utf-8")
    assert "Failed." in html and "log density is not finite at the start" in html


def test_specification_tests_that_do_not_apply_are_skipped(wage_csv, tmp_path,
                                                            cli_in_process):
    # years since 1980: the same schedule for every unit, so no between variation
    p = cli_in_process("fit", wage_csv, "--unit", "nr", "--time", "year", "--formula",
                       "lwage ~ I(year - 1980)", "--reference", "none", "--models",
                       "random_intercept", *SMALL, "--level", "unit", "--out", tmp_path)
    # refused before with "error: the fit has no unit-mean terms to test"
    assert p.returncode == 0, p.stderr
    res = json.loads((tmp_path / "results.json").read_text("utf-8"))
    assert [t["name"] for t in res["tests"]] == ["hausman", "mundlak", "serial_correlation"]
    for t in res["tests"][:2]:
        assert t["p_value"] is None and "same unit mean" in t["skipped"]
    lines = [ln for ln in p.stdout.splitlines() if "not run:" in ln]
    assert len(lines) == 1 and "'I(year - 1980)'" in lines[0]
    assert "not run: no time-varying covariate" in (tmp_path / "report.html").read_text()
    # outside check: the random-intercept slope is the within slope here (no between
    # variation), which linearmodels' PanelOLS gives
    from linearmodels.panel import PanelOLS

    w = pd.read_csv(wage_csv).set_index(["nr", "year"])
    x = (w.index.get_level_values("year") - 1980).to_numpy(dtype=float)
    fe = PanelOLS(w["lwage"], pd.DataFrame({"t": x}, index=w.index), entity_effects=True).fit()
    slope = res["models"][0]["coefficients"][1]
    assert slope["term"] == "I(year - 1980)"
    assert abs(slope["estimate"] - fe.params["t"]) < 4 * slope["sd"]


def test_transformed_outcome_from_the_command_line_and_the_analysis_file(munnell_csv,
                                                                          tmp_path,
                                                                          cli_in_process):
    import statsmodels.formula.api as smf

    formula = "log(gsp) ~ log(pcap) + log(pc) + log(emp) + unemp"
    first = tmp_path / "first"
    p = cli_in_process("fit", munnell_csv, "--unit", "state", "--time", "year", "--formula",
                       formula, "--models", "random_intercept", "--reference", "pooled",
                       "--level", "unit", *SMALL, "--out", first)
    assert p.returncode == 0, p.stderr  # refused before: "must be a single column"
    res = json.loads((first / "results.json").read_text("utf-8"))
    assert res["data"]["outcome"] == "log(gsp)" and res["title"] == "Panel analysis of log(gsp)"
    assert "Outcome <code>log(gsp)</code>" in (first / "report.html").read_text("utf-8")
    # the analysis file route repeats the formula as written
    again = tmp_path / "again"
    p2 = cli_in_process("fit", "--config", first / "analysis.toml", "--models", "none",
                        "--out", again)
    assert p2.returncode == 0, p2.stderr
    res2 = json.loads((again / "results.json").read_text("utf-8"))
    assert res2["reference"] == res["reference"]
    # outside check: statsmodels OLS on the logged column
    ols = smf.ols("np.log(gsp) ~ np.log(pcap) + np.log(pc) + np.log(emp) + unemp",
                  data=munnell_frame()).fit()
    got = [c["estimate"] for c in res["reference"][0]["coefficients"]]
    np.testing.assert_allclose(got, ols.params.to_numpy(), rtol=1e-9)
    # outside check: the Bayesian random-intercept slopes centre on linearmodels'
    # RandomEffects fit of the logged column (within 4 posterior SDs)
    from linearmodels.panel import RandomEffects

    d = munnell_frame().set_index(["state", "year"])
    x = np.log(d[["pcap", "pc", "emp"]]).assign(unemp=d["unemp"], const=1.0)
    re = RandomEffects(np.log(d["gsp"]), x).fit()
    for c in res["models"][0]["coefficients"]:
        name = {"log(pcap)": "pcap", "log(pc)": "pc", "log(emp)": "emp"}.get(c["term"])
        if name:
            assert abs(c["estimate"] - re.params[name]) < 4 * c["sd"], c
