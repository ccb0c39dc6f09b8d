"""Fixed effects: a free baseline per unit, integrated out; its reference fit is the
within estimator.

One file of the registry (:mod:`bayespanel.kinds`): its column map, reference fit and model.
"""

from ..core.terms import AS_IS
from .registry import ColumnMap, ModelKind, ReferenceKind

# the demeaned columns carry the within effects only
COLUMNS = ColumnMap("within", within=((AS_IS, 1),), between=None, intercept=False,
                    constants=False)

REFERENCE = ReferenceKind(
    "within", "Within (fixed effects)",
    "Least squares on unit-demeaned rows; degrees of freedom corrected for the absorbed "
    "unit means.", unit_effects="fixed",
    notes=(
        "Each unit has its own intercept, which may be correlated with the "
        "covariates; only variation within units identifies the coefficients.",
        "The covariates are strictly exogenous: uncorrelated with the "
        "occasion-level error on every occasion of the unit.",
        "Covariates constant within units cannot be estimated and are dropped.",
        "Classical errors: independent occasions with one variance. "
        "Cluster-robust errors: any correlation within a unit.",
    ),
    statistics="random",  # derived from the random-intercept columns' statistics
)

MODEL = ModelKind(
    "fixed_effects", "FixedEffects", "bayespanel.bayes.builders:FixedEffects",
    columns="within", unit_effects="fixed", reference="within", title="Fixed effects",
    assumptions="Every unit has its own free baseline, so only changes within units "
    "inform the coefficients; covariates that never change within a unit cannot be "
    "estimated. Predicts occasions of known units only: a new unit's baseline is "
    "unknown.")
