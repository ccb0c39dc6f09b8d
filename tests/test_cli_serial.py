"""Serial correlation in a run: ``--errors ar1`` / ``errors`` in the analysis file, the
serial-correlation test beside Hausman and Mundlak, the lag-one predictive check and the
narrow-interval warning in results.json, the console and the report (issue 17).

Outside references: statsmodels' Grunfeld panel (10 firms, 1935-1954), where the
cluster-robust SE of the capital slope is about three times the classical one in
linearmodels' PanelOLS, so the warning must fire; the run's serial-correlation record
equals the one-line call of bayespanel.reference.serial_correlation_test, which
tests/test_serial_test.py checks against statsmodels OLS with cluster-robust covariance;
the lag-one observed value equals the direct pandas computation of tests/test_interval_checks.py
on the saved posterior draws; the correlation one step apart is recomputed with numpy
from the saved draws.
"""

import json
import warnings

import numpy as np
import pandas as pd
import pytest

import bayespanel as bp
from bayespanel.app.cli import main
from bayespanel.core.errors import PanelDataError, SpecificationError
from bayespanel.app.runner import Settings, load_settings, run

SMALL = ["--draws", "150", "--tune", "150", "--chains", "2", "--seed", "5", "--quiet"]
FORMULA = "invest ~ value + capital"


@pytest.fixture(scope="module")
def grunfeld_csv(grunfeld, tmp_path_factory):
    path = tmp_path_factory.mktemp("grunfeld") / "grunfeld.csv"
    grunfeld.to_csv(path, index=False)
    return path


def _fit(argv, capsys):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rc = main(argv)
    cap = capsys.readouterr()
    return rc, cap.out + cap.err


@pytest.fixture(scope="module")
def iid_run(grunfeld_csv, tmp_path_factory):
    out = tmp_path_factory.mktemp("iid")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        s = Settings(data=str(grunfeld_csv), unit="firm", time="year", formula=FORMULA,
                     models=("fixed_effects",), reference=("within",), draws=150, tune=150,
                     chains=2, seed=5)
        res = run(s, out=out, quiet=True)
    return out, res


def test_settings_refuse_bad_errors_by_name(tmp_path):
    base = dict(unit="firm", time="year", formula=FORMULA)
    with pytest.raises(SpecificationError, match="errors"):
        Settings(**base, errors="ma1").check()
    with pytest.raises(SpecificationError, match="errors='ar1'.*family='poisson'"):
        Settings(**base, errors="ar1", family="poisson").check()
    with pytest.raises(SpecificationError, match="errors='ar1'.*random slopes"):
        Settings(**base, errors="ar1", random_slopes=("value",)).check()
    Settings(**base, errors="ar1", out_of_core=True).check()   # out of core: tests/test_dask_ar1.py
    f = tmp_path / "a.toml"
    f.write_text('[data]\nunit = "firm"\ntime = "year"\n[model]\nformula = "y ~ x"\n'
                 "errors = 1\n")
    with pytest.raises(SpecificationError, match=r"\[model\] errors = 1 must be text"):
        load_settings(f)
    f.write_text('[data]\nunit = "firm"\ntime = "year"\n[model]\nformula = "y ~ x"\n'
                 'errors = "ar1"\n')
    s = load_settings(f)
    assert s.errors == "ar1" and 'errors = "ar1"' in s.to_toml()
    assert load_settings(f, errors="iid").errors == "iid"  # the command line overrides


def test_command_line_refuses_bad_input(grunfeld, tmp_path, capsys):
    with pytest.raises(SystemExit) as exc:  # argparse: exit 2 naming the option
        main(["fit", "x.csv", "--unit", "u", "--time", "t", "--formula", "y ~ x",
              "--errors", "ma1", "--out", str(tmp_path / "a")])
    assert exc.value.code == 2 and "--errors" in capsys.readouterr().err
    # a time column whose spacing cannot be read: bad input, before anything is sampled
    df = grunfeld.assign(year=grunfeld["year"].astype(str) + "y")
    csv = tmp_path / "g.csv"
    df.to_csv(csv, index=False)
    rc, _ = _fit(["fit", str(csv), "--unit", "firm", "--time", "year", "--formula", FORMULA,
                  "--errors", "ar1", "--models", "fixed_effects", "--out",
                  str(tmp_path / "b"), *SMALL], capsys)
    assert rc == 2 and "'year'" in _
    with pytest.raises(PanelDataError, match="'year'"):
        run(Settings(data=str(csv), unit="firm", time="year", formula=FORMULA,
                               models=("fixed_effects",), errors="ar1"), quiet=True)


