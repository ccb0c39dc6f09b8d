"""The statistics-first in-memory path: Panel keeps its input, Design reads only the
formula's columns, and fits and models read the design's statistics.

Outside checks: pandas' own stable sort (``DataFrame.sort_values``) and copy-on-write,
formulaic's model matrix, linearmodels' RandomEffects (with year indicators) on the
Grunfeld panel (statsmodels.datasets), and the identity that the within-between (hybrid)
and the correlated random-effects (Mundlak) models are reparametrisations of one model,
so their random-intercept variance components coincide (Bell and Jones 2015, Political
Science Research and Methods 3, 133-153; Mundlak 1978).
"""

import re
import warnings

import numpy as np
import pandas as pd
import pytest

import bayespanel as bp
from bayespanel.core import derived, suffstats
from bayespanel.core.errors import DataHandlingWarning

WAGE = "lwage ~ exper + expersq + union + married + hours"


def _quiet(f, *a, **k):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataHandlingWarning)
        return f(*a, **k)


# ---------------------------------------------------------------------------- Panel
def test_sorted_input_is_kept_without_a_copy_and_later_edits_do_not_reach_it(wage_panel):
    # Source: wage panel (linearmodels.datasets), already sorted by (nr, year).
    df = wage_panel.copy()
    panel = bp.Panel(df, "nr", "year")
    assert panel.order is None
    # no copy: the panel's column is the caller's buffer (pandas copy-on-write shares it)
    assert np.shares_memory(panel.sorted_column("hours").to_numpy(), df["hours"].to_numpy())
    before = panel.design(WAGE)
    # the caller edits the frame afterwards: copy-on-write copies on the caller's side
    df.loc[df.index[0], "hours"] = 99999
    df["lwage"] = 0.0
    del df["exper"]
    after = panel.design(WAGE)
    np.testing.assert_array_equal(after.X, before.X)
    np.testing.assert_array_equal(after.y, before.y)
    pd.testing.assert_frame_equal(panel.data, wage_panel)
    assert not np.shares_memory(panel.sorted_column("hours").to_numpy(), df["hours"].to_numpy())


def test_unsorted_input_is_ordered_as_pandas_sorts_it(wage_panel):
    # Source: wage panel (linearmodels.datasets), rows shuffled and relabelled; reference:
    # pandas' stable sort by (unit, time).
    df = wage_panel.sample(frac=1.0, random_state=7)
    df.index = df.index * 5 + 3
    panel = bp.Panel(df, "nr", "year")
    ref = df.sort_values(["nr", "year"], kind="mergesort")
    pd.testing.assert_frame_equal(panel.data, ref)
    np.testing.assert_array_equal(df.index[panel.order], ref.index)
    pd.testing.assert_frame_equal(panel.sorted_columns(["hours", "nr"]), ref[["hours", "nr"]])
    a = panel.design(WAGE)
    b = bp.Panel(wage_panel, "nr", "year").design(WAGE)
    np.testing.assert_array_equal(a.X, b.X)
    np.testing.assert_array_equal(a.y, b.y)
    np.testing.assert_array_equal(a.unit_codes, b.unit_codes)
    np.testing.assert_array_equal(np.asarray(a.rows), ref.index)
    assert a.units.equals(b.units)
    pd.testing.assert_frame_equal(panel.describe(), bp.Panel(ref, "nr", "year").describe())


def _pandas_checked(df, unit, time):
    """Reference: pandas' own repeated-pair search and stable sort of the key columns."""
    dup = df.duplicated(subset=[unit, time], keep=False).to_numpy()
    order = df[[unit, time]].reset_index(drop=True).sort_values(
        [unit, time], kind="mergesort").index.to_numpy()
    return dup, order


@pytest.mark.parametrize("case", ["sorted", "swap", "float-keys", "date-keys", "repeat",
                                  "repeat-at-edge", "date-repeat"])
