"""Reports of a run: ``results.json``, tables (Markdown, LaTeX, CSV), figures, ``report.html``.

Everything here works from the results dictionary alone, so a report can be rebuilt from
a saved ``results.json`` without refitting.
"""

from .html import render
from .results_json import SCHEMA_VERSION, load_results, validate, write_json
from .tables import result_tables, write_tables

__all__ = ["render", "load_results", "validate", "write_json", "write_tables", "result_tables",
           "SCHEMA_VERSION", "write_report"]


def write_report(results: dict, folder) -> "list":
    """Write ``report.html`` and the tables into ``folder``; return the paths written."""
    from pathlib import Path

    from .results_json import write_atomic

    folder = Path(folder)
    paths = write_tables(results, folder)
    paths.append(write_atomic(folder / "report.html", render(results)))
    return paths
