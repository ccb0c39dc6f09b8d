"""Running NUTS on a built model: PyMC's sampler or nutpie, chosen by model size.

Both run the No-U-Turn sampler (Hoffman and Gelman 2014). The marginal models have few
parameters, so they adapt a dense mass matrix (PyMC's ``jitter+adapt_full``, nutpie's
low-rank adaptation); latent-intercept models, with one parameter per unit, a diagonal
one. Measured on this project's models (bench/bench_models.py, bench/bench_speed.py,
docs/bayesian-models.md):

* the marginal likelihood costs the same per gradient for any number of rows, and PyMC's
  own sampler, whose compiled log density is cached on disk (by PyTensor and by
  :func:`_pymc_logp`), fits it end to end in a few seconds, while nutpie first spends
  several seconds compiling through numba in every new process;
* a row-level (latent-intercept) likelihood grows with the rows, and there nutpie's faster
  gradient and adaptation outweigh its compile time beyond :data:`NUTPIE_ROWS` rows.

``sampler="auto"`` applies exactly that rule, so the choice depends only on the model and
the same seed always reproduces the same draws. A nutpie compilation is kept with the
model and reused (with the current ``pm.Data`` values) on every later call, which makes
repeated fits after :meth:`~bayespanel.bayes.GaussianModel.set_suffstats` cheap; so is
the compiled log density and gradient that PyMC's sampler uses.

Where the chains start (``start``). A marginal model has a few parameters and a log
density that costs the same for any number of rows, but the more rows, the narrower the
posterior on the sampler's (unconstrained, standardised) scale. Started from the prior's
centre with a unit mass matrix, warm-up first has to travel to the posterior and learn
its scale, and that takes longer the more rows there are. With ``start="mode"`` (the
default for marginal models) the sampler starts where the posterior is: the posterior
mode is found by Newton's method on the model's own log density (exact gradient, Hessian
by central differences of the gradient), the Laplace approximation there (the inverse
of the negative Hessian; Tierney and Kadane 1986) is the initial mass
matrix (PyMC: the starting covariance of its adapted dense or diagonal metric, counted
as :data:`START_WEIGHT` draws; nutpie adapts its own metric, which cannot be seeded), and
each chain starts at the mode plus a draw from the Laplace normal scaled by
:data:`START_SPREAD`, so that the chains start apart and R-hat keeps its meaning
(overdispersed starting points, Gelman and Rubin 1992). Adaptation then runs as usual.
``start="jitter"`` is the previous start (PyMC's ``jitter+adapt_full`` or
``jitter+adapt_diag``, nutpie's own), kept for comparison; latent-intercept models, with
one parameter per unit, always use it. bench/bench_models.py measures both.

References
----------
.. [1] Hoffman, M. D. and Gelman, A. (2014). The No-U-Turn sampler: adaptively setting path
   lengths in Hamiltonian Monte Carlo. Journal of Machine Learning Research 15, 1593-1623.
.. [2] Tierney, L. and Kadane, J. B. (1986). Accurate approximations for posterior moments
   and marginal densities. Journal of the American Statistical Association 81, 82-86.
   doi:10.1080/01621459.1986.10478240
.. [3] Gelman, A. and Rubin, D. B. (1992). Inference from iterative simulation using
   multiple sequences. Statistical Science 7, 457-472. doi:10.1214/ss/1177011136
"""

from __future__ import annotations

import dataclasses
import functools
import importlib.util
import logging
import os
import time
import warnings

import numpy as np

from ..core.errors import SpecificationError, choices_error
from .graph import graph_identity, same_graph

__all__ = ["SAMPLERS", "STARTS", "NUTPIE_ROWS", "MIN_DRAWS", "choose_sampler", "run",
           "nutpie_available", "check_int", "laplace", "forget_stale", "nutpie_compiled"]

SAMPLERS = ("auto", "pymc", "nutpie")
#: latent-intercept models with at least this many rows go to nutpie under "auto"
NUTPIE_ROWS = 2_000
#: fewest draws per chain accepted: split R-hat needs two halves of at least two draws
MIN_DRAWS = 4
#: marginal models with at most this many coefficients adapt a dense mass matrix
DENSE_MAX = 60
STARTS = ("mode", "jitter")
#: chains start at the mode plus this many Laplace standard deviations (times a standard
#: normal draw): overdispersed relative to the posterior (Gelman and Rubin 1992)
START_SPREAD = 2.0
#: weight, in draws, of the Laplace covariance in PyMC's first adaptation window (its
#: own default for a unit start is 10)
START_WEIGHT = 50


