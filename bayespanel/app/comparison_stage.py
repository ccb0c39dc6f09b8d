"""The comparison stage of a run: LOO of every Bayesian model at the chosen level (PSIS,
exact refits of high Pareto-k points, or sub-sampled out of core) and of the reference
fits, and the ``comparison`` record of results.json."""

from __future__ import annotations

import warnings

from .. import kinds
from ..core.errors import BayespanelError, EstimationError, SamplingWarning, SpecificationError
from ..core.jsonsafe import json_record
from .progress import isolated
from .settings import LOO_OBSERVATIONS

__all__ = ["comparison_stage", "loo_observations"]


def _reference_folds(settings):
    """Exact LOO for the reference fits at every size (downdated closed-form refits),
    grouped K-fold when the settings ask for it."""
    return settings.reference_folds or None


def loo_observations(settings, design):
    """Points of the out-of-core sub-sampled LOO: the setting (default LOO_OBSERVATIONS),
    at most every point of the level."""
    points = design.n if settings.level == "occasion" else design.n_units
    return min(settings.loo_observations or LOO_OBSERVATIONS, points)


def _loo_refitted(post, level, settings):
    """PSIS-LOO with the high-k points replaced by exact refits (``refit_high_k``):
    ``(LOOResult, note or None, refit warnings)``. With more high-k points than
    ``max_refits``, or a model that cannot be refitted, the PSIS values stay and the note
    says why."""
    from ..analysis.loo.psis import MANY_REFITS

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", SamplingWarning)
        try:
            lr = post.loo(level, refit_high_k=True, max_refits=settings.max_refits)
            n = int(lr.pointwise["refit"].sum()) if "refit" in lr.pointwise else 0
            note = (f"{n} point(s) with high Pareto k replaced by exact refits" if n else None)
        except SpecificationError as exc:  # latent-effect models have no exact refits
            lr, note = post.loo(level), f"not refitted: {exc}"
        except EstimationError:  # more high-k points than max_refits
            lr = post.loo(level)
            n_high = int(lr.n_high_pareto_k)
            note = (f"not refitted: {n_high} points exceed max_refits = {settings.max_refits}"
                    f" (--max-refits N; from {MANY_REFITS} refits on they use nutpie, "
                    "compiled once) or compare by grouped K-fold")
    found = [str(w.message) for w in caught if issubclass(w.category, SamplingWarning)]
    return lr, note, [w for w in found if w.startswith("refit without")]


def _loo_entry(post, level, design=None, settings=None):
    """PSIS-LOO of one posterior (out of core: sub-sampled, Magnusson et al. 2019; with
    ``settings.refit_high_k``, high-k points refitted exactly), or None when the level is
    undefined for the model."""
    from ..analysis.loo import loo_subsample

    large = design is not None and not design.has_rows
    refit_note, refit_warnings = None, []
    try:
        if large:
            lr = loo_subsample(post, level, loo_observations(settings, design),
                               seed=settings.seed)
        elif settings is not None and settings.refit_high_k:
            lr, refit_note, refit_warnings = _loo_refitted(post, level, settings)
        else:
            with warnings.catch_warnings():
                # high Pareto k enters the run's problem list (report.problems), once
                warnings.simplefilter("ignore", SamplingWarning)
                lr = post.loo(level)
    except BayespanelError as exc:
        return None, {"level": level, "elpd": None, "se": None, "p_loo": None,
                      "n_high_pareto_k": None, "max_k": None, "warning": str(exc)}
    entry = lr.to_record()
    if large:
        entry["observations"] = loo_observations(settings, design)
    if refit_note:
        entry["refit_note"] = refit_note
    if refit_warnings:
        entry["refit_warnings"] = refit_warnings
    return lr, json_record(entry)


