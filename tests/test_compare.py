"""bp.compare and the side-by-side coefficient table.

Outside checks:
* arviz_stats.compare: for the Bayesian models our paired SE of the ELPD difference and
  the stacking weights (Yao et al. 2018) equal arviz-stats' on the same pointwise values.
* The paired-difference SE of Vehtari, Gelman and Gabry (2017, section 5.2),
  ``sqrt(n var(d_i))``, computed by hand.
* Exact leave-one-unit-out refits (K-fold with one unit per fold): PSIS-LOO at the unit
  level agrees with them within its SE (Vehtari, Gelman and Gabry 2017).
Data: the demo scenario (simulated, known truth) and the Grunfeld panel shipped by
statsmodels for the row check.
"""

import json
import warnings

import numpy as np
import pytest

import bayespanel as bp
from bayespanel.analysis.comparison import COMPARE_COLUMNS, coef_table, compare
from bayespanel.core.errors import SpecificationError

KW = dict(draws=300, tune=300, chains=2, seed=9, progress=False, cores=1)


@pytest.fixture(scope="module")
def fits(demo):
    from bayespanel.bayes import RandomIntercept, WithinBetween

    df, truth = demo
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        panel = bp.Panel(df, unit=truth["unit"], time=truth["time"])
        f = truth["formula"]
        out = {"RE (Bayes)": RandomIntercept(panel, f).sample(**KW),
               "WB (Bayes)": WithinBetween(panel, f).sample(**KW),
               "RE (SA)": bp.reference.random(panel, f),
               "FE": bp.reference.within(panel, f, cov="cluster"),
               "WB (SA)": bp.reference.within_between(panel, f)}
    return out, panel, truth


def test_compare_occasion_level_table(fits):
    models, _, _ = fits
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tab = compare(models, level="occasion")
    assert list(tab.columns) == COMPARE_COLUMNS
    assert tab["elpd"].is_monotonic_decreasing and tab["elpd_diff"].iloc[0] == 0.0
    assert (tab["level"] == "occasion").all()
    bayes = tab.index.isin(["RE (Bayes)", "WB (Bayes)"])
    assert set(tab.loc[bayes, "method"]) <= {"PSIS-LOO", "PSIS-LOO + exact refits"}
    assert (tab.loc[~bayes, "method"] == "exact CV").all()
    assert tab.loc[bayes, "weight"].sum() == pytest.approx(1.0, abs=1e-6)
    assert tab.loc[~bayes, "weight"].isna().all() and tab.loc[~bayes, "p_loo"].isna().all()
    # paired SE of the difference, by hand (Vehtari, Gelman and Gabry 2017, 5.2)
    best = tab.index[0]
    check = [n for n in ("RE (Bayes)", "FE") if n != best][:1] + [best]
    lo = {n: (models[n].loo("occasion") if hasattr(models[n], "idata") else
              bp.loo.reference_cv(models[n], "occasion")).elpd_i for n in check}
    for name in check[:-1]:
        d = lo[name] - lo[best]
        assert tab.loc[name, "elpd_diff"] == pytest.approx(d.sum(), rel=1e-10)
        assert tab.loc[name, "se_diff"] == pytest.approx(np.sqrt(len(d) * np.var(d, ddof=1)),
                                                         rel=1e-10)
    json.loads(tab.to_json())   # JSON-serialisable for the report