def nutpie_available() -> bool:
    return importlib.util.find_spec("nutpie") is not None


def check_int(name, value, minimum):
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) \
            or value < minimum:
        raise SpecificationError(f"{name}={value!r} must be an integer of at least {minimum}")
    return int(value)


def choose_sampler(model) -> str:
    """The sampler ``"auto"`` uses for ``model`` (see the module docstring)."""
    if (model.likelihood == "latent" and model.rows is not None
            and len(model.rows[1]) >= NUTPIE_ROWS and nutpie_available()):
        return "nutpie"
    return "pymc"


def _dense(model) -> bool:
    """Adapt a dense mass matrix when the parameters are few (the marginal models): the
    coefficients of related covariates (``x`` and ``x^2``, within and between parts) are
    correlated a posteriori, and a dense metric removes that at negligible cost."""
    return model.likelihood == "marginal" and len(model.labels) <= DENSE_MAX


def _seed(seed):
    if seed is None:
        return int(np.random.SeedSequence().generate_state(1)[0] % (2 ** 31))
    if isinstance(seed, (bool, np.bool_)) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise SpecificationError(f"seed={seed!r} must be a non-negative integer or None")
    return int(seed)


def default_cores(model, sampler, chains) -> int:
    """Processes the chains run in when ``cores`` is not given.

    PyMC's sampler with a marginal model: 1, the chains one after another in this
    process. Their log density reads a few small matrices (microseconds per gradient at
    any number of rows), so starting worker processes and sending every draw between
    processes costs more than the chains themselves: on the demo's random-intercept
    model, 4 chains x 2,000 iterations took 2.3 times as long in 2 worker processes as in
    this one (bench/bench_demo.py measures the whole demo). Otherwise ``min(chains,
    CPUs)``. PyMC seeds each chain the same way in both modes, so the draws for a seed do
    not depend on ``cores`` (tests/test_warm_start.py checks it).
    """
    if sampler == "pymc" and model.likelihood == "marginal":
        return 1
    return min(chains, os.cpu_count() or 1)


def run(model, *, draws, tune, chains, seed, sampler, progress, cores, target_accept,
        start=None):
    """Sample ``model.pymc_model``; returns ``(DataTree, info)``.

    ``start``: ``"mode"``, ``"jitter"`` or None (``"mode"`` for marginal models, see the
    module docstring). ``info`` records the sampler, seed, sizes, the start and the
    compile and sampling times.
    """
    draws = check_int("draws", draws, 1)
    if draws < MIN_DRAWS:
        raise SpecificationError(
            f"draws={draws} is too few: split R-hat and ESS need at least {MIN_DRAWS} draws "
            "per chain (and results need hundreds)")
    tune = check_int("tune", tune, 0)
    chains = check_int("chains", chains, 1)
    if sampler not in SAMPLERS:
        raise choices_error("sampler", sampler, SAMPLERS)
    if start is not None and start not in STARTS:
        raise choices_error("start", start, STARTS)
    if not (isinstance(target_accept, float) and 0.5 <= target_accept < 1.0):
        raise SpecificationError(f"target_accept={target_accept!r} must be a float in [0.5, 1)")
    seed = _seed(seed)
    chosen = choose_sampler(model) if sampler == "auto" else sampler
    if cores is None:
        cores = default_cores(model, chosen, chains)
    cores = check_int("cores", cores, 1)
    if chosen == "nutpie" and not nutpie_available():
        raise SpecificationError(
            "sampler='nutpie' needs the nutpie package (pip install 'bayespanel[fast]'); "
            "or choose sampler='pymc'")
    info = {"sampler": chosen, "requested_sampler": sampler, "seed": seed, "draws": draws,
            "tune": tune, "chains": chains, "target_accept": target_accept, "cores": cores}
    # a start at the mode needs a gradient in every free variable: not with discrete ones
    # (which a user may add to the graph; PyMC's sampler then gives them their own step)
    warm = start != "jitter" and _dense(model) and not model.pymc_model.discrete_value_vars
    info["start"] = "mode" if warm else "jitter"
    t0 = time.perf_counter()
    if chosen == "pymc":
        dt = _run_pymc(model, draws, tune, chains, seed, progress, cores, target_accept, info,
                       warm)
    else:
        dt = _run_nutpie(model, draws, tune, chains, seed, progress, cores, target_accept, info,
                         warm)
    info["total_seconds"] = time.perf_counter() - t0
    _check_complete(dt, chains, draws)
    for group in [g for g in dt.children if g.startswith("warmup")]:
        del dt[group]
    return dt, info


