"""Formula screening: keep Wilkinson formulas inert.

formulaic evaluates Python inside a formula (``{...}``, ``I(...)`` and any call), so a
formula taken from someone else's analysis file could run code. :func:`screen` tokenises
the formula with Python's own tokenizer and admits only column names, numbers, string
literals, formula operators, and calls to a whitelist of transforms. Anything else is a
:class:`~bayespanel.core.errors.FormulaError` naming the offending piece. :func:`safe_context`
is the only namespace formulaic is given to evaluate in.

Inert is not enough: ``I(x + 9**9**9)`` runs for ever, ``(a+b+c+d)**12`` makes formulaic
enumerate 4**12 products and ``I('a'*10**10)`` asks for 10 GB. The screen therefore
also bounds what a formula may cost before formulaic sees it (:data:`LIMITS`): its
length, the depth of its parentheses, the size of each number and string literal, the
number of terms it generates, the order of its interactions and the products formulaic
enumerates to find them; and inside transforms (which Python evaluates) the size of
every whole number computed from constants, with text and tuples kept out of
arithmetic. The limits are far above what an analysis writes; each refusal names the
piece and the limit. Names the package gives to terms it makes (``Intercept``,
``x (within)``, ``occasion[2003]``, ...) are refused as column names
(:func:`reserved_name`), and so is an outcome whose variables appear among the
covariates.
"""

from __future__ import annotations

import ast
import io
import math
import re
import tokenize
from dataclasses import dataclass

import numpy as np

from ..core.errors import FormulaError
from ..core.terms import AS_IS, BETWEEN, UNIT_MEAN, WITHIN, parse

__all__ = ["screen", "safe_context", "ScreenedFormula", "ALLOWED_TRANSFORMS", "LIMITS",
           "reserved_name", "outcome_values", "dependency_message", "plain_sum",
           "sum_columns"]

#: What a formula may cost (each far above what an analysis writes; docs/user-guide.md).
LIMITS = {
    "characters": 20_000,        # length of the formula
    "nesting": 32,               # depth of parentheses
    "number_characters": 40,     # characters of one number literal
    "string_characters": 500,    # characters of one string literal
    "terms": 1_000,              # terms the formula generates (before categorical levels)
    "interaction_order": 6,      # variables in one interaction term, and k in (a + b)**k
    "expansion": 100_000,        # products formulaic enumerates for one '*', ':' or '**'
    "constant_digits": 400,      # digits of a whole number computed inside a transform
}

#: Labels the package gives to terms and parameters it makes, and the names of the posterior
#: variables it reads by name; a column may not be named so (what each is, for messages).
RESERVED_NAMES = {
    "Intercept": "the intercept", "sigma_unit": "a variance component",
    "sigma_obs": "a variance component", "icc": "the intraclass correlation",
    "coef": "the coefficients", "unit_effect": "the unit effects",
    "sigma_slope": "the random slopes' SDs", "corr_unit": "the random effects' correlations",
    "corr_chol_unit": "the random effects' correlations",
    "nu": "a parameter of an outcome family", "shape": "a parameter of an outcome family",
}
#: the labels of the parts of a covariate and of occasion indicators are read by
#: bayespanel.core.terms.parse (the one grammar of term labels); these are parameter names
_RESERVED_PATTERNS = (
    (re.compile(r"sigma_slope\[.*\]\Z", re.S), "a random slope's SD"),
    (re.compile(r"corr\[.*\]\Z", re.S), "a correlation of random effects"),
)


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
    """A formula that passed screening, with its outcome and the columns it uses.

    ``outcome`` is the outcome's label as written (``"gsp"``, ``"log(gsp)"``);
    ``outcome_expr`` is None for a plain column, else the transform formulaic evaluates
    (:func:`outcome_values`); ``outcome_columns`` are the table columns it reads.
    """

    text: str
    outcome: str
    rhs: str
    columns: tuple[str, ...]
    outcome_expr: str | None = None
    outcome_columns: tuple[str, ...] = ()


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


