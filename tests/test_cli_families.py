"""Binary, binomial and count outcomes (and random slopes) from the command line.

Outside checks, named beside each:
- public panels shipped by linearmodels: union membership in the wage panel of Vella and
  Verbeek (1998) (binary); employees trained out of employees, and the number of
  employees (a count in the hundreds), in the job-training panel of Holzer et al. (1993)
  (``linearmodels.datasets.jobtraining``);
- the reference GLMs against statsmodels' GLM (Binomial, Poisson) with cluster-robust
  errors, and their average marginal effects against statsmodels' Logit / Poisson
  ``get_margeff(at="overall")``;
- the Bayesian average marginal effects against a numerical derivative (central
  difference) of the marginal mean, integrated over the unit effect on a fine grid;
- the latent-scale ICC's occasion-level variance pi^2/3 of the logit link (Snijders and
  Bosker 2012, section 17.3).
Every run goes through ``bayespanel.app.cli.main`` with its exit code and printed
output, in this process (tests/conftest.py ``run_main``).
"""

import json
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from conftest import run_main

SAMPLING = ["--draws", "100", "--tune", "100", "--chains", "2", "--seed", "5",
            "--ppc-draws", "60", "--quiet"]


def _cli(*argv, check=True):
    proc = run_main(*argv)
    if check:
        assert proc.returncode == 0, proc.stderr[-3000:]
    return proc


def _results(out):
    return json.loads((Path(out) / "results.json").read_text("utf-8"))


@pytest.fixture(scope="module")
def wage_csv(tmp_path_factory, wage_panel):
    """40 workers of the wage panel (320 rows): union membership is 0/1."""
    keep = wage_panel["nr"].unique()[:40]
    path = tmp_path_factory.mktemp("fam_wage") / "wage40.csv"
    wage_panel[wage_panel["nr"].isin(keep)].to_csv(path, index=False)
    return path


@pytest.fixture(scope="module")
def jobs():
    from linearmodels.datasets import jobtraining

    d = jobtraining.load()
    return d.dropna(subset=["totrain", "employ", "lsales", "grant"]).reset_index(drop=True)


@pytest.fixture(scope="module")
def jobs_csv(tmp_path_factory, jobs):
    path = tmp_path_factory.mktemp("fam_jobs") / "jobs.csv"
    jobs.to_csv(path, index=False)
    return path


UNION_F = "union ~ exper + married + educ"


@pytest.fixture(scope="module")
def union_run(wage_csv, tmp_path_factory):
    out = tmp_path_factory.mktemp("union_run")
    proc = _cli("fit", wage_csv, "--unit", "nr", "--time", "year", "--formula", UNION_F,
                "--family", "bernoulli", "--models", "within_between",
                "--reference", "pooled,within_between", "--out", out, *SAMPLING)
    return out, _results(out), proc.stdout


def _design(csv, unit, time, formula):
    import bayespanel as bp

    panel = bp.Panel(pd.read_csv(csv), unit=unit, time=time)
    return panel, panel.design(formula)


# ---------------------------------------------------------------------- binary
@pytest.mark.slow
def test_binary_reference_glms_match_statsmodels(union_run, wage_csv):
    import statsmodels.api as sm

    out, res, _ = union_run
    _, d = _design(wage_csv, "nr", "year", UNION_F)
    refs = {f["name"]: f for f in res["reference"]}
    assert set(refs) == {"pooled", "within_between"}
    for name, kind in (("pooled", "pooled"), ("within_between", "within_between")):
        M, labels = d.matrices(kind)
        # outside check: statsmodels Logit, CR1 clustered by unit (its default correction)
        fit = sm.Logit(d.y, M).fit(disp=0, cov_type="cluster", cov_kwds={"groups": d.unit_codes})
        got = {c["term"]: c for c in refs[name]["coefficients"]}
        for j, t in enumerate(labels):
            assert got[t]["estimate"] == pytest.approx(fit.params[j], rel=1e-7, abs=1e-9)
            assert got[t]["se"] == pytest.approx(fit.bse[j], rel=1e-6)
        # outside check: statsmodels' average marginal effects with delta-method SEs
        me = fit.get_margeff(at="overall")
        ame = {a["effect"]: a for a in refs[name]["average_marginal_effects"]}
        for j, t in enumerate([t for t in labels if t != "Intercept"]):
            assert ame[t]["estimate"] == pytest.approx(me.margeff[j], rel=1e-7)
            assert ame[t]["se"] == pytest.approx(me.margeff_se[j], rel=1e-6)
        assert refs[name]["icc"] is None and refs[name]["family"] == "bernoulli"


