"""Row-level functions of AR(1) errors over draws: a unit's effect given its rows, unit and
occasion densities, held-out rows, simulated errors (:mod:`bayespanel.core.ar1`)."""

from __future__ import annotations

import numpy as np

from .ar1time import Timeline, occasion_times

__all__ = ["unit_effect_conditional", "unit_logdensity", "occasion_conditional",
           "occasion_logdensity", "holdout_logdensity", "simulate_errors", "by_draw_blocks"]

_LOG_2PI = float(np.log(2.0 * np.pi))


def _params(x):
    """A parameter as a column over draws (S, 1), or a scalar."""
    return np.reshape(np.asarray(x, dtype=float), (-1, 1)) if np.ndim(x) else float(x)


def _link_terms(r, tl: Timeline, rho):
    """``(phi, r_prev)`` per sorted row: the link correlation to the previous row of the
    unit (0 on a unit's first row) and that row's residual (0 likewise)."""
    gap = np.where(tl.linked, tl.gap, 1.0)
    rho = _params(rho)
    phi = np.atleast_2d(np.where(tl.linked, np.power(rho, gap), 0.0))     # (1 or S, n)
    prev = np.zeros_like(r)
    prev[:, 1:] = r[:, :-1]
    prev[:, ~tl.linked] = 0.0
    return phi, prev


def _check_rho(rho, tl: Timeline):
    rho = np.asarray(rho, dtype=float)
    if np.any(np.abs(rho) >= 1):
        raise ValueError("rho must be in (-1, 1)")
    if np.any(rho < 0) and not tl.integer_gaps:
        raise ValueError("a negative rho needs whole-number gaps between occasions")


def _unit_terms(r, tl: Timeline, rho):
    """Per unit (S, N): ``q = r'R^-1 r``, ``w'r = 1'R^-1 r``, ``c = 1'R^-1 1`` and
    ``log|R|``, from the innovations of the AR(1) (module docstring), in O(rows)."""
    _check_rho(rho, tl)
    r = np.atleast_2d(np.asarray(r, dtype=float))[:, tl.order]
    phi, prev = _link_terms(r, tl, rho)
    innov = r - phi * prev
    link = tl.linked
    e2 = np.where(link, innov ** 2 / (1.0 - phi ** 2), r ** 2)
    wr = np.where(link, innov / (1.0 + phi), r)
    cc = np.where(link, (1.0 - phi) / (1.0 + phi), 1.0)
    ld = np.where(link, np.log1p(-phi ** 2), 0.0)
    return tuple(np.add.reduceat(a, tl.starts, axis=1) for a in (e2, wr, cc, ld))


def unit_effect_conditional(r, tl: Timeline, rho, sigma, tau):
    """Mean and SD of each unit's intercept given its rows and the parameters.

    With ``r`` the residuals without the intercept, the normal update gives
    ``u_i | y ~ N(tau^2 w'r_i / (sigma^2 + tau^2 c_i), tau^2 sigma^2 / (sigma^2 + tau^2 c_i))``
    (``w'r`` and ``c`` as in the module docstring; at ``rho = 0`` ``c_i = T_i`` and
    ``w'r_i`` the residual sum, as in :func:`bayespanel.core.gaussian.unit_effect_conditional`).
    ``tau=None`` is the flat-prior (fixed-effects) limit: the GLS mean ``w'r_i / c_i`` with
    variance ``sigma^2 / c_i``.

    Returns
    -------
    mean, sd : arrays (N,) or (S, N), units in the order of ``tl.keys``.
    """
    one = np.ndim(r) == 1
    _, wr, c, _ = _unit_terms(r, tl, rho)
    s2 = _params(sigma) ** 2
    if tau is None:
        mean, var = wr / c, s2 / c
    else:
        t2 = _params(tau) ** 2
        d = s2 + t2 * c
        mean, var = t2 * wr / d, t2 * s2 / d
    sd = np.sqrt(var)
    return (mean[0], sd[0]) if one else (mean, sd)


def unit_logdensity(r, tl: Timeline, rho, sigma, tau):
    """Marginal log density of each unit's rows, from the residuals ``r = y - x'b``.

    The per-unit form of :func:`loglik` in O(rows) (innovations of the AR(1) and the
    rank-one term, module docstring), for unit-level predictive checks.

    Parameters
    ----------
    r : array (n,) or (S, n)
        Residuals in the row order ``tl`` was built on (and per draw).
    tl : Timeline
    rho, sigma, tau : float or array (S,)
        ``tau = 0`` pooled, ``tau = None`` fixed effects (as in :func:`loglik`).

    Returns
    -------
    array (N,) or (S, N), units in the order of ``tl.keys``.
    """
    one = np.ndim(r) == 1
    q, wr, c, logdet = _unit_terms(r, tl, rho)
    s2 = _params(sigma) ** 2
    T = tl.T.astype(float)
    if tau is None:
        out = -0.5 * ((T - 1) * (_LOG_2PI + np.log(s2)) + logdet + np.log(c) - np.log(T)
                      + (q - wr ** 2 / c) / s2)
    else:
        g = _params(tau) ** 2 / s2
        h = 1.0 + g * c
        out = -0.5 * (T * (_LOG_2PI + np.log(s2)) + logdet + np.log(h) + (q - g * wr ** 2 / h) / s2)
    return out[0] if one else out


