"""Unit effects and predictive draws of a Gaussian posterior, made on demand from its
draws and rows: the unit intercepts from their exact conditional posterior
(:func:`bayespanel.core.gaussian.unit_effect_conditional`; with AR(1) errors
:func:`bayespanel.core.ar1.unit_effect_conditional`), replicated outcomes
(:func:`bayespanel.bayes.pointwise.simulate_outcome`) and the draws and rows of pointwise
log-likelihoods (:class:`bayespanel.bayes.draws.FitDraws`).

:class:`UnitDraws` holds these methods of :class:`~bayespanel.bayes.posterior.Posterior`,
which inherits them; they read the posterior's ``spec``, ``units``, ``stats``, ``rows``,
``ar1_time``, ``idata`` and its draws (``draws``, ``_flat``).
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from ..core import ar1, gaussian
from ..core.errors import SpecificationError
from ..core.mathcore import unit_sd_draws
from .draws import FitDraws
from .pointwise import simulate_outcome

__all__ = ["UnitDraws"]


class UnitDraws:
    """The unit-effect and predictive methods of a Gaussian posterior (a mixin of
    :class:`~bayespanel.bayes.posterior.Posterior`)."""

    # ------------------------------------------------------------------ unit effects
    def _unit_index(self, units):
        if units is None:
            return np.arange(len(self.units))
        units = [units] if np.ndim(units) == 0 else list(units)
        idx = []
        lookup = {u: i for i, u in enumerate(self.units)}
        for u in units:
            if u not in lookup:
                raise SpecificationError(f"unit {u!r} is not in the estimation sample")
            idx.append(lookup[u])
        return np.asarray(idx, dtype=np.int64)

    def _thin(self, thin):
        if isinstance(thin, bool) or not isinstance(thin, (int, np.integer)) or thin < 1:
            raise SpecificationError(f"thin={thin!r} must be a positive integer")
        return int(thin)

    def unit_effects(self, thin: int = 1, units=None, seed: int = 0) -> xr.DataArray:
        """Draws of the unit intercepts from their exact conditional posterior.

        For every kept draw of ``(b, sigma, tau)``, ``u_i`` is drawn from
        ``N(tau^2 T_i rbar_i / (sigma^2 + T_i tau^2), tau^2 sigma^2 / (sigma^2 + T_i tau^2))``
        (fixed effects: ``N(rbar_i, sigma^2 / T_i)``), which composed with the posterior of
        ``(b, sigma, tau)`` is their exact joint posterior. Nothing is stored at sampling
        time; memory is ``chains x draws / thin x len(units)`` numbers.

        Parameters
        ----------
        thin : int
            Keep every ``thin``-th draw of each chain.
        units : label or list of labels, optional
            Only these units (default all).
        seed : int
            Seed of the normal draws (same seed, same values, whatever the selection of
            units or the thinning).

        Returns
        -------
        xarray.DataArray
            Dimensions ``(chain, draw, unit)`` on the outcome scale.
        """
        if self.spec.unit_effects == "none":
            raise SpecificationError("Pooled has no unit intercepts; use RandomIntercept, "
                                     "WithinBetween, CorrelatedEffects or FixedEffects")
        thin = self._thin(thin)
        idx = self._unit_index(units)
        mean, sd = self._unit_conditional(thin, idx)
        u = mean + sd * self._unit_normals(seed, idx, thin)
        coef = self.idata["posterior"]["coef"]
        chains, draws = coef.sizes["chain"], len(range(0, coef.sizes["draw"], thin))
        return xr.DataArray(
            u.reshape(chains, draws, len(idx)), dims=("chain", "draw", "unit"),
            coords={"chain": coef["chain"].values, "draw": coef["draw"].values[::thin],
                    "unit": self.units[idx]}, name="unit_effect")

    def _unit_normals(self, seed, idx, thin, block=1024):
        """Standard normals for the kept draws of units ``idx``.

        Each block of ``block`` units has its own stream (seeded by ``(seed, block)``) over
        all draws, so any selection of units or thinning sees the same numbers as the
        full set: ``unit_effects(units=[a, b])`` equals those columns of ``unit_effects()``.
        """
        S = self.n_chains * self.n_draws
        keep = (np.arange(S).reshape(self.n_chains, self.n_draws)[:, ::thin]).ravel()
        out = np.empty((len(keep), len(idx)))
        blocks = idx // block
        for bk in np.unique(blocks):
            z = np.random.default_rng([int(seed), int(bk)]).standard_normal((S, block))
            sel = blocks == bk
            out[:, sel] = z[np.ix_(keep, idx[sel] - bk * block)]
        return out

    def _ar1_timeline(self):
        """The :class:`bayespanel.core.ar1.Timeline` of the estimation rows (``errors="ar1"``)."""
        if "ar1_timeline" not in self._cache:
            if self.rows is None or self.ar1_time is None:
                raise SpecificationError(
                    "this errors='ar1' posterior has no estimation rows with their occasions "
                    "(built from statistics only, or saved with rows=False); unit effects, "
                    "predictive draws and LOO need them")
            self._cache["ar1_timeline"] = ar1.Timeline.build(self.rows[2], self.ar1_time)
        return self._cache["ar1_timeline"]

    def _ar1_unit_conditional(self, thin, idx):
        """Mean and SD of the unit intercepts given the rows, per draw, with AR(1) errors
        (:func:`bayespanel.core.ar1.unit_effect_conditional`: the GLS weights of the AR(1)
        replace the unit means)."""
        M, y, _ = self.rows
        tl = self._ar1_timeline()
        b, sigma, rho = (self._flat(n, thin) for n in ("coef", "sigma_obs", "rho"))
        tau = self._flat("sigma_unit", thin) if self.spec.unit_effects == "random" else None

        def block(sl):
            mean, sd = ar1.unit_effect_conditional(y[None, :] - b[sl] @ M.T, tl, rho[sl],
                                                   sigma[sl], None if tau is None else tau[sl])
            return np.stack([mean[:, idx], sd[:, idx]])
        out = ar1.by_draw_blocks(block, len(sigma), len(y), axis=1)
        return out[0], out[1]

    def _unit_conditional(self, thin, idx):
        if self.spec.errors == "ar1":
            return self._ar1_unit_conditional(thin, idx)
        b = self._flat("coef", thin)
        sigma = self._flat("sigma_obs", thin)[:, None]
        rbar = gaussian.residual_vector(b) @ self.stats.unit_mean[idx].T
        T = self.stats.unit_count[idx].astype(float)
        tau = self._flat("sigma_unit", thin)[:, None] if self.spec.unit_effects == "random" \
            else None
        return gaussian.unit_effect_conditional(rbar, T[None, :], sigma, tau)

    # ------------------------------------------------------------------ predictive
    def posterior_predictive(self, level: str = "occasion", thin: int = 1,
                             seed: int = 0) -> xr.DataArray:
        """Replicated outcomes on the estimation rows, one set per kept draw.

        Parameters
        ----------
        level : {"occasion", "unit"}
            ``"occasion"``: new occasions of the same units, ``y = x'b + u_i + e`` with
            ``u_i`` from its conditional posterior (:meth:`unit_effects`). ``"unit"``: new
            units with the same covariates, ``u_i ~ N(0, sigma_unit^2)`` (not defined for
            fixed effects). With ``errors="ar1"`` the errors ``e`` are new AR(1) draws on
            the rows' occasions (:func:`bayespanel.core.ar1.simulate_errors`).
        thin : int
        seed : int

        Returns
        -------
        xarray.DataArray
            Dimensions ``(chain, draw, row)``.
        """
        if level not in ("occasion", "unit"):
            from ..core.errors import choices_error
            raise choices_error("level", level, ("occasion", "unit"))
        if self.rows is None:
            raise SpecificationError(
                "the estimation rows are not available (model built from statistics only, or "
                "saved with rows=False); predictive draws need them")
        if level == "unit" and self.spec.unit_effects == "fixed":
            raise SpecificationError("fixed effects cannot predict new units (their intercept "
                                     "is not identified); use level='occasion'")
        thin = self._thin(thin)
        rng = np.random.default_rng(seed)
        M, y, codes = self.rows
        b, sigma = self._flat("coef", thin), self._flat("sigma_obs", thin)
        tau = self._flat("sigma_unit", thin) if self.spec.unit_effects == "random" else None
        unit_draws = None
        if level == "occasion" and self.spec.unit_effects != "none":
            every = np.arange(len(self.units))
            mean, sd = self._unit_conditional(thin, every)
            unit_draws = mean + sd * self._unit_normals(seed, every, thin)
        errors = None
        if self.spec.errors == "ar1":      # new AR(1) errors on the rows' occasions
            errors = ar1.simulate_errors(self._ar1_timeline(), self._flat("rho", thin), sigma,
                                         rng)
        yrep = simulate_outcome(M, codes, b, sigma, tau, rng, unit_draws=unit_draws,
                                errors=errors)
        coef = self.idata["posterior"]["coef"]
        return xr.DataArray(yrep.reshape(self.n_chains, -1, len(y)),
                            dims=("chain", "draw", "row"),
                            coords={"chain": coef["chain"].values,
                                    "draw": coef["draw"].values[::thin]}, name="y")

    def pointwise_inputs(self, thin: int = 1) -> FitDraws:
        """Draws (every ``thin``-th of each chain) and rows for pointwise log-likelihoods at
        the unit and occasion level (:class:`~bayespanel.bayes.draws.FitDraws`:
        ``unit_loglik()``, ``occasion_loglik()``, ``ar1_loglik()``)."""
        thin = self._thin(thin)
        M, y, codes = self.rows if self.rows is not None else (None, None, None)
        serial = {}
        if self.spec.errors == "ar1":
            serial = {"rho": self.draws("rho")[:, ::thin], "ar1_time": self.ar1_time,
                      "timeline": self._ar1_timeline()}
        sigma = self.draws("sigma_obs")[:, ::thin]
        tau = (self.draws("sigma_unit")[:, ::thin] if self.spec.unit_effects == "random"
               else None)
        return FitDraws(
            kind=self.spec.kind, unit_effects=self.spec.unit_effects,
            labels=list(self.spec.labels), M=M, y=y, codes=codes, units=self.units,
            time=None, rows=None, coef=self.draws("coef")[:, ::thin], sigma=sigma,
            tau=unit_sd_draws(self.spec.unit_effects, tau, sigma.shape), **serial)
