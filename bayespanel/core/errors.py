"""The package's error and warning hierarchy.

Every error a user can trigger by bad input derives from :class:`BayespanelError` and,
where users expect it, from :class:`ValueError`, so ``except ValueError`` still works.
"""

from __future__ import annotations

__all__ = [
    "BayespanelError",
    "PanelDataError",
    "FormulaError",
    "SpecificationError",
    "EstimationError",
    "FolderInUseError",
    "OutputError",
    "SamplingWarning",
    "DataHandlingWarning",
]


class BayespanelError(Exception):
    """Base class of all errors raised by bayespanel."""


class PanelDataError(BayespanelError, ValueError):
    """The table cannot be used as a panel (names the column, unit or occasion at fault)."""


class FormulaError(BayespanelError, ValueError):
    """A formula is malformed, unsafe or names unknown columns."""


class SpecificationError(BayespanelError, ValueError):
    """An option has a value outside its valid choices (names the option and the choices)."""


class EstimationError(BayespanelError, RuntimeError):
    """A fit cannot proceed (for example no within variation left)."""


class FolderInUseError(SpecificationError):
    """The output folder is being written by another run (the message names it)."""


class OutputError(BayespanelError, OSError):
    """The outputs could not be written (disk full, a file in the way); the folder keeps
    the run it held before. The command line exits with 1, not 2: the input was fine."""


class SamplingWarning(UserWarning):
    """Divergences, high R-hat, low ESS or high Pareto k."""


class DataHandlingWarning(UserWarning):
    """Rows or units were dropped or altered on the way to a fit (always reported)."""


def choices_error(option: str, value, choices) -> SpecificationError:
    """Build the standard message for an option outside its valid choices."""
    listed = ", ".join(repr(c) for c in choices)
    return SpecificationError(f"{option}={value!r} is not valid; choose one of {listed}")
