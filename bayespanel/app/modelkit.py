"""What the model stages of a run share, the Gaussian ones (:mod:`bayespanel.app.runner`)
and those of other families and random slopes (:mod:`bayespanel.app.family_stage`): the
priors a model takes from the settings, when the specification tests apply, thinning,
the contrasts of a posterior, timed sampling, the posterior's file and the model's record
in results.json."""

from __future__ import annotations

import time
import warnings
from pathlib import Path

import numpy as np

from .. import kinds
from ..core.errors import SpecificationError
from ..core.jsonsafe import json_record
from ..core.terms import UNIT_MEAN

__all__ = ["tests_skip_reason", "extra_prior_keys", "model_priors", "check_prior_keys",
           "prior_text", "thin_for", "contrasts_of", "sample_timed", "save_posterior",
           "model_record"]


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


def contrasts_of(post, settings, ref):
    """Between-minus-within contrasts of one posterior (bayespanel.bayes.contrasts), with
    the run's ROPE and interval, beside the reference fit ``ref`` (or None); the
    specification tests are the run's own (``tests`` of results.json)."""
    return post.contrasts(rope=settings.rope, prob=settings.interval, reference=ref,
                          tests=False)


def sample_timed(m, settings, progress_bars):
    """Sample a built model with the run's settings; returns the posterior and seconds."""
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # problems are collected from diagnostics() later
        post = m.sample(draws=settings.draws, tune=settings.tune, chains=settings.chains,
                        seed=settings.seed, sampler=settings.sampler, progress=progress_bars)
    return post, time.perf_counter() - t0


def save_posterior(post, name, out_dir) -> str | None:
    """Write ``post`` to ``posteriors/<name>.nc`` in the run's staging folder ``out_dir``
    (published with the run, :mod:`bayespanel.core.outputs`); the path relative to the
    folder, or None without a folder."""
    if out_dir is None:
        return None
    rel = f"posteriors/{name}.nc"
    (Path(out_dir) / "posteriors").mkdir(parents=True, exist_ok=True)
    post.save(Path(out_dir) / rel)
    return rel


def model_record(name, settings, post, seconds, priors, *, posterior_file,
                 variance_partition, contrasts, ppc, assumptions=None,
                 reference_counterpart=None) -> dict:
    """The ``models[]`` entry of one Bayesian fit in ``results.json``
    (docs/results-schema.md), for every family: the model's names and texts from the
    registry, the sampling record, the priors used, and the posterior's own record
    (:meth:`~bayespanel.bayes.posterior.Posterior.to_record`: coefficients, scale,
    diagnostics) around the stage's variance partition, contrasts and predictive checks.
    ``loo`` is filled by the comparison stage. The family stage adds its own keys.

    Parameters
    ----------
    name : str
        The model's snake-case name (:func:`bayespanel.kinds.model`).
    settings : Settings
    post : Posterior
    seconds : float
        Sampling time.
    priors : dict
        Every prior the model used, by key (written with :func:`prior_text`).
    posterior_file : str or None
        From :func:`save_posterior`.
    variance_partition : dict or None
    contrasts, ppc : list of dict
    assumptions, reference_counterpart : str, optional
        Instead of the registry's (the family stage words them for its family).
    """
    registered = kinds.model(name)
    record = post.to_record(settings.interval)
    return {
        "name": name, "builder": registered.class_name, "title": registered.title,
        "assumptions": registered.assumptions if assumptions is None else assumptions,
        "reference_counterpart": (registered.reference if reference_counterpart is None
                                  else reference_counterpart),
        "posterior_file": posterior_file,
        "sampling": json_record({"draws": settings.draws, "tune": settings.tune,
                                 "chains": settings.chains, "seed": settings.seed,
                                 "sampler": str(post.sampling.get("sampler",
                                                                  settings.sampler)),
                                 "seconds": seconds}),
        "priors": {k: prior_text(v) for k, v in priors.items()},
        "coefficients": record["coefficients"],
        "scale": record["scale"],
        "variance_partition": variance_partition,
        "contrasts": contrasts,
        "diagnostics": record["diagnostics"],
        "loo": None,
        "ppc": ppc,
    }
