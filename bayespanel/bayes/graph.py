"""What a user added to a model's PyMC graph, and whether a graph is still the one seen.

``model.pymc_model`` is the documented way to extend a model (docs/bayesian-models.md): a
user may add variables, potentials or deterministics to it, set initial values, or replace
it by an edited copy. Compiled samplers kept with the model (nutpie's, and the compiled log
density of the warm start, :mod:`bayespanel.bayes.sampling`) are valid only for the graph
they were made from, and a posterior's refits must sample the graph its draws came from;
both compare graphs with :func:`graph_identity`. A swap of ``pm.Data`` values
(``set_suffstats``, ``set_data``) is no edit: compiled code reads those values on every
call. This module imports nothing of the package.
"""

from __future__ import annotations

__all__ = ["graph_identity", "same_graph", "mark_built", "graph_edits"]


def graph_identity(m) -> tuple:
    """What a compiled log density of PyMC model ``m`` depends on, apart from the values
    of its ``pm.Data``: the model object and every named variable, value variable,
    transform and initial value it holds (the objects themselves, compared by identity:
    adding or replacing any of them makes a different tuple, and holding them keeps
    Python from reusing their ids)."""
    return (m, *m.named_vars.values(), *m.rvs_to_values.values(),
            *m.rvs_to_transforms.values(), *m.rvs_to_initial_values.values())


def same_graph(a, b) -> bool:
    """True when ``a`` and ``b`` (from :func:`graph_identity`; ``a`` may be None) hold
    the same objects in the same order."""
    return a is not None and len(a) == len(b) and all(x is y for x, y in zip(a, b))


def mark_built(model) -> None:
    """Record the graph a builder made, so that :func:`graph_edits` can tell what a user
    added to ``model.pymc_model`` afterwards (called by the builders)."""
    m = model.pymc_model
    model._built_graph = graph_identity(m)
    model._built_names = frozenset(m.named_vars)


def graph_edits(model) -> list:
    """What was added to ``model.pymc_model`` since the builder made it: the names of the
    new named variables (free variables, deterministics, potentials, data), in the
    order they were added; ``["(graph replaced or changed)"]`` when the graph differs
    without a new name (an initial value set, a transform changed, the model replaced by
    an edited copy); ``[]`` for the graph as built."""
    built = getattr(model, "_built_graph", None)
    m = model.pymc_model
    if built is None or same_graph(built, graph_identity(m)):
        return []
    added = [name for name in m.named_vars if name not in model._built_names]
    return added or ["(graph replaced or changed)"]
