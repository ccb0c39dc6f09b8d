"""bayespanel: Bayesian multilevel models for panel data, beside frequentist reference fits.

>>> import bayespanel as bp
>>> df, truth = bp.datasets.clinic_panel(seed=1)
>>> panel = bp.Panel(df, unit="clinic", time="quarter")
>>> ri = bp.RandomIntercept(panel, truth["formula"])          # doctest: +SKIP
>>> post = ri.sample(draws=1000, chains=4, seed=1)            # doctest: +SKIP
>>> bp.compare({"random": post, "fe": bp.reference.within(panel, truth["formula"])})  # doctest: +SKIP

The heavy stages (PyMC models, LOO, reports, Dask) load on first use, so that checking
and describing a table stays quick.
"""

from importlib import import_module

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

from .version import __version__  # noqa: E402,F401

# name -> (module, attribute or None for the module itself)
_LAZY = {
    "reference": ("reference", None),
    "models": ("models", None),
    "posterior": ("posterior", None),
    "loo": ("loo", None),
    "partition": ("partition", None),
    "contrasts": ("contrasts", None),
    "report": ("report", None),
    "runner": ("runner", None),
    "engines": ("engines", None),
    "sensitivity": ("sensitivity", None),
    "Pooled": ("models", "Pooled"),
    "RandomIntercept": ("models", "RandomIntercept"),
    "WithinBetween": ("models", "WithinBetween"),
    "CorrelatedEffects": ("models", "CorrelatedEffects"),
    "FixedEffects": ("models", "FixedEffects"),
    "Prior": ("models", "Prior"),
    "Posterior": ("posterior", "Posterior"),
    "compare": ("comparison", "compare"),
    "coef_table": ("comparison", "coef_table"),
    "design_check": ("recovery", "design_check"),
}

__all__ = [
    "Panel", "Design", "DesignSpec", "datasets", "errors", "suffstats",
    "BayespanelError", "PanelDataError", "FormulaError", "SpecificationError",
    "EstimationError", "SamplingWarning", *sorted(_LAZY),
]


def __getattr__(name):
    if name in _LAZY:
        mod, attr = _LAZY[name]
        value = import_module(f".{mod}", __name__)
        if attr is not None:
            value = getattr(value, attr)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'bayespanel' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_LAZY))
