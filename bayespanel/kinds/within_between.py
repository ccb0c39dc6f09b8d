"""Within-between (hybrid): each time-varying covariate split into its unit mean and
the deviation from it; its reference fit is random-effects GLS on the same columns.

One file of the registry (:mod:`bayespanel.kinds`): its column map, reference fit and model.
"""

from ..core.terms import BETWEEN, WITHIN
from .registry import ColumnMap, ModelKind, ReferenceKind

# the coefficient of x (within) is the within effect, that of x (between) the
# between effect
COLUMNS = ColumnMap("within_between", within=((WITHIN, 1),), between=((BETWEEN, 1),))

REFERENCE = ReferenceKind(
    "within_between", "Within-between (GLS)",
    "Random-effects GLS on the within and between parts of each time-varying covariate.",
    unit_effects="random", variance_components=True, glm_title="Within-between",
    notes=(
        "Each time-varying covariate has a within effect (its deviation from the "
        "unit mean) and a between effect (the unit mean), estimated separately.",
        "The random intercept is uncorrelated with the unit means and the "
        "time-constant covariates given the other terms.",
        "Classical errors: homoskedastic unit effects and occasion errors.",
    ),
)

MODEL = ModelKind(
    "within_between", "WithinBetween", "bayespanel.bayes.builders:WithinBetween",
    columns="within_between", unit_effects="random", reference="within_between",
    title="Within-between (hybrid)",
    assumptions="Each time-varying covariate is split into the unit's mean (between "
    "part) and the occasion's deviation from it (within part), each with its own effect; "
    "unit baselines vary as in the random-intercept model. The within effect is "
    "protected against stable differences between units; time-constant covariates keep "
    "one effect.",
    latent=True, glm_reference="within_between")
