"""PSIS-LOO of all points at once (bayespanel.analysis.loo.psisbatch) against arviz-stats'
point-by-point ``arviz_stats.loo`` on the same log-likelihood arrays.

Outside check: arviz_stats.loo (the reference implementation of Vehtari et al. 2024's
PSIS), fed the same DataTree the package gave it before. Data: statsmodels' Grunfeld
investment panel (10 firms x 20 years), a random-intercept posterior sampled small.
The batched version does the same operations in the same order on each point's draws
(only its log-sum-exp is numpy's, not scipy's), so the numbers agree to 1e-12 relative.
"""

import warnings

import numpy as np
import pytest
import xarray as xr

import bayespanel as bp
from bayespanel.analysis.loo._draws import from_posterior
from bayespanel.analysis.loo.pointwise import pointwise_loglik
from bayespanel.analysis.loo.psisbatch import psis_log_weights, psis_loo

FIELDS = ("elpd", "se", "p", "good_k", "n_samples", "n_data_points", "warning", "scale",
          "approx_posterior")


@pytest.fixture(scope="module")
def fd(grunfeld):
    panel = bp.Panel(grunfeld, unit="firm", time="year")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        post = panel.design("invest ~ value + capital").build(bp.models.RandomIntercept).sample(
            draws=250, tune=250, chains=2, seed=3, progress=False)
    return from_posterior(post)


def _arviz(ll, level, posterior, reff):
    """What the package called before: arviz_stats.loo on a DataTree of the array."""
    import arviz_stats

    dim = "unit" if level == "unit" else "row"
    groups = {"log_likelihood": xr.DataTree(xr.Dataset({level: (("chain", "draw", dim), ll)}))}
    if posterior is not None:
        groups["posterior"] = xr.DataTree(posterior)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return arviz_stats.loo(xr.DataTree.from_dict(groups), var_name=level, pointwise=True,
                               reff=reff)


def _same(ours, theirs):
    # the same operations in the same order, except the log-sum-exp (numpy's here,
    # scipy's there: core.mathcore.log_sum_exp), so the numbers agree to rounding
    for f in FIELDS:
        a, b = getattr(ours, f), getattr(theirs, f)
        if isinstance(a, float) and not isinstance(a, bool):
            assert a == pytest.approx(b, rel=1e-12, abs=1e-12), f
        else:
            assert a == b, f
    for f in ("elpd_i", "pareto_k", "log_weights"):
        a, b = getattr(ours, f), getattr(theirs, f)
        assert a.dims == b.dims and a.name == b.name, f
        xr.testing.assert_identical(a.coords.to_dataset(), b.coords.to_dataset())
        np.testing.assert_allclose(a.values, b.values, rtol=1e-12, atol=1e-12, err_msg=f)


@pytest.mark.parametrize("level, block", [("occasion", None), ("unit", None),
                                          ("occasion", 3 * 500)])
def test_batched_psis_equals_arviz_stats_loo(fd, level, block, monkeypatch):
    if block is not None:  # blocks of 3 points (the last one shorter)
        monkeypatch.setattr("bayespanel.analysis.loo.psisbatch._BLOCK", block)
    ll = pointwise_loglik(fd, level)
    _same(psis_loo(ll, level, fd.posterior), _arviz(ll, level, fd.posterior, None))
    # and through the package's entry point, with a given relative efficiency
    _same(bp.loo.psis_arrays(ll, level, reff=0.7), _arviz(ll, level, None, 0.7))


@pytest.mark.parametrize("scale, draws", [(8.0, None), (30.0, None), (1.0, 100)])
def test_heavy_tails_and_few_draws_follow_arviz_stats(fd, scale, draws):
    # the same log-likelihood sharpened (importance ratios with heavier tails, Pareto k
    # above 0.7 and beyond 1, where arviz-stats leaves tails unsmoothed) and cut to 100
    # draws (S * reff <= 225: the tail is S / 5 draws)
    ll = pointwise_loglik(fd, "occasion") * scale
    if draws is not None:
        ll = ll[:1, :draws]
    ours, theirs = psis_loo(ll, "occasion", reff=1.0), _arviz(ll, "occasion", None, 1.0)
    _same(ours, theirs)
    if scale > 1:
        assert np.nanmax(theirs.pareto_k.values) > 0.7


def test_a_flat_tail_is_refused_as_arviz_stats_refuses_it(fd):
    ll = np.zeros((2, 50, 3))
    with pytest.raises(ValueError, match="All tail values are the same"):
        psis_log_weights(ll, 1.0)
    with pytest.raises(bp.EstimationError, match="could not fit the tail"):
        bp.loo.psis_arrays(ll, "occasion")