def reserved_name(name: str) -> str | None:
    """What the package uses ``name`` for, if it is one of its own labels, else None.

    The names in :data:`RESERVED_NAMES` (``Intercept``, ``sigma_unit``, ``sigma_obs``,
    ``icc``, the posterior variables ``coef``, ``unit_effect``, ... and the family
    parameters ``nu`` and ``shape``: rows of the summaries, or variables read by name),
    and the shapes ``x (within)``, ``x (between)``, ``x (unit mean)``, ``occasion[...]``,
    ``sigma_slope[...]`` and ``corr[...]``. A column with such a name would share its
    label with a term or parameter the package makes (two ``Intercept`` rows, a covariate
    read as the within part of another), so it is refused, not guessed at.
    """
    name = str(name)
    if name in RESERVED_NAMES:
        return RESERVED_NAMES[name]
    term = parse(name)
    if term.part in (WITHIN, BETWEEN, UNIT_MEAN):
        return f"the {term.part} part of a covariate"
    if term.is_occasion and term.part == AS_IS:
        return "an occasion indicator"
    for pattern, what in _RESERVED_PATTERNS:
        m = pattern.match(name)
        if m:
            return what.format(*m.groups())
    return None


_ANSI = re.compile(r"\x1b\[[0-9;?]*[ -/]*[@-~]")
_HIGHLIGHT = re.compile(r"\u29db?\x1b\[1;31m(.*?)\x1b\[0m\u29da?")


def dependency_message(exc) -> str:
    """A dependency's error message as one plain line: formulaic underlines the culprit
    on a second line with terminal colour codes, which become ``(at 'x' in '...')``."""
    text = str(exc)
    culprit = context = None
    for line in text.splitlines()[1:]:
        m = _HIGHLIGHT.search(line)
        if m:
            culprit = _ANSI.sub("", m.group(1))
            context = _ANSI.sub("", _HIGHLIGHT.sub(lambda k: k.group(1), line)).strip()
            break
    first = next((ln for ln in text.splitlines() if ln.strip()), type(exc).__name__)
    first = _ANSI.sub("", first).strip()
    first = "".join(ch if ch.isprintable() else repr(ch)[1:-1] for ch in first)
    return first + (f" (at {culprit!r} in {context!r})" if culprit else "")


def _limit_error(formula, piece, what, limit_key, found=None) -> FormulaError:
    found = f" ({found})" if found is not None else ""
    return FormulaError(
        f"{piece} in formula {_short(formula)} {what}{found}; the limit is "
        f"{LIMITS[limit_key]:,} (bayespanel.data.formula.LIMITS[{limit_key!r}])")


def _short(text, width: int = 80) -> str:
    text = str(text)
    return repr(text if len(text) <= width else text[:width - 3] + "...")


