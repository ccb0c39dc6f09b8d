"""``results.json``: every number of a run in one versioned, documented file.

The layout is fixed by ``bayespanel/schema/results.schema.json`` (documented in
docs/results-schema.md). Files are written atomically (a temporary file in the same
folder, then :func:`os.replace`), so an interrupted run never leaves half a file behind.
Non-finite numbers become ``null`` because JSON has no NaN.
"""

from __future__ import annotations

import json
from importlib import resources
from pathlib import Path

from .. import kinds
from ..core.errors import SpecificationError
from ..core.jsonsafe import jsonable
from ..core.outputs import write_atomic

__all__ = [
    "SCHEMA_NAME", "SCHEMA_VERSION", "jsonable", "dumps", "write_atomic", "write_json",
    "load_results", "schema", "validate", "upgrade", "RENAMED",
]

SCHEMA_NAME = "bayespanel-results"
SCHEMA_VERSION = "1.5.0"

#: keys renamed by a minor version (1.2, 1.4 and 1.5: one key per quantity), as
#: (path, old, new) where path reaches the records under ``models[]`` that hold the key
#: (a record, or a list of records)
RENAMED = {(1, 2): ((("coefficients",), "mean", "estimate"), (("scale",), "mean", "estimate"),
                    (("loo",), "n_high_k", "n_high_pareto_k")),
           (1, 4): ((("contrasts",), "mean", "estimate"),
                    (("average_marginal_effects",), "mean", "estimate")),
           (1, 5): ((("variance_partition", "summary"), "mean", "estimate"),
                    (("variance_partition", "theta"), "mean", "estimate"))}


def dumps(results: dict) -> str:
    """Serialise deterministically (sorted keys are not used: the order is the schema's)."""
    return json.dumps(jsonable(results), indent=1, ensure_ascii=False, allow_nan=False) + "\n"


def write_json(path, results: dict) -> Path:
    return write_atomic(path, dumps(results))


def schema() -> dict:
    """The JSON Schema (draft 2020-12) of ``results.json``.

    The names a model and a reference fit may have are those registered in
    :mod:`bayespanel.kinds` (the file lists the built-in ones)."""
    text = resources.files("bayespanel").joinpath("schema/results.schema.json").read_text("utf-8")
    out = json.loads(text)
    out["$defs"]["model"]["properties"]["name"]["enum"] = list(kinds.model_names())
    out["$defs"]["reference_fit"]["properties"]["name"]["enum"] = list(kinds.reference_names())
    return out


def validate(results: dict) -> None:
    """Validate against the schema; raise :class:`SpecificationError` naming the first fault.

    Needs the ``jsonschema`` package (a test extra); without it, only the schema name and
    version are checked.
    """
    if not isinstance(results, dict):
        raise SpecificationError(f"not a bayespanel results file (a JSON "
                                 f"{type(results).__name__}, not an object)")
    try:
        _validate(jsonable(results))
    except RecursionError:
        raise SpecificationError("not a bayespanel results file: it nests arrays or objects "
                                 "too deeply") from None


def _short(v, width: int = 60) -> str:
    text = repr(v)
    return text if len(text) <= width else text[:width] + "..."


def _validate(data: dict) -> None:
    if data.get("schema") != SCHEMA_NAME:
        raise SpecificationError(f"not a bayespanel results file "
                                 f"(schema={_short(data.get('schema'))})")
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
    from ..data.io import regular_file
    from ..core.outputs import settle_for

    path = Path(path)
    if path.is_dir():
        path = path / "results.json"
    settle_for(path)  # a run folder a killed run left mid-publish is finished first
    if not path.exists():
        raise SpecificationError(f"no results file at {str(path)!r}; run `bayespanel fit` first")
    path = regular_file(path, "results file", SpecificationError)
    try:
        data = json.loads(path.read_text("utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise SpecificationError(f"{str(path)!r} is not valid JSON: {exc}") from None
    except RecursionError:
        raise SpecificationError(f"{str(path)!r} nests arrays or objects too deeply to be a "
                                 "results file") from None
    except OSError as exc:
        raise SpecificationError(f"cannot read {str(path)!r}: {exc.strerror or exc}") from None
    validate(upgrade(data))
    return data


def upgrade(data: dict) -> dict:
    """A results file of an older 1.y version with the keys :data:`RENAMED` since (in
    place; returned; its ``schema_version`` stays as written). Files of this version, and anything that is not a 1.y results file,
    are returned as they are (:func:`validate` then says what is wrong)."""
    try:
        major, minor = (int(x) for x in str(data.get("schema_version")).split(".")[:2])
    except (ValueError, AttributeError):
        return data
    if major != int(SCHEMA_VERSION.split(".")[0]):
        return data
    for (_, since), renames in sorted(RENAMED.items()):
        if minor >= since:
            continue
        for model in data.get("models") or []:
            for path, old, new in renames:
                part = model
                for where in path:
                    part = part.get(where) if isinstance(part, dict) else None
                for rec in part if isinstance(part, list) else [part]:
                    if isinstance(rec, dict) and old in rec and new not in rec:
                        rec[new] = rec.pop(old)
    return data
