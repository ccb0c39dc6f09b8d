"""Figures of the report, drawn with matplotlib from the contents of ``results.json``.

Each function returns a ``data:image/svg+xml;base64,...`` URI (or ``None`` when there
is nothing to draw) for an ``<img>`` element. SVG output is made deterministic (fixed
hash salt, no date, glyphs as paths), so a report rebuilt from saved results is byte
for byte the one written by the fit.

Every piece of text that comes from the data or from results.json (term labels, model
titles, occasion labels) goes through :func:`literal`, so matplotlib draws it as it is:
a label such as ``spend_$:cost_$`` is not read as mathematics (which failed after all
the sampling) and TeX is never used (:data:`LITERAL_RC`).
"""

from __future__ import annotations

import base64
import io
import textwrap

import numpy as np

from ..analysis.serialcheck import STATISTIC as LAG1_STATISTIC
from ..core.safetext import LITERAL_RC, literal
from .tables import coefficient_grid
from .text import label

__all__ = ["coefficient_figure", "icc_figure", "loo_figure", "ppc_figure", "serial_figure",
           "PALETTE", "literal",
           "LITERAL_RC"]

PALETTE = {
    "ink": "#1f2d3a", "grid": "#e4dccf", "paper": "#ffffff",
    "bayes": ["#0f6e6a", "#3a9d96", "#0b4f4c", "#6cc0b8", "#145e80"],
    "ref": ["#b5532f", "#d07a4f", "#8a3a1e", "#e3a27f", "#a0522d", "#c2410c"],
    "truth": "#111111",
}

_RC = {
    "svg.hashsalt": "bayespanel", "svg.fonttype": "none", "font.size": 9,
    "font.family": "DejaVu Sans", "axes.edgecolor": "#8a8f94", "axes.linewidth": 0.8,
    "axes.labelcolor": "#1f2d3a", "xtick.color": "#52606d", "ytick.color": "#52606d",
    "axes.spines.top": False, "axes.spines.right": False, "axes.grid": True,
    "grid.color": "#ece6db", "grid.linewidth": 0.7, "axes.axisbelow": True,
    "figure.facecolor": "white", "axes.facecolor": "white", "axes.titlesize": 9.5,
    "axes.titleweight": "bold", "axes.titlecolor": "#1f2d3a", "axes.titlelocation": "left",
    "legend.frameon": False, "legend.fontsize": 8.5,
}

_RC.update(LITERAL_RC)


def _plt():
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    return plt


def _uri(fig) -> str:
    plt = _plt()
    buf = io.BytesIO()
    fig.savefig(buf, format="svg", bbox_inches="tight", metadata={"Date": None})
    plt.close(fig)
    return "data:image/svg+xml;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _colour(kind: str, i: int) -> str:
    seq = PALETTE["bayes" if kind == "bayesian" else "ref"]
    return seq[i % len(seq)]


def coefficient_figure(results: dict):
    """One small panel per term: each model's estimate and interval, truth when known."""
    cols, terms = coefficient_grid(results)
    terms = [t for t in terms if t != "Intercept"]
    if not terms or not cols:
        return None
    plt = _plt()
    truth = (results.get("truth") or {}).get("by_model", {})
    counters = {"bayesian": 0, "reference": 0}
    colours = {}
    for c in cols:
        colours[c["key"]] = _colour(c["kind"], counters[c["kind"]])
        counters[c["kind"]] += 1
    ncol = min(3, len(terms))
    nrow = int(np.ceil(len(terms) / ncol))
    with plt.rc_context(_RC):
        fig, axes = plt.subplots(nrow, ncol, figsize=(3.3 * ncol, 0.32 * len(cols) * nrow + 0.9 * nrow),
                                 squeeze=False)
        for ax, term in zip(axes.ravel(), terms):
            present = [c for c in cols if term in c["cells"] and c["cells"][term]["estimate"] is not None]
            for j, c in enumerate(present):
                y = len(present) - 1 - j
                cell = c["cells"][term]
                marker = "o" if c["kind"] == "bayesian" else "s"
                if cell["lower"] is not None and cell["upper"] is not None:
                    ax.plot([cell["lower"], cell["upper"]], [y, y], color=colours[c["key"]], lw=2.2,
                            solid_capstyle="round")
                ax.plot(cell["estimate"], y, marker, color=colours[c["key"]], ms=5.5,
                        mec="white", mew=0.8)
                tv = truth.get(c["key"], {}).get(term)
                if tv is not None:
                    ax.plot(tv, y, "D", color=PALETTE["truth"], ms=3.8, zorder=5)
            ax.set_yticks(range(len(present)))
            ax.set_yticklabels([literal(c["title"]) for c in reversed(present)], fontsize=7.5)
            ax.set_ylim(-0.7, len(present) - 0.3)
            ax.set_title(literal(term))
            ax.grid(axis="y", visible=False)
        for ax in axes.ravel()[len(terms):]:
            ax.set_visible(False)
        fig.tight_layout(w_pad=1.2, h_pad=1.0)
        return _uri(fig)


