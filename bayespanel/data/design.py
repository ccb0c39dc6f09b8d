"""Design: from a formula to the matrices every estimator uses.

The design is built on the *estimation sample*: rows with a missing value in any variable
the formula uses are dropped first (listwise deletion, reported), and unit means are
taken over the rows that remain. Within (unit-demeaned), between (unit-mean) and original
columns are all derived from that one sample so that every model, Bayesian or reference,
sees exactly the same rows. What a design refuses or warns about (column types, term
labels, constant and collinear columns, magnitudes) is checked by
:mod:`bayespanel.data.designchecks`, whose public names are importable here as before.
"""

from __future__ import annotations

import re
import warnings
from dataclasses import asdict, dataclass

import numpy as np
import pandas as pd

from ..core import suffstats as _ss
from ..core.errors import (DataHandlingWarning, EstimationError, FormulaError, PanelDataError,
                           choices_error)
from .designchecks import (COLLINEARITY_WARN, EXACT_COLLINEAR_TOL,  # noqa: F401 (public here)
                           MAGNITUDE_LIMITS, _check_columns, _check_finite, _numeric, _plain,
                           _refuse_text, check_flag, check_stats, check_terms,
                           collinearity_warning, condition_number, refuse_complex)
from .formula import dependency_message, outcome_values, safe_context, screen, sum_columns
from .sources import InMemoryRows
from ..kinds import COLUMNS, builder as builder_of
from ..core.terms import BETWEEN, UNIT_MEAN, WITHIN, Term, labels as term_labels, occasion, parse

__all__ = ["Design", "DesignSpec", "KINDS", "group_means", "kind_transform", "check_stats",
           "check_terms", "check_flag", "refuse_complex", "occasion_label"]

#: the column maps of matrices(kind), as the registry of model kinds lists them
KINDS = COLUMNS
_VARY_TOL = 1e-10


@dataclass(frozen=True)
class DesignSpec:
    """How a design was built (not the data it was built on); saved with every result."""

    formula: str
    unit: str
    time: str
    occasion_effects: bool = False
    #: whether the initial conditions of a lagged outcome are modelled (bayespanel.data.initial);
    #: None when the formula does not lag the outcome (and then left out of to_dict)
    initial_conditions: bool | None = None

    def to_dict(self) -> dict:
        d = asdict(self)
        if d["initial_conditions"] is None:
            del d["initial_conditions"]
        return d


def occasion_label(o) -> str:
    """The label of an occasion's indicator: ``occasion[2003]``; dates without a time of
    day as ``occasion[2003-01-13]`` (numpy would write ``2003-01-13T00:00:00.000000``)."""
    if isinstance(o, (np.datetime64, pd.Timestamp)) or hasattr(o, "isoformat"):
        t = pd.Timestamp(o)
        o = t.date().isoformat() if t == t.normalize() else t.isoformat()
    return occasion(_plain(o)).label