def occasion_conditional(r, tl: Timeline, rho, sigma, tau):
    """Mean and SD of each row's residual given the other rows of its unit, in O(T_i).

    The precision of unit i's residuals is ``Q = (R^-1 - h w w') / sigma^2`` with
    ``R^-1`` tridiagonal (the AR(1) innovations), ``w = R^-1 1`` and ``h = g / (1 + g c)``
    (``1/c`` for fixed effects, 0 pooled), so ``r_t | r_-t`` is normal with mean
    ``r_t - (Q r)_t / Q_tt`` and variance ``1 / Q_tt`` (Rue and Held 2005, Gaussian
    Markov Random Fields, section 2.2). Fixed effects give ``nan`` for units with one row.

    Returns
    -------
    mean, sd : arrays shaped like ``r``, in its row order.
    """
    _check_rho(rho, tl)
    r = np.asarray(r, dtype=float)
    one = r.ndim == 1
    r = np.atleast_2d(r)[:, tl.order]
    phi, prev = _link_terms(r, tl, rho)
    link = tl.linked
    inv1 = np.where(link, 1.0 / (1.0 - phi ** 2), 1.0)          # own innovation weight
    off = np.where(link, -phi * inv1, 0.0)                        # R^-1[t-1, t]
    nxt_inv = np.zeros_like(inv1)
    nxt_off = np.zeros_like(off)
    nxt_inv[:, :-1] = np.where(link[1:], phi[:, 1:] ** 2 / (1.0 - phi[:, 1:] ** 2), 0.0)
    nxt_off[:, :-1] = off[:, 1:]
    diag = inv1 + nxt_inv
    nxt_r = np.zeros_like(r)
    nxt_r[:, :-1] = r[:, 1:]
    Rr = diag * r + off * prev + nxt_off * nxt_r
    w = diag + off + nxt_off
    c = np.add.reduceat(w, tl.starts, axis=1)
    wr = np.add.reduceat(Rr, tl.starts, axis=1)
    s2 = _params(sigma) ** 2
    if tau is None:
        h = 1.0 / c
    else:
        g = _params(tau) ** 2 / s2
        h = g / (1.0 + g * c)
    h = h[:, tl.codes]
    Qr = (Rr - h * w * wr[:, tl.codes]) / s2
    Qtt = (diag - h * w ** 2) / s2
    if tau is None:
        Qtt = np.where(tl.T[tl.codes] > 1, Qtt, np.nan)
    mean = r - Qr / Qtt
    sd = 1.0 / np.sqrt(Qtt)
    back = np.empty_like(tl.order)
    back[tl.order] = np.arange(len(back))
    mean, sd = mean[:, back], sd[:, back]
    return (mean[0], sd[0]) if one else (mean, sd)


def occasion_logdensity(r, tl: Timeline, rho, sigma, tau):
    """``log p(r_t | r_-t)`` of every row (:func:`occasion_conditional` applied), in the
    row order of ``r``; the occasion-level LOO term of Bürkner, Gabry and Vehtari (2021,
    Computational Statistics 36) for AR(1) errors."""
    mean, sd = occasion_conditional(r, tl, rho, sigma, tau)
    z = (np.asarray(r, dtype=float) - mean) / sd
    return -0.5 * (_LOG_2PI + z ** 2) - np.log(sd)


