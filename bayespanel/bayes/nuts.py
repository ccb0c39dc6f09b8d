"""The No-U-Turn sampler for models with few parameters, in numpy.

The marginal models need one log density and gradient per leapfrog step, and that costs a
few microseconds at any number of rows (PyTensor's compiled function over a few small
matrices). PyMC's sampler spends about a hundred microseconds of Python around each such
step; this module runs the same algorithm with little besides the gradient, so that the
sampler costs a few times the gradient and not a hundred. It is used for the marginal
models whose chains start at the posterior mode (:mod:`bayespanel.bayes.sampling`);
PyMC's sampler stays available (``sampler="pymc"``) and tests/test_own_sampler.py checks
that both give the same posterior.

The algorithm:

* **Transitions**: multinomial NUTS with biased progressive sampling between subtrees
  (Betancourt 2017, appendix A), the generalised no-U-turn criterion on the sums of
  momenta with the velocities ``M^-1 p`` at both ends, checked also across the seams of
  merged subtrees (as Stan has done since 2.23), maximum tree depth 10, and a divergence
  when the energy error exceeds 1000 or the log density is not finite.
* **Step size**: the heuristic of Hoffman and Gelman (2014, algorithm 4) at the start and
  after each metric update but the last, then dual averaging (their algorithm 5: gamma
  0.05, t0 10, kappa 0.75, mu = log(10 eps)) towards ``target_accept``; after warm-up the
  averaged step size is kept. After the last update the averaging goes on rather than
  starting again for the final buffer of 50 iterations: on the random-intercept model
  (bench/bench_models.py) a restart there left acceptance at 0.88 for a target of 0.8
  and took 20 % more leapfrog steps for the same effective sample size per step.
* **Metric**: dense; it starts at the Laplace covariance ``cov0`` of the start and is
  re-estimated at the end of each window of the usual schedule (a first buffer of 75
  iterations, windows of 25, 50, 100, ... doubling, the last stretched to a final buffer
  of 50; in proportion 15 / 75 / 10 % when warm-up is shorter than 150) as the covariance
  of the window's draws shrunk towards ``cov0`` with the weight of ``prior_weight``
  draws (scale free, unlike a shrinkage towards a fixed multiple of the identity: on the
  standardised scale of a panel with a million rows the posterior SDs are ~1e-3).

References
----------
.. [1] Hoffman, M. D. and Gelman, A. (2014). The No-U-Turn sampler: adaptively setting
   path lengths in Hamiltonian Monte Carlo. JMLR 15, 1593-1623.
.. [2] Betancourt, M. (2017). A conceptual introduction to Hamiltonian Monte Carlo.
   arXiv:1701.02434.
.. [3] Nesterov, Y. (2009). Primal-dual subgradient methods for convex problems.
   Mathematical Programming 120, 221-259.
"""

from __future__ import annotations

import functools
import math

import numpy as np

__all__ = ["sample_chain", "kernels", "adaptation_windows", "STATS", "MAX_DEPTH", "MAX_ENERGY_ERROR"]

MAX_DEPTH = 10
MAX_ENERGY_ERROR = 1000.0
#: the sampler statistics recorded for every draw (PyMC's names, so that the rest of the
#: package and ArviZ read them alike)
STATS = ("lp", "energy", "energy_error", "max_energy_error", "diverging", "tree_depth",
         "n_steps", "step_size", "acceptance_rate", "reached_max_treedepth")

_LOG_HALF = math.log(0.5)


def adaptation_windows(tune: int) -> list:
    """The metric-adaptation windows ``[(start, end), ...]`` (iteration numbers, end
    excluded) for ``tune`` warm-up iterations: a first buffer, windows doubling from 25,
    a final buffer (see the module docstring). Empty when ``tune`` is under 20 (the
    metric then stays at the start)."""
    if tune < 20:
        return []
    first, window, last = 75, 25, 50
    if tune < first + window + last:
        first, window = int(0.15 * tune), int(0.75 * tune)
        last = tune - first - window
    out, start, stop = [], first, tune - last
    while start < stop:
        end = start + window
        if end + 2 * window > stop:  # the next window would not fit: this one runs on
            end = stop
        out.append((start, end))
        start, window = end, 2 * window
    return out


