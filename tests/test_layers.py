"""The package's imports point one way: no cycles, no lower layer importing a higher one,
no private name used outside its package; and its modules stay under MAX_LINES lines.

Every ``import`` and ``from ... import`` statement of every module is read with ``ast``,
at module level and inside functions and classes alike (an import inside a function is a
dependency all the same, only a later one). Relative imports are resolved the way the
Python language reference (section 5.7, "Package relative imports") resolves them, and
``from P import name`` counts as an import of the submodule ``P.name`` when one exists,
else of ``P`` itself. Nothing is imported to build the graph: the files are only parsed.

The layers, lowest first, are ``LAYERS`` below. A module may import its own layer and the
layers under it. Where the package breaks a rule today, the breach is listed in one of the
``KNOWN_*`` sets. Those sets may only shrink: each test also fails when an entry no longer
occurs, so an entry is removed in the same change that removes the breach, and a new breach
fails until its import is fixed (by moving the shared lower piece down, not by hiding the
import).
"""

from __future__ import annotations

import ast
import sys
import textwrap
from dataclasses import dataclass
from pathlib import Path

import pytest

PACKAGE = "bayespanel"
ROOT = Path(__file__).resolve().parents[1] / PACKAGE

# Lowest first. A module's layer is that of the longest entry its dotted name (without the
# leading "bayespanel.") starts with; "" is the package itself (its __init__, the public
# face). The package's folders are its layers (docs/architecture.md). A new module that
# matches no entry fails test_every_module_has_a_layer.
LAYERS: list[tuple[str, tuple[str, ...]]] = [
    # errors, term labels, the sufficient statistics (iid and AR(1)) and what derives from
    # them, the densities, shared mathematics, linear algebra, text safe to print and draw,
    # budgets and the output folder: numpy and scipy at most, nothing of the package above
    ("core", ("core",)),
    ("kinds", ("kinds",)),  # the registry of model kinds (reads its builders by name)
    # panels, columns, formulas, files, designs, data sources (Dask), the demo data and
    # the result shape (the names every result answers with and the partition result
    # type, which reference fits and posteriors both return; it needs pandas)
    ("data", ("data",)),
    ("reference", ("reference",)),
    ("bayes", ("bayes",)),
    ("analysis", ("analysis",)),
    ("report", ("report",)),
    ("app", ("app", "__main__", "")),
]

# Third-party packages the core layer may import (numba compiles the one-pass kernel).
CORE_THIRD_PARTY = {"numpy", "scipy", "numba"}

# Imports ("importer", "imported") that lie on an import cycle today. test_no_import_cycles
# compares this set with the edges on cycles exactly.
KNOWN_CYCLE_EDGES: set[tuple[str, str]] = set()

# Imports ("importer", "imported") from a lower layer to a higher one today.
KNOWN_UPWARD: set[tuple[str, str]] = set()

# A module holds one job and stays under about this many lines (DEVELOPERS.md); a module
# that grows past it is split by job, its public names re-exported where they lived.
MAX_LINES = 800

# Modules over MAX_LINES today (dotted names); the set only shrinks.
KNOWN_LONG: set[str] = set()

# Private names used outside their package today: ("importer", "owner:name"), where owner
# is the module or package that holds ``_name`` (a private module is "package:_module").
KNOWN_PRIVATE: set[tuple[str, str]] = set()


@dataclass(frozen=True)
class Import:
    importer: str    # dotted module name
    imported: str    # dotted module name inside the package
    name: str | None  # the name taken from it (None for ``import x`` or a submodule)
    line: int