def screen(formula: str, columns) -> ScreenedFormula:
    """Check that ``formula`` is an inert Wilkinson formula over ``columns``, within
    :data:`LIMITS`.

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
        access, braces, brackets, dunder names, a malformed formula, a column named like
        a label the package makes, the outcome among the covariates, or a piece beyond
        one of :data:`LIMITS`.
    """
    if not isinstance(formula, str):
        raise FormulaError(f"formula must be a string like 'y ~ x + z', got {type(formula).__name__}")
    if len(formula) > LIMITS["characters"]:
        raise FormulaError(
            f"formula {_short(formula)} has {len(formula):,} characters; the limit is "
            f"{LIMITS['characters']:,} (bayespanel.data.formula.LIMITS['characters'])")
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
                      (";", "';'"), ("@", "'@'")):
        if bad in work:
            raise FormulaError(f"formula {formula!r} contains {what}, which is not allowed")
    try:
        tokens = [t for t in tokenize.generate_tokens(io.StringIO(work).readline)
                  if t.type not in (tokenize.NEWLINE, tokenize.NL, tokenize.ENDMARKER,
                                    tokenize.INDENT, tokenize.DEDENT, tokenize.COMMENT)]
    except (tokenize.TokenError, IndentationError, SyntaxError) as exc:
        what = exc.args[0] if exc.args else type(exc).__name__
        if "EOF" in str(what):
            what = "a parenthesis or a quote is not closed"
        raise FormulaError(f"cannot read formula {formula!r}: {what}") from None

    used: list[str] = []
    lhs_used: set[str] = set()
    rhs_used: set[str] = set()
    side = lhs_used
    depth_calls: list[bool] = []  # stack: is this parenthesis a whitelisted call?
    for i, tok in enumerate(tokens):
        nxt = tokens[i + 1].string if i + 1 < len(tokens) else ""
        prev = tokens[i - 1].string if i > 0 else ""
        if tok.type == tokenize.NAME:
            name = quoted.get(tok.string, tok.string)
            if tok.string == "lambda":
                raise FormulaError(
                    f"formula {formula!r} contains lambda expressions, which is not allowed")
            if "__" in tok.string and name not in colset:
                raise FormulaError(
                    f"formula {formula!r} contains double-underscore names, which is not allowed")
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
                if name == "lag":  # made a column before screening (bayespanel.data.lags)
                    raise FormulaError(
                        f"lag(...) in formula {formula!r} is only available on a panel "
                        "whose rows are in memory (bayespanel.Panel): lags are taken "
                        "within units on the time axis before the formula is read")
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
                side.add(name)
                continue
            if name in ("True", "False", "None"):
                continue
            close = [c for c in columns if c.lower() == name.lower()]
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            raise FormulaError(f"unknown column '{name}' in formula {formula!r}{hint}")
        elif tok.type == tokenize.OP:
            if tok.string not in _OPERATORS and tok.string not in ("<", ">", "<=", ">=", "==", "!="):
                raise FormulaError(f"operator {tok.string!r} is not allowed in formula {formula!r}")
            if tok.string == "~":
                side = rhs_used
            if tok.string == "(":
                depth_calls.append(prev not in ("", "~", "+", "-", "*", "/", ":", "**", "(", ",", "^", "|", "%")
                                   and tokens[i - 1].type == tokenize.NAME)
                if len(depth_calls) > LIMITS["nesting"]:
                    raise _limit_error(formula, "a parenthesis", "is nested too deep",
                                       "nesting", f"depth {len(depth_calls)}")
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
        elif tok.type == tokenize.NUMBER:
            if len(tok.string) > LIMITS["number_characters"]:
                raise _limit_error(formula, f"the number {_short(tok.string, 20)}",
                                   "is too long", "number_characters",
                                   f"{len(tok.string)} characters")
            if tok.string[-1] in "jJ":
                raise FormulaError(
                    f"the imaginary number {tok.string!r} in formula {formula!r} is not allowed")
        elif tok.type == tokenize.STRING:
            if len(tok.string) > LIMITS["string_characters"]:
                raise _limit_error(formula, f"the text {_short(tok.string, 20)}",
                                   "is too long", "string_characters",
                                   f"{len(tok.string):,} characters")
        else:
            raise FormulaError(f"unexpected {tok.string!r} in formula {formula!r}")
    if depth_calls:
        raise FormulaError(f"unbalanced '(' in formula {formula!r}")

    lhs, rhs = (s.strip() for s in text.split("~"))
    if not lhs:
        raise FormulaError(f"formula {formula!r} has no outcome before '~'")
    lhs_work = _BACKTICK.sub(lambda m: m.group(1), lhs)
    if not rhs:
        raise FormulaError(f"formula {formula!r} has nothing after '~' (use '1' for intercept only)")
    seen = []
    for c in used:
        if c not in seen:
            seen.append(c)
    for c in seen:
        what = reserved_name(c)
        if what is not None:
            raise FormulaError(
                f"column {c!r} has the name bayespanel gives to {what}, so the two could not "
                f"be told apart in the results; rename the column (formula {formula!r})")
    both = [c for c in seen if c in lhs_used and c in rhs_used]
    if both:
        raise FormulaError(
            f"the outcome's column {both[0]!r} is also among the covariates of formula "
            f"{formula!r}; the outcome cannot explain itself (with itself among the "
            "covariates the fit is perfect and says nothing): remove it from the right-hand "
            "side (a lagged outcome goes in as a column of its own)")
    for side_work in work.split("~", 1):  # the outcome may be a transform too
        _check_cost(side_work, formula, quoted)
    # the outcome side, once its cost is known to be bounded
    expr, lhs_columns = _screen_outcome(lhs, lhs_work, colset, formula)
    return ScreenedFormula(text=text, outcome=lhs_work if expr is None else lhs, rhs=rhs,
                           columns=tuple(seen), outcome_expr=expr,
                           outcome_columns=lhs_columns)


