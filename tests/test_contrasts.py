"""Within/between contrasts: between minus within effect, sign and ROPE probabilities.

Outside checks:
* Simulation with known truth: with equal within and between effects the contrast's
  95% interval covers 0.
* Wage panel of Vella and Verbeek (1998), shipped by linearmodels: the posterior contrast
  agrees with linearmodels' between (BetweenOLS) minus within (PanelOLS with entity
  effects) estimates, which in a balanced panel are exactly the within-between contrast,
  and its sign agrees with the Hausman test's conclusion from the reference module.
* Mundlak (1978): the unit-mean coefficient of the Mundlak model is the between-within
  contrast of the within-between model (same estimate and standard error).
"""

import warnings

import numpy as np
import pandas as pd
import pytest

import bayespanel as bp
from bayespanel.analysis.contrasts import contrast_draws, specification_tests
from bayespanel.core.errors import SpecificationError

WAGE = "lwage ~ exper + hours + married + union + educ + black"
WAGE_TV = ["exper", "hours", "married", "union"]
KW = dict(draws=300, tune=300, chains=2, seed=5, progress=False, cores=1)


@pytest.fixture(scope="module")
def wage(wage_panel):
    return bp.Panel(wage_panel, unit="nr", time="year")


@pytest.fixture(scope="module")
def wage_post(wage):
    from bayespanel.bayes import WithinBetween

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return WithinBetween(wage, WAGE).sample(**KW)


@pytest.fixture(scope="module")
def equal_effects_post():
    """Simulated panel (known truth) with within effect = between effect = 1.0."""
    from bayespanel.bayes import WithinBetween

    rng = np.random.default_rng(11)
    N, T = 40, 5
    unit = np.repeat(np.arange(N), T)
    xbar = rng.normal(0, 1.0, N)
    x = xbar[unit] + rng.normal(0, 1.0, N * T)
    y = 2.0 + 1.0 * x + rng.normal(0, 1.0, N)[unit] + rng.normal(0, 1.0, N * T)
    df = pd.DataFrame({"g": unit, "t": np.tile(np.arange(T), N), "x": x, "y": y})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return WithinBetween(bp.Panel(df, unit="g", time="t"), "y ~ x").sample(**KW)


def test_equal_effects_contrast_covers_zero(equal_effects_post):
    c = equal_effects_post.contrasts(rope=0.5, tests=False)
    tab = c.table(0.95)
    assert tab.loc["x", "lower"] < 0 < tab.loc["x", "upper"]
    d = c.draws["x"].to_numpy()
    assert tab.loc["x", "P(in rope)"] == pytest.approx(np.mean(np.abs(d) < 0.5))
    assert tab.loc["x", "P(> 0)"] + tab.loc["x", "P(< 0)"] == pytest.approx(1.0)


def _linearmodels_contrast(wage_panel):
    from linearmodels.panel import BetweenOLS, PanelOLS

    df = wage_panel.set_index(["nr", "year"])
    df["Intercept"] = 1.0
    fe = PanelOLS(df["lwage"], df[WAGE_TV], entity_effects=True).fit()
    be = BetweenOLS(df["lwage"], df[["Intercept"] + WAGE_TV + ["educ", "black"]]).fit()
    return be.params[WAGE_TV] - fe.params[WAGE_TV]


def test_wage_panel_contrast_agrees_with_linearmodels_and_hausman(wage, wage_panel, wage_post):
    ref = bp.reference.within_between(wage, WAGE, method="reml")
    c = wage_post.contrasts(reference=ref)
    tab = c.table(0.95)
    lm = _linearmodels_contrast(wage_panel)
    # the reference module's balanced-panel contrast is linearmodels' between - within
    np.testing.assert_allclose(tab["reference estimate"], lm[tab.index], rtol=1e-6)
    # the posterior (weak default priors, 4360 rows) is centred on it
    assert np.all(np.abs(tab["mean"] - lm[tab.index]) < tab["sd"])
    haus = c.tests["Hausman (classical)"]
    assert haus.p_value < 0.05          # random effects rejected on this panel
    clear = tab.index[np.abs(tab["reference estimate"] / tab["reference se"]) > 3]
    assert len(clear) > 0
    for t in clear:   # where the frequentist contrast is clear, the posterior sign agrees
        prob_sign = tab.loc[t, "P(> 0)"] if lm[t] > 0 else tab.loc[t, "P(< 0)"]
        assert prob_sign > 0.975
    # the tests beside the contrast are the reference module's own, computed on the panel
    direct = bp.reference.hausman(wage, WAGE)
    assert haus.statistic == pytest.approx(direct.statistic, rel=1e-8)
    rob = bp.reference.mundlak_test(wage, WAGE, cov="cluster")
    assert c.tests["Mundlak (cluster-robust)"].statistic == pytest.approx(rob.statistic, rel=1e-8)
    assert set(c.tests_table().index) == {"Hausman (classical)", "Mundlak (cluster-robust)"}
    out = c.to_record()
    assert [r["covariate"] for r in out] == list(c.table().index)
    assert set(r["covariate"] for r in out) == set(WAGE_TV)


def test_mundlak_unit_mean_coefficient_is_the_contrast(wage):
    # Mundlak (1978): same contrast and SE from either parametrisation
    mu = bp.reference.mundlak(wage, WAGE, method="reml", cov="cluster")
    wb = bp.reference.within_between(wage, WAGE, method="reml", cov="cluster")
    from bayespanel.bayes.contrasts import _reference_contrast

    a = _reference_contrast(mu, WAGE_TV, 0.95)
    b = _reference_contrast(wb, WAGE_TV, 0.95)
    np.testing.assert_allclose(a["estimate"], b["estimate"], rtol=1e-6)
    np.testing.assert_allclose(a["se"], b["se"], rtol=1e-6)
    np.testing.assert_allclose(a["estimate"], mu.coef[[f"{t} (unit mean)" for t in WAGE_TV]],
                               rtol=1e-12)


def test_contrast_options_and_refusals(wage):
    d = wage.design(WAGE)
    M, labels = d.matrices("within_between")
    coef = np.random.default_rng(0).normal(size=(50, len(labels)))
    D = contrast_draws("within_between", labels, WAGE_TV, coef)
    j_b, j_w = labels.index("union (between)"), labels.index("union (within)")
    np.testing.assert_allclose(D[:, 3], coef[:, j_b] - coef[:, j_w])
    with pytest.raises(SpecificationError, match="WithinBetween or CorrelatedEffects"):
        contrast_draws("random", d.terms, WAGE_TV, coef[:, :len(d.terms)])
    from bayespanel.analysis.contrasts import ContrastResult

    with pytest.raises(SpecificationError, match="rope"):
        ContrastResult(D, WAGE_TV, "within_between", rope=-1)
    with pytest.raises(SpecificationError, match="not time-varying"):
        ContrastResult(D, WAGE_TV, "within_between", rope={"educ": 0.1})
    r = ContrastResult(D, WAGE_TV, "within_between", rope={"union": 0.1})
    assert np.isnan(r.table().loc["hours", "P(in rope)"])
    tests = specification_tests(M, d.y, d.unit_codes, labels, "within_between")
    assert tests["Hausman (classical)"].df == len(WAGE_TV)
