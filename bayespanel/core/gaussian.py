"""The Gaussian panel likelihood, written once for numpy and for pytensor.

Every function here takes an ``xp`` argument, the array module to compute with: ``numpy``
(the default) for post-processing, LOO and reference checks, ``pytensor.tensor`` inside
the PyMC graph. The same lines of code therefore give the sampler's log-density and every
number computed from the draws afterwards.

Model (random intercept, Gaussian): ``y_it = x_it'b + u_i + e_it``, ``u_i ~ N(0, tau^2)``,
``e_it ~ N(0, sigma^2)``. With residuals ``r_it = y_it - x_it'b``, their unit mean
``rbar_i`` and within sum of squares ``W_i = sum_t (r_it - rbar_i)^2``, the intercepts
integrate out exactly (the covariance of unit i's rows is ``sigma^2 I + tau^2 J``; its
eigenvalues are ``sigma^2`` with multiplicity ``T_i - 1`` and ``sigma^2 + T_i tau^2``,
Searle, Casella and McCulloch 1992, section 3.3):

    log p(y_i | b, sigma, tau) = -1/2 [ T_i log 2 pi + (T_i - 1) log sigma^2
        + log(sigma^2 + T_i tau^2) + W_i / sigma^2 + T_i rbar_i^2 / (sigma^2 + T_i tau^2) ]

Summed over units this needs only ``v' within v`` and, per distinct panel length,
``sum rbar_i^2 = v' group_cp[d] v + group_count[d] (group_mean[d]'v)^2`` with
``v = [-b, 1]`` (see :mod:`bayespanel.core.suffstats`), so a gradient costs the same for ten
units or a million. ``tau = 0`` gives the pooled regression; a flat prior on the unit
intercepts gives the within (fixed-effects) likelihood, :func:`within_loglik`.

References
----------
.. [1] Searle, S. R., Casella, G. and McCulloch, C. E. (1992). *Variance Components*.
   Wiley. doi:10.1002/9780470316856
.. [2] Bürkner, P.-C., Gabry, J. and Vehtari, A. (2021). Efficient leave-one-out
   cross-validation for Bayesian non-factorized normal and Student-t models.
   Computational Statistics 36, 1243-1261. doi:10.1007/s00180-020-01045-4
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "LOG_2PI",
    "residual_vector",
    "quad_terms",
    "marginal_logdensity",
    "marginal_loglik",
    "within_loglik",
    "unit_effect_conditional",
    "occasion_conditional",
    "Scaling",
    "normal_logpdf",
    "occasion_logpdf",
    "unit_logdensity",
    "unit_loglik_rows",
    "unit_loglik_stats",
    "occasion_loglik_rows",
]

LOG_2PI = float(np.log(2.0 * np.pi))


# ---------------------------------------------------------------------------- quadratic forms
def residual_vector(b, xp=np):
    """``v = [-b, 1]`` so that ``z'v = y - x'b`` for a row ``z = [x, y]``.

    ``b`` has shape ``(k,)`` or ``(draws, k)``.
    """
    ones = xp.ones_like(b[..., :1])
    return xp.concatenate([-b, ones], axis=-1)


def quad_terms(v, within, group_cp, group_mean, group_count):
    """Residual sums of squares from the sufficient statistics.

    Parameters
    ----------
    v : array (..., p)
        ``[-b, 1]`` (see :func:`residual_vector`); leading axes are draws.
    within : array (p, p)
        Within cross-products of ``[X, y]``.
    group_cp, group_mean, group_count : arrays (D, p, p), (D, p), (D,)
        Per panel length: centred cross-products of the unit means, their mean, the count.

    Returns
    -------
    W : array (...)
        ``sum_i W_i``, the within residual sum of squares.
    S : array (..., D)
        ``sum rbar_i^2`` over the units of each panel length.
    """
    W = ((v @ within) * v).sum(axis=-1)
    # v' G_d v for every length group d, by broadcasting (plain elementwise ops keep the
    # compiled gradient fast in pytensor; an einsum there is much slower per call)
    cp = (group_cp * v[..., None, :, None] * v[..., None, None, :]).sum(axis=(-2, -1))
    S = cp + group_count * (v @ group_mean.T) ** 2
    return W, S


# ---------------------------------------------------------------------------- log densities
def marginal_logdensity(T, W, rbar_sq, sigma, tau, count=1, xp=np):
    """Log density of one unit's rows with its intercept integrated out.

    ``-1/2 [T log 2pi + (T-1) log s^2 + log(s^2 + T t^2) + W/s^2 + T rbar^2/(s^2 + T t^2)]``
    (Searle, Casella and McCulloch 1992). With ``count > 1`` the
    arguments describe ``count`` units of the same length ``T`` whose ``W`` and
    ``rbar_sq`` are summed, and the result is their summed log density. ``tau = 0`` gives
    independent rows (the pooled regression).

    Parameters
    ----------
    T : int or array
        Occasions of the unit (or of every unit in the group).
    W : float or array
        Within residual sum of squares, ``sum_t (r_t - rbar)^2``.
    rbar_sq : float or array
        Squared unit-mean residual (summed over the group when ``count > 1``).
    sigma, tau : float or array
        Occasion-level and unit-level standard deviations (broadcast against the rest).
    count : int or array, default 1
    xp : module
        ``numpy`` or ``pytensor.tensor``.
    """
    s2 = sigma ** 2
    q = s2 + T * tau ** 2
    return -0.5 * (count * T * LOG_2PI + count * (T - 1) * xp.log(s2) + count * xp.log(q)
                   + W / s2 + T * rbar_sq / q)


def marginal_loglik(v, within, group_cp, group_mean, group_count, lengths, sigma, tau, xp=np):
    """Total marginal log-likelihood of the random-intercept model on sufficient statistics.

    The within sum enters linearly, so the per-length groups carry ``W = 0`` and the pooled
    within sum is added once; each group uses :func:`marginal_logdensity`. The cost depends
    on ``p`` and the number of distinct panel lengths only.

    ``v`` may carry leading draw axes (numpy); ``sigma`` and ``tau`` then have those axes.
    """
    W, S = quad_terms(v, within, group_cp, group_mean, group_count)
    sig = sigma[..., None] if getattr(sigma, "ndim", 0) else sigma
    ta = tau[..., None] if getattr(tau, "ndim", 0) else tau
    per_group = marginal_logdensity(lengths, 0.0, S, sig, ta, count=group_count, xp=xp)
    return per_group.sum(axis=-1) - 0.5 * W / sigma ** 2


def within_loglik(v, within, n, n_units, sigma, xp=np):
    """Within (fixed-effects) log-likelihood: the unit intercepts integrated out under flat
    priors, ``-1/2 [(n - N) log(2 pi sigma^2) + v' within v / sigma^2]``."""
    W = ((v @ within) * v).sum(axis=-1)
    dof = n - n_units
    return -0.5 * (dof * (LOG_2PI + xp.log(sigma ** 2)) + W / sigma ** 2)


# ---------------------------------------------------------------------------- conditionals
def unit_effect_conditional(rbar, T, sigma, tau=None, xp=np):
    """Mean and SD of a unit intercept given the data and ``(b, sigma, tau)``.

    ``u_i | y, b, sigma, tau ~ N(tau^2 T_i rbar_i / (sigma^2 + T_i tau^2),
    tau^2 sigma^2 / (sigma^2 + T_i tau^2))`` (the normal-normal update).
    ``tau=None`` is the flat-prior (fixed-effects) limit: ``N(rbar_i, sigma^2 / T_i)``.
    """
    s2 = sigma ** 2
    if tau is None:
        return rbar * xp.ones_like(s2), xp.sqrt(s2 / T)
    t2 = tau ** 2
    q = s2 + T * t2
    return t2 * T * rbar / q, xp.sqrt(t2 * s2 / q)


def occasion_conditional(R, m, sigma, tau=None, xp=np):
    """Shift and SD of one occasion's residual given the unit's other occasions.

    With ``m`` other occasions of the unit and their residual sum ``R``, the held-out
    residual ``r_it`` is normal with mean ``tau^2 R / (sigma^2 + m tau^2)`` and variance
    ``sigma^2 + tau^2 sigma^2 / (sigma^2 + m tau^2)`` (Bürkner, Gabry and Vehtari 2021).
    ``tau=None`` (fixed effects, flat prior): mean ``R/m``, variance ``sigma^2 (1 + 1/m)``,
    undefined (nan) when ``m = 0``. ``tau = 0``: independent rows.
    """
    s2 = sigma ** 2
    if tau is None:
        with np.errstate(divide="ignore", invalid="ignore"):
            mm = xp.where(m > 0, m, np.nan) if xp is np else m
            return R / mm, xp.sqrt(s2 * (1.0 + 1.0 / mm))
    t2 = tau ** 2
    q = s2 + m * t2
    return t2 * R / q, xp.sqrt(s2 + t2 * s2 / q)


# ---------------------------------------------------------------------------- standardisation
@dataclass(frozen=True)
class Scaling:
    """Column centres and scales of ``Z = [X, y]`` used inside the sampler.

    The graph works with ``Z* = (Z - center) / scale``: the sufficient statistics
    transform exactly (cross-products divide by ``scale scale'``, means shift and divide),
    so nothing is recomputed from rows. Coefficients map back with
    ``b = A b* + a0`` (:meth:`coef_map`) and standard deviations with ``scale_y``.
    """

    center: tuple
    scale: tuple
    intercept: int | None = None

    @property
    def c(self) -> np.ndarray:
        return np.asarray(self.center, dtype=float)

    @property
    def s(self) -> np.ndarray:
        return np.asarray(self.scale, dtype=float)

    @property
    def scale_y(self) -> float:
        return float(self.scale[-1])

    @property
    def center_y(self) -> float:
        return float(self.center[-1])

    def standardise(self, stats) -> dict:
        """The arrays the likelihood needs, in standardised units."""
        c, s = self.c, self.s
        ss = np.outer(s, s)
        return {
            "within": stats.within / ss,
            "group_cp": stats.group_cp / ss[None],
            "group_mean": (stats.group_mean - c) / s,
            "group_count": stats.group_count.astype(float),
            "lengths": stats.lengths.astype(float),
        }

    def standardise_rows(self, M, y):
        c, s = self.c, self.s
        return (M - c[:-1]) / s[:-1], (y - c[-1]) / s[-1]

    def coef_map(self):
        """``(A, a0)`` with ``b = A b* + a0`` on the original scale.

        ``b_j = (s_y / s_j) b*_j`` for the slopes; the intercept adds back the centres,
        ``b_0 = s_y b*_0 + c_y - sum_j b_j c_j``.
        """
        c, s = self.c, self.s
        k = len(s) - 1
        ratio = s[-1] / s[:-1]
        A = np.diag(ratio)
        a0 = np.zeros(k)
        if self.intercept is not None:
            A[self.intercept, :] -= ratio * c[:-1]
            A[self.intercept, self.intercept] = ratio[self.intercept]
            a0[self.intercept] = c[-1]
        return A, a0

    def to_dict(self) -> dict:
        return {"center": list(map(float, self.center)), "scale": list(map(float, self.scale)),
                "intercept": self.intercept}

    @classmethod
    def from_dict(cls, d) -> "Scaling":
        return cls(tuple(d["center"]), tuple(d["scale"]), d.get("intercept"))


# ---------------------------------------------------------------------------- pointwise (rows)
def normal_logpdf(r, sd):
    """``log N(r; 0, sd^2)`` elementwise (arrays broadcast)."""
    return -0.5 * (LOG_2PI + (r / sd) ** 2) - np.log(sd)


def occasion_logpdf(r, R, m, sigma, tau=None):
    """Log density of one occasion's residual ``r`` given the unit's ``m`` other
    (training) occasions with residual sum ``R``: :func:`occasion_conditional` applied.

    ``tau=None`` is fixed effects (``nan`` where ``m = 0``), ``tau = 0`` the pooled
    regression. Arrays broadcast. This is the one implementation of the occasion-level
    predictive density: the Bayesian LOO terms, the hold-out scores of refits and the
    reference fits' plug-in densities (:mod:`bayespanel.reference.predictive`) all call it.
    """
    shift, sd = occasion_conditional(R, m, sigma, tau)
    return normal_logpdf(r - shift, sd)


def _residuals(M, y, b):
    return y[None, :] - b @ M.T


def _unit_sums(r, starts):
    return np.add.reduceat(r, starts, axis=1)


def _chunks(n_draws, n_cols, budget=2 ** 24):
    step = max(1, int(budget // max(n_cols, 1)))
    for a in range(0, n_draws, step):
        yield slice(a, min(a + step, n_draws))


def _groups(codes, n_units=None):
    """``(order, starts, T)``: a stable sort of the rows by unit, where each unit's rows
    start in the sorted order, and the units' row counts (``n_units`` units, each with at
    least one row)."""
    codes = np.asarray(codes, dtype=np.int64)
    N = int(codes.max()) + 1 if n_units is None else int(n_units)
    T = np.bincount(codes, minlength=N)
    if np.any(T == 0):
        raise ValueError("every unit code 0..N-1 needs at least one row")
    order = None if np.all(np.diff(codes) >= 0) else np.argsort(codes, kind="stable")
    starts = np.concatenate([[0], np.cumsum(T)[:-1]]).astype(np.int64)
    return order, starts, T.astype(float)


def unit_logdensity(r, unit_codes, sigma, tau, n_units=None):
    """Marginal log density of each unit's rows from their residuals ``r = y - x'b``.

    Parameters
    ----------
    r : array (n,) or (S, n)
        Residuals per row (and draw).
    unit_codes : array (n,) of int
        Unit of each row (any order).
    sigma, tau : float or array (S,)
        ``tau = 0`` for the pooled regression.

    Returns
    -------
    array (N,) or (S, N)
        :func:`marginal_logdensity` of each unit. This is the one implementation of the
        unit-level density: :func:`unit_loglik_rows` and the reference fits' plug-in
        densities call it.
    """
    r = np.asarray(r, dtype=float)
    one = r.ndim == 1
    r = np.atleast_2d(r)
    order, starts, T = _groups(unit_codes, n_units)
    if order is not None:
        r = r[:, order]
    rsum = _unit_sums(r, starts)
    rbar = rsum / T
    W = _unit_sums(r ** 2, starts) - T * rbar ** 2
    sig = np.reshape(sigma, (-1, 1)) if np.ndim(sigma) else sigma
    ta = np.reshape(tau, (-1, 1)) if np.ndim(tau) else tau
    out = marginal_logdensity(T, np.maximum(W, 0.0), rbar ** 2, sig, ta)
    return out[0] if one else out


def unit_loglik_rows(M, y, unit_codes, b, sigma, tau):
    """Per-unit marginal log density for every draw, from the rows.

    Parameters
    ----------
    M : array (n, k)
        Covariates of the model's likelihood, rows sorted by unit.
    y : array (n,)
    unit_codes : array (n,) of int, sorted
    b : array (S, k)
        Coefficient draws.
    sigma, tau : arrays (S,)
        ``tau = 0`` for the pooled model. The fixed-effects model has no unit-level
        density (a new unit's intercept is not identified) and is refused by the caller.

    Returns
    -------
    array (S, N)
        :func:`unit_logdensity` of each unit, computed in chunks of draws.
    """
    M, y, b = np.asarray(M, float), np.asarray(y, float), np.atleast_2d(b)
    N = int(np.max(unit_codes)) + 1
    out = np.empty((b.shape[0], N))
    for sl in _chunks(b.shape[0], len(y)):
        out[sl] = unit_logdensity(_residuals(M, y, b[sl]), unit_codes, sigma[sl], tau[sl], N)
    return out


def unit_loglik_stats(unit_cp, unit_mean, unit_count, b, sigma, tau, units=None,
                      budget: int = 1 << 22):
    """Per-unit marginal log density for every draw, from per-unit statistics.

    The unit-level term needs, per unit, only ``T_i``, the unit-mean residual
    ``rbar_i = zbar_i'v`` and the within residual sum of squares ``W_i = v' W_i v`` with
    ``v = [-b, 1]`` and ``W_i`` the unit's within cross-products of ``[M, y]``; so the
    terms of any set of units and draws come without the rows, a chunk of units at a
    time so memory stays bounded.

    Parameters
    ----------
    unit_cp : (N, p, p) array
        Per-unit within cross-products of ``[M, y]``.
    unit_mean : (N, p) array
        Unit means of ``[M, y]``.
    unit_count : (N,) array
        Rows per unit.
    b : (S, k) array; sigma, tau : (S,) arrays
        Draws (``tau = 0`` for the pooled model). Fixed effects have no unit-level
        density and are refused by the callers.
    units : array of int, optional
        Codes of the units to evaluate (default all), in the order wanted.
    budget : int
        About how many ``draws x units`` numbers to hold at once.

    Returns
    -------
    (S, len(units)) array
        :func:`marginal_logdensity` of each unit; equal to :func:`unit_loglik_rows` on
        the rows.
    """
    b = np.atleast_2d(np.asarray(b, dtype=float))
    sigma = np.atleast_1d(np.asarray(sigma, dtype=float))
    tau = np.atleast_1d(np.asarray(tau, dtype=float))
    units = np.arange(len(unit_count)) if units is None else np.asarray(units, dtype=np.int64)
    v = residual_vector(b)
    S = v.shape[0]
    out = np.empty((S, len(units)))
    step = max(1, budget // max(S, 1))
    for a in range(0, len(units), step):
        g = units[a:a + step]
        W = np.einsum("si,gij,sj->sg", v, unit_cp[g], v, optimize=True)
        rbar = v @ unit_mean[g].T
        T = unit_count[g].astype(float)
        out[:, a:a + step] = marginal_logdensity(
            T, np.maximum(W, 0.0), rbar ** 2, sigma[:, None], tau[:, None])
    return out


def occasion_loglik_rows(M, y, unit_codes, b, sigma, tau=None):
    """Log density of each row given the other rows of its unit, for every draw.

    :func:`occasion_logpdf` with ``m = T_i - 1`` and ``R`` the sum of the unit's other
    residuals (Bürkner, Gabry and Vehtari 2021). ``tau=None`` is the fixed-effects version
    (nan for units with a single row); ``tau = 0`` the pooled regression.

    Returns
    -------
    array (S, n)
    """
    M, y, b = np.asarray(M, float), np.asarray(y, float), np.atleast_2d(b)
    codes = np.asarray(unit_codes)
    T = np.bincount(codes)
    starts = np.concatenate([[0], np.cumsum(T)[:-1]]).astype(np.int64)
    m = (T - 1)[codes].astype(float)
    out = np.empty((b.shape[0], len(y)))
    for sl in _chunks(b.shape[0], len(y)):
        r = _residuals(M, y, b[sl])
        R = _unit_sums(r, starts)[:, codes] - r
        ta = None if tau is None else tau[sl, None]
        out[sl] = occasion_logpdf(r, R, m[None, :], sigma[sl, None], ta)
    return out
