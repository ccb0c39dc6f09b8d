"""Outcome families for latent-effect panel models, and reporting that knows the family.

A family fixes the distribution of one outcome given its linear predictor ``eta`` (which
already holds the unit effect): Gaussian and Student-t (identity link), Bernoulli and
binomial (logit link, binomial with a number of trials per row), Poisson and negative
binomial (log link, with an optional exposure entering as ``log(exposure)`` offset).

The functions here are numpy cores used after sampling (unit-level LOO by quadrature,
occasion-level LOO, posterior predictive checks, average marginal effects). Inside the
PyMC graph the same densities are PyMC's own distributions; ``tests/test_families.py``
checks the numpy densities against ``scipy.stats``.

Reporting on the right scale
----------------------------
* ICC on the latent scale: ``tau^2 / (tau^2 + s^2)`` with the distribution-specific
  variance ``s^2 = pi^2 / 3`` for the logit link (the latent-variable threshold model;
  Snijders and Bosker 2012, section 17.3), ``s^2 = log(1 + 1/lambda)`` for the Poisson
  log link and ``log(1 + 1/lambda + 1/theta)`` for the negative binomial with shape
  ``theta`` (the log-normal approximation of Nakagawa, Johnson and Schielzeth 2017), where
  ``lambda = exp(b0 + tau^2/2)`` is the expected count at the covariate means; ``sigma^2``
  for the Gaussian, ``sigma^2 nu / (nu - 2)`` for Student-t with ``nu > 2``.
* Average marginal effects on the outcome scale: ``mean_it E_u[dmu/deta] * b`` averaged
  over the estimation rows and over the unit-effect distribution ``u ~ N(0, tau^2)``
  (population-averaged), per posterior draw.

References
----------
.. [1] Snijders, T. A. B. and Bosker, R. J. (2012). *Multilevel Analysis*, 2nd ed. Sage.
.. [2] Nakagawa, S., Johnson, P. C. D. and Schielzeth, H. (2017). The coefficient of
   determination R^2 and intra-class correlation coefficient from generalized linear
   mixed-effects models revisited and expanded. J. R. Soc. Interface 14, 20170213.
   doi:10.1098/rsif.2017.0213
.. [3] Gelman, A., Meng, X.-L. and Stern, H. (1996). Posterior predictive assessment of
   model fitness via realized discrepancies. Statistica Sinica 6, 733-807.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import special

from ..core.errors import PanelDataError, SpecificationError, choices_error
from ..core.mathcore import intraclass_correlation
from ..data.resultshape import check_prob
from ..core.terms import BETWEEN, UNIT_MEAN, WITHIN, parse, part_label

__all__ = [
    "FAMILIES",
    "Family",
    "get_family",
    "check_outcome",
    "logpdf",
    "eta_derivatives",
    "mean_response",
    "dmean_deta",
    "simulate",
    "latent_residual_variance",
    "icc_latent_draws",
    "ame_draws",
    "effect_weights",
    "ppc_statistics",
    "ppc_p_value",
    "icc_latent",
    "average_marginal_effects",
    "ppc_summary",
]

FAMILIES = ("gaussian", "student_t", "bernoulli", "binomial", "poisson", "negative_binomial")
_GH_NODES, _GH_WEIGHTS = np.polynomial.hermite.hermgauss(30)


@dataclass(frozen=True)
class Family:
    """An outcome family: its name, link, and the extra parameters it carries.

    ``params`` are the names of the family's own parameters as they appear in the
    posterior: ``sigma_obs`` (Gaussian, Student-t), ``nu`` (Student-t degrees of
    freedom), ``shape`` (negative binomial; variance ``mu + mu^2 / shape``).
    """

    name: str
    link: str
    params: tuple
    uses_trials: bool = False
    uses_exposure: bool = False

    @property
    def is_gaussian(self) -> bool:
        return self.name == "gaussian"

    @property
    def discrete(self) -> bool:
        return self.name in ("bernoulli", "binomial", "poisson", "negative_binomial")

    def to_dict(self) -> dict:
        return {"name": self.name, "link": self.link}


_REGISTRY = {
    "gaussian": Family("gaussian", "identity", ("sigma_obs",)),
    "student_t": Family("student_t", "identity", ("sigma_obs", "nu")),
    "bernoulli": Family("bernoulli", "logit", ()),
    "binomial": Family("binomial", "logit", (), uses_trials=True),
    "poisson": Family("poisson", "log", (), uses_exposure=True),
    "negative_binomial": Family("negative_binomial", "log", ("shape",), uses_exposure=True),
}


def get_family(family) -> Family:
    """Return the :class:`Family` for a name (or pass a Family through)."""
    if isinstance(family, Family):
        return family
    if family not in _REGISTRY:
        raise choices_error("family", family, FAMILIES)
    return _REGISTRY[family]


# ---------------------------------------------------------------------------- support checks
def _row_name(where, r) -> str:
    return f" (first at {where(int(r))})" if where is not None else f" (first at row {int(r)})"


def check_outcome(family, y, *, outcome="y", trials=None, exposure=None, where=None):
    """Refuse outcomes outside the family's support, naming the first offending row.

    Parameters
    ----------
    family : str or Family
    y : array (n,)
    outcome : str
        Column name used in messages.
    trials : array (n,) or None
        Binomial trials per row (required for ``"binomial"``, refused otherwise).
    exposure : array (n,) or None
        Poisson / negative-binomial exposure (positive), refused for other families.
    where : callable or None
        ``where(row) -> str`` describing row ``row`` (unit and occasion) for messages.

    Raises
    ------
    PanelDataError
        Bernoulli outcomes not 0/1, counts negative or fractional, successes above the
        trials, non-positive exposures, non-finite values.
    SpecificationError
        ``trials`` or ``exposure`` given to a family that does not use them, or ``trials``
        missing for the binomial.
    """
    fam = get_family(family)
    y = np.asarray(y, dtype=float)
    if trials is not None and not fam.uses_trials:
        raise SpecificationError(f"trials= is only used by family='binomial', not {fam.name!r}")
    if exposure is not None and not fam.uses_exposure:
        raise SpecificationError(
            f"exposure= is only used by family='poisson' or 'negative_binomial', not {fam.name!r}")
    if fam.uses_trials and trials is None:
        raise SpecificationError("family='binomial' needs trials= (a column name or an array "
                                 "with the number of trials of every row)")
    bad = ~np.isfinite(y)
    if bad.any():
        raise PanelDataError(f"outcome {outcome!r} is not finite" + _row_name(where, np.argmax(bad)))
    if fam.name == "bernoulli":
        bad = (y != 0) & (y != 1)
        if bad.any():
            r = np.argmax(bad)
            raise PanelDataError(
                f"family='bernoulli' needs outcome {outcome!r} coded 0/1; found {y[r]:g}"
                + _row_name(where, r) + "; for counts of successes use family='binomial'")
    if fam.discrete and fam.name != "bernoulli":
        bad = (y < 0) | (y != np.round(y))
        if bad.any():
            r = np.argmax(bad)
            raise PanelDataError(
                f"family={fam.name!r} needs outcome {outcome!r} to be a non-negative whole "
                f"number; found {y[r]:g}" + _row_name(where, r))
    if fam.uses_trials:
        n = np.asarray(trials, dtype=float)
        if n.shape != y.shape:
            raise SpecificationError(f"trials has {n.size} values but the outcome has {y.size} rows")
        bad = ~np.isfinite(n) | (n < 1) | (n != np.round(n))
        if bad.any():
            r = np.argmax(bad)
            raise PanelDataError(f"trials must be whole numbers of at least 1; found {n[r]:g}"
                                 + _row_name(where, r))
        bad = y > n
        if bad.any():
            r = np.argmax(bad)
            raise PanelDataError(f"outcome {outcome!r} = {y[r]:g} exceeds its trials {n[r]:g}"
                                 + _row_name(where, r))
    if exposure is not None:
        e = np.asarray(exposure, dtype=float)
        if e.shape != y.shape:
            raise SpecificationError(f"exposure has {e.size} values but the outcome has {y.size} rows")
        bad = ~np.isfinite(e) | (e <= 0)
        if bad.any():
            r = np.argmax(bad)
            raise PanelDataError(f"exposure must be positive; found {e[r]:g}" + _row_name(where, r))
    if fam.name in ("bernoulli", "binomial") and np.ptp(y / (np.asarray(trials, float) if fam.uses_trials else 1.0)) == 0:
        raise PanelDataError(f"outcome {outcome!r} takes one value on every row; a logit model "
                             "cannot be fitted")


# ---------------------------------------------------------------------------- densities
def _log_offset(offset):
    return 0.0 if offset is None else np.asarray(offset, dtype=float)


def logpdf(family, y, eta, params=None, *, trials=None, log_exposure=None):
    """Pointwise log density (mass) of ``y`` given the linear predictor ``eta``.

    ``eta`` excludes the exposure offset; ``log_exposure`` is added for the log-link
    families. ``params`` maps parameter names (``sigma_obs``, ``nu``, ``shape``) to arrays
    broadcastable against ``eta``. All arguments broadcast (e.g. draws x rows).
    """
    fam = get_family(family)
    p = params or {}
    y = np.asarray(y, dtype=float)
    if fam.name == "gaussian":
        s = p["sigma_obs"]
        z = (y - eta) / s
        return -0.5 * (np.log(2 * np.pi) + z ** 2) - np.log(s)
    if fam.name == "student_t":
        s, nu = p["sigma_obs"], p["nu"]
        z = (y - eta) / s
        return (special.gammaln((nu + 1) / 2) - special.gammaln(nu / 2)
                - 0.5 * np.log(nu * np.pi) - np.log(s) - (nu + 1) / 2 * np.log1p(z ** 2 / nu))
    if fam.name == "bernoulli":
        return y * eta - np.logaddexp(0.0, eta)
    if fam.name == "binomial":
        n = np.asarray(trials, dtype=float)
        return (special.gammaln(n + 1) - special.gammaln(y + 1) - special.gammaln(n - y + 1)
                + y * eta - n * np.logaddexp(0.0, eta))
    lm = eta + _log_offset(log_exposure)
    if fam.name == "poisson":
        return y * lm - np.exp(lm) - special.gammaln(y + 1)
    # negative binomial, mean mu = exp(lm), shape a: var = mu + mu^2 / a
    a = p["shape"]
    la = np.log(a)
    lse = np.logaddexp(la, lm)
    return (special.gammaln(y + a) - special.gammaln(a) - special.gammaln(y + 1)
            + a * (la - lse) + y * (lm - lse))


def eta_derivatives(family, y, eta, params=None, *, trials=None, log_exposure=None):
    """First and second derivatives of :func:`logpdf` with respect to ``eta``.

    Used by the Newton search for the mode of each unit's integrand (adaptive
    Gauss-Hermite quadrature, :mod:`bayespanel.bayes.quadrature`).
    """
    fam = get_family(family)
    p = params or {}
    y = np.asarray(y, dtype=float)
    if fam.name == "gaussian":
        s2 = p["sigma_obs"] ** 2
        return (y - eta) / s2, -np.ones_like(eta) / s2
    if fam.name == "student_t":
        s2, nu = p["sigma_obs"] ** 2, p["nu"]
        r = y - eta
        den = nu * s2 + r ** 2
        return (nu + 1) * r / den, (nu + 1) * (r ** 2 - nu * s2) / den ** 2
    if fam.name in ("bernoulli", "binomial"):
        n = 1.0 if fam.name == "bernoulli" else np.asarray(trials, dtype=float)
        pr = special.expit(eta)
        return y - n * pr, -n * pr * (1 - pr)
    lm = eta + _log_offset(log_exposure)
    mu = np.exp(lm)
    if fam.name == "poisson":
        return y - mu, -mu
    a = p["shape"]
    w = a / (a + mu)
    return w * (y - mu), -w * mu * (a + y) / (a + mu)


def mean_response(family, eta, params=None, *, trials=None, log_exposure=None):
    """Expected outcome given ``eta`` (success probability times trials for binomial)."""
    fam = get_family(family)
    if fam.link == "identity":
        return np.asarray(eta, dtype=float)
    if fam.link == "logit":
        n = 1.0 if trials is None else np.asarray(trials, dtype=float)
        return n * special.expit(eta)
    return np.exp(eta + _log_offset(log_exposure))


def dmean_deta(family, eta, params=None, *, trials=None, log_exposure=None):
    """Derivative of :func:`mean_response` with respect to ``eta``."""
    fam = get_family(family)
    if fam.link == "identity":
        return np.ones_like(np.asarray(eta, dtype=float))
    if fam.link == "logit":
        pr = special.expit(eta)
        n = 1.0 if trials is None else np.asarray(trials, dtype=float)
        return n * pr * (1 - pr)
    return mean_response(family, eta, params, log_exposure=log_exposure)


def simulate(family, rng, eta, params=None, *, trials=None, log_exposure=None):
    """Draw outcomes given ``eta`` (same broadcasting as :func:`logpdf`)."""
    fam = get_family(family)
    p = params or {}
    eta = np.asarray(eta, dtype=float)
    if fam.name == "gaussian":
        return eta + p["sigma_obs"] * rng.standard_normal(eta.shape)
    if fam.name == "student_t":
        return eta + p["sigma_obs"] * rng.standard_t(np.broadcast_to(p["nu"], eta.shape))
    if fam.name in ("bernoulli", "binomial"):
        n = 1 if trials is None else np.broadcast_to(np.asarray(trials, dtype=np.int64), eta.shape)
        return rng.binomial(n, special.expit(eta)).astype(float)
    mu = mean_response(fam, eta, log_exposure=log_exposure)
    if fam.name == "poisson":
        return rng.poisson(mu).astype(float)
    a = np.broadcast_to(p["shape"], eta.shape)
    return rng.poisson(rng.gamma(a, mu / a)).astype(float)


# ---------------------------------------------------------------------------- array cores
def latent_residual_variance(family, params=None, *, intercept=None, tau=None):
    """Distribution-specific (occasion-level) variance on the latent scale, per draw.

    Logit: ``pi^2 / 3``; Poisson: ``log(1 + 1/lambda)``; negative binomial:
    ``log(1 + 1/lambda + 1/shape)`` with ``lambda = exp(intercept + tau^2 / 2)``
    (Nakagawa, Johnson and Schielzeth 2017, table 1, log-normal approximation);
    Gaussian: ``sigma^2``; Student-t: ``sigma^2 nu / (nu - 2)`` (infinite for ``nu <= 2``).
    ``intercept`` is the linear predictor at the covariate means.
    """
    fam = get_family(family)
    p = params or {}
    if fam.link == "logit":
        return np.full(np.shape(tau) if tau is not None else (), np.pi ** 2 / 3)
    if fam.link == "log":
        lam = np.exp(np.asarray(intercept, dtype=float) + 0.5 * np.asarray(tau) ** 2)
        extra = 0.0 if fam.name == "poisson" else 1.0 / np.asarray(p["shape"])
        return np.log1p(1.0 / lam + extra)
    s2 = np.asarray(p["sigma_obs"], dtype=float) ** 2
    if fam.name == "student_t":
        nu = np.asarray(p["nu"], dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(nu > 2, s2 * nu / np.maximum(nu - 2, 1e-300), np.inf)
    return s2


def icc_latent_draws(family, tau, params=None, *, intercept=None):
    """ICC draws on the latent scale: ``tau^2 / (tau^2 + latent_residual_variance)``."""
    t2 = np.asarray(tau, dtype=float) ** 2
    return intraclass_correlation(
        t2, latent_residual_variance(family, params, intercept=intercept, tau=tau))


def ame_draws(family, eta, tau, weights, b, params=None, *, trials=None, log_exposure=None,
              chunk=256):
    """Average marginal effects on the outcome scale, one value per draw and effect.

    ``AME_e = (w_e' b) * mean_rows E_u[dmu/deta (eta_it + u)]``, ``u ~ N(0, tau^2)``; the
    expectation over the unit effect uses 30-point Gauss-Hermite quadrature (exact
    ``exp(eta + tau^2/2)`` for the log link).

    Parameters
    ----------
    eta : array (S, n)
        Linear predictor without unit effects (and without exposure offsets).
    tau : array (S,)
        Unit-intercept SD per draw (0 for pooled models).
    weights : array (E, k)
        Each effect as a combination of coefficients (e.g. ``b_x + b_xbar`` for the
        between effect in a Mundlak model).
    b : array (S, k)

    Returns
    -------
    array (S, E)
    """
    fam = get_family(family)
    S = eta.shape[0]
    slope = np.asarray(b) @ np.asarray(weights, dtype=float).T
    avg = np.empty(S)
    for a in range(0, S, chunk):
        sl = slice(a, a + chunk)
        e = eta[sl]
        t = np.asarray(tau, dtype=float)[sl, None]
        if fam.link == "identity":
            avg[sl] = 1.0
        elif fam.link == "log":
            avg[sl] = dmean_deta(fam, e + 0.5 * t ** 2, trials=trials,
                                 log_exposure=log_exposure).mean(axis=1)
        else:
            acc = 0.0
            for x, w in zip(_GH_NODES, _GH_WEIGHTS):
                acc = acc + w * dmean_deta(fam, e + np.sqrt(2.0) * t * x, trials=trials)
            avg[sl] = (acc / np.sqrt(np.pi)).mean(axis=1)
    return slope * avg[:, None]


def effect_weights(labels, kind):
    """Names and coefficient weights of the effects reported on the outcome scale: every
    term but the intercept; in a Mundlak design (``kind="mundlak"``) ``x (within)`` =
    ``b_x`` and ``x (between)`` = ``b_x + b_{x (unit mean)}``. Returns ``(names, W)`` with
    ``W`` of shape ``(E, k)``."""
    labels = list(labels)
    names, rows, k = [], [], len(labels)
    for j, lab in enumerate(labels):
        if lab == "Intercept" or parse(lab).part == UNIT_MEAN:
            continue
        w = np.zeros(k)
        w[j] = 1.0
        if kind == "mundlak" and part_label(lab, UNIT_MEAN) in labels:
            names.append(part_label(lab, WITHIN))
            rows.append(w.copy())
            w[labels.index(part_label(lab, UNIT_MEAN))] = 1.0
            names.append(part_label(lab, BETWEEN))
            rows.append(w)
            continue
        names.append(lab)
        rows.append(w)
    return names, np.array(rows).reshape(-1, k)


# ---------------------------------------------------------------------------- labelled skins
def _interval_table(draws: pd.DataFrame, prob: float) -> pd.DataFrame:
    lo, hi = (1 - prob) / 2, 1 - (1 - prob) / 2
    pct = f"{100 * prob:g}%"
    return pd.DataFrame({"mean": draws.mean(), "sd": draws.std(ddof=1),
                         f"lower {pct}": draws.quantile(lo), f"upper {pct}": draws.quantile(hi)})


def icc_latent(post, prob: float | None = None) -> pd.DataFrame:
    """ICC on the latent scale, with its interval, for a latent-family posterior.

    ``post`` is a :class:`bayespanel.bayes.latent.LatentPosterior`, whose ``icc`` draws
    were computed with :func:`icc_latent_draws` after sampling. The row label states the
    residual variance used.
    """
    prob = check_prob(prob)  # None: the interval option
    fam = get_family(post.family)
    basis = {"logit": "latent scale, residual variance pi^2/3",
             "log": "latent scale, log-normal approximation",
             "identity": "outcome scale"}[fam.link]
    return _interval_table(pd.DataFrame({f"ICC ({basis})": post.flat_draws("icc")}), prob)


def average_marginal_effects(post, prob: float | None = None,
                             max_draws: int = 400) -> pd.DataFrame:
    """Average marginal effects of each within, between and other term on the outcome scale.

    Population-averaged over the unit-intercept distribution (see :func:`ame_draws`); with
    random slopes the slope entering is the average one, ``b``. For a within-between design
    the effects are the ``(within)`` and ``(between)`` terms; for a correlated-effects
    (Mundlak) design the within effect of ``x`` is ``b_x`` and its between effect
    ``b_x + b_{x (unit mean)}``. Uses at most ``max_draws`` evenly spaced draws.
    """
    prob = check_prob(prob)  # None: the interval option
    names, weights = post.effect_weights()
    eta = post.linear_predictor(include_units=False, max_draws=max_draws)
    ame = ame_draws(post.family, eta, post.flat_draws("sigma_unit", max_draws), weights,
                    post.coef_draws(max_draws), trials=post.trials,
                    log_exposure=post.log_exposure)
    return _interval_table(pd.DataFrame(ame, columns=names), prob).rename_axis(
        "average marginal effect (outcome scale)")


def _unit_means_rows(y, codes):
    T = np.bincount(codes)
    return np.stack([np.bincount(codes, weights=r) / T for r in y])


def ppc_statistics(family, y, yrep, unit_codes, *, trials=None, occasion_codes=None):
    """Discrepancy statistics suited to the family and to the observed outcome's range.

    The set is chosen from the observed outcome, so that no statistic is trivially
    outside the replicated range (counts in the hundreds are not asked for their share of
    ones): binary outcomes get the rate of ones, its spread over occasions and units, the
    shares of units never and always 1 and the switching rate (the share of consecutive
    occasions of a unit whose outcomes differ: a check of persistence); binomial outcomes the success rate, the spread of row and unit rates and the
    shares of rows with no or all successes (each only when such rows occur); counts the
    mean, the variance-to-mean ratio (dispersion), the share of zeros (only when zeros
    occur) and the 10%, 50% and 90% quantiles; continuous outcomes the mean, SD and tail
    quantiles. Every family also gets the SD of the unit means and the SD within units.

    Parameters
    ----------
    y : array (n,)
        Observed outcome, rows sorted by unit (and by occasion within units).
    yrep : array (S, n)
        Replicated outcomes.
    unit_codes : array (n,)
    trials : array (n,) or None
    occasion_codes : array (n,) of ints or None
        Occasion of each row (0..T-1), for the spread of occasion rates.

    Returns
    -------
    list of (label, observed float, replicated array (S,))
    """
    fam = get_family(family)
    y = np.asarray(y, dtype=float)
    yrep = np.atleast_2d(np.asarray(yrep, dtype=float))
    codes = np.asarray(unit_codes)
    both = np.vstack([y[None, :], yrep])
    out = {}
    rate = both / np.asarray(trials, dtype=float) if fam.name == "binomial" else both
    unit_mean = _unit_means_rows(rate, codes)
    if fam.name == "bernoulli":
        out["rate of ones"] = both.mean(axis=1)
        if occasion_codes is not None and len(np.unique(occasion_codes)) > 1:
            oc = np.asarray(occasion_codes)
            out["SD of occasion rates"] = _unit_means_rows(both, oc).std(axis=1)
        out["share of units never 1"] = (unit_mean == 0).mean(axis=1)
        out["share of units always 1"] = (unit_mean == 1).mean(axis=1)
        same = codes[1:] == codes[:-1]
        if same.any():
            out["switching rate"] = (
                both[:, 1:][:, same] != both[:, :-1][:, same]).mean(axis=1)
    elif fam.name == "binomial":
        n = np.asarray(trials, dtype=float)
        out["overall success rate"] = both.sum(axis=1) / n.sum()
        out["SD of row rates"] = rate.std(axis=1)
        if (y == 0).any():
            out["share of rows with no success"] = (both == 0).mean(axis=1)
        if (y == n).any():
            out["share of rows all successes"] = (both == n).mean(axis=1)
    elif fam.discrete:
        out["mean count"] = both.mean(axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            out["variance-to-mean ratio"] = both.var(axis=1) / both.mean(axis=1)
        if (y == 0).any():
            out["share of zeros"] = (both == 0).mean(axis=1)
        for q in (0.1, 0.5, 0.9):
            out[f"quantile {q:g}"] = np.quantile(both, q, axis=1)
    else:
        out["mean"] = both.mean(axis=1)
        out["SD"] = both.std(axis=1)
        for q in (0.01, 0.5, 0.99):
            out[f"quantile {q:g}"] = np.quantile(both, q, axis=1)
    if len(np.unique(codes)) > 1:
        out["SD of unit means" if fam.name != "bernoulli" else "SD of unit rates"] = \
            unit_mean.std(axis=1, ddof=1)
    dev = rate - unit_mean[:, codes]
    if len(codes) > len(np.unique(codes)):
        out["SD within units"] = np.sqrt((dev ** 2).sum(axis=1) / (len(codes) - 1))
    return [(k, float(v[0]), v[1:]) for k, v in out.items() if np.all(np.isfinite(v))]


def ppc_p_value(observed, replicated) -> float:
    """Posterior predictive p-value ``P(replicated > observed) + P(replicated = observed)
    / 2`` (ties count half, so a discrete statistic that the model reproduces exactly is
    not flagged; for continuous statistics this is ``P(replicated >= observed)``)."""
    r = np.asarray(replicated, dtype=float)
    return float((r > observed).mean() + 0.5 * (r == observed).mean())


def ppc_summary(post, draws: int = 400, seed: int = 0,
                prob: float | None = None) -> pd.DataFrame:
    """Posterior predictive checks suited to the family.

    Replicates the outcome for ``draws`` posterior draws (given the sampled unit effects)
    and compares family-specific statistics (rates of ones for binary outcomes, the count
    distribution for counts, tails for continuous outcomes) with the observed ones. The
    ``p (replicated >= observed)`` column is the posterior predictive p-value of Gelman,
    Meng and Stern (1996); values near 0 or 1 flag misfit.
    """
    prob = check_prob(prob)  # None: the interval option
    fam = get_family(post.family)
    rng = np.random.default_rng(seed)
    eta = post.linear_predictor(include_units=True, max_draws=draws, seed=seed)
    params = {k: post.flat_draws(k, draws)[:, None] for k in fam.params}
    yrep = simulate(fam, rng, eta, params, trials=post.trials, log_exposure=post.log_exposure)
    occ = None
    if getattr(post, "time", None) is not None:
        occ = pd.factorize(np.asarray(post.time))[0]
    checks = ppc_statistics(fam, post.y, yrep, post.unit_codes, trials=post.trials,
                            occasion_codes=occ)
    lo, hi = (1 - prob) / 2, 1 - (1 - prob) / 2
    pct = f"{100 * prob:g}%"
    rows = {}
    for name, o, r in checks:
        rows[name] = {"observed": o, "replicated mean": r.mean(),
                      f"replicated lower {pct}": np.quantile(r, lo),
                      f"replicated upper {pct}": np.quantile(r, hi),
                      "p (replicated >= observed)": ppc_p_value(o, r)}
    return pd.DataFrame(rows).T.rename_axis(f"posterior predictive check ({fam.name})")
