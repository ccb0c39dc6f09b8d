"""A lagged outcome with its initial conditions (Wooldridge 2005, Journal of Applied
Econometrics 20(1)), against outside references.

The panel is simulated with a known lag coefficient and unit effects that are correlated
with the first outcome by construction (the process starts near its unit's own level):
``y_it = phi y_i,t-1 + beta x_it + c_i + e_it``, ``x_it`` correlated with ``c_i``.

- pooled least squares (statsmodels OLS, cluster-robust by unit) on the same rows is
  biased upward: the unit effect left in its error loads on the lagged outcome;
- the within estimator (linearmodels PanelOLS with entity effects) is biased downward
  (Nickell 1981, Econometrica 49(6)); on a pure AR(1) panel its bias is close to
  Nickell's limit ``-(1 + phi)/(T - 1)`` to first order;
- the initial-conditions model (this package) covers the truth.
"""

import warnings

import numpy as np
import pandas as pd
import pytest

import bayespanel as bp
from bayespanel.core.errors import DataHandlingWarning

PHI, BETA = 0.5, 1.0


def simulate(n_units=200, n_occasions=8, phi=PHI, beta=BETA, seed=0):
    """The dynamic panel described in the module docstring (our own scenario)."""
    rng = np.random.default_rng(seed)
    c = rng.normal(0.0, 1.0, n_units)
    rows = []
    for i in range(n_units):
        x = rng.normal(0.0, 1.0, n_occasions) + 0.5 * c[i]
        y = (c[i] + beta * 0.5 * c[i]) / (1 - phi) + rng.normal()  # near the unit's level
        rows.append((i, 0, y, x[0]))
        for t in range(1, n_occasions):
            y = phi * y + beta * x[t] + c[i] + rng.normal()
            rows.append((i, t, y, x[t]))
    return pd.DataFrame(rows, columns=["unit", "t", "y", "x"])


def _quiet(fn, *a, **k):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fn(*a, **k)


def _outside_fits(df, formula_rhs="lag_y + x"):
    """Pooled OLS (statsmodels) and the within estimator (linearmodels) on the rows that
    have a lag, the lag made with pandas groupby-shift (balanced panel: no gaps)."""
    import statsmodels.formula.api as smf
    from linearmodels.panel import PanelOLS

    d = df.sort_values(["unit", "t"]).assign(lag_y=lambda f: f.groupby("unit")["y"].shift(1))
    d = d.dropna()
    ols = smf.ols(f"y ~ {formula_rhs}", d).fit(cov_type="cluster",
                                               cov_kwds={"groups": d["unit"]})
    fe = PanelOLS.from_formula(f"y ~ {formula_rhs} + EntityEffects",
                               d.set_index(["unit", "t"])).fit()
    return ols.params["lag_y"], fe.params["lag_y"]


@pytest.fixture(scope="module")
def dynamic():
    df = simulate()
    panel = bp.Panel(df, unit="unit", time="t")
    model = _quiet(bp.RandomIntercept, panel, "y ~ lag(y) + x")
    post = model.sample(draws=150, tune=400, chains=2, seed=3, progress=False)
    return df, panel, model, post


def test_initial_conditions_model_covers_the_lag_while_pooled_and_within_are_biased(dynamic):
    df, panel, model, post = dynamic
    design = model.design
    assert design.terms == ["Intercept", "lag(y)", "x", "lag(y) (initial)", "x (unit mean)"]
    assert design.n == len(df) - df["unit"].nunique()     # the first occasion has no lag
    lo, hi = post.interval(0.95).loc["lag(y)"]
    assert lo < PHI < hi, (lo, hi)
    assert abs(post.coef["lag(y)"] - PHI) < 0.06
    x_lo, x_hi = post.interval(0.95).loc["x"]
    assert x_lo < BETA < x_hi
    pooled, within = _outside_fits(df)
    # the outside estimators beside it, with their biases (printed with -s)
    print(f"\nlag coefficient, truth {PHI}: initial conditions {post.coef['lag(y)']:.3f}, "
          f"pooled OLS {pooled:.3f} (bias {pooled - PHI:+.3f}), within {within:.3f} "
          f"(bias {within - PHI:+.3f})")
    assert pooled - PHI > 0.05          # biased upward, beyond sampling error (SE ~ 0.02)
    assert within - PHI < -0.05         # biased downward (Nickell 1981)
    assert hi < pooled and lo > within  # the truth's interval excludes both
    # the package's own within and pooled reference fits on the lag design equal them
    plain = _quiet(panel.design, "y ~ lag(y) + x", initial_conditions=False)
    ours_fe = bp.reference.within(plain, cov="classical").coef["lag(y)"]
    ours_pooled = bp.reference.pooled(plain, cov="cluster").coef["lag(y)"]
    assert ours_fe == pytest.approx(within, abs=1e-10)
    assert ours_pooled == pytest.approx(pooled, abs=1e-10)


def test_maximum_likelihood_reference_on_the_same_design_agrees(dynamic):
    # the posterior mode of the marginal model under flat priors is the ML random-effects
    # fit (DEVELOPERS.md identity); with 1,400 rows the posterior mean is close to it
    _, _, model, post = dynamic
    ml = bp.reference.random(model.design, method="ml")
    assert abs(ml.coef["lag(y)"] - post.coef["lag(y)"]) < 0.02
    assert abs(ml.coef["lag(y)"] - PHI) < 0.06


