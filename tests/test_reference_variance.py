"""Variance components, ICC, variance partition and the handling of awkward units.

Outside checks: the six-target, four-judge ratings of Shrout and Fleiss (1979,
Psychological Bulletin 86), ICC(1,1) about 0.17 (table and value RECALLED FROM MEMORY),
against the one-way ANOVA formula and scipy-free arithmetic; statsmodels MixedLM on an
unbalanced panel; linearmodels PanelOLS for singleton units; the definition of the GLS
quasi-demeaning share (Baltagi, Econometric Analysis of Panel Data, ch. 2).
"""

import warnings

import numpy as np
import pandas as pd
import pytest

import bayespanel as bp
from bayespanel.core.errors import DataHandlingWarning

# Shrout and Fleiss (1979), Table 2: 6 targets rated by 4 judges (RECALLED FROM MEMORY)
RATINGS = np.array([[9, 2, 5, 8], [6, 1, 3, 2], [8, 4, 6, 8], [7, 1, 2, 6], [10, 5, 6, 9],
                    [6, 2, 4, 7]], dtype=float)


@pytest.fixture(scope="module")
def ratings_panel():
    n, k = RATINGS.shape
    df = pd.DataFrame({"target": np.repeat(np.arange(1, n + 1), k),
                       "judge": np.tile(np.arange(1, k + 1), n), "rating": RATINGS.ravel()})
    return bp.Panel(df, unit="target", time="judge")


def test_icc_one_way_equals_shrout_fleiss(ratings_panel):
    """Source: Shrout and Fleiss (1979), ICC(1,1) = (BMS - WMS) / (BMS + (k-1) WMS),
    about 0.17 on their ratings example (recalled from memory)."""
    res = bp.reference.random(ratings_panel, "rating ~ 1")
    n, k = RATINGS.shape
    means = RATINGS.mean(axis=1)
    bms = k * ((means - RATINGS.mean()) ** 2).sum() / (n - 1)
    wms = ((RATINGS - means[:, None]) ** 2).sum() / (n * (k - 1))
    icc11 = (bms - wms) / (bms + (k - 1) * wms)
    assert res.icc == pytest.approx(icc11, rel=1e-12)
    assert round(res.icc, 2) == 0.17
    vp = res.variance_partition().table()
    assert vp.loc["ICC", "estimate"] == pytest.approx(icc11)
    assert vp.loc["occasion SD", "estimate"] == pytest.approx(np.sqrt(wms))


def test_variance_partition_theta_per_panel_length(grunfeld):
    """Source: theta_T = 1 - sqrt(sigma_obs^2 / (sigma_obs^2 + T sigma_unit^2)) (Baltagi ch. 2),
    one row per distinct panel length on an unbalanced panel."""
    df = grunfeld[~((grunfeld.firm == "IBM") & (grunfeld.year > 1949))]
    df = df[~((df.firm == "Chrysler") & (df.year < 1940))]
    res = bp.reference.random(bp.Panel(df, unit="firm", time="year"),
                              "invest ~ value + capital")
    part = res.variance_partition()
    assert isinstance(part, bp.partition.PartitionResult)  # the type posteriors return
    vp = part.table()
    rows = [r for r in vp.index if r.startswith("theta")]
    assert rows == ["theta (T=15)", "theta (T=20)"]
    s2u, s2e = res.sigma_unit ** 2, res.sigma_obs ** 2
    for T in (15, 20):
        assert vp.loc[f"theta (T={T})", "estimate"] == pytest.approx(
            1 - np.sqrt(s2e / (s2e + T * s2u)))
    assert vp.loc["theta (T=20)", "units"] == 8
    assert vp.loc["unit SD", "estimate"] == pytest.approx(res.sigma_unit)


@pytest.mark.parametrize("method", ["ml", "reml"])
def test_unbalanced_likelihood_fit_equals_statsmodels(grunfeld, method):
    """Source: statsmodels MixedLM on an unbalanced subset of Grunfeld."""
    import statsmodels.formula.api as smf

    rng = np.random.default_rng(4)
    df = grunfeld.drop(index=rng.choice(len(grunfeld), 60, replace=False)).reset_index(drop=True)
    res = bp.reference.random(bp.Panel(df, unit="firm", time="year"),
                              "invest ~ value + capital", method=method)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = smf.mixedlm("invest ~ value + capital", df, groups=df["firm"]).fit(
            reml=method == "reml", method=["lbfgs"])
    np.testing.assert_allclose(res.sigma_obs ** 2, ref.scale, rtol=1e-4)
    np.testing.assert_allclose(res.sigma_unit ** 2, float(ref.cov_re.iloc[0, 0]), rtol=1e-3)
    assert res.loglik >= ref.llf - 1e-8
    assert res.df_resid.map(np.isinf).all()  # likelihood fits use the normal reference


def test_zero_unit_variance_is_a_boundary_fit():
    """Source: statsmodels MixedLM agrees that the ML unit variance is (near) zero when the
    data have no unit effect; Swamy-Arora truncates at zero."""
    rng = np.random.default_rng(9)
    G, T = 12, 4
    df = pd.DataFrame({"u": np.repeat(np.arange(G), T), "t": np.tile(np.arange(T), G)})
    df["x"] = rng.normal(size=len(df))
    df["y"] = df.x + rng.normal(size=len(df))
    # remove any unit-level signal exactly: subtract the unit means of the noise
    df["y"] = df.x + (df.y - df.x) - (df.y - df.x).groupby(df.u).transform("mean")
    panel = bp.Panel(df, unit="u", time="t")
    sa = bp.reference.random(panel, "y ~ x")
    ml = bp.reference.random(panel, "y ~ x", method="ml")
    assert sa.sigma_unit == 0.0 and ml.sigma_unit == pytest.approx(0.0, abs=1e-6)
    assert ml.extra["boundary"]
    po = bp.reference.pooled(panel, "y ~ x")
    np.testing.assert_allclose(ml.coef, po.coef, rtol=1e-8)


def test_singleton_units_dropped_from_within_with_count(grunfeld):
    """Source: linearmodels PanelOLS (entity effects) on the same rows: singletons carry no
    within information, so the estimates and SEs are unchanged; we say how many."""
    from linearmodels import PanelOLS

    extra = pd.DataFrame({"firm": ["Solo A", "Solo B"], "year": [1940, 1941],
                          "invest": [10.0, 20.0], "value": [100.0, 300.0],
                          "capital": [5.0, 1.0]})
    df = pd.concat([grunfeld, extra], ignore_index=True)
    with pytest.warns(DataHandlingWarning, match="2 unit"):
        res = bp.reference.within(bp.Panel(df, unit="firm", time="year"),
                                  "invest ~ value + capital")
    assert res.n_units == 10 and res.n_obs == 200
    d = grunfeld.set_index(["firm", "year"])
    X = d[["value", "capital"]].copy()
    X.insert(0, "Intercept", 1.0)
    ref = PanelOLS(d["invest"], X, entity_effects=True).fit()
    np.testing.assert_allclose(res.coef, ref.params[["value", "capital"]], rtol=1e-8)
    np.testing.assert_allclose(res.se, ref.std_errors[["value", "capital"]], rtol=1e-8)


def test_only_time_constant_covariates_refused(grunfeld):
    """Fixed effects cannot estimate coefficients of covariates constant within units
    (published identity: demeaning removes them)."""
    df = grunfeld.copy()
    df["size"] = df.groupby("firm")["value"].transform("mean")
    with pytest.raises(bp.EstimationError, match="varies within"):
        bp.reference.within(bp.Panel(df, unit="firm", time="year"), "invest ~ size")
