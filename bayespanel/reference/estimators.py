"""The reference estimators: labelled entry points over the closed-form cores.

``pooled``, ``within``, ``between``, ``random``, ``mundlak`` and ``within_between`` take a
:class:`~bayespanel.data.panel.Panel` and a formula (or a ready
:class:`~bayespanel.data.design.Design`), build the model's columns with
``Design.matrices(kind)``, compute the sufficient statistics once, solve in closed form
(:mod:`bayespanel.reference.core`) and add the requested covariance
(:mod:`bayespanel.reference.covariance`). :func:`fit_arrays` is the same fit on plain
arrays, for refits in exact cross-validation; :func:`fit_stats` is the part that needs
only sufficient statistics (point estimates, variance components, classical covariance).

References
----------
.. [1] Baltagi, B. H. (2021). Econometric Analysis of Panel Data, 6th ed. Springer,
   chapters 2 and 9. https://doi.org/10.1007/978-3-030-53953-5
.. [2] Mundlak, Y. (1978). On the pooling of time series and cross section data.
   Econometrica 46(1), 69-85. https://doi.org/10.2307/1913646
.. [3] Bell, A. and Jones, K. (2015). Explaining fixed effects: random effects modeling of
   time-series cross-sectional and panel data. Political Science Research and Methods
   3(1), 133-153. https://doi.org/10.1017/psrm.2014.7
"""

from __future__ import annotations

import os
import warnings

import numpy as np

from .. import kinds
from ..core import suffstats
from ..core.errors import DataHandlingWarning, EstimationError, SpecificationError, choices_error
from ..core.terms import AS_IS, parse
from . import core
from ..core.linalg import COLLINEAR_TOL
from ._results import ReferenceResult
from ..core.linalg import group_scores
from .covariance import COV_TYPES, classical, cr1, cr2, cr2_from_blocks

__all__ = ["ESTIMATORS", "METHODS", "pooled", "within", "between", "random", "mundlak",
           "within_between", "fit_design", "fit_arrays", "fit_stats"]

#: the registered reference fits (:mod:`bayespanel.kinds`)
ESTIMATORS = kinds.reference_names()
METHODS = ("swamy-arora", "ml", "reml")
_PKG_DIR = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

_METHOD_NOTE = {
    "swamy-arora": "Variance components by Swamy-Arora (unbalanced form of Baltagi and "
                   "Chang 1994), truncated at zero.",
    "ml": "Variance components by maximum likelihood under normal unit effects and errors.",
    "reml": "Variance components by restricted maximum likelihood under normal unit "
            "effects and errors.",
}


# ---------------------------------------------------------------------- option checks
def _check_options(estimator, method, cov):
    if estimator not in ESTIMATORS:
        raise choices_error("estimator", estimator, ESTIMATORS)
    if cov not in COV_TYPES:
        raise choices_error("cov", cov, COV_TYPES)
    if kinds.reference(estimator).variance_components:
        method = "swamy-arora" if method is None else method
        if method not in METHODS:
            raise choices_error("method", method, METHODS)
    elif method is not None:
        raise SpecificationError(
            f"method={method!r} applies to "
            + ", ".join(k.name for k in kinds.references() if k.variance_components)
            + " only; "
            f"{estimator} has no variance components to estimate")
    return method


def _design_of(data, formula, occasion_effects):
    from ..data.design import Design, check_flag

    occasion_effects = check_flag("occasion_effects", occasion_effects)
    if isinstance(data, Design):
        if formula is not None and formula != data.spec.formula:
            raise SpecificationError(
                f"formula={formula!r} was given with a Design built for "
                f"{data.spec.formula!r}; pass the panel instead, or no formula")
        if occasion_effects and not data.spec.occasion_effects:
            raise SpecificationError(
                "occasion_effects=True was given with a Design built without them; build "
                "it with panel.design(formula, occasion_effects=True)")
        return data
    if not hasattr(data, "design"):
        raise SpecificationError(
            f"data must be a bayespanel Panel or Design, got {type(data).__name__}")
    if formula is None:
        raise SpecificationError("formula is required with a Panel (for example 'y ~ x')")
    return data.design(formula, occasion_effects=occasion_effects)


