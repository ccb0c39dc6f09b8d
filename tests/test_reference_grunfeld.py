"""Reference fits on the Grunfeld investment panel (10 firms, 1935-1954).

Outside checks, each named beside its test:
- linearmodels (PooledOLS, PanelOLS, BetweenOLS, RandomEffects) on the same data, 1e-6;
- Baltagi, Econometric Analysis of Panel Data, chapter 2 (Grunfeld table), printed
  values at printed precision: RECALLED FROM MEMORY;
- statsmodels MixedLM for the ML and REML variance components;
- published identities: Mundlak (1978) and Maddala (1971).
Data: statsmodels.datasets.grunfeld (see conftest.py).
"""

import warnings

import numpy as np
import pytest

import bayespanel as bp

FORMULA = "invest ~ value + capital"


@pytest.fixture(scope="module")
def panel(grunfeld):
    return bp.Panel(grunfeld, unit="firm", time="year")


@pytest.fixture(scope="module")
def lm_data(grunfeld):
    d = grunfeld.set_index(["firm", "year"])
    X = d[["value", "capital"]].copy()
    X.insert(0, "Intercept", 1.0)
    return d["invest"], X


def _lm(kind, y, X):
    from linearmodels import BetweenOLS, PanelOLS, PooledOLS, RandomEffects

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if kind == "pooled":
            return PooledOLS(y, X).fit()
        if kind == "within":
            return PanelOLS(y, X, entity_effects=True).fit()
        if kind == "between":
            return BetweenOLS(y, X).fit()
        return RandomEffects(y, X).fit()


@pytest.mark.parametrize("kind", ["pooled", "within", "between", "random"])
def test_equals_linearmodels(panel, lm_data, kind):
    """Source: linearmodels 7 estimators on the same rows, coefficients and SEs to 1e-6."""
    ours = getattr(bp.reference, kind)(panel, FORMULA)
    ref = _lm(kind, *lm_data)
    params, se = ref.params, ref.std_errors
    if kind == "within":  # linearmodels reports the grand-mean intercept; we absorb it
        params, se = params.drop("Intercept"), se.drop("Intercept")
    assert list(ours.coef.index) == list(params.index)
    np.testing.assert_allclose(ours.coef.to_numpy(), params.to_numpy(), rtol=1e-6)
    np.testing.assert_allclose(ours.se.to_numpy(), se.to_numpy(), rtol=1e-6)
    if kind == "random":
        np.testing.assert_allclose(ours.sigma_unit ** 2, ref.variance_decomposition["Effects"],
                                   rtol=1e-6)
        np.testing.assert_allclose(ours.sigma_obs ** 2, ref.variance_decomposition["Residual"],
                                   rtol=1e-6)
        np.testing.assert_allclose(ours.theta_by_length, ref.theta.iloc[0], rtol=1e-6)
    assert ours.n_obs == 200 and ours.n_units == 10


# Baltagi, Econometric Analysis of Panel Data, chapter 2, Grunfeld results table.
# RECALLED FROM MEMORY (coefficient, standard error) at the printed three decimals.
BALTAGI = {
    "pooled": {"value": (0.116, 0.006), "capital": (0.231, 0.025)},
    "between": {"value": (0.135, 0.029), "capital": (0.032, 0.191)},
    "within": {"value": (0.110, 0.012), "capital": (0.310, 0.017)},
    "random": {"value": (0.110, 0.010), "capital": (0.308, 0.017)},  # Swamy-Arora
}


@pytest.mark.parametrize("kind", list(BALTAGI))
def test_textbook_values_recalled_from_memory(panel, kind):
    """Source: Baltagi, Econometric Analysis of Panel Data, ch. 2 (recalled from memory)."""
    res = getattr(bp.reference, kind)(panel, FORMULA)
    for term, (b, s) in BALTAGI[kind].items():
        assert round(res.coef[term], 3) == pytest.approx(b, abs=1e-9)
        assert round(res.se[term], 3) == pytest.approx(s, abs=1e-9)


