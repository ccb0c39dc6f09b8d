"""Priors: families, defaults on the scale of the data, and their standardised form.

Every prior is stated on the *original* scale of the data (the units of the outcome and of
each covariate). Inside the sampler the columns are standardised (see
:class:`bayespanel.core.gaussian.Scaling`); each prior is mapped exactly to the
standardised parameter, because every family offered here is a location-scale family
(or a scale family for standard deviations). The defaults, documented in docs/priors.md:

* slope of term ``x``: ``Normal(0, 2.5 sd(y) / sd(x))`` where ``sd(x)`` is the SD of the
  column as it enters the likelihood (its within SD in :class:`FixedEffects`);
* intercept: ``Normal(mean(y), 2.5 sd(y))`` on the expected outcome at the sample means
  of the covariates (the centred intercept);
* ``sigma_obs``: exponential with mean ``sd(y)``;
* ``sigma_unit``: half-normal with scale ``sd(y)``; presets ``"half_student_t"``
  (3 degrees of freedom, scale ``sd(y)``), ``"exponential"`` (mean ``sd(y)``) and
  ``"gamma2"``, the boundary-avoiding Gamma(2, rate) on the SD of Chung et al. (2013),
  with mean ``sd(y)`` (rate ``2 / sd(y)``);
* ``rho`` (models with ``errors="ar1"``): uniform on (-1, 1), the whole stationary range
  (on [0, 1) when the gaps between occasions are not whole numbers, where a negative
  ``rho`` has no meaning); ``Prior("uniform", lower=..., upper=...)`` narrows it.

References
----------
.. [1] Chung, Y., Rabe-Hesketh, S., Dorie, V., Gelman, A. and Liu, J. (2013). A nondegenerate
   penalized likelihood estimator for variance parameters in multilevel models.
   Psychometrika 78, 685-709. doi:10.1007/s11336-013-9328-2
.. [2] Gelman, A. (2006). Prior distributions for variance parameters in hierarchical
   models. Bayesian Analysis 1, 515-534. doi:10.1214/06-BA117A
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from ..core.errors import SpecificationError, choices_error
from ..core.terms import parse

__all__ = ["Prior", "COEF_FAMILIES", "SD_FAMILIES", "RHO_FAMILIES", "resolve_priors",
           "default_priors", "prior_logpdf", "check_prior", "coef_rv", "sd_rv", "rho_rv"]

#: coefficient families and their parameters (all on the data scale)
COEF_FAMILIES = {"normal": ("mu", "sigma"), "student_t": ("nu", "mu", "sigma"), "flat": ()}
#: standard-deviation families and their parameters (``scale`` in outcome units)
SD_FAMILIES = {"half_normal": ("scale",), "half_student_t": ("nu", "scale"),
               "exponential": ("scale",), "gamma2": ("scale",), "half_flat": ()}
#: families for the AR(1) correlation ``rho`` (bounds inside [-1, 1]; a correlation has
#: no units, so its prior is the same on every scale)
RHO_FAMILIES = {"uniform": ("lower", "upper")}
RHO_KEY = "rho"
#: preset names accepted for a standard deviation, with defaults in units of sd(y)
SD_PRESETS = {"half_normal": {"scale": 1.0}, "half_student_t": {"nu": 3.0, "scale": 1.0},
              "exponential": {"scale": 1.0}, "gamma2": {"scale": 0.5}, "half_flat": {}}
COEF_PRESETS = {"normal": {"mu": 0.0, "sigma": 2.5}, "student_t": {"nu": 3.0, "mu": 0.0, "sigma": 2.5},
                "flat": {}}
SD_NAMES = ("sigma_obs", "sigma_unit")
ALL_KEY = "coef"
#: key of the prior shared by every occasion effect (labels ``occasion[...]``, with their
#: ``(within)``, ``(between)`` and ``(unit mean)`` parts)
OCCASION_KEY = "occasion"


@dataclass(frozen=True)
class Prior:
    """One prior distribution on the data scale.

    Parameters
    ----------
    family : str
        For coefficients one of ``"normal"`` (``mu``, ``sigma``), ``"student_t"``
        (``nu``, ``mu``, ``sigma``), ``"flat"``; for standard deviations one of
        ``"half_normal"`` (``scale``), ``"half_student_t"`` (``nu``, ``scale``),
        ``"exponential"`` (``scale`` = the mean), ``"gamma2"`` (Gamma with shape 2 and
        rate ``1/scale``, so the mean is ``2 scale``; Chung et al. 2013), ``"half_flat"``;
        for the AR(1) correlation ``rho`` ``"uniform"`` (``lower``, ``upper`` inside
        [-1, 1]).
    **params : float
        The family's parameters; missing ones take the defaults scaled to the data.

    Examples
    --------
    >>> from bayespanel.bayes import Prior
    >>> Prior("normal", mu=0, sigma=10)
    Prior('normal', mu=0.0, sigma=10.0)
    """

    family: str
    params: tuple = ()

    def __init__(self, family: str, **params):
        fam = str(family)
        allowed = {**COEF_FAMILIES, **SD_FAMILIES, **RHO_FAMILIES}
        if fam not in allowed:
            raise choices_error("prior family", family, sorted(allowed))
        for name in params:
            if name not in allowed[fam]:
                raise SpecificationError(
                    f"prior {fam!r} has no parameter {name!r}; its parameters are "
                    f"{', '.join(map(repr, allowed[fam])) or 'none'}")
        clean = {}
        for name, value in params.items():
            try:
                val = float(value)
            except (TypeError, ValueError):
                raise SpecificationError(
                    f"prior {fam!r} parameter {name}={value!r} must be a number") from None
            if not np.isfinite(val) or (name in ("sigma", "scale", "nu") and val <= 0):
                raise SpecificationError(
                    f"prior {fam!r} parameter {name}={value!r} must be finite"
                    + (" and positive" if name != "mu" else ""))
            clean[name] = val
        object.__setattr__(self, "family", fam)
        object.__setattr__(self, "params", tuple(sorted(clean.items())))

    @property
    def kwargs(self) -> dict:
        return dict(self.params)

    @property
    def is_sd(self) -> bool:
        return self.family in SD_FAMILIES

    def __repr__(self) -> str:
        inner = "".join(f", {k}={v!r}" for k, v in self.params)
        return f"Prior({self.family!r}{inner})"

    def to_dict(self) -> dict:
        return {"family": self.family, **self.kwargs}

    @classmethod
    def from_dict(cls, d: dict) -> "Prior":
        d = dict(d)
        return cls(d.pop("family"), **d)

    def describe(self) -> str:
        """A short readable form such as ``normal(mu=0, sigma=2.5)``."""
        inner = ", ".join(f"{k}={v:.4g}" for k, v in self.params)
        return f"{self.family}({inner})"


def _coerce(key: str, value) -> Prior:
    """Accept a Prior, a family name, or a dict with a ``family`` entry."""
    if isinstance(value, Prior):
        return value
    if isinstance(value, str):
        return Prior(value)
    if isinstance(value, dict):
        if "family" not in value:
            raise SpecificationError(f"priors[{key!r}] needs a 'family' entry, got {value!r}")
        return Prior.from_dict(value)
    raise SpecificationError(
        f"priors[{key!r}]={value!r} is not a prior; give a Prior, a family name such as "
        "'normal' or 'gamma2', or a dict like {'family': 'normal', 'sigma': 10}")


def default_priors(labels, *, intercept, sd_y, mean_y, sd_x, has_unit_sd, rho=None) -> dict:
    """The default prior of every parameter, fully specified on the data scale."""
    out = {}
    for j, lab in enumerate(labels):
        if j == intercept:
            out[lab] = Prior("normal", mu=mean_y, sigma=2.5 * sd_y)
        else:
            out[lab] = Prior("normal", mu=0.0, sigma=2.5 * sd_y / sd_x[j])
    out["sigma_obs"] = Prior("exponential", scale=sd_y)
    if has_unit_sd:
        out["sigma_unit"] = Prior("half_normal", scale=sd_y)
    if rho is not None:
        out[RHO_KEY] = Prior("uniform", lower=rho[0], upper=rho[1])
    return out


def _fill(prior: Prior, *, sd_prior: bool, base_sd: float, base_mu: float = 0.0) -> Prior:
    """Complete a partly given prior with defaults scaled to the data."""
    given = prior.kwargs
    preset = (SD_PRESETS if sd_prior else COEF_PRESETS)[prior.family]
    full = {}
    for name, val in preset.items():
        if name in given:
            full[name] = given[name]
        elif name in ("sigma", "scale"):
            full[name] = val * base_sd
        elif name == "mu":
            full[name] = base_mu
        else:
            full[name] = val
    return Prior(prior.family, **full)


def check_prior(key: str, value) -> Prior:
    """One user prior as a :class:`Prior`, checked without the data: a known family with
    valid parameters, a standard-deviation family for ``sigma_obs`` and ``sigma_unit``
    and a coefficient family for every other key (so a mistake is caught before any
    sampling)."""
    prior = _coerce(key, value)
    if key == RHO_KEY:
        if prior.family not in RHO_FAMILIES:
            raise SpecificationError(
                f"priors['rho'] is the AR(1) correlation; family {prior.family!r} does not "
                f"fit, choose one of {', '.join(map(repr, RHO_FAMILIES))}")
        kw = {"lower": -1.0, "upper": 1.0, **prior.kwargs}
        if not -1.0 <= kw["lower"] < kw["upper"] <= 1.0:
            raise SpecificationError(
                f"priors['rho'] uniform(lower={kw['lower']:g}, upper={kw['upper']:g}) needs "
                "-1 <= lower < upper <= 1 (rho is a correlation)")
        return Prior(prior.family, **kw)
    if prior.family in RHO_FAMILIES:
        raise SpecificationError(
            f"priors[{key!r}]: family {prior.family!r} is for the AR(1) correlation 'rho' only")
    sd_prior = key in SD_NAMES
    if sd_prior != prior.is_sd:
        fams = SD_FAMILIES if sd_prior else COEF_FAMILIES
        what = "a standard deviation" if sd_prior else "a coefficient"
        raise SpecificationError(
            f"priors[{key!r}] is {what}; family {prior.family!r} does not fit, choose one "
            f"of {', '.join(map(repr, fams))}")
    return prior


def resolve_priors(user, labels, *, intercept, sd_y, mean_y, sd_x, has_unit_sd,
                   rho=None) -> dict:
    """Merge the user's priors with the defaults; every entry fully specified.

    Parameters
    ----------
    user : dict or None
        Keys: a term label (``"x"``, ``"x (within)"``, ``"Intercept"``), ``"coef"`` (every
        slope not named), ``"occasion"`` (every occasion effect not named, with
        ``occasion_effects=True``; it overrides ``"coef"`` for them), ``"sigma_obs"`` and,
        for models with unit intercepts, ``"sigma_unit"``. Values: :class:`Prior`, a family or preset name, or a dict.
    labels : list of str
    intercept : int or None
        Position of the intercept among ``labels``.
    sd_y, mean_y : float
    sd_x : array
        SD of each column as it enters the likelihood.
    has_unit_sd : bool
    rho : (float, float) or None
        The default range of the AR(1) correlation (models with ``errors="ar1"``), which
        then takes the key ``"rho"``; None: the model has no ``rho``.

    Raises
    ------
    SpecificationError
        For unknown keys (the message lists the valid ones), a coefficient family on a
        standard deviation or the reverse, or bad parameters.
    """
    labels = list(labels)
    out = default_priors(labels, intercept=intercept, sd_y=sd_y, mean_y=mean_y, sd_x=sd_x,
                         has_unit_sd=has_unit_sd, rho=rho)
    if user is None:
        return out
    if not isinstance(user, dict):
        raise SpecificationError(f"priors must be a dict keyed by term or component, got "
                                 f"{type(user).__name__}")
    occ = [lab for lab in labels if parse(lab).is_occasion]
    valid = (labels + [ALL_KEY] + ([OCCASION_KEY] if occ else [])
             + (["sigma_obs", "sigma_unit"] if has_unit_sd else ["sigma_obs"])
             + ([RHO_KEY] if rho is not None else []))
    for key in user:
        if key not in valid:
            extra = (" (this model has no unit intercepts, so no 'sigma_unit')"
                     if key == "sigma_unit" else
                     " (the AR(1) correlation exists only with errors='ar1')"
                     if key == RHO_KEY else "")
            raise SpecificationError(
                f"priors has an unknown key {key!r}{extra}; valid keys are "
                + ", ".join(map(repr, valid)))
    order = [ALL_KEY, OCCASION_KEY] + [k for k in user if k not in (ALL_KEY, OCCASION_KEY)]
    for key in order:
        if key not in user:
            continue
        prior = check_prior(key, user[key])
        if key == RHO_KEY:
            out[key] = prior
            continue
        sd_prior = key in SD_NAMES
        if sd_prior:
            out[key] = _fill(prior, sd_prior=True, base_sd=sd_y)
            continue
        if key == ALL_KEY:
            targets = [lab for j, lab in enumerate(labels) if j != intercept and lab not in user]
        elif key == OCCASION_KEY:
            targets = [lab for lab in occ if lab not in user]
        else:
            targets = [key]
        for lab in targets:
            j = labels.index(lab)
            if j == intercept:
                out[lab] = _fill(prior, sd_prior=False, base_sd=sd_y, base_mu=mean_y)
            else:
                out[lab] = _fill(prior, sd_prior=False, base_sd=sd_y / sd_x[j])
    return out


def prior_on_standard_scale(prior: Prior, scaling, column=None, intercept=None) -> dict:
    """Parameters of ``prior`` on the scale the sampler works on (outcome and covariates
    standardised by ``scaling``: ``center_y``, ``scale_y`` and the column scales ``s``).

    ``column=None``: a standard deviation of the outcome (``sigma_obs``, ``sigma_unit``),
    divided by ``scale_y``. ``column=j``: coefficient ``j`` (or the SD of its random
    slope): times ``s[j] / scale_y``, and when ``j`` is ``intercept`` shifted by
    ``center_y`` and divided by ``scale_y``. See :func:`standardised_params`.
    """
    sy = scaling.scale_y
    if column is None:
        return standardised_params(prior, loc_shift=0.0, factor=1.0 / sy)
    if column == intercept:
        return standardised_params(prior, loc_shift=scaling.center_y, factor=1.0 / sy)
    return standardised_params(prior, loc_shift=0.0, factor=scaling.s[column] / sy)


def standardised_params(prior: Prior, *, loc_shift: float, factor: float) -> dict:
    """Parameters of ``prior`` after the change of variable ``theta* = (theta - shift) * factor``.

    Coefficients: location and scale move together; ``nu`` is unchanged. Standard
    deviations (``shift = 0``): ``scale`` multiplies by ``factor``.
    """
    kw = prior.kwargs
    out = {}
    if "mu" in kw:
        out["mu"] = (kw["mu"] - loc_shift) * factor
    if "sigma" in kw:
        out["sigma"] = kw["sigma"] * factor
    if "scale" in kw:
        out["scale"] = kw["scale"] * factor
    if "nu" in kw:
        out["nu"] = kw["nu"]
    return out


def coef_rv(pm, name, family, par, dims):
    """A coefficient's random variable in the current PyMC model, from its prior family
    (``"normal"``, ``"student_t"``, else flat) and parameters ``par`` on the scale the
    graph uses.

    Parameters
    ----------
    pm : module
        PyMC.
    name : str
        The variable's name.
    family : str
        The prior family.
    par : dict
        Its parameters (``mu``, ``sigma``, ``nu``).
    dims : str or None
        The variable's dimension in the model.
    """
    if family not in COEF_FAMILIES:
        family = "flat"
    return _DISTRIBUTIONS[family][0](pm, name, par, dims)


def sd_rv(pm, name, family, par):
    """A standard deviation's random variable in the current PyMC model, from its prior
    family (``"half_normal"``, ``"half_student_t"``, ``"exponential"``, ``"gamma2"``,
    else flat on the positive line) and parameters ``par`` (``scale``, ``nu``).

    Parameters
    ----------
    pm : module
        PyMC.
    name : str
        The variable's name.
    family : str
        The prior family.
    par : dict
        Its parameters on the scale the graph uses.
    """
    if family not in SD_FAMILIES:
        family = "half_flat"
    return _DISTRIBUTIONS[family][0](pm, name, par, None)


def rho_rv(pm, name, family, par):
    """The AR(1) correlation's random variable in the current PyMC model, from its prior
    family (:data:`RHO_FAMILIES`: ``"uniform"``) and parameters ``par`` (``lower``,
    ``upper``; the same on every scale); the arguments are those of :func:`sd_rv`."""
    if family not in RHO_FAMILIES:
        raise choices_error("prior family of 'rho'", family, sorted(RHO_FAMILIES))
    return _DISTRIBUTIONS[family][0](pm, name, par, None)


def prior_logpdf(family: str, x, params: dict):
    """The log-density (scipy.stats) of a prior family at ``x``, from the same table as
    :func:`coef_rv`, :func:`sd_rv` and :func:`rho_rv` (the flat families: 0).

    Parameters
    ----------
    family : str
        A family of :data:`COEF_FAMILIES`, :data:`SD_FAMILIES` or :data:`RHO_FAMILIES`.
    x : array
    params : dict
        Its parameters on the scale of ``x``.
    """
    return _DISTRIBUTIONS[family][1](np.asarray(x, dtype=float), params)


#: every prior family's distribution (coefficients, SDs and the AR(1) correlation),
#: written once: the PyMC variable the builders make (``pm``, name, parameters, dims) and
#: the scipy log-density the prior sensitivity reads (x, parameters); ``gamma2`` is Gamma
#: with shape 2 and rate ``1 / scale``, ``half_student_t`` the Student t folded at 0
#: (density doubled)
_DISTRIBUTIONS = {
    "normal": (lambda pm, name, p, dims: pm.Normal(name, mu=p["mu"], sigma=p["sigma"], dims=dims),
               lambda x, p: stats.norm.logpdf(x, p["mu"], p["sigma"])),
    "student_t": (lambda pm, name, p, dims: pm.StudentT(name, nu=p["nu"], mu=p["mu"],
                                                        sigma=p["sigma"], dims=dims),
                  lambda x, p: stats.t.logpdf(x, p["nu"], p["mu"], p["sigma"])),
    "flat": (lambda pm, name, p, dims: pm.Flat(name, dims=dims),
             lambda x, p: np.zeros_like(x)),
    "half_normal": (lambda pm, name, p, dims: pm.HalfNormal(name, sigma=p["scale"], dims=dims),
                    lambda x, p: stats.halfnorm.logpdf(x, scale=p["scale"])),
    "half_student_t": (lambda pm, name, p, dims: pm.HalfStudentT(name, nu=p["nu"],
                                                                 sigma=p["scale"], dims=dims),
                       lambda x, p: np.log(2.0) + stats.t.logpdf(x, p["nu"], 0.0, p["scale"])),
    "exponential": (lambda pm, name, p, dims: pm.Exponential(name, scale=p["scale"], dims=dims),
                    lambda x, p: stats.expon.logpdf(x, scale=p["scale"])),
    "gamma2": (lambda pm, name, p, dims: pm.Gamma(name, alpha=2.0, beta=1.0 / p["scale"],
                                                  dims=dims),
               lambda x, p: stats.gamma.logpdf(x, 2.0, scale=p["scale"])),
    "half_flat": (lambda pm, name, p, dims: pm.HalfFlat(name, dims=dims),
                  lambda x, p: np.zeros_like(x)),
    "uniform": (lambda pm, name, p, dims: pm.Uniform(name, lower=p["lower"], upper=p["upper"],
                                                     dims=dims),
                lambda x, p: stats.uniform.logpdf(x, p["lower"], p["upper"] - p["lower"])),
}
