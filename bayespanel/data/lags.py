"""Lags within units: the ``lag(x)`` and ``lag(x, k)`` formula transform.

``lag(x, k)`` on the row of unit ``i`` at occasion ``t`` is the value of ``x`` on the row
of the same unit at occasion ``t - k`` of the panel's time axis. The time axis is read as
the AR(1) errors read it (:func:`bayespanel.core.ar1.occasion_times`: numbers, or an ordered
categorical numbered 0, 1, 2, ... in the order of its categories), so a lag never links
two rows across a gap: when occasion ``t - k`` of the unit is not in the table (before
its first occasion, or missing between two of its occasions) the lag is missing, and so
is it when ``x`` itself is missing there. The rows without a lag are then left out of the
estimation sample like any row with a missing value, and counted by reason
(:class:`LagReport`).

The transform is applied before formulaic sees the formula: each ``lag(...)`` becomes a
column of its own, labelled as written in the canonical form ``lag(x)`` / ``lag(x, 2)``,
computed here on the whole table in (unit, occasion) order. ``x`` may be a covariate or
the outcome (``y ~ lag(y) + x``); other transforms may take a lag (``log(lag(x))``), a lag
takes one column name (``lag(log(x))`` is refused: write ``log(lag(x))``).
"""

from __future__ import annotations

import re
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..core.errors import DataHandlingWarning, FormulaError, PanelDataError

__all__ = ["LagTerm", "LagReport", "Lagged", "find", "expand", "lag_values", "has_lag",
           "lag_label", "without_lags"]

_CALL = re.compile(r"(?<![\w.`])lag\s*\(")
_NAME = re.compile(r"[A-Za-z_]\w*\Z")
_WHOLE = re.compile(r"[+]?\d+\Z")


def lag_label(column: str, k: int) -> str:
    """The label of a lag: ``lag(x)`` for ``k = 1``, ``lag(x, k)`` beyond."""
    return f"lag({column})" if k == 1 else f"lag({column}, {k})"


@dataclass(frozen=True)
class LagTerm:
    """One lag asked for by a formula, and what it left undefined.

    Attributes
    ----------
    column, k, label : the lagged column, the lag order and the term's label.
    before_first : rows whose occasion ``t - k`` lies before the unit's first occasion.
    across_gap : rows whose occasion ``t - k`` is inside the unit's span but not observed.
    value_missing : rows whose occasion ``t - k`` is observed with ``column`` missing.
    """

    column: str
    k: int
    label: str
    before_first: int = 0
    across_gap: int = 0
    value_missing: int = 0

    @property
    def undefined(self) -> int:
        return self.before_first + self.across_gap + self.value_missing

    def to_record(self) -> dict:
        return {"label": self.label, "column": self.column, "k": self.k,
                "before_first_occasion": self.before_first, "across_gap": self.across_gap,
                "lagged_value_missing": self.value_missing, "undefined": self.undefined}


@dataclass(frozen=True)
class LagReport:
    """The lags of a design and the rows they left out of its estimation sample.

    ``n_rows_without_lag`` counts the table's rows on which at least one lag is undefined
    (each is dropped, whatever else is missing on it); the design's own
    ``dropped_by_column`` also lists each lag's label beside the other columns.
    """

    terms: tuple[LagTerm, ...]
    n_rows_without_lag: int
    n_input_rows: int
    time: str
    outcome_lags: tuple[str, ...] = field(default=())

    @property
    def has_lagged_outcome(self) -> bool:
        return bool(self.outcome_lags)

    def message(self) -> str:
        """One sentence for the console and the report."""
        parts = []
        for t in self.terms:
            why = [f"{n} {what}" for n, what in (
                (t.before_first, "before the unit's first occasion"),
                (t.across_gap, "across a gap"),
                (t.value_missing, f"with {t.column!r} missing at t - {t.k}")) if n]
            parts.append(f"{t.label}: {t.undefined} ({', '.join(why) or 'none'})")
        return (f"{self.n_rows_without_lag} of {self.n_input_rows} rows have no lag and are "
                f"left out (a lag is taken within each unit on {self.time!r} and never "
                f"across a gap): " + "; ".join(parts))

    def to_record(self) -> dict:
        return {"time": self.time, "n_rows_without_lag": self.n_rows_without_lag,
                "n_input_rows": self.n_input_rows,
                "lags": [t.to_record() for t in self.terms],
                "lagged_outcome": list(self.outcome_lags)}


@dataclass(frozen=True)
class Lagged:
    """A formula with its lags made columns: what :func:`expand` returns."""

    formula: str        # the formula with each lag(...) replaced by its quoted column
    frame: pd.DataFrame  # the table with the lag columns added (input row order)
    columns: tuple      # the table's columns and the lag columns
    report: LagReport


# ----------------------------------------------------------------------------- parsing
def _mask(text: str) -> str:
    """``text`` with backtick-quoted names and string literals blanked (same length), so
    that a call is only found where the formula makes one."""
    out, quote = [], None
    for ch in text:
        if quote is None:
            if ch in "`'\"":
                quote = ch
                out.append(ch)
            else:
                out.append(ch)
        else:
            out.append(ch if ch == quote else " ")
            if ch == quote:
                quote = None
    return "".join(out)


