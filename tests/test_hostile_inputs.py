"""Hostile and careless input that used to slip through: text in figures, names that clash
with the package's own labels, formulas that exhaust the machine, and strings that turn
into code in other programs (spreadsheets, Markdown viewers, terminals).

Outside checks, named beside them: matplotlib's own literal mode (``parse_math=False``)
for what a label must look like; statsmodels OLS and linearmodels on the renamed column
for the name clashes; Python's ``resource`` limits and a subprocess timeout for the
formulas; the standard library's ``html.parser`` and ``csv`` readers for the tables. The
data are the Grunfeld panel shipped in statsmodels.datasets.
"""

from __future__ import annotations

import base64
import io
import json
import re
import warnings

import numpy as np
import pandas as pd
import pytest

import bayespanel as bp

UNIT, TIME = "firm", "year"


def _png(fig) -> bytes:
    import matplotlib.pyplot as plt

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=60)
    plt.close(fig)
    return buf.getvalue()


# ---------------------------------------------------------------------- figures
DOLLARS = ["spend_$:cost_$", "$x$", r"a\$b$c$", "$\\frac{1}{0}$", "100% & #_{}^~ $", "$$"]


def test_matplotlib_reads_two_dollars_as_mathematics():
    # outside check: matplotlib itself fails on such a label (what the report met)
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots()
    ax.set_title("spend_$:cost_$")
    with pytest.raises(ValueError):
        _png(fig)
    plt.close("all")


@pytest.mark.parametrize("text", DOLLARS)
def test_literal_text_draws_exactly_what_matplotlib_draws_literally(text):
    """A title through ``literal`` renders to the same PNG as matplotlib's own literal
    mode (``parse_math=False``) of the raw string."""
    import matplotlib.pyplot as plt

    from bayespanel.report.figures import LITERAL_RC, literal

    def draw(**kw):
        with plt.rc_context(LITERAL_RC):
            fig, ax = plt.subplots(figsize=(3, 1))
            ax.set_axis_off()
            ax.set_title(**kw)
            return _png(fig)

    assert draw(label=literal(text)) == draw(label=text, parse_math=False)


@pytest.fixture(scope="module")
def dollar_run(grunfeld, tmp_path_factory):
    """A small run whose terms carry ``$``: ``spend_$``, ``cost_$`` and their product."""
    from bayespanel.app.runner import Settings, run

    df = grunfeld.rename(columns={"value": "spend_$", "capital": "cost_$"})
    out = tmp_path_factory.mktemp("dollar_run")
    path = out / "g.csv"
    df.to_csv(path, index=False)
    s = Settings(data=str(path), unit=UNIT, time=TIME,
                 formula="invest ~ `spend_$` * `cost_$`", models=("random_intercept",),
                 reference=("random",), draws=60, tune=60, chains=2, seed=5, ppc_draws=20,
                 title="$ spend $ and cost")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        results = run(s, out=out / "run", quiet=True)
    return out / "run", results


def _svg_texts(html: str) -> list[str]:
    """The text elements of every SVG figure embedded in the report (glyphs are text)."""
    import html as _html

    texts = []
    for b64 in re.findall(r'src="data:image/svg\+xml;base64,([^"]+)"', html):
        svg = base64.b64decode(b64).decode("utf-8")
        texts += [_html.unescape(t) for t in re.findall(r"<text[^>]*>([^<]*)</text>", svg)]
    return texts


def test_report_figures_show_dollar_labels_as_written(dollar_run):
    out, results = dollar_run
    html = (out / "report.html").read_text("utf-8")
    texts = _svg_texts(html)
    assert "spend_$:cost_$" in texts and "spend_$" in texts and "cost_$" in texts
    # outside check: statsmodels OLS of the interaction would name the same product term;
    # the reference numbers beside the label are linearmodels' RandomEffects
    from linearmodels.panel import RandomEffects

    d = grunfeld_indexed(results)
    re_fit = RandomEffects(d["invest"], d[["const", "spend", "cost", "spend:cost"]]).fit()
    ref = {c["term"]: c["estimate"] for c in results["reference"][0]["coefficients"]}
    assert ref["spend_$:cost_$"] == pytest.approx(re_fit.params["spend:cost"], rel=1e-6)


