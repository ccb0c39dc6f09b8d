"""Pointwise LOO terms, sub-sampling and reference cross-validation, without sampling.

Outside checks:
* scipy.stats.multivariate_normal: the unit term is the joint normal density of a unit's
  rows with covariance sigma^2 I + tau^2 J, and the occasion term the conditional normal
  density given the unit's other rows (textbook conditioning of a multivariate normal),
  to 1e-8.
* arviz_stats.loo_subsample: our memory-bounded sub-sampling estimator gives the same
  numbers as arviz-stats' implementation on the same sub-sample and approximation.
* statsmodels OLS / MixedLM with scipy densities: hand-written leave-one-out loops equal
  the reference fits' exact cross-validation.
Data: the Grunfeld investment panel shipped by statsmodels (10 firms, 20 years).
"""

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import bayespanel as bp
from bayespanel.core.errors import EstimationError, SpecificationError
from bayespanel.analysis.loo import (from_draws, holdout_loglik, loo_subsample, pointwise_loglik,
                            reference_cv)

FORMULA = "invest ~ value + capital"


@pytest.fixture(scope="module")
def design(grunfeld):
    return bp.Panel(grunfeld, unit="firm", time="year").design(FORMULA)


@pytest.fixture(scope="module")
def fake_draws(design):
    """A few parameter values near the random-intercept fit (not a posterior: the checks
    here are of densities, which hold for any parameter value)."""
    rng = np.random.default_rng(7)
    S = 4
    b = np.array([-57.0, 0.11, 0.31]) + rng.normal(0, [5.0, 0.01, 0.02], (S, 3))
    sigma = 52.0 * np.exp(rng.normal(0, 0.1, S))
    tau = 85.0 * np.exp(rng.normal(0, 0.1, S))
    return b, sigma, tau


def _fd(design, b, sigma, tau, unit_effects="random"):
    return from_draws(kind="random", unit_effects=unit_effects, labels=design.terms,
                      M=design.X, y=design.y, codes=design.unit_codes, coef=b, sigma=sigma,
                      tau=tau, units=design.units, time=design.time)


def test_unit_term_equals_scipy_joint_density(design, fake_draws):
    b, sigma, tau = fake_draws
    ll = pointwise_loglik(_fd(design, b, sigma, tau), "unit").reshape(len(b), -1)
    for s in range(len(b)):
        for i in range(design.n_units):
            rows = design.unit_codes == i
            T = rows.sum()
            cov = sigma[s] ** 2 * np.eye(T) + tau[s] ** 2 * np.ones((T, T))
            mean = design.X[rows] @ b[s]
            # scipy.stats.multivariate_normal, the brute-force joint density
            ref = stats.multivariate_normal(mean, cov).logpdf(design.y[rows])
            assert ll[s, i] == pytest.approx(ref, rel=1e-8, abs=1e-8)


def _conditional(y, mean, cov, t, others):
    """Conditional normal of component t given the others (textbook MVN conditioning)."""
    S12 = cov[t, others]
    S22 = cov[np.ix_(others, others)]
    w = np.linalg.solve(S22, S12)
    mu = mean[t] + w @ (y[others] - mean[others])
    var = cov[t, t] - S12 @ w
    return stats.norm(mu, np.sqrt(var)).logpdf(y[t])


def test_occasion_term_equals_scipy_conditional_density(design, fake_draws):
    b, sigma, tau = fake_draws
    ll = pointwise_loglik(_fd(design, b, sigma, tau), "occasion").reshape(len(b), -1)
    starts = np.concatenate([[0], np.cumsum(design.T)[:-1]])
    for s in (0, 3):
        for i in (0, 4, 9):
            idx = np.arange(starts[i], starts[i] + design.T[i])
            T = len(idx)
            cov = sigma[s] ** 2 * np.eye(T) + tau[s] ** 2 * np.ones((T, T))
            mean = design.X[idx] @ b[s]
            for t in (0, 7, T - 1):
                others = [j for j in range(T) if j != t]
                ref = _conditional(design.y[idx], mean, cov, t, others)
                assert ll[s, idx[t]] == pytest.approx(ref, rel=1e-8, abs=1e-8)


def test_fixed_effects_occasion_term_is_the_flat_prior_limit(design, fake_draws):
    # With tau -> infinity the random-intercept conditional tends to the fixed-effects one
    # (flat prior on the intercept); scipy conditional with tau = 1e5 agrees to ~1e-6.
    b, sigma, _ = fake_draws
    ll = pointwise_loglik(_fd(design, b, sigma, None, "fixed"), "occasion").reshape(len(b), -1)
    idx = np.flatnonzero(design.unit_codes == 2)
    T = len(idx)
    cov = sigma[1] ** 2 * np.eye(T) + 1e10 * np.ones((T, T))
    ref = _conditional(design.y[idx], design.X[idx] @ b[1], cov, 5, [j for j in range(T) if j != 5])
    assert ll[1, idx[5]] == pytest.approx(ref, rel=1e-6)
    with pytest.raises(EstimationError, match="new unit"):
        pointwise_loglik(_fd(design, b, sigma, None, "fixed"), "unit")
    with pytest.raises(SpecificationError, match="level='firm'"):
        pointwise_loglik(_fd(design, b, sigma, None, "fixed"), "firm")


