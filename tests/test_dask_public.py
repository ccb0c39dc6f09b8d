"""The public calls of an in-memory panel work on a Dask-backed one, with the same numbers.

The wage panel of Vella and Verbeek (1998), as shipped in linearmodels.datasets, is
written to four Parquet files (rows shuffled, so units are split across files) and opened
with ``bp.Panel.from_parquet(..., engine="dask")``. On it: the reference fits, every
Gaussian builder's ``sample()``, the variance partition, the contrasts with their tests,
sub-sampled LOO at both levels and ``bp.compare``. Where both paths see the same draws
(a posterior of the in-memory model made from the Dask posterior's draws), every number
equals the in-memory one to 1e-9 relative (the two paths sum the rows in other orders);
the posteriors themselves are checked against linearmodels' fits of the reference
counterparts.
"""

import warnings

import numpy as np
import pytest

import bayespanel as bp
from bayespanel.core.errors import SpecificationError
from bayespanel.bayes.posterior import Posterior

pytest.importorskip("dask.dataframe")

FORMULA = "lwage ~ exper + union + married + black"
BUILDERS = ["Pooled", "RandomIntercept", "WithinBetween", "CorrelatedEffects", "FixedEffects"]
KW = dict(draws=150, tune=150, chains=2, seed=5, progress=False)


def _close(a, b, rel=1e-9):
    a, b = np.asarray(a, dtype=float), np.asarray(b, dtype=float)
    assert a.shape == b.shape
    ok = np.isfinite(b)
    assert np.array_equal(np.isfinite(a), ok)
    assert np.all(np.abs(a[ok] - b[ok]) <= rel * np.maximum(np.abs(b[ok]), 1.0))


@pytest.fixture(scope="module")
def panels(wage_panel, tmp_path_factory):
    folder = tmp_path_factory.mktemp("wage_parts")
    df = wage_panel.reset_index(drop=True)
    order = np.random.default_rng(16).permutation(len(df))
    for i, part in enumerate(np.array_split(order, 4)):
        df.iloc[part].to_parquet(folder / f"part{i}.parquet", index=False)
    dp = bp.Panel.from_parquet(folder, unit="nr", time="year", engine="dask",
                               client="synchronous")
    return dp, bp.Panel(df, unit="nr", time="year"), df


@pytest.fixture(scope="module")
def fitted(panels):
    """Each builder on the Dask panel, sampled, and the in-memory model of it."""
    dp, mem, _ = panels
    out = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for name in BUILDERS:
            B = getattr(bp, name)
            out[name] = (B(dp, FORMULA).sample(**KW), B(mem, FORMULA))
    return out


def _twin(fitted, name):
    """The Dask posterior and an in-memory posterior holding the same draws."""
    post, mem_model = fitted[name]
    return post, Posterior.from_model(mem_model, post.idata, post.sampling)


def test_reference_fits_take_the_dask_panel(panels):
    # Source: linearmodels PanelOLS (entity effects, clustered by unit) on the wage
    # panel; the other fits equal the in-memory ones on the same panel
    from linearmodels.panel import PanelOLS

    dp, mem, df = panels
    for est, kw in [("pooled", {"cov": "cluster"}), ("within", {"cov": "cluster"}),
                    ("between", {}), ("random", {"cov": "cluster"}), ("mundlak", {}),
                    ("within_between", {"cov": "cr2"})]:
        a = getattr(bp.reference, est)(dp, FORMULA, **kw)
        b = getattr(bp.reference, est)(mem, FORMULA, **kw)
        assert list(a.coef.index) == list(b.coef.index)
        _close(a.coef, b.coef, 1e-10)
        _close(a.se, b.se, 1e-9)
    fe = bp.reference.within(dp, FORMULA, cov="cluster")
    lm = PanelOLS.from_formula("lwage ~ exper + union + married + EntityEffects",
                               df.set_index(["nr", "year"])).fit(cov_type="clustered",
                                                                 cluster_entity=True)
    _close(fe.coef[["exper", "union", "married"]], lm.params[["exper", "union", "married"]],
           1e-8)


