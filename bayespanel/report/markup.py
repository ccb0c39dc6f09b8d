"""HTML building blocks of the report: escaping, elements, tables, notes, figures.

Every string that can come from a user passes through :func:`esc`; markup built here is
marked :class:`Safe`, so nothing is escaped twice and nothing is forgotten. The page
(:mod:`bayespanel.report.html`) and its parts for other outcome families
(:mod:`bayespanel.report.family_report`) are both built from these.
"""

from __future__ import annotations

import html as _html
import math

from . import numbers as num

__all__ = ["Safe", "esc", "join", "tag", "fmt", "table", "note", "figure", "pairs"]


class Safe(str):
    """Markup built by the report (already escaped)."""


def esc(value) -> Safe:
    """Escape any value for HTML text and attribute context."""
    if isinstance(value, Safe):
        return value
    return Safe(_html.escape("" if value is None else str(value), quote=True))


def join(parts, sep="") -> Safe:
    return Safe(esc(sep).join(esc(p) for p in parts))


def tag(name: str, *body, cls: str | None = None, **attrs) -> Safe:
    a = f' class="{esc(cls)}"' if cls else ""
    for k, v in attrs.items():
        a += f' {k.rstrip("_").replace("_", "-")}="{esc(v)}"'
    return Safe(f"<{name}{a}>{join(body)}</{name}>")


def fmt(x, digits: int = num.PLAIN_DIGITS) -> str:
    """A cell without a stated uncertainty: counts as integers, other numbers to
    ``digits`` significant digits (:func:`bayespanel.report.numbers.plain`); text as it
    is. Numbers with an uncertainty are formatted by the section with
    :func:`bayespanel.report.numbers.estimate` before they reach a table."""
    if x is None:
        return num.MISSING
    if isinstance(x, bool):
        return "yes" if x else "no"
    if isinstance(x, str):
        return x
    if isinstance(x, int):
        return num.count(x)
    try:
        v = float(x)
    except (TypeError, ValueError):
        return str(x)
    if not math.isfinite(v):
        return num.MISSING
    if abs(v) < 1e-9:  # rounding noise of an exact identity (e.g. Mundlak = within-between)
        v = 0.0
    return num.plain(v, digits)


def table(columns, rows, caption=None, numeric=None, foot=None) -> Safe:
    """A table; ``columns`` are headings, ``rows`` lists of cells (values or Safe markup).

    The first column is the row name. ``numeric`` lists the column indices set right.
    ``foot`` is a note set under the table (rows, units and ICC: :func:`tables.footer`).
    """
    numeric = set(range(1, len(columns))) if numeric is None else set(numeric)
    head = join(tag("th", c, cls="num" if i in numeric else None) for i, c in enumerate(columns))
    body = []
    for r in rows:
        if isinstance(r, Safe):
            body.append(r)
            continue
        cells = []
        for i, c in enumerate(r):
            cls = "rowname" if i == 0 else ("num" if i in numeric else None)
            cells.append(tag("td", c if isinstance(c, Safe) else fmt(c) if i else esc(c), cls=cls))
        body.append(tag("tr", *cells))
    cap = tag("caption", caption) if caption else ""
    grid = tag("div", tag("table", cap, tag("thead", tag("tr", head)), tag("tbody", *body),
                          cls="bp-grid"), cls="bp-scroll")
    return join([grid, tag("p", foot, cls="bp-tablenote")]) if foot else grid


def note(kind: str, text, lead: str | None = None) -> Safe:
    return tag("div", tag("b", lead) if lead else "", text, cls=f"bp-note {kind}")


def figure(uri: str | None, alt: str, caption: str, fig_id: str) -> Safe:
    if not uri:
        return Safe("")
    return tag("figure", Safe(f'<img src="{esc(uri)}" alt="{esc(alt)}">'),
               tag("figcaption", caption), cls="bp-fig", id=fig_id, data_figure=fig_id)


def pairs(items) -> Safe:
    return tag("dl", *[Safe(tag("dt", k) + tag("dd", v)) for k, v in items], cls="bp-pairs")
