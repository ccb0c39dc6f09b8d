"""The design check's figure and report section."""

from __future__ import annotations

import numpy as np

from ...core.safetext import LITERAL_RC, literal
from ...data.resultshape import check_prob
from .fits import BAYES, ORACLE, REFERENCE


def _figure(res, prob):
    import matplotlib.pyplot as plt

    with plt.rc_context(LITERAL_RC):  # labels are drawn as they are (no TeX, no mathtext)
        return _draw_figure(res, prob, plt)


def _draw_figure(res, prob, plt):
    tab = res.table().reset_index()
    lab = f"{round(100 * prob):d}%"
    tab = tab[tab[f"coverage {lab}"].notna()] if f"coverage {lab}" in tab else tab.iloc[:0]
    params = list(dict.fromkeys(tab["parameter"]))
    methods = list(dict.fromkeys(tab["method"]))
    fig, axes = plt.subplots(1, 2, figsize=(10, 0.45 * max(len(params), 3) + 1.5), sharey=True)
    marks = {BAYES: "o", REFERENCE: "s", ORACLE: "^"}
    ypos = {p: i for i, p in enumerate(params)}
    R = res.settings["replicates"]
    band = 2 * np.sqrt(prob * (1 - prob) / R)
    axes[0].axvspan(prob - band, prob + band, color="0.9", zorder=0)
    axes[0].axvline(prob, color="0.4", lw=1, ls="--")
    for k, meth in enumerate(methods):
        g = tab[tab["method"] == meth]
        off = (k - (len(methods) - 1) / 2) * 0.22
        y = np.array([ypos[p] for p in g["parameter"]]) + off
        axes[0].plot(g[f"coverage {lab}"], y, marks.get(meth, "o"), label=literal(meth))
        axes[1].plot(g[f"median width {lab}"], y, marks.get(meth, "o"), label=literal(meth))
    axes[1].set_xscale("log")
    axes[0].set_xlabel(f"coverage of the {lab} interval (band: nominal ± 2 Monte Carlo SE)")
    axes[1].set_xlabel(f"median width of the {lab} interval (log scale)")
    axes[0].set_yticks(range(len(params)), [literal(p) for p in params])
    axes[0].invert_yaxis()
    axes[0].legend(loc="best", fontsize="small")
    fig.suptitle(literal(f"Design check: {res.settings['model']}, "
                         f"{res.structure['n_units']} units, "
                         f"{res.settings['replicates']} replicates"), fontsize="medium")
    fig.tight_layout()
    return fig


def design_check_section(result: "DesignCheckResult", prob: float | None = None):
    """The report section of a design check: ``(table, figure)``.

    ``table`` is :meth:`DesignCheckResult.table` with ``attrs["summary"]`` holding the
    plain-language reading and ``attrs["title"]`` a heading; ``figure`` is
    :meth:`DesignCheckResult.figure`. For helper modules that assemble reports.

    Parameters
    ----------
    result : DesignCheckResult
        What :func:`~bayespanel.analysis.recovery.design_check` returned.
    prob : float, optional
        Interval probability of the figure (default: the ``interval`` option).
    """
    prob = check_prob(prob)  # None: the interval option
    tab = result.table()
    tab.attrs["title"] = "How trustworthy are the intervals on a panel of this shape?"
    tab.attrs["summary"] = result.summary()
    return tab, result.figure(prob)