def _comparison_large(settings, design, posts, entries, say):
    """Without rows at hand: the Bayesian models' sub-sampled LOO side by side
    (:func:`bayespanel.analysis.comparison.compare` on the sub-sampled results, which shares one
    seeded sample of points between the models)."""
    from ..analysis.comparison import compare

    by_name = {e["name"]: e for e in entries}
    results = {}
    for name, post in posts.items():
        say(f"LOO of {name}: sub-sampled at the {settings.level} level "
            f"({loo_observations(settings, design)} points"
            + ("; one more pass over the rows)" if settings.level == "occasion" else ")"))
        lr, by_name[name]["loo"] = _loo_entry(post, settings.level, design, settings)
        results[name] = lr
    scored = {n: r for n, r in results.items() if r is not None}
    table = compare(scored, level=settings.level) if scored else None
    rows = []
    for name in (list(table.index) if scored else []) + [n for n in results if n not in scored]:
        rec = {"model": name, "title": kinds.model(name).title, "kind": "bayesian",
               "elpd": None, "se": None, "elpd_diff": None, "se_diff": None,
               "method": "undefined", "level": settings.level,
               "note": by_name[name]["loo"]["warning"]}
        if name in scored:
            r = table.loc[name]
            rec.update(elpd=r["elpd"], se=r["se"], p_loo=r["p_loo"], method=r["method"],
                       elpd_diff=r["elpd_diff"], se_diff=r["se_diff"], note=r["note"] or None)
        rows.append(json_record(rec))
    say(f"LOO comparison done: {len(rows)} Bayesian fits (reference fits are not scored "
        "out of core)")
    return {"level": settings.level, "reference_folds": None, "rows": rows}


def comparison_stage(settings, design, posts, ref_fits, entries, say, failed=None):
    """LOO at the chosen level for every Bayesian model and reference fit (a model whose
    LOO fails is left out of the table and recorded in ``failed``)."""
    from ..analysis.comparison import compare, equivalence_classes

    if not design.has_rows:  # sub-sampled LOO, Magnusson et al. (2019)
        return _comparison_large(settings, design, posts, entries, say)
    fits, titles = {}, {}
    by_name = {e["name"]: e for e in entries}
    models = {}
    for name, post in posts.items():
        if settings.refit_high_k:
            say(f"LOO of {name}: PSIS at the {settings.level} level, exact refits of points "
                f"with high Pareto k (at most {settings.max_refits})")
        else:
            say(f"LOO of {name} at the {settings.level} level (PSIS, "
                f"{design.n if settings.level == 'occasion' else design.n_units} points)")
        with isolated(failed if failed is not None else [], say, name, kinds.model(name).title,
                       "LOO"):
            lr, by_name[name]["loo"] = _loo_entry(post, settings.level, settings=settings)
            fits[name] = lr if lr is not None else post
            models[name] = post
            titles[name] = kinds.model(name).title
    for name, res in ref_fits.items():
        if name == "between" or settings.glm_reference:
            continue  # between: one row per unit; GLMs: no cross-validation (docs/families.md)
        fits[f"ref:{name}"] = models[f"ref:{name}"] = res
        titles[f"ref:{name}"] = kinds.reference(name).title + " (ref.)"
    if not fits:  # e.g. only the between fit, or only GLM references: nothing to score
        say("LOO comparison skipped: no fit is scored by LOO (the between fit has one row "
            "per unit; reference GLMs are not cross-validated)")
        return None
    folds = _reference_folds(settings)
    say(f"LOO at the {settings.level} level; reference fits by "
        + ("exact leave-one-out refits" if folds is None else f"grouped {folds}-fold CV"))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        classes = equivalence_classes(models)
        table = compare(fits, level=settings.level, reference_folds=folds, seed=settings.seed,
                        equivalent=classes, progress=say)
    out = table.to_record(titles, reference_folds=folds)
    say(f"LOO comparison done: {len(out['rows'])} fits")
    if settings.glm_reference and ref_fits:
        out["note"] = ("the reference GLMs are not scored: they have no cross-validation "
                       "here, and a pooled GLM's plug-in density would not predict a known "
                       "unit's occasions as the models do; compare them by their average "
                       "marginal effects")
    return out
