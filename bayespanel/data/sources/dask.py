"""The one pass on Dask: panels that do not fit in memory.

The Gaussian panel models need the data only through sufficient statistics
(:mod:`bayespanel.core.suffstats`), so the only work that grows with the data is one pass over
it. :class:`DaskPanel` runs that pass partition by partition on a Dask DataFrame and
merges the pieces with the pairwise update of Chan, Golub and LeVeque (1979); units may
be split across partitions in any way. Everything after the pass (reference fits,
Bayesian fits) is the in-memory code, unchanged.

Passes (each reads only the columns it needs; the first one also summarises the panel's
structure, so a design on a fresh panel is one pass over the data):

* structure: per-unit row counts and occasion bit masks (missing unit or time values,
  duplicated unit-occasion pairs, balance, gaps); runs alone only when asked for first,
  or before a design with ``occasion_effects=True`` (the indicators need the occasions);
* describe: between/within moments of each numeric column;
* design: listwise deletion, ``[X, y]`` and its sufficient statistics for one formula
  (optionally the per-unit within cross-products used for cluster-robust covariances
  and unit-level LOO terms).

Formulas on this path are restricted to what can be built row by row: plain numeric
columns, interactions (``x:z``, ``x*z``), numeric transforms (``np.log(x)``, ``sqrt``,
``I(x ** 2)`` ...) and ``occasion_effects=True``. Transforms whose value depends on the
whole column (``C()``, ``center``, ``scale``, ``standardize``, ``poly``) are refused with
a :class:`~bayespanel.core.errors.FormulaError`: they need the in-memory path, or a column
computed beforehand.

References
----------
.. [1] Chan, T. F., Golub, G. H. and LeVeque, R. J. (1979). Updating formulae and a pairwise
   algorithm for computing sample variances. Technical report STAN-CS-79-773, Stanford.
.. [2] Mundlak, Y. (1978). On the pooling of time series and cross section data.
   Econometrica 46(1), 69-85. https://doi.org/10.2307/1913646
"""

from __future__ import annotations

import atexit
import contextlib
import importlib
import os
import re
import warnings

import numpy as np
import pandas as pd

from ...core import derived, suffstats
from ..design import (Design, DesignSpec, check_flag, check_stats, check_terms,
                      occasion_label, refuse_complex)
from ...core.errors import (DataHandlingWarning, EstimationError, FormulaError, PanelDataError,
                      SpecificationError, choices_error)
from ..formula import dependency_message, safe_context, screen, sum_columns
from . import _blocks as blk
from . import _parquet

__all__ = ["DaskPanel", "DaskSource", "SCHEDULERS", "local_client", "close_local_client"]

SCHEDULERS = ("local", "threads", "synchronous")
_STATEFUL = ("C", "center", "scale", "standardize", "poly")
_FAN_IN = 8
_VARY_TOL = 1e-10
_LOCAL = {}


# ---------------------------------------------------------------------------- scheduling
def local_client(n_workers: int = 2, processes: bool = False):
    """The package's own local cluster (started once, closed at exit).

    Thread workers are the default: the partition work is numpy and pyarrow, which
    release the interpreter lock for most of their time, and threads share the per-unit
    summaries without serialising them between processes. On this project's 2-core test
    machine the design pass ran 3 to 10 times faster on 2 thread workers than on 2
    process workers over the same Parquet files (bench/bench_scale.py --compare; see
    docs/scale.md). ``processes=True`` gives one single-threaded process per worker.
    """
    key = (n_workers, processes)
    if key not in _LOCAL:
        from distributed import Client, LocalCluster

        cluster = LocalCluster(n_workers=n_workers, threads_per_worker=1,
                               processes=processes, dashboard_address=":0")
        client = Client(cluster)
        # import the package and load the compiled kernels in each worker now, not in the
        # first pass (where the first block loads them while the others wait)
        client.run(_warm_worker)
        _LOCAL[key] = client
    return _LOCAL[key]


