"""The one bundle of posterior draws and estimation rows (:class:`FitDraws`) and the
pointwise log-likelihood terms of the Gaussian panel models (:func:`pointwise_terms`).

The densities are those of :mod:`bayespanel.core.gaussian` and, with AR(1) errors,
:mod:`bayespanel.core.ar1` (written once there):

* ``level="unit"``: ``log p(y_i | theta)``, the marginal density of all rows of unit ``i``
  with its intercept integrated out;
* ``level="occasion"``: ``log p(y_it | y_i,-t, theta)``, the non-factorised conditional of
  Bürkner, Gabry and Vehtari (2021) (with AR(1) errors O(T_i) per unit: the precision is
  tridiagonal plus rank one).

References
----------
.. [1] Bürkner, P.-C., Gabry, J. and Vehtari, A. (2021). Efficient leave-one-out
   cross-validation for Bayesian non-factorized normal and Student-t models.
   Computational Statistics 36, 1243-1261. doi:10.1007/s00180-020-01045-4
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..core import ar1, gaussian
from ..core.errors import SpecificationError

__all__ = ["FitDraws", "pointwise_terms", "outcome_measure"]


def pointwise_terms(M, y, codes, b, sigma, tau, level, *, rho=None, time=None,
                    timeline=None) -> np.ndarray:
    """Pointwise log-likelihood terms per draw, ``(S, N)`` at the unit level or ``(S, n)``
    at the occasion level.

    Parameters
    ----------
    M, y, codes : arrays
        The rows (sorted by unit), their outcome and unit codes ``0 .. N-1``.
    b : (S, k); sigma : (S,); tau : (S,) or None
        Draws; ``tau`` zeros for the pooled model, None for fixed effects.
    level : {"unit", "occasion"}
    rho : (S,), optional
        AR(1) errors: the correlation one time unit apart; then the rows' occasions as
        numbers (``time``) or their :class:`~bayespanel.core.ar1.Timeline` (``timeline``).
    """
    if rho is not None:
        tl = timeline if timeline is not None else ar1.Timeline.build(codes, time)
        fn = ar1.unit_logdensity if level == "unit" else ar1.occasion_logdensity
        return ar1.by_draw_blocks(
            lambda sl: fn(y[None, :] - b[sl] @ M.T, tl, rho[sl], sigma[sl],
                          None if tau is None else tau[sl]), len(sigma), len(y))
    if level == "unit":
        return gaussian.unit_loglik_rows(M, y, codes, b, sigma, tau)
    return gaussian.occasion_loglik_rows(M, y, codes, b, sigma, tau)


@dataclass
class FitDraws:
    """Rows and posterior draws of one panel model.

    ``coef`` is ``(C, D, k)``, ``sigma`` and ``tau`` ``(C, D)`` (``tau`` is zeros for the
    pooled model and ``None`` for fixed effects). ``M`` holds the model's columns on the
    estimation rows (rows sorted by unit), ``codes`` the unit of each row (0..N-1).
    ``unit_name`` and ``time_name`` are the Panel's columns (for messages), ``time`` the
    occasion label of every row. ``latent`` is the
    :class:`~bayespanel.bayes.latent.LatentPosterior` of a latent-effect model (another
    family, or random slopes), whose pointwise terms come from its own
    :meth:`~bayespanel.bayes.latent.LatentPosterior.pointwise_loglik`; ``family`` names
    its outcome family (``"gaussian"`` for the marginal models). ``rho`` ``(C, D)`` are
    the draws of the AR(1) correlation of a model with ``errors="ar1"`` (``None``
    otherwise) and ``ar1_time`` the occasion of every row as a number. ``messages`` are
    the sampling warnings of a refit (:func:`bayespanel.analysis.loo.refit_draws`).

    The one bundle of draws and rows of the package: what LOO, exact refits, K-fold and
    :meth:`~bayespanel.bayes.posterior.Posterior.pointwise_inputs` hand around, with the
    pointwise log-likelihoods (:meth:`unit_loglik`, :meth:`occasion_loglik`,
    :meth:`ar1_loglik`, chains stacked) of :func:`pointwise_terms`.
    """

    kind: str
    unit_effects: str
    labels: list
    M: np.ndarray
    y: np.ndarray
    codes: np.ndarray
    units: pd.Index
    time: np.ndarray | None
    rows: pd.Index
    coef: np.ndarray
    sigma: np.ndarray
    tau: np.ndarray | None
    posterior: object = None
    model: object = None
    design: object = None
    sample_kwargs: dict = field(default_factory=dict)
    unit_name: str | None = None
    time_name: str | None = None
    family: str = "gaussian"
    latent: object = None
    rho: np.ndarray | None = None
    ar1_time: np.ndarray | None = None
    messages: list = field(default_factory=list)
    timeline: object = None

    @property
    def n_chains(self) -> int:
        return int(self.coef.shape[0])

    @property
    def n_draws(self) -> int:
        return int(self.coef.shape[1])

    @property
    def n(self) -> int:
        return int(len(self.y))

    @property
    def n_units(self) -> int:
        return int(len(self.units))

    @property
    def T(self) -> np.ndarray:
        return np.bincount(self.codes, minlength=self.n_units)

    @property
    def names(self) -> tuple:
        """``(unit column, time column)`` of the Panel the fit came from (or ``None``s)."""
        return self.unit_name, self.time_name

    @property
    def measure(self) -> str:
        """``"mass"`` when the terms are log probabilities of a discrete outcome,
        ``"density"`` when they are log densities of a continuous one."""
        return outcome_measure(self.family)

    def flat(self):
        """``(coef (S, k), sigma (S,), tau (S,) or None)`` with chains stacked."""
        S = self.n_chains * self.n_draws
        tau = None if self.tau is None else self.tau.reshape(S)
        return self.coef.reshape(S, -1), self.sigma.reshape(S), tau

    def flat_rho(self):
        """Draws of ``rho`` with chains stacked (S,), or None without AR(1) errors."""
        return None if self.rho is None else self.rho.reshape(-1)

    def _terms(self, level) -> np.ndarray:
        if self.M is None:
            raise SpecificationError(
                "the estimation rows are not available (model built from statistics only); "
                "pointwise log-likelihoods need them")
        if self.rho is not None and self.timeline is None:
            self.timeline = ar1.Timeline.build(self.codes, self.ar1_time)
        b, sigma, tau = self.flat()
        return pointwise_terms(self.M, self.y, self.codes, b, sigma, tau, level,
                               rho=self.flat_rho(), timeline=self.timeline)

    def unit_loglik(self) -> np.ndarray:
        """``log p(y_i | theta)`` per draw (chains stacked) and unit, shape (S, N)."""
        if self.unit_effects == "fixed":
            raise SpecificationError(
                "fixed effects have no unit-level predictive density: a new unit's intercept "
                "is not identified; use level='occasion'")
        return self._terms("unit")

    def occasion_loglik(self) -> np.ndarray:
        """``log p(y_it | y_i,-t, theta)`` per draw (chains stacked) and row, shape (S, n)."""
        return self._terms("occasion")

    def ar1_loglik(self) -> np.ndarray:
        """Per draw, the log-likelihood of a model with ``errors="ar1"`` (S,): the sum over
        units of :func:`bayespanel.core.ar1.unit_logdensity` (fixed effects: the density of
        the within-transformed rows, as the model's likelihood), from the rows."""
        if self.rho is None:
            raise SpecificationError("ar1_loglik is for models with errors='ar1'")
        return self._terms("unit").sum(axis=1)

    def point_index(self, level) -> pd.DataFrame:
        """Labels of the pointwise terms: one row per unit, or per estimation row.

        ``position`` is the point's index (unit code, or estimation-row number), which
        aligns the points of different fits on the same rows.
        At the occasion level ``occasion`` numbers a unit's rows 1..T_i in time order
        (``time`` holds the occasion labels when the design is known).
        """
        if level == "unit":
            return pd.DataFrame({"position": np.arange(self.n_units),
                                 "unit": np.asarray(self.units), "occasions": self.T})
        starts = np.concatenate([[0], np.cumsum(self.T)[:-1]])
        out = pd.DataFrame({"position": np.arange(self.n),
                            "unit": np.asarray(self.units)[self.codes],
                            "occasion": np.arange(self.n) - starts[self.codes] + 1,
                            "row": np.asarray(self.rows)})
        if self.time is not None:
            out["time"] = self.time
        return out


def outcome_measure(family) -> str:
    """``"mass"`` for the discrete families (Bernoulli, binomial, Poisson, negative
    binomial), ``"density"`` for the continuous ones (Gaussian, Student-t)."""
    from .families import get_family

    return "mass" if get_family(family).discrete else "density"
