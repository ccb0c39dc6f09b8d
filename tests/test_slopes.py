"""Random slopes: the Woodbury marginal against scipy's multivariate normal, the occasion
conditional against the brute-force Gaussian conditional, a fit against statsmodels'
MixedLM, marginal against latent sampling, and a logit random-slope fit end to end.

Outside sources: scipy.stats.multivariate_normal (the per-unit density with covariance
``Z Sigma Z' + sigma^2 I``), scipy.stats.norm with the partitioned-covariance conditional
(Anderson 2003, theorem 2.5.1), statsmodels MixedLM (maximum likelihood with a random
slope). Simulated panels with known truth only.
"""

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import linalg, stats

import bayespanel as bp
from bayespanel.core.errors import SpecificationError
from bayespanel.bayes import slopes

SAMPLE = dict(tune=300, chains=2, seed=5, progress=False, sampler="pymc")


def _random_case(seed=1, N=8, q=2, k=3, S=3):
    rng = np.random.default_rng(seed)
    T = rng.integers(1, 7, N)
    codes = np.repeat(np.arange(N), T)
    n = len(codes)
    X = np.column_stack([np.ones(n), rng.normal(size=(n, k - 1))])
    Z = np.column_stack([np.ones(n)] + [X[:, j] - X[:, j].mean() for j in range(1, q)])
    y = rng.normal(size=n) * 2 + 1
    b = rng.normal(size=(S, k))
    sigma = rng.uniform(0.4, 2.0, S)
    L = np.stack([np.linalg.cholesky(np.cov(rng.normal(size=(q, 12))) + 0.05 * np.eye(q))
                  for _ in range(S)])
    return X, Z, y, codes, b, sigma, L


def _mvn_reference(X, Z, y, codes, b, sigma, L):
    out = np.empty((len(b), codes.max() + 1))
    for s in range(len(b)):
        Sigma = L[s] @ L[s].T
        for i in range(out.shape[1]):
            m = codes == i
            V = Z[m] @ Sigma @ Z[m].T + sigma[s] ** 2 * np.eye(m.sum())
            out[s, i] = stats.multivariate_normal(X[m] @ b[s], V).logpdf(y[m])
    return out


@pytest.mark.parametrize("q", [1, 2, 3])
def test_woodbury_equals_scipy_mvn(q):
    """Per-unit marginal = scipy multivariate normal with Z Sigma Z' + sigma^2 I, to 1e-8."""
    X, Z, y, codes, b, sigma, L = _random_case(q=q, k=max(q, 3))
    ref = _mvn_reference(X, Z, y, codes, b, sigma, L)
    got = slopes.unit_loglik_slopes(X, Z, y, codes, b, sigma, L)
    np.testing.assert_allclose(got, ref, atol=1e-8, rtol=0)
    st = slopes.slope_stats(X, Z, y, codes)
    for s in range(len(b)):
        tot = slopes.slope_marginal_loglik(st, b[s], sigma[s], L[s])
        assert tot == pytest.approx(ref[s].sum(), abs=1e-8)


def test_woodbury_graph_and_gradient():
    """The pytensor version (the sampler's likelihood) gives the same number, and its
    gradient matches a central finite difference of the scipy density."""
    import pytensor
    import pytensor.tensor as pt

    X, Z, y, codes, b, sigma, L = _random_case(q=2)
    st = slopes.slope_stats(X, Z, y, codes)
    bb, ss, LL = pt.vector("b"), pt.scalar("s"), pt.matrix("L")
    ll = slopes.slope_marginal_loglik(st, bb, ss, LL, xp=pt)
    f = pytensor.function([bb, ss, LL], [ll, pt.grad(ll, bb)])
    val, grad = f(b[0], sigma[0], L[0])
    ref = _mvn_reference(X, Z, y, codes, b[:1], sigma[:1], L[:1]).sum()
    assert val == pytest.approx(ref, abs=1e-8)
    h = 1e-5
    for j in range(len(b[0])):
        e = np.zeros_like(b[:1]); e[0, j] = h
        fd = (_mvn_reference(X, Z, y, codes, b[:1] + e, sigma[:1], L[:1]).sum()
              - _mvn_reference(X, Z, y, codes, b[:1] - e, sigma[:1], L[:1]).sum()) / (2 * h)
        assert grad[j] == pytest.approx(fd, rel=1e-6, abs=1e-6)


