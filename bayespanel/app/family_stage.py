"""The run's stages for outcome families other than the Gaussian, and for random slopes.

:func:`bayespanel.app.runner.run` hands over to these functions when the settings ask for a
latent-effect model (``family`` other than ``gaussian``, or ``random_slopes``):

* :func:`data_checks`: the outcome is checked against the family before any fit (0/1 for
  ``bernoulli``, whole numbers for counts, successes within trials, positive exposures);
  a 0/1 outcome fitted as Gaussian gets a one-line note suggesting ``bernoulli``.
* :func:`reference_stage`: for the logit and log links the reference fits are pooled
  GLMs on the columns of the Bayesian models (:mod:`bayespanel.reference.glm`) with
  cluster-robust errors and average marginal effects; :func:`tests_stage` gives the
  cluster-robust Wald test of the unit-mean terms in the Mundlak GLM.
* :func:`bayes_one`: one latent-effect model sampled and summarised: coefficients on the
  link scale, the unit-effect SDs and correlations, the family's own parameters, average
  marginal effects on the outcome scale beside the reference GLM's, the variance partition
  on the latent scale (which scale is stated), the between-minus-within contrasts on the
  link scale, diagnostics and posterior predictive checks whose statistics suit the
  outcome's range (:func:`bayespanel.bayes.families.ppc_statistics`).

The results keep the shape of ``results.json`` version 1 (docs/results-schema.md): the
model entries gain ``family`` and ``average_marginal_effects``, the reference entries
``family`` and ``average_marginal_effects``.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd

from .. import kinds
from ..core.errors import EstimationError
from ..core.jsonsafe import json_record
from ..bayes import families as fam_mod
from ..core.terms import UNIT_MEAN, parse
from .modelkit import (contrasts_of, model_priors, model_record, sample_timed, save_posterior,
                       tests_skip_reason, thin_for)

__all__ = ["data_checks", "reference_stage", "tests_stage", "bayes_one", "family_record",
           "SCALE_TEXT"]

#: what the coefficients are, by link
COEF_SCALE = {"logit": "log-odds (logit) scale, conditional on the unit's effect",
              "log": "log scale (log rate ratios), conditional on the unit's effect",
              "identity": "outcome scale"}
#: the scale of the variance partition, by link
SCALE_TEXT = {
    "logit": ("latent scale (log-odds): the occasion-level variance is fixed at pi^2/3, that "
              "of the standard logistic distribution of the threshold model (Snijders and "
              "Bosker 2012, section 17.3)"),
    "log": ("latent scale (log rate): the occasion-level variance is the log-normal "
            "approximation log(1 + 1/lambda) (negative binomial: log(1 + 1/lambda + "
            "1/shape)) at the covariate means (Nakagawa, Johnson and Schielzeth 2017)"),
    "identity": "outcome scale",
}
_GLM_WORD = {"logit": "logit GLM", "poisson": "Poisson GLM (quasi-likelihood)"}


def _family(settings):
    return fam_mod.get_family(settings.family)


def family_record(settings) -> dict:
    """The ``family`` object of a model entry (results.json)."""
    fam = _family(settings)
    return {"name": fam.name, "link": fam.link, "trials": settings.trials,
            "exposure": settings.exposure, "random_slopes": list(settings.random_slopes),
            "centred": bool(settings.centred), "coefficient_scale": COEF_SCALE[fam.link]}


def _columns(settings, panel, design):
    """Trials and log exposure on the estimation rows (None when not used)."""
    from ..bayes.latent import column_values

    trials, _ = column_values(panel, design, settings.trials, "trials")
    expo, _ = column_values(panel, design, settings.exposure, "exposure")
    return trials, expo


def data_checks(settings, panel, design) -> list:
    """Check the outcome against the family before any fit; return notes for the run.

    Raises :class:`~bayespanel.core.errors.PanelDataError` naming the first row outside the
    family's support. A Gaussian fit of an outcome coded 0/1 gets a one-line note.
    """
    from ..bayes.latent import describe_row

    notes = []
    if settings.family == "gaussian" and not hasattr(design, "y"):
        return notes  # out of core: no rows in memory (the family check needs them)
    y = np.asarray(design.y, dtype=float)
    if settings.family == "gaussian":
        vals = np.unique(y[np.isfinite(y)])
        if len(vals) == 2 and set(vals.tolist()) == {0.0, 1.0}:
            notes.append(f"outcome {design.outcome!r} takes only the values 0 and 1; it is "
                         "fitted here as Gaussian (a linear probability model); a binary "
                         "model fits it on its own scale: --family bernoulli "
                         "(family = \"bernoulli\" in the analysis file)")
        return notes
    if settings.family == "student_t" and not settings.random_slopes:
        return notes
    trials, expo = _columns(settings, panel, design)
    fam_mod.check_outcome(settings.family, y, outcome=design.outcome, trials=trials,
                          exposure=expo, where=describe_row(design))
    return notes


# ---------------------------------------------------------------------- reference GLMs
def _glm_title(settings, name):
    return f"{kinds.reference(name).glm_title} {_GLM_WORD[_glm_kind(settings)]}"


def _glm_kind(settings):
    from ..reference.glm import glm_family

    return glm_family(settings.family)


def _glm_assumptions(settings, res) -> str:
    glm = _glm_kind(settings)
    if glm == "logit":
        first = ("Logit model of every row as if independent, by maximum likelihood; ")
        last = ("Its coefficients are population-averaged log-odds ratios, smaller in "
                "magnitude than the unit-specific ones of the Bayesian models (by roughly "
                "1/sqrt(1 + 0.35 sigma_unit^2); Zeger, Liang and Albert 1988): compare the "
                "average marginal effects, which answer the same question in both.")
    else:
        first = ("Poisson quasi-likelihood fit of every row as if independent, consistent "
                 "for the mean whatever the dispersion; ")
        last = ("Its slopes estimate the same log rate ratios as the Bayesian models when "
                "the unit effects are independent of the covariates; the intercept differs "
                "by sigma_unit^2/2.")
    se = ("standard errors clustered by unit (CR1), so a unit's rows may be correlated in "
          "any way" if res.cov_type == "cluster" else "classical standard errors (inverse "
          "information; rows assumed independent)")
    return f"{first}{se}; tests and intervals use {res.distribution}. {last}"


def _ame_records(res, prob, names=None, weights=None):
    if names is None:
        names, weights = fam_mod.effect_weights(res.labels, res.kind)
    tab = res.average_marginal_effects(names, weights, prob)
    return [{"effect": e, "estimate": float(r["estimate"]), "se": float(r["se"]),
             "p_value": float(r["p"]), "lower": float(r["lower"]), "upper": float(r["upper"])}
            for e, r in tab.iterrows()]


def reference_stage(settings, panel, design, say):
    """Pooled GLMs of the family on the columns of each reference name.

    Returns ``(fits, entries, notes)``; a fit that cannot be computed (separation, no
    convergence) is left out with a note naming it and why.
    """
    from ..reference.glm import fit_glm

    trials, expo = _columns(settings, panel, design)
    log_expo = None if expo is None else np.log(expo)
    fits, out, notes = {}, [], []
    prob = settings.interval
    for name in settings.reference:
        try:
            res = fit_glm(design, name, settings.family, trials=trials, log_exposure=log_expo,
                          cov=settings.cov)
        except (EstimationError, np.linalg.LinAlgError) as exc:
            notes.append(f"reference fit {name!r} ({_glm_title(settings, name)}) was not "
                         f"computed: {exc}")
            continue
        fits[name] = res
        out.append(json_record({
            "name": name, "title": _glm_title(settings, name),
            "assumptions": _glm_assumptions(settings, res),
            "estimator": "glm", "method": f"{_glm_kind(settings)}, population-averaged",
            **res.to_record(prob),
            "family": settings.family,
            "test_distribution": (f"t({res.n_units - 1})" if res.cov_type == "cluster"
                                  else "normal"),
            "average_marginal_effects": [json_record(a) for a in _ame_records(res, prob)],
        }))
    say(f"reference fits ({_GLM_WORD[_glm_kind(settings)]}, {settings.cov} covariance): "
        f"{', '.join(fits) or 'none'}")
    return fits, out, notes


def tests_stage(ref_fits, panel, design, settings, say):
    """The cluster-robust Wald test of the unit-mean terms in the Mundlak GLM (the
    correlated-random-effects test for nonlinear models; Wooldridge 2010, section 15.8.2).
    The classical Hausman test compares linear fits and is not run for these families."""
    from ..reference.glm import fit_glm

    title = (f"Mundlak unit-mean terms in the {_GLM_WORD[_glm_kind(settings)]} "
             f"({'cluster-robust ' if settings.cov == 'cluster' else ''}Wald)")
    why = tests_skip_reason(design)
    if why is not None:  # one line saying why, as for the linear tests
        say(f"specification test skipped: {why}")
        return [{"name": "mundlak", "title": title, "statistic": None, "df": None,
                 "p_value": None, "null": None, "conclusion": f"not run: {why}",
                 "message": None, "skipped": why}]
    res = ref_fits.get("mundlak")
    if res is None:
        trials, expo = _columns(settings, panel, design)
        try:
            res = fit_glm(design, "mundlak", settings.family, trials=trials,
                          log_exposure=None if expo is None else np.log(expo), cov=settings.cov)
        except (EstimationError, np.linalg.LinAlgError):
            return []
    terms = [t for t in res.labels if parse(t).part == UNIT_MEAN]
    if not terms:
        return []
    w = res.wald(terms)
    reject = np.isfinite(w["p_value"]) and w["p_value"] < 0.05
    say("specification test: Mundlak unit-mean terms in the GLM")
    return [json_record({
        "name": "mundlak", "title": title,
        "statistic": w["statistic"], "df": w["df"], "p_value": w["p_value"],
        "distribution": (f"F({int(w['df'])}, {int(w['df2'])})" if w["kind"] == "F" else
                         f"chi-squared({int(w['df'])})"),
        "null": "the coefficients of the unit means are zero (unit effects unrelated to the "
                "covariates)",
        "conclusion": ("within and between effects differ (p < 0.05): unit effects are "
                       "related to the covariates" if reject else
                       "no evidence at the 5% level that within and between effects differ"),
        "message": (f"F on ({int(w['df'])}, {int(w['df2'])}) df" if w["kind"] == "F" else
                    f"chi-squared on {int(w['df'])} df")
                   + "; the classical Hausman test compares linear fits and is not run for "
                     f"family={settings.family!r}"})]


# ---------------------------------------------------------------------- Bayesian models
def latent_options(settings) -> dict:
    """The builder options of the latent-effect model (``family=``, ``random_slopes=``...)."""
    opts = {"family": settings.family}
    if settings.random_slopes:
        opts["random_slopes"] = list(settings.random_slopes)
    if settings.trials is not None:
        opts["trials"] = settings.trials
    if settings.exposure is not None:
        opts["exposure"] = settings.exposure
    if settings.centred:
        opts["centred"] = True
    return opts


def assumptions(name, settings) -> str:
    """The model's assumptions in plain words, with the family and random slopes."""
    fam = _family(settings)
    text = {
        "bernoulli": "The outcome is 0/1: each occasion is a Bernoulli draw whose log-odds "
                     "are the linear predictor plus the unit's effect.",
        "binomial": f"The outcome counts successes out of the trials in {settings.trials!r}: "
                    "binomial, with log-odds the linear predictor plus the unit's effect.",
        "poisson": "The outcome is a count: Poisson, with log rate the linear predictor plus "
                   "the unit's effect" + (f" and log({settings.exposure})" if settings.exposure
                                          else "") + "; its variance equals its mean given "
                   "the unit effect.",
        "negative_binomial": "The outcome is a count: negative binomial (variance mu + "
                             "mu^2/shape), with log rate the linear predictor plus the unit's "
                             "effect" + (f" and log({settings.exposure})" if settings.exposure
                                         else "") + ".",
        "student_t": "Occasion-level errors follow a Student-t distribution (heavy tails), "
                     "its degrees of freedom estimated.",
        "gaussian": "",
    }[fam.name]
    if fam.link != "identity":
        text += (" Coefficients are on the " + COEF_SCALE[fam.link] + "; the unit effects "
                 "are normal on that scale. Occasions are independent given the unit effect.")
    if settings.random_slopes:
        text += (" The slope of " + ", ".join(settings.random_slopes) + " varies by unit "
                 "(normal, correlated with the unit intercept); the coefficient is the "
                 "average slope.")
    return (kinds.model(name).assumptions + " " + text).strip()


