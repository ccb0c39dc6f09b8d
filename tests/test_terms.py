"""Structured term labels (bayespanel.core.terms): one label function and its inverse.

Outside check: the columns each term names are compared with the unit means and the
demeaned columns linearmodels' PanelData makes on the Grunfeld panel (statsmodels'
datasets), so a term's part says what its column holds, not only how it prints.
"""

import numpy as np
import pytest

import bayespanel as bp
from bayespanel.data.formula import reserved_name
from bayespanel.core.terms import (AS_IS, BETWEEN, CONTRAST, PARTS, UNIT_MEAN, WITHIN, Term, label,
                              labels, occasion, parse)

CASES = [
    (Term("x"), "x"),
    (Term("Intercept"), "Intercept"),
    (Term("x", WITHIN), "x (within)"),
    (Term("x", BETWEEN), "x (between)"),
    (Term("x", UNIT_MEAN), "x (unit mean)"),
    (Term("x", CONTRAST), "x (between - within)"),
    (Term("np.log(capital)", WITHIN), "np.log(capital) (within)"),
    (Term("C(g)[T.b]", BETWEEN), "C(g)[T.b] (between)"),
    (occasion(2003), "occasion[2003]"),
    (occasion("2003-01-13").with_part(WITHIN), "occasion[2003-01-13] (within)"),
    (occasion(7).with_part(UNIT_MEAN), "occasion[7] (unit mean)"),
]


@pytest.mark.parametrize("term,text", CASES, ids=[c[1] for c in CASES])
def test_label_and_parse_are_inverse(term, text):
    assert label(term) == text == term.label
    assert parse(text) == term
    assert parse(term) is term
    assert term.column == Term(term.base, AS_IS, term.is_occasion)


def test_labels_the_package_makes_are_refused_as_column_names():
    # every label with a part, and every occasion indicator, is a shape formula.py refuses
    # as a column name, so no covariate can print as (and parse back to) another term
    for term, text in CASES:
        if term.part != AS_IS or term.is_occasion:
            if term.part != CONTRAST:
                assert reserved_name(text) is not None, text
        else:
            assert parse(text) == Term(text)
    assert set(PARTS) == {AS_IS, WITHIN, BETWEEN, UNIT_MEAN, CONTRAST}
    with pytest.raises(ValueError, match="part='mean'"):
        Term("x").with_part("mean")
    with pytest.raises(ValueError, match="part='mean'"):
        label(Term("x", "mean"))


def test_design_terms_name_their_columns(grunfeld):
    # Reference library: linearmodels PanelData.demean("entity") (within) and pandas
    # groupby means (between / unit mean) on statsmodels' Grunfeld panel.
    from linearmodels.panel.data import PanelData

    panel = bp.Panel(grunfeld, unit="firm", time="year")
    d = panel.design("invest ~ value + capital")
    ref_w = PanelData(grunfeld.set_index(["firm", "year"]).sort_index()[["value", "capital"]]
                      ).demean("entity").values2d
    means = grunfeld.sort_values(["firm", "year"]).groupby("firm")[["value", "capital"]] \
        .transform("mean").to_numpy()
    raw = d.X
    for kind in ("within", "mundlak", "within_between"):
        M, labs = d.matrices(kind)
        terms = d.term_parts(kind)
        assert labels(terms) == labs == d.labels(kind)
        for j, t in enumerate(terms):
            if t == Term("Intercept"):
                continue
            c = ["value", "capital"].index(t.base)
            expected = {AS_IS: raw[:, d.terms.index(t.base)], WITHIN: ref_w[:, c],
                        BETWEEN: means[:, c], UNIT_MEAN: means[:, c]}
            want = ref_w[:, c] if kind == "within" else expected[t.part]
            np.testing.assert_allclose(M[:, j], want, rtol=1e-10, atol=1e-8)
    assert d.term_parts("within_between") == [
        Term("Intercept"), Term("value", WITHIN), Term("capital", WITHIN),
        Term("value", BETWEEN), Term("capital", BETWEEN)]
    assert d.term_parts("pooled") == [Term("Intercept"), Term("value"), Term("capital")]


def test_occasion_indicators_are_structured(grunfeld):
    # Grunfeld (statsmodels) is balanced, so the occasion indicators have no between part
    # (their unit means are all equal, a multiple of the intercept)
    panel = bp.Panel(grunfeld, unit="firm", time="year")
    d = panel.design("invest ~ value", occasion_effects=True)
    years = sorted(grunfeld["year"].unique())
    occ = [t for t in d.term_parts("pooled") if t.is_occasion]
    assert occ == [occasion(int(y)) for y in years[1:]]
    wb = d.term_parts("within_between")
    assert occasion(int(years[1])).with_part(WITHIN) in wb
    assert not any(t.is_occasion and t.part == BETWEEN for t in wb)


@pytest.mark.parametrize("name,what", [
    ("x (within)", "the within part of a covariate"),
    ("x (between)", "the between part of a covariate"),
    ("log(x) (unit mean)", "the unit mean part of a covariate"),
    ("occasion[2003] (within)", "the within part of a covariate"),
    ("occasion[2003]", "an occasion indicator"),
    ("sigma_slope[x]", "a random slope's SD"),
    ("x (between - within)", None),
    ("x (within) y", None),
    ("occasion[2003", None),
    ("x", None),
])
def test_reserved_column_names_follow_the_label_grammar(name, what):
    # a column may not take a label the package makes (formula.reserved_name reads the
    # labels with terms.parse, so the two cannot disagree)
    assert reserved_name(name) == what


def test_only_terms_spells_out_label_shapes():
    # the rule of bayespanel/core/terms.py: no other module writes (or slices by) the text of a
    # part's label; they ask terms.label / part_label / parse. Docstrings may show labels.
    import ast
    from pathlib import Path

    root = Path(bp.__file__).parent
    shapes = [f" ({p})" for p in PARTS if p] + ["occasion["]
    found = []
    for path in sorted(root.rglob("*.py")):
        if path.name == "terms.py":
            continue
        tree = ast.parse(path.read_text(encoding="utf-8"))
        docs = {id(n.body[0].value) for n in ast.walk(tree)
                if isinstance(n, (ast.Module, ast.ClassDef, ast.FunctionDef, ast.AsyncFunctionDef))
                and n.body and isinstance(n.body[0], ast.Expr)
                and isinstance(n.body[0].value, ast.Constant)}
        for node in ast.walk(tree):
            if (isinstance(node, ast.Constant) and isinstance(node.value, str)
                    and id(node) not in docs and any(s in node.value for s in shapes)):
                found.append(f"{path.relative_to(root)}:{node.lineno} {node.value!r}")
    assert found == []
