"""Where the chains of a marginal model start: the posterior mode and the Laplace
covariance there (see :mod:`bayespanel.bayes.sampling`, section "Where the chains
start").

References
----------
.. [1] Tierney, L. and Kadane, J. B. (1986). Accurate approximations for posterior moments
   and marginal densities. Journal of the American Statistical Association 81, 82-86.
   doi:10.1080/01621459.1986.10478240
.. [2] Gelman, A. and Rubin, D. B. (1992). Inference from iterative simulation using
   multiple sequences. Statistical Science 7, 457-472. doi:10.1214/ss/1177011136
"""

from __future__ import annotations

import dataclasses
import time

import numpy as np

__all__ = ["Laplace", "laplace", "warm_start", "chain_rngs", "start_at_mode", "ModeStart",
           "START_SPREAD", "START_WEIGHT"]

#: chains start at the mode plus this many Laplace standard deviations (times a standard
#: normal draw): overdispersed relative to the posterior (Gelman and Rubin 1992)
START_SPREAD = 2.0
#: weight, in draws, of the Laplace covariance in an adapted metric: in PyMC's first
#: adaptation window (its own default for a unit start is 10) and in every metric that
#: bayespanel's sampler re-estimates (:mod:`bayespanel.bayes.nuts`)
START_WEIGHT = 50


@dataclasses.dataclass(frozen=True)
class Laplace:
    """The posterior mode on the sampler's unconstrained scale and the Laplace covariance
    there (the inverse of the negative Hessian of the log density)."""

    mode: np.ndarray
    cov: np.ndarray
    iterations: int

    def starts(self, rng, logp_grad=None, spread=START_SPREAD, tries=10):
        """One starting point: ``mode + spread * L z``, ``z ~ N(0, I)``, ``L L' = cov``;
        drawn again (up to ``tries`` times) where the log density is not finite."""
        L = np.linalg.cholesky(self.cov)
        for _ in range(tries):
            x = self.mode + spread * (L @ rng.standard_normal(len(self.mode)))
            if logp_grad is None or np.isfinite(logp_grad(x)[0]):
                return x
        return self.mode.copy()


def _hessian(logp_grad, x, h):
    """Hessian by central differences of the exact gradient (steps ``h`` per coordinate),
    symmetrised."""
    n = len(x)
    H = np.empty((n, n))
    for i in range(n):
        e = np.zeros(n)
        e[i] = h[i]
        H[i] = (logp_grad(x + e)[1] - logp_grad(x - e)[1]) / (2.0 * h[i])
    return 0.5 * (H + H.T)


def laplace(logp_grad, x0, *, max_iter=100, tol=1e-10):
    """Posterior mode and Laplace covariance of a log density with few parameters.

    Damped Newton iterations from ``x0``: the Hessian by central differences of the
    exact gradient, its eigenvalues made negative where they are not (so that every step
    goes uphill), and a backtracking line search; they stop when the Newton decrement
    ``g' (-H)^-1 g`` falls below ``tol`` (in log-density units). Returns a
    :class:`Laplace`, or None when no mode with a negative definite Hessian is found (the
    caller then starts the chains the old way).

    Parameters
    ----------
    logp_grad : callable
        ``x -> (logp, gradient)`` on the sampler's unconstrained scale.
    x0 : array
    """
    x = np.asarray(x0, dtype=float).copy()
    f, g = logp_grad(x)
    if not (np.isfinite(f) and np.all(np.isfinite(g))):
        return None
    scale = np.ones_like(x)  # the posterior SD per coordinate, as far as known
    for it in range(1, max_iter + 1):
        H = _hessian(logp_grad, x, 1e-4 * scale)
        if not np.all(np.isfinite(H)):
            return None
        lam, V = np.linalg.eigh(-H)
        top = np.max(np.abs(lam))
        if not top > 0:
            return None
        lam = np.maximum(np.abs(lam), 1e-10 * top)
        step = V @ ((V.T @ g) / lam)
        decrement = float(g @ step)
        if decrement < tol:
            break
        t = 1.0
        for _ in range(60):
            f_new, g_new = logp_grad(x + t * step)
            if np.isfinite(f_new) and f_new >= f + 1e-4 * t * decrement:
                break
            t *= 0.5
        else:
            return None
        x, f, g = x + t * step, f_new, g_new
        scale = 1.0 / np.sqrt(np.maximum(np.abs(np.diag(H)), 1e-300))
    else:
        return None
    H = _hessian(logp_grad, x, 1e-4 / np.sqrt(np.maximum(np.abs(np.diag(H)), 1e-300)))
    try:
        cov = np.linalg.inv(-H)
        np.linalg.cholesky(cov)
    except np.linalg.LinAlgError:
        return None
    if not np.all(np.isfinite(cov)):
        return None
    return Laplace(mode=x, cov=0.5 * (cov + cov.T), iterations=it)


def warm_start(logp_grad, x0, info):
    t0 = time.perf_counter()
    lap = laplace(logp_grad, x0)
    info["start_seconds"] = time.perf_counter() - t0
    if lap is None:
        info["start"] = "jitter (no posterior mode with a negative definite Hessian found)"
    else:
        info["start_newton_iterations"] = lap.iterations
    return lap


def chain_rngs(seed, chains):
    return [np.random.default_rng([seed, 7919, c]) for c in range(chains)]


@dataclasses.dataclass(frozen=True)
class ModeStart:
    """Everything a sampler started at the mode needs: PyMC's initial point (``point``,
    by value-variable name; ``x0``, raveled), its compiled log density (``fn``, and
    ``logp_grad`` calling it directly), the :class:`Laplace` approximation and one
    starting point per chain (``starts``, raveled)."""

    point: dict
    x0: object
    fn: object
    logp_grad: object
    laplace: Laplace
    starts: list


def start_at_mode(model, seed, chains, info):
    """The compiled log density of ``model.pymc_model``, the posterior mode and Laplace
    covariance from PyMC's initial point, and one seeded start per chain, for both
    samplers that start there (bayespanel's and PyMC's); records the compile and start
    times in ``info``. None when no mode is found (``info["start"]`` says so)."""
    from pymc.blocking import DictToArrayBijection

    from .logdensity import compiled_logp, logp_grad_of

    t0 = time.perf_counter()
    point = model.pymc_model.initial_point()
    fn = compiled_logp(model, info, point)
    logp_grad = logp_grad_of(fn)
    x0 = DictToArrayBijection.map(point)
    logp_grad(x0.data)  # the first call finishes the compilation (numba)
    info["compile_logp_seconds"] = time.perf_counter() - t0
    lap = warm_start(logp_grad, x0.data, info)
    if lap is None:
        return None
    starts = [lap.starts(rng, logp_grad) for rng in chain_rngs(seed, chains)]
    return ModeStart(point, x0, fn, logp_grad, lap, starts)