@pytest.mark.slow
def test_binary_marginal_effects_are_the_derivative_of_the_marginal_mean(union_run):
    """The reported AME equals a central difference of the population-averaged mean
    probability, the unit effect integrated on a fine grid (not the quadrature used)."""
    from scipy.special import expit

    from bayespanel.bayes.latent import LatentPosterior

    out, res, _ = union_run
    m = res["models"][0]
    post = LatentPosterior.load(out / m["posterior_file"])
    b, tau = post.coef_draws(), post.flat_draws("sigma_unit")
    M = post.rows[0]
    z = np.linspace(-8, 8, 321)  # the rectangle rule is spectrally accurate here
    w = np.exp(-0.5 * z ** 2)
    w /= w.sum()
    h = 1e-4
    for term in ("exper (within)", "educ"):
        j = post.labels.index(term)
        amed = []
        for s in range(len(tau)):
            eta = M @ b[s]
            f = [(expit((eta + sgn * h * b[s, j])[:, None] + tau[s] * z[None, :]) @ w).mean()
                 for sgn in (1, -1)]
            amed.append((f[0] - f[1]) / (2 * h))
        got = next(a for a in m["average_marginal_effects"] if a["effect"] == term)
        assert got["estimate"] == pytest.approx(np.mean(amed), rel=1e-4)
        assert got["sd"] == pytest.approx(np.std(amed, ddof=1), rel=1e-3)
        # population-averaged AMEs and the pooled GLM's estimate the same quantity
        assert abs(got["estimate"] - got["reference_estimate"]) < 3 * np.hypot(got["sd"],
                                                                          got["reference_se"])


@pytest.mark.slow
def test_binary_outputs_tell_one_story(union_run):
    out, res, stdout = union_run
    assert res["schema_version"].startswith("1.")
    for m in res["models"]:
        assert m["family"]["name"] == "bernoulli" and m["family"]["link"] == "logit"
        assert "log-odds" in m["family"]["coefficient_scale"]
        vp = m["variance_partition"]
        assert "latent" in vp["scale"] and "pi^2/3" in vp["scale"] and vp["theta"] == []
        occ = next(q for q in vp["summary"] if q["quantity"] == "occasion SD")
        # Snijders and Bosker (2012), 17.3: logistic residual variance pi^2/3
        assert occ["estimate"] == pytest.approx(np.pi / np.sqrt(3), rel=1e-12)
        icc = next(q for q in vp["summary"] if q["quantity"] == "ICC")
        icc_scale = next(q for q in m["scale"] if q["name"] == "icc")
        assert icc["estimate"] == pytest.approx(icc_scale["estimate"], rel=1e-10)
        labels = [s["label"] for s in m["ppc"]]
        assert {"rate of ones", "switching rate", "share of units never 1"} <= set(labels)
        assert not any("share of 1" in lab or "share of 0" in lab for lab in labels)
        assert all(0 <= s["p_value"] <= 1 for s in m["ppc"])
        assert m["loo"]["level"] == "occasion" and m["loo"]["elpd"] is not None
    wb = res["models"][0]
    assert {a["effect"] for a in wb["average_marginal_effects"]} >= {"exper (within)",
                                                                     "exper (between)"}
    assert [t["name"] for t in res["tests"]] == ["mundlak"]
    assert "not scored" in res["comparison"]["note"]
    assert all(r["kind"] == "bayesian" for r in res["comparison"]["rows"])
    assert "average marginal effects" in stdout
    page = (out / "report.html").read_text("utf-8")
    assert "Effects on the outcome scale" in page and "Pooled logit GLM" in page
    assert "population-averaged" in page and "latent scale (log-odds)" in page
    # the analysis file holds the family and repeats the run's settings
    toml = tomllib.loads((out / "analysis.toml").read_text("utf-8"))
    assert toml["model"]["family"] == "bernoulli"
    from bayespanel.app.runner import load_settings

    again = load_settings(out / "analysis.toml")
    assert again.family == "bernoulli" and again.models == ("within_between",)
    assert again.reference == ("pooled", "within_between")


# ---------------------------------------------------------------------- binomial
@pytest.fixture(scope="module")
def trained_run(jobs_csv, tmp_path_factory):
    out = tmp_path_factory.mktemp("trained_run")
    _cli("fit", jobs_csv, "--unit", "fcode", "--time", "year", "--formula",
         "totrain ~ grant + lsales", "--family", "binomial", "--trials", "employ",
         "--models", "random_intercept", "--reference", "pooled", "--out", out, *SAMPLING)
    return out, _results(out)


