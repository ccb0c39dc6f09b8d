"""Gaussian random slopes, marginalised per unit with the Woodbury identity.

Model: ``y_i = X_i b + Z_i g_i + e_i`` for unit ``i`` with ``T_i`` rows, ``Z_i`` the
``T_i x q`` columns with unit-specific coefficients (a column of ones for the intercept,
then the centred time-varying covariates with random slopes), ``g_i ~ N(0, Sigma)``,
``Sigma = L L'`` (``L`` = diag(SDs) times the Cholesky factor of the LKJ correlation) and
``e_i ~ N(0, sigma^2 I)``. Integrating ``g_i`` out, ``y_i ~ N(X_i b, V_i)`` with
``V_i = Z_i Sigma Z_i' + sigma^2 I``. With ``M_i = I_q + L' Z_i'Z_i L / sigma^2 = C_i C_i'``
(Cholesky), the Woodbury identity and the matrix determinant lemma give (Harville 1977;
Henderson and Searle 1981)

    log |V_i| = T_i log sigma^2 + 2 sum_j log C_i,jj
    r_i' V_i^-1 r_i = r_i'r_i / sigma^2 - |C_i^-1 L' Z_i' r_i|^2 / sigma^4

for the residual ``r_i = y_i - X_i b``. Only ``Z_i'Z_i`` (q x q), ``Z_i'X_i`` (q x k),
``Z_i'y_i`` (q) per unit and the global ``X'X``, ``X'y``, ``y'y`` enter, so a gradient
costs ``O(N (q^2 k + q^3))``: linear in units, independent of the number of occasions.
Written with ``M = I + L'Z'ZL/sigma^2`` rather than ``Sigma^-1`` it stays finite when a
slope SD goes to zero. The Cholesky factor of the small ``q x q`` matrices is unrolled on
arrays of units, so the same code runs in numpy (post-processing) and in pytensor (the
PyMC graph).

The occasion-level (leave-one-occasion-out) density follows Bürkner, Gabry and Vehtari
(2021): with ``V^-1`` of the unit, ``y_it | y_i,-t ~ N(y_it - [V^-1 r]_t / [V^-1]_tt,
1 / [V^-1]_tt)``.

References
----------
.. [1] Harville, D. A. (1977). Maximum likelihood approaches to variance component
   estimation and to related problems. JASA 72, 320-338. doi:10.1080/01621459.1977.10480998
.. [2] Henderson, H. V. and Searle, S. R. (1981). On deriving the inverse of a sum of
   matrices. SIAM Review 23, 53-60. doi:10.1137/1023004
.. [3] Bürkner, P.-C., Gabry, J. and Vehtari, A. (2021). Efficient leave-one-out
   cross-validation for Bayesian non-factorized normal and Student-t models.
   Computational Statistics 36, 1243-1261. doi:10.1007/s00180-020-01045-4
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core.gaussian import LOG_2PI

__all__ = [
    "SlopeStats",
    "slope_stats",
    "woodbury_pieces",
    "slope_marginal_loglik",
    "unit_loglik_slopes",
    "occasion_loglik_slopes",
    "unit_effect_draws_slopes",
]


@dataclass
class SlopeStats:
    """Per-unit cross-products for the Woodbury marginal (see module docstring)."""

    n: int
    T: np.ndarray    # (N,)
    ZZ: np.ndarray   # (N, q, q)
    ZX: np.ndarray   # (N, q, k)
    Zy: np.ndarray   # (N, q)
    XX: np.ndarray   # (k, k)
    Xy: np.ndarray   # (k,)
    yy: float

    @property
    def q(self) -> int:
        return int(self.ZZ.shape[-1])


def _starts(codes):
    T = np.bincount(codes)
    return T, np.concatenate([[0], np.cumsum(T)[:-1]]).astype(np.int64)


def slope_stats(X, Z, y, unit_codes) -> SlopeStats:
    """One pass over sorted rows: the per-unit and global cross-products."""
    X, Z, y = np.asarray(X, float), np.asarray(Z, float), np.asarray(y, float)
    codes = np.asarray(unit_codes)
    if np.any(np.diff(codes) < 0):
        raise ValueError("rows must be sorted by unit")
    T, starts = _starts(codes)
    ZZ = np.add.reduceat(Z[:, :, None] * Z[:, None, :], starts, axis=0)
    ZX = np.add.reduceat(Z[:, :, None] * X[:, None, :], starts, axis=0)
    Zy = np.add.reduceat(Z * y[:, None], starts, axis=0)
    return SlopeStats(n=len(y), T=T.astype(float), ZZ=ZZ, ZX=ZX, Zy=Zy, XX=X.T @ X,
                      Xy=X.T @ y, yy=float(y @ y))


def _mT(A, xp):
    return xp.swapaxes(A, -1, -2)


def woodbury_pieces(ZZ, Zr, s2, L, xp=np, q=None):
    """``(logdet_i, quad_i)`` with ``logdet_i = 2 sum log diag C_i`` and
    ``quad_i = |C_i^-1 L' Z_i'r_i|^2``, where ``C_i C_i' = I + L' Z_i'Z_i L / s2``.

    Parameters
    ----------
    ZZ : array (N, q, q)
    Zr : array (..., N, q)
        ``Z_i' r_i`` per unit (leading draw axes in numpy).
    s2 : array broadcastable to (..., N)
        ``sigma^2``.
    L : array (..., q, q)
        Lower Cholesky factor of ``Sigma`` (entries above the diagonal are not read).
    xp : module
        ``numpy`` or ``pytensor.tensor``.
    q : int, optional
        Number of unit effects (needed when ``ZZ`` is a tensor of unknown static shape).
    """
    q = int(q) if q is not None else int(np.shape(ZZ)[-1])
    # entries of M = I + L' ZZ L / s2 and v = L' Zr, written elementwise on arrays of units
    # (batched small matrix products are slow to differentiate in pytensor)
    l_ = [[L[..., c, a][..., None] for a in range(q)] for c in range(q)]  # l_[c][a] = L_ca
    zz = [[ZZ[..., c, d] for d in range(q)] for c in range(q)]
    M = [[None] * q for _ in range(q)]
    for a in range(q):
        for b in range(a + 1):
            acc = 0.0
            for c in range(a, q):           # L is lower triangular: L_ca = 0 for c < a
                for d in range(b, q):
                    acc = acc + l_[c][a] * l_[d][b] * zz[c][d]
            M[a][b] = acc / s2
    v = [sum(l_[c][a] * Zr[..., c] for c in range(a, q)) for a in range(q)]
    C = [[None] * q for _ in range(q)]
    logdet, w = 0.0, [None] * q
    for j in range(q):
        d = M[j][j] + 1.0
        for m in range(j):
            d = d - C[j][m] ** 2
        C[j][j] = xp.sqrt(d)
        logdet = logdet + xp.log(d)
        for i in range(j + 1, q):
            e = M[i][j]
            for m in range(j):
                e = e - C[i][m] * C[j][m]
            C[i][j] = e / C[j][j]
    quad = 0.0
    for i in range(q):
        e = v[i]
        for m in range(i):
            e = e - C[i][m] * w[m]
        w[i] = e / C[i][i]
        quad = quad + w[i] ** 2
    return logdet, quad


def slope_marginal_loglik(stats, b, sigma, L, xp=np):
    """Total Woodbury marginal log-likelihood (one number; the sampler's likelihood).

    ``stats`` holds arrays (or pytensor constants / shared variables) with the fields of
    :class:`SlopeStats`; ``b`` is ``(k,)``, ``sigma`` a scalar, ``L`` ``(q, q)``.
    """
    s2 = sigma ** 2
    Zr = stats.Zy - (stats.ZX * b).sum(axis=-1)
    rr = stats.yy - 2.0 * (b * stats.Xy).sum() + (b * xp.dot(stats.XX, b)).sum()
    logdet, quad = woodbury_pieces(stats.ZZ, Zr, s2, L, xp=xp, q=stats.q)
    return -0.5 * (stats.n * (LOG_2PI + xp.log(s2)) + logdet.sum() + rr / s2
                   - quad.sum() / s2 ** 2)


def _chunks(S, per_draw, budget=2 ** 23):
    step = max(1, int(budget // max(per_draw, 1)))
    for a in range(0, S, step):
        yield slice(a, min(a + step, S))


def unit_loglik_slopes(X, Z, y, unit_codes, b, sigma, L):
    """Per-unit marginal log density ``log N(y_i; X_i b, Z_i Sigma Z_i' + sigma^2 I)``.

    Parameters
    ----------
    X : array (n, k); Z : array (n, q); y : array (n,); unit_codes : sorted ints
    b : array (S, k); sigma : array (S,); L : array (S, q, q)

    Returns
    -------
    array (S, N)
    """
    X, Z, y = np.asarray(X, float), np.asarray(Z, float), np.asarray(y, float)
    b, sigma, L = np.atleast_2d(b), np.atleast_1d(sigma), np.asarray(L, float).reshape(-1, Z.shape[1], Z.shape[1])
    T, starts = _starts(np.asarray(unit_codes))
    st = slope_stats(X, Z, y, unit_codes)
    out = np.empty((b.shape[0], len(T)))
    for sl in _chunks(b.shape[0], len(y) + len(T) * st.q ** 2):
        r = y[None, :] - b[sl] @ X.T
        rr = np.add.reduceat(r ** 2, starts, axis=1)
        Zr = np.add.reduceat(r[:, :, None] * Z[None, :, :], starts, axis=1)
        s2 = sigma[sl, None] ** 2
        logdet, quad = woodbury_pieces(st.ZZ, Zr, s2, L[sl])
        out[sl] = -0.5 * (T * (LOG_2PI + np.log(s2)) + logdet + rr / s2 - quad / s2 ** 2)
    return out


def _M_matrix(ZZ, s2, L):
    """``M_i = I + L' Z_i'Z_i L / s2`` for every draw and unit, ``(S, N, q, q)``."""
    Lb = L[:, None]
    return np.eye(ZZ.shape[-1]) + _mT(Lb, np) @ ZZ[None] @ Lb / s2[..., None, None]


def _draw_blocks(X, Z, y, unit_codes, b, sigma, L, per_draw):
    """Shared set-up of the row-based functions: yields ``(slice, r, Zr, s2, L_slice)``
    per chunk of draws, and the unit structure."""
    X, Z, y = np.asarray(X, float), np.asarray(Z, float), np.asarray(y, float)
    codes = np.asarray(unit_codes)
    b, sigma = np.atleast_2d(b), np.atleast_1d(sigma)
    q = Z.shape[1]
    L = np.asarray(L, float).reshape(-1, q, q)
    T, starts = _starts(codes)
    ZZ = np.add.reduceat(Z[:, :, None] * Z[:, None, :], starts, axis=0)

    def blocks():
        for sl in _chunks(b.shape[0], per_draw(len(y), len(T), q)):
            r = y[None, :] - b[sl] @ X.T
            Zr = np.add.reduceat(r[:, :, None] * Z[None, :, :], starts, axis=1)
            yield sl, r, Zr, sigma[sl, None] ** 2, L[sl]
    return Z, codes, ZZ, b.shape[0], len(T), blocks()


def occasion_loglik_slopes(X, Z, y, unit_codes, b, sigma, L):
    """Log density of each row given the other rows of its unit (Bürkner et al. 2021).

    ``V^-1 = (I - Z P Z' / s2) / s2`` with ``P = L M^-1 L'``; the held-out row has mean
    ``y_t - [V^-1 r]_t / [V^-1]_tt`` and variance ``1 / [V^-1]_tt``.

    Returns
    -------
    array (S, n)
    """
    Z, codes, ZZ, S, N, blocks = _draw_blocks(X, Z, y, unit_codes, b, sigma, L,
                                              lambda n, N, q: n * (q * q + 2))
    out = np.empty((S, len(codes)))
    for sl, r, Zr, s2, Ls in blocks:
        Lb = Ls[:, None]
        M = _M_matrix(ZZ, s2, Ls)
        P = Lb @ np.linalg.solve(M, np.broadcast_to(_mT(Lb, np), M.shape))  # L M^-1 L'
        PZr = (P @ Zr[..., None])[..., 0]
        zPz = np.einsum("ni,snij,nj->sn", Z, P[:, codes], Z)
        zPZr = np.einsum("ni,sni->sn", Z, PZr[:, codes])
        d = (1.0 - zPz / s2) / s2
        vr = (r - zPZr / s2) / s2
        out[sl] = -0.5 * LOG_2PI + 0.5 * np.log(d) - 0.5 * vr ** 2 / d
    return out


def unit_effect_draws_slopes(X, Z, y, unit_codes, b, sigma, L, rng):
    """One draw of every unit's ``g_i`` from its conditional given ``(b, sigma, Sigma)``.

    ``g_i = L h_i``, ``h_i ~ N(M_i^-1 L'Z_i'r_i / sigma^2, M_i^-1)`` (the normal-normal
    update written with ``M_i``). Returns an array ``(S, N, q)``; the conditional means
    are returned too, ``(S, N, q)``.
    """
    Z, codes, ZZ, S, N, blocks = _draw_blocks(X, Z, y, unit_codes, b, sigma, L,
                                              lambda n, N, q: n + N * q * q)
    q = Z.shape[1]
    draws, means = np.empty((S, N, q)), np.empty((S, N, q))
    for sl, _, Zr, s2, Ls in blocks:
        Lb = Ls[:, None]
        M = _M_matrix(ZZ, s2, Ls)
        C = np.linalg.cholesky(M)
        v = (_mT(Lb, np) @ Zr[..., None])[..., 0] / s2[..., None]
        h_mean = np.linalg.solve(M, v[..., None])[..., 0]
        eps = rng.standard_normal(h_mean.shape)
        h = h_mean + np.linalg.solve(_mT(C, np), eps[..., None])[..., 0]
        draws[sl] = (Lb @ h[..., None])[..., 0]
        means[sl] = (Lb @ h_mean[..., None])[..., 0]
    return draws, means
