"""What a Gaussian posterior's predictive draws are made from: outcome draws
``y = M b + u_i + e`` (:func:`simulate_outcome`), which
:meth:`~bayespanel.bayes.posterior.Posterior.posterior_predictive` makes. The draws and
rows of the unit- and occasion-level log-likelihoods are a
:class:`~bayespanel.bayes.draws.FitDraws` (``Posterior.pointwise_inputs``)."""

from __future__ import annotations

import numpy as np

__all__ = ["simulate_outcome"]


def simulate_outcome(M, unit_codes, b, sigma, tau, rng, unit_shift=None, unit_draws=None,
                     errors=None):
    """Outcome draws ``y = M b + u_i + e`` for every draw of ``(b, sigma, tau)``.

    Parameters
    ----------
    M : array (n, k); unit_codes : array (n,)
    b : array (S, k); sigma : array (S,); tau : array (S,) or None
    rng : numpy Generator
    unit_shift : array (S, N), optional
        Fixed unit intercepts per draw, used instead of drawing new ones.
    unit_draws : array (S, N), optional
        Unit intercepts already drawn (e.g. from their conditional posterior).
    errors : array (S, n), optional
        Errors already drawn (AR(1) errors, :func:`bayespanel.core.ar1.simulate_errors`),
        used instead of independent ``N(0, sigma^2)`` ones.

    Returns
    -------
    array (S, n)
    """
    mu = np.atleast_2d(b) @ np.asarray(M, float).T
    codes = np.asarray(unit_codes)
    n_units = int(codes.max()) + 1
    if unit_draws is not None:
        mu += unit_draws[:, codes]
    elif unit_shift is not None:
        mu += unit_shift[:, codes]
    elif tau is not None:
        mu += (tau[:, None] * rng.standard_normal((mu.shape[0], n_units)))[:, codes]
    if errors is not None:
        return mu + errors
    return mu + sigma[:, None] * rng.standard_normal(mu.shape)
