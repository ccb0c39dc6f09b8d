"""Design check: how trustworthy is each interval on a panel of this shape?

:func:`design_check` keeps the user's real panel structure (the estimation rows, their
units, occasions per unit and covariate values, hence every within and between spread),
simulates replicate outcomes from given or fitted parameter values, refits the chosen
Bayesian model and its frequentist reference on each replicate, and reports per
parameter the coverage of the 90% and 95% intervals (with Monte Carlo error), the bias,
the median interval width, the probability that an interval excludes zero (for the
between-minus-within contrasts of time-varying covariates: the power to detect a
difference of the size the user sets), and how often the frequentist unit variance lands
on zero.

Every replicate is an exact draw from the Gaussian random-intercept model
``y = M b + u_i + e_it`` on the fixed ``M``. The Bayesian model is compiled once (nutpie)
and each replicate only swaps the sufficient statistics held as shared data in the graph
(:meth:`bayespanel.bayes.GaussianModel.set_suffstats`); the reference fits are closed
form on the same statistics. A third row of results, "GLS, known variances", is the
random-intercept GLS estimator with the true variance components plugged in: its normal
intervals have exact coverage on any design (Aitken's generalised least squares with a
known covariance; e.g. Searle, Casella and McCulloch 1992, section 3.3), which anchors the
Monte Carlo error of the whole exercise.

This is a simulation study of a design in the sense of Morris, White and Crowther (2019);
the Monte Carlo standard errors follow their Table 6.

References
----------
.. [1] Morris, T. P., White, I. R. and Crowther, M. J. (2019). Using simulation studies to
   evaluate statistical methods. Statistics in Medicine 38, 2074-2102. doi:10.1002/sim.8086
.. [2] Searle, S. R., Casella, G. and McCulloch, C. E. (1992). *Variance Components*.
   Wiley. doi:10.1002/9780470316856
.. [3] Aitken, A. C. (1935). On least squares and linear combination of observations.
   Proceedings of the Royal Society of Edinburgh 55, 42-48. doi:10.1017/S0370164600014346
"""

from __future__ import annotations

import threading
import warnings
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import stats as _st

from .. import kinds
from ..core import suffstats as _ss
from ..core.ar1 import refuse_pending
from .contrasts import contrast_rows
from ..core.errors import EstimationError, SamplingWarning, SpecificationError, choices_error
from ..data.resultshape import check_prob
from .occasions import true_occasion_coef
from ..core.safetext import LITERAL_RC, literal
from ..core.terms import CONTRAST, parse

__all__ = ["design_check", "DesignCheckResult", "design_check_section", "REFERENCE_METHODS"]

REFERENCE_METHODS = ("reml", "ml", "swamy-arora")
BAYES, REFERENCE, ORACLE = "Bayesian", "reference", "GLS, known variances"


# ---------------------------------------------------------------------------- inputs
def _builder(model):
    from ..bayes import GaussianModel
    from ..bayes.latent import LatentModel

    if isinstance(model, LatentModel):  # also an instance of its builder (latent_class)
        raise SpecificationError(
            f"the design check runs the Gaussian models; {model!r} has latent unit effects "
            "(family= or random_slopes=)")
    if isinstance(model, GaussianModel):
        return model
    if isinstance(model, (str, kinds.ModelKind)):
        return kinds.builder(model)
    if isinstance(model, type) and issubclass(model, GaussianModel):
        return model
    raise SpecificationError(
        f"model={model!r} is not a model; give a builder name such as 'RandomIntercept', a "
        "builder class, or a built model")


def _make_model(source, model, formula, priors, occasion_effects):
    """A built model carrying its rows ``(M, y, unit_codes)``."""
    from ..data.design import Design
    from ..data.panel import Panel

    built = _builder(model)
    if not isinstance(built, type):
        if built.rows is None:
            raise SpecificationError(
                "the model has no rows (built from sufficient statistics alone); the design "
                "check needs the covariate rows: build it from a panel")
        return built
    if isinstance(source, Panel):
        if formula is None:
            raise SpecificationError("formula= is needed when the design check starts from a "
                                     "panel and a builder name")
        return built(source, formula, priors=priors, occasion_effects=occasion_effects)
    if isinstance(source, Design):
        M, labels = _design_matrix(built, source)
        stats = _ss.compute(M, source.y, source.unit_codes, names=labels + [source.outcome])
        return built.from_suffstats(stats, labels, outcome=source.outcome, units=source.units,
                                    priors=priors, rows=(M, source.y, source.unit_codes),
                                    design_spec=source.spec.to_dict())
    raise SpecificationError(
        f"the design check needs a Panel, a Design or a built model, got {type(source).__name__}")