def grunfeld_indexed(results):
    from statsmodels.datasets import grunfeld as g

    df = g.load_pandas().data
    df = df[df["firm"] != "American Steel"].copy()
    df["year"] = df["year"].astype(int)
    df = df.rename(columns={"value": "spend", "capital": "cost"}).set_index(["firm", "year"])
    df["const"] = 1.0
    df["spend:cost"] = df["spend"] * df["cost"]
    return df


def test_report_rebuilt_from_hostile_titles_renders(dollar_run, tmp_path):
    """results.json is input too: titles and levels with ``$`` from a hand-edited file."""
    from bayespanel.report import load_results, write_report

    out, _ = dollar_run
    res = load_results(out)
    for m in res["models"]:
        m["title"] = "$\\alpha$ model_$"
    for f in res["reference"]:
        f["title"] = "ref_$:$"
    for r in (res.get("comparison") or {}).get("rows", []):
        r["title"] = "$\\sqrt{}$"
    write_report(res, tmp_path)
    texts = _svg_texts((tmp_path / "report.html").read_text("utf-8"))
    assert "$\\alpha$ model_$" in texts and "ref_$:$ (ref.)" in texts


def test_design_check_occasion_and_sensitivity_figures_render_dollars(dollar_run, grunfeld):
    """Figures returned to the caller save to PNG with ``$`` in every label."""
    import matplotlib.pyplot as plt

    from bayespanel.analysis.recovery import design_check
    from bayespanel.analysis.occasions import occasion_effects_figure
    from bayespanel.bayes.posterior import Posterior
    from bayespanel.analysis.sensitivity import sensitivity_section

    df = grunfeld.rename(columns={"value": "spend_$", "capital": "cost_$"})
    df[TIME] = "$" + df[TIME].astype(str) + "$"
    panel = bp.Panel(df, UNIT, TIME)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = design_check(panel, "RandomIntercept", "invest ~ `spend_$` + `cost_$`",
                           replicates=3, bayes=False, progress=False, workers=1)
        assert _png(res.figure())[:4] == b"\x89PNG"
        ref = bp.reference.within(panel, "invest ~ `spend_$`", occasion_effects=True)
        fig = occasion_effects_figure({"fit_$": ref}, reference_occasion="$1935$")
        labels = [t.get_text() for t in fig.axes[0].get_xticklabels()]
        assert _png(fig)[:4] == b"\x89PNG"
        assert labels[0] == r"\$1935\$"  # escaped for mathtext, drawn as $1935$
        post = Posterior.load(dollar_run[0] / "posteriors" / "random_intercept.nc")
        _, fig = sensitivity_section(post)
        assert _png(fig)[:4] == b"\x89PNG"
    plt.close("all")


# ---------------------------------------------------------------------- exhausting formulas
_ROUTES_SCRIPT = r'''
import json, resource, sys, warnings
limit = int(sys.argv[1]) << 20
resource.setrlimit(resource.RLIMIT_AS, (limit, limit))
warnings.simplefilter("ignore")
import dask.dataframe as dd
import pandas as pd
import bayespanel as bp
from bayespanel.app.cli import main
from bayespanel.core.errors import FormulaError

csv, formulas = sys.argv[2], json.loads(open(sys.argv[3]).read())
df = pd.read_csv(csv)
panel = bp.Panel(df, "firm", "year")
dpanel = bp.Panel(dd.from_pandas(df, npartitions=2), "firm", "year", client="synchronous")
routes = {
    "design": lambda f: panel.design(f),
    "reference": lambda f: bp.reference.pooled(panel, f),
    "builder": lambda f: bp.models.RandomIntercept(panel, f),
    "dask": lambda f: dpanel.design(f),
}
for f in formulas:
    for name, call in routes.items():
        try:
            call(f)
            out = "accepted"
        except FormulaError as exc:
            out = "FormulaError: " + str(exc)
        except BaseException as exc:
            out = f"{type(exc).__name__}: {exc}"[:300]
        print(json.dumps([f[:60], name, out]), flush=True)
    rc = main(["fit", csv, "--unit", "firm", "--time", "year", "--formula", f,
               "--out", sys.argv[4], "--quiet", "--models", "none", "--reference", "pooled"])
    print(json.dumps([f[:60], "command line", rc]), flush=True)
'''

