"""The Dask path gives what the in-memory path gives, on awkwardly split panels.

Outside checks: the wage panel of Vella and Verbeek (1998) shipped in
linearmodels.datasets and the Grunfeld investment panel shipped in statsmodels.datasets;
linearmodels PanelOLS / BetweenOLS / RandomEffects and statsmodels OLS with clustered
covariances as reference libraries. Inside the project, every number of the Dask path is
also compared with the in-memory path on the same rows (to 1e-10 relative).

Partitionings: rows shuffled so units span partitions, empty partitions, one unit per
partition, a single partition.
"""

import warnings

import numpy as np
import pandas as pd
import pytest

import bayespanel as bp
from bayespanel.core import derived
from bayespanel.data.sources.dask import DaskPanel
from bayespanel.core.errors import (DataHandlingWarning, FormulaError, PanelDataError,
                               SpecificationError)

dd = pytest.importorskip("dask.dataframe")

WAGE = "lwage ~ exper + expersq + union + married + black + educ"
TV = ["exper", "expersq", "union", "married"]
GRUNFELD = "invest ~ value + capital"
FIELDS = ("mean", "total", "within", "unit_mean", "group_mean", "group_cp")


def rel(a, b):
    a, b = np.asarray(a, float), np.asarray(b, float)
    return float(np.max(np.abs(a - b)) / max(np.max(np.abs(b)), 1e-300))


def as_dask(df, pieces):
    """A Dask DataFrame whose partitions are exactly ``pieces`` (lists of row positions)."""
    frames = [df.iloc[list(p)] for p in pieces]
    return dd.from_map(lambda x: x, frames, meta=df.iloc[:0], enforce_metadata=False)


def spanning(df, seed=3):
    """Rows shuffled (every unit spread over partitions), uneven sizes, empty partitions."""
    order = np.random.default_rng(seed).permutation(len(df))
    cuts = [0, 1, 1, 700, 701, 1900, 1900, 3100, len(df), len(df)]
    return [order[a:b] for a, b in zip(cuts[:-1], cuts[1:])]


def one_unit_each(df, unit):
    """One unit per partition, with empty partitions between them."""
    out = []
    for _, idx in df.groupby(unit, sort=False).indices.items():
        out += [idx, []]
    return out


@pytest.fixture(scope="module")
def wage(wage_panel):
    df = wage_panel.reset_index(drop=True)
    return df, bp.Panel(df, "nr", "year")


@pytest.fixture(scope="module")
def wage_dask(wage):
    df, _ = wage
    return DaskPanel(as_dask(df, spanning(df)), "nr", "year", client="synchronous")


@pytest.fixture(scope="module")
def wage_designs(wage, wage_dask):
    _, mem = wage
    return wage_dask.design(WAGE, cluster=True), mem.design(WAGE)


@pytest.fixture(scope="module")
def grunfeld_panels(grunfeld):
    df = grunfeld.reset_index(drop=True)
    layouts = {"one-unit-each": one_unit_each(df, "firm"), "single": [np.arange(len(df))]}
    return df, {k: bp.Panel(as_dask(df, v), "firm", "year", client="synchronous")
                for k, v in layouts.items()}


# ---------------------------------------------------------------------------- structure
def test_panel_accepts_dask_frame(wage):
    df, _ = wage
    p = bp.Panel(as_dask(df, [range(10), range(10, len(df))]), unit="nr", time="year",
                 client="synchronous")
    assert isinstance(p, DaskPanel)


def test_structure_and_describe_match_memory(wage, wage_dask):
    # Source: wage panel, linearmodels.datasets (545 men x 8 years, balanced).
    df, mem = wage
    assert wage_dask.structure() == mem.structure()
    assert wage_dask.structure()["n_units"] == 545 and wage_dask.is_balanced
    a, b = wage_dask.describe(), mem.describe()
    assert list(a.index) == list(b.index)
    assert (a["varies_within"] == b["varies_within"]).all()
    assert not a.loc["black", "varies_within"] and a.loc["exper", "varies_within"]
    num = [c for c in a.columns if c != "varies_within"]
    assert rel(a[num].to_numpy(float), b[num].to_numpy(float)) < 1e-10