def _design_matrix(cls, design):
    """The covariate rows a builder class uses (fixed effects: original time-varying columns)."""
    if cls.kind == "within":
        _, labels = design.matrices("within")
        return design.X[:, [design.terms.index(t) for t in labels]], labels
    M, labels = design.matrices(cls.kind)
    return M, list(labels)


def _truth_vector(truth, model, difference):
    """``(b, sigma_unit, sigma_obs)`` on the model's columns from the user's truth."""
    labels = list(model.labels)
    kind = model.kind
    if isinstance(truth, str):
        if truth != "reference":
            raise choices_error("truth", truth, ["reference", "a dict", "a fitted result"])
        M, y, codes = model.rows
        truth = _fit_reference(model, M, y, codes, "reml")
    if isinstance(truth, dict):
        if "coef" in truth:
            coef = dict(truth["coef"])
        elif "within" in truth:
            coef = _coef_from_components(truth, labels, kind)
        else:
            raise SpecificationError(
                "truth= needs a 'coef' entry (values by term label: "
                + ", ".join(map(repr, labels)) + ") or the demo layout with 'within', "
                "'between', 'constant' and 'intercept'")
        su, so = truth.get("sigma_unit"), truth.get("sigma_obs")
    else:  # a fitted result: ReferenceResult or Posterior answer with the same names
        if not hasattr(truth, "coef") or not hasattr(truth, "sigma_obs"):
            raise SpecificationError(
                f"truth={type(truth).__name__} is not usable; give a dict, 'reference', or a "
                "fitted result with .coef, .sigma_unit and .sigma_obs")
        coef = {k: float(v) for k, v in pd.Series(truth.coef).items()}
        su, so = getattr(truth, "sigma_unit", 0.0), truth.sigma_obs
    missing = [lab for lab in labels if lab not in coef]
    if missing:
        raise SpecificationError(
            "truth has no value for term(s) " + ", ".join(map(repr, missing))
            + "; the model's terms are " + ", ".join(map(repr, labels)))
    extra = [k for k in coef if k not in labels]
    if extra:
        raise SpecificationError(
            "truth names term(s) the model does not have: " + ", ".join(map(repr, extra))
            + "; the model's terms are " + ", ".join(map(repr, labels)))
    b = np.array([float(coef[lab]) for lab in labels])
    if so is None or not np.isfinite(float(so)) or float(so) <= 0:
        raise SpecificationError(f"truth sigma_obs={so!r} must be a positive number")
    su = 0.0 if su is None or (kind == "pooled") else float(su)
    if not np.isfinite(su) or su < 0:
        raise SpecificationError(f"truth sigma_unit={su!r} must be a number >= 0")
    if difference:
        b = _apply_difference(b, labels, kind, difference)
    return b, su, float(so)


def _coef_from_components(truth, labels, kind):
    """Map the demo layout (within / between / constant effects) onto the model's terms
    (the column map's :meth:`~bayespanel.kinds.ColumnMap.true_coefficients`; occasion
    terms from :func:`~bayespanel.analysis.occasions.true_occasion_coef`)."""
    values = kinds.column_map(kind).true_coefficients(
        truth.get("within", {}), truth.get("between", {}), dict(truth.get("constant", {})),
        truth.get("intercept", 0.0))
    out = {}
    for lab in labels:
        occ = true_occasion_coef(lab, truth)
        value = occ if occ is not None else values.get(lab)
        if value is not None:
            out[lab] = value
    return out


def _apply_difference(b, labels, kind, difference):
    """Set the between effect of each named covariate to its within effect plus the size
    (the column map's contrast set to the size)."""
    columns = kinds.column_map(kind)
    if not columns.contrast:
        raise SpecificationError(
            f"difference= needs separate within and between effects; the {kind} model has "
            "one coefficient per covariate: use WithinBetween or CorrelatedEffects")
    for x, size in dict(difference).items():
        b = columns.set_contrast(b, labels, x, size)
        if b is None:
            raise SpecificationError(_no_contrast(x, labels))
    return b