def _kde(draws, grid):
    from scipy.stats import gaussian_kde

    x = np.asarray(draws, dtype=float)
    x = x[np.isfinite(x)]
    if len(x) < 5 or np.ptp(x) == 0:
        return None
    # reflect at the bounds of [0, 1] so the density does not leak past them; the kernel
    # SD is the normal-reference rule of the draws themselves (Silverman 1986, eq. 3.28)
    xs = np.concatenate([x, -x, 2 - x])
    h = 1.06 * np.std(x) * len(x) ** -0.2
    dens = gaussian_kde(xs, bw_method=h / np.std(xs))(grid)
    return 3 * dens


def icc_figure(results: dict):
    """Posterior density of the ICC per Bayesian model, reference estimates as lines."""
    models = [m for m in results.get("models", [])
              if (m.get("variance_partition") or {}).get("icc_draws")]
    if not models:
        return None
    plt = _plt()
    grid = np.linspace(0, 1, 401)
    with plt.rc_context(_RC):
        fig, ax = plt.subplots(figsize=(7.2, 3.0))
        lo, hi = 1.0, 0.0
        for i, m in enumerate(models):
            draws = np.asarray(m["variance_partition"]["icc_draws"], dtype=float)
            lo, hi = min(lo, np.quantile(draws, 0.001)), max(hi, np.quantile(draws, 0.999))
            d = _kde(draws, grid)
            if d is None:
                continue
            ax.fill_between(grid, d, color=_colour("bayesian", i), alpha=0.18, lw=0)
            ax.plot(grid, d, color=_colour("bayesian", i), lw=1.8, label=literal(m["title"]))
        refs = [f for f in results.get("reference", []) if f.get("icc") is not None]
        for j, f in enumerate(refs):
            ax.axvline(f["icc"], color=_colour("reference", j), ls="--", lw=1.4,
                       label=literal(f"{f['title']} (ref.)"))
            lo, hi = min(lo, f["icc"]), max(hi, f["icc"])
        tv = (results.get("truth") or {}).get("icc")
        if tv is not None:
            ax.axvline(tv, color=PALETTE["truth"], lw=1.4, label="true value")
            lo, hi = min(lo, tv), max(hi, tv)
        pad = 0.08 * max(hi - lo, 0.05)
        ax.set_xlim(max(0.0, lo - pad), min(1.0, hi + pad))
        ax.set_ylim(bottom=0)
        latent = any((m["variance_partition"] or {}).get("scale", "").startswith("latent")
                     for m in models)
        u_sd = label("sigma_unit")
        ax.set_xlabel(f"{label('icc')} on the latent scale = {u_sd}² / ({u_sd}² + s²)"
                      if latent else
                      f"{label('icc')} = {u_sd}² / ({u_sd}² + {label('sigma_obs')}²)")
        ax.set_ylabel("posterior density")
        ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0))
        fig.tight_layout()
        return _uri(fig)