def test_gaps_and_unbalanced_structure(grunfeld):
    # Source: Grunfeld panel (statsmodels.datasets), with rows removed to make gaps.
    df = grunfeld.drop(index=[3, 4, 45, 61, 199]).reset_index(drop=True)
    mem = bp.Panel(df, "firm", "year")
    dp = DaskPanel(as_dask(df, spanning(df, seed=1)), "firm", "year", client="synchronous")
    assert dp.structure() == mem.structure()
    assert dp.gaps == mem.gaps and len(dp.gaps) >= 2
    assert dp.occasions_per_unit.to_dict() == mem.occasions_per_unit.to_dict()


# ---------------------------------------------------------------------------- statistics
@pytest.mark.parametrize("kind", ["random", "mundlak", "within_between"])
def test_suffstats_match_memory_wage(wage_designs, kind):
    # Source: wage panel (linearmodels.datasets); units spread over 9 partitions.
    dsk, mem = wage_designs
    a, b = dsk.suffstats(kind), derived.from_design(mem, kind)
    assert a.names == b.names and a.n == b.n and a.n_units == b.n_units
    np.testing.assert_array_equal(a.unit_count, b.unit_count)
    np.testing.assert_array_equal(a.lengths, b.lengths)
    for f in FIELDS:
        assert rel(getattr(a, f), getattr(b, f)) < 1e-10, f
    assert dsk.terms == mem.terms
    assert dsk.varies_within.equals(mem.varies_within)
    assert dsk.labels(kind) == mem.matrices(kind)[1]


@pytest.mark.parametrize("layout", ["one-unit-each", "single"])
def test_suffstats_match_memory_grunfeld(grunfeld_panels, layout):
    # Source: Grunfeld panel (statsmodels.datasets), 10 firms.
    df, panels = grunfeld_panels
    mem = bp.Panel(df, "firm", "year").design(GRUNFELD)
    dsk = panels[layout].design(GRUNFELD)
    for kind in ("random", "mundlak"):
        a, b = dsk.suffstats(kind), derived.from_design(mem, kind)
        for f in FIELDS:
            assert rel(getattr(a, f), getattr(b, f)) < 1e-10, (kind, f)


def test_listwise_deletion_reported_as_in_memory(wage):
    # Source: wage panel (linearmodels.datasets) with values removed in two columns.
    df, _ = wage
    df = df.copy()
    rng = np.random.default_rng(5)
    df.loc[rng.choice(len(df), 60, replace=False), "exper"] = np.nan
    df.loc[rng.choice(len(df), 40, replace=False), "lwage"] = np.nan
    # all rows of one unit missing: it leaves the sample on both paths
    df.loc[df["nr"] == df["nr"].iloc[0], "union"] = np.nan
    mem = bp.Panel(df, "nr", "year")
    dp = DaskPanel(as_dask(df, spanning(df, seed=8)), "nr", "year", client="synchronous")
    with pytest.warns(DataHandlingWarning) as wm:
        b = mem.design(WAGE)
    with pytest.warns(DataHandlingWarning) as wd:
        a = dp.design(WAGE)
    msg = lambda w: [str(x.message) for x in w if "dropped" in str(x.message)]  # noqa: E731
    assert msg(wd) == msg(wm) and len(msg(wd)) == 1
    assert a.n_dropped == b.n_dropped and a.dropped_by_column == b.dropped_by_column
    assert a.n_units == b.n_units == 544 and list(a.units) == list(b.units)
    for f in FIELDS:
        assert rel(getattr(a.suffstats("within_between"), f),
                   getattr(derived.from_design(b, "within_between"), f)) < 1e-10