def _close(masked: str, start: int, formula: str) -> int:
    """Index of the parenthesis closing the one opened at ``start``."""
    depth = 0
    for i in range(start, len(masked)):
        if masked[i] == "(":
            depth += 1
        elif masked[i] == ")":
            depth -= 1
            if depth == 0:
                return i
    raise FormulaError(f"unbalanced '(' after lag in formula {formula!r}")


def _split_args(inner: str, masked_inner: str) -> list[str]:
    parts, depth, last = [], 0, 0
    for i, ch in enumerate(masked_inner):
        if ch == "(":
            depth += 1
        elif ch == ")":
            depth -= 1
        elif ch == "," and depth == 0:
            parts.append(inner[last:i])
            last = i + 1
    parts.append(inner[last:])
    return [p.strip() for p in parts]


def has_lag(formula) -> bool:
    """Whether ``formula`` calls ``lag(...)``."""
    return isinstance(formula, str) and bool(_CALL.search(_mask(formula)))


def find(formula: str, columns) -> list[tuple[int, int, str, int]]:
    """The lag calls of ``formula``: ``(start, end, column, k)`` for each, in order.

    Raises
    ------
    FormulaError
        Naming the call: a column that is not in the table, an argument that is not one
        column name, or ``k`` that is not a whole number from 1 up.
    """
    colset = set(map(str, columns))
    masked = _mask(formula)
    out = []
    for m in _CALL.finditer(masked):
        open_at = m.end() - 1
        end = _close(masked, open_at, formula)
        call = formula[m.start():end + 1]
        args = _split_args(formula[open_at + 1:end], masked[open_at + 1:end])
        if len(args) not in (1, 2) or not args[0]:
            raise FormulaError(
                f"{call} in formula {formula!r}: lag takes a column and an optional whole "
                "number of occasions, as in lag(x) or lag(x, 2)")
        name = args[0]
        if name.startswith("`") and name.endswith("`") and len(name) > 1:
            name = name[1:-1]
        elif not _NAME.match(name):
            raise FormulaError(
                f"{call} in formula {formula!r}: lag takes one column name, not {name!r}; "
                "apply other transforms outside it (log(lag(x)), not lag(log(x)); "
                "lag(x, 2), not lag(lag(x)))")
        if name not in colset:
            close = [c for c in colset if c.lower() == name.lower()]
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            raise FormulaError(f"unknown column {name!r} in {call} of formula "
                               f"{formula!r}{hint}")
        k = 1
        if len(args) == 2:
            text = args[1]
            if text.replace(" ", "").startswith("k="):
                text = text.split("=", 1)[1].strip()
            if not _WHOLE.match(text) or int(text) < 1:
                raise FormulaError(
                    f"{call} in formula {formula!r}: the lag k={text!r} must be a whole "
                    "number of occasions from 1 up (lag(x, 1) is the previous occasion)")
            k = int(text)
        out.append((m.start(), end + 1, name, k))
    return out


def without_lags(formula: str, columns) -> tuple[str, list[str]]:
    """``formula`` with each ``lag(...)`` replaced by ``1``, and the columns the lags read:
    the columns a formula uses, for code that screens it without making the lags."""
    if not has_lag(formula):
        return formula, []
    calls = find(formula, columns)
    text = formula
    for start, end, _, _ in reversed(calls):
        text = text[:start] + "1" + text[end:]
    return text, list(dict.fromkeys(name for _, _, name, _ in calls))


# ----------------------------------------------------------------------------- values
def lag_values(values, unit_codes, times, k: int):
    """``values`` lagged by ``k`` occasions within units, and why each lag is missing.

    Parameters
    ----------
    values : (n,) float array, rows sorted by unit and then occasion.
    unit_codes : (n,) int array, equal for the rows of one unit (sorted).
    times : (n,) whole numbers (int64), increasing within each unit.
    k : int >= 1

    Returns
    -------
    lagged : (n,) float, NaN where the lag is undefined.
    reason : (n,) int8: 0 defined, 1 before the unit's first occasion, 2 across a gap,
        3 the lagged row's value is missing.
    """
    values = np.asarray(values, dtype=float)
    codes = np.asarray(unit_codes, dtype=np.int64)
    t = np.asarray(times, dtype=np.int64)
    n = len(t)
    lagged = np.full(n, np.nan)
    reason = np.zeros(n, dtype=np.int8)
    if n == 0:
        return lagged, reason
    # rows sorted by (unit, time): search (unit, t - k) lexicographically
    first = np.r_[True, codes[1:] != codes[:-1]]
    first_time = t[np.maximum.accumulate(np.where(first, np.arange(n), 0))]
    target = t - k
    before = target < first_time
    # the row of (unit, t - k), found by hashing the pairs (no overflow for any times)
    index = pd.MultiIndex.from_arrays([codes, t])
    pos = index.get_indexer(pd.MultiIndex.from_arrays([codes, target]))
    found = ~before & (pos >= 0)
    lagged[found] = values[pos[found]]
    reason[before] = 1
    reason[~before & ~found] = 2
    miss = found & np.isnan(lagged)
    reason[miss] = 3
    return lagged, reason


