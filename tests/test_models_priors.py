"""Priors on the data scale, their defaults, prior predictive draws and option errors.

References: scipy.stats distributions (the prior implied on the original scale by the
standardised graph must be exactly the one stated, tested with Kolmogorov-Smirnov on
prior draws) and the Grunfeld investment panel shipped by statsmodels.datasets (Grunfeld
1958; the 10-firm textbook version) for the data-scaled defaults.
"""

import numpy as np
import pytest
import scipy.stats

import bayespanel as bp
from bayespanel.core.errors import SpecificationError
from bayespanel.bayes import (FixedEffects, Pooled, Prior, RandomIntercept, WithinBetween)

FORMULA = "invest ~ value + capital"


@pytest.fixture(scope="module")
def panel(grunfeld):
    return bp.Panel(grunfeld, unit="firm", time="year")


def _same(prior, family, **params):
    assert prior.family == family
    assert prior.kwargs == pytest.approx(params, rel=1e-12)


def test_defaults_follow_the_data(panel, grunfeld):
    # The documented defaults (docs/priors.md), computed independently with pandas on the
    # Grunfeld panel: slopes N(0, 2.5 sd(y)/sd(x)), centred intercept N(mean(y), 2.5 sd(y)),
    # sigma_obs exponential with mean sd(y), sigma_unit half-normal with scale sd(y).
    m = RandomIntercept(panel, FORMULA)
    sd_y, mean_y = grunfeld["invest"].std(), grunfeld["invest"].mean()
    _same(m.priors["value"], "normal", mu=0.0, sigma=2.5 * sd_y / grunfeld["value"].std())
    _same(m.priors["Intercept"], "normal", mu=mean_y, sigma=2.5 * sd_y)
    _same(m.priors["sigma_obs"], "exponential", scale=sd_y)
    _same(m.priors["sigma_unit"], "half_normal", scale=sd_y)
    # fixed effects scale each slope by the covariate's within SD
    fe = FixedEffects(panel, FORMULA)
    g = grunfeld.groupby("firm")["capital"]
    within_sd = np.sqrt(((grunfeld["capital"] - g.transform("mean")) ** 2).sum() / (len(grunfeld) - 1))
    assert fe.priors["capital"].kwargs["sigma"] == pytest.approx(2.5 * sd_y / within_sd, rel=1e-12)
    assert "sigma_unit" not in fe.priors


def test_overrides_presets_and_partial(panel, grunfeld):
    sd_y = grunfeld["invest"].std()
    m = RandomIntercept(panel, FORMULA, priors={
        "coef": Prior("student_t", nu=4), "capital": {"family": "normal", "sigma": 1.0},
        "sigma_unit": "gamma2", "sigma_obs": Prior("half_normal", scale=50.0)})
    assert m.priors["value"].family == "student_t" and m.priors["value"].kwargs["nu"] == 4
    assert m.priors["capital"] == Prior("normal", mu=0.0, sigma=1.0)
    # gamma2 preset: shape 2, mean sd(y) (scale sd(y)/2), Chung et al. (2013)
    _same(m.priors["sigma_unit"], "gamma2", scale=0.5 * sd_y)
    assert m.priors["sigma_obs"] == Prior("half_normal", scale=50.0)
    assert m.priors["Intercept"].family == "normal"
    for preset in ("half_normal", "half_student_t", "exponential", "gamma2"):
        assert RandomIntercept(panel, FORMULA, priors={"sigma_unit": preset}) \
            .priors["sigma_unit"].family == preset


class _HalfT:
    """|T| for T ~ t(nu, 0, scale), as a cdf for the KS test."""

    def __init__(self, nu, scale):
        self.t = scipy.stats.t(nu, 0.0, scale)

    def cdf(self, x):
        return 2 * self.t.cdf(x) - 1


