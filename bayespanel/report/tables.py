"""Tables of a run, shaped from ``results.json`` and written as Markdown, LaTeX and CSV.

The writers are our own (no optional dependency): Markdown pipe tables, LaTeX
``tabular`` with every special character escaped, CSV through pandas. Markdown and LaTeX
show numbers by the one rule of :mod:`bayespanel.report.numbers` and end with notes and
the footer (rows, units, occasions, ICC); CSV keeps full precision.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd

from ..core.terms import PARTS, parse
from . import numbers as num
from .results_json import write_atomic
from .text import HEADINGS, label

__all__ = ["coefficient_grid", "result_tables", "display_tables", "display_frame", "footer",
           "to_markdown", "to_latex", "write_tables"]

def _split(term: str):
    """``(covariate label, rank of the part)``: a covariate's rows, then its parts in the
    order of :data:`bayespanel.core.terms.PARTS`."""
    t = parse(term)
    return t.column.label, PARTS.index(t.part)


def coefficient_grid(results: dict):
    """Columns (Bayesian model beside its reference counterpart) and the row order of terms.

    Returns ``(columns, terms)``; each column is a dict with ``key``, ``title``, ``kind``
    (``"bayesian"`` or ``"reference"``) and ``cells`` (term -> estimate, lower, upper).
    Terms are grouped by covariate: the term itself, then its within, between and
    unit-mean parts.
    """
    refs = {f["name"]: f for f in results.get("reference", [])}
    used, cols = set(), []

    def ref_col(f):
        used.add(f["name"])
        return {"key": f"ref:{f['name']}", "title": f"{f['title']} (ref.)", "kind": "reference",
                "cells": {c["term"]: {"estimate": c["estimate"], "lower": c["lower"],
                                      "upper": c["upper"], "se": c.get("se"),
                                      "p_value": c.get("p_value"), "df": c.get("df")}
                          for c in f["coefficients"]}}

    for m in results.get("models", []):
        cols.append({"key": m["name"], "title": m["title"], "kind": "bayesian",
                     "cells": {c["term"]: {"estimate": c["estimate"], "lower": c["lower"],
                                           "upper": c["upper"], "sd": c.get("sd")}
                               for c in m["coefficients"]}})
        cp = m.get("reference_counterpart")
        if cp in refs and cp not in used:
            cols.append(ref_col(refs[cp]))
    for name, f in refs.items():
        if name not in used:
            cols.append(ref_col(f))
    bases, keyed = [], []
    for c in cols:
        for t in c["cells"]:
            b, s = _split(t)
            if b not in bases:
                bases.append(b)
            if t not in [k for _, _, k in keyed]:
                keyed.append((b, s, t))
    if "Intercept" in bases:
        bases.remove("Intercept")
        bases.insert(0, "Intercept")
    terms = [t for _, _, t in sorted(keyed, key=lambda k: (bases.index(k[0]), k[1]))]
    return cols, terms


# ---------------------------------------------------------------------- footer
def _icc_text(results) -> str:
    """ICC of every model and fit with a unit variance, for the table footer."""
    bayes = []
    for m in results.get("models", []):
        vp = m.get("variance_partition") or {}
        q = {r["quantity"]: r for r in vp.get("summary", [])}.get("ICC")
        if q is not None and q.get("estimate") is not None:
            bayes.append((m["title"], num.estimate(q["estimate"], q.get("sd"))))
    refs = []
    for f in results.get("reference", []):
        if f.get("icc") is None and not f.get("unit_variance_at_zero"):
            continue
        v = "0 (unit variance estimated at zero)" if f.get("unit_variance_at_zero") \
            else num.plain(f["icc"])
        refs.append((f["title"], v))
    parts = []
    if bayes:
        parts.append(f"{label('icc')} (posterior means): " + _group_values(bayes))
    if refs:
        meth = sorted({f["method"] for f in results.get("reference", [])
                       if f.get("method") and (f.get("icc") is not None
                                               or f.get("unit_variance_at_zero"))})
        parts.append(f"{label('icc')} of the reference fits"
                     + (f" ({', '.join(meth)})" if meth else "") + ": "
                     + _group_values(refs))
    return "; ".join(parts)


def footer(results: dict, icc: bool = True) -> str:
    """The footer line of every table: rows, units, occasions and the ICC of each model."""
    d = results["data"]
    smp, s = d["sample"], d["structure"]
    text = (f"N = {num.count(smp['n_rows'])} rows of {num.count(smp['n_units'])} units "
            f"({d['unit']}), {num.count(s['n_occasions'])} occasions ({d['time']}).")
    icc_text = _icc_text(results) if icc else ""
    if icc_text:
        text += f" {icc_text}."
    return text


# ---------------------------------------------------------------------- frames
def _uncertainty_of(cell):
    return cell.get("sd", cell.get("se"))


def _coefficients_df(results) -> pd.DataFrame:
    cols, terms = coefficient_grid(results)
    rows = []
    for t in terms:
        for c in cols:
            cell = c["cells"].get(t)
            if cell is not None:
                rows.append({"term": t, "model": c["title"], "kind": c["kind"],
                             "estimate": cell["estimate"], "sd_or_se": _uncertainty_of(cell),
                             "lower": cell["lower"], "upper": cell["upper"],
                             "p_value": cell.get("p_value"), "df": cell.get("df")})
    return pd.DataFrame(rows)


def _wide_coefficients_df(results) -> pd.DataFrame:
    """Full precision: each model's estimate and SD/SE side by side (the CSV)."""
    cols, terms = coefficient_grid(results)
    data = {}
    for c in cols:
        for key, what in (("estimate", "estimate"), ("unc", "SD" if c["kind"] == "bayesian"
                                                     else "SE")):
            data[f"{c['title']}: {what}"] = [
                (c["cells"][t]["estimate"] if key == "estimate" else
                 _uncertainty_of(c["cells"][t])) if t in c["cells"] else None for t in terms]
        if c["kind"] == "reference":
            data[f"{c['title']}: p-value"] = [c["cells"][t].get("p_value") if t in c["cells"]
                                              else None for t in terms]
    return pd.DataFrame(data, index=pd.Index(terms, name="term"))


