"""Random intercept: a normal unit baseline; its reference fit is random-effects GLS.

One file of the registry (:mod:`bayespanel.kinds`): its column map, reference fit and model.
"""

from ..core.terms import AS_IS
from .registry import ColumnMap, ModelKind, ReferenceKind

# one coefficient carries both effects
COLUMNS = ColumnMap("random", within=((AS_IS, 1),), between=((AS_IS, 1),))

REFERENCE = ReferenceKind(
    "random", "Random effects (GLS)",
    "Feasible GLS with variance components estimated by the method named beside it.",
    unit_effects="random", variance_components=True,
    notes=(
        "The unit intercepts are random, with one variance, and uncorrelated with "
        "every covariate on every occasion (the Hausman and Mundlak tests check "
        "this).",
        "Within and between effects of each covariate are equal (one "
        "coefficient).",
        "Classical errors: homoskedastic unit effects and occasion errors.",
    ),
)

MODEL = ModelKind(
    "random_intercept", "RandomIntercept", "bayespanel.bayes.builders:RandomIntercept",
    columns="random", unit_effects="random", reference="random",
    title="Random intercept",
    assumptions="Each unit has its own baseline, drawn from a normal distribution whose "
    "SD is the unit SD. Each covariate has one effect, which mixes its within-unit and "
    "its between-unit association; this is right only if the two are equal, i.e. if the "
    "unit baselines are unrelated to the covariates.",
    latent=True, glm_reference="pooled")
