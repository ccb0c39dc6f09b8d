"""Terms of a model and their printed labels.

A coefficient belongs to a :class:`Term`: the covariate it comes from (``base``, the label
the formula gives the column, or the value of an occasion for an occasion indicator) and
the part of that covariate the model uses (``part``): the column as it is, its deviation
from the unit mean (``within``), its unit mean as the between part of a within-between
model (``between``) or as the added column of a correlated-effects model (``unit mean``).
A contrast between the between and within effects of a covariate is labelled like a part
(``between - within``).

:func:`label` is the one place a term becomes text (``x``, ``x (within)``,
``x (between)``, ``x (unit mean)``, ``occasion[2003]``, ``occasion[2003] (within)``);
:func:`parse` is its inverse, for labels read back from results, posteriors and files.
Code works on terms and asks for labels only to print or to index labelled tables; it
never takes label strings apart itself. Column names of these shapes are refused
(:func:`bayespanel.data.formula.reserved_name`), so a label parses one way only.

This module imports nothing from the package: every layer may use it.
"""

from __future__ import annotations

from typing import NamedTuple

__all__ = ["Term", "AS_IS", "WITHIN", "BETWEEN", "UNIT_MEAN", "CONTRAST", "PARTS",
           "label", "labels", "parse", "part_label", "occasion"]

AS_IS = ""
WITHIN = "within"
BETWEEN = "between"
UNIT_MEAN = "unit mean"
#: the difference of the between and the within effect of one covariate
CONTRAST = "between - within"
PARTS = (AS_IS, WITHIN, BETWEEN, UNIT_MEAN, CONTRAST)

_OPEN, _CLOSE = "occasion[", "]"


class Term(NamedTuple):
    """One term of a model: ``(base, part)``, and whether the base is an occasion.

    Parameters
    ----------
    base : str
        The covariate's label as the formula makes it (``"x"``, ``"Intercept"``,
        ``"C(g)[T.b]"``), or for an occasion indicator the occasion as printed (``"2003"``).
    part : str
        One of :data:`PARTS`: :data:`AS_IS` (default), :data:`WITHIN`, :data:`BETWEEN`,
        :data:`UNIT_MEAN` or :data:`CONTRAST`.
    is_occasion : bool
        True for the indicator of occasion ``base``.
    """

    base: str
    part: str = AS_IS
    is_occasion: bool = False

    @property
    def label(self) -> str:
        """The printed label (:func:`label`)."""
        return label(self)

    def with_part(self, part: str) -> "Term":
        """The same covariate, another part."""
        return Term(self.base, _check_part(part), self.is_occasion)

    @property
    def column(self) -> "Term":
        """The covariate as it is (the column of the design's ``X`` this term is made from)."""
        return self.with_part(AS_IS)


def _check_part(part: str) -> str:
    if part not in PARTS:
        raise ValueError(f"part={part!r} is not one of {PARTS}")
    return part


def occasion(value) -> Term:
    """The indicator of one occasion; ``value`` as the label prints it (already formatted:
    :func:`bayespanel.data.design.occasion_label` formats dates)."""
    return Term(str(value), AS_IS, True)


def label(term) -> str:
    """The printed label of ``term`` (a :class:`Term`, or a plain label returned as it is).

    ``Term("x")`` -> ``"x"``; ``Term("x", "within")`` -> ``"x (within)"``;
    ``occasion(2003).with_part("between")`` -> ``"occasion[2003] (between)"``.
    """
    if isinstance(term, str):
        return term
    base = f"{_OPEN}{term.base}{_CLOSE}" if term.is_occasion else str(term.base)
    return base if term.part == AS_IS else f"{base} ({_check_part(term.part)})"


def labels(terms) -> list[str]:
    """:func:`label` of each term."""
    return [label(t) for t in terms]


def part_label(term, part: str) -> str:
    """The label of one part of the covariate ``term`` (a term or a label):
    ``part_label("x", WITHIN)`` -> ``"x (within)"``."""
    return label(parse(term).with_part(part))


def parse(text) -> Term:
    """The term a label prints (the inverse of :func:`label`); a :class:`Term` is returned
    as it is.

    Examples
    --------
    >>> parse("x (within)")
    Term(base='x', part='within', is_occasion=False)
    >>> parse("occasion[2003] (unit mean)")
    Term(base='2003', part='unit mean', is_occasion=True)
    """
    if isinstance(text, Term):
        return text
    text = str(text)
    part = AS_IS
    for p in PARTS[1:]:
        suffix = f" ({p})"
        if text.endswith(suffix):
            text, part = text[: -len(suffix)], p
            break
    if text.startswith(_OPEN) and text.endswith(_CLOSE):
        return Term(text[len(_OPEN): -len(_CLOSE)], part, True)
    return Term(text, part, False)
