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
    from bayespanel.runner import Settings, run

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

    from bayespanel.design_check import design_check
    from bayespanel.occasions import occasion_effects_figure
    from bayespanel.posterior import Posterior
    from bayespanel.sensitivity import sensitivity_section

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