# ---------------------------------------------------------------------- cost bounds
def _check_cost(rhs: str, formula: str, quoted: dict) -> int | None:
    """Bound the terms a right-hand side generates, and what its transforms compute.

    The terms come from formulaic's own parse tree (its tokenizer and operator table,
    without expanding anything), walked here with every term set kept as sets of factor
    names and capped at :data:`LIMITS`: formulaic's own expansion enumerates every
    product (``|A|**k`` for ``A**k``), so the count of products is bounded before the
    count of terms. Each transform (formulaic's Python pieces) goes through
    :func:`_check_python`. Returns the number of terms (the intercept counts as one), or
    None when formulaic cannot parse the formula (it says why when it builds the design).
    """
    names = plain_sum(rhs)
    if names is not None:  # the intercept and one term per name (formulaic not loaded)
        count = 1 + len({quoted.get(n, n) for n in names})
        if count <= LIMITS["terms"]:
            return count
    from formulaic.parser import DefaultFormulaParser
    from formulaic.parser.types import ASTNode

    def restore(piece: str) -> str:
        for key, name in quoted.items():
            piece = piece.replace(key, f"`{name}`")
        return piece

    try:
        tree = DefaultFormulaParser().get_ast(rhs)
    except Exception as exc:  # formulaic's syntax errors: reported when it builds the design
        if isinstance(exc, (MemoryError, RecursionError)):
            raise FormulaError(f"cannot read formula {_short(formula)}: too complex") from None
        return None
    # post-order walk without recursion (a sum of many terms nests as deep as it is long);
    # formulaic reuses token objects, so results go on a stack, not in a dict by node
    if tree is None:
        return 0
    results: list[frozenset] = []
    stack = [(tree, False)]
    while stack:
        node, done = stack.pop()
        if not isinstance(node, ASTNode):
            results.append(_leaf_terms(node, formula, restore, quoted))
            if results[-1] and next(iter(next(iter(results[-1]))), ("",))[0] == "python":
                code = "".join(str(node.token).split())
                same = [c for c in quoted.values() if "".join(c.split()) == code]
                if same:
                    raise FormulaError(
                        f"formula {_short(formula)} uses the column `{same[0]}` and the "
                        f"transform {restore(str(node.token))}, which formulaic would take "
                        "for one term (and keep only one of them); rename the column")
        elif not done:
            stack.append((node, True))
            stack.extend((a, False) for a in reversed(node.args))
        else:
            n = len(node.args)
            args, results[-n:] = results[-n:], []
            results.append(_combine(node, args, lambda n=node: restore(_node_text(n)), formula))
    return len(results[-1])


_PLAIN_SUM = re.compile(r"\A\s*[A-Za-z_]\w*(?:\s*\+\s*[A-Za-z_]\w*)*\s*\Z", re.ASCII)


