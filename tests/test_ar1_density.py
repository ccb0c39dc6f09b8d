"""AR(1) errors within units: statistics, marginal density, occasion conditionals.

Every check is against something outside the project: scipy.stats.multivariate_normal
(the dense density of each unit's rows), numpy's dense linear algebra (conditional normal
moments, the within transform), scipy.integrate.quad (the flat-prior integral) and finite
differences (the PyTensor gradient). The panels are random draws, not data: unbalanced,
with gaps, one-row units, non-integer spacing and negative rho.
"""

from functools import reduce

import numpy as np
import pytest
from scipy import integrate, stats

from bayespanel.core import ar1
from bayespanel.core.errors import PanelDataError
from bayespanel.core.gaussian import within_loglik


def _panel(seed, n_units=23, k=3, integer=True, max_t=7):
    """Rows of a random unbalanced panel with gaps: (Z, keys, times)."""
    rng = np.random.default_rng(seed)
    Z, keys, times = [], [], []
    for i in range(n_units):
        T = 1 if i % 7 == 0 else int(rng.integers(2, max_t + 1))   # one-row units included
        if integer:
            t = np.sort(rng.choice(12, size=T, replace=False)).astype(float) + 2000
        else:
            t = np.cumsum(rng.uniform(0.3, 2.5, size=T))
        x = rng.normal(size=(T, k))
        x[:, 0] = 1.0
        y = x @ np.array([0.5, -1.0, 2.0][:k]) + rng.normal(size=T)
        Z.append(np.column_stack([x, y]))
        keys += [f"u{i:02d}"] * T
        times.append(t)
    Z, keys, times = np.vstack(Z), np.array(keys), np.concatenate(times)
    perm = rng.permutation(len(keys))          # rows in no particular order
    return Z[perm], keys[perm], times[perm]


def _units(Z, keys, times, b):
    """Per unit, in key order: (times, residuals) sorted by time."""
    r = Z[:, -1] - Z[:, :-1] @ b
    out = []
    for u in np.unique(keys):
        m = keys == u
        o = np.argsort(times[m])
        out.append((times[m][o], r[m][o]))
    return out


def _ar1_corr(t, rho):
    return rho ** np.abs(t[:, None] - t[None, :])


def _dense_cov(t, rho, sigma, tau):
    return sigma ** 2 * _ar1_corr(t, rho) + tau ** 2 * np.ones((len(t), len(t)))


def _dense_fixed(t, r, rho, sigma):
    """Density of the within-transformed residuals H'r, H an orthonormal basis of the
    contrasts (numpy SVD of the centring matrix): multivariate normal with covariance
    sigma^2 H'RH (scipy)."""
    T = len(t)
    if T == 1:
        return 0.0
    C = np.eye(T) - 1.0 / T
    U, s, _ = np.linalg.svd(C)
    H = U[:, s > 0.5]
    cov = sigma ** 2 * H.T @ _ar1_corr(t, rho) @ H
    return stats.multivariate_normal(np.zeros(T - 1), cov).logpdf(H.T @ r)


B = np.array([0.3, -0.8, 1.7])
PARAMS = [(0.6, 1.3, 0.8), (-0.7, 0.9, 1.1), (0.0, 1.1, 0.5), (0.95, 0.7, 2.0), (-0.3, 1.0, 0.0)]


@pytest.fixture(scope="module")
def panel():
    Z, keys, times = _panel(11)
    return Z, keys, times, ar1.finalize(ar1.partial(Z, keys, times))


