"""Sufficient statistics against a direct dense computation.

Outside checks: the Grunfeld panel (statsmodels' datasets) and random unbalanced panels,
against numpy in extended precision (np.longdouble) per unit; the pairwise merge of Chan,
Golub and LeVeque (1979) checked with hypothesis over arbitrary splits of the rows.
"""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from bayespanel.core import suffstats as ss


def dense(Z, codes):
    """Direct computation in extended precision, one unit at a time."""
    Z = Z.astype(np.longdouble)
    p = Z.shape[1]
    within = np.zeros((p, p), dtype=np.longdouble)
    means, counts = [], []
    for u in np.unique(codes):
        Zi = Z[codes == u]
        D = Zi - Zi.mean(axis=0)
        within += D.T @ D
        means.append(Zi.mean(axis=0)); counts.append(len(Zi))
    D = Z - Z.mean(axis=0)
    return {"within": within, "total": D.T @ D, "unit_mean": np.array(means),
            "unit_count": np.array(counts), "mean": Z.mean(axis=0)}


def group_dense(unit_mean, unit_count):
    out = {}
    for T in np.unique(unit_count):
        M = unit_mean[unit_count == T]
        D = M - M.mean(axis=0)
        out[int(T)] = (len(M), M.mean(axis=0), D.T @ D)
    return out


def rel(a, b):
    a = np.asarray(a, dtype=float); b = np.asarray(b, dtype=float)
    return np.max(np.abs(a - b)) / max(np.max(np.abs(b)), 1e-300)


def check(stats, Z, codes):
    ref = dense(Z, codes)
    for name in ("within", "total", "unit_mean", "mean"):
        assert rel(getattr(stats, name), ref[name]) < 1e-10, name
    np.testing.assert_array_equal(stats.unit_count, ref["unit_count"])
    groups = group_dense(ref["unit_mean"], ref["unit_count"])
    assert list(stats.lengths) == sorted(groups)
    for d, T in enumerate(stats.lengths):
        c, m, cp = groups[int(T)]
        assert stats.group_count[d] == c
        assert rel(stats.group_mean[d], m) < 1e-12
        if c > 1:
            assert rel(stats.group_cp[d], cp) < 1e-10


def test_grunfeld_against_dense(grunfeld):
    # Source: Grunfeld investment panel, statsmodels.datasets.grunfeld.
    codes = grunfeld["firm"].astype("category").cat.codes.to_numpy()
    X = np.column_stack([np.ones(len(grunfeld)), grunfeld[["value", "capital"]].to_numpy()])
    stats = ss.compute(X, grunfeld["invest"].to_numpy(), codes)
    check(stats, np.column_stack([X, grunfeld["invest"]]), codes)


@pytest.mark.parametrize("offset", [0.0, 1e8], ids=["plain", "offset-1e8"])
def test_unbalanced_random_panels(offset):
    rng = np.random.default_rng(7)
    for _ in range(5):
        N = int(rng.integers(2, 60))
        T = rng.integers(1, 9, N)  # includes singleton units
        codes = np.repeat(np.arange(N), T)
        n = len(codes)
        X = np.column_stack([np.ones(n), rng.normal(size=(n, 3)) + offset])
        y = X[:, 1:] @ np.array([0.5, -1.0, 2.0]) + rng.normal(size=n) + np.repeat(rng.normal(size=N), T)
        stats = ss.compute(X, y, codes)
        check(stats, np.column_stack([X, y]), codes)


def test_quadratic_forms_match_residuals():
    # Published identity: sum_t (r_it - rbar_i)^2 and rbar_i from the residuals directly.
    rng = np.random.default_rng(3)
    N = 25; T = rng.integers(1, 6, N); codes = np.repeat(np.arange(N), T); n = len(codes)
    X = np.column_stack([np.ones(n), rng.normal(size=(n, 2))]); y = rng.normal(size=n)
    b = np.array([0.3, -0.2, 0.7])
    stats = ss.compute(X, y, codes)
    W, S = ss.quad_terms(stats, b)
    r = y - X @ b
    rbar = np.bincount(codes, r) / T
    assert W[0] == pytest.approx(((r - rbar[codes]) ** 2).sum(), rel=1e-10)
    for d, L in enumerate(stats.lengths):
        assert S[0, d] == pytest.approx((rbar[T == L] ** 2).sum(), rel=1e-10)


