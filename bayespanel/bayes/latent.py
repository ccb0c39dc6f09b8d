"""Latent-effect panel models: non-Gaussian outcomes, Student-t errors, random slopes.

``RandomIntercept``, ``WithinBetween`` and ``CorrelatedEffects`` hand over to
:class:`LatentModel` when given ``family=`` other than ``"gaussian"`` or
``random_slopes=``. The design columns are the builder's (``Design.matrices(kind)``); the
unit effects are latent parameters of the graph:

    eta_it = x_it'b + z_it'g_i,   g_i ~ N(0, Sigma),   y_it ~ family(eta_it [+ log exposure])

with ``z_it = [1, x_it - c]`` for the random intercept and each random-slope column ``x``
(centred at its sample mean ``c``, so ``sigma_unit`` is the SD of the unit intercepts at
the covariate means). ``Sigma = diag(sd) R diag(sd)``, ``R`` with an LKJ prior
(Lewandowski, Kurowicka and Joe 2009). By default the effects are non-centred,
``g_i = L h_i``, ``h_i ~ N(0, I)``, which samples well when units have few occasions;
``centred=True`` puts ``g_i`` itself in the graph, better when every unit has many
occasions (Papaspiliopoulos, Roberts and Sköld 2007; Betancourt and Girolami 2015).

For the Gaussian family with random slopes the effects are integrated out per unit with
the Woodbury identity (:mod:`bayespanel.bayes.slopes`, ``likelihood="marginal"``, the
default); ``likelihood="latent"`` keeps them in the graph (for checks and benchmarks).

Inside the graph every non-intercept column is standardised (and, for the Gaussian and
Student-t families, the outcome); deterministic nodes carry the parameters on the data
scale: ``coef`` (term), ``sigma_unit``, ``sigma_slope`` (slope), ``corr_unit`` (effect,
effect2), ``sigma_obs``, ``nu``, ``shape``, ``unit_effect`` (unit, effect).

References
----------
.. [1] Papaspiliopoulos, O., Roberts, G. O. and Sköld, M. (2007). A general framework for the
   parametrization of hierarchical models. Statistical Science 22, 59-73.
   doi:10.1214/088342307000000014
.. [2] Betancourt, M. and Girolami, M. (2015). Hamiltonian Monte Carlo for hierarchical
   models. In *Current Trends in Bayesian Methodology with Applications*, CRC Press.
.. [3] Lewandowski, D., Kurowicka, D. and Joe, H. (2009). Generating random correlation
   matrices based on vines and extended onion method. J. Multivariate Anal. 100, 1989-2001.
   doi:10.1016/j.jmva.2009.04.008
.. [4] Juárez, M. A. and Steel, M. F. J. (2010). Model-based clustering of non-Gaussian
   panel data based on skew-t distributions. J. Bus. Econ. Stat. 28, 52-66 (the Gamma(2,
   0.1) prior on the Student-t degrees of freedom). doi:10.1198/jbes.2009.07145
.. [5] Bell, A., Fairbrother, M. and Jones, K. (2019). Fixed and random effects models:
   making an informed choice. Quality & Quantity 53, 1051-1074.
   doi:10.1007/s11135-018-0802-x
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..core import suffstats as _ss
from ..core.errors import EstimationError, PanelDataError, SpecificationError, choices_error
from ..core.terms import WITHIN, part_label
from . import families as fam_mod
from ..core import gaussian
from . import slopes
from .priors import (Prior, _coerce, _fill, coef_rv, prior_on_standard_scale, resolve_priors,
                     sd_rv, standardised_params)
from .graph import mark_built
from .latentpost import LatentPosterior
from .spec import LatentSpec, ModelSpec

__all__ = ["LatentSpec", "LatentModel", "LatentPosterior", "latent_model", "latent_class",
           "column_values", "describe_row", "LATENT_OPTIONS"]

#: options that send a builder to :class:`LatentModel`
LATENT_OPTIONS = ("family", "random_slopes", "trials", "exposure", "centred")
#: prior keys handled here (the rest go to :func:`~bayespanel.bayes.priors.resolve_priors`)
EXTRA_PRIOR_KEYS = ("sigma_slope", "lkj_eta", "nu", "inv_sqrt_shape")


def wants_latent(options: dict) -> bool:
    """True when builder options ask for a latent-effect model (used by the builders)."""
    extra = {k: v for k, v in options.items() if k in LATENT_OPTIONS}
    return bool(extra) and not (set(extra) == {"family"} and extra["family"] == "gaussian")


def latent_model(cls, panel, formula, priors=None, likelihood=None, occasion_effects=False,
                 **options):
    """Entry used by the builders' hook (``GaussianModel.__new__``): check the builder and
    the options, and return a new, not yet initialised instance of
    :func:`latent_class` ``(cls)``; Python then runs its ``__init__`` with the builder's
    arguments."""
    unknown = [k for k in options if k not in LATENT_OPTIONS]
    if unknown:
        raise SpecificationError(f"{cls.__name__} got unknown option(s) {', '.join(map(repr, unknown))}")
    if cls.unit_effects != "random":
        raise SpecificationError(
            f"{', '.join(k + '=' for k in options)} is available on RandomIntercept, "
            f"WithinBetween and CorrelatedEffects, not on {cls.__name__}")
    return object.__new__(latent_class(cls))


_LATENT_CLASSES: dict = {}


def latent_class(builder) -> type:
    """The class of the latent-effect models a builder makes (``family=`` other than
    Gaussian, or ``random_slopes=``): a :class:`LatentModel` that is also an instance of
    the builder, so ``isinstance(RandomIntercept(panel, f, family="poisson"),
    RandomIntercept)`` holds and the registry of model kinds finds its kind. One class per
    builder, made on first use."""
    if issubclass(builder, LatentModel):
        return builder
    if builder not in _LATENT_CLASSES:
        name = f"Latent{builder.__name__}"
        _LATENT_CLASSES[builder] = type(name, (_BuiltThrough, LatentModel, builder), {
            "__module__": __name__, "__qualname__": name, "_builder": builder,
            "__doc__": f"A :class:`LatentModel` made by ``{builder.__name__}(...)`` with the "
                       "latent options (see :func:`latent_class`)."})
    return _LATENT_CLASSES[builder]


class _BuiltThrough:
    """What a latent-effect model made through a builder takes from it (its arguments)
    and what it refuses: the Gaussian builders' data swaps and constructors work on
    sufficient statistics, which a latent-effect likelihood does not read."""

    _builder = None

    def __init__(self, panel, formula, priors=None, likelihood=None, occasion_effects=False,
                 errors="iid", initial_conditions=True, **options):
        # errors: the builders' option; anything but "iid" was refused by their __new__
        LatentModel.__init__(self, panel, formula, builder=self._builder.__name__,
                             kind=self._builder.kind, priors=priors, likelihood=likelihood,
                             occasion_effects=occasion_effects,
                             initial_conditions=initial_conditions, **options)

    def _refuse(self, what, instead):
        raise SpecificationError(
            f"{what} is not available for latent-effect models (family="
            f"{self.family.name!r}); {instead}")

    def set_suffstats(self, stats, rows=None):
        self._refuse("set_suffstats", "swap the outcome with set_data(y)")

    def sample_prior_predictive(self, draws=500, seed=1):
        self._refuse("sample_prior_predictive", "use pymc.sample_prior_predictive on "
                     "m.pymc_model")

    @classmethod
    def from_design(cls, *args, **kwargs):
        raise SpecificationError(f"{cls._builder.__name__} with the latent options is built "
                                 "from a panel: call it with the panel and the formula")

    from_suffstats = from_design


def column_values(panel, design, value, option):
    """An array for ``trials=``/``exposure=`` given as a column name or an array.

    Parameters
    ----------
    panel : bayespanel.Panel
        The panel the design was built on.
    design : bayespanel.Design
        The design; the values are taken on its estimation rows.
    value : str, array or None
        A column of the panel, or one value per row of the table (or of the estimation
        sample).
    option : str
        The option's name, for the error messages.

    Returns
    -------
    (array or None, str or None)
        The values on the estimation rows and where they came from (the column's name, or
        ``"array"``).
    """
    if value is None:
        return None, None
    if isinstance(value, str):
        if value not in panel.columns:
            raise SpecificationError(f"{option}={value!r} is not a column of the panel")
        s = panel.sorted_column(value).loc[design.rows]
        if s.isna().any():
            r = int(np.argmax(s.isna().to_numpy()))
            raise PanelDataError(f"column {value!r} ({option}) is missing at {describe_row(design)(r)}")
        return s.to_numpy(dtype=float), value
    arr = np.asarray(value, dtype=float)
    if arr.shape == (design.n_input_rows,) and design.n_dropped:
        index = panel.sorted_column(panel.unit).index  # the table's rows in panel order
        arr = pd.Series(arr, index=index).loc[design.rows].to_numpy()
    if arr.shape != (design.n,):
        raise SpecificationError(f"{option} has {arr.size} values; the estimation sample has "
                                 f"{design.n} rows")
    return arr, "array"


def _py(v):
    return v.item() if isinstance(v, np.generic) else v


def describe_row(design):
    """A function that names an estimation row by its unit and occasion (for messages).

    Parameters
    ----------
    design : bayespanel.Design
        The design whose rows are named.
    """
    def f(r):
        return (f"{design.spec.unit}={_py(design.units[design.unit_codes[r]])!r}, "
                f"{design.spec.time}={_py(design.time[r])!r}")
    return f


class LatentModel:
    """A panel model with latent unit effects (see the module docstring).

    Built through ``RandomIntercept``, ``WithinBetween`` or ``CorrelatedEffects`` with
    ``family=`` / ``random_slopes=``; the parameters below are those options.

    Parameters
    ----------
    family : {"gaussian", "student_t", "bernoulli", "binomial", "poisson", "negative_binomial"}
    random_slopes : list of str, optional
        Time-varying covariates (as named in the formula) whose within slope varies by unit.
    trials : str or array, optional
        Binomial trials per row (column name or array).
    exposure : str or array, optional
        Poisson / negative-binomial exposure (enters as ``log(exposure)``).
    centred : bool, default False
        Centred unit effects instead of the non-centred default.
    likelihood : {"marginal", "latent"}, optional
        Gaussian random slopes only: Woodbury marginal (default) or latent effects.
    priors : dict, optional
        As for the Gaussian builders (term labels, ``"coef"``, ``"sigma_unit"``,
        ``"sigma_obs"``), plus ``"sigma_slope"`` (SD prior of every random slope),
        ``"lkj_eta"`` (a number, default 2), ``"nu"`` (Student-t degrees of freedom,
        default ``gamma2`` with scale 10, i.e. Gamma(2, 0.1), Juárez and Steel 2010) and
        ``"inv_sqrt_shape"`` (prior on ``1/sqrt(shape)`` of the negative binomial, default
        half-normal(1)). Logit and log-link priors are on the link scale.
    """

    def __init__(self, panel, formula, *, builder="RandomIntercept", kind="random",
                 priors=None, likelihood=None, occasion_effects=False, family="gaussian",
                 random_slopes=None, trials=None, exposure=None, centred=False,
                 initial_conditions=True):
        fam = fam_mod.get_family(family)
        if not isinstance(centred, (bool, np.bool_)):
            raise SpecificationError(f"centred={centred!r} must be True or False")
        slopes_req = self._check_slopes(random_slopes)
        if likelihood is None:
            likelihood = "marginal" if fam.is_gaussian else "latent"
        allowed = ("marginal", "latent") if fam.is_gaussian else ("latent",)
        if likelihood not in allowed:
            raise SpecificationError(
                choices_error("likelihood", likelihood, allowed).args[0]
                + f"; family={fam.name!r} has no closed-form marginal likelihood")
        if fam.is_gaussian and not slopes_req:
            raise SpecificationError(
                "family='gaussian' without random_slopes is the marginal Gaussian model; "
                f"call {builder} without the latent options")
        self.builder, self.kind, self.family = builder, kind, fam
        self.likelihood = likelihood
        extra = {} if initial_conditions is True else {"initial_conditions": initial_conditions}
        design = panel.design(formula, occasion_effects=occasion_effects, **extra)
        M, labels = design.matrices(kind)
        trials_arr, trials_name = column_values(panel, design, trials, "trials")
        expo_arr, expo_name = column_values(panel, design, exposure, "exposure")
        fam_mod.check_outcome(fam, design.y, outcome=design.outcome, trials=trials_arr,
                              exposure=expo_arr, where=describe_row(design))
        slope_labels = self._slope_labels(design, slopes_req)
        self.design = design
        self.labels = list(labels)
        self.outcome = design.outcome
        self.units = design.units
        self.M = np.asarray(M, dtype=float)
        self.y = design.y
        self.codes = design.unit_codes
        self.rows = (self.M, self.y, self.codes)
        self.trials = trials_arr
        self.log_exposure = None if expo_arr is None else np.log(expo_arr)
        self.intercept = self.labels.index("Intercept") if "Intercept" in self.labels else None
        self.stats = _ss.compute(self.M, self.y, self.codes, names=self.labels + [self.outcome])
        self.scaling = self._scaling()
        idx = [self.labels.index(s) for s in slope_labels]
        centres = [float(self.scaling.c[j]) for j in idx]
        self.slope_index = idx
        self.Z = np.column_stack([np.ones(len(self.y))] + [self.M[:, j] - c for j, c in
                                                         zip(idx, centres)])
        self.priors, extra, lkj = self._resolve_priors(priors)
        self.lspec = LatentSpec(
            family=fam.name, link=fam.link, random_slopes=tuple(slopes_req),
            slope_labels=tuple(slope_labels), slope_centres=tuple(centres),
            centred=bool(centred), trials=trials_name, exposure=expo_name, lkj_eta=lkj,
            extra_priors=tuple((k, tuple(sorted(p.to_dict().items()))) for k, p in extra.items()))
        self.extra_priors = extra
        self.spec = ModelSpec(
            model=builder, kind=kind, unit_effects="random", likelihood=likelihood,
            outcome=self.outcome, labels=tuple(self.labels),
            priors=tuple((k, tuple(sorted(p.to_dict().items()))) for k, p in self.priors.items()),
            design=tuple(design.spec.to_dict().items()))
        self._nutpie = None
        self.pymc_model = self._build()
        mark_built(self)  # so that a user's additions to pymc_model are known

    # ------------------------------------------------------------------ checks
    @staticmethod
    def _check_slopes(random_slopes):
        if random_slopes is None:
            return []
        if isinstance(random_slopes, str):
            random_slopes = [random_slopes]
        out = list(random_slopes)
        if not all(isinstance(s, str) for s in out):
            raise SpecificationError(f"random_slopes={random_slopes!r} must be a list of "
                                     "covariate names")
        if len(set(out)) != len(out):
            raise SpecificationError(f"random_slopes={random_slopes!r} names a covariate twice")
        if len(out) > 2:
            raise SpecificationError(
                f"random_slopes={random_slopes!r}: at most two random slopes are supported "
                "(the unit-level quadrature integrates over at most three effects)")
        return out

    def _slope_labels(self, design, req):
        out = []
        for name in req:
            if name not in design.terms:
                raise SpecificationError(
                    f"random_slopes names {name!r}, which is not a term of the formula; terms "
                    f"are {', '.join(map(repr, design.terms))}")
            if not design.varies_within[name]:
                raise SpecificationError(
                    f"random_slopes names {name!r}, which does not vary within units; only "
                    "time-varying covariates can have unit-specific within slopes")
            lab = part_label(name, WITHIN) if self.kind == "within_between" else name
            out.append(lab)
        return out

    def _scaling(self):
        fam = self.family
        M, y = self.M, self.y
        sd = M.std(axis=0, ddof=1)
        center = M.mean(axis=0) if self.intercept is not None else np.zeros(M.shape[1])
        bad = [self.labels[j] for j in range(M.shape[1]) if j != self.intercept and not sd[j] > 0]
        if bad:
            raise EstimationError(f"no variation to estimate from in column(s) "
                                  f"{', '.join(map(repr, bad))}")
        if self.intercept is not None:
            center[self.intercept], sd[self.intercept] = 0.0, 1.0
        if fam.link == "identity":
            cy, sy = (float(y.mean()) if self.intercept is not None else 0.0), float(y.std(ddof=1))
        else:
            cy, sy = 0.0, 1.0
        return gaussian.Scaling(tuple(np.append(center, cy)), tuple(np.append(sd, sy)),
                                self.intercept)

    def _link_mean(self):
        fam, y = self.family, self.y
        if fam.link == "identity":
            return float(y.mean()), float(y.std(ddof=1))
        if fam.link == "logit":
            rate = y.sum() / (self.trials.sum() if self.trials is not None else len(y))
            rate = float(np.clip(rate, 0.01, 0.99))
            return float(np.log(rate / (1 - rate))), 1.0
        expo = 1.0 if self.log_exposure is None else np.exp(self.log_exposure)
        rate = max(float(np.mean(y / expo)), 0.01)
        return float(np.log(rate)), 1.0

    def _resolve_priors(self, user):
        fam = self.family
        user = dict(user or {})
        if not isinstance(user, dict):
            raise SpecificationError("priors must be a dict keyed by term or component")
        extra_user = {k: user.pop(k) for k in list(user) if k in EXTRA_PRIOR_KEYS}
        if "sigma_obs" in user and "sigma_obs" not in fam.params:
            raise SpecificationError(f"priors has key 'sigma_obs', but family={fam.name!r} has "
                                     "no occasion-level SD")
        mean_eff, sd_eff = self._link_mean()
        sd_x = self.M.std(axis=0, ddof=1)
        out = resolve_priors(user, self.labels, intercept=self.intercept, sd_y=sd_eff,
                             mean_y=mean_eff, sd_x=np.where(sd_x > 0, sd_x, 1.0),
                             has_unit_sd=True)
        if "sigma_obs" not in fam.params:
            out.pop("sigma_obs", None)
        allowed = ["lkj_eta", "sigma_slope"] if self.slope_index else []
        allowed += [p for p in ("nu",) if p in fam.params]
        allowed += ["inv_sqrt_shape"] if fam.name == "negative_binomial" else []
        for k in extra_user:
            if k not in allowed:
                raise SpecificationError(
                    f"priors has key {k!r}, which this model does not use; its extra keys are "
                    + (", ".join(map(repr, allowed)) or "none"))
        extra = {}
        if self.slope_index:
            given = extra_user.get("sigma_slope")
            for j in self.slope_index:
                base = sd_eff / max(sd_x[j], 1e-300)
                p = _coerce("sigma_slope", given) if given is not None else Prior("half_normal")
                if not p.is_sd:
                    raise SpecificationError("priors['sigma_slope'] is a standard deviation; "
                                             f"family {p.family!r} does not fit")
                extra[f"sigma_slope[{self.labels[j]}]"] = _fill(p, sd_prior=True, base_sd=base)
        if "nu" in fam.params:
            p = _coerce("nu", extra_user.get("nu", Prior("gamma2", scale=10.0)))
            extra["nu"] = _fill(p, sd_prior=True, base_sd=10.0)
        if fam.name == "negative_binomial":
            p = _coerce("inv_sqrt_shape", extra_user.get("inv_sqrt_shape", Prior("half_normal")))
            extra["inv_sqrt_shape"] = _fill(p, sd_prior=True, base_sd=1.0)
        lkj = extra_user.get("lkj_eta", 2.0)
        if isinstance(lkj, bool) or not isinstance(lkj, (int, float)) or not lkj > 0:
            raise SpecificationError(f"priors['lkj_eta']={lkj!r} must be a positive number")
        return out, extra, float(lkj)

    # ------------------------------------------------------------------ graph
    def _std_coef_params(self, j):
        return prior_on_standard_scale(self.priors[self.labels[j]], self.scaling, j,
                                       self.intercept)

    def _build(self):
        import pymc as pm
        import pytensor.tensor as pt

        sc, fam, ls = self.scaling, self.family, self.lspec
        q = ls.q
        effects = ["Intercept"] + list(ls.slope_labels)
        coords = {"term": self.labels, "unit": list(self.units), "effect": effects,
                  "effect2": effects}
        if q > 1:
            coords["slope"] = list(ls.slope_labels)
        Ms, ys = sc.standardise_rows(self.M, self.y)
        Zs = np.column_stack([np.ones(len(ys))] + [Ms[:, j] for j in self.slope_index])
        sy = sc.scale_y
        with pm.Model(coords=coords) as model:
            Xd = pm.Data("rows_X", Ms)
            parts = []
            for j, lab in enumerate(self.labels):
                fam_j = self.priors[lab].family
                parts.append(coef_rv(pm, f"coef_std_{j}", fam_j, self._std_coef_params(j), None))
            b_std = pt.stack(parts)
            tau_p = prior_on_standard_scale(self.priors["sigma_unit"], sc)
            sds = [sd_rv(pm, "sigma_unit_std", self.priors["sigma_unit"].family, tau_p)]
            for j, lab in zip(self.slope_index, ls.slope_labels):
                p = self.extra_priors[f"sigma_slope[{lab}]"]
                par = prior_on_standard_scale(p, sc, j, self.intercept)
                sds.append(sd_rv(pm, f"sigma_slope_std_{len(sds)}", p.family, par))
            sd_vec = pt.stack(sds)
            if q > 1:
                R = pm.LKJCorr("corr_chol_unit", n=q, eta=ls.lkj_eta)
                L = sd_vec[:, None] * R
            else:
                L = sd_vec[:, None] * pt.ones((1, 1))
            sigma = None
            if "sigma_obs" in fam.params:
                p = prior_on_standard_scale(self.priors["sigma_obs"], sc)
                sigma = sd_rv(pm, "sigma_obs_std", self.priors["sigma_obs"].family, p)
                pm.Deterministic("sigma_obs", sy * sigma)
            A, a0 = sc.coef_map()
            pm.Deterministic("coef", pt.as_tensor(A) @ b_std + a0, dims="term")
            pm.Deterministic("sigma_unit", sy * sds[0])
            D = np.array([sy] + [sy / sc.s[j] for j in self.slope_index])
            if q > 1:
                pm.Deterministic("sigma_slope", sd_vec[1:] * D[1:], dims="slope")
                pm.Deterministic("corr_unit", R @ R.T, dims=("effect", "effect2"))
            if self.likelihood == "marginal":  # Gaussian random slopes, Woodbury
                st = slopes.slope_stats(Ms, Zs, ys, self.codes)
                data = _StatsData(pm, st)
                pm.Potential("loglik", slopes.slope_marginal_loglik(data, b_std, sigma, L, xp=pt))
                return model
            cd = pm.Data("rows_unit", np.asarray(self.codes, dtype=np.int64))
            if q == 1:  # random intercept: a vector of effects, gathered once per row
                if ls.centred:
                    u = pm.Normal("unit_effect_std", 0.0, sds[0], dims="unit")
                else:
                    u = sds[0] * pm.Normal("unit_effect_raw", 0.0, 1.0, dims="unit")
                g = u[:, None]
                eta = Xd @ b_std + u[cd]
            else:
                Zd = pm.Data("rows_Z", Zs)
                if ls.centred:
                    g = pm.MvNormal("unit_effect_std", mu=np.zeros(q), chol=L,
                                    dims=("unit", "effect"))
                else:
                    g = pm.Normal("unit_effect_raw", 0.0, 1.0, dims=("unit", "effect")) @ L.T
                eta = Xd @ b_std + (Zd * g[cd]).sum(axis=1)
            pm.Deterministic("unit_effect", g * D, dims=("unit", "effect"))
            self._likelihood(pm, pt, eta, ys, sigma)
        return model

    def _likelihood(self, pm, pt, eta, ys, sigma):
        fam = self.family
        obs = pm.Data("rows_y", ys)
        if fam.name == "gaussian":
            pm.Normal("y", mu=eta, sigma=sigma, observed=obs)
        elif fam.name == "student_t":
            p = standardised_params(self.extra_priors["nu"], loc_shift=0.0, factor=1.0)
            nu = sd_rv(pm, "nu", self.extra_priors["nu"].family, p)
            pm.StudentT("y", nu=nu, mu=eta, sigma=sigma, observed=obs)
        elif fam.name == "bernoulli":
            pm.Bernoulli("y", logit_p=eta, observed=obs)
        elif fam.name == "binomial":
            n = pm.Data("rows_trials", self.trials)
            pm.Binomial("y", n=n, logit_p=eta, observed=obs)
        else:
            if self.log_exposure is not None:
                eta = eta + pm.Data("rows_log_exposure", self.log_exposure)
            mu = pt.exp(eta)
            if fam.name == "poisson":
                pm.Poisson("y", mu=mu, observed=obs)
            else:
                p = standardised_params(self.extra_priors["inv_sqrt_shape"], loc_shift=0.0,
                                        factor=1.0)
                phi = sd_rv(pm, "inv_sqrt_shape", self.extra_priors["inv_sqrt_shape"].family, p)
                shape = pm.Deterministic("shape", 1.0 / phi ** 2)
                pm.NegativeBinomial("y", mu=mu, alpha=shape, observed=obs)

    # ------------------------------------------------------------------ sampling
    def sample(self, draws=1000, tune=1000, chains=4, seed=1, sampler="auto", progress=True,
               cores=None, target_accept=0.9):
        """Draw from the posterior with NUTS; returns a :class:`LatentPosterior`.

        Same arguments as :meth:`bayespanel.bayes.GaussianModel.sample`; the default
        ``target_accept`` is 0.9 because hierarchical latent models have curved posteriors
        (common practice). Divergences, R-hat and ESS are checked and reported with
        :class:`~bayespanel.SamplingWarning`.
        """
        from .sampling import run

        dt, info = run(self, draws=draws, tune=tune, chains=chains, seed=seed, sampler=sampler,
                       progress=progress, cores=cores, target_accept=target_accept)
        post = LatentPosterior.from_model(self, dt, info)
        post.diagnostics(warn=True)
        return post

    def set_data(self, y):
        """Swap in a new outcome on the same rows without rebuilding the graph.

        Used for repeated fits (simulation-based calibration). The standardisation and
        priors stay as built; the outcome is checked against the family's support.
        """
        import pymc as pm

        y = np.asarray(y, dtype=float)
        if y.shape != self.y.shape:
            raise SpecificationError(f"y has {y.size} values; the model has {self.y.size} rows")
        if self.likelihood == "marginal":
            raise SpecificationError("set_data is available for latent likelihoods only")
        fam_mod.check_outcome(self.family, y, outcome=self.outcome, trials=self.trials,
                              exposure=None if self.log_exposure is None else np.exp(self.log_exposure))
        self.y = y
        self.rows = (self.M, y, self.codes)
        _, ys = self.scaling.standardise_rows(self.M, y)
        with self.pymc_model:
            pm.set_data({"rows_y": ys})
        return self

    def __repr__(self):
        slopes_txt = f", random slopes {list(self.lspec.slope_labels)}" if self.slope_index else ""
        return (f"{self.builder}({self.outcome} ~ {', '.join(self.labels)}; family "
                f"{self.family.name!r}{slopes_txt}; {len(self.y)} rows, {len(self.units)} units, "
                f"{self.likelihood})")


class _StatsData:
    """:class:`~bayespanel.bayes.slopes.SlopeStats` held as ``pm.Data`` in the graph."""

    def __init__(self, pm, st):
        self.n = float(st.n)
        self.q = st.q
        for k in ("ZZ", "ZX", "Zy", "XX", "Xy"):
            setattr(self, k, pm.Data(f"slope_{k}", getattr(st, k)))
        self.yy = pm.Data("slope_yy", np.asarray(st.yy))


