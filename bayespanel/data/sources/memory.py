"""Rows in memory: the source of a Panel's designs, and the block every source hands out.

A :class:`~bayespanel.data.design.Design` is the same object whatever holds its rows: it works
from the sufficient statistics of ``[X, y]`` and asks its *source* for anything that needs
the rows. A source knows how to run a block function over its rows and merge the pieces
(``run(block, merge, shared)``, each block a :class:`RowBlock`), says whether the rows
are at hand (``has_rows``) and gives the per-unit within cross-products of ``[X, y]``
(``unit_cross_products()``, the scores of cluster-robust fits and the unit-level LOO
terms without rows). Two sources exist:

* :class:`InMemoryRows`: the estimation rows in memory (``X``, ``y``, ``unit_codes``,
  ``time``, ``rows``); one block;
* :class:`bayespanel.data.sources.dask.DaskSource`: a Dask DataFrame, one block per
  partition, nothing collected in one place.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ...core.linalg import group_cross_products

__all__ = ["RowBlock", "InMemoryRows", "column_maxabs"]


def column_maxabs(X: np.ndarray) -> np.ndarray:
    """Largest absolute value of each column (no n x k temporary)."""
    if X.shape[0] == 0:
        return np.zeros(X.shape[1:])
    return np.maximum(np.abs(X.max(axis=0)), np.abs(X.min(axis=0)))


@dataclass(frozen=True)
class RowBlock:
    """Some estimation rows of a design, as a block function over its rows receives them
    (:meth:`bayespanel.data.design.Design.run_rows`): the unit key of each row (the keys of the
    design's statistics, ``design_suffstats().unit_keys``), its occasion, and
    ``Z = [X, y]`` in the design's columns (after listwise deletion)."""

    units: np.ndarray
    time: np.ndarray
    Z: np.ndarray


class InMemoryRows:
    """The estimation rows of a design held in memory, sorted by unit, then occasion.

    Parameters
    ----------
    y : array (n,)
    X : array (n, k)
    unit_codes : array (n,) of int
        Unit of each row, ``0..N-1``, sorted.
    time : array (n,)
        Occasion of each row.
    rows : index (n,)
        Labels of the rows in the panel they came from.
    """

    #: the rows are at hand
    has_rows = True

    def __init__(self, *, y, X, unit_codes, time, rows):
        self.y = np.ascontiguousarray(y, dtype=float)
        self.X = np.ascontiguousarray(X, dtype=float)
        self.unit_codes = np.asarray(unit_codes, dtype=np.int64)
        self.time = np.asarray(time)
        self.rows = pd.Index(rows)
        if np.any(self.unit_codes[1:] < self.unit_codes[:-1]):
            raise ValueError("Design rows must be sorted by unit")
        self._ucp = None

    def statistics(self, names):
        """The sufficient statistics of ``[X, y]`` (computed in row slices)."""
        from ...core.suffstats import compute_chunked

        return compute_chunked(self.X, self.y, self.unit_codes, names=names)

    def maxabs(self) -> np.ndarray:
        """Largest absolute value of each column of ``[X, y]``."""
        return np.append(column_maxabs(self.X), np.abs(self.y).max() if len(self.y) else 0.0)

    def run(self, block, merge, shared=None):
        """``merge([block(rows, shared)])`` with all rows in one :class:`RowBlock`."""
        rows = RowBlock(units=self.unit_codes, time=self.time,
                        Z=np.column_stack([self.X, self.y]))
        return merge([block(rows, shared)])

    def row_times(self, units, ranks):
        """The occasions of the rows ``ranks`` (0 = first) of units ``units`` (codes)."""
        first = np.searchsorted(self.unit_codes, np.asarray(units), side="left")
        return self.time[first + np.asarray(ranks)]

    def unit_cross_products(self) -> np.ndarray:
        """Per-unit within cross-products of ``[X, y]`` (N x p x p), in unit order."""
        if self._ucp is None:
            Z = np.column_stack([self.X, self.y])
            codes = self.unit_codes
            N = int(codes[-1]) + 1 if len(codes) else 0
            T = np.bincount(codes, minlength=N).astype(float)
            sums = np.zeros((N, Z.shape[1]))
            np.add.at(sums, codes, Z)
            D = Z - (sums / T[:, None])[codes]
            self._ucp = group_cross_products(D, codes, N)
        return self._ucp
