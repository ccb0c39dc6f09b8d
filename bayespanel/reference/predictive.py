"""Plug-in predictive densities of the reference fits, for exact cross-validation.

A reference fit enters a LOO comparison through exact cross-validation: refit in closed
form without the held-out rows (:meth:`ReferenceResult.refit`), then score the held-out
rows with the plug-in predictive density at the level the question needs.

* ``level="occasion"`` (a new occasion of a known unit): random intercept,
  ``N(x'b + tau^2 R / (sigma^2 + m tau^2), sigma^2 + tau^2 sigma^2 / (sigma^2 + m tau^2))``
  with ``m`` training rows of the unit and ``R`` their residual sum (Burkner, Gabry and
  Vehtari 2021); fixed effects ``N(x'b + R/m, sigma^2 (1 + 1/m))``, undefined (``nan``)
  for a unit without training rows; pooled ``N(x'b, sigma^2)``.
* ``level="unit"`` (a new unit): the marginal density of all the unit's rows,
  ``sigma^2 I + tau^2 J`` for the random intercept; pooled is the product of normals;
  fixed effects have no such density.

The formulas are written once in :mod:`bayespanel.core.gaussian`
(:func:`~bayespanel.core.gaussian.occasion_logpdf`,
:func:`~bayespanel.core.gaussian.unit_logdensity`); the functions here take the reference
fits' variances and call them, so the Bayesian LOO terms and the plug-in densities are the
same code.

References
----------
.. [1] Burkner, P.-C., Gabry, J. and Vehtari, A. (2021). Efficient leave-one-out
   cross-validation for Bayesian non-factorized normal and Student-t models.
   Computational Statistics 36, 1243-1261. https://doi.org/10.1007/s00180-020-01045-4
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..core.errors import EstimationError, SpecificationError, choices_error
from ..core import gaussian
from ..core.terms import BETWEEN, UNIT_MEAN, WITHIN, parse

__all__ = ["occasion_logpdf", "fixed_occasion_logpdf", "unit_logpdf", "log_predictive",
           "exact_holdout"]

def occasion_logpdf(resid, R, m, sigma2, tau2):
    """Random intercept: ``log p(y_it | other m rows of the unit)``; ``resid = y - x'b``,
    ``R`` the sum of the unit's other residuals (arrays broadcast).
    :func:`bayespanel.core.gaussian.occasion_logpdf` on variances."""
    return gaussian.occasion_logpdf(np.asarray(resid, dtype=float), np.asarray(R, dtype=float),
                                    np.asarray(m, dtype=float), np.sqrt(sigma2), np.sqrt(tau2))


def fixed_occasion_logpdf(resid, R, m, sigma2):
    """Fixed effects: ``N(R/m, sigma^2 (1 + 1/m))`` for the residual; ``nan`` when m = 0."""
    return gaussian.occasion_logpdf(np.asarray(resid, dtype=float), np.asarray(R, dtype=float),
                                    np.asarray(m, dtype=float), np.sqrt(sigma2), None)


def unit_logpdf(resid, codes, sigma2, tau2, n_units=None):
    """Random intercept: ``log p(y_i)`` per unit from the residuals of its rows
    (:func:`bayespanel.core.gaussian.unit_logdensity` on variances)."""
    return gaussian.unit_logdensity(np.asarray(resid, dtype=float), codes, np.sqrt(sigma2),
                                    np.sqrt(tau2), n_units)


def _model_matrix(all_labels, terms, X, Xbar):
    idx = {t: i for i, t in enumerate(terms)}
    cols = []
    for lab in all_labels:
        if lab in idx:
            cols.append(X[:, idx[lab]])
            continue
        term = parse(lab)
        if term.column.label not in idx:
            raise SpecificationError(f"cannot build column {lab!r} from the design terms")
        j = idx[term.column.label]
        if term.part in (UNIT_MEAN, BETWEEN):
            cols.append(Xbar[:, j])
        elif term.part == WITHIN:
            cols.append(X[:, j] - Xbar[:, j])
        else:
            raise SpecificationError(f"cannot build column {lab!r} from the design terms")
    return np.column_stack(cols) if cols else np.zeros((X.shape[0], 0))


def _row_means(X, codes):
    G = int(codes.max()) + 1
    T = np.bincount(codes, minlength=G).astype(float)
    out = np.empty((G, X.shape[1]))
    for j in range(X.shape[1]):
        out[:, j] = np.bincount(codes, weights=X[:, j], minlength=G) / T
    return out


def log_predictive(result, X, y, units, level="occasion", unit_means=None):
    """Plug-in log predictive densities of new rows under a reference fit.

    Parameters
    ----------
    result : ReferenceResult
        The (training) fit.
    X : (m, k) array
        The new rows in the original design columns (``design.terms``). For a result
        from :func:`fit_arrays` without a design, the model's own columns.
    y : (m,) array
    units : (m,) array
        Unit label of each new row; units of the fit are matched by label.
    level : {"occasion", "unit"}
    unit_means : {"fit", "data"}, optional
        Where the unit means of Mundlak and within-between columns come from: the
        training rows of the unit (``"fit"``, default at the occasion level; units the
        fit has not seen use their new rows) or the new rows (``"data"``, default at the
        unit level).

    Returns
    -------
    numpy.ndarray (one value per row) for ``level="occasion"``; pandas.Series indexed by
    unit for ``level="unit"``.
    """
    if level not in ("occasion", "unit"):
        raise choices_error("level", level, ("occasion", "unit"))
    unit_means = unit_means or ("fit" if level == "occasion" else "data")
    if unit_means not in ("fit", "data"):
        raise choices_error("unit_means", unit_means, ("fit", "data"))
    est = result.estimator
    if est == "between":
        raise EstimationError("the between fit predicts unit means, not rows; it has no "
                              "row-level predictive density")
    if est == "within" and level == "unit":
        raise EstimationError("fixed effects have no predictive density for a new unit "
                              "(its intercept is not modelled); use level='occasion'")
    X = np.asarray(X, dtype=float)
    if X.ndim == 1:
        X = X[:, None]
    y = np.asarray(y, dtype=float).ravel()
    ulab, codes = np.unique(np.asarray(units), return_inverse=True)
    codes = codes.ravel()
    extra = result.extra
    fit_units = pd.Index(extra["unit_labels"])
    pos = fit_units.get_indexer(ulab)                    # -1: unit not in the fit
    known = pos >= 0
    d = result.design
    if d is not None:
        new_means = _row_means(X, codes)
        if unit_means == "fit":
            fit_means = d.unit_means()
            dpos = d.units.get_indexer(ulab)
            use = dpos >= 0
            new_means[use] = fit_means[dpos[use]]
        M = _model_matrix(extra["all_labels"], d.terms, X, new_means[codes])
    else:
        M = X
    resid = y - M[:, extra["cols"]] @ result._coef
    s2, t2 = result._s2e, result._s2u
    if level == "occasion":
        m = np.where(known, extra["unit_count"][np.maximum(pos, 0)], 0)[codes]
        R = np.where(known, (extra["unit_count"] * extra["unit_resid_mean"])[
            np.maximum(pos, 0)], 0.0)[codes]
        if est == "pooled":
            return gaussian.normal_logpdf(resid, np.sqrt(s2))
        if est == "within":
            return fixed_occasion_logpdf(resid, R, m, s2)
        return occasion_logpdf(resid, R, m, s2, t2)
    vals = unit_logpdf(resid, codes, s2, 0.0 if est == "pooled" else t2, len(ulab))
    return pd.Series(vals, index=pd.Index(ulab, name="unit"), name=f"log p ({level})")


def exact_holdout(result, test, level="occasion"):
    """Refit without the ``test`` rows (closed form) and score them.

    Parameters
    ----------
    result : ReferenceResult
        A fit with a design.
    test : array of bool (length ``design.n``) or row positions
        The held-out rows. For ``level="unit"`` they must be whole units.
    level : {"occasion", "unit"}

    Returns
    -------
    As :func:`log_predictive`, for the held-out rows in design order.
    """
    d = result.design
    if d is None:
        raise EstimationError("exact_holdout needs a result with a design")
    mask = np.asarray(test)
    if mask.dtype != bool:
        m = np.zeros(d.n, dtype=bool)
        m[mask] = True
        mask = m
    if level == "unit":
        held = np.unique(d.unit_codes[mask])
        if np.isin(d.unit_codes[~mask], held).any():
            raise SpecificationError("level='unit' holds out whole units: some held-out "
                                     "units also have training rows")
    train = result.refit(~mask, cov="classical")
    units = np.asarray(d.units)[d.unit_codes[mask]]
    return train.log_predictive(d.X[mask], d.y[mask], units, level=level)
