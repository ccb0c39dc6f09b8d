"""Reference fits on the out-of-core path: the closed-form cores on sufficient statistics,
with cluster-robust covariances (CR1, CR2) from per-unit cross-products.

Point estimates, variance components and classical covariances need only
:class:`~bayespanel.suffstats.SuffStats`, so :func:`fit` calls
:func:`bayespanel.reference.fit_stats` unchanged. The cluster-robust (CR1) covariance
needs one score per unit, ``s_g = sum_t x*_gt e_gt`` over the rows of the regression that
was solved (``x*`` demeaned, quasi-demeaned or as they are). Every such row is
``z* = z_gt - c_g zbar_g`` for a constant ``c_g`` (1 for fixed effects, ``theta_g`` for
the random-intercept GLS, 0 for pooled), so

    sum_t z*_gt z*_gt' = W_g + T_g (1 - c_g)^2 zbar_g zbar_g'

with ``W_g`` the unit's within cross-products of ``[X, y]``, and ``s_g`` is that matrix
times ``v = [-b, 1]`` restricted to the estimated columns; the ``k x k`` block of that
matrix is ``X*_g'X*_g``, all that CR2's leverage correction needs. ``W_g`` is collected
in the same pass as the totals (``DaskPanel.design(..., cluster=True)``); the covariances
themselves are :func:`bayespanel.reference.covariance.cr1` (Cameron and Miller 2015) and
:func:`~bayespanel.reference.covariance.cr2_from_blocks` (Bell and McCaffrey 2002).

References
----------
.. [1] Cameron, A. C. and Miller, D. L. (2015). A practitioner's guide to cluster-robust
   inference. Journal of Human Resources 50(2), 317-372.
   https://doi.org/10.3368/jhr.50.2.317
.. [2] Bell, R. M. and McCaffrey, D. F. (2002). Bias reduction in standard errors for
   linear regression with multi-stage samples. Survey Methodology 28(2), 169-181.
"""

from __future__ import annotations

import numpy as np

__all__ = ["fit", "unit_blocks"]

_KIND = {"pooled": "random", "within": "random", "between": "random", "random": "random",
         "mundlak": "mundlak", "within_between": "within_between"}


def unit_blocks(res, estimator, ss, unit_cp):
    """Per-unit blocks of the regression behind ``res``: ``X*_g'X*_g`` and ``X*_g'e_g``.

    Parameters
    ----------
    res : ReferenceResult
        From :func:`bayespanel.reference.fit_stats` on ``ss``.
    ss : SuffStats
        Of the estimator's columns (``[M, y]``).
    unit_cp : (N, p, p) array or None
        Per-unit within cross-products of ``[M, y]``, in the unit order of ``ss`` (not
        needed for the between estimator).

    Returns
    -------
    (S, s, n_rows, keep)
        ``S`` (G x k x k), ``s`` (G x k) over the units that are clusters (``keep``;
        fixed effects leave out single-row units, as in memory) and the number of rows
        of the regression that was solved.
    """
    cols = np.asarray(res.extra["cols"], dtype=np.int64)
    v = np.zeros(ss.p)
    v[cols] = -res._coef
    v[-1] = 1.0
    m = ss.unit_mean[:, cols]
    T = ss.unit_count.astype(float)
    rbar = ss.unit_mean @ v                              # unit-mean residual
    if estimator == "between":
        keep = np.ones(ss.n_units, bool)
        return m[:, :, None] * m[:, None, :], m * rbar[:, None], ss.n_units, keep
    ix = np.ix_(np.arange(len(T)), cols, cols)
    Wxx = unit_cp[ix]
    Wv = unit_cp[:, cols, :] @ v
    if estimator == "within":
        keep = ss.unit_count > 1
        return Wxx[keep], Wv[keep], int(ss.unit_count[keep].sum()), keep
    if estimator == "pooled":
        c = np.zeros(ss.n_units)
    else:
        c = res.theta_by_length[np.searchsorted(ss.lengths, ss.unit_count)]
    w = T * (1.0 - c) ** 2
    S = Wxx + w[:, None, None] * m[:, :, None] * m[:, None, :]
    return S, Wv + m * (w * rbar)[:, None], ss.n, np.ones(ss.n_units, bool)


def fit(design, estimator: str, *, method=None, cov: str = "classical"):
    """A reference fit on a :class:`~bayespanel.engines.dask.DaskDesign`.

    Same estimators, options and results as :func:`bayespanel.reference.fit_design`.
    ``cov="cluster"`` (CR1) and ``cov="cr2"`` use the per-unit blocks of
    :func:`unit_blocks` (:func:`bayespanel.reference.covariance.cr1` and
    :func:`~bayespanel.reference.covariance.cr2_from_blocks`).
    """
    from ..reference import fit_stats
    from ..reference.covariance import cr2_from_blocks
    from ..reference.estimators import _check_options, cr1_covariance, set_covariance

    method = _check_options(estimator, method, cov)
    kind = _KIND[estimator]
    ss = design.suffstats(kind)
    labels = list(ss.names[:-1])
    res = fit_stats(estimator, ss, labels, method=method, outcome=design.outcome)
    res.extra["unit_labels"] = np.asarray(ss.unit_keys)
    res.design = design
    if cov == "classical":
        return res
    ucp = None if estimator == "between" else design.unit_cross_products(kind)
    S, s, n_rows, keep = unit_blocks(res, estimator, ss, ucp)
    G = int(keep.sum())
    if cov == "cluster":
        V, df = cr1_covariance(res, estimator, ss, s, n_rows)
    else:
        V, df = cr2_from_blocks(S, s, res.extra["bread"])
    set_covariance(res, cov, V, df, G)
    return res
