"""bayespanel's own NUTS (bayespanel/bayes/nuts.py) on targets whose answer is known.

Outside checks: draws from a correlated normal density (log density and its gradient from
scipy.stats.multivariate_normal) have that normal's mean and covariance within Monte Carlo
error, with effective sample sizes from arviz_stats; the same seed gives the same draws.
The comparison with PyMC's sampler on real and simulated panels is in
tests/test_warm_start.py.
"""

import numpy as np
import pytest

from bayespanel.bayes import nuts


@pytest.fixture(scope="module")
def normal_target():
    from scipy.stats import multivariate_normal

    rng = np.random.default_rng(2)
    n = 6
    A = rng.normal(size=(n, n))
    cov = (A @ A.T / n + 0.05 * np.eye(n)) * np.logspace(-4, 0, n)[:, None] ** 0.5 \
        * np.logspace(-4, 0, n)[None, :] ** 0.5  # scales over two decades, correlated
    mu = rng.normal(size=n)
    dist = multivariate_normal(mu, cov)
    P = np.linalg.inv(cov)

    def logp_grad(x):
        return float(dist.logpdf(x)), -P @ (x - mu)

    return mu, cov, logp_grad


def _chains(logp_grad, start, cov0, seed, chains=4, draws=500, tune=300):
    out = []
    for c in range(chains):
        d, st, eps, _ = nuts.sample_chain(logp_grad, start, cov0, draws=draws, tune=tune,
                                          rng=np.random.default_rng([seed, c]))
        out.append(d)
    return np.array(out), st, eps


def test_draws_have_the_normal_mean_and_covariance(normal_target):
    import arviz_stats as azs

    mu, cov, logp_grad = normal_target
    sd = np.sqrt(np.diag(cov))
    # a start away from the mode and a starting metric off by a factor of 4 in scale and
    # without the correlations: warm-up has to learn them
    D, st, eps = _chains(logp_grad, mu + 3 * sd, np.diag(4 * sd ** 2), seed=5)
    flat = D.reshape(-1, len(mu))
    for j in range(len(mu)):
        ess = float(azs.ess(D[:, :, j], method="mean"))
        assert ess > 400, j
        assert abs(flat[:, j].mean() - mu[j]) < 4 * sd[j] / np.sqrt(ess), j
    # the covariance in correlation units: within 0.1 of the normal's (about 4 MC SEs at
    # an ESS near 2,000)
    C = np.corrcoef(flat, rowvar=False)
    R = cov / np.outer(sd, sd)
    assert np.abs(C - R).max() < 0.1
    np.testing.assert_allclose(flat.std(0), sd, rtol=0.1)
    assert not st["diverging"].any()
    assert 0.6 < st["acceptance_rate"].mean() < 0.97  # target 0.8 (dual averaging)


def test_same_seed_same_draws(normal_target):
    mu, cov, logp_grad = normal_target
    a, _, _ = _chains(logp_grad, mu, cov, seed=1, chains=1, draws=50, tune=40)
    b, _, _ = _chains(logp_grad, mu, cov, seed=1, chains=1, draws=50, tune=40)
    c, _, _ = _chains(logp_grad, mu, cov, seed=2, chains=1, draws=50, tune=40)
    np.testing.assert_array_equal(a, b)
    assert not np.allclose(a, c)


def test_a_log_density_that_fails_is_a_divergence():
    # a wall at x = 1: beyond it the log density is -inf; the sampler must flag the
    # trajectories that hit it and never return a draw beyond it
    def logp_grad(x):
        if x[0] > 1.0:
            return -np.inf, np.zeros(1)
        return float(-0.5 * x @ x), -x

    d, st, _, _ = nuts.sample_chain(logp_grad, np.zeros(1), np.eye(1), draws=400, tune=200,
                                    rng=np.random.default_rng(0))
    assert d.max() <= 1.0
    assert st["diverging"].any()


def test_adaptation_windows():
    # the usual schedule for 1,000 warm-up iterations: a buffer of 75, windows of 25, 50,
    # 100, 200 and the rest up to a final buffer of 50
    assert nuts.adaptation_windows(1000) == [(75, 100), (100, 150), (150, 250), (250, 450),
                                             (450, 950)]
    assert nuts.adaptation_windows(100) == [(15, 90)]
    assert nuts.adaptation_windows(10) == []