def _ame_stage(post, name, settings, ref_fits, prob):
    """Average marginal effects on the outcome scale with the reference GLM's beside them."""

    if fam_mod.get_family(settings.family).link == "identity":
        return []
    tab = post.average_marginal_effects(prob)
    lo, hi = tab.columns[2], tab.columns[3]
    ref = ref_fits.get(kinds.model(name).glm_reference)
    by_ref = {}
    if ref is not None:
        names, W = fam_mod.effect_weights(ref.labels, ref.kind)
        by_ref = {a["effect"]: a for a in _ame_records(ref, prob, names, W)}
    out = []
    for eff, r in tab.iterrows():
        a = by_ref.get(eff, {})
        out.append(json_record({"effect": str(eff), "estimate": r["mean"], "sd": r["sd"],
                            "lower": r[lo], "upper": r[hi],
                            "reference_estimate": a.get("estimate"),
                            "reference_se": a.get("se"), "reference_lower": a.get("lower"),
                            "reference_upper": a.get("upper")}))
    return out


def _partition_stage(post, design, kind, prob, settings):
    """The variance partition on the latent scale (outcome scale for identity links)."""
    fam = _family(settings)
    rec = post.variance_partition().to_record(prob)  # on the latent scale
    scale = SCALE_TEXT[fam.link]
    if settings.random_slopes:
        scale += ("; with random slopes the unit SD and the ICC are those of the unit "
                  "intercepts at the covariate means, and the explained-variance shares are "
                  "left out (they would miss the slopes' variance)")
    # no GLS quasi-demeaning share (theta) for latent effects
    rec.update(theta=[], scale=scale)
    if settings.random_slopes:
        rec["explained"] = []
    return rec