EXHAUSTING = {
    # formula -> what the refusal must name
    "invest ~ I(value + 9**9**9)": r"computes a whole number too large .*'constant_digits'",
    "invest ~ (value + capital + c1 + c2)**12": r"power 12.*'interaction_order'",
    "invest ~ value + I('a'*10**10)": r"text and tuples cannot enter arithmetic",
    "invest ~ value + I((1,)*10**10)": r"text and tuples cannot enter arithmetic",
    "invest ~ value + I('%0999999999d' % 1)": r"text and tuples cannot enter arithmetic",
    "invest ~ value + I(" + "np.square(" * 12 + "10**30" + ")" * 13:
        r"'constant_digits'",
    "invest ~ " + " + ".join(f"I(value + {i})" for i in range(20_000)):
        r"has 368,896 characters; the limit is 20,000",
    "invest ~ " + " + ".join(f"I(value+{i})" for i in range(1_200)):
        r"generates too many terms \(1,001\); the limit is 1,000",
    "invest ~ (value + capital)*(c1 + c2)*(" + " + ".join(f"I(value*{i})" for i in range(300))
    + ")": r"makes too many products|generates too many terms",
    "invest ~ value*capital*c1*c2*c3*c4*c5": r"7 variables\); the limit is 6",
}


def test_formulas_that_would_exhaust_the_machine_are_refused_on_every_route(grunfeld,
                                                                          tmp_path):
    """Each formula goes through Panel.design, a reference fit, a Bayesian builder, the
    Dask design and ``bayespanel fit``, in a subprocess capped at 2 GB of address space
    (``resource.setrlimit``) and 180 s: every route must refuse with a FormulaError naming
    the piece and the limit (today's behaviour was to run for ever or ask for 10 GB)."""
    import subprocess
    import sys

    df = grunfeld.assign(c1=lambda d: d["value"] ** 0.5, c2=lambda d: d["capital"] ** 0.5,
                         c3=lambda d: np.log(d["value"]), c4=lambda d: np.log(d["capital"]),
                         c5=lambda d: d["value"] * 0 + np.arange(len(d)) % 7)
    csv = tmp_path / "g.csv"
    df.to_csv(csv, index=False)
    env = {**__import__("os").environ, "OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1"}
    (tmp_path / "formulas.json").write_text(json.dumps(list(EXHAUSTING)))
    proc = subprocess.run([sys.executable, "-c", _ROUTES_SCRIPT, "2048", str(csv),
                           str(tmp_path / "formulas.json"), str(tmp_path / "out")],
                          capture_output=True, text=True, timeout=180, env=env)
    lines = [json.loads(x) for x in proc.stdout.splitlines() if x.startswith("[")]
    assert len(lines) == 5 * len(EXHAUSTING), (proc.stdout[-2000:], proc.stderr[-2000:])
    for (f, route, out), (formula, pattern) in zip(lines, [(f, p) for f, p in
                                                          EXHAUSTING.items() for _ in range(5)]):
        if route == "command line":
            assert out == 2, (f, out)
            continue
        assert out.startswith("FormulaError: "), (f, route, out)
        assert re.search(pattern, out), (f, route, out)
    # the command line printed the same refusals, one line each, without a traceback
    assert "Traceback" not in proc.stderr
    assert proc.stderr.count("bayespanel: error: ") == len(EXHAUSTING)


