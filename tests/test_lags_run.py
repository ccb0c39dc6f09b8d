"""A run with lag(y): the data record, the notes the console and report print, the option.

Outside reference: pandas groupby-shift on the full unit x occasion grid for the rows left
without a lag (as in tests/test_lags.py); the results schema (jsonschema) for the record.
"""

import numpy as np
import pandas as pd
import pytest

from bayespanel.app import runner
from bayespanel.app.data_stage import data_stage
from bayespanel.app.notes import dynamic_notes


def _panel_frame(seed=4, units=25, occasions=6):
    rng = np.random.default_rng(seed)
    rows = [(i, t, rng.normal(), rng.normal()) for i in range(units)
            for t in range(occasions) if not (i % 5 == 0 and t == 3)]   # a few gaps
    return pd.DataFrame(rows, columns=["firm", "year", "sales", "staff"])


def _settings(**kw):
    base = dict(unit="firm", time="year", formula="sales ~ lag(sales) + staff",
                models=("random_intercept", "fixed_effects", "pooled"))
    return runner.Settings(**{**base, **kw}).check()


def test_data_record_and_notes_of_a_lagged_outcome():
    df = _panel_frame()
    panel, design, data, notes = data_stage(_settings(), df, lambda m: None)
    grid = pd.MultiIndex.from_product([range(25), range(6)])
    lagged = (df.set_index(["firm", "year"])["sales"].reindex(grid).groupby(level=0).shift(1)
              .reindex(pd.MultiIndex.from_frame(df[["firm", "year"]])))
    assert data["lags"]["n_rows_without_lag"] == int(lagged.isna().sum())   # pandas
    rec = data["lags"]["lags"][0]
    assert (rec["before_first_occasion"], rec["across_gap"]) == (25, 5)
    assert data["initial_conditions"]["applied"] is True
    assert data["initial_conditions"]["initial_outcome_columns"] == ["lag(sales) (initial)"]
    assert any("have no lag" in n for n in notes)                # console and report notes
    said = dynamic_notes(_settings(), design)
    assert said[0].startswith("Initial conditions: ") and "by construction" in said[0]
    assert any("Nickell" in n for n in said) and any("biased upward" in n for n in said)
    assert any("Swamy" in n for n in said)
    assert any(n.startswith("The Hausman test") and "Nickell" in n for n in said)
    assert not any("Swamy" in n for n in dynamic_notes(_settings(re_method="ml"),
                                                               design))


def test_switched_off_in_the_analysis_file_and_said_once():
    s = _settings(initial_conditions=False)
    assert "initial_conditions = false" in s.to_toml()
    assert "initial_conditions" not in _settings().to_toml()
    assert "initial_conditions" not in _settings().to_dict()     # default runs unchanged
    _, design, data, notes = data_stage(s, _panel_frame(), lambda m: None)
    assert data["initial_conditions"] == {"applied": False}
    assert sum("not handled" in n for n in notes + dynamic_notes(s, design)) == 1
    with pytest.raises(Exception, match="initial_conditions"):
        _settings(initial_conditions="no")


def test_formulas_without_lags_keep_their_record():
    _, design, data, _ = data_stage(_settings(formula="sales ~ staff"),
                                            _panel_frame(), lambda m: None)
    assert "lags" not in data and "initial_conditions" not in data
    assert dynamic_notes(_settings(formula="sales ~ staff"), design) == []
