"""The pass reads Parquet partitions with pyarrow and gets what dask's reader gives.

``Panel.from_parquet(..., engine="dask")`` keeps dask's partition plan but reads each
partition itself (bayespanel.data.sources._parquet): complete numeric columns straight to
numpy, everything else through dask's own Arrow-to-pandas conversion. Outside references:
``dask.dataframe.read_parquet`` (its partitions, and the whole pass run on them), on the
wage panel of Vella and Verbeek (1998) shipped in linearmodels.datasets.
"""

import warnings

import numpy as np
import pandas as pd
import pytest

import bayespanel as bp
from bayespanel.core.errors import DataHandlingWarning, PanelDataError
from bayespanel.data.sources import _blocks, _parquet
from bayespanel.data.sources.dask import DaskPanel

dd = pytest.importorskip("dask.dataframe")
pa = pytest.importorskip("pyarrow")
pq = pytest.importorskip("pyarrow.parquet")

# dask's own reader (the reference here) calls a pandas method deprecated in pandas 3.1
pytestmark = pytest.mark.filterwarnings(
    "ignore:The inplace keyword in DataFrame.reset_index:Warning")

WAGE = "lwage ~ exper + expersq + union + married + black + educ"
FIELDS = ("mean", "total", "within", "unit_count", "unit_mean", "lengths", "group_count",
          "group_mean", "group_cp", "unit_keys")


def write_parts(df, folder, cuts, row_group_size=None, **kwargs):
    folder.mkdir()
    edges = [0, *cuts, len(df)]
    for i, (a, b) in enumerate(zip(edges[:-1], edges[1:])):
        table = pa.Table.from_pandas(df.iloc[a:b], preserve_index=False)
        pq.write_table(table, folder / f"part{i}.parquet", row_group_size=row_group_size,
                       **kwargs)
    return folder


