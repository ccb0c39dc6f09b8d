"""The mathematics written once (bayespanel.core.mathcore), each function against an outside
reference: a published identity checked with scipy / numpy linear algebra, or statsmodels.
"""

import numpy as np
import pytest
from scipy import linalg
from statsmodels.stats.moment_helpers import cov2corr

from bayespanel.core import mathcore as mc


def _unit_cov(T, s2, t2):
    """Covariance of one unit's rows under the random intercept: s2 I + t2 11'."""
    return s2 * np.eye(T) + t2 * np.ones((T, T))


@pytest.mark.parametrize("T,s2,t2", [(1, 1.0, 0.5), (4, 2.0, 0.7), (9, 0.3, 5.0), (5, 1.0, 0.0)])
def test_quasi_demeaning_share_is_the_gls_square_root(T, s2, t2):
    # published identity (Baltagi 2021, section 2.3): sigma * Sigma_i^{-1/2} = I - theta J/T,
    # with Sigma_i = sigma^2 I + tau^2 11'; the matrix square root from scipy
    root = np.real(linalg.sqrtm(linalg.inv(_unit_cov(T, s2, t2)))) * np.sqrt(s2)
    theta = mc.quasi_demeaning_share(T, t2, s2)
    np.testing.assert_allclose(np.eye(T) - theta * np.ones((T, T)) / T, root, atol=1e-10)


def test_quasi_demeaning_share_broadcasts_and_limits():
    T = np.array([1, 3, 7])
    th = mc.quasi_demeaning_share(T, 2.0, 1.0)
    assert th.shape == (3,) and np.all(np.diff(th) > 0)
    # no occasion noise: the whole unit mean is taken off (fixed-effects limit)
    np.testing.assert_array_equal(mc.quasi_demeaning_share(T, 2.0, 0.0), np.ones(3))
    # per draw: (S,) variances at one length
    np.testing.assert_allclose(mc.quasi_demeaning_share(4, np.array([0.0, 1.0]), np.ones(2)),
                               [0.0, 1 - np.sqrt(1 / 5)])


def test_intraclass_correlation_is_the_within_unit_correlation():
    # statsmodels' cov2corr of the unit covariance s2 I + t2 11': every off-diagonal entry
    # is the ICC
    for s2, t2 in [(1.0, 0.5), (0.2, 3.0), (4.0, 0.0)]:
        R = cov2corr(_unit_cov(5, s2, t2))
        assert mc.intraclass_correlation(t2, s2) == pytest.approx(R[0, 3], abs=1e-14)
    np.testing.assert_allclose(mc.intraclass_correlation(np.array([1.0, 3.0]), 1.0), [0.5, 0.75])
    assert np.isnan(mc.intraclass_correlation(np.array(0.0), np.array(0.0)))


def test_intraclass_correlation_on_pytensor_variables():
    pt = pytest.importorskip("pytensor.tensor")
    a, b = pt.dscalar("a"), pt.dscalar("b")
    assert mc.intraclass_correlation(a, b).eval({a: 3.0, b: 1.0}) == pytest.approx(0.75)


def test_quadratic_forms_match_a_loop():
    rng = np.random.default_rng(1)
    g = rng.normal(size=(6, 3))
    P = rng.normal(size=(3, 3))
    P = P @ P.T
    np.testing.assert_allclose(mc.quadratic_forms(g, P), [x @ P @ x for x in g], rtol=1e-12)
    np.testing.assert_array_equal(mc.quadratic_forms(np.zeros((4, 0)), np.zeros((0, 0))),
                                  np.zeros(4))


def test_partition_quantities_are_the_variances_of_the_fitted_parts():
    # Rights and Sterba (2019): the within and between parts of the linear predictor are
    # uncorrelated over the rows, so their quadratic forms equal numpy's variances of the
    # fitted components, and each level's shares add to one
    rng = np.random.default_rng(7)
    N, T = 30, 4
    codes = np.repeat(np.arange(N), T)
    x = rng.normal(size=(N * T, 2)) + rng.normal(size=(N, 2))[codes]
    means = np.stack([np.bincount(codes, weights=x[:, j]) / T for j in range(2)], axis=1)
    W, B = x - means[codes], means[codes]
    g_w, g_b = np.array([[1.0, -0.5], [0.3, 2.0]]), np.array([[0.4, 1.0], [-1.0, 0.2]])
    sigma, tau = np.array([1.0, 0.5]), np.array([0.8, 2.0])
    q = mc.partition_quantities(g_w, g_b, np.cov(W.T, bias=True), np.cov(B.T, bias=True),
                                sigma, tau, [T])
    np.testing.assert_allclose(q["variance: within part"], np.var(W @ g_w.T, axis=0))
    np.testing.assert_allclose(q["variance: between part"], np.var(B @ g_b.T, axis=0))
    assert np.allclose(np.var(W @ g_w.T + B @ g_b.T, axis=0),
                       q["variance: within part"] + q["variance: between part"])
    for level in ("total", "within", "between"):
        parts = [v for k, v in q.items() if k.startswith(f"{level}: ")]
        np.testing.assert_allclose(np.sum(parts, axis=0), 1.0)
    np.testing.assert_allclose(q["ICC"], tau ** 2 / (tau ** 2 + sigma ** 2))
    np.testing.assert_allclose(q["theta (T=4)"], mc.quasi_demeaning_share(4, tau ** 2, sigma ** 2))
    # no between part (fixed effects): unit quantities are nan, within shares still add up
    fe = mc.partition_quantities(g_w, None, np.cov(W.T, bias=True), None, sigma, None, [T])
    assert np.all(np.isnan(fe["ICC"])) and np.all(np.isnan(fe["unit SD"]))
    np.testing.assert_allclose(fe["within: within part"] + fe["within: occasion residual"], 1.0)


