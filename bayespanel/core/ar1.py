"""AR(1) errors within units, on sufficient statistics.

Model: ``y_it = x_it'b + u_i + e_it`` with ``u_i ~ N(0, tau^2)`` and errors of one unit
following a stationary AR(1) on the occasions' own time scale,
``Cov(e_it, e_is) = sigma^2 rho^|time_t - time_s|``. Consecutive observed rows of a unit
(a *link*) are ``d`` time units apart and correlated ``phi = rho^d``, so gaps need no
special case (a continuous-time AR(1), Brockwell and Davis 1991, section 3.3). Unit i's
covariance is ``Sigma_i = sigma^2 R_i + tau^2 11'``; with links ``k = 1..T_i - 1``,
``phi_k = rho^(d_k)``, residuals ``r = y - x'b`` in time order and ``g = tau^2 / sigma^2``:

    q_i   = r_1^2 + sum_k (r_k+1 - phi_k r_k)^2 / (1 - phi_k^2)     # r' R^-1 r
    w'r_i = r_1   + sum_k (r_k+1 - phi_k r_k) / (1 + phi_k)         # 1' R^-1 r
    c_i   = 1     + sum_k (1 - phi_k) / (1 + phi_k)                 # 1' R^-1 1
    log p(y_i) = -1/2 [ T_i log 2pi sigma^2 + sum_k log(1 - phi_k^2) + log(1 + g c_i)
                        + (q_i - g (w'r_i)^2 / (1 + g c_i)) / sigma^2 ]

(``R^-1`` factors through the innovations of the AR(1), Brockwell and Davis 1991,
section 5.2; the rank-one term is the Sherman-Morrison identity.) The pooled model is
``tau = 0``; fixed effects (a flat prior on the intercepts) the limit ``tau -> inf``, taken
as the density of the within-transformed rows (see :func:`loglik`).

Every term is a quadratic form in ``v = [-b, 1]`` through cross-products of ``z = [x, y]``
that do not depend on the parameters: per gap length ``d`` the cross-products of the link
pairs ``[z_k, z_k+1]``; the first rows' cross-products; and, per group of units with the
same count of links of each gap length (so the same ``T_i`` and ``c_i``), the
cross-products of the stacked vector ``[z_1, E_d, S_d]`` (``E_d``, ``S_d``: the sums of
``z`` at the ends and at the starts of the unit's ``d``-links). A gradient therefore costs
the same for a hundred rows or a million; it grows with the number of distinct gap lengths
and link patterns, which is small when occasions are regular.

The statistics come from one mergeable pass: :func:`partial` summarises any block of rows,
:func:`merge` joins two blocks (a unit split between them is joined by the link from the
earlier block's last row to the later block's first, which each block carries), and
:func:`finalize` groups the units. All moments are kept about their means and merged with
the pairwise update of Chan, Golub and LeVeque (1979).

The Gaussian builders call this module with ``errors="ar1"``
(:class:`bayespanel.bayes.GaussianModel`); what does not work with AR(1) errors yet
refuses through :func:`refuse_pending` (docs/serial-correlation.md lists it).

Layout: the time axis (:func:`occasion_times`, :class:`Timeline`) is in
:mod:`bayespanel.core.ar1time`, the mergeable pass (:func:`partial`, :func:`merge`,
:func:`finalize`, :class:`AR1Stats`) in :mod:`bayespanel.core.ar1stats`, the row-level
functions over draws (conditionals, held-out rows, simulated errors) in
:mod:`bayespanel.core.ar1rows`; this module keeps the density, the data swap of compiled
models and the refusals, and exports every public name of the four.

References
----------
.. [1] Brockwell, P. J. and Davis, R. A. (1991). *Time Series: Theory and Methods*, 2nd ed.
   Springer. doi:10.1007/978-1-4419-0320-4
.. [2] Chan, T. F., Golub, G. H. and LeVeque, R. J. (1979). Updating formulae and a
   pairwise algorithm for computing sample variances. Technical report STAN-CS-79-773.
.. [3] Sherman, J. and Morrison, W. J. (1950). Adjustment of an inverse matrix
   corresponding to a change in one element of a given matrix. Annals of Mathematical
   Statistics 21(1), 124-127. doi:10.1214/aoms/1177729893
"""

