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

from .core import errors, suffstats
from .core.errors import (
    BayespanelError,
    EstimationError,
    FormulaError,
    PanelDataError,
    SamplingWarning,
    SpecificationError,
)
from .core.options import get_option, option_context, set_option
from .core.providers import declare as _declare
from .data import datasets
from .data.design import Design, DesignSpec
from .data.panel import Panel

from .core.version import __version__  # noqa: E402,F401

# Work a lower layer offers and a higher one does (bayespanel.core.providers): a
# posterior's loo() (bayes layer) is bayespanel.analysis.loo.loo, loaded on first use.
_declare("loo", "bayespanel.analysis.loo", "loo")

# name -> (module, attribute or None for the module itself)
_LAZY = {
    "reference": ("reference", None),
    "models": ("bayes", None),
    "posterior": ("bayes.posterior", None),
    "loo": ("analysis.loo", None),
    "partition": ("analysis.partition", None),
    "contrasts": ("analysis.contrasts", None),
    "report": ("report", None),
    "runner": ("app.runner", None),
    "engines": ("data.sources", None),
    "sensitivity": ("analysis.sensitivity", None),
    "Pooled": ("bayes", "Pooled"),
    "RandomIntercept": ("bayes", "RandomIntercept"),
    "WithinBetween": ("bayes", "WithinBetween"),
    "CorrelatedEffects": ("bayes", "CorrelatedEffects"),
    "FixedEffects": ("bayes", "FixedEffects"),
    "Prior": ("bayes", "Prior"),
    "Posterior": ("bayes.posterior", "Posterior"),
    "compare": ("analysis.comparison", "compare"),
    "coef_table": ("analysis.comparison", "coef_table"),
    "design_check": ("analysis.recovery", "design_check"),
}

__all__ = [
    "Panel", "Design", "DesignSpec", "datasets", "errors", "suffstats",
    "BayespanelError", "PanelDataError", "FormulaError", "SpecificationError",
    "EstimationError", "SamplingWarning", "get_option", "set_option", "option_context",
    *sorted(_LAZY),
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
