"""Pointwise log predictive terms at the unit and the occasion level.

The densities are those of :mod:`bayespanel.core.gaussian` and :mod:`bayespanel.core.ar1`
(written once there; :func:`bayespanel.bayes.draws.pointwise_terms` picks them):

* ``level="unit"``: ``log p(y_i | theta)``, the marginal density of all rows of unit ``i``
  with its intercept integrated out (:func:`~bayespanel.core.gaussian.unit_loglik_rows`);
  the fixed-effects model has none (a new unit's intercept is not modelled).
* ``level="occasion"``: ``log p(y_it | y_i,-t, theta)``, the non-factorised conditional of
  Bürkner, Gabry and Vehtari (2021)
  (:func:`~bayespanel.core.gaussian.occasion_loglik_rows`); for fixed effects it is
  undefined for units with a single row.

:func:`holdout_loglik` scores held-out points given training rows (the same conditionals
with the held-out unit's training rows only), for exact refits and K-fold.

References
----------
.. [1] Bürkner, P.-C., Gabry, J. and Vehtari, A. (2021). Efficient leave-one-out
   cross-validation for Bayesian non-factorized normal and Student-t models.
   Computational Statistics 36, 1243-1261. doi:10.1007/s00180-020-01045-4
"""

from __future__ import annotations

import numpy as np
from scipy import sparse

from ...bayes.draws import pointwise_terms
from ...core import ar1
from ...core.errors import EstimationError, SpecificationError
from ...core import gaussian
from ._draws import check_level

__all__ = ["pointwise_loglik", "holdout_loglik", "undefined_reason"]


def undefined_reason(unit_effects, level, T=None):
    """Why a level is undefined for a model (``None`` when it is defined)."""
    if unit_effects == "fixed" and level == "unit":
        return ("fixed effects do not model the intercept of a new unit, so leave-one-unit-out "
                "prediction is undefined; compare at level='occasion'")
    if unit_effects == "fixed" and T is not None and np.all(np.asarray(T) < 2):
        return "every unit has a single row, so fixed effects cannot predict a held-out occasion"
    return None


def _renumber(codes):
    _, new = np.unique(codes, return_inverse=True)
    return new.ravel().astype(np.int64)


def pointwise_loglik(fd, level, units=None):
    """Per-draw pointwise log-likelihood terms, shape ``(C, D, points)``.

    Parameters
    ----------
    fd : FitDraws
    level : {"unit", "occasion"}
    units : array of int, optional
        Restrict to these unit codes (sorted): the points are then those units (unit
        level) or all their rows (occasion level), in design order.

    Returns
    -------
    ndarray
        ``nan`` where a term is undefined (fixed effects, single-row units, occasion level).

    Notes
    -----
    For a latent-effect posterior (``fd.latent``) the terms are its own
    (:meth:`~bayespanel.bayes.latent.LatentPosterior.pointwise_loglik`): unit effects
    integrated out by adaptive Gauss-Hermite quadrature at the unit level, the density of
    the row given each draw of the unit effects at the occasion level.
    """
    check_level(level)
    reason = undefined_reason(fd.unit_effects, level)
    if reason:
        raise EstimationError(reason)
    if fd.latent is not None:
        if units is not None:
            raise SpecificationError(
                "pointwise terms of a subset of units are not available for latent-effect "
                "models (family= or random_slopes=); use the full terms")
        return np.asarray(fd.latent.pointwise_loglik(level).values, dtype=float)
    b, sigma, tau = fd.flat()
    M, y, codes = fd.M, fd.y, fd.codes
    time = fd.ar1_time
    if units is not None:
        keep = np.isin(codes, units)
        M, y, codes = M[keep], y[keep], _renumber(codes[keep])
        time = None if time is None else time[keep]
    out = pointwise_terms(M, y, codes, b, sigma, tau, level, rho=fd.flat_rho(), time=time)
    return out.reshape(fd.n_chains, fd.n_draws, -1)


def holdout_loglik(M, y, codes, test, b, sigma, tau, level, rho=None, time=None):
    """Log density of held-out points given the training rows, per draw, ``(S, points)``.

    Parameters
    ----------
    M, y, codes : arrays of all rows (sorted by unit)
    test : bool array (n,)
        Held-out rows. At the unit level they must be whole units; the points are the
        held-out units in code order. At the occasion level the points are the held-out
        rows in row order, each scored given the *training* rows of its unit
        (``m`` = their number, ``R`` = their residual sum; Bürkner, Gabry and Vehtari
        2021), so several rows of a unit may be held out together.
    b : (S, k); sigma : (S,); tau : (S,) or None (fixed effects)
    level : {"unit", "occasion"}
    rho : (S,), optional
        AR(1) errors: the correlation one time unit apart; ``time`` (n,) is then the
        occasion of every row as a number. Held-out units are scored by their marginal
        density; a held-out row given its unit's training rows
        (:func:`bayespanel.core.ar1.holdout_logdensity`).
    """
    test = np.asarray(test, dtype=bool)
    b = np.atleast_2d(b)
    sigma = np.atleast_1d(sigma)
    rho = None if rho is None else np.atleast_1d(rho)
    if level == "unit":
        return pointwise_terms(M[test], y[test], _renumber(codes[test]), b, sigma,
                               None if tau is None else np.atleast_1d(tau), "unit", rho=rho,
                               time=None if rho is None else time[test])
    if rho is not None:
        ta = None if tau is None else np.atleast_1d(tau)
        return ar1.by_draw_blocks(
            lambda sl: ar1.holdout_logdensity(y[None, :] - b[sl] @ M.T, codes, time, test,
                                              rho[sl], sigma[sl], None if ta is None else ta[sl]),
            len(sigma), len(y))
    N = int(codes.max()) + 1
    train = ~test
    m = np.bincount(codes[train], minlength=N).astype(float)
    out = np.empty((b.shape[0], int(test.sum())))
    Mt, yt, ct = M[test], y[test], codes[test]
    Mr, yr = M[train], y[train]
    onehot = sparse.csr_matrix((np.ones(int(train.sum())), (codes[train], np.arange(int(train.sum())))),
                               shape=(N, int(train.sum())))
    step = max(1, int(2 ** 22 // max(len(y), 1)))
    for a in range(0, b.shape[0], step):
        sl = slice(a, min(a + step, b.shape[0]))
        R = np.asarray((onehot @ (yr[:, None] - Mr @ b[sl].T))).T
        r = yt[None, :] - b[sl] @ Mt.T
        ta = None if tau is None else np.atleast_1d(tau)[sl, None]
        out[sl] = gaussian.occasion_logpdf(r, R[:, ct], m[ct][None, :], sigma[sl, None], ta)
    return out