# Two graphs carry every family (one prior predictive compilation each): which prior,
# on which parameter, and the scipy.stats distribution it must equal on the data scale.
PRIOR_SETS = {
    "a": {"sigma_unit": (Prior("gamma2", scale=40.0), scipy.stats.gamma(a=2, scale=40.0)),
          "sigma_obs": (Prior("half_student_t", nu=3, scale=20.0), _HalfT(3, 20.0)),
          "value": (Prior("normal", mu=0.1, sigma=0.05), scipy.stats.norm(0.1, 0.05)),
          "capital": (Prior("student_t", nu=5, mu=-0.2, sigma=0.3), scipy.stats.t(5, -0.2, 0.3)),
          "Intercept": (Prior("normal", mu=100, sigma=30), scipy.stats.norm(100, 30))},
    "b": {"sigma_unit": (Prior("half_normal", scale=80.0), scipy.stats.halfnorm(scale=80.0)),
          "sigma_obs": (Prior("exponential", scale=30.0), scipy.stats.expon(scale=30.0))},
}


@pytest.fixture(scope="module")
def prior_draws(panel):
    out = {}
    for key, spec in PRIOR_SETS.items():
        m = RandomIntercept(panel, FORMULA, priors={k: v[0] for k, v in spec.items()})
        out[key] = m.sample_prior_predictive(draws=2000, seed=7)
    return out


@pytest.mark.parametrize("key,name", [(k, n) for k, spec in PRIOR_SETS.items() for n in spec],
                         ids=[f"{n}-{spec[n][0].family}" for spec in PRIOR_SETS.values()
                              for n in spec])
def test_prior_on_data_scale_is_exact(prior_draws, grunfeld, key, name):
    # Source: scipy.stats distributions; KS test on 2000 prior draws from the graph, which
    # samples standardised parameters and maps them back to the data scale. The intercept
    # prior is stated for the expected outcome at the covariate means (the centred
    # intercept), b0 + sum_j b_j mean(x_j).
    d = prior_draws[key]["prior"]
    if name == "Intercept":
        coef = d["coef"]
        x = (coef.sel(term="Intercept") + coef.sel(term="value") * grunfeld["value"].mean()
             + coef.sel(term="capital") * grunfeld["capital"].mean()).values.ravel()
    elif name in d:
        x = d[name].values.ravel()
    else:
        x = d["coef"].sel(term=name).values.ravel()
    assert scipy.stats.kstest(x, PRIOR_SETS[key][name][1].cdf).pvalue > 0.01


def test_prior_predictive_outcome(prior_draws, grunfeld):
    # Prior predictive outcome y = x'b + u + e: shape, finiteness, and the spread across
    # rows of each draw at least of the order of its sigma_obs^2 + sigma_unit^2.
    dt = prior_draws["b"]
    y = dt["prior_predictive"]["y"]
    assert y.shape == (1, 2000, len(grunfeld)) and np.isfinite(y.values).all()
    pr = dt["prior"]
    noise = (pr["sigma_obs"] ** 2 + pr["sigma_unit"] ** 2).values.ravel()
    var = y.var("row").values.ravel()
    assert np.median(var / noise) > 0.5
    assert set(pr.data_vars) == {"coef", "sigma_obs", "sigma_unit", "icc"}


@pytest.mark.parametrize("kwargs,match", [
    ({"priors": {"valu": "normal"}}, r"unknown key 'valu'.*'value'"),
    ({"priors": {"sigma_unit": "gamma3"}}, r"prior family='gamma3'.*'gamma2'"),
    ({"priors": {"value": "gamma2"}}, r"coefficient.*'normal'"),
    ({"priors": {"sigma_obs": "normal"}}, r"standard deviation.*'half_normal'"),
    ({"priors": {"value": {"family": "normal", "tau": 2}}},
     r"no parameter 'tau'"),
    ({"priors": {"value": {"sigma": 2}}}, r"needs a 'family'"),
    ({"likelihood": "exact"}, r"likelihood='exact'.*'marginal', 'latent'"),
    ({"occasion_effects": "yes"}, r"occasion_effects"),
], ids=["unknown-term", "unknown-preset", "sd-family-on-coef", "coef-family-on-sd",
        "unknown-parameter", "no-family", "likelihood", "occasion-effects"])