def _variance_rows(results):
    """(model, quantity label, estimate, median, SD, lower, upper, note) of every model
    and fit with a unit variance (the estimate: a posterior mean or a reference fit's
    estimate); labels from :data:`text.LABELS`."""
    rows = []
    for m in results["models"]:
        for q in (m.get("variance_partition") or {}).get("summary", []):
            rows.append({"model": m["title"], "quantity": label(q["quantity"]),
                         "estimate": q.get("estimate"), "median": q.get("median"),
                         "sd": q.get("sd"),
                         "lower": q.get("lower"), "upper": q.get("upper"), "note": ""})
    for f in results["reference"]:
        if f.get("icc") is None and not f.get("unit_variance_at_zero"):
            continue
        zero = bool(f.get("unit_variance_at_zero"))
        for q in ("sigma_unit", "sigma_obs", "icc"):
            rows.append({"model": f["title"] + " (ref.)", "quantity": label(q),
                         "estimate": f.get(q), "median": None, "sd": None, "lower": None,
                         "upper": None,
                         "note": "estimated at zero" if zero and q != "sigma_obs" else ""})
    return rows


def result_tables(results: dict) -> dict[str, pd.DataFrame]:
    """Every table of the report as a DataFrame of full-precision values, keyed by file
    stem (what the CSV files hold; :func:`display_tables` formats them)."""
    out = {"coefficients": _wide_coefficients_df(results),
           "coefficients_long": _coefficients_df(results),
           "data_description": pd.DataFrame(results["data"]["variables"]).set_index("variable")}
    vp = _variance_rows(results)
    if vp:
        out["variance_partition"] = pd.DataFrame(vp)
    ct = [dict(model=m["title"], **{k: v for k, v in c.items()}) for m in results["models"]
          for c in m.get("contrasts") or []]
    if ct:
        out["contrasts"] = pd.DataFrame(ct)
    if results.get("tests"):
        out["tests"] = pd.DataFrame(results["tests"])
    comp = results.get("comparison") or {}
    if comp.get("rows"):
        out["comparison"] = pd.DataFrame(comp["rows"]).drop(columns=["model"], errors="ignore")
    if results["models"]:
        out["diagnostics"] = pd.DataFrame(
            [{"model": m["title"], **{k: v for k, v in m["diagnostics"].items() if k != "warnings"}}
             for m in results["models"]])
    return out


