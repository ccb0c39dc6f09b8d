"""Exact cross-validation of the frequentist reference fits with plug-in predictive densities.

A reference fit has no posterior to importance-sample, but its refits are closed form and
cheap, so it enters a LOO comparison through *exact* leave-one-out (or grouped K-fold)
cross-validation: refit without the held-out points, then score them with the plug-in
density at the same level as the Bayesian terms (the marginal density of a new unit, or
the conditional density of a held-out occasion given the unit's other rows; Bürkner,
Gabry and Vehtari 2021). The covariate columns (including unit means in the Mundlak and
within-between designs) are those of the full estimation sample, exactly as in the
Bayesian PSIS terms, so both sides answer the same question on the same rows.

The refits use :func:`bayespanel.reference.fit_arrays` with the fit's own estimator and
variance-component method; the densities are those of :mod:`bayespanel.models.gaussian`
(through :func:`~bayespanel.loo.pointwise.holdout_loglik`).
"""

from __future__ import annotations

import numpy as np

from ..errors import EstimationError, SpecificationError
from ._draws import check_level, from_draws
from .pointwise import holdout_loglik, undefined_reason
from .result import LOOResult

__all__ = ["reference_cv", "reference_columns"]

_UNIT_EFFECTS = {"pooled": "none", "within": "fixed", "random": "random", "mundlak": "random",
                 "within_between": "random"}


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
    from ..reference import fit_arrays

    d = ref.design
    train = ~test
    fit = fit_arrays(ref.estimator, M[train], d.y[train], d.unit_codes[train], labels,
                     method=ref.method, cov="classical")
    cols = np.asarray(fit.extra["cols"], dtype=np.int64)
    b = np.zeros((1, M.shape[1]))
    b[0, cols] = fit.coef.to_numpy()
    sigma = np.array([fit.sigma_obs])
    ue = _UNIT_EFFECTS[ref.estimator]
    tau = None if ue == "fixed" else np.array([0.0 if ue == "none" else fit.sigma_unit])
    return holdout_loglik(M, d.y, d.unit_codes, test, b, sigma, tau, level)[0]


def reference_cv(ref, level="occasion", folds=None, seed=0) -> LOOResult:
    """Exact cross-validated ELPD of a reference fit (closed-form refits).

    Parameters
    ----------
    ref : ReferenceResult
        Fitted from a Panel or Design (``pooled``, ``within``, ``random``, ``mundlak`` or
        ``within_between``).
    level : {"unit", "occasion"}
    folds : int, optional
        ``None`` (default): exact leave-one-out, one refit per unit or per row. An integer
        ``K``: grouped K-fold with the same folds as :func:`bayespanel.loo.kfold`.
    seed : int
        Seed of the folds.

    Returns
    -------
    LOOResult
        ``method`` is ``"exact CV"`` (leave-one-out) or ``"exact K-fold CV (K=..)"``;
        ``p_loo`` is ``nan`` (a plug-in fit has no effective number of parameters).
    """
    check_level(level)
    M, labels = reference_columns(ref)
    d = ref.design
    ue = _UNIT_EFFECTS[ref.estimator]
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
    if folds is None:
        groups = [(d.unit_codes == i, [i]) for i in range(N)] if level == "unit" else \
            [(np.arange(n) == j, [j]) for j in range(n)]
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