# ------------------------------------------------------------------ JSON cleaning (jsonsafe)
def test_json_scalar_and_record_give_strict_json():
    # the standard library's strict encoder (RFC 8259 has no NaN or infinity) is the check
    import json

    from bayespanel.core.jsonsafe import json_record, json_scalar

    rec = json_record({"a": np.float64(np.nan), "b": np.float32(1.5), "c": np.int64(3),
                       "d": np.bool_(True), "e": float("inf"), "f": "text", "g": None})
    assert json.loads(json.dumps(rec, allow_nan=False)) == {
        "a": None, "b": 1.5, "c": 3, "d": True, "e": None, "f": "text", "g": None}
    assert type(json_scalar(np.int32(2))) is int and type(json_scalar(np.bool_(0))) is bool
    assert json_scalar(-np.inf) is None and json_scalar([1]) == [1]


def test_jsonable_matches_pandas_own_json_writer():
    # pandas' to_json writes NaN as null: its records must equal ours for a frame with an
    # index, integers, floats (exactly representable), NaN and text
    import json

    import pandas as pd

    from bayespanel.core.jsonsafe import jsonable

    df = pd.DataFrame({"x": [0.5, np.nan, -2.25], "n": [1, 2, 3], "s": ["a", "b", "c"]},
                      index=pd.Index(["u1", "u2", "u3"], name="unit"))
    ours = jsonable(df)
    assert ours == json.loads(df.reset_index().to_json(orient="records", double_precision=15))
    nested = {1: [np.arange(2), (np.nan, pd.Series({"k": np.inf}))],
              "t": pd.Timestamp("2026-01-02")}
    assert json.loads(json.dumps(jsonable(nested), allow_nan=False)) == {
        "1": [[0, 1], [None, {"k": None}]], "t": "2026-01-02T00:00:00"}


def test_unit_sd_draws_follow_the_unit_effect_rule():
    # published identity (the random-intercept marginal density): the marginal density of a unit with tau = 0
    # is that of independent rows, so "none" must give zeros; checked through the density
    # against scipy's multivariate normal with covariance sigma^2 I + tau^2 11'
    from scipy import stats

    from bayespanel.core import gaussian

    s = np.array([0.7, 1.1, 2.0])
    np.testing.assert_array_equal(mc.unit_sd_draws("random", s.reshape(1, 3), (3,)), s)
    assert mc.unit_sd_draws("fixed", s, (3,)) is None
    tau0 = mc.unit_sd_draws("none", None, (3,))
    np.testing.assert_array_equal(tau0, np.zeros(3))
    with pytest.raises(ValueError, match="sigma_unit"):
        mc.unit_sd_draws("random", None, (3,))
    with pytest.raises(ValueError, match="random, none or fixed"):
        mc.unit_sd_draws("mixed", s, (3,))
    rng = np.random.default_rng(3)
    M, y = rng.normal(size=(4, 1)), rng.normal(size=4)
    codes, b = np.zeros(4, dtype=np.int64), np.array([[0.3]] * 3)
    for tau in (tau0, mc.unit_sd_draws("random", s[::-1], (3,))):
        ours = gaussian.unit_loglik_rows(M, y, codes, b, s, tau)[:, 0]
        want = [stats.multivariate_normal(M[:, 0] * 0.3, _unit_cov(4, si ** 2, ti ** 2)).logpdf(y)
                for si, ti in zip(s, tau)]
        np.testing.assert_allclose(ours, want, rtol=1e-10)


