"""A posterior's loo() reaches the analysis layer through a declared provider
(bayespanel.core.providers), not through an import of a higher layer
(tests/test_layers.py holds the import rule)."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

import bayespanel
from bayespanel.core import providers

ROOT = Path(bayespanel.__file__).resolve().parent

CALLS = []


def fake_loo(post, level, **kwargs):
    CALLS.append((post, level, kwargs))
    return "scored"


@pytest.fixture
def fake_provider():
    before = providers.declared()["loo"]
    providers.declare("loo", __name__, "fake_loo")
    CALLS.clear()
    try:
        yield
    finally:
        providers.declare("loo", *before)


def test_loo_is_declared_by_the_top_module_and_is_the_analysis_loo():
    from bayespanel.analysis.loo import loo

    assert providers.declared()["loo"] == ("bayespanel.analysis.loo", "loo")
    assert providers.provider("loo") is loo


def test_only_the_top_module_declares_providers():
    # a declaration names a module by a string the import walker cannot see, so it may
    # only sit in the layer that may import every other (the package's __init__)
    where = []
    for path in ROOT.rglob("*.py"):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Call):
                f = node.func
                name = f.attr if isinstance(f, ast.Attribute) else getattr(f, "id", None)
                if name in ("declare", "_declare"):
                    where.append(path.relative_to(ROOT).as_posix())
    assert where == ["__init__.py"]


def test_an_undeclared_name_is_refused_by_name():
    with pytest.raises(LookupError, match="'nothing here'.*'loo'"):
        providers.provider("nothing here")


@pytest.mark.parametrize("cls", ["Posterior", "LatentPosterior"])
def test_posterior_loo_calls_the_declared_provider(fake_provider, cls):
    from bayespanel.bayes.latentpost import LatentPosterior
    from bayespanel.bayes.posterior import Posterior

    method = {"Posterior": Posterior, "LatentPosterior": LatentPosterior}[cls].loo
    post = object()
    assert method(post, "unit", reff=0.5) == "scored"
    assert CALLS == [(post, "unit", {"reff": 0.5})]
    assert method(post) == "scored"          # the default level stays "occasion"
    assert CALLS[-1] == (post, "occasion", {})