def test_rows_in_order_skip_the_sort_and_keep_pandas_answers(case):
    # Reference: pandas' DataFrame.duplicated and stable sort_values on the two keys. The
    # table is read in slices of 65,536 rows: the fault sits across a slice edge.
    n = 70_000
    df = pd.DataFrame({"u": np.repeat(np.arange(n // 7), 7), "t": np.tile(np.arange(7), n // 7),
                       "y": np.arange(n, dtype=float)})
    edge = 1 << 16
    if case == "swap":
        df.iloc[[edge - 1, edge]] = df.iloc[[edge, edge - 1]].to_numpy()
    elif case == "float-keys":
        df["u"] = df["u"] * 0.5
        df["t"] = df["t"] + 0.25
    elif case in ("date-keys", "date-repeat"):
        df["t"] = pd.Timestamp("2001-01-01") + pd.to_timedelta(df["t"] * 91, unit="D")
        if case == "date-repeat":
            df.loc[edge, "t"] = df.loc[edge - 1, "t"]
    elif case == "repeat":
        df.loc[10, "t"] = df.loc[9, "t"]
    elif case == "repeat-at-edge":
        df.loc[edge, ["u", "t"]] = df.loc[edge - 1, ["u", "t"]].to_numpy()
    dup, order = _pandas_checked(df, "u", "t")
    if dup.any():
        first = int(np.flatnonzero(dup)[0])
        u, t = (v.item() if isinstance(v, np.generic) else v
                for v in (df["u"].iloc[first], df["t"].iloc[first]))
        pair = re.escape(f"u={u!r}, t={t!r}")
        with pytest.raises(bp.PanelDataError, match=f"{int(dup.sum())} rows share .*{pair}"):
            bp.Panel(df, "u", "t")
        return
    panel = bp.Panel(df, "u", "t")
    sorted_already = np.array_equal(order, np.arange(n))
    assert (panel.order is None) == sorted_already
    if not sorted_already:
        np.testing.assert_array_equal(panel.order, order)


# ---------------------------------------------------------------------------- Design
@pytest.mark.parametrize("formula", [
    "lwage ~ hours + exper",
    "lwage ~ 0 + married + exper + married",
    "lwage ~ exper - 1 + union",
    "lwage ~ year + exper",
    "lwage ~ union + exper + hours + exper",  # a sum of names, read without formulaic
])
def test_plain_terms_equal_formulaic_model_matrix(wage_panel, formula):
    # Source: wage panel (linearmodels.datasets), a few values removed; reference:
    # formulaic's model matrix on the sorted complete rows (term order and labels).
    from formulaic import Formula

    df = wage_panel.copy()
    df.loc[[3, 50, 700], "exper"] = np.nan
    df = df.sample(frac=1.0, random_state=1)
    d = _quiet(bp.Panel(df, "nr", "year").design, formula)
    rows = df.sort_values(["nr", "year"], kind="mergesort").dropna(subset=["exper"])
    mm = Formula(formula.split("~")[1]).get_model_matrix(rows.reset_index(drop=True))
    assert d.terms == [str(c) for c in mm.columns]
    np.testing.assert_array_equal(d.X, np.asarray(mm, dtype=float))
    np.testing.assert_array_equal(d.y, rows["lwage"].to_numpy())


def test_design_statistics_equal_those_of_its_rows(wage_panel):
    # Source: wage panel (linearmodels.datasets); reference: the statistics computed
    # directly on Design.matrices(kind) in numpy extended precision (per unit).
    d = bp.Panel(wage_panel, "nr", "year").design(WAGE)
    for kind in ("random", "within", "mundlak", "within_between"):
        M, labels = d.matrices(kind)
        st = derived.from_design(d, kind)
        assert st.names == labels + ["lwage"]
        Z = np.column_stack([M, d.y]).astype(np.longdouble)
        within = np.zeros((Z.shape[1],) * 2, dtype=np.longdouble)
        for s, t in zip(d.starts, d.T):
            D = Z[s:s + t] - Z[s:s + t].mean(axis=0)
            within += D.T @ D
        scale = np.abs(within).max()
        assert np.max(np.abs(st.within - within.astype(float))) < 1e-12 * float(scale), kind
        means = np.add.reduceat(Z, d.starts, axis=0) / d.T[:, None]
        np.testing.assert_allclose(st.unit_mean, means.astype(float), rtol=1e-12, atol=1e-12)


def test_within_between_and_mundlak_share_their_variance_components(wage_panel, grunfeld):
    # Identity: the hybrid model is the Mundlak model reparametrised (Bell and Jones 2015),
    # so Swamy-Arora gives both the same unit and occasion variances; source: wage panel
    # (linearmodels.datasets) and Grunfeld (statsmodels.datasets).
    for df, unit, f in ((wage_panel, "nr", WAGE), (grunfeld, "firm", "invest ~ value + capital")):
        d = bp.Panel(df, unit, "year").design(f)
        m = bp.reference.mundlak(d)
        w = bp.reference.within_between(d)
        fe = bp.reference.within(d)
        assert w.sigma_unit == pytest.approx(m.sigma_unit, rel=1e-10)
        assert w.sigma_obs == pytest.approx(m.sigma_obs, rel=1e-10)
        tv = [t for t in fe.coef.index]
        np.testing.assert_allclose(w.coef[[f"{t} (within)" for t in tv]].to_numpy(),
                                   fe.coef[tv].to_numpy(), rtol=1e-8)


def test_random_intercept_with_occasion_effects_matches_linearmodels(grunfeld):
    # Source: Grunfeld panel (statsmodels.datasets); reference: linearmodels
    # RandomEffects with an intercept and one indicator per year but the first. In this
    # balanced panel the unit means of the indicators are all 1/T, so the between
    # regression behind Swamy-Arora cannot use them.
    from linearmodels.panel import RandomEffects

    d = grunfeld.set_index(["firm", "year"])
    years = d.index.get_level_values("year")
    exog = d[["value", "capital"]].copy()
    for y in sorted(set(years))[1:]:
        exog[f"y{y}"] = (years == y).astype(float)
    exog.insert(0, "const", 1.0)
    lm = RandomEffects(d["invest"], exog).fit()
    ours = bp.reference.random(bp.Panel(grunfeld, "firm", "year"), "invest ~ value + capital",
                               occasion_effects=True)
    assert ours.sigma_unit == pytest.approx(np.sqrt(lm.variance_decomposition["Effects"]),
                                            rel=1e-8)
    for t in ("value", "capital"):
        assert ours.coef[t] == pytest.approx(lm.params[t], rel=1e-8)
        assert ours.se[t] == pytest.approx(lm.std_errors[t], rel=1e-6)
    between = _quiet(bp.reference.between, bp.Panel(grunfeld, "firm", "year"),
                     "invest ~ value + capital", occasion_effects=True)
    assert list(between.coef.index) == ["Intercept", "value", "capital"]


# ---------------------------------------------------------------------------- builders
def test_builders_on_a_design_read_its_statistics_and_make_rows_on_demand(wage_panel):
    # Source: wage panel (linearmodels.datasets); reference: the statistics of the rows
    # (suffstats.compute on the builder's matrix) and the model built from the panel.
    panel = bp.Panel(wage_panel, "nr", "year")
    d = panel.design(WAGE)
    for B in (bp.models.RandomIntercept, bp.models.WithinBetween,
              bp.models.CorrelatedEffects, bp.models.Pooled, bp.models.FixedEffects):
        m = d.build(B)
        assert m._rows is None  # nothing n x k until asked for
        ref = B(panel, WAGE)
        assert m.labels == ref.labels and m.spec == ref.spec
        M, y, codes = m.rows
        np.testing.assert_array_equal(M, ref.rows[0])
        direct = suffstats.compute(M, y, codes)
        for f in ("within", "total", "group_cp", "group_mean", "unit_mean"):
            a, b = getattr(m.stats, f), getattr(direct, f)
            assert np.max(np.abs(a - b)) <= 1e-9 * max(np.max(np.abs(b)), 1.0), (B.__name__, f)
    m1, m2 = d.build(bp.models.RandomIntercept), d.build(bp.models.WithinBetween)
    assert m1.pymc_model.coords["unit"] is m2.pymc_model.coords["unit"]


def test_posterior_makes_its_rows_from_the_design_only_when_asked(grunfeld):
    # Source: Grunfeld panel (statsmodels.datasets); reference: the design's own matrices
    # and the occasion-level LOO of a posterior whose rows were given up front.
    d = bp.Panel(grunfeld, "firm", "year").design("invest ~ value + capital")
    for B, kind in ((bp.models.RandomIntercept, "random"),
                    (bp.models.CorrelatedEffects, "mundlak")):
        post = d.build(B).sample(draws=60, tune=60, chains=1, seed=3, progress=False)
        assert post._rows is None  # sampling made no copy of the rows
        M, y, codes = post.rows
        np.testing.assert_array_equal(M, d.matrices(kind)[0])
        np.testing.assert_array_equal(y, d.y)
        if kind == "random":
            assert M is d.X  # the random kind shares the design's columns
        eager = bp.Posterior(post.idata, post.spec, post.stats, post.units,
                             rows=(M.copy(), y, codes), scaling=post.scaling, time=d.time)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            a, b = post.loo("occasion"), eager.loo("occasion")
        assert a.elpd == b.elpd and a.se == b.se


def test_a_sum_of_names_read_without_formulaic_keeps_the_term_limit():
    # A sum of plain names skips formulaic's parser (bayespanel.data.formula.plain_sum);
    # past LIMITS['terms'] it goes to the parser's walk, which names the limit as before.
    from bayespanel.core.errors import FormulaError
    from bayespanel.data.formula import LIMITS, plain_sum, screen

    names = [f"c{i}" for i in range(LIMITS["terms"])]  # with the intercept: one too many
    assert plain_sum(" + ".join(names)) == names
    assert plain_sum("a + b:c") is None and plain_sum("`a b` + c") is None
    assert plain_sum("a + True") is None and plain_sum("a + 1") is None
    screen("y ~ " + " + ".join(names[:-1]), ["y"] + names)
    with pytest.raises(FormulaError, match=r"generates too many terms \(1,001\)"):
        screen("y ~ " + " + ".join(names), ["y"] + names)