from __future__ import annotations

import numbers

import numpy as np

from .ar1rows import (_LOG_2PI, by_draw_blocks, holdout_logdensity, occasion_conditional,
                      occasion_logdensity, simulate_errors, unit_effect_conditional,
                      unit_logdensity)
from .ar1stats import AR1Group, AR1Partial, AR1Stats, compute, finalize, merge, partial
from .ar1time import Timeline, occasion_times
from .errors import SpecificationError

__all__ = [
    "occasion_times", "Timeline", "AR1Partial", "AR1Group", "AR1Stats", "partial", "merge",
    "finalize", "compute", "loglik", "unit_logdensity", "unit_effect_conditional",
    "occasion_conditional", "occasion_logdensity", "holdout_logdensity", "simulate_errors",
    "by_draw_blocks", "data_values", "with_values", "structure", "ERRORS", "refuse_pending",
    "group_terms",
]

#: the error structures of the Gaussian models: independent, or AR(1) within units
ERRORS = ("iid", "ar1")



def refuse_pending(errors, what: str) -> None:
    """Refuse ``what`` for a model with ``errors="ar1"`` (not available for it yet).

    ``errors`` is the model's error structure (or anything with an ``errors`` attribute,
    such as a model specification); nothing happens for ``"iid"``.
    """
    errors = getattr(errors, "errors", errors)
    if errors == "ar1":
        raise SpecificationError(
            f"{what} is not available yet for models with errors='ar1' (AR(1) errors "
            "within units); fit the model with errors='iid' for it, and see "
            "docs/serial-correlation.md for what works with errors='ar1'")


# ---------------------------------------------------------------------------- density
def _quad(A, v):
    """``v' A v`` for a stack of matrices ``A`` (..., p, p) (elementwise: works on numpy
    and on pytensor variables alike)."""
    return (A * v[:, None] * v[None, :]).sum(axis=(-2, -1))


def loglik(v, arrays: dict, rho, sigma, tau, xp=np):
    """Marginal log-likelihood of the AR(1) panel model from its statistics.

    Parameters
    ----------
    v : array (p,)
        ``[-b, 1]`` in the coordinates of ``arrays`` (:meth:`AR1Stats.arrays`).
    arrays : dict
        From :meth:`AR1Stats.arrays`.
    rho : float
        Correlation of two errors one time unit apart, in (-1, 1) (non-negative when the
        gaps are not whole numbers).
    sigma : float
        Error SD (the stationary SD of ``e_it``).
    tau : float or None
        SD of the unit intercepts. ``0``: the pooled model. ``None``: fixed effects, the
        intercepts integrated out under a flat prior; what is returned is then the
        density of the within-transformed rows ``H_i' r_i`` (``H_i`` an orthonormal
        basis of the contrasts of unit i's rows), that is the flat-prior integral
        ``int N(r_i; u 1, sigma^2 R_i) du`` times ``sqrt(T_i)``; at ``rho = 0`` it is
        :func:`bayespanel.core.gaussian.within_loglik`. Units with one row add 0.
    xp : module
        ``numpy`` or ``pytensor.tensor`` (then ``v``, ``rho``, ``sigma``, ``tau`` may be
        symbolic and the result is a scalar expression PyMC can differentiate).

    Returns
    -------
    float or scalar expression
        ``sum_i log p(y_i | b, rho, sigma, tau)`` (the module docstring).
    """
    if xp is np:
        rho = float(rho)
        if not -1.0 < rho < 1.0:
            raise ValueError(f"rho must be in (-1, 1), got {rho}")
        if rho < 0 and not np.all(arrays["gaps"] == np.round(arrays["gaps"])):
            raise ValueError("a negative rho needs whole-number gaps between occasions")
    gaps = arrays["gaps"]
    phi = rho ** gaps
    one_m = 1.0 - phi ** 2
    q = _quad(arrays["first"], v)
    if len(gaps):
        qs = _quad(arrays["link_start"], v)
        qe = _quad(arrays["link_end"], v)
        qc = _quad(arrays["link_cross"], v)
        q = q + xp.sum((qe - 2.0 * phi * qc + phi ** 2 * qs) / one_m)
        logdet = xp.sum(arrays["link_count"] * xp.log(one_m))
    else:
        logdet = 0.0
    s2 = sigma ** 2
    n, N = arrays["n"], arrays["n_units"]
    fixed = tau is None
    pooled = not fixed and isinstance(tau, numbers.Real) and tau == 0
    if pooled:
        return -0.5 * (n * (_LOG_2PI + xp.log(s2)) + logdet + q / s2)
    # per group: c = 1' R^-1 1 and (w'r)^2 = L' cp L with L = l (x) v, l = [1, 1/(1+phi),
    # -phi/(1+phi)] over the group's gap lengths; groups with the same number of gap
    # lengths are computed together
    g = None if fixed else tau ** 2 / s2
    log_c = 0.0
    sub = 0.0
    p = arrays["first"].shape[0]
    for grp in arrays["groups"]:
        count, T = grp["count"], grp["T"]
        G, m = grp["index"].shape
        c, lvec = group_terms(grp, phi, xp)
        L = (lvec[:, :, None] * v[None, None, :]).reshape((G, (1 + 2 * m) * p))
        wr2 = (grp["cp"] * L[:, :, None] * L[:, None, :]).sum(axis=(1, 2))
        if fixed:
            log_c = log_c + (count * (xp.log(c) - np.log(T))).sum()
            sub = sub + (wr2 / c).sum()
        else:
            h = 1.0 + g * c
            log_c = log_c + (count * xp.log(h)).sum()
            sub = sub + (g * wr2 / h).sum()
    m = n - N if fixed else n
    return -0.5 * (m * (_LOG_2PI + xp.log(s2)) + logdet + log_c + (q - sub) / s2)