def test_binomial_run_on_jobtraining(trained_run, jobs_csv):
    import statsmodels.api as sm

    out, res = trained_run
    _, d = _design(jobs_csv, "fcode", "year", "totrain ~ grant + lsales")
    emp = pd.read_csv(jobs_csv).set_index(["fcode", "year"]).sort_index()["employ"].to_numpy()
    M, labels = d.matrices("pooled")
    # outside check: statsmodels GLM Binomial on (successes, failures), cluster-robust
    fit = sm.GLM(np.column_stack([d.y, emp - d.y]), M, family=sm.families.Binomial()).fit(
        cov_type="cluster", cov_kwds={"groups": d.unit_codes})
    got = {c["term"]: c for c in res["reference"][0]["coefficients"]}
    for j, t in enumerate(labels):
        assert got[t]["estimate"] == pytest.approx(fit.params[j], rel=1e-7)
        assert got[t]["se"] == pytest.approx(fit.bse[j], rel=1e-6)
    m = res["models"][0]
    assert m["family"]["trials"] == "employ"
    labels_ppc = [s["label"] for s in m["ppc"]]
    # each share is checked only when such rows occur in the data
    assert ("share of rows with no success" in labels_ppc) == bool((d.y == 0).any())
    assert ("share of rows all successes" in labels_ppc) == bool((d.y == emp).any())
    assert "overall success rate" in labels_ppc
    grant = next(a for a in m["average_marginal_effects"] if a["effect"] == "grant")
    assert grant["reference_estimate"] is not None
    # the binomial GLM's coefficient for a grant and the Bayesian one agree in sign
    assert np.sign(grant["estimate"]) == np.sign(got["grant"]["estimate"])


# ---------------------------------------------------------------------- counts
@pytest.fixture(scope="module")
def employ_run(jobs_csv, tmp_path_factory):
    out = tmp_path_factory.mktemp("employ_run")
    _cli("fit", jobs_csv, "--unit", "fcode", "--time", "year", "--formula",
         "employ ~ grant + lsales", "--family", "negative_binomial", "--models",
         "random_intercept", "--reference", "pooled", "--level", "unit", "--out", out,
         *SAMPLING)
    return out, _results(out)


@pytest.mark.slow
def test_count_in_the_hundreds(employ_run, jobs_csv):
    import statsmodels.api as sm

    out, res = employ_run
    _, d = _design(jobs_csv, "fcode", "year", "employ ~ grant + lsales")
    assert d.y.max() > 300 and (d.y > 0).all()
    M, labels = d.matrices("pooled")
    # outside check: statsmodels Poisson (quasi-likelihood fit of the NB family's mean)
    fit = sm.Poisson(d.y, M).fit(disp=0, cov_type="cluster", cov_kwds={"groups": d.unit_codes})
    ref = res["reference"][0]
    for j, c in enumerate(ref["coefficients"]):
        assert c["estimate"] == pytest.approx(fit.params[j], rel=1e-7)
        assert c["se"] == pytest.approx(fit.bse[j], rel=1e-6)
    me = fit.get_margeff(at="overall")
    for j, a in enumerate(ref["average_marginal_effects"]):
        assert a["estimate"] == pytest.approx(me.margeff[j], rel=1e-7)
        assert a["se"] == pytest.approx(me.margeff_se[j], rel=1e-6)
    m = res["models"][0]
    labels_ppc = [s["label"] for s in m["ppc"]]
    # no zeros observed: no share-of-zeros check, and no shares of 1s or 2s
    assert "share of zeros" not in labels_ppc
    assert not any(lab.startswith("share of") for lab in labels_ppc)
    assert {"mean count", "variance-to-mean ratio", "quantile 0.5"} <= set(labels_ppc)
    mean = next(s for s in m["ppc"] if s["label"] == "mean count")
    assert 0.02 < mean["p_value"] < 0.98
    assert any(q["name"] == "shape" for q in m["scale"])
    assert m["loo"]["level"] == "unit" and m["loo"]["elpd"] is not None
    assert "log-normal approximation" in m["variance_partition"]["scale"]


