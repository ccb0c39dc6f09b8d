"""Occasion effects: one coefficient per occasion, read back and drawn over the occasions.

With ``occasion_effects=True`` every builder (and every reference fit) adds an indicator
per occasion, the first occasion being the reference (:meth:`bayespanel.Panel.design`).
They share one prior, set with the ``"occasion"`` key of ``priors=`` (see
:func:`bayespanel.bayes.priors.resolve_priors`). In the within-between and Mundlak
kinds an indicator splits into its within part and, in unbalanced panels, its unit mean:
the occasion effect proper is the within part (``"occasion[t] (within)"``, or
``"occasion[t]"`` in the Mundlak kind), and with the unit means in the model these equal
the two-way fixed-effects estimates exactly (Wooldridge 2019). In balanced panels the unit
means of the indicators are the same for every unit, so they are left out
(:meth:`bayespanel.data.design.Design.matrices`).

References
----------
.. [1] Wooldridge, J. M. (2019). Correlated random effects models with unbalanced panels.
   Journal of Econometrics 211, 137-150. doi:10.1016/j.jeconom.2018.12.010
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..core.errors import SpecificationError
from ..data.resultshape import check_prob
from ..core.safetext import LITERAL_RC, literal
from ..core.terms import AS_IS, BETWEEN, UNIT_MEAN, WITHIN, parse

__all__ = ["occasion_effects", "occasion_effects_figure", "true_occasion_coef"]


def _parse(label):
    """``(occasion, part)`` of an occasion term's label, None for any other term."""
    t = parse(label)
    return (t.base, t.part) if t.is_occasion else None


def true_occasion_coef(label, truth):
    """The true coefficient of an occasion term under simulated values, or None when
    ``label`` is not an occasion term.

    ``truth["occasion"]`` (optional) maps ``"occasion[t]"`` to the effect of occasion t,
    0 when absent (a simulation without occasion effects). The effect is the same within
    and between units, so ``"occasion[t] (within)"`` and ``"occasion[t] (between)"``
    both carry it, and the Mundlak unit mean ``"occasion[t] (unit mean)"``, the between
    minus within difference, is 0.
    """
    p = _parse(label)
    if p is None:
        return None
    occ, part = p
    return 0.0 if part == UNIT_MEAN else float(
        (truth.get("occasion") or {}).get(parse(label).column.label, 0.0))


def occasion_effects(fit, prob: float | None = None, part: str = "effect") -> pd.DataFrame:
    """The occasion effects of a fit, in occasion order.

    Parameters
    ----------
    fit : Posterior or ReferenceResult
        Anything with ``coef`` (Series by term) and ``interval(prob)`` (DataFrame with
        ``lower`` and ``upper`` by term), fitted with ``occasion_effects=True``.
    prob : float
        Interval probability.
    part : {"effect", "between"}
        ``"effect"``: the occasion effect (the indicator itself, or its within part in
        the within-between kind); ``"between"``: the coefficient of the indicator's unit
        mean (within-between ``(between)`` or Mundlak ``(unit mean)``; unbalanced panels
        only).

    Returns
    -------
    DataFrame
        Index ``occasion`` (the label's value, as text); columns ``term``, ``estimate``,
        ``lower``, ``upper``.
    """
    prob = check_prob(prob)  # None: the interval option
    if part not in ("effect", "between"):
        raise SpecificationError(f"part={part!r} is not valid; choose 'effect' or 'between'")
    coef = pd.Series(fit.coef)
    ci = fit.interval(prob)
    kinds = {p for lab in coef.index if (p := _parse(lab))}
    has_within = any(k == WITHIN for _, k in kinds)
    want = (WITHIN if has_within else AS_IS) if part == "effect" else None
    rows = []
    for lab in coef.index:
        p = _parse(lab)
        if p is None:
            continue
        occ, k = p
        if (part == "effect" and k == want) or (part == "between" and k in (BETWEEN,
                                                                              UNIT_MEAN)):
            rows.append({"occasion": occ, "term": lab, "estimate": float(coef[lab]),
                         "lower": float(ci.loc[lab, "lower"]),
                         "upper": float(ci.loc[lab, "upper"])})
    if not rows:
        raise SpecificationError(
            "the fit has no occasion effects" + (" with a between part (balanced panels have "
                                                 "none)" if part == "between" else "")
            + "; fit it with occasion_effects=True")
    out = pd.DataFrame(rows).set_index("occasion")
    out.attrs["prob"] = prob
    return out


def occasion_effects_figure(fits, prob: float | None = None, reference_occasion=None,
                            part="effect"):
    """Occasion effects over the occasions, with intervals, one series per fit.

    Parameters
    ----------
    fits : fit or dict of name -> fit
        Posteriors and reference results (see :func:`occasion_effects`).
    prob : float
    reference_occasion : optional
        The occasion left out (its effect is 0 by construction); drawn at zero if given.
    part : {"effect", "between"}

    Returns
    -------
    matplotlib.figure.Figure
    """
    prob = check_prob(prob)  # None: the interval option
    import matplotlib.pyplot as plt

    if not isinstance(fits, dict):
        fits = {"fit": fits}
    tables = {name: occasion_effects(f, prob, part) for name, f in fits.items()}
    order = list(dict.fromkeys(o for t in tables.values() for o in t.index))
    if reference_occasion is not None:
        order = [str(reference_occasion)] + [o for o in order if o != str(reference_occasion)]
    with plt.rc_context(LITERAL_RC):  # labels drawn as they are (no TeX, no mathtext)
        pos = {o: i for i, o in enumerate(order)}
        fig, ax = plt.subplots(figsize=(max(5.0, 0.45 * len(order) + 2.5), 3.6))
        width = 0.6 / max(len(tables), 1)
        for k, (name, t) in enumerate(tables.items()):
            off = (k - (len(tables) - 1) / 2) * width
            x = np.array([pos[o] for o in t.index]) + off
            ax.errorbar(x, t["estimate"], yerr=[t["estimate"] - t["lower"],
                                                t["upper"] - t["estimate"]],
                        fmt="o-", capsize=2, lw=1, label=literal(name))
        if reference_occasion is not None:
            ax.plot([0], [0], "k^", label=literal(f"reference ({reference_occasion})"))
        ax.axhline(0, color="0.5", lw=0.8)
        ax.set_xticks(range(len(order)), [literal(o) for o in order],
                      rotation=45 if len(order) > 10 else 0)
        ax.set_xlabel("occasion")
        ax.set_ylabel(("occasion effect" if part == "effect" else "between part")
                      + f" ({round(100 * prob)}% interval)")
        if len(tables) > 1 or reference_occasion is not None:
            ax.legend(fontsize="small")
        fig.tight_layout()
        return fig