def module_names(root: Path) -> dict[str, Path]:
    """Dotted names of the package's modules (a package is named by its __init__)."""
    out = {}
    for path in sorted(root.rglob("*.py")):
        parts = list(path.relative_to(root.parent).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts.pop()
        out[".".join(parts)] = path
    return out


def _owning_module(name: str, modules) -> str | None:
    while name and name not in modules:
        name = name.rpartition(".")[0]
    return name or None


def _package_of(module: str, modules) -> str:
    """The package a module belongs to (a package's __init__ belongs to the package)."""
    if modules[module].name == "__init__.py":
        return module
    return module.rpartition(".")[0]


def read_imports(root: Path) -> tuple[list[Import], dict[str, list[tuple[str, int]]]]:
    """Every import of the package by the package, and the private attributes read off
    imported modules (``mod._x``) by each module, as ``(owner:_x, line)``."""
    modules = module_names(root)
    top = root.name
    imports: list[Import] = []
    attributes: dict[str, list[tuple[str, int]]] = {}
    for module, path in modules.items():
        tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
        package = _package_of(module, modules)
        bound: dict[str, str] = {}  # local name -> module it stands for
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                for alias in node.names:
                    if alias.name.split(".")[0] != top:
                        continue
                    target = _owning_module(alias.name, modules)
                    imports.append(Import(module, target, None, node.lineno))
                    if alias.asname:
                        bound[alias.asname] = target
                    else:
                        bound[alias.name.split(".")[0]] = top
            elif isinstance(node, ast.ImportFrom):
                if node.level:
                    base = package.split(".")
                    base = base[: len(base) - (node.level - 1)]
                    source = ".".join(base + ([node.module] if node.module else []))
                else:
                    source = node.module or ""
                if source.split(".")[0] != top:
                    continue
                for alias in node.names:
                    sub = f"{source}.{alias.name}"
                    if sub in modules:
                        imports.append(Import(module, sub, None, node.lineno))
                        bound[alias.asname or alias.name] = sub
                    else:
                        imports.append(Import(module, _owning_module(source, modules),
                                              alias.name, node.lineno))
        for node in ast.walk(tree):
            if (isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name)
                    and node.value.id in bound and _is_private(node.attr)):
                owner = bound[node.value.id]
                attributes.setdefault(module, []).append((f"{owner}:{node.attr}",
                                                          node.lineno))
    return imports, attributes


def _is_private(name: str) -> bool:
    return name.startswith("_") and not (name.startswith("__") and name.endswith("__"))


def layer_of(module: str, top: str = PACKAGE, layers=None) -> int | None:
    layers = LAYERS if layers is None else layers
    rel = module[len(top) + 1:] if module != top else ""
    best, best_len = None, -1
    for rank, (_, prefixes) in enumerate(layers):
        for prefix in prefixes:
            matches = (rel == prefix or rel.startswith(prefix + ".")) if prefix else rel == ""
            if matches and len(prefix) > best_len:
                best, best_len = rank, len(prefix)
    return best


def edges(imports) -> dict[tuple[str, str], list[Import]]:
    out: dict[tuple[str, str], list[Import]] = {}
    for imp in imports:
        if imp.importer != imp.imported:
            out.setdefault((imp.importer, imp.imported), []).append(imp)
    return out


def strongly_connected(nodes, pairs) -> dict[str, int]:
    """Component number of each node (Tarjan 1972, iterative)."""
    graph = {n: sorted({b for a, b in pairs if a == n}) for n in nodes}
    index, low, comp = {}, {}, {}
    stack, on_stack, counter = [], set(), 0
    for start in sorted(graph):
        if start in index:
            continue
        work = [(start, iter(graph[start]))]
        index[start] = low[start] = counter
        counter += 1
        stack.append(start)
        on_stack.add(start)
        while work:
            node, children = work[-1]
            child = next(children, None)
            if child is not None:
                if child not in index:
                    index[child] = low[child] = counter
                    counter += 1
                    stack.append(child)
                    on_stack.add(child)
                    work.append((child, iter(graph[child])))
                elif child in on_stack:
                    low[node] = min(low[node], index[child])
                continue
            work.pop()
            if work:
                low[work[-1][0]] = min(low[work[-1][0]], low[node])
            if low[node] == index[node]:
                while True:
                    member = stack.pop()
                    on_stack.discard(member)
                    comp[member] = index[node]
                    if member == node:
                        break
    return comp