# ---------------------------------------------------------------------- public entries
def pooled(data, formula=None, *, cov="classical", occasion_effects=False) -> ReferenceResult:
    """Pooled least squares: one intercept for all units.

    Parameters
    ----------
    data : Panel or Design
    formula : str
        Wilkinson formula, e.g. ``"y ~ x + z"`` (not needed with a Design).
    cov : {"classical", "cluster", "cr2"}
        Classical, cluster-robust by unit (CR1) or bias-reduced cluster-robust (CR2 with
        Satterthwaite degrees of freedom).
    occasion_effects : bool
        Add one indicator per occasion (the first is the reference).

    Returns
    -------
    ReferenceResult
    """
    return fit_design(_design_of(data, formula, occasion_effects), "pooled", cov=cov)


def within(data, formula=None, *, cov="classical", occasion_effects=False) -> ReferenceResult:
    """Fixed effects (within): least squares on unit-demeaned data.

    The residual degrees of freedom are ``n - N - k`` (the unit means absorbed by
    demeaning are charged). Covariates constant within units are dropped with a
    :class:`~bayespanel.core.errors.DataHandlingWarning` naming them (also in
    ``result.dropped``), as are units with a single row (counted in the warning). The
    intercept is absorbed and not reported. CR1 charges ``k + 1`` coefficients in its
    small-sample factor when the formula has an intercept (the usual convention for
    fixed effects with clusters that nest the units); CR2 is computed as for the full
    dummy-variable regression (Pustejovsky and Tipton 2018). Parameters as for
    :func:`pooled`.
    """
    return fit_design(_design_of(data, formula, occasion_effects), "within", cov=cov)


def between(data, formula=None, *, cov="classical", occasion_effects=False) -> ReferenceResult:
    """Between: least squares on the unit means, one row per unit, units weighted equally.

    With one row per unit, ``cov="cluster"`` is the heteroskedasticity-robust HC1 and
    ``cov="cr2"`` is HC2 with Bell-McCaffrey degrees of freedom.
    """
    return fit_design(_design_of(data, formula, occasion_effects), "between", cov=cov)


def random(data, formula=None, *, method="swamy-arora", cov="classical",
           occasion_effects=False) -> ReferenceResult:
    """Random intercept by feasible GLS.

    Parameters
    ----------
    method : {"swamy-arora", "ml", "reml"}
        Swamy-Arora variance components (the unbalanced-panel form of Baltagi and Chang
        1994), or maximum / restricted maximum likelihood of the marginal model (profiled
        over the coefficients and the occasion variance, maximised over the variance
        ratio).
    cov : {"classical", "cluster", "cr2"}
        On the quasi-demeaned regression, treating the variance components as known.

    Notes
    -----
    The GLS transformation subtracts ``theta_i`` times the unit mean from every row,
    ``theta_i = 1 - sqrt(sigma^2 / (sigma^2 + T_i tau^2))``; see
    :meth:`ReferenceResult.variance_partition`.
    """
    return fit_design(_design_of(data, formula, occasion_effects), "random", method=method,
                      cov=cov)


def mundlak(data, formula=None, *, method="swamy-arora", cov="classical",
            occasion_effects=False) -> ReferenceResult:
    """Random intercept with the unit means of the time-varying covariates added
    (correlated random effects, Mundlak 1978). Terms ``x (unit mean)`` carry the
    between-minus-within contrast; the ``x`` terms equal the fixed-effects estimates.
    Parameters as for :func:`random`."""
    return fit_design(_design_of(data, formula, occasion_effects), "mundlak", method=method,
                      cov=cov)


