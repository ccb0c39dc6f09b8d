"""Correlated random effects (Mundlak 1978): the random intercept with the unit means
of the time-varying covariates added; its reference fit is random-effects GLS on the
same columns.

One file of the registry (:mod:`bayespanel.kinds`): its column map, reference fit and model.
"""

from ..core.terms import AS_IS, UNIT_MEAN
from .registry import ColumnMap, ModelKind, ReferenceKind

# the coefficient of x is the within effect; the between effect adds that of
# x (unit mean), which is therefore the between-minus-within contrast
COLUMNS = ColumnMap("mundlak", within=((AS_IS, 1),), between=((AS_IS, 1), (UNIT_MEAN, 1)))

REFERENCE = ReferenceKind(
    "mundlak", "Mundlak (GLS)",
    "Random-effects GLS with the unit means of the time-varying covariates added.",
    unit_effects="random", variance_components=True, glm_title="Mundlak",
    notes=(
        "The unit effect may be correlated with the covariates, but only through "
        "the unit means of the time-varying covariates (Mundlak 1978); the rest "
        "of it is random.",
        "The coefficients of the time-varying covariates equal the fixed-effects "
        "ones; the unit-mean terms are the between-minus-within differences.",
        "Classical errors: homoskedastic unit effects and occasion errors.",
    ),
)

MODEL = ModelKind(
    "correlated_effects", "CorrelatedEffects", "bayespanel.bayes.builders:CorrelatedEffects",
    columns="mundlak", unit_effects="random", reference="mundlak",
    title="Correlated random effects (Mundlak)",
    assumptions="The random-intercept model with the unit means of the time-varying "
    "covariates added. Their coefficients measure how far the between effect departs "
    "from the within effect (the contextual effect); the covariates' own coefficients "
    "equal the within effects.",
    latent=True, glm_reference="mundlak")