# ---------------------------------------------------------------------------- the start
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


# ---------------------------------------------------------------------------- compiled code
def forget_stale(model) -> bool:
    """Drop the compiled samplers kept with ``model`` (``_nutpie``, ``_pymc_logp``) when
    its ``pymc_model`` changed since they were made; returns True when it did.

    Called before every use of them (:func:`run`, :func:`nutpie_compiled`), so that an
    edited model is never sampled with the code of its former graph.
    """
    now = graph_identity(model.pymc_model)
    kept = getattr(model, "_compiled_graph", None)
    if same_graph(kept, now):
        return False
    stale = kept is not None
    model._nutpie = None
    model._pymc_logp = None
    model._compiled_graph = now
    return stale


def nutpie_compiled(model):
    """nutpie's compilation of ``model.pymc_model``, made once per graph and kept with the
    model (a later call with the same graph only swaps data, ``with_data``)."""
    import nutpie

    forget_stale(model)
    if getattr(model, "_nutpie", None) is None:
        model._nutpie = nutpie.compile_pymc_model(model.pymc_model)
    return model._nutpie


def _pymc_logp(model, info=None, point=None):
    """The compiled log density and gradient of ``model.pymc_model`` (PyMC's
    ``ValueGradFunction`` over every free variable, raveled).

    Compiled once per model and kept: it reads the ``pm.Data`` values when called, so a
    data swap needs no recompile. Across processes it is kept on disk
    (:func:`_cache_path`): the graph rewriting is then skipped, and PyTensor finds the
    numba code in its own cache. ``info["compile_cache"]`` says ``"hit"``, ``"miss"``
    or ``"off"``.
    """
    forget_stale(model)
    fn = getattr(model, "_pymc_logp", None)
    if fn is None:
        path = _cache_path(model.pymc_model, point)
        fn = _cache_load(path, model.pymc_model) if path is not None else None
        if fn is None:
            fn = model.pymc_model.logp_dlogp_function(ravel_inputs=True, initial_point=point)
            fn.trust_input = True
            if path is not None:
                _cache_save(path, fn)
            model._pymc_logp_cache = "off" if path is None else "miss"
        else:
            model._pymc_logp_cache = "hit"
        model._pymc_logp = fn
    _push_data(fn, model.pymc_model)
    # PyMC's ValueGradFunction keeps its own trust_input flag but calls the compiled
    # function, which checks and converts every argument again at each of the sampler's
    # gradients; the sampler and the Laplace start pass float64 vectors, so the compiled
    # function may take them as they are (same values, none of the checks' cost)
    fn._pytensor_function.trust_input = True
    if info is not None:
        info["compile_cache"] = getattr(model, "_pymc_logp_cache", "off")
    return fn


# ---------------------------------------------------------------------------- compile cache
#
# A compiled log density is pickled under a key computed from everything it depends on
# except the values of the model's pm.Data (which are pushed into it before every use):
# a canonical description of the model's log-density graph (every operation with its
# defining properties, every constant by a digest of its bytes, every input and shared
# variable by name and type), the ravel layout of the free variables, and the versions
# of Python, numpy, PyTensor, PyMC, numba and this package with PyTensor's mode settings.
# A graph whose operations cannot all be described this way is not cached. A different
# model therefore never finds another model's entry; at worst an unchanged model misses
# its own (and compiles, as without the cache). Entries live beside PyTensor's compile
# cache (``base_compiledir/bayespanel``), or in the folder ``BAYESPANEL_COMPILE_CACHE``
# names; ``BAYESPANEL_COMPILE_CACHE=0`` turns the cache off.