def _no_contrast(x, labels):
    return (f"difference names {x!r}, which has no within and between parts in this model "
            "(only covariates that vary within units and whose unit means differ between "
            "units do); terms are "
            + ", ".join(map(repr, labels)))


def _contrasts(labels, kind):
    """``(name, weight vector)`` for each between-minus-within contrast of the model
    (:func:`bayespanel.analysis.contrasts.contrast_rows`)."""
    names, L = contrast_rows(kind, labels)
    return list(zip(names, L))


# ---------------------------------------------------------------------------- one replicate
def simulate_outcome(M, unit_codes, b, sigma_unit, sigma_obs, rng):
    """One replicate outcome ``y = M b + u_i + e_it`` with ``u_i ~ N(0, sigma_unit^2)`` and
    ``e_it ~ N(0, sigma_obs^2)`` on fixed rows ``M``."""
    n_units = int(unit_codes.max()) + 1
    u = rng.normal(0.0, sigma_unit, n_units) if sigma_unit > 0 else np.zeros(n_units)
    return M @ b + u[unit_codes] + rng.normal(0.0, sigma_obs, len(unit_codes))


def _fit_reference(model, M, y, codes, method):
    from ..reference import fit_arrays

    # the reference fit on the model's columns (a reference kind is named by its columns)
    est = kinds.reference(model.kind)
    meth = method if est.variance_components else None
    cov = "cluster" if est.unit_effects == "none" else "classical"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fit_arrays(est.name, M, y, codes, list(model.labels), method=meth, cov=cov,
                          outcome=model.outcome)


def _oracle(stats, sigma_unit, sigma_obs):
    """GLS with the true variance components: estimate and exact covariance."""
    from ..reference.core import gls_core

    fit = gls_core(stats, sigma_unit ** 2, sigma_obs ** 2)
    b = np.full(stats.k, np.nan)
    V = np.full((stats.k, stats.k), np.nan)
    b[fit.cols] = fit.beta
    V[np.ix_(fit.cols, fit.cols)] = sigma_obs ** 2 * fit.bread
    return b, V


class _Sampler:
    """The Bayesian model compiled once (nutpie); each replicate swaps the shared data."""

    def __init__(self, model, draws, tune, chains, target_accept):
        from ..bayes.sampling import nutpie_compiled

        self.model = model
        self.names = ["coef", "sigma_obs"] + (["sigma_unit"] if model.unit_effects == "random"
                                              else [])
        # the compilation is kept on the model (until its graph is edited), so later
        # design checks and nutpie fits of the same model do not compile again
        self.compiled = nutpie_compiled(model)
        self.shared = {v.name for v in self.compiled.shared_var_keys}
        self.draws, self.tune, self.chains = draws, tune, chains
        self.target_accept = target_accept
        self._lock = threading.Lock()
        self._orig = (model.stats, model.rows)

    def values_for(self, stats, rows):
        # set_suffstats recomputes the standardisation and the prior values in the graph;
        # the lock keeps two replicates from reading each other's values
        with self._lock:
            self.model.set_suffstats(stats, rows=rows)
            return {v.name: np.array(v.get_value()) for v in self.model.pymc_model.data_vars
                    if v.name in self.shared}

    def restore(self):
        stats, rows = self._orig
        self.model.set_suffstats(stats, rows=rows)

    def run(self, stats, rows, seed):
        import nutpie

        import dataclasses

        # nutpie's default start reads the graph's current shared values, which another
        # replicate may be changing; start instead from a seeded uniform(-1, 1) point on
        # the unconstrained (standardised) scale, so each replicate depends on its seed only
        compiled = dataclasses.replace(self.compiled.with_data(**self.values_for(stats, rows)),
                                       initial_point_func=_uniform_start(self.compiled.n_dim))
        dt = nutpie.sample(compiled, draws=self.draws, tune=self.tune, chains=self.chains,
                           cores=1, seed=int(seed), progress_bar=False,
                           target_accept=self.target_accept, save_warmup=False)
        post = dt["posterior"]
        coef = np.asarray(post["coef"].values)                    # chain, draw, term
        out = {"coef": coef.reshape(-1, coef.shape[-1]),
               "sigma_obs": np.asarray(post["sigma_obs"].values).ravel()}
        if "sigma_unit" in self.names:
            out["sigma_unit"] = np.asarray(post["sigma_unit"].values).ravel()
        div = np.asarray(dt["sample_stats"]["diverging"].values)
        out["divergences"] = int(div.sum())
        from arviz_stats.base import array_stats

        stacked = np.concatenate([coef, np.asarray(post["sigma_obs"].values)[..., None]]
                                 + ([np.asarray(post["sigma_unit"].values)[..., None]]
                                    if "sigma_unit" in self.names else []), axis=-1)
        out["rhat"] = float(np.nanmax(array_stats.rhat(np.moveaxis(stacked, -1, 0))))
        return out


