"""Frequentist reference fits, computed in closed form on the same rows as the models.

>>> import bayespanel as bp
>>> fe = bp.reference.within(panel, "y ~ x + z", cov="cluster")      # doctest: +SKIP
>>> fe.table()                                                        # doctest: +SKIP

Estimators: :func:`pooled`, :func:`within`, :func:`between`, :func:`random`,
:func:`mundlak`, :func:`within_between`; covariances ``"classical"``, ``"cluster"``
(CR1) and ``"cr2"``; specification tests :func:`hausman`, :func:`mundlak_test` and
:func:`serial_correlation_test`. See
docs/reference-fits.md.
"""

from ._results import ReferenceResult
from .covariance import COV_TYPES
from .estimators import (
    ESTIMATORS,
    METHODS,
    between,
    fit_arrays,
    fit_design,
    fit_stats,
    mundlak,
    pooled,
    random,
    within,
    within_between,
)
from .predictive import exact_holdout, log_predictive
from .serial import SerialCorrelationTest, serial_correlation_test
from .specification import SpecificationTest, hausman, mundlak_test

__all__ = [
    "ReferenceResult", "SpecificationTest", "COV_TYPES", "ESTIMATORS", "METHODS",
    "pooled", "within", "between", "random", "mundlak", "within_between",
    "fit_design", "fit_arrays", "fit_stats", "hausman", "mundlak_test",
    "log_predictive", "exact_holdout", "SerialCorrelationTest", "serial_correlation_test",
]