def test_limits_leave_real_formulas_alone_and_count_terms_as_formulaic_does():
    """Formulas within the limits pass, and the screen's count of terms equals formulaic's
    own expansion (outside check: ``formulaic.Formula``) on formulas up to the limits."""
    from formulaic import Formula

    from bayespanel.data.formula import LIMITS, _check_cost, screen

    cols = ["y"] + list("abcdefgh")
    for rhs in ["a + b", "a*b*c", "(a + b + c + d)**3", "(a + b + c + d)**6", "a/b",
                "(a + b)/c", "a:b + c - 1", "0 + a*b", "a*b - a:b", "(a + b)*(c + d + e)",
                "a*b*c*d*e*f", "I(a**2) + np.log(b) + C(c) + poly(d, degree=3)",
                "(a + b + c + d + e + f + g + h)**2", "center(a) * scale(b)"]:
        screen(f"y ~ {rhs}", cols)
        assert _check_cost(rhs, rhs, {}) == len(list(Formula(rhs))), rhs
    assert LIMITS["terms"] >= 1000 and LIMITS["interaction_order"] >= 6


# ---------------------------------------------------------------------- names that clash
CLASHING = ["Intercept", "value (within)", "value (between)", "value (unit mean)",
            "occasion[1940]", "sigma_obs", "sigma_unit", "icc", "coef", "unit_effect",
            "shape", "sigma_slope[value]", "corr[Intercept, value]"]


def _routes(df, formula):
    """The in-memory design, a reference fit, a Bayesian builder and the Dask design."""
    import dask.dataframe as dd

    panel = bp.Panel(df, UNIT, TIME)
    dpanel = bp.Panel(dd.from_pandas(df, npartitions=2), UNIT, TIME, client="synchronous")
    return {"design": lambda: panel.design(formula),
            "reference": lambda: bp.reference.within(panel, formula),
            "builder": lambda: bp.models.WithinBetween(panel, formula),
            "dask": lambda: dpanel.design(formula)}


def _cli_fit(df, formula, tmp_path, capsys):
    from bayespanel.app.cli import main

    path = tmp_path / "panel.csv"
    df.to_csv(path, index=False)
    rc = main(["fit", str(path), "--unit", UNIT, "--time", TIME, "--formula", formula,
               "--out", str(tmp_path / "out"), "--quiet", "--models", "none"])
    return rc, capsys.readouterr().err


@pytest.mark.parametrize("name", CLASHING)
def test_a_column_named_like_a_generated_label_is_refused_on_every_route(grunfeld, name,
                                                                         tmp_path, capsys):
    from bayespanel.core.errors import FormulaError

    df = grunfeld.rename(columns={"value": name})
    formula = f"invest ~ `{name}` + capital"
    for route, call in _routes(df, formula).items():
        with pytest.raises(FormulaError, match=re.escape(f"column {name!r} has the name "
                                                         "bayespanel gives to")):
            call()
    rc, err = _cli_fit(df, formula, tmp_path, capsys)
    assert rc == 2 and f"column {name!r} has the name bayespanel gives to" in err
    assert not (tmp_path / "out" / "results.json").exists()


def test_the_renamed_column_gives_the_answer_of_statsmodels_and_linearmodels(grunfeld):
    """What the refusal asks for (rename the column) gives the right numbers: outside
    checks statsmodels OLS (pooled) and linearmodels PanelOLS (within) on the column."""
    import statsmodels.api as sm
    from linearmodels.panel import PanelOLS

    df = grunfeld.rename(columns={"value": "intercept_shift"})
    panel = bp.Panel(df, UNIT, TIME)
    f = "invest ~ intercept_shift + capital"
    pooled = bp.reference.pooled(panel, f)
    ols = sm.OLS(df["invest"], sm.add_constant(df[["intercept_shift", "capital"]])).fit()
    assert list(pooled.coef.index) == ["Intercept", "intercept_shift", "capital"]
    np.testing.assert_allclose(pooled.coef.to_numpy(), ols.params.to_numpy(), rtol=1e-10)
    d = df.set_index([UNIT, TIME])
    fe = PanelOLS(d["invest"], d[["intercept_shift", "capital"]], entity_effects=True).fit()
    within = bp.reference.within(panel, f)
    np.testing.assert_allclose(within.coef.to_numpy(), fe.params.to_numpy(), rtol=1e-8)


