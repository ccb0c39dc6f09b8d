"""Outcome families: densities, support checks, latent ICC, marginal effects, PPC, and the
logit / Poisson random-intercept fits against bambi.

Outside sources, named beside each check: scipy.stats (densities), statsmodels (logit
average marginal effects), bambi 0.21 (the same random-intercept models and priors),
Snijders and Bosker (2012) and Nakagawa, Johnson and Schielzeth (2017) (latent-scale
residual variances). Simulated panels (known truth) are the only invented data.
"""

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import bayespanel as bp
from bayespanel.core.errors import PanelDataError, SpecificationError
from bayespanel.bayes import families as F

DRAWS = dict(draws=300, tune=300, chains=2, seed=3, progress=False, sampler="pymc")


def simulate_panel(family, n_units=30, n_occ=6, seed=0, b0=-0.3, b_within=0.8,
                   b_between=0.3, tau=0.9):
    """A simulated panel (known truth) with a time-varying x and a binary/count outcome."""
    rng = np.random.default_rng(seed)
    unit = np.repeat(np.arange(n_units), n_occ)
    xbar = rng.normal(0, 1, n_units)
    x = xbar[unit] + rng.normal(0, 1, len(unit))
    u = rng.normal(0, tau, n_units)
    xb = pd.Series(x).groupby(unit).transform("mean").to_numpy()
    eta = b0 + b_within * (x - xb) + b_between * xb + u[unit]
    if family == "bernoulli":
        y = rng.binomial(1, 1 / (1 + np.exp(-eta)))
    else:
        y = rng.poisson(np.exp(eta))
    return pd.DataFrame({"unit": [f"u{i:02d}" for i in unit], "occ": np.tile(np.arange(n_occ), n_units),
                         "x": x, "y": y.astype(float)})


# ---------------------------------------------------------------------------- densities
@pytest.mark.parametrize("family", F.FAMILIES)
def test_logpdf_matches_scipy(family):
    """Each family's log density equals scipy.stats (reference library)."""
    rng = np.random.default_rng(1)
    eta = rng.normal(0.3, 1.0, 50)
    trials = rng.integers(1, 9, 50).astype(float)
    logE = rng.normal(0, 0.3, 50)
    p = {"sigma_obs": 1.3, "nu": 4.5, "shape": 2.2}
    if family == "gaussian":
        y = rng.normal(size=50)
        ref = stats.norm(eta, 1.3).logpdf(y)
    elif family == "student_t":
        y = rng.normal(size=50) * 2
        ref = stats.t(4.5, loc=eta, scale=1.3).logpdf(y)
    elif family == "bernoulli":
        y = rng.integers(0, 2, 50).astype(float)
        ref = stats.bernoulli(1 / (1 + np.exp(-eta))).logpmf(y)
    elif family == "binomial":
        y = np.minimum(rng.integers(0, 9, 50), trials).astype(float)
        ref = stats.binom(trials, 1 / (1 + np.exp(-eta))).logpmf(y)
    elif family == "poisson":
        y = rng.poisson(2, 50).astype(float)
        ref = stats.poisson(np.exp(eta + logE)).logpmf(y)
    else:
        y = rng.poisson(2, 50).astype(float)
        mu = np.exp(eta + logE)
        ref = stats.nbinom(2.2, 2.2 / (2.2 + mu)).logpmf(y)  # scipy's (n, p) form
    got = F.logpdf(family, y, eta, p, trials=trials,
                   log_exposure=logE if F.get_family(family).uses_exposure else None)
    np.testing.assert_allclose(got, ref, rtol=1e-10, atol=1e-10)


@pytest.mark.parametrize("family", F.FAMILIES)
def test_eta_derivatives_match_numerical(family):
    """Analytic derivatives in eta equal scipy.differentiate's numerical derivatives."""
    from scipy.differentiate import derivative

    rng = np.random.default_rng(2)
    eta = rng.normal(0.2, 0.8, 20)
    y = (rng.integers(0, 2, 20) if family == "bernoulli" else rng.poisson(2, 20)).astype(float)
    trials = np.full(20, 6.0)
    p = {"sigma_obs": 0.9, "nu": 3.5, "shape": 1.7}
    kw = {"trials": trials} if family == "binomial" else {}
    d1, d2 = F.eta_derivatives(family, y, eta, p, **kw)

    def col(a, e):  # scipy evaluates on a trailing axis of step sizes
        return a.reshape(a.shape + (1,) * (e.ndim - 1))

    def f(e):
        return F.logpdf(family, col(y, e), e, p, **{k: col(v, e) for k, v in kw.items()})

    def g(e):
        return F.eta_derivatives(family, col(y, e), e, p,
                                 **{k: col(v, e) for k, v in kw.items()})[0]

    num1 = derivative(f, eta).df
    num2 = derivative(g, eta).df
    np.testing.assert_allclose(d1, num1, rtol=1e-7, atol=1e-8)
    np.testing.assert_allclose(d2, num2, rtol=1e-7, atol=1e-8)


