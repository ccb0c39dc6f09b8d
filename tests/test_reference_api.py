"""Entry points, options and the sufficient-statistics path of the reference fits.

Outside checks: linearmodels RandomEffects / PanelOLS / BetweenOLS on the Grunfeld panel
(statsmodels' datasets) for the fits from merged sufficient statistics and from plain
arrays; scipy's chi-squared distribution for the Hausman generalised-inverse case.
"""

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import bayespanel as bp
from bayespanel.core import suffstats

FORMULA = "invest ~ value + capital"


@pytest.fixture(scope="module")
def panel(grunfeld):
    return bp.Panel(grunfeld, unit="firm", time="year")


@pytest.fixture(scope="module")
def lm_random(grunfeld):
    from linearmodels import RandomEffects

    d = grunfeld.set_index(["firm", "year"])
    X = d[["value", "capital"]].copy()
    X.insert(0, "Intercept", 1.0)
    return RandomEffects(d["invest"], X).fit()


def test_fit_from_merged_sufficient_statistics(panel, lm_random):
    """Source: linearmodels RandomEffects; the statistics are built from two blocks that
    split units (the out-of-core path), then merged (Chan, Golub and LeVeque 1979)."""
    d = panel.design(FORMULA)
    Z = np.column_stack([d.X, d.y])
    cut = 97  # inside a unit
    part = suffstats.merge(suffstats.partial(Z[:cut], d.unit_codes[:cut]),
                           suffstats.partial(Z[cut:], d.unit_codes[cut:]))
    ss = suffstats.finalize(part)
    res = bp.reference.fit_stats("random", ss, d.terms)
    np.testing.assert_allclose(res.coef.to_numpy(), lm_random.params.to_numpy(), rtol=1e-6)
    np.testing.assert_allclose(res.se.to_numpy(), lm_random.std_errors.to_numpy(), rtol=1e-6)
    for est in ("pooled", "within", "between"):
        a = bp.reference.fit_stats(est, ss, d.terms)
        b = getattr(bp.reference, est)(panel, FORMULA)
        np.testing.assert_allclose(a.coef, b.coef, rtol=1e-9)
        np.testing.assert_allclose(a.se, b.se, rtol=1e-9)


def test_fit_arrays_and_design_input(panel, lm_random):
    """Source: linearmodels RandomEffects; arrays and a Design give the same fit."""
    d = panel.design(FORMULA)
    a = bp.reference.fit_arrays("random", d.X, d.y, d.unit_codes * 3 + 1, d.terms,
                                cov="cluster")
    b = bp.reference.random(d, cov="cluster")
    np.testing.assert_allclose(a.coef.to_numpy(), lm_random.params.to_numpy(), rtol=1e-6)
    np.testing.assert_allclose(a.se, b.se, rtol=1e-12)
    assert b.design is d and a.design is None


@pytest.mark.parametrize("call, match", [
    (lambda p: bp.reference.pooled(p, FORMULA, cov="robust"), "cov='robust'.*'classical'"),
    (lambda p: bp.reference.random(p, FORMULA, method="gls"), "method='gls'.*'swamy-arora'"),
    (lambda p: bp.reference.within(p, FORMULA, cov="HC1"), "cov='HC1'"),
    (lambda p: bp.reference.random(p.design(FORMULA), "invest ~ value"), "formula="),
    (lambda p: bp.reference.pooled(p), "formula is required"),
    (lambda p: bp.reference.pooled(p, FORMULA).interval(1.5), "prob=1.5"),
    (lambda p: bp.reference.fit_arrays("pooled", np.ones((3, 1)), np.ones(3), [0, 0, 1],
                                       ["a"], method="ml"), "method='ml'"),
    (lambda p: bp.reference.random(pd.DataFrame(), FORMULA), "Panel or Design"),
], ids=["cov", "method", "cov-within", "formula-mismatch", "no-formula", "prob",
        "method-pooled", "not-panel"])
def test_bad_options_name_the_option_and_choices(panel, call, match):
    """Options are checked before fitting; messages name the option and the choices."""
    with pytest.raises(bp.SpecificationError, match=match):
        call(panel)


