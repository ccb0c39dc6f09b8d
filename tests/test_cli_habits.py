"""Command-line habits (issue 15, item 6), each checked as a user meets it: the version,
help that states the defaults a run uses, priors checked before any work, a delimiter
option, docs/cli.md in step with the parser, progress lines without long silences, and
warnings on one line each. The version, the progress lines and the warnings are read from
a real ``python -m bayespanel`` subprocess (what a fresh interpreter prints and when);
help, priors and the delimiter from ``bayespanel.app.cli.main``'s exit code and output in
this process (tests/conftest.py ``run_main``), without an interpreter start-up each.

Outside sources, named beside each check: the Grunfeld investment panel shipped by
statsmodels.datasets and the wage panel of Vella and Verbeek (1998) shipped by
linearmodels.datasets; the installed package metadata (importlib.metadata) for the
version.
"""

import json
import re
import sys
from pathlib import Path

import pytest

from bayespanel.app.cli import build_parser, format_warning

sys.path.insert(0, str(Path(__file__).parent))
from conftest import run_main  # noqa: E402
from test_cli_public import run_cli  # noqa: E402

DOCS = Path(__file__).resolve().parents[1] / "docs" / "cli.md"
GRUNFELD = ["--unit", "firm", "--time", "year", "--formula", "invest ~ value + capital"]


@pytest.fixture(scope="module")
def grunfeld_csv(tmp_path_factory, grunfeld):
    path = tmp_path_factory.mktemp("grunfeld") / "grunfeld.csv"
    grunfeld.to_csv(path, index=False)
    return path


def _verbs():
    parser = build_parser()
    sub = next(a for a in parser._actions if a.dest == "verb")
    return parser, sub.choices


def _section(text, verb):
    """The part of docs/cli.md under ``## `verb` `` (to the next ``## ``)."""
    m = re.search(rf"^## `{re.escape(verb)}`\n(.*?)(?=^## |\Z)", text, re.S | re.M)
    assert m, f"docs/cli.md has no section for {verb}"
    return m.group(1)


def test_docs_cover_every_verb_and_option_and_name_no_other():
    text = DOCS.read_text("utf-8")
    parser, verbs = _verbs()
    top = {o for a in parser._actions for o in a.option_strings if o.startswith("--")}
    head = text.split("\n## ", 1)[0]
    for opt in top - {"--help"}:
        assert f"`{opt}`" in head, f"{opt} is not in docs/cli.md's opening"
    for verb, sub in verbs.items():
        part = _section(text, verb)
        opts = {o for a in sub._actions for o in a.option_strings if o.startswith("--")}
        missing = sorted(o for o in opts - {"--help"} if not re.search(
            rf"`{re.escape(o)}[` ]", part))
        assert not missing, f"docs/cli.md, section {verb}: missing {missing}"
        named = set(re.findall(r"`(--[a-z][a-z-]*)", part))
        unknown = sorted(named - opts - top)
        assert not unknown, f"docs/cli.md, section {verb}: no such option {unknown}"


def test_version_and_help_state_the_real_defaults():
    from importlib.metadata import version

    p = run_cli("--version")
    # outside check: the installed package's metadata
    assert p.returncode == 0 and p.stdout.strip() == f"bayespanel {version('bayespanel')}"
    fit = run_main("fit", "--help").stdout
    text = " ".join(fit.split())
    # said "default None" before (the options stay None so analysis files are not overridden)
    assert "draws per chain (default 1000)" in text
    assert "discarded (default 1000)" in text and "chains (default 4)" in text
    for verb in _verbs()[1]:
        assert "default None" not in " ".join(run_main(verb, "--help").stdout.split()), verb


def test_a_mistyped_prior_family_is_refused_before_any_work(grunfeld_csv, tmp_path):
    p = run_main("fit", grunfeld_csv, *GRUNFELD, "--prior", "sigma_unit=gama2",
                 "--out", tmp_path / "o")
    assert p.returncode == 2
    assert "prior family='gama2' is not valid" in p.stderr
    # before: caught only after the first model had sampled
    assert "sampling" not in p.stderr and "read " not in p.stderr
    assert not (tmp_path / "o" / "results.json").exists()


