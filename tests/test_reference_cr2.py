"""CR2 covariance and Satterthwaite degrees of freedom.

Outside checks: a brute-force implementation straight from the definitions of Bell and
McCaffrey (2002) and Pustejovsky and Tipton (2018) (n x n hat matrix, the full
dummy-variable design for fixed effects); statsmodels OLS ``cov_type="HC2"`` (one row per
cluster); the exact unbiasedness of CR2 under independent homoskedastic errors (Bell and
McCaffrey 2002); and, for a binary cluster-level regressor with equal cluster sizes, the
Welch variance of the cluster means with the Welch-Satterthwaite degrees of freedom under
equal variances (the cluster analogue of the HC2 identity in Imbens and Kolesar 2016,
Review of Economics and Statistics 98(4)).
"""

import numpy as np
import pandas as pd
import pytest

import bayespanel as bp
from bayespanel.core.linalg import psd_power
from bayespanel.reference.covariance import cr2


def brute_cr2(X, e, cl, Xfull=None, idx=None):
    """CR2 and Satterthwaite df from the definitions, with dense n x n matrices."""
    Xf = X if Xfull is None else Xfull
    n = len(e)
    Mf = np.linalg.pinv(Xf.T @ Xf)
    IH = np.eye(n) - Xf @ Mf @ Xf.T
    rows = (Mf @ Xf.T) if idx is None else (Mf @ Xf.T)[idx]
    groups = [np.flatnonzero(cl == g) for g in range(cl.max() + 1)]
    A = [psd_power(IH[np.ix_(r, r)], -0.5) for r in groups]
    V = np.zeros((rows.shape[0],) * 2)
    for r, Ag in zip(groups, A):
        v = rows[:, r] @ Ag @ e[r]
        V += np.outer(v, v)
    nus = []
    for j in range(rows.shape[0]):
        U = np.zeros((n, len(groups)))
        for g, (r, Ag) in enumerate(zip(groups, A)):
            B = np.zeros(n)
            B[r] = Ag @ rows[j, r]
            U[:, g] = IH @ B
        Om = U.T @ U
        nus.append(np.trace(Om) ** 2 / np.trace(Om @ Om))
    return V, np.array(nus)


