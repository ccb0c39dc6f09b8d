"""Generalised least squares with known AR(1) error parameters, on the AR(1) statistics.

With ``Sigma_i = sigma^2 (R_i + g 11')`` (``g = tau^2 / sigma^2``; :mod:`bayespanel.core.ar1`)
the exponent of the marginal density is ``-(v' A v) / (2 sigma^2)`` in ``v = [-b, 1]``,
where ``A`` is a fixed ``p x p`` matrix of the statistics once ``rho`` and ``g`` are known:

    A = first + sum_d (end_d - phi_d (cross_d + cross_d') + phi_d^2 start_d) / (1 - phi_d^2)
              - sum_groups w_G B_G,   B_G = sum_ab l_a l_b cp_G[a, b]

(``w_G = g / (1 + g c_G)`` for random unit intercepts, ``1 / c_G`` for fixed ones, none
for the pooled model; ``l`` and ``c`` as in :func:`bayespanel.core.ar1.loglik`). Writing
``A`` in blocks of the covariates ``x`` and the outcome ``y``, ``X' Sigma^-1 X = A_xx /
sigma^2`` and ``X' Sigma^-1 y = A_xy / sigma^2``, so the GLS estimator is
``A_xx^-1 A_xy`` with covariance ``sigma^2 A_xx^-1`` (Aitken 1935): exactly normal when
the parameters are the true ones, whatever the design.

References
----------
.. [1] Aitken, A. C. (1935). On least squares and linear combination of observations.
   Proceedings of the Royal Society of Edinburgh 55, 42-48. doi:10.1017/S0370164600014346
"""

from __future__ import annotations

import numpy as np

from .ar1 import group_terms

__all__ = ["quadratic_matrix", "gls"]


def quadratic_matrix(arrays: dict, rho: float, sigma: float, tau) -> np.ndarray:
    """The matrix ``A`` with ``v' A v`` the quadratic form of the AR(1) marginal density.

    Parameters
    ----------
    arrays : dict
        From :meth:`bayespanel.core.ar1.AR1Stats.arrays`.
    rho, sigma : float
        Correlation one time unit apart, error SD.
    tau : float or None
        SD of the unit intercepts: ``0`` pooled, ``None`` fixed (flat prior).

    Returns
    -------
    array (p, p)
        ``loglik(v) - loglik(0) = -v' A v / (2 sigma^2)`` for
        :func:`bayespanel.core.ar1.loglik` at the same parameters.
    """
    gaps = np.asarray(arrays["gaps"], dtype=float)
    phi = float(rho) ** gaps
    A = np.array(arrays["first"], dtype=float)
    if len(gaps):
        cross = arrays["link_cross"]
        links = (arrays["link_end"] - phi[:, None, None] * (cross + cross.transpose(0, 2, 1))
                 + (phi ** 2)[:, None, None] * arrays["link_start"])
        A = A + (links / (1.0 - phi ** 2)[:, None, None]).sum(axis=0)
    if tau is not None and float(tau) == 0.0:
        return A
    p = A.shape[0]
    g = None if tau is None else float(tau) ** 2 / float(sigma) ** 2
    for grp in arrays["groups"]:
        c, lvec = group_terms(grp, phi)
        G, J = lvec.shape
        B = np.einsum("ga,gb,gapbq->gpq", lvec, lvec, grp["cp"].reshape(G, J, p, J, p))
        w = 1.0 / c if g is None else g / (1.0 + g * c)
        A = A - np.einsum("g,gpq->pq", w, B)
    return A


def gls(arrays: dict, rho: float, sigma: float, tau):
    """GLS coefficients and their covariance at known ``rho``, ``sigma`` and ``tau``.

    Parameters
    ----------
    arrays : dict
        From :meth:`bayespanel.core.ar1.AR1Stats.arrays` on the data's scale (no
        ``center`` or ``scale``), last column the outcome.
    rho, sigma, tau : float (``tau`` may be ``None`` or ``0``)
        As in :func:`quadratic_matrix`.

    Returns
    -------
    (b, V) : array (k,), array (k, k)
        ``V = sigma^2 (X' R_*^-1 X)^-1``, the exact covariance of ``b`` at these parameters.
    """
    A = quadratic_matrix(arrays, rho, sigma, tau)
    Axx, Axy = A[:-1, :-1], A[:-1, -1]
    bread = np.linalg.inv(Axx)
    return bread @ Axy, float(sigma) ** 2 * bread
