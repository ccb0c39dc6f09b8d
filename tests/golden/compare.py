"""Compare a run's results.json with a kept one, so that restructuring keeps behaviour.

The kept file ``demo_results.json`` is the demo's results.json from
``python -m bayespanel demo --draws 100 --tune 150 --chains 2 --quiet`` (seed 2026), made by
tests/test_cli_foundation.py::test_module_entry_point_demo. The rules:

* the same entries (every key and list position) and the same text everywhere, except
  what depends on the machine, the clock or the output folder (VOLATILE);
* numbers from closed-form computations (reference fits, specification tests, the data
  description, true values) equal to 1e-9 relative;
* Bayesian numbers: with ``BAYESPANEL_GOLDEN_STRICT=1`` (for whoever changes the
  structure, on one machine) equal to 1e-9 relative, i.e. the same draws for the same
  seed; otherwise (CI on another processor, where the last bits of floating point may
  differ and chains then part) posterior means within half a posterior SD and the other
  Bayesian numbers only present and finite; the verdicts drawn from Bayesian numbers
  against a fixed cut-off (BAYESIAN_VERDICTS: the narrow-interval check's flags and
  message, whose ratios of posterior SD to SE may sit near 0.5) are then compared in
  strict mode only.

A deliberate change of the outputs regenerates the file with
``BAYESPANEL_GOLDEN_UPDATE=1`` and says why in its commit message.
"""

from __future__ import annotations

import json
import math
import os
import re
from pathlib import Path

KEPT = Path(__file__).parent / "demo_results.json"

#: sections, and keys anywhere, whose values depend on the machine, the clock or the folder
VOLATILE_SECTIONS = {"created", "software"}
VOLATILE_KEYS = {"seconds", "compile_cache", "sampler"}
VOLATILE_PATHS = {("settings", "data"), ("data", "source", "file")}
#: (section, key) of texts and flags that follow from Bayesian numbers and a cut-off
BAYESIAN_VERDICTS = {("interval_check", "narrow"), ("interval_check", "message")}
#: top-level sections computed in closed form
EXACT_SECTIONS = {"reference", "tests", "truth", "data"}


def _leaves(obj, path=()):
    if isinstance(obj, dict):
        for k, v in obj.items():
            yield from _leaves(v, path + (str(k),))
    elif isinstance(obj, list):
        for i, v in enumerate(obj):
            yield from _leaves(v, path + (i,))
    else:
        yield path, obj


def _volatile(path):
    return (path[0] in VOLATILE_SECTIONS or path in VOLATILE_PATHS
            or (isinstance(path[-1], str) and path[-1] in VOLATILE_KEYS))


def compare(new: dict, kept: dict, strict: bool | None = None) -> list[str]:
    """Differences between two results.json contents as lines (empty when they agree)."""
    if strict is None:
        strict = os.environ.get("BAYESPANEL_GOLDEN_STRICT") == "1"
    a = {p: v for p, v in _leaves(new) if not _volatile(p)}
    b = {p: v for p, v in _leaves(kept) if not _volatile(p)}
    out = [f"missing: {'/'.join(map(str, p))}" for p in sorted(b.keys() - a.keys(), key=str)]
    out += [f"new: {'/'.join(map(str, p))}" for p in sorted(a.keys() - b.keys(), key=str)]
    sds = {}
    for p, v in b.items():  # posterior SDs of Bayesian coefficients, by the row they sit in
        if p[0] == "models" and p[-1] == "sd":
            sds[p[:-1]] = v
    for p in sorted(a.keys() & b.keys(), key=str):
        x, y = a[p], b[p]
        where = "/".join(map(str, p))
        number = isinstance(y, (int, float)) and not isinstance(y, bool)
        if not number or not isinstance(x, (int, float)) or isinstance(x, bool):
            if not strict and (p[0], p[-1]) in BAYESIAN_VERDICTS:
                continue
            if isinstance(x, str) and isinstance(y, str):  # the analysis file's data path
                x, y = (re.sub(r'(?m)^file = ".*"$', 'file = ""', v) for v in (x, y))
            if x != y and not (_is_path_text(x) and _is_path_text(y)):
                out.append(f"{where}: {x!r} != {y!r}")
            continue
        if not (math.isfinite(x) and math.isfinite(y)):
            if not (math.isnan(x) and math.isnan(y)) and x != y:
                out.append(f"{where}: {x!r} != {y!r}")
            continue
        close = abs(x - y) <= 1e-9 * max(abs(x), abs(y)) + 1e-12
        if p[0] in EXACT_SECTIONS or strict:
            if not close:
                out.append(f"{where}: {x!r} != {y!r}")
        elif p[0] == "models" and p[-1] in ("mean", "estimate") and p[:-1] in sds:
            if abs(x - y) > 0.5 * sds[p[:-1]] + 1e-12:
                out.append(f"{where}: mean {x!r} is more than half an SD "
                           f"({sds[p[:-1]]!r}) from {y!r}")
    return out


def _is_path_text(v):
    return isinstance(v, str) and (v.startswith("/") or "\\" in v)


def check(results_path: Path) -> None:
    """Assert that ``results_path`` agrees with the kept demo results (or update them)."""
    new = json.loads(Path(results_path).read_text("utf-8"))
    if os.environ.get("BAYESPANEL_GOLDEN_UPDATE") == "1":
        KEPT.write_text(json.dumps(new, indent=1, sort_keys=True) + "\n", "utf-8")
        return
    diff = compare(new, json.loads(KEPT.read_text("utf-8")))
    assert not diff, "results.json differs from tests/golden/demo_results.json:\n" + \
        "\n".join(diff[:40]) + (f"\n... and {len(diff) - 40} more" if len(diff) > 40 else "")
