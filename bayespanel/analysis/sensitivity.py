"""How much do the conclusions owe to the priors?

Two complementary checks for a fitted Gaussian panel model:

* :func:`power_scaling` - power-scaling sensitivity (Kallioinen, Paananen, Bürkner and
  Vehtari 2024). The prior (or the likelihood) is raised to a power ``alpha`` near 1 and
  the posterior is re-weighted by Pareto-smoothed importance sampling, without refitting;
  the sensitivity of a parameter is the derivative, at ``alpha = 1``, of the cumulative
  Jensen-Shannon distance between the perturbed and the original posterior. The
  computation is arviz-stats' (:func:`arviz_stats.psense`); this module supplies the
  log prior of every draw (scipy densities of the model's own priors) and the Gaussian
  marginal log-likelihood on the sufficient statistics (:mod:`bayespanel.core.gaussian`).
  Values of 0.05 and above flag a prior that matters (the paper's suggested threshold).
* :func:`prior_presets` - a refit under each built-in prior preset for the unit SD, with
  the variance partition side by side and plain-language flags where a conclusion (the
  sign of a coefficient, whether an interval excludes zero, the size of the ICC) changes
  with the prior. With few units the unit-level SD is the parameter the data pin down
  least (Gelman 2006), so that is where the prior is varied.

References
----------
.. [1] Kallioinen, N., Paananen, T., Bürkner, P.-C. and Vehtari, A. (2024). Detecting and
   diagnosing prior and likelihood sensitivity with power-scaling. Statistics and
   Computing 34, 57. doi:10.1007/s11222-023-10366-5
.. [2] Gelman, A. (2006). Prior distributions for variance parameters in hierarchical
   models. Bayesian Analysis 1, 515-534. doi:10.1214/06-BA117A
.. [3] Chung, Y., Rabe-Hesketh, S., Dorie, V., Gelman, A. and Liu, J. (2013). A
   nondegenerate penalized likelihood estimator for variance parameters in multilevel
   models. Psychometrika 78, 685-709. doi:10.1007/s11336-013-9328-2
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .contrasts import contrast_rows
from ..core.errors import SpecificationError, choices_error
from ..core.jsonsafe import json_record
from ..data.resultshape import check_prob
from ..core.safetext import LITERAL_RC, literal

__all__ = ["power_scaling", "power_scaling_arrays", "log_prior_draws", "log_likelihood_draws",
           "prior_presets", "PresetComparison", "UNIT_SD_PRESETS", "THRESHOLD",
           "sensitivity_section"]

#: sensitivity at or above this flags a component (Kallioinen et al. 2024, section 4)
THRESHOLD = 0.05
#: built-in presets for the unit SD refitted by :func:`prior_presets` (the improper
#: ``"half_flat"`` is accepted but not in the default set)
UNIT_SD_PRESETS = ("half_normal", "half_student_t", "exponential", "gamma2")

_PRIOR_DOMINATES = ("the prior dominates: the data say little about it, so its posterior "
                    "mostly repeats the prior")
_CONFLICT = ("prior and data pull apart (prior-data conflict): the estimate moves with "
             "either, so check the prior against what the data say")


# ---------------------------------------------------------------------------- array core
def _diagnose(prior, lik, threshold):
    if prior >= threshold and lik >= threshold:
        return _CONFLICT
    if prior >= threshold:
        return _PRIOR_DOMINATES
    return ""


def power_scaling_arrays(draws: dict, log_prior, log_likelihood, *, threshold=THRESHOLD,
                         alphas=(0.99, 1.01)) -> pd.DataFrame:
    """Power-scaling sensitivity from arrays (the numpy core of :func:`power_scaling`).

    Parameters
    ----------
    draws : dict of str -> array (chain, draw)
        The quantities whose sensitivity is wanted.
    log_prior : array (chain, draw) or dict of such arrays
        Log prior density of each draw (of the components to be power-scaled). Additive
        constants do not matter.
    log_likelihood : array (chain, draw, ...)
        Log-likelihood of each draw, total or pointwise (pointwise terms are summed).
    threshold : float
        A prior sensitivity at or above it raises a flag.

    Returns
    -------
    DataFrame
        Index: the quantities. Columns ``prior``, ``likelihood`` (sensitivities, computed
        by :func:`arviz_stats.psense`) and ``flag`` (plain language; empty when neither
        is raised).
    """
    import arviz_stats as azs
    import xarray as xr

    def ds(d):
        return xr.Dataset({k: (("chain", "draw"), np.asarray(v, dtype=float))
                           for k, v in d.items()})

    if not draws:
        raise SpecificationError("power_scaling needs at least one quantity in draws")
    lp = log_prior if isinstance(log_prior, dict) else {"prior": log_prior}
    ll = np.asarray(log_likelihood, dtype=float)
    ll = ll.reshape(ll.shape[:2] + (-1,)).sum(axis=-1)
    dt = xr.DataTree.from_dict({"posterior": ds(draws), "log_prior": ds(lp),
                                "log_likelihood": ds({"loglik": ll})})
    p = azs.psense(dt, group="prior", alphas=alphas)
    lk = azs.psense(dt, group="likelihood", alphas=alphas)
    out = pd.DataFrame({"prior": [float(p[k]) for k in draws],
                        "likelihood": [float(lk[k]) for k in draws]}, index=list(draws))
    out["flag"] = [_diagnose(a, b, threshold) for a, b in zip(out["prior"], out["likelihood"])]
    out.index.name = "parameter"
    out.attrs.update(threshold=threshold, alphas=tuple(alphas))
    return out


# ---------------------------------------------------------------------------- model pieces
def log_prior_draws(posterior) -> dict:
    """Log prior density of every draw, by component: ``coef``, ``sigma_obs``, ``sigma_unit``.

    The priors are the posterior's own (its :class:`~bayespanel.bayes.ModelSpec`), on
    the standardised scale the sampler used; the change to the data scale is linear, so
    it adds a constant, which power-scaling ignores. Densities are scipy's.

    Returns
    -------
    dict of str -> array (chain, draw)
    """
    from ..bayes.priors import prior_logpdf, prior_on_standard_scale

    spec, sc = posterior.spec, posterior.scaling
    if sc is None:
        raise SpecificationError("the posterior has no scaling; it was not sampled here")
    priors = spec.prior_dict
    coef = posterior.draws("coef")                                   # chain, draw, k
    A, a0 = sc.coef_map()
    b_std = np.linalg.solve(A, (coef - a0)[..., None])[..., 0]
    sy = sc.scale_y
    labels = list(spec.labels)
    icpt = sc.intercept
    lp = np.zeros(coef.shape[:2])
    for j, lab in enumerate(labels):
        par = prior_on_standard_scale(priors[lab], sc, j, icpt)
        lp = lp + prior_logpdf(priors[lab].family, b_std[..., j], par)
    out = {"coef": lp}
    comps = ["sigma_obs"] + (["sigma_unit"] if spec.unit_effects == "random" else [])
    for comp in comps:
        par = prior_on_standard_scale(priors[comp], sc)
        out[comp] = prior_logpdf(priors[comp].family, posterior.draws(comp) / sy, par)
    if "rho" in priors and getattr(spec, "errors", "iid") == "ar1":   # the same on any scale
        out["rho"] = prior_logpdf(priors["rho"].family, posterior.draws("rho"),
                                  priors["rho"].kwargs)
    return out


def log_likelihood_draws(posterior) -> np.ndarray:
    """Total Gaussian marginal log-likelihood of every draw (chain, draw), on the data scale,
    from the sufficient statistics (:func:`bayespanel.core.gaussian.marginal_loglik`;
    fixed effects: :func:`~bayespanel.core.gaussian.within_loglik`); with
    ``errors="ar1"`` from the rows (:meth:`~bayespanel.bayes.draws.FitDraws.ar1_loglik`)."""
    from ..core import gaussian

    st = posterior.stats
    coef = posterior.draws("coef")
    shape = coef.shape[:2]
    if getattr(posterior.spec, "errors", "iid") == "ar1":
        return posterior.pointwise_inputs().ar1_loglik().reshape(shape)
    v = gaussian.residual_vector(coef.reshape(-1, coef.shape[-1]))
    sigma = posterior.draws("sigma_obs").reshape(-1)
    if posterior.spec.unit_effects == "fixed":
        ll = gaussian.within_loglik(v, st.within, st.n, st.n_units, sigma)
    else:
        tau = (posterior.draws("sigma_unit").reshape(-1) if posterior.spec.unit_effects == "random"
               else np.zeros_like(sigma))
        ll = gaussian.marginal_loglik(v, st.within, st.group_cp, st.group_mean,
                                      st.group_count.astype(float), st.lengths.astype(float),
                                      sigma, tau)
    return np.asarray(ll).reshape(shape)


def power_scaling(posterior, components=None, *, threshold=THRESHOLD, alphas=(0.99, 1.01)):
    """Prior and likelihood power-scaling sensitivity of each coefficient and variance
    component of a fitted model (Kallioinen et al. 2024).

    Parameters
    ----------
    posterior : bayespanel.bayes.posterior.Posterior
    components : list of str, optional
        Which priors to power-scale: any of ``"coef"``, ``"sigma_obs"``,
        ``"sigma_unit"`` and, with ``errors="ar1"``, ``"rho"`` (its uniform prior has a
        constant log density, so power-scaling it changes nothing) (default all).
        ``["sigma_unit"]`` asks how much the results owe to the unit-SD prior alone.
    threshold : float, default 0.05
    alphas : (float, float)
        Power-scaling amounts for the finite-difference derivative.

    Returns
    -------
    DataFrame
        One row per coefficient label, then ``sigma_unit``, ``sigma_obs`` and ``icc``;
        columns ``prior``, ``likelihood`` and ``flag``.

    References
    ----------
    Kallioinen, Paananen, Bürkner and Vehtari (2024), Statistics and Computing 34, 57.
    doi:10.1007/s11222-023-10366-5
    """
    lp_all = log_prior_draws(posterior)
    if components is None:
        components = list(lp_all)
    components = list(components)
    for c in components:
        if c not in lp_all:
            raise choices_error("components", c, list(lp_all))
    draws = {lab: posterior.draws(lab) for lab in posterior.labels}
    for name in posterior.parameter_names[len(posterior.labels):]:
        draws[name] = posterior.draws(name)
    out = power_scaling_arrays(draws, {c: lp_all[c] for c in components},
                               log_likelihood_draws(posterior), threshold=threshold,
                               alphas=alphas)
    out.attrs["components"] = components
    return out


# ---------------------------------------------------------------------------- preset refits
def _refit(model, preset, draws, tune, chains, seed, sampler):
    """The same model and data with another unit-SD prior, sampled."""
    priors = {k: v for k, v in model.priors.items() if k != "sigma_unit"}
    priors["sigma_unit"] = preset
    serial = ({"errors": "ar1", "time": model.ar1_time}
              if getattr(model, "errors", "iid") == "ar1" else {})
    new = type(model).from_suffstats(model.stats, model.labels, outcome=model.outcome,
                                     units=model.units, priors=priors,
                                     likelihood=model.likelihood, rows=model.rows,
                                     design_spec=dict(model.spec.design) if model.spec.design
                                     else None, **serial)
    return new.sample(draws=draws, tune=tune, chains=chains, seed=seed, progress=False,
                      sampler=sampler)


@dataclass
class PresetComparison:
    """Refits of one model under each unit-SD prior preset (see :func:`prior_presets`).

    Attributes
    ----------
    posteriors : dict of preset -> Posterior
    prob : float
    """

    posteriors: dict
    prob: float | None = None  # None: the interval option when made

    def __post_init__(self):
        self.prob = check_prob(self.prob)

    def partition(self) -> pd.DataFrame:
        """The variance partition side by side: rows are quantities (SDs, ICC, shares of
        variance), columns ``(preset, median | lower | upper)``."""
        parts = {}
        for name, post in self.posteriors.items():
            tab = post.variance_partition().table(self.prob)
            parts[name] = tab[["median", "lower", "upper"]]
        return pd.concat(parts, axis=1)

    def coefficients(self) -> pd.DataFrame:
        """Coefficients (and contrasts) side by side: columns ``(preset, mean | lower |
        upper)``."""
        parts = {name: _coef_rows(post, self.prob) for name, post in self.posteriors.items()}
        return pd.concat(parts, axis=1)

    def flags(self, rel_change: float = 0.25) -> list[str]:
        """Plain-language notes where a conclusion changes with the unit-SD prior.

        Raised when (a) the 95% interval of a coefficient or contrast excludes zero under
        some presets and not others, (b) the sign of a posterior mean flips, (c) the
        posterior median of the unit SD or of the ICC differs by more than ``rel_change``
        (25%, common practice) between presets.
        """
        notes = []
        co = self.coefficients()
        names = list(self.posteriors)
        for term in co.index:
            lo = co.xs("lower", axis=1, level=1).loc[term]
            hi = co.xs("upper", axis=1, level=1).loc[term]
            mean = co.xs("mean", axis=1, level=1).loc[term]
            excl = (lo > 0) | (hi < 0)
            if excl.any() and not excl.all():
                yes = ", ".join(n for n in names if excl[n])
                no = ", ".join(n for n in names if not excl[n])
                notes.append(f"whether the {round(100 * self.prob)}% interval of {term} excludes "
                             f"zero depends on the unit-SD prior: it does under {yes}, not "
                             f"under {no}.")
            if (mean > 0).any() and (mean < 0).any():
                notes.append(f"the sign of {term} changes with the unit-SD prior "
                             f"({', '.join(f'{n}: {mean[n]:.3g}' for n in names)}).")
        part = self.partition()
        for q in ("unit SD", "ICC"):
            if q not in part.index:
                continue
            med = part.xs("median", axis=1, level=1).loc[q]
            lo, hi = float(med.min()), float(med.max())
            if hi > 0 and (hi - lo) / hi > rel_change:
                notes.append(f"the posterior median of {q} ranges from {lo:.3g} "
                             f"({med.idxmin()}) to {hi:.3g} ({med.idxmax()}) across unit-SD "
                             "priors: the data do not pin it down; report it with the prior.")
        return notes

    def to_record(self) -> dict:
        """The record of the comparison (the shape of ``results.json``'s records: one key
        per quantity, non-finite numbers ``None``): ``presets``, ``interval`` (the
        probability of the intervals), ``partition`` (per preset and quantity: posterior
        ``median``, ``lower``, ``upper``), ``coefficients`` (per preset and term, contrast
        or variance component: the posterior mean as ``estimate``, ``lower``, ``upper``)
        and ``flags`` (:meth:`flags`)."""
        part, co = self.partition(), self.coefficients()

        def records(tab, key, cols, rename=None):
            return [json_record({"preset": p, key: q, **{(rename or {}).get(c, c):
                                                         tab.at[q, (p, c)] for c in cols}})
                    for p in self.posteriors for q in tab.index]

        return {"presets": list(self.posteriors), "interval": self.prob,
                "partition": records(part, "quantity", ("median", "lower", "upper")),
                "coefficients": records(co, "term", ("mean", "lower", "upper"),
                                        {"mean": "estimate"}),
                "flags": self.flags()}

    def summary(self) -> str:
        flags = self.flags()
        head = (f"Refits under {len(self.posteriors)} unit-SD priors "
                f"({', '.join(self.posteriors)}).")
        if not flags:
            return head + " No conclusion checked changes with the unit-SD prior."
        return head + "\n" + "\n".join(f"- {f}" for f in flags)

    def figure(self):
        """Posterior median and interval of the unit SD and the ICC under each preset."""
        import matplotlib.pyplot as plt

        with plt.rc_context(LITERAL_RC):  # labels drawn as they are
            part = self.partition()
            qs = [q for q in ("unit SD", "ICC") if q in part.index]
            fig, axes = plt.subplots(1, len(qs), squeeze=False, figsize=(
                4.5 * len(qs), 0.5 * len(self.posteriors) + 1.6))
            names = list(self.posteriors)
            for ax, q in zip(axes[0], qs):
                med = part.xs("median", axis=1, level=1).loc[q]
                lo = part.xs("lower", axis=1, level=1).loc[q]
                hi = part.xs("upper", axis=1, level=1).loc[q]
                y = np.arange(len(names))
                ax.errorbar(med[names], y, xerr=[med[names] - lo[names], hi[names] - med[names]],
                            fmt="o", capsize=3)
                ax.set_yticks(y, [literal(n) for n in names])
                ax.invert_yaxis()
                ax.set_xlabel(f"{q}: median and {round(100 * self.prob)}% interval")
            fig.suptitle("Variance partition under each unit-SD prior", fontsize="medium")
            fig.tight_layout()
            return fig


def _coef_rows(post, prob):
    """Mean and equal-tailed interval of each coefficient, of each between-minus-within
    contrast (``"x (between - within)"``) and of the variance components."""
    labels = post.labels
    coef = post.draws("coef").reshape(-1, len(labels))
    rows = {lab: coef[:, j] for j, lab in enumerate(labels)}
    names, L = contrast_rows(post.spec.kind, labels)
    rows.update(zip(names, (coef @ L.T).T))
    for name in post.parameter_names[len(labels):]:
        rows[name] = post.draws(name).reshape(-1)
    q = [(1 - prob) / 2, (1 + prob) / 2]
    return pd.DataFrame({k: [v.mean(), *np.quantile(v, q)] for k, v in rows.items()},
                        index=["mean", "lower", "upper"]).T


def prior_presets(model, presets=UNIT_SD_PRESETS, *, draws=1000, tune=1000, chains=4, seed=1,
                  prob=None, sampler="auto") -> PresetComparison:
    """Refit ``model`` under each built-in prior preset for the unit SD.

    Parameters
    ----------
    model : RandomIntercept, WithinBetween or CorrelatedEffects
        A built model (its other priors are kept as they are).
    presets : sequence of str
        Unit-SD prior presets of :mod:`bayespanel.bayes.priors`: ``"half_normal"``
        (scale ``sd(y)``), ``"half_student_t"`` (3 df, scale ``sd(y)``),
        ``"exponential"`` (mean ``sd(y)``), ``"gamma2"`` (the boundary-avoiding
        Gamma(2) of Chung et al. 2013) and the improper ``"half_flat"``.
    draws, tune, chains, seed, sampler
        Passed to :meth:`~bayespanel.bayes.GaussianModel.sample` for every refit.
    prob : float
        Interval probability of the tables and flags.

    Returns
    -------
    PresetComparison
        ``.partition()`` (the variance partition side by side), ``.coefficients()``,
        ``.flags()`` and ``.summary()`` (plain language), ``.figure()``.
    """
    prob = check_prob(prob)  # None: the interval option
    from ..bayes.priors import SD_PRESETS

    if getattr(model, "unit_effects", None) != "random":
        raise SpecificationError(
            f"prior_presets varies the unit-SD prior; {type(model).__name__} has no unit SD "
            "(use RandomIntercept, WithinBetween or CorrelatedEffects)")
    from ..bayes.graph import graph_edits

    edits = graph_edits(model)
    if edits:  # each preset is a model rebuilt from the specification, without them
        raise SpecificationError(
            "prior_presets rebuilds the model once per preset from its specification, "
            f"which would leave out what was added to its pymc_model ({', '.join(edits)}); "
            "build one model per unit-SD prior (priors={'sigma_unit': ...}), add the same "
            "to each and sample them")
    presets = list(presets)
    if not presets:
        raise SpecificationError("presets must name at least one unit-SD prior preset")
    for p in presets:
        if p not in SD_PRESETS:
            raise choices_error("presets", p, list(SD_PRESETS))
    posts = {p: _refit(model, p, draws, tune, chains, seed, sampler) for p in presets}
    return PresetComparison(posts, prob=prob)


def sensitivity_section(posterior, comparison: PresetComparison | None = None):
    """The report section on prior sensitivity: ``(table, figure)``.

    ``table`` is :func:`power_scaling` of ``posterior`` with ``attrs["summary"]`` holding
    the plain-language reading (and the preset flags when ``comparison`` is given);
    ``figure`` is :meth:`PresetComparison.figure` when a comparison is given, else a bar
    chart of the prior and likelihood sensitivities. For helper modules that assemble
    reports.
    """
    import matplotlib.pyplot as plt

    tab = power_scaling(posterior)
    notes = [f"{i}: {f}" for i, f in tab["flag"].items() if f]
    lines = [f"Power-scaling sensitivity (Kallioinen et al. 2024): {len(notes)} of "
             f"{len(tab)} quantities flagged at {tab.attrs['threshold']}."] + notes
    if comparison is not None:
        lines.append(comparison.summary())
        fig = comparison.figure()
    else:
        with plt.rc_context(LITERAL_RC):  # labels drawn as they are
            fig, ax = plt.subplots(figsize=(6, 0.35 * len(tab) + 1.2))
            y = np.arange(len(tab))
            ax.barh(y - 0.2, tab["prior"], height=0.4, label="prior")
            ax.barh(y + 0.2, tab["likelihood"], height=0.4, label="likelihood")
            ax.axvline(tab.attrs["threshold"], color="0.4", lw=1, ls="--")
            ax.set_yticks(y, [literal(i) for i in tab.index])
            ax.invert_yaxis()
            ax.set_xlabel("power-scaling sensitivity")
            ax.legend(fontsize="small")
            fig.tight_layout()
    tab.attrs["title"] = "How much do the conclusions owe to the priors?"
    tab.attrs["summary"] = "\n".join(lines)
    return tab, fig