def plain_sum(side: str) -> list[str] | None:
    """The names of one side of a formula that is nothing but names joined by ``+``
    (``x0 + x1 + x2``), in the order written, repeats kept; None for anything else
    (a number, an operator other than ``+``, a call, a quoted name, a Python keyword).
    Each such name is one term of its own, so such a side needs no parser: the design
    reads its columns as they are (:func:`bayespanel.data.design.Design.from_panel`)."""
    import keyword

    if not _PLAIN_SUM.match(side):
        return None
    names = [n.strip() for n in side.split("+")]
    if any(keyword.iskeyword(n) for n in names):
        return None
    return names


def sum_columns(side: str) -> list[str] | None:
    """The columns of a :func:`plain_sum` in formulaic's order after the intercept (each
    name once, where it first appears), for the in-memory and Dask designs; else None."""
    names = plain_sum(side)
    return None if names is None else list(dict.fromkeys(names))


def _leaf_terms(token, formula, restore, quoted) -> frozenset:
    """The one term of a leaf: its factor keyed by kind, so that a column named like a
    transform (```np.log(x)```) and the transform itself stay two factors here (formulaic
    would merge them into one term: see :func:`_check_cost`)."""
    kind = getattr(getattr(token, "kind", None), "value", "")
    text = str(getattr(token, "token", token))
    if kind == "python":
        _check_python(text, formula, restore)
    if kind == "value" and text == "1":
        return frozenset({frozenset()})
    if kind == "name":
        return frozenset({frozenset({("name", quoted.get(text, text))})})
    return frozenset({frozenset({(kind, text)})})


def _node_text(node, width: int = 200) -> str:
    """A readable rendering of a formula parse-tree node, for messages: chains of one
    operator are written flat (``a + b + c``), other operands in parentheses; stops after
    about ``width`` characters."""
    from formulaic.parser.types import ASTNode

    def operands(n):
        sym, out, todo = n.operator.symbol, [], list(reversed(n.args))
        while todo:  # flatten a chain of the same operator, left to right
            m = todo.pop()
            if isinstance(m, ASTNode) and m.operator.symbol == sym and len(m.args) == 2 \
                    and sym in ("+", ":", "*", "|"):
                todo += list(reversed(m.args))
            else:
                out.append(m)
        return out

    parts: list[str] = []
    stack: list = [node]
    top = True
    while stack and sum(map(len, parts)) <= width:
        item = stack.pop()
        if isinstance(item, str):
            parts.append(item)
            continue
        if not isinstance(item, ASTNode):
            parts.append(str(getattr(item, "token", item)))
            continue
        sym = item.operator.symbol
        args = operands(item) if len(item.args) == 2 else list(item.args)
        join = f" {sym} " if sym in "+-|" else sym
        seq: list = [] if top else ["("]
        if len(args) == 1:
            seq.append(sym)
        for j, a in enumerate(args):
            if j:
                seq.append(join)
            seq.append(a)
        if not top:
            seq.append(")")
        top = False
        stack += list(reversed(seq))
    text = "".join(parts)
    return text if not stack else text + "..."


