"""Exact cross-validation of the frequentist reference fits with plug-in predictive densities.

A reference fit has no posterior to importance-sample, but its refits are closed form and
cheap, so it enters a LOO comparison through *exact* leave-one-out (or grouped K-fold)
cross-validation: refit without the held-out points, then score them with the plug-in
density at the same level as the Bayesian terms (the marginal density of a new unit, or
the conditional density of a held-out occasion given the unit's other rows; Bürkner,
Gabry and Vehtari 2021). The covariate columns (including unit means in the Mundlak and
within-between designs) are those of the full estimation sample, exactly as in the
Bayesian PSIS terms, so both sides answer the same question on the same rows.

Exact leave-one-out runs at every size: each refit reads the sufficient statistics of
the rows without the held-out unit or row, obtained from those of all rows by exact
downdates (:mod:`bayespanel.analysis.loo._downdate`), and runs the estimator's own closed-form
core (:func:`bayespanel.reference.estimators.core_fit`) on them. So the refit is the
estimator itself on the reduced rows, column selection and variance components included:
the random-intercept fits re-estimate ``sigma_unit`` and ``sigma_obs`` without the point
(Swamy-Arora in closed form; ML and REML by the same root search, started at the
full-data optimum). Holding the variance components at their full-data values would let
the held-out point inform its own prediction, so it would not be leave-one-out of the
estimator. The refits of the pooled, within and Swamy-Arora fits run for many held-out
points at once (:mod:`bayespanel.analysis.loo._batch`: the same downdates and cores with
the points on a leading axis; equal to the one-at-a-time loop to 1e-10, which ML and REML
still use). Grouped K-fold (``folds=K``) refits with
:func:`bayespanel.reference.fit_arrays` on each fold's training rows. The densities are
those of :mod:`bayespanel.core.gaussian`.
"""

from __future__ import annotations

import numpy as np

from ... import kinds
from ...core.errors import EstimationError, SpecificationError
from ...core.mathcore import unit_sd_draws
from ._draws import check_level, from_draws
from ...core import gaussian
from . import _batch
from ._downdate import Downdates
from .pointwise import holdout_loglik, undefined_reason
from .result import LOOResult

__all__ = ["reference_cv", "reference_columns", "exact_loo_values"]


def reference_columns(ref):
    """``(M, labels)``: the columns a reference estimator is refitted on."""
    d = ref.design
    if d is None:
        raise SpecificationError(
            "reference fits enter a comparison through exact cross-validation, which needs "
            "the design; fit them from a Panel (bp.reference.random(panel, formula))")
    est = ref.estimator
    if est == "between":
        raise EstimationError("the between fit predicts unit means, not rows; it has no "
                              "predictive density at the unit or occasion level")
    if est in ("pooled", "random"):
        return d.X, list(d.terms)
    if est == "within":
        tv = [d.terms.index(t) for t in d.time_varying]
        return d.X[:, tv], [d.terms[j] for j in tv]
    return d.matrices(est)


def _score(ref, M, labels, test, level):
    from ...reference import fit_arrays

    d = ref.design
    train = ~test
    fit = fit_arrays(ref.estimator, M[train], d.y[train], d.unit_codes[train], labels,
                     method=ref.method, cov="classical")
    cols = np.asarray(fit.extra["cols"], dtype=np.int64)
    b = np.zeros((1, M.shape[1]))
    b[0, cols] = fit.coef.to_numpy()
    sigma = np.array([fit.sigma_obs])
    ue = kinds.reference(ref.estimator).unit_effects
    tau = unit_sd_draws(ue, fit.sigma_unit if ue == "random" else None, (1,))
    return holdout_loglik(M, d.y, d.unit_codes, test, b, sigma, tau, level)[0]


def _plugin(fit, k, unit_effects):
    """``(v = [-b, 1], sigma, tau)`` of a core fit for the plug-in densities."""
    v = np.zeros(k + 1)
    v[np.asarray(fit.cols, dtype=np.int64)] = -fit.beta
    v[-1] = 1.0
    sigma = float(np.sqrt(fit.sigma2_obs))
    tau = unit_sd_draws(unit_effects, np.sqrt(fit.sigma2_unit)
                        if unit_effects == "random" else None, ())
    tau = None if tau is None else float(tau)
    return v, sigma, tau


#: seconds between progress lines of a long exact cross-validation
PROGRESS_EVERY = 5.0


