"""The command line: fit, report, analysis files, exit codes and help.

Outside checks, named beside each: ``fit`` on the wage panel of Vella and Verbeek (1998),
as shipped in linearmodels' datasets and written to CSV, reproduces linearmodels'
PanelOLS (entity effects), PooledOLS and RandomEffects estimates in results.json and in
its CSV tables; a Bayesian fixed-effects fit centres on the PanelOLS estimate.
"""

import json
import warnings

import numpy as np
import pandas as pd
import pytest

from bayespanel.app.cli import build_parser, main

FORMULA = "lwage ~ exper + expersq + union + married + educ + black"


# These runs check estimates, tables, saved posteriors and reruns, not the LOO table: the
# reference fits are scored by 2-fold CV (a few refits) instead of the default exact
# leave-one-out of all 4,360 rows (thousands of refits, about half a minute per run),
# which tests/test_comparison_story.py checks from the command line on this panel.
FOLDS = ["--reference-folds", "2"]


@pytest.fixture(scope="module")
def ref_run(wage_csv, tmp_path_factory):
    out = tmp_path_factory.mktemp("wage_ref")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rc = main(["fit", str(wage_csv), "--unit", "nr", "--time", "year", "--formula", FORMULA,
                   "--models", "none", *FOLDS, "--out", str(out), "--quiet"])
    assert rc == 0
    return out, json.loads((out / "results.json").read_text("utf-8"))


def _lm_data(wage_panel):
    d = wage_panel.set_index(["nr", "year"])
    exog = d[["exper", "expersq", "union", "married", "educ", "black"]].assign(const=1.0)
    return d["lwage"], exog


def test_fit_on_wage_csv_reproduces_linearmodels(ref_run, wage_panel):
    from linearmodels.panel import PanelOLS, PooledOLS, RandomEffects

    out, res = ref_run
    y, exog = _lm_data(wage_panel)
    ref = {f["name"]: {c["term"]: c for c in f["coefficients"]} for f in res["reference"]}
    # outside check: linearmodels PanelOLS with entity effects, clustered by unit
    fe = PanelOLS(y, exog[["exper", "expersq", "union", "married"]], entity_effects=True).fit(
        cov_type="clustered", cluster_entity=True)
    for t in ("exper", "expersq", "union", "married"):
        assert ref["within"][t]["estimate"] == pytest.approx(fe.params[t], rel=1e-8)
    assert "educ" not in ref["within"]  # constant within units: not estimable by FE
    # outside check: linearmodels PooledOLS, and RandomEffects (balanced panel: Swamy-Arora)
    po = PooledOLS(y, exog).fit()
    rem = RandomEffects(y, exog).fit()
    for t in ("exper", "union", "educ", "black"):
        assert ref["pooled"][t]["estimate"] == pytest.approx(po.params[t], rel=1e-8)
        assert ref["random"][t]["estimate"] == pytest.approx(rem.params[t], rel=1e-6)
    assert res["data"]["structure"]["n_units"] == 545 and res["data"]["structure"]["balanced"]
    long = pd.read_csv(out / "tables" / "coefficients_long.csv")
    got = long[(long["term"] == "union") & (long["model"] == "Within (fixed effects) (ref.)")]
    assert float(got["estimate"].iloc[0]) == pytest.approx(fe.params["union"], rel=1e-8)
    assert (out / "report.html").stat().st_size > 10_000


def test_analysis_file_repeats_the_run(ref_run, tmp_path, wage_panel):
    out, res = ref_run
    toml = (out / "analysis.toml").read_text()
    assert 'formula = "lwage ~ exper' in toml and "sha256 = " in toml
    assert "reference_folds = 2" in toml  # the rerun scores its reference fits alike
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["fit", "--config", str(out / "analysis.toml"), "--out", str(tmp_path),
                     "--quiet"]) == 0
    again = json.loads((tmp_path / "results.json").read_text("utf-8"))
    for key in ("data", "reference", "tests", "models"):
        assert again[key] == res[key]
    assert again["software"]["packages"]["numpy"] == np.__version__
    # options on the command line override the file
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["fit", "--config", str(out / "analysis.toml"), "--out", str(tmp_path / "b"),
                     "--reference", "within", "--quiet"]) == 0
    b = json.loads((tmp_path / "b" / "results.json").read_text("utf-8"))
    assert [f["name"] for f in b["reference"]] == ["within"]