def test_a_column_named_like_an_inner_posterior_variable_gets_its_own_draws(grunfeld):
    """A covariate named ``sigma_obs_std`` (an inner variable of the sampled graph) used
    to read that variable's draws as its own. Its summary row is now its coefficient:
    outside check, the REML estimate of statsmodels MixedLM on the same data."""
    import statsmodels.formula.api as smf

    df = grunfeld.rename(columns={"value": "sigma_obs_std"})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        post = bp.models.RandomIntercept(bp.Panel(df, UNIT, TIME),
                                         "invest ~ sigma_obs_std + capital").sample(
            draws=150, tune=150, chains=2, seed=2, progress=False)
    row = post.summary().loc["sigma_obs_std"]
    assert row["mean"] == pytest.approx(post.coef["sigma_obs_std"], rel=1e-12)
    ml = smf.mixedlm("invest ~ sigma_obs_std + capital", df, groups=UNIT).fit(reml=True)
    assert abs(row["mean"] - ml.params["sigma_obs_std"]) < 4 * row["sd"]


def test_a_column_equal_to_a_term_formulaic_builds_is_refused(grunfeld):
    from bayespanel.core.errors import FormulaError

    df = grunfeld.assign(**{"np.log(value)": np.log(grunfeld["value"]) + 1.0})
    with pytest.raises(FormulaError, match=r"uses the column `np\.log\(value\)` and the transform"):
        bp.Panel(df, UNIT, TIME).design("invest ~ np.log(value) + `np.log(value)`")


@pytest.mark.parametrize("formula", ["invest ~ invest + value", "invest ~ value + np.log(invest)",
                                     "invest ~ I(invest * 2) + capital"])
def test_the_outcome_among_the_covariates_is_refused_on_every_route(grunfeld, formula,
                                                                   tmp_path, capsys):
    """Today's answer was a coefficient of 1 with a standard error of 0 (statsmodels OLS
    of a variable on itself gives the same: the fit is perfect and says nothing)."""
    from bayespanel.core.errors import FormulaError

    expected = "the outcome's column 'invest' is also among the covariates"
    for route, call in _routes(grunfeld, formula).items():
        with pytest.raises(FormulaError, match=expected):
            call()
    rc, err = _cli_fit(grunfeld, formula, tmp_path, capsys)
    assert rc == 2 and expected in err


# ---------------------------------------------------------------------- outputs other programs read
INJECTED = {"value": "=HYPERLINK(\"http://example.invalid\",\"x\")",
            "capital": "<img src=x onerror=alert(1)>[y](javascript:alert(2))"}


@pytest.fixture(scope="module")
def injected_run(grunfeld, tmp_path_factory):
    """A reference-only run whose covariates are named like a spreadsheet formula and
    like HTML with a Markdown link."""
    from bayespanel.app.runner import Settings, run

    df = grunfeld.rename(columns=INJECTED)
    df["@sum"] = -np.sqrt(grunfeld["value"])  # negative values: must stay numbers
    out = tmp_path_factory.mktemp("injected")
    path = out / "g.csv"
    df.to_csv(path, index=False)
    names = list(INJECTED.values()) + ["@sum"]
    s = Settings(data=str(path), unit=UNIT, time=TIME, models=(), reference=("pooled",),
                 formula="invest ~ " + " + ".join(f"`{n}`" for n in names))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        results = run(s, out=out / "run", quiet=True)
    return out / "run", results, df