class _Metric:
    """Dense Euclidean metric: velocities ``cov @ p`` and momenta ``~ N(0, cov^-1)``."""

    def __init__(self, cov):
        self.cov = np.ascontiguousarray(cov)
        # cov = L L'; p = L^-T z has covariance L^-T L^-1 = cov^-1
        self.inv_chol_t = np.ascontiguousarray(np.linalg.inv(np.linalg.cholesky(self.cov)).T)

    def momentum(self, rng):
        return self.inv_chol_t @ rng.standard_normal(len(self.cov))


class _DualAveraging:
    """Step-size adaptation of Hoffman and Gelman (2014), algorithm 5."""

    gamma, t0, kappa = 0.05, 10.0, 0.75

    def __init__(self, step, target):
        self.target = target
        self.restart(step)

    def restart(self, step):
        self.mu = math.log(10.0 * step)
        self.count = 0
        self.h_bar = 0.0
        self.log_step = math.log(step)
        self.log_bar = 0.0

    def update(self, accept):
        self.count += 1
        w = 1.0 / (self.count + self.t0)
        self.h_bar = (1.0 - w) * self.h_bar + w * (self.target - accept)
        self.log_step = self.mu - math.sqrt(self.count) / self.gamma * self.h_bar
        eta = self.count ** -self.kappa
        self.log_bar = eta * self.log_step + (1.0 - eta) * self.log_bar

    @property
    def step(self):
        return math.exp(self.log_step)

    @property
    def step_bar(self):
        return math.exp(self.log_bar)


def _log_add(a, b):
    """``log(exp(a) + exp(b))``."""
    hi = a if a > b else b
    if hi == -math.inf:
        return hi
    return hi + math.log1p(math.exp(-abs(a - b)))


# ---------------------------------------------------------------------------- kernels
# The arithmetic of a leapfrog step and of the no-U-turn checks on vectors of a few
# numbers: compiled (numba, cached on disk), each call costs about a microsecond where
# the same numpy expressions cost several.
@functools.cache
def kernels():
    import numba

    @numba.njit(cache=True)
    def leap(x, p, g, eps, cov):
        """Half a kick and a drift: ``p + eps/2 g`` and ``x + eps cov (p + eps/2 g)``."""
        n = x.shape[0]
        ph = np.empty(n)
        xn = np.empty(n)
        for i in range(n):
            ph[i] = p[i] + 0.5 * eps * g[i]
        for i in range(n):
            s = 0.0
            for j in range(n):
                s += cov[i, j] * ph[j]
            xn[i] = x[i] + eps * s
        return xn, ph

    @numba.njit(cache=True)
    def land(ph, g, eps, cov):
        """The second half kick; the velocity ``cov p`` and the kinetic energy."""
        n = ph.shape[0]
        p = np.empty(n)
        v = np.empty(n)
        for i in range(n):
            p[i] = ph[i] + 0.5 * eps * g[i]
        k = 0.0
        for i in range(n):
            s = 0.0
            for j in range(n):
                s += cov[i, j] * p[j]
            v[i] = s
            k += s * p[i]
        return p, v, 0.5 * k

    @numba.njit(cache=True)
    def merge(rho_a, rho_b, va_beg, va_end, pa_end, vb_beg, pb_beg, vb_end):
        """The sum of momenta of trajectory ``a`` followed by ``b``, and whether it
        turned: the generalised criterion over the whole, and over ``a`` with the first
        point of ``b`` and ``b`` with the last point of ``a`` (the seams)."""
        n = rho_a.shape[0]
        rho = np.empty(n)
        w1 = w2 = w3 = w4 = w5 = w6 = 0.0
        for i in range(n):
            r = rho_a[i] + rho_b[i]
            rho[i] = r
            w1 += va_beg[i] * r
            w2 += vb_end[i] * r
            e1 = rho_a[i] + pb_beg[i]
            w3 += va_beg[i] * e1
            w4 += vb_beg[i] * e1
            e2 = rho_b[i] + pa_end[i]
            w5 += va_end[i] * e2
            w6 += vb_end[i] * e2
        turned = not (w1 > 0.0 and w2 > 0.0 and w3 > 0.0 and w4 > 0.0 and w5 > 0.0
                      and w6 > 0.0)
        return rho, turned

    return leap, land, merge


