"""AR(1) errors within units, on sufficient statistics.

Model: ``y_it = x_it'b + u_i + e_it`` with ``u_i ~ N(0, tau^2)`` and errors of one unit
following a stationary AR(1) on the occasions' own time scale,
``Cov(e_it, e_is) = sigma^2 rho^|time_t - time_s|``. Consecutive observed rows of a unit
(a *link*) are ``d`` time units apart and correlated ``phi = rho^d``, so gaps need no
special case (a continuous-time AR(1), Brockwell and Davis 1991, section 3.3). Unit i's
covariance is ``Sigma_i = sigma^2 R_i + tau^2 11'``; with links ``k = 1..T_i - 1``,
``phi_k = rho^(d_k)``, residuals ``r = y - x'b`` in time order and ``g = tau^2 / sigma^2``:

    q_i   = r_1^2 + sum_k (r_k+1 - phi_k r_k)^2 / (1 - phi_k^2)     # r' R^-1 r
    w'r_i = r_1   + sum_k (r_k+1 - phi_k r_k) / (1 + phi_k)         # 1' R^-1 r
    c_i   = 1     + sum_k (1 - phi_k) / (1 + phi_k)                 # 1' R^-1 1
    log p(y_i) = -1/2 [ T_i log 2pi sigma^2 + sum_k log(1 - phi_k^2) + log(1 + g c_i)
                        + (q_i - g (w'r_i)^2 / (1 + g c_i)) / sigma^2 ]

(``R^-1`` factors through the innovations of the AR(1), Brockwell and Davis 1991,
section 5.2; the rank-one term is the Sherman-Morrison identity.) The pooled model is
``tau = 0``; fixed effects (a flat prior on the intercepts) the limit ``tau -> inf``, taken
as the density of the within-transformed rows (see :func:`loglik`).

Every term is a quadratic form in ``v = [-b, 1]`` through cross-products of ``z = [x, y]``
that do not depend on the parameters: per gap length ``d`` the cross-products of the link
pairs ``[z_k, z_k+1]``; the first rows' cross-products; and, per group of units with the
same count of links of each gap length (so the same ``T_i`` and ``c_i``), the
cross-products of the stacked vector ``[z_1, E_d, S_d]`` (``E_d``, ``S_d``: the sums of
``z`` at the ends and at the starts of the unit's ``d``-links). A gradient therefore costs
the same for a hundred rows or a million; it grows with the number of distinct gap lengths
and link patterns, which is small when occasions are regular.

The statistics come from one mergeable pass: :func:`partial` summarises any block of rows,
:func:`merge` joins two blocks (a unit split between them is joined by the link from the
earlier block's last row to the later block's first, which each block carries), and
:func:`finalize` groups the units. All moments are kept about their means and merged with
the pairwise update of Chan, Golub and LeVeque (1979).

The Gaussian builders call this module with ``errors="ar1"``
(:class:`bayespanel.bayes.GaussianModel`); what does not work with AR(1) errors yet
refuses through :func:`refuse_pending` (docs/serial-correlation.md lists it).

References
----------
.. [1] Brockwell, P. J. and Davis, R. A. (1991). *Time Series: Theory and Methods*, 2nd ed.
   Springer. doi:10.1007/978-1-4419-0320-4
.. [2] Chan, T. F., Golub, G. H. and LeVeque, R. J. (1979). Updating formulae and a
   pairwise algorithm for computing sample variances. Technical report STAN-CS-79-773.
.. [3] Sherman, J. and Morrison, W. J. (1950). Adjustment of an inverse matrix
   corresponding to a change in one element of a given matrix. Annals of Mathematical
   Statistics 21(1), 124-127. doi:10.1214/aoms/1177729893
"""

from __future__ import annotations

import numbers
from dataclasses import dataclass, field

import numpy as np

from .errors import PanelDataError, SpecificationError

__all__ = [
    "occasion_times", "Timeline", "AR1Partial", "AR1Stats", "partial", "merge", "finalize",
    "compute", "loglik", "unit_logdensity", "unit_effect_conditional", "occasion_conditional",
    "occasion_logdensity", "holdout_logdensity", "simulate_errors", "by_draw_blocks", "data_values",
    "with_values", "structure", "ERRORS", "refuse_pending", "group_terms",
]

#: the error structures of the Gaussian models: independent, or AR(1) within units
ERRORS = ("iid", "ar1")

_LOG_2PI = float(np.log(2.0 * np.pi))


def refuse_pending(errors, what: str) -> None:
    """Refuse ``what`` for a model with ``errors="ar1"`` (not available for it yet).

    ``errors`` is the model's error structure (or anything with an ``errors`` attribute,
    such as a model specification); nothing happens for ``"iid"``.
    """
    errors = getattr(errors, "errors", errors)
    if errors == "ar1":
        raise SpecificationError(
            f"{what} is not available yet for models with errors='ar1' (AR(1) errors "
            "within units); fit the model with errors='iid' for it, and see "
            "docs/serial-correlation.md for what works with errors='ar1'")


