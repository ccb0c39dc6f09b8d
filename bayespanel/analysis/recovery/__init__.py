"""Design check: how trustworthy is each interval on a panel of this shape?

:func:`design_check` keeps the user's real panel structure (the estimation rows, their
units, occasions per unit and covariate values, hence every within and between spread),
simulates replicate outcomes from given or fitted parameter values, refits the chosen
Bayesian model and its frequentist reference on each replicate, and reports per
parameter the coverage of the 90% and 95% intervals (with Monte Carlo error), the bias,
the median interval width, the probability that an interval excludes zero (for the
between-minus-within contrasts of time-varying covariates: the power to detect a
difference of the size the user sets), and how often the frequentist unit variance lands
on zero.

Every replicate is an exact draw from the Gaussian random-intercept model
``y = M b + u_i + e_it`` on the fixed ``M``. The Bayesian model is compiled once (nutpie)
and each replicate only swaps the sufficient statistics held as shared data in the graph
(:meth:`bayespanel.bayes.GaussianModel.set_suffstats`); the reference fits are closed
form on the same statistics. A third row of results, "GLS, known variances", is the
random-intercept GLS estimator with the true variance components plugged in: its normal
intervals have exact coverage on any design (Aitken's generalised least squares with a
known covariance; e.g. Searle, Casella and McCulloch 1992, section 3.3), which anchors the
Monte Carlo error of the whole exercise.

This is a simulation study of a design in the sense of Morris, White and Crowther (2019);
the Monte Carlo standard errors follow their Table 6.

References
----------
.. [1] Morris, T. P., White, I. R. and Crowther, M. J. (2019). Using simulation studies to
   evaluate statistical methods. Statistics in Medicine 38, 2074-2102. doi:10.1002/sim.8086
.. [2] Searle, S. R., Casella, G. and McCulloch, C. E. (1992). *Variance Components*.
   Wiley. doi:10.1002/9780470316856
.. [3] Aitken, A. C. (1935). On least squares and linear combination of observations.
   Proceedings of the Royal Society of Edinburgh 55, 42-48. doi:10.1017/S0370164600014346
"""

from .fits import BAYES, ORACLE, REFERENCE, REFERENCE_METHODS
from .figure import design_check_section
from .result import DesignCheckResult
from .simulate import simulate_outcome
from .study import design_check

__all__ = ["design_check", "DesignCheckResult", "design_check_section", "REFERENCE_METHODS",
           "simulate_outcome", "BAYES", "REFERENCE", "ORACLE"]