_CACHE_VERSION = 1


def _describe(value):
    """A canonical text for an operation's property (None when there is none)."""
    if isinstance(value, np.ndarray):
        import hashlib

        return f"array({value.dtype},{value.shape},{hashlib.sha256(value.tobytes()).hexdigest()})"
    if isinstance(value, (tuple, list)):
        parts = [_describe(v) for v in value]
        return None if None in parts else "(" + ",".join(parts) + ")"
    if isinstance(value, dict):
        parts = [(_describe(k), _describe(v)) for k, v in sorted(value.items(), key=str)]
        return None if any(None in kv for kv in parts) else "{" + ",".join(
            f"{k}:{v}" for k, v in parts) + "}"
    if value is None or isinstance(value, (bool, int, float, str, np.generic, np.dtype)):
        return repr(value)
    if hasattr(value, "__props__"):
        return _describe_op(value)
    text = repr(value)
    return None if " at 0x" in text else f"{type(value).__qualname__}:{text}"


def _describe_op(op):
    props = getattr(type(op), "__props__", None)
    if props is None:
        return None
    parts = [_describe(getattr(op, name)) for name in props]
    if None in parts:
        return None
    return f"{type(op).__module__}.{type(op).__qualname__}({','.join(parts)})"


def _graph_text(outputs):
    """Canonical lines describing the graph that computes ``outputs``, or None."""
    import hashlib

    from pytensor.compile.sharedvalue import SharedVariable
    from pytensor.graph.basic import Constant

    ids, lines = {}, []

    def visit(var):
        if var in ids:
            return ids[var]
        node = var.owner
        if node is None:
            if isinstance(var, Constant):
                data = np.asarray(var.data)
                what = f"const {data.dtype} {data.shape} {hashlib.sha256(data.tobytes()).hexdigest()}"
            elif isinstance(var, SharedVariable):
                what = f"shared {var.name}"
            else:
                what = f"input {var.name}"
            lines.append(f"{what} {var.type}")
        else:
            args = [visit(i) for i in node.inputs]
            op = _describe_op(node.op)
            if op is None:
                raise LookupError(str(node.op))
            lines.append(f"{op} {args} out{node.outputs.index(var)} {var.type}")
        ids[var] = len(ids)
        return ids[var]

    try:
        for out in outputs:
            visit(out)
    except (LookupError, RecursionError):
        return None
    return lines


def _cache_path(m, point=None):
    """Where the compiled log density of PyMC model ``m`` is kept, or None (no cache).
    ``point``: the model's initial point, if already made."""
    where = os.environ.get("BAYESPANEL_COMPILE_CACHE", "")
    if where == "0":
        return None
    import hashlib
    import platform
    import sys
    from pathlib import Path

    import numba
    import pymc
    import pytensor

    from ..core.version import __version__

    lines = _graph_text([m.logp(jacobian=True)] + list(m.value_vars))
    if lines is None:
        return None
    point = m.initial_point() if point is None else point
    cfg = pytensor.config
    head = [f"bayespanel compile cache {_CACHE_VERSION}", sys.version, platform.machine(),
            np.__version__, pytensor.__version__, pymc.__version__, numba.__version__,
            __version__, str(cfg.mode), str(cfg.linker), str(cfg.optimizer), str(cfg.floatX),
            repr([(k, np.shape(v)) for k, v in point.items()])]
    key = hashlib.sha256("\n".join(head + lines).encode()).hexdigest()
    return (Path(where) if where else Path(cfg.base_compiledir) / "bayespanel") / f"{key}.pkl"


def _private(path):
    """True when ``path`` (an entry or the cache folder) belongs to this user and nobody
    else can write to it. The cache is the one place bayespanel unpickles: an entry is
    code, with the same trust as PyTensor's compiled modules in its compile folder, so it
    is read only from a folder and a file that no other account could have written (a
    shared BAYESPANEL_COMPILE_CACHE such as /tmp itself is never read or written)."""
    import stat

    if not hasattr(os, "getuid"):  # no owners to check (Windows): no cache
        return False
    try:
        st = os.lstat(path)
    except OSError:
        return False
    return (st.st_uid == os.getuid() and not stat.S_ISLNK(st.st_mode)
            and not st.st_mode & (stat.S_IWGRP | stat.S_IWOTH))


