"""One result shape: a reference fit, a Gaussian posterior and a latent-effect posterior
answer the same questions with the same names and types (bayespanel.data.resultshape).

Outside checks, each named beside its assertion:
- linearmodels RandomEffects (Swamy-Arora) on the same rows: coefficients, standard errors,
  intervals (normal quantiles from scipy), rows and units;
- statsmodels' Grunfeld investment panel (conftest.py), 10 firms x 20 years.
"""

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import bayespanel as bp
from bayespanel.data import resultshape

FORMULA = "invest ~ value + capital"


@pytest.fixture(scope="module")
def panel(grunfeld):
    return bp.Panel(grunfeld, unit="firm", time="year")


@pytest.fixture(scope="module")
def linearmodels_re(grunfeld):
    from linearmodels import RandomEffects

    d = grunfeld.set_index(["firm", "year"])
    X = d[["value", "capital"]].copy()
    X.insert(0, "Intercept", 1.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return RandomEffects(d["invest"], X).fit()


@pytest.fixture(scope="module")
def fits(panel):
    """The three kinds of result, on the same rows."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = bp.reference.random(panel, FORMULA)
        gauss = bp.RandomIntercept(panel, FORMULA).sample(draws=200, tune=200, chains=2,
                                                         seed=3, progress=False)
        latent = bp.RandomIntercept(panel, FORMULA, family="student_t").sample(
            draws=200, tune=200, chains=2, seed=3, progress=False)
    assert type(latent).__name__ == "LatentPosterior"
    return {"reference": ref, "gaussian": gauss, "latent": latent}


@pytest.mark.parametrize("which", ["reference", "gaussian", "latent"])
def test_same_names_and_types(fits, which, linearmodels_re):
    fit = fits[which]
    terms = ["Intercept", "value", "capital"]
    # coef: a Series of point values by term
    assert isinstance(fit.coef, pd.Series) and list(fit.coef.index) == terms
    assert fit.coef.name == "estimate"
    # the error column is named and reachable under its name
    assert fit.error_name == ("se" if which == "reference" else "sd")
    err = fit.error
    assert isinstance(err, pd.Series) and err.name == fit.error_name
    np.testing.assert_array_equal(err.to_numpy(), getattr(fit, fit.error_name).to_numpy())
    assert (err > 0).all()
    # interval(prob): lower and upper by term, around the point value
    ci = fit.interval(0.9)
    assert list(ci.columns) == ["lower", "upper"] and list(ci.index) == terms
    assert (ci["lower"] < fit.coef).all() and (fit.coef < ci["upper"]).all()
    # table(prob): the same leading columns, agreeing with the attributes
    tab = fit.table(0.9)
    lead = resultshape.leading_columns(fit.error_name)
    assert list(tab.columns[:4]) == lead == ["estimate", fit.error_name, "lower", "upper"]
    assert tab.attrs["error"] == fit.error_name
    np.testing.assert_allclose(tab.loc[terms, "estimate"], fit.coef, rtol=1e-12)
    np.testing.assert_allclose(tab.loc[terms, "lower"], ci["lower"], rtol=1e-12)
    # icc, n_obs, n_units: the same types
    # (Student-t: the ICC is 0 in draws with nu <= 2, where the occasion variance is
    # infinite, docs/families.md)
    assert isinstance(fit.icc, float) and 0 <= fit.icc < 1
    assert isinstance(fit.n_obs, int) and isinstance(fit.n_units, int)
    # linearmodels counts the same rows and units
    assert fit.n_obs == int(linearmodels_re.nobs) == 200
    assert fit.n_units == int(linearmodels_re.entity_info["total"]) == 10
    # variance_partition(): one type; its ICC is the fit's icc (posteriors: per draw, the
    # latent model's on the latent scale)
    part = fit.variance_partition()
    assert isinstance(part, resultshape.PartitionResult)
    assert part.estimates["ICC"] == pytest.approx(fit.icc, rel=1e-9, abs=1e-12)
    assert {"unit SD", "occasion SD", "ICC"} <= set(part.table().index)
    if which != "reference":
        np.testing.assert_allclose(part.draws["ICC"], fit.draws("icc").ravel(), rtol=1e-9,
                                   atol=1e-12)


def test_reference_numbers_match_linearmodels(fits, linearmodels_re):
    """Source: linearmodels RandomEffects (Swamy-Arora) on the same rows, 1e-6; its
    intervals are normal, so ours are checked against scipy's normal quantile."""
    ref = fits["reference"]
    np.testing.assert_allclose(ref.coef, linearmodels_re.params, rtol=1e-6)
    np.testing.assert_allclose(ref.error, linearmodels_re.std_errors, rtol=1e-6)
    tab = ref.table(0.9)
    z = stats.norm.ppf(0.95)
    if np.isfinite(tab["df"]).all():
        z = stats.t.ppf(0.95, tab["df"].to_numpy())
    np.testing.assert_allclose(tab["upper"] - tab["estimate"], z * tab["se"], rtol=1e-12)


def test_posterior_numbers_from_draws(fits):
    """The posterior's point value and error are the mean and SD of its draws; the icc is
    the mean of sigma_unit^2 / (sigma_unit^2 + s^2) draws (numpy on the draws)."""
    for which in ("gaussian", "latent"):
        post = fits[which]
        coef = post.draws("coef").reshape(-1, 3)
        np.testing.assert_allclose(post.coef, coef.mean(axis=0), rtol=1e-12)
        np.testing.assert_allclose(post.error, coef.std(axis=0, ddof=1), rtol=1e-12)
        np.testing.assert_allclose(post.interval(0.9)["upper"],
                                   np.quantile(coef, 0.95, axis=0), rtol=1e-12)
    g = fits["gaussian"]
    tau, sigma = g.draws("sigma_unit").ravel(), g.draws("sigma_obs").ravel()
    assert g.icc == pytest.approx(np.mean(tau ** 2 / (tau ** 2 + sigma ** 2)), rel=1e-10)


def test_one_interval_default(fits):
    """Every interval a fit reports by default has the same probability."""
    p = resultshape.DEFAULT_INTERVAL
    lo, hi = (1 - p) / 2, (1 + p) / 2
    for fit in fits.values():
        assert fit.table().attrs["prob"] == p
        pd.testing.assert_frame_equal(fit.interval(), fit.interval(p))
    latent = fits["latent"]
    icc = latent.flat_draws("icc")
    row = latent.icc_table().iloc[0]
    assert row[f"lower {100 * p:g}%"] == pytest.approx(np.quantile(icc, lo), rel=1e-12)
    assert row[f"upper {100 * p:g}%"] == pytest.approx(np.quantile(icc, hi), rel=1e-12)
    assert f"lower {100 * p:g}%" in latent.average_marginal_effects().columns
    assert f"replicated lower {100 * p:g}%" in latent.ppc(draws=50).columns
    s = fits["gaussian"].summary()
    assert {f"{100 * lo:.10g}%", f"{100 * hi:.10g}%"} <= set(s.columns)
    with pytest.raises(bp.errors.SpecificationError, match="prob=1.5"):
        fits["reference"].interval(1.5)


def test_the_interval_default_is_one_option_read_when_called(fits, grunfeld):
    """bp.set_option("interval", p) changes every default interval at once (read at call
    time; option_context restores it) and the run's setting. Plumbing: each default is
    compared with the same call given the probability (whose numbers the tests above
    check against linearmodels and the draws)."""
    from bayespanel.app.runner import Settings

    assert bp.get_option("interval") == resultshape.DEFAULT_INTERVAL == 0.95
    with bp.option_context(interval=0.8):
        for fit in fits.values():
            assert fit.table().attrs["prob"] == 0.8
            pd.testing.assert_frame_equal(fit.interval(), fit.interval(0.8))
        latent = fits["latent"]
        assert "lower 80%" in latent.icc_table().columns
        assert "lower 80%" in latent.average_marginal_effects().columns
        assert "replicated lower 80%" in latent.ppc(draws=50).columns
        assert {"10%", "90%"} <= set(fits["gaussian"].summary().columns)
        assert Settings(unit="firm", time="year", formula=FORMULA).interval == 0.8
    assert bp.get_option("interval") == 0.95 and fits["reference"].table().attrs["prob"] == 0.95
    previous = bp.set_option("interval", 0.5)
    try:
        assert previous == 0.95 and fits["gaussian"].table().attrs["prob"] == 0.5
    finally:
        bp.set_option("interval", previous)
    with pytest.raises(bp.errors.SpecificationError, match="interval=1.5"):
        bp.set_option("interval", 1.5)
    with pytest.raises(bp.errors.SpecificationError, match="option='intervals'"):
        bp.get_option("intervals")


def test_records_are_what_results_json_holds(fits, linearmodels_re):
    """Each result's to_record() is its part of results.json: the schema's keys, the
    numbers of its table (linearmodels for the reference fit's), nan as None."""
    ref = fits["reference"].to_record(0.9)
    assert [c["term"] for c in ref["coefficients"]] == ["Intercept", "value", "capital"]
    np.testing.assert_allclose([c["estimate"] for c in ref["coefficients"]],
                               linearmodels_re.params, rtol=1e-6)  # linearmodels
    np.testing.assert_allclose([c["se"] for c in ref["coefficients"]],
                               linearmodels_re.std_errors, rtol=1e-6)
    assert ref["n_obs"] == 200 and ref["n_units"] == 10 and ref["icc"] == fits["reference"].icc
    for which in ("gaussian", "latent"):
        post = fits[which]
        rec = post.to_record(0.9)
        tab = post.table(0.9)
        assert [c["term"] for c in rec["coefficients"]] == post.labels
        for c in rec["coefficients"]:
            assert c["estimate"] == tab.at[c["term"], "estimate"]
            assert c["lower"] == tab.at[c["term"], "lower"]
        names = [q["name"] for q in rec["scale"]]
        assert "icc" in names and "sigma_unit" in names
        assert rec["diagnostics"]["draws"] == 400


def test_older_results_files_are_read_with_todays_keys(tmp_path):
    """A 1.1 to 1.4 results.json (keys before one name per quantity) loads with today's
    keys and passes the schema (jsonschema); today's file loads unchanged."""
    import copy
    import json
    from pathlib import Path

    from bayespanel.report.results_json import SCHEMA_VERSION, load_results

    kept = json.loads((Path(__file__).parent / "golden" / "demo_results.json").read_text())
    assert kept["schema_version"] == SCHEMA_VERSION == "1.5.0"
    assert any(m.get("contrasts") for m in kept["models"])
    assert any(m.get("variance_partition") for m in kept["models"])
    for version in ("1.1.0", "1.2.0", "1.3.0", "1.4.0"):
        old = copy.deepcopy(kept)
        old["schema_version"] = version
        for m in old["models"]:
            vp = m.get("variance_partition") or {}
            for rec in vp.get("summary", []) + vp.get("theta", []):  # 1.5 renamed these
                rec["mean"] = rec.pop("estimate")
            if version == "1.4.0":
                continue
            for rec in m.get("contrasts") or []:  # 1.4 renamed these
                rec["mean"] = rec.pop("estimate")
            if version == "1.1.0":  # 1.2 renamed these
                for rec in m["coefficients"] + m["scale"]:
                    rec["mean"] = rec.pop("estimate")
                m["loo"]["n_high_k"] = m["loo"].pop("n_high_pareto_k")
        (tmp_path / "results.json").write_text(json.dumps(old), "utf-8")
        got = load_results(tmp_path)
        assert got["schema_version"] == version  # as written
        for m, k in zip(got["models"], kept["models"]):
            assert m["coefficients"] == k["coefficients"] and m["scale"] == k["scale"]
            assert m["loo"] == k["loo"] and m.get("contrasts") == k.get("contrasts")
            assert m["variance_partition"] == k["variance_partition"]
    (tmp_path / "results.json").write_text(json.dumps(kept), "utf-8")
    assert load_results(tmp_path) == kept
