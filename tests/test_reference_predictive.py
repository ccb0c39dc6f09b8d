"""Refits and plug-in predictive densities for exact cross-validation.

Outside checks: scipy.stats.multivariate_normal (the marginal density of a unit's rows
under sigma^2 I + tau^2 J, and the conditional of one row given the others by the Schur
complement, as in Burkner, Gabry and Vehtari 2021); refits equal fits of the reduced
panel; linearmodels PanelOLS estimated effects for the fixed-effects plug-in mean.
Data: the Grunfeld panel from statsmodels' datasets.
"""

import numpy as np
import pytest
from scipy import stats

import bayespanel as bp
from bayespanel.reference.predictive import occasion_logpdf, unit_logpdf

FORMULA = "invest ~ value + capital"


@pytest.fixture(scope="module")
def panel(grunfeld):
    return bp.Panel(grunfeld, unit="firm", time="year")


def test_unit_density_equals_scipy_multivariate_normal():
    """Source: scipy.stats.multivariate_normal with covariance sigma^2 I + tau^2 J."""
    rng = np.random.default_rng(1)
    codes = np.repeat([0, 1, 2], [3, 5, 1])
    r = rng.normal(size=len(codes))
    s2, t2 = 1.3, 0.7
    ours = unit_logpdf(r, codes, s2, t2)
    for g in range(3):
        rg = r[codes == g]
        C = s2 * np.eye(len(rg)) + t2
        assert ours[g] == pytest.approx(stats.multivariate_normal(np.zeros(len(rg)), C)
                                        .logpdf(rg))


def test_occasion_density_equals_gaussian_conditional():
    """Source: conditional normal from scipy's joint density (Schur complement)."""
    rng = np.random.default_rng(2)
    T, s2, t2 = 5, 0.8, 1.9
    r = rng.normal(size=T)
    C = s2 * np.eye(T) + t2
    for t in range(T):
        o = [j for j in range(T) if j != t]
        w = C[t, o] @ np.linalg.inv(C[np.ix_(o, o)])
        mean = w @ r[o]
        var = C[t, t] - w @ C[o, t]
        ref = stats.norm(mean, np.sqrt(var)).logpdf(r[t])
        assert occasion_logpdf(r[t], r[o].sum(), T - 1, s2, t2) == pytest.approx(ref)


def test_refit_equals_fit_on_reduced_panel(panel, grunfeld):
    """A refit on a row subset equals fitting the subset from scratch (and linearmodels
    RandomEffects on it)."""
    from linearmodels import RandomEffects

    res = bp.reference.random(panel, FORMULA)
    keep = np.ones(res.design.n, dtype=bool)
    keep[::7] = False
    sub = res.refit(keep)
    rows = res.design.rows[keep]
    direct = bp.reference.random(bp.Panel(grunfeld.loc[rows], unit="firm", time="year"),
                                 FORMULA)
    np.testing.assert_allclose(sub.coef, direct.coef, rtol=1e-10)
    np.testing.assert_allclose(sub.se, direct.se, rtol=1e-10)
    d = grunfeld.loc[rows].set_index(["firm", "year"])
    X = d[["value", "capital"]].copy()
    X.insert(0, "Intercept", 1.0)
    ref = RandomEffects(d["invest"], X).fit(small_sample=True)
    np.testing.assert_allclose(sub.coef.to_numpy(), ref.params.to_numpy(), rtol=1e-6)


def test_exact_holdout_occasion_level_random(panel):
    """Source: scipy conditional normal of the held-out row given the unit's training
    rows, with the refit's plug-in parameters."""
    res = bp.reference.random(panel, FORMULA)
    d = res.design
    test = np.zeros(d.n, dtype=bool)
    test[[3, 25, 47]] = True
    lp = bp.reference.exact_holdout(res, test, level="occasion")
    tr = res.refit(~test, cov="classical")
    s2, t2 = tr.sigma_obs ** 2, tr.sigma_unit ** 2
    for i, row in enumerate(np.flatnonzero(test)):
        u = d.unit_codes[row]
        others = np.flatnonzero((d.unit_codes == u) & ~test)
        r_o = d.y[others] - d.X[others] @ tr.coef.to_numpy()
        r_t = d.y[row] - d.X[row] @ tr.coef.to_numpy()
        C = s2 * np.eye(len(others) + 1) + t2
        w = C[0, 1:] @ np.linalg.inv(C[1:, 1:])
        ref = stats.norm(w @ r_o, np.sqrt(C[0, 0] - w @ C[1:, 0])).logpdf(r_t)
        assert lp[i] == pytest.approx(ref, rel=1e-9)


