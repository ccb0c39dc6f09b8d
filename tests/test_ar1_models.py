"""errors="ar1" on the five Gaussian builders (docs/serial-correlation.md; bayespanel.core.ar1).

Checks against outside references: each builder's compiled log-likelihood equals the sum
over units of scipy.stats.multivariate_normal log-densities with the dense AR(1) plus
random-intercept covariance (pooled: no intercept; fixed effects: the dense density of the
within-transformed rows ``H_i' r_i``, ``H_i`` an orthonormal basis of the contrasts from
scipy.linalg.null_space). Columns of the reference are built here with pandas, not by the
package's design code. The panel is a random draw, not data: unbalanced, with gaps and
one-row units. A short sampling run on a panel simulated with rho = 0.7 checks that the
posterior of rho covers it.
"""

import numpy as np
import pandas as pd
import pytest
import pytensor
import pytensor.tensor as pt
from pytensor.graph.replace import clone_replace
from scipy import linalg, stats

import bayespanel as bp
from bayespanel.core.errors import DataHandlingWarning, SpecificationError
from bayespanel.bayes import builders as B


def _frame(seed=3, n_units=14, integer=True):
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n_units):
        T = 1 if i % 6 == 0 else int(rng.integers(2, 8))         # one-row units included
        if integer:
            t = np.sort(rng.choice(11, size=T, replace=False)) + 2000   # gaps
        else:
            t = np.round(np.cumsum(rng.uniform(0.4, 2.0, size=T)), 3)
        z = rng.normal()
        for tt in t:
            x = rng.normal() + 0.5 * z
            rows.append(dict(unit=f"u{i:02d}", year=tt, x=x, z=z,
                             y=1.0 + 0.8 * x - 0.5 * z + rng.normal()))
    return pd.DataFrame(rows).sample(frac=1.0, random_state=seed)   # rows in any order


FRAME = _frame()
PANEL = bp.Panel(FRAME, "unit", "year")


def _columns(df):
    """Every column a builder may use, by its label, built here with pandas."""
    xbar = df.groupby("unit")["x"].transform("mean")
    return {"Intercept": np.ones(len(df)), "x": df["x"].to_numpy(), "z": df["z"].to_numpy(),
            "x (within)": (df["x"] - xbar).to_numpy(), "x (between)": xbar.to_numpy(),
            "x (unit mean)": xbar.to_numpy()}


def _dense(df, labels, b, sigma, tau, rho):
    """Sum over units of scipy's multivariate normal log-density; ``tau=None``: the
    within-transformed rows of every unit with two rows or more."""
    cols = _columns(df)
    r = df["y"].to_numpy() - np.column_stack([cols[lab] for lab in labels]) @ b
    total = 0.0
    for _, idx in df.groupby("unit").indices.items():
        t = df["year"].to_numpy()[idx]
        o = np.argsort(t)
        t, ri = t[o], r[idx][o]
        C = sigma ** 2 * rho ** np.abs(t[:, None] - t[None, :])
        if tau is None:
            if len(t) == 1:
                continue
            H = linalg.null_space(np.ones((1, len(t))))
            total += stats.multivariate_normal(np.zeros(len(t) - 1), H.T @ C @ H).logpdf(H.T @ ri)
        else:
            total += stats.multivariate_normal(np.zeros(len(t)), C + tau ** 2).logpdf(ri)
    return total


def _model_loglik(model):
    """The model's log-likelihood term, compiled once, as a function of data-scale
    parameters ``(b, sigma, tau, rho)`` mapped back to the data scale (the graph works on
    standardised columns: the density of ``y / s_y`` is that of ``y`` times ``s_y`` per
    dimension)."""
    m = model.pymc_model
    ins = [pt.vector("b"), pt.scalar("sigma"), pt.scalar("rho")]
    repl = {m["coef_std"]: ins[0], m["sigma_obs_std"]: ins[1], m["rho"]: ins[2]}
    if "sigma_unit_std" in m.named_vars:
        ins.append(pt.scalar("tau"))
        repl[m["sigma_unit_std"]] = ins[3]
    fn = pytensor.function(ins, clone_replace(m["loglik"], repl), mode="FAST_COMPILE")
    fixed = model.unit_effects == "fixed"
    dims = model.stats.n - (model.stats.n_units if fixed else 0)

    def loglik(b, sigma, tau, rho):
        A, a0 = model.scaling.coef_map()          # read now: set_suffstats may change it
        sy = model.scaling.scale_y
        args = [np.linalg.solve(A, b - a0), sigma / sy, rho]
        if len(ins) == 4:
            args.append(tau / sy)
        return float(fn(*args)) - dims * np.log(sy)
    return loglik