def _combine(node, args, piece, formula) -> frozenset:
    """The terms of one operator node from those of its arguments (formulaic's rules);
    ``piece()`` renders the node for a message."""
    sym = node.operator.symbol
    if sym == "+":
        out = args[0] | args[1] if len(args) == 2 else args[0]
    elif sym == "-":
        out = args[0] - args[1] if len(args) == 2 else frozenset()
    elif sym == "|":
        raise FormulaError(f"'|' in formula {_short(formula)} would split it into several "
                           "parts, which bayespanel does not use; unit effects come from the "
                           "model (write the covariates joined by '+')")
    elif sym in ("*", ":"):
        prod = _product(args[0], args[1], piece, formula)
        out = args[0] | args[1] | prod if sym == "*" else prod
    elif sym == "/":
        common = frozenset().union(*args[0]) if args[0] else frozenset()
        out = args[0] | _product(frozenset({common}), args[1], piece, formula)
    elif sym in ("**", "^"):
        power = node.args[1]
        text = str(getattr(power, "token", ""))
        if not text.isdigit() or int(text) < 1:
            raise FormulaError(f"the power in {_short(piece())} of formula {_short(formula)} "
                               "must be a whole number from 1 up")
        k = int(text)
        if k > LIMITS["interaction_order"]:
            raise _limit_error(formula, _short(piece()), "asks for interactions of that order",
                               "interaction_order", f"power {k}")
        count = len(args[0]) ** k
        if count > LIMITS["expansion"]:
            raise _limit_error(formula, _short(piece()), "makes too many products to expand",
                               "expansion", f"{len(args[0])}**{k} = {count:,}")
        out = args[0]
        for _ in range(k - 1):
            out = _product(out, args[0], piece, formula)
    else:
        raise FormulaError(f"operator {sym!r} in {_short(piece())} is not allowed in formula "
                           f"{_short(formula)}")
    if len(out) > LIMITS["terms"]:
        raise _limit_error(formula, _short(piece()), "generates too many terms", "terms",
                           f"{len(out):,}")
    return out


def _product(a, b, piece, formula) -> frozenset:
    """Every term of ``a`` times every term of ``b`` (the only place terms grow)."""
    if len(a) * len(b) > LIMITS["expansion"]:
        raise _limit_error(formula, _short(piece()), "makes too many products to expand",
                           "expansion", f"{len(a):,} x {len(b):,} = {len(a) * len(b):,}")
    out = frozenset(x | y for x in a for y in b)
    order = max((len(t) for t in out), default=0)
    if order > LIMITS["interaction_order"]:
        raise _limit_error(formula, _short(piece()), "makes an interaction of too many "
                           "variables", "interaction_order", f"{order} variables")
    return out


# Abstract values of the Python inside a transform: what it computes, without computing it.
_ARRAY, _FLOAT, _OTHER = "array", "float", "other"


def _check_python(code: str, formula: str, restore) -> None:
    """Refuse a transform whose constants would exhaust the machine when Python runs it.

    Every node of the expression gets an abstract value: a column (anything that involves
    a column name: numpy works on it in fixed-size numbers), a float, text or a tuple
    (with its length), or a whole number with an upper bound on its digits. Whole numbers
    grow without bound in Python (``9**9**9``), so each one computed from constants must
    stay within ``LIMITS["constant_digits"]``; text and tuples may be compared or passed
    as an option but never enter arithmetic (``'a' * 10**10``, ``'%0999999999d' % 1``).
    """
    piece = restore(code)
    try:
        tree = ast.parse(code, mode="eval")
    except (SyntaxError, ValueError, MemoryError, RecursionError) as exc:
        raise FormulaError(f"cannot read {_short(piece)} in formula {_short(formula)}: "
                           f"{getattr(exc, 'msg', None) or type(exc).__name__}") from None
    values: dict[int, tuple] = {}
    stack = [(tree.body, False)]
    while stack:
        node, done = stack.pop()
        kids = list(ast.iter_child_nodes(node))
        if kids and not done:
            stack.append((node, True))
            stack.extend((k, False) for k in reversed(kids))
            continue
        values[id(node)] = _abstract(node, values, piece, formula)
    top = values[id(tree.body)]
    if top[0] in ("str", "bytes", "tuple", "none"):
        raise FormulaError(f"{_short(piece)} in formula {_short(formula)} is "
                           f"{'text' if top[0] in ('str', 'bytes') else 'not a number'}, not "
                           "a column of numbers")


