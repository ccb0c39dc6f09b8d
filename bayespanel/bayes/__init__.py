"""Bayesian Gaussian panel models built as PyMC graphs.

>>> import bayespanel as bp
>>> df, truth = bp.datasets.clinic_panel(seed=1)
>>> panel = bp.Panel(df, unit="clinic", time="quarter")
>>> m = bp.models.WithinBetween(panel, "satisfaction ~ staffing + rural")
>>> post = m.sample(draws=500, chains=2, seed=1, progress=False)  # doctest: +SKIP

See :mod:`bayespanel.bayes.builders` for the five builders, :mod:`.priors` for the
priors and :mod:`.gaussian` for the likelihood.
"""

from ..core import gaussian
from . import priors
from .builders import (
    BUILDERS,
    CorrelatedEffects,
    FixedEffects,
    GaussianModel,
    ModelSpec,
    Pooled,
    RandomIntercept,
    WithinBetween,
)
from .priors import Prior
from . import latentpost  # noqa: F401  (registers LatentPosterior's files with Posterior.load)

__all__ = ["Pooled", "RandomIntercept", "WithinBetween", "CorrelatedEffects", "FixedEffects",
           "GaussianModel", "ModelSpec", "Prior", "BUILDERS", "gaussian", "priors"]
