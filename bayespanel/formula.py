"""Formula screening: keep Wilkinson formulas inert.

formulaic evaluates Python inside a formula (``{...}``, ``I(...)`` and any call), so a
formula taken from someone else's analysis file could run code. :func:`screen` tokenises
the formula with Python's own tokenizer and admits only column names, numbers, string
literals, formula operators, and calls to a whitelist of transforms. Anything else is a
:class:`~bayespanel.errors.FormulaError` naming the offending piece. :func:`safe_context`
is the only namespace formulaic is given to evaluate in.
"""

from __future__ import annotations

import io
import re
import tokenize
from dataclasses import dataclass

import numpy as np

from .errors import FormulaError

__all__ = ["screen", "safe_context", "ScreenedFormula", "ALLOWED_TRANSFORMS"]


def _center(x):
    x = np.asarray(x, dtype=float)
    return x - np.nanmean(x)


def _scale(x):
    x = np.asarray(x, dtype=float)
    return (x - np.nanmean(x)) / np.nanstd(x, ddof=1)


# Bare transform names usable in a formula. formulaic's own C, poly, I, center and scale are
# kept (they are pure functions of the column); numeric ones map to numpy ufuncs.
_NUMERIC = {
    "log": np.log,
    "log2": np.log2,
    "log10": np.log10,
    "log1p": np.log1p,
    "exp": np.exp,
    "sqrt": np.sqrt,
    "abs": np.abs,
    "square": np.square,
}
_FORMULAIC_BUILTINS = {"C", "poly", "I", "center", "scale", "standardize"}
ALLOWED_TRANSFORMS = frozenset(_NUMERIC) | _FORMULAIC_BUILTINS
# numpy functions reachable as np.<name> (and numpy.<name>).
_NUMPY_ATTRS = frozenset({"log", "log2", "log10", "log1p", "exp", "sqrt", "abs", "square"})
# keyword arguments accepted inside the whitelisted calls
_KEYWORDS = frozenset({"degree", "raw", "reference", "levels", "contr", "spans_intercept"})
_OPERATORS = frozenset(
    {"~", "+", "-", "*", "/", ":", "**", "(", ")", ",", "=", ".", "^", "%", "|"}
)


class _SafeNumpy:
    """Stand-in for ``np`` inside formulas exposing only whitelisted functions."""

    def __init__(self):
        for name in _NUMPY_ATTRS:
            setattr(self, name, getattr(np, name))


@dataclass(frozen=True)
class ScreenedFormula:
    """A formula that passed screening, with its outcome and the columns it uses."""

    text: str
    outcome: str
    rhs: str
    columns: tuple[str, ...]


def safe_context() -> dict:
    """The namespace given to formulaic: whitelisted transforms and nothing else."""
    from formulaic.transforms import C, center, poly, scale
    from formulaic.transforms.identity import identity

    ctx = dict(_NUMERIC)
    ctx.update({"C": C, "poly": poly, "I": identity, "center": center, "scale": scale,
                "standardize": scale})
    safe_np = _SafeNumpy()
    ctx["np"] = safe_np
    ctx["numpy"] = safe_np
    return ctx


_BACKTICK = re.compile(r"`([^`]*)`")


