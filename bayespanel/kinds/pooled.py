"""Pooled regression: one intercept for every unit; its reference fit is pooled least squares.

One file of the registry (:mod:`bayespanel.kinds`): its column map, reference fit and model.
"""

from ..core.terms import AS_IS
from .registry import ColumnMap, ModelKind, ReferenceKind

# one coefficient carries both effects
COLUMNS = ColumnMap("pooled", within=((AS_IS, 1),), between=((AS_IS, 1),))

REFERENCE = ReferenceKind(
    "pooled", "Pooled OLS", "Least squares on all rows, cluster-robust errors by unit.",
    unit_effects="none", glm_title="Pooled",
    notes=(
        "One intercept for all units: unit-level differences are left in the "
        "error term.",
        "The covariates are uncorrelated with the whole error, unit part "
        "included.",
        "Classical errors: independent rows with one variance. Cluster-robust "
        "errors: independent units, any correlation and variance within a unit.",
    ),
)

MODEL = ModelKind(
    "pooled", "Pooled", "bayespanel.bayes.builders:Pooled", columns="pooled", unit_effects="none",
    reference="pooled", title="Pooled regression",
    assumptions="One intercept for every unit: units differ only through the covariates. "
    "Rows of the same unit are treated as independent, which overstates precision when "
    "units differ in their baseline. Useful as a floor to compare against.")