def test_iid_run_warns_and_carries_the_checks(iid_run, grunfeld):
    from linearmodels.panel import PanelOLS

    out, res = iid_run
    # the serial-check fields arrived in results.json 1.3.0
    assert tuple(map(int, res["schema_version"].split("."))) >= (1, 3, 0) and res["settings"]["errors"] == "iid"
    # outside reference: PanelOLS classical / clustered SE of capital is about 1/3
    d = grunfeld.set_index(["firm", "year"])
    mod = PanelOLS(d["invest"], d[["value", "capital"]], entity_effects=True)
    ratio = (mod.fit().std_errors / mod.fit(cov_type="clustered",
                                            cluster_entity=True).std_errors)["capital"]
    check = res["interval_check"]
    row = next(r for r in check["rows"] if r["term"] == "capital")
    assert row["narrow"] and row["ratio"] == pytest.approx(ratio, rel=0.3)
    assert row["reference_se"] == pytest.approx(
        bp.reference.within(bp.Panel(grunfeld, "firm", "year"), FORMULA,
                            cov="cluster").se["capital"], rel=1e-10)
    assert "--errors ar1" in check["message"] and "random slope for capital" in check["message"]
    # the serial-correlation test beside Hausman and Mundlak, as the one-line call gives it
    names = [t["name"] for t in res["tests"]]
    assert names == ["hausman", "mundlak", "serial_correlation"]
    serial = res["tests"][2]
    want = bp.reference.serial_correlation_test(bp.Panel(grunfeld, "firm", "year"), FORMULA)
    assert serial["statistic"] == pytest.approx(want.statistic, rel=1e-10)
    assert serial["reported_p_value"] == pytest.approx(want.f_p_value, rel=1e-8)
    assert serial["conclusion"].startswith("a unit's errors are positively correlated")
    # the lag-one check: observed values far above the replicated ones
    [lag] = [c for c in res["models"][0]["ppc"] if c["statistic"] == "lag1_within"]
    assert lag["observed"] > 0.3 and lag["p_value"] == 0.0
    # the report's first screen (the overview section) says so, in the section's words
    html = (out / "report.html").read_text("utf-8")
    overview = html[html.index('id="overview"'):html.index('id="data"')]
    assert "Intervals too narrow" in overview and "Bell, Fairbrother and Jones" in overview
    assert 'id="serial"' in html and "fig-serial" in html


def test_lag_one_observed_equals_pandas_on_saved_draws(iid_run, grunfeld):
    out, res = iid_run
    post = bp.Posterior.load(out / "posteriors" / "fixed_effects.nc")
    coef = post._flat("coef")
    thin = int(np.ceil(len(coef) / res["settings"]["ppc_draws"]))
    d = grunfeld.sort_values(["firm", "year"]).reset_index(drop=True)

    def ac1(b):  # residuals minus their firm's mean; pairs one year apart
        r = d["invest"] - d[["value", "capital"]].to_numpy() @ b
        r = r - r.groupby(d["firm"]).transform("mean")
        prev = r.groupby(d["firm"]).shift(1)
        step = d.groupby("firm")["year"].diff() == 1
        return (r * prev)[step].sum() / (r ** 2).sum()

    [lag] = [c for c in res["models"][0]["ppc"] if c["statistic"] == "lag1_within"]
    want = np.mean([ac1(b) for b in coef.reshape(post.n_chains, -1, 2)[:, ::thin].reshape(-1, 2)])
    assert lag["observed"] == pytest.approx(want, rel=1e-8)


def test_ar1_run_from_an_analysis_file(grunfeld_csv, tmp_path, capsys):
    cfg = tmp_path / "analysis.toml"
    cfg.write_text(f'[data]\nfile = "{grunfeld_csv}"\nunit = "firm"\ntime = "year"\n'
                   f'[model]\nformula = "{FORMULA}"\nmodels = ["random_intercept"]\n'
                   'errors = "ar1"\n[reference]\nfits = ["random"]\n'
                   '[priors]\nrho = {family = "uniform", lower = 0, upper = 0.99}\n')
    out = tmp_path / "run"
    rc, stdout = _fit(["fit", "--config", str(cfg), "--out", str(out), *SMALL], capsys)
    assert rc == 0, stdout
    res = json.loads((out / "results.json").read_text("utf-8"))
    assert res["settings"]["errors"] == "ar1" and 'errors = "ar1"' in res["settings"]["toml"]
    m = res["models"][0]
    assert m["priors"]["rho"].startswith("uniform(lower=0, upper=0.99")
    rho = next(q for q in m["scale"] if q["name"] == "rho")
    assert 0 <= rho["lower"] < rho["upper"] <= 0.99
    # the correlation one step apart, recomputed from the saved draws with numpy
    post = bp.Posterior.load(out / "posteriors" / "random_intercept.nc")
    t2, s2 = post._flat("sigma_unit") ** 2, post._flat("sigma_obs") ** 2
    want = np.mean((t2 + post._flat("rho") * s2) / (t2 + s2))
    got = next(q for q in m["variance_partition"]["summary"]
               if q["quantity"] == "correlation one step apart")
    assert got["estimate"] == pytest.approx(want, rel=1e-10)
    assert "correlation one step apart" in stdout and "lag-one autocorrelation" in stdout
    serial = next(t for t in res["tests"] if t["name"] == "serial_correlation")
    assert serial["conclusion"].endswith("the Bayesian models here allow AR(1) errors for it")
    assert "lag1_within" in [c["statistic"] for c in m["ppc"]]
    html = (out / "report.html").read_text("utf-8")
    assert "allow AR(1) errors" in html and "outcomes one step apart" in html
