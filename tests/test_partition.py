"""Variance partition: ICC, quasi-demeaning shares and Rights-Sterba explained variance.

Outside checks:
* Rights and Sterba (2019, Psychological Methods 24, 309-338): the shares of total, within
  and between variance sum to one per draw, and the variance parts equal direct variance
  computations of the simulated components (simulation with known truth).
* Mundlak (1978): the Mundlak and within-between models are reparametrisations of each
  other, so their partitions coincide; checked on the wage panel of Vella and Verbeek
  (1998) shipped by linearmodels.
* The reference module's own ICC and GLS quasi-demeaning shares (Baltagi 2021, section 2.3)
  for the plug-in counterpart.
"""

import warnings

import numpy as np
import pandas as pd
import pytest

import bayespanel as bp
from bayespanel.core.errors import SpecificationError
from bayespanel.analysis.partition import design_columns, partition_draws, variance_partition

SHARE_GROUPS = {
    "total": ["total: within part", "total: between part", "total: unit intercepts",
              "total: occasion residual"],
    "within": ["within: within part", "within: occasion residual"],
    "between": ["between: between part", "between: unit intercepts"],
}


@pytest.fixture(scope="module")
def simulated():
    """Simulated panel with known components (N = 3000 units, T = 4)."""
    rng = np.random.default_rng(2019)
    N, T = 3000, 4
    codes = np.repeat(np.arange(N), T)
    xbar = rng.normal(2.0, 1.5, N)
    x = xbar[codes] + rng.normal(0, 1.0, N * T)
    z = rng.binomial(1, 0.4, N).astype(float)[codes]
    xm = np.bincount(codes, weights=x)[codes] / T        # unit means of the sample
    truth = dict(gw=0.8, gb=2.0, gz=-1.5, tau=1.2, sigma=0.9)
    within = truth["gw"] * (x - xm)
    between = truth["gb"] * xm + truth["gz"] * z
    u = rng.normal(0, truth["tau"], N)[codes]
    e = rng.normal(0, truth["sigma"], N * T)
    y = 1.0 + within + between + u + e
    X = np.column_stack([np.ones(N * T), x, z])
    return dict(X=X, y=y, codes=codes, within=within, between=between, u=u, e=e,
                truth=truth, terms=["Intercept", "x", "z"])


def test_parts_equal_direct_variance_of_simulated_components(simulated):
    s, t = simulated, simulated["truth"]
    labels = ["Intercept", "x (within)", "x (between)", "z"]
    coef = np.array([[1.0, t["gw"], t["gb"], t["gz"]]])
    out = partition_draws(s["X"], s["codes"], s["terms"], ["x"], "within_between", labels,
                          coef, np.array([t["sigma"]]), np.array([t["tau"]]))
    # direct variance computations (divisor n) of the simulated fixed-part components
    assert out["variance: within part"][0] == pytest.approx(np.var(s["within"]), rel=1e-10)
    assert out["variance: between part"][0] == pytest.approx(np.var(s["between"]), rel=1e-10)
    # shares against the realised variance of every simulated component; the random parts
    # differ from their true variances by sampling noise only (n = 12000 rows)
    parts = {"within": np.var(s["within"]), "between": np.var(s["between"]),
             "u": np.var(s["u"]), "e": np.var(s["e"])}
    tot = sum(parts.values())
    assert out["total: within part"][0] == pytest.approx(parts["within"] / tot, abs=0.01)
    assert out["total: unit intercepts"][0] == pytest.approx(parts["u"] / tot, abs=0.01)
    assert out["within: within part"][0] == pytest.approx(
        parts["within"] / (parts["within"] + parts["e"]), abs=0.01)
    assert out["between: unit intercepts"][0] == pytest.approx(
        parts["u"] / (parts["u"] + parts["between"]), abs=0.01)
    # the model-implied total is the variance of the outcome (to sampling noise)
    total = sum(out[f"variance: {p}"][0] for p in ("within part", "between part",
                                                    "unit intercepts", "occasion residual"))
    assert total == pytest.approx(np.var(s["y"]), rel=0.03)
    for names in SHARE_GROUPS.values():
        assert sum(out[n][0] for n in names) == pytest.approx(1.0, abs=1e-12)
    assert out["ICC"][0] == pytest.approx(t["tau"] ** 2 / (t["tau"] ** 2 + t["sigma"] ** 2))
    assert out["theta (T=4)"][0] == pytest.approx(
        1 - np.sqrt(t["sigma"] ** 2 / (t["sigma"] ** 2 + 4 * t["tau"] ** 2)))