def _cache_load(path, m):
    import pickle

    if not (_private(path.parent) and _private(path)):
        return None
    try:
        with open(path, "rb") as fh:
            fn = pickle.load(fh)
    except Exception:  # noqa: BLE001 (a missing or unreadable entry: compile instead)
        return None
    names = {v.name for v in m.data_vars}
    shared = {inp.variable.name for inp in fn._pytensor_function.maker.inputs if inp.shared}
    if not shared <= names | {"__weights"}:  # it must read nothing but the model's data
        return None
    return fn


#: models whose data hold more numbers than this are not cached (rows in the graph)
_CACHE_MAX_DATA = 1_000_000


def _cache_save(path, fn):
    """Store ``fn`` without the model's data: the values of its shared inputs are zeros
    while it is pickled (they are given back before every use, :func:`_push_data`)."""
    import pickle
    import tempfile

    f = fn._pytensor_function
    held = [(c, c.storage[0]) for inp, c in zip(f.maker.inputs, f.input_storage)
            if inp.shared and inp.variable.name != "__weights"
            and isinstance(c.storage[0], np.ndarray)]
    if sum(v.size for _, v in held) > _CACHE_MAX_DATA:
        return
    tmp = None
    try:
        for c, v in held:
            c.storage[0] = np.zeros_like(v)
        path.parent.mkdir(mode=0o700, parents=True, exist_ok=True)
        if not _private(path.parent):
            return
        with tempfile.NamedTemporaryFile(dir=path.parent, delete=False, suffix=".tmp") as fh:
            tmp = fh.name
            pickle.dump(fn, fh, protocol=pickle.HIGHEST_PROTOCOL)
        os.replace(tmp, path)  # whole entries only, also with concurrent runs
    except Exception:  # noqa: BLE001 (no cache directory: the run goes on without one)
        if tmp is not None and os.path.exists(tmp):
            os.unlink(tmp)
    finally:
        for c, v in held:
            c.storage[0] = v


def _push_data(fn, m):
    """Give a compiled log density the current values of the model's ``pm.Data`` (a
    function from the cache holds its own copies of them)."""
    values = {v.name: v for v in m.data_vars}
    f = fn._pytensor_function
    for inp, container in zip(f.maker.inputs, f.input_storage):
        var = values.get(inp.variable.name) if inp.shared else None
        if var is not None and var is not inp.variable:
            container.value = var.get_value(borrow=True)


def _warm_start(logp_grad, x0, info):
    t0 = time.perf_counter()
    lap = laplace(logp_grad, x0)
    info["start_seconds"] = time.perf_counter() - t0
    if lap is None:
        info["start"] = "jitter (no posterior mode with a negative definite Hessian found)"
    else:
        info["start_newton_iterations"] = lap.iterations
    return lap


def _chain_rngs(seed, chains):
    return [np.random.default_rng([seed, 7919, c]) for c in range(chains)]


def _check_complete(dt, chains, draws):
    """Refuse a truncated trace: PyMC and nutpie catch KeyboardInterrupt and return the
    draws made so far, which must never pass for the run that was asked for."""
    sizes = dict(dt["posterior"].sizes) if "posterior" in dt.children else {}
    got = (int(sizes.get("chain", 0)), int(sizes.get("draw", 0)))
    if got != (chains, draws):
        raise KeyboardInterrupt(
            f"sampling was interrupted after {got[0]} chain(s) x {got[1]} draws of the "
            f"{chains} x {draws} asked for; the partial draws were discarded")


