"""Occasion effects on every builder: labels, their shared prior, within and between parts
in balanced and unbalanced panels, and the figure over occasions.

Outside sources, named beside each check:

* the Grunfeld investment panel shipped by statsmodels.datasets (made unbalanced by
  dropping rows);
* two-way fixed effects from linearmodels' PanelOLS (entity and time effects) and from
  statsmodels OLS with unit and year dummies (least squares with dummy variables);
* the identity that correlated random effects with the unit means of the occasion
  indicators reproduce two-way fixed effects in unbalanced panels (Wooldridge 2019,
  Journal of Econometrics 211, 137-150).
"""

import warnings

import numpy as np
import pandas as pd
import pytest

import bayespanel as bp
from bayespanel.core.errors import SpecificationError
from bayespanel.bayes import Prior
from bayespanel.analysis.occasions import occasion_effects, occasion_effects_figure

FORMULA = "invest ~ value + capital"
DROP = [3, 17, 30, 44, 45, 61]


@pytest.fixture(scope="module")
def frames(grunfeld):
    df = grunfeld[grunfeld["year"] <= 1941].reset_index(drop=True)
    return df, df.drop(index=DROP).reset_index(drop=True)


@pytest.fixture(scope="module")
def panels(frames):
    bal, unb = frames
    return (bp.Panel(bal, unit="firm", time="year"), bp.Panel(unb, unit="firm", time="year"))


@pytest.fixture(scope="module")
def two_way(frames):
    """Two-way fixed effects on the unbalanced panel: linearmodels PanelOLS for the slopes,
    statsmodels OLS with firm and year dummies for the slopes and the year effects."""
    import statsmodels.formula.api as smf
    from linearmodels.panel import PanelOLS

    _, unb = frames
    d = unb.set_index(["firm", "year"])
    lm = PanelOLS(d["invest"], d[["value", "capital"]], entity_effects=True,
                  time_effects=True).fit()
    ols = smf.ols("invest ~ value + capital + C(firm) + C(year)", data=unb).fit()
    return lm, ols


@pytest.mark.parametrize("name", sorted(bp.models.BUILDERS))
def test_every_builder_takes_occasion_effects(name, panels):
    bal, unb = panels
    cls = bp.models.BUILDERS[name]
    years = [1936, 1937, 1938, 1939, 1940, 1941]
    for panel, balanced in ((bal, True), (unb, False)):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            m = cls(panel, FORMULA, occasion_effects=True)
        occ = [lab for lab in m.labels if lab.startswith("occasion[")]
        if cls.kind in ("within_between", "mundlak"):
            suffix = " (within)" if cls.kind == "within_between" else ""
            assert occ[:6] == [f"occasion[{y}]{suffix}" for y in years]
            # balanced: the unit means of the indicators are equal for every unit (a
            # multiple of the intercept), so there is no between part to estimate;
            # unbalanced: those that are not linear combinations of the others are kept
            # and the unit-level columns have full rank
            M, labels = m.rows[0], m.labels
            between = [j for j, lab in enumerate(labels) if lab.startswith("occasion[")
                       and lab.endswith(("(between)", "(unit mean)"))]
            assert (len(between) == 0) if balanced else (len(between) > 0)
            assert np.linalg.matrix_rank(M) == M.shape[1]
        else:
            assert occ == [f"occasion[{y}]" for y in years]


def test_occasion_effects_share_one_prior(panels):
    _, unb = panels
    wide = Prior("normal", mu=0.0, sigma=1e4)
    m = bp.models.WithinBetween(unb, FORMULA, occasion_effects=True,
                                priors={"occasion": wide, "occasion[1941] (within)": "student_t"})
    occ = [lab for lab in m.labels if lab.startswith("occasion[")]
    for lab in occ:
        if lab == "occasion[1941] (within)":
            assert m.priors[lab].family == "student_t"  # a named term beats the group
        else:
            assert m.priors[lab] == wide
    assert m.priors["value (within)"].family == "normal"
    assert m.priors["value (within)"] != wide
    with pytest.raises(SpecificationError, match="'occasion'"):
        bp.models.RandomIntercept(unb, FORMULA, priors={"occasion": wide})


def test_reference_fits_reproduce_two_way_fixed_effects(panels, two_way):
    # linearmodels PanelOLS (entity + time effects) and statsmodels LSDV on the
    # unbalanced panel; Wooldridge (2019): Mundlak with the unit means of the occasion
    # indicators gives the same within slopes
    _, unb = panels
    lm, ols = two_way
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fe = bp.reference.within(unb, FORMULA, occasion_effects=True)
        mu = bp.reference.mundlak(unb, FORMULA, occasion_effects=True, method="reml")
        wb = bp.reference.within_between(unb, FORMULA, occasion_effects=True, method="reml")
    for x in ("value", "capital"):
        assert fe.coef[x] == pytest.approx(lm.params[x], rel=1e-8)
        assert mu.coef[x] == pytest.approx(lm.params[x], rel=1e-7)
        assert wb.coef[f"{x} (within)"] == pytest.approx(lm.params[x], rel=1e-7)
    eff = occasion_effects(fe)
    for y, row in eff.iterrows():
        assert row["estimate"] == pytest.approx(ols.params[f"C(year)[T.{y}]"], rel=1e-7)
    np.testing.assert_allclose(occasion_effects(wb)["estimate"], eff["estimate"], rtol=1e-6)


@pytest.fixture(scope="module")
def wb_post(panels):
    _, unb = panels
    m = bp.models.WithinBetween(unb, FORMULA, occasion_effects=True,
                                priors={"occasion": Prior("normal", mu=0.0, sigma=1e4)})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return m.sample(draws=300, tune=300, chains=2, seed=5, progress=False, sampler="pymc")


def test_bayesian_occasion_effects_track_two_way_fixed_effects(wb_post, two_way):
    # The within part of the within-between model is the two-way fixed-effects regression
    # (Wooldridge 2019); with a wide prior the posterior means sit on the statsmodels LSDV
    # estimates, well inside a third of a posterior SD
    _, ols = two_way
    eff = occasion_effects(wb_post)
    sd = wb_post.sd
    for y, row in eff.iterrows():
        target = ols.params[f"C(year)[T.{y}]"]
        assert abs(row["estimate"] - target) < 0.35 * sd[row["term"]], y
        assert row["lower"] < target < row["upper"]
    for x in ("value", "capital"):
        assert abs(wb_post.coef[f"{x} (within)"] - ols.params[x]) < 0.35 * sd[f"{x} (within)"]


def test_figure_over_occasions(wb_post, panels):
    import matplotlib.pyplot as plt

    _, unb = panels
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = bp.reference.within_between(unb, FORMULA, occasion_effects=True)
    fig = occasion_effects_figure({"Bayesian": wb_post, "reference": ref},
                                  reference_occasion=1935)
    ax = fig.axes[0]
    assert [t.get_text() for t in ax.get_xticklabels()] == [str(y) for y in range(1935, 1942)]
    # the plotted points are the estimates (first series: the posterior means)
    line = ax.get_lines()[0]
    np.testing.assert_allclose(np.asarray(line.get_ydata(), dtype=float),
                               occasion_effects(wb_post)["estimate"].to_numpy())
    plt.close(fig)
    between = occasion_effects(ref, part="between")
    assert len(between) == sum(t.startswith("occasion[") and t.endswith("(between)")
                               for t in ref.coef.index) > 0
    with pytest.raises(SpecificationError, match="occasion_effects=True"):
        occasion_effects(bp.reference.within(unb, FORMULA))
