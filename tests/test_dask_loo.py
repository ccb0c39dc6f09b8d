"""Occasion-level sub-sampled LOO out of core equals the in-memory estimator.

The Dask path chooses the same seeded sample of rows as bayespanel.analysis.loo.loo_subsample,
scores every row at the posterior means in one pass (keeping only the sum and the sum of
squares) and the sampled rows per draw; with the same draws it must give the same
estimate, standard errors, effective number of parameters and pointwise values (to 1e-10
relative) for every Gaussian model kind, on a panel whose units are spread over
partitions, with and without dropped rows, on Dask's local scheduler and on a distributed
cluster. The draws are drawn around least-squares fits (numpy lstsq) of each kind's
columns; only their being the same on both paths matters here.

Outside data: the wage panel of Vella and Verbeek (1998) shipped in linearmodels.datasets.
Outside reference: arviz-stats' difference estimator (diff_srs_estimator), which the
sums-only estimator of the out-of-core path must reproduce.
"""

import warnings

import numpy as np
import pytest

import bayespanel as bp
from bayespanel.analysis.loo.subsample import diff_estimator
from bayespanel.data.sources.dask import DaskPanel
from bayespanel.core.errors import DataHandlingWarning, SamplingWarning, SpecificationError
from bayespanel.analysis.loo import from_draws, loo_subsample

dd = pytest.importorskip("dask.dataframe")

from test_dask import as_dask, spanning  # noqa: E402  (shared helpers)

FORMULA = "lwage ~ exper + union + married + black"
KINDS = [("random", "random"), ("pooled", "none"), ("within", "fixed"),
         ("mundlak", "random"), ("within_between", "random")]


def draws_for(design, kind, unit_effects, seed=3, C=2, D=100):
    """FitDraws around the least-squares fit of the kind's columns (numpy lstsq)."""
    M, labels = design.matrices(kind)
    rng = np.random.default_rng(seed)
    beta = np.linalg.lstsq(M, design.y, rcond=None)[0]
    coef = beta + rng.normal(0, 0.01, (C, D, M.shape[1]))
    sigma = 0.35 * np.exp(rng.normal(0, 0.05, (C, D)))
    tau = 0.35 * np.exp(rng.normal(0, 0.2, (C, D))) if unit_effects == "random" else None
    return from_draws(kind=kind, unit_effects=unit_effects, labels=labels, M=M, y=design.y,
                      codes=design.unit_codes, coef=coef, sigma=sigma, tau=tau,
                      units=design.units)


def assert_same(ours, theirs):
    assert ours.level == theirs.level == "occasion" and ours.method == theirs.method
    assert ours.n_points == theirs.n_points  # every row, though only the sample is kept
    assert ours.to_record()["n_points"] == theirs.n_points
    for f in ("elpd", "se", "p_loo", "subsampling_se"):
        a, b = getattr(ours, f), getattr(theirs, f)
        assert abs(a - b) <= 1e-10 * abs(b), f
    np.testing.assert_array_equal(ours.subsample_indices, theirs.subsample_indices)
    sampled = theirs.pointwise.dropna(subset=["elpd"]).reset_index(drop=True)
    pw = ours.pointwise
    np.testing.assert_array_equal(pw["position"], sampled["position"])
    np.testing.assert_array_equal(pw["unit"], sampled["unit"])
    np.testing.assert_array_equal(pw["occasion"], sampled["occasion"])
    for c in ("elpd", "approx", "pareto_k"):
        np.testing.assert_allclose(pw[c], sampled[c], rtol=1e-10, atol=1e-12, err_msg=c)


@pytest.fixture(scope="module")
def wage(wage_panel):
    df = wage_panel.reset_index(drop=True)
    mem = bp.Panel(df, "nr", "year")
    dp = DaskPanel(as_dask(df, spanning(df)), "nr", "year", client="synchronous")
    return df, mem.design(FORMULA), dp.design(FORMULA)