# ---------------------------------------------------------------------------- time
def occasion_times(values, column: str = "time") -> np.ndarray:
    """The occasions as numbers on which gaps are measured.

    Numbers are used as they are (a gap of 2 between two rows of a unit means one
    occasion missing between them); an ordered categorical is mapped to its category
    codes (0, 1, 2, ... in the order of its categories). Anything else has no spacing we
    can read (text, unordered categories, dates: a month has 28 to 31 days) and is a
    :class:`~bayespanel.core.errors.PanelDataError` naming ``column``.
    """
    def refuse(why):
        return PanelDataError(
            f"time column {column!r} {why}; AR(1) errors need time as numbers whose "
            f"differences are the spacing of the occasions (for example years, or "
            f"occasions numbered 0, 1, 2, ...), or an ordered categorical")

    dtype = getattr(values, "dtype", None)
    if getattr(dtype, "name", None) == "category":        # pandas categorical, duck-typed
        if not dtype.ordered:
            raise refuse("is an unordered categorical")
        codes = np.asarray(values.cat.codes if hasattr(values, "cat") else values.codes)
        if np.any(codes < 0):
            raise refuse("has missing values")
        return codes.astype(float)
    arr = np.asarray(values)
    if arr.dtype.kind in "mM":
        raise refuse("holds dates or durations (their spacing in occasions is ambiguous)")
    if arr.dtype.kind == "b":
        raise refuse("holds true/false values")
    if arr.dtype.kind == "O":
        bad = [v for v in arr.ravel() if isinstance(v, bool) or not isinstance(v, numbers.Real)]
        if bad:
            raise refuse(f"holds {type(bad[0]).__name__} values such as {bad[0]!r}")
    elif arr.dtype.kind not in "iuf":
        example = arr.ravel()[0] if arr.size else ""
        raise refuse(f"holds {arr.dtype} values such as {example!r}")
    out = arr.astype(float).ravel()
    if not np.all(np.isfinite(out)):
        i = int(np.flatnonzero(~np.isfinite(out))[0])
        raise refuse(f"has a missing or infinite value at row {i}")
    return out


def _snap(d):
    """Gaps within 1e-9 (relative) of a whole number are that number, so that times
    stored as floats (``2001.0000000001``) give the same gap lengths as integers."""
    r = np.round(d)
    return np.where(np.abs(d - r) <= 1e-9 * np.maximum(1.0, np.abs(d)), r, d)


def _sorted_by_unit_and_time(keys, t):
    """``(unit keys, codes)`` when the rows are already sorted by unit and then by time
    (strictly within a unit), else None."""
    if keys.dtype == object or len(keys) == 0:
        return None
    change = keys[1:] != keys[:-1]
    if not (np.all(keys[1:] >= keys[:-1]) and np.all(change | (t[1:] > t[:-1]))):
        return None
    starts = np.flatnonzero(np.concatenate([[True], change]))
    codes = np.cumsum(np.concatenate([[False], change])).astype(np.int64)
    return keys[starts], codes


@dataclass(frozen=True)
class Timeline:
    """Rows of a panel ordered by unit and time, with the link of each row to the row
    before it in its unit.

    Built once from the unit of each row and its time (:func:`occasion_times`); every
    row-level function of this module takes it. ``order`` sorts the input rows by (unit,
    time); ``codes`` (sorted rows) are ``0..N-1`` in the order of ``keys``; ``starts``
    the first sorted row of each unit; ``T`` the rows per unit; ``gap`` the time since
    the unit's previous row (``nan`` on a unit's first row); ``linked`` whether a row has
    a previous row in its unit.
    """

    keys: np.ndarray
    order: np.ndarray
    codes: np.ndarray
    starts: np.ndarray
    T: np.ndarray
    time: np.ndarray
    gap: np.ndarray
    linked: np.ndarray

    @classmethod
    def build(cls, keys, times, column: str = "time") -> "Timeline":
        t = occasion_times(times, column)
        keys = np.asarray(keys)
        if keys.shape != t.shape:
            raise ValueError(f"{len(keys)} unit keys for {len(t)} times")
        sorted_rows = _sorted_by_unit_and_time(keys, t)
        if sorted_rows is not None:        # the common layout of panel files: no sort
            ukeys, codes = sorted_rows
            order = np.arange(len(t))
        else:
            ukeys, codes = np.unique(keys, return_inverse=True)
            codes = codes.ravel()
            order = np.lexsort((t, codes))
        c, ts = codes[order], t[order]
        linked = np.zeros(len(c), dtype=bool)
        linked[1:] = c[1:] == c[:-1]
        gap = np.full(len(c), np.nan)
        gap[1:] = ts[1:] - ts[:-1]
        dup = linked & (gap == 0)
        if np.any(dup):
            i = int(np.flatnonzero(dup)[0])
            raise PanelDataError(
                f"time column {column!r}: unit {ukeys[c[i]]!r} has two rows at time "
                f"{ts[i]:g}; each unit may appear once per occasion")
        gap[linked] = _snap(gap[linked])
        gap[~linked] = np.nan
        T = np.bincount(c, minlength=len(ukeys)).astype(np.int64)
        starts = np.flatnonzero(~linked)
        return cls(ukeys, order, c, starts, T, ts, gap, linked)

    @property
    def n(self) -> int:
        return int(len(self.codes))

    @property
    def integer_gaps(self) -> bool:
        """Whether every gap is a whole number (then negative ``rho`` is allowed)."""
        g = self.gap[self.linked]
        return bool(np.all(g == np.round(g)))

    def ends(self) -> np.ndarray:
        """The last sorted row of each unit."""
        return np.append(self.starts[1:] - 1, self.n - 1).astype(np.int64)


# ---------------------------------------------------------------------------- moments
@dataclass
class _Moments:
    """Count, mean and cross-products about the mean of a set of vectors (mergeable)."""

    n: int
    mean: np.ndarray
    m2: np.ndarray

    @classmethod
    def of(cls, U: np.ndarray) -> "_Moments":
        U = np.asarray(U, dtype=float)
        if len(U) == 0:
            return cls(0, np.zeros(U.shape[1]), np.zeros((U.shape[1], U.shape[1])))
        mean = U.mean(axis=0)
        D = U - mean
        # einsum, not BLAS: these matrices are thin (p to (1 + 2m) p columns), and a
        # threaded BLAS product of that shape was measured 100x slower on a busy machine
        return cls(int(len(U)), mean, np.einsum("ij,ik->jk", D, D))

    def __add__(self, other: "_Moments") -> "_Moments":
        if other.n == 0:
            return self
        if self.n == 0:
            return other
        n = self.n + other.n
        delta = other.mean - self.mean
        return _Moments(n, self.mean + delta * (other.n / n),
                        self.m2 + other.m2 + np.outer(delta, delta) * (self.n * other.n / n))

    def about(self, c) -> np.ndarray:
        """``sum (u - c)(u - c)'``."""
        d = self.mean - c
        return self.m2 + self.n * np.outer(d, d)


