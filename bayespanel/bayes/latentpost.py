"""The posterior of a latent-effect model (:mod:`bayespanel.bayes.latent`): the Gaussian
posterior's summaries plus the family's own (latent-scale ICC, average marginal effects,
posterior predictive checks, pointwise log-likelihoods for LOO), saved and loaded with
its latent options."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..core import providers
from ..core.errors import SpecificationError, choices_error
from ..data.resultshape import check_prob
from . import families as fam_mod
from . import slopes
from .posterior import Posterior
from .posteriorfile import read_tree
from .spec import LatentSpec

__all__ = ["LatentPosterior"]


class LatentPosterior(Posterior):
    """Posterior of a :class:`LatentModel`: the Gaussian-model summaries plus the family.

    Adds :meth:`icc_table` (latent scale), :meth:`average_marginal_effects` (outcome scale),
    :meth:`ppc` (family-specific posterior predictive checks) and :meth:`pointwise_loglik`
    (unit or occasion level, for LOO). ``summary()`` rows: the coefficients,
    ``sigma_unit``, ``sigma_slope[x]``, ``corr[Intercept, x]``, the family's own
    parameters (``sigma_obs``, ``nu``, ``shape``) and ``icc``.
    """

    #: the attribute that marks its saved files (Posterior.load hands them here)
    file_marker = "bayespanel_latent"

    def __init__(self, idata, spec, stats, units, rows=None, sampling=None, scaling=None,
                 lspec: LatentSpec | None = None, Z=None, trials=None, log_exposure=None,
                 time=None, row_labels=None):
        super().__init__(idata, spec, stats, units, rows=rows, sampling=sampling, scaling=scaling,
                         time=time, row_labels=row_labels)
        self.lspec = lspec
        self.Z = Z
        self.trials = trials
        self.log_exposure = log_exposure

    @classmethod
    def from_model(cls, model, idata, info) -> "LatentPosterior":
        post = cls(idata, model.spec, model.stats, model.units, rows=model.rows, sampling=info,
                   scaling=model.scaling, lspec=model.lspec, Z=model.Z, trials=model.trials,
                   log_exposure=model.log_exposure, **cls._row_info(model))
        post.design = model.design
        post._add_icc()
        return post._keep_model(model)

    def __repr__(self):
        return super().__repr__()[:-1] + f", family {self.family!r})"

    # ------------------------------------------------------------------ basics
    @property
    def family(self) -> str:
        return self.lspec.family

    @property
    def y(self):
        return self.rows[1]

    @property
    def unit_codes(self):
        return self.rows[2]

    @property
    def slope_labels(self) -> list:
        return list(self.lspec.slope_labels)

    @property
    def parameter_names(self) -> list:
        names = self.labels + ["sigma_unit"]
        names += [f"sigma_slope[{s}]" for s in self.slope_labels]
        names += [f"corr[Intercept, {s}]" for s in self.slope_labels]
        if len(self.slope_labels) == 2:
            names.append(f"corr[{self.slope_labels[0]}, {self.slope_labels[1]}]")
        return names + list(fam_mod.get_family(self.family).params) + ["icc"]

    def draws(self, name) -> np.ndarray:
        """As :meth:`Posterior.draws`, plus ``sigma_slope[x]`` and ``corr[a, b]`` names."""
        effects = ["Intercept"] + self.slope_labels
        if name.startswith("sigma_slope[") and name[12:-1] in self.slope_labels:
            return super().draws("sigma_slope")[..., self.slope_labels.index(name[12:-1])]
        if name.startswith("corr[") and name.endswith("]"):
            a, _, b = name[5:-1].partition(", ")
            if a in effects and b in effects:
                return super().draws("corr_unit")[..., effects.index(a), effects.index(b)]
        return super().draws(name)

    def flat_draws(self, name, max_draws=None) -> np.ndarray:
        """Draws with chains stacked, ``(S, ...)``, thinned evenly to at most ``max_draws``."""
        d = self.draws(name)
        d = d.reshape((-1,) + d.shape[2:])
        if max_draws is not None and d.shape[0] > max_draws:
            d = d[np.linspace(0, d.shape[0] - 1, max_draws).round().astype(int)]
        return d

    @property
    def sigma_obs(self) -> float:
        if "sigma_obs" in fam_mod.get_family(self.family).params:
            return float(self.draws("sigma_obs").mean())
        return float("nan")

    def coef_draws(self, max_draws=None):
        return self.flat_draws("coef", max_draws)

    def latent_intercept_draws(self, max_draws=None):
        """Linear predictor at the covariate means (plus the mean log exposure), per draw."""
        M = self.rows[0]
        off = 0.0 if self.log_exposure is None else float(np.mean(self.log_exposure))
        return self.coef_draws(max_draws) @ M.mean(axis=0) + off

    def _add_icc(self):
        fam = fam_mod.get_family(self.family)
        shape = self.draws("sigma_unit").shape
        params = {k: self.draws(k) for k in fam.params}
        icc = fam_mod.icc_latent_draws(
            fam, self.draws("sigma_unit"), params,
            intercept=self.latent_intercept_draws().reshape(shape))
        ds = self.idata["posterior"].to_dataset()
        self.idata["posterior"] = ds.assign(icc=(("chain", "draw"), icc))
        self._cache.clear()

    def _partition_scale(self):
        """The unit SD and the occasion-level SD on the latent scale (the outcome scale
        for identity links; :func:`~bayespanel.bayes.families.latent_residual_variance`),
        so that :meth:`variance_partition` is the partition on that scale, with random
        slopes that of the unit intercepts at the covariate means."""
        fam = fam_mod.get_family(self.family)
        tau = self.flat_draws("sigma_unit")
        intercept = self.latent_intercept_draws() if fam.link == "log" else None
        s2 = fam_mod.latent_residual_variance(fam, self._family_params(), intercept=intercept,
                                              tau=tau)
        return tau, np.sqrt(np.broadcast_to(s2, tau.shape).astype(float))

    def unit_L(self, max_draws=None) -> np.ndarray:
        """Lower Cholesky factor of the unit-effect covariance per draw, ``(S, q, q)``,
        on the data scale (effects on ``[1, x - c]``)."""
        tau = self.flat_draws("sigma_unit", max_draws)
        if not self.slope_labels:
            return tau[:, None, None]
        sd = np.column_stack([tau, self.flat_draws("sigma_slope", max_draws)])
        return sd[:, :, None] * self.flat_draws("corr_chol_unit", max_draws)

    def _family_params(self, max_draws=None):
        return {k: self.flat_draws(k, max_draws) for k in fam_mod.get_family(self.family).params}

    # ------------------------------------------------------------------ unit effects
    def _unit_effect_flat(self, max_draws=None, seed=0):
        """``(S, N, q)`` unit effects: sampled (latent) or drawn from their conditional."""
        if self.spec.likelihood == "latent":
            return self.flat_draws("unit_effect", max_draws)
        M, y, codes = self.rows
        rng = np.random.default_rng(seed)
        g, _ = slopes.unit_effect_draws_slopes(
            M, self.Z, y, codes, self.coef_draws(max_draws),
            self.flat_draws("sigma_obs", max_draws), self.unit_L(max_draws), rng)
        return g

    def unit_effects(self, thin: int = 1, units=None, seed: int = 0):
        """Draws of the unit intercepts (and slopes), on the data scale.

        Latent models return their sampled effects; the Woodbury-marginal Gaussian
        random-slope model draws them from their exact conditional
        (:func:`~bayespanel.bayes.slopes.unit_effect_draws_slopes`). Dimensions
        ``(chain, draw, unit)`` for a random intercept, ``(chain, draw, unit, effect)``
        with random slopes.
        """
        import xarray as xr

        thin = self._thin(thin)
        idx = self._unit_index(units)
        g = self._unit_effect_flat(seed=seed).reshape(self.n_chains, self.n_draws, -1,
                                                      self.lspec.q)[:, ::thin][:, :, idx]
        post = self.idata["posterior"]
        coords = {"chain": post["chain"].values, "draw": post["draw"].values[::thin],
                  "unit": self.units[idx]}
        if not self.slope_labels:
            return xr.DataArray(g[..., 0], dims=("chain", "draw", "unit"), coords=coords,
                                name="unit_effect")
        coords["effect"] = ["Intercept"] + self.slope_labels
        return xr.DataArray(g, dims=("chain", "draw", "unit", "effect"), coords=coords,
                            name="unit_effect")

    # ------------------------------------------------------------------ predictions
    def effect_weights(self):
        """Names and coefficient weights of the effects reported by
        :meth:`average_marginal_effects`: every term but the intercept; for a Mundlak
        design ``x (within)`` = ``b_x`` and ``x (between)`` = ``b_x + b_{x (unit mean)}``."""
        return fam_mod.effect_weights(self.labels, self.spec.kind)

    def linear_predictor(self, include_units=True, max_draws=400, seed=0):
        """``eta`` per draw and row, ``(S, n)``, without the exposure offset; with the unit
        effects (sampled or conditional draws) when ``include_units``."""
        M, _, codes = self.rows
        eta = self.coef_draws(max_draws) @ M.T
        if include_units:
            g = self._unit_effect_flat(max_draws, seed)
            eta = eta + np.einsum("ni,sni->sn", self.Z, g[:, codes])
        return eta

    def posterior_predictive(self, level: str = "occasion", thin: int = 1, seed: int = 0):
        """Replicated outcomes on the estimation rows, ``(chain, draw, row)``.

        ``"occasion"``: the same units with their effects; ``"unit"``: new units, effects
        drawn from ``N(0, Sigma)``.
        """
        import xarray as xr

        from ..core.errors import choices_error as _ce

        if level not in ("occasion", "unit"):
            raise _ce("level", level, ("occasion", "unit"))
        thin = self._thin(thin)
        rng = np.random.default_rng(seed)
        keep = np.arange(self.n_chains * self.n_draws).reshape(self.n_chains, -1)[:, ::thin].ravel()
        M, _, codes = self.rows
        eta = self.coef_draws()[keep] @ M.T
        if level == "occasion":
            g = self._unit_effect_flat(seed=seed)[keep]
        else:
            L = self.unit_L()[keep]
            h = rng.standard_normal((len(keep), len(self.units), self.lspec.q))
            g = np.einsum("sij,snj->sni", L, h)
        eta = eta + np.einsum("ni,sni->sn", self.Z, g[:, codes])
        params = {k: v[keep, None] for k, v in self._family_params().items()}
        yrep = fam_mod.simulate(self.family, rng, eta, params, trials=self.trials,
                                log_exposure=self.log_exposure)
        post = self.idata["posterior"]
        return xr.DataArray(yrep.reshape(self.n_chains, -1, len(codes)),
                            dims=("chain", "draw", "row"),
                            coords={"chain": post["chain"].values,
                                    "draw": post["draw"].values[::thin]}, name="y")

    def pointwise_inputs(self, thin: int = 1):
        raise SpecificationError(
            f"family={self.family!r} / random slopes: the Gaussian pointwise inputs do not "
            "apply; use post.pointwise_loglik(level) (bayespanel.bayes.quadrature)")

    def pointwise_loglik(self, level: str = "unit", thin: int = 1):
        """Pointwise log-likelihood terms at one level, for LOO.

        ``"unit"``: ``log p(y_i | theta)`` with the unit effects integrated out (adaptive
        Gauss-Hermite quadrature, :func:`~bayespanel.bayes.quadrature.unit_loglik_aghq`;
        the exact Woodbury marginal for the Gaussian family). ``"occasion"``:
        ``log p(y_it | eta_it + z_it'g_i)`` given the sampled unit effects (the exact
        leave-one-occasion-out Gaussian conditional for the Gaussian family).

        Returns
        -------
        xarray.DataArray
            ``(chain, draw, unit)`` or ``(chain, draw, row)``; ``attrs`` state ``level`` and
            ``method``.
        """
        import xarray as xr

        from . import quadrature as quad

        if level not in quad.LEVELS:
            raise choices_error("level", level, quad.LEVELS)
        thin = self._thin(thin)
        keep = np.arange(self.n_chains * self.n_draws).reshape(self.n_chains, -1)[:, ::thin].ravel()
        M, y, codes = self.rows
        b = self.coef_draws()[keep]
        L = self.unit_L()[keep]
        params = {k: v[keep] for k, v in self._family_params().items()}
        if self.family == "gaussian":
            fn = slopes.unit_loglik_slopes if level == "unit" else slopes.occasion_loglik_slopes
            out = fn(M, self.Z, y, codes, b, params["sigma_obs"], L)
        elif level == "unit":
            out = quad.unit_loglik_aghq(self.family, y, b @ M.T, self.Z, L, codes, params,
                                        trials=self.trials, log_exposure=self.log_exposure)
        else:
            g = self._unit_effect_flat()[keep]
            out = quad.occasion_loglik_latent(self.family, y, b @ M.T, self.Z, g, codes, params,
                                              trials=self.trials, log_exposure=self.log_exposure)
        method = self.pointwise_loglik_method(level)
        dim = "unit" if level == "unit" else "row"
        post = self.idata["posterior"]
        coords = {"chain": post["chain"].values, "draw": post["draw"].values[::thin]}
        coords[dim] = self.units if level == "unit" else np.arange(len(y))
        return xr.DataArray(out.reshape(self.n_chains, -1, out.shape[-1]),
                            dims=("chain", "draw", dim), coords=coords, name=f"loglik_{level}",
                            attrs={"level": level, "method": method, "family": self.family})

    def pointwise_loglik_method(self, level: str) -> str:
        """How :meth:`pointwise_loglik` computes the terms of ``level`` (for notes)."""
        from . import quadrature as quad

        if level not in quad.LEVELS:
            raise choices_error("level", level, quad.LEVELS)
        if self.family == "gaussian":
            return ("Woodbury marginal (exact)" if level == "unit"
                    else "Gaussian leave-one-occasion-out conditional (exact)")
        if level == "unit":
            return ("log p(y_i | theta), the unit effects integrated out by adaptive "
                    "Gauss-Hermite quadrature")
        return "log p(y_it | theta, u_i), conditional on the sampled unit effects"

    def loo(self, level: str = "occasion", **kwargs):
        """PSIS-LOO (Vehtari, Gelman and Gabry 2017) on :meth:`pointwise_loglik` terms,
        through :func:`bayespanel.analysis.loo.loo` (the same code and the same default level,
        ``"occasion"``, as the Gaussian posteriors).

        Returns a :class:`bayespanel.analysis.loo.LOOResult` whose ``level``, ``notes`` and
        ``family`` state the level, how the terms were computed and the outcome family;
        the pointwise table names units and occasions as for the Gaussian models. Exact
        refits, K-fold and sub-sampling are not offered for latent-effect models.
        """
        return providers.provider("loo")(self, level, **kwargs)

    # ------------------------------------------------------------------ family reports
    def icc_table(self, prob: float | None = None) -> pd.DataFrame:
        """The ICC on the latent scale with its interval, one row labelled by the residual
        variance used (see :func:`~bayespanel.bayes.families.icc_latent`). The posterior
        mean alone is :attr:`icc` (a float, as for every fit)."""
        prob = check_prob(prob)  # None: the interval option
        return fam_mod.icc_latent(self, prob)

    def average_marginal_effects(self, prob: float | None = None) -> pd.DataFrame:
        """Average marginal effects on the outcome scale
        (:func:`~bayespanel.bayes.families.average_marginal_effects`)."""
        prob = check_prob(prob)  # None: the interval option
        return fam_mod.average_marginal_effects(self, prob)

    def ppc(self, draws: int = 400, seed: int = 0,
            prob: float | None = None) -> pd.DataFrame:
        """Family-specific posterior predictive checks
        (:func:`~bayespanel.bayes.families.ppc_summary`)."""
        prob = check_prob(prob)  # None: the interval option
        return fam_mod.ppc_summary(self, draws=draws, seed=seed, prob=prob)

    # ------------------------------------------------------------------ save / load
    def save(self, path) -> None:
        """As :meth:`Posterior.save` with the estimation rows (a latent-effect posterior
        always keeps them: its pointwise likelihoods and predictive draws need them), plus
        group ``bayespanel_latent`` (the random-effect columns, trials, log exposure) and
        the latent specification as JSON."""
        super().save(path, rows=True)

    def _tree(self, rows: bool = True):
        import xarray as xr

        tree = super()._tree(rows=True)
        extra = {"Z": (("row", "effect"), self.Z)}
        if self.trials is not None:
            extra["trials"] = (("row",), self.trials)
        if self.log_exposure is not None:
            extra["log_exposure"] = (("row",), self.log_exposure)
        tree["bayespanel_latent"] = xr.DataTree(xr.Dataset(extra))
        tree.attrs = {**tree.attrs, "bayespanel_latent": self.lspec.to_json()}
        return tree

    @classmethod
    def load(cls, path) -> "LatentPosterior":
        base = Posterior.load.__func__(cls, path)
        tree = read_tree(path)
        if "bayespanel_latent" not in tree.attrs:
            raise SpecificationError(f"{path!s} holds no latent-model posterior")
        try:
            return cls._latent_from_tree(base, tree)
        except (KeyError, ValueError, TypeError, AttributeError, IndexError) as exc:
            raise SpecificationError(
                f"{str(path)!r} is not a latent-model posterior as save writes it: "
                f"{type(exc).__name__}: {exc}") from None

    @staticmethod
    def _latent_from_tree(base, tree):
        ld = tree["bayespanel_latent"].to_dataset()
        base.lspec = LatentSpec.from_json(tree.attrs["bayespanel_latent"])
        base.Z = np.asarray(ld["Z"].values)
        base.trials = np.asarray(ld["trials"].values) if "trials" in ld else None
        base.log_exposure = np.asarray(ld["log_exposure"].values) if "log_exposure" in ld else None
        return base
