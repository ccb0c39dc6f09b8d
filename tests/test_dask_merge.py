"""The low-memory merges of the Dask pass give what the in-memory path gives.

Files sorted by unit leave pieces whose units do not overlap, or share only the unit split
between consecutive partitions; those are merged by concatenation (bayespanel.data.sources.
_merge.chain). Any other overlap takes the general merge. Every layout is checked against
the in-memory path on the same rows (to 1e-10 relative), and the per-unit cross-products
against a direct per-unit computation in extended precision (numpy longdouble).

Outside data: the wage panel of Vella and Verbeek (1998) shipped in linearmodels.datasets
and the Grunfeld investment panel shipped in statsmodels.datasets.
"""

import numpy as np
import pytest

import bayespanel as bp
from bayespanel.core import derived, suffstats
from bayespanel.data.sources import _merge
from bayespanel.data.sources.dask import DaskPanel

dd = pytest.importorskip("dask.dataframe")

from test_dask import FIELDS, WAGE, as_dask, rel  # noqa: E402  (shared helpers)


def cut(n, cuts):
    edges = [0] + list(cuts) + [n]
    return [np.arange(a, b) for a, b in zip(edges[:-1], edges[1:])]


def layouts(df, unit):
    """Partitionings of rows sorted by (unit, time), each with whether the merges should
    all be concatenations (True) or need the general path (False)."""
    n = len(df)
    u = df[unit].to_numpy()
    starts = np.flatnonzero(np.r_[True, u[1:] != u[:-1]])
    at_units = cut(n, starts[[5, 40, 41, 300]] if len(starts) > 300 else starts[[2, 5, 6]])
    mid_units = cut(n, [13, 13, 701, 1902, 1903, 3101] if n > 3200 else [13, 13, 71, 150])
    tiny = cut(n, range(3, n, 3))                       # each unit spans several partitions
    reversed_files = at_units[::-1]                     # sorted files listed in reverse
    interleaved = [np.flatnonzero(np.isin(u, df[unit].unique()[j::3])) for j in range(3)]
    return {"at unit boundaries": (at_units, True), "units split": (mid_units, True),
            "tiny partitions": (tiny, True), "files in reverse order": (reversed_files, True),
            "interleaved units (unsorted)": (interleaved, False)}


@pytest.fixture(scope="module")
def wage(wage_panel):
    df = wage_panel.sort_values(["nr", "year"]).reset_index(drop=True)
    mem = bp.Panel(df, "nr", "year")
    return df, mem, mem.design(WAGE)


def unit_cp_direct(design, kind="random"):
    """Per-unit within cross-products of ``[M, y]`` from the rows, in numpy longdouble."""
    M, _ = design.matrices(kind)
    Z = np.column_stack([M, design.y]).astype(np.longdouble)
    out = np.zeros((design.n_units, Z.shape[1], Z.shape[1]), dtype=np.longdouble)
    for g in range(design.n_units):
        D = Z[design.unit_codes == g]
        D = D - D.mean(axis=0)
        out[g] = D.T @ D
    return out


@pytest.fixture
def count_general(monkeypatch):
    """Counts the merges that take the general path."""
    calls = []
    real = _merge._merge_general

    def spy(parts, cps):
        calls.append(len(parts))
        return real(parts, cps)

    monkeypatch.setattr(_merge, "_merge_general", spy)
    return calls


@pytest.mark.parametrize("name", ["at unit boundaries", "units split", "tiny partitions",
                                  "files in reverse order", "interleaved units (unsorted)"])
def test_design_pass_matches_memory_on_every_layout(wage, name, count_general):
    # Source: wage panel (linearmodels.datasets); in-memory statistics on the same rows and
    # per-unit cross-products computed directly in longdouble.
    df, mem, b = wage
    pieces, fast = layouts(df, "nr")[name]
    dp = DaskPanel(as_dask(df, pieces), "nr", "year", client="synchronous")
    a = dp.design(WAGE, cluster=True)
    assert (len(count_general) == 0) == fast, count_general
    for kind in ("random", "mundlak", "within_between"):
        sa, sb = a.suffstats(kind), derived.from_design(b, kind)
        np.testing.assert_array_equal(sa.unit_count, sb.unit_count)
        np.testing.assert_array_equal(sa.unit_keys, np.asarray(b.units))
        for f in FIELDS:
            assert rel(getattr(sa, f), getattr(sb, f)) < 1e-10, (kind, f)
    assert rel(a.unit_cross_products(), unit_cp_direct(b)) < 1e-10
    assert dp.structure() == mem.structure()
    da, db = dp.describe(), mem.describe()  # a fresh pass, columns merged in one group
    num = [c for c in da.columns if c != "varies_within"]
    assert rel(da[num].to_numpy(float), db[num].to_numpy(float)) < 1e-10