def test_csv_tables_neutralise_formulas_but_keep_numbers(injected_run):
    """Outside check: the standard library's csv reader; a cell a spreadsheet would run
    starts with =, +, -, @, tab or CR (OWASP, CSV injection) unless it is a number."""
    import csv

    out, results, df = injected_run
    files = sorted((out / "tables").glob("*.csv"))
    assert files
    seen_negative = False
    for f in files:
        for row in csv.reader(io.StringIO(f.read_text("utf-8"))):
            for cell in row:
                if cell[:1] in ("=", "+", "-", "@", "\t", "\r"):
                    float(cell)  # only numbers may start so
                    seen_negative |= cell.startswith("-")
    assert seen_negative  # the negative estimate of @sum is still a number
    text = (out / "tables" / "coefficients_long.csv").read_text("utf-8") \
        if (out / "tables" / "coefficients_long.csv").exists() else \
        "".join(f.read_text("utf-8") for f in files)
    assert "'=HYPERLINK(" in text and "'@sum" in text
    # the estimate next to the neutralised name is statsmodels OLS's
    import statsmodels.api as sm

    names = list(INJECTED.values()) + ["@sum"]
    ols = sm.OLS(df["invest"], sm.add_constant(df[names])).fit()
    est = {c["term"]: c["estimate"] for c in results["reference"][0]["coefficients"]}
    assert est["@sum"] == pytest.approx(ols.params["@sum"], rel=1e-9)
    assert est["Intercept"] == pytest.approx(ols.params["const"], rel=1e-9)


def test_markdown_tables_escape_html_and_links(injected_run):
    """Outside check: the standard library's HTML parser finds no tag in the Markdown
    files (a Markdown viewer renders raw HTML), and no Markdown link is left."""
    from html.parser import HTMLParser

    class Tags(HTMLParser):
        def __init__(self):
            super().__init__()
            self.tags = []

        def handle_starttag(self, tag, attrs):
            self.tags.append(tag)

    out, _, _ = injected_run
    files = sorted((out / "tables").glob("*.md"))
    assert files
    for f in files:
        md = f.read_text("utf-8")
        parser = Tags()
        parser.feed(md)
        assert parser.tags == [], (f.name, parser.tags)
        assert not re.search(r"(?<!\\)\]\(", md), f.name  # no [text](url) link
    md = "".join(f.read_text("utf-8") for f in files)
    assert "&lt;img src=x onerror=alert(1)&gt;\\[y\\](javascript:alert(2))" in md


def test_markdown_escape_round_trips():
    """What the escaping writes reads back as the original text (CommonMark: a backslash
    before punctuation is a literal; entities are characters), checked here by undoing it."""
    import html as _html

    from bayespanel.report.tables import markdown_escape

    for s in ["<b>&amp;</b>", "a|b", "x_y*z`", "[a](b)", "~~s~~", "\\", "plain"]:
        back = _html.unescape(re.sub(r"\\(.)", r"\1", markdown_escape(s)))
        assert back == s


def test_describe_prints_no_terminal_codes(grunfeld, tmp_path, capsys):
    from bayespanel.app.cli import main

    name = "\x1b[31mred\x1b[0m\u202egnp"
    path = tmp_path / "g.csv"
    grunfeld.rename(columns={"value": name}).to_csv(path, index=False)
    assert main(["describe", str(path), "--unit", UNIT, "--time", TIME]) == 0
    out = capsys.readouterr().out
    assert "\x1b" not in out and "\u202e" not in out
    assert "\\x1b[31mred\\x1b[0m\\u202egnp" in out  # shown, as escapes


def test_describe_of_huge_values_is_finite_and_exact(grunfeld, tmp_path, capsys):
    """Values near 1e301 used to give infinite SDs. Outside check: the standard library's
    statistics.stdev, which sums exactly (fractions) and so cannot overflow."""
    import statistics

    df = grunfeld.assign(value=grunfeld["value"] * 1e298)
    desc = bp.Panel(df, UNIT, TIME).describe()
    row = desc.loc["value"]
    assert np.isfinite(row[["mean", "sd_overall", "sd_between", "sd_within"]].astype(float)).all()
    assert row["sd_overall"] == pytest.approx(statistics.stdev(df["value"].tolist()), rel=1e-12)
    means = df.groupby(UNIT)["value"].mean().tolist()
    assert row["sd_between"] == pytest.approx(statistics.stdev(means), rel=1e-12)
    assert row["share_within"] == pytest.approx(
        bp.Panel(grunfeld, UNIT, TIME).describe().loc["value", "share_within"], rel=1e-12)
    from bayespanel.app.cli import main

    path = tmp_path / "big.csv"
    df.to_csv(path, index=False)
    assert main(["describe", str(path), "--unit", UNIT, "--time", TIME]) == 0
    out = capsys.readouterr().out
    assert "1.08e+301" in out and "inf" not in out  # three significant digits