def test_occasion_conditional_equals_partitioned_normal():
    """Leave-one-occasion-out density (Bürkner, Gabry and Vehtari 2021) equals the
    conditional normal from the partitioned covariance, scored by scipy.stats.norm."""
    X, Z, y, codes, b, sigma, L = _random_case(q=2)
    got = slopes.occasion_loglik_slopes(X, Z, y, codes, b, sigma, L)
    for s in range(len(b)):
        Sigma = L[s] @ L[s].T
        for i in range(codes.max() + 1):
            idx = np.flatnonzero(codes == i)
            V = Z[idx] @ Sigma @ Z[idx].T + sigma[s] ** 2 * np.eye(len(idx))
            mu = X[idx] @ b[s]
            for a, t in enumerate(idx):
                o = [j for j in range(len(idx)) if j != a]
                if o:
                    w = linalg.solve(V[np.ix_(o, o)], V[o, a])
                    m_, v_ = mu[a] + w @ (y[idx][o] - mu[o]), V[a, a] - V[a, o] @ w
                else:
                    m_, v_ = mu[a], V[a, a]
                assert got[s, t] == pytest.approx(stats.norm(m_, np.sqrt(v_)).logpdf(y[t]),
                                                  abs=1e-9)


def test_unit_effect_conditional_mean_is_blup():
    """Conditional mean of g_i equals Sigma Z_i' V_i^-1 r_i (Henderson's BLUP), computed
    with scipy.linalg."""
    X, Z, y, codes, b, sigma, L = _random_case(q=2)
    _, mean = slopes.unit_effect_draws_slopes(X, Z, y, codes, b, sigma, L,
                                              np.random.default_rng(0))
    for s in range(len(b)):
        Sigma = L[s] @ L[s].T
        for i in range(codes.max() + 1):
            m = codes == i
            V = Z[m] @ Sigma @ Z[m].T + sigma[s] ** 2 * np.eye(m.sum())
            ref = Sigma @ Z[m].T @ linalg.solve(V, y[m] - X[m] @ b[s])
            np.testing.assert_allclose(mean[s, i], ref, atol=1e-10)


# ---------------------------------------------------------------------------- fitted models
def simulate_slopes(seed=0, N=40, T=8, b0=1.0, b1=0.6, tau=0.8, slope_sd=0.5, rho=0.3,
                    sigma=1.0):
    """Simulated panel (known truth): y = b0 + b1 x + u0_i + u1_i (x - mean x) + e."""
    rng = np.random.default_rng(seed)
    unit = np.repeat(np.arange(N), T)
    x = rng.normal(0, 1, N)[unit] * 0.5 + rng.normal(0, 1, N * T)
    C = np.array([[tau ** 2, rho * tau * slope_sd], [rho * tau * slope_sd, slope_sd ** 2]])
    g = rng.multivariate_normal([0, 0], C, N)
    y = b0 + b1 * x + g[unit, 0] + g[unit, 1] * (x - x.mean()) + rng.normal(0, sigma, N * T)
    return pd.DataFrame({"unit": unit, "occ": np.tile(np.arange(T), N), "x": x, "y": y})


@pytest.fixture(scope="module")
def gaussian_fits():
    df = simulate_slopes()
    panel = bp.Panel(df, unit="unit", time="occ")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        marg = bp.models.RandomIntercept(panel, "y ~ x", random_slopes=["x"])
        lat = bp.models.RandomIntercept(panel, "y ~ x", random_slopes=["x"], likelihood="latent")
        pm_ = marg.sample(draws=250, **SAMPLE)
        pl = lat.sample(draws=250, **SAMPLE)
    return df, marg, pm_, pl


