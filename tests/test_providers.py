"""A posterior's loo() reaches the analysis layer through a declared provider
(bayespanel.core.providers), not through an import of a higher layer
(tests/test_layers.py holds the import rule).

Outside check: on statsmodels' Grunfeld panel, ``post.loo("unit")`` reached through the
provider equals arviz_stats.loo (PSIS-LOO) applied to unit log-likelihoods written with
scipy.stats.multivariate_normal from the same posterior draws (each firm's rows jointly
normal with covariance sigma_obs^2 I + sigma_unit^2 J, the random-intercept marginal).
"""

from __future__ import annotations

import ast
from pathlib import Path

import numpy as np
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


def test_posterior_loo_equals_arviz_psis_on_scipy_densities(grunfeld):
    import arviz_stats
    import xarray as xr
    from scipy import stats

    panel = bayespanel.Panel(grunfeld, unit="firm", time="year")
    design = panel.design("invest ~ value + capital")
    post = bayespanel.RandomIntercept(panel, "invest ~ value + capital").sample(
        draws=100, tune=150, chains=2, seed=5, progress=False)
    ours = post.loo("unit", reff=1.0)            # through the declared provider
    b, sigma, tau = post.draws("coef"), post.draws("sigma_obs"), post.draws("sigma_unit")
    C, D = sigma.shape
    ll = np.empty((C, D, design.n_units))
    for i in range(design.n_units):
        rows = design.unit_codes == i
        X, y, T = design.X[rows], design.y[rows], int(rows.sum())
        for c in range(C):
            for d in range(D):
                # scipy.stats.multivariate_normal: the firm's rows jointly, intercept
                # integrated out
                cov = sigma[c, d] ** 2 * np.eye(T) + tau[c, d] ** 2 * np.ones((T, T))
                ll[c, d, i] = stats.multivariate_normal(X @ b[c, d], cov).logpdf(y)
    dt = xr.DataTree.from_dict({
        "posterior": xr.DataTree(xr.Dataset({"sigma_obs": (("chain", "draw"), sigma)})),
        "log_likelihood": xr.DataTree(xr.Dataset({"y": (("chain", "draw", "unit"), ll)})),
        "observed_data": xr.DataTree(xr.Dataset({"y": (("unit",), np.zeros(design.n_units))}))})
    theirs = arviz_stats.loo(dt, var_name="y", pointwise=True, reff=1.0)  # arviz_stats PSIS
    np.testing.assert_allclose(ours.elpd_i, np.asarray(theirs.elpd_i), rtol=1e-6)
    assert ours.elpd == pytest.approx(float(theirs.elpd), rel=1e-6)
    assert ours.p_loo == pytest.approx(float(theirs.p), rel=1e-5)