def _abstract(node, values, piece, formula) -> tuple:
    """One node's abstract value: ``("int", digits, value)`` (``value`` exact while the
    number is small, else None), ``("str" | "bytes" | "tuple", length)``, ``("none",)``,
    ``(_FLOAT,)``, ``(_ARRAY,)`` or ``(_OTHER,)`` (operator and context nodes)."""
    def val(n):
        return values[id(n)]

    def refuse(what):
        raise FormulaError(f"{_short(piece)} in formula {_short(formula)}: {what}")

    def whole(digits: float, exact=None) -> tuple:
        if digits > LIMITS["constant_digits"]:
            raise _limit_error(formula, _short(piece), "computes a whole number too large",
                               "constant_digits", f"about {_digits(digits)} digits")
        return ("int", digits, exact if digits <= _EXACT_DIGITS else None)

    if isinstance(node, ast.Constant):
        v = node.value
        if isinstance(v, bool):
            return ("int", 1.0, int(v))
        if isinstance(v, int):
            return whole(float(len(str(abs(v)))), v)
        if isinstance(v, float):
            return (_FLOAT,)
        if isinstance(v, (str, bytes)):
            return ("str" if isinstance(v, str) else "bytes", len(v))
        if v is None:
            return ("none",)
        refuse(f"{type(v).__name__} constants are not allowed")
    if isinstance(node, (ast.Name, ast.Attribute)):
        return (_ARRAY,)  # a column, or a whitelisted function (screened by name)
    if isinstance(node, (ast.expr_context, ast.operator, ast.unaryop, ast.cmpop,
                         ast.keyword)):
        return (_OTHER,)
    if isinstance(node, ast.Tuple):
        return ("tuple", len(node.elts))
    if isinstance(node, ast.UnaryOp):
        inner = val(node.operand)
        if inner[0] in ("str", "bytes", "tuple", "none"):
            refuse("text and tuples cannot enter arithmetic")
        return inner
    if isinstance(node, ast.Compare):
        return (_ARRAY,)
    if isinstance(node, ast.BinOp):
        left, right = val(node.left), val(node.right)
        if {left[0], right[0]} & {"str", "bytes", "tuple", "none"}:
            refuse("text and tuples cannot enter arithmetic (only be compared with a column "
                   "or passed to a transform as an option)")
        if _ARRAY in (left[0], right[0]):
            return (_ARRAY,)
        if _FLOAT in (left[0], right[0]) or isinstance(node.op, ast.Div):
            return (_FLOAT,)
        (_, a, x), (_, b, e) = left, right
        if isinstance(node.op, ast.Pow):
            if e is not None and e < 0:
                return (_FLOAT,)
            if e is None:  # an exponent of more than _EXACT_DIGITS digits
                return whole(math.inf if x not in (0, 1, -1) else 1.0)
            if x in (0, 1, -1):
                digits = 1.0
            else:
                digits = (math.log10(abs(x)) if x is not None else a) * e + 1
        elif isinstance(node.op, ast.Mult):
            digits = a + b
        else:
            digits = max(a, b) + 1
        exact = None
        if x is not None and e is not None and digits <= _EXACT_DIGITS:
            exact = _exact(node.op, x, e)
        return whole(digits, exact)
    if isinstance(node, ast.Call):
        for k in node.keywords:
            if k.arg is None:
                refuse("'**' unpacking is not allowed")
        if any(isinstance(a, ast.Starred) for a in node.args):
            refuse("'*' unpacking is not allowed")
        func = node.func.attr if isinstance(node.func, ast.Attribute) else \
            getattr(node.func, "id", "")
        args = [val(a) for a in node.args]
        if func == "I" and len(args) == 1:
            return args[0]
        if args and args[0][0] == "int" and func in ("abs", "square"):
            return whole(args[0][1] * (2 if func == "square" else 1))
        if args and args[0][0] == "int":
            return (_FLOAT,)
        return (_ARRAY,)
    if isinstance(node, ast.Starred):
        refuse("'*' unpacking is not allowed")
    refuse(f"{type(node).__name__} expressions are not allowed")


#: whole numbers up to this many digits are followed exactly (so 10**6 counts as 7 digits)
_EXACT_DIGITS = 30


