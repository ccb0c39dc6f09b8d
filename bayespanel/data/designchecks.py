"""The checks of a design: options and column types refused by name (:func:`check_flag`,
:func:`refuse_complex`, non-numeric columns, values that are not finite), term labels
(:func:`check_terms`), and the checks on the statistics of ``[X, y]`` that the in-memory
and out-of-core designs share (:func:`check_stats`: constant columns, exact collinearity,
magnitudes outside double precision, near collinearity by the condition number)."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd

from ..core import suffstats as _ss
from ..core.errors import DataHandlingWarning, FormulaError, PanelDataError, SpecificationError

__all__ = ["check_flag", "refuse_complex", "check_terms", "check_stats", "condition_number",
           "collinearity_warning", "EXACT_COLLINEAR_TOL", "MAGNITUDE_LIMITS",
           "COLLINEARITY_WARN"]


def _plain(v):
    return v.item() if isinstance(v, np.generic) else v


def check_flag(option: str, value) -> bool:
    """``value`` as a bool if it is one (Python or numpy); anything else, such as the
    text ``"no"`` (which is true in Python), is a :class:`SpecificationError`."""
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    raise SpecificationError(f"{option}={value!r} must be True or False")


def refuse_complex(column: str, dtype) -> None:
    """Refuse a column of complex numbers (converting it to real would drop a part)."""
    if pd.api.types.is_complex_dtype(dtype):
        raise PanelDataError(
            f"column {column!r} holds complex numbers (dtype {dtype}); the models need real "
            "numbers: use its real part, its modulus or two columns")


def check_terms(terms, formula: str) -> None:
    """Refuse a design whose term labels repeat or take a label the package makes.

    Column names are screened (:func:`bayespanel.data.formula.reserved_name`); this catches
    labels formulaic builds that equal a column's name (a column named ``log(x)`` beside
    the transform ``log(x)``), which would give two coefficients one name.
    """
    from .formula import reserved_name

    seen = set()
    for j, t in enumerate(terms):
        if t in seen:
            raise FormulaError(
                f"formula {formula!r} gives two terms the label {t!r} (a column of that "
                "name and a term formulaic builds); rename the column")
        seen.add(t)
        if reserved_name(t) is not None and not (t == "Intercept" and j == 0):
            raise FormulaError(
                f"formula {formula!r} makes a term labelled {t!r}, the label bayespanel "
                f"gives to {reserved_name(t)}; rename the column or the level behind it")


def _check_finite(values, what, frame, panel, idx):
    """Name the first row where a term or the outcome is not finite (a transform such as
    the log of a value that is not positive)."""
    bad = ~np.isfinite(values)
    if bad.any():
        r = int(np.flatnonzero(bad)[0])
        pos = r if idx is None else int(idx[r])
        raise PanelDataError(
            f"{what} is not finite at {panel.unit}={_plain(frame[panel.unit].iloc[pos])!r}, "
            f"{panel.time}={_plain(frame[panel.time].iloc[pos])!r}"
            " (a transform such as log of a non-positive value?)")


def _numeric(s) -> bool:
    return pd.api.types.is_numeric_dtype(s) and not pd.api.types.is_bool_dtype(s)


def _refuse_text(panel, c, outcome_columns):
    """The error for a column that is not numeric (named, with its first bad value)."""
    s = panel.sorted_column(c)
    sample = s.dropna().astype(str).head(3).tolist()
    text = s.dropna()
    bad = text[pd.to_numeric(text, errors="coerce").isna()]
    first = ""
    if not bad.empty:
        ids = panel.sorted_columns([panel.unit, panel.time])
        first = (f"; {_plain(bad.iloc[0])!r} at {panel.unit}="
                 f"{_plain(ids.at[bad.index[0], panel.unit])!r}, {panel.time}="
                 f"{_plain(ids.at[bad.index[0], panel.time])!r} is not a number")
    raise PanelDataError(
        f"column {c!r} is not numeric (dtype {s.dtype}, values like {sample}{first}); "
        + ("the outcome must be numeric" if c in outcome_columns else
           f"convert it to numbers, or write C({c}) to use it as categories")
    )


def _check_columns(X, y, terms, outcome, unit_codes, ranges):
    """Refuse a constant outcome, constant covariates and exactly collinear columns; warn
    about nearly collinear ones. ``ranges`` is ``(lo, hi)`` of the columns of ``[X, y]``
    (:func:`bayespanel.core.suffstats.column_range`). Returns the statistics of ``[X, y]``
    (computed in row slices) on which the collinearity checks are made, and the largest
    absolute value of each column of ``[X, y]``."""
    lo, hi = ranges
    if hi[-1] - lo[-1] == 0:
        raise PanelDataError(
            f"the outcome {outcome!r} is constant ({float(y[0])!r}) on every row used")
    for j, t in enumerate(terms):
        if t != "Intercept" and hi[j] - lo[j] == 0:
            raise PanelDataError(
                f"covariate {t!r} is constant ({float(X[0, j])!r}) on every row used; it cannot be "
                "told apart from the intercept"
            )
    maxabs = np.maximum(np.abs(hi), np.abs(lo))
    _check_magnitudes(maxabs, terms, outcome)
    stats = _ss.compute_chunked(X, y, unit_codes, names=list(terms) + [outcome])
    check_stats(stats, terms, outcome, maxabs, stacklevel=6)
    return stats, maxabs


def check_stats(stats, terms, outcome, maxabs, stacklevel=5):
    """The checks of a design on the statistics of ``[X, y]`` alone: constant outcome or
    covariate, exact collinearity (refused, naming the terms) and near collinearity
    (:func:`collinearity_warning`). One rule for the in-memory and out-of-core designs.

    Collinearity is judged on the cross-products of the covariates, centred about their
    means when there is an intercept (so the intercept is projected out exactly and a
    column far from zero, such as a calendar year, is not taken for a multiple of it),
    raw otherwise; scaled to unit diagonal, a column is refused when its squared residual
    on the columns before it is below :data:`EXACT_COLLINEAR_TOL` of its size
    (:func:`bayespanel.core.linalg.independent_columns`).
    """
    from ..core.linalg import independent_columns

    if stats.total[-1, -1] == 0:
        raise PanelDataError(f"the outcome {outcome!r} is constant "
                             f"({float(stats.mean[-1])!r}) on every row used")
    for j, t in enumerate(terms):
        if t != "Intercept" and stats.total[j, j] <= stats.n * (1e-14 * maxabs[j]) ** 2:
            raise PanelDataError(
                f"covariate {t!r} is constant ({float(stats.mean[j])!r}) on every row used; it "
                "cannot be told apart from the intercept")
    k = len(terms)
    if k == 0:
        return
    if stats.n < k:
        raise PanelDataError(f"{stats.n} rows cannot identify {k} terms")
    raw = stats.total[:k, :k] + stats.n * np.outer(stats.mean[:k], stats.mean[:k])
    cols = [j for j, t in enumerate(terms) if t != "Intercept"]
    C = stats.total[np.ix_(cols, cols)] if len(cols) < k else raw
    if len(cols):
        scale = np.sqrt(np.maximum(np.diag(C), np.finfo(float).tiny))
        keep = set(np.asarray(cols)[independent_columns(C / np.outer(scale, scale),
                                                        tol=EXACT_COLLINEAR_TOL)].tolist())
        if len(keep) < len(cols):
            bad = [terms[j] for j in cols if j not in keep]
            raise PanelDataError(
                f"covariates are exactly collinear: {', '.join(map(repr, bad))} can be written "
                "as a combination of the other terms; drop or recode them")
    collinearity_warning(stats.total[:k, :k] if len(cols) < k else raw, terms,
                         cross_products=True, stacklevel=stacklevel)


#: squared residual, relative to the column's size, below which a column of a design
#: counts as an exact combination of the columns before it (cross-products in double
#: precision resolve about 1e-15 of this scale; near collinearity above it is warned
#: about by the condition number instead)
EXACT_COLLINEAR_TOL = 1e-12


#: magnitudes outside this range are refused: squares and cross-products of such values
#: overflow or lose precision in double precision (about 1e308 .. 1e-308)
MAGNITUDE_LIMITS = (1e-100, 1e100)


def _check_magnitudes(maxabs, terms, outcome):
    """Refuse columns whose values are too large or too small for double precision.

    ``maxabs`` is the largest absolute value of each column of ``[X, y]``. The models
    standardise every column internally, so any scale inside :data:`MAGNITUDE_LIMITS`
    gives the same answer after back-transformation; beyond it the one-pass
    cross-products overflow (or vanish), so the column must be rescaled.
    """
    lo, hi = MAGNITUDE_LIMITS
    for j, name in [(-1, outcome)] + list(enumerate(terms)):
        size = float(maxabs[j])
        if size > hi or 0 < size < lo:
            what = "the outcome" if j < 0 else "term"
            fault = "overflow" if size > hi else "underflow"
            raise PanelDataError(
                f"{what} {name!r} has values of magnitude {size:.3g}, outside {lo:g}..{hi:g}: "
                f"its squares and cross-products {fault} in double precision; rescale the "
                "column (e.g. change its units)"
            )


#: warn when the condition number of the centred, standardised covariates exceeds this;
#: common practice after Belsley, Kuh and Welsch (1980), for whom condition indices above
#: 30 signal moderate to strong dependencies among the columns
COLLINEARITY_WARN = 30.0


def condition_number(C) -> tuple[float, np.ndarray]:
    """Condition number of a design from its cross-product matrix ``C`` (k x k).

    ``C`` is scaled to unit diagonal (a correlation matrix when the columns are centred)
    and the result is ``sqrt(lambda_max / lambda_min)``, the condition number of the
    column-scaled design itself. Also returns the eigenvector of ``lambda_min``: its large
    entries are the columns that take part in the near dependency.
    """
    C = np.asarray(C, dtype=float)
    d = np.sqrt(np.maximum(np.diag(C), np.finfo(float).tiny))
    w, v = np.linalg.eigh(C / np.outer(d, d))
    return float(np.sqrt(w[-1] / max(w[0], np.finfo(float).tiny))), v[:, 0]


def collinearity_warning(X_or_C, terms, *, cross_products=False, stacklevel=4) -> float | None:
    """Warn (``DataHandlingWarning``) when the covariates are nearly collinear.

    The condition number is that of the covariates after centring and scaling each to
    unit variance, the scale on which the models work internally (the intercept is
    left out, so a covariate far from zero such as a calendar year does not count as
    collinear with it); without an intercept the columns are only scaled. Pass the rows
    ``X`` or, with ``cross_products=True``, the cross-products of all ``terms`` (centred
    about the means when ``terms`` has an intercept, raw otherwise).
    Returns the condition number (None with fewer than two covariates).
    """
    keep = [j for j, t in enumerate(terms) if t != "Intercept"]
    if len(keep) < 2:
        return None
    if cross_products:
        C = np.asarray(X_or_C, dtype=float)[np.ix_(keep, keep)]
    else:
        Z = np.asarray(X_or_C, dtype=float)[:, keep]
        if len(keep) < len(terms):
            Z = Z - Z.mean(axis=0)
        Z = Z / np.maximum(np.abs(Z).max(axis=0), np.finfo(float).tiny)
        C = Z.T @ Z
    cond, vec = condition_number(C)
    if cond > COLLINEARITY_WARN:
        order = np.argsort(-np.abs(vec))
        involved = [terms[keep[i]] for i in order if abs(vec[i]) > 0.3][:4]
        warnings.warn(
            f"the design is nearly collinear (condition number {cond:.3g} of the centred, "
            f"standardised covariates, above {COLLINEARITY_WARN:g}); terms involved: "
            f"{', '.join(map(repr, involved))}; their separate estimates will be unstable",
            DataHandlingWarning, stacklevel=stacklevel,
        )
    return cond