def cycle_edges(modules, imports) -> set[tuple[str, str]]:
    """The imports that lie on some cycle: both ends in one strongly connected component."""
    pairs = set(edges(imports))
    comp = strongly_connected(modules, pairs)
    return {(a, b) for a, b in pairs if comp[a] == comp[b]}


def upward_edges(imports, top: str = PACKAGE, layers=None) -> set[tuple[str, str]]:
    rank = {m: layer_of(m, top, layers) for pair in edges(imports) for m in pair}
    return {(a, b) for a, b in edges(imports)
            if None not in (rank[a], rank[b]) and rank[a] < rank[b]}


def private_uses(modules, imports, attributes) -> set[tuple[str, str]]:
    """Private names (``_x``) used outside the package that holds them.

    A private module ``P._m`` belongs to package ``P``; a private name ``_x`` of module
    ``M`` belongs to the package of ``M``. Only modules of that same package (not its
    sub-packages, not its parents) may use them.
    """
    out = set()

    def owner_package(dotted: str) -> str:
        return _package_of(dotted, modules)

    for imp in imports:
        here = _package_of(imp.importer, modules)
        # a private module anywhere on the imported path
        parts = imp.imported.split(".")
        for i, part in enumerate(parts):
            if _is_private(part):
                holder = ".".join(parts[:i])
                if here != holder:
                    out.add((imp.importer, f"{holder}:{part}"))
                break
        if imp.name is not None and _is_private(imp.name):
            if here != owner_package(imp.imported):
                out.add((imp.importer, f"{imp.imported}:{imp.name}"))
    for importer, uses in attributes.items():
        here = _package_of(importer, modules)
        for use, _ in uses:
            owner, name = use.split(":")
            if here != owner_package(owner):
                out.add((importer, use))
    return out


def _where(imports, pairs) -> str:
    by_edge = edges(imports)
    lines = []
    for a, b in sorted(pairs):
        places = ", ".join(f"line {n}" for n in sorted({i.line for i in by_edge.get((a, b), [])}))
        lines.append(f"  ({a!r}, {b!r}),  # {places}")
    return "\n".join(lines)


@pytest.fixture(scope="module")
def graph():
    modules = module_names(ROOT)
    imports, attributes = read_imports(ROOT)
    return modules, imports, attributes


def test_every_module_has_a_layer(graph):
    modules, _, _ = graph
    missing = sorted(m for m in modules if layer_of(m) is None)
    assert missing == [], f"place these modules in LAYERS (tests/test_layers.py): {missing}"


def test_no_import_cycles(graph):
    modules, imports, _ = graph
    found = cycle_edges(modules, imports)
    new = found - KNOWN_CYCLE_EDGES
    gone = KNOWN_CYCLE_EDGES - found
    assert not new, ("imports that close a cycle between modules:\n" + _where(imports, new))
    assert not gone, ("KNOWN_CYCLE_EDGES lists imports that no longer lie on a cycle; "
                      "remove them:\n" + _where(imports, gone))


def test_lower_layers_import_nothing_above(graph):
    _, imports, _ = graph
    found = upward_edges(imports)
    new = found - KNOWN_UPWARD
    gone = KNOWN_UPWARD - found
    assert not new, ("imports of a higher layer from a lower one:\n" + _where(imports, new))
    assert not gone, ("KNOWN_UPWARD lists imports that no longer occur; remove them:\n"
                      + "\n".join(f"  {e!r}," for e in sorted(gone)))


def test_no_private_names_across_packages(graph):
    modules, imports, attributes = graph
    found = private_uses(modules, imports, attributes)
    new = found - KNOWN_PRIVATE
    gone = KNOWN_PRIVATE - found
    assert not new, ("private names used outside their package:\n"
                     + "\n".join(f"  {e!r}," for e in sorted(new)))
    assert not gone, ("KNOWN_PRIVATE lists uses that no longer occur; remove them:\n"
                      + "\n".join(f"  {e!r}," for e in sorted(gone)))