def _whole_times(panel, column: str) -> np.ndarray:
    """The panel's occasions (sorted rows) as whole numbers on the AR(1) time axis."""
    from ..core.ar1 import occasion_times

    if not column:
        raise PanelDataError("lag() needs the panel's time column (Panel(df, unit=..., "
                             "time=...)): lags are taken on the time axis within units")
    try:
        t = occasion_times(panel.sorted_column(column), column)
    except PanelDataError as exc:
        raise PanelDataError(str(exc).replace("AR(1) errors need", "lag() needs")) from None
    r = np.round(t)
    bad = np.abs(t - r) > 1e-9 * np.maximum(1.0, np.abs(t))
    if bad.any():
        raise PanelDataError(
            f"time column {column!r} has occasions that are not whole numbers (such as "
            f"{t[bad][0]!r}); lag() counts occasions in whole steps of the time axis: "
            "number the occasions 0, 1, 2, ... (or use an ordered categorical)")
    return r.astype(np.int64)


def expand(formula: str, panel, warn: bool = True) -> Lagged | None:
    """The lags of ``formula`` made columns of the panel's table; None without lags.

    Each ``lag(x, k)`` is computed within units on the panel's time axis (a gap or the
    first occasion leaves it missing) and added to a copy of the table under its label
    (``lag(x)``, ``lag(x, 2)``); the formula refers to it quoted (```lag(x)```). A
    ``DataHandlingWarning`` counts the rows left without a lag, by reason.

    Raises
    ------
    FormulaError
        A lag call that is not ``lag(column)`` or ``lag(column, k)`` with ``k`` a whole
        number from 1, an unknown column, or a table column named like a lag.
    PanelDataError
        A time axis that cannot be read as whole occasions, a lagged column that is not
        numeric.
    """
    if not has_lag(formula):
        return None
    columns = list(map(str, panel.columns))
    calls = find(formula, columns)
    lhs_end = _mask(formula).find("~")
    lhs = formula[:max(lhs_end, 0)]
    for start, end, _, _ in reversed([c for c in calls if c[0] < lhs_end]):
        lhs = lhs[:start] + " " * (end - start) + lhs[end:]
    outcome_cols = {c for c in columns if f"`{c}`" in lhs or re.search(
        r"(?<![\w`])" + re.escape(c) + r"(?![\w`])", lhs)}
    rhs_calls = [c for c in calls if c[0] > lhs_end]
    for c in (panel.unit,):
        for _, _, name, _ in calls:
            if name == c:
                raise FormulaError(f"lag({name}) in formula {formula!r}: {name!r} identifies "
                                   "the units; lag a covariate or the outcome")
    times = _whole_times(panel, panel.time)
    order = panel._order
    units = panel.sorted_column(panel.unit)
    codes = pd.factorize(units)[0].astype(np.int64)
    frame = panel._df
    new_cols: dict[str, np.ndarray] = {}
    terms: list[LagTerm] = []
    without = np.zeros(len(times), dtype=bool)
    for _, _, name, k in calls:
        label = lag_label(name, k)
        if label in new_cols:
            continue
        if label in columns:
            raise FormulaError(f"the table has a column named {label!r}, the label of the "
                               f"lag in formula {formula!r}; rename the column")
        col = panel.sorted_column(name)
        if pd.api.types.is_bool_dtype(col):
            col = col.astype(float)
        if not pd.api.types.is_numeric_dtype(col) or pd.api.types.is_complex_dtype(col):
            raise PanelDataError(f"column {name!r} is not numeric (dtype {col.dtype}); "
                                 f"{label} needs numbers")
        vals, why = lag_values(col.to_numpy(dtype=float, na_value=np.nan), codes, times, k)
        without |= (why == 1) | (why == 2) | (why == 3)
        terms.append(LagTerm(name, k, label, int((why == 1).sum()), int((why == 2).sum()),
                             int((why == 3).sum())))
        out = vals
        if order is not None:
            out = np.empty_like(vals)
            out[order] = vals
        new_cols[label] = out
    # rewrite right to left so positions stay valid
    text = formula
    for start, end, name, k in reversed(calls):
        text = text[:start] + f"`{lag_label(name, k)}`" + text[end:]
    report = LagReport(tuple(terms), int(without.sum()), len(times), str(panel.time),
                       tuple(dict.fromkeys(lag_label(c, k) for _, _, c, k in rhs_calls
                                     if c in outcome_cols)))
    if warn and report.n_rows_without_lag:
        warnings.warn(report.message(), DataHandlingWarning, stacklevel=4)
    return Lagged(text, frame.assign(**new_cols), tuple(columns) + tuple(new_cols), report)