def test_marginal_fit_matches_statsmodels_mixedlm(gaussian_fits):
    """statsmodels MixedLM (ML, random intercept and slope on x - mean x): the posterior
    means of the coefficients lie within half a standard error of the ML estimates, and the
    variance components agree to within 30% (weak priors, 40 units)."""
    import statsmodels.api as sm

    df, _, post, _ = gaussian_fits
    exog = sm.add_constant(df[["x"]])
    exog_re = np.column_stack([np.ones(len(df)), df["x"] - df["x"].mean()])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ml = sm.MixedLM(df["y"], exog, groups=df["unit"], exog_re=exog_re).fit(reml=False)
    for ours, theirs in (("Intercept", "const"), ("x", "x")):
        assert abs(post.coef[ours] - ml.fe_params[theirs]) < 0.5 * ml.bse_fe[theirs], ours
    cov = np.asarray(ml.cov_re)
    assert post.sigma_unit == pytest.approx(np.sqrt(cov[0, 0]), rel=0.3)
    assert post.draws("sigma_slope[x]").mean() == pytest.approx(np.sqrt(cov[1, 1]), rel=0.3)
    assert post.sigma_obs == pytest.approx(np.sqrt(ml.scale), rel=0.1)


def test_marginal_and_latent_agree(gaussian_fits):
    """Integrating the effects out (Woodbury) and sampling them give one posterior: means
    agree within Monte Carlo error; both posteriors give the same unit-level LOO terms."""
    import arviz_stats as azs

    _, _, pm_, pl = gaussian_fits
    for name in ("Intercept", "x", "sigma_unit", "sigma_slope[x]", "sigma_obs"):
        a, b = pm_.draws(name), pl.draws(name)
        mcse = np.hypot(a.std() / np.sqrt(azs.ess(a, method="bulk")),
                        b.std() / np.sqrt(azs.ess(b, method="bulk")))
        assert abs(a.mean() - b.mean()) < 4.5 * mcse, name
    lu = pm_.pointwise_loglik("unit")
    assert lu.attrs["level"] == "unit" and lu.sizes["unit"] == 40
    lo = pm_.pointwise_loglik("occasion")
    assert lo.attrs["level"] == "occasion" and lo.sizes["row"] == 320
    ue = pm_.unit_effects()
    assert list(ue["effect"].values) == ["Intercept", "x"]
    s = pm_.summary()
    assert {"sigma_slope[x]", "corr[Intercept, x]", "sigma_obs", "icc"} <= set(s.index)


def test_slope_option_errors():
    df = simulate_slopes(N=10, T=3)
    df["z"] = df["unit"] % 2
    panel = bp.Panel(df, unit="unit", time="occ")
    with pytest.raises(SpecificationError, match="'z', which does not vary within units"):
        bp.models.WithinBetween(panel, "y ~ x + z", random_slopes=["z"])
    with pytest.raises(SpecificationError, match="not on FixedEffects"):
        bp.models.FixedEffects(panel, "y ~ x", random_slopes=["x"])
    with pytest.raises(SpecificationError, match="names a covariate twice"):
        bp.models.RandomIntercept(panel, "y ~ x", random_slopes=["x", "x"])


@pytest.mark.slow
def test_logit_random_slope_end_to_end(tmp_path):
    """A logit within-between model with a random within slope samples, reports on the
    right scale, gives unit-level LOO terms by 2-d quadrature, and survives save/load."""
    df = simulate_slopes(seed=7, N=20, T=5)
    df["y"] = (df["y"] > df["y"].median()).astype(float)
    panel = bp.Panel(df, unit="unit", time="occ")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        post = bp.models.WithinBetween(panel, "y ~ x", family="bernoulli",
                                       random_slopes=["x"]).sample(
            draws=150, **{**SAMPLE, "tune": 200})
    s = post.summary()
    assert {"x (within)", "x (between)", "sigma_slope[x (within)]", "icc"} <= set(s.index)
    lu = post.pointwise_loglik("unit")
    assert np.all(np.isfinite(lu.values)) and np.all(lu.values < 0)
    lo = post.pointwise_loglik("occasion")
    assert lo.sizes["row"] == len(df)
    path = tmp_path / "logit_slopes.nc"
    post.save(path)
    back = bp.posterior.Posterior.load(path)
    assert type(back).__name__ == "LatentPosterior" and back.family == "bernoulli"
    pd.testing.assert_frame_equal(back.summary(), post.summary())
    np.testing.assert_allclose(back.draws("sigma_slope[x (within)]"),
                               post.draws("sigma_slope[x (within)]"))
