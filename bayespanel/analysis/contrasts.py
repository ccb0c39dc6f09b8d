"""Within/between contrasts: does a covariate's between effect differ from its within effect?

The code lives in :mod:`bayespanel.bayes.contrasts`, beside the posterior whose
``contrasts()`` and ``contextual_effects()`` compute them (the bayes layer may not import
the analysis layer); this module keeps the analysis layer's public path of the same names.
"""

from ..bayes.contrasts import (  # noqa: F401 (public here)
    ContrastResult,
    contrast_covariates,
    contrast_draws,
    contrast_matrix,
    contrast_rows,
    design_tests,
    specification_tests,
    within_between_contrasts,
)

__all__ = ["ContrastResult", "contrast_draws", "contrast_matrix", "contrast_covariates",
           "contrast_rows", "within_between_contrasts", "specification_tests", "design_tests"]
