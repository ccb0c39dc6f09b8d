"""Plain-language text of the report: what each model assumes, how to read the numbers.

Kept apart from the layout so the same words go into ``results.json``, the HTML report
and the docs. The wording is ours. What each model kind assumes is registered with the
kind (:mod:`bayespanel.kinds`: ``title`` and ``assumptions``).
"""

from __future__ import annotations

from ..core.safetext import printable

__all__ = ["CAUTION", "LEVEL_TEXT", "LABELS", "HEADINGS", "label", "printable"]

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
    "rho": "error correlation one time unit apart (rho)",
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
