"""``results.json``: every number of a run in one versioned, documented file.

The layout is fixed by ``bayespanel/schema/results.schema.json`` (documented in
docs/results-schema.md). Files are written atomically (a temporary file in the same
folder, then :func:`os.replace`), so an interrupted run never leaves half a file behind.
Non-finite numbers become ``null`` because JSON has no NaN.
"""

from __future__ import annotations

import json
import math
import os
import tempfile
from importlib import resources
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import SpecificationError

__all__ = [
    "SCHEMA_NAME", "SCHEMA_VERSION", "jsonable", "dumps", "write_atomic", "write_json",
    "load_results", "schema", "validate",
]

SCHEMA_NAME = "bayespanel-results"
SCHEMA_VERSION = "1.1.0"


def jsonable(obj):
    """Convert numpy, pandas and plain Python values to JSON types (NaN and inf to None)."""
    if obj is None or isinstance(obj, (bool, str)):
        return obj
    if isinstance(obj, (np.bool_,)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        return v if math.isfinite(v) else None
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, set)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [jsonable(v) for v in obj.tolist()]
    if isinstance(obj, pd.Series):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, pd.DataFrame):
        return [jsonable(r) for r in obj.reset_index().to_dict(orient="records")]
    if isinstance(obj, (pd.Timestamp,)):
        return obj.isoformat()
    if isinstance(obj, Path):
        return str(obj)
    if hasattr(obj, "item"):
        return jsonable(obj.item())
    return str(obj)


def dumps(results: dict) -> str:
    """Serialise deterministically (sorted keys are not used: the order is the schema's)."""
    return json.dumps(jsonable(results), indent=1, ensure_ascii=False, allow_nan=False) + "\n"


def write_atomic(path, data: bytes | str) -> Path:
    """Write ``data`` to ``path`` through a temporary file and an atomic rename."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    if isinstance(data, str):
        data = data.encode("utf-8")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, _file_mode(path))  # mkstemp makes 0600; keep the usual permissions
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return path


def _file_mode(path: Path) -> int:
    """The replaced file's permissions, or those a new file gets under the umask."""
    try:
        return path.stat().st_mode & 0o777
    except FileNotFoundError:
        umask = os.umask(0)
        os.umask(umask)
        return 0o666 & ~umask


def write_json(path, results: dict) -> Path:
    return write_atomic(path, dumps(results))


def schema() -> dict:
    """The JSON Schema (draft 2020-12) of ``results.json``."""
    text = resources.files("bayespanel").joinpath("schema/results.schema.json").read_text("utf-8")
    return json.loads(text)


def validate(results: dict) -> None:
    """Validate against the schema; raise :class:`SpecificationError` naming the first fault.

    Needs the ``jsonschema`` package (a test extra); without it, only the schema name and
    version are checked.
    """
    data = jsonable(results)
    if data.get("schema") != SCHEMA_NAME:
        raise SpecificationError(f"not a bayespanel results file (schema={data.get('schema')!r})")
    major = str(data.get("schema_version", "")).split(".")[0]
    if major != SCHEMA_VERSION.split(".")[0]:
        raise SpecificationError(
            f"results file has schema_version={data.get('schema_version')!r}; this bayespanel "
            f"reads version {SCHEMA_VERSION.split('.')[0]}.x")
    try:
        import jsonschema
    except ModuleNotFoundError:  # pragma: no cover - jsonschema ships with the test extra
        return
    validator = jsonschema.Draft202012Validator(schema())
    errors = sorted(validator.iter_errors(data), key=lambda e: list(e.absolute_path))
    if errors:
        e = errors[0]
        where = "/".join(str(p) for p in e.absolute_path) or "(top level)"
        raise SpecificationError(f"results.json does not match its schema at {where}: {e.message}")


def load_results(path) -> dict:
    """Read a ``results.json`` (or the folder holding one) and check its schema version."""
    path = Path(path)
    if path.is_dir():
        path = path / "results.json"
    if not path.exists():
        raise SpecificationError(f"no results file at {str(path)!r}; run `bayespanel fit` first")
    try:
        data = json.loads(path.read_text("utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise SpecificationError(f"{str(path)!r} is not valid JSON: {exc}") from None
    validate(data)
    return data
