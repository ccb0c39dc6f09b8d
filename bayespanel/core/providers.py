"""Work a lower layer offers under a name and a higher layer carries out.

The package's imports point down (tests/test_layers.py), yet a posterior (bayes layer)
offers ``post.loo(...)``, whose machinery (PSIS, exact refits, sub-sampling) belongs to the
analysis layer above it. The posterior asks for the provider of ``"loo"`` by name; the
package's top module (``bayespanel/__init__.py``, the layer that may import every other)
declares which module and attribute provide it. Nothing is imported when a provider is
declared: the module loads the first time the work is asked for, so ``import bayespanel``
stays quick.

>>> from bayespanel.core import providers
>>> providers.provider("loo").__module__                      # doctest: +SKIP
'bayespanel.analysis.loo.psis'

Declared today (in ``bayespanel/__init__.py``):

``"loo"``   :func:`bayespanel.analysis.loo.loo`, behind ``Posterior.loo`` and
            ``LatentPosterior.loo``
"""

from __future__ import annotations

from importlib import import_module

__all__ = ["declare", "provider", "declared"]

_DECLARED: dict[str, tuple[str, str]] = {}


def declare(name: str, module: str, attribute: str) -> None:
    """Declare that ``attribute`` of the module ``module`` (an absolute dotted name) does
    the work called ``name``. A later declaration of the same name replaces the earlier
    one (a test may put its own provider in place)."""
    _DECLARED[name] = (module, attribute)


def declared() -> dict[str, tuple[str, str]]:
    """A copy of the declarations: name -> (module, attribute)."""
    return dict(_DECLARED)


def provider(name: str):
    """The callable declared for ``name``, its module imported on first use.

    Raises
    ------
    LookupError
        When nothing declares ``name`` (the message names it and the declared names).
    """
    try:
        module, attribute = _DECLARED[name]
    except KeyError:
        raise LookupError(f"no provider is declared for {name!r}; declared: "
                          f"{sorted(_DECLARED)!r} (bayespanel/__init__.py declares them)") \
            from None
    return getattr(import_module(module), attribute)
