"""Unit-level log-likelihood by adaptive Gauss-Hermite quadrature against brute-force
numerical integrals (dense composite Simpson rules, scipy.integrate.simpson), and the occasion-level terms
against scipy.stats densities."""

import numpy as np
import pytest
from scipy import integrate, stats

from bayespanel.core.errors import SpecificationError
from bayespanel.bayes import families as F
from bayespanel.bayes import quadrature as Q

CASES = {
    "bernoulli": {},
    "binomial": {},
    "poisson": {},
    "negative_binomial": {"shape": np.array([1.5, 6.0])},
    "student_t": {"sigma_obs": np.array([0.7, 1.4]), "nu": np.array([3.0, 12.0])},
    "gaussian": {"sigma_obs": np.array([0.6, 1.1])},
}


def _data(family, seed=3):
    rng = np.random.default_rng(seed)
    T = np.array([1, 2, 5, 9, 3])
    codes = np.repeat(np.arange(len(T)), T)
    n = len(codes)
    eta = rng.normal(0.1, 0.6, size=(2, n))
    trials = rng.integers(1, 7, n).astype(float) if family == "binomial" else None
    logE = rng.normal(0, 0.4, n) if F.get_family(family).uses_exposure else None
    if family == "bernoulli":
        y = rng.integers(0, 2, n)
    elif family == "binomial":
        y = rng.binomial(trials.astype(int), 0.4)
    elif family in ("poisson", "negative_binomial"):
        y = rng.poisson(3.0, n)
    else:
        y = rng.standard_t(3, n) * 1.5
    return y.astype(float), eta, codes, trials, logE


def _brute_1d(family, y, eta, codes, tau, params, trials, logE, grid=20001):
    """log ∫ prod_t p(y_t | eta_t + u) N(u; 0, tau^2) du by brute force: composite Simpson
    (scipy.integrate.simpson) on a dense grid over +-14 tau."""
    out = np.empty((eta.shape[0], codes.max() + 1))
    for s in range(eta.shape[0]):
        p = {k: v[s] for k, v in params.items()}
        u = np.linspace(-14 * tau[s], 14 * tau[s], grid)
        for i in range(out.shape[1]):
            m = codes == i
            kw = {"trials": trials[m, None] if trials is not None else None,
                  "log_exposure": logE[m, None] if logE is not None else None}
            lp = F.logpdf(family, y[m, None], eta[s, m, None] + u[None, :], p, **kw).sum(axis=0)
            lp = lp + stats.norm(0, tau[s]).logpdf(u)
            top = lp.max()
            out[s, i] = np.log(integrate.simpson(np.exp(lp - top), x=u)) + top
    return out


@pytest.mark.parametrize("family", list(CASES))
def test_aghq_matches_brute_force_integral(family):
    """AGHQ (Liu and Pierce 1994) equals a brute-force numerical integral (scipy)."""
    y, eta, codes, trials, logE = _data(family)
    tau = np.array([0.5, 1.7])
    params = CASES[family]
    got = Q.unit_loglik_aghq(family, y, eta, np.ones((len(y), 1)), tau.reshape(2, 1, 1), codes,
                             params, trials=trials, log_exposure=logE, n_nodes=25)
    ref = _brute_1d(family, y, eta, codes, tau, params, trials, logE)
    tol = 1e-12 if family == "gaussian" else 1e-7  # exact for a Gaussian integrand
    np.testing.assert_allclose(got, ref, atol=max(tol, 1e-10), rtol=0)
    # the default rule (15 nodes) is already accurate enough for LOO
    default = Q.unit_loglik_aghq(family, y, eta, np.ones((len(y), 1)), tau.reshape(2, 1, 1),
                                 codes, params, trials=trials, log_exposure=logE)
    np.testing.assert_allclose(default, ref, atol=2e-4)


def test_aghq_random_slope_matches_brute_force_integral():
    """Two unit effects (intercept and slope): the tensor-product rule against a brute-force
    two-dimensional composite Simpson integral (scipy.integrate.simpson) over the
    standardised effects."""
    y, eta, codes, _, logE = _data("poisson", seed=8)
    rng = np.random.default_rng(9)
    Z = np.column_stack([np.ones(len(y)), rng.normal(0, 1, len(y))])
    L = np.array([[[0.7, 0.0], [0.25, 0.4]], [[1.1, 0.0], [-0.3, 0.6]]])
    got = Q.unit_loglik_aghq("poisson", y, eta, Z, L, codes, log_exposure=logE, n_nodes=25)
    a = np.linspace(-8, 8, 1201)
    A, B = np.meshgrid(a, a, indexing="ij")
    H = np.stack([A.ravel(), B.ravel()])
    for s in range(2):
        for i in (0, 3):
            m = codes == i
            lin = eta[s, m, None] + Z[m] @ (L[s] @ H)
            lp = F.logpdf("poisson", y[m, None], lin, log_exposure=logE[m, None]).sum(axis=0)
            lp = (lp + stats.norm.logpdf(H).sum(axis=0)).reshape(A.shape)
            top = lp.max()
            inner = integrate.simpson(np.exp(lp - top), x=a, axis=1)
            ref = np.log(integrate.simpson(inner, x=a)) + top
            assert got[s, i] == pytest.approx(ref, abs=1e-7)


def test_gaussian_aghq_equals_closed_form_marginal():
    """For a Gaussian outcome the rule is exact: it equals the closed-form random-intercept
    marginal density (Searle, Casella and McCulloch 1992, via core.gaussian)."""
    from bayespanel.core import gaussian

    y, eta, codes, _, _ = _data("gaussian")
    sigma, tau = np.array([0.6, 1.1]), np.array([0.5, 1.7])
    got = Q.unit_loglik_aghq("gaussian", y, eta, np.ones((len(y), 1)), tau.reshape(2, 1, 1),
                             codes, {"sigma_obs": sigma})
    M = np.eye(len(y))  # eta as coefficients on identity columns
    ref = gaussian.unit_loglik_rows(M, y, codes, eta, sigma, tau)
    np.testing.assert_allclose(got, ref, atol=1e-11)


def test_occasion_terms_are_conditional_densities():
    """Occasion-level terms given the unit effects are scipy.stats log-pmfs."""
    y, eta, codes, _, _ = _data("poisson")
    g = np.random.default_rng(1).normal(0, 0.5, (2, codes.max() + 1, 1))
    got = Q.occasion_loglik_latent("poisson", y, eta, np.ones((len(y), 1)), g, codes)
    ref = stats.poisson(np.exp(eta + g[:, codes, 0])).logpmf(y)
    np.testing.assert_allclose(got, ref, rtol=1e-12)


def test_quadrature_limits():
    y, eta, codes, _, _ = _data("poisson")
    with pytest.raises(SpecificationError, match="at most 3"):
        Q.unit_loglik_aghq("poisson", y, eta, np.ones((len(y), 4)), np.eye(4)[None].repeat(2, 0),
                           codes)
    with pytest.raises(SpecificationError, match="level='unit_level' is not valid"):
        Q.pointwise_loglik(None, "unit_level")