def group_means(M: np.ndarray, starts: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """Means of the rows of ``M`` over contiguous groups starting at ``starts``."""
    M = np.asarray(M, dtype=float)
    if M.ndim == 1:
        return np.add.reduceat(M, starts) / counts
    return np.add.reduceat(M, starts, axis=0) / counts[:, None]


def kind_transform(terms, tv, tb, kind):
    """The columns of a design kind as linear maps of a row and of its unit mean.

    With ``z = [X, y]`` (``p = k + 1``), every column of ``"within"``, ``"mundlak"`` and
    ``"within_between"`` is ``a' z_it + b' zbar_i``; returns ``(A, B, terms)`` with one
    row of ``A`` and ``B`` and one :class:`~bayespanel.core.terms.Term` per column, and a last
    row that keeps ``y``. ``terms`` are the labels (or terms) of the columns of ``X``;
    ``tv`` the indices of the time-varying ones, ``tb`` those whose unit means enter
    (``"mundlak"``, ``"within_between"``; see ``Design._with_between_part``). Labels as in
    DEVELOPERS.md: ``x (within)``, ``x (between)``, ``x (unit mean)``.
    """
    k = len(terms)
    cols = [parse(t) for t in terms]
    eye = np.eye(k + 1)
    zero = np.zeros(k + 1)
    if kind == "within":
        rows = [(eye[i], -eye[i], cols[i]) for i in tv]
    elif kind == "mundlak":
        rows = ([(eye[j], zero, cols[j]) for j in range(k)]
                + [(zero, eye[i], cols[i].with_part(UNIT_MEAN)) for i in tb])
    elif kind == "within_between":
        rows = [(eye[i], zero, t) for i, t in enumerate(cols) if t == Term("Intercept")]
        rows += [(eye[i], -eye[i], cols[i].with_part(WITHIN)) for i in tv]
        rows += [(zero, eye[i], cols[i].with_part(BETWEEN)) for i in tb]
        rows += [(eye[i], zero, t) for i, t in enumerate(cols)
                 if t != Term("Intercept") and i not in tv]
    else:
        raise ValueError(f"kind {kind!r} uses the columns of X as they are")
    A = np.vstack([r[0] for r in rows] + [eye[k]])
    B = np.vstack([r[1] for r in rows] + [zero])
    return A, B, [r[2] for r in rows]


class Design:
    """Outcome, covariates and unit structure of one formula on one panel.

    Build with :meth:`Panel.design` or :meth:`Design.from_panel` (rows in memory), or
    ``DaskPanel.design`` (a partitioned source). See DEVELOPERS.md for the fields.

    A design works from the sufficient statistics of ``[X, y]`` and asks its ``source``
    (:mod:`bayespanel.data.sources`) for what needs the rows: a source runs a block function
    over its rows and merges the pieces (:meth:`run_rows`). ``X``, ``y``, ``unit_codes``,
    ``time`` and ``rows`` (float64 arrays, rows sorted by unit, then occasion) are those of
    a source that holds its rows (:attr:`has_rows`).

    Parameters
    ----------
    source : InMemoryRows or DaskSource
        Where the rows are.
    terms : list of str
        Labels of the columns of ``X``.
    units : index
        The unit labels, in code order.
    outcome : str
    spec : DesignSpec
    stats : SuffStats, optional
        The statistics of ``[X, y]`` (default: from the source's rows).
    maxabs : array, optional
        Largest absolute value of each column of ``[X, y]`` (default: from the rows).
    n_dropped, dropped_by_column, n_input_rows, lags
        What listwise deletion and lags left out (reported).
    """

    def __init__(self, source, *, terms, units, outcome, spec, stats=None, maxabs=None,
                 n_dropped=0, dropped_by_column=None, n_input_rows=None, lags=None):
        self.source = source
        self.terms = list(terms)
        self.units = pd.Index(units)
        self.outcome = outcome
        self.spec = spec
        self.n_dropped = int(n_dropped)
        self.dropped_by_column = dict(dropped_by_column or {})
        #: the lags of the formula and the rows they left out (bayespanel.data.lags.LagReport),
        #: None when the formula has no lag(...)
        self.lags = lags
        #: the initial-conditions columns (bayespanel.data.initial.InitialConditions), or None
        self.initial = None
        if stats is None:
            stats = source.statistics(self.terms + [self.outcome])
        self._stats = stats
        self.n_input_rows = int(n_input_rows if n_input_rows is not None else stats.n)
        self.T = np.asarray(stats.unit_count, dtype=np.int64).copy()
        if len(self.T) != len(self.units) or np.any(self.T == 0):
            raise ValueError("every unit in a Design needs at least one row")
        self.starts = np.concatenate([[0], np.cumsum(self.T)[:-1]]).astype(np.int64)
        self._means = None
        self._cache = {}
        # within variation from the within block of the statistics of [X, y]
        if maxabs is None:
            maxabs = source.maxabs()
        within_sd = np.sqrt(np.maximum(np.diag(stats.within)[:-1], 0.0) / max(self.n, 1))
        scale = np.maximum(np.asarray(maxabs)[:len(self.terms)], 1.0)
        self.varies_within = pd.Series(within_sd > _VARY_TOL * scale, index=self.terms)

    # ------------------------------------------------------------------ rows
    @property
    def has_rows(self) -> bool:
        """Whether the estimation rows are at hand (``X``, ``y``, ``unit_codes``, ``rows``,
        ``time``); a design over a partitioned source holds only statistics, and callers
        ask this rather than the design's type or source."""
        return bool(self.source.has_rows)

    def _rows(self, name):
        if not self.source.has_rows:
            raise AttributeError(
                f"this design has no {name!r}: its rows stay in their source "
                f"({type(self.source).__name__}); ask design.has_rows, and use its statistics "
                "(suffstats) or design.run_rows")
        return getattr(self.source, name)

    y = property(lambda self: self._rows("y"), doc="The outcome on the estimation rows.")
    X = property(lambda self: self._rows("X"), doc="The covariates (n x k).")
    unit_codes = property(lambda self: self._rows("unit_codes"),
                          doc="The unit code (0..N-1) of each row.")
    time = property(lambda self: self._rows("time"), doc="The occasion of each row.")
    rows = property(lambda self: self._rows("rows"), doc="The panel's labels of the rows.")

    def run_rows(self, block, merge, shared=None):
        """Run ``block(rows, shared)`` over the estimation rows, each block a
        :class:`~bayespanel.data.sources.RowBlock` (unit keys, occasions, ``Z = [X, y]`` in the
        design's columns), and merge the pieces with ``merge`` (a list of pieces -> one
        piece): one block in memory, one per partition on a partitioned source."""
        return self.source.run(block, merge, shared)

    def row_times(self, units, ranks):
        """The occasions of the rows ``ranks`` (0 = first) of units ``units`` (codes), or
        ``None`` when the source cannot tell without reading the rows."""
        return self.source.row_times(units, ranks)

    # ------------------------------------------------------------------ sizes
    @property
    def n(self) -> int:
        return int(self._stats.n)

    @property
    def n_units(self) -> int:
        return int(len(self.units))

    @property
    def k(self) -> int:
        return len(self.terms)

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
        """Unit means of the columns of X (N x k), over the estimation sample (from the
        rows when they are at hand, else from the statistics)."""
        if self._means is None:
            self._means = (group_means(self.X, self.starts, self.T) if self.has_rows
                           else self._stats.unit_mean[:, :-1].copy())
        return self._means

    def between_rows(self) -> np.ndarray:
        """The unit mean of each column on every row (n x k)."""
        return self.unit_means()[self.unit_codes]

    def within(self) -> np.ndarray:
        """X minus its unit means (n x k)."""
        return self.X - self.between_rows()

    def unit_labels(self) -> tuple:
        """The unit labels as a tuple (made once; the models built on this design share
        it as their ``unit`` coordinate)."""
        if "unit_labels" not in self._cache:
            self._cache["unit_labels"] = tuple(self.units)
        return self._cache["unit_labels"]

    def unit_cross_products(self, kind: str = "random") -> np.ndarray:
        """Per-unit within cross-products of ``[M, y]`` (N x p x p), in unit order, with
        ``M`` the columns of ``kind`` (from those of ``[X, y]``, which the source gives:
        on a partitioned source collected in the design pass with ``cluster=True``, else
        by one more pass now)."""
        ucp = self.source.unit_cross_products()
        if kind in ("pooled", "random", "within", "between"):
            return ucp
        from ..core.derived import augment_unit_cp

        A, _, _ = self._transform(kind)
        return augment_unit_cp(ucp, A)

    def matrices(self, kind: str):
        """The covariate matrix and its labels for one kind of model.

        Parameters
        ----------
        kind : {"pooled", "random", "within", "between", "mundlak", "within_between"}

        Returns
        -------
        (M, labels) : (ndarray, list of str)
            ``M`` has one row per estimation row, except for ``"between"`` (one per unit).
            A new array on every call (``n x columns`` float64): code that needs only
            statistics uses :meth:`suffstats` instead.
        """
        if kind not in KINDS:
            raise choices_error("kind", kind, KINDS)
        if not self.has_rows:
            raise EstimationError(
                "this design keeps no rows in memory (a partitioned source such as a Dask "
                "panel), so it has no design matrices; use design.suffstats(kind) for the "
                "statistics, bp.reference.fit_design(design, ...) or "
                "bp.reference.<estimator>(dask_panel, formula) for reference fits, and "
                "design.build(bp.models.RandomIntercept) for a Bayesian model")
        if kind in ("pooled", "random"):
            return self.X.copy(), list(self.terms)
        if kind == "between":
            return self.unit_means().copy(), list(self.terms)
        A, B, labels = self._transform(kind)
        M = np.empty((self.n, len(labels)))
        means = self.unit_means()
        for j in range(len(labels)):
            col = np.zeros(self.n)
            for i in np.flatnonzero(A[j, :self.k]):
                col = col + A[j, i] * self.X[:, i]
            for i in np.flatnonzero(B[j, :self.k]):
                col = col + B[j, i] * means[self.unit_codes, i]
            M[:, j] = col
        return M, labels

    def labels(self, kind: str) -> list[str]:
        """Column labels of ``kind``, as ``matrices(kind)[1]``, without building the rows."""
        return term_labels(self.term_parts(kind))

    def term_parts(self, kind: str) -> list[Term]:
        """The columns of ``kind`` as :class:`~bayespanel.core.terms.Term` (covariate, part),
        in the order of :meth:`labels`."""
        if kind not in KINDS:
            raise choices_error("kind", kind, KINDS)
        if kind in ("pooled", "random", "between"):
            return [parse(t) for t in self.terms]
        return self._transform(kind, structured=True)[2]

    def _transform(self, kind, structured=False):
        """``(A, B, labels)``: the rows of ``kind`` are ``A z_it + B zbar_i`` with
        ``z = [X, y]`` (the last row of ``A`` and ``B`` keeps ``y``); with ``structured``
        the columns as terms instead of labels."""
        tv = [i for i, t in enumerate(self.terms) if self.varies_within[t]]
        if not tv:
            raise EstimationError(
                f"no covariate in {self.spec.formula!r} varies within units, so a "
                f"{kind.replace('_', '-')} model has no within part to estimate"
            )
        if self.initial is not None:  # the lagged outcome kept whole (bayespanel.data.initial)
            from .initial import transform_columns

            names, tv, tb = transform_columns(self, kind, tv)
        else:
            names = self.terms
            tb = tv if kind == "within" else self._with_between_part(tv)
        A, B, terms = kind_transform(names, tv, tb, kind)
        return A, B, (terms if structured else term_labels(terms))

    def suffstats(self, kind: str = "random") -> _ss.SuffStats:
        """Sufficient statistics of ``[M, y]`` with ``M`` the columns of ``kind``.

        ``"pooled"``, ``"random"``, ``"within"`` and ``"between"`` (whose estimators use the
        original columns): the statistics of ``[X, y]``, computed once with the design.
        ``"mundlak"`` and ``"within_between"``: derived exactly from them
        (:func:`bayespanel.core.derived.augment`) and kept: reference fits and models of
        that kind share them (each holds ``N x columns`` unit means). The same accessor as the
        out-of-core design's, so reference fits and models read one interface.
        """
        if kind not in KINDS:
            raise choices_error("kind", kind, KINDS)
        if kind in ("pooled", "random", "within", "between"):
            return self._stats
        if kind not in self._cache:
            from ..core.derived import augment

            A, B, labels = self._transform(kind)
            self._cache[kind] = augment(self._stats, A, B, names=labels + [self.outcome])
        return self._cache[kind]

    def model_suffstats(self, kind: str) -> _ss.SuffStats:
        """Statistics a Bayesian builder of ``kind`` reads: as :meth:`suffstats`, except
        ``"within"`` keeps only the time-varying columns (what ``FixedEffects`` uses)."""
        if kind != "within":
            return self.suffstats(kind)
        from ..core.derived import select_columns

        tv = [i for i, t in enumerate(self.terms) if self.varies_within[t]]
        if not tv:
            self._transform("within")  # raises the message of a design with no within part
        names = [self.terms[i] for i in tv] + [self.outcome]
        return select_columns(self._stats, tv + [self.k], names)

    def design_suffstats(self) -> _ss.SuffStats:
        """The statistics of the design's own columns ``[X, y]`` (terms as in ``terms``)."""
        return self._stats

    def row_map(self, kind: str):
        """``(A, B)`` with the rows of ``[M, y]`` of ``kind`` equal to ``A z + B zbar_i``
        for a design row ``z = [x, y]`` and its unit mean ``zbar_i`` (``M`` as in
        ``matrices(kind)``; ``"within"``: the demeaned time-varying columns)."""
        if kind not in KINDS:
            raise choices_error("kind", kind, KINDS)
        p = self.k + 1
        if kind in ("mundlak", "within_between"):
            A, B, _ = self._transform(kind)
            return A, B
        if kind == "within":
            tv = [i for i, t in enumerate(self.terms) if self.varies_within[t]]
            A = np.eye(p)[tv + [self.k]]
            B = -A.copy()
            B[-1] = 0.0
            return A, B
        return np.eye(p), np.zeros((p, p))

    def build(self, builder, priors=None, **kwargs):
        """A Gaussian model on this design: the builder's ``from_design``; the statistics
        come from the design and the rows are made only if the model needs them.
        ``builder`` is a builder class (``RandomIntercept``), its name or its snake-case
        name (``"random_intercept"``; :func:`bayespanel.kinds.builder`)."""
        return builder_of(builder).from_design(self, priors=priors, **kwargs)

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
        um = self._stats.unit_mean[:, :self.k]
        keep = []
        for i in tv:
            scale = max(float(np.abs(um[:, i]).max()), 1.0)
            if np.ptp(um[:, i]) > _VARY_TOL * scale:
                keep.append(i)
        occ = [i for i in keep if parse(self.terms[i]).is_occasion]
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

    def subset_rows(self, rowmask) -> "Design":
        """A design on a subset of rows; unit means are recomputed on those rows."""
        rowmask = np.asarray(rowmask, dtype=bool)
        codes = self.unit_codes[rowmask]
        present, new_codes = np.unique(codes, return_inverse=True)
        rows = InMemoryRows(y=self.y[rowmask], X=self.X[rowmask], unit_codes=new_codes,
                            time=self.time[rowmask], rows=self.rows[rowmask])
        out = Design(rows, terms=self.terms, units=self.units[present],
                     outcome=self.outcome, spec=self.spec, lags=self.lags)
        out.initial = self.initial  # its columns stay those of the whole sample
        return out

    # ------------------------------------------------------------------ builders
    @classmethod
    def from_panel(cls, panel, formula: str, occasion_effects: bool = False,
                   initial_conditions: bool = True) -> "Design":
        """Screen the formula, drop incomplete rows (reported), and build the matrices.

        ``lag(x)`` and ``lag(x, k)`` are made columns first (:mod:`bayespanel.data.lags`).
        When the formula lags the outcome and ``initial_conditions`` is True (the
        default), the design carries the initial-conditions columns of Wooldridge (2005)
        (:func:`bayespanel.data.initial.columns`, through :meth:`with_initial_conditions`);
        False leaves them out, with a warning.

        Reads only the columns the formula uses, in the panel's (unit, occasion) order.
        Plain numeric terms and the intercept are written column by column into one
        float64 array; transforms, interactions and ``C()`` go through formulaic. The
        statistics of ``[X, y]`` are computed once, in row slices
        (:func:`bayespanel.core.suffstats.compute_chunked`): the checks for constant and
        collinear columns, the within variation and every consumer that needs no rows
        read them (:meth:`suffstats`).
        """
        from .lags import expand

        occasion_effects = check_flag("occasion_effects", occasion_effects)
        initial_conditions = check_flag("initial_conditions", initial_conditions)
        frame = panel._df
        lagged = expand(formula, panel)  # lag(x): columns of their own, made on the table
        if lagged is None:
            screened = screen(formula, panel.columns)
        else:
            frame = lagged.frame
            screened = screen(lagged.formula, lagged.columns)
        used = [c for c in screened.columns if c not in (panel.unit, panel.time)]
        if set(screened.outcome_columns) & {panel.unit, panel.time}:
            raise FormulaError(
                f"the outcome {screened.outcome!r} is the panel's unit or time column")
        if panel.unit in screened.columns:
            raise FormulaError(
                f"column {panel.unit!r} identifies the units; unit effects come from the model "
                "(FixedEffects, RandomIntercept), not from the formula")
        if panel.time in screened.columns:
            used.append(panel.time)  # a trend or C(time) is allowed
        for c in used:
            refuse_complex(c, frame[c].dtype)
            if _numeric(frame[c]) or pd.api.types.is_bool_dtype(frame[c]):
                continue
            in_c = re.search(r"C\(\s*`?" + re.escape(c) + r"`?\s*[,)]", screened.rhs)
            if c in screened.outcome_columns or not in_c:
                _refuse_text(panel, c, screened.outcome_columns)
        used = list(dict.fromkeys(used))
        order = panel._order
        miss = {}
        for c in used:
            m = frame[c].isna().to_numpy()
            miss[c] = m if order is None else m[order]
        dropped_by_column = {c: int(m.sum()) for c, m in miss.items() if m.any()}
        keep = np.ones(len(frame), dtype=bool)
        for c in dropped_by_column:
            keep &= ~miss[c]
        n_dropped = int((~keep).sum())
        for c in used:
            if miss[c].all():
                raise PanelDataError(f"column {c!r} is missing on every row")
        del miss
        if n_dropped:
            detail = ", ".join(f"{c}: {k}" for c, k in dropped_by_column.items())
            warnings.warn(
                f"dropped {n_dropped} of {len(frame)} rows with missing values ({detail}); "
                "unit means are taken over the remaining rows",
                DataHandlingWarning, stacklevel=3,
            )
        if not keep.any():
            raise PanelDataError("no complete rows remain after dropping missing values")
        # positions in the input of the estimation rows, in (unit, occasion) order
        if order is None:
            idx = None if not n_dropped else np.flatnonzero(keep)
        else:
            idx = order if not n_dropped else order[keep]
        del keep

        def take(values):
            return values if idx is None else values[idx]

        unit_col = frame[panel.unit] if idx is None else frame[panel.unit].take(idx)
        units_codes, units = _unit_codes(unit_col)
        del unit_col
        if len(units) < 2:
            raise PanelDataError(
                f"only {len(units)} unit of {panel.unit!r} has complete rows; at least 2 are needed"
            )
        time = take(frame[panel.time].to_numpy())
        n = len(units_codes)
        plain = _plain_terms(screened.rhs, frame, used)
        extra = []
        if occasion_effects:
            extra = list(np.sort(pd.unique(time))[1:])
        if plain is not None:
            terms = ["Intercept" if c is None else c for c in plain]
            check_terms(terms, formula)
            X = np.empty((n, len(terms) + len(extra)))
            # one column converted at a time: converting them all first (to fill X in row
            # blocks) raised the design stage's peak memory from 1.72 to 2.09 times the
            # numeric columns (bench/bench_memory.py, tests/test_memory.py)
            for j, c in enumerate(plain):
                if c is None:
                    X[:, j] = 1.0
                else:
                    v = frame[c].to_numpy(dtype=float, na_value=np.nan)
                    X[:, j] = v if idx is None else v[idx]
                    del v
        else:
            from formulaic import Formula

            cols = list(dict.fromkeys([panel.unit, panel.time] + used))
            sub = frame[cols] if idx is None else frame[cols].take(idx)
            try:
                mm = Formula(screened.rhs).get_model_matrix(
                    sub.reset_index(drop=True), context=safe_context(), ensure_full_rank=True,
                    na_action="ignore",  # incomplete rows are gone; NaN from a transform is named below
                )
            except FormulaError:
                raise
            except Exception as exc:
                raise FormulaError(f"cannot build the design for {formula!r}: "
                                   f"{dependency_message(exc)}") from None
            del sub
            terms = [str(c) for c in mm.columns]
            for lag in ([] if lagged is None else lagged.report.terms):  # log(`lag(x)`)
                terms = [t.replace(f"`{lag.label}`", lag.label) for t in terms]
            check_terms(terms, formula)
            X = np.empty((n, len(terms) + len(extra)))
            for j, t in enumerate(terms):
                try:
                    X[:, j] = np.asarray(mm.iloc[:, j], dtype=float)
                except (TypeError, ValueError) as exc:
                    raise FormulaError(f"term {t!r} of formula {formula!r} is not numeric: "
                                       f"{exc}") from None
            del mm
        k0 = len(terms)
        for j, o in enumerate(extra):
            X[:, k0 + j] = time == o
        terms += [occasion_label(o) for o in extra]
        if screened.outcome_expr is None:
            y = take(frame[screened.outcome].to_numpy(dtype=float, na_value=np.nan))
        else:  # a transform of columns (log(gsp)), on the estimation rows
            cols = list(screened.outcome_columns)
            y = outcome_values(screened, frame[cols] if idx is None else frame[cols].take(idx))
        # one sweep gives every column's range and finiteness for the checks below
        lo, hi, finite = _ss.column_range(X, y)
        if screened.outcome_expr is not None and not finite[-1]:
            _check_finite(y, f"the outcome {screened.outcome!r}", frame, panel, idx)
        for j in np.flatnonzero(~finite[:-1]):
            _check_finite(X[:, j], f"term {terms[j]!r}", frame, panel, idx)
        stats, maxabs = _check_columns(X, y, terms, screened.outcome, units_codes, (lo, hi))
        dynamic = lagged is not None and lagged.report.has_lagged_outcome
        spec = DesignSpec(formula=formula, unit=panel.unit, time=panel.time,
                          occasion_effects=bool(occasion_effects),
                          initial_conditions=initial_conditions if dynamic else None)
        rows = frame.index if idx is None else frame.index.take(idx)
        source = InMemoryRows(y=y, X=X, unit_codes=units_codes, time=time, rows=rows)
        design = cls(source, terms=terms, units=units, outcome=screened.outcome,
                     spec=spec, n_dropped=n_dropped, dropped_by_column=dropped_by_column,
                     n_input_rows=len(frame), stats=stats, maxabs=maxabs,
                     lags=None if lagged is None else lagged.report)
        if dynamic:
            if initial_conditions:
                return design.with_initial_conditions()
            from .initial import notes

            warnings.warn(notes(design, [])[0], DataHandlingWarning, stacklevel=3)
        return design

    def with_initial_conditions(self) -> "Design":
        """This design with the initial-conditions columns of a lagged outcome
        (:func:`bayespanel.data.initial.columns`: the lagged outcome on each unit's first row
        and the unit means of the other time-varying covariates), on the same rows; the
        design itself when its formula does not lag the outcome."""
        from .initial import columns

        added = None if self.initial is not None else columns(self)
        if added is None:
            return self
        M, labels, info = added
        X = np.column_stack([self.X, M])
        terms = list(self.terms) + labels
        stats, maxabs = _check_columns(X, self.y, terms, self.outcome, self.unit_codes,
                                       _ss.column_range(X, self.y)[:2])
        source = InMemoryRows(y=self.y, X=X, unit_codes=self.unit_codes, time=self.time,
                              rows=self.rows)
        out = Design(source, terms=terms, units=self.units, outcome=self.outcome,
                     spec=self.spec, n_dropped=self.n_dropped,
                     dropped_by_column=self.dropped_by_column,
                     n_input_rows=self.n_input_rows, stats=stats, lags=self.lags,
                     maxabs=maxabs)
        out.initial = info
        return out


def _unit_codes(units: pd.Series):
    """Codes ``0..N-1`` and the unit labels of rows sorted by unit.

    Equal labels are adjacent, so a code is the number of label changes before the row;
    the labels of the runs go through ``pd.factorize`` (N values, not n) so that they
    keep the type it gives. Falls back to factorising every row if the runs are not in
    factorize's order.
    """
    vals = units.cat.codes.to_numpy() if isinstance(units.dtype, pd.CategoricalDtype) \
        else units.to_numpy()
    n = len(vals)
    change = vals[1:] != vals[:-1]
    codes = np.empty(n, dtype=np.int64)
    codes[0] = 0
    np.cumsum(change, out=codes[1:])
    starts = np.flatnonzero(np.concatenate([[True], change]))
    del change
    run_codes, labels = pd.factorize(units.iloc[starts], sort=True)
    if not np.array_equal(run_codes, np.arange(len(starts))):
        return pd.factorize(units, sort=True)
    return codes, labels


def _plain_terms(rhs: str, frame: pd.DataFrame, used) -> list | None:
    """The terms of ``rhs`` as column names (None for the intercept), in formulaic's order,
    when every term is the intercept or a numeric column as it is; else None (the model
    matrix then comes from formulaic). A sum of numeric columns (``x0 + x1``,
    :func:`~bayespanel.data.formula.sum_columns`) is read without formulaic: the
    intercept first, then each column once, where it first appears, as formulaic orders
    them."""
    names = sum_columns(rhs)
    if names is not None and all(n in used and _numeric(frame[n]) for n in names):
        return [None] + names
    from formulaic import Formula
    from formulaic.parser.types import Factor

    try:
        terms = list(Formula(rhs))
    except Exception:
        return None  # formulaic reports the problem when it builds the matrix
    out = []
    for term in terms:
        if len(term.factors) != 1:
            return None
        f = term.factors[0]
        if f.eval_method == Factor.EvalMethod.LITERAL and f.expr == "1":
            out.append(None)
        elif (f.eval_method == Factor.EvalMethod.LOOKUP and f.expr in used
              and _numeric(frame[f.expr])):
            out.append(f.expr)
        else:
            return None
    return out