def within_between(data, formula=None, *, method="swamy-arora", cov="classical",
                   occasion_effects=False) -> ReferenceResult:
    """Random intercept with each time-varying covariate split into ``x (within)`` (the
    deviation from its unit mean) and ``x (between)`` (the unit mean); the hybrid model of
    Bell and Jones (2015). Parameters as for :func:`random`."""
    return fit_design(_design_of(data, formula, occasion_effects), "within_between",
                      method=method, cov=cov)


def fit_design(design, estimator: str, *, method=None, cov="classical") -> ReferenceResult:
    """Fit one reference estimator on a :class:`~bayespanel.data.design.Design`.

    Estimates from the design's sufficient statistics. Cluster-robust covariances need
    one score per unit: from the rows in slices (:func:`design_scores`) when the design
    has them, else from the per-unit cross-products its pass collected
    (:func:`unit_cp_blocks`; a design over a partitioned source, ``Design.has_rows``
    false). CR2 on a design with rows is computed from the rows of the regression.
    """
    method = _check_options(estimator, method, cov)
    kind = kinds.reference(estimator).statistics_of
    if design.has_rows and (cov == "cr2" or not hasattr(design, "suffstats")):
        # CR2 needs the rows of the regression (per-cluster k x k blocks of them)
        M, labels = design.matrices(kind)
        res = fit_arrays(estimator, M, design.y, design.unit_codes, labels, method=method,
                         cov=cov, outcome=design.outcome, units=design.units)
        res.design = design
        return res
    # statistics only; the cluster-robust scores in one more pass over row slices, or from
    # the per-unit cross-products
    ss = design.suffstats(kind)
    res = fit_stats(estimator, ss, list(ss.names[:-1]), method=method, outcome=design.outcome)
    res.extra["unit_labels"] = np.asarray(design.units)
    res.design = design
    if cov == "classical":
        return res
    if design.has_rows:
        scores, n_rows, keep = design_scores(res, estimator, design, kind)
    else:
        ucp = None if estimator == "between" else design.unit_cross_products(kind)
        blocks, scores, n_rows, keep = unit_cp_blocks(res, estimator, ss, ucp)
    if cov == "cluster":
        V, df = cr1_covariance(res, estimator, ss, scores, n_rows)
    else:
        V, df = cr2_from_blocks(blocks, scores, res.extra["bread"])
    set_covariance(res, cov, V, df, int(keep.sum()))
    return res


def cr1_covariance(res, estimator, ss, scores, n_rows):
    """The CR1 covariance of a fit from its per-cluster scores, and its degrees of freedom.

    The small-sample factor charges the fit's coefficients plus, for fixed effects with an
    intercept, the absorbed intercept; the reference distribution is t with ``G - 1``
    degrees of freedom, ``G`` the clusters (rows of ``scores``) (Cameron and Miller 2015;
    :func:`bayespanel.reference.covariance.cr1`). Returns ``(V, df)``.
    """
    k = len(res._coef)
    if estimator == "within" and core.intercept_column(ss) is not None:
        k += 1
    G = scores.shape[0]
    return cr1(res.extra["bread"], scores, n_rows, k), np.full(len(res._coef), G - 1.0)


def set_covariance(res, cov, V, df, n_clusters) -> None:
    """Give a fit its robust covariance ``V`` (``cov`` ``"cluster"`` or ``"cr2"``), the
    degrees of freedom of its t tests and the number of clusters."""
    res._vcov = V
    res._df = np.asarray(df, dtype=float)
    res.cov_type = cov
    res.extra["n_clusters"] = n_clusters


