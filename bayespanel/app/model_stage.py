"""The Bayesian stage of a run for Gaussian models: one model built from the design,
sampled, summarised (coefficients, variance partition, contrasts, posterior predictive
checks) and saved; models of other families and random slopes go to
:mod:`bayespanel.app.family_stage`."""

from __future__ import annotations

import warnings

import numpy as np

from .. import kinds
from .modelkit import (contrasts_of, model_priors, model_record, sample_timed, save_posterior,
                       thin_for)

__all__ = ["bayes_one"]


def _ppc(post, design, n_draws, seed):
    """Panel statistics of replicated outcomes (same units, new occasion noise)."""
    thin = thin_for(post.n_chains * post.n_draws, n_draws)
    yrep = np.asarray(post.posterior_predictive(level="occasion", thin=thin, seed=seed).values)
    yrep = yrep.reshape(-1, yrep.shape[-1])
    codes, T, starts = design.unit_codes, design.T, design.starts

    def stats(y):
        y = np.atleast_2d(y)
        means = np.add.reduceat(y, starts, axis=1) / T
        dev = y - means[:, codes]
        return {"mean": y.mean(axis=1), "sd_between": means.std(axis=1, ddof=1),
                "sd_within": np.sqrt((dev ** 2).sum(axis=1) / (y.shape[1] - 1)),
                "max_unit_mean": means.max(axis=1), "min_unit_mean": means.min(axis=1)}

    obs, rep = stats(design.y), stats(yrep)
    labels = {"mean": "mean", "sd_between": "SD between units", "sd_within": "SD within units",
              "min_unit_mean": "lowest unit mean", "max_unit_mean": "highest unit mean"}
    return [{"statistic": k, "label": labels[k], "observed": float(obs[k][0]),
             "replicated_mean": float(rep[k].mean()), "p_value": float((rep[k] >= obs[k][0]).mean()),
             "replicated": [float(v) for v in rep[k]]} for k in labels]


def _partition(post, ref):
    """The variance partition of one posterior (bayespanel.bayes.partition): from its rows
    or, without rows at hand, its design's statistics, beside the reference fit when it
    carries its design."""
    ref = ref if ref is not None and getattr(ref, "design", None) is not None else None
    return post.variance_partition(reference=ref)


def _lag1_ppc(post, design, settings):
    """The posterior predictive check of the lag-one autocorrelation of within residuals
    (:func:`bayespanel.analysis.serialcheck.lag1_check`), on ``ppc_draws`` evenly thinned draws;
    None when no unit has two occasions one time unit apart."""
    from ..analysis.serialcheck import lag1_check

    thin = thin_for(post.n_chains * post.n_draws, settings.ppc_draws)
    M, y, codes = post.rows
    rho = post._flat("rho", thin) if post.spec.errors == "ar1" else None
    return lag1_check(M, y, codes, design.time, post._flat("coef", thin),
                      post._flat("sigma_obs", thin), rho, seed=settings.seed,
                      column=design.spec.time)


def bayes_one(name, settings, panel, design, labels, ref_fits, out_dir, say, progress_bars,
              lag1=False):
    """Sample one model and build its ``results.json`` entry: ``(posterior, entry)``.

    Gaussian models are built from the design's statistics; a family other than the
    Gaussian, or random slopes, go to :func:`bayespanel.app.family_stage.bayes_one`.
    ``lag1`` adds the lag-one autocorrelation check to the predictive checks.
    """
    if settings.latent:  # a family other than the Gaussian, or random slopes
        from .family_stage import bayes_one as latent_one
        return latent_one(name, settings, panel, design, labels, ref_fits, out_dir, say,
                          progress_bars)
    cls = kinds.model(name).builder_class()
    prob = settings.interval
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # dropped rows were reported by the data stage
        priors = model_priors(settings, cls, labels)
        m = design.build(cls, priors=priors, errors=settings.errors)  # from the statistics
    say(f"sampling {name}: {settings.chains} chains x {settings.draws} draws "
        f"(+{settings.tune} tuning)")
    post, seconds = sample_timed(m, settings, progress_bars)
    diag = post.diagnostics(warn=False)
    say(f"  {name}: {seconds:.1f} s, max R-hat {diag['max_rhat']:.3f}, "
        f"{diag['divergences']} divergences")
    ref_for = ref_fits.get(kinds.model(name).reference)
    say(f"  {name}: summaries, variance partition, contrasts, predictive checks")
    vp = None
    if m.unit_effects == "random":
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            pr = _partition(post, ref_for)
        vp = pr.to_record(prob)
    contrasts = []
    if kinds.model(name).contrasts:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            cr = contrasts_of(post, settings, ref_for)
        contrasts = cr.to_record(prob)
    ppc = []
    if design.has_rows:
        ppc = _ppc(post, design, settings.ppc_draws, settings.seed)
        if lag1:
            ppc += [r for r in [_lag1_ppc(post, design, settings)] if r is not None]
    entry = model_record(name, settings, post, seconds, m.priors,
                         posterior_file=save_posterior(post, name, out_dir),
                         variance_partition=vp, contrasts=contrasts, ppc=ppc)
    return post, entry