def test_occasion_effects_match_memory(wage, wage_dask):
    # Source: wage panel (linearmodels.datasets); the first year's rows removed from the
    # estimation sample so the reference occasion moves, as in memory.
    df, mem = wage
    a = wage_dask.design("lwage ~ union + married", occasion_effects=True)
    b = mem.design("lwage ~ union + married", occasion_effects=True)
    assert a.terms == b.terms and a.terms[-1] == "occasion[1987]"
    for f in FIELDS:
        assert rel(getattr(a.suffstats(), f), getattr(derived.from_design(b), f)) < 1e-10
    df2 = df.copy()
    df2.loc[df2["year"] == 1980, "union"] = np.nan
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataHandlingWarning)
        a = DaskPanel(as_dask(df2, spanning(df2)), "nr", "year", client="synchronous").design(
            "lwage ~ union + married", occasion_effects=True)
        b = bp.Panel(df2, "nr", "year").design("lwage ~ union + married", occasion_effects=True)
    assert a.terms == b.terms and "occasion[1981]" not in a.terms
    assert rel(a.suffstats().total, derived.from_design(b).total) < 1e-10


@pytest.mark.parametrize("kind", ["mundlak", "within_between"])
def test_occasion_effects_between_parts_match_memory(grunfeld_panels, kind):
    # Source: Grunfeld panel (statsmodels.datasets), balanced, so the unit means of the
    # occasion indicators are all equal and enter neither path (Design._with_between_part);
    # reference: the in-memory design on the same rows, and linearmodels RandomEffects
    # with year indicators for sigma_unit (Swamy-Arora's variance components of the Mundlak
    # and hybrid models equal the random-effects ones: the unit means add nothing to the
    # span of the between regression, and the within regression is the same).
    from linearmodels.panel import RandomEffects

    df, panels = grunfeld_panels
    mem = bp.Panel(df, "firm", "year").design(GRUNFELD, occasion_effects=True)
    dsk = panels["one-unit-each"].design(GRUNFELD, occasion_effects=True)
    assert dsk.labels(kind) == mem.labels(kind) == mem.matrices(kind)[1]
    assert not any(t.startswith("occasion[") and ("mean" in t or "between" in t)
                   for t in dsk.labels(kind))
    a = bp.reference.fit_design(dsk, kind, method="swamy-arora")
    b = bp.reference.fit_design(mem, kind, method="swamy-arora")
    assert rel(a.coef, b.coef) < 1e-10 and rel(a.sigma_unit, b.sigma_unit) < 1e-10
    d = df.set_index(["firm", "year"])
    exog = pd.get_dummies(d.index.get_level_values("year"), prefix="y", drop_first=True,
                          dtype=float).set_index(d.index)
    exog.insert(0, "const", 1.0)
    exog[["value", "capital"]] = d[["value", "capital"]]
    re = RandomEffects(d["invest"], exog).fit()
    assert abs(a.sigma_unit - float(np.sqrt(re.variance_decomposition["Effects"]))) < 1e-6 * a.sigma_unit


def test_row_wise_transforms(wage, wage_dask):
    # Source: wage panel (linearmodels.datasets); log, powers and interactions per row.
    _, mem = wage
    f = "lwage ~ np.log(hours) + I(exper ** 2) + union * married"
    a, b = wage_dask.design(f), mem.design(f)
    assert a.terms == b.terms
    assert rel(a.suffstats().within, derived.from_design(b).within) < 1e-10


# ---------------------------------------------------------------------------- reference fits
CASES = [("pooled", None), ("within", None), ("between", None), ("random", "swamy-arora"),
         ("mundlak", "swamy-arora"), ("within_between", "swamy-arora")]


@pytest.mark.parametrize("estimator,method", CASES, ids=[c[0] for c in CASES])
@pytest.mark.parametrize("cov", ["classical", "cluster", "cr2"])
def test_reference_fits_match_memory(wage_designs, estimator, method, cov):
    # Source: wage panel (linearmodels.datasets); in-memory fits are themselves checked
    # against linearmodels in tests/test_reference_wage.py.
    dsk, mem = wage_designs
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataHandlingWarning)
        a = bp.reference.fit_design(dsk, estimator, method=method, cov=cov)
        b = bp.reference.fit_design(mem, estimator, method=method, cov=cov)
    assert list(a.coef.index) == list(b.coef.index)
    assert rel(a.coef, b.coef) < 1e-10
    assert rel(a.se, b.se) < 1e-10
    assert rel(a.df_resid, b.df_resid) < 1e-10
    assert a.dropped == b.dropped and a.n_obs == b.n_obs
    for s in ("sigma_unit", "sigma_obs"):
        x, y = getattr(a, s), getattr(b, s)
        assert (np.isnan(x) and np.isnan(y)) or abs(x - y) <= 1e-10 * abs(y)


