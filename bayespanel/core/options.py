"""Package options: choices a user makes once for a session, read when a function runs.

``interval`` is the probability of every interval a function reports when it is not given
one (``summary()``, ``table()``, ``interval()``, ``icc_table()``,
``average_marginal_effects()``, contrasts, occasion effects, the design check's figure,
predictive checks) and the default of a run's ``interval`` setting (``bayespanel fit
--interval``). It starts at 0.95 (:data:`bayespanel.data.resultshape.DEFAULT_INTERVAL`).

>>> import bayespanel as bp
>>> bp.get_option("interval")
0.95
>>> with bp.option_context(interval=0.9):
...     bp.get_option("interval")
0.9

This module is in the core layer: it imports nothing of the package above ``errors``.
"""

from __future__ import annotations

from contextlib import contextmanager

from .errors import SpecificationError, choices_error

__all__ = ["get_option", "set_option", "option_context", "resolve_prob", "OPTIONS"]

#: every option and its starting value
OPTIONS = {"interval": 0.95}

_values = dict(OPTIONS)


def _checked(name: str, value):
    if name not in OPTIONS:
        raise choices_error("option", name, list(OPTIONS))
    if name == "interval":
        if isinstance(value, bool) or not isinstance(value, (int, float)) \
                or not 0 < value < 1:
            raise SpecificationError(f"interval={value!r} is not valid; choose a number "
                                     "strictly between 0 and 1")
        return float(value)
    return value


def get_option(name: str):
    """The current value of the option ``name`` (one of :data:`OPTIONS`)."""
    if name not in OPTIONS:
        raise choices_error("option", name, list(OPTIONS))
    return _values[name]


def set_option(name: str, value):
    """Set the option ``name`` for the rest of the session; returns its previous value.

    Raises :class:`~bayespanel.errors.SpecificationError` naming the option for an
    unknown name or a value out of range (``interval``: strictly between 0 and 1).
    """
    value = _checked(name, value)
    previous, _values[name] = _values[name], value
    return previous


@contextmanager
def option_context(**options):
    """Set options inside a ``with`` block only (restored on leaving it, on error too)."""
    checked = {name: _checked(name, value) for name, value in options.items()}
    previous = {name: _values[name] for name in checked}
    _values.update(checked)
    try:
        yield
    finally:
        _values.update(previous)


def resolve_prob(prob) -> float:
    """``prob`` checked (a float strictly between 0 and 1), or the ``interval`` option
    when ``prob`` is None."""
    if prob is None:
        return _values["interval"]
    if isinstance(prob, bool) or not isinstance(prob, (int, float)) or not 0 < prob < 1:
        raise SpecificationError(f"prob={prob!r} is not valid; choose a number strictly "
                                 "between 0 and 1")
    return float(prob)
