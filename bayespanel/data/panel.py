"""Panel: a validated long table with one row per unit and occasion."""

from __future__ import annotations

import re
import warnings
from typing import Iterable

import numpy as np
import pandas as pd

from .columns import check_column_names, describable, describe_frame, left_out_reason
from ..core.errors import DataHandlingWarning, PanelDataError

__all__ = ["Panel", "check_column_names"]


def _plain(v):
    return v.item() if isinstance(v, np.generic) else v


_DAY_MONTH = re.compile(r"\A\s*(\d{1,2})([/.-])(\d{1,2})\2(\d{4})\s*\Z")
_YEAR_FIRST = re.compile(r"\A\s*(\d{4})([/.-])(\d{1,2})\2(\d{1,2})\s*\Z")


def _text_occasions(col: pd.Series, name: str):
    """Occasions written as text that would sort out of order as text, read as what they
    are; None when the column is not text or sorts correctly as it is.

    Dates such as ``1/13/2003`` (month first) or ``13.1.2003`` (day first) are parsed
    when some value shows the order (a part above 12); when none does, the order is
    ambiguous and the column is refused. Year-first dates that are not zero-padded
    (``2003-1-5``) and whole numbers stored as text (``"9"``, ``"10"``) are parsed when
    their text order differs from their order in time. A ``DataHandlingWarning`` says
    what was read.
    """
    if not (pd.api.types.is_string_dtype(col) or pd.api.types.is_object_dtype(col)):
        return None
    values = pd.unique(col)
    if not all(isinstance(v, str) for v in values):
        return None
    text_order = np.argsort(np.asarray(values, dtype=object), kind="stable")

    def sorted_as_text(parsed) -> bool:
        ordered = np.asarray(parsed)[text_order]
        if np.issubdtype(ordered.dtype, np.datetime64):
            ordered = ordered.astype("datetime64[ns]").astype(np.int64)
        return bool(np.all(np.diff(ordered) > 0))

    def warn(what, example, shown):
        warnings.warn(
            f"time column {name!r} read as {what} ({example!r} is {shown}); as text the "
            "occasions would sort out of order", DataHandlingWarning, stacklevel=4)

    dm = [_DAY_MONTH.match(v) for v in values]
    if all(dm):
        first = np.array([int(m.group(1)) for m in dm])
        second = np.array([int(m.group(3)) for m in dm])
        if (first > 12).any() and not (second > 12).any():
            fmt, what, show = "%d{0}%m{0}%Y", "dates, day first (day/month/year)", first > 12
        elif (second > 12).any() and not (first > 12).any():
            fmt, what, show = "%m{0}%d{0}%Y", "dates, month first (month/day/year)", second > 12
        elif (first == second).all():  # 1/1/1987, 2/2/1988: either reading
            fmt, what, show = "%m{0}%d{0}%Y", "dates (month and day equal)", first > 0
        elif (first > 12).any():
            raise PanelDataError(
                f"time column {name!r} holds dates that are neither day/month/year nor "
                f"month/day/year throughout (e.g. {values[int(np.argmax(first > 12))]!r} and "
                f"{values[int(np.argmax(second > 12))]!r}); write them as year-month-day "
                "(2003-01-13)")
        else:
            sep = dm[0].group(2)
            readings = [pd.to_datetime(pd.Series(values), format=f.format(sep),
                                       errors="coerce").to_numpy()
                        for f in ("%m{0}%d{0}%Y", "%d{0}%m{0}%Y")]
            if all(not np.isnat(r).any() and sorted_as_text(r) for r in readings):
                return None  # either reading keeps the text order: left as text
            raise PanelDataError(
                f"time column {name!r} holds dates such as {values[0]!r} that read both as "
                "month/day/year and as day/month/year (no part is above 12), and as text "
                "they sort out of order; write them as year-month-day (2003-01-02) or "
                "convert the column to dates")
        sep = dm[0].group(2)
        try:
            dates = pd.to_datetime(pd.Series(values), format=fmt.format(sep))
        except (ValueError, TypeError) as exc:
            raise PanelDataError(f"time column {name!r}: cannot read {what}: {exc}") from None
        if sorted_as_text(dates.to_numpy()):
            return None  # the text order is the order in time: left as it is
        example = int(np.argmax(show))
        warn(what, values[example], dates[example].date().isoformat())
        return col.map(dict(zip(values, dates))).astype("datetime64[ns]")
    ymd = [_YEAR_FIRST.match(v) for v in values]
    if all(ymd):
        try:
            parsed_values = pd.to_datetime(
                pd.Series([f"{m.group(1)}-{m.group(3)}-{m.group(4)}" for m in ymd]),
                format="%Y-%m-%d")
        except (ValueError, TypeError) as exc:
            raise PanelDataError(f"time column {name!r}: cannot read the dates: {exc}") from None
        if sorted_as_text(parsed_values.to_numpy()):
            return None
        mapping = dict(zip(values, parsed_values))
        warn("dates (year-month-day)", values[0], mapping[values[0]].date().isoformat())
        return col.map(mapping).astype("datetime64[ns]")
    numbers = pd.to_numeric(pd.Series(values), errors="coerce")
    if numbers.notna().all() and np.all(numbers == np.round(numbers)):
        if sorted_as_text(numbers.to_numpy()):
            return None
        mapping = dict(zip(values, numbers.astype(np.int64)))
        warn("whole numbers", values[0], str(mapping[values[0]]))
        return col.map(mapping).astype(np.int64)
    return None


