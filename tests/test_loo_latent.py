"""LOO and comparison of latent-effect (non-Gaussian) posteriors, and occasion labels.

Outside checks, named beside each:
* scipy.integrate.quad: the unit-level term of a Poisson random-intercept posterior at
  fixed parameters is the one-dimensional integral of the unit's Poisson likelihood
  (scipy.stats.poisson) against the normal intercept density (scipy.stats.norm).
* scipy.stats.poisson.logpmf: the occasion-level terms given the sampled intercepts.
* arviz_stats.loo: PSIS-LOO ELPD, SE, p_loo and Pareto k on the same log-likelihood arrays.
* The identity p(y_it | y_-it) = E[p(y_it | theta, u_i) | y_-it] (the rows are independent
  given theta and u_i): for a Gaussian random-intercept model with latent intercepts,
  PSIS on the factorised terms (scipy.stats.norm, arviz_stats.loo) agrees with PSIS on the
  closed-form conditional of Bürkner, Gabry and Vehtari (2021).
* The Grunfeld panel shipped by statsmodels names the occasions of high-Pareto-k points.
Simulated panels (known truth) are the only invented data.
"""

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats

import bayespanel as bp
from bayespanel.analysis.comparison import compare
from bayespanel.core.errors import SamplingWarning, SpecificationError
from bayespanel.bayes.posterior import Posterior

KW = dict(draws=200, tune=200, chains=2, seed=3, progress=False, sampler="pymc")


def _count_panel(n_units=16, n_occ=5, seed=4):
    """A simulated Poisson panel (known truth) with years as occasions."""
    rng = np.random.default_rng(seed)
    unit = np.repeat(np.arange(n_units), n_occ)
    x = rng.normal(0, 1, n_units)[unit] + rng.normal(0, 1, len(unit))
    u = rng.normal(0, 0.7, n_units)
    y = rng.poisson(np.exp(0.2 + 0.5 * x + u[unit]))
    return pd.DataFrame({"unit": [f"u{i:02d}" for i in unit],
                         "year": np.tile(np.arange(n_occ), n_units) + 2001,
                         "x": x, "y": y.astype(float)})


@pytest.fixture(scope="module")
def fits():
    panel = bp.Panel(_count_panel(), unit="unit", time="year")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = {"poisson": bp.models.RandomIntercept(panel, "y ~ x", family="poisson").sample(**KW),
               "negbin": bp.models.RandomIntercept(panel, "y ~ x",
                                                   family="negative_binomial").sample(**KW),
               "gauss": bp.models.RandomIntercept(panel, "y ~ x").sample(**KW)}
    return panel, out


def _loo(post, level):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SamplingWarning)
        return post.loo(level)


# ---------------------------------------------------------------------------- the terms
def test_unit_terms_equal_scipy_quad(fits):
    """log ∫ prod_t Poisson(y_it; exp(x_it'b + u)) N(u; 0, tau^2) du by scipy.integrate.quad
    equals the adaptive Gauss-Hermite term (default 15 nodes) at the same draw."""
    _, f = fits
    post = f["poisson"]
    ll = post.pointwise_loglik("unit").values
    M, y, codes = post.rows
    b, tau = post.draws("coef"), post.draws("sigma_unit")
    for c, d in ((0, 0), (1, 137)):
        for i in (0, 7, 15):
            rows = codes == i
            eta = M[rows] @ b[c, d]

            def logf(u):
                return (stats.poisson.logpmf(y[rows], np.exp(eta + u)).sum()
                        + stats.norm.logpdf(u, 0.0, tau[c, d]))

            lim = 12 * tau[c, d]   # the normal factor is below 1e-31 beyond
            grid = np.linspace(-lim, lim, 481)
            vals = [logf(g) for g in grid]
            top = max(vals)
            val, _ = integrate.quad(lambda u: np.exp(logf(u) - top), -lim, lim,
                                    points=[grid[int(np.argmax(vals))]], epsabs=0,
                                    epsrel=1e-11, limit=200)
            assert ll[c, d, i] == pytest.approx(np.log(val) + top, abs=1e-6), (c, d, i)


def test_occasion_terms_equal_scipy_logpmf(fits):
    """Occasion terms: scipy.stats.poisson.logpmf given each draw of the unit intercept."""
    _, f = fits
    post = f["poisson"]
    M, y, codes = post.rows
    b = post.draws("coef")
    u = post.draws("unit_effect")[..., 0]
    ref = stats.poisson.logpmf(y, np.exp(np.einsum("cdk,nk->cdn", b, M) + u[:, :, codes]))
    np.testing.assert_allclose(post.pointwise_loglik("occasion").values, ref, rtol=1e-10)