def test_bayesian_fit_writes_a_posterior_that_reloads(wage_csv, wage_panel, tmp_path):
    from linearmodels.panel import PanelOLS

    from bayespanel.bayes.posterior import Posterior

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rc = main(["fit", str(wage_csv), "--unit", "nr", "--time", "year", "--formula",
                   "lwage ~ exper + union + married", "--models", "fixed_effects",
                   "--reference", "within", *FOLDS, "--draws", "150", "--tune", "150",
                   "--chains", "2", "--seed", "7", "--ppc-draws", "50", "--out", str(tmp_path),
                   "--quiet"])
    assert rc == 0
    res = json.loads((tmp_path / "results.json").read_text("utf-8"))
    m = res["models"][0]
    post = Posterior.load(tmp_path / m["posterior_file"])
    summ = post.summary(res["settings"]["interval"])
    for c in m["coefficients"]:
        assert summ.at[c["term"], "mean"] == c["estimate"]  # saved draws give the same numbers
    y, exog = _lm_data(wage_panel)
    fe = PanelOLS(y, exog[["exper", "union", "married"]], entity_effects=True).fit()
    c = {x["term"]: x for x in m["coefficients"]}["union"]
    # outside check: linearmodels PanelOLS; flat-ish priors put the posterior on it
    assert abs(c["estimate"] - fe.params["union"]) < 4 * c["sd"]


@pytest.mark.parametrize("argv, needle", [
    (["--formula", "lwage ~ nosuch"], "nosuch"),
    (["--formula", "lwage ~ __import__('os').system('true')"], "__import__"),
    (["--formula", FORMULA, "--models", "random_slopes"], "random_slopes"),
    (["--formula", FORMULA, "--prior", "sigma_unit"], "KEY=FAMILY"),
    (["--formula", FORMULA, "--prior", "nosuch_term=normal"], "nosuch_term"),
    (["--formula", FORMULA, "--interval", "95"], "interval"),
    (["--formula", FORMULA, "--unit", "nosuch_unit"], "nosuch_unit"),
], ids=["unknown-column", "unsafe-formula", "unknown-model", "bad-prior", "unknown-prior-key",
        "bad-interval", "unknown-unit"])
def test_bad_input_exits_two_with_a_message(wage_csv, tmp_path, capsys, argv, needle):
    base = ["fit", str(wage_csv), "--unit", "nr", "--time", "year", "--out", str(tmp_path),
            "--quiet"]
    assert main(base + argv) == 2
    err = capsys.readouterr().err
    assert needle in err and "Traceback" not in err


def test_bad_files_exit_two(tmp_path, capsys):
    assert main(["fit", str(tmp_path / "missing.csv"), "--unit", "u", "--time", "t",
                 "--formula", "y ~ x", "--out", str(tmp_path / "o")]) == 2
    assert "does not exist" in capsys.readouterr().err
    bad = tmp_path / "a.toml"
    bad.write_text("[model\nformula = 'y ~ x'\n")
    assert main(["fit", "--config", str(bad), "--out", str(tmp_path / "o")]) == 2
    assert "not valid TOML" in capsys.readouterr().err
    bad.write_text("[model]\nformula = 'y ~ x'\ndraws = 10\n[data]\nunit='u'\ntime='t'\n")
    assert main(["fit", "--config", str(bad), "--out", str(tmp_path / "o")]) == 2
    assert "unknown key 'draws' in [model]" in capsys.readouterr().err
    assert main(["report", str(tmp_path)]) == 2
    assert "no results file" in capsys.readouterr().err


def test_failure_exits_one(tmp_path, capsys, monkeypatch):
    import bayespanel.app.runner as runner

    def boom(*a, **k):
        raise RuntimeError("disk on fire")

    monkeypatch.setattr(runner, "run", boom)
    csv = tmp_path / "d.csv"
    pd.DataFrame({"u": [1, 1, 2, 2], "t": [1, 2, 1, 2], "y": [1.0, 2, 3, 5],
                  "x": [0.0, 1, 0, 2]}).to_csv(csv, index=False)
    assert main(["fit", str(csv), "--unit", "u", "--time", "t", "--formula", "y ~ x",
                 "--out", str(tmp_path / "o")]) == 1
    err = capsys.readouterr().err
    assert "disk on fire" in err and "Traceback" not in err


@pytest.mark.parametrize("verb", ["demo", "describe", "fit", "report"])
def test_help_of_every_verb_lists_every_option(verb, capsys):
    parser = build_parser()
    sub = next(a for a in parser._actions if a.dest == "verb").choices[verb]
    with pytest.raises(SystemExit) as e:
        main([verb, "--help"])
    assert e.value.code == 0
    text = capsys.readouterr().out
    for action in sub._actions:
        for opt in action.option_strings:
            assert opt in text
        if action.option_strings and action.dest != "help":
            assert action.help and len(action.help) > 10, f"{verb} {action.dest} has no help"
