"""Sufficient statistics derived from others, with no pass over the rows (numpy only).

A design whose columns are linear in a row and in its unit mean (the Mundlak unit means,
the within and between parts of the hybrid model) has statistics that follow exactly
from those of ``[X, y]`` (:func:`augment`, :func:`augment_unit_cp`); a subset of the
columns keeps its statistics (:func:`select_columns`); and a merged
:class:`~bayespanel.core.suffstats.Partial` is finished into :class:`~bayespanel.core.suffstats.SuffStats`
without unit-level working copies (:func:`finalize_inplace`); :func:`from_design` gives
the statistics of any kind's columns from a design. The in-memory design and the
out-of-core engines both read these, so they sit beside :mod:`bayespanel.core.suffstats`,
below both.
"""

from __future__ import annotations

import numpy as np

from .suffstats import Partial, SuffStats

__all__ = ["augment", "augment_unit_cp", "select_columns", "finalize_inplace", "from_design"]


def augment(stats: SuffStats, A: np.ndarray, B: np.ndarray, names=None):
    """Sufficient statistics of rows ``A z_it + B zbar_i`` from those of ``z_it``.

    A design whose columns are linear in a row and in its unit mean (the Mundlak unit
    means, the within and between parts of the hybrid model) needs no second pass:
    deviations from the unit mean are ``A (z_it - zbar_i)``, so the within block is
    ``A W A'``; the unit means are ``(A + B) zbar_i``; and the total cross-products are
    the within block plus the ``T_i``-weighted cross-products of the unit means about
    the global mean (the analysis-of-variance decomposition). Exact in exact arithmetic.
    """
    C = A + B
    within = A @ stats.within @ A.T
    mean = C @ stats.mean
    dev = (stats.unit_mean - stats.mean) @ C.T
    total = within + (dev * stats.unit_count[:, None]).T @ dev
    part = Partial(int(stats.n), mean, np.zeros_like(mean), total, within,
                   stats.unit_keys, stats.unit_count, dev)
    return finalize_inplace(part, names=names)  # dev is ours: becomes unit_mean


def augment_unit_cp(unit_cp: np.ndarray, A: np.ndarray) -> np.ndarray:
    """Per-unit within cross-products of ``A z_it + B zbar_i``: ``A W_i A'``."""
    return np.einsum("ij,gjk,lk->gil", A, unit_cp, A)


def select_columns(stats: SuffStats, cols, names=None):
    """Sufficient statistics of a subset of the columns (``y`` must be among ``cols``)."""
    c = np.asarray(cols, dtype=np.int64)
    ix = np.ix_(c, c)
    return SuffStats(
        n=stats.n, n_units=stats.n_units, mean=stats.mean[c], total=stats.total[ix],
        within=stats.within[ix], unit_count=stats.unit_count, unit_mean=stats.unit_mean[:, c],
        lengths=stats.lengths, group_count=stats.group_count,
        group_mean=stats.group_mean[:, c], group_cp=stats.group_cp[:, c][:, :, c],
        unit_keys=stats.unit_keys, names=names)


def finalize_inplace(part: Partial, names=None, chunk: int = 1 << 16) -> SuffStats:
    """:func:`bayespanel.core.suffstats.finalize` without unit-level working copies.

    The piece is consumed: its ``offsets`` become the result's ``unit_mean`` (the
    reference point added in place) and its ``counts`` and ``keys`` are kept, not copied.
    Panel lengths come from a count of the lengths (no sort of the units), and the
    cross-products of the unit means about their group mean are accumulated over slices
    of ``chunk`` units (centred on the group mean first, as ``finalize`` does).
    """
    counts, off = part.counts, part.offsets
    N, p = off.shape
    hist = np.bincount(counts) if N else np.zeros(1, np.int64)
    lengths = np.flatnonzero(hist)
    D = len(lengths)
    gcount = hist[lengths].astype(np.int64)
    code = np.zeros(int(lengths[-1]) + 1 if D else 1, dtype=np.int64)
    code[lengths] = np.arange(D)
    gsum = np.zeros((D, p))
    for a in range(0, N, chunk):  # group sums of the unit means (about ref)
        g = code[counts[a:a + chunk]]
        for j in range(p):
            gsum[:, j] += np.bincount(g, weights=off[a:a + chunk, j], minlength=D)
    gmean_c = gsum / np.maximum(gcount, 1)[:, None] - part.shift  # about the global mean
    gcp = np.zeros((D, p, p))
    centre = gmean_c + part.shift  # group means about ref
    for a in range(0, N, chunk):
        g = code[counts[a:a + chunk]]
        dev = off[a:a + chunk] - centre[g]
        if D == 1:
            gcp[0] += dev.T @ dev
        else:
            for d in np.unique(g):
                sel = g == d
                gcp[d] += dev[sel].T @ dev[sel]
    off += part.ref  # the unit means, in place
    return SuffStats(
        n=int(part.n), n_units=int(N), mean=part.mean, total=part.m2.copy(),
        within=part.within_m2.copy(), unit_count=counts, unit_mean=off,
        lengths=lengths.astype(np.int64), group_count=gcount, group_mean=gmean_c + part.mean,
        group_cp=gcp, unit_keys=part.keys, names=list(names) if names is not None else None)


def from_design(design, kind: str = "random") -> SuffStats:
    """Sufficient statistics of ``[M, y]`` for ``M, _ = design.matrices(kind)``.

    Read from the statistics the :class:`~bayespanel.data.design.Design` computed once
    (``design.suffstats(kind)``); for ``"within"`` (demeaned time-varying columns) they
    are derived from those exactly, as for the Mundlak and within-between kinds. No
    ``n x k`` matrix is built.
    """
    if kind == "between":
        raise ValueError("the between kind has one row per unit; use kind='random'")
    if kind != "within":
        return design.suffstats(kind)
    A, B, labels = design._transform(kind)
    return augment(design.suffstats("random"), A, B, names=list(labels) + [design.outcome])