def test_random_intercept_coefficients_act_on_both_parts(simulated):
    s = simulated
    rows = partition_draws(s["X"], s["codes"], s["terms"], ["x"], "random", s["terms"],
                           np.array([[1.0, 0.8, -1.5]]), np.array([0.9]), np.array([1.2]))
    wb = partition_draws(s["X"], s["codes"], s["terms"], ["x"], "within_between",
                         ["Intercept", "x (within)", "x (between)", "z"],
                         np.array([[1.0, 0.8, 0.8, -1.5]]), np.array([0.9]), np.array([1.2]))
    for k in rows:
        np.testing.assert_allclose(rows[k], wb[k], rtol=1e-12)


@pytest.fixture(scope="module")
def wage(wage_panel):
    return bp.Panel(wage_panel, unit="nr", time="year")


WAGE = "lwage ~ exper + hours + married + union + educ + black"


def test_mundlak_and_within_between_partitions_coincide_on_wage_panel(wage):
    # Mundlak (1978): the two models are one model in two parametrisations
    mu = bp.reference.mundlak(wage, WAGE, method="reml")
    wb = bp.reference.within_between(wage, WAGE, method="reml")
    d = wb.design
    a = variance_partition(d.X, d.unit_codes, "random", d.terms, np.zeros((1, d.k)),
                           np.ones(1), np.ones(1), reference=mu).reference
    b = variance_partition(d.X, d.unit_codes, "random", d.terms, np.zeros((1, d.k)),
                           np.ones(1), np.ones(1), reference=wb).reference
    pd.testing.assert_series_equal(a, b, rtol=1e-6)
    # the plug-in ICC and quasi-demeaning share agree with the reference module's own
    own = wb.variance_partition().estimates
    assert b["ICC"] == pytest.approx(own["ICC"], rel=1e-10)
    assert b["theta (T=8)"] == pytest.approx(own["theta (T=8)"], rel=1e-10)
    for names in SHARE_GROUPS.values():
        assert sum(b[n] for n in names) == pytest.approx(1.0, abs=1e-12)


def test_fixed_effects_partition_has_the_within_level_only(simulated):
    s = simulated
    out = partition_draws(s["X"], s["codes"], s["terms"], ["x"], "within", ["x"],
                          np.array([[0.8], [0.7]]), np.array([0.9, 1.0]), None)
    assert np.isnan(out["ICC"]).all() and np.isnan(out["total: within part"]).all()
    assert out["variance: within part"][0] == pytest.approx(np.var(s["within"]), rel=1e-10)
    np.testing.assert_allclose(out["within: within part"] + out["within: occasion residual"], 1)


def test_design_columns_rebuild_the_original_covariates(wage):
    d = wage.design(WAGE)
    for kind in ("within_between", "mundlak", "random"):
        M, labels = d.matrices(kind)
        X, terms, tv = design_columns(M, d.unit_codes, labels, kind)
        assert terms == d.terms and tv == d.time_varying
        np.testing.assert_allclose(X, d.X, rtol=1e-12, atol=1e-12)
    with pytest.raises(SpecificationError, match="kind='between'"):
        design_columns(d.X, d.unit_codes, d.terms, "between")


@pytest.fixture(scope="module")
def demo_posts(demo):
    from bayespanel.bayes import WithinBetween

    df, truth = demo
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        panel = bp.Panel(df, unit=truth["unit"], time=truth["time"])
        kw = dict(draws=300, tune=300, chains=2, seed=3, progress=False, cores=1)
        wb = WithinBetween(panel, truth["formula"]).sample(**kw)
        ref = bp.reference.within_between(panel, truth["formula"], method="reml")
    return wb, ref, truth, df


def test_posterior_partition_per_draw_and_beside_reference(demo_posts):
    wb, ref, truth, _ = demo_posts
    part = wb.variance_partition(reference=ref)
    draws = part.draws
    assert len(draws) == 600
    for names in SHARE_GROUPS.values():   # Rights and Sterba (2019): per draw, exactly
        np.testing.assert_allclose(draws[names].sum(axis=1), 1.0, atol=1e-12)
    tab = part.table(0.95)
    assert list(tab.columns) == ["mean", "median", "sd", "lower", "upper", "reference"]
    # the demo's true ICC (known by simulation) lies in the 95% interval
    assert tab.loc["ICC", "lower"] < truth["icc"] < tab.loc["ICC", "upper"]
    assert tab.loc["ICC", "reference"] == pytest.approx(ref.icc)
    np.testing.assert_allclose(draws["occasion SD"], wb.draws("sigma_obs").ravel())
    rec = {r["quantity"]: r for r in part.to_record()["summary"]}
    assert rec["ICC"]["reference"] == pytest.approx(ref.icc)
    df = demo_posts[3]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        other = bp.reference.within_between(
            bp.Panel(df[df["clinic"] != df["clinic"].iloc[0]], unit="clinic", time="quarter"),
            truth["formula"])
    with pytest.raises(SpecificationError, match="same estimation rows"):
        wb.variance_partition(reference=other)