# ---------------------------------------------------------------------- refusals, notes
@pytest.mark.parametrize("extra, words", [
    (["--family", "bernoulli", "--models", "pooled"],
     ["pooled", "bernoulli", "random_intercept, within_between, correlated_effects"]),
    (["--random-slopes", "exper", "--models", "fixed_effects"],
     ["fixed_effects", "random slopes", "random_intercept"]),
    (["--family", "bernoulli", "--reference", "random"],
     ["random", "pooled, mundlak, within_between"]),
    (["--family", "binomial"], ["--trials"]),
    (["--family", "bernoulli", "--exposure", "hours"], ["exposure", "count"]),
    (["--family", "bernoulli", "--cov", "cr2"], ["cr2", "cluster"]),
])
def test_options_that_do_not_fit_the_family_are_refused_up_front(wage_csv, tmp_path, extra,
                                                                   words, capsys):
    from bayespanel.app.cli import main  # in process: the refusal comes before any work

    rc = main(["fit", str(wage_csv), "--unit", "nr", "--time", "year", "--formula", UNION_F,
               *extra, "--out", str(tmp_path / "x")])
    err = capsys.readouterr().err
    assert rc == 2, err
    for w in words:
        assert w in err
    assert "Traceback" not in err and not (tmp_path / "x" / "results.json").exists()


def test_outcome_outside_the_family_is_refused_naming_the_row(wage_csv, tmp_path):
    proc = _cli("fit", wage_csv, "--unit", "nr", "--time", "year", "--formula",
                "hours ~ exper", "--family", "bernoulli", "--out", tmp_path, check=False)
    assert proc.returncode == 2
    assert "0/1" in proc.stderr and "nr=" in proc.stderr and "year=" in proc.stderr
    assert not (tmp_path / "results.json").exists()


def test_zero_one_outcome_fitted_as_gaussian_gets_a_note(wage_csv, tmp_path):
    _cli_out = _cli("fit", wage_csv, "--unit", "nr", "--time", "year", "--formula", UNION_F,
                    "--models", "pooled", "--reference", "pooled", "--draws", "50", "--tune",
                    "50", "--chains", "1", "--quiet", "--out", tmp_path)
    res = _results(tmp_path)
    notes = [w for w in res["warnings"] if "--family bernoulli" in w]
    assert len(notes) == 1 and "union" in notes[0]
    assert "note:" in _cli_out.stdout and "--family bernoulli" in _cli_out.stdout
    assert "--family bernoulli" in (tmp_path / "report.html").read_text("utf-8")


def test_analysis_file_round_trip_of_family_settings(tmp_path):
    from bayespanel.app.runner import Settings, load_settings

    s = Settings(unit="fcode", time="year", formula="totrain ~ grant", data="jobs.csv",
                 family="negative_binomial", exposure="employ", random_slopes=("grant",),
                 centred=True, priors={"inv_sqrt_shape": "half_normal", "lkj_eta": 3.0}).check()
    assert s.models == ("random_intercept", "within_between", "correlated_effects")
    assert s.reference == ("pooled", "mundlak", "within_between")
    path = tmp_path / "analysis.toml"
    path.write_text(s.to_toml(), "utf-8")
    again = load_settings(path)
    for k in ("family", "exposure", "random_slopes", "centred", "models", "reference", "priors"):
        assert getattr(again, k) == getattr(s, k), k


def test_ppc_statistics_fit_the_outcome_range(jobs, wage_panel):
    """Counts in the hundreds get no shares of small values; binary outcomes get the
    switching rate, computed here directly with pandas on the public panels."""
    from bayespanel.bayes.families import ppc_statistics

    d = jobs.sort_values(["fcode", "year"])
    codes = pd.factorize(d["fcode"])[0]
    y = d["employ"].to_numpy(float)
    checks = {lab: (o, r) for lab, o, r in ppc_statistics("poisson", y, y[None, :] + 1, codes)}
    assert "share of zeros" not in checks and "mean count" in checks
    assert checks["variance-to-mean ratio"][0] == pytest.approx(y.var() / y.mean())
    w = wage_panel.sort_values(["nr", "year"])
    u = w["union"].to_numpy(float)
    codes = pd.factorize(w["nr"])[0]
    checks = {lab: o for lab, o, _ in ppc_statistics("bernoulli", u, u[None, :], codes,
                                                     occasion_codes=pd.factorize(w["year"])[0])}
    switches = w.groupby("nr")["union"].apply(lambda s: (s.diff().dropna() != 0).sum()).sum()
    assert checks["switching rate"] == pytest.approx(switches / (len(w) - w["nr"].nunique()))
    assert checks["SD of occasion rates"] == pytest.approx(w.groupby("year")["union"].mean()
                                                           .std(ddof=0))
