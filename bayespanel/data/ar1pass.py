"""AR(1) statistics of a model's columns in one pass over a design's rows, on any source.

A Gaussian model with ``errors="ar1"`` reads the statistics of
:mod:`bayespanel.core.ar1` of its own columns ``[M, y]``. Every model's columns are a
linear map of a design row ``z = [x, y]`` and of its unit's mean ``zbar_i``
(``A z + B zbar_i``, :meth:`bayespanel.data.design.Design.row_map`), so one more pass
over the rows (:meth:`~bayespanel.data.design.Design.run_rows`) makes them wherever the
rows are: each block (a partition of a Dask panel) is summarised by
:func:`bayespanel.core.ar1.partial`, the pieces are joined in partition order by
:func:`bayespanel.core.ar1.merge` (a unit cut between partitions gains the link across
the cut) and :func:`bayespanel.core.ar1.finalize` groups the units.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from ..core import ar1
from ..core.errors import PanelDataError

__all__ = ["design_ar1_stats"]


@dataclass(frozen=True)
class _Share:
    """What every block needs (sent to the workers once)."""

    keys: np.ndarray            # the design's unit keys, sorted
    zbar: np.ndarray | None     # their means of [X, y] (None: the columns need none)
    A: np.ndarray
    B: np.ndarray
    column: str


def _block(rows, share: _Share):
    if len(rows.units) == 0:
        return None
    Z = rows.Z @ share.A.T
    if share.zbar is not None:
        Z = Z + share.zbar[np.searchsorted(share.keys, rows.units)] @ share.B.T
    return ar1.partial(Z, rows.units, rows.time, share.column)


def _merge(pieces):
    pieces = [p for p in pieces if p is not None]
    return functools.reduce(ar1.merge, pieces) if pieces else None


def design_ar1_stats(design, A, B, names, column: str = "time") -> ar1.AR1Stats:
    """The AR(1) statistics of the columns ``A z + B zbar_i`` of a design's rows.

    Parameters
    ----------
    design : bayespanel.data.design.Design
        In memory or over a partitioned source (its rows are read once more).
    A, B : array (p_model, k + 1)
        The model's columns of ``[M, y]`` from a design row and its unit mean
        (:meth:`~bayespanel.data.design.Design.row_map`).
    names : list of str
        Labels of ``[M, y]``.
    column : str
        The time column, named in errors.

    Returns
    -------
    bayespanel.core.ar1.AR1Stats
    """
    A, B = np.asarray(A, dtype=float), np.asarray(B, dtype=float)
    stats = design.design_suffstats()
    share = _Share(np.asarray(stats.unit_keys), np.asarray(stats.unit_mean) if B.any() else None,
                   A, B, column)
    try:
        part = design.run_rows(_block, _merge, share)
    except PanelDataError as exc:
        if "interleave" not in str(exc):
            raise
        raise PanelDataError(
            f"{exc}. AR(1) errors on a partitioned panel need each unit's rows in time "
            "order across partitions (a unit may continue in the next partition, but not "
            f"go back in time): sort the files by unit and {column!r}") from None
    return ar1.finalize(part, names)