def _first_pair(df: pd.DataFrame, mask, unit: str, time: str) -> str:
    sel = df.loc[np.asarray(mask)]
    return f"{unit}={_plain(sel[unit].iloc[0])!r}, {time}={_plain(sel[time].iloc[0])!r}"


def _replay(caught):
    """Give again warnings recorded by ``warnings.catch_warnings(record=True)``, each
    attributed to the module, file and line that gave it and filtered as
    ``warnings.warn`` would have filtered it there (that module's registry)."""
    import sys

    for w in caught:
        module = registry = None
        for name, mod in list(sys.modules.items()):
            if getattr(mod, "__file__", None) == w.filename:
                module, registry = name, mod.__dict__.setdefault("__warningregistry__", {})
                break
        warnings.warn_explicit(w.message, w.category, w.filename, w.lineno,
                               module=module, registry=registry, source=w.source)


def _sort_order(df: pd.DataFrame, unit: str, time: str) -> np.ndarray | None:
    """Positions that sort ``df`` by unit, then occasion (stable); None if it is sorted.

    The order is pandas' own stable sort of the two key columns, so it is the order
    ``df.sort_values([unit, time], kind="mergesort")`` gives; only the two keys are read.
    """
    keys = df[[unit, time]].reset_index(drop=True)
    try:
        order = keys.sort_values([unit, time], kind="mergesort").index.to_numpy()
    except TypeError as exc:
        raise PanelDataError(
            f"cannot order the table by {unit!r} and {time!r} (mixed types?): {exc}"
        ) from None
    step = 1 << 16  # compare with 0, 1, 2, ... in slices (no n-sized temporaries)
    for a in range(0, len(order), step):
        if not np.array_equal(order[a:a + step], np.arange(a, min(a + step, len(order)))):
            return order.astype(np.int64, copy=False)
    return None


def _in_strict_order(df: pd.DataFrame, unit: str, time: str) -> bool:
    """True when both key columns hold numbers (or dates without a time zone) and every
    row comes after the one before it in (unit, occasion) order: the table is sorted and
    no unit-occasion pair appears twice, so the sort (:func:`_sort_order`) and the
    search for repeated pairs can be skipped. False says nothing (those run as before).
    Read in slices (no n-sized temporaries)."""
    keys = []
    for col in (unit, time):
        s = df[col]
        if pd.api.types.is_bool_dtype(s) or not (pd.api.types.is_integer_dtype(s)
                                                 or pd.api.types.is_float_dtype(s)
                                                 or pd.api.types.is_datetime64_dtype(s)):
            return False
        v = s.to_numpy()
        if v.dtype.kind not in "iufM":  # a nullable column kept as objects
            return False
        keys.append(v)
    u, t = keys
    step = 1 << 16
    for a in range(0, len(u) - 1, step):
        b = min(a + step, len(u) - 1)
        u0, u1, t0, t1 = u[a:b], u[a + 1:b + 1], t[a:b], t[a + 1:b + 1]
        if not ((u1 > u0) | ((u1 == u0) & (t1 > t0))).all():
            return False
    return True