@pytest.mark.parametrize("method", ["ml", "reml"])
def test_likelihood_fits_match_memory(wage_designs, method):
    # Source: wage panel (linearmodels.datasets). The variance ratio is the root of the
    # analytic slope of the profile likelihood (bracketed Brent root to rtol 4 eps), so
    # statistics equal to 1e-15 give optima equal to about that: 1e-10 holds with room.
    dsk, mem = wage_designs
    a = bp.reference.fit_design(dsk, "random", method=method)
    b = bp.reference.fit_design(mem, "random", method=method)
    assert rel(a.coef, b.coef) < 1e-10 and rel(a.se, b.se) < 1e-10
    assert abs(a.sigma_unit - b.sigma_unit) < 1e-10 * b.sigma_unit
    assert abs(a.sigma_obs - b.sigma_obs) < 1e-10 * b.sigma_obs


def test_against_linearmodels_directly(wage_designs, wage):
    # Source: linearmodels PanelOLS (entity effects), BetweenOLS and RandomEffects on the
    # wage panel; clustered covariance with the usual CR1 factor (debiased, group_debias).
    from linearmodels import BetweenOLS, PanelOLS, RandomEffects

    dsk, _ = wage_designs
    df, _ = wage
    d = df.set_index(["nr", "year"])
    X = d[TV + ["black", "educ"]].astype(float)
    X.insert(0, "Intercept", 1.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fe = PanelOLS(d["lwage"], X, entity_effects=True, drop_absorbed=True).fit(
            cov_type="clustered", cluster_entity=True, group_debias=True)
        ours = bp.reference.fit_design(dsk, "within", cov="cluster")
        be = BetweenOLS(d["lwage"], X).fit()
        re_ = RandomEffects(d["lwage"], X).fit()
    np.testing.assert_allclose(ours.coef[TV], fe.params[TV], rtol=1e-8)
    np.testing.assert_allclose(ours.se[TV], fe.std_errors[TV], rtol=1e-6)
    np.testing.assert_allclose(bp.reference.fit_design(dsk, "between").coef, be.params, rtol=1e-8)
    np.testing.assert_allclose(bp.reference.fit_design(dsk, "random").coef, re_.params, rtol=1e-6)


def test_pooled_cluster_against_statsmodels(grunfeld_panels):
    # Source: statsmodels OLS, cov_type="cluster" by firm, on the Grunfeld panel.
    import statsmodels.api as sm

    df, panels = grunfeld_panels
    ours = bp.reference.fit_design(panels["one-unit-each"].design(GRUNFELD), "pooled", cov="cluster")
    X = sm.add_constant(df[["value", "capital"]].to_numpy())
    ref = sm.OLS(df["invest"].to_numpy(), X).fit(
        cov_type="cluster", cov_kwds={"groups": pd.factorize(df["firm"])[0]})
    np.testing.assert_allclose(ours.coef.to_numpy(), ref.params, rtol=1e-10)
    np.testing.assert_allclose(ours.se.to_numpy(), ref.bse, rtol=1e-9)


# ---------------------------------------------------------------------------- files, clusters
def test_parquet_on_a_distributed_cluster(wage, tmp_path):
    # Source: wage panel (linearmodels.datasets) written as two Parquet files; a
    # distributed LocalCluster (thread workers) runs the pass.
    from distributed import Client, LocalCluster

    df, mem = wage
    folder = tmp_path / "wage"
    folder.mkdir()
    shuffled = df.sample(frac=1.0, random_state=4)
    shuffled.iloc[:1500].to_parquet(folder / "a.parquet")
    shuffled.iloc[1500:].to_parquet(folder / "b.parquet")
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                      dashboard_address=":0") as cluster, Client(cluster) as client:
        dp = bp.Panel.from_parquet(folder, unit="nr", time="year", engine="dask", client=client)
        assert dp.n_rows == len(df)
        a = bp.reference.fit_design(dp.design(WAGE), "random")
    b = bp.reference.random(mem, WAGE)
    assert rel(a.coef, b.coef) < 1e-10


