"""Initial conditions of a dynamic panel: the unit effect given the first outcome.

With the lagged outcome among the covariates (``y ~ lag(y) + x``), the unit effect
``c_i`` of ``y_it = phi y_i,t-1 + x_it'b + c_i + e_it`` is correlated with the lagged
outcome by construction: every ``y_i,t-1`` contains ``c_i``, the first one included. A
random intercept assumed independent of the covariates is then wrong from the first row,
and the lag's coefficient is biased upward. Wooldridge (2005, "Simple solutions to the
initial conditions problem in dynamic, nonlinear panel data models with unobserved
heterogeneity", Journal of Applied Econometrics 20(1), 39-54) models the unit effect given
the first observed outcome and the covariates instead,

    c_i = a + g y_i0 + xbar_i'd + u_i,   u_i ~ N(0, tau^2) independent of y_i0 and x_i,

and estimates on the occasions after the first, conditional on ``y_i0``. The covariates
enter through their unit means over the estimation occasions (the Mundlak form of his
conditioning on the whole path of ``x_i``). This module builds that design:
:func:`columns` adds to a design whose formula lags the outcome

- one column per term built from a lagged outcome (``lag(y)``, ``lag(y, 2)``,
  ``log(lag(y))``): its value on the unit's first estimation row, labelled
  ``"lag(y) (initial)"``. For ``lag(y)`` this is the outcome on the occasion before the
  unit's first estimation row: its first observed outcome when nothing else is missing.
  With ``lag(y)`` and ``lag(y, 2)`` the two first outcomes are both conditioned on;
- the unit mean of each time-varying covariate that is not built from the lagged outcome,
  labelled as the correlated-effects model labels them (``"x (unit mean)"``).

Estimation starts at the second occasion (after ``k`` for ``lag(y, k)``) because the lag
is missing before it (:mod:`bayespanel.data.lags`). What each model kind makes of it:

- random intercept and correlated effects: Wooldridge's model (the two are the same model
  on this design: the unit means are already among the columns);
- within-between: the same model written with each exogenous covariate split into its
  within and between parts (the unit mean column becomes ``x (between)``); the lagged
  outcome stays as it is (its within part alone would carry the fixed-effects bias);
- fixed effects: the added columns are constant within units and drop out; the within
  estimator of a lagged outcome's coefficient is biased toward minus one in short panels
  (Nickell 1981, Econometrica 49(6), 1417-1426; to first order about ``-(1 + phi)/(T - 1)``
  with ``T`` occasions per unit), which :func:`notes` says;
- pooled: no unit effect, so what remains of it in the error is still correlated with the
  lagged outcome and the lag's coefficient stays biased upward (a note says so).

With ``initial_conditions=False`` none of this is added and :func:`notes` says that the
random-effects fits then assume the unit effect independent of the first outcome.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..core.terms import BETWEEN, UNIT_MEAN, parse

__all__ = ["InitialConditions", "columns", "notes", "ASSUMPTION", "WITH_AR1",
           "dynamic_terms", "transform_columns"]

#: what the initial-conditions model assumes, and why (report and console)
ASSUMPTION = (
    "The lagged outcome is among the covariates, so the unit effect is correlated with it "
    "by construction (every earlier outcome contains the unit effect, the first one too). "
    "Following Wooldridge (2005, Journal of Applied Econometrics 20(1)), the unit effect's "
    "mean depends on the first observed outcome and on the unit means of the time-varying "
    "covariates over the estimation occasions, and the fit starts at the occasion after the "
    "first (after k for lag(y, k)), conditional on the first outcome. It assumes the rest of "
    "the unit effect is independent of these, errors uncorrelated over time given the "
    "lagged outcome, and covariates strictly exogenous.")


@dataclass(frozen=True)
class InitialConditions:
    """The columns :func:`columns` added and the terms they condition on."""

    dynamic: tuple[str, ...]   # terms built from a lagged outcome
    initial: tuple[str, ...]   # their first-row values, "lag(y) (initial)"
    means: tuple[str, ...]     # unit means of the other time-varying covariates

    def to_record(self) -> dict:
        return {"applied": True, "dynamic_terms": list(self.dynamic),
                "initial_outcome_columns": list(self.initial),
                "unit_mean_columns": list(self.means), "assumption": ASSUMPTION}


def dynamic_terms(terms, outcome_lags) -> list[str]:
    """The terms built from a lagged outcome (``lag(y)``, ``log(lag(y))``, ``lag(y):x``)."""
    return [t for t in terms if any(lab in str(t) for lab in outcome_lags)]


def initial_label(term: str) -> str:
    return f"{term} (initial)"


def columns(design):
    """The columns the initial-conditions model (Wooldridge 2005) adds to ``design``.

    ``design`` is a :class:`~bayespanel.data.design.Design` whose formula lags the outcome
    (``design.lags.outcome_lags``). Returns ``(M, labels, info)``: the added columns on
    the design's rows (described in the module docstring), their labels and an
    :class:`InitialConditions`; None when the design has no term built from a lagged
    outcome. :meth:`bayespanel.data.design.Design.with_initial_conditions` builds the design.
    """
    from ..core.errors import FormulaError

    report = getattr(design, "lags", None)
    if report is None or not report.outcome_lags:
        return None
    dyn = dynamic_terms(design.terms, report.outcome_lags)
    if not dyn:
        return None
    first = design.starts[design.unit_codes]            # each row's unit's first row
    cols, labels = [], []
    for t in dyn:
        cols.append(design.X[first, design.terms.index(t)])
        labels.append(initial_label(t))
    exog = [i for i, t in enumerate(design.terms)
            if design.varies_within[t] and t not in dyn]
    means_idx = design._with_between_part(exog) if exog else []
    means = design.unit_means()
    for i in means_idx:
        cols.append(means[design.unit_codes, i])
        labels.append(parse(design.terms[i]).with_part(UNIT_MEAN).label)
    clash = sorted(set(labels) & set(design.terms))
    if clash:
        raise FormulaError(f"a column of formula {design.spec.formula!r} is named "
                           f"{clash[0]!r}, the label of a column the initial-conditions "
                           "model adds; rename it")
    info = InitialConditions(tuple(dyn), tuple(labels[:len(dyn)]), tuple(labels[len(dyn):]))
    return np.column_stack(cols), labels, info


def transform_columns(design, kind, tv):
    """``(terms, tv, tb)`` for ``Design._transform`` on an initial-conditions design:
    the dynamic terms are kept as they are (not split, no unit mean), no unit mean is added
    (the means are columns already), and in the within-between kind the mean columns are
    the between parts of their covariates."""
    ic = design.initial
    terms = list(design.terms)
    if kind == "within":
        return terms, tv, tv
    if kind == "within_between":
        terms = [parse(t).column.with_part(BETWEEN) if t in ic.means else t for t in terms]
    tv = [i for i in tv if design.terms[i] not in ic.dynamic]
    return terms, tv, []


#: a lagged outcome with AR(1) errors (bayespanel.models, errors="ar1")
WITH_AR1 = (
    "errors='ar1' with a lagged outcome among the covariates: the first estimation error "
    "is correlated with the initial outcome through the error before it, which the model "
    "does not condition on; a lagged outcome and AR(1) errors both describe persistence, "
    "so prefer one of them unless you have checked the combination "
    "(docs/serial-correlation.md).")


def notes(design, model_names) -> list[str]:
    """Plain-words notes on a lagged outcome for the models of a run (console, report,
    results.json), empty when the formula does not lag the outcome."""
    from .. import kinds

    report = getattr(design, "lags", None)
    if report is None or not report.outcome_lags:
        return []
    lag = report.outcome_lags[0]
    out = []
    ic = getattr(design, "initial", None)
    if ic is None:
        out.append(
            f"Initial conditions are not handled (initial_conditions=False): the models "
            f"with random unit effects assume the unit effect independent of {lag} and of "
            "the first outcome, which a lagged outcome contradicts by construction; the "
            "coefficient of the lag is then biased upward.")
    else:
        out.append("Initial conditions: " + ASSUMPTION)
    T = float(np.mean(design.T)) if len(design.T) else float("nan")
    for name in model_names:
        kind = kinds.model(name)
        if kind.unit_effects == "fixed":
            out.append(
                f"{kind.title} with {lag} among the covariates: the within estimator of a "
                "lagged outcome's coefficient is biased downward in short panels (Nickell "
                f"1981, Econometrica 49(6)); to first order by about -(1 + phi)/(T - 1), "
                f"here T = {T:.1f} estimation occasions per unit on average.")
        elif kind.unit_effects == "none":
            out.append(
                f"{kind.title} with {lag} among the covariates: without unit effects, "
                "persistent differences between units stay in the error and load on the "
                "lagged outcome, whose coefficient is biased upward.")
    return out