# ------------------------------------------------------------------ finishing a CR1 covariance
@pytest.mark.parametrize("path", ["rows", "statistics"])
def test_cr1_covariance_equals_statsmodels_cluster_ols(grunfeld, path):
    # Source: Grunfeld investment panel (statsmodels.datasets.grunfeld); statsmodels' OLS
    # with cov_type="cluster" applies the same G/(G-1) (n-1)/(n-k) factor and t(G - 1)
    import statsmodels.formula.api as smf

    import bayespanel as bp
    from bayespanel.reference.estimators import cr1_covariance, fit_arrays

    f = "invest ~ value + capital"
    panel = bp.Panel(grunfeld, unit="firm", time="year")
    if path == "rows":
        d = panel.design(f)
        res = fit_arrays("pooled", d.X, d.y, d.unit_codes, d.terms, cov="cluster")
    else:
        res = bp.reference.pooled(panel, f, cov="cluster")
    sm = smf.ols(f, grunfeld).fit(cov_type="cluster",
                                  cov_kwds={"groups": grunfeld["firm"].astype("category").cat.codes})
    np.testing.assert_allclose(res.vcov.to_numpy(), sm.cov_params().to_numpy(), rtol=1e-9)
    np.testing.assert_array_equal(res._df, np.full(3, grunfeld["firm"].nunique() - 1.0))
    assert res.cov_type == "cluster" and res.extra["n_clusters"] == grunfeld["firm"].nunique()
    # the function alone: one score row per cluster gives G - 1 degrees of freedom
    V, df = cr1_covariance(res, "pooled", None, np.ones((4, 3)), 100)
    assert V.shape == (3, 3) and np.all(df == 3.0)


# ------------------------------------------------------------------ between-minus-within contrasts
def test_contrast_rows_equal_the_mundlak_identity(grunfeld):
    # Mundlak (1978): the coefficient of a covariate's unit mean in the correlated-effects
    # model equals between minus within of the hybrid model on the same rows; both contrast
    # maps applied to the reference fits (checked against linearmodels in
    # test_reference_grunfeld) give the same numbers
    import bayespanel as bp
    from bayespanel.analysis.contrasts import contrast_rows

    panel = bp.Panel(grunfeld, unit="firm", time="year")
    f = "invest ~ value + capital"
    wb = bp.reference.within_between(panel, f)
    mu = bp.reference.mundlak(panel, f)
    n_wb, L_wb = contrast_rows("within_between", wb.coef.index)
    n_mu, L_mu = contrast_rows("mundlak", mu.coef.index)
    assert n_wb == n_mu == ["value (between - within)", "capital (between - within)"]
    np.testing.assert_allclose(L_wb @ wb.coef.to_numpy(), L_mu @ mu.coef.to_numpy(),
                               rtol=1e-8)
    assert set(L_wb.ravel()) == {-1.0, 0.0, 1.0} and set(L_mu.ravel()) == {0.0, 1.0}
    names, L = contrast_rows("random", ["Intercept", "value"])
    assert names == [] and L.shape == (0, 2)


# ------------------------------------------------------------------ priors on the standardised scale
def test_prior_on_standard_scale_is_a_change_of_variables():
    # change of variables theta* = (theta - shift) * factor: scipy's density of theta under
    # the data-scale prior equals the density of theta* under the mapped prior times factor
    from scipy import stats

    from bayespanel.core.gaussian import Scaling
    from bayespanel.bayes.priors import Prior, prior_on_standard_scale

    sc = Scaling((0.0, 3.0, 10.0), (1.0, 2.0, 5.0), intercept=0)   # [Intercept, x, y]
    slope = prior_on_standard_scale(Prior("normal", mu=1.0, sigma=4.0), sc, 1, 0)
    b = 2.7
    f = sc.s[1] / sc.scale_y
    assert stats.norm(1.0, 4.0).logpdf(b) == pytest.approx(
        stats.norm(slope["mu"], slope["sigma"]).logpdf(b * f) + np.log(f), rel=1e-12)
    icpt = prior_on_standard_scale(Prior("student_t", nu=3.0, mu=12.0, sigma=6.0), sc, 0, 0)
    assert icpt == pytest.approx({"mu": (12.0 - 10.0) / 5.0, "sigma": 6.0 / 5.0, "nu": 3.0})
    sd = prior_on_standard_scale(Prior("half_normal", scale=8.0), sc)
    s = 3.3
    assert stats.halfnorm(scale=8.0).logpdf(s) == pytest.approx(
        stats.halfnorm(scale=sd["scale"]).logpdf(s / 5.0) - np.log(5.0), rel=1e-12)


def test_log_sum_exp_equals_scipy():
    # outside check: scipy.special.logsumexp, with infinite entries and a scalar weight
    import scipy.special

    from bayespanel.core.mathcore import log_sum_exp

    rng = np.random.default_rng(3)
    a = rng.normal(size=(40, 300)) * 50
    a[0] = -np.inf
    a[1, 7] = np.inf
    a[2, :9] = -np.inf
    for kw in (dict(axis=1), dict(axis=0), dict(axis=1, keepdims=True), dict(axis=1, b=0.25)):
        want = scipy.special.logsumexp(a, **kw)
        got = log_sum_exp(a, **kw)
        assert got.shape == want.shape
        np.testing.assert_allclose(got, want, rtol=1e-14, atol=0)
