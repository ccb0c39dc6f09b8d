"""The data stage of a run: the table read (in memory or out of core on Dask), the panel
and its design built, and the ``data`` record of results.json (source file and its
SHA-256, structure, the describe table, the estimation sample, lags)."""

from __future__ import annotations

import hashlib
import os
import warnings
from pathlib import Path

from ..core.errors import SpecificationError, choices_error
from ..core.jsonsafe import json_record

__all__ = ["data_stage", "data_stage_large", "data_record", "dynamic_record", "source_record",
           "sha256", "open_out_of_core", "SCHEDULER_ENV"]


def sha256(path) -> str:
    """SHA-256 of a file; of a folder (a Parquet dataset), the SHA-256 of its files'
    relative paths and digests in path order (hidden files left out), so a rerun notices
    a file changed, added, removed or renamed."""
    path = Path(path)
    if path.is_dir():
        h = hashlib.sha256()
        files = sorted(f for f in path.rglob("*") if f.is_file() and not any(
            part.startswith(".") for part in f.relative_to(path).parts))
        for f in files:
            h.update(f.relative_to(path).as_posix().encode() + b"\0")
            h.update(bytes.fromhex(sha256(f)))
        return h.hexdigest()
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _records(df, index_name=None):
    out = []
    for idx, row in df.iterrows():
        rec = {index_name or (df.index.name or "name"): idx}
        rec.update({str(k): v for k, v in row.items()})
        out.append(rec)
    return out


#: environment variable choosing where the out-of-core passes run (docs/cli.md)
SCHEDULER_ENV = "BAYESPANEL_DASK_SCHEDULER"


def open_out_of_core(path, unit, time_col, say):
    """A :class:`~bayespanel.data.sources.dask.DaskPanel` on a Parquet file or folder.

    CSV is refused (it cannot be split into partitions by row groups and read by
    column); the scheduler is ``$BAYESPANEL_DASK_SCHEDULER`` (``local``, the default: a
    local cluster of two thread workers; ``threads``; ``synchronous``).
    """
    from ..data.sources.dask import SCHEDULERS
    from ..data.io import regular_file
    from ..data.panel import Panel

    p = regular_file(path, folder=True)
    if not (p.is_dir() or p.suffix.lower() in (".parquet", ".pq")):
        raise SpecificationError(
            f"out_of_core: {str(p)!r} is not Parquet; the out-of-core route reads a Parquet "
            "file or a folder of Parquet files (write the CSV to Parquet first, or drop "
            "--out-of-core to read it into memory)")
    client = os.environ.get(SCHEDULER_ENV, "local").strip() or "local"
    if client not in SCHEDULERS:
        raise choices_error(SCHEDULER_ENV, client, SCHEDULERS)
    panel = Panel.from_parquet(str(p), unit=unit, time=time_col, engine="dask", client=client)
    say(f"opened {p.name} out of core: {panel.npartitions} partitions, "
        f"{len(panel.columns)} columns, scheduler {client}")
    return panel


def source_record(settings, what):
    """The data file's record (path, SHA-256 of the file or folder); warns if it changed."""
    from ..core.errors import PanelDataError
    from ..data.io import regular_file

    if not settings.data:
        raise SpecificationError(f"no data: {what} (data = ...)")
    regular_file(settings.data, folder=True)  # never open a device or a pipe
    try:
        digest = sha256(settings.data)
    except OSError as exc:
        raise PanelDataError(f"cannot read {settings.data!r}: {exc.strerror or exc}") from None
    source = {"file": str(settings.data), "sha256": digest}
    if settings.data_sha256 and source["sha256"] and settings.data_sha256 != source["sha256"]:
        warnings.warn(f"the data file {settings.data!r} has changed since the analysis "
                      "file was written (SHA-256 differs); results will differ", UserWarning)
    return source


def data_stage(settings, df, say):
    from ..data.io import read_table
    from ..data.panel import Panel

    source = {"file": None, "sha256": None}
    if df is None:
        source = source_record(settings, "give a CSV or Parquet file")
        df = read_table(settings.data, sep=settings.delimiter)
    say(f"read {len(df)} rows x {df.shape[1]} columns")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")  # occasions read as dates are reported too
        panel = Panel(df, unit=settings.unit, time=settings.time)
        design = panel.design(settings.formula, occasion_effects=settings.occasion_effects,
                              initial_conditions=settings.initial_conditions)
    return panel, design, data_record(settings, panel, design, source, len(df), say), \
        [str(w.message) for w in caught]


def data_stage_large(settings, say):
    """The out-of-core data stage: the design pass (statistics, structure and per-unit
    cross-products) and the describe pass over the Parquet partitions."""
    source = source_record(settings, "out_of_core needs a Parquet file or folder")
    panel = open_out_of_core(settings.data, settings.unit, settings.time, say)
    say(f"pass: design (statistics, structure, per-unit cross-products; "
        f"{panel.npartitions} partitions)")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        design = panel.design(settings.formula, occasion_effects=settings.occasion_effects,
                              cluster=True)
    say(f"  {design.n_input_rows} rows read, {design.n} used, {design.n_units} units")
    data = data_record(settings, panel, design, source, design.n_input_rows, say)
    return panel, design, data, [str(w.message) for w in caught]


def data_record(settings, panel, design, source, n_read, say):
    """The ``data`` part of results.json (the describe pass, on the formula's columns)."""
    from ..data.formula import screen
    from ..data.lags import without_lags

    formula, lagged = without_lags(settings.formula, panel.columns)
    used = [c for c in dict.fromkeys(list(screen(formula, panel.columns).columns) + lagged)
            if c not in (panel.unit, panel.time) and c in panel.numeric_columns()]
    if not design.has_rows:
        say(f"pass: describe ({len(used)} columns)")
    desc = panel.describe(columns=used)
    return {
        "source": {**source, "n_rows_read": int(n_read)},
        "unit": panel.unit, "time": panel.time, "formula": settings.formula,
        "outcome": design.outcome,
        "structure": json_record(panel.structure()),
        "variables": [json_record(r) for r in _records(desc, "variable")],
        "sample": {"n_rows": design.n, "n_units": design.n_units, "n_dropped": design.n_dropped,
                   "dropped_by_column": dict(design.dropped_by_column)},
        "terms": [{"term": t, "varies_within": bool(design.varies_within[t])}
                  for t in design.terms],
        **dynamic_record(design),
    }


def dynamic_record(design) -> dict:
    """``lags`` (rows left without a lag, by reason) and ``initial_conditions`` (the
    columns of the initial-conditions model, or that it was switched off) for a formula
    with ``lag(...)``; nothing otherwise, so other runs keep their record."""
    lags = getattr(design, "lags", None)
    if lags is None:
        return {}
    out = {"lags": lags.to_record()}
    if lags.has_lagged_outcome:
        ic = getattr(design, "initial", None)
        out["initial_conditions"] = ic.to_record() if ic is not None else {"applied": False}
    return out
