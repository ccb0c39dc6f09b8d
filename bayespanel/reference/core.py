"""Closed-form cores of the reference estimators on sufficient statistics.

Every function here takes a :class:`bayespanel.core.suffstats.SuffStats` (``Z = [X, y]``, ``y``
last) and nothing else, so the point estimates, the variance components and the
classical covariances run unchanged wherever only the statistics exist (an out-of-core
pass, for example). Cluster-robust covariances need rows and live in
:mod:`bayespanel.reference.covariance`.

Numerics: when the model has an intercept, every regression is solved on data shifted
to the global means (the intercept column left at one), and the intercept and the
covariance are mapped back exactly afterwards. This keeps covariates with large means
(years, incomes) from costing digits in the cross-products.

References
----------
.. [1] Swamy, P. A. V. B. and Arora, S. S. (1972). The exact finite sample properties of
   the estimators of coefficients in the error components regression models.
   Econometrica 40(2), 261-275. https://doi.org/10.2307/1909405
.. [2] Baltagi, B. H. and Chang, Y.-J. (1994). Incomplete panels: a comparative study of
   alternative estimators for the unbalanced one-way error component regression model.
   Journal of Econometrics 62(2), 67-89. https://doi.org/10.1016/0304-4076(94)90016-7
.. [3] Harville, D. A. (1977). Maximum likelihood approaches to variance component
   estimation and to related problems. JASA 72(358), 320-338.
   https://doi.org/10.1080/01621459.1977.10480998
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import optimize

from ..core.errors import EstimationError
from ..core.mathcore import quasi_demeaning_share
from ..core.linalg import independent_columns, inv_psd, solve_psd

__all__ = [
    "CoreFit",
    "pooled_core",
    "within_core",
    "between_core",
    "swamy_arora_core",
    "likelihood_core",
    "gls_core",
    "intercept_column",
]


@dataclass
class CoreFit:
    """What a closed-form fit leaves behind (array level, no labels).

    ``cols`` are the indices of the columns of ``X`` that were estimated (the others were
    constant within units or collinear). ``bread`` is ``(X'X)^{-1}`` of the regression
    that was solved (demeaned, unit means or quasi-demeaned ``X``), so that the classical
    covariance is ``sigma2 * bread``. ``theta`` holds the quasi-demeaning share per
    distinct panel length (``lengths``) for the random-intercept fits.
    """

    beta: np.ndarray
    cols: np.ndarray
    bread: np.ndarray
    rss: float
    sigma2: float
    df_resid: float
    n_obs: int
    n_units: int
    sigma2_unit: float = float("nan")
    sigma2_obs: float = float("nan")
    lengths: np.ndarray | None = None
    theta: np.ndarray | None = None
    loglik: float = float("nan")
    extra: dict = field(default_factory=dict)

    @property
    def vcov(self) -> np.ndarray:
        """Classical covariance ``sigma2 (X'X)^{-1}``."""
        return self.sigma2 * self.bread


# ---------------------------------------------------------------------- cross-products
def intercept_column(ss) -> int | None:
    """Index of a column of ones among the covariates, if there is one."""
    k = ss.p - 1
    for j in range(k):
        if ss.total[j, j] <= 1e-12 * max(ss.n, 1) and abs(ss.mean[j] - 1.0) < 1e-12:
            return j
    return None


def _shift(ss, icol):
    """Shift applied before solving: the global means, except for the intercept."""
    if icol is None:
        return np.zeros(ss.p)
    s = np.asarray(ss.mean, dtype=float).copy()
    s[icol] = 0.0
    return s


def _cp_rows(ss, s):
    """Uncentred cross-products of the shifted rows, ``sum (z - s)(z - s)'``."""
    d = ss.mean - s
    return ss.total + ss.n * np.outer(d, d)


def _cp_units(ss, s, weights):
    """``sum_i w(T_i) (zbar_i - s)(zbar_i - s)'`` from the per-length group statistics."""
    out = np.zeros((ss.p, ss.p))
    for d in range(len(ss.lengths)):
        w = float(weights[d])
        if w == 0.0:
            continue
        m = ss.group_mean[d] - s
        out += w * (ss.group_cp[d] + ss.group_count[d] * np.outer(m, m))
    return out


def _uncentred_scale(ss):
    """Sizes of the original columns (uncentred sums of squares), for rank decisions."""
    return np.diag(ss.total) + ss.n * ss.mean ** 2


def _solve(A, cols):
    """Least squares from cross-products ``A`` of ``[X, y]`` on the columns ``cols``.

    The normal equations are solved with the columns scaled to unit length (``D Axx D``
    with ``D = diag(Axx)^-1/2``), which costs nothing and keeps columns of very different
    sizes (an intercept beside incomes) from costing digits in the Cholesky factor."""
    y = A.shape[0] - 1
    Axx = A[cols][:, cols]
    Axy = A[cols, y]
    dg = np.diag(Axx)
    d = 1.0 / np.sqrt(np.where(dg > 0, dg, 1.0))
    scaled = Axx * np.outer(d, d)
    try:
        ci = np.linalg.inv(np.linalg.cholesky(scaled))  # triangular: L^-1
        inv = ci.T @ ci
        beta = d * (ci.T @ (ci @ (d * Axy)))
    except np.linalg.LinAlgError:
        inv = inv_psd(scaled)
        beta = d * solve_psd(scaled, d * Axy)
    rss = float(A[y, y] - Axy @ beta)
    scale = max(float(A[y, y]), np.finfo(float).tiny)
    rss = max(rss, 0.0) if rss > -1e-9 * scale else rss
    return beta, rss, (inv + inv.T) / 2 * np.outer(d, d)


def _unshift(beta, bread, cols, s, icol):
    """Map estimates on shifted data back to the original columns (exact)."""
    if icol is None or icol not in cols:
        return beta, bread
    pos = int(np.flatnonzero(cols == icol)[0])
    sx = s[cols].copy()
    sx[pos] = 0.0
    L = np.eye(len(cols))
    L[pos, :] -= sx
    b = L @ beta
    b[pos] += s[-1]
    return b, L @ bread @ L.T


def _between_scale(ss, A):
    """Sizes for rank decisions on unit-mean cross-products ``A``: each column's total
    variation over the rows (``diag(total)``), its own entry of ``A`` where it has none
    (the intercept). A column whose unit means do not vary (an occasion indicator in a
    balanced panel, the within part of a hybrid model) then counts as absent from the
    between regression, instead of entering with the rounding left in its unit means."""
    size = np.diag(ss.total)[:-1].copy()
    k = A.shape[0] - 1
    flat = ~(size > 0)
    size[flat] = np.diag(A)[:k][flat]
    icol = intercept_column(ss)
    if icol is not None:
        size[icol] = A[icol, icol]
    return np.append(size, A[k, k])


def _select(A, cols, scale, priority=None):
    k = A.shape[0] - 1
    if cols is None:
        return independent_columns(A[:k, :k], None if scale is None else scale[:k],
                                   priority=priority)
    return np.asarray(cols, dtype=np.int64)


def _need_df(df, what, n, needed):
    if df <= 0:
        raise EstimationError(
            f"the {what} has no residual degrees of freedom ({n} rows for {needed} "
            "coefficients); it cannot be estimated on these rows"
        )


# ---------------------------------------------------------------------- estimators
def pooled_core(ss, cols=None, priority=None) -> CoreFit:
    """Ordinary least squares on all rows."""
    icol = intercept_column(ss)
    s = _shift(ss, icol)
    A = _cp_rows(ss, s)
    cols = _select(A, cols, None, priority)
    beta, rss, bread = _solve(A, cols)
    beta, bread = _unshift(beta, bread, cols, s, icol)
    df = ss.n - len(cols)
    _need_df(df, "pooled regression", ss.n, len(cols))
    s2 = rss / df
    return CoreFit(beta, cols, bread, rss, s2, df, ss.n, ss.n_units, sigma2_obs=s2)


def within_core(ss, cols=None, priority=None, allow_empty=False) -> CoreFit:
    """Fixed effects: least squares on unit-demeaned data.

    The residual degrees of freedom are ``n - N - k``: the ``N`` unit means absorbed by
    demeaning count against the data. Units with a single row carry no within
    information; they are left out of ``n`` and ``N`` (they cancel in the degrees of
    freedom anyway).
    """
    k = ss.p - 1
    single = int(np.sum(ss.group_count[ss.lengths == 1]))
    n, N = ss.n - single, ss.n_units - single
    if N == 0:
        raise EstimationError("every unit has a single row: there is no within variation")
    A = ss.within
    if cols is None:
        cols = independent_columns(A[:k, :k], _uncentred_scale(ss)[:k], priority=priority)
    cols = np.asarray(cols, dtype=np.int64)
    if len(cols) == 0:
        if not allow_empty:
            raise EstimationError("no covariate varies within units: fixed effects have "
                                  "nothing to estimate")
        beta, rss, bread = np.zeros(0), float(A[-1, -1]), np.zeros((0, 0))
    else:
        beta, rss, bread = _solve(A, cols)
    df = n - N - len(cols)
    _need_df(df, "within (fixed-effects) regression", n, N + len(cols))
    s2 = rss / df
    return CoreFit(beta, cols, bread, rss, s2, df, n, N, sigma2_obs=s2,
                   extra={"singletons": single})


def between_core(ss, cols=None, weights="units", priority=None) -> CoreFit:
    """Least squares on the unit means (one row per unit).

    ``weights="units"`` weights each unit equally; ``"rows"`` weights unit means by their
    panel lengths (used by the unbalanced Swamy-Arora estimator).
    """
    icol = intercept_column(ss)
    s = _shift(ss, icol)
    w = np.ones(len(ss.lengths)) if weights == "units" else ss.lengths.astype(float)
    A = _cp_units(ss, s, w)
    cols = _select(A, cols, _between_scale(ss, A), priority)
    beta, rss, bread = _solve(A, cols)
    beta, bread = _unshift(beta, bread, cols, s, icol)
    df = ss.n_units - len(cols)
    _need_df(df, "between regression", ss.n_units, len(cols))
    s2 = rss / df
    return CoreFit(beta, cols, bread, rss, s2, df, ss.n, ss.n_units,
                   extra={"weights": weights})


def _gls(ss, theta, cols=None, priority=None):
    """GLS on quasi-demeaned rows ``z - theta_i zbar_i`` (theta per panel length)."""
    icol = intercept_column(ss)
    s = _shift(ss, icol)
    w = ss.lengths * (1.0 - np.asarray(theta)) ** 2
    A = ss.within + _cp_units(ss, s, w)
    cols = _select(A, cols, None, priority)
    beta, rss, bread = _solve(A, cols)
    beta, bread = _unshift(beta, bread, cols, s, icol)
    return beta, rss, bread, cols


def gls_core(ss, sigma2_unit, sigma2_obs, cols=None, priority=None) -> CoreFit:
    """Random-intercept GLS for given variance components; classical covariance uses the
    residual variance of the quasi-demeaned regression (``rss / (n - k)``)."""
    theta = quasi_demeaning_share(ss.lengths, sigma2_unit, sigma2_obs)
    beta, rss, bread, cols = _gls(ss, theta, cols, priority)
    df = ss.n - len(cols)
    _need_df(df, "random-intercept regression", ss.n, len(cols))
    return CoreFit(beta, cols, bread, rss, rss / df, df, ss.n, ss.n_units,
                   sigma2_unit=sigma2_unit, sigma2_obs=sigma2_obs,
                   lengths=ss.lengths.copy(), theta=theta)


def swamy_arora_components(ss, priority=None):
    """Swamy-Arora variance components, in the unbalanced form of Baltagi and Chang (1994).

    ``sigma_obs^2`` is the within residual variance (degrees of freedom ``n - N - r_w``,
    with ``r_w`` the rank of the covariates that vary within units). ``sigma_unit^2`` is
    ``(e_b' e_b - (N - r_b) sigma_obs^2) / (n - tr[(X'PX)^{-1} X'P P X])`` with ``P`` the
    projection on unit means and ``e_b`` the residuals of the between regression on all
    rows; truncated at zero (the value before truncation is ``info["sigma2_unit_raw"]``
    and ``info["boundary"]`` says whether it was cut). On balanced panels this is
    ``s_b^2 - sigma_obs^2 / T``.
    """
    k = ss.p - 1
    w = within_core(ss, priority=priority, allow_empty=True)
    s2e = w.sigma2
    icol = intercept_column(ss)
    s = _shift(ss, icol)
    At = _cp_units(ss, s, ss.lengths.astype(float))           # sum T_i zbar zbar'
    cols_b = independent_columns(At[:k, :k], _between_scale(ss, At)[:k], priority=priority)
    _, ssr_t, bread_t = _solve(At, cols_b)
    df_b = ss.n_units - len(cols_b)
    if df_b <= 0:
        raise EstimationError(
            f"Swamy-Arora variance components need more units than between-regression "
            f"coefficients: {ss.n_units} units for {len(cols_b)} coefficients leave no "
            "degrees of freedom for the unit variance; use method='reml' or 'ml', or fewer "
            "unit-level covariates")
    At2 = _cp_units(ss, s, ss.lengths.astype(float) ** 2)     # sum T_i^2 zbar zbar'
    tr = float(np.trace(bread_t @ At2[np.ix_(cols_b, cols_b)]))
    raw = (ssr_t - df_b * s2e) / (ss.n - tr)
    s2u = max(0.0, raw)
    return s2u, s2e, {"df_within": w.df_resid, "df_between": df_b, "trace": tr,
                      "ssr_between": ssr_t, "sigma2_unit_raw": float(raw),
                      "boundary": bool(raw <= 0.0)}


def swamy_arora_core(ss, cols=None, priority=None) -> CoreFit:
    """Random-intercept GLS with Swamy-Arora variance components (see
    :func:`swamy_arora_components`)."""
    s2u, s2e, info = swamy_arora_components(ss, priority)
    fit = gls_core(ss, s2u, s2e, cols, priority)
    fit.extra.update(info)
    return fit


# ---------------------------------------------------------------------- ML / REML
def _profile(ss, gamma, cols, method, s):
    """-2 x profiled log-likelihood (ML or REML) at ``gamma = tau^2 / sigma^2``."""
    w = ss.lengths / (1.0 + ss.lengths * gamma)
    A = ss.within + _cp_units(ss, s, w)
    beta, Q, bread = _solve(A, cols)
    Q = max(Q, np.finfo(float).tiny)
    logdet = float(np.sum(ss.group_count * np.log1p(ss.lengths * gamma)))
    n, k = ss.n, len(cols)
    if method == "ml":
        s2 = Q / n
        val = n * np.log(2 * np.pi * s2) + n + logdet
    else:
        s2 = Q / (n - k)
        sign, ld = np.linalg.slogdet(A[np.ix_(cols, cols)])
        val = (n - k) * np.log(2 * np.pi * s2) + (n - k) + logdet + ld
    return val, beta, bread, s2


def _profile_slope(ss, gamma, cols, method, s):
    """Derivative of :func:`_profile` in ``gamma`` (envelope theorem for ``b`` and
    ``sigma^2``); its root is found to near machine precision, unlike the minimum."""
    T = ss.lengths.astype(float)
    A = ss.within + _cp_units(ss, s, T / (1.0 + T * gamma))
    dA = _cp_units(ss, s, -(T ** 2) / (1.0 + T * gamma) ** 2)
    beta, Q, bread = _solve(A, cols)
    v = np.zeros(ss.p)
    v[cols] = -beta
    v[-1] = 1.0
    dQ = float(v @ dA @ v)
    n, k = ss.n, len(cols)
    dlog = float(np.sum(ss.group_count * T / (1.0 + T * gamma)))
    if method == "ml":
        return n * dQ / Q + dlog
    return (n - k) * dQ / Q + dlog + float(np.trace(bread @ dA[np.ix_(cols, cols)]))


def _bracket_near(slope, eta0, lo, hi, step=0.05, tries=40):
    """A bracket ``(a, b)`` of a sign change of ``slope`` from negative to positive found
    by walking downhill from ``eta0`` in doubling steps, or ``None`` when the walk leaves
    ``[lo, hi]``."""
    s0 = slope(eta0)
    if s0 == 0:
        return eta0, eta0
    direction = -1.0 if s0 > 0 else 1.0
    a, sa, h = eta0, s0, step
    for _ in range(tries):
        b = a + direction * h
        if not lo <= b <= hi:
            return None
        sb = slope(b)
        if (sa > 0) != (sb > 0) or sb == 0:
            return (b, a) if direction < 0 else (a, b)
        a, sa, h = b, sb, 2 * h
    return None


def likelihood_core(ss, method="reml", cols=None, priority=None, near=None) -> CoreFit:
    """Random intercept by maximum likelihood (``"ml"``) or restricted ML (``"reml"``).

    The Gaussian marginal likelihood is profiled over the coefficients and ``sigma^2``,
    leaving one parameter, ``gamma = tau^2 / sigma^2 >= 0``; it is maximised by a grid on
    ``log gamma`` refined with bounded Brent steps, with ``gamma = 0`` checked as the
    boundary; the optimum is then polished as the root of the analytic slope. Each
    evaluation costs ``O(D k^3)`` (``D`` distinct panel lengths), whatever
    the number of rows. The REML criterion follows Harville (1977); its constant is the
    usual ``(n - k) log 2 pi`` and omits ``log|X'X|``.

    ``near`` (a value of ``gamma``, e.g. the optimum on almost the same data) skips the
    grid: the root of the slope is bracketed by walking downhill from ``log(near)``
    and then found as above, with the same check of ``gamma = 0``. Both searches end at
    the same root whenever the criterion has one interior minimum; when the walk leaves
    the grid's range the grid is used.
    """
    if method not in ("ml", "reml"):
        raise ValueError(f"method must be 'ml' or 'reml', got {method!r}")
    k = ss.p - 1
    icol = intercept_column(ss)
    s = _shift(ss, icol)
    if cols is None:
        cols = independent_columns(_cp_rows(ss, s)[:k, :k], priority=priority)
    cols = np.asarray(cols, dtype=np.int64)
    if ss.n - len(cols) <= 0:
        raise EstimationError("too few rows for the number of coefficients")

    def f(eta):
        return _profile(ss, np.exp(eta), cols, method, s)[0]

    def slope(e):
        return _profile_slope(ss, np.exp(e), cols, method, s)

    lo_all, hi_all = np.log(1e-8), np.log(1e6)
    bracket = None
    if near is not None and np.isfinite(near) and near > 0:
        bracket = _bracket_near(slope, float(np.log(near)), lo_all, hi_all)
    if bracket is not None:
        lo, hi = bracket
        vals, j = None, None
    else:
        grid = np.linspace(lo_all, hi_all, 57)
        vals = np.array([f(e) for e in grid])
        j = int(np.argmin(vals))
        lo, hi = grid[max(j - 1, 0)], grid[min(j + 1, len(grid) - 1)]
    if lo == hi:
        eta = float(lo)
        best = f(eta)
    elif bracket is not None or slope(lo) < 0 < slope(hi):
        eta = float(optimize.brentq(slope, lo, hi, xtol=1e-15, rtol=4 * np.finfo(float).eps))
        best = f(eta)
    else:
        res = optimize.minimize_scalar(f, bounds=(lo, hi), method="bounded",
                                       options={"xatol": 1e-10})
        eta = float(res.x) if res.fun <= vals[j] else float(grid[j])
        best = min(res.fun, vals[j])
    v0 = _profile(ss, 0.0, cols, method, s)[0]
    gamma = 0.0 if v0 <= best else float(np.exp(eta))
    val, beta, bread, s2 = _profile(ss, gamma, cols, method, s)
    beta, bread = _unshift(beta, bread, cols, s, icol)
    s2u = gamma * s2
    theta = quasi_demeaning_share(ss.lengths, s2u, s2)
    df = ss.n - len(cols)
    fit = CoreFit(beta, cols, bread, float("nan"), s2, df, ss.n, ss.n_units,
                  sigma2_unit=s2u, sigma2_obs=s2, lengths=ss.lengths.copy(), theta=theta,
                  loglik=-0.5 * val, extra={"gamma": gamma, "boundary": gamma == 0.0})
    fit.rss = float("nan")
    return fit
