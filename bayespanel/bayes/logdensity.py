"""The compiled log density and gradient of a PyMC model, kept with the model and on disk.

PyMC's ``ValueGradFunction`` over every free variable (raveled), compiled once per
model graph; both samplers that run marginal models (bayespanel's own and PyMC's) and the
Laplace start call it. Across processes it is kept on disk (see "compile cache" below):
the graph rewriting is then skipped and PyTensor finds the numba code in its own cache.
"""

from __future__ import annotations

import os

import numpy as np

from .graph import graph_identity, same_graph

__all__ = ["forget_stale", "nutpie_compiled", "compiled_logp", "logp_grad_of"]


def forget_stale(model) -> bool:
    """Drop the compiled code kept with ``model`` (``_nutpie``, ``_pymc_logp``,
    ``_own_draws_fn``) when its ``pymc_model`` changed since they were made; returns True
    when it did.

    Called before every use of them (``sampling.run``, :func:`nutpie_compiled`), so that an
    edited model is never sampled with the code of its former graph.
    """
    now = graph_identity(model.pymc_model)
    kept = getattr(model, "_compiled_graph", None)
    if same_graph(kept, now):
        return False
    stale = kept is not None
    model._nutpie = None
    model._pymc_logp = None
    model._own_draws_fn = None
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


def compiled_logp(model, info=None, point=None):
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
