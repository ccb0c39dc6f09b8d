"""Per-partition work of the out-of-core pass, and the merges of its pieces (numpy only).

Everything here runs on one pandas partition at a time (or on the small summaries two
partitions leave behind), so it is the same code whatever scheduler runs it. The
mathematics of the sufficient statistics is :mod:`bayespanel.core.suffstats`; this module
adds what a partitioned pass needs around it:

* the panel's structure (occasions per unit, duplicates, gaps) as per-unit bit masks over
  the occasions, merged with OR (a unit-occasion pair seen twice shows up as a row count
  above the number of distinct occasions);
* listwise deletion counted per column, and the covariate matrix built per partition
  (plain columns directly, row-wise transforms through formulaic);
* optional per-unit within cross-products of ``[X, y]``, for cluster-robust scores,
  merged across partitions with the same pairwise update as the totals (Chan, Golub and
  LeVeque 1979);
* the sufficient statistics of designs that add unit means of columns (Mundlak,
  within-between) are derived exactly from those of ``[X, y]``, with no second pass, by
  :func:`bayespanel.core.derived.augment`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ...core import suffstats
from ...core.errors import PanelDataError
from . import _merge
from ._parquet import ArrowPiece, as_frame

__all__ = ["StructurePiece", "DesignPiece"]


def _plain(v):
    return v.item() if isinstance(v, np.generic) else v


# ---------------------------------------------------------------------------- structure
def _check_ids(pdf, unit, time):
    for role, col in (("unit", unit), ("time", time)):
        miss = pdf[col].isna().to_numpy()
        if miss.any():
            where = int(np.flatnonzero(miss)[0])
            raise PanelDataError(
                f"{role} column {col!r} has missing value(s); first at row "
                f"{_plain(pdf.index[where])!r}. Every row needs a unit and an occasion.")


def _sorted_unique(values, what):
    if values.dtype.kind in "iu" and len(values):  # integers in a short range: a count
        lo, hi = values.min(), values.max()
        if int(hi) - int(lo) <= 4 * len(values) + 1024:
            seen = np.bincount(values - lo, minlength=int(hi) - int(lo) + 1)
            return (np.flatnonzero(seen) + lo).astype(values.dtype)
    try:
        return np.unique(values)
    except TypeError as exc:
        raise PanelDataError(f"cannot order the {what} (mixed types?): {exc}") from None


@dataclass
class StructurePiece:
    """Per-unit row counts and bit masks over ``occasions`` (``words`` uint64 per unit)."""

    n_rows: int
    keys: np.ndarray
    counts: np.ndarray
    occasions: np.ndarray
    masks: np.ndarray  # (units, words) uint64; bit j <-> occasions[j]


def _codes(keys):
    try:
        ukeys, codes = np.unique(keys, return_inverse=True)
    except TypeError as exc:
        raise PanelDataError(f"cannot order the units (mixed types?): {exc}") from None
    return ukeys, codes.ravel()


def _words(n_occasions):
    return max(1, -(-n_occasions // 64))


def structure_block(pdf, unit, time) -> StructurePiece:
    """Units, row counts and occasion masks of one partition (refuses missing ids)."""
    ids = _numbers(pdf, (unit, time))
    if ids is None:
        pdf = as_frame(pdf)
        _check_ids(pdf, unit, time)
        ids = pdf[unit].to_numpy(), pdf[time].to_numpy()
    return _structure(*ids)


def _numbers(piece, columns):
    """The columns of an :class:`ArrowPiece` as numpy arrays when all are numbers without
    missing values; else None (a pandas partition, or a column that needs pandas)."""
    if not isinstance(piece, ArrowPiece):
        return None
    out = []
    for c in columns:
        v = piece.numbers(c)
        if v is None:
            return None
        out.append(v)
    return out


def _structure(keys, tvals) -> StructurePiece:
    """Units, row counts and occasion masks of the id arrays of one partition."""
    occ = _sorted_unique(tvals, "occasions")
    masks = np.zeros((0, _words(len(occ))), dtype=np.uint64)
    if len(keys) == 0:
        return StructurePiece(0, keys, np.zeros(0, np.int64), occ, masks)
    runs = suffstats.sorted_groups(keys) if keys.dtype.kind in "iu" else None
    if runs is not None and len(occ) <= 64:  # units sorted, one word: OR bits over each run
        ukeys, counts, starts = runs
        masks = np.bitwise_or.reduceat(_bits(occ, tvals), starts)[:, None]
        return StructurePiece(len(keys), ukeys, counts, occ, masks)
    pos = _positions(occ, tvals)
    if runs is not None:  # units sorted (the usual layout): OR the bits over each run
        ukeys, counts, starts = runs
        masks = np.zeros((len(ukeys), _words(len(occ))), dtype=np.uint64)
        for w in range(masks.shape[1]):
            bits = np.left_shift(np.uint64(1), (pos % 64).astype(np.uint64))
            bits[(pos // 64) != w] = 0
            masks[:, w] = np.bitwise_or.reduceat(bits, starts)
        return StructurePiece(len(keys), ukeys, counts, occ, masks)
    ukeys, codes = _codes(keys)
    counts = np.bincount(codes, minlength=len(ukeys)).astype(np.int64)
    masks = np.zeros((len(ukeys), _words(len(occ))), dtype=np.uint64)
    for w in range(masks.shape[1]):
        sel = (pos // 64) == w
        bits = np.left_shift(np.uint64(1), (pos[sel] % 64).astype(np.uint64))
        np.bitwise_or.at(masks[:, w], codes[sel], bits)
    return StructurePiece(len(keys), ukeys, counts, occ, masks)


def _bits(occ, tvals):
    """The bit of each time value among at most 64 sorted occasions ``occ`` (uint64)."""
    one = np.uint64(1)
    if occ.dtype.kind in "iu" and tvals.dtype == occ.dtype:
        lo = occ[0]
        span = int(occ[-1]) - int(lo) + 1
        if span <= 4 * len(tvals) + 1024:  # a look-up table of bits, one gather
            table = np.zeros(span, dtype=np.uint64)
            table[occ - lo] = np.left_shift(one, np.arange(len(occ), dtype=np.uint64))
            return table[tvals - lo]
    return np.left_shift(one, _positions(occ, tvals).astype(np.uint64))


def _positions(occ, tvals):
    """Position of each time value among the sorted occasions ``occ``."""
    if len(occ) and occ.dtype.kind in "iu" and tvals.dtype == occ.dtype:
        lo = occ[0]
        span = int(occ[-1]) - int(lo) + 1
        if span <= 4 * len(tvals) + 1024:  # a look-up table instead of a binary search
            table = np.zeros(span, dtype=np.int64)
            table[occ - lo] = np.arange(len(occ))
            return table[tvals - lo]
    return np.searchsorted(occ, tvals)


def _remap(piece: StructurePiece, occasions: np.ndarray) -> np.ndarray:
    """The piece's masks re-expressed over a larger sorted set of occasions."""
    if len(piece.occasions) == len(occasions):
        return piece.masks
    pos = np.searchsorted(occasions, piece.occasions)
    out = np.zeros((len(piece.keys), _words(len(occasions))), dtype=np.uint64)
    one = np.uint64(1)
    for j, g in enumerate(pos):
        bit = (piece.masks[:, j // 64] >> np.uint64(j % 64)) & one
        out[:, g // 64] |= bit << np.uint64(g % 64)
    return out


def merge_structure(pieces, shared=None) -> StructurePiece:
    """Merge structure pieces: counts add and masks OR per unit (units may be split
    between pieces; pieces of files sorted by unit are concatenated, see _merge.chain).

    ``shared``: the merged ``(keys, counts)`` of design pieces whose structure shares its
    keys and counts with their statistics (no row dropped); used as they are.
    """
    full = [p for p in pieces if p.n_rows]
    if not full:
        return pieces[0]
    if len(full) == 1:
        return full[0]
    same = all(len(p.occasions) == len(full[0].occasions)
               and np.array_equal(p.occasions, full[0].occasions) for p in full[1:])
    occ = full[0].occasions if same else _sorted_unique(
        np.concatenate([p.occasions for p in full]), "occasions")
    n_rows = sum(p.n_rows for p in full)
    plan = _merge.chain([p.keys for p in full])
    if plan is not None:
        remapped = [_remap(p, occ) for p in full]
        masks = plan.concat(remapped)
        keys, counts = shared or (plan.concat([p.keys for p in full]),
                                  plan.concat([p.counts for p in full]))
        for j, r in plan.joined():
            if shared is None:
                counts[r] += full[j].counts[0]
            masks[r] |= remapped[j][0]
        return StructurePiece(n_rows, keys, counts, occ, masks)
    keys = np.concatenate([p.keys for p in full])
    ukeys, inv = _codes(keys)
    counts = np.bincount(inv, weights=np.concatenate([p.counts for p in full]),
                         minlength=len(ukeys)).astype(np.int64)
    allm = np.concatenate([_remap(p, occ) for p in full])
    masks = np.zeros((len(ukeys), allm.shape[1]), dtype=np.uint64)
    for w in range(allm.shape[1]):
        np.bitwise_or.at(masks[:, w], inv, allm[:, w])
    return StructurePiece(n_rows, ukeys, counts, occ, masks)


def observed_occasions(masks: np.ndarray) -> np.ndarray:
    """Number of distinct occasions per unit (popcount of the masks)."""
    return np.bitwise_count(masks).sum(axis=1).astype(np.int64)


def occasion_positions(mask_row: np.ndarray) -> np.ndarray:
    """Positions (into the sorted occasions) of the bits set in one unit's mask."""
    bits = np.unpackbits(mask_row.astype("<u8").view(np.uint8), bitorder="little")
    return np.flatnonzero(bits)


# ---------------------------------------------------------------------------- describe
@dataclass
class DescribePiece:
    """Per-column moments of a block of rows: ``groups`` of ``(columns, Partial)``, where
    the columns of one group were observed on the same rows, so they share one set of
    unit keys and counts (columns without missing values form one group)."""

    n_missing: np.ndarray
    groups: list
    maxabs: np.ndarray
    structure: StructurePiece | None = None

    def column(self, j: int) -> suffstats.Partial:
        """The moments of column ``j`` alone (its unit means copied out of its group)."""
        for cols, part in self.groups:
            if j in cols:
                i = cols.index(j)
                if len(cols) == 1:
                    return part
                c = [i]
                return suffstats.Partial(part.n, part.ref[c], part.shift[c],
                                         part.m2[np.ix_(c, c)], part.within_m2[np.ix_(c, c)],
                                         part.keys, part.counts, part.offsets[:, c])
        raise KeyError(j)

    def layout(self) -> tuple:
        return tuple(cols for cols, _ in self.groups)

    def singletons(self) -> list:
        return [((j,), self.column(j)) for j in range(len(self.n_missing))]


def describe_block(pdf, unit, columns, time=None) -> DescribePiece:
    """Per-column moments of one partition (and its structure when ``time`` is given)."""
    st = None if time is None else structure_block(pdf, unit, time)
    fast = _numbers(pdf, [unit] + list(columns))  # numbers read as arrays: no pandas
    if fast is None:
        pdf = as_frame(pdf)
    keys = fast[0] if fast else pdf[unit].to_numpy()
    n_missing, maxabs, complete, groups = [], [], [], []
    # column order: each column written and checked in one contiguous sweep, and the
    # compiled statistics read it best (the same results as from rows, to the bit)
    X = np.empty((len(pdf), len(columns)), order="F")
    for j, c in enumerate(columns):
        x = X[:, j]
        x[:] = fast[j + 1] if fast else pdf[c].to_numpy(dtype=float, na_value=np.nan)
        ok = ~np.isnan(x)
        if np.isinf(x).any():
            _check_inf(x[ok], as_frame(pdf).loc[ok], c, unit)
        n_ok = int(ok.sum())
        n_missing.append(len(x) - n_ok)
        seen = x if n_ok == len(x) else x[ok]
        maxabs.append(float(np.abs(seen).max()) if n_ok else 0.0)
        if n_ok == len(x):
            complete.append(j)
        else:
            with np.errstate(over="ignore", invalid="ignore", under="ignore"):
                groups.append(((j,), suffstats.partial_inplace(seen[:, None].copy(),
                                                               keys[ok])))
    if complete:
        Z = np.asfortranarray(X[:, complete]) if len(complete) < len(columns) else X
        # a column beyond 1e100 in magnitude overflows here; describe leaves it out by name
        with np.errstate(over="ignore", invalid="ignore", under="ignore"):
            groups.append((tuple(complete), suffstats.partial_inplace(Z, keys)))
    groups.sort(key=lambda g: g[0])
    return DescribePiece(np.asarray(n_missing, np.int64), groups, np.asarray(maxabs), st)


def _merge_optional(pieces):
    sts = [p.structure for p in pieces]
    return None if sts[0] is None else merge_structure(sts)


def merge_describe(pieces) -> DescribePiece:
    """Merge describe pieces group by group when their columns group alike in every
    piece (the usual case: no missing values), else column by column."""
    layout = pieces[0].layout()
    if all(p.layout() == layout for p in pieces[1:]):
        per_piece = [p.groups for p in pieces]
    else:
        layout = tuple((j,) for j in range(len(pieces[0].n_missing)))
        per_piece = [p.singletons() for p in pieces]
    with np.errstate(over="ignore", invalid="ignore", under="ignore"):  # see describe_block
        groups = [(cols, _merge.merge_parts([g[i][1] for g in per_piece])[0])
                  for i, cols in enumerate(layout)]
    return DescribePiece(sum(p.n_missing for p in pieces), groups,
                         np.max([p.maxabs for p in pieces], axis=0), _merge_optional(pieces))


def _check_inf(x, sub, column, unit, time=None):
    bad = np.isinf(x)
    if bad.any():
        r = int(np.flatnonzero(bad)[0])
        where = f"{unit}={_plain(sub[unit].iloc[r])!r}"
        if time is not None:
            where += f", {time}={_plain(sub[time].iloc[r])!r}"
        raise PanelDataError(
            f"column {column!r} has {int(bad.sum())} infinite value(s) in this partition; the "
            f"first at {where}. Replace them by missing values or fix the source.")


# ---------------------------------------------------------------------------- design pass
@dataclass(frozen=True)
class BlockSpec:
    """What every partition needs to build its rows of ``[X, y]`` (picklable)."""

    unit: str
    time: str
    outcome: str
    used: tuple            # columns whose missing values drop a row
    terms: tuple           # covariate names, in order
    plain: tuple | None    # per term: column name or None for the intercept (fast path)
    rhs: str               # formula right-hand side (slow path through formulaic)
    occasions: tuple = ()  # occasions given an indicator (occasion effects)
    unit_cp: bool = False  # collect per-unit within cross-products
    structure: bool = False  # also summarise the panel's structure (all rows)
    outcome_expr: str | None = None  # a transformed outcome (log(gsp)); None: the column


@dataclass
class DesignPiece:
    """What one partition (or a merge of several) leaves behind."""

    n_input: int
    missing: np.ndarray     # per used column
    n_dropped: int
    maxabs: np.ndarray      # per column of [X, y]
    part: suffstats.Partial
    unit_cp: np.ndarray | None = field(default=None)  # (units, p, p) within cross-products
    structure: StructurePiece | None = None


def _plain_columns(sub, spec: BlockSpec) -> list:
    """The plain covariate columns as arrays of numbers (``None`` for the intercept)."""
    return [None if c is None else _floats(sub, c) for c in spec.plain]


def _floats(sub, c) -> np.ndarray:
    """Column ``c`` as numbers (float64, missing values as NaN; an :class:`ArrowPiece`'s
    complete numeric columns as they are, which convert to the same float64 values)."""
    if isinstance(sub, ArrowPiece):
        v = sub.numbers(c)
        if v is not None:
            return v
    return as_frame(sub)[c].to_numpy(dtype=float, na_value=np.nan)


def _values(sub, c) -> np.ndarray:
    """Column ``c`` as a numpy array (an :class:`ArrowPiece`'s numbers without pandas)."""
    v = sub.numbers(c) if isinstance(sub, ArrowPiece) else None
    return as_frame(sub)[c].to_numpy() if v is None else v


def _build_Z(sub, spec: BlockSpec, src=None, order="C") -> np.ndarray:
    """``[X, y]`` of the kept rows as one float64 array in ``order`` (``src``: the plain
    columns when already converted)."""
    n, k = len(sub), len(spec.terms)
    Z = np.empty((n, k + 1), order=order)
    if spec.plain is not None:
        src = _plain_columns(sub, spec) if src is None else src
        step = max(n, 1) if order == "F" else _FILL_ROWS  # C: row blocks stay in cache
        for a in range(0, n, step):
            for j, v in enumerate(src):
                Z[a:a + step, j] = 1.0 if v is None else v[a:a + step]
    else:
        from formulaic import Formula

        from ..formula import safe_context

        mm = Formula(spec.rhs).get_model_matrix(
            as_frame(sub).reset_index(drop=True), context=safe_context(), ensure_full_rank=False,
            na_action="raise")
        got = [str(c) for c in mm.columns]
        if got != list(spec.terms[:len(got)]) or len(got) + len(spec.occasions) != k:
            raise PanelDataError(f"the formula gave columns {got} on one partition, expected "
                                 f"{list(spec.terms)}")
        Z[:, :len(got)] = np.asarray(mm, dtype=float)
    if spec.occasions:
        tv = _values(sub, spec.time)
        k0 = k - len(spec.occasions)
        for j, o in enumerate(spec.occasions):
            Z[:, k0 + j] = tv == o
    if spec.outcome_expr is None:
        Z[:, k] = _floats(sub, spec.outcome)
    else:
        from ..formula import outcome_values

        Z[:, k] = outcome_values(spec.outcome_expr, as_frame(sub))
    return Z


#: rows per block when the columns are written into ``[X, y]``
_FILL_ROWS = 8192


def _complete_fast(pdf, spec: BlockSpec, order="F"):
    """``(Z, maxabs)`` of a partition whose used columns are all columns of ``[X, y]`` as
    they are (no transform) and all complete and finite, checked by each column's minimum
    and maximum before the columns are interleaved into ``Z`` (in ``order``; F, column
    order, is the statistics' best); None when the partition needs :func:`complete_rows`
    (a missing or infinite value, which it drops or names, or a transform)."""
    if spec.plain is None or spec.outcome_expr is not None:
        return None
    if not set(spec.used) <= {c for c in spec.plain if c is not None} | {spec.outcome}:
        return None
    src = _plain_columns(pdf, spec)
    y = _floats(pdf, spec.outcome)
    # each column's range in one contiguous sweep (numpy's vectorised min and max, which
    # carry a NaN or an infinity into lo or hi) before the columns are interleaved
    maxabs = np.empty(len(src) + len(spec.occasions) + 1)
    for j, v in enumerate(src + [None] * len(spec.occasions) + [y]):
        if v is None:
            continue
        lo, hi = (float(v.min()), float(v.max())) if len(v) else (0.0, 0.0)
        if not (np.isfinite(lo) and np.isfinite(hi)):
            return None
        maxabs[j] = max(abs(lo), abs(hi))
    Z = _build_Z(pdf, spec, src, order=order)
    for j, c in enumerate(spec.plain):
        if c is None:
            maxabs[j] = 1.0 if len(Z) else 0.0
    k0 = len(src)
    for j in range(len(spec.occasions)):
        maxabs[k0 + j] = float(Z[:, k0 + j].max()) if len(Z) else 0.0
    return Z, maxabs


def complete_rows(pdf, spec: BlockSpec):
    """Listwise deletion and ``[X, y]`` of one partition: ``(sub, keep, missing, Z)`` with
    the kept rows ``sub`` (pandas), the mask ``keep``, missing values per used column, and
    ``Z`` (one C-ordered float64 array); refuses infinite or non-finite covariates."""
    pdf = as_frame(pdf)
    used = list(spec.used)
    miss = pdf[used].isna().to_numpy() if used else np.zeros((len(pdf), 0), bool)
    missing = miss.sum(axis=0).astype(np.int64)
    keep = ~miss.any(axis=1)
    sub = pdf if keep.all() else pdf.loc[keep]
    for c in used:
        if c != spec.time and pd.api.types.is_numeric_dtype(sub[c]):
            _check_inf(sub[c].to_numpy(dtype=float), sub, c, spec.unit, spec.time)
    Z = _build_Z(sub, spec)
    if spec.outcome_expr is not None and not np.all(np.isfinite(Z[:, -1])):
        r = int(np.flatnonzero(~np.isfinite(Z[:, -1]))[0])
        raise PanelDataError(
            f"the outcome {spec.outcome!r} is not finite ({float(Z[r, -1])!r}) at {spec.unit}="
            f"{_plain(sub[spec.unit].iloc[r])!r}, {spec.time}={_plain(sub[spec.time].iloc[r])!r}"
            " (a transform such as log of a value that is not positive?)")
    if Z.size and not np.all(np.isfinite(Z[:, :-1])):
        bad = int(np.flatnonzero(~np.isfinite(Z[:, :-1]).all(axis=0))[0])
        r = int(np.flatnonzero(~np.isfinite(Z[:, bad]))[0])
        raise PanelDataError(
            f"term {spec.terms[bad]!r} is not finite at {spec.unit}="
            f"{_plain(sub[spec.unit].iloc[r])!r}, {spec.time}={_plain(sub[spec.time].iloc[r])!r}"
            " (a transform such as log of a non-positive value?)")
    return sub, keep, missing, Z


def rows_block(pdf, spec: BlockSpec, columns, block, shared=None):
    """``block(rows, shared)`` on the complete rows of one partition, as a
    :class:`~bayespanel.data.sources.RowBlock` in the design's kept ``columns`` of ``[X, y]``
    (all when ``None``)."""
    from .memory import RowBlock

    fast = _complete_fast(pdf, spec, order="C")  # every row complete: no deletion
    sub, Z = (pdf, fast[0]) if fast is not None else complete_rows(pdf, spec)[::3]
    if columns is not None:
        Z = np.ascontiguousarray(Z[:, list(columns)])
    return block(RowBlock(units=_values(sub, spec.unit), time=_values(sub, spec.time), Z=Z),
                 shared)


def design_block(pdf, spec: BlockSpec) -> DesignPiece:
    """Rows of one partition: listwise deletion, ``[X, y]``, its :class:`Partial` (and the
    partition's structure, over all its rows, when ``spec.structure``)."""
    st = structure_block(pdf, spec.unit, spec.time) if spec.structure else None
    fast = _complete_fast(pdf, spec)
    if fast is not None:  # every row complete
        sub, (Z, maxabs) = pdf, fast
        missing, n_dropped = np.zeros(len(spec.used), np.int64), 0
    else:
        sub, keep, missing, Z = complete_rows(pdf, spec)
        maxabs = np.abs(Z).max(axis=0) if len(Z) else np.zeros(Z.shape[1])
        n_dropped = int((~keep).sum())
    keys = _values(sub, spec.unit)
    Zrows = Z.copy() if spec.unit_cp else None
    part = suffstats.partial_inplace(Z, keys)
    if st is not None and n_dropped == 0 and len(st.keys) == len(part.keys):
        st.keys, st.counts = part.keys, part.counts  # the same units and counts: share them
    ucp = None if Zrows is None else _unit_cp(Zrows, keys, part)
    return DesignPiece(len(pdf), missing, n_dropped, maxabs, part, ucp, st)


def _unit_cp(Z, keys, part) -> np.ndarray:
    """Per-unit within cross-products ``sum_t (z_t - zbar_i)(z_t - zbar_i)'`` (units, p, p)."""
    p = Z.shape[1]
    out = np.zeros((len(part.keys), p, p))
    if len(Z) == 0:
        return out
    codes = np.searchsorted(part.keys, keys)
    D = (Z - part.ref) - part.offsets[codes]
    for a in range(p):
        for b in range(a, p):
            v = np.bincount(codes, weights=D[:, a] * D[:, b], minlength=len(part.keys))
            out[:, a, b] = v
            out[:, b, a] = v
    return out


def merge_design(pieces) -> DesignPiece:
    """Merge the pieces of several partitions (units may be split between them)."""
    cps = [p.unit_cp for p in pieces] if pieces[0].unit_cp is not None else None
    part, ucp = _merge.merge_parts([p.part for p in pieces], cps)
    st = None
    if pieces[0].structure is not None:
        sts = [p.structure for p in pieces]
        same = all(_shares_units(p) for p in pieces) and _merge.chain(
            [p.part.keys for p in pieces if p.part.n]) is not None
        st = merge_structure(sts, shared=(part.keys, part.counts) if same else None)
    return DesignPiece(sum(p.n_input for p in pieces), sum(p.missing for p in pieces),
                       sum(p.n_dropped for p in pieces),
                       np.max([p.maxabs for p in pieces], axis=0), part, ucp, st)


def _shares_units(piece: DesignPiece) -> bool:
    """Whether the piece's structure holds the very key and count arrays of its
    statistics (every row kept), or both are empty."""
    st, part = piece.structure, piece.part
    if part.n == 0:
        return st.n_rows == 0
    return st.keys is part.keys and st.counts is part.counts


#: the blocks that take an :class:`ArrowPiece` as it is (the others get pandas)
ARROW_BLOCKS = (structure_block, describe_block, design_block, rows_block)