def test_describe_names_the_columns_it_leaves_out(grunfeld, tmp_path, capsys):
    from bayespanel.app.cli import main

    df = grunfeld.copy()
    df["note"] = "x"
    df["value"] = df["value"].astype(object)
    df.loc[5, "value"] = "abc"
    path = tmp_path / "g.csv"
    df.to_csv(path, index=False)
    assert main(["describe", str(path), "--unit", UNIT, "--time", TIME]) == 0
    out = capsys.readouterr().out
    assert "left out (2): " in out
    assert "note (text, e.g. 'x')" in out
    assert ("value (text: 1 value(s) are not numbers, the first 'abc' at firm='General "
            "Motors', year=1940)") in out


def test_dates_written_month_first_are_read_as_dates(grunfeld):
    """m/d/yyyy text sorted as text made units look as if they had gaps. Unambiguous
    dates are read as dates (said in a DataHandlingWarning); outside check: pandas'
    to_datetime with the explicit format gives the same order, and the within fit with
    occasion effects equals the one on the integer years (linearmodels PanelOLS with time
    effects)."""
    from linearmodels.panel import PanelOLS

    from bayespanel.core.errors import DataHandlingWarning

    df = grunfeld.assign(date=[f"{y % 12 + 1}/{13 + y % 15}/{y}" for y in grunfeld[TIME]])
    with pytest.warns(DataHandlingWarning, match=r"read as dates, month first"):
        panel = bp.Panel(df.drop(columns=TIME), UNIT, "date")
    assert panel.structure()["n_units_with_gaps"] == 0
    expected = np.sort(pd.to_datetime(df["date"], format="%m/%d/%Y").unique())
    np.testing.assert_array_equal(panel.occasions, expected)
    fit = bp.reference.within(panel, "invest ~ value + capital", occasion_effects=True)
    d = grunfeld.set_index([UNIT, TIME])
    lm = PanelOLS(d["invest"], d[["value", "capital"]], entity_effects=True,
                  time_effects=True).fit()
    np.testing.assert_allclose(fit.coef[["value", "capital"]].to_numpy(),
                               lm.params[["value", "capital"]].to_numpy(), rtol=1e-8)
    assert "occasion[1936-05-14]" in fit.coef.index


def test_a_parquet_folder_without_parquet_files_is_named(tmp_path, capsys):
    from bayespanel.app.cli import main
    from bayespanel.core.errors import PanelDataError

    (tmp_path / "data").mkdir()
    (tmp_path / "data" / "notes.txt").write_text("not a table")
    with pytest.raises(PanelDataError, match=r"holds no Parquet files .*it holds 'notes\.txt'"):
        bp.Panel.from_file(tmp_path / "data", UNIT, TIME)
    for extra in ([], ["--out-of-core"]):
        rc = main(["describe", str(tmp_path / "data"), "--unit", UNIT, "--time", TIME] + extra)
        err = capsys.readouterr().err
        assert rc == 2 and "holds no Parquet files" in err and "columns are" not in err


def test_messages_on_the_out_of_core_route_show_plain_numbers(grunfeld):
    import dask.dataframe as dd

    from bayespanel.core.errors import PanelDataError

    df = grunfeld.assign(capital=7.0)
    dpanel = bp.Panel(dd.from_pandas(df, npartitions=2), UNIT, TIME, client="synchronous")
    with pytest.raises(PanelDataError) as info:
        dpanel.design("invest ~ value + capital")
    assert "covariate 'capital' is constant (7.0)" in str(info.value)