@pytest.mark.parametrize("kind,unit_effects", KINDS)
def test_occasion_loo_matches_memory_for_every_kind(wage, kind, unit_effects):
    # Source: wage panel (linearmodels.datasets), units spread over 9 partitions.
    _, mem, dsk = wage
    fd = draws_for(mem, kind, unit_effects)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SamplingWarning)
        theirs = loo_subsample(fd, "occasion", 80, seed=5, reff=1.0)
        ours = loo_subsample(fd, "occasion", 80, seed=5, reff=1.0, design=dsk)
    assert_same(ours, theirs)
    times = mem.time[ours.subsample_indices]  # the rows picked are the in-memory rows
    np.testing.assert_array_equal(ours.pointwise["time"], times)


def test_occasion_loo_with_dropped_rows_and_occasion_effects(wage_panel):
    # Source: wage panel (linearmodels.datasets) with values removed (rows of sampled
    # units gathered and ranked after the pass), the 1980 rows among them, so the first
    # occasion indicator leaves the design (the kept columns are selected in the pass).
    df = wage_panel.reset_index(drop=True).copy()
    rng = np.random.default_rng(6)
    df.loc[rng.choice(len(df), 300, replace=False), "exper"] = np.nan
    df.loc[df["year"] == 1980, "union"] = np.nan
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataHandlingWarning)
        mem = bp.Panel(df, "nr", "year").design(FORMULA, occasion_effects=True)
        dsk = DaskPanel(as_dask(df, spanning(df, seed=2)), "nr", "year",
                        client="synchronous").design(FORMULA, occasion_effects=True)
    assert dsk.terms == mem.terms and "occasion[1981]" not in dsk.terms
    assert dsk.source.kept_columns is not None and dsk.n_dropped > 0
    for kind, ue in [("random", "random"), ("within", "fixed")]:
        fd = draws_for(mem, kind, ue, seed=8)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", SamplingWarning)
            assert_same(loo_subsample(fd, "occasion", 120, seed=2, reff=1.0, design=dsk),
                        loo_subsample(fd, "occasion", 120, seed=2, reff=1.0))


def test_occasion_loo_on_a_distributed_cluster(wage):
    # Source: wage panel (linearmodels.datasets); the unit-level lookup is scattered once
    # to the workers of a distributed LocalCluster (thread workers).
    from distributed import Client, LocalCluster

    df, mem, _ = wage
    fd = draws_for(mem, "random", "random", seed=4)
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                      dashboard_address=":0") as cluster, Client(cluster) as client:
        dsk = DaskPanel(as_dask(df, spanning(df, seed=9)), "nr", "year",
                        client=client).design(FORMULA)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", SamplingWarning)
            ours = loo_subsample(fd, "occasion", 60, seed=1, reff=1.0, design=dsk)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SamplingWarning)
        assert_same(ours, loo_subsample(fd, "occasion", 60, seed=1, reff=1.0))


def test_difference_estimator_from_sums_equals_arviz():
    # Reference: arviz_stats array_stats.diff_srs_estimator, given every approximation.
    from arviz_stats.base import array_stats

    rng = np.random.default_rng(1)
    approx = rng.normal(-1.0, 0.4, 5000)
    idx = rng.choice(5000, 70, replace=False)
    elpd = approx[idx] + rng.normal(-0.02, 0.05, 70)
    ours = diff_estimator(elpd, approx[idx], approx.sum(), (approx ** 2).sum(), 5000)
    theirs = array_stats.diff_srs_estimator(elpd, approx[idx], approx, 5000)
    np.testing.assert_allclose(ours, theirs, rtol=1e-12)


def test_occasion_loo_bad_options(wage):
    _, mem, dsk = wage
    fd = draws_for(mem, "random", "random")
    with pytest.raises(SpecificationError, match="level"):
        loo_subsample(fd, "row", 50, design=dsk)
    with pytest.raises(SpecificationError, match="observations=5000"):
        loo_subsample(fd, "occasion", 5000, design=dsk)
    other = draws_for(bp.Panel(wage[0], "nr", "year").design("lwage ~ exper"), "random",
                      "random")
    with pytest.raises(SpecificationError, match="terms do not match"):
        loo_subsample(other, "occasion", 50, design=dsk)
