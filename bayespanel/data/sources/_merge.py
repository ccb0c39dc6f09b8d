"""Merging per-unit summaries of many partitions with little memory (numpy only).

Each partition leaves per-unit arrays (row counts, unit means about a reference point,
optionally per-unit cross-products or occasion masks) keyed by its sorted unique units.
:func:`bayespanel.core.suffstats.merge` merges two such pieces for any overlap of their units:
it concatenates the keys, sorts them (``np.unique``) and regroups every array, so each
merge holds several unit-level arrays at once. Panel files are usually sorted by unit,
and then the pieces of consecutive partitions do not overlap, or share only the unit
split between them. :func:`chain` finds an order of the pieces in which their keys,
concatenated, are sorted and repeat only where a piece begins with the unit the pieces
before it ended with; the merge is then one copy of each array into its place, plus a
pairwise update (Chan, Golub and LeVeque 1979) of the few units that were split. Other
layouts (shuffled rows, unsorted files) take the general path of ``suffstats.merge``.

References
----------
.. [1] Chan, T. F., Golub, G. H. and LeVeque, R. J. (1979). Updating formulae and a pairwise
   algorithm for computing sample variances. Technical report STAN-CS-79-773, Stanford.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from functools import reduce

import numpy as np

from ...core import suffstats
from ...core.suffstats import Partial

__all__ = ["Chain", "chain", "merge_parts", "merge_unit_cp"]


@dataclass(frozen=True)
class Chain:
    """How pieces concatenate: ``order`` of the pieces, ``joins[j]`` whether piece
    ``order[j]`` begins with the unit that ends the output so far (that row is merged,
    not copied), ``starts[j]`` the output row of its first copied unit, ``size`` the
    number of distinct units."""

    order: tuple
    joins: tuple
    starts: tuple
    size: int

    def concat(self, arrays):
        """Rows of ``arrays`` (one per piece, units on the first axis) in output order,
        the first row of each joining piece left out (one allocation of the output)."""
        first = arrays[self.order[0]]
        dtype = np.result_type(*[arrays[j].dtype for j in self.order])
        out = np.empty((self.size,) + first.shape[1:], dtype=dtype)
        for j, s, joins in zip(self.order, self.starts, self.joins):
            a = arrays[j][1:] if joins else arrays[j]
            out[s:s + len(a)] = a
        return out

    def joined(self):
        """``(piece, output row)`` of each first unit that joins the row before it."""
        return [(j, s - 1) for j, s, joins in zip(self.order, self.starts, self.joins) if joins]


def chain(keys) -> Chain | None:
    """The :class:`Chain` of pieces with these sorted unique ``keys``, or ``None`` if their
    units overlap other than at the boundaries of an order (the general merge then)."""
    live = [j for j, k in enumerate(keys) if len(k)]
    if not live:
        return None
    try:
        order = sorted(live, key=lambda j: (keys[j][0], keys[j][-1]))
        joins, starts, size, last = [], [], 0, None
        for j in order:
            k = keys[j]
            join = last is not None and bool(k[0] == last)
            if last is not None and not join and not bool(last < k[0]):
                return None
            joins.append(join)
            starts.append(size)
            size += len(k) - join
            last = k[-1]
    except TypeError:  # keys of types that do not order: the general path reports it
        return None
    return Chain(tuple(order), tuple(joins), tuple(starts), size)


def _totals(parts) -> Partial:
    """Merged totals (``n``, ``shift``, ``m2``, ``within_m2`` about the first piece's
    reference point) without the units: ``suffstats.merge`` on the pieces stripped of
    their unit arrays, so the pairwise update is written once."""
    def strip(p):
        return replace(p, keys=p.keys[:0], counts=p.counts[:0], offsets=p.offsets[:0])

    return reduce(suffstats.merge, [strip(p) for p in parts])


def merge_parts(parts, unit_cp=None):
    """Merge the :class:`~bayespanel.core.suffstats.Partial` of several pieces (and, when given,
    their per-unit within cross-products ``unit_cp``, aligned with each piece's keys).

    Returns ``(Partial, unit_cp or None)``. Pieces whose units form a :func:`chain` are
    concatenated; any other overlap goes through ``suffstats.merge`` pairwise.
    """
    idx = [j for j, p in enumerate(parts) if p.n > 0]
    if not idx:
        return parts[0], (None if unit_cp is None else unit_cp[0])
    parts = [parts[j] for j in idx]
    cps = None if unit_cp is None else [unit_cp[j] for j in idx]
    if len(parts) == 1:
        return parts[0], (None if cps is None else cps[0])
    plan = chain([p.keys for p in parts])
    if plan is None:
        return _merge_general(parts, cps)
    first = parts[plan.order[0]]
    tot = _totals([parts[j] for j in plan.order])
    keys = plan.concat([p.keys for p in parts])
    counts = plan.concat([p.counts for p in parts])
    offsets = plan.concat([p.offsets for p in parts])
    for j, s, join in zip(plan.order, plan.starts, plan.joins):
        d = parts[j].ref - first.ref  # re-express about the first piece's reference point
        if np.any(d):
            offsets[s:s + len(parts[j].keys) - join] += d
    cp = None if cps is None else plan.concat(cps)
    within = tot.within_m2.copy()
    for j, r in plan.joined():  # a unit split between pieces: pairwise update
        q = parts[j]
        n1, n2 = counts[r], q.counts[0]
        delta = (q.offsets[0] + (q.ref - first.ref)) - offsets[r]
        n = n1 + n2
        extra = np.outer(delta, delta) * (n1 * n2 / n)
        within += extra
        offsets[r] += delta * (n2 / n)
        counts[r] = n
        if cp is not None:
            cp[r] += cps[j][0] + extra
    part = Partial(tot.n, tot.ref, tot.shift, tot.m2, within, keys, counts, offsets)
    return part, cp


def _merge_general(parts, cps):
    """Pairwise ``suffstats.merge`` in the given order (units may overlap arbitrarily)."""
    out, cp = parts[0], None if cps is None else cps[0]
    for q, qcp in zip(parts[1:], cps[1:] if cps is not None else [None] * len(parts)):
        merged = suffstats.merge(out, q)
        if cp is not None:
            cp = merge_unit_cp(out, cp, q, qcp, merged)
        out = merged
    return out, cp


def merge_unit_cp(pa: Partial, cpa, pb: Partial, cpb, merged: Partial):
    """Per-unit cross-products of two pieces (any overlap of their units): fragments of a
    unit combine with the between-fragment term ``sum_f n_f (m_f - m)(m_f - m)'`` (Chan,
    Golub and LeVeque 1979)."""
    if pa.n == 0:
        return cpb
    if pb.n == 0:
        return cpa
    cps = np.concatenate([cpa, cpb])
    counts = np.concatenate([pa.counts, pb.counts])
    offsets = np.concatenate([pa.offsets, pb.offsets + (pb.ref - pa.ref)])
    inv = np.searchsorted(merged.keys, np.concatenate([pa.keys, pb.keys]))
    dev = offsets - (merged.offsets + (merged.ref - pa.ref))[inv]
    cps += counts[:, None, None] * dev[:, :, None] * dev[:, None, :]
    order = np.argsort(inv, kind="stable")   # every merged unit has >= 1 fragment
    inv = inv[order]
    starts = np.flatnonzero(np.concatenate([[True], inv[1:] != inv[:-1]]))
    return np.add.reduceat(cps[order], starts, axis=0)
