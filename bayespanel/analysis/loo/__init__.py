"""Leave-one-out cross-validation at the unit and the occasion level.

>>> loo_u = bp.loo.loo(post, level="unit")          # doctest: +SKIP
>>> loo_o = post.loo(level="occasion")              # doctest: +SKIP

``level="unit"`` answers "how well does the model predict a new unit?"; ``level="occasion"``
answers "how well does it predict a new occasion of a unit it has seen?". See
docs/comparison.md.
"""

from .pointwise import holdout_loglik, pointwise_loglik
from .psis import kfold, loo, loo_subsample, psis_arrays, refit_draws
from .subsample import plpd
from .reference_cv import reference_cv
from .result import LOOResult
from ...bayes.draws import FitDraws, outcome_measure
from ._draws import LEVELS, check_level, from_draws, from_posterior

__all__ = ["loo", "kfold", "loo_subsample", "reference_cv", "pointwise_loglik",
           "holdout_loglik", "plpd", "psis_arrays", "refit_draws", "LOOResult", "LEVELS",
           "FitDraws", "from_draws", "from_posterior", "check_level", "outcome_measure"]