@st.composite
def split_panels(draw):
    N = draw(st.integers(2, 12))
    T = draw(st.lists(st.integers(1, 5), min_size=N, max_size=N))
    codes = np.repeat(np.arange(N), T)
    n = len(codes)
    seed = draw(st.integers(0, 2**31 - 1))
    rng = np.random.default_rng(seed)
    Z = rng.normal(size=(n, 3)) * draw(st.sampled_from([1.0, 1e3])) + draw(st.sampled_from([0.0, 1e6]))
    order = np.asarray(draw(st.permutations(list(range(n)))))
    cuts = sorted(draw(st.lists(st.integers(0, n), max_size=6)))
    return Z, codes, order, cuts


@settings(max_examples=60, deadline=None)
@given(split_panels())
def test_merge_in_any_split_equals_one_pass(case):
    # Chan, Golub and LeVeque (1979): merging partial moments equals the one-pass result.
    Z, codes, order, cuts = case
    one = ss.finalize(ss.partial(Z, codes))
    blocks = np.split(order, cuts)  # empty blocks and units spanning blocks included
    parts = [ss.partial(Z[b], codes[b]) for b in blocks]
    merged = parts[0]
    for q in parts[1:]:
        merged = ss.merge(merged, q)
    got = ss.finalize(merged)
    scale = np.abs(one.total).max()
    for name in ("within", "total", "group_cp"):
        assert np.max(np.abs(getattr(got, name) - getattr(one, name))) <= 1e-9 * scale, name
    np.testing.assert_allclose(got.unit_mean, one.unit_mean, rtol=1e-12, atol=1e-9)
    np.testing.assert_array_equal(got.unit_count, one.unit_count)


# ---------------------------------------------------------------------------- compiled pass
# The in-memory pass runs compiled by numba or in numpy; both follow the same order of
# floating-point operations (suffstats module comments), so they must agree bit for bit,
# and both must agree with numpy in extended precision.

FIELDS = ("mean", "total", "within", "unit_mean", "unit_count", "lengths", "group_count",
          "group_mean", "group_cp", "unit_keys")


def _layout(kind, rng):
    if kind == "balanced":
        T = np.full(700, 9)
    elif kind == "unbalanced":
        T = rng.integers(1, 25, 3000)  # singletons and many panel lengths
    elif kind == "long units":  # runs longer than a numpy slice and than a block
        T = np.array([3, 40_000, 1, 5000, 33, 32, 17_000])
    else:
        T = rng.integers(1, 12, 2500)
    codes = np.repeat(np.arange(len(T)), T)
    order = rng.permutation(len(codes)) if kind == "shuffled" else np.arange(len(codes))
    return codes[order], order


def _both(fn, monkeypatch):
    out = []
    for use in (True, False):
        monkeypatch.setattr(ss, "USE_NUMBA", use)
        out.append(fn())
    return out


@pytest.mark.parametrize("offset", [0.0, 1e8], ids=["plain", "offset-1e8"])
@pytest.mark.parametrize("kind", ["balanced", "unbalanced", "long units", "shuffled"])
def test_compiled_and_numpy_passes_agree_bit_for_bit(kind, offset, monkeypatch):
    pytest.importorskip("numba")
    rng = np.random.default_rng(11)
    codes, _ = _layout(kind, rng)
    n = len(codes)
    X = np.column_stack([np.ones(n), rng.normal(size=(n, 3)) * [1.0, 1e3, 1e-3] + offset])
    y = X[:, 1] * 0.5 + rng.normal(size=n) + offset
    a, b = _both(lambda: ss.compute_chunked(X, y, codes, names=["a", "b", "c", "d", "y"]),
                 monkeypatch)
    for f in FIELDS:
        np.testing.assert_array_equal(getattr(a, f), getattr(b, f), err_msg=f)
    assert a.names == b.names


