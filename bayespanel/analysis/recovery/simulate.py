"""Replicate outcomes of the design check on fixed covariate rows."""

from __future__ import annotations

import numpy as np


def simulate_outcome(M, unit_codes, b, sigma_unit, sigma_obs, rng):
    """One replicate outcome ``y = M b + u_i + e_it`` with ``u_i ~ N(0, sigma_unit^2)`` and
    ``e_it ~ N(0, sigma_obs^2)`` on fixed rows ``M``."""
    n_units = int(unit_codes.max()) + 1
    u = rng.normal(0.0, sigma_unit, n_units) if sigma_unit > 0 else np.zeros(n_units)
    return M @ b + u[unit_codes] + rng.normal(0.0, sigma_obs, len(unit_codes))
