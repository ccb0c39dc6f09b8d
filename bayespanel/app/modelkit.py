"""What the model stages of a run share, the Gaussian ones (:mod:`bayespanel.app.runner`)
and those of other families and random slopes (:mod:`bayespanel.app.family_stage`): the
priors a model takes from the settings, when the specification tests apply, thinning,
the contrasts of a posterior and timed sampling."""

from __future__ import annotations

import time
import warnings

import numpy as np

from ..core.errors import SpecificationError
from ..core.terms import UNIT_MEAN

__all__ = ["tests_skip_reason", "extra_prior_keys", "model_priors", "check_prior_keys",
           "prior_text", "thin_for", "contrasts_of", "sample_timed"]


def tests_skip_reason(design) -> str | None:
    """Why the Hausman and Mundlak tests do not apply to a design, or None when they do.

    Both ask whether a covariate's within and between effects differ, so they need at
    least one covariate that varies within units and whose unit means differ between
    units (a fixed schedule, such as years since baseline observed on the same occasions
    for every unit, or occasion indicators in a balanced panel, has no between variation).
    """
    if not design.time_varying:
        return ("no covariate varies within units, so there is no within effect to "
                "compare with a between effect")
    if not any(t.part == UNIT_MEAN for t in design.term_parts("mundlak")):
        return ("no time-varying covariate varies between units (every unit has the same "
                f"unit mean of {', '.join(map(repr, design.time_varying))}), so within "
                "and between effects cannot be told apart")
    return None


def extra_prior_keys(settings) -> set:
    """Prior keys of the latent-effect models beyond the Gaussian ones (docs/families.md)."""
    from ..bayes.families import get_family

    if not settings.latent:
        return set()
    params = get_family(settings.family).params
    keys = {"sigma_slope", "lkj_eta"} if settings.random_slopes else set()
    keys |= {"nu"} if "nu" in params else set()
    keys |= {"inv_sqrt_shape"} if settings.family == "negative_binomial" else set()
    return keys


def model_priors(settings, model_cls, labels):
    has_unit = model_cls.unit_effects == "random"
    valid = set(labels) | {"coef", "sigma_obs"} | ({"sigma_unit"} if has_unit else set())
    valid |= extra_prior_keys(settings)
    valid |= {"rho"} if settings.errors == "ar1" else set()
    return {k: v for k, v in settings.priors.items() if k in valid} or None


def check_prior_keys(settings, label_sets):
    from ..bayes.families import get_family

    known = set().union(*label_sets.values()) if label_sets else set()
    known |= {"coef", "sigma_unit"} | extra_prior_keys(settings)
    known |= {"rho"} if settings.errors == "ar1" else set()
    if "sigma_obs" in get_family(settings.family).params:
        known.add("sigma_obs")
    for k in settings.priors:
        if k not in known:
            raise SpecificationError(
                f"priors has an unknown key {k!r}; valid keys for these models are "
                + ", ".join(map(repr, sorted(known))))


def prior_text(p) -> str:
    kw = getattr(p, "kwargs", None)
    if kw is None:
        return str(p)
    return f"{p.family}(" + ", ".join(f"{k}={v:.4g}" for k, v in kw.items()) + ")"


def thin_for(n_total, target):
    return max(1, int(np.ceil(n_total / max(target, 1))))


def contrasts_of(post, design, kind, coef_d, settings, ref):
    """Between-minus-within contrasts of one posterior (bayespanel.bayes.contrasts)."""
    if hasattr(post, "contrasts"):
        return post.contrasts(rope=settings.rope, prob=settings.interval, reference=ref,
                              tests=False)
    from ..analysis import contrasts as ctr

    return ctr.within_between_contrasts(kind, post.labels, coef_d,
                                        ctr.contrast_covariates(kind, post.labels),
                                        rope=settings.rope, prob=settings.interval,
                                        reference=ref)


def sample_timed(m, settings, progress_bars):
    """Sample a built model with the run's settings; returns the posterior and seconds."""
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # problems are collected from diagnostics() later
        post = m.sample(draws=settings.draws, tune=settings.tune, chains=settings.chains,
                        seed=settings.seed, sampler=settings.sampler, progress=progress_bars)
    return post, time.perf_counter() - t0