@pytest.mark.parametrize("kind", ["unbalanced", "shuffled"])
def test_both_passes_equal_extended_precision_with_large_offsets(kind, monkeypatch):
    # Reference: numpy in extended precision (np.longdouble), one unit at a time; data
    # with a common offset of 1e8, on more rows than the compiled kernels' threshold.
    rng = np.random.default_rng(5)
    codes, _ = _layout(kind, rng)
    n = len(codes)
    X = np.column_stack([np.ones(n), rng.normal(size=(n, 2)) + 1e8])
    y = X[:, 1:] @ np.array([0.5, -1.0]) + rng.normal(size=n) + 1e8
    runs = _both(lambda: ss.compute_chunked(X, y, codes), monkeypatch) \
        if ss._numba_kernels() else [ss.compute_chunked(X, y, codes)]
    Z = np.column_stack([X, y])
    ref = dense(Z, codes)
    for stats in runs:
        for name in ("within", "total", "unit_mean", "mean"):
            assert rel(getattr(stats, name), ref[name]) < 1e-12, name
        groups = group_dense(ref["unit_mean"], ref["unit_count"])
        for d, T in enumerate(stats.lengths):
            c, m, cp = groups[int(T)]
            assert rel(stats.group_mean[d], m) < 1e-12
            if c > 1:
                assert rel(stats.group_cp[d], cp) < 1e-11


_NO_NUMBA = """
import sys
sys.modules["numba"] = None  # as if numba were not installed
import numpy as np
from bayespanel import suffstats as ss
d = np.load(sys.argv[1])
st = ss.compute_chunked(d["X"], d["y"], d["codes"])
np.savez(sys.argv[2], **{f: getattr(st, f) for f in %r})
ss.USE_NUMBA = True
try:
    ss.compute_chunked(d["X"], d["y"], d["codes"])
except RuntimeError as exc:
    print("refused:", exc)
""" % (FIELDS,)


def test_without_numba_the_numpy_pass_gives_the_same_numbers(tmp_path, monkeypatch):
    # The fallback when numba is missing (a fresh interpreter that cannot import it)
    # gives exactly the numbers of the compiled pass.
    import subprocess
    import sys

    pytest.importorskip("numba")
    rng = np.random.default_rng(8)
    codes, _ = _layout("unbalanced", rng)
    n = len(codes)
    X = rng.normal(size=(n, 4)) + 1e6
    y = rng.normal(size=n)
    np.savez(tmp_path / "in.npz", X=X, y=y, codes=codes)
    res = subprocess.run([sys.executable, "-c", _NO_NUMBA, str(tmp_path / "in.npz"),
                          str(tmp_path / "out.npz")], capture_output=True, text=True,
                         timeout=300)
    assert res.returncode == 0, res.stderr[-2000:]
    assert "refused: USE_NUMBA is True but numba is not available" in res.stdout
    monkeypatch.setattr(ss, "USE_NUMBA", True)
    compiled = ss.compute_chunked(X, y, codes)
    got = np.load(tmp_path / "out.npz")
    for f in FIELDS:
        np.testing.assert_array_equal(got[f], getattr(compiled, f), err_msg=f)


@pytest.mark.parametrize("kind", ["unbalanced", "shuffled"])
def test_partition_moments_compiled_equal_extended_precision(kind, monkeypatch):
    # The out-of-core pass summarises each partition with partial_inplace, compiled from
    # _NUMBA_MIN_ROWS rows: both versions, merged over a split of the rows whose pieces
    # cut units in two (Chan, Golub and LeVeque 1979), equal numpy in extended precision
    # (np.longdouble) to 1e-12 with a common offset of 1e8.
    rng = np.random.default_rng(8)
    codes, _ = _layout(kind, rng)
    while len(codes) < 2 * ss._NUMBA_MIN_ROWS + 10:  # each piece above the threshold
        codes = np.concatenate([codes, codes[:40_000] + codes.max() + 1])
    n = len(codes)
    Z = np.column_stack([np.ones(n), rng.normal(size=(n, 2)) + 1e8])
    Z = np.column_stack([Z, Z[:, 1:] @ np.array([0.5, -1.0]) + rng.normal(size=n) + 1e8])
    cut = n // 2 + 3
    assert cut >= ss._NUMBA_MIN_ROWS

    def merged():
        parts = [ss.partial_inplace(Z[a:b].copy(), codes[a:b])  # it may overwrite its block
                 for a, b in ((0, cut), (cut, n))]
        return ss.finalize(ss.merge(*parts))

    runs = _both(merged, monkeypatch) if ss._numba_kernels() else [merged()]
    ref = dense(Z, codes)
    for stats in runs:
        for name in ("within", "total", "unit_mean", "mean"):
            assert rel(getattr(stats, name), ref[name]) < 1e-12, name
        np.testing.assert_array_equal(stats.unit_count, ref["unit_count"])
    if len(runs) == 2:
        for name in ("within", "total", "unit_mean", "group_cp"):
            assert rel(getattr(runs[0], name), getattr(runs[1], name)) < 1e-13, name