@pytest.mark.parametrize("rho,sigma,tau", PARAMS)
def test_loglik_equals_dense_normal(panel, rho, sigma, tau):
    # reference: scipy.stats.multivariate_normal with Sigma_i = sigma^2 rho^|t-s| + tau^2 11'
    Z, keys, times, st = panel
    dense = sum(stats.multivariate_normal(np.zeros(len(t)), _dense_cov(t, rho, sigma, tau)).logpdf(r)
                for t, r in _units(Z, keys, times, B))
    v = np.append(-B, 1.0)
    got = ar1.loglik(v, st.arrays(), rho, sigma, tau)
    assert abs(got - dense) < 1e-9
    tl = ar1.Timeline.build(keys, times)
    per_unit = ar1.unit_logdensity(Z[:, -1] - Z[:, :-1] @ B, tl, rho, sigma, tau)
    ref_units = [stats.multivariate_normal(np.zeros(len(t)), _dense_cov(t, rho, sigma, tau)).logpdf(r)
                 for t, r in _units(Z, keys, times, B)]
    np.testing.assert_allclose(per_unit, ref_units, rtol=0, atol=1e-10)


@pytest.mark.parametrize("rho,sigma", [(0.6, 1.3), (-0.7, 0.9), (0.0, 1.1), (0.95, 0.7)])
def test_fixed_effects_equals_within_transformed_density(panel, rho, sigma):
    # reference: the dense density of H'r_i (numpy SVD + scipy multivariate normal)
    Z, keys, times, st = panel
    units = _units(Z, keys, times, B)
    dense = sum(_dense_fixed(t, r, rho, sigma) for t, r in units)
    got = ar1.loglik(np.append(-B, 1.0), st.arrays(), rho, sigma, None)
    assert abs(got - dense) < 1e-9
    tl = ar1.Timeline.build(keys, times)
    per_unit = ar1.unit_logdensity(Z[:, -1] - Z[:, :-1] @ B, tl, rho, sigma, None)
    np.testing.assert_allclose(per_unit, [_dense_fixed(t, r, rho, sigma) for t, r in units],
                               rtol=0, atol=1e-10)


def test_fixed_effects_is_the_flat_prior_integral(panel):
    # reference: scipy.integrate.quad of the dense normal over the unit intercept;
    # the within-transformed density is that integral times sqrt(T_i)
    Z, keys, times, _ = panel
    rho, sigma = -0.5, 0.8
    tl = ar1.Timeline.build(keys, times)
    per_unit = ar1.unit_logdensity(Z[:, -1] - Z[:, :-1] @ B, tl, rho, sigma, None)
    for j, (t, r) in enumerate(_units(Z, keys, times, B)[:6]):
        mvn = stats.multivariate_normal(np.zeros(len(t)), sigma ** 2 * _ar1_corr(t, rho))
        val, _ = integrate.quad(lambda u: np.exp(mvn.logpdf(r - u)), -30, 30, epsabs=0,
                                epsrel=1e-12, points=[r.mean()], limit=200)
        assert per_unit[j] == pytest.approx(np.log(val) + 0.5 * np.log(len(t)), abs=1e-8)


def test_fixed_effects_at_rho_zero_is_the_iid_within_likelihood(panel):
    # the iid within likelihood of core.gaussian.within_loglik (itself checked elsewhere against
    # statsmodels); consistency of the two forms
    Z, keys, times, st = panel
    v = np.append(-B, 1.0)
    r = Z[:, -1] - Z[:, :-1] @ B
    W = sum(((r[keys == u] - r[keys == u].mean()) ** 2).sum() for u in np.unique(keys))
    within = np.array([[W]])
    iid = within_loglik(np.ones(1), within, st.n, st.n_units, 1.3)
    assert ar1.loglik(v, st.arrays(), 0.0, 1.3, None) == pytest.approx(iid, abs=1e-9)


def test_non_integer_spacing():
    # continuous-time AR(1): Cov = sigma^2 rho^|t - s| for any real spacing (scipy dense)
    Z, keys, times = _panel(5, n_units=15, integer=False)
    st = ar1.compute(Z[:, :-1], Z[:, -1], keys, times)
    assert not st.integer_gaps
    rho, sigma, tau = 0.55, 1.2, 0.7
    dense = sum(stats.multivariate_normal(np.zeros(len(t)), _dense_cov(t, rho, sigma, tau)).logpdf(r)
                for t, r in _units(Z, keys, times, B))
    assert ar1.loglik(np.append(-B, 1.0), st.arrays(), rho, sigma, tau) == pytest.approx(dense, abs=1e-9)
    with pytest.raises(ValueError, match="negative rho"):
        ar1.loglik(np.append(-B, 1.0), st.arrays(), -0.5, sigma, tau)


