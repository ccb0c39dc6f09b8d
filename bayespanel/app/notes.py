"""The notes of a run (results.json ``warnings`` and ``out_of_core``, the console and the
report): what a lagged outcome means for the models, what a model leaves out and what the
out-of-core route leaves out."""

from __future__ import annotations

from .. import kinds
from .comparison_stage import loo_observations

__all__ = ["dynamic_notes", "fit_notes", "left_out"]


def left_out(settings, panel, design) -> dict:
    """What the out-of-core route leaves out and why (results.json and the report)."""
    why_rows = "needs the rows, which the out-of-core route does not load"
    items = [
        {"item": "posterior predictive checks",
         "reason": f"drawing replicated panels {why_rows}"},
        {"item": "figures of predictive checks", "reason": "no predictive draws"},
        {"item": "reference fits in the LOO comparison",
         "reason": "their exact or K-fold cross-validation refits the estimator without "
                   f"each point, and each refit {why_rows}; the comparison holds the "
                   "Bayesian models"},
        {"item": "full PSIS-LOO", "reason": "replaced by the sub-sampling estimator "
                 "(Magnusson et al. 2019): the approximation at the posterior means for every "
                 "point, full PSIS on a seeded simple random sample of "
                 f"{loo_observations(settings, design)} points"},
        {"item": "exact refits of high Pareto-k points", "reason": f"each refit {why_rows}"},
        {"item": "serial-correlation test and lag-one predictive check",
         "reason": f"differencing and pairing consecutive occasions {why_rows}"},
        {"item": "design check (simulated replicates)", "reason": f"it {why_rows}"},
        {"item": "saved estimation rows in posteriors/*.nc",
         "reason": "the files hold the sufficient statistics only"},
    ]
    return {"scheduler": panel.client if isinstance(panel.client, str) else "distributed",
            "partitions": panel.npartitions, "rows_read": design.n_input_rows,
            "loo_observations": loo_observations(settings, design), "left_out": items}


def dynamic_notes(settings, design) -> list[str]:
    """What a lagged outcome means for this run's models (bayespanel.data.initial.notes):
    the initial-conditions assumption and why, the fixed-effects and pooled biases, and the
    moment estimator of the reference's variance components."""
    from ..data.initial import WITH_AR1, notes as initial_notes

    said = initial_notes(design, settings.models)
    if not said:
        return []
    if getattr(settings, "errors", "iid") == "ar1":
        said.append(WITH_AR1)
    if getattr(design, "initial", None) is None:
        said = said[1:]  # the design's own warning said it (the data stage's notes)
    said.append(
        "The Hausman test compares the random-effects fit with fixed effects, which a "
        "lagged outcome biases in short panels (Nickell 1981): a difference between them "
        "may come from that bias rather than from the random-effects assumption.")
    components = [n for n in settings.reference if kinds.reference(n).variance_components]
    if components and settings.re_method == "swamy-arora":
        said.append(
            "The random-effects reference fits estimate the variance components by Swamy-"
            "Arora moments, which take the within residuals; a lagged outcome biases those "
            "(Nickell 1981), so the unit variance may come out at zero and the fit fall back "
            "to pooled least squares: with a lagged outcome prefer method = 'ml' or 'reml' "
            "(--method).")
    return said


def fit_notes(settings, design, time_reason) -> list[str]:
    """What the run's models and checks leave out: the time-constant covariates a
    fixed-effects model absorbs into its unit intercepts, and the checks a time column
    without numeric spacing rules out (``time_reason``, from
    :func:`bayespanel.app.reference_stage.time_axis_reason`)."""
    said = []
    for name in settings.models:
        if kinds.model(name).columns == "within" and design.time_constant:
            left = ", ".join(map(repr, design.time_constant))
            said.append(f"{kinds.model(name).title} leaves out {left}: constant within "
                        "units, absorbed by the unit intercepts")
    if time_reason is not None:
        said.append(f"the serial-correlation test and the lag-one predictive check need "
                    f"a numeric time column: {time_reason}")
    return said
