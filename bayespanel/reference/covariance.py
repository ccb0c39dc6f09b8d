"""Covariance estimators for the reference fits: classical, CR1 and CR2 (array level).

Each estimator is a small function of the rows of the regression that was solved
(``X`` demeaned, unit means or quasi-demeaned as the estimator requires), its residuals,
the cluster of each row and the bread ``(X'X)^{-1}``. They run only when asked for.

* classical: ``s^2 (X'X)^{-1}``; reference distribution t with the residual degrees of
  freedom.
* CR1: the cluster-robust sandwich with the usual small-sample factor
  ``G / (G - 1) * (n - 1) / (n - k)``; reference distribution t with ``G - 1`` degrees of
  freedom (Cameron and Miller 2015).
* CR2: the bias-reduced linearisation of Bell and McCaffrey (2002): each cluster's
  residuals are multiplied by ``(I - H_gg)^{-1/2}`` (a generalised inverse square root
  when a cluster has leverage one); reference distribution t with the Satterthwaite
  degrees of freedom of Pustejovsky and Tipton (2018) under the working model of
  independent homoskedastic errors.

The CR2 pieces are computed from per-cluster ``k x k`` cross-products only: with
``M = (X'X)^{-1}``, ``Q_g = M^{1/2} X_g'X_g M^{1/2}`` and ``s_g = X_g'e_g``,
``(I - H_gg)^{-1/2} X_g = X_g M^{1/2} (I - Q_g)^{-1/2} M^{-1/2}``, so the corrected score
is ``M^{1/2} (I - Q_g)^{-1/2} M^{1/2} s_g``; cost ``O(n k^2 + G k^3)`` instead of
``O(sum n_g^3)``.

References
----------
.. [1] Bell, R. M. and McCaffrey, D. F. (2002). Bias reduction in standard errors for
   linear regression with multi-stage samples. Survey Methodology 28(2), 169-181.
.. [2] Pustejovsky, J. E. and Tipton, E. (2018). Small-sample methods for cluster-robust
   variance estimation and hypothesis testing in fixed effects models. Journal of
   Business & Economic Statistics 36(4), 672-683.
   https://doi.org/10.1080/07350015.2016.1247004
.. [3] Cameron, A. C. and Miller, D. L. (2015). A practitioner's guide to cluster-robust
   inference. Journal of Human Resources 50(2), 317-372.
   https://doi.org/10.3368/jhr.50.2.317
"""

from __future__ import annotations

import numpy as np

from ..core.linalg import group_cross_products, group_scores, psd_power

__all__ = ["COV_TYPES", "classical", "cr1", "cr2", "cr2_from_blocks"]

COV_TYPES = ("classical", "cluster", "cr2")


def _sym(V):
    return (V + V.T) / 2


def classical(bread: np.ndarray, sigma2: float) -> np.ndarray:
    """``sigma2 * (X'X)^{-1}``."""
    return _sym(sigma2 * bread)


def cr1(bread, scores, n: int, k: int) -> np.ndarray:
    """CR1: ``c (X'X)^{-1} (sum_g s_g s_g') (X'X)^{-1}``, ``c = G/(G-1) (n-1)/(n-k)``.

    ``G`` counts the clusters with rows (the rows of ``scores``); ``k`` is the number of
    coefficients the small-sample factor charges for.
    """
    G = scores.shape[0]
    if G < 2:
        raise ValueError("cluster-robust covariance needs at least two clusters")
    factor = G / (G - 1) * (n - 1) / (n - k)
    B = scores @ bread
    return _sym(factor * (B.T @ B))