def unit_cp_blocks(res, estimator, ss, unit_cp):
    """Per-unit blocks ``X*_g'X*_g`` and scores ``X*_g'e_g`` of the regression behind
    ``res``, from per-unit within cross-products (no rows).

    Every row of the regression that was solved is ``z* = z_gt - c_g zbar_g`` for a
    constant ``c_g`` (1 for fixed effects, ``theta_g`` for the random-intercept GLS, 0 for
    pooled), so ``sum_t z*_gt z*_gt' = W_g + T_g (1 - c_g)^2 zbar_g zbar_g'`` with ``W_g``
    the unit's within cross-products of ``[M, y]``; the score ``s_g`` is that matrix times
    ``v = [-b, 1]`` restricted to the estimated columns, and its ``k x k`` block is all
    that CR2's leverage correction needs (Cameron and Miller 2015; Bell and McCaffrey
    2002). The same scores as :func:`design_scores` computes from rows.

    Parameters
    ----------
    res : ReferenceResult
        From :func:`bayespanel.reference.fit_stats` on ``ss``.
    estimator : str
    ss : SuffStats
        Of the estimator's columns (``[M, y]``).
    unit_cp : (N, p, p) array or None
        Per-unit within cross-products of ``[M, y]``, in the unit order of ``ss`` (not
        needed for the between estimator).

    Returns
    -------
    (S, s, n_rows, keep)
        ``S`` (G x k x k), ``s`` (G x k) over the units that are clusters (``keep``;
        fixed effects leave out single-row units) and the number of rows of the
        regression that was solved.
    """
    cols = np.asarray(res.extra["cols"], dtype=np.int64)
    v = np.zeros(ss.p)
    v[cols] = -res._coef
    v[-1] = 1.0
    m = ss.unit_mean[:, cols]
    T = ss.unit_count.astype(float)
    rbar = ss.unit_mean @ v                              # unit-mean residual
    if estimator == "between":
        keep = np.ones(ss.n_units, bool)
        return m[:, :, None] * m[:, None, :], m * rbar[:, None], ss.n_units, keep
    ix = np.ix_(np.arange(len(T)), cols, cols)
    Wxx = unit_cp[ix]
    Wv = unit_cp[:, cols, :] @ v
    if estimator == "within":
        keep = ss.unit_count > 1
        return Wxx[keep], Wv[keep], int(ss.unit_count[keep].sum()), keep
    if estimator == "pooled":
        c = np.zeros(ss.n_units)
    else:
        c = res.theta_by_length[np.searchsorted(ss.lengths, ss.unit_count)]
    w = T * (1.0 - c) ** 2
    S = Wxx + w[:, None, None] * m[:, :, None] * m[:, None, :]
    return S, Wv + m * (w * rbar)[:, None], ss.n, np.ones(ss.n_units, bool)


def design_scores(res, estimator, design, kind, chunk_rows: int = 1 << 12):
    """Per-unit scores ``s_g = sum_t x*_gt e_gt`` of the regression behind ``res``, from
    the design's rows in slices (no ``n x k`` matrix).

    The rows of ``kind`` are ``m_it = A z_it + B zbar_i`` (``z = [X, y]``;
    ``Design._transform``), and the regression solved on them subtracts ``c_i`` times the
    unit mean (1 for fixed effects, ``theta_i`` for the random-intercept GLS, 0 for
    pooled). With ``d_it = z_it - zbar_i``, ``m_it - c_i mbar_i = A d_it + (1 - c_i)
    mbar_i`` and, because ``sum_t d_it = 0``,

        s_i = sum_t (A d_it)_cols (d_it' A'v) + T_i (1 - c_i)^2 mbar_i,cols (mbar_i'v)

    with ``v = [-b, 1]``: one slice-wise sum over the rows and a unit-level term. The
    between estimator needs no rows (one row per unit). Returns ``(scores, n_rows,
    keep)``: scores of the units that are clusters (``keep``; fixed effects leave out
    single-row units) and the number of rows of the regression.
    """
    ss = design.suffstats(kind)
    base = design.suffstats("random")
    cols = np.asarray(res.extra["cols"], dtype=np.int64)
    v = np.zeros(ss.p)
    v[cols] = -res._coef
    v[-1] = 1.0
    mbar = ss.unit_mean
    T = ss.unit_count.astype(float)
    rbar = mbar @ v
    if estimator == "between":
        keep = np.ones(ss.n_units, bool)
        return mbar[:, cols] * rbar[:, None], ss.n_units, keep
    if kind in ("mundlak", "within_between"):
        A = design._transform(kind)[0]
    else:
        A = np.eye(base.p)
    Ac, Av = A[cols], A.T @ v
    scores = suffstats.unit_scores(design.X, design.y, design.unit_codes, base.unit_mean,
                                   Ac, Av, step=chunk_rows)
    if estimator == "within":
        keep = ss.unit_count > 1
        return scores[keep], int(ss.unit_count[keep].sum()), keep
    if estimator == "pooled":
        cw = np.zeros(ss.n_units)
    else:
        cw = res.theta_by_length[np.searchsorted(ss.lengths, ss.unit_count)]
    wr = T * (1.0 - cw) ** 2 * rbar
    for j, c in enumerate(cols):  # column by column: no N x k temporaries
        scores[:, j] += mbar[:, c] * wr
    return scores, ss.n, np.ones(ss.n_units, bool)


