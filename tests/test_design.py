"""Design matrices, estimation sample, and formula safety.

Outside checks: unit means and demeaned columns against pandas groupby and linearmodels'
PanelData demeaning on the Grunfeld panel (statsmodels' datasets); formulaic's own model
matrix for the original columns.
"""

import os
import warnings

import numpy as np
import pandas as pd
import pytest

import bayespanel as bp
from bayespanel.core.errors import DataHandlingWarning, EstimationError, FormulaError, PanelDataError


def test_within_and_between_columns_match_linearmodels(grunfeld):
    # Reference library: linearmodels PanelData.demean("entity"); Grunfeld from statsmodels.
    from linearmodels.panel.data import PanelData

    panel = bp.Panel(grunfeld, unit="firm", time="year")
    d = panel.design("invest ~ value + capital")
    W, labels = d.matrices("within")
    assert labels == ["value", "capital"]
    ref = PanelData(grunfeld.set_index(["firm", "year"]).sort_index()[["value", "capital"]]).demean("entity")
    np.testing.assert_allclose(W, ref.values2d, rtol=1e-10, atol=1e-8)
    B, blabels = d.matrices("between")
    direct = grunfeld.groupby("firm")[["value", "capital"]].mean().to_numpy()
    np.testing.assert_allclose(B[:, 1:], direct, rtol=1e-12)


def test_original_columns_match_formulaic(grunfeld):
    # Reference library: formulaic's model_matrix on the same rows.
    from formulaic import model_matrix

    panel = bp.Panel(grunfeld, unit="firm", time="year")
    d = panel.design("invest ~ value + capital + value:capital + np.log(capital)")
    mm = model_matrix("value + capital + value:capital + np.log(capital)", panel.data)
    np.testing.assert_allclose(d.X, np.asarray(mm), rtol=1e-12)
    assert d.terms == list(mm.columns)


def test_estimation_sample_means_after_listwise_deletion(demo):
    df, truth = demo
    panel = bp.Panel(df, unit="clinic", time="quarter")
    with pytest.warns(DataHandlingWarning, match=r"dropped 9 of 251 rows.*caseload: 9"):
        d = panel.design(truth["formula"])
    assert d.n == 242 and d.n_dropped == 9
    kept = panel.data.dropna(subset=["caseload"])
    direct = kept.groupby("clinic")["staffing"].mean().to_numpy()  # means over the sample
    j = d.terms.index("staffing")
    np.testing.assert_allclose(d.unit_means()[:, j], direct, rtol=1e-12)
    M, labels = d.matrices("within_between")
    assert labels == ["Intercept", "staffing (within)", "caseload (within)",
                      "staffing (between)", "caseload (between)", "rural"]
    M, labels = d.matrices("mundlak")
    assert labels[-2:] == ["staffing (unit mean)", "caseload (unit mean)"]
    assert d.varies_within.to_dict() == {"Intercept": False, "staffing": True,
                                          "caseload": True, "rural": False}


def test_interaction_of_varying_and_constant_terms(demo):
    df, _ = demo
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataHandlingWarning)
        d = bp.Panel(df, "clinic", "quarter").design("satisfaction ~ staffing * rural")
    assert d.varies_within["staffing:rural"]
    M, labels = d.matrices("within_between")
    assert "staffing:rural (within)" in labels and "staffing:rural (between)" in labels


def test_occasion_effects_in_unbalanced_panel(demo):
    df, _ = demo
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataHandlingWarning)
        d = bp.Panel(df, "clinic", "quarter").design("satisfaction ~ staffing", occasion_effects=True)
    occ = [t for t in d.terms if t.startswith("occasion[")]
    assert occ == [f"occasion[{q}]" for q in range(2, 9)]
    M, labels = d.matrices("within_between")
    assert "occasion[2] (between)" in labels  # unbalanced: occasion shares differ by unit


def test_formula_cannot_run_code(tmp_path, demo):
    df, _ = demo
    panel = bp.Panel(df, "clinic", "quarter")
    marker = tmp_path / "ran"
    for f in [f"satisfaction ~ __import__('os').system('touch {marker}')",
              f"satisfaction ~ {{__import__('os').system('touch {marker}')}}",
              "satisfaction ~ staffing + np.random.seed(1)",
              "satisfaction ~ open('/etc/passwd')",
              "satisfaction ~ staffing.real",
              "satisfaction ~ getattr(staffing, 'x')"]:
        with pytest.raises(FormulaError):
            panel.design(f)
    assert not marker.exists()


@pytest.mark.parametrize(
    "formula, exc, match",
    [
        ("satisfaction ~ staffng", FormulaError, "unknown column 'staffng'.*did you mean|unknown column 'staffng'"),
        ("satisfaction + staffing", FormulaError, "exactly one '~'"),
        ("satisfaction ~ clinic", FormulaError, "identifies the units"),
        ("satisfaction ~ staffing + const", PanelDataError, "'const' is constant"),
        ("satisfaction ~ staffing + staffing2", PanelDataError, "collinear.*staffing"),
        ("satisfaction ~ label", PanelDataError, r"'label' is not numeric.*C\(label\)"),
        ("label ~ staffing", PanelDataError, "outcome must be numeric"),
        ("flat ~ staffing", PanelDataError, "outcome 'flat' is constant"),
    ],
    ids=["unknown", "no-tilde", "unit-in-formula", "constant", "collinear", "string", "string-y", "flat-y"],
)
def test_bad_formulas_name_the_fault(demo, formula, exc, match):
    df, _ = demo
    df = df.assign(const=1.0, staffing2=2 * df["staffing"] + 1, label=df["clinic"].str[-1], flat=3.0)
    panel = bp.Panel(df, "clinic", "quarter")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataHandlingWarning)
        with pytest.raises(exc, match=match):
            panel.design(formula)


def test_categorical_is_allowed_through_C(demo):
    df, _ = demo
    df = df.assign(region=np.where(df["clinic"] < "C12", "north", "south"))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataHandlingWarning)
        d = bp.Panel(df, "clinic", "quarter").design("satisfaction ~ staffing + C(region)")
    assert any("region" in t for t in d.terms)


def test_fixed_effects_needs_within_variation(demo):
    df, _ = demo
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataHandlingWarning)
        d = bp.Panel(df, "clinic", "quarter").design("satisfaction ~ rural")
    with pytest.raises(EstimationError, match="varies within units"):
        d.matrices("within")
