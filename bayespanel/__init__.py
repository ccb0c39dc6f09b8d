"""bayespanel: Bayesian multilevel models for panel data, beside frequentist reference fits.

>>> import bayespanel as bp
>>> df, truth = bp.datasets.clinic_panel(seed=1)
>>> panel = bp.Panel(df, unit="clinic", time="quarter")
"""

from . import datasets, errors, suffstats
from .design import Design, DesignSpec
from .errors import (
    BayespanelError,
    EstimationError,
    FormulaError,
    PanelDataError,
    SamplingWarning,
    SpecificationError,
)
from .panel import Panel

__version__ = "0.1.0"

__all__ = [
    "Panel", "Design", "DesignSpec", "datasets", "errors", "suffstats",
    "BayespanelError", "PanelDataError", "FormulaError", "SpecificationError",
    "EstimationError", "SamplingWarning",
]


def _optional_imports():
    """Attach later stages when present (kept apart so the foundation imports alone)."""
    import importlib

    g = globals()
    for mod in ("reference", "models", "posterior", "loo", "report"):
        try:
            g[mod] = importlib.import_module(f".{mod}", __name__)
        except ModuleNotFoundError as exc:  # pragma: no cover - only while stages are missing
            if exc.name != f"{__name__}.{mod}":
                raise


_optional_imports()