def _run_pymc(model, draws, tune, chains, seed, progress, cores, target_accept, info, warm):
    import pymc as pm

    logger = logging.getLogger("pymc")
    level = logger.level
    if not progress:
        logger.setLevel(logging.WARNING)
    try:
        t0 = time.perf_counter()
        kwargs = {"init": "jitter+adapt_full" if _dense(model) else "jitter+adapt_diag",
                  "target_accept": target_accept}
        kwargs["trace"] = _one_compile_trace()(model=model.pymc_model)
        if warm:  # the step (with its target_accept) and the starting points
            warm_kwargs = _pymc_warm_step(model, chains, seed, target_accept, info)
            if warm_kwargs is not None:
                kwargs = {k: warm_kwargs[k] for k in ("step", "initvals")} | {
                    "trace": kwargs["trace"]}
        with warnings.catch_warnings():
            # our own diagnostics report R-hat, ESS and divergences (Posterior.diagnostics)
            warnings.filterwarnings("ignore", message=".*overflow encountered.*")
            warnings.filterwarnings("ignore", message="QuadPotentialFullAdapt is an experimental")
            dt = pm.sample(draws=draws, tune=tune, chains=chains, cores=cores,
                           random_seed=seed, progressbar=progress, nuts_sampler="pymc",
                           model=model.pymc_model, compute_convergence_checks=False,
                           quiet=not progress, **kwargs)
        elapsed = time.perf_counter() - t0
        # PyMC records the time spent in the chains; the rest is compilation and set-up
        info["sampling_seconds"] = float(dt["posterior"].attrs.get("sampling_time", elapsed))
        info["compile_seconds"] = elapsed - info["sampling_seconds"] - info.get("start_seconds", 0.0)
    finally:
        logger.setLevel(level)
    return dt


def _one_compile_trace():
    """PyMC's in-memory trace whose copies (PyMC makes one per chain from the trace it is
    given) share the compiled function that reads a draw's values, so that function is
    compiled once per run and not once per chain; each copy has its own arrays. (PyMC's
    own copy would share the arrays too, so its trace cannot be passed as it is.)"""
    from pymc.backends.ndarray import NDArray

    class OneCompileTrace(NDArray):
        def __copy__(self):
            new = type(self).__new__(type(self))
            new.__dict__.update(self.__dict__)
            new.samples, new._stats, new.draw_idx, new.draws = {}, None, 0, None
            new.chain, new._is_base_setup, new.sampler_vars = None, False, None
            return new

    return OneCompileTrace


def _pymc_warm_step(model, chains, seed, target_accept, info):
    """``pm.sample`` arguments for a start at the mode: a NUTS step whose metric starts
    from the Laplace covariance, and one starting point per chain; None if no mode."""
    import pymc as pm
    from pymc.blocking import DictToArrayBijection
    from pymc.step_methods.hmc import quadpotential

    t0 = time.perf_counter()
    m = model.pymc_model
    point = m.initial_point()
    fn = _pymc_logp(model, info, point)
    x0 = DictToArrayBijection.map(point)
    fn(x0.data, extra_vars={})  # the first call finishes the compilation (numba)
    info["compile_logp_seconds"] = time.perf_counter() - t0

    def logp_grad(x):
        return fn(x, extra_vars={})

    lap = _warm_start(logp_grad, x0.data, info)
    if lap is None:
        return None
    n = len(lap.mode)
    starts = [lap.starts(rng, logp_grad) for rng in _chain_rngs(seed, chains)]
    initvals = [_initvals(m, DictToArrayBijection.rmap(x0._replace(data=x), start_point=point))
                for x in starts]
    rng = np.random.default_rng([seed, 7919])
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="QuadPotentialFullAdapt is an experimental")
        if _dense(model):
            potential = _FullAdapt(n, lap.mode, lap.cov, START_WEIGHT, rng=rng)
        else:
            potential = quadpotential.QuadPotentialDiagAdapt(
                n, lap.mode, np.diag(lap.cov).copy(), START_WEIGHT, rng=rng)
    first = DictToArrayBijection.rmap(x0._replace(data=starts[0]), start_point=point)
    step = pm.NUTS(vars=m.value_vars, model=m, potential=potential, target_accept=target_accept,
                   rng=rng, initial_point=first, logp_dlogp_func=fn)
    return {"step": step, "initvals": initvals, "starts": starts}


@functools.cache
def _trtrs():
    from scipy.linalg import lapack

    return lapack.dtrtrs


