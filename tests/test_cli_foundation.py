"""The command line's first verbs. Outside check: describe() figures printed by the CLI
equal a direct pandas computation of the between SD on the Grunfeld panel (statsmodels)."""

import subprocess
import sys

import pytest

from bayespanel.cli import main


def test_describe_cli_on_grunfeld_csv(tmp_path, grunfeld, capsys):
    path = tmp_path / "g.csv"
    grunfeld.to_csv(path, index=False)
    assert main(["describe", str(path), "--unit", "firm", "--time", "year"]) == 0
    out = capsys.readouterr().out
    sd_b = grunfeld.groupby("firm")["invest"].mean().std(ddof=1)  # pandas, direct
    assert f"{sd_b:.3f}" in out
    assert "10 units" in out


def test_bad_input_exit_code_two(tmp_path, capsys):
    path = tmp_path / "bad.csv"
    path.write_text("a;b;c\n1;2;3\n")
    assert main(["describe", str(path), "--unit", "a", "--time", "b"]) == 2
    assert "';'" in capsys.readouterr().err


def test_module_entry_point_demo():
    out = subprocess.run([sys.executable, "-m", "bayespanel", "demo"], capture_output=True,
                         text=True, check=True).stdout
    assert "36 units" in out and "satisfaction" in out