# ---------------------------------------------------------------------- display
#: How each column of a table is shown (see bayespanel.report.numbers): a kind, or
#: ("estimate", column of its uncertainty). Columns not listed are shown as text, or as
#: plain numbers when they hold numbers.
COLUMN_KINDS = {
    "estimate": ("estimate", "sd_or_se"), "sd_or_se": "uncertainty",
    "lower": ("estimate", "sd_or_se"), "upper": ("estimate", "sd_or_se"),
    "mean": ("estimate", "sd"), "median": ("estimate", "sd"), "sd": "uncertainty",
    "p_value": "p_value", "df": "dof", "statistic": "plain", "f_statistic": "plain",
    "f_p_value": "p_value", "f_df_denom": "dof",
    "p_positive": "probability", "p_negative": "probability", "p_rope": "probability",
    "rope": "plain", "reference_estimate": ("estimate", "reference_se"),
    "reference_se": "uncertainty", "reference_lower": ("estimate", "reference_se"),
    "reference_upper": ("estimate", "reference_se"),
    "elpd": ("estimate", "se"), "se": "uncertainty", "elpd_diff": ("estimate", "se_diff"),
    "se_diff": "uncertainty", "p_loo": "plain", "weight": "share",
    "n_points": "count", "n_high_pareto_k": "count", "max_k": "pareto_k",
    "divergences": "count", "draws": "count", "max_rhat": "rhat", "min_ess_bulk": "count",
    "min_ess_tail": "count", "min_bfmi": "bfmi", "seconds": "plain",
    "n": "count", "n_missing": "count", "share_within": "share", "varies_within": "text",
}


def _show(value, kind, row=None) -> str:
    if value is None or (isinstance(value, float) and value != value):
        return ""
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if kind == "text" or isinstance(value, str):
        return str(value)
    if isinstance(value, (int, float, np.integer, np.floating)):
        if isinstance(kind, tuple):
            return num.estimate(value, None if row is None else row.get(kind[1]))
        return num.number(value, kind or "plain")
    return str(value)


def display_frame(df: pd.DataFrame, kinds: dict | None = None) -> pd.DataFrame:
    """``df`` with every cell formatted by the numbers rule (strings), per column kind."""
    kinds = {**COLUMN_KINDS, **(kinds or {})}
    idx = not isinstance(df.index, pd.RangeIndex)
    flat = df.reset_index() if idx else df
    recs = flat.to_dict(orient="records")
    out = pd.DataFrame([{c: _show(r[c], kinds.get(c), r) for c in flat.columns} for r in recs],
                       columns=list(flat.columns))
    return out.set_index(list(df.index.names)) if idx else out


def _wide_display(results) -> pd.DataFrame:
    """Estimate (SD or SE) of each model by term; reference p-values in their own column."""
    cols, terms = coefficient_grid(results)
    data = {}
    for c in cols:
        cells = [c["cells"].get(t) for t in terms]
        data[c["title"]] = ["" if x is None or x["estimate"] is None else
                            f"{num.estimate(x['estimate'], _uncertainty_of(x))} "
                            f"({num.uncertainty(_uncertainty_of(x))})" for x in cells]
        if c["kind"] == "reference":
            data[f"{c['title']}: p"] = ["" if x is None else num.p_value(x.get("p_value"))
                                        for x in cells]
    return pd.DataFrame(data, index=pd.Index(terms, name="term"))