# ---------------------------------------------------------------------- array level
def fit_arrays(estimator, X, y, unit_codes, labels, *, method=None, cov="classical",
               outcome=None, units=None) -> ReferenceResult:
    """Fit in closed form on arrays (no Panel or Design needed).

    Parameters
    ----------
    estimator : str
        One of ``ESTIMATORS``.
    X : (n, k) array
        The model's columns on the estimation rows: the original covariates for
        ``"pooled"``, ``"within"``, ``"between"`` and ``"random"`` (within demeans and
        between averages them here), ``Design.matrices("mundlak")`` or
        ``Design.matrices("within_between")`` for those two.
    y : (n,) array
    unit_codes : (n,) array
        Unit of each row (any integers; renumbered internally).
    labels : list of str
        Names of the columns of ``X``.
    units : sequence, optional
        Labels of the units, indexed by the sorted distinct ``unit_codes``.
    """
    method = _check_options(estimator, method, cov)
    X = np.asarray(X, dtype=float)
    if X.ndim == 1:
        X = X[:, None]
    y = np.asarray(y, dtype=float).ravel()
    present, codes = np.unique(np.asarray(unit_codes), return_inverse=True)
    codes = codes.ravel().astype(np.int64)
    labels = list(labels)
    if len(labels) != X.shape[1]:
        raise SpecificationError(f"labels has {len(labels)} names for {X.shape[1]} columns")
    ss = suffstats.compute(X, y, codes, names=labels + [outcome or "y"])
    res = fit_stats(estimator, ss, labels, method=method, outcome=outcome)
    unit_labels = present if units is None else np.asarray(units)[present]
    res.extra["unit_labels"] = unit_labels
    if cov != "classical":
        _add_robust(res, estimator, cov, ss, X, y, codes)
    return res


