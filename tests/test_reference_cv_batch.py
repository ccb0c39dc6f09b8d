"""Exact leave-one-out of the closed-form reference fits, batched over held-out points.

The batched refits (bayespanel.analysis.loo._batch) must give the numbers of the loop
that refits one point at a time (reference_cv._LOOP_ONLY), which
tests/test_reference_cv_exact.py holds against brute-force refits and statsmodels /
linearmodels fits on the reduced data; here the two are compared point by point to
1e-10. Data: statsmodels' Grunfeld panel, linearmodels' wage panel (Vella and Verbeek
1998), and the Grunfeld panel made unbalanced (a firm with a single year, firms with
gaps) with an indicator that is one on a single row, so that holding that row out leaves
the column constant (the downdates must zero it as a recomputation does).
"""

import importlib
import warnings

import numpy as np
import pytest

import bayespanel as bp

rc = importlib.import_module("bayespanel.analysis.loo.reference_cv")

CASES = [("pooled", None), ("within", None), ("random", "swamy-arora"),
         ("mundlak", "swamy-arora"), ("within_between", "swamy-arora")]


@pytest.fixture(scope="module")
def panels(grunfeld, wage_panel):
    wp = wage_panel[wage_panel["nr"].isin(wage_panel["nr"].unique()[:60])]
    g = grunfeld.copy()
    firms = g["firm"].unique()
    g = g[~((g["firm"] == firms[0]) & (g["year"] > 1935))]          # one year only
    g = g[~((g["firm"] == firms[1]) & g["year"].isin([1940, 1941, 1950]))]  # gaps
    g = g[~((g["firm"] == firms[2]) & (g["year"] > 1944))]           # a shorter firm
    g["once"] = 0.0
    g.loc[g.index[(g["firm"] == firms[3]).to_numpy()][4], "once"] = 1.0
    return {
        "grunfeld": (bp.Panel(grunfeld, "firm", "year"), "invest ~ value + capital"),
        "wage": (bp.Panel(wp, "nr", "year"),
                 "lwage ~ exper + expersq + union + married + hours + educ + black"),
        "unbalanced": (bp.Panel(g, "firm", "year"), "invest ~ value + capital + once"),
    }


def _values(ref, level, loop, monkeypatch):
    monkeypatch.setattr(rc, "_LOOP_ONLY", loop)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return rc.exact_loo_values(ref, level)


@pytest.mark.parametrize("data", ["grunfeld", "wage", "unbalanced"])
@pytest.mark.parametrize("est,method", CASES)
def test_batched_refits_equal_the_loop(panels, data, est, method, monkeypatch):
    panel, formula = panels[data]
    kw = {} if method is None else {"method": method}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = getattr(bp.reference, est)(panel, formula, **kw)
    assert (est, method) in rc._batch.BATCHED
    for level in ("occasion", "unit"):
        if est == "within" and level == "unit":
            continue
        loop = _values(ref, level, True, monkeypatch)
        batch = _values(ref, level, False, monkeypatch)
        np.testing.assert_array_equal(np.isnan(batch), np.isnan(loop))
        ok = ~np.isnan(loop)
        assert ok.sum() >= 0.9 * len(loop)
        np.testing.assert_allclose(batch[ok], loop[ok], rtol=1e-10, atol=1e-10)


def test_single_row_indicator_vanishes_when_held_out(panels, monkeypatch):
    """Holding out the one row where 'once' is 1 leaves the column constant: the pooled
    refit then drops it (as a fit from scratch does), and the batched refit gives the
    brute-force refit's density (reference_cv._score: fit_arrays on the other rows)."""
    panel, formula = panels["unbalanced"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = bp.reference.pooled(panel, formula)
    d = ref.design
    j = int(np.flatnonzero(d.X[:, d.terms.index("once")] == 1.0)[0])
    batch = _values(ref, "occasion", False, monkeypatch)
    M, labels = rc.reference_columns(ref)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        brute = rc._score(ref, M, labels, np.arange(d.n) == j, "occasion")[0]
    np.testing.assert_allclose(batch[j], brute, rtol=1e-10)
