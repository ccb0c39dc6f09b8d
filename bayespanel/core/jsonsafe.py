"""Values made ready for JSON, written once (lower layer: numpy only; pandas objects are
recognised by their type, not imported).

JSON has no NaN or infinity, and numpy's scalar types are not JSON types. Every record
the package writes (results.json, ``to_dict()`` of its results) passes through these
functions: :func:`json_scalar` for one value, :func:`json_record` for a flat record,
:func:`jsonable` for a whole structure.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

__all__ = ["json_scalar", "json_record", "jsonable"]


def json_scalar(v):
    """One value for JSON: numpy booleans, integers and floats become Python ones, a float
    that is NaN or infinite becomes ``None``; anything else is returned as it is."""
    if isinstance(v, (bool, np.bool_)):
        return bool(v)
    if isinstance(v, (int, np.integer)):
        return int(v)
    if isinstance(v, (float, np.floating)):
        v = float(v)
        return v if math.isfinite(v) else None
    return v


def json_record(d: dict) -> dict:
    """A flat record for JSON: :func:`json_scalar` of every value (keys and nested values
    as they are)."""
    return {k: json_scalar(v) for k, v in d.items()}


def jsonable(obj):
    """Convert numpy, pandas and plain Python values to JSON types (NaN and inf to None),
    through dicts (keys made strings), lists, tuples, sets, arrays, Series and DataFrames
    (a list of records, the index as a column); unknown objects become their ``str``."""
    if obj is None or isinstance(obj, str):
        return obj
    if isinstance(obj, (bool, np.bool_, int, np.integer, float, np.floating)):
        return json_scalar(obj)
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, set)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [jsonable(v) for v in obj.tolist()]
    kind = _pandas_type(obj)
    if kind == "Series":
        return {str(k): jsonable(v) for k, v in obj.items()}
    if kind == "DataFrame":
        return [jsonable(r) for r in obj.reset_index().to_dict(orient="records")]
    if kind == "Timestamp":
        return obj.isoformat()
    if isinstance(obj, Path):
        return str(obj)
    if hasattr(obj, "item"):
        return jsonable(obj.item())
    return str(obj)


def _pandas_type(obj) -> str | None:
    """``"Series"``, ``"DataFrame"`` or ``"Timestamp"`` for pandas' classes (and their
    subclasses), else None; read from the class, so this module need not import pandas."""
    for cls in type(obj).__mro__:
        if cls.__module__.startswith("pandas") and cls.__name__ in (
                "Series", "DataFrame", "Timestamp"):
            return cls.__name__
    return None