def _blocks(Z, keys, times, cuts, seed):
    """Rows sorted by (unit, time), cut at ``cuts`` (units split across blocks), each
    block's rows shuffled."""
    o = np.lexsort((times, keys))
    rng = np.random.default_rng(seed)
    out = []
    for a, b in zip([0] + cuts, cuts + [len(o)]):
        idx = rng.permutation(o[a:b])
        out.append(ar1.partial(Z[idx], keys[idx], times[idx]))
    return out


def _assert_same(s1, s2, tol=1e-10):
    a1, a2 = s1.arrays(), s2.arrays()
    for key in ("n", "n_units"):
        assert a1[key] == a2[key]
    for key in ("gaps", "link_count", "first", "link_start", "link_end", "link_cross"):
        np.testing.assert_allclose(a1[key], a2[key], rtol=tol, atol=tol)
    _same_groups(a1, a2, tol)


def _same_groups(a1, a2, tol):
    assert len(a1["groups"]) == len(a2["groups"])
    for g1, g2 in zip(a1["groups"], a2["groups"]):
        for key in ("count", "T", "index", "links"):
            np.testing.assert_array_equal(g1[key], g2[key])
        np.testing.assert_allclose(g1["cp"], g2["cp"], rtol=tol, atol=tol)


def test_split_blocks_give_the_same_statistics(panel):
    Z, keys, times, whole = panel
    o = np.lexsort((times, keys))
    sk = keys[o]
    # cut inside units (the cut row's unit continues in the next block)
    cuts = [c for c in (9, 31, 32, 60, 77) if sk[c] == sk[c - 1]]
    assert len(cuts) >= 2
    parts = _blocks(Z, keys, times, cuts, seed=3)
    _assert_same(ar1.finalize(reduce(ar1.merge, parts)), whole)          # left to right

    def tree(ps):                                                        # pairs, in order
        return ps[0] if len(ps) == 1 else ar1.merge(tree(ps[:len(ps) // 2]),
                                                    tree(ps[len(ps) // 2:]))
    _assert_same(ar1.finalize(tree(parts)), whole)
    # a unit in three blocks: block of one row in the middle
    u = next(k for k in np.unique(sk) if (sk == k).sum() >= 4)
    rows = np.flatnonzero(sk == u)
    parts = _blocks(Z, keys, times, [int(rows[1]), int(rows[2])], seed=4)
    _assert_same(ar1.finalize(ar1.merge(ar1.merge(parts[0], parts[1]), parts[2])), whole)


def test_interleaved_blocks_are_refused(panel):
    Z, keys, times, _ = panel
    o = np.lexsort((times, keys))
    sk = keys[o]
    u = next(k for k in np.unique(sk) if (sk == k).sum() >= 4)
    rows = o[sk == u]
    a = ar1.partial(Z[rows[::2]], keys[rows[::2]], times[rows[::2]], column="year")
    b = ar1.partial(Z[rows[1::2]], keys[rows[1::2]], times[rows[1::2]], column="year")
    with pytest.raises(PanelDataError, match="'year'.*interleave"):
        ar1.merge(a, b)


def test_standardised_arrays_equal_statistics_of_standardised_rows(panel):
    # z* = (z - c) / s: the statistics transform exactly (numpy on the transformed rows)
    Z, keys, times, st = panel
    c = np.array([0.0, 0.4, -1.2, 3.0])
    s = np.array([1.0, 2.0, 0.5, 1.7])
    a1 = ar1.finalize(ar1.partial((Z - c) / s, keys, times)).arrays()
    a2 = st.arrays(c, s)
    for key in ("first", "link_start", "link_end", "link_cross"):
        np.testing.assert_allclose(a1[key], a2[key], rtol=1e-10, atol=1e-10)
    _same_groups(a1, a2, 1e-10)


def test_large_offsets_keep_precision():
    # a large common offset in y and time must not change the density (scipy dense)
    Z, keys, times = _panel(8, n_units=12)
    Z = Z.copy()
    Z[:, -1] += 1e6
    b = np.array([1e6 + 0.3, -0.8, 1.7])
    st = ar1.compute(Z[:, :-1], Z[:, -1], keys, times + 1e5)
    dense = sum(stats.multivariate_normal(np.zeros(len(t)), _dense_cov(t, 0.5, 1.0, 0.6)).logpdf(r)
                for t, r in _units(Z, keys, times, b))
    c = np.append(np.zeros(3), 1e6)
    v = np.append(-(b - np.array([1e6, 0, 0])), 1.0)   # residuals of the centred outcome
    assert ar1.loglik(v, st.arrays(c), 0.5, 1.0, 0.6) == pytest.approx(dense, abs=1e-7)


@pytest.mark.parametrize("times,match", [
    (np.array(["a", "b", "c", "d"]), "'wave'.*str"),
    (np.array([2001, 2002, 2002, 2003]), "'wave'.*two rows"),
    (np.array([1.0, np.nan, 2.0, 3.0]), "'wave'.*missing"),
    (np.array(["2001-01-01", "2001-02-01", "2001-03-01", "2001-04-01"], dtype="datetime64[D]"),
     "'wave'.*dates"),
])
def test_unreadable_time_is_an_error_naming_the_column(times, match):
    keys = np.array(["a", "a", "a", "b"]) if "two rows" in match else np.array(["a", "a", "b", "b"])
    with pytest.raises(PanelDataError, match=match):
        ar1.partial(np.ones((4, 2)), keys, times, column="wave")


def test_ordered_categorical_time_maps_to_codes():
    import pandas as pd
    t = pd.Series(pd.Categorical(["low", "high", "mid"], categories=["low", "mid", "high"],
                                 ordered=True))
    np.testing.assert_array_equal(ar1.occasion_times(t, "wave"), [0.0, 2.0, 1.0])
    with pytest.raises(PanelDataError, match="'wave'.*unordered"):
        ar1.occasion_times(t.cat.as_unordered(), "wave")


# ---------------------------------------------------------------------------- PyTensor form
@pytest.fixture(scope="module")
def compiled(panel):
    import pytensor
    import pytensor.tensor as pt

    _, _, _, st = panel
    arrays = st.arrays()
    b, rho, sigma, tau = pt.dvector("b"), pt.dscalar("rho"), pt.dscalar("sigma"), pt.dscalar("tau")
    v = pt.concatenate([-b, pt.ones((1,))])
    out = {}
    for form, t in (("random", tau), ("pooled", 0.0), ("fixed", None)):
        lp = ar1.loglik(v, arrays, rho, sigma, t, xp=pt)
        wrt = [b, rho, sigma] + ([tau] if form == "random" else [])
        grads = pytensor.grad(lp, wrt)
        ins = [b, rho, sigma] + ([tau] if form == "random" else [])
        # the graph's values and gradients do not depend on the backend; the Python one
        # skips a minute of compiling on a loaded machine
        out[form] = pytensor.function(ins, [lp] + grads, on_unused_input="ignore",
                                      mode="FAST_COMPILE")
    return arrays, out


@pytest.mark.parametrize("rho,sigma,tau", [(0.6, 1.3, 0.8), (-0.7, 0.9, 1.1), (0.2, 1.1, 0.5)])
@pytest.mark.parametrize("form", ["random", "pooled", "fixed"])
def test_pytensor_form_and_its_gradient(compiled, form, rho, sigma, tau):
    # value: the numpy form (itself checked against scipy above); gradient: central finite
    # differences of the numpy form
    arrays, fns = compiled
    t = {"random": tau, "pooled": 0.0, "fixed": None}[form]

    def f(theta):
        return ar1.loglik(np.append(-theta[:3], 1.0), arrays, theta[3], theta[4],
                          theta[5] if form == "random" else t)

    theta = np.array([*B, rho, sigma, tau])
    args = [B, rho, sigma] + ([tau] if form == "random" else [])
    lp, *grads = fns[form](*args)
    assert lp == pytest.approx(f(theta), abs=1e-9)
    grad = np.concatenate([np.atleast_1d(g) for g in grads])
    m = len(grad)
    h = 1e-6
    fd = np.array([(f(theta + h * e) - f(theta - h * e)) / (2 * h) for e in np.eye(6)[:m]])
    np.testing.assert_allclose(grad, fd, rtol=1e-6, atol=1e-5)


# ---------------------------------------------------------------------------- conditionals
def _dense_conditional(t, r, rho, sigma, tau):
    """Mean and SD of each r_t given the unit's other residuals, with numpy's dense
    linear algebra: the partitioned normal (random, pooled) or, for fixed effects, the
    flat-prior posterior of the intercept from the other rows (GLS) carried into the
    conditional of r_t given the intercept and the other rows."""
    T = len(t)
    means, sds = np.empty(T), np.empty(T)
    R = _ar1_corr(t, rho)
    for j in range(T):
        o = np.delete(np.arange(T), j)
        if tau is not None:
            S = sigma ** 2 * R + tau ** 2
            k = np.linalg.solve(S[np.ix_(o, o)], S[o, j])
            means[j], sds[j] = k @ r[o], np.sqrt(S[j, j] - S[j, o] @ k)
            continue
        if T == 1:
            means[j] = sds[j] = np.nan
            continue
        Ro = R[np.ix_(o, o)]
        one = np.ones(T - 1)
        a = np.linalg.solve(Ro, one)
        u_hat, u_var = a @ r[o] / (a @ one), sigma ** 2 / (a @ one)
        k = np.linalg.solve(Ro, R[o, j])
        lead = 1.0 - k @ one                          # weight of the intercept in the mean
        means[j] = lead * u_hat + k @ r[o]
        sds[j] = np.sqrt(sigma ** 2 * (1.0 - R[j, o] @ k) + lead ** 2 * u_var)
    return means, sds


@pytest.mark.parametrize("rho,sigma,tau", [(0.6, 1.3, 0.8), (-0.7, 0.9, 1.1), (0.95, 0.7, 0.0),
                                           (0.5, 1.2, None), (-0.4, 0.8, None)])
def test_occasion_conditional_equals_dense_normal(panel, rho, sigma, tau):
    Z, keys, times, _ = panel
    r = Z[:, -1] - Z[:, :-1] @ B
    tl = ar1.Timeline.build(keys, times)
    mean, sd = ar1.occasion_conditional(r, tl, rho, sigma, tau)
    for u in np.unique(keys):
        rows = np.flatnonzero(keys == u)
        rows = rows[np.argsort(times[rows])]
        m_ref, s_ref = _dense_conditional(times[rows], r[rows], rho, sigma, tau)
        np.testing.assert_allclose(mean[rows], m_ref, rtol=0, atol=1e-10)
        np.testing.assert_allclose(sd[rows], s_ref, rtol=0, atol=1e-10)
    lp = ar1.occasion_logdensity(r, tl, rho, sigma, tau)
    ok = np.isfinite(sd)
    np.testing.assert_allclose(lp[ok], stats.norm(mean[ok], sd[ok]).logpdf(r[ok]), atol=1e-12)


def test_row_functions_take_draws(panel):
    # the draws axis gives, draw by draw, what one draw gives (the dense checks above)
    Z, keys, times, _ = panel
    rng = np.random.default_rng(2)
    b = B + 0.1 * rng.normal(size=(4, 3))
    r = Z[:, -1][None] - b @ Z[:, :-1].T
    rho, sigma, tau = np.array([0.3, -0.5, 0.8, 0.0]), np.array([1.0, 0.7, 1.4, 1.1]), \
        np.array([0.5, 1.0, 0.0, 2.0])
    tl = ar1.Timeline.build(keys, times)
    U = ar1.unit_logdensity(r, tl, rho, sigma, tau)
    M, S = ar1.occasion_conditional(r, tl, rho, sigma, None)
    for s in range(4):
        np.testing.assert_allclose(U[s], ar1.unit_logdensity(r[s], tl, rho[s], sigma[s], tau[s]),
                                   rtol=1e-13)
        m, sd = ar1.occasion_conditional(r[s], tl, rho[s], sigma[s], None)
        np.testing.assert_allclose(M[s], m, rtol=1e-13)
        np.testing.assert_allclose(S[s], sd, rtol=1e-13)


def test_dask_partitions_of_a_parquet_panel_give_the_same_statistics(panel, tmp_path):
    # a Parquet panel in four files cut inside units, read by dask.dataframe (one
    # partition per file), summarised per partition and merged pairwise in partition
    # order with dask.delayed: equal to the in-memory statistics to 1e-10
    import dask
    import dask.dataframe as dd
    import pandas as pd

    Z, keys, times, whole = panel
    o = np.lexsort((times, keys))
    df = pd.DataFrame(Z[o], columns=["c0", "c1", "c2", "y"]).assign(unit=keys[o], t=times[o])
    cuts = [0, 13, 40, 41, 70, len(df)]          # 40/41: a partition of one row
    for j, (a, b) in enumerate(zip(cuts[:-1], cuts[1:])):
        df.iloc[a:b].to_parquet(tmp_path / f"part{j}.parquet", index=False)
    ddf = dd.read_parquet(str(tmp_path))
    assert ddf.npartitions == len(cuts) - 1
    pieces = [dask.delayed(lambda d: ar1.partial(d[["c0", "c1", "c2", "y"]].to_numpy(),
                                                 d["unit"].to_numpy(), d["t"].to_numpy()))(p)
              for p in ddf.to_delayed()]
    while len(pieces) > 1:
        pieces = [dask.delayed(ar1.merge)(*pieces[i:i + 2]) if i + 1 < len(pieces)
                  else pieces[i] for i in range(0, len(pieces), 2)]
    merged = pieces[0].compute(scheduler="sync")
    assert any(np.unique(df.iloc[a - 1:a + 1]["unit"]).size == 1 for a in cuts[1:-1])
    _assert_same(ar1.finalize(merged), whole)


@pytest.mark.parametrize("rho,sigma,tau", [(0.6, 1.3, 0.8), (-0.7, 0.9, 1.1), (0.3, 1.0, None)])
def test_unit_effect_conditional_equals_dense_normal(panel, rho, sigma, tau):
    # reference: numpy's dense Gaussian update. Random: Cov(u, r) = tau^2 1',
    # Var(r) = Sigma, so E[u | r] = tau^2 1'Sigma^-1 r, Var = tau^2 - tau^4 1'Sigma^-1 1.
    # Fixed effects (flat prior): GLS of r on 1 with covariance sigma^2 R.
    Z, keys, times, _ = panel
    r = Z[:, -1] - Z[:, :-1] @ B
    tl = ar1.Timeline.build(keys, times)
    mean, sd = ar1.unit_effect_conditional(r, tl, rho, sigma, tau)
    for j, (t, ri) in enumerate(_units(Z, keys, times, B)):
        one = np.ones(len(t))
        if tau is None:
            a = np.linalg.solve(sigma ** 2 * _ar1_corr(t, rho), one)
            m_ref, v_ref = a @ ri / (a @ one), 1.0 / (a @ one)
        else:
            a = np.linalg.solve(_dense_cov(t, rho, sigma, tau), one)
            m_ref, v_ref = tau ** 2 * a @ ri, tau ** 2 - tau ** 4 * a @ one
        assert mean[j] == pytest.approx(m_ref, abs=1e-10)
        assert sd[j] == pytest.approx(np.sqrt(v_ref), abs=1e-10)
