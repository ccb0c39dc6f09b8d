"""The command line's first verbs. Outside check: describe() figures printed by the CLI
equal a direct pandas computation of the between SD on the Grunfeld panel (statsmodels)."""

import subprocess
import sys

import pytest

from bayespanel.app.cli import main


def test_describe_cli_on_grunfeld_csv(tmp_path, grunfeld, capsys):
    path = tmp_path / "g.csv"
    grunfeld.to_csv(path, index=False)
    assert main(["describe", str(path), "--unit", "firm", "--time", "year"]) == 0
    out = capsys.readouterr().out
    sd_b = grunfeld.groupby("firm")["invest"].mean().std(ddof=1)  # pandas, direct
    assert f"{sd_b:.3g}" in out  # three significant digits (report.numbers.plain)
    assert "10 units" in out


def test_bad_input_exit_code_two(tmp_path, capsys):
    path = tmp_path / "bad.csv"
    path.write_text("a;b;c\n1;2;3\n")
    assert main(["describe", str(path), "--unit", "a", "--time", "b"]) == 2
    assert "';'" in capsys.readouterr().err


@pytest.mark.slow
def test_module_entry_point_demo(tmp_path):
    """The README's demo command, with small draws: the whole job ends in a report and the
    console shows the true values beside the estimates."""
    from linearmodels.panel import PanelOLS

    out = subprocess.run([sys.executable, "-m", "bayespanel", "demo", "--draws", "100",
                          "--tune", "150", "--chains", "2", "--out", str(tmp_path), "--quiet"],
                         capture_output=True, text=True, check=True).stdout
    assert "36 units" in out and "satisfaction" in out
    assert "true 1.50" in out and "true 4.00" in out  # within and between staffing effects (3 significant digits)
    assert f"report: {(tmp_path / 'report.html').resolve()}" in out
    assert "LOO comparison (occasion level" in out
    import pandas as pd

    # outside check: the fixed-effects reference in results.json equals linearmodels PanelOLS
    df = pd.read_csv(tmp_path / "clinic_panel.csv").dropna().set_index(["clinic", "quarter"])
    fe = PanelOLS(df["satisfaction"], df[["staffing", "caseload"]], entity_effects=True).fit()
    import json

    res = json.loads((tmp_path / "results.json").read_text())
    within = next(f for f in res["reference"] if f["name"] == "within")
    got = {c["term"]: c["estimate"] for c in within["coefficients"]}
    assert got["staffing"] == pytest.approx(fe.params["staffing"], rel=1e-8)
    assert len(res["models"]) == 5 and (tmp_path / "posteriors" / "fixed_effects.nc").exists()
    # the same run as the kept one: restructuring keeps the outputs (tests/golden/compare.py)
    from golden.compare import check

    check(tmp_path / "results.json")