def test_exact_holdout_unit_level_random_and_pooled(panel):
    """Source: scipy.stats.multivariate_normal for the held-out unit's rows."""
    res = bp.reference.random(panel, FORMULA)
    d = res.design
    test = d.unit_codes == 2
    lp = bp.reference.exact_holdout(res, test, level="unit")
    tr = res.refit(~test)
    r = d.y[test] - d.X[test] @ tr.coef.to_numpy()
    C = tr.sigma_obs ** 2 * np.eye(len(r)) + tr.sigma_unit ** 2
    assert lp.iloc[0] == pytest.approx(stats.multivariate_normal(np.zeros(len(r)), C).logpdf(r))
    assert lp.index[0] == d.units[2]
    po = bp.reference.pooled(panel, FORMULA)
    lpp = bp.reference.exact_holdout(po, test, level="unit")
    trp = po.refit(~test)
    rp = d.y[test] - d.X[test] @ trp.coef.to_numpy()
    assert lpp.iloc[0] == pytest.approx(stats.norm(0, trp.sigma_obs).logpdf(rp).sum())
    with pytest.raises(bp.SpecificationError, match="whole units"):
        bp.reference.exact_holdout(res, np.arange(d.n) == 0, level="unit")


def test_fixed_effects_plugin_mean_uses_linearmodels_effects(panel, grunfeld):
    """Source: linearmodels PanelOLS estimated_effects are the unit intercepts our
    fixed-effects plug-in mean adds (x'b + R/m with all rows of the unit as training)."""
    from linearmodels import PanelOLS

    fe = bp.reference.within(panel, FORMULA)
    d = fe.design
    units = np.asarray(d.units)[d.unit_codes]
    lp = fe.log_predictive(d.X, d.y, units, level="occasion")
    g = grunfeld.set_index(["firm", "year"]).sort_index()
    X = g[["value", "capital"]].copy()
    X.insert(0, "Intercept", 1.0)
    ref = PanelOLS(g["invest"], X, entity_effects=True).fit()
    fitted = (ref.fitted_values.iloc[:, 0] + ref.estimated_effects.iloc[:, 0]).to_numpy()
    m = np.bincount(d.unit_codes)[d.unit_codes]
    sd = fe.sigma_obs * np.sqrt(1 + 1 / m)
    np.testing.assert_allclose(lp, stats.norm(fitted, sd).logpdf(d.y), rtol=1e-8)
    with pytest.raises(bp.EstimationError, match="new unit"):
        fe.log_predictive(d.X, d.y, units, level="unit")


def test_mundlak_holdout_builds_unit_mean_columns(panel):
    """The held-out row's unit-mean columns come from the unit's training rows; checked
    against scipy's conditional normal on the refit's own design."""
    res = bp.reference.mundlak(panel, FORMULA)
    d = res.design
    test = np.zeros(d.n, dtype=bool)
    test[10] = True
    lp = bp.reference.exact_holdout(res, test)
    tr = res.refit(~test)
    M, _ = tr.design.matrices("mundlak")
    u = d.unit_codes[10]
    keep = np.flatnonzero(~test)
    same = d.unit_codes[keep] == u
    b = tr.coef.to_numpy()
    r_o = tr.design.y[same] - M[same] @ b
    xbar = tr.design.unit_means()[tr.design.units.get_loc(d.units[u])]
    m_t = np.concatenate([d.X[10], xbar[1:]])
    r_t = d.y[10] - m_t @ b
    s2, t2 = tr.sigma_obs ** 2, tr.sigma_unit ** 2
    C = s2 * np.eye(len(r_o) + 1) + t2
    w = C[0, 1:] @ np.linalg.inv(C[1:, 1:])
    ref = stats.norm(w @ r_o, np.sqrt(C[0, 0] - w @ C[1:, 0])).logpdf(r_t)
    assert lp[0] == pytest.approx(ref, rel=1e-9)