def test_latent_residual_variances():
    """Distribution-specific variances: pi^2/3 for the logit link (Snijders and Bosker 2012,
    section 17.3); log(1 + 1/lambda) and log(1 + 1/lambda + 1/theta) for Poisson and
    negative binomial, lambda = exp(b0 + tau^2/2) (Nakagawa et al. 2017, table 1)."""
    assert F.latent_residual_variance("bernoulli", tau=np.array(1.0)) == pytest.approx(np.pi ** 2 / 3)
    lam = np.exp(0.4 + 0.5 * 0.7 ** 2)
    assert F.latent_residual_variance("poisson", intercept=0.4, tau=0.7) == pytest.approx(np.log1p(1 / lam))
    assert F.latent_residual_variance("negative_binomial", {"shape": 3.0}, intercept=0.4, tau=0.7) \
        == pytest.approx(np.log1p(1 / lam + 1 / 3.0))
    icc = F.icc_latent_draws("bernoulli", np.array([1.0, 2.0]))
    np.testing.assert_allclose(icc, [1 / (1 + np.pi ** 2 / 3), 4 / (4 + np.pi ** 2 / 3)])


def test_ame_equals_statsmodels_logit_margeff():
    """With no unit variance (tau = 0) our average marginal effect is statsmodels' Logit
    average marginal effect (get_margeff(at='overall')) at the same coefficients."""
    import statsmodels.api as sm

    df = simulate_panel("bernoulli", n_units=60, seed=4)
    X = sm.add_constant(df[["x"]].to_numpy())
    fit = sm.Logit(df["y"].to_numpy(), X).fit(disp=0)
    ref = fit.get_margeff(at="overall").margeff
    b = np.asarray(fit.params)[None, :]
    got = F.ame_draws("bernoulli", b @ X.T, np.zeros(1), np.array([[0.0, 1.0]]), b)
    assert got[0, 0] == pytest.approx(ref[0], rel=1e-10)
    # the log link: exp(eta + tau^2/2) b, averaged over rows (lognormal mean, exact)
    got = F.ame_draws("poisson", b @ X.T, np.array([0.6]), np.array([[0.0, 1.0]]), b)
    assert got[0, 0] == pytest.approx(b[0, 1] * np.exp(b @ X.T + 0.18).mean(), rel=1e-12)


# ---------------------------------------------------------------------------- bad input
@pytest.fixture(scope="module")
def binpanel():
    return bp.Panel(simulate_panel("bernoulli", seed=5), unit="unit", time="occ")


def test_support_errors_name_the_row(binpanel):
    df = binpanel.data.copy()
    df.loc[df.index[7], "y"] = 2.0
    with pytest.raises(PanelDataError, match=r"0/1.*unit='u01', occ=1"):
        bp.models.RandomIntercept(bp.Panel(df, unit="unit", time="occ"), "y ~ x",
                                  family="bernoulli")
    df.loc[df.index[7], "y"] = -1.0
    with pytest.raises(PanelDataError, match="non-negative whole number"):
        bp.models.RandomIntercept(bp.Panel(df, unit="unit", time="occ"), "y ~ x",
                                  family="poisson")
    df["n"] = 1.0
    df.loc[df.index[7], "y"] = 3.0
    with pytest.raises(PanelDataError, match="exceeds its trials"):
        bp.models.RandomIntercept(bp.Panel(df, unit="unit", time="occ"), "y ~ x",
                                  family="binomial", trials="n")


def test_option_errors(binpanel):
    with pytest.raises(SpecificationError, match="family='logit' is not valid; choose one of"):
        bp.models.RandomIntercept(binpanel, "y ~ x", family="logit")
    with pytest.raises(SpecificationError, match="needs trials="):
        bp.models.RandomIntercept(binpanel, "y ~ x", family="binomial")
    with pytest.raises(SpecificationError, match="exposure= is only used"):
        bp.models.RandomIntercept(binpanel, "y ~ x", family="bernoulli", exposure="x")
    with pytest.raises(SpecificationError, match="not on Pooled"):
        bp.models.Pooled(binpanel, "y ~ x", family="bernoulli")
    with pytest.raises(SpecificationError, match="no closed-form marginal"):
        bp.models.RandomIntercept(binpanel, "y ~ x", family="bernoulli", likelihood="marginal")
    with pytest.raises(SpecificationError, match="no occasion-level SD"):
        bp.models.RandomIntercept(binpanel, "y ~ x", family="bernoulli",
                                  priors={"sigma_obs": "exponential"})
    with pytest.raises(SpecificationError, match="random_slopes names 'z', which is not a term"):
        bp.models.RandomIntercept(binpanel, "y ~ x", family="bernoulli", random_slopes=["z"])