def distribution_text(results) -> str:
    """One sentence naming the distribution the reference fits' p-values and intervals use
    (from each fit's ``test_distribution``); "" when no fit records one."""
    fits = [f for f in results.get("reference", []) if f.get("test_distribution")]
    if not fits:
        return ""
    kinds = {f["test_distribution"] for f in fits}
    if len(kinds) == 1:
        return (f"Reference p-values and intervals use {kinds.pop()} for every fit "
                f"({fits[0]['cov']} covariance).")
    return ("Reference p-values and intervals use "
            + "; ".join(f"{f['title']}: {f['test_distribution']}" for f in fits) + ".")


def display_tables(results: dict) -> dict[str, tuple[pd.DataFrame, list[str]]]:
    """Every table formatted for reading (Markdown, LaTeX): ``name -> (frame, notes)``.

    Numbers follow :mod:`bayespanel.report.numbers`; the notes end with :func:`footer`.
    """
    raw = result_tables(results)
    prob = results["settings"]["interval"]
    pct = f"{100 * float(prob):g}%"
    foot = footer(results)
    dist = distribution_text(results)
    out = {}
    out["coefficients"] = (_wide_display(results), [
        "Bayesian columns: posterior mean (posterior SD); reference columns: estimate "
        "(standard error), with the p-value of a zero coefficient beside them. Digits follow "
        "the uncertainty (two significant digits of the SD or SE).", dist, foot])
    long = raw["coefficients_long"].copy()
    if len(long):
        long["interval"] = [num.interval(lo, hi, u) for lo, hi, u in
                            zip(long["lower"], long["upper"], long["sd_or_se"])]
        long = long[["term", "model", "kind", "estimate", "sd_or_se", "interval", "p_value",
                     "df"]]
    out["coefficients_long"] = (display_frame(long).rename(columns={
        "sd_or_se": "SD or SE", "interval": f"{pct} interval", "p_value": "p-value"}),
        [f"Bayesian rows: posterior mean, SD and {pct} equal-tailed interval; reference "
         f"rows: estimate, standard error, {pct} confidence interval and the p-value of a "
         "zero coefficient, on the reference distribution with df degrees of freedom "
         "(empty df: the normal distribution).", dist, foot])
    out["data_description"] = (describe_display(raw["data_description"]),
                               [footer(results, icc=False)])
    if "variance_partition" in raw:
        vp = raw["variance_partition"].copy()
        vp["interval"] = [num.interval(lo, hi, u) if lo is not None and lo == lo else ""
                          for lo, hi, u in zip(vp["lower"], vp["upper"], vp["sd"])]
        vp = vp[["model", "quantity", "estimate", "median", "sd", "interval", "note"]]
        shown = display_frame(vp, {"estimate": ("estimate", "sd")})
        out["variance_partition"] = (shown.rename(columns={
            "estimate": "estimate or mean", "sd": "SD", "interval": f"{pct} interval"}),
            [f"{label('icc')} = {label('sigma_unit')}^2 / ({label('sigma_unit')}^2 + "
             f"{label('sigma_obs')}^2). Bayesian rows: posterior summaries; reference rows: "
             "point estimates.", *_boundary_notes(results), foot])
    if "contrasts" in raw:
        ct = raw["contrasts"].copy()
        ct["interval"] = [num.interval(lo, hi, u) for lo, hi, u in
                          zip(ct["lower"], ct["upper"], ct["sd"])]
        keep = [c for c in ("covariate", "model", "estimate", "sd", "interval", "p_positive",
                            "p_negative", "p_rope", "rope", "reference_estimate",
                            "reference_se")
                if c in ct.columns and ct[c].notna().any()]  # no empty ROPE columns
        shown = display_frame(ct[keep], {"estimate": ("estimate", "sd")})
        out["contrasts"] = (shown.rename(columns={
            "estimate": "mean", "sd": "SD", "interval": f"{pct} interval",
            "p_positive": "P(> 0)", "p_negative": "P(< 0)", "p_rope": "P(in ROPE)", "rope": "ROPE half-width",
            "reference_estimate": "reference estimate", "reference_se": "reference SE"}),
            ["Between minus within effect of each time-varying covariate: posterior mean, "
             "SD, interval and posterior probabilities.", foot])
    if "tests" in raw:
        tt = raw["tests"]
        rows = [{"test": t.get("title", t.get("name")), "statistic": num.plain(
                    t.get("reported_statistic", t.get("statistic"))),
                 "distribution": t.get("distribution") or "",
                 "p-value": num.p_value(t.get("reported_p_value", t.get("p_value"))),
                 "reading": t.get("conclusion", "")}
                for t in tt.to_dict(orient="records")]
        out["tests"] = (pd.DataFrame(rows), [foot])
    if "comparison" in raw:
        cp = raw["comparison"].drop(columns=[c for c in ("level", "kind") if c in
                                             raw["comparison"].columns])
        cp = cp[[c for c in ("title",) if c in cp.columns]
                + [c for c in cp.columns if c != "title"]]
        out["comparison"] = (display_frame(cp).rename(columns=HEADINGS), [
            "ELPD and its SE, the difference to the best model and the SE of the paired "
            "difference; digits follow the SEs.", foot])
    if "diagnostics" in raw:
        out["diagnostics"] = (display_frame(raw["diagnostics"]).rename(columns=HEADINGS),
                              [foot])
    return out