@pytest.mark.parametrize("name", BUILDERS)
def test_every_gaussian_builder_samples_on_the_dask_panel(fitted, panels, name):
    # Source: linearmodels' fits of each model's reference counterpart on the wage panel
    # (PooledOLS; RandomEffects; PanelOLS with entity effects for the within parts, which
    # the hybrid and Mundlak models share with fixed effects: Mundlak 1978). With 4,360
    # rows and weak priors the posterior mean sits within a posterior SD of them
    # (common practice, not a published bound).
    from linearmodels.panel import PanelOLS, PooledOLS, RandomEffects

    _, _, df = panels
    post, mem_model = fitted[name]
    assert post.rows is None and post.design is not None and not post.design.has_rows
    assert post.labels == mem_model.labels
    summ = post.summary()
    data = df.set_index(["nr", "year"]).assign(const=1.0)
    rhs = ["exper", "union", "married", "black"]
    if name == "Pooled":
        lm = PooledOLS(data["lwage"], data[["const"] + rhs]).fit()
        pairs = {t: t for t in rhs}
    elif name == "RandomIntercept":
        lm = RandomEffects(data["lwage"], data[["const"] + rhs]).fit()
        pairs = {t: t for t in rhs}
    else:
        lm = PanelOLS(data["lwage"], data[rhs[:3]], entity_effects=True).fit()
        label = {"WithinBetween": "{} (within)", "CorrelatedEffects": "{}",
                 "FixedEffects": "{}"}[name]
        pairs = {label.format(t): t for t in rhs[:3]}
    for ours, theirs in pairs.items():
        assert abs(summ.at[ours, "mean"] - lm.params[theirs]) < summ.at[ours, "sd"]
    # the model reads the data only through its statistics: the same as in memory
    a, b = post.stats, mem_model.stats
    for field in ("mean", "total", "within", "unit_mean", "group_mean", "group_cp"):
        _close(getattr(a, field), getattr(b, field), 1e-10)
    assert np.array_equal(a.unit_count, b.unit_count) and np.array_equal(a.lengths, b.lengths)


@pytest.mark.parametrize("name", ["RandomIntercept", "WithinBetween", "CorrelatedEffects",
                                  "Pooled", "FixedEffects"])
def test_variance_partition_equals_memory(fitted, panels, name):
    # Source: wage panel (linearmodels.datasets). Identity: the row covariances of the
    # within and between parts are within/n and (total - within)/n of the one-pass
    # statistics (analysis of variance), so the partition from statistics equals the one
    # from rows draw by draw
    dp, mem, _ = panels
    post, twin = _twin(fitted, name)
    counterpart = {"RandomIntercept": "random", "WithinBetween": "within_between",
                   "CorrelatedEffects": "mundlak", "Pooled": "pooled",
                   "FixedEffects": "within"}[name]
    a = post.variance_partition(reference=getattr(bp.reference, counterpart)(dp, FORMULA))
    b = twin.variance_partition(reference=getattr(bp.reference, counterpart)(mem, FORMULA))
    assert list(a.draws.columns) == list(b.draws.columns)
    for c in b.draws.columns:
        _close(a.draws[c].to_numpy(), b.draws[c].to_numpy())
    _close(a.reference.to_numpy(), b.reference.reindex(a.reference.index).to_numpy())
    _, _, df = panels
    fewer = bp.Panel(df[df["nr"] != df["nr"].iloc[0]], unit="nr", time="year")
    with pytest.raises(SpecificationError, match="same estimation rows"):
        post.variance_partition(reference=getattr(bp.reference, counterpart)(fewer, FORMULA))


