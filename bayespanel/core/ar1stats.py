"""The AR(1) statistics in one mergeable pass: :func:`partial` summarises a block of rows,
:func:`merge` joins two blocks, :func:`finalize` groups the units by link pattern
(:mod:`bayespanel.core.ar1` describes the statistics and the density they feed)."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .ar1time import Timeline, _snap
from .errors import PanelDataError

__all__ = ["AR1Partial", "AR1Group", "AR1Stats", "partial", "merge", "finalize", "compute"]


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
