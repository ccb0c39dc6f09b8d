"""Reference fits with cluster-robust errors on the wage panel of Vella and Verbeek (1998).

Outside checks: linearmodels PanelOLS / RandomEffects / PooledOLS with clustered
covariances (``debiased=True, group_debias=True``, the usual CR1 small-sample factor),
statsmodels OLS with ``cov_type="cluster"``, and linearmodels' Wald test for the Mundlak
test (Wooldridge 2010, section 10.7.3). Data: linearmodels.datasets.wage_panel.
"""

import warnings

import numpy as np
import pytest

import bayespanel as bp
from bayespanel.core.errors import DataHandlingWarning

FORMULA = "lwage ~ exper + expersq + union + married + black + educ"
TV = ["exper", "expersq", "union", "married"]


@pytest.fixture(scope="module")
def panel(wage_panel):
    return bp.Panel(wage_panel, unit="nr", time="year")


@pytest.fixture(scope="module")
def lm_data(wage_panel):
    d = wage_panel.set_index(["nr", "year"])
    X = d[TV + ["black", "educ"]].astype(float).copy()
    X.insert(0, "Intercept", 1.0)
    return d["lwage"], X


def test_within_cluster_equals_linearmodels(panel, lm_data):
    """Source: linearmodels PanelOLS(entity_effects) clustered by entity, CR1 factor."""
    from linearmodels import PanelOLS

    with pytest.warns(DataHandlingWarning, match="'black', 'educ'"):
        ours = bp.reference.within(panel, FORMULA, cov="cluster")
    assert ours.dropped == {"black": "constant within units", "educ": "constant within units"}
    y, X = lm_data
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = PanelOLS(y, X, entity_effects=True, drop_absorbed=True).fit(
            cov_type="clustered", cluster_entity=True, group_debias=True)
    np.testing.assert_allclose(ours.coef[TV], ref.params[TV], rtol=1e-6)
    np.testing.assert_allclose(ours.se[TV], ref.std_errors[TV], rtol=1e-6)
    assert ours.df_resid.eq(544).all()  # t with G - 1 degrees of freedom


def test_random_cluster_equals_linearmodels(panel, lm_data):
    """Source: linearmodels RandomEffects clustered by entity, CR1 factor."""
    from linearmodels import RandomEffects

    ours = bp.reference.random(panel, FORMULA, cov="cluster")
    y, X = lm_data
    ref = RandomEffects(y, X).fit(cov_type="clustered", cluster_entity=True, group_debias=True)
    np.testing.assert_allclose(ours.coef.to_numpy(), ref.params.to_numpy(), rtol=1e-6)
    np.testing.assert_allclose(ours.se.to_numpy(), ref.std_errors.to_numpy(), rtol=1e-6)
    np.testing.assert_allclose(ours.icc, ref.variance_decomposition["Percent due to Effects"],
                               rtol=1e-6)


def test_pooled_cr1_equals_statsmodels_cluster(panel, lm_data):
    """Source: statsmodels OLS with cov_type="cluster" (G/(G-1) (n-1)/(n-k) factor)."""
    import statsmodels.api as sm

    y, X = lm_data
    ref = sm.OLS(y.to_numpy(), X.to_numpy()).fit(
        cov_type="cluster", cov_kwds={"groups": y.index.get_level_values(0).to_numpy()})
    ours = bp.reference.pooled(panel, FORMULA, cov="cluster")
    np.testing.assert_allclose(ours.coef.to_numpy(), ref.params, rtol=1e-9)
    np.testing.assert_allclose(ours.se.to_numpy(), ref.bse, rtol=1e-9)


def test_mundlak_test_equals_linearmodels_wald(panel, lm_data, wage_panel):
    """Source: Wooldridge (2010) 10.7.3 -- random effects on the covariates plus their unit
    means, cluster-robust Wald test of the unit-mean terms -- computed with linearmodels
    RandomEffects and its wald_test on the same augmented regressors."""
    from linearmodels import RandomEffects

    ours = bp.reference.mundlak_test(panel, FORMULA)
    y, X = lm_data
    X = X.copy()
    names = []
    for t in TV:
        name = f"{t}_mean"
        X[name] = X[t].groupby(level=0).transform("mean")
        names.append(name)
    ref = RandomEffects(y, X).fit(cov_type="clustered", cluster_entity=True, group_debias=True)
    R = np.zeros((len(names), X.shape[1]))
    for i, n in enumerate(names):
        R[i, list(X.columns).index(n)] = 1.0
    wald = ref.wald_test(restriction=R)
    assert ours.statistic == pytest.approx(wald.stat, rel=1e-6)
    assert ours.df == 4
    assert ours.terms == [f"{t} (unit mean)" for t in TV]
    assert ours.p_value < 0.05 and "fails" in ours.message


def test_occasion_effects_drop_collinear_experience(panel, lm_data):
    """Source: linearmodels PanelOLS with entity and time effects. Experience rises by one
    a year for everyone, so after unit demeaning it is collinear with the year indicators:
    both libraries drop it."""
    from linearmodels import PanelOLS

    with pytest.warns(DataHandlingWarning) as record:
        ours = bp.reference.within(panel, FORMULA, occasion_effects=True, cov="cluster")
    assert any("'exper'" in str(w.message) for w in record)
    assert "collinear" in ours.dropped["exper"]
    y, X = lm_data
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = PanelOLS(y, X, entity_effects=True, time_effects=True, drop_absorbed=True).fit(
            cov_type="clustered", cluster_entity=True, group_debias=True)
    t = ["expersq", "union", "married"]
    np.testing.assert_allclose(ours.coef[t], ref.params[t], rtol=1e-6)


def test_cluster_exceeds_classical_with_correlated_residuals(panel):
    """Rule of thumb (common practice, no source): with positively correlated residuals
    within units (wage residuals are), cluster-robust SEs of pooled OLS exceed the
    classical ones for the time-constant and slowly changing covariates."""
    cl = bp.reference.pooled(panel, FORMULA, cov="cluster")
    cla = bp.reference.pooled(panel, FORMULA)
    assert (cl.se > cla.se).all()
