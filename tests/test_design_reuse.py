"""The design built once per formula and at the pass's speed (issue 18, item 4).

Checks: a panel hands the last design it built to the next call with the same formula,
repeating the warnings of its build (rows dropped), and builds anew for another formula;
the one-sweep column ranges equal numpy's ``min``, ``max`` and ``isfinite`` (compiled
and numpy versions, with NaN and infinities placed in different columns); the compiled
per-unit scores give the cluster-robust standard errors of linearmodels (PanelOLS with
entity effects and RandomEffects, clustered by entity, CR1 factor) on the wage panel of
Vella and Verbeek (1998, linearmodels.datasets), and equal the numpy version's.
"""

import warnings

import numpy as np
import pytest

import bayespanel as bp
from bayespanel.core import suffstats
from bayespanel.core.errors import DataHandlingWarning

FORMULA = "lwage ~ exper + expersq + union + married"


@pytest.fixture(scope="module")
def wage_gaps(wage_panel):
    df = wage_panel.copy()
    df.loc[[3, 50, 51], "union"] = np.nan  # three incomplete rows, dropped by the design
    return df


def test_the_panel_reuses_its_last_design_and_repeats_its_warnings(wage_gaps):
    panel = bp.Panel(wage_gaps, unit="nr", time="year")
    with pytest.warns(DataHandlingWarning, match="dropped 3 of 4360 rows"):
        first = panel.design(FORMULA)
    with pytest.warns(DataHandlingWarning, match="dropped 3 of 4360 rows"):
        again = panel.design(FORMULA)
    assert again is first
    with pytest.warns(DataHandlingWarning, match="dropped 3 of 4360 rows"):
        other = panel.design(FORMULA + " + black")
    assert other is not first and other.terms[-1] == "black"
    with pytest.warns(DataHandlingWarning):
        rebuilt = panel.design(FORMULA)
    assert rebuilt is not first  # one design is kept: the last one
    np.testing.assert_array_equal(rebuilt.X, first.X)
    np.testing.assert_array_equal(rebuilt.y, first.y)
    # a reference fit and a builder of the same formula take the kept design
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataHandlingWarning)
        bp.reference.within(panel, FORMULA)
        assert panel.design(FORMULA) is rebuilt
    with pytest.warns(DataHandlingWarning):
        assert panel.design(FORMULA, occasion_effects=True) is not rebuilt


@pytest.mark.parametrize("compiled", [True, False])
def test_column_range_equals_numpy(monkeypatch, compiled):
    """Reference: numpy's min, max and isfinite, column by column."""
    rng = np.random.default_rng(4)
    X = rng.normal(size=(60_000, 4)) * [1.0, 1e8, 1e-120, 3.0]
    y = rng.normal(size=60_000) + 1e8
    X[123, 1] = np.nan
    X[59_999, 2] = np.inf
    X[0, 3] = -np.inf
    monkeypatch.setattr(suffstats, "USE_NUMBA", compiled)
    lo, hi, finite = suffstats.column_range(X, y)
    Z = np.column_stack([X, y])
    np.testing.assert_array_equal(finite, np.isfinite(Z).all(axis=0))
    assert finite.tolist() == [True, False, False, False, True]
    for j in np.flatnonzero(finite):
        assert lo[j] == Z[:, j].min() and hi[j] == Z[:, j].max()
    assert hi[2] == np.inf and lo[3] == -np.inf  # infinities are compared
    assert suffstats.column_range(X[:0], y[:0])[2].all()


def test_compiled_cluster_scores_equal_linearmodels(monkeypatch, wage_panel):
    """Reference: linearmodels PanelOLS(entity_effects) and RandomEffects clustered by
    entity (``group_debias=True``, the CR1 factor), on the wage panel."""
    from linearmodels import PanelOLS, RandomEffects

    panel = bp.Panel(wage_panel, unit="nr", time="year")
    design = panel.design(FORMULA)
    tv = ["exper", "expersq", "union", "married"]
    fits = {}
    for compiled in (True, False):
        monkeypatch.setattr(suffstats, "USE_NUMBA", compiled)
        fits[compiled] = {est: bp.reference.fit_design(design, est, cov="cluster")
                          for est in ("within", "random", "pooled", "mundlak")}
    for est in fits[True]:
        np.testing.assert_allclose(fits[True][est].se, fits[False][est].se, rtol=1e-12)
    d = wage_panel.set_index(["nr", "year"])
    X = d[tv].astype(float).copy()
    X.insert(0, "Intercept", 1.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fe = PanelOLS(d["lwage"], X, entity_effects=True, drop_absorbed=True).fit(
            cov_type="clustered", cluster_entity=True, group_debias=True)
        re = RandomEffects(d["lwage"], X).fit(
            cov_type="clustered", cluster_entity=True, group_debias=True)
    np.testing.assert_allclose(fits[True]["within"].se[tv], fe.std_errors[tv], rtol=1e-6)
    np.testing.assert_allclose(fits[True]["random"].se.to_numpy(), re.std_errors.to_numpy(),
                               rtol=1e-6)