class Panel:
    """A long table of units observed on several occasions, checked on the way in.

    Parameters
    ----------
    df : pandas.DataFrame
        One row per unit and occasion.
    unit, time : str
        Names of the columns identifying the unit and the occasion.

    Raises
    ------
    PanelDataError
        If ``unit`` or ``time`` is not a column, holds missing values, if a unit-occasion
        pair appears twice, if there are fewer than two units, or if a numeric column
        holds infinite values. The message names the column and the first offending
        unit and occasion.

    Notes
    -----
    Missing values in other columns are kept: each model drops the rows it cannot use
    (listwise deletion over the variables of its formula) and reports how many.

    Examples
    --------
    >>> import bayespanel as bp
    >>> df, truth = bp.datasets.clinic_panel(seed=1)
    >>> panel = bp.Panel(df, unit="clinic", time="quarter")
    >>> panel.n_units
    36
    """

    def __new__(cls, df=None, *args, **kwargs):
        # A Dask DataFrame takes the out-of-core path (bayespanel.data.sources.dask.DaskPanel).
        if hasattr(df, "npartitions") and hasattr(df, "to_delayed"):
            from .sources.dask import DaskPanel

            return DaskPanel(df, *args, **kwargs)
        return super().__new__(cls)

    def __init__(self, df, unit: str, time: str):
        if not isinstance(df, pd.DataFrame):
            if hasattr(df, "npartitions") and hasattr(df, "compute"):
                raise PanelDataError(
                    "a Dask DataFrame needs the out-of-core path: use "
                    "bayespanel.engines.dask.DaskPanel or Panel.from_parquet(..., engine='dask')"
                )
            raise PanelDataError(f"Panel needs a pandas DataFrame, got {type(df).__name__}")
        check_column_names(df.columns, unit, time)
        for role, col in (("unit", unit), ("time", time)):
            if col not in df.columns:
                raise PanelDataError(
                    f"{role} column {col!r} is not in the table; columns are: "
                    f"{', '.join(map(str, df.columns[:20]))}"
                )
        if unit == time:
            raise PanelDataError(f"unit and time must be different columns, both are {unit!r}")
        if df.columns.duplicated().any():
            dup = df.columns[df.columns.duplicated()][0]
            raise PanelDataError(f"column {dup!r} appears more than once in the table")
        if len(df) == 0:
            raise PanelDataError("the table has no rows")
        for role, col in (("unit", unit), ("time", time)):
            miss = df[col].isna().to_numpy()
            if miss.any():
                where = int(np.flatnonzero(miss)[0])
                raise PanelDataError(
                    f"{role} column {col!r} has {int(miss.sum())} missing value(s); first at "
                    f"row {_plain(df.index[where])!r}. Every row needs a unit and an occasion."
                )
        for role, col in (("unit", unit), ("time", time)):
            kind = pd.api.types.infer_dtype(df[col], skipna=True)
            if kind.startswith("mixed") and kind != "mixed-integer-float":
                types = sorted({type(v).__name__ for v in df[col]})
                raise PanelDataError(
                    f"{role} column {col!r} mixes value types ({', '.join(types)}), so equal-"
                    "looking labels such as 3 and '3' would count as different; convert the "
                    "column to one type")
        parsed = _text_occasions(df[time], time)
        if parsed is not None:  # one column replaced in a shallow copy (the caller's stays)
            df = df.assign(**{time: parsed})
        in_order = _in_strict_order(df, unit, time)
        dup = None if in_order else df.duplicated(subset=[unit, time], keep=False).to_numpy()
        if dup is not None and dup.any():
            raise PanelDataError(
                f"{int(dup.sum())} rows share a unit-occasion pair; the first is "
                f"{_first_pair(df, dup, unit, time)}. Each unit may appear once per occasion."
            )
        for col in df.columns:
            s = df[col]
            # only float (and complex) columns can hold an infinity; integers need no copy
            if col in (unit, time) or not (pd.api.types.is_float_dtype(s)
                                           or pd.api.types.is_complex_dtype(s)):
                continue
            kind = complex if pd.api.types.is_complex_dtype(s) else float
            vals = s.to_numpy(dtype=kind, na_value=np.nan)
            bad = np.isinf(vals)
            if bad.any():
                raise PanelDataError(
                    f"column {col!r} has {int(bad.sum())} infinite value(s); the first at "
                    f"{_first_pair(df, bad, unit, time)}. Replace them by missing values or "
                    "fix the source."
                )
        # the input is kept as it is (a shallow copy: pandas' copy-on-write keeps later
        # edits of the caller's frame out of it) with the order that sorts it by unit and
        # occasion (None when it is sorted already); nothing copies the whole table
        self._order = None if in_order else _sort_order(df, unit, time)
        self._df = df.copy(deep=False)
        self.unit = unit
        self.time = time
        counts = df.groupby(unit, sort=True, observed=True).size()
        if len(counts) < 2:
            raise PanelDataError(
                f"the panel has {len(counts)} unit in column {unit!r}; at least 2 are needed"
            )
        self._counts = counts
        # the last design built on this panel, its key and the warnings its build gave
        # (reused by the next call with the same formula; see design())
        self._last_design = None

    # ------------------------------------------------------------------ structure
    @property
    def data(self) -> pd.DataFrame:
        """The table, sorted by unit and occasion.

        Built on each call from the input and the sort order (a shallow copy when the input
        was sorted already, a sorted copy of every column otherwise); the panel itself
        keeps no sorted copy. Code that needs a few columns uses :meth:`sorted_columns`.
        """
        return self.sorted_columns(list(self._df.columns))

    @property
    def columns(self) -> pd.Index:
        """The columns of the table."""
        return self._df.columns

    @property
    def order(self) -> np.ndarray | None:
        """Positions of the input rows in (unit, occasion) order; None when the input is
        sorted already."""
        return None if self._order is None else self._order.copy()

    def sorted_columns(self, columns) -> pd.DataFrame:
        """Some columns of the table, sorted by unit and occasion (index labels kept)."""
        sub = self._df[list(columns)] if list(columns) != list(self._df.columns) else self._df
        if self._order is None:
            return sub.copy(deep=False)
        return sub.take(self._order)

    def sorted_column(self, column) -> pd.Series:
        """One column of the table, sorted by unit and occasion (index labels kept)."""
        s = self._df[column]
        return s.copy(deep=False) if self._order is None else s.take(self._order)

    @property
    def n_units(self) -> int:
        return int(len(self._counts))

    @property
    def n_rows(self) -> int:
        return int(len(self._df))

    @property
    def occasions(self) -> np.ndarray:
        """All occasions present in the table, sorted."""
        return np.sort(self._df[self.time].unique())

    @property
    def occasions_per_unit(self) -> pd.Series:
        """Number of rows (occasions) per unit."""
        return self._counts.copy()

    @property
    def is_balanced(self) -> bool:
        """True when every unit is observed on every occasion."""
        return bool((self._counts == len(self.occasions)).all())

    @property
    def singleton_units(self) -> list:
        """Units observed on one occasion only (they carry no within-unit information)."""
        return list(self._counts.index[self._counts == 1])

    @property
    def gaps(self) -> dict:
        """Occasions missing between each unit's first and last observed occasion."""
        occ = self.occasions
        pos = {v: i for i, v in enumerate(occ)}
        out = {}
        for u, times in self._df.groupby(self.unit, sort=True, observed=True)[self.time]:
            idx = np.array([pos[t] for t in times])
            span = idx.max() - idx.min() + 1
            if span > len(idx):
                missing = sorted(set(range(idx.min(), idx.max() + 1)) - set(idx))
                out[u] = [occ[m] for m in missing]
        return out

    def structure(self) -> dict:
        """A summary of the panel's shape: units, rows, occasions, balance, gaps, singletons."""
        counts = self._counts
        gaps = self.gaps
        return {
            "unit": self.unit,
            "time": self.time,
            "n_units": self.n_units,
            "n_rows": self.n_rows,
            "n_occasions": int(len(self.occasions)),
            "occasions_min": int(counts.min()),
            "occasions_median": float(counts.median()),
            "occasions_max": int(counts.max()),
            "balanced": self.is_balanced,
            "n_units_with_gaps": len(gaps),
            "n_singleton_units": len(self.singleton_units),
        }

    def __repr__(self) -> str:
        s = self.structure()
        bal = "balanced" if s["balanced"] else "unbalanced"
        return (f"Panel({s['n_units']} units of {self.unit!r} x {s['n_occasions']} occasions of "
                f"{self.time!r}, {s['n_rows']} rows, {bal})")

    # ------------------------------------------------------------------ describe
    def numeric_columns(self) -> list[str]:
        """Columns :meth:`describe` summarises: numbers (not complex), besides unit and time."""
        return [c for c in self._df.columns if c not in (self.unit, self.time)
                and describable(self._df[c].dtype)]

    def left_out_columns(self) -> dict:
        """Columns :meth:`describe` leaves out, each with the reason: text (with the first
        value that is not a number and where it is), dates, complex numbers, ..."""
        out = {}
        for c in self._df.columns:
            if c in (self.unit, self.time) or describable(self._df[c].dtype):
                continue
            s = self._df[c]
            reason = left_out_reason(s.dtype)
            if reason == "text":
                text = s.dropna()
                bad = text[pd.to_numeric(text.astype(str), errors="coerce").isna()]
                if bad.empty:
                    reason = "numbers stored as text"
                elif len(bad) == len(text):
                    reason = f"text, e.g. {_plain(bad.iloc[0])!r}"
                else:
                    where = _first_pair(self._df, s.index.isin([bad.index[0]]), self.unit,
                                        self.time)
                    reason = (f"text: {len(bad)} value(s) are not numbers, the first "
                              f"{_plain(bad.iloc[0])!r} at {where}")
            out[c] = reason
        return out

    def describe(self, columns: Iterable[str] | None = None) -> pd.DataFrame:
        """Decompose each numeric variable into its between-unit and within-unit parts.

        Returns one row per variable with: ``n`` (non-missing rows), ``n_missing``,
        ``mean``, ``sd_overall`` (SD over rows), ``sd_between`` (SD of the unit means, one
        value per unit), ``sd_within`` (SD of the deviations from the unit means, over
        rows), ``share_within`` (share of the variance, on the sum-of-squares scale, that
        lies within units) and ``varies_within`` (False when every unit holds one value).

        SDs use ``ddof=1``. Unit means are taken over each variable's non-missing rows.
        Each column is scaled by its largest magnitude before squaring, so values near
        1e300 (or 1e-300) give finite SDs. Without ``columns``, the columns left out (text,
        dates, complex numbers) are listed with the reason in ``attrs["left_out"]``.
        """
        left_out = None
        if columns is None:
            columns = self.numeric_columns()
            left_out = self.left_out_columns()
        else:
            columns = list(columns)
            for c in columns:
                if c not in self._df.columns:
                    raise PanelDataError(f"column {c!r} is not in the table")
                if not describable(self._df[c].dtype):
                    raise PanelDataError(
                        f"column {c!r} is not numeric (dtype {self._df[c].dtype}); describe() "
                        "summarises numeric columns"
                    )
        rows = []
        units = self.sorted_column(self.unit)
        for c in columns:
            x = self.sorted_column(c).astype(float)
            size = float(np.nanmax(np.abs(x.to_numpy()))) if x.notna().any() else 0.0
            unit_scale = size if np.isfinite(size) and size > 0 else 1.0
            x = x / unit_scale  # magnitudes <= 1: squares neither overflow nor vanish
            ok = x.notna()
            xv, uv = x[ok], units[ok]
            n = int(ok.sum())
            if n == 0:
                rows.append({"variable": c, "n": 0, "n_missing": int(len(x)), "mean": np.nan,
                             "sd_overall": np.nan, "sd_between": np.nan, "sd_within": np.nan,
                             "share_within": np.nan, "varies_within": False})
                continue
            means = xv.groupby(uv, observed=True).transform("mean")
            dev = xv - means
            unit_means = xv.groupby(uv, observed=True).mean()
            ss_total = float(((xv - xv.mean()) ** 2).sum())
            ss_within = float((dev ** 2).sum())
            scale = max(float(np.abs(xv).max()), 1.0 / unit_scale)
            varies = bool(np.sqrt(ss_within / max(n, 1)) > 1e-10 * scale)
            rows.append({
                "variable": c,
                "n": n,
                "n_missing": int((~ok).sum()),
                "mean": float(xv.mean()) * unit_scale,
                "sd_overall": float(xv.std(ddof=1)) * unit_scale if n > 1 else np.nan,
                "sd_between": (float(unit_means.std(ddof=1)) * unit_scale
                               if len(unit_means) > 1 else np.nan),
                "sd_within": float(np.sqrt(ss_within / (n - 1))) * unit_scale if n > 1 else np.nan,
                "share_within": ss_within / ss_total if ss_total > 0 else np.nan,
                "varies_within": varies,
            })
        return describe_frame(rows, left_out)

    # ------------------------------------------------------------------ design
    def design(self, formula: str, occasion_effects: bool = False,
               initial_conditions: bool = True):
        """Build the design matrices for ``formula`` on this panel (see :class:`Design`).

        The panel keeps the last design it built: a second call with the same formula and
        ``occasion_effects`` (as the reference fits and builders of one formula make)
        returns that design again, with the warnings its build gave repeated, instead of
        reading the rows again. A panel's table cannot change (pandas' copy-on-write keeps
        the caller's edits out of it), and a design is not changed by its users, so the
        result is the one a new build gives. One design is kept, so the memory held is
        at most one design's.
        """
        from .design import Design

        key = (formula, occasion_effects, initial_conditions) if (
            isinstance(formula, str) and type(occasion_effects) is bool
            and type(initial_conditions) is bool) else None
        last = self._last_design
        if key is None or last is None or last[0] != key:
            self._last_design = None  # the old design is not held while a new one is built
            caught = []
            try:
                with warnings.catch_warnings(record=True) as caught:
                    warnings.simplefilter("always")
                    design = Design.from_panel(self, formula, occasion_effects=occasion_effects,
                                               initial_conditions=initial_conditions)
            except BaseException:
                _replay(caught)  # the warnings given before the error, as without the cache
                raise
            last = (key, design, caught)
            if key is not None:
                self._last_design = last
        _replay(last[2])
        return last[1]

    @classmethod
    def from_file(cls, path, unit: str, time: str, **read_kwargs) -> "Panel":
        """Read a CSV or Parquet file into a Panel, with clear errors for unreadable files."""
        from .io import read_table

        return cls(read_table(path, **read_kwargs), unit=unit, time=time)

    @classmethod
    def from_parquet(cls, path, unit: str, time: str, engine: str = "pandas", **kwargs):
        """Read a Parquet file or folder; ``engine="dask"`` keeps it out of memory."""
        if engine == "pandas":
            return cls(pd.read_parquet(path, **kwargs), unit=unit, time=time)
        if engine == "dask":
            from .sources.dask import DaskPanel

            return DaskPanel.from_parquet(path, unit=unit, time=time, **kwargs)
        from ..core.errors import choices_error

        raise choices_error("engine", engine, ["pandas", "dask"])
