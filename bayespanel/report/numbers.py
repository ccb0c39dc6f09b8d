"""The one rule for numbers shown in tables: digits that fit their uncertainty.

Every table of a run (the HTML report, the Markdown and LaTeX files, the console summary)
formats its numbers here; ``results.json`` and the CSV files keep full precision.

The rule
--------
- An uncertainty (posterior SD, standard error, SE of an ELPD) is shown to
  :data:`UNCERTAINTY_DIGITS` significant digits. The estimate it belongs to, and the ends
  of its interval, are shown to the same decimal place (never fewer than zero decimals):
  ``-0.00412`` beside ``0.00069``, ``98`` beside ``30``, ``0.110`` beside ``0.013``.
  Common practice in reporting measurements (two significant digits of the uncertainty).
  Digits before the decimal point are never dropped: an uncertainty of 100 or more is
  shown as an integer (``121``), and so is its estimate.
- A number without a stated uncertainty (a test statistic, a descriptive statistic, a
  variance component of a reference fit) is shown to :data:`PLAIN_DIGITS` significant
  digits, never dropping digits before the decimal point.
- Probabilities (posterior probabilities of a sign or a region, predictive-check tail
  probabilities, p-values) are shown to :data:`PROB_DECIMALS` decimals with bounds:
  ``< 0.001`` and ``> 0.999``.
- Counts (rows, units, divergences, effective sample sizes) are integers.
- Shares and weights (parts of a whole that are not probabilities) have
  :data:`PROB_DECIMALS` decimals, without bounds.
- Diagnostics with a fixed threshold keep the decimals the threshold needs: R-hat three
  (threshold 1.01), Pareto k and BFMI two (thresholds 0.7 and 0.3).

Numbers too large or too small for fixed notation (more than :data:`MAX_DECIMALS`
decimals, or ``|x| >= 1e9``) switch to scientific notation with the same significant
digits. A missing or non-finite number is shown as :data:`MISSING`.
"""

from __future__ import annotations

import math

__all__ = ["UNCERTAINTY_DIGITS", "PLAIN_DIGITS", "PROB_DECIMALS", "MAX_DECIMALS", "MISSING",
           "decimals_for", "estimate", "uncertainty", "interval", "plain", "probability",
           "p_value", "count", "share", "rhat", "pareto_k", "bfmi", "dof", "number"]

UNCERTAINTY_DIGITS = 2
PLAIN_DIGITS = 3
PROB_DECIMALS = 3
MAX_DECIMALS = 6
MISSING = "–"


def _finite(x):
    """``float(x)`` when ``x`` is a finite number, else None."""
    if x is None or isinstance(x, bool):
        return None
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def _magnitude(v: float) -> int:
    return math.floor(math.log10(abs(v)))


def _round_sig(v: float, sig: int) -> float:
    """``v`` rounded to ``sig`` significant digits (0.0996 -> 0.10 at two)."""
    return float(f"{v:.{sig - 1}e}")


def decimals_for(u) -> int | None:
    """Decimals that show the uncertainty ``u`` to :data:`UNCERTAINTY_DIGITS` significant
    digits (at least 0); None when ``u`` is missing, zero or not finite."""
    u = _finite(u)
    if not u:
        return None
    r = _round_sig(abs(u), UNCERTAINTY_DIGITS)
    return max(0, UNCERTAINTY_DIGITS - 1 - _magnitude(r))


def _fixed(v: float, decimals: int) -> str:
    s = f"{v:.{decimals}f}"
    if float(s) == 0:  # no "-0.00"
        s = s.lstrip("-")
    return s


def _sci(v: float, sig: int) -> str:
    return f"{v:.{max(sig, 1) - 1}e}"


def _too_wide(v: float, decimals: int) -> bool:
    return decimals > MAX_DECIMALS or abs(v) >= 1e9


def estimate(x, u) -> str:
    """An estimate to the decimal place of its uncertainty ``u`` (see the module rule);
    :func:`plain` when ``u`` is missing."""
    v = _finite(x)
    if v is None:
        return MISSING
    d = decimals_for(u)
    if d is None:
        return plain(v)
    if _too_wide(v, d) or _too_wide(float(u), d):
        sig = max(UNCERTAINTY_DIGITS, (_magnitude(v) if v else 0) + d + 1)
        return _sci(v, sig)
    return _fixed(v, d)