def loo_figure(results: dict):
    """ELPD difference to the best model with two standard errors of the difference."""
    comp = results.get("comparison") or {}
    rows = [r for r in comp.get("rows", []) if r.get("elpd_diff") is not None]
    if not rows:
        return None
    plt = _plt()
    with plt.rc_context(_RC):
        fig, ax = plt.subplots(figsize=(7.2, 0.42 * len(rows) + 1.0))
        nb = nr = 0
        for j, r in enumerate(rows):
            y = len(rows) - 1 - j
            kind = r.get("kind", "bayesian")
            col = _colour(kind, nb if kind == "bayesian" else nr)
            nb, nr = (nb + 1, nr) if kind == "bayesian" else (nb, nr + 1)
            d = float(r["elpd_diff"])
            se = float(r.get("se_diff") or 0.0)
            ax.plot([d - 2 * se, d + 2 * se], [y, y], color=col, lw=2.2, solid_capstyle="round")
            ax.plot(d, y, "o" if kind == "bayesian" else "s", color=col, ms=6, mec="white")
        ax.axvline(0, color=PALETTE["ink"], lw=0.9)
        ax.set_yticks(range(len(rows)))
        ax.set_yticklabels([literal(r["title"]) for r in reversed(rows)])
        ax.set_ylim(-0.7, len(rows) - 0.3)
        ax.grid(axis="y", visible=False)
        ax.set_xlabel(literal(f"ELPD difference to the best ({comp.get('level')} level; "
                              "0 = best, left = worse)"))
        fig.tight_layout()
        return _uri(fig)


def _panel_checks(m) -> list:
    """A model's predictive checks of panel statistics (the lag-one check has its own
    figure, :func:`serial_figure`)."""
    return [s for s in m.get("ppc") or [] if s["statistic"] != LAG1_STATISTIC]


def ppc_figure(results: dict):
    """Replicated panel statistics against the observed value, one row per model."""
    models = [m for m in results.get("models", []) if _panel_checks(m)]
    if not models:
        return None
    plt = _plt()
    stats = list(dict.fromkeys(s["label"] for m in models for s in _panel_checks(m)))
    with plt.rc_context(_RC):
        fig, axes = plt.subplots(len(models), len(stats), figsize=(2.5 * len(stats), 1.55 * len(models) + 0.4),
                                 squeeze=False)
        for i, m in enumerate(models):
            by = {s["label"]: s for s in _panel_checks(m)}
            for j, lab in enumerate(stats):
                ax = axes[i, j]
                s = by.get(lab)
                if s is None:
                    ax.set_visible(False)
                    continue
                rep = np.asarray(s["replicated"], dtype=float)
                ax.hist(rep, bins=24, color=_colour("bayesian", i), alpha=0.75, lw=0)
                ax.axvline(s["observed"], color=PALETTE["ref"][0], lw=1.8)
                ax.set_yticks([])
                ax.grid(visible=False)
                if i == 0:
                    ax.set_title(literal(lab))
                if j == 0:
                    ax.set_ylabel(literal(m["title"]), fontsize=8, rotation=0, ha="right",
                                  va="center")
        fig.tight_layout(w_pad=0.8, h_pad=0.6)
        return _uri(fig)


def serial_figure(results: dict):
    """The lag-one autocorrelation of within residuals: each model's replicated values
    (histogram) against the observed one (line), one small panel per model."""
    found = [(m, s) for m in results.get("models", []) for s in m.get("ppc") or []
             if s["statistic"] == LAG1_STATISTIC]
    if not found:
        return None
    plt = _plt()
    with plt.rc_context(_RC):
        fig, axes = plt.subplots(1, len(found), figsize=(2.3 * len(found) + 0.3, 1.9),
                                 squeeze=False, sharex=True)
        for i, (m, s) in enumerate(found):
            ax = axes[0, i]
            ax.hist(np.asarray(s["replicated"], dtype=float), bins=20,
                    color=_colour("bayesian", i), alpha=0.75, lw=0)
            ax.axvline(s["observed"], color=PALETTE["ref"][0], lw=1.8)
            ax.set_yticks([])
            ax.grid(visible=False)
            ax.set_title(literal(textwrap.fill(m["title"], 24)), fontsize=8)
            ax.set_xlabel("lag-one autocorrelation", fontsize=8)
        fig.tight_layout(w_pad=0.6)
        return _uri(fig)