def _ols(X, y):
    M = np.linalg.inv(X.T @ X)
    return M, y - X @ (M @ X.T @ y)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_pooled_cr2_equals_brute_force(seed):
    """Source: Bell and McCaffrey (2002) / Pustejovsky and Tipton (2018) definitions."""
    rng = np.random.default_rng(seed)
    G = 8
    cl = np.repeat(np.arange(G), rng.integers(1, 7, G))
    n = len(cl)
    X = np.column_stack([np.ones(n), rng.normal(size=n), rng.normal(size=G)[cl]])
    y = X @ [1.0, 2.0, -1.0] + rng.normal(size=G)[cl] + rng.normal(size=n)
    M, e = _ols(X, y)
    V, nu = cr2(X, e, cl, M)
    Vb, nub = brute_cr2(X, e, cl)
    np.testing.assert_allclose(V, Vb, rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(nu, nub, rtol=1e-10)


def test_within_cr2_equals_full_dummy_design():
    """Source: Pustejovsky and Tipton (2018), section 3: CR2 of the fixed-effects fit is
    that of the regression with one dummy per unit; brute force on that full design."""
    rng = np.random.default_rng(5)
    G = 7
    T = rng.integers(2, 6, G)
    cl = np.repeat(np.arange(G), T)
    n = len(cl)
    x = rng.normal(size=(n, 2)) + rng.normal(size=(G, 2))[cl]
    y = x @ [1.0, -1.0] + rng.normal(size=G)[cl] + rng.normal(size=n)
    D = (cl[:, None] == np.arange(G)).astype(float)
    df = pd.DataFrame({"u": cl, "t": np.concatenate([np.arange(k) for k in T]), "y": y,
                       "x1": x[:, 0], "x2": x[:, 1]})
    res = bp.reference.within(bp.Panel(df, unit="u", time="t"), "y ~ x1 + x2", cov="cr2")
    xw = x - (D.T @ x / T[:, None])[cl]
    e = (y - (D.T @ y / T)[cl]) - xw @ res.coef.to_numpy()
    Vb, nub = brute_cr2(x, e, cl, Xfull=np.column_stack([x, D]), idx=slice(0, 2))
    np.testing.assert_allclose(res.vcov.to_numpy(), Vb, rtol=1e-9)
    np.testing.assert_allclose(res.df_resid.to_numpy(), nub, rtol=1e-9)


def test_leverage_one_cluster_uses_generalised_inverse():
    """Source: brute-force definitions with the Moore-Penrose inverse square root
    (a covariate non-zero in one cluster only gives that cluster leverage one)."""
    rng = np.random.default_rng(7)
    cl = np.repeat(np.arange(5), 3)
    n = len(cl)
    X = np.column_stack([np.ones(n), rng.normal(size=n), (cl == 0) * rng.normal(size=n)])
    M, e = _ols(X, X @ [1.0, 1.0, 1.0] + rng.normal(size=n))
    V, nu = cr2(X, e, cl, M)
    Vb, nub = brute_cr2(X, e, cl)
    np.testing.assert_allclose(V, Vb, rtol=1e-9, atol=1e-14)
    np.testing.assert_allclose(nu, nub, rtol=1e-9)


def test_one_row_per_cluster_is_hc2_of_statsmodels():
    """Source: statsmodels OLS cov_type="HC2" (CR2 with singleton clusters is HC2)."""
    import statsmodels.api as sm

    rng = np.random.default_rng(11)
    n = 40
    X = np.column_stack([np.ones(n), rng.normal(size=n), rng.exponential(size=n)])
    y = X @ [0.5, 1.0, -2.0] + rng.normal(size=n) * (1 + X[:, 2])
    M, e = _ols(X, y)
    V, _ = cr2(X, e, np.arange(n), M)
    np.testing.assert_allclose(np.sqrt(np.diag(V)), sm.OLS(y, X).fit(cov_type="HC2").bse,
                               rtol=1e-10)


def test_cr2_is_unbiased_under_the_working_model():
    """Identity: Bell and McCaffrey (2002) -- with independent homoskedastic errors,
    E[V_CR2] = sigma^2 (X'X)^{-1} exactly. E over e ~ N(0, I - H) is the sum of V over an
    orthonormal basis of the residual space, since V is quadratic in e."""
    rng = np.random.default_rng(13)
    G = 6
    cl = np.repeat(np.arange(G), rng.integers(2, 6, G))
    n = len(cl)
    X = np.column_stack([np.ones(n), rng.normal(size=n), rng.normal(size=G)[cl]])
    M = np.linalg.inv(X.T @ X)
    q, _ = np.linalg.qr(np.column_stack([X, rng.normal(size=(n, n - X.shape[1]))]))
    basis = q[:, X.shape[1]:]
    EV = sum(cr2(X, basis[:, r], cl, M, df=False)[0] for r in range(basis.shape[1]))
    np.testing.assert_allclose(EV, M, rtol=1e-9, atol=1e-13)


def test_cluster_level_binary_regressor_is_welch_on_cluster_means():
    """Identity (cluster analogue of Imbens and Kolesar 2016 for HC2): balanced clusters,
    one binary cluster-level regressor: CR2 variance of the slope = s1^2/G1 + s0^2/G0 of
    the cluster means; Satterthwaite df = Welch-Satterthwaite df with equal variances."""
    rng = np.random.default_rng(17)
    G1, G0, m = 4, 7, 5
    G = G1 + G0
    cl = np.repeat(np.arange(G), m)
    d = (cl < G1).astype(float)
    y = 0.3 * d + rng.normal(size=G)[cl] + rng.normal(size=len(cl))
    df = pd.DataFrame({"u": cl, "t": np.tile(np.arange(m), G), "y": y, "d": d})
    res = bp.reference.pooled(bp.Panel(df, unit="u", time="t"), "y ~ d", cov="cr2")
    means = df.groupby("u")["y"].mean().to_numpy()
    welch = means[:G1].var(ddof=1) / G1 + means[G1:].var(ddof=1) / G0
    assert res.se["d"] ** 2 == pytest.approx(welch, rel=1e-10)
    nu = (1 / G1 + 1 / G0) ** 2 / (1 / (G1 ** 2 * (G1 - 1)) + 1 / (G0 ** 2 * (G0 - 1)))
    assert res.df_resid["d"] == pytest.approx(nu, rel=1e-10)
    # the interval uses that t reference, wider than CR1's t(G - 1)
    from scipy import stats

    ci = res.interval(0.95)
    assert ci.loc["d", "upper"] - res.coef["d"] == pytest.approx(
        stats.t.ppf(0.975, nu) * res.se["d"], rel=1e-10)


def test_cr2_on_random_intercept_gls_equals_brute_force_on_quasi_demeaned_rows(grunfeld):
    """Source: brute-force definitions applied to the quasi-demeaned Grunfeld rows
    (statsmodels.datasets), with theta from linearmodels RandomEffects."""
    from linearmodels import RandomEffects

    panel = bp.Panel(grunfeld, unit="firm", time="year")
    res = bp.reference.random(panel, "invest ~ value + capital", cov="cr2")
    d = grunfeld.set_index(["firm", "year"])
    X = d[["value", "capital"]].copy()
    X.insert(0, "Intercept", 1.0)
    theta = float(RandomEffects(d["invest"], X).fit().theta.iloc[0, 0])
    cl = pd.factorize(d.index.get_level_values(0), sort=True)[0]
    Xa, ya = X.to_numpy(), d["invest"].to_numpy()
    Xs = Xa - theta * X.groupby(level=0).transform("mean").to_numpy()
    ys = ya - theta * d["invest"].groupby(level=0).transform("mean").to_numpy()
    M, e = _ols(Xs, ys)
    Vb, nub = brute_cr2(Xs, e, cl)
    np.testing.assert_allclose(res.vcov.to_numpy(), Vb, rtol=1e-6)
    np.testing.assert_allclose(res.df_resid.to_numpy(), nub, rtol=1e-6)
    # few clusters: CR2 df well below G - 1 = 9 for at least one term
    assert res.df_resid.min() < 9


def test_cr2_from_per_unit_blocks_equals_rows(grunfeld):
    """Per-unit blocks X_g'X_g and X_g'e_g suffice (the out-of-core shape); checked
    against the brute-force definitions on the demeaned Grunfeld rows."""
    from bayespanel.reference.covariance import cr2_from_blocks

    panel = bp.Panel(grunfeld, unit="firm", time="year")
    res = bp.reference.within(panel, "invest ~ value + capital", cov="cr2")
    d = res.design
    Xw = d.within()[:, 1:]
    y_within = d.y - (np.bincount(d.unit_codes, weights=d.y) / d.T)[d.unit_codes]
    e = y_within - Xw @ res.coef.to_numpy()
    G = d.n_units
    S = np.stack([Xw[d.unit_codes == g].T @ Xw[d.unit_codes == g] for g in range(G)])
    s = np.stack([Xw[d.unit_codes == g].T @ e[d.unit_codes == g] for g in range(G)])
    V, nu = cr2_from_blocks(S, s, np.linalg.inv(Xw.T @ Xw))
    Vb, nub = brute_cr2(Xw, e, d.unit_codes)
    np.testing.assert_allclose(V, Vb, rtol=1e-8)
    np.testing.assert_allclose(nu, nub, rtol=1e-8)
    np.testing.assert_allclose(res.vcov.to_numpy(), V, rtol=1e-8)
