"""errors="ar1" on the five Gaussian builders (design.md section 4b).

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
    A, a0 = model.scaling.coef_map()
    sy = model.scaling.scale_y
    ins = [pt.vector("b"), pt.scalar("sigma"), pt.scalar("rho")]
    repl = {m["coef_std"]: ins[0], m["sigma_obs_std"]: ins[1], m["rho"]: ins[2]}
    if "sigma_unit_std" in m.named_vars:
        ins.append(pt.scalar("tau"))
        repl[m["sigma_unit_std"]] = ins[3]
    fn = pytensor.function(ins, clone_replace(m["loglik"], repl), mode="FAST_COMPILE")
    fixed = model.unit_effects == "fixed"
    dims = model.stats.n - (model.stats.n_units if fixed else 0)

    def loglik(b, sigma, tau, rho):
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


def test_downstream_refuses_clearly(ar1_fit, tmp_path):
    for call in (lambda: ar1_fit.loo("occasion"), lambda: ar1_fit.loo("unit"),
                 lambda: ar1_fit.unit_effects(), lambda: ar1_fit.posterior_predictive(),
                 lambda: bp.compare({"a": ar1_fit, "b": ar1_fit}),
                 lambda: ar1_fit.model.sample_prior_predictive(),
                 lambda: ar1_fit.model.set_suffstats(ar1_fit.model.stats)):
        with pytest.raises(SpecificationError, match="errors='ar1'.*not available yet|"
                                                     "not available yet.*errors='ar1'"):
            call()
    from bayespanel.analysis import sensitivity
    with pytest.raises(SpecificationError, match="errors='ar1'"):
        sensitivity.power_scaling(ar1_fit)
    with pytest.raises(SpecificationError, match="errors='ar1'"):
        sensitivity.prior_presets(ar1_fit.model)
    with pytest.raises(SpecificationError, match="errors='ar1'"):
        B.RandomIntercept(PANEL, "y ~ x", errors="ar1", likelihood="latent")
    with pytest.raises(SpecificationError, match="errors='ar1'"):
        B.RandomIntercept(PANEL, "y ~ x", errors="ar1", family="poisson")
    path = tmp_path / "fit.nc"
    ar1_fit.save(path)
    back = bp.Posterior.load(path)
    assert back.spec.errors == "ar1"
    assert back.summary().loc["rho", "mean"] == pytest.approx(
        ar1_fit.summary().loc["rho", "mean"])
    with pytest.raises(SpecificationError, match="errors='ar1'"):
        back.loo("occasion")


def test_partitioned_source_refuses(tmp_path):
    FRAME.to_parquet(tmp_path / "part0.parquet", index=False)
    dp = bp.Panel.from_parquet(tmp_path, unit="unit", time="year", engine="dask",
                               client="synchronous")
    with pytest.raises(SpecificationError, match="errors='ar1'.*Dask|Dask.*errors='ar1'"):
        B.RandomIntercept(dp, "y ~ x", errors="ar1")
