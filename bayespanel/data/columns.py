"""What a table's columns may be, and how they are described, for both kinds of panel.

The in-memory :class:`~bayespanel.data.panel.Panel` and the out-of-core
:class:`~bayespanel.data.sources.dask.DaskPanel` check the names of a table's columns and
describe its variables the same way; the pieces they share live here, below both.
"""

from __future__ import annotations

import pandas as pd

from ..core.errors import PanelDataError

__all__ = ["check_column_names", "describe_frame", "describable", "left_out_reason"]


def check_column_names(columns, unit, time) -> None:
    """Refuse what cannot name a column: a unit or time that is not text (a list, a
    number), columns in several levels (a MultiIndex) and column names that are not text
    (formulas and outputs name columns by text)."""
    for role, col in (("unit", unit), ("time", time)):
        if not isinstance(col, str):
            raise PanelDataError(
                f"{role} must be the name of one column (text), got {type(col).__name__} "
                f"{col!r}")
    if isinstance(columns, pd.MultiIndex):
        raise PanelDataError(
            f"the table's columns have {columns.nlevels} levels (a MultiIndex, e.g. "
            f"{columns[0]!r}); join them into single names first, e.g. "
            "df.columns = ['_'.join(map(str, c)) for c in df.columns]")
    bad = [c for c in columns if not isinstance(c, str)]
    if bad:
        raise PanelDataError(
            f"column names must be text; {bad[0]!r} is a {type(bad[0]).__name__}: rename "
            "the columns, e.g. df.columns = df.columns.astype(str)")


def describe_frame(rows, left_out=None) -> pd.DataFrame:
    """The table :meth:`Panel.describe` returns (also the out-of-core one): one row per
    variable, and ``attrs["left_out"]`` when given."""
    out = pd.DataFrame(rows, columns=["variable", "n", "n_missing", "mean", "sd_overall",
                                      "sd_between", "sd_within", "share_within",
                                      "varies_within"]).set_index("variable")
    if left_out is not None:
        out.attrs["left_out"] = left_out
    return out


def describable(dtype) -> bool:
    """True for the columns :meth:`Panel.describe` summarises: real numbers and booleans."""
    return pd.api.types.is_numeric_dtype(dtype) and not pd.api.types.is_complex_dtype(dtype)


def left_out_reason(dtype) -> str:
    """Why :meth:`Panel.describe` leaves a column of this type out (``"text"`` for text and
    mixed columns, which :meth:`Panel.left_out_columns` details)."""
    if pd.api.types.is_complex_dtype(dtype):
        return "complex numbers"
    if pd.api.types.is_datetime64_any_dtype(dtype) or pd.api.types.is_timedelta64_dtype(dtype):
        return "dates or times"
    if isinstance(dtype, pd.CategoricalDtype):
        return "categories"
    return "text"