def test_swamy_arora_components_recalled_from_memory(panel):
    """Source: Baltagi ch. 2 / common textbook output for Grunfeld, recalled from memory:
    sigma_unit about 84.2 and sigma_obs about 52.77 for the Swamy-Arora fit."""
    res = bp.reference.random(panel, FORMULA)
    assert round(res.sigma_unit, 1) == pytest.approx(84.2)
    assert round(res.sigma_obs, 2) == pytest.approx(52.77)


@pytest.mark.parametrize("method", ["ml", "reml"])
def test_likelihood_components_equal_statsmodels_mixedlm(grunfeld, panel, method):
    """Source: statsmodels MixedLM (random intercept by firm) on the same rows."""
    import statsmodels.formula.api as smf

    ours = bp.reference.random(panel, FORMULA, method=method)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = smf.mixedlm(FORMULA, grunfeld, groups=grunfeld["firm"]).fit(
            reml=(method == "reml"), method=["lbfgs"])
    # statsmodels stops its optimiser at a looser tolerance than our 1-d profile search
    np.testing.assert_allclose(ours.sigma_obs ** 2, ref.scale, rtol=1e-4)
    np.testing.assert_allclose(ours.sigma_unit ** 2, float(ref.cov_re.iloc[0, 0]), rtol=1e-3)
    np.testing.assert_allclose(ours.coef.to_numpy(), ref.fe_params.to_numpy(), rtol=1e-5)
    # same likelihood (constants included); ours is at least as high
    assert ours.loglik == pytest.approx(ref.llf, abs=1e-6)
    assert ours.loglik >= ref.llf - 1e-9
    np.testing.assert_allclose(ours.se.to_numpy(), ref.bse_fe.to_numpy(), rtol=5e-3)


@pytest.mark.parametrize("method", ["swamy-arora", "ml", "reml"])
def test_mundlak_within_coefficients_equal_fixed_effects(panel, method):
    """Identity: Mundlak (1978) -- with the unit means added, GLS gives the within
    coefficients exactly, whatever the variance components."""
    fe = bp.reference.within(panel, FORMULA)
    mu = bp.reference.mundlak(panel, FORMULA, method=method)
    np.testing.assert_allclose(mu.coef[["value", "capital"]], fe.coef[["value", "capital"]],
                               rtol=1e-9)
    wb = bp.reference.within_between(panel, FORMULA, method=method)
    np.testing.assert_allclose(wb.coef[["value (within)", "capital (within)"]].to_numpy(),
                               fe.coef[["value", "capital"]].to_numpy(), rtol=1e-9)
    # the unit-mean terms are the between-minus-within contrasts (between part of WB)
    np.testing.assert_allclose(
        (mu.coef[["value (unit mean)", "capital (unit mean)"]].to_numpy()),
        (wb.coef[["value (between)", "capital (between)"]].to_numpy()
         - wb.coef[["value (within)", "capital (within)"]].to_numpy()), rtol=1e-8)


def test_gls_is_matrix_weighted_average_of_within_and_between(panel, grunfeld):
    """Identity: Maddala (1971) -- on a balanced panel
    b_GLS = D b_B + (I - D) b_W with D = (W + phi B)^{-1} phi B, phi = (1 - theta)^2,
    W and B the within and between cross-products of the covariates."""
    re = bp.reference.random(panel, FORMULA)
    fe = bp.reference.within(panel, FORMULA)
    be = bp.reference.between(panel, FORMULA)
    d = panel.design(FORMULA)
    cols = [d.terms.index(t) for t in ("value", "capital")]
    Xw = d.within()[:, cols]
    Xb = d.between_rows()[:, cols] - d.X[:, cols].mean(axis=0)
    W, B = Xw.T @ Xw, Xb.T @ Xb
    phi = (1 - re.theta_by_length[0]) ** 2
    D = np.linalg.solve(W + phi * B, phi * B)
    avg = D @ be.coef[["value", "capital"]].to_numpy() + (np.eye(2) - D) @ fe.coef[
        ["value", "capital"]].to_numpy()
    np.testing.assert_allclose(re.coef[["value", "capital"]].to_numpy(), avg, rtol=1e-9)