class _Tree:
    """A built (sub)trajectory in the order it was built (``beg`` next to where the
    building started, ``end`` the far end)."""

    __slots__ = ("x_end", "p_end", "g_end", "v_end", "p_beg", "v_beg", "rho", "log_w",
                 "x_prop", "lp_prop", "g_prop", "err_prop", "n", "accept_sum", "max_err", "diverging",
                 "turning")


class _Chain:
    """One chain's sampler state and its step."""

    def __init__(self, logp_grad, x, metric, step, target_accept, rng):
        self.f = logp_grad
        self.rng = rng
        self.metric = metric
        self.x = np.asarray(x, dtype=float).copy()
        self.lp, self.g = self.f(self.x)
        self.kernels = kernels()
        self.adapt = _DualAveraging(step, target_accept)

    # ------------------------------------------------------------------ leapfrog
    def _leaf(self, x, p, g, eps, h0):
        """One leapfrog step; a one-point tree."""
        leap, land, _ = self.kernels
        cov = self.metric.cov
        x, ph = leap(x, p, g, eps, cov)
        lp, g = self.f(x)
        p, v, kinetic = land(ph, g, eps, cov)
        err = kinetic - lp - h0
        if not math.isfinite(err):
            err = math.inf
        t = _Tree()
        t.x_end, t.p_end, t.g_end, t.v_end = x, p, g, v
        t.p_beg, t.v_beg, t.rho = p, v, p
        t.x_prop, t.lp_prop, t.g_prop, t.err_prop = x, lp, g, err
        t.log_w = -err
        t.n = 1
        t.accept_sum = math.exp(min(0.0, -err))
        t.max_err = err
        t.diverging = err > MAX_ENERGY_ERROR
        t.turning = False
        return t

    def _build(self, x, p, g, depth, eps, h0):
        """A subtree of ``2**depth`` leapfrog steps from ``(x, p, g)``."""
        if depth == 0:
            return self._leaf(x, p, g, eps, h0)
        a = self._build(x, p, g, depth - 1, eps, h0)
        if a.diverging or a.turning:
            return a
        b = self._build(a.x_end, a.p_end, a.g_end, depth - 1, eps, h0)
        a.n += b.n
        a.accept_sum += b.accept_sum
        a.max_err = b.max_err if abs(b.max_err) > abs(a.max_err) else a.max_err
        if b.diverging or b.turning:
            a.diverging, a.turning = b.diverging, b.turning
            return a
        log_w = _log_add(a.log_w, b.log_w)
        if math.log(self.rng.random()) < b.log_w - log_w:  # uniform within the subtree
            a.x_prop, a.lp_prop, a.g_prop, a.err_prop = b.x_prop, b.lp_prop, b.g_prop, b.err_prop
        a.rho, a.turning = self.kernels[2](a.rho, b.rho, a.v_beg, a.v_end, a.p_end, b.v_beg,
                                           b.p_beg, b.v_end)
        a.log_w = log_w
        a.x_end, a.p_end, a.g_end, a.v_end = b.x_end, b.p_end, b.g_end, b.v_end
        return a

    def transition(self, eps):
        """One NUTS transition with step ``eps``; returns the sampler statistics."""
        x, lp, g = self.x, self.lp, self.g
        merge = self.kernels[2]
        p0 = self.metric.momentum(self.rng)
        v0 = self.metric.cov @ p0
        h0 = 0.5 * float(p0 @ v0) - lp
        # the two ends: (x, p, g, v); the tree's sum of momenta and its log weight
        ends = {1: (x, p0, g, v0), -1: (x, p0, g, v0)}
        rho, log_w = p0, 0.0
        prop, prop_err = (x, lp, g), 0.0
        n = 0
        accept_sum, max_err = 0.0, 0.0
        diverging = False
        depth = 0
        while depth < MAX_DEPTH:
            direction = 1 if self.rng.random() < 0.5 else -1
            xe, pe, ge, ve = ends[direction]
            sub = self._build(xe, pe, ge, depth, direction * eps, h0)
            n += sub.n
            accept_sum += sub.accept_sum
            if abs(sub.max_err) > abs(max_err):
                max_err = sub.max_err
            if sub.diverging:
                diverging = True
                break
            if sub.turning:
                break
            depth += 1
            # biased progressive sampling: favour the new subtree (Betancourt 2017)
            if math.log(self.rng.random()) < sub.log_w - log_w:
                prop, prop_err = (sub.x_prop, sub.lp_prop, sub.g_prop), sub.err_prop
            log_w = _log_add(log_w, sub.log_w)
            # the old tree runs from its far end to the end the new subtree starts from
            _, p_near, _, v_near = ends[direction]
            v_far = ends[-direction][3]
            ends[direction] = (sub.x_end, sub.p_end, sub.g_end, sub.v_end)
            rho, turned = merge(rho, sub.rho, v_far, v_near, p_near, sub.v_beg, sub.p_beg,
                                sub.v_end)
            if turned:
                break
        self.x, self.lp, self.g = prop
        mean_accept = accept_sum / max(n, 1)
        # energy: the Hamiltonian at the chosen point with the momentum it was reached
        # with (for BFMI); energy_error: its change from the start of the transition
        return {"lp": self.lp, "energy": h0 + prop_err, "energy_error": prop_err,
                "max_energy_error": max_err, "diverging": diverging, "tree_depth": depth,
                "n_steps": n, "step_size": eps, "acceptance_rate": mean_accept,
                "reached_max_treedepth": depth >= MAX_DEPTH and not diverging}

    # ------------------------------------------------------------------ step size
    def initial_step(self, eps):
        """Hoffman and Gelman (2014), algorithm 4: double or halve ``eps`` until the
        acceptance probability of one leapfrog step from here crosses one half."""
        x, lp, g = self.x, self.lp, self.g
        p = self.metric.momentum(self.rng)
        h0 = 0.5 * float(p @ (self.metric.cov @ p)) - lp

        def log_accept(e):  # -inf where the step fails (the leaf's energy error is inf)
            return self._leaf(x, p, g, e, h0).log_w

        direction = 1.0 if log_accept(eps) > _LOG_HALF else -1.0
        for _ in range(100):
            nxt = eps * 2.0 ** direction
            if (direction > 0) != (log_accept(nxt) > _LOG_HALF):
                return eps if direction > 0 else nxt
            eps = nxt
        return eps


