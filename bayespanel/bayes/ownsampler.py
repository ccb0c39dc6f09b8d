"""Running this package's NUTS (:mod:`bayespanel.bayes.nuts`) on a built PyMC model.

The model's log density and gradient are PyMC's own (the compiled function that PyMC's
sampler uses, cached on disk by :func:`bayespanel.bayes.logdensity.compiled_logp`); with
PyTensor's numba backend it is called as the compiled function itself, without the
Python layers around it. The chains start around the posterior mode with the Laplace
covariance as the starting metric (:func:`bayespanel.bayes.laplace.laplace`). The
draws, on the sampler's unconstrained scale, are then taken to the model's variables
(the free variables on their own scale and every deterministic) by one vectorised
function of all the draws at once, and returned as a DataTree with the groups and names
that PyMC's sampler writes (``posterior``, ``sample_stats``).
"""

from __future__ import annotations

import sys
import time
import warnings

import numpy as np

from . import nuts

__all__ = ["run_own", "logp_grad_of"]

#: the seed stream of the sampler's own random numbers (momenta, directions, choices);
#: the starting points have theirs (``laplace.chain_rngs``)
_STREAM = 104729


def logp_grad_of(fn):
    """``x -> (log density, gradient)`` of PyMC's compiled ``ValueGradFunction`` ``fn``:
    its numba function called directly with the model's data when PyTensor compiled it
    with numba (the same numbers as ``fn(x)``, without the per-call argument handling),
    else ``fn`` itself."""
    f = fn._pytensor_function
    jit = getattr(getattr(f, "vm", None), "jit_fn", None)
    inputs = f.maker.inputs
    if jit is None or inputs[0].shared or not all(i.shared for i in inputs[1:]) \
            or len(f.maker.fgraph.outputs) != 2:
        def call(x):
            lp, g = fn(x, extra_vars={})
            return float(lp), g
        return call
    data = tuple(c.storage[0] for c in f.input_storage[1:])

    def direct(x):
        lp, g = jit(x, *data)
        return float(lp), g
    return direct


def _draws_function(model, point):
    """A function from an ``(n_draws, n_unconstrained)`` array to the model's posterior
    variables (free variables on their own scale, then the deterministics), each with
    the draws first; and their names. Kept with the model (per graph)."""
    import pytensor
    import pytensor.tensor as pt
    from pymc.pytensorf import join_nonshared_inputs
    from pytensor.graph.replace import vectorize_graph

    kept = getattr(model, "_own_draws_fn", None)  # dropped by logdensity.forget_stale
    if kept is not None and kept[0] is model.pymc_model:
        return kept[1], kept[2]
    m = model.pymc_model
    transformed = {m.rvs_to_values[rv].name for rv in m.free_RVs
                   if m.rvs_to_transforms[rv] is not None}
    outs = [v for v in m.unobserved_value_vars if v.name not in transformed]
    names = [v.name for v in outs]
    new, joined = join_nonshared_inputs(point, outs, m.value_vars)
    batch = pt.matrix("draws", dtype=joined.dtype)
    # Python-mode operations over all the draws at once: compiled in milliseconds, and
    # each runs once on arrays of all the draws (numba's compile of the vectorised graph
    # costs seconds for a function called once)
    fn = pytensor.function([batch], vectorize_graph(new, {joined: batch}),
                           on_unused_input="ignore", mode="FAST_COMPILE")
    model._own_draws_fn = (m, fn, names)
    return fn, names


def _datatree(model, values, names, stats, chains, draws, attrs):
    import arviz_base

    m = model.pymc_model
    posterior = {}
    for name, v in zip(names, values):
        v = np.asarray(v)
        posterior[name] = v.reshape((chains, draws) + v.shape[1:])
    dims = {k: list(v) for k, v in m.named_vars_to_dims.items() if k in posterior}
    used = {d for v in dims.values() for d in v}
    coords = {k: list(v) for k, v in m.coords.items() if k in used}
    sample_stats = {k: np.stack([s[k] for s in stats]) for k in nuts.STATS}
    return arviz_base.from_dict({"posterior": posterior, "sample_stats": sample_stats},
                                coords=coords, dims=dims,
                                attrs={"posterior": attrs, "sample_stats": attrs},
                                check_conventions=False)


def run_own(model, draws, tune, chains, seed, progress, target_accept, info):
    """Sample ``model`` with this package's NUTS; the DataTree, or None when no posterior
    mode is found (the caller then uses PyMC's sampler)."""
    from pymc.blocking import DictToArrayBijection

    from .laplace import START_WEIGHT, chain_rngs, warm_start
    from .logdensity import compiled_logp

    t0 = time.perf_counter()
    m = model.pymc_model
    point = m.initial_point()
    fn = compiled_logp(model, info, point)
    logp_grad = logp_grad_of(fn)
    x0 = DictToArrayBijection.map(point).data
    logp_grad(x0)  # the first call finishes the compilation (numba)
    info["compile_logp_seconds"] = time.perf_counter() - t0
    lap = warm_start(logp_grad, x0, info)
    if lap is None:
        return None
    starts = [lap.starts(rng, logp_grad) for rng in chain_rngs(seed, chains)]
    t1, c1 = time.perf_counter(), time.process_time()
    out, stats = [], []
    for c, x in enumerate(starts):
        rng = np.random.default_rng([seed, _STREAM, c])
        say = None
        if progress:
            def say(it, c=c):
                print(f"\r  chain {c + 1}/{chains}: {it}/{tune + draws}", end="", flush=True, file=sys.stderr)
        d, st, *_ = nuts.sample_chain(logp_grad, x, lap.cov, draws=draws, tune=tune, rng=rng,
                                      target_accept=target_accept, prior_weight=START_WEIGHT,
                                      callback=say)
        out.append(d)
        stats.append(st)
    if progress:
        print(flush=True, file=sys.stderr)
    info["sampling_seconds"] = time.perf_counter() - t1
    info["sampling_cpu_seconds"] = time.process_time() - c1  # one thread: not the machine's load
    fn_draws, names = _draws_function(model, point)
    flat = np.concatenate(out)
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*overflow encountered.*")
        values = fn_draws(flat)
    attrs = {"sampling_time": info["sampling_seconds"], "tuning_steps": tune,
             "inference_library": "bayespanel"}
    dt = _datatree(model, values, names, stats, chains, draws, attrs)
    info["compile_seconds"] = (time.perf_counter() - t0 - info["sampling_seconds"]
                               - info.get("start_seconds", 0.0))
    return dt
