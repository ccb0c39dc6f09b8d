"""Numerical robustness: covariates on very different scales, covariates far from zero and
nearly collinear designs give well-conditioned results that match reference libraries
after back-transformation.

The data are the Grunfeld investment panel shipped in statsmodels.datasets, with ``value``
rescaled by 1e-6, ``capital`` by 1e6 and the outcome by 1e3 (and, separately, shifted far
from zero). Outside checks, named beside each: statsmodels OLS and MixedLM (ML) and
linearmodels PanelOLS on the original data, back-transformed; numpy's least squares;
arviz-stats' R-hat of the draws.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

import bayespanel as bp

UNIT, TIME = "firm", "year"
F = "invest ~ value + capital"
SCALE = {"value": 1e-6, "capital": 1e6, "invest": 1e3}


@pytest.fixture(scope="module")
def scaled(grunfeld):
    df = grunfeld.copy()
    for c, s in SCALE.items():
        df[c] = df[c] * s
    return df


def _back(coef, term):
    """Coefficient on the rescaled data -> the original units."""
    return coef * SCALE.get(term, 1.0) / SCALE["invest"]


def _quiet(f, *a, **k):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return f(*a, **k)


def test_reference_fits_on_wild_scales_match_statsmodels_and_linearmodels(grunfeld, scaled):
    import statsmodels.api as sm
    import statsmodels.formula.api as smf
    from linearmodels.panel import PanelOLS

    panel = bp.Panel(scaled, UNIT, TIME)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no near-collinearity warning: scales are not collinearity
        pooled = bp.reference.pooled(panel, F, cov="classical")
    ols = sm.OLS(grunfeld["invest"], sm.add_constant(grunfeld[["value", "capital"]])).fit()
    for t in ("value", "capital"):  # outside check: statsmodels OLS, original units
        assert _back(pooled.coef[t], t) == pytest.approx(ols.params[t], rel=1e-9)
        assert _back(pooled.se[t], t) == pytest.approx(ols.bse[t], rel=1e-8)
    assert pooled.coef["Intercept"] / SCALE["invest"] == pytest.approx(ols.params["const"],
                                                                       rel=1e-9)
    fe = _quiet(bp.reference.within, panel, F, cov="classical")
    d = grunfeld.set_index([UNIT, TIME])
    lm = PanelOLS(d["invest"], d[["value", "capital"]], entity_effects=True).fit()
    for t in ("value", "capital"):  # outside check: linearmodels PanelOLS
        assert _back(fe.coef[t], t) == pytest.approx(lm.params[t], rel=1e-9)
    re_ml = _quiet(bp.reference.random, panel, F, method="ml")
    ml = _quiet(smf.mixedlm(F, grunfeld, groups=UNIT).fit, reml=False)
    for t in ("value", "capital"):  # outside check: statsmodels MixedLM (ML)
        assert _back(re_ml.coef[t], t) == pytest.approx(ml.params[t], rel=1e-4)
    assert re_ml.sigma_unit / SCALE["invest"] == pytest.approx(np.sqrt(ml.cov_re.iloc[0, 0]),
                                                               rel=1e-3)
    assert re_ml.sigma_obs / SCALE["invest"] == pytest.approx(np.sqrt(ml.scale), rel=1e-4)


def test_covariates_far_from_zero(grunfeld):
    """A covariate of about 1e9 that varies by hundreds (a timestamp-like column): the
    one-pass statistics keep every digit, and no collinearity is reported for it.
    Outside check: numpy least squares on the centred problem."""
    df = grunfeld.assign(value=grunfeld["value"] + 1e9)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        res = bp.reference.pooled(bp.Panel(df, UNIT, TIME), F, cov="classical")
    X = grunfeld[["value", "capital"]].to_numpy()
    Xc = X - X.mean(axis=0)
    yc = grunfeld["invest"].to_numpy() - grunfeld["invest"].mean()
    beta = np.linalg.lstsq(Xc, yc, rcond=None)[0]
    np.testing.assert_allclose(res.coef[["value", "capital"]].to_numpy(), beta, rtol=1e-7)


def test_nearly_collinear_design_is_solved_accurately(grunfeld):
    """Condition number about 1e4 after standardising: warned about, and the solve still
    agrees with numpy's SVD-based least squares (outside check) to many digits."""
    rng = np.random.default_rng(2)
    df = grunfeld.assign(value2=grunfeld["value"] + 1e-3 * grunfeld["value"].std()
                         * rng.standard_normal(len(grunfeld)))
    f = "invest ~ value + value2 + capital"
    with pytest.warns(bp.errors.DataHandlingWarning, match="condition number"):
        res = bp.reference.pooled(bp.Panel(df, UNIT, TIME), f, cov="classical")
    X = np.column_stack([np.ones(len(df)), df["value"], df["value2"], df["capital"]])
    beta = np.linalg.lstsq(X, df["invest"].to_numpy(), rcond=None)[0]
    np.testing.assert_allclose(res.coef[["Intercept", "value", "value2", "capital"]].to_numpy(),
                               beta, rtol=1e-6)


@pytest.fixture(scope="module")
def bayes_pair(grunfeld, scaled):
    """The same random-intercept model, seed and settings on the original and the rescaled
    data (the model standardises every column internally)."""
    kw = dict(draws=150, tune=150, chains=2, seed=5, progress=False)
    fits = {}
    for name, df in (("original", grunfeld), ("scaled", scaled)):
        m = _quiet(bp.models.RandomIntercept, bp.Panel(df, UNIT, TIME), F)
        fits[name] = _quiet(m.sample, **kw)
    return fits


def test_bayesian_fit_is_equivariant_to_the_scales(bayes_pair):
    """Default priors are set on the data's scale, so the rescaled fit is the original fit
    in other units: the draws agree after back-transformation, within Monte Carlo error
    (the chains are not the same draw for draw: rounding differs, and NUTS amplifies it).
    The bound is about four Monte Carlo standard errors of the difference (ESS >= 250)."""
    o, s = bayes_pair["original"], bayes_pair["scaled"]
    for t in ("value", "capital"):
        back = _back(s.draws(t), t)
        assert abs(back.mean() - o.draws(t).mean()) < 0.35 * o.draws(t).std()
        assert back.std() == pytest.approx(o.draws(t).std(), rel=0.25)
    for q in ("sigma_unit", "sigma_obs"):
        assert s.draws(q).mean() / SCALE["invest"] == pytest.approx(o.draws(q).mean(), rel=0.1)


def test_bayesian_fit_on_wild_scales_is_well_conditioned(bayes_pair, grunfeld):
    import arviz_stats as azs
    import statsmodels.formula.api as smf

    s = bayes_pair["scaled"]
    d = s.diagnostics(warn=False)
    assert d["divergences"] == 0
    for t in ("value", "capital"):  # outside check: arviz-stats' R-hat
        assert float(azs.rhat(s.draws(t))) < 1.05
    # outside check: statsmodels MixedLM (ML) on the original data, back-transformed
    ml = _quiet(smf.mixedlm(F, grunfeld, groups=UNIT).fit, reml=False)
    for t in ("value", "capital"):
        draws = _back(s.draws(t), t)
        assert abs(draws.mean() - ml.params[t]) < 3 * draws.std()
