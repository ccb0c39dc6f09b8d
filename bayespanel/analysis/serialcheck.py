"""Posterior predictive check of serial correlation: the lag-one autocorrelation of within
residuals.

For a posterior draw ``s`` with coefficients ``b_s``, the within residuals of the data are
``r = y - M b_s`` with each unit's mean removed (the unit intercept, and any column that is
constant within units, drops out). Their lag-one autocorrelation, pooled over units, is

    ac1(r) = sum over pairs (r_it * r_i,t-1) / sum over rows r_it^2,

where a pair is two rows of one unit exactly one time unit apart (a gap breaks the pair).
Removing the unit mean makes ``ac1`` negative even for independent errors (about
``-1 / T`` for ``T`` consecutive occasions: each pair of demeaned independent errors has
covariance ``-sigma^2 / T``), so the observed value is not read against 0 but
against its distribution under the model: the same statistic of replicated residuals,
drawn with the same draw's error SD (and ``rho`` under AR(1) errors) on the same rows and
occasions, then demeaned within units the same way. Replicated outcomes ``X b_s + u_i + e``
give within residuals that are the demeaned replicated errors exactly, whatever ``b_s`` and
the unit effects are, so no unit effects need to be drawn.

The observed statistic depends on the draw through ``b_s``: it is a realised discrepancy
(Gelman, Meng and Stern 1996), and the tail probability is the share of draws whose
replicated value is at least the observed one of the same draw. A tail probability near 0
means the data's residuals are more positively correlated over time than the model's
errors allow: the model's intervals are likely too narrow (``errors="ar1"``).

References
----------
.. [1] Gelman, A., Meng, X.-L. and Stern, H. (1996). Posterior predictive assessment of
   model fitness via realized discrepancies. Statistica Sinica 6(4), 733-807.
"""

from __future__ import annotations

import numpy as np

from ..core.ar1 import Timeline, simulate_errors

__all__ = ["STATISTIC", "LABEL", "lag1_statistic", "lag1_check"]

#: the check's key and label in a model's ``ppc`` list of ``results.json``
STATISTIC = "lag1_within"
LABEL = "lag-one autocorrelation of within residuals"

#: draws computed at a time (rows x draws floats in memory)
_BLOCK = 16


def _demean(R, tl):
    """Rows of ``R`` (draws x sorted rows) minus their unit's mean."""
    means = np.add.reduceat(R, tl.starts, axis=1) / tl.T
    return R - means[:, tl.codes]


def _pairs(tl):
    """Sorted rows that follow their unit's previous row exactly one time unit later."""
    return np.flatnonzero(tl.linked & (tl.gap == 1.0))


def lag1_statistic(R, tl, pairs=None) -> np.ndarray:
    """``ac1`` of each row of ``R`` (draws x rows in ``tl``'s sorted order), after
    removing unit means; ``nan`` where the residuals are all zero."""
    R = np.atleast_2d(np.asarray(R, dtype=float))
    pairs = _pairs(tl) if pairs is None else pairs
    D = _demean(R, tl)
    num = np.einsum("sj,sj->s", D[:, pairs], D[:, pairs - 1])
    den = np.einsum("sj,sj->s", D, D)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(den > 0, num / den, np.nan)


def _errors(rng, tl, sigma, rho):
    """Replicated errors (draws x sorted rows): independent with SD ``sigma``, or a
    stationary AR(1) on the occasions' own time scale (:func:`bayespanel.core.ar1.simulate_errors`,
    ``corr = rho^gap`` between a unit's consecutive rows)."""
    if rho is not None:
        return simulate_errors(tl, rho, sigma, rng)[:, tl.order]
    sigma = np.asarray(sigma, dtype=float)[:, None]
    return sigma * rng.standard_normal((sigma.shape[0], tl.n))


def lag1_check(M, y, unit_codes, times, coef, sigma, rho=None, *, seed: int = 0,
               column: str = "time") -> dict:
    """The posterior predictive check of the lag-one autocorrelation of within residuals.

    Parameters
    ----------
    M : array (n, k)
        The model's columns on the estimation rows (any row order).
    y : array (n,)
    unit_codes, times : array (n,)
        Unit and occasion of each row (times numeric, see
        :func:`bayespanel.core.ar1.occasion_times`; ``column`` names the time column in
        errors).
    coef : array (S, k)
        Posterior draws of the coefficients (already thinned to the draws wanted).
    sigma : array (S,)
        Draws of the occasion-level error SD (the stationary SD under AR(1)).
    rho : array (S,), optional
        Draws of the AR(1) coefficient; ``None`` for independent errors.
    seed : int
        Seed of the replicated errors.

    Returns
    -------
    dict or None
        ``None`` when no unit has two rows one time unit apart. Otherwise a ``ppc`` record of ``results.json``: ``statistic``, ``label``, ``observed`` (the
        posterior mean of the observed ``ac1``), ``replicated_mean``, ``p_value``
        (the share of draws with replicated ``ac1`` at least the observed one of the same
        draw) and ``replicated`` (one value per draw).
    """
    M = np.asarray(M, dtype=float)
    y = np.asarray(y, dtype=float)
    coef = np.atleast_2d(np.asarray(coef, dtype=float))
    sigma = np.asarray(sigma, dtype=float).ravel()
    rho = None if rho is None else np.asarray(rho, dtype=float).ravel()
    tl = Timeline.build(unit_codes, times, column)
    Ms, ys = M[tl.order], y[tl.order]
    pairs = _pairs(tl)
    if not len(pairs):
        return None
    rng = np.random.default_rng(seed)
    obs, rep = [], []
    for a in range(0, coef.shape[0], _BLOCK):
        b = slice(a, a + _BLOCK)
        obs.append(lag1_statistic(ys[None, :] - coef[b] @ Ms.T, tl, pairs))
        rep.append(lag1_statistic(_errors(rng, tl, sigma[b],
                                          None if rho is None else rho[b]), tl, pairs))
    obs, rep = np.concatenate(obs), np.concatenate(rep)
    ok = np.isfinite(obs) & np.isfinite(rep)
    return {"statistic": STATISTIC, "label": LABEL, "observed": float(np.mean(obs[ok])),
            "replicated_mean": float(np.mean(rep[ok])),
            "p_value": float(np.mean(rep[ok] >= obs[ok])),
            "replicated": [float(v) for v in rep[ok]]}