def test_dask_reading_notices_do_not_reach_the_record_of_a_run(wage_panel, tmp_path):
    """dask's Parquet reader calls DataFrame.reset_index(inplace=True), deprecated in
    pandas 3.1, on every partition of files written without a pandas index; a run records
    every warning of its data stage (as here) into results.json. Outside check: pandas
    itself warns on that call (shown first), so the test would see the notice if the
    engine let it through."""
    from bayespanel.data.sources.dask import DaskPanel

    with pytest.warns(Warning, match="inplace keyword in DataFrame.reset_index"):
        pd.DataFrame({"a": [1]}).reset_index(drop=True, inplace=True)
    folder = tmp_path / "parts"
    folder.mkdir()
    for i, idx in enumerate(np.array_split(np.arange(len(wage_panel)), 3)):
        wage_panel.iloc[idx].to_parquet(folder / f"part{i}.parquet", index=False)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        panel = DaskPanel.from_parquet(str(folder), unit="nr", time="year",
                                       client="synchronous")
        design = panel.design("lwage ~ exper + union", cluster=True)
        panel.describe()
    assert design.n == len(wage_panel)
    assert [str(w.message) for w in caught] == []


def test_control_characters_in_labels_are_drawn_as_escapes():
    """No font draws ESC (matplotlib warned 'Glyph 27 missing'); labels show it escaped,
    as the console does."""
    import matplotlib.pyplot as plt

    from bayespanel.report.figures import LITERAL_RC, literal

    assert literal("\x1b[31mred$") == "\\x1b[31mred\\$"
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with plt.rc_context(LITERAL_RC):
            fig, ax = plt.subplots(figsize=(3, 1))
            ax.set_title(literal("\x1b[31mred\u202e$x$"))
            assert _png(fig)[:4] == b"\x89PNG"


def test_the_console_says_what_the_data_stage_did(grunfeld, tmp_path, capsys):
    """Occasions read as dates and rows dropped are printed after the estimates, not only
    written to results.json."""
    from bayespanel.app.cli import main

    df = grunfeld.assign(date=[f"{y % 12 + 1}/{13 + y % 15}/{y}" for y in grunfeld[TIME]])
    df.loc[[3, 4], "value"] = np.nan
    path = tmp_path / "g.csv"
    df.drop(columns=TIME).to_csv(path, index=False)
    rc = main(["fit", str(path), "--unit", UNIT, "--time", "date", "--formula",
               "invest ~ value + capital", "--models", "none", "--reference", "within",
               "--out", str(tmp_path / "out"), "--quiet"])
    out = capsys.readouterr().out
    assert rc == 0
    assert "note: time column 'date' read as dates, month first" in out
    assert "note: dropped 2 of 200 rows with missing values (value: 2)" in out


def test_names_that_contain_keywords_or_double_underscores_are_columns(grunfeld):
    """``lambda_hat`` was refused as a lambda expression (a substring test); such names
    are columns. Outside check: statsmodels OLS on the same columns."""
    import statsmodels.api as sm

    df = grunfeld.rename(columns={"value": "lambda_hat", "capital": "k__stock"})
    res = bp.reference.pooled(bp.Panel(df, UNIT, TIME), "invest ~ lambda_hat + k__stock")
    ols = sm.OLS(df["invest"], sm.add_constant(df[["lambda_hat", "k__stock"]])).fit()
    np.testing.assert_allclose(res.coef.to_numpy(), ols.params.to_numpy(), rtol=1e-10)
    from bayespanel.core.errors import FormulaError

    with pytest.raises(FormulaError, match="lambda expressions"):
        bp.Panel(df, UNIT, TIME).design("invest ~ (lambda: lambda_hat)()")
    with pytest.raises(FormulaError, match="double-underscore"):
        bp.Panel(df, UNIT, TIME).design("invest ~ lambda_hat + __builtins__")