def test_holdout_of_several_rows_conditions_on_the_training_rows_only(design, fake_draws):
    b, sigma, tau = fake_draws
    idx = np.flatnonzero(design.unit_codes == 6)
    test = np.zeros(design.n, bool)
    test[idx[[2, 3, 11]]] = True
    ll = holdout_loglik(design.X, design.y, design.unit_codes, test, b, sigma, tau, "occasion")
    T = len(idx)
    cov = sigma[0] ** 2 * np.eye(T) + tau[0] ** 2 * np.ones((T, T))
    train = [j for j in range(T) if j not in (2, 3, 11)]
    # scipy conditional of row 3 given the training rows of its unit (not rows 2 and 11)
    ref = _conditional(design.y[idx], design.X[idx] @ b[0], cov, 3, train)
    assert ll[0, 1] == pytest.approx(ref, rel=1e-8)
    # leave-one-row-out through holdout_loglik equals the pointwise occasion term
    one = np.zeros(design.n, bool)
    one[idx[4]] = True
    full = pointwise_loglik(_fd(design, b, sigma, tau), "occasion").reshape(len(b), -1)
    np.testing.assert_allclose(
        holdout_loglik(design.X, design.y, design.unit_codes, one, b, sigma, tau,
                       "occasion")[:, 0], full[:, idx[4]], rtol=1e-10)


def test_subsampling_matches_arviz_loo_subsample(design):
    """arviz_stats.loo_subsample (full log-likelihood in memory, PLPD approximation) and our
    estimator (only the sub-sample evaluated in full) agree on the same sub-sample."""
    import arviz_stats
    import xarray as xr

    ref = bp.reference.random(design, method="reml")
    rng = np.random.default_rng(3)
    C, D = 2, 150
    b = rng.multivariate_normal(ref.coef.to_numpy(), ref.vcov.to_numpy(), (C, D))
    sigma = ref.sigma_obs * np.exp(rng.normal(0, 0.05, (C, D)))
    tau = ref.sigma_unit * np.exp(rng.normal(0, 0.2, (C, D)))
    fd = from_draws(kind="random", unit_effects="random", labels=design.terms, M=design.X,
                    y=design.y, codes=design.unit_codes, coef=b, sigma=sigma, tau=tau,
                    units=design.units)
    ours = loo_subsample(fd, "occasion", observations=60, seed=11, reff=1.0)
    full = pointwise_loglik(fd, "occasion")
    post = xr.Dataset({"coef": (("chain", "draw", "term"), b),
                       "sigma_obs": (("chain", "draw"), sigma),
                       "sigma_unit": (("chain", "draw"), tau)})
    dt = xr.DataTree.from_dict({
        "posterior": xr.DataTree(post),
        "log_likelihood": xr.DataTree(xr.Dataset({"y": (("chain", "draw", "row"), full)})),
        "observed_data": xr.DataTree(xr.Dataset({"y": (("row",), design.y)}))})

    def plpd_fn(observed, data):
        p = data.posterior
        one = from_draws(kind="random", unit_effects="random", labels=design.terms,
                         M=design.X, y=design.y, codes=design.unit_codes,
                         coef=np.asarray(p["coef"].values)[None], sigma=np.asarray(
                             p["sigma_obs"].values).reshape(1), tau=np.asarray(
                             p["sigma_unit"].values).reshape(1))
        return pointwise_loglik(one, "occasion").ravel()

    theirs = arviz_stats.loo_subsample(dt, observations=ours.subsample_indices, var_name="y",
                                       method="plpd", log_lik_fn=plpd_fn, reff=1.0,
                                       pointwise=True)
    assert ours.elpd == pytest.approx(float(theirs.elpd), rel=1e-10)
    assert ours.se == pytest.approx(float(theirs.se), rel=1e-8)
    assert ours.subsampling_se == pytest.approx(float(theirs.subsampling_se), rel=1e-8)
    assert ours.p_loo == pytest.approx(float(theirs.p), rel=1e-8)
    # and the sub-sampled total is close to the full PSIS-LOO total (within its SE)
    full_res = bp.loo.psis_arrays(full, "occasion", reff=1.0)
    assert abs(ours.elpd - float(full_res.elpd)) < 2 * ours.subsampling_se + 1e-9


def test_reference_cv_pooled_equals_statsmodels_loop(design):
    import statsmodels.api as sm

    ref = bp.reference.pooled(design)
    cv = reference_cv(ref, "occasion")
    total = 0.0
    for j in range(design.n):  # hand-written leave-one-row-out with statsmodels OLS
        keep = np.arange(design.n) != j
        fit = sm.OLS(design.y[keep], design.X[keep]).fit()
        total += stats.norm(design.X[j] @ fit.params, np.sqrt(fit.scale)).logpdf(design.y[j])
    assert cv.elpd == pytest.approx(total, rel=1e-9)
    assert cv.method == "exact CV" and cv.n_points == design.n


