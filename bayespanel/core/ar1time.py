"""The time axis of AR(1) errors: occasions as numbers and each unit's rows in time order
(:mod:`bayespanel.core.ar1`)."""

from __future__ import annotations

import numbers
from dataclasses import dataclass

import numpy as np

from .errors import PanelDataError

__all__ = ["occasion_times", "Timeline"]


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