# ---------------------------------------------------------------------------- against bambi
PRIORS = {"Intercept": bp.models.Prior("normal", mu=0.0, sigma=2.5),
          "x": bp.models.Prior("normal", mu=0.0, sigma=1.0),
          "sigma_unit": bp.models.Prior("half_normal", scale=1.0)}


def _bambi_fit(df, family):
    import bambi as bmb

    priors = {"Intercept": bmb.Prior("Normal", mu=0.0, sigma=2.5),
              "x": bmb.Prior("Normal", mu=0.0, sigma=1.0),
              "1|unit": bmb.Prior("Normal", mu=0.0, sigma=bmb.Prior("HalfNormal", sigma=1.0))}
    # bambi centres the predictors by default, so its intercept prior is on the intercept
    # at the covariate means, as ours is (bambi.Model docstring, center_predictors)
    m = bmb.Model("y ~ x + (1|unit)", df, family=family, priors=priors)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        idata = m.fit(draws=300, tune=300, chains=2, random_seed=11, progressbar=False,
                      inference_method="pymc")
    post = idata["posterior"]
    return {"Intercept": post["Intercept"].values.ravel(), "x": post["x"].values.ravel(),
            "sigma_unit": post["1|unit_sigma"].values.ravel()}


@pytest.fixture(scope="module", params=["bernoulli", "poisson"])
def paired_fits(request):
    family = request.param
    df = simulate_panel(family, n_units=30, n_occ=6, seed=21)
    panel = bp.Panel(df, unit="unit", time="occ")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ours = bp.models.RandomIntercept(panel, "y ~ x", family=family, priors=PRIORS).sample(
            draws=300, tune=300, chains=2, seed=11, progress=False, sampler="pymc")
    return family, ours, _bambi_fit(df, family)


@pytest.mark.slow
def test_random_intercept_agrees_with_bambi(paired_fits):
    """bambi 0.21 fits of the same logit / Poisson random-intercept model and priors: the
    posterior means agree within Monte Carlo error and the posterior SDs within 20%."""
    import arviz_stats as azs

    family, ours, theirs = paired_fits
    for name in ("Intercept", "x", "sigma_unit"):
        a = ours.draws(name).reshape(-1)
        b = theirs[name]
        mcse = np.hypot(a.std() / np.sqrt(azs.ess(ours.draws(name), method="bulk")),
                        b.std() / np.sqrt(azs.ess(b.reshape(2, -1), method="bulk")))
        assert abs(a.mean() - b.mean()) < 4.0 * mcse + 0.02 * b.std(), (family, name)
        assert a.std() == pytest.approx(b.std(), rel=0.2), (family, name)


@pytest.mark.slow
def test_family_reports(paired_fits):
    """ICC on the latent scale from the draws equals the published formula applied to
    the same draws; PPC statistics of a correctly specified model are not extreme."""
    family, post, _ = paired_fits
    tau = post.flat_draws("sigma_unit")
    if family == "bernoulli":
        expected = tau ** 2 / (tau ** 2 + np.pi ** 2 / 3)  # Snijders and Bosker (2012)
    else:  # Nakagawa et al. (2017): lambda = exp(b0 + tau^2 / 2) at the covariate means
        b0 = post.coef_draws() @ post.rows[0].mean(axis=0)
        expected = tau ** 2 / (tau ** 2 + np.log1p(1 / np.exp(b0 + tau ** 2 / 2)))
    table = post.icc_table(prob=0.9)
    assert post.icc == pytest.approx(expected.mean(), rel=1e-12)  # float, as for every fit
    assert table["mean"].iloc[0] == pytest.approx(expected.mean(), rel=1e-12)
    assert "latent scale" in table.index[0]
    ppc = post.ppc(draws=200, seed=1)
    first = "rate of ones" if family == "bernoulli" else "mean count"
    assert first in ppc.index
    assert 0.02 < ppc.loc[first, "p (replicated >= observed)"] < 0.98
    ame = post.average_marginal_effects()
    assert list(ame.index) == ["x"]
    assert np.sign(ame.loc["x", "mean"]) == np.sign(post.coef["x"])


@pytest.mark.slow
def test_loo_levels_stated(paired_fits):
    """PSIS-LOO (arviz_stats) on the quadrature (unit) and conditional (occasion) terms:
    the level and the way the terms were computed are stated in every result; the
    effective number of parameters at the unit level is positive and well below the
    number of units."""
    family, post, _ = paired_fits
    unit = post.loo("unit")
    occ = post.loo("occasion")
    assert unit.level == "unit" and "quadrature" in unit.notes[0]
    assert occ.level == "occasion" and "conditional" in occ.notes[0]
    assert len(unit.pointwise) == 30 and len(occ.pointwise) == 180
    assert 0 < unit.p_loo < 10
