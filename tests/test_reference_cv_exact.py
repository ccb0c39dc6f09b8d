"""Exact leave-one-out of the reference fits from downdated sufficient statistics.

Outside checks:
* brute force: the estimator refitted from scratch on the rows without the point
  (:func:`bayespanel.reference.fit_arrays`, statistics recomputed from the rows), scored
  with the same plug-in density; the downdated values equal it to 1e-10;
* statsmodels OLS (pooled, one row left out), linearmodels PanelOLS with entity effects
  (fixed effects, one row left out), linearmodels RandomEffects (Swamy-Arora and the
  Mundlak columns, one unit left out of a balanced panel, which stays balanced) and
  statsmodels MixedLM (REML, one unit left out) on the reduced data, with the held-out
  point scored by scipy.stats (normal and multivariate normal densities).
Data: statsmodels' Grunfeld panel, linearmodels' wage panel (Vella and Verbeek 1998) and
Munnell's state production panel (linearmodels.datasets.munnell).
"""

import warnings

import numpy as np
import pytest
from scipy import stats

import bayespanel as bp
from bayespanel.analysis.loo.reference_cv import _score, exact_loo_values, reference_columns

CASES = [("pooled", None), ("within", None), ("random", "swamy-arora"), ("random", "reml"),
         ("random", "ml"), ("mundlak", "swamy-arora"), ("mundlak", "reml"),
         ("within_between", "swamy-arora")]


@pytest.fixture(scope="module")
def panels(grunfeld, wage_panel):
    from linearmodels.datasets import munnell

    mu = munnell.load()
    mu["lgsp"] = np.log(mu["GSP"])
    wp = wage_panel[wage_panel["nr"].isin(wage_panel["nr"].unique()[:40])]
    return {
        "grunfeld": (bp.Panel(grunfeld, "firm", "year"), "invest ~ value + capital"),
        "wage": (bp.Panel(wp, "nr", "year"),
                 "lwage ~ exper + expersq + union + married + hours + educ + black"),
        "munnell": (bp.Panel(mu, "STATE", "YR"),
                    "lgsp ~ log(P_CAP) + log(PC) + log(EMP) + UNEMP"),
    }


def _fit(panel, formula, est, method):
    kw = {} if method is None else {"method": method}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return getattr(bp.reference, est)(panel, formula, **kw)


@pytest.mark.parametrize("data", ["grunfeld", "wage", "munnell"])
@pytest.mark.parametrize("est,method", CASES)
def test_downdated_refits_equal_brute_force_refits(panels, data, est, method):
    """Brute force: fit_arrays on the rows without the point, statistics from scratch."""
    if data == "munnell" and method in ("ml", "reml"):
        pytest.skip("the likelihood methods are checked on the two other panels (time)")
    panel, formula = panels[data]
    ref = _fit(panel, formula, est, method)
    M, labels = reference_columns(ref)
    d = ref.design
    rng = np.random.default_rng(7)
    for level in ("unit", "occasion"):
        if est == "within" and level == "unit":
            continue
        fast = exact_loo_values(ref, level)
        n_points = d.n_units if level == "unit" else d.n
        pts = rng.choice(n_points, size=min(8, n_points), replace=False)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            brute = [_score(ref, M, labels, (d.unit_codes == p) if level == "unit"
                            else np.arange(d.n) == p, level)[0] for p in pts]
        # Mundlak with Swamy-Arora at the occasion level is the worst conditioned case:
        # the held-out row's unit keeps its full-sample unit means, so the between
        # regression nearly repeats a column (brute force against itself on permuted
        # rows: sigma_unit agrees to about 5e-8 relative on Grunfeld; measured here)
        np.testing.assert_allclose(fast[pts], brute, rtol=1e-10, atol=1e-10)


@pytest.mark.parametrize("est,method", CASES)
def test_a_column_left_constant_is_dropped_as_by_a_refit(panels, est, method):
    """In the first 40 men of the wage panel one is black: without him ``black`` is all
    zeros, and a refit from scratch drops the column. The downdate must drop it too
    (rounding would otherwise leave it in with a meaningless coefficient)."""
    if method == "ml":
        pytest.skip("ML shares the REML code path")
    panel, formula = panels["wage"]
    ref = _fit(panel, formula, est, method)
    M, labels = reference_columns(ref)
    d = ref.design
    black = labels.index("black") if "black" in labels else None
    unit = int(np.unique(d.unit_codes[d.X[:, d.terms.index("black")] == 1])[0])
    levels = ["occasion"] if est == "within" else ["unit", "occasion"]
    for level in levels:
        test = d.unit_codes == unit
        pts = [unit] if level == "unit" else np.flatnonzero(test)[:2]
        fast = exact_loo_values(ref, level)[pts]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            brute = [_score(ref, M, labels, test if level == "unit" else np.arange(d.n) == p,
                            level)[0] for p in pts]
        np.testing.assert_allclose(fast, brute, rtol=1e-10, atol=1e-10)
    assert black is None or est == "within" or np.ptp(M[d.unit_codes != unit, black]) == 0


def _lm_frame(df, unit, time, cols):
    d = df.set_index([unit, time])
    X = d[cols].astype(float).copy()
    X.insert(0, "Intercept", 1.0)
    return d, X


def test_pooled_row_left_out_equals_statsmodels_ols(grunfeld):
    """Source: statsmodels OLS on the rows without row j; scipy normal density of y_j
    with the OLS residual variance ``ssr / (n - k)``."""
    import statsmodels.api as sm

    panel = bp.Panel(grunfeld, "firm", "year")
    ref = _fit(panel, "invest ~ value + capital", "pooled", None)
    d = ref.design
    vals = exact_loo_values(ref, "occasion")
    X = np.column_stack([np.ones(d.n), d.X[:, 1:]])
    for j in (0, 57, 133):
        keep = np.arange(d.n) != j
        ols = sm.OLS(d.y[keep], X[keep]).fit()
        ref_val = stats.norm(X[j] @ ols.params, np.sqrt(ols.scale)).logpdf(d.y[j])
        assert vals[j] == pytest.approx(ref_val, abs=1e-10)