def fit_stats(estimator, ss, labels, *, method=None, outcome=None) -> ReferenceResult:
    """Point estimates, variance components and classical covariance from sufficient
    statistics alone (:class:`bayespanel.core.suffstats.SuffStats` of ``[X, y]``, with ``X``
    as in :func:`fit_arrays`)."""
    method = _check_options(estimator, method, "classical")
    labels = list(labels)
    try:
        fit = core_fit(estimator, ss, labels, method)
    except EstimationError as exc:
        if estimator != "within":
            raise
        size = np.diag(ss.total) + ss.n * ss.mean ** 2
        const = [t for j, t in enumerate(labels) if t != "Intercept"
                 and ss.within[j, j] <= COLLINEAR_TOL * size[j]]
        if const:
            raise EstimationError(f"{exc} (constant within units: "
                                  f"{', '.join(map(repr, const))})") from None
        raise
    dropped = _report_dropped(estimator, ss, fit, labels)
    cols = fit.cols
    kept = [labels[j] for j in cols]
    df = np.inf if method in ("ml", "reml") else fit.df_resid
    s2u, s2e = fit.sigma2_unit, fit.sigma2_obs
    # mean residual of each unit (the intercept left out for fixed effects), kept for
    # plug-in predictions and the descriptive unit spread of fixed effects
    v = np.zeros(ss.p)
    v[cols] = -fit.beta
    v[-1] = 1.0
    ubar = ss.unit_mean @ v  # no N x k copy of the unit means
    extra = dict(fit.extra)
    if estimator == "within":
        # the unit intercepts are parameters here, not a variance component: report the
        # share of the outcome's variance they account for instead of an SD and an ICC
        extra["unit_intercept_share"] = _intercept_share(ss, ubar)
        s2u = float("nan")
    elif estimator == "between":
        extra["sigma_between"] = float(np.sqrt(fit.sigma2))
        s2e = float("nan")
    extra.update(unit_resid_mean=ubar, unit_count=ss.unit_count, cols=cols,
                 all_labels=labels, rss=fit.rss, sigma2=fit.sigma2, bread=fit.bread)
    assumptions = list(kinds.reference(estimator).notes)
    if method:
        assumptions.append(_METHOD_NOTE[method])
    return ReferenceResult(
        estimator=estimator, method=method, cov_type="classical", labels=kept,
        coef=fit.beta, vcov=classical(fit.bread, fit.sigma2), df=df,
        residual_df=fit.df_resid, sigma2_unit=s2u, sigma2_obs=s2e, n_obs=fit.n_obs,
        n_units=fit.n_units, dropped=dropped, assumptions=assumptions,
        lengths=fit.lengths, theta=fit.theta,
        group_count=None if fit.lengths is None else ss.group_count.copy(),
        loglik=fit.loglik, outcome=outcome, extra=extra, refit_info={"method": method, "fit": fit_design},
    )


def _intercept_share(ss, ubar) -> float:
    """Share of the outcome's variance (sum of squares about its mean, over the units
    with more than one row) that the estimated unit intercepts ``ubar`` account for:
    ``sum_i T_i (a_i - abar)^2 / sum_it (y_it - ybar)^2``."""
    multi = ss.unit_count > 1
    if multi.sum() < 2:
        return float("nan")
    T = ss.unit_count[multi].astype(float)
    a, yb = ubar[multi], ss.unit_mean[multi, -1]
    spread = float(np.sum(T * (a - np.average(a, weights=T)) ** 2))
    tss = float(ss.within[-1, -1] + np.sum(T * (yb - np.average(yb, weights=T)) ** 2))
    return spread / tss if tss > 0 else float("nan")


def core_fit(estimator, ss, labels, method=None, near=None) -> core.CoreFit:
    """The closed-form core of one estimator on statistics (no labels, no checks):
    what :func:`fit_stats` and the exact cross-validation of the reference fits
    (:func:`bayespanel.analysis.loo.reference_cv`) both run. ``near`` is a starting value of
    ``gamma = tau^2 / sigma^2`` for the ML/REML search (see
    :func:`~bayespanel.reference.core.likelihood_core`)."""
    pr = column_priority(labels)
    if estimator == "pooled":
        return core.pooled_core(ss, priority=pr)
    if estimator == "within":
        return core.within_core(ss, priority=pr)
    if estimator == "between":
        return core.between_core(ss, priority=pr)
    if method == "swamy-arora":
        return core.swamy_arora_core(ss, priority=pr)
    return core.likelihood_core(ss, method, priority=pr, near=near)


def column_priority(labels):
    """Columns kept first when some are collinear: the intercept, then the occasion
    indicators (effects absorb a trend such as experience, not the other way round)."""
    first = [j for j, t in enumerate(labels) if t == "Intercept"]
    occ = [j for j, t in enumerate(map(parse, labels)) if t.is_occasion and t.part == AS_IS]
    return first + occ