def _ppc_stage(post, design, settings):
    """Posterior predictive checks with statistics that suit the family and the outcome's
    range; p-values count ties half (discrete statistics)."""

    thin = thin_for(post.n_chains * post.n_draws, settings.ppc_draws)
    yrep = np.asarray(post.posterior_predictive(level="occasion", thin=thin,
                                                seed=settings.seed).values)
    yrep = yrep.reshape(-1, yrep.shape[-1])
    occ = pd.factorize(np.asarray(design.time))[0]
    checks = fam_mod.ppc_statistics(settings.family, design.y, yrep, design.unit_codes,
                                    trials=post.trials, occasion_codes=occ)
    return [{"statistic": "_".join(label.replace("-", " ").split()).lower(), "label": label,
             "observed": o, "replicated_mean": float(r.mean()),
             "p_value": fam_mod.ppc_p_value(o, r), "replicated": [float(v) for v in r]}
            for label, o, r in checks]


def bayes_one(name, settings, panel, design, labels, ref_fits, out_dir, say, progress_bars):
    """Sample one latent-effect model and build its ``results.json`` entry."""

    registered = kinds.model(name)
    cls = registered.builder_class()
    prob = settings.interval
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # dropped rows were reported by the data stage
        priors = model_priors(settings, cls, labels)
        m = cls(panel, settings.formula, priors=priors, occasion_effects=settings.occasion_effects,
                **latent_options(settings),
                **({} if settings.initial_conditions else {"initial_conditions": False}))
    fam = _family(settings)
    say(f"sampling {name} ({fam.name}"
        + (f", random slopes {', '.join(settings.random_slopes)}" if settings.random_slopes
           else "") + f"): {settings.chains} chains x {settings.draws} draws "
        f"(+{settings.tune} tuning)")
    post, seconds = sample_timed(m, settings, progress_bars)
    diag = post.diagnostics(warn=False)
    kind = registered.columns
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        say(f"  {name}: average marginal effects, variance partition, predictive checks")
        ame = _ame_stage(post, name, settings, ref_fits, prob)
        vp = _partition_stage(post, m.design, kind, prob, settings)
        contrasts = []
        if registered.contrasts:
            contrasts = contrasts_of(post, settings, None).to_record(prob)
        ppc = _ppc_stage(post, m.design, settings)
    entry = {
        **model_record(name, settings, post, seconds,
                       {**m.priors, **getattr(m, "extra_priors", {})},
                       posterior_file=save_posterior(post, name, out_dir),
                       variance_partition=vp, contrasts=contrasts, ppc=ppc,
                       assumptions=assumptions(name, settings),
                       reference_counterpart=(registered.glm_reference if settings.glm_reference
                                              else registered.reference)),
        "family": family_record(settings),
        "average_marginal_effects": ame,
    }
    say(f"  {name}: {seconds:.1f} s, max R-hat {diag['max_rhat']:.3f}, "
        f"{diag['divergences']} divergences")
    return post, entry