def test_within_row_left_out_equals_linearmodels_panelols(wage_panel):
    """Source: linearmodels PanelOLS(entity_effects) without row j; the held-out row's
    plug-in density is N(x'b + R/m, s2 (1 + 1/m)) with R/m its unit's mean training
    residual (the estimated entity effect) and s2 the residual variance."""
    from linearmodels import PanelOLS

    tv = ["exper", "expersq", "union", "married", "hours"]
    wp = wage_panel[wage_panel["nr"].isin(wage_panel["nr"].unique()[:60])]
    ref = _fit(bp.Panel(wp, "nr", "year"), "lwage ~ " + " + ".join(tv), "within", None)
    vals = exact_loo_values(ref, "occasion")
    d_all, _ = _lm_frame(wp, "nr", "year", tv)
    for j in (3, 200, 401):
        keep = np.arange(len(d_all)) != j
        d = d_all.iloc[keep]
        fit = PanelOLS(d["lwage"], d[tv].astype(float), entity_effects=True).fit()
        s2 = fit.resids.pow(2).sum() / fit.df_resid
        row = d_all.iloc[j]
        unit = d_all.index[j][0]
        u = d.loc[[unit]]
        resid = u["lwage"] - u[tv].astype(float) @ fit.params
        m = len(u)
        mean = row[tv].astype(float) @ fit.params + resid.mean()
        ref_val = stats.norm(mean, np.sqrt(s2 * (1 + 1 / m))).logpdf(row["lwage"])
        assert vals[j] == pytest.approx(ref_val, abs=1e-9)


@pytest.mark.parametrize("est", ["random", "mundlak"])
def test_random_unit_left_out_equals_linearmodels_random_effects(wage_panel, est):
    """Source: linearmodels RandomEffects (Swamy-Arora; on a balanced panel it equals
    ours) on the panel without unit i, with the Mundlak columns (full-sample unit means)
    given as regressors; scipy's multivariate normal density of unit i's rows under
    ``sigma_obs^2 I + sigma_unit^2 J``."""
    from linearmodels import RandomEffects

    tv = ["exper", "expersq", "union", "married"]
    wp = wage_panel[wage_panel["nr"].isin(wage_panel["nr"].unique()[:120])].copy()
    formula = "lwage ~ " + " + ".join(tv + ["educ", "black"])
    ref = _fit(bp.Panel(wp, "nr", "year"), formula, est, "swamy-arora")
    vals = exact_loo_values(ref, "unit")
    cols = tv + ["educ", "black"]
    if est == "mundlak":
        for c in tv:
            wp[f"{c} (unit mean)"] = wp.groupby("nr")[c].transform("mean")
        cols = cols + [f"{c} (unit mean)" for c in tv]
    d_all, X_all = _lm_frame(wp, "nr", "year", cols)
    units = d_all.index.get_level_values(0)
    for i in (0, 41, 119):
        unit = units.unique()[i]
        keep = units != unit
        fit = RandomEffects(d_all["lwage"][keep], X_all[keep]).fit()
        vd = fit.variance_decomposition
        r = d_all["lwage"][~keep].to_numpy() - X_all[~keep].to_numpy() @ fit.params.to_numpy()
        C = vd["Residual"] * np.eye(len(r)) + vd["Effects"]
        ref_val = stats.multivariate_normal(np.zeros(len(r)), C).logpdf(r)
        assert vals[i] == pytest.approx(ref_val, abs=1e-9)


def test_reml_unit_left_out_equals_statsmodels_mixedlm(grunfeld):
    """Source: statsmodels MixedLM (REML, random intercept by firm) on the panel without
    firm i; scipy's multivariate normal density of its rows. statsmodels' optimiser
    stops short of the optimum (its variance components agree with ours to about 1e-4,
    tests/test_reference_grunfeld.py), hence the relative tolerance of 1e-5."""
    import statsmodels.formula.api as smf

    ref = _fit(bp.Panel(grunfeld, "firm", "year"), "invest ~ value + capital", "random",
               "reml")
    vals = exact_loo_values(ref, "unit")
    firms = list(ref.design.units)
    for i in (0, 4, 9):
        rest = grunfeld[grunfeld["firm"] != firms[i]]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            fit = smf.mixedlm("invest ~ value + capital", rest, groups=rest["firm"]).fit(
                reml=True, method="lbfgs", gtol=1e-10)
        held = grunfeld[grunfeld["firm"] == firms[i]]
        r = held["invest"].to_numpy() - (fit.fe_params["Intercept"]
                                         + held[["value", "capital"]].to_numpy()
                                         @ fit.fe_params[["value", "capital"]].to_numpy())
        C = fit.scale * np.eye(len(r)) + float(fit.cov_re.iloc[0, 0])
        ref_val = stats.multivariate_normal(np.zeros(len(r)), C).logpdf(r)
        assert vals[i] == pytest.approx(ref_val, rel=1e-5)


def test_exact_cv_is_the_default_at_every_size(wage_panel):
    """4360 rows: exact leave-one-out (one downdated refit per row), no K-fold switch."""
    panel = bp.Panel(wage_panel, "nr", "year")
    ref = _fit(panel, "lwage ~ exper + expersq + union + married", "pooled", None)
    res = bp.loo.reference_cv(ref, "occasion")
    assert res.method == "exact CV" and res.n_points == 4360
    assert np.isfinite(res.elpd_i).all()