def test_hausman_equals_formula_on_linearmodels_numbers(panel, lm_data):
    """Source: Hausman (1978) statistic computed from linearmodels' PanelOLS and
    RandomEffects estimates and classical covariances."""
    from scipy import stats

    ours = bp.reference.hausman(panel, FORMULA)
    fe, re = _lm("within", *lm_data), _lm("random", *lm_data)
    t = ["value", "capital"]
    d = fe.params[t] - re.params[t]
    V = fe.cov.loc[t, t] - re.cov.loc[t, t]
    stat = float(d @ np.linalg.solve(V, d))
    assert ours.statistic == pytest.approx(stat, rel=1e-6)
    assert ours.df == 2
    assert ours.p_value == pytest.approx(stats.chi2.sf(stat, 2), rel=1e-6)
    assert ours["p_value"] == ours.p_value and set(ours.to_dict()) >= {"statistic", "df"}


def test_occasion_effects_equal_two_way_linearmodels(panel, lm_data):
    """Source: linearmodels PanelOLS with entity and time effects (balanced panel) equals
    our within fit with one indicator per occasion."""
    from linearmodels import PanelOLS

    y, X = lm_data
    ref = PanelOLS(y, X, entity_effects=True, time_effects=True).fit()
    ours = bp.reference.within(panel, FORMULA, occasion_effects=True)
    np.testing.assert_allclose(ours.coef[["value", "capital"]], ref.params[["value", "capital"]],
                               rtol=1e-6)
    np.testing.assert_allclose(ours.se[["value", "capital"]],
                               ref.std_errors[["value", "capital"]], rtol=1e-6)
    assert any(t.startswith("occasion[") for t in ours.coef.index)


def test_unbalanced_swamy_arora_equals_linearmodels_small_sample(grunfeld):
    """Source: linearmodels RandomEffects(small_sample=True), the Baltagi and Chang (1994)
    unbalanced Swamy-Arora estimator, on Grunfeld with rows removed."""
    from linearmodels import RandomEffects

    rng = np.random.default_rng(3)
    df = grunfeld.drop(index=rng.choice(len(grunfeld), 45, replace=False)).reset_index(drop=True)
    ours = bp.reference.random(bp.Panel(df, unit="firm", time="year"), FORMULA)
    d = df.set_index(["firm", "year"])
    X = d[["value", "capital"]].copy()
    X.insert(0, "Intercept", 1.0)
    ref = RandomEffects(d["invest"], X).fit(small_sample=True)
    np.testing.assert_allclose(ours.coef.to_numpy(), ref.params.to_numpy(), rtol=1e-6)
    np.testing.assert_allclose(ours.se.to_numpy(), ref.std_errors.to_numpy(), rtol=1e-6)
    np.testing.assert_allclose(ours.sigma_unit ** 2, ref.variance_decomposition["Effects"],
                               rtol=1e-6)
    assert len(ours.theta_by_length) == len(np.unique(df.groupby("firm").size()))


def test_table_and_labels(panel):
    """Result shape (checked against scipy's t quantiles for the interval)."""
    from scipy import stats

    res = bp.reference.pooled(panel, FORMULA)
    tab = res.table()
    assert list(tab.columns) == ["estimate", "se", "lower", "upper", "t", "df", "p"]
    q = stats.t.ppf(0.975, 197)
    np.testing.assert_allclose(tab["upper"], res.coef + q * res.se)
    assert res.vcov.index.tolist() == res.coef.index.tolist() == ["Intercept", "value", "capital"]
    assert isinstance(res.assumptions, list) and res.assumptions
    assert res.df_resid.eq(197).all() and res.residual_df == 197
    assert "Pooled" in str(res)