def _warm_worker() -> bool:
    from ...core import suffstats

    importlib.import_module("bayespanel.data.sources._blocks")
    return suffstats.warm_kernels()


def close_local_client() -> None:
    """Shut down the local clusters started by :func:`local_client`."""
    while _LOCAL:
        _, client = _LOCAL.popitem()
        cluster = client.cluster
        client.close()
        if cluster is not None:
            cluster.close()


atexit.register(close_local_client)


#: dask's Parquet reader (dask/dataframe/io/parquet/arrow.py) calls
#: DataFrame.reset_index(inplace=True), deprecated in pandas 3.1 (PDEP-8), on every
#: partition of a file written without a pandas index; the notice is about dask's code,
#: not the user's data, so the passes silence that one message (and nothing else) while
#: they read, instead of letting it into results.json on every out-of-core run
_DASK_PARQUET_NOTICE = r"The inplace keyword in DataFrame\.reset_index is deprecated"


@contextlib.contextmanager
def _reading():
    """While dask reads partitions: its own pandas deprecation notice is not the user's
    concern (see :data:`_DASK_PARQUET_NOTICE`); every other warning passes."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=_DASK_PARQUET_NOTICE, module=r"dask\.")
        yield


def _resolve_client(client):
    if client is None:
        try:
            from distributed import default_client

            return default_client()
        except (ImportError, ValueError):
            return "local"
    if isinstance(client, str):
        if client not in SCHEDULERS:
            raise choices_error("client", client, SCHEDULERS + ("a distributed.Client",))
        return client
    if not hasattr(client, "compute") or not hasattr(client, "submit"):
        raise SpecificationError(
            f"client={type(client).__name__} is not a distributed.Client; pass a Client or "
            f"one of {', '.join(map(repr, SCHEDULERS))}")
    return client


def _tree(delayed_pieces, merge, fan_in=_FAN_IN):
    """Reduce a list of delayed pieces with ``merge`` (list -> piece), ``fan_in`` at a time."""
    from dask import delayed

    level = list(delayed_pieces)
    while len(level) > 1:
        level = [delayed(merge, pure=True)(level[i:i + fan_in])
                 for i in range(0, len(level), fan_in)]
    return level[0] if len(level) == 1 else delayed(merge)(level)


def _is_dask_frame(df) -> bool:
    return hasattr(df, "npartitions") and hasattr(df, "to_delayed") and hasattr(df, "compute")


# ---------------------------------------------------------------------------- DaskPanel
class DaskPanel:
    """A long panel table held as a Dask DataFrame, summarised in passes over partitions.

    Offers the same structure and description as :class:`~bayespanel.data.panel.Panel`
    (``n_units``, ``n_rows``, ``occasions``, ``occasions_per_unit``, ``is_balanced``,
    ``singleton_units``, ``gaps``, ``structure()``, ``describe()``) and
    :meth:`design`, whose result yields :class:`~bayespanel.core.suffstats.SuffStats` for
    every model kind. Rows are never collected in one place.

    Parameters
    ----------
    df : dask.dataframe.DataFrame
        One row per unit and occasion; units may be split across partitions in any way.
    unit, time : str
        Columns identifying the unit and the occasion.
    client : distributed.Client or {"local", "threads", "synchronous"}, optional
        Where the passes run. By default an active distributed client is used if there
        is one, otherwise a local cluster of two thread workers (:func:`local_client`). ``"threads"`` and ``"synchronous"`` use Dask's local
        schedulers (no cluster; handy for small data and debugging).

    Raises
    ------
    PanelDataError
        If ``unit`` or ``time`` is not a column, both are the same, or a column name
        appears twice. Checks that need the rows (missing unit or time values,
        duplicated unit-occasion pairs, fewer than two units) run with the first pass.

    Examples
    --------
    >>> import dask.dataframe as dd, bayespanel as bp              # doctest: +SKIP
    >>> panel = bp.Panel.from_parquet("big.parquet", unit="id", time="wave",
    ...                               engine="dask")                # doctest: +SKIP
    >>> panel.describe()                                            # doctest: +SKIP
    """

    def __init__(self, df, unit: str, time: str, client=None):
        if not _is_dask_frame(df):
            raise PanelDataError(f"DaskPanel needs a Dask DataFrame, got {type(df).__name__}")
        from ..columns import check_column_names

        check_column_names(df.columns, unit, time)
        cols = [str(c) for c in df.columns]
        for role, col in (("unit", unit), ("time", time)):
            if col not in cols:
                raise PanelDataError(
                    f"{role} column {col!r} is not in the table; columns are: "
                    f"{', '.join(cols[:20])}")
        if unit == time:
            raise PanelDataError(f"unit and time must be different columns, both are {unit!r}")
        if len(set(cols)) != len(cols):
            dup = next(c for c in cols if cols.count(c) > 1)
            raise PanelDataError(f"column {dup!r} appears more than once in the table")
        self._df = df
        self.unit = unit
        self.time = time
        self.client = _resolve_client(client)
        self._structure = None
        self._plan = None  # partitions read with pyarrow (from_parquet), else dask's reader
        self._sorted = None  # whether the plan's partitions hold ordered ranges of units

    @classmethod
    def from_parquet(cls, path, unit: str, time: str, client=None, columns=None, **kwargs):
        """Open a Parquet file or folder lazily (``dask.dataframe.read_parquet``).

        The partitions are dask's; when they are plain row groups of local files, the
        passes read them with pyarrow straight to numpy arrays
        (:mod:`bayespanel.data.sources._parquet`), else through dask's reader.
        """
        import dask.dataframe as dd

        from ..io import parquet_files

        if isinstance(path, (str, os.PathLike)) and os.path.isdir(path):
            parquet_files(path)  # an empty folder is named as such, not as a reader error
        try:
            with _reading():
                df = dd.read_parquet(path, columns=columns, **kwargs)
        except Exception as exc:  # pyarrow / fsspec raise several types
            raise PanelDataError(f"cannot read Parquet {str(path)!r}: {exc}") from None
        panel = cls(df, unit=unit, time=time, client=client)
        panel._plan = _parquet.parquet_plan(df)
        return panel

    # ------------------------------------------------------------------ running passes
    @property
    def data(self):
        """The Dask DataFrame (lazy; nothing is loaded)."""
        return self._df

    @property
    def npartitions(self) -> int:
        return int(self._df.npartitions)

    @property
    def columns(self) -> list[str]:
        return [str(c) for c in self._df.columns]

    def _pieces(self, columns):
        return self._df[list(columns)].to_delayed()

    def _distributed(self):
        """The distributed client the passes run on, or ``None`` (Dask's local schedulers)."""
        if isinstance(self.client, str):
            return local_client() if self.client == "local" else None
        return self.client

    def _share(self, obj):
        """``obj`` as one argument shared by every partition's task: scattered once to the
        workers of a distributed client (thread workers share it in memory), else one key
        of the graph."""
        client = self._distributed()
        if client is None:
            from dask import delayed

            return delayed(obj, name=f"bayespanel-shared-{id(obj):x}", traverse=False)
        return client.scatter(obj, broadcast=True, hash=False)

    def run(self, columns, block, merge, *args, shared=None):
        """Apply ``block(partition, *args)`` to every partition of ``columns`` and reduce
        the pieces with ``merge`` on this panel's scheduler; returns the merged piece.
        ``shared`` (large, read-only) is passed last to every call, sent to the workers once."""
        from dask import delayed

        extra = () if shared is None else (self._share(shared),)
        if self._plan is not None:  # read and summarise each partition in one task
            plan, cols = self._plan, tuple(columns)
            arrow = block in blk.ARROW_BLOCKS
            parts = [delayed(_parquet.apply_piece, pure=True)(
                block, arrow, path, groups, cols, plan.convert_string, *args, *extra)
                for path, groups in plan.pieces]
        else:
            parts = [delayed(block, pure=True)(d, *args, *extra)
                     for d in self._pieces(columns)]
        root = _tree(parts, merge, len(parts) if self._one_merge(block) else _FAN_IN)
        with _reading():
            if isinstance(self.client, str):
                sched = {"local": None, "threads": "threads", "synchronous": "sync"}[self.client]
                if sched is None:
                    return local_client().compute(root).result()
                return root.compute(scheduler=sched)
            return self.client.compute(root).result()

    def _one_merge(self, block) -> bool:
        """Whether the pieces of ``block`` (a pass of this module) merge all at once: the
        partitions hold ordered ranges of units (Parquet statistics), so their pieces
        concatenate and hold no more than the merged result; one merge copies each
        unit's summaries once, where a tree of merges copies them at every level."""
        if self._plan is None or block not in (blk.design_block, blk.describe_block,
                                               blk.structure_block):
            return False
        if self._sorted is None:
            self._sorted = _parquet.units_in_order(self._plan, self.unit)
        return self._sorted

    # ------------------------------------------------------------------ structure
    @property
    def occasions(self) -> np.ndarray:
        """All occasions present in the table, sorted."""
        return self._struct().occasions

    def _struct(self) -> blk.StructurePiece:
        """The structure pass (unit and time columns), unless a pass already did it."""
        if self._structure is None:
            self._adopt(self.run([self.unit, self.time], blk.structure_block,
                                 blk.merge_structure, self.unit, self.time))
        return self._structure

    def _adopt(self, piece: blk.StructurePiece) -> None:
        """Check a merged structure piece (rows, duplicates, units) and keep it."""
        if piece.n_rows == 0:
            raise PanelDataError("the table has no rows")
        distinct = blk.observed_occasions(piece.masks)
        dup = np.flatnonzero(piece.counts > distinct)
        if len(dup):
            self._raise_duplicates(piece, dup, distinct)
        if len(piece.keys) < 2:
            raise PanelDataError(
                f"the panel has {len(piece.keys)} unit in column {self.unit!r}; at least "
                "2 are needed")
        self._structure = piece

    def _raise_duplicates(self, piece, dup, distinct):
        u = piece.keys[dup[0]]
        with _reading():
            rows = self._df[self._df[self.unit] == u][self.time].compute()
        t = rows[rows.duplicated()].iloc[0]
        extra = int((piece.counts - distinct)[dup].sum())
        raise PanelDataError(
            f"{extra} row(s) repeat a unit-occasion pair already present; the first is "
            f"{self.unit}={blk._plain(u)!r}, {self.time}={blk._plain(t)!r}. Each unit may "
            "appear once per occasion.")

    @property
    def n_units(self) -> int:
        return int(len(self._struct().keys))

    @property
    def n_rows(self) -> int:
        return int(self._struct().n_rows)

    @property
    def occasions_per_unit(self) -> pd.Series:
        s = self._struct()
        return pd.Series(s.counts, index=pd.Index(s.keys, name=self.unit))

    @property
    def is_balanced(self) -> bool:
        return bool((self._struct().counts == len(self.occasions)).all())

    @property
    def singleton_units(self) -> list:
        s = self._struct()
        return [blk._plain(k) for k in s.keys[s.counts == 1]]

    def _gap_units(self):
        """Units whose first-to-last span of occasions exceeds their row count."""
        s = self._struct()
        first = np.full(len(s.keys), -1, dtype=np.int64)
        last = np.full(len(s.keys), -1, dtype=np.int64)
        for w in range(s.masks.shape[1]):
            m = s.masks[:, w]
            has = m != 0
            low = np.zeros(len(m), np.int64)
            high = np.zeros(len(m), np.int64)
            low[has] = _lowbit(m[has])
            high[has] = _highbit(m[has])
            first = np.where((first < 0) & has, 64 * w + low, first)
            last = np.where(has, 64 * w + high, last)
        span = last - first + 1
        return np.flatnonzero(span > s.counts), s

    @property
    def gaps(self) -> dict:
        """Occasions missing between each unit's first and last observed occasion."""
        idx, s = self._gap_units()
        occ = self.occasions
        out = {}
        for i in idx:
            pos = blk.occasion_positions(s.masks[i])
            missing = sorted(set(range(pos.min(), pos.max() + 1)) - set(pos.tolist()))
            out[blk._plain(s.keys[i])] = [blk._plain(occ[m]) for m in missing]
        return out

    def structure(self) -> dict:
        """Same keys as :meth:`Panel.structure`."""
        s = self._struct()
        counts = s.counts
        return {
            "unit": self.unit, "time": self.time, "n_units": self.n_units,
            "n_rows": self.n_rows, "n_occasions": int(len(self.occasions)),
            "occasions_min": int(counts.min()), "occasions_median": float(np.median(counts)),
            "occasions_max": int(counts.max()), "balanced": self.is_balanced,
            "n_units_with_gaps": int(len(self._gap_units()[0])),
            "n_singleton_units": int((counts == 1).sum()),
        }

    def __repr__(self) -> str:
        return (f"DaskPanel({self.npartitions} partitions, unit {self.unit!r}, time "
                f"{self.time!r}, columns {self.columns})")

    # ------------------------------------------------------------------ describe
    def numeric_columns(self) -> list[str]:
        from ..columns import describable

        dt = self._df.dtypes
        return [str(c) for c in self._df.columns if c not in (self.unit, self.time)
                and describable(dt[c])]

    def describe(self, columns=None) -> pd.DataFrame:
        """Between/within decomposition of each numeric variable, as
        :meth:`Panel.describe` (same columns, same definitions), in one pass.

        Without ``columns``, ``attrs["left_out"]`` names the columns left out and why: those
        that are not numbers, and those with values outside the magnitudes a design accepts
        (:data:`bayespanel.data.design.MAGNITUDE_LIMITS`), whose one-pass squares would overflow
        or vanish (the in-memory describe rescales them instead).
        """
        from ..design import MAGNITUDE_LIMITS
        from ..columns import describe_frame, left_out_reason

        dt = self._df.dtypes
        left_out = None
        if columns is None:
            columns = self.numeric_columns()
            left_out = {str(c): left_out_reason(dt[c]) for c in self._df.columns
                        if c not in (self.unit, self.time) and str(c) not in columns}
        else:
            columns = list(columns)
            for c in columns:
                if c not in self.columns:
                    raise PanelDataError(f"column {c!r} is not in the table")
                if not pd.api.types.is_numeric_dtype(dt[c]):
                    raise PanelDataError(
                        f"column {c!r} is not numeric (dtype {dt[c]}); describe() summarises "
                        "numeric columns")
        need = self._structure is None  # the structure comes with this pass
        cols = [self.unit] + ([self.time] if need else []) + columns
        piece = self.run(list(dict.fromkeys(cols)), blk.describe_block, blk.merge_describe,
                         self.unit, columns, self.time if need else None)
        if need:
            self._adopt(piece.structure)
        rows = []
        lo, hi = MAGNITUDE_LIMITS
        for j, (c, n_miss, mx) in enumerate(zip(columns, piece.n_missing, piece.maxabs)):
            if mx > hi or 0 < mx < lo:
                if left_out is None:
                    raise PanelDataError(
                        f"column {c!r} has values of magnitude {float(mx):.3g}, outside "
                        f"{lo:g}..{hi:g}: its one-pass squares overflow or vanish; rescale it")
                left_out[c] = (f"values of magnitude {float(mx):.3g}, outside {lo:g}..{hi:g} "
                               "(rescale the column)")
                continue
            rows.append(_describe_row(c, piece.column(j), int(n_miss), float(mx)))
        return describe_frame(rows, left_out)

    # ------------------------------------------------------------------ design
    def design(self, formula: str, occasion_effects: bool = False, cluster: bool = False):
        """Run the design pass for ``formula``: a :class:`~bayespanel.data.design.Design` over
        a :class:`DaskSource` (the rows stay in their partitions).

        ``cluster=True`` also collects the per-unit within cross-products needed for
        cluster-robust covariances (``p x p`` numbers per unit); otherwise they are
        collected by a second pass when first asked for.
        """
        src = DaskSource(self, formula, occasion_effects=occasion_effects, cluster=cluster)
        return Design(src, terms=src.terms, units=pd.Index(src._stats.unit_keys),
                      outcome=src.outcome, spec=src.spec, stats=src._stats,
                      maxabs=src._maxabs, n_dropped=src.n_dropped,
                      dropped_by_column=src.dropped_by_column,
                      n_input_rows=src.n_input_rows)


def _lowbit(m):
    """Index of the lowest set bit of each (nonzero) uint64."""
    low = m & (~m + np.uint64(1))
    return np.bitwise_count(low - np.uint64(1)).astype(np.int64)


def _highbit(m):
    """Index of the highest set bit of each (nonzero) uint64."""
    x = m.copy()
    for s in (1, 2, 4, 8, 16, 32):
        x |= x >> np.uint64(s)
    return (np.bitwise_count(x) - 1).astype(np.int64)


def _describe_row(c, part, n_missing, maxabs) -> dict:
    if part.n == 0:
        return {"variable": c, "n": 0, "n_missing": n_missing, "mean": np.nan,
                "sd_overall": np.nan, "sd_between": np.nan, "sd_within": np.nan,
                "share_within": np.nan, "varies_within": False}
    n = int(part.n)
    ss_total, ss_within = float(part.m2[0, 0]), float(part.within_m2[0, 0])
    scale = max(maxabs, 1.0)
    um = part.offsets[:, 0] + part.ref[0]
    return {
        "variable": c, "n": n, "n_missing": n_missing, "mean": float(part.mean[0]),
        "sd_overall": float(np.sqrt(ss_total / (n - 1))) if n > 1 else np.nan,
        "sd_between": float(um.std(ddof=1)) if len(um) > 1 else np.nan,
        "sd_within": float(np.sqrt(ss_within / (n - 1))) if n > 1 else np.nan,
        "share_within": ss_within / ss_total if ss_total > 0 else np.nan,
        "varies_within": bool(np.sqrt(ss_within / n) > _VARY_TOL * scale),
    }


# ---------------------------------------------------------------------------- DaskSource
class DaskSource:
    """The rows of a formula on a :class:`DaskPanel`: the source of a
    :class:`~bayespanel.data.design.Design` whose rows stay in their partitions.

    Built by :meth:`DaskPanel.design`, which runs the design pass here (listwise deletion,
    ``[X, y]`` and its sufficient statistics, optionally the per-unit within
    cross-products) and returns the :class:`~bayespanel.data.design.Design` over this source;
    everything after the pass is the design's own code, the same as in memory. The
    source runs a block function over the rows of every partition and merges the pieces
    (:meth:`run`), and gives the per-unit cross-products (:meth:`unit_cross_products`).

    Listwise deletion is the same as in memory: rows missing any variable the formula
    uses are dropped, counted per column and reported with a
    :class:`~bayespanel.core.errors.DataHandlingWarning`; unit means are taken over the
    remaining rows.
    """

    #: the rows stay in their partitions (``Design.has_rows``)
    has_rows = False

    def __init__(self, panel: DaskPanel, formula: str, occasion_effects=False, cluster=False):
        occasion_effects = check_flag("occasion_effects", occasion_effects)
        self.panel = panel
        self.spec = DesignSpec(formula=formula, unit=panel.unit, time=panel.time,
                               occasion_effects=bool(occasion_effects))
        self._block_spec = self._prepare(formula, bool(occasion_effects))
        self._run(cluster)

    # ------------------------------------------------------------------ formula
    def _prepare(self, formula, occasion_effects) -> blk.BlockSpec:
        p = self.panel
        dt = p.data.dtypes
        screened = screen(formula, p.columns)
        for name in _STATEFUL:
            if re.search(r"(?<![\w.])" + name + r"\s*\(",
                         f"{screened.outcome_expr or ''} {screened.rhs}"):
                raise FormulaError(
                    f"{name}(...) in {formula!r} depends on the whole column, which the "
                    "partitioned (Dask) pass does not see at once; use the in-memory Panel, "
                    "or add the transformed column to the table first")
        if set(screened.outcome_columns) & {p.unit, p.time}:
            raise FormulaError(f"the outcome {screened.outcome!r} is the panel's unit or "
                               "time column")
        if p.unit in screened.columns:
            raise FormulaError(
                f"column {p.unit!r} identifies the units; unit effects come from the model "
                "(FixedEffects, RandomIntercept), not from the formula")
        used = [c for c in screened.columns if c not in (p.unit,)]
        for c in used:
            refuse_complex(c, dt[c])
            if not (pd.api.types.is_numeric_dtype(dt[c]) or pd.api.types.is_bool_dtype(dt[c])):
                raise PanelDataError(
                    f"column {c!r} is not numeric (dtype {dt[c]}); "
                    + ("the outcome must be numeric" if c in screened.outcome_columns else
                       "on the Dask path covariates must be numeric (C() is not available "
                       "there)"))
        used = list(dict.fromkeys(used))
        names = sum_columns(screened.rhs)
        if names is not None and set(names) <= set(used):
            # a sum of (numeric) columns: formulaic is not loaded for it
            terms = ["Intercept"] + names
        else:
            terms = self._formula_terms(formula, screened.rhs, used)
        check_terms(terms, formula)
        plain = tuple(None if t == "Intercept" else t for t in terms)
        if not all(t == "Intercept" or t in used for t in terms):
            plain = None
        occ = ()
        if occasion_effects:
            occ = tuple(blk._plain(o) for o in p.occasions[1:])
            terms += [occasion_label(o) for o in occ]
        self.outcome = screened.outcome
        self.formula_terms = terms
        return blk.BlockSpec(unit=p.unit, time=p.time, outcome=screened.outcome,
                             used=tuple(used), terms=tuple(terms), plain=plain,
                             rhs=screened.rhs, occasions=occ,
                             outcome_expr=screened.outcome_expr)

    @staticmethod
    def _formula_terms(formula, rhs, used) -> list:
        """The columns formulaic gives ``rhs`` (they do not depend on the data for
        row-wise terms: read from a two-row probe)."""
        from formulaic import Formula

        probe = pd.DataFrame({c: np.full(2, 1.0) for c in used})
        try:
            mm = Formula(rhs).get_model_matrix(probe, context=safe_context(),
                                               ensure_full_rank=False)
        except Exception as exc:
            raise FormulaError(f"cannot build the design for {formula!r}: "
                               f"{dependency_message(exc)}") from None
        return [str(c) for c in mm.columns]

    # ------------------------------------------------------------------ the pass
    def _run(self, cluster: bool):
        from dataclasses import replace

        p = self.panel
        need = p._structure is None  # the structure comes with this pass
        spec = replace(self._block_spec, unit_cp=bool(cluster), structure=need)
        cols = list(dict.fromkeys([p.unit, p.time] + list(spec.used)))
        piece = p.run(cols, blk.design_block, blk.merge_design, spec)
        if need:
            p._adopt(piece.structure)
        used = list(spec.used)
        for c, m in zip(used, piece.missing):
            if m == piece.n_input:
                raise PanelDataError(f"column {c!r} is missing on every row")
        self.n_input_rows = int(piece.n_input)
        self.n_dropped = int(piece.n_dropped)
        self.dropped_by_column = {c: int(m) for c, m in zip(used, piece.missing) if m}
        if self.n_dropped:
            detail = ", ".join(f"{c}: {k}" for c, k in self.dropped_by_column.items())
            warnings.warn(
                f"dropped {self.n_dropped} of {self.n_input_rows} rows with missing values "
                f"({detail}); unit means are taken over the remaining rows",
                DataHandlingWarning, stacklevel=4)
        if piece.part.n == 0:
            raise PanelDataError("no complete rows remain after dropping missing values")
        stats = derived.finalize_inplace(piece.part, names=list(spec.terms) + [spec.outcome])
        if stats.n_units < 2:
            raise PanelDataError(
                f"only {stats.n_units} unit of {p.unit!r} has complete rows; at least 2 are "
                "needed")
        stats, maxabs, ucp, kept = self._drop_absent_occasions(stats, piece.maxabs,
                                                               piece.unit_cp)
        self._stats = stats
        self.kept_columns = kept
        self._maxabs = maxabs
        self._unit_cp = ucp
        self.terms = list(stats.names[:-1])
        check_stats(stats, self.terms, self.outcome, maxabs, stacklevel=6)

    def _drop_absent_occasions(self, stats, maxabs, ucp):
        """Occasion indicators as in memory: only occasions left after deletion, the first
        of them the reference."""
        occ = self._block_spec.occasions
        if not occ:
            return stats, maxabs, ucp, None
        k0 = len(self.formula_terms) - len(occ)
        share = stats.mean[k0:k0 + len(occ)]
        present = share * stats.n > 0.5
        first_absent = (1.0 - share.sum()) * stats.n < 0.5
        keep_occ = list(np.flatnonzero(present))
        if first_absent and keep_occ:
            keep_occ = keep_occ[1:]
        cols = list(range(k0)) + [k0 + j for j in keep_occ] + [stats.p - 1]
        if len(cols) == stats.p:
            return stats, maxabs, ucp, None
        names = [stats.names[c] for c in cols]
        ucp = None if ucp is None else ucp[:, cols][:, :, cols]
        return derived.select_columns(stats, cols, names), maxabs[cols], ucp, tuple(cols)

    # ------------------------------------------------------------------ the source
    def __repr__(self) -> str:
        return (f"DaskSource({self.outcome!r} ~ {len(self.terms)} terms over "
                f"{self.panel.npartitions} partitions)")

    def maxabs(self) -> np.ndarray:
        """Largest absolute value of each column of ``[X, y]`` (from the design pass)."""
        return self._maxabs

    def run(self, block, merge, shared=None):
        """One more pass over the rows: ``block(rows, shared)`` on the
        :class:`~bayespanel.data.sources.RowBlock` of every partition (listwise deletion as in
        the design pass, the design's kept columns), reduced with ``merge``."""
        from dataclasses import replace

        p = self.panel
        spec = replace(self._block_spec, unit_cp=False, structure=False)
        cols = list(dict.fromkeys([p.unit, p.time] + list(spec.used)))
        return p.run(cols, blk.rows_block, merge, spec, self.kept_columns, block,
                     shared=shared)

    def row_times(self, units, ranks):
        """The occasions of the rows ``ranks`` (0 = first) of units ``units`` (codes),
        from the structure pass when no row was dropped; else ``None`` (not known without
        reading the rows)."""
        st = self.panel._structure
        if self.n_dropped or st is None or not np.array_equal(st.keys, self._stats.unit_keys):
            return None
        pos = np.array([blk.occasion_positions(st.masks[g])[r] for g, r in zip(units, ranks)],
                       dtype=np.int64)
        return st.occasions[pos]

    def unit_cross_products(self) -> np.ndarray:
        """Per-unit within cross-products of ``[X, y]`` (N x p x p), in unit order.

        Collected in the design pass with ``cluster=True``, else by one more pass now.
        """
        if self._unit_cp is None:
            self._run(cluster=True)
        return self._unit_cp