def test_modules_stay_under_the_line_limit():
    found = {m for m, path in module_names(ROOT).items()
             if len(path.read_text(encoding="utf-8").splitlines()) > MAX_LINES}
    new, gone = found - KNOWN_LONG, KNOWN_LONG - found
    assert not new, (f"modules over {MAX_LINES} lines (split them by job): {sorted(new)}")
    assert not gone, f"KNOWN_LONG lists modules no longer over {MAX_LINES} lines: {sorted(gone)}"


def test_core_imports_numpy_and_scipy_only():
    core = [m for m, p in module_names(ROOT).items() if layer_of(m) == 0]
    stdlib = set(sys.stdlib_module_names)
    bad = []
    for module in core:
        path = module_names(ROOT)[module]
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and not node.level:
                names = [node.module or ""]
            else:
                continue
            for name in names:
                first = name.split(".")[0]
                if first not in stdlib and first not in CORE_THIRD_PARTY and first != PACKAGE:
                    bad.append((module, name, node.lineno))
    assert bad == []


# The checks above on a package made up here, so that each can be seen to fail.

_TOY_LAYERS = [("low", ("base", "util")), ("mid", ("mid",)), ("high", ("top", ""))]
_TOY = {
    "__init__.py": "from . import base\n",
    "base.py": "import toy.util\n\ndef f():\n    from .mid import thing\n",
    "util.py": "from toy import base as b\nb._secret\n",
    "mid/__init__.py": "",
    "mid/thing.py": "from ..top import run\nfrom ..util import _helper\nfrom .. import base\nbase._secret\n",
    "mid/_inner.py": "",
    "top.py": "from .mid import _inner\nfrom .mid.thing import x\n",
}


@pytest.fixture()
def toy(tmp_path):
    for name, text in _TOY.items():
        path = tmp_path / "toy" / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(textwrap.dedent(text))
    root = tmp_path / "toy"
    modules = module_names(root)
    imports, attributes = read_imports(root)
    return modules, imports, attributes


def test_the_walker_sees_function_level_relative_and_absolute_imports(toy):
    modules, imports, _ = toy
    assert set(modules) == {"toy", "toy.base", "toy.util", "toy.mid", "toy.mid.thing",
                            "toy.mid._inner", "toy.top"}
    assert set(edges(imports)) == {
        ("toy", "toy.base"),
        ("toy.base", "toy.util"),         # absolute
        ("toy.base", "toy.mid.thing"),    # relative, inside a function, a submodule
        ("toy.util", "toy.base"),         # absolute "from toy import base"
        ("toy.mid.thing", "toy.top"),     # two dots, a name from a module
        ("toy.mid.thing", "toy.util"),
        ("toy.mid.thing", "toy.base"),
        ("toy.top", "toy.mid._inner"),
        ("toy.top", "toy.mid.thing"),
    }


def test_the_checks_fail_on_a_cycle_an_upward_import_and_a_private_name(toy):
    modules, imports, attributes = toy
    assert cycle_edges(modules, imports) == {
        ("toy.base", "toy.util"), ("toy.util", "toy.base"),
        ("toy.base", "toy.mid.thing"), ("toy.mid.thing", "toy.util"),
        ("toy.mid.thing", "toy.top"), ("toy.top", "toy.mid.thing"),
        ("toy.mid.thing", "toy.base"),
    }
    assert upward_edges(imports, "toy", _TOY_LAYERS) == {
        ("toy.base", "toy.mid.thing"), ("toy.mid.thing", "toy.top"),
    }
    assert private_uses(modules, imports, attributes) == {
        ("toy.mid.thing", "toy.util:_helper"),   # a private name of a module
        ("toy.mid.thing", "toy.base:_secret"),   # read off an imported module
        ("toy.top", "toy.mid:_inner"),           # a private module
    }
