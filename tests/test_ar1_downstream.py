"""AR(1) errors downstream of sampling: held-out densities, predictive errors, data swap.

Checks against outside references: scipy.stats.multivariate_normal (the dense marginal
density of a unit's rows) and numpy's dense conditional normal (Schur complement) for the
held-out densities that exact refits and K-fold score; the sample covariance of many
simulated errors against the dense AR(1) covariance ``sigma^2 rho^|t - s|`` for the
predictive draws. The panels are random draws, not data: unbalanced, with gaps and
one-row units.
"""

import numpy as np
import pytest
from scipy import stats

from bayespanel.core import ar1


def _panel(seed=4, n_units=17, max_t=6):
    rng = np.random.default_rng(seed)
    keys, times = [], []
    for i in range(n_units):
        T = 1 if i % 5 == 0 else int(rng.integers(2, max_t + 1))
        keys += [i] * T
        times.append(np.sort(rng.choice(10, size=T, replace=False)).astype(float))
    keys, times = np.array(keys), np.concatenate(times)
    perm = rng.permutation(len(keys))
    return keys[perm], times[perm], rng.normal(size=len(keys))


def _cov(t, rho, sigma, tau):
    return sigma ** 2 * rho ** np.abs(t[:, None] - t[None, :]) + (tau or 0.0) ** 2


def _dense_holdout(keys, times, r, test, rho, sigma, tau):
    """Per held-out row: numpy's conditional normal given the unit's training rows
    (Schur complement); fixed effects: the flat-prior integral written out as the GLS
    conditional, ``r_t - r_B`` projected (mean ``k'r_B + (1 - k'1) u_hat``)."""
    out = np.full(int(test.sum()), np.nan)
    held = np.flatnonzero(test)
    for j, i in enumerate(held):
        B = np.flatnonzero((keys == keys[i]) & ~test)
        t = np.concatenate([[times[i]], times[B]])
        if tau is None:
            if len(B) == 0:
                continue
            R = _cov(t, rho, sigma, 0.0)
            RB = R[1:, 1:]
            one = np.ones(len(B))
            a = np.linalg.solve(RB, one)
            u_hat, u_var = a @ r[B] / (a @ one), 1.0 / (a @ one)
            k = np.linalg.solve(RB, R[1:, 0])
            lead = 1.0 - k @ one
            mean = lead * u_hat + k @ r[B]
            var = R[0, 0] - R[0, 1:] @ k + lead ** 2 * u_var
        else:
            C = _cov(t, rho, sigma, tau)
            if len(B):
                k = np.linalg.solve(C[1:, 1:], C[1:, 0])
                mean, var = k @ r[B], C[0, 0] - C[0, 1:] @ k
            else:
                mean, var = 0.0, C[0, 0]
        out[j] = stats.norm(mean, np.sqrt(var)).logpdf(r[i])
    return out


@pytest.mark.parametrize("rho,sigma,tau", [(0.6, 1.2, 0.9), (-0.5, 0.8, 1.3), (0.8, 1.0, 0.0),
                                           (0.4, 1.1, None)])
def test_holdout_logdensity_equals_dense_conditional(rho, sigma, tau):
    keys, times, r = _panel()
    rng = np.random.default_rng(1)
    test = rng.random(len(keys)) < 0.35           # several rows of a unit at once
    got = ar1.holdout_logdensity(r, keys, times, test, rho, sigma, tau)
    want = _dense_holdout(keys, times, r, test, rho, sigma, tau)
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-10)
    assert np.array_equal(np.isnan(got), np.isnan(want))      # fixed effects: no training row
    # one row held out: the leave-one-out conditional of occasion_logdensity
    tl = ar1.Timeline.build(keys, times)
    loo = ar1.occasion_logdensity(r, tl, rho, sigma, tau)
    for i in (0, 7, 20):
        one = np.zeros(len(keys), dtype=bool)
        one[i] = True
        np.testing.assert_allclose(ar1.holdout_logdensity(r, keys, times, one, rho, sigma, tau),
                                   loo[[i]], rtol=0, atol=1e-10)


def test_holdout_logdensity_takes_draws():
    keys, times, r = _panel()
    test = np.arange(len(keys)) % 3 == 0
    rho, sigma, tau = np.array([0.3, -0.6]), np.array([1.0, 0.7]), np.array([0.5, 1.5])
    R = np.vstack([r, 0.5 * r])
    got = ar1.holdout_logdensity(R, keys, times, test, rho, sigma, tau)
    for s in range(2):
        np.testing.assert_allclose(
            got[s], ar1.holdout_logdensity(R[s], keys, times, test, rho[s], sigma[s], tau[s]),
            rtol=1e-13)


def test_simulated_errors_have_the_ar1_covariance():
    # 40,000 draws of one unit observed at 0, 1, 3, 4, 7 (gaps) beside a one-row unit:
    # sample covariance vs the dense sigma^2 rho^|t - s| (Monte Carlo SE of a covariance
    # entry about sigma^2 sqrt(2 / S) = 0.013 here; tolerance 0.06, over 4 SE)
    keys = np.array([1, 1, 0, 1, 1, 1])
    times = np.array([0.0, 3.0, 5.0, 1.0, 4.0, 7.0])
    tl = ar1.Timeline.build(keys, times)
    rho, sigma, S = -0.7, 1.3, 40_000
    e = ar1.simulate_errors(tl, np.full(S, rho), np.full(S, sigma), np.random.default_rng(3))
    unit = keys == 1
    t = times[unit]
    np.testing.assert_allclose(np.cov(e[:, unit].T), _cov(t, rho, sigma, 0.0), atol=0.06)
    assert np.var(e[:, ~unit]) == pytest.approx(sigma ** 2, rel=0.03)
    assert abs(np.mean(e[:, ~unit] * e[:, unit][:, :1])) < 0.05     # units independent


def test_data_values_swap_gives_the_density_of_new_data():
    # the statistics of a new outcome on the same rows have the same structure; putting
    # their data values into the old arrays gives the new density (scipy dense reference)
    keys, times, r = _panel()
    rng = np.random.default_rng(5)
    X = np.column_stack([np.ones(len(keys)), rng.normal(size=len(keys))])
    b = np.array([0.2, -0.4])
    old = ar1.compute(X, rng.normal(size=len(keys)), keys, times).arrays()
    y2 = rng.normal(size=len(keys))
    new = ar1.compute(X, y2, keys, times).arrays()
    assert ar1.structure(old) == ar1.structure(new)
    swapped = ar1.with_values(old, ar1.data_values(new))
    v = np.append(-b, 1.0)
    r2 = y2 - X @ b
    want = sum(stats.multivariate_normal(np.zeros(m.sum()), _cov(times[m], 0.5, 1.1, 0.7))
               .logpdf(r2[m]) for m in (keys == u for u in np.unique(keys)))
    assert ar1.loglik(v, swapped, 0.5, 1.1, 0.7) == pytest.approx(want, rel=1e-10)
    less = ar1.compute(X[1:], y2[1:], keys[1:], times[1:]).arrays()
    assert ar1.structure(less) != ar1.structure(old)
