"""What a Gaussian posterior's predictive draws and pointwise log-likelihoods are made
from: outcome draws ``y = M b + u_i + e`` (:func:`simulate_outcome`) and the draws and
rows of the unit- and occasion-level log-likelihoods (:class:`PointwiseInputs`), through
the one implementation of the densities in :mod:`bayespanel.core.gaussian` and
:mod:`bayespanel.core.ar1`. :class:`~bayespanel.bayes.posterior.Posterior` builds them
(``posterior_predictive``, ``pointwise_inputs``)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..core import ar1, gaussian
from ..core.errors import SpecificationError
from ..core.suffstats import SuffStats

__all__ = ["PointwiseInputs", "simulate_outcome"]


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


@dataclass
class PointwiseInputs:
    """Everything pointwise log-likelihoods need (unit and occasion level, for LOO).

    Draws are flattened over ``(chain, draw)`` in C order.
    """

    unit_effects: str
    coef: np.ndarray
    sigma_obs: np.ndarray
    sigma_unit: np.ndarray | None
    M: np.ndarray | None
    y: np.ndarray | None
    unit_codes: np.ndarray | None
    units: pd.Index
    stats: SuffStats
    chains: int
    draws: int
    rho: np.ndarray | None = None
    timeline: object = None

    def _tau(self):
        """Draws of the unit SD as the density functions take it (0 pooled, None fixed)."""
        if self.unit_effects == "fixed":
            return None
        return self.sigma_unit if self.sigma_unit is not None else np.zeros_like(self.sigma_obs)

    def _ar1_terms(self, fn):
        """``fn(r, timeline, rho, sigma, tau)`` of :mod:`bayespanel.core.ar1` over the draws,
        in blocks so that the residuals never hold more than about 2^24 numbers."""
        tau = self._tau()
        return ar1.by_draw_blocks(
            lambda sl: fn(self.y[None, :] - self.coef[sl] @ self.M.T, self.timeline,
                          self.rho[sl], self.sigma_obs[sl], None if tau is None else tau[sl]),
            len(self.sigma_obs), len(self.y))

    def _need_rows(self):
        if self.M is None:
            raise SpecificationError(
                "the estimation rows are not available (model built from statistics only); "
                "pointwise log-likelihoods need them")

    def unit_loglik(self) -> np.ndarray:
        """``log p(y_i | theta)`` per draw and unit, shape (S, N)."""
        self._need_rows()
        if self.unit_effects == "fixed":
            raise SpecificationError(
                "fixed effects have no unit-level predictive density: a new unit's intercept "
                "is not identified; use level='occasion'")
        if self.rho is not None:       # AR(1) errors: the unit's marginal density
            return self._ar1_terms(ar1.unit_logdensity)
        tau = self.sigma_unit if self.sigma_unit is not None else np.zeros_like(self.sigma_obs)
        return gaussian.unit_loglik_rows(self.M, self.y, self.unit_codes, self.coef,
                                         self.sigma_obs, tau)

    def ar1_loglik(self) -> np.ndarray:
        """Per draw, the log-likelihood of a model with ``errors="ar1"`` (S,): the sum over
        units of :func:`bayespanel.core.ar1.unit_logdensity` (fixed effects: the density of
        the within-transformed rows, as the model's likelihood), from the rows."""
        self._need_rows()
        if self.rho is None:
            raise SpecificationError("ar1_loglik is for models with errors='ar1'")
        return self._ar1_terms(ar1.unit_logdensity).sum(axis=1)

    def occasion_loglik(self) -> np.ndarray:
        """``log p(y_it | y_i,-t, theta)`` per draw and row, shape (S, n)."""
        self._need_rows()
        if self.rho is not None:       # AR(1) errors: given the unit's other rows, O(T_i)
            return self._ar1_terms(ar1.occasion_logdensity)
        return gaussian.occasion_loglik_rows(self.M, self.y, self.unit_codes, self.coef,
                                             self.sigma_obs, self._tau())
