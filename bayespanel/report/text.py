"""Plain-language text of the report: what each model assumes, how to read the numbers.

Kept apart from the layout so the same words go into ``results.json``, the HTML report
and the docs. The wording is ours.
"""

from __future__ import annotations

import re

__all__ = ["BAYES_MODELS", "REFERENCE_FITS", "COUNTERPART", "CAUTION", "LEVEL_TEXT",
           "LABELS", "HEADINGS", "label", "model_title", "reference_title", "printable"]

#: Display labels of the variance quantities, defined once for every table and output
#: (HTML, Markdown, LaTeX, console). Keys are the names results.json and the Python
#: objects use (``sigma_unit`` on a result, ``"unit SD"`` in a partition table).
LABELS = {
    "sigma_unit": "unit SD",
    "sigma_obs": "occasion SD",
    "icc": "ICC",
    "unit SD": "unit SD",
    "occasion SD": "occasion SD",
    "ICC": "ICC",
    "theta": "quasi-demeaning share",
}


#: Column headings of the tables, shared by the HTML report and the Markdown/LaTeX files
#: (keys are results.json field names).
HEADINGS = {
    "title": "model", "n": "n", "n_missing": "missing", "mean": "mean",
    "sd_overall": "SD overall", "sd_between": "SD between", "sd_within": "SD within",
    "share_within": "share within", "varies_within": "varies within",
    "method": "method", "elpd": "ELPD", "se": "SE", "elpd_diff": "difference",
    "se_diff": "SE of difference", "p_loo": "p_loo", "weight": "weight",
    "n_points": "points", "n_high_pareto_k": "high Pareto k", "note": "note",
    "divergences": "divergences", "draws": "draws", "max_rhat": "max R-hat",
    "min_ess_bulk": "min bulk ESS", "min_ess_tail": "min tail ESS", "min_bfmi": "min BFMI",
}


def label(key: str) -> str:
    """The display label of a quantity (the key itself when it has none)."""
    return LABELS.get(key, key)

#: Bayesian builders by command-line name: (title, assumptions in plain words).
BAYES_MODELS = {
    "pooled": (
        "Pooled regression",
        "One intercept for every unit: units differ only through the covariates. Rows of "
        "the same unit are treated as independent, which overstates precision when units "
        "differ in their baseline. Useful as a floor to compare against.",
    ),
    "random_intercept": (
        "Random intercept",
        "Each unit has its own baseline, drawn from a normal distribution whose SD is "
        "the unit SD. Each covariate has one effect, which mixes its within-unit and its "
        "between-unit association; this is right only if the two are equal, i.e. if the "
        "unit baselines are unrelated to the covariates.",
    ),
    "within_between": (
        "Within-between (hybrid)",
        "Each time-varying covariate is split into the unit's mean (between part) and the "
        "occasion's deviation from it (within part), each with its own effect; unit "
        "baselines vary as in the random-intercept model. The within effect is protected "
        "against stable differences between units; time-constant covariates keep one effect.",
    ),
    "correlated_effects": (
        "Correlated random effects (Mundlak)",
        "The random-intercept model with the unit means of the time-varying covariates "
        "added. Their coefficients measure how far the between effect departs from the "
        "within effect (the contextual effect); the covariates' own coefficients equal the "
        "within effects.",
    ),
    "fixed_effects": (
        "Fixed effects",
        "Every unit has its own free baseline, so only changes within units inform the "
        "coefficients; covariates that never change within a unit cannot be estimated. "
        "Predicts occasions of known units only: a new unit's baseline is unknown.",
    ),
}

#: Reference (frequentist) fits: (title, assumptions).
REFERENCE_FITS = {
    "pooled": ("Pooled OLS", "Least squares on all rows, cluster-robust errors by unit."),
    "within": ("Within (fixed effects)", "Least squares on unit-demeaned rows; degrees of "
               "freedom corrected for the absorbed unit means."),
    "between": ("Between", "Least squares on the unit means, one row per unit."),
    "random": ("Random effects (GLS)", "Feasible GLS with variance components estimated "
               "by the method named beside it."),
    "mundlak": ("Mundlak (GLS)", "Random-effects GLS with the unit means of the "
                "time-varying covariates added."),
    "within_between": ("Within-between (GLS)", "Random-effects GLS on the within and "
                       "between parts of each time-varying covariate."),
}

#: The reference fit set beside each Bayesian model.
COUNTERPART = {
    "pooled": "pooled",
    "random_intercept": "random",
    "within_between": "within_between",
    "correlated_effects": "mundlak",
    "fixed_effects": "within",
}

LEVEL_TEXT = {
    "occasion": ("leave one occasion out: how well each model predicts a further occasion "
                 "of a unit it already knows (the unit's other occasions are used)"),
    "unit": ("leave one unit out: how well each model predicts all occasions of a unit it "
             "has never seen (fixed-effects models cannot, and are listed with the reason)"),
}

CAUTION = (
    "These estimates describe associations in the observed panel. Reading them as causal "
    "effects depends on the design, not on the model: fixed effects and within parts remove "
    "only stable differences between units, not changes that happen together with the "
    "covariate, reverse causation or selective drop-out. Between effects compare different "
    "units and carry every confounder that differs between them. A model that predicts "
    "better by LOO is not thereby closer to the causal truth."
)


def model_title(name: str) -> str:
    return BAYES_MODELS.get(name, (name.replace("_", " ").capitalize(), ""))[0]


def reference_title(name: str) -> str:
    return REFERENCE_FITS.get(name, (name.replace("_", " ").capitalize(), ""))[0]


_UNPRINTABLE = re.compile("[\x00-\x08\x0b-\x1f\x7f-\x9f\u061c\u200b-\u200f\u2028-\u202e"
                          "\u2060-\u2069\ufeff]")


def printable(text) -> str:
    """``text`` with control and direction-changing characters written as escapes
    (``\\x1b``), so a column name or a label cannot drive the terminal (colours, cursor
    moves, reversed text); line breaks and tabs stay."""
    return _UNPRINTABLE.sub(lambda m: m.group().encode("unicode_escape").decode("ascii"),
                            str(text))