def test_reference_cv_fixed_effects_equals_dummy_regression_loop(design):
    import statsmodels.api as sm

    ref = bp.reference.within(design)
    cv = reference_cv(ref, "occasion")
    D = (design.unit_codes[:, None] == np.arange(design.n_units)).astype(float)
    Z = np.column_stack([design.X[:, 1:], D])
    vals = []
    for j in range(0, design.n, 17):  # every 17th row: statsmodels OLS with firm dummies
        keep = np.arange(design.n) != j
        fit = sm.OLS(design.y[keep], Z[keep]).fit()
        m = (design.unit_codes[keep] == design.unit_codes[j]).sum()
        vals.append(stats.norm(Z[j] @ fit.params, np.sqrt(fit.scale * (1 + 1 / m)))
                    .logpdf(design.y[j]))
    np.testing.assert_allclose(cv.elpd_i[::17], vals, rtol=1e-9)
    with pytest.raises(EstimationError, match="new unit"):
        reference_cv(ref, "unit")


def test_reference_cv_random_unit_level_equals_mixedlm_loop(design):
    import statsmodels.formula.api as smf

    ref = bp.reference.random(design, method="reml")
    cv = reference_cv(ref, "unit")
    df = pd.DataFrame({"y": design.y, "value": design.X[:, 1], "capital": design.X[:, 2],
                       "g": design.unit_codes})
    vals = []
    for i in range(design.n_units):  # hand-written leave-one-firm-out, statsmodels MixedLM
        tr = df[df.g != i]
        fit = smf.mixedlm("y ~ value + capital", tr, groups=tr["g"]).fit(reml=True)
        te = df[df.g == i]
        Xi = np.column_stack([np.ones(len(te)), te.value, te.capital])
        cov = fit.scale * np.eye(len(te)) + float(fit.cov_re.iloc[0, 0]) * np.ones((len(te),) * 2)
        vals.append(stats.multivariate_normal(Xi @ fit.fe_params.to_numpy(), cov)
                    .logpdf(te.y.to_numpy()))
    # two optimisers of the same REML criterion: agreement to optimiser precision
    np.testing.assert_allclose(cv.elpd_i, vals, rtol=1e-4)


@pytest.mark.parametrize("estimator", ["pooled", "random", "within"])
def test_reference_cv_equals_reference_module_holdout(design, estimator):
    """Consistency with the reference module's own hold-out scoring (a second, independent
    implementation of the plug-in densities). For Mundlak and within-between fits the two
    differ on purpose at the occasion level: ours keeps the unit means of the full sample
    (as the Bayesian PSIS terms do), the reference module's refit recomputes them without
    the held-out row."""
    ref = bp.reference.fit_design(design, estimator)
    cv = reference_cv(ref, "occasion")
    rows = range(0, design.n, 23)
    theirs = [bp.reference.exact_holdout(ref, [j], level="occasion")[0] for j in rows]
    np.testing.assert_allclose(cv.elpd_i[::23], theirs, rtol=1e-10)
    if estimator != "within":
        cvu = reference_cv(ref, "unit")
        th = [bp.reference.exact_holdout(ref, design.unit_codes == i, level="unit").iloc[0]
              for i in range(design.n_units)]
        np.testing.assert_allclose(cvu.elpd_i, th, rtol=1e-10)


def test_folds_spread_units_and_reference_kfold_equals_statsmodels_loop(design):
    import statsmodels.api as sm

    from bayespanel.analysis.loo.psis import _folds

    fd = _fd(design, np.zeros((1, 3)), np.ones(1), np.ones(1))
    fold = _folds(fd, "occasion", 6, seed=2)
    for i in range(design.n_units):   # each firm's 20 years spread over the 6 folds
        counts = np.bincount(fold[design.unit_codes == i], minlength=6)
        assert counts.max() - counts.min() <= 1
    unit_fold = _folds(fd, "unit", 5, seed=2)
    assert all(len(set(unit_fold[design.unit_codes == i])) == 1 for i in range(design.n_units))
    ref = bp.reference.pooled(design)
    cv = reference_cv(ref, "occasion", folds=6, seed=2)
    assert cv.method == "exact K-fold CV (K=6)"
    total = 0.0
    for k in range(6):   # hand-written grouped K-fold with statsmodels OLS
        te = fold == k
        fit = sm.OLS(design.y[~te], design.X[~te]).fit()
        total += stats.norm(design.X[te] @ fit.params, np.sqrt(fit.scale)).logpdf(
            design.y[te]).sum()
    assert cv.elpd == pytest.approx(total, rel=1e-10)


def test_loo_refuses_a_pointwise_matrix_too_large(design, fake_draws, monkeypatch):
    import bayespanel.analysis.loo.psis as psis

    b, sigma, tau = fake_draws
    monkeypatch.setattr(psis, "MAX_POINTWISE_BYTES", 1000)
    with pytest.raises(SpecificationError, match="subsample="):
        bp.loo.loo(_fd(design, b, sigma, tau), "occasion")