POINTS = [(1.3, 0.7, 0.6), (0.8, 1.1, -0.45), (2.0, 0.3, 0.93)]   # sigma, tau, rho


@pytest.mark.parametrize("name", list(B.BUILDERS))
def test_builder_loglik_equals_dense_normal(name):
    cls = B.BUILDERS[name]
    with pytest.warns(DataHandlingWarning) if name == "FixedEffects" else _nothing():
        model = cls(PANEL, "y ~ x + z", errors="ar1")
    assert model.spec.errors == "ar1" and "rho" in model.priors
    rng = np.random.default_rng(7)
    loglik = _model_loglik(model)
    for sigma, tau, rho in POINTS:
        b = rng.normal(size=len(model.labels))
        t = {"none": 0.0, "random": tau, "fixed": None}[model.unit_effects]
        got = loglik(b, sigma, t, rho)
        want = _dense(FRAME, model.labels, b, sigma, t, rho)   # scipy, dense
        assert got == pytest.approx(want, rel=1e-9, abs=1e-8)


class _nothing:
    def __enter__(self):
        return self

    def __exit__(self, *a):
        return False


def test_iid_default_unchanged():
    m = B.RandomIntercept(PANEL, "y ~ x + z")
    assert m.errors == "iid" and "rho" not in m.priors
    assert "errors" not in m.spec.to_dict()          # the specification keeps its old form
    assert "rho" not in m.pymc_model.named_vars
    with pytest.raises(SpecificationError, match="errors='ar1'"):
        B.RandomIntercept(PANEL, "y ~ x", priors={"rho": "uniform"})
    with pytest.raises(SpecificationError, match="errors="):
        B.RandomIntercept(PANEL, "y ~ x", errors="ar2")
    # the latent options take errors="iid" like the builders (it was a TypeError)
    assert B.RandomIntercept(PANEL, "y ~ x", random_slopes=["x"], errors="iid").errors == "iid"


def test_rho_prior_changeable_and_non_integer_gaps():
    m = B.Pooled(PANEL, "y ~ x", errors="ar1",
                 priors={"rho": bp.models.Prior("uniform", lower=0.0, upper=0.99)})
    assert m.priors["rho"].kwargs == {"lower": 0.0, "upper": 0.99}
    with pytest.raises(SpecificationError, match="lower < upper"):
        B.Pooled(PANEL, "y ~ x", errors="ar1", priors={"rho": {"family": "uniform", "lower": 0.5,
                                                                "upper": 0.2}})
    with pytest.raises(SpecificationError, match="does not fit"):
        B.Pooled(PANEL, "y ~ x", errors="ar1", priors={"rho": "normal"})
    odd = bp.Panel(_frame(integer=False), "unit", "year")
    m = B.RandomIntercept(odd, "y ~ x", errors="ar1")
    assert m.priors["rho"].kwargs == {"lower": 0.0, "upper": 1.0}   # rho^gap needs rho >= 0
    with pytest.raises(SpecificationError, match="not whole numbers"):
        B.RandomIntercept(odd, "y ~ x", errors="ar1", priors={"rho": "uniform"})


