"""Exact leave-one-out of the closed-form reference fits, many held-out points at once
(private).

:func:`bayespanel.analysis.loo.reference_cv.exact_loo_values` refits the estimator once
per held-out point from downdated statistics (:mod:`~bayespanel.analysis.loo._downdate`)
and the estimator's closed-form core (:mod:`bayespanel.reference.core`). For the pooled,
within and Swamy-Arora random-intercept fits (plain, Mundlak and within-between columns)
every step of that refit is a fixed sequence of small matrix operations, so here it runs
with the held-out points on a leading axis: the same downdates (Chan, Golub and LeVeque
1979, run backwards), the same column choices (:func:`bayespanel.core.linalg.
independent_columns`, one column at a time for every point together), and the same
least-squares solves, done for all points that keep the same columns in one stacked
call of the same LAPACK routines. Panel lengths are a fixed list (those of the data and
one less), a length no unit has counting zero units, which adds exact zeros to every
sum over lengths. A point whose refit the estimator would refuse (no degrees of freedom
left, say) is left to the loop, which raises as before. ML and REML (a root search per
point) stay in the loop.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ...core.linalg import COLLINEAR_TOL
from ...core.mathcore import quasi_demeaning_share
from ._downdate import _ROUNDING

__all__ = ["BATCHED", "Stack", "rows_left_out", "units_left_out", "fit_batch"]

#: (estimator, method) pairs whose refits run batched
BATCHED = {("pooled", None), ("within", None), ("random", "swamy-arora"),
           ("mundlak", "swamy-arora"), ("within_between", "swamy-arora")}
#: held-out points per batch (bounds the stacked arrays: ``B x L x p x p`` floats)
BATCH = 512


@dataclass
class Stack:
    """Statistics of ``B`` reduced data sets (one per held-out point) on a leading axis;
    ``lengths`` (L,) is shared, ``count`` (B, L) may hold zeros."""

    n: np.ndarray
    n_units: np.ndarray
    mean: np.ndarray
    total: np.ndarray
    within: np.ndarray
    lengths: np.ndarray
    count: np.ndarray
    gmean: np.ndarray
    gcp: np.ndarray

    @property
    def p(self) -> int:
        return self.mean.shape[1]


def _outer(a, b=None):
    b = a if b is None else b
    return a[:, :, None] * b[:, None, :]


def _diag(A):
    return np.diagonal(A, axis1=-2, axis2=-1)


def _vanished(before, removed, after):
    """(B, p): columns whose cross-product ``after = before - removed`` is zero up to
    rounding (as ``_downdate._vanished``)."""
    return _diag(after) <= _ROUNDING * (np.abs(np.diag(before)) + np.abs(_diag(removed)))


def _all_lengths(ss):
    return np.union1d(ss.lengths, ss.lengths[ss.lengths > 1] - 1).astype(np.int64)


def _full_groups(ss, lengths, B):
    L, p = len(lengths), ss.p
    pos = np.searchsorted(lengths, ss.lengths)
    count = np.zeros((B, L), dtype=np.int64)
    gmean = np.zeros((B, L, p))
    gcp = np.zeros((B, L, p, p))
    count[:, pos] = ss.group_count
    gmean[:, pos] = ss.group_mean
    gcp[:, pos] = ss.group_cp
    return count, gmean, gcp


def _move(count, gmean, gcp, b, d, u, step):
    """Take the unit mean ``u[b]`` out of (``step=-1``) or put it into (``step=1``) group
    ``d[b]`` of each point ``b``: the pairwise update, as ``_downdate._remove_from_group``
    and ``_add_to_group`` (a group left empty, or filled from empty, exactly)."""
    c = count[b, d]
    c2 = c + step
    reg = (c > 0) & (c2 > 0)
    br, dr = b[reg], d[reg]
    cr, c2r = c[reg].astype(float), c2[reg].astype(float)
    dev = u[reg] - gmean[br, dr]
    gcp[br, dr] = gcp[br, dr] + step * ((cr / c2r)[:, None, None] * _outer(dev))
    gmean[br, dr] = gmean[br, dr] + step * (dev / c2r[:, None])
    count[b, d] = c2
    gone, born = c2 == 0, c == 0
    gmean[b[gone], d[gone]] = 0.0
    gcp[b[gone], d[gone]] = 0.0
    gmean[b[born], d[born]] = u[born]


def _assemble(n, n_units, mean, total, within, lengths, count, gmean, gcp, gone_t, gone_w):
    """As ``Downdates._stats``: vanished columns exactly zero."""
    keep_t = (~gone_t).astype(float)
    keep_w = (~(gone_t | gone_w)).astype(float)
    total = total * _outer(keep_t)
    within = within * _outer(keep_w)
    if gone_t.any():
        gcp = gcp * _outer(keep_t)[:, None]
        gmean = np.where(gone_t[:, None, :], mean[:, None, :], gmean)
    return Stack(n, n_units, mean, total, within, lengths, count, gmean, gcp)


def rows_left_out(dd, rows) -> Stack:
    """The statistics without each row of ``rows`` (``Downdates.without_row``, batched)."""
    ss = dd.ss
    rows = np.asarray(rows, dtype=np.int64)
    B = len(rows)
    lengths = _all_lengths(ss)
    z = dd.Z[rows]
    i = dd.codes[rows]
    T = dd.starts[i + 1] - dd.starts[i]
    n1 = ss.n - 1
    dev = z - ss.mean
    removed = (ss.n / n1) * _outer(dev)
    total = ss.total - removed
    gone_t = _vanished(ss.total, removed, total)
    mean1 = ss.mean - dev / n1
    zbar = ss.unit_mean[i]
    count, gmean, gcp = _full_groups(ss, lengths, B)
    b = np.arange(B)
    _move(count, gmean, gcp, b, np.searchsorted(lengths, T), zbar, -1)
    within = np.broadcast_to(ss.within, (B, ss.p, ss.p)).copy()
    gone_w = np.zeros((B, ss.p), dtype=bool)
    n_units = np.full(B, ss.n_units, dtype=np.int64)
    n_units[T == 1] -= 1
    m = np.flatnonzero(T > 1)
    if len(m):
        Tm = T[m].astype(float)
        du = z[m] - zbar[m]
        W = (Tm / (Tm - 1.0))[:, None, None] * _outer(du)
        within[m] = ss.within - W
        gone_w[m] = _vanished(ss.within, W, within[m])
        _move(count, gmean, gcp, m, np.searchsorted(lengths, T[m] - 1),
              zbar[m] - du / (Tm - 1.0)[:, None], 1)
    return _assemble(np.full(B, n1, dtype=np.int64), n_units, mean1, total, within,
                     lengths, count, gmean, gcp, gone_t, gone_w)


def units_left_out(dd, units) -> Stack:
    """The statistics without each unit of ``units`` (``Downdates.without_unit``, batched)."""
    ss = dd.ss
    units = np.asarray(units, dtype=np.int64)
    B, p = len(units), ss.p
    lengths = _all_lengths(ss)
    T = dd.starts[units + 1] - dd.starts[units]
    zbar = ss.unit_mean[units]
    W = np.zeros((B, p, p))
    for t in np.unique(T):  # units of one length: their rows stacked (B_t, T, p)
        sel = np.flatnonzero(T == t)
        idx = dd.starts[units[sel]][:, None] + np.arange(t)[None, :]
        dev = dd.Z[idx] - zbar[sel][:, None, :]
        W[sel] = np.matmul(dev.transpose(0, 2, 1), dev)
    n1 = ss.n - T
    Tf = T.astype(float)
    mean1 = (ss.n * ss.mean - Tf[:, None] * zbar) / n1[:, None]
    delta = mean1 - zbar
    removed = W + ((n1 * Tf) / ss.n)[:, None, None] * _outer(delta)
    total = ss.total - removed
    within = ss.within - W
    count, gmean, gcp = _full_groups(ss, lengths, B)
    _move(count, gmean, gcp, np.arange(B), np.searchsorted(lengths, T), zbar, -1)
    return _assemble(n1.astype(np.int64), np.full(B, ss.n_units - 1, dtype=np.int64), mean1,
                     total, within, lengths, count, gmean, gcp,
                     _vanished(ss.total, removed, total), _vanished(ss.within, W, within))


# ---------------------------------------------------------------------- the cores, stacked
def _intercept(st):
    """(B,) index of a column of ones among the covariates, -1 if none
    (``reference.core.intercept_column``)."""
    k = st.p - 1
    out = np.full(len(st.n), -1, dtype=np.int64)
    tot = _diag(st.total)
    lim = 1e-12 * np.maximum(st.n, 1)
    for j in range(k - 1, -1, -1):  # the first such column wins
        hit = (tot[:, j] <= lim) & (np.abs(st.mean[:, j] - 1.0) < 1e-12)
        out[hit] = j
    return out


def _shift(st, icol):
    s = st.mean.copy()
    has = icol >= 0
    s[np.flatnonzero(has), icol[has]] = 0.0
    s[~has] = 0.0
    return s


def _cp_rows(st, s):
    d = st.mean - s
    return st.total + st.n[:, None, None] * _outer(d)


def _cp_units(st, s, weights):
    """``sum_d w_d (gcp_d + c_d m_d m_d')`` per point; ``weights`` (L,) or (B, L)."""
    w = np.broadcast_to(np.asarray(weights, dtype=float), st.count.shape)
    out = np.zeros(st.total.shape)
    for d in range(len(st.lengths)):
        m = st.gmean[:, d] - s
        term = w[:, d, None, None] * (st.gcp[:, d] + st.count[:, d, None, None] * _outer(m))
        out += np.where((w[:, d] == 0.0)[:, None, None], 0.0, term)
    return out


def _independent(A, scale=None, priority=(), tol=COLLINEAR_TOL):
    """(B, k) kept columns, decided as ``core.linalg.independent_columns`` decides for each
    matrix (the factorisation that keeps every column, else one elimination step per
    kept column)."""
    B, k = A.shape[0], A.shape[1]
    size = _diag(A).copy() if scale is None else np.asarray(scale, dtype=float).copy()
    first = [int(j) for j in priority]
    order = np.asarray(first + [j for j in range(k) if j not in set(first)], dtype=np.int64)
    S = A[:, order][:, :, order]
    lim = tol * size[:, order]
    keep = np.zeros((B, k), dtype=bool)
    full = np.all(size[:, order] > 0, axis=1) & np.all(_diag(S) > lim, axis=1)
    if full.any():
        f = np.flatnonzero(full)
        try:
            ok = np.all(_diag(np.linalg.cholesky(S[f])) ** 2 > lim[f], axis=1)
        except np.linalg.LinAlgError:
            ok = np.array([_chol_keeps(S[b], lim[b]) for b in f], dtype=bool)
        keep[f[ok]] = True
        full[f[~ok]] = False
    rest = np.flatnonzero(~full)
    if len(rest):
        S = S[rest].copy()
        dg = _diag(A[rest])
        sz = size[rest]
        kr = np.zeros((len(rest), k), dtype=bool)
        for t, j in enumerate(order.tolist()):
            lj = tol * sz[:, j]
            on = (sz[:, j] > 0) & (dg[:, j] > lj) & (S[:, t, t] > lj)
            kr[:, j] = on
            if t + 1 < k and on.any():
                o = np.flatnonzero(on)
                S[o, t + 1:, t + 1:] -= ((S[o, t + 1:, t, None] / S[o, t, t, None, None])
                                         * S[o, None, t, t + 1:])
        keep[rest] = kr
    return keep


def _chol_keeps(S, lim):
    try:
        return bool(np.all(np.diag(np.linalg.cholesky(S)) ** 2 > lim))
    except np.linalg.LinAlgError:
        return False


def _patterns(keep):
    """``(cols, points)`` for each distinct set of kept columns."""
    pats, inv = np.unique(keep, axis=0, return_inverse=True)
    inv = inv.ravel()
    return [(np.flatnonzero(pat).astype(np.int64), np.flatnonzero(inv == g))
            for g, pat in enumerate(pats)]


def _solve(A, keep):
    """``(beta (B, k), rss (B,), bread (B, k, k), ok)``: ``reference.core._solve`` on each
    point's kept columns (zeros elsewhere), points with the same columns stacked;
    ``ok`` is False where the factorisation fails (the loop's fallback takes those)."""
    B, p = A.shape[0], A.shape[1]
    y = p - 1
    beta = np.zeros((B, y))
    bread = np.zeros((B, y, y))
    rss = np.zeros(B)
    ok = np.ones(B, dtype=bool)
    for cols, pts in _patterns(keep):
        if len(cols) == 0:  # nothing to solve: the residual is the outcome's own
            r = A[pts, y, y]
            rss[pts] = np.where(r > -1e-9 * np.maximum(r, np.finfo(float).tiny),
                                np.maximum(r, 0.0), r)
            continue
        Axx = A[pts][:, cols][:, :, cols]
        Axy = A[pts][:, cols, y]
        dg = _diag(Axx)
        d = 1.0 / np.sqrt(np.where(dg > 0, dg, 1.0))
        scaled = Axx * _outer(d)
        try:
            ci = np.linalg.inv(np.linalg.cholesky(scaled))
        except np.linalg.LinAlgError:
            ok[pts] = False
            continue
        ciT = ci.transpose(0, 2, 1)
        inv = ciT @ ci
        b = d * (ciT @ (ci @ (d * Axy)[:, :, None]))[:, :, 0]
        r = A[pts, y, y] - np.einsum("bi,bi->b", Axy, b)
        scale = np.maximum(A[pts, y, y], np.finfo(float).tiny)
        r = np.where(r > -1e-9 * scale, np.maximum(r, 0.0), r)
        ix = np.ix_(pts, cols)
        beta[ix] = b
        bread[pts[:, None, None], cols[None, :, None], cols[None, None, :]] = \
            (inv + inv.transpose(0, 2, 1)) / 2 * _outer(d)
        rss[pts] = r
    return beta, rss, bread, ok


def _unshift(beta, s, icol, keep):
    """``reference.core._unshift`` on the coefficients (the intercept absorbs the shift)."""
    beta = beta.copy()
    has = np.flatnonzero((icol >= 0) & keep[np.arange(len(icol)), np.maximum(icol, 0)])
    if len(has):
        ic = icol[has]
        sx = np.where(keep[has], s[has, :-1], 0.0)
        sx[np.arange(len(has)), ic] = 0.0
        b = beta[has]
        b[np.arange(len(has)), ic] = (b[np.arange(len(has)), ic]
                                      - np.einsum("bi,bi->b", sx, b) + s[has, -1])
        beta[has] = b
    return beta


def _uncentred_scale(st):
    return _diag(st.total) + st.n[:, None] * st.mean ** 2


def _between_scale(st, A, icol):
    size = _diag(st.total)[:, :-1].copy()
    k = A.shape[1] - 1
    flat = ~(size > 0)
    size[flat] = _diag(A)[:, :k][flat]
    has = np.flatnonzero(icol >= 0)
    size[has, icol[has]] = A[has, icol[has], icol[has]]
    return size


def fit_batch(st: Stack, estimator, priority):
    """``(beta (B, k), sigma2_obs (B,), sigma2_unit (B,), ok (B,))`` of the core fits on
    the stacked statistics; ``ok`` False where the loop must refit (the estimator would
    refuse the point, or a factorisation failed)."""
    k = st.p - 1
    B = len(st.n)
    icol = _intercept(st)
    s = _shift(st, icol)
    if estimator == "pooled":
        A = _cp_rows(st, s)
        keep = _independent(A[:, :k, :k], None, priority)
        beta, rss, _, ok = _solve(A, keep)
        df = st.n - keep.sum(axis=1)
        ok &= df > 0
        return _unshift(beta, s, icol, keep), rss / np.where(ok, df, 1), np.zeros(B), ok
    # within (also the first step of Swamy-Arora)
    single = np.sum(np.where(st.lengths[None, :] == 1, st.count, 0), axis=1)
    nw, Nw = st.n - single, st.n_units - single
    keep_w = _independent(st.within[:, :k, :k], _uncentred_scale(st)[:, :k], priority)
    beta_w, rss_w, _, ok = _solve(st.within, keep_w)
    empty = ~keep_w.any(axis=1)
    rss_w = np.where(empty, st.within[:, -1, -1], rss_w)
    df_w = nw - Nw - keep_w.sum(axis=1)
    ok &= (Nw > 0) & (df_w > 0)
    s2e = rss_w / np.where(df_w > 0, df_w, 1)
    if estimator == "within":
        ok &= ~empty
        return beta_w, s2e, np.zeros(B), ok
    T = st.lengths.astype(float)
    At = _cp_units(st, s, T)
    keep_b = _independent(At[:, :k, :k], _between_scale(st, At, icol), priority)
    _, ssr_t, bread_t, okb = _solve(At, keep_b)
    ok &= okb
    df_b = st.n_units - keep_b.sum(axis=1)
    ok &= df_b > 0
    At2 = _cp_units(st, s, T ** 2)
    tr = np.einsum("bij,bji->b", bread_t, At2[:, :k, :k])
    raw = (ssr_t - df_b * s2e) / (st.n - tr)
    s2u = np.maximum(0.0, raw)
    theta = quasi_demeaning_share(st.lengths[None, :], s2u[:, None], s2e[:, None])
    A = st.within + _cp_units(st, s, st.lengths[None, :] * (1.0 - theta) ** 2)
    keep = _independent(A[:, :k, :k], None, priority)
    beta, _, _, okg = _solve(A, keep)
    ok &= okg & (st.n - keep.sum(axis=1) > 0)
    return _unshift(beta, s, icol, keep), s2e, s2u, ok