def cr2(X, e, clusters, bread, G: int | None = None, df: bool = True):
    """CR2 covariance (Bell and McCaffrey 2002) and Satterthwaite degrees of freedom.

    Parameters
    ----------
    X : (n, k) array
        Rows of the regression that was solved. For fixed effects pass the
        unit-demeaned rows: with unit clusters this gives the CR2 of the full
        dummy-variable regression (Pustejovsky and Tipton 2018, section 3).
    e : (n,) array
        Residuals of that regression.
    clusters : (n,) int array
        Cluster code of each row, ``0 .. G-1``.
    bread : (k, k) array
        ``(X'X)^{-1}``.
    df : bool
        Also return the Satterthwaite degrees of freedom for each coefficient.

    Returns
    -------
    V : (k, k) array
    nu : (k,) array or None
        ``nu_j = (tr Omega)^2 / tr(Omega^2)``, ``Omega_gh = u_g'u_h`` and
        ``u_g = (I - H)_g' A_g X_g M e_j`` (Pustejovsky and Tipton 2018, eq. 11, with the
        working model ``Phi = I``).
    """
    X = np.asarray(X, dtype=float)
    clusters = np.asarray(clusters, dtype=np.int64)
    G = int(clusters.max()) + 1 if G is None else int(G)
    S = group_cross_products(X, clusters, G)
    s = group_scores(X, e, clusters, G)
    return cr2_from_blocks(S, s, bread, df=df)


def cr2_from_blocks(S, s, bread, df: bool = True):
    """CR2 and Satterthwaite degrees of freedom from per-cluster blocks only.

    Parameters
    ----------
    S : (G, k, k) array
        ``X_g'X_g`` for each cluster (of the rows of the regression that was solved).
    s : (G, k) array
        ``X_g'e_g`` for each cluster.
    bread : (k, k) array
        ``(X'X)^{-1}``.

    Nothing else of the rows is needed, so an out-of-core pass that keeps per-unit
    cross-products can compute CR2 as well as CR1. See :func:`cr2`.
    """
    S = np.asarray(S, dtype=float)
    s = np.asarray(s, dtype=float)
    M = _sym(np.asarray(bread, dtype=float))
    Mh = psd_power(M, 0.5)
    Q = Mh @ S @ Mh                                      # G x k x k, eigenvalues in [0, 1]
    lam, vec = np.linalg.eigh(_sym_batch(Q))
    lam = np.clip(lam, 0.0, 1.0)
    one_minus = 1.0 - lam
    ok = one_minus > 1e-10
    safe = np.where(ok, one_minus, 1.0)
    f_half = np.where(ok, safe ** -0.5, 0.0)              # (1 - lam)^(-1/2), generalised
    R = (vec * f_half[:, None, :]) @ np.swapaxes(vec, 1, 2)
    w = (Mh @ (R @ (Mh @ s[:, :, None])))[:, :, 0]        # G x k corrected scores of beta
    V = _sym(w.T @ w)
    if not df:
        return V, None
    # Satterthwaite degrees of freedom for each coefficient c = e_j
    P = (vec * (lam * f_half)[:, None, :]) @ np.swapaxes(vec, 1, 2)        # Q (I-Q)^(-1/2)
    Binv = (vec * np.where(ok, lam / safe, 0.0)[:, None, :]) @ np.swapaxes(vec, 1, 2)
    phi = P @ Mh                                           # G x k x k: column j is phi_g(e_j)
    b = np.einsum("ij,gik,kj->gj", Mh, Binv, Mh)           # G x k: b_g(e_j)
    phi2 = np.einsum("gij,gij->gj", phi, phi)               # ||phi_g(e_j)||^2
    tr = b.sum(axis=0) - phi2.sum(axis=0)
    # ||Phi_j Phi_j'||_F^2 with Phi_j the k x G matrix of phi_g(e_j)
    C = np.einsum("gaj,gbj->jab", phi, phi)                 # k x k x k
    tr2 = (b ** 2).sum(axis=0) - 2 * (b * phi2).sum(axis=0) + np.einsum("jab,jab->j", C, C)
    with np.errstate(divide="ignore", invalid="ignore"):
        nu = np.where(tr2 > 0, tr ** 2 / tr2, np.nan)
    return V, nu


def _sym_batch(A):
    return (A + np.swapaxes(A, -1, -2)) / 2