def grouped_notes(fits, key):
    """``(titles, text)`` for each distinct ``fit[key]`` text, the fits that share it named
    together (three fits at the same boundary get one note, not three)."""
    by = {}
    for f in fits:
        if f.get(key):
            by.setdefault(f[key], []).append(f["title"])
    return [(", ".join(t), text) for text, t in by.items()]


def _group_values(pairs):
    """``"A, B 0.72; C 0.75"`` from ``[(title, value text)]``: titles with the same value
    text share it."""
    by = {}
    for title, v in pairs:
        by.setdefault(v, []).append(title)
    return ", ".join(f"{', '.join(t)} {v}" for v, t in by.items())


def describe_display(desc: pd.DataFrame) -> pd.DataFrame:
    """A variable description (``Panel.describe()``, results.json ``data.variables``)
    formatted by the numbers rule with the report's headings; exact zeros of the spreads
    stay zeros (no 5.8e-17)."""
    dd = desc.copy()
    for c in ("mean", "sd_overall", "sd_between", "sd_within"):
        if c in dd and "sd_overall" in dd:
            dd[c] = [num.plain(v, scale=s) for v, s in zip(dd[c], dd["sd_overall"])]
    return display_frame(dd).rename(columns=HEADINGS)


def _boundary_notes(results) -> list[str]:
    out = [f"{titles}: {text}" for titles, text in
           grouped_notes(results.get("reference", []), "boundary_note")]
    return out + [f"{f['title']}: {intercept_share_text(f)}" for f in results.get("reference", [])
                  if f.get("unit_intercept_share") is not None]


def intercept_share_text(fit: dict) -> str:
    """The fixed-effects fit's unit intercepts, described by the share of the outcome's
    variance they account for (fixed effects estimate no unit variance)."""
    sh = fit["unit_intercept_share"]
    return (f"the estimated unit intercepts account for "
            f"{'less than 0.001' if 0 < sh < 0.0005 else num.share(sh)} of the outcome's "
            "variance (a "
            "description of this sample; fixed effects estimate no unit variance and no ICC).")


def _cell(v) -> str:
    if v is None or (isinstance(v, float) and v != v):
        return ""
    if isinstance(v, float):
        return num.plain(v)
    return str(v)


def _frame(df: pd.DataFrame):
    df = df.reset_index() if not isinstance(df.index, pd.RangeIndex) else df
    return [str(c) for c in df.columns], [[_cell(v) for v in row] for row in df.itertuples(index=False)]


_MARKDOWN = {"&": "&amp;", "<": "&lt;", ">": "&gt;", "\n": " ", "\r": " ",
             **{c: "\\" + c for c in "\\`*_[]|~"}}
_MARKDOWN_RE = re.compile("|".join(re.escape(k) for k in _MARKDOWN))


