"""The between estimator (a reference fit only): least squares on the unit means.

One file of the registry (:mod:`bayespanel.kinds`): its column map and reference fit.
"""

from ..core.terms import AS_IS
from .registry import ColumnMap, ReferenceKind

# the unit means carry the between effects only
COLUMNS = ColumnMap("between", within=None, between=((AS_IS, 1),))

REFERENCE = ReferenceKind(
    "between", "Between", "Least squares on the unit means, one row per unit.",
    unit_effects="none",
    notes=(
        "Uses only the unit means (one row per unit): the unit means of the "
        "covariates must be uncorrelated with the unit effect.",
        "Answers a question about differences between units, not changes within "
        "them.",
    ),
    statistics="random",  # derived from the random-intercept columns' statistics
)