def test_within_bias_on_a_pure_ar1_panel_is_near_nickells_limit():
    # Nickell (1981, Econometrica 49(6)), to first order in 1/T: plim bias of the within
    # estimator of phi with fixed effects is about -(1 + phi)/(T - 1); his exact large-N
    # limit for T occasions (recalled from memory, eq. 18 there) is smaller in size:
    # -(1+phi)/(T-1) * A / (1 - 2 phi A / ((1 - phi)(T - 1))), A = 1 - (1-phi^T)/(T(1-phi))
    df = simulate(n_units=2000, n_occasions=8, beta=0.0, seed=5)
    T = 7  # estimation occasions per unit
    first = -(1 + PHI) / (T - 1)
    A = 1 - (1 - PHI ** T) / (T * (1 - PHI))
    exact = first * A / (1 - 2 * PHI * A / ((1 - PHI) * (T - 1)))
    _, within = _outside_fits(df, "lag_y")
    ours = bp.reference.within(_quiet(bp.Panel(df, unit="unit", time="t").design, "y ~ lag(y)",
                                      initial_conditions=False)).coef["lag(y)"]
    assert ours == pytest.approx(within, abs=1e-10)
    # the within estimate's SE here is about 0.008; both limits within 0.03 of the bias
    assert within - PHI == pytest.approx(exact, abs=0.03)
    assert within - PHI == pytest.approx(first, abs=0.03)


def test_switching_initial_conditions_off_says_so_and_changes_nothing_else():
    df = simulate(n_units=30, seed=2)
    panel = bp.Panel(df, unit="unit", time="t")
    with pytest.warns(DataHandlingWarning, match="Initial conditions are not handled"):
        plain = panel.design("y ~ lag(y) + x", initial_conditions=False)
    assert plain.terms == ["Intercept", "lag(y)", "x"] and plain.initial is None
    assert plain.spec.to_dict()["initial_conditions"] is False
    ic = _quiet(panel.design, "y ~ lag(y) + x")
    assert ic.spec.to_dict()["initial_conditions"] is True
    np.testing.assert_array_equal(ic.X[:, :3], plain.X)
    # the initial outcome is the lagged outcome on each unit's first estimation row, which
    # is the outcome at the unit's first occasion (pandas: the first row of each group)
    y0 = df.sort_values(["unit", "t"]).groupby("unit")["y"].first().to_numpy()
    np.testing.assert_array_equal(ic.X[ic.starts, 3], y0)
    xbar = df[df["t"] > 0].groupby("unit")["x"].mean().to_numpy()
    np.testing.assert_allclose(ic.X[ic.starts, 4], xbar, rtol=1e-12)
    # formulas without a lagged outcome keep their specification as it was
    assert "initial_conditions" not in _quiet(panel.design, "y ~ lag(x) + x").spec.to_dict()
    with pytest.raises(bp.errors.SpecificationError, match="initial_conditions"):
        panel.design("y ~ lag(y)", initial_conditions="no")


def test_what_each_kind_makes_of_the_design():
    df = simulate(n_units=40, seed=4)
    d = _quiet(bp.Panel(df, unit="unit", time="t").design, "y ~ lag(y) + x")
    cols = ["Intercept", "lag(y)", "x", "lag(y) (initial)", "x (unit mean)"]
    assert d.labels("random") == cols and d.labels("mundlak") == cols
    assert d.labels("within") == ["lag(y)", "x"]
    assert set(d.labels("within_between")) == {"Intercept", "x (within)", "lag(y)",
                                               "lag(y) (initial)", "x (between)"}
    # the within-between form is the same model: x (between) = x + x (unit mean)
    # (Mundlak 1978 identity, on the ML reference fits of both forms)
    ce = bp.reference.fit_design(d, "mundlak", method="ml")
    wb = bp.reference.fit_design(d, "within_between", method="ml")
    assert wb.coef["x (within)"] == pytest.approx(ce.coef["x"], abs=1e-6)
    assert wb.coef["lag(y)"] == pytest.approx(ce.coef["lag(y)"], abs=1e-6)
    assert wb.coef["x (between)"] == pytest.approx(ce.coef["x"] + ce.coef["x (unit mean)"],
                                                   abs=1e-6)
    with pytest.warns(DataHandlingWarning, match="Nickell"):
        bp.FixedEffects.from_design(d)
    with pytest.warns(DataHandlingWarning, match="biased upward"):
        bp.Pooled.from_design(d)


def test_ar1_errors_with_a_lagged_outcome_are_flagged():
    df = simulate(n_units=30, seed=6)
    d = _quiet(bp.Panel(df, unit="unit", time="t").design, "y ~ lag(y) + x")
    with pytest.warns(DataHandlingWarning, match="errors='ar1' with a lagged outcome"):
        bp.RandomIntercept.from_design(d, errors="ar1")


def test_reference_variance_partition_on_the_initial_conditions_design():
    # every kind with unit effects partitions its fit on this design (the within-between
    # columns keep the lagged outcome whole); the ICC is sigma_unit^2 / (sigma_unit^2 +
    # sigma_obs^2) of the fit (its definition), and the random-intercept and
    # correlated-effects forms, the same model here, partition alike
    from bayespanel.analysis.partition import reference_partition

    df = simulate(n_units=40, seed=4)
    d = _quiet(bp.Panel(df, unit="unit", time="t").design, "y ~ lag(y) + x")
    parts = {}
    for kind in ("random", "mundlak", "within_between"):
        ref = bp.reference.fit_design(d, kind, method="ml")
        parts[kind] = reference_partition(ref)
        icc = ref.sigma_unit ** 2 / (ref.sigma_unit ** 2 + ref.sigma_obs ** 2)
        assert float(parts[kind]["ICC"][0]) == pytest.approx(icc, rel=1e-9)
    for key, value in parts["random"].items():
        np.testing.assert_allclose(parts["mundlak"][key], value, rtol=1e-8)