def uncertainty(u) -> str:
    """An SD or SE to :data:`UNCERTAINTY_DIGITS` significant digits."""
    v = _finite(u)
    if v is None:
        return MISSING
    if v == 0:
        return "0"
    d = decimals_for(v)
    return _sci(v, UNCERTAINTY_DIGITS) if _too_wide(v, d) else _fixed(v, d)


def interval(lo, hi, u) -> str:
    """``[lo, hi]`` with both ends to the decimal place of the uncertainty ``u``."""
    return f"[{estimate(lo, u)}, {estimate(hi, u)}]"


def plain(x, sig: int = PLAIN_DIGITS, scale=None) -> str:
    """A number without a stated uncertainty: ``sig`` significant digits, never fewer
    digits than its integer part has. With ``scale`` (e.g. the SD of the variable), a value
    below ``1e-9 * scale`` is the rounding noise of an exact zero and shown as 0."""
    v = _finite(x)
    if v is None:
        return MISSING
    s = _finite(scale)
    if s and abs(v) < 1e-9 * abs(s):
        v = 0.0
    if v == 0:
        return "0"
    if abs(v) >= 1e9 or abs(v) < 10.0 ** -(MAX_DECIMALS - sig + 1):
        return _sci(v, sig)
    r = _round_sig(v, sig)
    return _fixed(v, max(0, sig - 1 - _magnitude(r)))


def probability(p) -> str:
    """A probability to :data:`PROB_DECIMALS` decimals, ``< 0.001`` and ``> 0.999`` at
    the ends (an exact 0 or 1 from a finite number of draws is a bound too)."""
    v = _finite(p)
    if v is None:
        return MISSING
    step = 10.0 ** -PROB_DECIMALS
    if v < step:
        return f"< {step:.{PROB_DECIMALS}f}"
    if v > 1 - step:
        return f"> {1 - step:.{PROB_DECIMALS}f}"
    return f"{v:.{PROB_DECIMALS}f}"


def p_value(p) -> str:
    """A p-value: as :func:`probability` at the small end; 1 is shown as it is."""
    v = _finite(p)
    if v is None:
        return MISSING
    step = 10.0 ** -PROB_DECIMALS
    return f"< {step:.{PROB_DECIMALS}f}" if v < step else f"{v:.{PROB_DECIMALS}f}"


def count(n) -> str:
    """A count as an integer (effective sample sizes are rounded)."""
    v = _finite(n)
    if v is None:
        return MISSING
    return f"{int(round(v)):,}"


def share(x) -> str:
    """A share or weight (a part of a whole), :data:`PROB_DECIMALS` decimals."""
    v = _finite(x)
    return MISSING if v is None else _fixed(v, PROB_DECIMALS)


def rhat(x) -> str:
    v = _finite(x)
    return MISSING if v is None else f"{v:.3f}"


def pareto_k(x) -> str:
    v = _finite(x)
    return MISSING if v is None else _fixed(v, 2)


bfmi = pareto_k


def dof(x) -> str:
    """Degrees of freedom: an integer when whole, else one decimal (Satterthwaite)."""
    v = _finite(x)
    if v is None:
        return MISSING
    return f"{int(round(v))}" if abs(v - round(v)) < 1e-9 else f"{v:.1f}"


def number(x, kind: str = "plain", u=None) -> str:
    """Format ``x`` by kind: ``"estimate"`` (with uncertainty ``u``), ``"uncertainty"``,
    ``"plain"``, ``"probability"``, ``"p_value"``, ``"count"``, ``"share"``, ``"rhat"``,
    ``"pareto_k"``, ``"bfmi"`` or ``"dof"``."""
    if kind == "estimate":
        return estimate(x, u)
    return _BY_KIND[kind](x)


_BY_KIND = {"uncertainty": uncertainty, "plain": plain, "probability": probability,
            "p_value": p_value, "count": count, "share": share, "rhat": rhat,
            "pareto_k": pareto_k, "bfmi": bfmi, "dof": dof}
