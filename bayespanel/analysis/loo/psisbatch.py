"""PSIS-LOO of every point at once: the result :func:`arviz_stats.loo` gives for a
``(chains, draws, points)`` log-likelihood array, with the per-point steps done on the
whole ``points x draws`` matrix.

arviz-stats smooths the importance weights and sums them point by point in a Python loop
(about 1.5 ms per point; 0.35 s for the demo's 242 rows, per model). Here each step runs
for all points together, with the same operations in the same order on each point's
draws (the sort, the generalized Pareto fit of the tail on its grid, the smoothed tail,
the normalisation and the two log-sum-exps), so the numbers are those of arviz-stats
(tests/test_loo_batch.py compares them bit for bit). The posterior mean of the tail fit's
grid, which drops each point's negligible grid weights first, is summed point by point.

References
----------
.. [1] Vehtari, A., Simpson, D., Gelman, A., Yao, Y. and Gabry, J. (2024). Pareto smoothed
   importance sampling. Journal of Machine Learning Research 25(72), 1-58.
.. [2] Zhang, J. and Stephens, M. A. (2009). A new and efficient estimation method for the
   generalized Pareto distribution. Technometrics 51, 316-325.
"""

from __future__ import annotations

import warnings

import numpy as np

from ...core.mathcore import log_sum_exp as logsumexp

__all__ = ["psis_loo", "psis_log_weights", "relative_efficiency"]

#: the prior of the tail fit (arviz-stats' ``_gpdfit``: Vehtari et al. 2024, appendix)
_PRIOR_BS, _PRIOR_K = 3, 10


def relative_efficiency(posterior, n_samples: int) -> float:
    """Mean relative ESS of the posterior's variables (arviz-stats' default ``reff``);
    1 with one chain."""
    import arviz_stats  # noqa: F401  (registers the .azstats accessor)

    if posterior.sizes["chain"] == 1:
        return 1.0
    ess = posterior.azstats.ess(method="mean")
    return np.hstack([ess[v].values.flatten() for v in ess.data_vars]).mean() / n_samples


def _by_point(ll):
    """``(points, draws)`` in C order: each point's draws contiguous, so that every sum
    over them runs as numpy sums one point's array (pairwise); a strided view would be
    summed in another order."""
    ll = np.asarray(ll, dtype=float)
    return np.ascontiguousarray(np.moveaxis(ll, -1, 0).reshape(ll.shape[-1], -1))


#: points x draws in one block: each block's temporaries (the transposed draws, their
#: order, and the tail fit's grid, 43 x 190 values a point at 4,000 draws) stay tens of MB
_BLOCK = 1 << 20


