"""Within/between contrasts: does a covariate's between effect differ from its within effect?

For each time-varying covariate ``x`` the contrast is ``delta = b_between - b_within``:

* in the within-between (hybrid) model, ``b["x (between)"] - b["x (within)"]``;
* in the correlated-effects (Mundlak 1978) model, the coefficient of ``"x (unit mean)"``,
  which is that difference exactly (the two models are reparametrisations of each other).

The random-intercept model assumes ``delta = 0`` and the fixed-effects model does not
estimate a between effect, so neither has a contrast to report. The posterior of
``delta`` is summarised by its mean, median, SD, central interval, the probability of
each sign and, when the user gives a region of practical equivalence (ROPE,
Kruschke 2018), the probability that ``|delta| < rope``. The frequentist counterparts go
beside it: the reference fit's estimate of the same contrast with its standard error and
interval, the classical Hausman (1978) test and the cluster-robust Mundlak Wald test
(Wooldridge 2010, 10.7.3).

References
----------
.. [1] Mundlak, Y. (1978). On the pooling of time series and cross section data.
   Econometrica 46(1), 69-85. doi:10.2307/1913646
.. [2] Bell, A. and Jones, K. (2015). Explaining fixed effects: random effects modeling of
   time-series cross-sectional and panel data. Political Science Research and Methods
   3(1), 133-153. doi:10.1017/psrm.2014.7
.. [3] Kruschke, J. K. (2018). Rejecting or accepting parameter values in Bayesian
   estimation. Advances in Methods and Practices in Psychological Science 1(2), 270-280.
   doi:10.1177/2515245918771304
.. [4] Hausman, J. A. (1978). Specification tests in econometrics. Econometrica 46(6),
   1251-1271. doi:10.2307/1913827
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .. import kinds
from ..core.errors import SpecificationError
from ..core.jsonsafe import json_record
from ..data.resultshape import check_prob
from ..core.terms import CONTRAST, UNIT_MEAN, part_label

__all__ = ["ContrastResult", "contrast_draws", "contrast_matrix", "contrast_covariates",
           "contrast_rows",
           "within_between_contrasts", "specification_tests"]

def contrast_matrix(kind: str, labels, time_varying):
    """Linear map ``L`` with ``delta = coef @ L.T`` (one row per time-varying covariate).

    Parameters
    ----------
    kind : str
        The model's column map (``"within_between"`` or ``"mundlak"``; the others have no
        contrast and are refused, naming the models to fit instead). The contrast is the
        map's :attr:`~bayespanel.kinds.ColumnMap.contrast`.
    labels : list of str
        Coefficient labels of the model.
    time_varying : list of str
        The time-varying covariates (``Design.time_varying``).
    """
    return kinds.column_map(kind).contrast_matrix(labels, time_varying)


def contrast_covariates(kind: str, labels) -> list:
    """The time-varying covariates whose contrast the model's labels carry, in label order:
    ``x`` for every ``"x (between)"`` with a matching ``"x (within)"`` (within-between) or
    every ``"x (unit mean)"`` (Mundlak). Other kinds are refused as in
    :func:`contrast_matrix`."""
    return kinds.column_map(kind).contrast_covariates(labels)


def contrast_rows(kind: str, labels) -> tuple[list, np.ndarray]:
    """Every between-minus-within contrast the model's labels carry: their names
    (``"x (between - within)"``) and the linear map ``L`` (``delta = coef @ L.T``) of
    :func:`contrast_matrix`, rows in the order of :func:`contrast_covariates`. A kind
    without contrasts (pooled, random intercept, fixed effects) has none: ``([], 0 x k)``.
    """
    labels = list(labels)
    if not kinds.column_map(kind).contrast:
        return [], np.zeros((0, len(labels)))
    tv = contrast_covariates(kind, labels)
    return [part_label(t, CONTRAST) for t in tv], contrast_matrix(kind, labels, tv)


def contrast_draws(kind, labels, time_varying, coef) -> np.ndarray:
    """Draws of ``b_between - b_within`` per time-varying covariate, shape ``(S, p_w)``."""
    L = contrast_matrix(kind, labels, time_varying)
    return np.atleast_2d(np.asarray(coef, dtype=float)) @ L.T


def _rope_of(rope, terms):
    if rope is None:
        return None
    if isinstance(rope, dict):
        bad = [k for k in rope if k not in terms]
        if bad:
            raise SpecificationError(
                f"rope names {bad!r}, which are not time-varying covariates; choose from "
                f"{terms!r}")
        vals = np.array([rope.get(t, np.nan) for t in terms], dtype=float)
    else:
        try:
            vals = np.full(len(terms), float(rope))
        except (TypeError, ValueError):
            raise SpecificationError(
                f"rope={rope!r} must be a positive number (half-width of the region around "
                "0) or a dict of them by covariate") from None
    given = vals if not isinstance(rope, dict) else \
        np.array([float(v) if isinstance(v, (int, float)) else np.nan for v in rope.values()])
    if not np.all(np.isfinite(given) & (given > 0)):  # nan would switch the region off
        raise SpecificationError(f"rope={rope!r}: half-widths must be finite positive numbers")
    return vals


class ContrastResult:
    """Posterior of the within/between contrasts, with the frequentist tests beside them.

    Attributes
    ----------
    draws : pandas.DataFrame
        One column per time-varying covariate, one row per draw (chains stacked).
    reference : pandas.DataFrame or None
        The reference fit's contrast estimate, SE and interval per covariate.
    tests : dict of str -> SpecificationTest
        Classical Hausman and cluster-robust Mundlak tests, when computed.
    """

    def __init__(self, draws, terms, kind, rope=None, prob=None, reference=None,
                 tests=None):
        prob = check_prob(prob)  # None: the interval option
        self.draws = pd.DataFrame(np.asarray(draws), columns=list(terms))
        self.kind = kind
        self.rope = _rope_of(rope, list(terms))
        self.prob = prob
        self.reference = reference
        self.tests = dict(tests or {})
        #: why the specification tests were not run, when they do not apply
        self.tests_skipped = None

    def table(self, prob: float | None = None) -> pd.DataFrame:
        """One row per covariate: posterior summary, sign and ROPE probabilities, and the
        reference estimate beside it."""
        prob = self.prob if prob is None else prob
        prob = check_prob(prob)
        D = self.draws.to_numpy()
        lo, hi = (1 - prob) / 2, (1 + prob) / 2
        out = pd.DataFrame({
            "mean": D.mean(axis=0), "median": np.median(D, axis=0), "sd": D.std(axis=0, ddof=1),
            "lower": np.quantile(D, lo, axis=0), "upper": np.quantile(D, hi, axis=0),
            "P(> 0)": (D > 0).mean(axis=0), "P(< 0)": (D < 0).mean(axis=0),
        }, index=pd.Index(self.draws.columns, name="covariate"))
        if self.rope is not None:
            out["rope"] = self.rope
            out["P(in rope)"] = np.where(np.isfinite(self.rope),
                                         (np.abs(D) < self.rope).mean(axis=0), np.nan)
        if self.reference is not None:
            ref = self.reference.reindex(out.index)
            for c in ref.columns:
                out[f"reference {c}"] = ref[c].to_numpy()
        out.attrs.update(prob=prob, kind=self.kind, contrast="between minus within")
        return out

    def tests_table(self) -> pd.DataFrame:
        """The specification tests, one row each."""
        rows = []
        for key, t in self.tests.items():
            rows.append({"test": key, "statistic": t.statistic, "df": t.df,
                         "p_value": t.p_value, "F": t.f_statistic, "F_df_denom": t.f_df_denom,
                         "F_p_value": t.f_p_value, "cov_type": t.cov_type,
                         "message": t.message})
        return pd.DataFrame(rows).set_index("test") if rows else pd.DataFrame()

    #: record keys of :meth:`table` columns
    _RECORD = {"mean": "estimate", "sd": "sd", "lower": "lower", "upper": "upper",
               "P(> 0)": "p_positive", "P(< 0)": "p_negative", "rope": "rope",
               "P(in rope)": "p_rope", "reference estimate": "reference_estimate",
               "reference lower": "reference_lower", "reference upper": "reference_upper",
               "reference se": "reference_se"}

    def to_record(self, prob: float | None = None) -> list:
        """The ``contrasts`` records of a model in ``results.json`` (docs/results-schema.md):
        one per covariate with the posterior summary of between minus within (its mean as
        ``estimate``, the key of every point estimate in the file), the sign and
        ROPE probabilities and the reference contrast (``None`` where absent). The
        specification tests are recorded in the run's ``tests`` section."""
        t = self.table(prob)
        return [json_record({"covariate": cov, **{key: r.get(col) for col, key
                                                   in self._RECORD.items()}})
                for cov, r in t.iterrows()]

    def __repr__(self):
        s = f"<ContrastResult between minus within, {self.kind}>\n{self.table()}"
        for t in self.tests.values():
            s += f"\n{t}"
        if self.tests_skipped:
            s += f"\n{self.tests_skipped}"
        return s


