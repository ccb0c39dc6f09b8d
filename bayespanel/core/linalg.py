"""Small linear-algebra helpers (arrays only, numpy only): the reference estimators, the
design's check for collinear columns and the comparison's rank count share them."""

from __future__ import annotations

import numpy as np

__all__ = ["independent_columns", "solve_psd", "psd_power", "rank_of", "group_cross_products",
           "group_scores"]

#: relative tolerance below which a column counts as a combination of earlier ones
COLLINEAR_TOL = 1e-9


def independent_columns(cp: np.ndarray, scale: np.ndarray | None = None,
                        tol: float = COLLINEAR_TOL, priority=None) -> np.ndarray:
    """Indices of a maximal set of linearly independent columns, kept in order.

    Works on a cross-product matrix ``A = X'X`` only (so it runs on sufficient
    statistics): columns are examined in order (those listed in ``priority`` first) and
    column ``j`` is kept when its squared residual after projection on the
    columns kept before it exceeds ``tol`` times its size. ``scale`` gives that size per
    column (default ``diag(A)``); pass the uncentred sums of squares of the original
    columns when ``A`` holds demeaned data, so that rounding left by demeaning a
    constant column does not count as variation.

    The residuals are the diagonal of the Schur complement, updated by one elimination
    step per kept column (symmetric Gaussian elimination, which is Cholesky's), so the
    cost is one ``k x k`` update per column.
    """
    A = np.asarray(cp, dtype=float)
    k = A.shape[0]
    size = np.diag(A).copy() if scale is None else np.asarray(scale, dtype=float).copy()
    first = [int(j) for j in (priority or ())]
    seen = set(first)
    order = np.asarray(first + [j for j in range(k) if j not in seen], dtype=np.int64)
    S = A[order][:, order]
    lim = tol * size[order]
    if np.all(size[order] > 0) and np.all(np.diag(S) > lim):
        try:  # the usual case, every column kept: one factorisation says so
            if np.all(np.diag(np.linalg.cholesky(S)) ** 2 > lim):
                return np.arange(k, dtype=np.int64)
        except np.linalg.LinAlgError:
            pass
    S = S.copy()
    keep: list[int] = []
    size, diag = size.tolist(), np.diag(A).tolist()
    for t, j in enumerate(order.tolist()):
        lim = tol * size[j]
        if size[j] <= 0 or diag[j] <= lim or not S[t, t] > lim:
            continue
        keep.append(j)
        if t + 1 < k:
            S[t + 1:, t + 1:] -= (S[t + 1:, t, None] / S[t, t]) * S[t, None, t + 1:]
    return np.asarray(sorted(keep), dtype=np.int64)


def rank_of(cp: np.ndarray, scale: np.ndarray | None = None, tol: float = COLLINEAR_TOL) -> int:
    """Rank of a cross-product matrix, judged as in :func:`independent_columns`."""
    return int(len(independent_columns(cp, scale, tol)))


def solve_psd(A: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve ``A x = b`` for symmetric positive-definite ``A`` (Cholesky, lstsq fallback)."""
    try:
        c = np.linalg.cholesky(A)
        return np.linalg.solve(c.T, np.linalg.solve(c, b))
    except np.linalg.LinAlgError:
        return np.linalg.lstsq(A, b, rcond=None)[0]


def inv_psd(A: np.ndarray) -> np.ndarray:
    """Inverse of a symmetric positive-definite matrix, symmetrised."""
    out = solve_psd(A, np.eye(A.shape[0]))
    return (out + out.T) / 2


def psd_power(A: np.ndarray, power: float, tol: float = 1e-12) -> np.ndarray:
    """``A ** power`` for symmetric positive semi-definite ``A`` (batched over leading axes).

    Eigenvalues at or below ``tol`` times the largest are treated as zero, so a negative
    power gives the Moore-Penrose generalised power (used by CR2 when a cluster has
    leverage one).
    """
    w, v = np.linalg.eigh(A)
    top = np.max(np.abs(w), axis=-1, keepdims=True)
    ok = w > tol * np.maximum(top, np.finfo(float).tiny)
    wp = np.where(ok, np.where(ok, w, 1.0) ** power, 0.0)
    return (v * wp[..., None, :]) @ np.swapaxes(v, -1, -2)


def group_cross_products(X: np.ndarray, groups: np.ndarray, G: int) -> np.ndarray:
    """Per-group cross-products ``X_g'X_g`` (G x k x k) of the rows of ``X`` by the group
    codes ``groups`` (0 .. G-1), one weighted count per column pair."""
    k = X.shape[1]
    out = np.empty((G, k, k))
    for a in range(k):
        for b in range(a, k):
            v = np.bincount(groups, weights=X[:, a] * X[:, b], minlength=G)
            out[:, a, b] = v
            out[:, b, a] = v
    return out


def group_scores(X: np.ndarray, e: np.ndarray, groups: np.ndarray, G: int) -> np.ndarray:
    """Per-group score sums ``s_g = X_g'e_g`` (G x k): the rows of ``X`` times ``e``,
    summed by the group codes ``groups`` (0 .. G-1), one weighted count per column.

    The one sum behind every cluster-robust covariance of the package (the reference
    fits' CR1 and CR2, the GLM reference fits, the serial-correlation test, and the
    numpy version of :func:`bayespanel.core.suffstats.unit_scores`).
    """
    X = np.asarray(X, dtype=float)
    e = np.asarray(e, dtype=float)
    groups = np.asarray(groups, dtype=np.int64)
    out = np.empty((G, X.shape[1]))
    for j in range(X.shape[1]):
        out[:, j] = np.bincount(groups, weights=X[:, j] * e, minlength=G)
    return out