def screen(formula: str, columns) -> ScreenedFormula:
    """Check that ``formula`` is an inert Wilkinson formula over ``columns``.

    Parameters
    ----------
    formula : str
        For example ``"y ~ x + z + x:z + C(region) + np.log(income)"``. Column names that
        are not Python identifiers may be quoted with backticks.
    columns : iterable of str
        The table's column names.

    Returns
    -------
    ScreenedFormula

    Raises
    ------
    FormulaError
        Naming the offending piece: unknown column, a call outside the whitelist, attribute
        access, braces, brackets, dunder names, or a malformed formula.
    """
    if not isinstance(formula, str):
        raise FormulaError(f"formula must be a string like 'y ~ x + z', got {type(formula).__name__}")
    columns = [str(c) for c in columns]
    colset = set(columns)
    text = formula.strip()
    if text.count("~") != 1:
        raise FormulaError(
            f"formula {formula!r} must have exactly one '~' separating the outcome from the "
            "covariates, as in 'y ~ x + z'"
        )
    # Replace backtick-quoted names by placeholders so the tokenizer sees identifiers.
    quoted: dict[str, str] = {}

    def _sub(match):
        name = match.group(1)
        if name not in colset:
            raise FormulaError(f"unknown column `{name}` in formula {formula!r}")
        key = f"_bq{len(quoted)}_"
        quoted[key] = name
        return key

    work = _BACKTICK.sub(_sub, text)
    if "`" in work:
        raise FormulaError(f"unbalanced backtick in formula {formula!r}")
    for bad, what in (("{", "braces '{...}' (Python code)"), ("[", "brackets '[...]'"),
                      ("__", "double-underscore names"), (";", "';'"), ("@", "'@'"),
                      ("lambda", "lambda expressions")):
        if bad in work:
            raise FormulaError(f"formula {formula!r} contains {what}, which is not allowed")
    try:
        tokens = [t for t in tokenize.generate_tokens(io.StringIO(work).readline)
                  if t.type not in (tokenize.NEWLINE, tokenize.NL, tokenize.ENDMARKER,
                                    tokenize.INDENT, tokenize.DEDENT, tokenize.COMMENT)]
    except (tokenize.TokenError, IndentationError, SyntaxError) as exc:
        raise FormulaError(f"cannot read formula {formula!r}: {exc}") from None

    used: list[str] = []
    depth_calls: list[bool] = []  # stack: is this parenthesis a whitelisted call?
    for i, tok in enumerate(tokens):
        nxt = tokens[i + 1].string if i + 1 < len(tokens) else ""
        prev = tokens[i - 1].string if i > 0 else ""
        if tok.type == tokenize.NAME:
            name = quoted.get(tok.string, tok.string)
            if prev == ".":
                if tokens[i - 2].string not in ("np", "numpy") or name not in _NUMPY_ATTRS:
                    raise FormulaError(
                        f"'{tokens[i - 2].string}.{name}' is not allowed in a formula; numpy "
                        f"functions allowed: {', '.join(sorted(_NUMPY_ATTRS))}"
                    )
                continue
            if name in ("np", "numpy") and nxt == ".":
                continue
            if nxt == "(":
                if name not in ALLOWED_TRANSFORMS:
                    raise FormulaError(
                        f"call to '{name}(...)' is not allowed in a formula; allowed "
                        f"transforms: {', '.join(sorted(ALLOWED_TRANSFORMS))}"
                    )
                continue
            if nxt == "=" and depth_calls and depth_calls[-1]:
                if name not in _KEYWORDS:
                    raise FormulaError(f"keyword '{name}=' is not allowed in a formula")
                continue
            if name in colset:
                used.append(name)
                continue
            if name in ("True", "False", "None"):
                continue
            close = [c for c in columns if c.lower() == name.lower()]
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            raise FormulaError(f"unknown column '{name}' in formula {formula!r}{hint}")
        elif tok.type == tokenize.OP:
            if tok.string not in _OPERATORS and tok.string not in ("<", ">", "<=", ">=", "==", "!="):
                raise FormulaError(f"operator {tok.string!r} is not allowed in formula {formula!r}")
            if tok.string == "(":
                depth_calls.append(prev not in ("", "~", "+", "-", "*", "/", ":", "**", "(", ",", "^", "|", "%")
                                   and tokens[i - 1].type == tokenize.NAME)
            elif tok.string == ")":
                if not depth_calls:
                    raise FormulaError(f"unbalanced ')' in formula {formula!r}")
                depth_calls.pop()
            elif tok.string == "." and not (prev in ("np", "numpy")):
                raise FormulaError(
                    f"'.' is not allowed in formula {formula!r} (name every covariate)"
                )
            elif tok.string == "=" and not (depth_calls and depth_calls[-1]):
                raise FormulaError(f"'=' is only allowed for keyword arguments of transforms in {formula!r}")
        elif tok.type in (tokenize.NUMBER, tokenize.STRING):
            continue
        else:
            raise FormulaError(f"unexpected {tok.string!r} in formula {formula!r}")
    if depth_calls:
        raise FormulaError(f"unbalanced '(' in formula {formula!r}")

    lhs, rhs = (s.strip() for s in text.split("~"))
    if not lhs:
        raise FormulaError(f"formula {formula!r} has no outcome before '~'")
    lhs_work = _BACKTICK.sub(lambda m: m.group(1), lhs)
    if lhs_work not in colset:
        raise FormulaError(
            f"the outcome {lhs!r} in formula {formula!r} must be a single column of the table"
        )
    if not rhs:
        raise FormulaError(f"formula {formula!r} has nothing after '~' (use '1' for intercept only)")
    seen = []
    for c in used:
        if c not in seen:
            seen.append(c)
    return ScreenedFormula(text=text, outcome=lhs_work, rhs=rhs, columns=tuple(seen))