@pytest.mark.parametrize("name", ["units split", "interleaved units (unsorted)"])
def test_describe_and_structure_with_gaps_match_memory(grunfeld, name, count_general):
    # Source: Grunfeld panel (statsmodels.datasets) with rows removed (gaps, unbalanced,
    # partitions that see different occasions) and missing values in one column.
    df = grunfeld.drop(index=[3, 4, 45, 61, 199]).sort_values(["firm", "year"])
    df = df.reset_index(drop=True)
    df.loc[[10, 11, 80], "value"] = np.nan
    mem = bp.Panel(df, "firm", "year")
    pieces, fast = layouts(df, "firm")[name]
    dp = DaskPanel(as_dask(df, pieces), "firm", "year", client="synchronous")
    a, b = dp.describe(), mem.describe()
    assert (len(count_general) == 0) == fast
    num = [c for c in a.columns if c != "varies_within"]
    assert list(a.index) == list(b.index)
    assert rel(a[num].to_numpy(float), b[num].to_numpy(float)) < 1e-10
    assert dp.structure() == mem.structure() and dp.gaps == mem.gaps
    assert dp.occasions_per_unit.to_dict() == mem.occasions_per_unit.to_dict()


def _piece(rng, keys, p=3, offset=0.0):
    rows = np.repeat(keys, rng.integers(1, 5, len(keys)))
    Z = rng.normal(offset, 1.0, (len(rows), p))
    return suffstats.partial(Z, rows), Z, rows


def test_chain_merge_equals_general_merge_and_direct_statistics():
    # Reference: the statistics of all rows at once (suffstats.compute) and the pairwise
    # general merge; string keys of different widths keep their full width.
    rng = np.random.default_rng(4)
    names = np.array(["a", "b", "ba", "bb", "bbb", "c", "caa", "d", "dd", "ddd", "e", "eee",
                      "f", "ff"])
    cuts = [(0, 4), (3, 7), (7, 8), (7, 8), (7, 12), (12, 14)]
    groups = [np.array(list(names[a:b])) for a, b in cuts]  # widths 1 to 3
    pieces = [_piece(rng, g, offset=10.0 * j) for j, g in enumerate(groups)]
    parts = [p[0] for p in pieces]
    assert _merge.chain([p.keys for p in parts]) is not None
    fast, _ = _merge.merge_parts(parts)
    slow, _ = _merge._merge_general(parts, None)
    Z = np.vstack([p[1] for p in pieces])
    keys = np.concatenate([p[2] for p in pieces])
    direct = suffstats.compute(Z[:, :-1], Z[:, -1], keys)
    np.testing.assert_array_equal(fast.counts, slow.counts)
    assert rel(fast.offsets + fast.ref, slow.offsets + slow.ref) < 1e-13
    for got in (suffstats.finalize(fast), derived.finalize_inplace(fast)):  # the last consumes
        np.testing.assert_array_equal(got.unit_keys, names)
        for f in FIELDS:
            assert rel(getattr(got, f), getattr(direct, f)) < 1e-12, f


def test_chain_refuses_overlaps_other_than_at_boundaries():
    k = np.array
    assert _merge.chain([k([1, 2, 3]), k([3, 4]), k([4]), k([4, 9])]).size == 5
    assert _merge.chain([k([5, 6]), k([1, 2])]).order == (1, 0)      # reordered
    assert _merge.chain([k([1, 2, 3]), k([2, 5])]) is None          # 2 and 3 overlap
    assert _merge.chain([k([1, 5]), k([2, 3])]) is None             # nested ranges
    assert _merge.chain([k([1, 2]), k(["a"])]) is None               # keys that do not order


def test_finalize_inplace_equals_finalize_with_many_lengths():
    # Reference: suffstats.finalize (the in-memory path) on the same unbalanced piece,
    # over several slices of units.
    rng = np.random.default_rng(9)
    keys = np.repeat(np.arange(3000), rng.integers(1, 12, 3000))
    Z = rng.normal(5.0, 2.0, (len(keys), 4))
    a = suffstats.finalize(suffstats.partial(Z, keys))
    b = derived.finalize_inplace(suffstats.partial(Z, keys), chunk=700)
    np.testing.assert_array_equal(a.lengths, b.lengths)
    np.testing.assert_array_equal(a.group_count, b.group_count)
    for f in FIELDS:
        assert rel(getattr(b, f), getattr(a, f)) < 1e-12, f


def test_sorted_files_with_dropped_rows_match_memory(wage, count_general):
    # Source: wage panel (linearmodels.datasets) with values removed: the structure counts
    # all rows, the statistics the kept ones, both merged by concatenation.
    import warnings

    from bayespanel.core.errors import DataHandlingWarning

    df, _, _ = wage
    df = df.copy()
    rng = np.random.default_rng(12)
    df.loc[rng.choice(len(df), 50, replace=False), "exper"] = np.nan
    df.loc[df["nr"] == df["nr"].iloc[0], "union"] = np.nan  # a unit with no complete row
    pieces, _ = layouts(df, "nr")["units split"]
    dp = DaskPanel(as_dask(df, pieces), "nr", "year", client="synchronous")
    mem = bp.Panel(df, "nr", "year")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataHandlingWarning)
        a, b = dp.design(WAGE), mem.design(WAGE)
    assert not count_general
    assert a.n_dropped == b.n_dropped and list(a.units) == list(b.units)
    for f in FIELDS:
        assert rel(getattr(a.suffstats(), f), getattr(derived.from_design(b), f)) < 1e-10
    assert dp.structure() == mem.structure()
    assert dp.occasions_per_unit.to_dict() == mem.occasions_per_unit.to_dict()
