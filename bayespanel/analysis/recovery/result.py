"""What a design check found: records, the table, its plain-language reading."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ... import kinds
from ...core.jsonsafe import jsonable
from ...core.terms import CONTRAST, parse
from ...data.resultshape import check_prob
from .fits import BAYES, ORACLE, REFERENCE
from .simulate import simulate_outcome


@dataclass
class DesignCheckResult:
    """What :func:`design_check` found (see :meth:`table` and :meth:`figure`).

    Attributes
    ----------
    records : DataFrame
        One row per replicate, method, parameter and interval probability: the truth, the
        estimate (posterior mean for the Bayesian fit) and the interval limits.
    replicate_info : DataFrame
        One row per replicate: the reference variance components, divergences, largest
        R-hat and any error met.
    truth : dict
        ``coef`` (by term), ``sigma_unit``, ``sigma_obs`` (and ``rho`` with AR(1) errors)
        used to simulate.
    structure : dict
        Units, rows, occasions per unit (min, median, max) of the design kept.
    settings : dict
        Model, reference method, replicates, draws, seed, probabilities.
    seeds : numpy.random.SeedSequence
        The replicate outcomes are ``simulate(i)`` for ``i`` in ``range(replicates)``.
    """

    records: pd.DataFrame
    replicate_info: pd.DataFrame
    truth: dict
    structure: dict
    settings: dict
    _ctx: dict = field(repr=False, default=None)

    def simulate(self, i: int) -> np.ndarray:
        """The outcome of replicate ``i`` (same rows as the model, same seed)."""
        c = self._ctx
        rng = np.random.default_rng(c["spawned"][i])
        return simulate_outcome(c["M"], c["codes"], c["b"], c["su"], c["so"], rng,
                                c.get("rho"), c.get("timeline"))

    @property
    def rows(self):
        """``(M, unit_codes, labels)``: the fixed covariate rows every replicate uses."""
        return self._ctx["M"], self._ctx["codes"], list(self._ctx["labels"])

    def zero_variance_share(self) -> float:
        """Share of replicates whose frequentist unit variance estimate is exactly zero."""
        s = self.replicate_info.get("reference_sigma_unit")
        if s is None or s.notna().sum() == 0:
            return float("nan")
        return float((s.dropna() == 0.0).mean())

    def table(self) -> pd.DataFrame:
        """Per method and parameter: coverage, bias, width and how often zero is excluded.

        Columns: ``truth``, ``mean estimate``, ``bias``, ``rmse``, ``coverage 90%`` /
        ``coverage 95%`` (share of replicates whose interval holds the truth) with their
        Monte Carlo SE ``mcse 95%`` (``sqrt(c(1-c)/R)``, Morris et al. 2019),
        ``median width 90%`` / ``median width 95%``, ``excludes zero 95%`` (for a
        between-minus-within contrast: the power to detect the difference; for a zero
        truth: the false-detection rate), ``zero unit variance`` (reference rows, share of
        replicates with ``sigma_unit = 0``) and ``replicates`` used.
        """
        rec = self.records
        if rec.empty:
            return pd.DataFrame()
        rec = rec.assign(covered=(rec["lower"] <= rec["truth"]) & (rec["truth"] <= rec["upper"]),
                         width=rec["upper"] - rec["lower"],
                         excl=(rec["lower"] > 0) | (rec["upper"] < 0))
        out = []
        order = {m: i for i, m in enumerate([BAYES, REFERENCE, ORACLE])}
        for (meth, par), g in rec.groupby(["method", "parameter"], sort=False):
            row = {"method": meth, "parameter": par, "truth": g["truth"].iloc[0]}
            one = g[g["prob"] == g["prob"].iloc[0]]
            err = one["estimate"] - one["truth"]
            row.update({"mean estimate": one["estimate"].mean(), "bias": err.mean(),
                        "rmse": float(np.sqrt((err ** 2).mean()))})
            for p, gp in g.groupby("prob"):
                lab = f"{round(100 * p):d}%"
                ok = gp["lower"].notna()
                c = gp.loc[ok, "covered"].mean() if ok.any() else np.nan
                row[f"coverage {lab}"] = c
                row[f"mcse {lab}"] = np.sqrt(c * (1 - c) / ok.sum()) if ok.any() else np.nan
                row[f"median width {lab}"] = gp.loc[ok, "width"].median() if ok.any() else np.nan
                row[f"excludes zero {lab}"] = gp.loc[ok, "excl"].mean() if ok.any() else np.nan
            row["replicates"] = int(one["estimate"].notna().sum())
            out.append(row)
        tab = pd.DataFrame(out)
        if (self.settings.get("reference_method")
                and kinds.reference(self.settings["kind"]).variance_components):
            info = self.replicate_info
            s = info["reference_sigma_unit"].dropna() if "reference_sigma_unit" in info else []
            ref = {"method": REFERENCE, "parameter": "sigma_unit",
                   "truth": self.truth["sigma_unit"],
                   "mean estimate": float(np.mean(s)) if len(s) else np.nan,
                   "bias": float(np.mean(s) - self.truth["sigma_unit"]) if len(s) else np.nan,
                   "rmse": float(np.sqrt(np.mean((np.asarray(s) - self.truth["sigma_unit"]) ** 2)))
                   if len(s) else np.nan,
                   "zero unit variance": self.zero_variance_share(), "replicates": len(s)}
            tab = pd.concat([tab, pd.DataFrame([ref])], ignore_index=True)
        tab["_o"] = tab["method"].map(order)
        tab = tab.sort_values("_o", kind="stable").drop(columns="_o").reset_index(drop=True)
        return tab.set_index(["method", "parameter"])

    def problems(self) -> list[str]:
        """Plain-language notes on replicates that failed or sampled badly."""
        info, notes = self.replicate_info, []
        R = len(info)
        for col, what in (("reference_error", "the reference fit failed"),
                          ("bayes_error", "Bayesian sampling failed")):
            if col in info and info[col].notna().any():
                k = int(info[col].notna().sum())
                notes.append(f"{what} on {k} of {R} replicates (first: {info[col].dropna().iloc[0]})")
        if "divergences" in info and info["divergences"].fillna(0).sum() > 0:
            k = int((info["divergences"] > 0).sum())
            notes.append(f"{k} of {R} replicates had divergent transitions "
                         f"({int(info['divergences'].sum())} in total)")
        if "rhat_max" in info and (info["rhat_max"] > 1.01).any():
            k = int((info["rhat_max"] > 1.01).sum())
            notes.append(f"{k} of {R} replicates had R-hat above 1.01 (common practice "
                         "threshold, Vehtari et al. 2021); give more draws")
        return notes

    def summary(self) -> str:
        """Plain-language reading of :meth:`table` (coverage off nominal, power, zero variance)."""
        tab = self.table().reset_index()
        R = self.settings["replicates"]
        s = self.structure
        lines = [f"Design check of {self.settings['model']} on {s['n_units']} units, {s['n_rows']} "
                 f"rows ({s['occasions_min']} to {s['occasions_max']} occasions per unit), "
                 f"{R} replicates."]
        if "rho" in self.truth:
            lines[0] = lines[0][:-1] + (f", errors AR(1) within units with rho = "
                                        f"{self.truth['rho']:.3g}.")
        for _, row in tab.iterrows():
            c, n = row.get("coverage 95%"), row.get("replicates")
            # off nominal by more than 2 Monte Carlo SE at the nominal rate (Morris et al. 2019)
            if pd.notna(c) and n and abs(c - 0.95) > 2 * np.sqrt(0.95 * 0.05 / n):
                lines.append(f"- {row['method']}: the 95% interval of {row['parameter']} holds "
                             f"the truth in {c:.0%} of replicates (nominal 95%, Monte Carlo "
                             f"SE {np.sqrt(0.95 * 0.05 / n):.1%}).")
            t = parse(row["parameter"])
            if t.part == CONTRAST and pd.notna(row.get("excludes zero 95%")):
                x, e = t.column.label, row["excludes zero 95%"]
                if row["truth"] != 0:
                    lines.append(f"- {row['method']}: a between-minus-within difference of "
                                 f"{row['truth']:.3g} in {x} is detected (95% interval excludes "
                                 f"zero) in {e:.0%} of replicates.")
                else:
                    lines.append(f"- {row['method']}: with no true between-minus-within "
                                 f"difference in {x}, a difference is wrongly detected in "
                                 f"{e:.0%} of replicates (nominal 5%).")
        z = self.zero_variance_share()
        if np.isfinite(z):
            lines.append(f"- The frequentist unit SD is estimated as exactly zero in {z:.0%} of "
                         "replicates.")
        lines += [f"- {p}" for p in self.problems()]
        return "\n".join(lines)

    def to_record(self) -> dict:
        """The design check as JSON-ready values (NaN as ``None``).

        Returns
        -------
        dict
            ``settings``, ``structure``, ``truth`` (as simulated), ``table`` (one record
            per method and parameter: the columns of :meth:`table`), ``summary`` (its
            plain-language reading) and ``problems`` (:meth:`problems`).
        """
        tab = self.table()
        return jsonable({"settings": self.settings, "structure": self.structure,
                         "truth": self.truth, "table": [] if tab.empty else tab,
                         "summary": self.summary(), "problems": self.problems()})

    def figure(self, prob: float | None = None):
        """Coverage (with 2 Monte Carlo SE) and median interval width per parameter.

        Returns
        -------
        matplotlib.figure.Figure
        """
        from .figure import _figure  # matplotlib only when a figure is asked for

        prob = check_prob(prob)  # None: the interval option
        return _figure(self, prob)