def markdown_escape(s: str) -> str:
    """Text as literal Markdown: HTML (which Markdown viewers render) as entities, and
    the characters that make emphasis, code, links and table cells backslash-escaped, so a
    column named ``<img src=x onerror=...>`` or ``[x](javascript:...)`` stays text."""
    return _MARKDOWN_RE.sub(lambda m: _MARKDOWN[m.group()], str(s))


#: first characters that make a spreadsheet read a cell as a formula (OWASP, "CSV
#: Injection"); such text cells get a leading apostrophe, which spreadsheets hide
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def _csv_cell(v):
    if not isinstance(v, str) or not v.startswith(_FORMULA_START):
        return v
    try:
        float(v)  # a number written as text ("-0.5") is not a formula
        return v
    except ValueError:
        return "'" + v


def csv_text(df: pd.DataFrame) -> str:
    """``df`` as CSV with every text cell, header and index label that a spreadsheet
    would run as a formula neutralised (numbers, negative ones too, are left alone)."""
    safe = df.copy()
    safe.columns = [_csv_cell(str(c)) for c in safe.columns]
    if not isinstance(safe.index, pd.RangeIndex):
        safe.index = pd.Index([_csv_cell(v) for v in safe.index], name=safe.index.name)
    for c in safe.columns:
        if not (pd.api.types.is_numeric_dtype(safe[c]) or pd.api.types.is_bool_dtype(safe[c])):
            safe[c] = safe[c].map(_csv_cell)
    return safe.to_csv(index=not isinstance(df.index, pd.RangeIndex), lineterminator="\n")


def to_markdown(df: pd.DataFrame, notes=()) -> str:
    """A Markdown pipe table (cells escaped by :func:`markdown_escape`), then each note as
    a paragraph."""
    heads, rows = _frame(df)
    clean = markdown_escape
    lines = ["| " + " | ".join(map(clean, heads)) + " |", "|" + "|".join("---" for _ in heads) + "|"]
    lines += ["| " + " | ".join(map(clean, r)) + " |" for r in rows]
    lines += [line for n in notes if n for line in ("", clean(n))]
    return "\n".join(lines) + "\n"


_LATEX = {"\\": r"\textbackslash{}", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#",
          "_": r"\_", "{": r"\{", "}": r"\}", "~": r"\textasciitilde{}", "^": r"\textasciicircum{}",
          "<": r"\textless{}", ">": r"\textgreater{}"}
_LATEX_RE = re.compile("|".join(re.escape(k) for k in _LATEX))


def latex_escape(s: str) -> str:
    return _LATEX_RE.sub(lambda m: _LATEX[m.group()], s)


def to_latex(df: pd.DataFrame, caption: str | None = None, notes=()) -> str:
    """A LaTeX ``tabular`` (booktabs rules) with every cell escaped, then the notes in
    small type."""
    heads, rows = _frame(df)
    spec = "l" + "r" * (len(heads) - 1)
    out = [r"\begin{tabular}{" + spec + "}", r"\toprule",
           " & ".join(latex_escape(h) for h in heads) + r" \\", r"\midrule"]
    out += [" & ".join(latex_escape(c) for c in r) + r" \\" for r in rows]
    out += [r"\bottomrule", r"\end{tabular}"]
    out += [r"\par{\footnotesize " + latex_escape(n.replace("\n", " ")) + "}" for n in notes if n]
    if caption:
        out = [r"% " + latex_escape(caption)] + out
    return "\n".join(out) + "\n"


def write_tables(results: dict, folder) -> list[Path]:
    """Write every table as ``tables/NAME.md``, ``.tex`` and ``.csv``; return the paths."""
    folder = Path(folder) / "tables"
    paths = []
    shown = display_tables(results)
    for name, df in result_tables(results).items():
        view, notes = shown.get(name, (df, [footer(results)]))
        paths.append(write_atomic(folder / f"{name}.md", to_markdown(view, notes)))
        paths.append(write_atomic(folder / f"{name}.tex", to_latex(view, notes=notes)))
        paths.append(write_atomic(folder / f"{name}.csv", csv_text(df)))
    return paths