def test_hausman_generalised_inverse_message(panel):
    """Source: Hausman (1978) statistic with a generalised inverse; p-value from scipy's
    chi-squared with the rank as degrees of freedom."""
    fe = bp.reference.within(panel, FORMULA)
    re = bp.reference.random(panel, FORMULA)
    # make the random-effects variance of 'capital' exceed the fixed-effects one
    V = re._vcov.copy()
    i = re.labels.index("capital")
    V[i, i] = fe.vcov.loc["capital", "capital"] * 4
    re._vcov = V
    test = bp.reference.hausman(re, fe)
    assert test.df == 1 and "not positive definite" in test.message
    assert test.p_value == pytest.approx(stats.chi2.sf(test.statistic, 1))
    assert "Hausman" in str(test)


def test_hausman_warns_with_robust_covariances(panel):
    """The classical Hausman test needs classical covariances (Wooldridge 2010, 10.7.3)."""
    fe = bp.reference.within(panel, FORMULA, cov="cluster")
    re = bp.reference.random(panel, FORMULA)
    with pytest.warns(UserWarning, match="mundlak_test"):
        bp.reference.hausman(fe, re)
    with pytest.raises(bp.SpecificationError, match="'within' and a 'random'"):
        bp.reference.hausman(fe, fe)


def test_between_robust_is_hc(panel, grunfeld):
    """Source: statsmodels OLS on the firm means, HC1 and HC2: with one row per unit,
    cluster-robust covariances are the heteroskedasticity-robust ones."""
    import statsmodels.api as sm

    means = grunfeld.groupby("firm")[["invest", "value", "capital"]].mean()
    X = sm.add_constant(means[["value", "capital"]])
    for cov, hc in (("cluster", "HC1"), ("cr2", "HC2")):
        ours = bp.reference.between(panel, FORMULA, cov=cov)
        ref = sm.OLS(means["invest"], X).fit(cov_type=hc)
        np.testing.assert_allclose(ours.se.to_numpy(), ref.bse.to_numpy(), rtol=1e-9)


def test_mundlak_pooled_and_random_unit_mean_terms_agree_on_balanced(panel):
    """Identity (Mundlak 1978; Wooldridge 2010, 10.7.3): on a balanced panel pooled OLS
    and GLS of the Mundlak equation give the same coefficients."""
    a = bp.reference.mundlak_test(panel, FORMULA, fit="pooled")
    b = bp.reference.mundlak_test(panel, FORMULA, fit="random")
    assert a.terms == b.terms == ["value (unit mean)", "capital (unit mean)"]
    assert np.isfinite(a.f_statistic) and a.f_df_denom == 9
    mp = bp.reference.fit_arrays("pooled", *panel.design(FORMULA).matrices("mundlak")[:1],
                                 panel.design(FORMULA).y, panel.design(FORMULA).unit_codes,
                                 panel.design(FORMULA).matrices("mundlak")[1])
    mr = bp.reference.mundlak(panel, FORMULA)
    np.testing.assert_allclose(mp.coef, mr.coef, rtol=1e-8)


def test_occasion_effects_on_every_estimator(panel):
    """Occasion indicators enter every estimator; the Mundlak unit means of occasion
    indicators are constant on a balanced panel and are dropped quietly (recorded)."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        for est in ("pooled", "within", "random", "mundlak", "within_between"):
            res = getattr(bp.reference, est)(panel, FORMULA, occasion_effects=True)
            assert any(t.startswith("occasion[1936]") for t in res.coef.index)
    mu = bp.reference.mundlak(panel, FORMULA, occasion_effects=True)
    assert all(k.startswith("occasion[") and v.startswith("collinear")
               for k, v in mu.dropped.items())
    fe = bp.reference.within(panel, FORMULA, occasion_effects=True)
    np.testing.assert_allclose(mu.coef[["value", "capital"]], fe.coef[["value", "capital"]],
                               rtol=1e-8)
    wb = bp.reference.within_between(panel, FORMULA, occasion_effects=True)
    np.testing.assert_allclose(wb.coef[["value (within)", "capital (within)"]].to_numpy(),
                               fe.coef[["value", "capital"]].to_numpy(), rtol=1e-8)