def _full_adapt_class():
    """PyMC's dense adaptive metric with a cheaper momentum draw (built on first use, so
    that importing this module does not import PyMC)."""
    from pymc.step_methods.hmc import quadpotential

    class FullAdapt(quadpotential.QuadPotentialFullAdapt):
        """``random`` solves ``L' v = z`` by the LAPACK routine (``dtrtrs``) and arguments
        that ``scipy.linalg.solve_triangular`` passes, without its checks of finite
        values and array types at every draw: the same numbers."""

        def random(self):
            vals = self.rng.normal(size=self._n).astype(self.dtype)
            a = self._chol.T
            info = -1
            if vals.dtype == np.float64 and a.dtype == np.float64:
                trtrs = _trtrs()
                if a.flags.f_contiguous:
                    x, info = trtrs(a, vals, overwrite_b=True, lower=False, trans=0,
                                    unitdiag=False)
                else:
                    x, info = trtrs(a.T, vals, overwrite_b=True, lower=True, trans=1,
                                    unitdiag=False)
            if info != 0:  # another dtype, or a singular factor: scipy's checked path
                from scipy import linalg

                return linalg.solve_triangular(a, vals, overwrite_b=True)
            return x

    return FullAdapt


def _FullAdapt(*args, **kwargs):
    global _FULL_ADAPT
    if _FULL_ADAPT is None:
        _FULL_ADAPT = _full_adapt_class()
    return _FULL_ADAPT(*args, **kwargs)


_FULL_ADAPT = None


def _initvals(m, values):
    """PyMC initial values keyed by the random variables, from unconstrained values keyed
    by the value variables: each value is taken back through its variable's transform
    (symbolically, as PyMC does for transformed names), so no name is parsed."""
    out = {}
    for value_var in m.value_vars:
        rv = m.values_to_rvs[value_var]
        x = np.asarray(values[value_var.name])
        transform = m.rvs_to_transforms.get(rv)
        out[rv] = x if transform is None else transform.backward(x, *rv.owner.inputs)
    return out


def _run_nutpie(model, draws, tune, chains, seed, progress, cores, target_accept, info, warm):
    import nutpie

    t0 = time.perf_counter()
    forget_stale(model)
    fresh = getattr(model, "_nutpie", None) is None
    nutpie_compiled(model)
    info["compile_seconds"] = time.perf_counter() - t0 if fresh else 0.0
    known = {var.name for var in model._nutpie.shared_var_keys}
    values = {v.name: v.get_value() for v in model.pymc_model.data_vars if v.name in known}
    compiled = model._nutpie.with_data(**values)
    if warm:
        compiled = _nutpie_warm(compiled, seed, info)
    t1 = time.perf_counter()
    dt = nutpie.sample(compiled, draws=draws, tune=max(tune, 1), chains=chains, cores=cores,
                       seed=seed, progress_bar=progress, target_accept=target_accept,
                       adaptation="low_rank" if _dense(model) else "diag")
    info["sampling_seconds"] = time.perf_counter() - t1
    ss = dt["sample_stats"].to_dataset()
    drop = [k for k, v in ss.data_vars.items() if v.dtype == object]
    if drop:
        dt["sample_stats"] = dt["sample_stats"].to_dataset().drop_vars(drop)
    return dt


def _nutpie_warm(compiled, seed, info):
    """The compiled nutpie model with its chains started from the Laplace approximation:
    nutpie asks ``initial_point_func(seed)`` for each chain's (flat, unconstrained) start.
    The log density is nutpie's own compiled one (its C entry point, with the data of
    ``compiled``), so nothing is compiled again."""
    import ctypes

    n = compiled.n_dim
    cfunc = compiled.compiled_logp_func.ctypes
    data = ctypes.c_void_p(compiled.user_data.ctypes.data)
    as_ptr = ctypes.POINTER(ctypes.c_double)

    def logp_grad(x):
        x = np.ascontiguousarray(x, dtype=float)
        grad, logp = np.empty(n), np.empty(())
        code = cfunc(n, x.ctypes.data_as(as_ptr), grad.ctypes.data_as(as_ptr),
                     logp.ctypes.data_as(as_ptr), data)
        return (float(logp) if code == 0 else -np.inf), grad

    x0 = np.asarray(compiled.initial_point_func(seed), dtype=float)
    lap = _warm_start(logp_grad, x0, info)
    if lap is None:
        return compiled

    def initial_point(chain_seed):
        rng = np.random.default_rng([seed, 7919, int(chain_seed) % (2 ** 63)])
        return lap.starts(rng, logp_grad)

    return dataclasses.replace(compiled, initial_point_func=initial_point)