def test_bad_options_name_the_fault(panel, kwargs, match):
    with pytest.raises(SpecificationError, match=match):
        RandomIntercept(panel, FORMULA, **kwargs)


def test_bad_options_per_builder(panel):
    with pytest.raises(SpecificationError, match="no unit intercepts, so no 'sigma_unit'"):
        Pooled(panel, FORMULA, priors={"sigma_unit": "gamma2"})
    with pytest.raises(SpecificationError, match="Pooled has no unit intercepts"):
        Pooled(panel, FORMULA, likelihood="latent")
    with pytest.raises(SpecificationError, match="scale=-1"):
        Prior("half_normal", scale=-1)
    m = WithinBetween(panel, FORMULA)
    for kw, match in [({"sampler": "stan"}, r"sampler='stan'.*'auto', 'bayespanel', 'pymc', 'nutpie'"),
                      ({"draws": 0}, "draws=0"), ({"chains": 1.5}, "chains=1.5"),
                      ({"seed": -3}, "seed=-3"), ({"target_accept": 1.2}, "target_accept")]:
        with pytest.raises(SpecificationError, match=match):
            m.sample(**kw)
    with pytest.raises(SpecificationError, match="labels has 1 names"):
        RandomIntercept.from_suffstats(m.stats, ["x"])


def test_occasion_effects_labels(panel):
    # Occasion indicators are ours ("occasion[1936]"); the first year is the reference.
    m = RandomIntercept(panel, FORMULA, occasion_effects=True)
    assert m.labels[:3] == ["Intercept", "value", "capital"]
    assert m.labels[3] == "occasion[1936]" and len(m.labels) == 3 + 19
    assert m.priors["occasion[1954]"].family == "normal"


@pytest.mark.parametrize("family,params", [
    ("normal", {"mu": 0.3, "sigma": 2.0}), ("student_t", {"nu": 3.0, "mu": -0.5, "sigma": 1.5}),
    ("flat", {}), ("half_normal", {"scale": 1.7}), ("half_student_t", {"nu": 3.0, "scale": 0.8}),
    ("exponential", {"scale": 2.5}), ("gamma2", {"scale": 0.5}), ("half_flat", {}),
    ("uniform", {"lower": -0.4, "upper": 0.9})])
def test_each_prior_family_is_one_distribution_in_pymc_and_scipy(family, params):
    """The one table of prior families (bayes.priors: coef_rv / sd_rv / rho_rv and
    prior_logpdf): the PyMC variable the builders make has the log-density scipy.stats
    gives for the same parameters (flat families: 0 in both)."""
    import pymc as pm

    from bayespanel.bayes.priors import (COEF_FAMILIES, RHO_FAMILIES, SD_FAMILIES, coef_rv,
                                         prior_logpdf, rho_rv, sd_rv)

    params = {k: np.float64(v) for k, v in params.items()}  # float64 in the graph too
    sd, rho = family in SD_FAMILIES, family in RHO_FAMILIES
    assert sd or rho or family in COEF_FAMILIES
    x = (np.array([0.05, 0.4, 1.3, 3.7]) if sd else np.array([-0.35, 0.0, 0.3, 0.85]) if rho
         else np.array([-2.2, -0.1, 0.6, 4.0]))
    with pm.Model():
        rv = (sd_rv(pm, "v", family, params) if sd else rho_rv(pm, "v", family, params) if rho
              else coef_rv(pm, "v", family, params, None))
    got = np.array([float(pm.logp(rv, np.float64(xi)).eval()) for xi in x])
    # PyMC writes the half Student t density in another form: it agrees to 1e-7 there
    rtol = 1e-7 if family == "half_student_t" else 1e-10
    np.testing.assert_allclose(got, prior_logpdf(family, x, params), rtol=rtol, atol=1e-12)