def mixed_frame(n=600, seed=2):
    """Columns of every kind the reader meets: int/float/bool numbers, floats with NaN,
    nullable integers with missing values, strings (with a missing one)."""
    rng = np.random.default_rng(seed)
    df = pd.DataFrame({
        "unit": np.repeat(np.arange(n // 6), 6), "year": np.tile(np.arange(2000, 2006), n // 6),
        "x": rng.normal(size=n), "k": rng.integers(0, 9, n), "b": rng.random(n) < 0.5,
        "u8": rng.integers(0, 200, n).astype(np.uint8),
    })
    df["xnan"] = np.where(rng.random(n) < 0.1, np.nan, df["x"])
    df["kmiss"] = pd.array(np.where(rng.random(n) < 0.1, -1, df["k"]), dtype="Int64")
    df.loc[df["kmiss"] == -1, "kmiss"] = pd.NA
    df["name"] = pd.Series([f"u{u}" for u in df["unit"]], dtype="string")
    df.loc[5, "name"] = pd.NA
    return df


@pytest.mark.parametrize("split", [True, False], ids=["row-groups", "files"])
def test_each_partition_equals_dasks(tmp_path, split):
    # Outside reference: dask.dataframe.read_parquet's own partitions of the same files.
    df = mixed_frame()
    folder = write_parts(df, tmp_path / "p", [250, 420], row_group_size=100)
    ddf = dd.read_parquet(folder, split_row_groups=split)
    plan = _parquet.parquet_plan(ddf)
    assert plan is not None and len(plan) == ddf.npartitions
    cols = list(df.columns)
    for i, (path, groups) in enumerate(plan.pieces):
        piece = _parquet.read_piece(path, groups, cols, plan.convert_string)
        theirs = ddf.partitions[i].compute()
        pd.testing.assert_frame_equal(piece.frame(), theirs)
        for c in cols:
            got = piece.numbers(c)
            if c in ("x", "k", "b", "u8", "unit", "year"):
                np.testing.assert_array_equal(got, theirs[c].to_numpy())
                assert got.dtype == theirs[c].to_numpy().dtype
            else:  # missing values or strings: pandas' conversion decides
                assert got is None, c


def test_other_layouts_keep_dasks_reader(tmp_path):
    df = mixed_frame()
    indexed = tmp_path / "indexed"
    indexed.mkdir()
    df.sample(frac=1.0, random_state=1).to_parquet(indexed / "a.parquet")  # a stored index
    assert _parquet.parquet_plan(dd.read_parquet(indexed)) is None
    hive = tmp_path / "hive"
    df.to_parquet(hive, partition_cols=["b"], index=False)  # folders b=True / b=False
    assert _parquet.parquet_plan(dd.read_parquet(hive)) is None
    plain = write_parts(df, tmp_path / "plain", [300])
    assert _parquet.parquet_plan(dd.read_parquet(plain, filters=[("k", ">", 2)])) is None
    assert _parquet.parquet_plan(dd.from_pandas(df, npartitions=2)) is None
    assert _parquet.parquet_plan(dd.read_parquet(plain)) is not None


@pytest.fixture(scope="module")
def wage_files(wage_panel, tmp_path_factory):
    """The wage panel (linearmodels.datasets) as 3 files, 2 row groups each, with missing
    values in one covariate of the second file (listwise deletion on that partition).
    The columns of the design pass come first, in its order: dask then reads the same
    partitions for it (a projection out of file order makes dask fuse partitions, and
    merges over other partitions round differently in the last bit)."""
    first = ["nr", "year", "lwage", "exper", "expersq", "union", "married", "black", "educ"]
    df = wage_panel[first + [c for c in wage_panel.columns if c not in first]].copy()
    df["exper"] = df["exper"].astype(float)
    df.loc[[1700, 1703, 2950], "exper"] = np.nan
    root = tmp_path_factory.mktemp("wage_parts")
    return df, write_parts(df, root / "p", [1500, 3000], row_group_size=800)


@pytest.mark.parametrize("cluster", [False, True], ids=["statistics", "with-cluster"])
def test_the_pass_equals_the_pass_through_dasks_reader(wage_files, cluster):
    # Outside reference: the same pass over dask.dataframe.read_parquet's partitions
    # (DaskPanel on the frame itself, which reads through dask); identical to the bit.
    df, folder = wage_files
    ours = bp.Panel.from_parquet(folder, unit="nr", time="year", engine="dask",
                                 client="synchronous", split_row_groups=True)
    assert ours._plan is not None
    theirs = DaskPanel(dd.read_parquet(folder, split_row_groups=True), "nr", "year",
                       client="synchronous")
    assert len(theirs._pieces(list(df.columns[:9]))) == len(ours._plan) == 6
    with pytest.warns(DataHandlingWarning, match="dropped 3 of 4360"):
        a = ours.design(WAGE, cluster=cluster)
    with pytest.warns(DataHandlingWarning, match="dropped 3 of 4360"):
        b = theirs.design(WAGE, cluster=cluster)
    sa, sb = a.design_suffstats(), b.design_suffstats()
    for f in FIELDS:
        np.testing.assert_array_equal(getattr(sa, f), getattr(sb, f), err_msg=f)
    assert a.n_dropped == b.n_dropped == 3 and a.dropped_by_column == {"exper": 3}
    np.testing.assert_array_equal(a.source.maxabs(), b.source.maxabs())
    if cluster:
        np.testing.assert_array_equal(a.source.unit_cross_products(),
                                      b.source.unit_cross_products())
    assert ours.structure() == theirs.structure()
    pd.testing.assert_frame_equal(ours.describe(), theirs.describe())


def _message(exc_info_fn):
    with pytest.raises(PanelDataError) as err:
        exc_info_fn()
    return str(err.value)


def test_bad_rows_are_named_as_through_dasks_reader(wage_panel, tmp_path):
    # Outside reference: the errors raised on dask.dataframe.read_parquet's partitions.
    cases = {}
    miss = wage_panel.copy()
    miss["nr"] = miss["nr"].astype(float)
    miss.loc[2210, "nr"] = np.nan
    cases["missing-unit"] = (miss, lambda p: p.structure(), "unit column 'nr' has missing")
    inf = wage_panel.copy()
    inf["exper"] = inf["exper"].astype(float)
    inf.loc[2209, "exper"] = np.inf
    cases["infinite"] = (inf, lambda p: p.design(WAGE), "'exper' has 1 infinite")
    dup = pd.concat([wage_panel, wage_panel.iloc[[2100]]], ignore_index=True)
    cases["duplicate"] = (dup, lambda p: p.design(WAGE), "repeat a unit-occasion pair")
    for name, (df, run, expected) in cases.items():
        folder = write_parts(df, tmp_path / name, [2000])
        ours = bp.Panel.from_parquet(folder, unit="nr", time="year", engine="dask",
                                     client="synchronous")
        assert ours._plan is not None
        theirs = DaskPanel(dd.read_parquet(folder), "nr", "year", client="synchronous")
        got = _message(lambda: run(ours))
        assert expected in got, name
        assert got == _message(lambda: run(theirs)), name
    with pytest.raises(PanelDataError, match="'nope'"):
        bp.Panel.from_parquet(tmp_path / "duplicate", unit="nope", time="year",
                              engine="dask", client="synchronous")


def test_unit_ranges_in_order_from_the_footers(tmp_path):
    # Outside reference: the order is checked against the rows themselves (numpy).
    df = mixed_frame()  # sorted by unit
    cases = {
        "sorted": (df, [200, 350], {}, True),
        "a unit split between files": (df, [203, 351], {}, True),
        "an empty file among them": (df, [200, 200, 350], {}, True),
        "files listed in reverse": (df.iloc[::-1].sort_values("unit", kind="stable",
                                                               ascending=False),
                                    [200], {}, True),
        "shuffled": (df.sample(frac=1.0, random_state=3), [300], {}, False),
        "no statistics": (df, [300], {"write_statistics": False}, False),
    }
    for name, (frame, cuts, kwargs, expected) in cases.items():
        folder = write_parts(frame, tmp_path / name.replace(" ", "_"), cuts,
                             row_group_size=120, **kwargs)
        plan = _parquet.parquet_plan(dd.read_parquet(folder, split_row_groups=True))
        assert _parquet.units_in_order(plan, "unit") is expected, name
        if expected:  # the same answer from the rows of each partition
            units = [_parquet.read_piece(p, g, ["unit"], False).numbers("unit")
                     for p, g in plan.pieces]
            ranges = sorted((u.min(), u.max()) for u in units if len(u))
            assert all(b[0] >= a[1] for a, b in zip(ranges[:-1], ranges[1:]))
    with_missing = df.astype({"unit": float})
    with_missing.loc[3, "unit"] = np.nan
    folder = write_parts(with_missing, tmp_path / "missing", [300])
    assert not _parquet.units_in_order(_parquet.parquet_plan(dd.read_parquet(folder)), "unit")


def test_one_merge_of_many_sorted_partitions_equals_the_tree(wage_panel, tmp_path):
    # Outside reference: the pass over dask.dataframe.read_parquet's partitions merged by
    # the tree of 8 (the wage panel, linearmodels.datasets, in 12 files sorted by unit).
    folder = write_parts(wage_panel, tmp_path / "p", list(range(360, len(wage_panel), 360)))
    ours = bp.Panel.from_parquet(folder, unit="nr", time="year", engine="dask",
                                 client="synchronous")
    assert ours.npartitions == 13 and ours._one_merge(_blocks.design_block)
    theirs = DaskPanel(dd.read_parquet(folder), "nr", "year", client="synchronous")
    assert not theirs._one_merge(_blocks.design_block)
    a, b = ours.design(WAGE, cluster=True), theirs.design(WAGE, cluster=True)
    sa, sb = a.design_suffstats(), b.design_suffstats()
    for f in FIELDS:
        x, y = np.asarray(getattr(sa, f)), np.asarray(getattr(sb, f))
        if x.dtype.kind in "iu":
            np.testing.assert_array_equal(x, y, err_msg=f)
        else:
            np.testing.assert_allclose(x, y, rtol=1e-12, atol=1e-12 * np.abs(y).max(),
                                       err_msg=f)
    np.testing.assert_allclose(a.source.unit_cross_products(), b.source.unit_cross_products(),
                               rtol=1e-10, atol=1e-9)
    assert ours.structure() == theirs.structure()
    pd.testing.assert_frame_equal(ours.describe(), theirs.describe(), rtol=1e-12)


def test_rows_of_a_partition_equal_dasks(wage_files):
    # Outside reference: the rows a later pass (LOO, AR(1)) gets from dask's partitions,
    # complete ones (no pandas on our side) and one with missing values (deletion).
    from dataclasses import replace

    from bayespanel.data.sources.dask import DaskSource

    df, folder = wage_files
    ddf = dd.read_parquet(folder, split_row_groups=True)
    plan = _parquet.parquet_plan(ddf)
    src = DaskSource.__new__(DaskSource)
    src.panel = DaskPanel(ddf, "nr", "year", client="synchronous")
    spec = replace(src._prepare(WAGE, False), structure=False)
    cols = list(dict.fromkeys(["nr", "year", *spec.used]))
    seen = []
    for i, (path, groups) in enumerate(plan.pieces):
        ours = _blocks.rows_block(_parquet.read_piece(path, groups, cols, plan.convert_string),
                                  spec, (0, 2, 7), lambda rows, _: rows)
        theirs = _blocks.rows_block(ddf[cols].partitions[i].compute(), spec, (0, 2, 7),
                                    lambda rows, _: rows)
        for f in ("units", "time", "Z"):
            a, b = getattr(ours, f), getattr(theirs, f)
            np.testing.assert_array_equal(a, b, err_msg=f)
            assert a.dtype == b.dtype and a.flags.c_contiguous == b.flags.c_contiguous
        seen.append(len(ours.Z))
    assert sum(seen) == len(df) - 3  # three rows miss exper


@pytest.mark.parametrize("rhs", ["exper + union + exper + hours", "union", "year + exper",
                                 "exper * union", "np.log(hours) + exper"])
def test_terms_equal_formulaics_columns(wage_files, rhs):
    # Outside reference: formulaic's model matrix of the same right-hand side (a sum of
    # names is read without formulaic on this path, as in memory).
    from formulaic import Formula

    df, folder = wage_files
    dp = bp.Panel.from_parquet(folder, unit="nr", time="year", engine="dask",
                               client="synchronous")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataHandlingWarning)  # rows missing exper
        design = dp.design(f"lwage ~ {rhs}")
    cols = list(Formula(rhs).get_model_matrix(df.dropna(), ensure_full_rank=False).columns)
    assert design.terms == cols