def _reference_contrast(ref, terms, prob):
    """Contrast estimate and SE from a within_between or mundlak reference fit."""
    from scipy import stats

    if not kinds.column_map(ref.estimator).contrast:
        raise SpecificationError(
            f"reference: a {ref.estimator!r} fit has no within/between contrast; pass a "
            "within_between or mundlak reference fit")
    labels = list(ref.coef.index)
    L = contrast_matrix(ref.estimator, labels, terms)
    est = L @ ref.coef.to_numpy()
    V = L @ ref.vcov.to_numpy() @ L.T
    se = np.sqrt(np.clip(np.diag(V), 0, None))
    dfs = np.array([ref.df_resid[labels[int(np.flatnonzero(L[r] != 0)[0])]]
                    for r in range(len(terms))], dtype=float)
    q = np.where(np.isfinite(dfs), stats.t.ppf(0.5 + prob / 2, np.where(np.isfinite(dfs), dfs, 1)),
                 stats.norm.ppf(0.5 + prob / 2))
    return pd.DataFrame({"estimate": est, "se": se, "lower": est - q * se,
                         "upper": est + q * se}, index=pd.Index(terms, name="covariate")).assign(
        cov_type=ref.cov_type)


def specification_tests(M, y, codes, labels, kind) -> dict:
    """Classical Hausman and cluster-robust (CR1) Mundlak tests on the model's rows.

    The original covariates are rebuilt from the model's columns
    (:func:`bayespanel.bayes.partition.design_columns`) and the reference module fits the
    within, random-intercept (Swamy-Arora) and Mundlak equations on them.
    """
    from .partition import _unit_means, design_columns
    from ..reference import fit_arrays, hausman, mundlak_test

    X, terms, tv = design_columns(M, codes, labels, kind)
    codes = np.asarray(codes, dtype=np.int64)
    idx = [terms.index(t) for t in tv]
    fe = fit_arrays("within", X[:, idx], y, codes, tv)
    re = fit_arrays("random", X, y, codes, terms)
    # unit means of the covariates the model gives a between part (not those whose unit
    # means are all equal, such as occasion indicators in a balanced panel)
    tb = [t for t in contrast_covariates(kind, labels) if t in tv]
    if not tb:  # nothing to compare (see within_between_contrasts)
        return {}
    Mm = np.column_stack([X, _unit_means(X[:, [terms.index(t) for t in tb]], codes)[codes]])
    mres = fit_arrays("mundlak", Mm, y, codes, terms + [part_label(t, UNIT_MEAN) for t in tb],
                      method="swamy-arora", cov="cluster")
    return {"Hausman (classical)": hausman(fe, re),
            "Mundlak (cluster-robust)": mundlak_test(mres)}