class _Skip(Exception):
    """Internal: the reference fit was not asked for."""


def _uniform_start(n_dim):
    def start(seed):
        return np.random.default_rng(seed).uniform(-1.0, 1.0, n_dim)

    return start


def _interval_rows(method, names, truth, est, lo, hi, r):
    """Long records ``(replicate, method, parameter, truth, estimate, prob, lower, upper)``."""
    rows = []
    for prob in lo:
        for j, name in enumerate(names):
            rows.append((r, method, name, truth[j], est[j], prob, lo[prob][j], hi[prob][j]))
    return rows


def _one(r, seq, ctx):
    M, codes, b, su, so = ctx["M"], ctx["codes"], ctx["b"], ctx["su"], ctx["so"]
    rng = np.random.default_rng(seq)
    y = simulate_outcome(M, codes, b, su, so, rng)
    stats = _ss.compute(M, y, codes)
    names, tvals = ctx["names"], ctx["tvals"]
    C = ctx["C"]  # (k + contrasts) x k map from coefficients to reported linear combinations
    probs = ctx["probs"]
    rec, extra = [], {"replicate": r}
    z = {p: _st.norm.ppf(0.5 + p / 2) for p in probs}
    # reference fit on the same rows
    try:
        if not ctx["reference"]:
            raise _Skip
        ref = _fit_reference(ctx["model"], M, y, codes, ctx["method"])
        bb = np.full(len(b), np.nan)
        V = np.full((len(b), len(b)), np.nan)
        idx = [ctx["labels"].index(t) for t in ref.coef.index]
        bb[idx] = ref.coef.to_numpy()
        V[np.ix_(idx, idx)] = ref.vcov.to_numpy()
        df = np.full(len(b), np.inf)
        df[idx] = ref.df_resid.to_numpy()
        est = C @ bb
        se = np.sqrt(np.einsum("ij,jk,ik->i", C, V, C))
        dfc = np.full(len(est), np.nan)
        for i in range(len(est)):
            used = np.flatnonzero(C[i])
            dfc[i] = np.min(df[used])
        lo, hi = {}, {}
        for p in probs:
            q = np.where(np.isfinite(dfc), _st.t.ppf(0.5 + p / 2, np.where(np.isfinite(dfc), dfc, 1)),
                         z[p])
            lo[p], hi[p] = est - q * se, est + q * se
        rec += _interval_rows(REFERENCE, names, tvals, est, lo, hi, r)
        extra["reference_sigma_unit"] = float(ref.sigma_unit)
        extra["reference_sigma_obs"] = float(ref.sigma_obs)
    except _Skip:
        pass
    except EstimationError as exc:
        extra["reference_error"] = str(exc)
    # GLS with the true variances (exact)
    if ctx["oracle"]:
        bo, Vo = _oracle(stats, su, so)
        est = C @ bo
        se = np.sqrt(np.einsum("ij,jk,ik->i", C, Vo, C))
        lo = {p: est - z[p] * se for p in probs}
        hi = {p: est + z[p] * se for p in probs}
        rec += _interval_rows(ORACLE, names, tvals, est, lo, hi, r)
    # Bayesian refit on swapped statistics
    if ctx["sampler"] is not None:
        try:
            out = ctx["sampler"].run(stats, (M, y, codes), ctx["seeds"][r])
        except Exception as exc:  # reported in the result, never hidden
            extra["bayes_error"] = f"{type(exc).__name__}: {exc}"
        else:
            draws = out["coef"] @ C.T
            cols = [draws]
            snames, struth = [], []
            for comp, tv in (("sigma_unit", su), ("sigma_obs", so)):
                if comp in out:
                    cols.append(out[comp][:, None])
                    snames.append(comp)
                    struth.append(tv)
            D = np.column_stack(cols)
            lo = {p: np.quantile(D, 0.5 - p / 2, axis=0) for p in probs}
            hi = {p: np.quantile(D, 0.5 + p / 2, axis=0) for p in probs}
            rec += _interval_rows(BAYES, names + snames, list(tvals) + struth, D.mean(axis=0),
                                  lo, hi, r)
            extra["divergences"] = out["divergences"]
            extra["rhat_max"] = out["rhat"]
    return rec, extra