def group_terms(grp: dict, phi, xp=np):
    """``(c, l)`` of one entry of ``arrays["groups"]`` at link correlations ``phi`` (per
    gap length): ``c = 1' R^-1 1`` per group (G,) and the weights ``l`` (G, 1 + 2 m) of
    the stacked vector ``[z_1, E, S]`` with ``1' R^-1 r = l'[r_1, E_r, S_r]``."""
    idx = grp["index"]
    G, m = idx.shape
    if not m:
        return np.ones(G), np.ones((G, 1))
    ph = phi[idx]
    c = 1.0 + (grp["links"] * (1.0 - ph) / (1.0 + ph)).sum(axis=1)
    return c, xp.concatenate([xp.ones((G, 1)), 1.0 / (1.0 + ph), -ph / (1.0 + ph)], axis=1)


# ---------------------------------------------------------------------------- data swap
_DATA_LEAVES = ("first", "link_start", "link_end", "link_cross")


def data_values(arrays: dict) -> dict:
    """The numbers of :meth:`AR1Stats.arrays` that change with the outcome, by name
    (``ar1_first``, ``ar1_link_start``, ..., ``ar1_cp_<i>`` per group): what a model may
    hold as shared data and swap for new data on the same rows (:func:`structure` equal)."""
    out = {f"ar1_{k}": np.asarray(arrays[k], dtype=float) for k in _DATA_LEAVES}
    for i, grp in enumerate(arrays["groups"]):
        out[f"ar1_cp_{i}"] = np.asarray(grp["cp"], dtype=float)
    return out


def with_values(arrays: dict, values: dict) -> dict:
    """``arrays`` with the entries of :func:`data_values` replaced by ``values`` (for
    example PyTensor shared variables of the same names)."""
    out = dict(arrays)
    for k in _DATA_LEAVES:
        out[k] = values[f"ar1_{k}"]
    out["groups"] = [{**grp, "cp": values[f"ar1_cp_{i}"]}
                     for i, grp in enumerate(arrays["groups"])]
    return out


def structure(arrays: dict) -> tuple:
    """What the shape of the density's expression depends on (rows, units, gap lengths,
    link patterns): two sets of statistics with the same structure differ only in
    :func:`data_values`, so a compiled model can swap one for the other."""
    def key(a):
        a = np.asarray(a)
        return (a.shape, a.tobytes())
    groups = tuple((key(g["count"]), key(g["T"]), key(g["index"]), key(g["links"]))
                   for g in arrays["groups"])
    return (int(arrays["n"]), int(arrays["n_units"]), key(arrays["gaps"]),
            key(arrays["link_count"]), groups)
