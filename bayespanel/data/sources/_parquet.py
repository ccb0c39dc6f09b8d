"""Reading the partitions of a Parquet panel with pyarrow, straight to the arrays a pass
needs.

``dask.dataframe.read_parquet`` plans the partitions (which file, which row groups) and
gives the panel its columns and dtypes; this module reads each planned partition with
``pyarrow.parquet`` itself, as an :class:`ArrowPiece`: the Arrow table of the columns a
pass asks for. A pass whose columns are numbers without missing values takes them as
numpy arrays (zero-copy where Arrow's buffer allows), with no pandas DataFrame in between;
every other case (missing values, strings, an infinite value to name) asks the piece for
its pandas DataFrame, converted by dask's own Arrow-to-pandas function with the options of
dask's plan, so it is the partition dask would have given (same dtypes, same row labels
0..n-1).

The plan is only taken over when dask's partitions are plain row groups of local files:
no hive-partitioned folders, no filters, no categories, no pandas index stored in the
files, dask's default dtype backend. Otherwise :func:`parquet_plan` returns ``None`` and the
passes read through dask's own reader.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["ParquetPlan", "ArrowPiece", "parquet_plan", "read_piece", "apply_piece",
           "units_in_order"]

#: Arrow types a pass reads as numpy arrays (no pandas): integers, floats, booleans
_NUMERIC = "iufb"


@dataclass(frozen=True)
class ParquetPlan:
    """The partitions of a Parquet panel as dask planned them: ``pieces`` of
    ``(path, row_groups or None)``, read with dask's ``convert_string`` setting."""

    pieces: tuple
    convert_string: bool

    def __len__(self) -> int:
        return len(self.pieces)


def parquet_plan(ddf) -> ParquetPlan | None:
    """The partition plan of a frame fresh from ``dask.dataframe.read_parquet``, when
    its partitions are plain row groups of local files (see the module notes); else None."""
    try:
        expr = ddf.expr.optimize()
        info = expr._dataset_info
        plan = expr._plan
    except Exception:  # not a Parquet read, or a dask whose internals differ
        return None
    from fsspec.implementations.local import LocalFileSystem

    common = plan.get("common_kwargs", {})
    if (not isinstance(info.get("fs"), LocalFileSystem) or info.get("index")
            or info.get("index_cols") or info.get("partitions") or info.get("filters")
            or info.get("categories") or common.get("partitions")
            or common.get("filters") or common.get("categories")
            or common.get("dtype_backend") is not None
            or set(common) - {"partitions", "categories", "filters", "schema", "dataset",
                              "convert_string", "read", "dtype_backend"}
            or common.get("read", {}).get("open_file_options")
            or len(plan["parts"]) != ddf.npartitions):
        return None
    pieces = []
    for part in plan["parts"]:
        piece = part.get("piece") if isinstance(part, dict) else None
        if (not isinstance(piece, tuple) or len(piece) != 3 or not isinstance(piece[0], str)
                or piece[2]):
            return None
        groups = piece[1]
        if groups is not None:
            groups = tuple(int(g) for g in groups)
        pieces.append((piece[0], groups))
    return ParquetPlan(tuple(pieces), bool(common.get("convert_string", False)))


class ArrowPiece:
    """The columns of one partition as an Arrow table.

    :meth:`numbers` gives a column as a numpy array when it holds numbers without missing
    values; :meth:`frame` gives the partition as dask's reader would (pandas).
    """

    def __init__(self, table, convert_string: bool):
        self.table = table
        self._convert_string = convert_string
        self._frame = None

    def __len__(self) -> int:
        return self.table.num_rows

    def numbers(self, name) -> np.ndarray | None:
        """Column ``name`` as a numpy array, or ``None`` when it is not integers, floats or
        booleans without missing values (then use :meth:`frame`)."""
        col = self.table.column(name)
        if col.null_count:
            return None
        try:
            kind = np.dtype(col.type.to_pandas_dtype()).kind
        except Exception:  # dictionary, extension and other types pandas converts itself
            return None
        if kind not in _NUMERIC:
            return None
        return col.to_numpy()

    def frame(self):
        """The partition as a pandas DataFrame, converted as dask's Parquet reader does
        (its own conversion function and options; rows labelled 0..n-1)."""
        if self._frame is None:
            from dask.dataframe.io.parquet.arrow import ArrowDatasetEngine

            df = ArrowDatasetEngine._arrow_table_to_pandas(
                self.table, None, dtype_backend=None, convert_string=self._convert_string)
            self._frame = df.reset_index(drop=True)
        return self._frame


def read_piece(path: str, row_groups, columns, convert_string: bool) -> ArrowPiece:
    """Read ``columns`` of one planned partition (row groups of one file; all of it when
    ``row_groups`` is None) with pyarrow, on the calling thread. The file is memory-mapped
    (local files only), which spares a copy of each column chunk before it is decoded."""
    import pyarrow.parquet as pq

    with pq.ParquetFile(path, memory_map=True) as f:
        if row_groups is None:
            table = f.read(columns=list(columns), use_threads=False)
        else:
            table = f.read_row_groups(list(row_groups), columns=list(columns),
                                      use_threads=False)
    return ArrowPiece(table, convert_string)


def units_in_order(plan: ParquetPlan, unit: str) -> bool:
    """Whether the partitions' ranges of ``unit`` (from the row-group statistics in the
    Parquet footers), sorted, each begin at or after the end of the one before: files
    sorted by unit, as panel files usually are. Their pieces then merge by concatenation
    (``_merge.chain``) whatever rows a pass drops. False when a statistic is missing,
    the column has missing values or is neither integers nor text."""
    import pyarrow.parquet as pq

    ranges, footers = [], {}
    try:
        for path, groups in plan.pieces:
            if path not in footers:
                footers[path] = pq.ParquetFile(path, memory_map=True).metadata
            md = footers[path]
            j = md.schema.to_arrow_schema().get_field_index(unit)
            if j < 0:
                return False
            lo = hi = None
            for g in range(md.num_row_groups) if groups is None else groups:
                if md.row_group(g).num_rows == 0:  # an empty file or group: no range
                    continue
                st = md.row_group(g).column(j).statistics
                if st is None or not st.has_min_max or st.null_count:
                    return False
                if not isinstance(st.min, (int, str)) or isinstance(st.min, bool):
                    return False
                lo = st.min if lo is None else min(lo, st.min)
                hi = st.max if hi is None else max(hi, st.max)
            if lo is not None:
                ranges.append((lo, hi))
        ranges.sort()
    except (OSError, TypeError, ValueError):  # unreadable footer, mixed types
        return False
    return all(b[0] >= a[1] for a, b in zip(ranges[:-1], ranges[1:]))


def apply_piece(block, arrow: bool, path, row_groups, columns, convert_string, *args):
    """``block(partition, *args)`` on one planned partition read by :func:`read_piece`:
    the :class:`ArrowPiece` itself when ``arrow`` (a block that knows it), else its pandas
    DataFrame."""
    piece = read_piece(path, row_groups, columns, convert_string)
    return block(piece if arrow else piece.frame(), *args)


def as_frame(piece):
    """A partition as a pandas DataFrame, whichever reader produced it."""
    return piece.frame() if isinstance(piece, ArrowPiece) else piece