# ---------------------------------------------------------------------------- errors
def test_duplicates_across_partitions_are_named(wage):
    df, _ = wage
    dup = pd.concat([df, df.iloc[[100]]], ignore_index=True)
    dp = DaskPanel(as_dask(dup, [range(0, 2000), range(2000, len(dup))]), "nr", "year",
                   client="synchronous")
    u, t = df.loc[100, "nr"], df.loc[100, "year"]
    with pytest.raises(PanelDataError, match=f"nr={u}, year={t}"):
        dp.structure()


def test_bad_input_gets_clear_errors(wage, wage_dask):
    df, _ = wage
    with pytest.raises(FormulaError, match=r"C\(\.\.\.\).*in-memory"):
        wage_dask.design("lwage ~ C(union) + exper")
    with pytest.raises(FormulaError, match="center"):
        wage_dask.design("lwage ~ center(exper)")
    with pytest.raises(PanelDataError, match="'nope'"):
        DaskPanel(as_dask(df, [range(len(df))]), "nope", "year")
    with pytest.raises(SpecificationError, match="client="):
        DaskPanel(as_dask(df, [range(len(df))]), "nr", "year", client="gpu")
    bad = df.copy()
    bad["nr"] = bad["nr"].astype(float)
    bad.loc[7, "nr"] = np.nan
    with pytest.raises(PanelDataError, match="unit column 'nr' has missing"):
        DaskPanel(as_dask(bad, [range(5), range(5, len(bad))]), "nr", "year",
                  client="synchronous").structure()
    inf = df.copy()
    inf["exper"] = inf["exper"].astype(float)
    inf.loc[9, "exper"] = np.inf
    with pytest.raises(PanelDataError, match="'exper' has 1 infinite"):
        DaskPanel(as_dask(inf, spanning(inf)), "nr", "year", client="synchronous").design(WAGE)
    dsk = wage_dask.design("lwage ~ exper + union")
    with pytest.raises(SpecificationError, match="'sandwich'"):
        bp.reference.fit_design(dsk, "within", cov="sandwich")


def test_public_reference_functions_take_a_dask_panel(wage, wage_dask):
    # Source: wage panel (linearmodels.datasets); bp.reference.* route a DaskPanel's
    # design to the statistics-only fit.
    _, mem = wage
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataHandlingWarning)
        a = bp.reference.within(wage_dask, WAGE, cov="cluster")
        b = bp.reference.within(mem, WAGE, cov="cluster")
    assert rel(a.coef, b.coef) < 1e-10 and rel(a.se, b.se) < 1e-10
    assert rel(bp.reference.mundlak(wage_dask, WAGE).coef, bp.reference.mundlak(mem, WAGE).coef) < 1e-10


def test_a_design_on_a_fresh_panel_reads_each_partition_once(wage):
    # Source: wage panel (linearmodels.datasets); the structure checks ride on the design
    # pass, so nothing is read twice.
    df, mem = wage
    reads = []

    def load(frame):
        reads.append(len(frame))
        return frame

    pieces = [df.iloc[list(p)] for p in spanning(df)]
    ddf = dd.from_map(load, pieces, meta=df.iloc[:0], enforce_metadata=False)
    dp = DaskPanel(ddf, "nr", "year", client="synchronous")
    design = dp.design(WAGE)
    assert sorted(reads) == sorted(len(p) for p in pieces)
    assert dp.structure() == mem.structure() and design.n == len(df)
    assert len(reads) == len(pieces)