# ---------------------------------------------------------------------------- results
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
        ``coef`` (by term), ``sigma_unit``, ``sigma_obs`` used to simulate.
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
        return simulate_outcome(c["M"], c["codes"], c["b"], c["su"], c["so"], rng)

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

    def figure(self, prob: float | None = None):
        """Coverage (with 2 Monte Carlo SE) and median interval width per parameter.

        Returns
        -------
        matplotlib.figure.Figure
        """
        prob = check_prob(prob)  # None: the interval option
        return _figure(self, prob)


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


def design_check_section(result: DesignCheckResult, prob: float | None = None):
    """The report section of a design check: ``(table, figure)``.

    ``table`` is :meth:`DesignCheckResult.table` with ``attrs["summary"]`` holding the
    plain-language reading and ``attrs["title"]`` a heading; ``figure`` is
    :meth:`DesignCheckResult.figure`. For helper modules that assemble reports.
    """
    prob = check_prob(prob)  # None: the interval option
    tab = result.table()
    tab.attrs["title"] = "How trustworthy are the intervals on a panel of this shape?"
    tab.attrs["summary"] = result.summary()
    return tab, result.figure(prob)


# ---------------------------------------------------------------------------- entry point
def design_check(source, model="RandomIntercept", formula=None, *, truth="reference",
                 replicates=200, difference=None, draws=500, tune=500, chains=2,
                 bayes=True, reference=True, reference_method="reml", probs=(0.9, 0.95), seed=1, workers=2,
                 progress=True, priors=None, occasion_effects=False, target_accept=0.8):
    """Simulate replicate outcomes on the user's panel structure and refit on each.

    Parameters
    ----------
    source : Panel, Design or None
        The panel whose structure is kept (estimation rows, units, occasions, covariate
        values). ``None`` when ``model`` is a built model.
    model : str, builder class or built model, default "RandomIntercept"
        A registered model kind (:mod:`bayespanel.kinds`) by class, class name
        (``"WithinBetween"``) or snake-case name (``"within_between"``); a built model is
        refitted as it is (its priors included).
    formula : str, optional
        Needed with a panel and a builder name.
    truth : dict, "reference" or a fitted result, default "reference"
        Parameter values to simulate from: ``{"coef": {term: value}, "sigma_unit": ...,
        "sigma_obs": ...}`` on the model's term labels (or the demo layout of
        :func:`bayespanel.data.datasets.clinic_panel`); ``"reference"`` uses the REML fit of
        the model's reference estimator on the real outcome; a
        :class:`~bayespanel.reference.ReferenceResult` or a Posterior uses its estimates.
    replicates : int
    difference : dict, optional
        ``{covariate: size}``: simulate with the between effect equal to the within effect
        plus ``size`` (WithinBetween and CorrelatedEffects). The row
        ``"x (between - within)"`` then reports the power to detect it.
    draws, tune, chains : int
        Per Bayesian refit (nutpie, one compilation for all replicates).
    bayes : bool, default True
        ``False`` runs only the reference and the known-variance GLS (seconds).
    reference : bool, default True
        Fit the frequentist reference on every replicate.
    reference_method : {"reml", "ml", "swamy-arora"}
        Variance components of the random-intercept reference fits.
    probs : tuple of float
        Interval probabilities reported (default 90% and 95%).
    seed : int
        The same seed gives the same replicates and the same draws.
    workers : int
        Replicates run in this many threads (nutpie samples outside Python's lock).
    progress : bool
        Show a progress bar.

    Returns
    -------
    DesignCheckResult

    Examples
    --------
    >>> import bayespanel as bp
    >>> df, truth = bp.datasets.clinic_panel(n_clinics=20, seed=3)
    >>> panel = bp.Panel(df, unit="clinic", time="quarter")
    >>> res = bp.design_check(panel, "WithinBetween", truth["formula"], truth=truth,
    ...                       replicates=100, difference={"staffing": 2.0})  # doctest: +SKIP
    >>> res.table()                                                         # doctest: +SKIP

    References
    ----------
    Morris, White and Crowther (2019), Statistics in Medicine 38, 2074-2102.
    """
    from ..bayes.sampling import check_int

    replicates = check_int("replicates", replicates, 2)
    workers = check_int("workers", workers, 1)
    if reference_method not in REFERENCE_METHODS:
        raise choices_error("reference_method", reference_method, REFERENCE_METHODS)
    probs = tuple(float(p) for p in probs)
    if not probs or any(not 0 < p < 1 for p in probs):
        raise SpecificationError(f"probs={probs!r} must hold numbers in (0, 1)")
    if bayes:
        draws = check_int("draws", draws, 10)
        tune = check_int("tune", tune, 1)
        chains = check_int("chains", chains, 1)
    m = _make_model(source, model, formula, priors, occasion_effects)
    # the replicates are draws of the iid random-intercept model: not a check of an
    # AR(1) model's intervals (its own coverage study is tests/test_ar1_coverage.py)
    refuse_pending(getattr(m, "errors", "iid"), "design_check (its replicates simulate "
                   "independent errors)")
    M, _, codes = m.rows
    M = np.asarray(M, dtype=float)
    codes = np.asarray(codes, dtype=np.int64)
    labels = list(m.labels)
    b, su, so = _truth_vector(truth, m, difference)
    con = _contrasts(labels, m.kind)
    C = np.vstack([np.eye(len(labels))] + [w[None] for _, w in con])
    names = labels + [n for n, _ in con]
    tvals = C @ b
    T = np.bincount(codes)
    root = np.random.SeedSequence(seed)
    spawned = root.spawn(replicates)
    seeds = np.random.default_rng(root.spawn(1)[0]).integers(0, 2 ** 31 - 1, replicates)
    sampler = _Sampler(m, draws, tune, chains, target_accept) if bayes else None
    ctx = {"M": M, "codes": codes, "b": b, "su": su, "so": so, "names": names,
           "tvals": tvals, "C": C, "probs": probs, "labels": labels, "model": m,
           "method": reference_method, "reference": bool(reference), "oracle": m.unit_effects == "random",
           "sampler": sampler, "seeds": seeds, "spawned": spawned}
    results = [None] * replicates
    try:
        with _progress(progress, replicates) as tick, ThreadPoolExecutor(workers) as ex:
            futures = {ex.submit(_one, r, spawned[r], ctx): r for r in range(replicates)}
            for fut in _as_completed(futures):
                results[futures[fut]] = fut.result()
                tick()
    finally:
        if sampler is not None:
            sampler.restore()
    recs = [row for rec, _ in results for row in rec]
    records = pd.DataFrame(recs, columns=["replicate", "method", "parameter", "truth",
                                          "estimate", "prob", "lower", "upper"])
    info = pd.DataFrame([e for _, e in results]).set_index("replicate").sort_index()
    structure = {"n_units": int(len(T)), "n_rows": int(len(codes)),
                 "occasions_min": int(T.min()), "occasions_median": float(np.median(T)),
                 "occasions_max": int(T.max()), "balanced": bool(T.min() == T.max())}
    settings = {"model": type(m).__name__, "kind": m.kind, "replicates": replicates,
                "draws": draws if bayes else None, "tune": tune if bayes else None,
                "chains": chains if bayes else None, "bayes": bool(bayes),
                "reference_method": reference_method if reference else None, "probs": probs, "seed": seed,
                "difference": dict(difference or {})}
    res = DesignCheckResult(records=records, replicate_info=info,
                            truth={"coef": dict(zip(labels, map(float, b))),
                                   "sigma_unit": su, "sigma_obs": so},
                            structure=structure, settings=settings, _ctx=ctx)
    for note in res.problems():
        warnings.warn(f"design check: {note}", SamplingWarning, stacklevel=2)
    return res


def _as_completed(futures):
    from concurrent.futures import as_completed

    return as_completed(futures)


class _progress:
    """A rich progress bar (or nothing) counting finished replicates."""

    def __init__(self, show, total):
        self.show, self.total = show, total

    def __enter__(self):
        if not self.show:
            return lambda: None
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, TimeRemainingColumn

        self._p = Progress("design check", BarColumn(), MofNCompleteColumn(),
                           TimeRemainingColumn(), transient=True)
        self._p.start()
        task = self._p.add_task("replicates", total=self.total)
        return lambda: self._p.advance(task)

    def __exit__(self, *exc):
        if self.show:
            self._p.stop()
        return False