@pytest.mark.parametrize("name", ["WithinBetween", "CorrelatedEffects"])
def test_contrasts_and_their_tests_equal_memory(fitted, panels, name):
    # Source: wage panel (linearmodels.datasets); the Hausman and cluster-robust Mundlak
    # tests from the design's statistics equal those the in-memory path computes from rows
    dp, mem, _ = panels
    post, twin = _twin(fitted, name)
    kind = "within_between" if name == "WithinBetween" else "mundlak"
    a = post.contrasts(reference=getattr(bp.reference, kind)(dp, FORMULA, cov="cluster"))
    b = twin.contrasts(reference=getattr(bp.reference, kind)(mem, FORMULA, cov="cluster"))
    ta, tb = a.table(), b.table()
    assert list(ta.index) == list(tb.index) == ["exper", "union", "married"]
    for c in tb.columns:
        if tb[c].dtype.kind == "f":
            _close(ta[c].to_numpy(), tb[c].to_numpy())
    sa, sb = a.tests_table(), b.tests_table()
    assert list(sa.index) == list(sb.index) == ["Hausman (classical)",
                                                 "Mundlak (cluster-robust)"]
    _close(sa["statistic"].to_numpy(), sb["statistic"].to_numpy(), 1e-8)
    _close(sa["p_value"].to_numpy(), sb["p_value"].to_numpy(), 1e-8)


@pytest.mark.parametrize("level", ["unit", "occasion"])
def test_subsampled_loo_equals_memory(fitted, level):
    # Source: wage panel (linearmodels.datasets). Same seed, same sampled points and the
    # same estimate (Magnusson et al. 2019, difference estimator) as in memory
    post, twin = _twin(fitted, "RandomIntercept")
    a = post.loo(level, subsample=120, seed=2)
    b = twin.loo(level, subsample=120, seed=2)
    assert np.array_equal(a.subsample_indices, b.subsample_indices)
    _close([a.elpd, a.se, a.p_loo, a.subsampling_se], [b.elpd, b.se, b.p_loo, b.subsampling_se])
    c = bp.loo.loo_subsample(post, level, 120, seed=2)
    _close([c.elpd, c.se], [a.elpd, a.se], 0)
    with pytest.raises(SpecificationError, match="subsample"):
        post.loo(level)


def test_compare_equals_memory(fitted, panels):
    # Source: wage panel (linearmodels.datasets). The Dask posteriors are compared by
    # sub-sampled LOO on one seeded sample of units; the same table comes from the
    # in-memory sub-sampled LOO results of the same draws. Fixed effects have no
    # unit-level density; a reference fit is not cross-validated without rows
    dp, _, _ = panels
    names = ["RandomIntercept", "Pooled", "FixedEffects"]
    pairs = {n: _twin(fitted, n) for n in names}
    models = {n: p for n, (p, _) in pairs.items()}
    models["ref"] = bp.reference.random(dp, FORMULA)
    table = bp.compare(models, level="unit", seed=4, loo_kwargs={"subsample": 150})
    mem = {n: t.loo("unit", subsample=150, seed=4) for n, (_, t) in pairs.items()
           if n != "FixedEffects"}
    ref = bp.compare(mem, level="unit")
    assert list(table.index) == ["RandomIntercept", "Pooled", "FixedEffects", "ref"]
    assert list(ref.index) == ["RandomIntercept", "Pooled"]
    for c in ("elpd", "se", "elpd_diff", "se_diff", "p_loo"):
        _close(table.loc[list(ref.index), c].to_numpy(), ref[c].to_numpy())
    d = (mem["Pooled"].pointwise["elpd"] - mem["RandomIntercept"].pointwise["elpd"]).dropna()
    _close(table.at["Pooled", "se_diff"], np.sqrt(len(mem["Pooled"].pointwise) * d.var()))
    assert table.loc[["FixedEffects", "ref"], "method"].tolist() == ["undefined"] * 2
    assert table.at["RandomIntercept", "elpd"] > table.at["Pooled", "elpd"]