def sample_chain(logp_grad, x0, cov0, *, draws, tune, rng, target_accept=0.8,
                 prior_weight=50, callback=None):
    """Run one chain; returns ``(draws array (draws, n), stats dict of arrays,
    final step size, final covariance)``.

    Parameters
    ----------
    logp_grad : callable
        ``x -> (log density, gradient)`` on the unconstrained scale.
    x0 : array
        Start.
    cov0 : array
        Starting covariance of the metric (the Laplace covariance at the mode).
    draws, tune : int
    rng : numpy.random.Generator
    target_accept : float
    prior_weight : float
        Weight of ``cov0``, in draws, in every re-estimated metric.
    callback : callable, optional
        Called as ``callback(iteration)`` every 100 iterations (progress).
    """
    cov0 = np.asarray(cov0, dtype=float)
    n = len(cov0)
    chain = _Chain(logp_grad, x0, _Metric(cov0), 1.0, target_accept, rng)
    eps = chain.initial_step(1.0)
    chain.adapt.restart(eps)
    windows = adaptation_windows(tune)
    window = []
    out = np.empty((draws, n))
    stats = {k: np.empty(draws, dtype=bool if k in ("diverging", "reached_max_treedepth")
                         else int if k in ("tree_depth", "n_steps") else float) for k in STATS}
    for it in range(tune + draws):
        if it < tune:
            eps = chain.adapt.step
        s = chain.transition(eps)
        if it < tune:
            chain.adapt.update(s["acceptance_rate"])
            if any(a <= it < b for a, b in windows):
                window.append(chain.x)
            if any(it + 1 == b for _, b in windows):
                W = np.asarray(window)
                m = len(W)
                S = np.cov(W, rowvar=False) if m > 1 else np.zeros((n, n))
                cov = (m * S + prior_weight * cov0) / (m + prior_weight)
                chain.metric = _Metric(0.5 * (cov + cov.T))
                window = []
                if it + 1 != windows[-1][1]:  # see the module docstring
                    eps = chain.initial_step(chain.adapt.step)
                    chain.adapt.restart(eps)
            if it + 1 == tune:
                eps = chain.adapt.step_bar
        else:
            d = it - tune
            out[d] = chain.x
            for k in STATS:
                stats[k][d] = s[k]
        if callback is not None and (it + 1) % 100 == 0:
            callback(it + 1)
    return out, stats, eps, chain.metric.cov
