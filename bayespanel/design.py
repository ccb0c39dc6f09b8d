"""Design: from a formula to the matrices every estimator uses.

The design is built on the *estimation sample*: rows with a missing value in any variable
the formula uses are dropped first (listwise deletion, reported), and unit means are
taken over the rows that remain. Within (unit-demeaned), between (unit-mean) and original
columns are all derived from that one sample so that every model, Bayesian or reference,
sees exactly the same rows.
"""

from __future__ import annotations

import re
import warnings
from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd

from .errors import DataHandlingWarning, EstimationError, FormulaError, PanelDataError, choices_error
from .formula import safe_context, screen

__all__ = ["Design", "DesignSpec", "KINDS", "group_means"]

KINDS = ("pooled", "random", "within", "between", "mundlak", "within_between")
_VARY_TOL = 1e-10


@dataclass(frozen=True)
class DesignSpec:
    """How a design was built (not the data it was built on); saved with every result."""

    formula: str
    unit: str
    time: str
    occasion_effects: bool = False

    def to_dict(self) -> dict:
        return asdict(self)


def _plain(v):
    return v.item() if isinstance(v, np.generic) else v


def group_means(M: np.ndarray, starts: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """Means of the rows of ``M`` over contiguous groups starting at ``starts``."""
    M = np.asarray(M, dtype=float)
    if M.ndim == 1:
        return np.add.reduceat(M, starts) / counts
    return np.add.reduceat(M, starts, axis=0) / counts[:, None]


def _label_within(t: str) -> str:
    return f"{t} (within)"


def _label_between(t: str) -> str:
    return f"{t} (between)"


def _label_mean(t: str) -> str:
    return f"{t} (unit mean)"


class Design:
    """Outcome, covariates and unit structure of one formula on one panel.

    Build with :meth:`Panel.design` or :meth:`Design.from_panel`. See DEVELOPERS.md for the
    fields. All arrays are float64 and rows are sorted by unit, then occasion.
    """

    def __init__(self, *, y, X, terms, unit_codes, units, time, rows, outcome, spec,
                 n_dropped=0, dropped_by_column=None, n_input_rows=None):
        self.y = np.ascontiguousarray(y, dtype=float)
        self.X = np.ascontiguousarray(X, dtype=float)
        self.terms = list(terms)
        self.unit_codes = np.asarray(unit_codes, dtype=np.int64)
        self.units = pd.Index(units)
        self.time = np.asarray(time)
        self.rows = pd.Index(rows)
        self.outcome = outcome
        self.spec = spec
        self.n_dropped = int(n_dropped)
        self.dropped_by_column = dict(dropped_by_column or {})
        self.n_input_rows = int(n_input_rows if n_input_rows is not None else len(self.y))
        if np.any(np.diff(self.unit_codes) < 0):
            raise ValueError("Design rows must be sorted by unit")
        self.T = np.bincount(self.unit_codes, minlength=len(self.units)).astype(np.int64)
        if np.any(self.T == 0):
            raise ValueError("every unit in a Design needs at least one row")
        self.starts = np.concatenate([[0], np.cumsum(self.T)[:-1]]).astype(np.int64)
        self._means = None
        within_sd = np.sqrt(((self.X - self.between_rows()) ** 2).mean(axis=0))
        scale = np.maximum(np.abs(self.X).max(axis=0), 1.0)
        self.varies_within = pd.Series(within_sd > _VARY_TOL * scale, index=self.terms)

    # ------------------------------------------------------------------ sizes
    @property
    def n(self) -> int:
        return int(len(self.y))

    @property
    def n_units(self) -> int:
        return int(len(self.units))

    @property
    def k(self) -> int:
        return int(self.X.shape[1])

    @property
    def has_intercept(self) -> bool:
        return "Intercept" in self.terms

    @property
    def time_varying(self) -> list[str]:
        return [t for t in self.terms if self.varies_within[t]]

    @property
    def time_constant(self) -> list[str]:
        return [t for t in self.terms if not self.varies_within[t] and t != "Intercept"]

    def __repr__(self) -> str:
        return (f"Design({self.outcome!r} ~ {len(self.terms)} terms, {self.n} rows, "
                f"{self.n_units} units, {self.n_dropped} rows dropped)")

    # ------------------------------------------------------------------ parts
    def unit_means(self) -> np.ndarray:
        """Unit means of the columns of X (N x k), over the estimation sample."""
        if self._means is None:
            self._means = group_means(self.X, self.starts, self.T)
        return self._means

    def between_rows(self) -> np.ndarray:
        """The unit mean of each column on every row (n x k)."""
        return self.unit_means()[self.unit_codes]

    def within(self) -> np.ndarray:
        """X minus its unit means (n x k)."""
        return self.X - self.between_rows()

    def y_unit_means(self) -> np.ndarray:
        return group_means(self.y, self.starts, self.T)

    def y_within(self) -> np.ndarray:
        return self.y - self.y_unit_means()[self.unit_codes]

    def matrices(self, kind: str):
        """The covariate matrix and its labels for one kind of model.

        Parameters
        ----------
        kind : {"pooled", "random", "within", "between", "mundlak", "within_between"}

        Returns
        -------
        (M, labels) : (ndarray, list of str)
            ``M`` has one row per estimation row, except for ``"between"`` (one per unit).
        """
        if kind not in KINDS:
            raise choices_error("kind", kind, KINDS)
        tv = [i for i, t in enumerate(self.terms) if self.varies_within[t]]
        if kind in ("pooled", "random"):
            return self.X.copy(), list(self.terms)
        if kind == "between":
            return self.unit_means().copy(), list(self.terms)
        if kind in ("within", "mundlak", "within_between") and not tv:
            raise EstimationError(
                f"no covariate in {self.spec.formula!r} varies within units, so a "
                f"{kind.replace('_', '-')} model has no within part to estimate"
            )
        if kind == "within":
            return self.within()[:, tv], [self.terms[i] for i in tv]
        means = self.between_rows()
        tb = self._with_between_part(tv)
        if kind == "mundlak":
            M = np.column_stack([self.X, means[:, tb]])
            return M, list(self.terms) + [_label_mean(self.terms[i]) for i in tb]
        # within_between: intercept, within and between parts, time-constant columns
        cols, labels = [], []
        W = self.within()
        for i, t in enumerate(self.terms):
            if t == "Intercept":
                cols.append(self.X[:, i]); labels.append(t)
        for i in tv:
            cols.append(W[:, i]); labels.append(_label_within(self.terms[i]))
        for i in tb:
            cols.append(means[:, i]); labels.append(_label_between(self.terms[i]))
        for i, t in enumerate(self.terms):
            if t != "Intercept" and i not in tv:
                cols.append(self.X[:, i]); labels.append(t)
        return np.column_stack(cols), labels

    def _with_between_part(self, tv):
        """Time-varying columns whose unit means enter the mundlak and within_between kinds.

        With an intercept, a column whose unit means are all equal (an occasion indicator
        in a balanced panel, a trend observed on the same occasions everywhere) has no
        between part to estimate: its unit mean is a multiple of the intercept, so it
        enters through its within part only. In unbalanced panels the unit means of the
        occasion indicators vary and are kept, which makes the correlated random-effects
        within estimates equal the two-way fixed-effects ones (Wooldridge 2019, Journal
        of Econometrics 211, 137-150, doi:10.1016/j.jeconom.2018.12.010); those of them
        that are linear combinations of the other unit-level columns (few distinct
        patterns of missing occasions) are left out too, which leaves the within
        estimates unchanged.
        """
        if not self.has_intercept:
            return list(tv)
        um = self.unit_means()
        keep = []
        for i in tv:
            scale = max(float(np.abs(um[:, i]).max()), 1.0)
            if np.ptp(um[:, i]) > _VARY_TOL * scale:
                keep.append(i)
        occ = [i for i in keep if self.terms[i].startswith("occasion[")]
        if not occ:
            return keep
        base = [i for i in range(self.k) if i not in occ and (i not in tv or i in keep)]
        cols = [um[:, i] for i in base]

        def rank(columns):
            A = np.column_stack(columns)
            A = A - A.mean(axis=0) * (np.ptp(A, axis=0) > 0)
            A = A / np.maximum(np.sqrt((A ** 2).mean(axis=0)), 1e-300)
            return int(np.linalg.matrix_rank(A, tol=1e-8 * max(A.shape)))

        r = rank(cols)
        for i in occ:
            if rank(cols + [um[:, i]]) > r:
                cols.append(um[:, i])
                r += 1
            else:
                keep.remove(i)
        return keep

    def subset_units(self, keep) -> "Design":
        """A design on a subset of units (boolean mask or codes), e.g. for refits."""
        keep = np.asarray(keep)
        if keep.dtype == bool:
            keep_codes = np.flatnonzero(keep)
        else:
            keep_codes = np.unique(keep)
        rowmask = np.isin(self.unit_codes, keep_codes)
        return self.subset_rows(rowmask)

    def subset_rows(self, rowmask) -> "Design":
        """A design on a subset of rows; unit means are recomputed on those rows."""
        rowmask = np.asarray(rowmask, dtype=bool)
        codes = self.unit_codes[rowmask]
        present, new_codes = np.unique(codes, return_inverse=True)
        return Design(y=self.y[rowmask], X=self.X[rowmask], terms=self.terms,
                      unit_codes=new_codes, units=self.units[present], time=self.time[rowmask],
                      rows=self.rows[rowmask], outcome=self.outcome, spec=self.spec)

    # ------------------------------------------------------------------ builders
    @classmethod
    def from_panel(cls, panel, formula: str, occasion_effects: bool = False) -> "Design":
        """Screen the formula, drop incomplete rows (reported), and build the matrices."""
        from formulaic import Formula

        data = panel.data
        screened = screen(formula, data.columns)
        used = [c for c in screened.columns if c not in (panel.unit, panel.time)]
        if screened.outcome in (panel.unit, panel.time):
            raise FormulaError(
                f"the outcome {screened.outcome!r} is the panel's unit or time column")
        if panel.unit in screened.columns:
            raise FormulaError(
                f"column {panel.unit!r} identifies the units; unit effects come from the model "
                "(FixedEffects, RandomIntercept), not from the formula")
        if panel.time in screened.columns:
            used.append(panel.time)  # a trend or C(time) is allowed
        for c in used:
            s = data[c]
            if pd.api.types.is_numeric_dtype(s) or pd.api.types.is_bool_dtype(s):
                continue
            in_c = re.search(r"C\(\s*`?" + re.escape(c) + r"`?\s*[,)]", screened.rhs)
            if c == screened.outcome or not in_c:
                sample = s.dropna().astype(str).head(3).tolist()
                text = s.dropna()
                bad = text[pd.to_numeric(text, errors="coerce").isna()]
                first = "" if bad.empty else (
                    f"; {_plain(bad.iloc[0])!r} at {panel.unit}="
                    f"{_plain(data.at[bad.index[0], panel.unit])!r}, {panel.time}="
                    f"{_plain(data.at[bad.index[0], panel.time])!r} is not a number")
                raise PanelDataError(
                    f"column {c!r} is not numeric (dtype {s.dtype}, values like {sample}{first}); "
                    + ("the outcome must be numeric" if c == screened.outcome else
                       f"convert it to numbers, or write C({c}) to use it as categories")
                )
        used = list(dict.fromkeys(used))
        sub = data[list(dict.fromkeys([panel.unit, panel.time] + used))]
        miss = sub[used].isna()
        dropped_by_column = {c: int(miss[c].sum()) for c in used if miss[c].any()}
        keep = ~miss.any(axis=1).to_numpy()
        n_dropped = int((~keep).sum())
        for c in used:
            if miss[c].all():
                raise PanelDataError(f"column {c!r} is missing on every row")
        if n_dropped:
            detail = ", ".join(f"{c}: {k}" for c, k in dropped_by_column.items())
            warnings.warn(
                f"dropped {n_dropped} of {len(sub)} rows with missing values ({detail}); "
                "unit means are taken over the remaining rows",
                DataHandlingWarning, stacklevel=3,
            )
        sub = sub.loc[keep]
        if len(sub) == 0:
            raise PanelDataError("no complete rows remain after dropping missing values")
        units_codes, units = pd.factorize(sub[panel.unit], sort=True)
        if len(units) < 2:
            raise PanelDataError(
                f"only {len(units)} unit of {panel.unit!r} has complete rows; at least 2 are needed"
            )
        try:
            mm = Formula(screened.rhs).get_model_matrix(
                sub.reset_index(drop=True), context=safe_context(), ensure_full_rank=True,
                na_action="ignore",  # incomplete rows are gone; NaN from a transform is named below
            )
        except FormulaError:
            raise
        except Exception as exc:
            raise FormulaError(f"cannot build the design for {formula!r}: {exc}") from None
        X = np.asarray(mm, dtype=float)
        terms = [str(c) for c in mm.columns]
        if occasion_effects:
            occ = np.sort(sub[panel.time].unique())
            tv = sub[panel.time].to_numpy()
            dummies = [(tv == o).astype(float) for o in occ[1:]]
            if dummies:
                X = np.column_stack([X] + dummies)
                terms += [f"occasion[{o}]" for o in occ[1:]]
        y = sub[screened.outcome].to_numpy(dtype=float)
        if not np.all(np.isfinite(X)):
            bad = np.flatnonzero(~np.isfinite(X).all(axis=0))[0]
            r = int(np.flatnonzero(~np.isfinite(X[:, bad]))[0])
            raise PanelDataError(
                f"term {terms[bad]!r} is not finite at {panel.unit}={sub[panel.unit].iloc[r]!r}, "
                f"{panel.time}={sub[panel.time].iloc[r]!r} (a transform such as log of a "
                "non-positive value?)"
            )
        _check_columns(X, y, terms, screened.outcome)
        spec = DesignSpec(formula=formula, unit=panel.unit, time=panel.time,
                          occasion_effects=bool(occasion_effects))
        return cls(y=y, X=X, terms=terms, unit_codes=units_codes, units=units,
                   time=sub[panel.time].to_numpy(), rows=sub.index, outcome=screened.outcome,
                   spec=spec, n_dropped=n_dropped, dropped_by_column=dropped_by_column,
                   n_input_rows=len(data))


def _check_columns(X, y, terms, outcome):
    """Refuse a constant outcome, constant covariates and exactly collinear columns."""
    from scipy.linalg import qr

    if np.ptp(y) == 0:
        raise PanelDataError(
            f"the outcome {outcome!r} is constant ({float(y[0])!r}) on every row used")
    for j, t in enumerate(terms):
        if t != "Intercept" and np.ptp(X[:, j]) == 0:
            raise PanelDataError(
                f"covariate {t!r} is constant ({float(X[0, j])!r}) on every row used; it cannot be "
                "told apart from the intercept"
            )
    _check_magnitudes(X, y, terms, outcome)
    if X.shape[1] == 0:
        return
    # scale by the largest absolute value first, so squares neither overflow nor underflow
    big = np.abs(X).max(axis=0)
    big[big == 0] = 1.0
    scale = big * np.sqrt(((X / big) ** 2).mean(axis=0))
    Xs = X / scale
    if X.shape[0] < X.shape[1]:
        raise PanelDataError(f"{X.shape[0]} rows cannot identify {X.shape[1]} terms")
    _, R, piv = qr(Xs, mode="economic", pivoting=True)
    d = np.abs(np.diag(R))
    tol = d[0] * max(Xs.shape) * np.finfo(float).eps * 1e3
    rank = int((d > tol).sum())
    if rank < X.shape[1]:
        bad = [terms[i] for i in piv[rank:]]
        raise PanelDataError(
            f"covariates are exactly collinear: {', '.join(map(repr, bad))} can be written as a "
            "combination of the other terms; drop or recode them"
        )
    collinearity_warning(X, terms, stacklevel=5)


#: magnitudes outside this range are refused: squares and cross-products of such values
#: overflow or lose precision in double precision (about 1e308 .. 1e-308)
MAGNITUDE_LIMITS = (1e-100, 1e100)


def _check_magnitudes(X, y, terms, outcome):
    """Refuse columns whose values are too large or too small for double precision.

    The models standardise every column internally, so any scale inside
    :data:`MAGNITUDE_LIMITS` gives the same answer after back-transformation; beyond it
    the one-pass cross-products overflow (or vanish), so the column must be rescaled.
    """
    lo, hi = MAGNITUDE_LIMITS
    for name, col in [(outcome, y)] + [(t, X[:, j]) for j, t in enumerate(terms)]:
        size = float(np.abs(col).max()) if len(col) else 0.0
        if size > hi or 0 < size < lo:
            what = "the outcome" if col is y else "term"
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
