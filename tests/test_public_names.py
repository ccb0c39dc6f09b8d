"""The package's public names stay what they are whatever was imported first.

Python's import system sets ``bayespanel.<sub>`` to the submodule when ``bayespanel.<sub>``
is imported, so a lazily exported function that shares its name with a submodule
(``bp.design_check`` beside ``bayespanel/design_check.py``) became the module once anything
imported that module first, and ``bp.design_check(...)`` then failed with "'module' object
is not callable" depending on test order. This checks the rule that prevents it.
"""

import pkgutil
import subprocess
import sys

import bayespanel as bp


def test_no_exported_function_or_class_shares_its_name_with_a_submodule():
    # Outside source: the Python Language Reference, "The import system", section 5.4.2
    # (Submodules): loading a submodule binds it as an attribute of its parent package.
    submodules = {m.name for m in pkgutil.iter_modules(bp.__path__)}
    clashes = [name for name, (_, attr) in bp._LAZY.items()
               if attr is not None and name in submodules]
    assert clashes == []


def test_exported_callables_stay_callable_after_every_submodule_is_imported():
    # Outside reference: CPython's own import machinery (importlib.import_module) in a
    # fresh interpreter binds each submodule on the package (Language Reference 5.4.2).
    # In a fresh interpreter: import every submodule first, then use the lazy names.
    code = (
        "import importlib, pkgutil, bayespanel as bp\n"
        "for m in pkgutil.iter_modules(bp.__path__):\n"
        "    m.name != '__main__' and importlib.import_module('bayespanel.' + m.name)\n"
        "bad = [n for n, (_, a) in bp._LAZY.items() if a is not None and not callable(getattr(bp, n))]\n"
        "print(bad)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True)
    assert out.stdout.strip() == "[]"