def _blocks(N: int, S: int):
    """Slices of the points, a block of about :data:`_BLOCK` values at a time."""
    step = max(1, _BLOCK // S)
    return [slice(lo, min(N, lo + step)) for lo in range(0, N, step)]


def _tail_length(S: int, reff) -> float:
    """Draws in the smoothed tail: ``3 sqrt(S / reff)``, or ``S / 5`` for few draws."""
    return np.floor(3 * (S / reff) ** 0.5) if S * reff > 225 else np.floor(S / 5)


def _gpd_fit(x):
    """``(k, sigma)`` of the generalized Pareto distribution for each row of ``x`` (sorted
    exceedances, one row per point): the empirical-Bayes estimate of Zhang and Stephens
    (2009) with the weak prior on k of Vehtari et al. (2024)."""
    N, n = x.shape
    m = 30 + int(n ** 0.5)
    xstar = x[:, int((n / 4 + 0.5) - 1)]  # first quartile of each row
    k = np.full(N, np.nan)
    sigma = np.full(N, np.nan)
    ok = xstar > x[:, 0]  # otherwise far from a generalized Pareto tail: (nan, nan)
    if not ok.any():
        return k, sigma
    x, xstar = x[ok], xstar[ok]
    grid = 1 - np.sqrt(m / (np.arange(1, m + 1, dtype=float) - 0.5))
    b = grid[None, :] / (_PRIOR_BS * xstar)[:, None]
    b += 1 / x[:, -1:]
    k_grid = np.mean(np.log1p(-b[:, :, None] * x[:, None, :]), axis=2)
    len_scale = n * (np.log(-b / k_grid) - k_grid - 1)
    w = np.exp(len_scale - logsumexp(len_scale, axis=1, keepdims=True))
    keep = w >= 10 * np.finfo(float).eps
    b_post = np.empty(len(x))
    for i in range(len(x)):  # negligible weights dropped: the sums run on the rest
        wi, bi = w[i][keep[i]], b[i][keep[i]]
        wi /= wi.sum()
        b_post[i] = np.sum(bi * wi)
    kappa = np.mean(np.log1p(-b_post[:, None] * x), axis=1)
    s = -kappa / b_post
    kappa = (n * kappa + _PRIOR_K * 0.5) / (n + _PRIOR_K)
    s[np.isnan(kappa)] = np.nan
    kappa[np.isnan(kappa)] = np.inf
    k[ok], sigma[ok] = kappa, s
    return k, sigma


def psis_log_weights(ll, reff=1.0):
    """Pareto-smoothed log importance weights of leaving out each point.

    Parameters
    ----------
    ll : array, shape (chains, draws, points)
        Pointwise log-likelihood.
    reff : float
        Relative efficiency of the draws.

    Returns
    -------
    log_weights : array, shape (points, chains, draws)
        Normalised (each point's weights sum to one).
    k : array, shape (points,)
        The Pareto shape estimate of each point's tail.

    Raises
    ------
    ValueError
        When a point's tail of weights is flat (arviz-stats' message).
    """
    C, D, N = ll.shape
    S = C * D
    M = _tail_length(S, reff)
    if M < 5:
        raise ValueError("n_draws_tail must be at least 5")
    lw, k = np.empty((N, S)), np.empty(N)
    for sl in _blocks(N, S):
        lw[sl], k[sl] = _smoothed(-_by_point(ll[..., sl]), M)
    return lw.reshape(N, C, D), k


def _smoothed(a, M):
    """Log weights ``a`` (points x draws, C order) with each point's largest ``M``
    replaced by the fitted tail's quantiles and normalised; and each point's k."""
    S = a.shape[1]
    a = a - np.max(a, axis=1, keepdims=True)
    tail_ids = np.arange(S - M, S, dtype=int)
    order = np.argsort(a, axis=1)
    tail_pos = order[:, tail_ids]
    tail = np.take_along_axis(a, tail_pos, axis=1)
    cutoff = np.take_along_axis(a, order[:, tail_ids[0] - 1:tail_ids[0]], axis=1)[:, 0]
    max_tail, min_tail = np.max(tail, axis=1), np.min(tail, axis=1)
    if np.any(np.abs(max_tail - min_tail) < np.finfo(float).tiny):
        raise ValueError("All tail values are the same")
    cut = np.exp(cutoff)
    k, sigma = _gpd_fit(np.exp(tail) - cut[:, None])
    smooth = np.isfinite(k)
    if smooth.any():
        p = np.arange(0.5, M) / M
        kk, ss, mu = k[smooth, None], sigma[smooth, None], cut[smooth, None]
        with np.errstate(divide="ignore", invalid="ignore"):
            q = np.where(kk == 0, mu - ss * np.log1p(-p),
                         mu + ss * np.expm1(-kk * np.log1p(-p)) / kk)
            q[(ss <= 0)[:, 0]] = np.nan
            q = np.log(q)
        mt = max_tail[smooth, None]
        q = np.where(q > mt, mt, q)
        rows = np.flatnonzero(smooth)
        a[rows[:, None], tail_pos[smooth]] = q
    a -= logsumexp(a, axis=1, keepdims=True)
    return a, k


def psis_loo(ll, level, posterior=None, reff=None):
    """PSIS-LOO of a ``(chains, draws, points)`` log-likelihood array: the
    :class:`arviz_stats.utils.ELPDDataLOO` (pointwise) that ``arviz_stats.loo`` returns for
    the same array, named ``level``, with ``reff`` from ``posterior`` when not given (1
    without a posterior)."""
    import xarray as xr
    from arviz_stats.utils import ELPDDataLOO

    ll = np.asarray(ll, dtype=float)
    C, D, N = ll.shape
    S = C * D
    if reff is None:
        reff = 1.0 if posterior is None else relative_efficiency(posterior, S)
    lw, k = psis_log_weights(ll, reff)
    elpd_i, lppd_i = np.empty(N), np.empty(N)
    for sl in _blocks(N, S):
        a = _by_point(ll[..., sl])
        elpd_i[sl] = logsumexp(lw[sl].reshape(-1, S) + a, axis=1)
        lppd_i[sl] = logsumexp(a, axis=1, b=1 / S)
    p_loo_i = lppd_i - elpd_i
    dim = "unit" if level == "unit" else "row"
    # the log-likelihood as arviz-stats reads it from a DataTree group holding it under
    # the level's name: at the unit level that is also its dimension's name, which makes
    # xarray keep it as a coordinate (arviz-stats' log weights carry it)
    ll_da = xr.Dataset({level: (("chain", "draw", dim), ll)})[level]
    elpd_da = xr.DataArray(elpd_i, dims=(dim,), name=level)
    k_da = xr.DataArray(k, dims=(dim,), name=level)
    p_da = xr.DataArray(p_loo_i, dims=(dim,), name=level)
    lw_da = xr.DataArray(lw, dims=(dim, "chain", "draw"), name=level, coords=ll_da.coords)
    n_points = np.prod([ll_da[d].size for d in ll_da.dims if d not in ("chain", "draw")])
    elpd, se, p_loo, _ = elpd_da.azstats.loo_summary(p_da)
    good_k = min(1 - 1 / np.log10(S), 0.7) if S > 1 else 0.7
    if np.equal(elpd, elpd_i).all():  # as arviz-stats says it
        warnings.warn(
            "The point-wise LOO is the same with the sum LOO, please double check "
            "the Observed RV in your model to make sure it returns element-wise logp.")
    return ELPDDataLOO(elpd=elpd, se=se, p=p_loo, n_samples=S, n_data_points=n_points,
                       scale="log", warning=bool(np.any(k > good_k)), good_k=good_k,
                       elpd_i=elpd_da, pareto_k=k_da, approx_posterior=False,
                       log_weights=lw_da)
