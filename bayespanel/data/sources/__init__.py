"""Out-of-core passes producing the same sufficient statistics as the in-memory path.

:mod:`bayespanel.data.sources.dask` runs the one pass over a Dask DataFrame
(:class:`~bayespanel.data.sources.dask.DaskPanel`). Importing this package does not import
Dask; the engine module does, when used.
"""

__all__ = ["dask"]