def test_delimiter_option(grunfeld_csv, grunfeld, tmp_path):
    semi = tmp_path / "grunfeld_semicolon.csv"
    grunfeld.to_csv(semi, index=False, sep=";")
    p = run_main("describe", semi, "--unit", "firm", "--time", "year")
    assert p.returncode == 2 and "(--delimiter ';')" in p.stderr  # the hint names the option
    got = run_main("describe", semi, "--unit", "firm", "--time", "year", "--delimiter", ";")
    want = run_main("describe", grunfeld_csv, "--unit", "firm", "--time", "year")
    assert got.returncode == 0 and got.stdout == want.stdout
    out = tmp_path / "run"
    p = run_main("fit", semi, *GRUNFELD, "--delimiter", "semicolon", "--models", "none",
                 "--reference", "within", "--out", out)
    assert p.returncode == 0, p.stderr
    assert 'delimiter = ";"' in (out / "analysis.toml").read_text("utf-8")
    again = run_main("fit", "--config", out / "analysis.toml", "--out", tmp_path / "again")
    assert again.returncode == 0, again.stderr
    # outside check: the within fit on the semicolon file is linearmodels' PanelOLS
    from linearmodels.panel import PanelOLS

    g = grunfeld.set_index(["firm", "year"])
    fe = PanelOLS(g["invest"], g[["value", "capital"]], entity_effects=True).fit()
    res = json.loads((tmp_path / "again" / "results.json").read_text("utf-8"))
    est = {c["term"]: c["estimate"] for c in res["reference"][0]["coefficients"]}
    assert est["value"] == pytest.approx(fe.params["value"], rel=1e-8)


def _stamps(stderr):
    return [float(m.group(1)) for m in re.finditer(r"^\[\s*([0-9.]+) s\]", stderr, re.M)]


def test_no_long_silence_between_progress_lines(wage_csv, tmp_path):
    # a mid-size panel (4,360 rows): sampling, summaries, LOO of every row and the
    # figures each take seconds; the longest gap between lines stays about ten seconds
    p = run_cli("fit", wage_csv, "--unit", "nr", "--time", "year", "--formula",
                "lwage ~ exper + expersq + union + married", "--models",
                "random_intercept,within_between", "--reference", "random,within",
                "--draws", "300", "--tune", "300", "--chains", "2", "--out", tmp_path)
    assert p.returncode in (0, 3), p.stderr
    t = _stamps(p.stderr)
    gaps = [b - a for a, b in zip(t, t[1:])]
    assert len(t) > 8 and max(gaps) < 13.0, (max(gaps), p.stderr)
    for stage in ("LOO of random_intercept", "writing results.json",
                  "random_intercept: summaries"):
        assert stage in p.stderr
    # the console names what it computed: reference estimates and both tests
    assert "Random effects (GLS) (reference" in p.stdout
    assert "Hausman (classical), fixed vs random effects: statistic" in p.stdout


def test_warnings_are_one_line_without_source(grunfeld_csv, grunfeld, tmp_path):
    first = tmp_path / "first"
    p = run_cli("fit", grunfeld_csv, *GRUNFELD, "--models", "none", "--reference", "pooled",
                "--out", first)
    assert p.returncode == 0, p.stderr
    data = tmp_path / "changed.csv"
    grunfeld.assign(invest=grunfeld["invest"] * 1.01).to_csv(data, index=False)
    toml = (first / "analysis.toml").read_text("utf-8")
    (tmp_path / "a.toml").write_text(re.sub(r'file = ".*"', f'file = "{data}"', toml))
    p = run_cli("fit", "--config", tmp_path / "a.toml", "--out", tmp_path / "second")
    assert p.returncode == 0, p.stderr
    lines = [ln for ln in p.stderr.splitlines() if "warning:" in ln.lower()]
    assert len(lines) == 1 and lines[0].startswith("bayespanel: warning: the data file")
    assert ".py:" not in p.stderr and "warnings.warn" not in p.stderr
    # the formatter: one line, category named for warnings that are not ours
    assert format_warning("a\n  b", FutureWarning) == "bayespanel: warning: FutureWarning: a b"
    assert format_warning("x", UserWarning) == "bayespanel: warning: x"
