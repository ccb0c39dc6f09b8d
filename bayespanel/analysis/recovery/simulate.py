"""Replicate outcomes of the design check on fixed covariate rows."""

from __future__ import annotations

import numpy as np

from ...core import ar1


def simulate_outcome(M, unit_codes, b, sigma_unit, sigma_obs, rng, rho=None, timeline=None):
    """One replicate outcome ``y = M b + u_i + e_it`` on fixed rows ``M``.

    ``u_i ~ N(0, sigma_unit^2)``; the errors ``e_it`` are independent ``N(0, sigma_obs^2)``,
    or with ``rho`` a stationary AR(1) within units on the occasions of ``timeline``
    (:class:`bayespanel.core.ar1.Timeline` of the rows): ``Cov(e_it, e_is) = sigma_obs^2
    rho^|time_t - time_s|`` (:func:`bayespanel.core.ar1.simulate_errors`).
    """
    n_units = int(unit_codes.max()) + 1
    u = rng.normal(0.0, sigma_unit, n_units) if sigma_unit > 0 else np.zeros(n_units)
    if rho is None:
        e = rng.normal(0.0, sigma_obs, len(unit_codes))
    else:
        e = ar1.simulate_errors(timeline, rho, sigma_obs, rng)[0]
    return M @ b + u[unit_codes] + e