@pytest.mark.parametrize("level", ["unit", "occasion"])
def test_psis_equals_arviz_loo(fits, level):
    """ELPD, SE, p_loo and Pareto k equal arviz_stats.loo on the same log-likelihood array
    (with the posterior for the relative efficiency, as arviz does by default)."""
    import arviz_stats
    import xarray as xr

    _, f = fits
    post = f["poisson"]
    ll = post.pointwise_loglik(level).values
    dim = "unit" if level == "unit" else "row"
    dt = xr.DataTree.from_dict({
        "posterior": xr.DataTree(post.idata["posterior"].to_dataset()),
        "log_likelihood": xr.DataTree(xr.Dataset({"y": (("chain", "draw", dim), ll)}))})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        theirs = arviz_stats.loo(dt, var_name="y", pointwise=True)
    ours = _loo(post, level)
    assert ours.level == level and ours.family == "poisson"
    assert ours.elpd == pytest.approx(float(theirs.elpd), rel=1e-10)
    assert ours.se == pytest.approx(float(theirs.se), rel=1e-10)
    assert ours.p_loo == pytest.approx(float(theirs.p), rel=1e-8)
    np.testing.assert_allclose(ours.pareto_k, np.asarray(theirs.pareto_k), rtol=1e-10)
    if level == "unit":
        assert "quadrature" in ours.notes[0]
        assert list(ours.pointwise["unit"]) == list(post.units)
    else:
        assert any("factorised, conditional LOO" in n for n in ours.notes)
        assert list(ours.pointwise.columns[:5]) == ["position", "unit", "occasion", "row", "time"]
        assert ours.pointwise["time"].tolist()[:5] == [2001, 2002, 2003, 2004, 2005]


def test_latent_loo_refuses_refits_kfold_and_subsampling(fits):
    _, f = fits
    post = f["poisson"]
    with pytest.raises(SpecificationError, match=r"refit_high_k=True .*family='poisson'"):
        post.loo("unit", refit_high_k=True)
    with pytest.raises(SpecificationError, match="K-fold"):
        bp.loo.kfold(post, "unit", K=4)
    with pytest.raises(SpecificationError, match="sub-sampled"):
        post.loo("occasion", subsample=20)


# ---------------------------------------------------------------------------- comparison
@pytest.mark.parametrize("level", ["unit", "occasion"])
def test_compare_ranks_count_families(fits, level):
    """Poisson against negative binomial: the table's differences and their paired SE by
    hand (Vehtari, Gelman and Gabry 2017, section 5.2); stacking weights sum to one."""
    _, f = fits
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tab = compare({"Poisson": f["poisson"], "NB": f["negbin"]}, level=level)
    lo = {n: _loo(f[k], level).elpd_i for n, k in (("Poisson", "poisson"), ("NB", "negbin"))}
    best, other = tab.index[0], tab.index[1]
    d = lo[other] - lo[best]
    assert tab.loc[other, "elpd_diff"] == pytest.approx(d.sum(), rel=1e-10)
    assert tab.loc[other, "se_diff"] == pytest.approx(np.sqrt(len(d) * np.var(d, ddof=1)),
                                                      rel=1e-10)
    assert tab["weight"].sum() == pytest.approx(1.0, abs=1e-6)
    assert (tab["method"] == "PSIS-LOO").all()
    assert tab["n_points"].iloc[0] == (16 if level == "unit" else 80)
    if level == "occasion":
        assert tab["note"].str.contains("factorised, conditional LOO").all()


def test_compare_refuses_other_scales_outcomes_and_rows(fits):
    panel, f = fits
    for level in ("unit", "occasion"):
        with pytest.raises(SpecificationError, match=r"'P' \(poisson\) give log probabilities"):
            compare({"P": f["poisson"], "G": f["gauss"]}, level=level)
    # a LOOResult carries its family, so precomputed results are checked as well
    with pytest.raises(SpecificationError, match="different scales"):
        compare({"P": _loo(f["poisson"], "unit"), "G": f["gauss"]}, level="unit")
    # same rows, another outcome (reference fits: statsmodels-free closed forms, cheap)
    with pytest.raises(SpecificationError, match=r"'other' \('x'\) does not model the same "
                                                 r"outcome as 'G' \('y'\)"):
        compare({"G": f["gauss"], "other": bp.reference.pooled(panel, "x ~ y")})
    fewer = bp.Panel(panel.data.iloc[1:], unit="unit", time="year")
    with pytest.raises(SpecificationError, match="not fitted on the same rows"):
        compare({"G": f["gauss"], "short": bp.reference.pooled(fewer, "y ~ x")})


