"""Tables of a run, shaped from ``results.json`` and written as Markdown, LaTeX and CSV.

The writers are our own (no optional dependency): Markdown pipe tables, LaTeX
``tabular`` with every special character escaped, CSV through pandas.
"""

from __future__ import annotations

import re
from pathlib import Path

import pandas as pd

from .results_json import write_atomic

__all__ = ["coefficient_grid", "result_tables", "to_markdown", "to_latex", "write_tables"]

_SUFFIXES = ("", " (within)", " (between)", " (unit mean)")


def _split(term: str):
    for i, s in enumerate(_SUFFIXES[1:], start=1):
        if term.endswith(s):
            return term[: -len(s)], i
    return term, 0


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
                                      "upper": c["upper"], "se": c.get("se")}
                          for c in f["coefficients"]}}

    for m in results.get("models", []):
        cols.append({"key": m["name"], "title": m["title"], "kind": "bayesian",
                     "cells": {c["term"]: {"estimate": c["mean"], "lower": c["lower"],
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


def _coefficients_df(results) -> pd.DataFrame:
    cols, terms = coefficient_grid(results)
    rows = []
    for t in terms:
        for c in cols:
            cell = c["cells"].get(t)
            if cell is not None:
                rows.append({"term": t, "model": c["title"], "kind": c["kind"],
                             "estimate": cell["estimate"],
                             "sd_or_se": cell.get("sd", cell.get("se")),
                             "lower": cell["lower"], "upper": cell["upper"]})
    return pd.DataFrame(rows)


def _wide_coefficients_df(results) -> pd.DataFrame:
    cols, terms = coefficient_grid(results)
    data = {}
    for c in cols:
        data[c["title"]] = [
            (f"{c['cells'][t]['estimate']:.3f} [{c['cells'][t]['lower']:.3f}, "
             f"{c['cells'][t]['upper']:.3f}]") if t in c["cells"] and
            c["cells"][t]["estimate"] is not None and c["cells"][t]["lower"] is not None else ""
            for t in terms]
    return pd.DataFrame(data, index=pd.Index(terms, name="term"))


def result_tables(results: dict) -> dict[str, pd.DataFrame]:
    """Every table of the report as a DataFrame, keyed by file stem."""
    out = {"coefficients": _wide_coefficients_df(results),
           "coefficients_long": _coefficients_df(results),
           "data_description": pd.DataFrame(results["data"]["variables"]).set_index("variable")}
    vp = [dict(model=m["title"], **q) for m in results["models"]
          if m.get("variance_partition") for q in m["variance_partition"]["summary"]]
    vp += [dict(model=f["title"] + " (ref.)", quantity=q, mean=f.get(q)) for f in results["reference"]
           if f.get("icc") is not None for q in ("sigma_unit", "sigma_obs", "icc")]
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


def _cell(v) -> str:
    if v is None or (isinstance(v, float) and v != v):
        return ""
    if isinstance(v, float):
        return f"{v:.4g}" if abs(v) >= 1e5 or (v != 0 and abs(v) < 1e-3) else f"{v:.4f}"
    return str(v)


def _frame(df: pd.DataFrame):
    df = df.reset_index() if not isinstance(df.index, pd.RangeIndex) else df
    return [str(c) for c in df.columns], [[_cell(v) for v in row] for row in df.itertuples(index=False)]


def to_markdown(df: pd.DataFrame) -> str:
    """A Markdown pipe table (pipes in cells escaped)."""
    heads, rows = _frame(df)
    clean = lambda s: s.replace("|", "\\|").replace("\n", " ")  # noqa: E731
    lines = ["| " + " | ".join(map(clean, heads)) + " |", "|" + "|".join("---" for _ in heads) + "|"]
    lines += ["| " + " | ".join(map(clean, r)) + " |" for r in rows]
    return "\n".join(lines) + "\n"


_LATEX = {"\\": r"\textbackslash{}", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#",
          "_": r"\_", "{": r"\{", "}": r"\}", "~": r"\textasciitilde{}", "^": r"\textasciicircum{}",
          "<": r"\textless{}", ">": r"\textgreater{}"}
_LATEX_RE = re.compile("|".join(re.escape(k) for k in _LATEX))


def latex_escape(s: str) -> str:
    return _LATEX_RE.sub(lambda m: _LATEX[m.group()], s)


def to_latex(df: pd.DataFrame, caption: str | None = None) -> str:
    """A LaTeX ``tabular`` (booktabs rules) with every cell escaped."""
    heads, rows = _frame(df)
    spec = "l" + "r" * (len(heads) - 1)
    out = [r"\begin{tabular}{" + spec + "}", r"\toprule",
           " & ".join(latex_escape(h) for h in heads) + r" \\", r"\midrule"]
    out += [" & ".join(latex_escape(c) for c in r) + r" \\" for r in rows]
    out += [r"\bottomrule", r"\end{tabular}"]
    if caption:
        out = [r"% " + latex_escape(caption)] + out
    return "\n".join(out) + "\n"


def write_tables(results: dict, folder) -> list[Path]:
    """Write every table as ``tables/NAME.md``, ``.tex`` and ``.csv``; return the paths."""
    folder = Path(folder) / "tables"
    paths = []
    for name, df in result_tables(results).items():
        paths.append(write_atomic(folder / f"{name}.md", to_markdown(df)))
        paths.append(write_atomic(folder / f"{name}.tex", to_latex(df)))
        paths.append(write_atomic(folder / f"{name}.csv", df.to_csv(index=not isinstance(
            df.index, pd.RangeIndex), lineterminator="\n")))
    return paths