def _exact(op, x: int, y: int):
    """``x op y`` for small whole numbers (both under :data:`_EXACT_DIGITS` digits, the
    result too); None for an operation that fails (division by zero: Python reports it)."""
    import operator

    ops = {ast.Add: operator.add, ast.Sub: operator.sub, ast.Mult: operator.mul,
           ast.FloorDiv: operator.floordiv, ast.Mod: operator.mod, ast.Pow: operator.pow,
           ast.BitOr: operator.or_, ast.BitXor: operator.xor, ast.BitAnd: operator.and_}
    fn = ops.get(type(op))
    try:
        return fn(x, y) if fn is not None else None
    except (ZeroDivisionError, ValueError, OverflowError):
        return None


def _digits(d: float) -> str:
    return "infinitely many" if not math.isfinite(d) else f"{d:,.0f}"


#: transforms that make several columns or categories: not an outcome
_NOT_OUTCOME = frozenset({"C", "poly"})


def _screen_outcome(lhs, lhs_work, colset, formula):
    """The outcome side (already screened token by token with the whole formula):
    a column, or one term that transforms columns with the same whitelist as the
    covariates (``log(gsp)``, ``np.sqrt(y)``, ``I(gsp / emp)``). Returns
    ``(expr, columns)``: ``expr`` None for a plain column."""
    if lhs_work in colset:
        return None, (lhs_work,)
    from formulaic import Formula

    try:
        terms = list(Formula(f"0 + {lhs}"))
    except Exception as exc:  # formulaic's own syntax errors
        raise FormulaError(f"cannot read the outcome {lhs!r} of formula {formula!r}: "
                           f"{dependency_message(exc)}") from None
    tokens = set(re.findall(r"[A-Za-z_]\w*", lhs))
    bad = sorted(tokens & _NOT_OUTCOME)
    factors = [f for t in terms for f in t.factors]
    if len(terms) != 1 or len(factors) != 1 or bad:
        raise FormulaError(
            f"the outcome {lhs!r} in formula {formula!r} must be one numeric column or one "
            "transform of columns such as log(y) or I(y / x)"
            + (f"; {bad[0]}() makes several columns" if bad else
               "; for arithmetic on columns write it inside I(...), e.g. I(y / x)"))
    cols = []
    for m in re.finditer(r"`([^`]*)`|([A-Za-z_]\w*)", lhs):
        name = m.group(1) if m.group(1) is not None else m.group(2)
        if name in colset and name not in cols:
            cols.append(name)
    if not cols:
        raise FormulaError(f"the outcome {lhs!r} in formula {formula!r} uses no column of "
                           "the table")
    return lhs, tuple(cols)


def outcome_values(screened: "ScreenedFormula | str", frame) -> np.ndarray:
    """The outcome on the rows of ``frame`` (a DataFrame holding its columns), float64.

    A plain column is read as it is; a transform (``screened.outcome_expr``, or the
    expression itself) is evaluated by formulaic in :func:`safe_context`, on these rows
    only. Values that are not finite (log of 0, sqrt of a negative) stay NaN or inf for
    the caller to name.
    """
    expr = screened if isinstance(screened, str) else screened.outcome_expr
    if expr is None:
        return frame[screened.outcome].to_numpy(dtype=float, na_value=np.nan)
    from formulaic import Formula

    try:
        with np.errstate(all="ignore"):
            mm = Formula(f"0 + {expr}").get_model_matrix(
                frame.reset_index(drop=True), context=safe_context(), ensure_full_rank=False,
                na_action="ignore")
    except FormulaError:
        raise
    except Exception as exc:
        raise FormulaError(f"cannot compute the outcome {expr!r}: "
                           f"{dependency_message(exc)}") from None
    if mm.shape[1] != 1:
        raise FormulaError(f"the outcome {expr!r} gives {mm.shape[1]} columns; it must give one")
    return np.asarray(mm, dtype=float)[:, 0]