def _simulated(rho, N=30, T=8, seed=11):
    """A balanced panel with AR(1) errors (stationary start), unit SD 1, error SD 1."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(N):
        u = rng.normal()
        e = rng.normal()
        for t in range(T):
            if t:
                e = rho * e + np.sqrt(1 - rho ** 2) * rng.normal()
            x = rng.normal()
            rows.append(dict(unit=i, year=t, x=x, y=0.5 + 1.0 * x + u + e))
    return bp.Panel(pd.DataFrame(rows), "unit", "year")


@pytest.fixture(scope="module")
def ar1_fit():
    model = B.RandomIntercept(_simulated(0.7), "y ~ x", errors="ar1")
    return model.sample(draws=400, tune=400, chains=2, seed=5, progress=False)


def test_sampled_rho_covers_truth(ar1_fit):
    s = ar1_fit.summary(prob=0.9)
    assert "rho" in s.index
    lo, hi = s.loc["rho"].iloc[2], s.loc["rho"].iloc[3]
    assert lo < 0.7 < hi                                  # simulated truth
    assert s.loc["x", "mean"] == pytest.approx(1.0, abs=0.15)
    d = ar1_fit.diagnostics(warn=False)
    assert d["max_rhat"] < 1.05 and d["divergences"] == 0
    part = ar1_fit.variance_partition()
    lag = part.draws["correlation one step apart"].to_numpy()
    tau, sig, rho = (ar1_fit._flat(n) for n in ("sigma_unit", "sigma_obs", "rho"))
    np.testing.assert_allclose(lag, (tau ** 2 + rho * sig ** 2) / (tau ** 2 + sig ** 2))
    np.testing.assert_allclose(part.draws["ICC"], tau ** 2 / (tau ** 2 + sig ** 2))
    assert part.draws.filter(like="theta").isna().all().all()


def test_what_still_refuses_says_so(ar1_fit):
    with pytest.raises(SpecificationError, match="errors='ar1'"):
        B.RandomIntercept(PANEL, "y ~ x", errors="ar1", likelihood="latent")
    with pytest.raises(SpecificationError, match="errors='ar1'"):
        B.RandomIntercept(PANEL, "y ~ x", errors="ar1", family="poisson")
    # the design check runs AR(1) models (tests/test_design_check_ar1.py); its truth needs rho
    with pytest.raises(SpecificationError, match="truth needs 'rho'"):
        bp.design_check(None, ar1_fit.model, replicates=2, bayes=False,
                        truth={"coef": dict.fromkeys(ar1_fit.model.labels, 0.0),
                               "sigma_unit": 1.0, "sigma_obs": 1.0})
    with pytest.raises(SpecificationError, match="rows="):
        ar1_fit.model.set_suffstats(ar1_fit.model.stats)       # AR(1) needs the rows
    M, y, codes = ar1_fit.model.rows
    keep = np.arange(len(y)) != 3                              # another link structure
    with pytest.raises(SpecificationError, match="link structure"):
        ar1_fit.model.set_suffstats(ar1_fit.model.stats,
                                    rows=(M[keep], y[keep], codes[keep]),
                                    time=ar1_fit.model.ar1_time[keep])


# ---------------------------------------------------------------------------- downstream
def _unit_blocks(df, labels, b):
    """Per unit (sorted by label): times and residuals in time order, from pandas columns."""
    cols = _columns(df)
    r = df["y"].to_numpy() - np.column_stack([cols[lab] for lab in labels]) @ b
    out = []
    for _, idx in sorted(df.groupby("unit").indices.items()):
        o = np.argsort(df["year"].to_numpy()[idx])
        out.append((df["year"].to_numpy()[idx][o].astype(float), r[idx][o], idx[o]))
    return out


@pytest.mark.parametrize("name", ["RandomIntercept", "Pooled", "FixedEffects"])
def test_pointwise_terms_equal_dense_normal(name):
    # unit level: scipy's dense multivariate normal of each unit's rows; occasion level:
    # numpy's conditional normal of each row given the unit's other rows (Schur
    # complement; fixed effects: the flat-prior GLS conditional). Draws made up (no
    # sampling), on the unbalanced panel with gaps and one-row units.
    from bayespanel.analysis import loo as L

    cls = B.BUILDERS[name]
    with pytest.warns(DataHandlingWarning) if name == "FixedEffects" else _nothing():
        model = cls(PANEL, "y ~ x + z", errors="ar1")
    rng = np.random.default_rng(4)
    S, k = 3, len(model.labels)
    b = rng.normal(size=(S, k))
    sigma, rho = np.array([1.2, 0.8, 1.0]), np.array([0.6, -0.4, 0.9])
    tau = {"random": np.array([0.7, 1.3, 0.4]), "none": None, "fixed": None}[model.unit_effects]
    M, y, codes = model.rows
    fd = L.from_draws(kind=model.kind, unit_effects=model.unit_effects, labels=model.labels,
                      M=M, y=y, codes=codes, coef=b, sigma=sigma, tau=tau, rho=rho,
                      ar1_time=model.ar1_time)
    occ = L.pointwise_loglik(fd, "occasion")[0]
    unit = L.pointwise_loglik(fd, "unit")[0] if model.unit_effects != "fixed" else None
    design = model.design
    df = FRAME.loc[design.rows]                    # the estimation rows, in model order
    for s in range(S):
        t_s = None if tau is None else tau[s]
        for j, (t, r, idx) in enumerate(_unit_blocks(df, model.labels, b[s])):
            C = sigma[s] ** 2 * rho[s] ** np.abs(t[:, None] - t[None, :])
            if model.unit_effects == "fixed":
                if len(t) == 1:
                    assert np.isnan(occ[s, idx]).all()
                    continue
                for a in range(len(t)):
                    o = np.delete(np.arange(len(t)), a)
                    one = np.ones(len(o))
                    w = np.linalg.solve(C[np.ix_(o, o)], one)
                    u_hat, u_var = w @ r[o] / (w @ one), 1.0 / (w @ one)
                    kk = np.linalg.solve(C[np.ix_(o, o)], C[o, a])
                    lead = 1.0 - kk @ one
                    mean = lead * u_hat + kk @ r[o]
                    var = C[a, a] - C[a, o] @ kk + lead ** 2 * u_var
                    assert occ[s, idx[a]] == pytest.approx(
                        stats.norm(mean, np.sqrt(var)).logpdf(r[a]), abs=1e-9)
                continue
            C = C + (t_s or 0.0) ** 2
            assert unit[s, j] == pytest.approx(
                stats.multivariate_normal(np.zeros(len(t)), C).logpdf(r), abs=1e-9)
            for a in range(len(t)):
                o = np.delete(np.arange(len(t)), a)
                kk = np.linalg.solve(C[np.ix_(o, o)], C[o, a]) if len(o) else np.zeros(0)
                mean, var = kk @ r[o], C[a, a] - C[a, o] @ kk
                assert occ[s, idx[a]] == pytest.approx(
                    stats.norm(mean, np.sqrt(var)).logpdf(r[a]), abs=1e-9)


def test_unit_effects_follow_the_dense_conditional(ar1_fit):
    # u_i | y, theta is normal with mean tau^2 1'Sigma_i^-1 r_i and variance
    # tau^2 - tau^4 1'Sigma_i^-1 1 (numpy's dense Gaussian update). Over the draws the mean
    # of the sampled effects equals the mean of those conditional means within Monte
    # Carlo error (4 SE of the average of 800 draws), and their SD the mixture's SD.
    ue = ar1_fit.unit_effects(seed=2)
    assert ue.dims == ("chain", "draw", "unit") and ue.shape[-1] == 30
    u = ue.values.reshape(-1, 30)
    b, sig, tau, rho = (ar1_fit._flat(n) for n in ("coef", "sigma_obs", "sigma_unit", "rho"))
    M, y, codes = ar1_fit.rows
    times = ar1_fit.ar1_time
    cond_mean = np.empty_like(u)
    cond_var = np.empty_like(u)
    for i in range(30):
        rows = np.flatnonzero(codes == i)
        t = times[rows]
        R = rho[:, None, None] ** np.abs(t[:, None] - t[None, :])
        C = sig[:, None, None] ** 2 * R + tau[:, None, None] ** 2
        r = y[rows][None, :] - b @ M[rows].T
        w = np.linalg.solve(C, np.ones((len(b), len(t), 1)))[..., 0]
        cond_mean[:, i] = tau ** 2 * np.einsum("st,st->s", w, r)
        cond_var[:, i] = tau ** 2 - tau ** 4 * w.sum(axis=1)
    total_sd = np.sqrt(cond_var.mean(axis=0) + cond_mean.var(axis=0))
    se = total_sd / np.sqrt(len(u))
    assert np.all(np.abs(u.mean(axis=0) - cond_mean.mean(axis=0)) < 4 * se)
    np.testing.assert_allclose(u.std(axis=0), total_sd, rtol=0.15)
    # a selection of units and thinning see the same numbers (as for iid errors)
    sub = ar1_fit.unit_effects(seed=2, units=[3, 7], thin=2)
    np.testing.assert_allclose(sub.values, ue.values[:, ::2][..., [3, 7]])


def test_predictive_draws_loo_and_sensitivity_work(ar1_fit, tmp_path):
    # plumbing of what refused before: predictive draws, PSIS-LOO at both levels (terms
    # checked against scipy above), power-scaling and save/load with the occasions
    from bayespanel.analysis import sensitivity

    pp = ar1_fit.posterior_predictive(thin=4)
    assert pp.shape == (2, 100, ar1_fit.n_obs) and np.isfinite(pp.values).all()
    prior = ar1_fit.model.sample_prior_predictive(draws=30)
    assert "rho" in prior["prior"] and prior["prior_predictive"]["y"].shape[-1] == ar1_fit.n_obs
    occ, unit = ar1_fit.loo("occasion"), ar1_fit.loo("unit")
    assert len(occ.pointwise) == ar1_fit.n_obs and len(unit.pointwise) == 30
    assert np.isfinite([occ.elpd, unit.elpd]).all()
    sub = ar1_fit.loo("occasion", subsample=60, seed=1)      # difference estimator
    assert abs(sub.elpd - occ.elpd) < 3 * sub.subsampling_se + 1e-9
    ps = sensitivity.power_scaling(ar1_fit)
    assert "rho" in ps.index and ps.loc["rho", "prior"] == pytest.approx(0.0, abs=1e-6) \
        or ps.loc["rho", "prior"] < 0.05
    path = tmp_path / "fit.nc"
    ar1_fit.save(path)
    back = bp.Posterior.load(path)
    assert back.spec.errors == "ar1"
    np.testing.assert_array_equal(back.ar1_time, ar1_fit.ar1_time)
    assert back.loo("occasion").elpd == pytest.approx(occ.elpd, rel=1e-12)


def test_same_rows_new_outcome_swaps_into_the_compiled_model(ar1_fit):
    # the design check and repeated fits swap a new outcome on the same rows into the
    # compiled graph (set_suffstats); the graph's log-likelihood is then scipy's dense
    # density of the new outcome
    from bayespanel.core import suffstats

    model = B.RandomIntercept(_simulated(0.7), "y ~ x", errors="ar1")
    loglik = _model_loglik(model)
    M, y, codes = model.rows
    y2 = y + np.random.default_rng(9).normal(size=len(y))
    old = (model.stats, model.rows)
    model.set_suffstats(suffstats.compute(M, y2, codes), rows=(M, y2, codes))
    df = pd.DataFrame({"unit": codes, "year": model.ar1_time, "x": M[:, 1], "z": 0.0, "y": y2})
    b, sigma, tau, rho = np.array([0.4, 0.9]), 1.1, 0.8, 0.6
    assert loglik(b, sigma, tau, rho) == pytest.approx(_dense(df, ["Intercept", "x"], b, sigma,
                                                              tau, rho), rel=1e-9)
    model.set_suffstats(*old[:1], rows=old[1])


def test_partitioned_source_gives_the_in_memory_statistics(tmp_path):
    # a Parquet panel in two files cut inside a unit (read by Dask): the model's AR(1)
    # statistics equal those of the same rows in memory (checked against scipy's dense
    # density above); the wage panel's version is tests/test_dask_ar1.py
    rows = FRAME.sort_values(["unit", "year"])
    rows.iloc[:11].to_parquet(tmp_path / "part0.parquet", index=False)
    rows.iloc[11:].to_parquet(tmp_path / "part1.parquet", index=False)
    dp = bp.Panel.from_parquet(tmp_path, unit="unit", time="year", engine="dask",
                               client="synchronous")
    a, b = B.RandomIntercept(dp, "y ~ x", errors="ar1"), B.RandomIntercept(PANEL, "y ~ x",
                                                                          errors="ar1")
    A, M = a.ar1_stats.arrays(), b.ar1_stats.arrays()
    for key in ("first", "link_start", "link_end", "link_cross"):
        np.testing.assert_allclose(A[key], M[key], rtol=1e-10, atol=1e-12)


@pytest.mark.slow
def test_psis_loo_matches_exact_refits(ar1_fit):
    # PSIS-LOO (Vehtari, Gelman and Gabry 2017) against brute force: the model refitted
    # without the point, scored by log mean_s p(point | rest, theta_s) with the held-out
    # densities checked against numpy's dense conditional normal in
    # test_ar1_downstream.py. Tolerance: 4 Monte Carlo SE of the refit's estimate (the SD
    # of p / mean p over the draws, with half the draws taken as effective) plus 0.02 for
    # PSIS's own error.
    from scipy.special import logsumexp

    from bayespanel.analysis import loo as L

    fd = L.from_posterior(ar1_fit)
    for level, j in (("occasion", 17), ("unit", 4)):
        psis = ar1_fit.loo(level).pointwise["elpd"].to_numpy()[j]
        test = (fd.codes == j) if level == "unit" else (np.arange(fd.n) == j)
        refit = L.refit_draws(fd, ~test, draws=400, tune=400, chains=2, seed=7)
        ll = L.holdout_loglik(fd.M, fd.y, fd.codes, test, *refit.flat(), level,
                              rho=refit.flat_rho(), time=fd.ar1_time)[:, 0]
        exact = logsumexp(ll) - np.log(len(ll))
        w = np.exp(ll - ll.max())
        se = w.std() / w.mean() / np.sqrt(len(ll) / 2)
        assert abs(psis - exact) < 4 * se + 0.02, (level, psis, exact, se)
