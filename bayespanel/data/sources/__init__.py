"""Where a design's rows live: a source runs a block function over its rows and merges
the pieces (:class:`~bayespanel.data.design.Design` asks it for whatever needs rows).

:mod:`bayespanel.data.sources.memory` holds rows in memory (:class:`InMemoryRows`, the
source of a Panel's designs) and the block type every source hands out
(:class:`RowBlock`); :mod:`bayespanel.data.sources.dask` runs the one pass over a Dask
DataFrame (:class:`~bayespanel.data.sources.dask.DaskPanel`, whose designs stand on a
:class:`~bayespanel.data.sources.dask.DaskSource`) and produces the same sufficient
statistics as the in-memory path. Importing this package does not import Dask; the
engine module does, when used.
"""

from .memory import InMemoryRows, RowBlock

__all__ = ["InMemoryRows", "RowBlock", "dask"]