def _report_dropped(estimator, ss, fit, labels):
    k = ss.p - 1
    missing = [j for j in range(k) if j not in set(fit.cols.tolist())]
    dropped = {}
    if estimator == "within":
        scale = np.diag(ss.total) + ss.n * ss.mean ** 2
        constant = [j for j in missing if ss.within[j, j] <= COLLINEAR_TOL * scale[j]]
        named = [labels[j] for j in constant if labels[j] != "Intercept"]
        for j in missing:
            if labels[j] == "Intercept":
                continue
            dropped[labels[j]] = ("constant within units" if j in constant else
                                  "collinear with other terms after demeaning")
        if named:
            warnings.warn(
                f"fixed effects cannot estimate covariates that are constant within units; "
                f"dropped: {', '.join(map(repr, named))} (see result.dropped)",
                DataHandlingWarning, skip_file_prefixes=(_PKG_DIR,))
        other = [labels[j] for j in missing if j not in constant]
        if other:
            warnings.warn(
                f"dropped {', '.join(map(repr, other))}: collinear with the other terms "
                "once unit means are removed", DataHandlingWarning,
                skip_file_prefixes=(_PKG_DIR,))
        single = fit.extra.get("singletons", 0)
        if single:
            warnings.warn(
                f"{single} unit(s) with a single row carry no within information and were "
                f"dropped from the within estimation ({fit.n_obs} rows of {fit.n_units} "
                "units remain)", DataHandlingWarning,
                skip_file_prefixes=(_PKG_DIR,))
        return dropped
    scale = np.diag(ss.total) + ss.n * ss.mean ** 2
    for j in missing:
        # a column whose unit means are all equal (a schedule every unit follows, an
        # occasion indicator of a balanced panel) says nothing about differences between units
        flat = estimator == "between" and (ss.total - ss.within)[j, j] <= COLLINEAR_TOL * scale[j]
        dropped[labels[j]] = ("the same unit mean for every unit" if flat else
                              "collinear with other terms")
    # unit means of occasion indicators are constant in balanced panels: expected, quiet
    loud = [labels[j] for j in missing if not parse(labels[j]).is_occasion]
    if loud:
        warnings.warn(
            f"dropped {', '.join(map(repr, loud))} from the {estimator} fit: collinear with "
            "the other terms on these rows (see result.dropped)",
            DataHandlingWarning, skip_file_prefixes=(_PKG_DIR,))
    return dropped


# ---------------------------------------------------------------------- robust covariances
def regression_rows(res, estimator, ss, X, y, codes):
    """Rows, residuals and clusters of the regression that was solved.

    Returns ``(Xr, e, clusters, G)``: the demeaned rows (fixed effects, single-row units
    left out), the unit means (between, one cluster per unit), the quasi-demeaned rows
    (random-intercept fits) or the rows themselves (pooled).
    """
    cols = res.extra["cols"]
    beta = res._coef
    if estimator == "pooled":
        Xr = X[:, cols]
        return Xr, y - Xr @ beta, codes, ss.n_units
    if estimator == "between":
        Xr = ss.unit_mean[:, cols]
        return Xr, ss.unit_mean[:, -1] - Xr @ beta, np.arange(ss.n_units), ss.n_units
    means = ss.unit_mean[codes]
    if estimator == "within":
        keep = ss.unit_count[codes] > 1
        Xr = (X[:, cols] - means[:, cols])[keep]
        yr = (y - means[:, -1])[keep]
        _, cl = np.unique(codes[keep], return_inverse=True)
        return Xr, yr - Xr @ beta, cl.ravel(), int(cl.max()) + 1
    pos = np.searchsorted(ss.lengths, ss.unit_count)
    th = res.theta_by_length[pos][codes]
    Xr = X[:, cols] - th[:, None] * means[:, cols]
    yr = y - th * means[:, -1]
    return Xr, yr - Xr @ beta, codes, ss.n_units


def _add_robust(res, estimator, cov, ss, X, y, codes):
    Xr, e, cl, G = regression_rows(res, estimator, ss, X, y, codes)
    bread = res.extra["bread"]
    if cov == "cluster":
        V, df = cr1_covariance(res, estimator, ss, group_scores(Xr, e, cl, G), Xr.shape[0])
    else:
        V, df = cr2(Xr, e, cl, bread, G)
    set_covariance(res, cov, V, df, G)