def design_tests(design, labels, kind) -> dict:
    """The tests of :func:`specification_tests` from the reference fits of a design.

    For a model on a design whose rows are not at hand (``Design.has_rows`` false): the
    within, random-intercept (Swamy-Arora) and Mundlak (cluster-robust) equations are
    fitted on the design's statistics (:func:`bayespanel.reference.fit_design`), on the
    same columns as :func:`specification_tests` builds from the rows.
    """
    from ..reference import hausman, mundlak_test
    from ..reference.estimators import fit_design

    tb = [t for t in contrast_covariates(kind, labels) if t in design.time_varying]
    if not tb:
        return {}
    fe = fit_design(design, "within")
    re = fit_design(design, "random", method="swamy-arora")
    mres = fit_design(design, "mundlak", method="swamy-arora", cov="cluster")
    return {"Hausman (classical)": hausman(fe, re),
            "Mundlak (cluster-robust)": mundlak_test(mres)}


def within_between_contrasts(kind, labels, coef, time_varying, *, rope=None, prob=None,
                             reference=None, rows=None, design=None) -> ContrastResult:
    """Posterior of between-minus-within effects with the frequentist checks beside them.

    Parameters
    ----------
    kind : {"within_between", "mundlak"}
    labels : list of str
    coef : array (S, k)
        Coefficient draws, chains stacked.
    time_varying : list of str
        The time-varying covariates.
    rope : float or dict, optional
        Half-width of the region of practical equivalence around zero, on the scale of the
        coefficients; one value for all covariates or a dict by covariate.
    prob : float
        Probability of the central intervals.
    reference : ReferenceResult, optional
        A ``within_between`` or ``mundlak`` fit on the same rows.
    rows : tuple (M, y, unit_codes), optional
        The model's rows: with them the classical Hausman test and the cluster-robust
        Mundlak test are computed (:func:`specification_tests`); when no covariate has
        both a within and a between part they do not apply, and ``tests_skipped`` of
        the result says so.
    design : Design, optional
        Without ``rows``: the design the model was built on, whose reference fits give
        the same tests from its statistics (:func:`design_tests`).

    Returns
    -------
    ContrastResult
    """
    prob = check_prob(prob)
    terms = list(time_varying)
    D = contrast_draws(kind, labels, terms, coef)
    ref = None if reference is None else _reference_contrast(reference, terms, prob)
    found = {}
    if rows is not None:
        M, y, codes = rows
        found = specification_tests(M, y, codes, labels, kind)
    elif design is not None:
        found = design_tests(design, labels, kind)
    out = ContrastResult(D, terms, kind, rope=rope, prob=prob, reference=ref, tests=found)
    if (rows is not None or design is not None) and not terms:
        out.tests_skipped = ("Hausman and Mundlak tests not run: no covariate has both a "
                             "within and a between part (a covariate whose unit means are "
                             "the same for every unit has no between part)")
    return out