def holdout_logdensity(r, keys, times, test, rho, sigma, tau, column: str = "time"):
    """``log p(r_t | training rows of its unit)`` of every held-out row, per draw.

    For exact refits and K-fold at the occasion level: each held-out row is scored given
    the rows of its unit that are *not* held out (several rows of one unit may be held
    out together; each is scored on its own given the training rows). A subset of the
    occasions of a continuous-time AR(1) is again one (``rho^a rho^b = rho^(a + b)``), so
    the conditional is a ratio of two marginals of :func:`unit_logdensity`:
    ``log p(r_B, r_t) - log p(r_B)`` (``B``: the training rows of the unit), in
    O(rows) per held-out row of a unit. Fixed effects (``tau=None``): the same ratio of
    flat-prior integrals, ``nan`` when the unit has no training row.

    Parameters
    ----------
    r : array (n,) or (S, n)
        Residuals of all rows (training and held out), per draw.
    keys, times : arrays (n,)
        Unit and occasion of each row.
    test : bool array (n,)
    rho, sigma, tau : float or array (S,)

    Returns
    -------
    array (points,) or (S, points), the held-out rows in row order.
    """
    one = np.ndim(r) == 1
    r = np.atleast_2d(np.asarray(r, dtype=float))
    keys, times = np.asarray(keys), occasion_times(times, column)
    test = np.asarray(test, dtype=bool)
    fixed = tau is None
    train = np.flatnonzero(~test)
    held = np.flatnonzero(test)
    out = np.empty((r.shape[0], len(held)))

    def marginal(rows):
        """``{unit key: (S,) log density of these rows}`` (fixed effects: the flat-prior
        integral itself, without the ``sqrt(T)`` of :func:`unit_logdensity`)."""
        if len(rows) == 0:
            return keys[:0], np.zeros((r.shape[0], 1))      # (never indexed as found)
        tl = Timeline.build(keys[rows], times[rows], column)
        lp = unit_logdensity(r[:, rows], tl, rho, sigma, tau)
        lp = np.atleast_2d(lp)
        if fixed:
            lp = lp - 0.5 * np.log(tl.T.astype(float))
        return tl.keys, lp

    base_keys, base = marginal(train)
    # the j-th held-out row of every unit at once: one Timeline per rank j
    tl_held = Timeline.build(keys[held], times[held], column)
    rank = np.arange(len(held)) - tl_held.starts[tl_held.codes]
    sorted_held = held[tl_held.order]
    for j in range(int(rank.max()) + 1 if len(held) else 0):
        pick = sorted_held[rank == j]
        k_j, joint = marginal(np.concatenate([train, pick]))
        lp = joint[:, np.searchsorted(k_j, keys[pick])]
        pos, has = _lookup(base_keys, keys[pick])
        lp = lp - np.where(has, base[:, pos], 0.0)
        if fixed:
            lp = np.where(has, lp, np.nan)
        out[:, np.searchsorted(held, pick)] = lp
    return out[0] if one else out


def _lookup(sorted_keys, query):
    """``(positions, found)`` of ``query`` in ``sorted_keys`` (positions clipped to a
    valid index where not found)."""
    if len(sorted_keys) == 0:
        return np.zeros(len(query), dtype=np.int64), np.zeros(len(query), dtype=bool)
    pos = np.minimum(np.searchsorted(sorted_keys, query), len(sorted_keys) - 1)
    return pos, sorted_keys[pos] == query


def simulate_errors(tl: Timeline, rho, sigma, rng):
    """Draws of stationary AR(1) errors on the rows of ``tl``, in the row order ``tl`` was
    built on: a unit's first row ``N(0, sigma^2)``, each later row
    ``phi e_prev + sigma sqrt(1 - phi^2) z`` with ``phi = rho^gap`` (the exact transition
    of the continuous-time AR(1) over the gap).

    Parameters
    ----------
    tl : Timeline
    rho, sigma : float or array (S,)
    rng : numpy Generator

    Returns
    -------
    array (S, n) (``S = 1`` for scalar parameters).
    """
    _check_rho(rho, tl)
    rho, sigma = _params(rho), _params(sigma)
    S = max(np.size(rho), np.size(sigma))
    z = rng.standard_normal((S, tl.n))
    phi = np.atleast_2d(np.where(tl.linked, np.power(rho, np.where(tl.linked, tl.gap, 1.0)),
                                 0.0)) * np.ones((S, 1))
    e = np.empty((S, tl.n))
    rank = np.arange(tl.n) - tl.starts[tl.codes]          # position within the unit
    first = rank == 0
    e[:, first] = z[:, first]
    for j in range(1, int(tl.T.max()) if tl.n else 0):
        at = np.flatnonzero(rank == j)
        ph = phi[:, at]
        e[:, at] = ph * e[:, at - 1] + np.sqrt(1.0 - ph ** 2) * z[:, at]
    e *= sigma
    back = np.empty_like(tl.order)
    back[tl.order] = np.arange(tl.n)
    return e[:, back]


def by_draw_blocks(fn, n_draws: int, n_rows: int, axis: int = 0, budget: int = 1 << 24):
    """``fn(slice)`` over consecutive blocks of draws, joined along ``axis``: the row-level
    functions of this module hold a (draws, rows) residual array, kept near ``budget``
    numbers per block."""
    step = max(1, budget // max(n_rows, 1))
    parts = [fn(slice(a, min(a + step, n_draws))) for a in range(0, n_draws, step)]
    return parts[0] if len(parts) == 1 else np.concatenate(parts, axis=axis)