def test_bayesian_rows_match_arviz_compare(fits):
    import arviz_stats

    models, _, _ = fits
    names = ["RE (Bayes)", "WB (Bayes)"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ours = compare({n: models[n] for n in names}, level="unit")
        theirs = arviz_stats.compare({n: bp.loo.loo(models[n], "unit").elpd_data for n in names},
                                     round_to="none")
    for n in names:
        assert ours.loc[n, "elpd"] == pytest.approx(theirs.loc[n, "elpd"], rel=1e-10)
        assert ours.loc[n, "se"] == pytest.approx(theirs.loc[n, "se"], rel=1e-10)
        # arviz-stats' compare uses the divisor n in var(d_i); we use n - 1, as for the SE
        # of the ELPD itself (Vehtari, Gelman and Gabry 2017, eq. 23-24)
        n_pts = ours.loc[n, "n_points"]
        assert ours.loc[n, "se_diff"] == pytest.approx(
            theirs.loc[n, "dse"] * np.sqrt(n_pts / (n_pts - 1)), rel=1e-8, abs=1e-12)
        assert ours.loc[n, "weight"] == pytest.approx(theirs.loc[n, "weight"], abs=1e-4)
        assert ours.loc[n, "p_loo"] == pytest.approx(theirs.loc[n, "p"], rel=1e-8)


def test_unit_level_lists_fixed_effects_with_the_reason(fits):
    models, _, _ = fits
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tab = compare(models, level="unit")
    assert tab.index[-1] == "FE" and np.isnan(tab.loc["FE", "elpd"])
    assert tab.loc["FE", "method"] == "undefined"
    assert "new unit" in tab.loc["FE", "note"]
    assert tab["n_points"].iloc[0] == models["RE (SA)"].n_units
    assert tab.loc["RE (SA)", "method"] == "exact CV"
    # the table's record is the results.json comparison record (its schema, jsonschema)
    from bayespanel.report.results_json import schema

    import jsonschema

    rec = tab.to_record({"FE": "fixed effects (ref.)"}, reference_folds=None)
    assert rec["level"] == "unit" and [r["model"] for r in rec["rows"]] == list(tab.index)
    by = {r["model"]: r for r in rec["rows"]}
    assert by["FE"]["title"] == "fixed effects (ref.)" and by["FE"]["elpd"] is None
    assert {n: by[n]["kind"] for n in ("RE (Bayes)", "RE (SA)", "FE")} == {
        "RE (Bayes)": "bayesian", "RE (SA)": "reference", "FE": "reference"}
    assert by["RE (SA)"]["elpd"] == tab.loc["RE (SA)", "elpd"]
    row_schema = {**schema()["$defs"]["comparison_row"], "$defs": schema()["$defs"]}
    for r in rec["rows"]:
        jsonschema.validate(r, row_schema)


def test_compare_refuses_different_rows_and_bad_options(fits, grunfeld):
    models, _, _ = fits
    other = bp.reference.pooled(bp.Panel(grunfeld, unit="firm", time="year"),
                                "invest ~ value + capital")
    with pytest.raises(SpecificationError, match="'grunfeld' is not fitted on the same rows"):
        compare({"RE (SA)": models["RE (SA)"], "grunfeld": other})
    with pytest.raises(SpecificationError, match="level='row'"):
        compare(models, level="row")
    with pytest.raises(SpecificationError, match="Posterior, a ReferenceResult"):
        compare({"x": 3.0})


def test_coef_table_aligns_terms(fits):
    models, _, _ = fits
    tab = coef_table(models, prob=0.9)
    assert list(tab.index[-3:]) == ["sigma_unit", "sigma_obs", "ICC"]
    for name, m in models.items():
        own = m.table(0.9)
        est = own["estimate"] if "estimate" in own else own["coef"]
        for term in est.index:
            if term in tab.index:
                assert tab.loc[term, (name, "estimate")] == pytest.approx(est[term])
    assert np.isnan(tab.loc["staffing (within)", ("RE (Bayes)", "estimate")])
    assert np.isnan(tab.loc["rural", ("FE", "estimate")])   # not estimable by fixed effects
    assert tab.loc["staffing", ("FE", "lower")] == pytest.approx(
        models["FE"].interval(0.9).loc["staffing", "lower"])
    long = coef_table(models, shape="long")
    assert set(long["model"]) == set(models)
    json.loads(long.to_json(orient="records"))


@pytest.mark.slow
def test_psis_unit_loo_agrees_with_exact_refits():
    """PSIS-LOO vs exact leave-one-unit-out refits (K-fold with K = number of units)."""
    from bayespanel.bayes import RandomIntercept

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        df, truth = bp.datasets.clinic_panel(n_clinics=6, n_quarters=5, seed=4,
                                             missing_rate=0.0)
        panel = bp.Panel(df, unit="clinic", time="quarter")
        post = RandomIntercept(panel, "satisfaction ~ staffing + caseload").sample(**KW)
        psis = bp.loo.loo(post, "unit")
        exact = bp.loo.kfold(post, "unit", K=6, refit_kwargs={"sampler": "auto"})
    assert exact.n_points == 6 and exact.method == "grouped K-fold (K=6)"
    assert abs(psis.elpd - exact.elpd) < psis.se
    # the exact refit used for high Pareto k is the same computation as a one-unit fold
    from bayespanel.analysis.loo.psis import _exact_points

    j = int(exact.pointwise["position"].iloc[0])
    one = _exact_points(bp.loo.from_posterior(post), "unit", [j], {})
    assert one[0] == pytest.approx(exact.pointwise["elpd"].iloc[0], rel=1e-12)