# ---------------------------------------------------------------------------- the pass
@dataclass
class AR1Partial:
    """AR(1) moments of a block of rows, mergeable with other blocks (:func:`merge`).

    ``gaps`` (sorted) and ``links`` (moments of the stacked pairs ``[z_start, z_end]`` of
    the links of each gap length); per unit present (sorted ``keys``): its ``rows``, the
    time and ``z`` of its first and last row in the block; per unit and gap length
    present (``pk``, ``pg``, sorted by both): the link count ``pc`` and the sums of ``z``
    at the ends (``pE``) and starts (``pS``) of those links.
    """

    p: int
    gaps: np.ndarray
    links: list
    keys: np.ndarray
    rows: np.ndarray
    first_t: np.ndarray
    first_z: np.ndarray
    last_t: np.ndarray
    last_z: np.ndarray
    pk: np.ndarray
    pg: np.ndarray
    pc: np.ndarray
    pE: np.ndarray
    pS: np.ndarray
    column: str = "time"


def _pattern(ukeys, uidx, g, E, S, p, counts=None):
    """Link counts and end/start sums by (unit, gap), sorted by both: ``uidx`` indexes
    ``ukeys``; each entry counts ``counts`` links (1 by default)."""
    if len(uidx) == 0:
        return ukeys[:0], np.zeros(0), np.zeros(0, np.int64), np.zeros((0, p)), np.zeros((0, p))
    gv, gi = _unique_gaps(g)
    combo = uidx.astype(np.int64) * len(gv) + gi
    uc, inv = np.unique(combo, return_inverse=True)
    inv = inv.ravel()
    cnt = np.bincount(inv, weights=counts, minlength=len(uc)).astype(np.int64)
    Es = np.empty((len(uc), p))
    Ss = np.empty((len(uc), p))
    for j in range(p):
        Es[:, j] = np.bincount(inv, weights=E[:, j], minlength=len(uc))
        Ss[:, j] = np.bincount(inv, weights=S[:, j], minlength=len(uc))
    return ukeys[uc // len(gv)], gv[uc % len(gv)], cnt, Es, Ss


def _link_moments(g, start, end):
    """``(gaps, [moments of [start, end] per gap])``."""
    gv, gi = _unique_gaps(g)
    pairs = np.hstack([start, end])
    return gv, [_Moments.of(pairs[gi == j]) for j in range(len(gv))]


def _unique_gaps(g):
    """``np.unique(g, return_inverse=True)``, without a sort when the gaps are small
    whole numbers (the usual case)."""
    if len(g) and np.all(g == np.round(g)) and g.max() < 1 << 16:
        gint = g.astype(np.int64)
        present = np.bincount(gint) > 0
        gv = np.flatnonzero(present)
        lookup = np.cumsum(present) - 1
        return gv.astype(float), lookup[gint]
    gv, gi = np.unique(g, return_inverse=True)
    return gv, gi.ravel()


def partial(Z, keys, times, column: str = "time") -> AR1Partial:
    """Summarise one block of rows (rows in any order; a unit may continue in other blocks).

    Parameters
    ----------
    Z : array (n, p)
        ``[X, y]`` of the rows.
    keys : array (n,)
        Unit of each row (any sortable type).
    times : array (n,)
        Occasion of each row, read by :func:`occasion_times` (``column`` names it in errors).
    """
    Z = np.asarray(Z, dtype=float)
    if Z.ndim != 2:
        raise ValueError("Z must be a 2-d array (rows x columns)")
    tl = Timeline.build(keys, times, column)
    p = Z.shape[1]
    Zs = Z[tl.order]
    ends = tl.ends()
    link = np.flatnonzero(tl.linked)
    g = tl.gap[link]
    gaps, links = _link_moments(g, Zs[link - 1], Zs[link])
    pk, pg, pc, pE, pS = _pattern(tl.keys, tl.codes[link], g, Zs[link], Zs[link - 1], p)
    return AR1Partial(p, gaps, links, tl.keys, tl.T, tl.time[tl.starts], Zs[tl.starts],
                      tl.time[ends], Zs[ends], pk, pg, pc, pE, pS, column)


def _add_links(gaps_a, links_a, gaps_b, links_b):
    gaps = np.union1d(gaps_a, gaps_b)
    out = []
    for d in gaps:
        m = None
        for gv, ls in ((gaps_a, links_a), (gaps_b, links_b)):
            j = np.searchsorted(gv, d)
            if j < len(gv) and gv[j] == d:
                m = ls[j] if m is None else m + ls[j]
        out.append(m)
    return gaps, out


def merge(a: AR1Partial, b: AR1Partial) -> AR1Partial:
    """Join two blocks. A unit present in both gains the link from the earlier block's
    last row to the later block's first row; its rows in the two blocks must not
    interleave in time (merge blocks in the order of the rows, as a tree over ordered
    partitions does), otherwise this is a :class:`~bayespanel.core.errors.PanelDataError`."""
    if len(a.keys) == 0:
        return b
    if len(b.keys) == 0:
        return a
    p = a.p
    _, ia, ib = np.intersect1d(a.keys, b.keys, assume_unique=True, return_indices=True)
    # orient each shared unit: which block holds its earlier rows
    a_first = a.last_t[ia] < b.first_t[ib]
    b_first = b.last_t[ib] < a.first_t[ia]
    bad = ~(a_first | b_first)
    if np.any(bad):
        j = int(np.flatnonzero(bad)[0])
        raise PanelDataError(
            f"time column {a.column!r}: the rows of unit {a.keys[ia[j]]!r} in two blocks "
            f"interleave in time ({a.first_t[ia[j]]:g}..{a.last_t[ia[j]]:g} and "
            f"{b.first_t[ib[j]]:g}..{b.last_t[ib[j]]:g}); merge blocks in row order")
    e_t = np.where(a_first, a.last_t[ia], b.last_t[ib])        # earlier block's last row
    e_z = np.where(a_first[:, None], a.last_z[ia], b.last_z[ib])
    l_t = np.where(a_first, b.first_t[ib], a.first_t[ia])      # later block's first row
    l_z = np.where(a_first[:, None], b.first_z[ib], a.first_z[ia])
    g = _snap(l_t - e_t)
    gaps, links = _add_links(a.gaps, a.links, b.gaps, b.links)
    if len(ia):
        gaps, links = _add_links(gaps, links, *_link_moments(g, e_z, l_z))
    # per-unit first and last rows
    keys = np.concatenate([a.keys, b.keys])
    ukeys, inv = np.unique(keys, return_inverse=True)
    inv = inv.ravel()
    N = len(ukeys)
    rows = np.bincount(inv, weights=np.concatenate([a.rows, b.rows]), minlength=N).astype(np.int64)
    ft = np.concatenate([a.first_t, b.first_t])
    lt = np.concatenate([a.last_t, b.last_t])
    fz = np.concatenate([a.first_z, b.first_z])
    lz = np.concatenate([a.last_z, b.last_z])
    first = np.lexsort((ft, inv))                 # earliest fragment first, per unit
    last = np.lexsort((-lt, inv))                 # latest fragment first, per unit
    head = np.ones(len(inv), dtype=bool)
    head[1:] = inv[first][1:] != inv[first][:-1]
    pick_f = first[head]
    head[1:] = inv[last][1:] != inv[last][:-1]
    pick_l = last[head]
    # per unit and gap: the sums of both blocks plus the joining links
    pk = np.concatenate([a.pk, b.pk, a.keys[ia]])
    pg = np.concatenate([a.pg, b.pg, g])
    pc = np.concatenate([a.pc, b.pc, np.ones(len(ia), np.int64)])
    pE = np.concatenate([a.pE, b.pE, l_z])
    pS = np.concatenate([a.pS, b.pS, e_z])
    uk, ui = np.unique(pk, return_inverse=True)
    pk, pg, pc, pE, pS = _pattern(uk, ui.ravel(), pg, pE, pS, p, counts=pc)
    return AR1Partial(p, gaps, links, ukeys, rows, ft[pick_f], fz[pick_f], lt[pick_l],
                      lz[pick_l], pk, pg, pc, pE, pS, a.column)


@dataclass
class AR1Group:
    """Units sharing a link pattern: ``count`` units of ``T`` rows, each with
    ``link_counts[j]`` links of gap ``gaps[index[j]]``; ``moments`` of their stacked
    vectors ``[z_1, E_(index[0]), ..., S_(index[0]), ...]``."""

    count: int
    T: int
    index: np.ndarray
    link_counts: np.ndarray
    moments: _Moments


@dataclass
class AR1Stats:
    """Everything the AR(1) marginal likelihood needs (see the module docstring).

    Read the arrays with :meth:`arrays`, on the data's scale or standardised.
    """

    n: int
    n_units: int
    p: int
    gaps: np.ndarray
    links: list
    first: _Moments
    groups: list
    names: list = field(default=None)

    @property
    def link_count(self) -> np.ndarray:
        return np.array([m.n for m in self.links], dtype=np.int64)

    @property
    def integer_gaps(self) -> bool:
        """Whether every gap is a whole number: ``rho^d`` for negative ``rho`` needs it."""
        return bool(np.all(self.gaps == np.round(self.gaps)))

    def arrays(self, center=None, scale=None) -> dict:
        """The cross-products of ``z* = (z - center) / scale`` the density reads.

        Returns a dict: ``n``, ``n_units``; ``gaps`` (D,), ``link_count`` (D,); ``first``
        (p, p), ``sum z*_1 z*_1'`` over units; ``link_start``, ``link_end``, ``link_cross``
        (D, p, p), per gap length ``sum z*_k z*_k'``, ``sum z*_k+1 z*_k+1'`` and
        ``sum z*_k+1 z*_k'`` over links; ``groups``, the groups of units sharing a link
        pattern, gathered by ``m``, their number of distinct gap lengths: a list of
        dicts, one per ``m``, each with ``count`` (G,) units per group, ``T`` (G,),
        ``index`` (G, m) positions of their gap lengths in ``gaps``, ``links`` (G, m) the
        links of each of those lengths per unit, and ``cp`` (G, J p, J p), ``J = 1 + 2 m``,
        the cross-products of the stacked vectors ``[z*_1, E*_1..E*_m, S*_1..S*_m]``. The
        density is a few array operations per ``m`` whatever the number of groups, and the
        arrays hold no blocks for gap lengths a group does not have.

        The moments are kept about their own means, so any ``center`` is exact in exact
        arithmetic; in floating point the density's quadratic forms cancel least when
        ``center`` is near the data's mean (pass it when columns carry large offsets, as
        the samplers' standardisation does).
        """
        p, D = self.p, len(self.gaps)
        c = np.zeros(p) if center is None else np.asarray(center, dtype=float)
        s = np.ones(p) if scale is None else np.asarray(scale, dtype=float)
        ss = np.outer(s, s)
        start = np.empty((D, p, p))
        end = np.empty((D, p, p))
        cross = np.empty((D, p, p))
        for j, mo in enumerate(self.links):
            P = mo.about(np.concatenate([c, c])) / np.outer(np.tile(s, 2), np.tile(s, 2))
            start[j], end[j], cross[j] = P[:p, :p], P[p:, p:], P[p:, :p]
        by_m = {}
        for grp in self.groups:
            by_m.setdefault(len(grp.index), []).append(grp)
        groups = []
        for m in sorted(by_m):
            gs = by_m[m]
            sc = np.tile(s, 1 + 2 * m)
            cp = np.empty((len(gs), len(sc), len(sc)))
            for i, grp in enumerate(gs):
                lc = grp.link_counts.astype(float)
                shift = np.concatenate([c] + [n * c for n in lc] * 2)
                cp[i] = grp.moments.about(shift) / np.outer(sc, sc)
            groups.append({
                "count": np.array([g.count for g in gs], dtype=float),
                "T": np.array([g.T for g in gs], dtype=float),
                "index": np.array([g.index for g in gs], dtype=np.int64).reshape(len(gs), m),
                "links": np.array([g.link_counts for g in gs], dtype=float).reshape(len(gs), m),
                "cp": cp})
        return {"n": self.n, "n_units": self.n_units, "gaps": self.gaps.copy(),
                "link_count": self.link_count.astype(float),
                "first": self.first.about(c) / ss, "link_start": start, "link_end": end,
                "link_cross": cross, "groups": groups}


def finalize(part: AR1Partial, names=None) -> AR1Stats:
    """Group the units of merged blocks by link pattern: :class:`AR1Stats`."""
    p, N, D = part.p, len(part.keys), len(part.gaps)
    uidx = np.searchsorted(part.keys, part.pk)
    gidx = np.searchsorted(part.gaps, part.pg)
    C = np.zeros((N, D), dtype=np.int64)
    C[uidx, gidx] = part.pc
    base = int(C.max()) + 1 if C.size else 1
    if D == 0:        # no unit has two rows
        patterns, unit_group = np.zeros((1, 0), dtype=np.int64), np.zeros(N, dtype=np.int64)
    elif D * np.log2(base) < 62:     # each pattern as one integer (digits in base `base`)
        code = C @ (base ** np.arange(D, dtype=np.int64))
        _, first, unit_group = np.unique(code, return_index=True, return_inverse=True)
        patterns = C[first]
    else:
        patterns, unit_group = np.unique(C, axis=0, return_inverse=True)
    unit_group = unit_group.ravel()
    entry_group = unit_group[uidx]
    groups = []
    for gi, pat in enumerate(patterns):
        units = np.flatnonzero(unit_group == gi)
        index = np.flatnonzero(pat)
        m = len(index)
        sel = entry_group == gi          # sorted by unit then gap: a regular (units, m) grid
        E = part.pE[sel].reshape(len(units), m * p)
        S = part.pS[sel].reshape(len(units), m * p)
        U = np.hstack([part.first_z[units], E, S])
        groups.append(AR1Group(len(units), int(1 + pat.sum()), index, pat[index],
                               _Moments.of(U)))
    return AR1Stats(int(part.rows.sum()), N, p, part.gaps.copy(), list(part.links),
                    _Moments.of(part.first_z), groups,
                    list(names) if names is not None else None)


def compute(X, y, keys, times, names=None, column: str = "time") -> AR1Stats:
    """AR(1) statistics of ``Z = [X, y]`` in one block: ``finalize(partial(...))``."""
    Z = np.column_stack([np.asarray(X, dtype=float), np.asarray(y, dtype=float)])
    return finalize(partial(Z, keys, times, column), names)


# ---------------------------------------------------------------------------- density
def _quad(A, v):
    """``v' A v`` for a stack of matrices ``A`` (..., p, p) (elementwise: works on numpy
    and on pytensor variables alike)."""
    return (A * v[:, None] * v[None, :]).sum(axis=(-2, -1))


def loglik(v, arrays: dict, rho, sigma, tau, xp=np):
    """Marginal log-likelihood of the AR(1) panel model from its statistics.

    Parameters
    ----------
    v : array (p,)
        ``[-b, 1]`` in the coordinates of ``arrays`` (:meth:`AR1Stats.arrays`).
    arrays : dict
        From :meth:`AR1Stats.arrays`.
    rho : float
        Correlation of two errors one time unit apart, in (-1, 1) (non-negative when the
        gaps are not whole numbers).
    sigma : float
        Error SD (the stationary SD of ``e_it``).
    tau : float or None
        SD of the unit intercepts. ``0``: the pooled model. ``None``: fixed effects, the
        intercepts integrated out under a flat prior; what is returned is then the
        density of the within-transformed rows ``H_i' r_i`` (``H_i`` an orthonormal
        basis of the contrasts of unit i's rows), that is the flat-prior integral
        ``int N(r_i; u 1, sigma^2 R_i) du`` times ``sqrt(T_i)``; at ``rho = 0`` it is
        :func:`bayespanel.core.gaussian.within_loglik`. Units with one row add 0.
    xp : module
        ``numpy`` or ``pytensor.tensor`` (then ``v``, ``rho``, ``sigma``, ``tau`` may be
        symbolic and the result is a scalar expression PyMC can differentiate).

    Returns
    -------
    float or scalar expression
        ``sum_i log p(y_i | b, rho, sigma, tau)`` (the module docstring).
    """
    if xp is np:
        rho = float(rho)
        if not -1.0 < rho < 1.0:
            raise ValueError(f"rho must be in (-1, 1), got {rho}")
        if rho < 0 and not np.all(arrays["gaps"] == np.round(arrays["gaps"])):
            raise ValueError("a negative rho needs whole-number gaps between occasions")
    gaps = arrays["gaps"]
    phi = rho ** gaps
    one_m = 1.0 - phi ** 2
    q = _quad(arrays["first"], v)
    if len(gaps):
        qs = _quad(arrays["link_start"], v)
        qe = _quad(arrays["link_end"], v)
        qc = _quad(arrays["link_cross"], v)
        q = q + xp.sum((qe - 2.0 * phi * qc + phi ** 2 * qs) / one_m)
        logdet = xp.sum(arrays["link_count"] * xp.log(one_m))
    else:
        logdet = 0.0
    s2 = sigma ** 2
    n, N = arrays["n"], arrays["n_units"]
    fixed = tau is None
    pooled = not fixed and isinstance(tau, numbers.Real) and tau == 0
    if pooled:
        return -0.5 * (n * (_LOG_2PI + xp.log(s2)) + logdet + q / s2)
    # per group: c = 1' R^-1 1 and (w'r)^2 = L' cp L with L = l (x) v, l = [1, 1/(1+phi),
    # -phi/(1+phi)] over the group's gap lengths; groups with the same number of gap
    # lengths are computed together
    g = None if fixed else tau ** 2 / s2
    log_c = 0.0
    sub = 0.0
    p = arrays["first"].shape[0]
    for grp in arrays["groups"]:
        count, T = grp["count"], grp["T"]
        G, m = grp["index"].shape
        c, lvec = group_terms(grp, phi, xp)
        L = (lvec[:, :, None] * v[None, None, :]).reshape((G, (1 + 2 * m) * p))
        wr2 = (grp["cp"] * L[:, :, None] * L[:, None, :]).sum(axis=(1, 2))
        if fixed:
            log_c = log_c + (count * (xp.log(c) - np.log(T))).sum()
            sub = sub + (wr2 / c).sum()
        else:
            h = 1.0 + g * c
            log_c = log_c + (count * xp.log(h)).sum()
            sub = sub + (g * wr2 / h).sum()
    m = n - N if fixed else n
    return -0.5 * (m * (_LOG_2PI + xp.log(s2)) + logdet + log_c + (q - sub) / s2)


def group_terms(grp: dict, phi, xp=np):
    """``(c, l)`` of one entry of ``arrays["groups"]`` at link correlations ``phi`` (per
    gap length): ``c = 1' R^-1 1`` per group (G,) and the weights ``l`` (G, 1 + 2 m) of
    the stacked vector ``[z_1, E, S]`` with ``1' R^-1 r = l'[r_1, E_r, S_r]``."""
    idx = grp["index"]
    G, m = idx.shape
    if not m:
        return np.ones(G), np.ones((G, 1))
    ph = phi[idx]
    c = 1.0 + (grp["links"] * (1.0 - ph) / (1.0 + ph)).sum(axis=1)
    return c, xp.concatenate([xp.ones((G, 1)), 1.0 / (1.0 + ph), -ph / (1.0 + ph)], axis=1)


# ---------------------------------------------------------------------------- rows
def _params(x):
    """A parameter as a column over draws (S, 1), or a scalar."""
    return np.reshape(np.asarray(x, dtype=float), (-1, 1)) if np.ndim(x) else float(x)


def _link_terms(r, tl: Timeline, rho):
    """``(phi, r_prev)`` per sorted row: the link correlation to the previous row of the
    unit (0 on a unit's first row) and that row's residual (0 likewise)."""
    gap = np.where(tl.linked, tl.gap, 1.0)
    rho = _params(rho)
    phi = np.atleast_2d(np.where(tl.linked, np.power(rho, gap), 0.0))     # (1 or S, n)
    prev = np.zeros_like(r)
    prev[:, 1:] = r[:, :-1]
    prev[:, ~tl.linked] = 0.0
    return phi, prev


def _check_rho(rho, tl: Timeline):
    rho = np.asarray(rho, dtype=float)
    if np.any(np.abs(rho) >= 1):
        raise ValueError("rho must be in (-1, 1)")
    if np.any(rho < 0) and not tl.integer_gaps:
        raise ValueError("a negative rho needs whole-number gaps between occasions")


def _unit_terms(r, tl: Timeline, rho):
    """Per unit (S, N): ``q = r'R^-1 r``, ``w'r = 1'R^-1 r``, ``c = 1'R^-1 1`` and
    ``log|R|``, from the innovations of the AR(1) (module docstring), in O(rows)."""
    _check_rho(rho, tl)
    r = np.atleast_2d(np.asarray(r, dtype=float))[:, tl.order]
    phi, prev = _link_terms(r, tl, rho)
    innov = r - phi * prev
    link = tl.linked
    e2 = np.where(link, innov ** 2 / (1.0 - phi ** 2), r ** 2)
    wr = np.where(link, innov / (1.0 + phi), r)
    cc = np.where(link, (1.0 - phi) / (1.0 + phi), 1.0)
    ld = np.where(link, np.log1p(-phi ** 2), 0.0)
    return tuple(np.add.reduceat(a, tl.starts, axis=1) for a in (e2, wr, cc, ld))


def unit_effect_conditional(r, tl: Timeline, rho, sigma, tau):
    """Mean and SD of each unit's intercept given its rows and the parameters.

    With ``r`` the residuals without the intercept, the normal update gives
    ``u_i | y ~ N(tau^2 w'r_i / (sigma^2 + tau^2 c_i), tau^2 sigma^2 / (sigma^2 + tau^2 c_i))``
    (``w'r`` and ``c`` as in the module docstring; at ``rho = 0`` ``c_i = T_i`` and
    ``w'r_i`` the residual sum, as in :func:`bayespanel.core.gaussian.unit_effect_conditional`).
    ``tau=None`` is the flat-prior (fixed-effects) limit: the GLS mean ``w'r_i / c_i`` with
    variance ``sigma^2 / c_i``.

    Returns
    -------
    mean, sd : arrays (N,) or (S, N), units in the order of ``tl.keys``.
    """
    one = np.ndim(r) == 1
    _, wr, c, _ = _unit_terms(r, tl, rho)
    s2 = _params(sigma) ** 2
    if tau is None:
        mean, var = wr / c, s2 / c
    else:
        t2 = _params(tau) ** 2
        d = s2 + t2 * c
        mean, var = t2 * wr / d, t2 * s2 / d
    sd = np.sqrt(var)
    return (mean[0], sd[0]) if one else (mean, sd)


def unit_logdensity(r, tl: Timeline, rho, sigma, tau):
    """Marginal log density of each unit's rows, from the residuals ``r = y - x'b``.

    The per-unit form of :func:`loglik` in O(rows) (innovations of the AR(1) and the
    rank-one term, module docstring), for unit-level predictive checks.

    Parameters
    ----------
    r : array (n,) or (S, n)
        Residuals in the row order ``tl`` was built on (and per draw).
    tl : Timeline
    rho, sigma, tau : float or array (S,)
        ``tau = 0`` pooled, ``tau = None`` fixed effects (as in :func:`loglik`).

    Returns
    -------
    array (N,) or (S, N), units in the order of ``tl.keys``.
    """
    one = np.ndim(r) == 1
    q, wr, c, logdet = _unit_terms(r, tl, rho)
    s2 = _params(sigma) ** 2
    T = tl.T.astype(float)
    if tau is None:
        out = -0.5 * ((T - 1) * (_LOG_2PI + np.log(s2)) + logdet + np.log(c) - np.log(T)
                      + (q - wr ** 2 / c) / s2)
    else:
        g = _params(tau) ** 2 / s2
        h = 1.0 + g * c
        out = -0.5 * (T * (_LOG_2PI + np.log(s2)) + logdet + np.log(h) + (q - g * wr ** 2 / h) / s2)
    return out[0] if one else out


def occasion_conditional(r, tl: Timeline, rho, sigma, tau):
    """Mean and SD of each row's residual given the other rows of its unit, in O(T_i).

    The precision of unit i's residuals is ``Q = (R^-1 - h w w') / sigma^2`` with
    ``R^-1`` tridiagonal (the AR(1) innovations), ``w = R^-1 1`` and ``h = g / (1 + g c)``
    (``1/c`` for fixed effects, 0 pooled), so ``r_t | r_-t`` is normal with mean
    ``r_t - (Q r)_t / Q_tt`` and variance ``1 / Q_tt`` (Rue and Held 2005, Gaussian
    Markov Random Fields, section 2.2). Fixed effects give ``nan`` for units with one row.

    Returns
    -------
    mean, sd : arrays shaped like ``r``, in its row order.
    """
    _check_rho(rho, tl)
    r = np.asarray(r, dtype=float)
    one = r.ndim == 1
    r = np.atleast_2d(r)[:, tl.order]
    phi, prev = _link_terms(r, tl, rho)
    link = tl.linked
    inv1 = np.where(link, 1.0 / (1.0 - phi ** 2), 1.0)          # own innovation weight
    off = np.where(link, -phi * inv1, 0.0)                        # R^-1[t-1, t]
    nxt_inv = np.zeros_like(inv1)
    nxt_off = np.zeros_like(off)
    nxt_inv[:, :-1] = np.where(link[1:], phi[:, 1:] ** 2 / (1.0 - phi[:, 1:] ** 2), 0.0)
    nxt_off[:, :-1] = off[:, 1:]
    diag = inv1 + nxt_inv
    nxt_r = np.zeros_like(r)
    nxt_r[:, :-1] = r[:, 1:]
    Rr = diag * r + off * prev + nxt_off * nxt_r
    w = diag + off + nxt_off
    c = np.add.reduceat(w, tl.starts, axis=1)
    wr = np.add.reduceat(Rr, tl.starts, axis=1)
    s2 = _params(sigma) ** 2
    if tau is None:
        h = 1.0 / c
    else:
        g = _params(tau) ** 2 / s2
        h = g / (1.0 + g * c)
    h = h[:, tl.codes]
    Qr = (Rr - h * w * wr[:, tl.codes]) / s2
    Qtt = (diag - h * w ** 2) / s2
    if tau is None:
        Qtt = np.where(tl.T[tl.codes] > 1, Qtt, np.nan)
    mean = r - Qr / Qtt
    sd = 1.0 / np.sqrt(Qtt)
    back = np.empty_like(tl.order)
    back[tl.order] = np.arange(len(back))
    mean, sd = mean[:, back], sd[:, back]
    return (mean[0], sd[0]) if one else (mean, sd)


def occasion_logdensity(r, tl: Timeline, rho, sigma, tau):
    """``log p(r_t | r_-t)`` of every row (:func:`occasion_conditional` applied), in the
    row order of ``r``; the occasion-level LOO term of Bürkner, Gabry and Vehtari (2021,
    Computational Statistics 36) for AR(1) errors."""
    mean, sd = occasion_conditional(r, tl, rho, sigma, tau)
    z = (np.asarray(r, dtype=float) - mean) / sd
    return -0.5 * (_LOG_2PI + z ** 2) - np.log(sd)


def holdout_logdensity(r, keys, times, test, rho, sigma, tau, column: str = "time"):
    """``log p(r_t | training rows of its unit)`` of every held-out row, per draw.

    For exact refits and K-fold at the occasion level: each held-out row is scored given
    the rows of its unit that are *not* held out (several rows of one unit may be held
    out together; each is scored on its own given the training rows). A subset of the
    occasions of a continuous-time AR(1) is again one (``rho^a rho^b = rho^(a + b)``), so
    the conditional is a ratio of two marginals of :func:`unit_logdensity`:
    ``log p(r_B, r_t) - log p(r_B)`` (``B``: the training rows of the unit), in
    O(rows) per held-out row of a unit. Fixed effects (``tau=None``): the same ratio of
    flat-prior integrals, ``nan`` when the unit has no training row.

    Parameters
    ----------
    r : array (n,) or (S, n)
        Residuals of all rows (training and held out), per draw.
    keys, times : arrays (n,)
        Unit and occasion of each row.
    test : bool array (n,)
    rho, sigma, tau : float or array (S,)

    Returns
    -------
    array (points,) or (S, points), the held-out rows in row order.
    """
    one = np.ndim(r) == 1
    r = np.atleast_2d(np.asarray(r, dtype=float))
    keys, times = np.asarray(keys), occasion_times(times, column)
    test = np.asarray(test, dtype=bool)
    fixed = tau is None
    train = np.flatnonzero(~test)
    held = np.flatnonzero(test)
    out = np.empty((r.shape[0], len(held)))

    def marginal(rows):
        """``{unit key: (S,) log density of these rows}`` (fixed effects: the flat-prior
        integral itself, without the ``sqrt(T)`` of :func:`unit_logdensity`)."""
        if len(rows) == 0:
            return keys[:0], np.zeros((r.shape[0], 1))      # (never indexed as found)
        tl = Timeline.build(keys[rows], times[rows], column)
        lp = unit_logdensity(r[:, rows], tl, rho, sigma, tau)
        lp = np.atleast_2d(lp)
        if fixed:
            lp = lp - 0.5 * np.log(tl.T.astype(float))
        return tl.keys, lp

    base_keys, base = marginal(train)
    # the j-th held-out row of every unit at once: one Timeline per rank j
    tl_held = Timeline.build(keys[held], times[held], column)
    rank = np.arange(len(held)) - tl_held.starts[tl_held.codes]
    sorted_held = held[tl_held.order]
    for j in range(int(rank.max()) + 1 if len(held) else 0):
        pick = sorted_held[rank == j]
        k_j, joint = marginal(np.concatenate([train, pick]))
        lp = joint[:, np.searchsorted(k_j, keys[pick])]
        pos, has = _lookup(base_keys, keys[pick])
        lp = lp - np.where(has, base[:, pos], 0.0)
        if fixed:
            lp = np.where(has, lp, np.nan)
        out[:, np.searchsorted(held, pick)] = lp
    return out[0] if one else out


def _lookup(sorted_keys, query):
    """``(positions, found)`` of ``query`` in ``sorted_keys`` (positions clipped to a
    valid index where not found)."""
    if len(sorted_keys) == 0:
        return np.zeros(len(query), dtype=np.int64), np.zeros(len(query), dtype=bool)
    pos = np.minimum(np.searchsorted(sorted_keys, query), len(sorted_keys) - 1)
    return pos, sorted_keys[pos] == query


def simulate_errors(tl: Timeline, rho, sigma, rng):
    """Draws of stationary AR(1) errors on the rows of ``tl``, in the row order ``tl`` was
    built on: a unit's first row ``N(0, sigma^2)``, each later row
    ``phi e_prev + sigma sqrt(1 - phi^2) z`` with ``phi = rho^gap`` (the exact transition
    of the continuous-time AR(1) over the gap).

    Parameters
    ----------
    tl : Timeline
    rho, sigma : float or array (S,)
    rng : numpy Generator

    Returns
    -------
    array (S, n) (``S = 1`` for scalar parameters).
    """
    _check_rho(rho, tl)
    rho, sigma = _params(rho), _params(sigma)
    S = max(np.size(rho), np.size(sigma))
    z = rng.standard_normal((S, tl.n))
    phi = np.atleast_2d(np.where(tl.linked, np.power(rho, np.where(tl.linked, tl.gap, 1.0)),
                                 0.0)) * np.ones((S, 1))
    e = np.empty((S, tl.n))
    rank = np.arange(tl.n) - tl.starts[tl.codes]          # position within the unit
    first = rank == 0
    e[:, first] = z[:, first]
    for j in range(1, int(tl.T.max()) if tl.n else 0):
        at = np.flatnonzero(rank == j)
        ph = phi[:, at]
        e[:, at] = ph * e[:, at - 1] + np.sqrt(1.0 - ph ** 2) * z[:, at]
    e *= sigma
    back = np.empty_like(tl.order)
    back[tl.order] = np.arange(tl.n)
    return e[:, back]


def by_draw_blocks(fn, n_draws: int, n_rows: int, axis: int = 0, budget: int = 1 << 24):
    """``fn(slice)`` over consecutive blocks of draws, joined along ``axis``: the row-level
    functions of this module hold a (draws, rows) residual array, kept near ``budget``
    numbers per block."""
    step = max(1, budget // max(n_rows, 1))
    parts = [fn(slice(a, min(a + step, n_draws))) for a in range(0, n_draws, step)]
    return parts[0] if len(parts) == 1 else np.concatenate(parts, axis=axis)


# ---------------------------------------------------------------------------- data swap
_DATA_LEAVES = ("first", "link_start", "link_end", "link_cross")


def data_values(arrays: dict) -> dict:
    """The numbers of :meth:`AR1Stats.arrays` that change with the outcome, by name
    (``ar1_first``, ``ar1_link_start``, ..., ``ar1_cp_<i>`` per group): what a model may
    hold as shared data and swap for new data on the same rows (:func:`structure` equal)."""
    out = {f"ar1_{k}": np.asarray(arrays[k], dtype=float) for k in _DATA_LEAVES}
    for i, grp in enumerate(arrays["groups"]):
        out[f"ar1_cp_{i}"] = np.asarray(grp["cp"], dtype=float)
    return out


def with_values(arrays: dict, values: dict) -> dict:
    """``arrays`` with the entries of :func:`data_values` replaced by ``values`` (for
    example PyTensor shared variables of the same names)."""
    out = dict(arrays)
    for k in _DATA_LEAVES:
        out[k] = values[f"ar1_{k}"]
    out["groups"] = [{**grp, "cp": values[f"ar1_cp_{i}"]}
                     for i, grp in enumerate(arrays["groups"])]
    return out


def structure(arrays: dict) -> tuple:
    """What the shape of the density's expression depends on (rows, units, gap lengths,
    link patterns): two sets of statistics with the same structure differ only in
    :func:`data_values`, so a compiled model can swap one for the other."""
    def key(a):
        a = np.asarray(a)
        return (a.shape, a.tobytes())
    groups = tuple((key(g["count"]), key(g["T"]), key(g["index"]), key(g["links"]))
                   for g in arrays["groups"])
    return (int(arrays["n"]), int(arrays["n_units"]), key(arrays["gaps"]),
            key(arrays["link_count"]), groups)