@pytest.mark.slow
def test_factorised_and_closed_form_occasion_loo_agree():
    """Both occasion-level estimators target p(y_it | y_-it): for a Gaussian random
    intercept sampled with latent intercepts, PSIS on log N(y_it; x'b + u_i, sigma^2)
    (scipy.stats.norm, arviz_stats.loo) agrees with our PSIS on the closed-form conditional
    (Bürkner, Gabry and Vehtari 2021) to a tenth of the ELPD's SE on the demo panel (about
    seven occasions per unit; with three per unit the gap can reach a quarter of an SE,
    docs/comparison.md)."""
    import arviz_stats
    import xarray as xr

    df, truth = bp.datasets.clinic_panel(seed=2026)
    panel = bp.Panel(df, unit=truth["unit"], time=truth["time"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        post = bp.models.RandomIntercept(panel, truth["formula"], likelihood="latent").sample(
            draws=500, tune=400, chains=2, seed=5, progress=False, sampler="pymc")
        closed = post.loo("occasion")
        M, y, codes = post.rows
        b, s, u = post.draws("coef"), post.draws("sigma_obs"), post.draws("unit_effect")
        ll = stats.norm.logpdf(y, np.einsum("cdk,nk->cdn", b, M) + u[:, :, codes],
                               s[..., None])
        dt = xr.DataTree.from_dict({
            "posterior": xr.DataTree(post.idata["posterior"].to_dataset()),
            "log_likelihood": xr.DataTree(xr.Dataset({"y": (("chain", "draw", "row"), ll)}))})
        factorised = arviz_stats.loo(dt, var_name="y", pointwise=True)
    d = np.asarray(factorised.elpd_i) - closed.elpd_i
    # Both carry Monte Carlo and PSIS error, so the yardstick is the ELPD's own SE: the two
    # agree to a tenth of it (measured: 0.6 of 10.9 on 242 rows), while the in-sample
    # optimism that the reweighting removes from the factorised terms (their p_loo, about
    # 34 here, against 3.4 for the closed form) is fifty times larger than the gap.
    assert abs(d.sum()) < 0.1 * closed.se
    assert abs(d.sum()) < 0.05 * float(factorised.p)
    assert np.abs(d).max() < 0.25


# ---------------------------------------------------------------------------- occasion labels
def test_time_labels_survive_save_and_load(fits, tmp_path):
    """Gaussian and latent posteriors keep the design's occasion labels (and the Panel's row
    labels) through the NetCDF round trip; LOO tables show them after loading."""
    panel, f = fits
    design = panel.design("y ~ x")
    for key in ("gauss", "poisson"):
        post = f[key]
        np.testing.assert_array_equal(post.time, design.time)
        path = tmp_path / f"{key}.nc"
        post.save(path)
        back = Posterior.load(path)
        assert type(back) is type(post)
        np.testing.assert_array_equal(back.time, design.time)
        np.testing.assert_array_equal(back.row_labels, np.asarray(design.rows))
        a, b = _loo(post, "occasion").pointwise, _loo(back, "occasion").pointwise
        pd.testing.assert_frame_equal(a, b)
        assert b["time"].tolist() == design.time.tolist()
    # text and datetime occasions too
    post = f["gauss"]
    for labels in (np.array([f"wave {t - 2000}" for t in design.time], dtype=object),
                   pd.to_datetime([f"{t}-06-30" for t in design.time]).to_numpy()):
        post.time = labels
        post.save(tmp_path / "labels.nc")
        np.testing.assert_array_equal(Posterior.load(tmp_path / "labels.nc").time, labels)
    post.time = design.time


def test_high_pareto_k_warning_names_unit_and_time_label(grunfeld):
    """Draws chosen so that PSIS is unreliable for one row (an outlier in the Grunfeld panel
    from statsmodels' datasets): the warning and the notes name its firm and year, or its
    position within the firm when the design's labels are not known."""
    design = bp.Panel(grunfeld, unit="firm", time="year").design("invest ~ value + capital")
    y = design.y.copy()
    j = int(np.flatnonzero(design.unit_codes == 3)[7])
    y[j] += 4000.0   # far outside the fit
    rng = np.random.default_rng(0)
    S = 400
    b = np.array([-43.0, 0.116, 0.23]) + rng.normal(0, [0.5, 0.001, 0.002], (S, 3))
    common = dict(kind="pooled", unit_effects="none", labels=design.terms, M=design.X, y=y,
                  codes=design.unit_codes, coef=b, sigma=94.0 * np.exp(rng.normal(0, 0.05, S)),
                  units=design.units)
    named = bp.loo.from_draws(**common, time=design.time, unit_name="firm", time_name="year")
    unit, year = design.units[3], int(design.time[j])
    with pytest.warns(SamplingWarning, match=rf"firm='{unit}', year={year}"):
        res = bp.loo.loo(named, "occasion", reff=1.0)
    assert res.high_k["time"].tolist() == [year]
    assert any(f"firm='{unit}', year={year}" in n for n in res.notes)
    bare = bp.loo.from_draws(**common)
    with pytest.warns(SamplingWarning, match=rf"{unit}, occasion 8"):
        bp.loo.loo(bare, "occasion", reff=1.0)