def exact_loo_values(ref, level="occasion", progress=None):
    """Exact leave-one-out log predictive densities of a reference fit, one per point
    (unit or estimation row; ``nan`` where fixed effects cannot predict a row of a unit
    with no other rows), from downdated statistics (see the module docstring).

    ``progress``, a callable, receives a line every ``PROGRESS_EVERY`` seconds."""
    import time

    from ...core import suffstats
    from ...reference.estimators import core_fit

    M, labels = reference_columns(ref)
    d = ref.design
    ue = kinds.reference(ref.estimator).unit_effects
    Z = np.column_stack([M, d.y])
    codes = np.asarray(d.unit_codes, dtype=np.int64)
    dd = Downdates(suffstats.compute(M, d.y, codes), Z, codes)
    k = M.shape[1]
    near = ref.extra.get("gamma") if ref.method in ("ml", "reml") else None

    def fit(stats):
        return _plugin(core_fit(ref.estimator, stats, labels, ref.method, near=near), k, ue)

    last = [time.perf_counter()]

    def tick(done, total):
        now = time.perf_counter()
        if progress is not None and now - last[0] >= PROGRESS_EVERY:
            last[0] = now
            progress(f"  exact CV of the {ref.estimator} fit: {done} of {total} "
                     f"{'units' if level == 'unit' else 'rows'} refitted")

    if (ref.estimator, ref.method) in _batch.BATCHED and not _LOOP_ONLY:
        return _batched_values(ref, dd, Z, codes, level, fit, tick, labels, ue)
    if level == "unit":
        out = np.empty(d.n_units)
        for i in range(d.n_units):
            tick(i, d.n_units)
            v, sigma, tau = fit(dd.without_unit(i))
            r = Z[dd.unit_rows(i)] @ v
            out[i] = gaussian.unit_logdensity(r, np.zeros(len(r), dtype=np.int64), sigma,
                                              tau)[0]
        return out
    out = np.full(d.n, np.nan)
    for j in range(d.n):
        tick(j, d.n)
        i = codes[j]
        T = dd.starts[i + 1] - dd.starts[i]
        if ue == "fixed" and T < 2:
            continue  # nothing to predict this row from
        v, sigma, tau = fit(dd.without_row(j))
        R = (T * dd.ss.unit_mean[i] - Z[j]) @ v
        out[j] = gaussian.occasion_logpdf(Z[j] @ v, R, T - 1.0, sigma, tau)
    return out


#: True: every exact leave-one-out refit runs in the loop, one point at a time (the
#: reference the batched refits are tested against)
_LOOP_ONLY = False


def _batched_values(ref, dd, Z, codes, level, fit, tick, labels, ue):
    """:func:`exact_loo_values` with the refits of the closed-form estimators batched
    (:mod:`bayespanel.analysis.loo._batch`); points the batch leaves (``ok`` False) are
    refitted by ``fit`` one at a time, as in the loop."""
    from ...reference.estimators import column_priority

    d = ref.design
    priority = column_priority(labels)
    k = Z.shape[1] - 1
    T_of = np.diff(dd.starts)
    if level == "unit":
        points, out = np.arange(d.n_units), np.empty(d.n_units)
    else:
        points, out = np.arange(d.n), np.full(d.n, np.nan)
        if ue == "fixed":  # nothing to predict a row of a unit with no other rows from
            points = points[T_of[codes] >= 2]
    for a in range(0, len(points), _batch.BATCH):
        tick(a, len(out))
        pts = points[a:a + _batch.BATCH]
        st = (_batch.units_left_out(dd, pts) if level == "unit"
              else _batch.rows_left_out(dd, pts))
        beta, s2e, s2u, ok = _batch.fit_batch(st, ref.estimator, priority)
        V = np.concatenate([-beta, np.ones((len(pts), 1))], axis=1)
        sigma = np.sqrt(s2e)
        tau = unit_sd_draws(ue, np.sqrt(s2u) if ue == "random" else None, (len(pts),))
        if level == "unit":
            for j in np.flatnonzero(ok):
                i = pts[j]
                r = Z[dd.unit_rows(i)] @ V[j]
                out[i] = gaussian.unit_logdensity(
                    r, np.zeros(len(r), dtype=np.int64), sigma[j],
                    None if tau is None else tau[j])[0]
        else:
            i = codes[pts]
            T = T_of[i]
            R = np.einsum("bp,bp->b", T[:, None] * dd.ss.unit_mean[i] - Z[pts], V)
            r = np.einsum("bp,bp->b", Z[pts], V)
            vals = gaussian.occasion_logpdf(r, R, T - 1.0, sigma, tau)
            out[pts[ok]] = vals[ok]
        for j in np.flatnonzero(~ok):  # the loop's refit (it raises where the fit would)
            v, sg, tu = fit(dd.without_unit(pts[j]) if level == "unit"
                            else dd.without_row(pts[j]))
            if level == "unit":
                r = Z[dd.unit_rows(pts[j])] @ v
                out[pts[j]] = gaussian.unit_logdensity(
                    r, np.zeros(len(r), dtype=np.int64), sg, tu)[0]
            else:
                i, T = codes[pts[j]], T_of[codes[pts[j]]]
                R = (T * dd.ss.unit_mean[i] - Z[pts[j]]) @ v
                out[pts[j]] = gaussian.occasion_logpdf(Z[pts[j]] @ v, R, T - 1.0, sg, tu)
    return out


