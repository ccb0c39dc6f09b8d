"""Reference fits on the out-of-core path: the closed-form cores on sufficient statistics,
with cluster-robust scores from per-unit cross-products.

Point estimates, variance components and classical covariances need only
:class:`~bayespanel.suffstats.SuffStats`, so :func:`fit` calls
:func:`bayespanel.reference.fit_stats` unchanged. The cluster-robust (CR1) covariance
needs one score per unit, ``s_g = sum_t x*_gt e_gt`` over the rows of the regression that
was solved (``x*`` demeaned, quasi-demeaned or as they are). Every such row is
``z* = z_gt - c_g zbar_g`` for a constant ``c_g`` (1 for fixed effects, ``theta_g`` for
the random-intercept GLS, 0 for pooled), so

    sum_t z*_gt z*_gt' = W_g + T_g (1 - c_g)^2 zbar_g zbar_g'

with ``W_g`` the unit's within cross-products of ``[X, y]``, and ``s_g`` is that matrix
times ``v = [-b, 1]`` restricted to the estimated columns. ``W_g`` is collected in the
same pass as the totals (``DaskPanel.design(..., cluster=True)``); the sandwich itself is
:func:`bayespanel.reference.covariance.cr1` (Cameron and Miller 2015).

References
----------
.. [1] Cameron, A. C. and Miller, D. L. (2015). A practitioner's guide to cluster-robust
   inference. Journal of Human Resources 50(2), 317-372.
   https://doi.org/10.3368/jhr.50.2.317
"""

from __future__ import annotations

import numpy as np

from ..errors import SpecificationError

__all__ = ["fit", "unit_scores"]

_KIND = {"pooled": "random", "within": "random", "between": "random", "random": "random",
         "mundlak": "mundlak", "within_between": "within_between"}


def unit_scores(res, estimator, ss, unit_cp):
    """Per-unit score sums of the regression behind ``res`` (G x k), rows used and G.

    Parameters
    ----------
    res : ReferenceResult
        From :func:`bayespanel.reference.fit_stats` on ``ss``.
    ss : SuffStats
        Of the estimator's columns (``[M, y]``).
    unit_cp : (N, p, p) array
        Per-unit within cross-products of ``[M, y]``, in the unit order of ``ss``.

    Returns
    -------
    (scores, n_rows, keep)
        ``keep`` marks the units that are clusters (fixed effects leave out single-row
        units, as in memory).
    """
    cols = np.asarray(res.extra["cols"], dtype=np.int64)
    p = ss.p
    v = np.zeros(p)
    v[cols] = -res._coef
    v[-1] = 1.0
    m = ss.unit_mean
    T = ss.unit_count.astype(float)
    rbar = m @ v                                         # unit-mean residual
    if estimator == "between":
        return m[:, cols] * rbar[:, None], ss.n_units, np.ones(ss.n_units, bool)
    Wv = unit_cp[:, cols, :] @ v                         # within part, G x k
    if estimator == "within":
        keep = ss.unit_count > 1
        return Wv[keep], int(ss.unit_count[keep].sum()), keep
    if estimator == "pooled":
        c = np.zeros(ss.n_units)
    else:
        pos = np.searchsorted(ss.lengths, ss.unit_count)
        c = res.theta_by_length[pos]
    w = T * (1.0 - c) ** 2
    return Wv + m[:, cols] * (w * rbar)[:, None], ss.n, np.ones(ss.n_units, bool)


def fit(design, estimator: str, *, method=None, cov: str = "classical"):
    """A reference fit on a :class:`~bayespanel.engines.dask.DaskDesign`.

    Same estimators, options and results as :func:`bayespanel.reference.fit_design`;
    ``cov="cluster"`` uses per-unit scores (:func:`unit_scores`). ``cov="cr2"`` is not
    available out of core: its leverage correction needs each unit's ``k x k`` block of
    the projection, which this path does not assemble; use the in-memory Panel.
    """
    from ..reference import core, fit_stats
    from ..reference.covariance import cr1
    from ..reference.estimators import _check_options

    method = _check_options(estimator, method, cov)
    if cov == "cr2":
        raise SpecificationError(
            "cov='cr2' needs the rows of each unit (its leverage block), which the Dask path "
            "does not keep; use cov='cluster' (CR1) here, or the in-memory Panel for CR2")
    kind = _KIND[estimator]
    ss = design.suffstats(kind)
    labels = list(ss.names[:-1])
    res = fit_stats(estimator, ss, labels, method=method, outcome=design.outcome)
    res.extra["unit_labels"] = np.asarray(ss.unit_keys)
    res.design = design
    if cov == "cluster":
        ucp = design.unit_cross_products(kind)
        scores, n_rows, keep = unit_scores(res, estimator, ss, ucp)
        k = len(res._coef)
        if estimator == "within" and core.intercept_column(ss) is not None:
            k += 1
        G = int(keep.sum())
        res._vcov = cr1(res.extra["bread"], scores, n_rows, k)
        res._df = np.full(len(res._coef), G - 1.0)
        res.cov_type = cov
        res.extra["n_clusters"] = G
    return res