def reference_cv(ref, level="occasion", folds=None, seed=0, progress=None) -> LOOResult:
    """Exact cross-validated ELPD of a reference fit (closed-form refits).

    Parameters
    ----------
    ref : ReferenceResult
        Fitted from a Panel or Design (``pooled``, ``within``, ``random``, ``mundlak`` or
        ``within_between``).
    level : {"unit", "occasion"}
    folds : int, optional
        ``None`` (default): exact leave-one-out, one refit per unit or per row (from
        downdated statistics, at every size). An integer ``K``: grouped K-fold with the
        same folds as :func:`bayespanel.analysis.loo.kfold`.
    seed : int
        Seed of the folds.
    progress : callable, optional
        Receives a progress line every few seconds of a long exact cross-validation.

    Returns
    -------
    LOOResult
        ``method`` is ``"exact CV"`` (leave-one-out) or ``"exact K-fold CV (K=..)"``;
        ``p_loo`` is ``nan`` (a plug-in fit has no effective number of parameters).
    """
    check_level(level)
    M, labels = reference_columns(ref)
    d = ref.design
    ue = kinds.reference(ref.estimator).unit_effects
    reason = undefined_reason(ue, level, d.T)
    if reason:
        raise EstimationError(reason)
    n, N = d.n, d.n_units
    proxy = from_draws(kind=ref.estimator, unit_effects=ue, labels=labels, M=M, y=d.y,
                       codes=d.unit_codes, coef=np.zeros((1, M.shape[1])), sigma=np.ones(1),
                       tau=np.ones(1), units=d.units, time=d.time, rows=d.rows,
                       unit_name=getattr(getattr(d, "spec", None), "unit", None),
                       time_name=getattr(getattr(d, "spec", None), "time", None))
    labels_df = proxy.point_index(level)
    elpd_i = np.full(len(labels_df), np.nan)
    groups = []
    if folds is None:
        elpd_i = exact_loo_values(ref, level, progress)
        method = "exact CV"
    else:
        from .psis import _folds

        if not isinstance(folds, (int, np.integer)) or folds < 2:
            raise SpecificationError(f"folds={folds!r} must be None or an integer of at least 2")
        fold = _folds(proxy, level, int(folds), seed)
        groups = []
        for k in range(int(folds)):
            test = fold == k
            pts = np.unique(d.unit_codes[test]) if level == "unit" else np.flatnonzero(test)
            groups.append((test, list(pts)))
        method = f"exact K-fold CV (K={folds})"
    for test, pts in groups:
        if level == "occasion" and ue == "fixed":
            held_units = d.unit_codes[test]
            if np.all(np.isin(held_units, d.unit_codes[~test], invert=True)):
                continue  # nothing predictable in this group (single-row units)
        elpd_i[pts] = _score(ref, M, labels, test, level)
    ok = np.isfinite(elpd_i)
    notes = [f"{method} with closed-form refits ({ref.estimator}"
             + (f", {ref.method}" if ref.method else "") + ") and plug-in predictive densities"]
    if not ok.all():
        notes.append(f"{int((~ok).sum())} row(s) left out: fixed effects cannot predict an "
                     "occasion of a unit with no other (training) rows")
    pw = labels_df.copy()
    pw["elpd"] = elpd_i
    pw = pw.loc[ok].reset_index(drop=True)
    e = pw["elpd"].to_numpy()
    se = float(np.sqrt(len(e) * np.var(e, ddof=1))) if len(e) > 1 else float("nan")
    return LOOResult(level=level, method=method, elpd=float(e.sum()), se=se, p_loo=None,
                     pointwise=pw, notes=notes, family="gaussian")
