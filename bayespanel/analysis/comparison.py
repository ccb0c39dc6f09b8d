"""One table for deciding between specifications: predictive accuracy and coefficients.

:func:`compare` puts Bayesian posteriors and frequentist reference fits of the same rows
into one LOO table at one level. The Bayesian ELPD is PSIS-LOO on the unit or occasion
terms (:func:`bayespanel.analysis.loo.loo`); a reference fit's ELPD is exact cross-validation with
closed-form refits and plug-in predictive densities at the same level
(:func:`bayespanel.analysis.loo.reference_cv`). Differences to the best model and their standard
errors come from the paired pointwise values, ``se_diff = sqrt(n var(d_i))`` (Vehtari,
Gelman and Gabry 2017, section 5.2); stacking weights (Yao et al. 2018) are computed for the
Bayesian models only, since the reference fits have no predictive distribution beyond a
point estimate.

Equivalent models (the same likelihood on the same column space, such as the
within-between and the Mundlak parametrisations: :func:`equivalence_classes`) predict
alike, so the stacking objective cannot tell how to split weight between them: only the
sum of their weights is determined, and an optimiser puts it anywhere (0.000 to one,
0.843 to the other). Stacking is therefore run over classes of equivalent models, each
class scored by the equal mixture of its members' LOO predictive densities, and a class's
weight is shared equally by its members (see docs/comparison.md).

:func:`coef_table` aligns every model's estimates and intervals by term.

References
----------
.. [1] Vehtari, A., Gelman, A. and Gabry, J. (2017). Practical Bayesian model evaluation
   using leave-one-out cross-validation and WAIC. Statistics and Computing 27, 1413-1432.
   doi:10.1007/s11222-016-9696-4
.. [2] Yao, Y., Vehtari, A., Simpson, D. and Gelman, A. (2018). Using stacking to average
   Bayesian predictive distributions. Bayesian Analysis 13(3), 917-1007.
   doi:10.1214/17-BA1091
.. [3] Sivula, T., Magnusson, M., Matamoros, A. A. and Vehtari, A. (2025). Uncertainty in
   Bayesian leave-one-out cross-validation based model comparison. arXiv:2008.10296
.. [4] Magnusson, M., Andersen, M. R., Jonasson, J. and Vehtari, A. (2019). Bayesian
   leave-one-out cross-validation for large data. ICML, PMLR 97, 4244-4253.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .. import kinds
from ..core.errors import EstimationError, SpecificationError
from ..core.jsonsafe import json_record
from ..data.resultshape import check_prob, leading_columns
from .loo import LOOResult, check_level, loo, outcome_measure, reference_cv

__all__ = ["compare", "coef_table", "equivalence_classes", "methods_note", "COMPARE_COLUMNS",
           "ComparisonTable"]

COMPARE_COLUMNS = ["elpd", "se", "elpd_diff", "se_diff", "p_loo", "weight", "method",
                   "level", "n_points", "n_high_pareto_k", "equivalent_to", "note"]


class ComparisonTable(pd.DataFrame):
    """What :func:`compare` returns: a table with one row per model (columns
    :data:`COMPARE_COLUMNS`; ``attrs``: ``level``, ``n_points``, ``n_points_all``,
    ``equivalent``, ``methods_note`` and ``kinds``, ``"bayes"`` or ``"reference"`` by
    model) and its record in ``results.json`` (:meth:`to_record`)."""

    @property
    def _constructor(self):
        return ComparisonTable

    def to_record(self, titles: dict | None = None, reference_folds=None) -> dict:
        """The ``comparison`` record of ``results.json`` (docs/results-schema.md):
        ``level``, ``reference_folds``, ``rows`` (every column of the table with the
        model's name as ``model``, its ``title`` from ``titles`` (default the name),
        ``kind`` ``"bayesian"`` or ``"reference"``; a note on equivalent models names their
        titles), ``methods_note`` and ``equivalent``. Non-finite numbers are ``None``."""
        titles = dict(titles or {})
        kinds_of = self.attrs.get("kinds", {})
        rows = []
        for key, r in self.iterrows():
            rec = json_record({str(k): v for k, v in r.items()})
            rec["model"] = str(key)
            rec["title"] = titles.get(str(key), str(key))
            if rec.get("equivalent_to") and rec.get("note"):  # titles, not internal names
                names = rec["equivalent_to"].split(", ")
                rec["note"] = rec["note"].replace(
                    f"equivalent to {rec['equivalent_to']} (",
                    f"equivalent to {', '.join(titles.get(n, n) for n in names)} (", 1)
            rec["kind"] = "reference" if kinds_of.get(key) == "reference" else "bayesian"
            rows.append(rec)
        return {"level": self.attrs.get("level"), "reference_folds": reference_folds,
                "rows": rows, "methods_note": self.attrs.get("methods_note") or None,
                "equivalent": self.attrs.get("equivalent", [])}


def _is_posterior(obj) -> bool:
    return hasattr(obj, "idata") and hasattr(obj, "spec")


def _is_reference(obj) -> bool:
    return hasattr(obj, "estimator") and hasattr(obj, "refit")


def _family_of(obj):
    """The outcome family a model scores (``None`` when unknown)."""
    if isinstance(obj, LOOResult):
        return obj.family
    lspec = getattr(obj, "lspec", None)
    return lspec.family if lspec is not None else "gaussian"


def _outcome_of(name, obj):
    """What a model was fitted to, for the checks that all models answer one question:
    ``y``, unit codes and (when known) occasion labels of the estimation rows, the
    outcome's name, the family and the binomial trials. ``None`` for a LOOResult."""
    if isinstance(obj, LOOResult):
        return None
    if _is_posterior(obj):
        if obj.rows is None:
            raise SpecificationError(f"model {name!r}: the posterior has no estimation rows")
        _, y, codes = obj.rows
        time, outcome = getattr(obj, "time", None), obj.spec.outcome
    elif _is_reference(obj):
        if obj.design is None:
            raise SpecificationError(f"model {name!r}: the reference fit has no design; fit "
                                     "it from a Panel")
        d = obj.design
        y, codes, time, outcome = d.y, d.unit_codes, d.time, d.outcome
    else:
        return None
    family = _family_of(obj)
    trials = getattr(obj, "trials", None)
    if family == "bernoulli":
        trials = np.ones(len(y))
    return {"y": np.asarray(y, float), "codes": np.asarray(codes), "outcome": outcome,
            "time": None if time is None else np.asarray(time), "family": family,
            "trials": None if trials is None else np.asarray(trials, float)}


def _check_same_question(models):
    """Refuse to rank models fitted on different rows or outcomes, or whose pointwise
    terms are log probabilities (discrete families) against log densities (continuous)."""
    first = None
    for name, obj in models.items():
        o = _outcome_of(name, obj)
        if o is None:
            continue
        if first is None:
            first = (name, o)
            continue
        n0, f = first
        if (len(o["y"]) != len(f["y"]) or not np.array_equal(o["codes"], f["codes"])
                or (o["time"] is not None and f["time"] is not None
                    and not np.array_equal(o["time"].astype(str), f["time"].astype(str)))):
            raise SpecificationError(
                f"model {name!r} is not fitted on the same rows as {n0!r} "
                f"({len(o['y'])} vs {len(f['y'])} rows); LOO values can only be "
                "compared on the same rows")
        if not np.array_equal(o["y"], f["y"]):
            bad = int(np.flatnonzero(o["y"] != f["y"])[0])
            raise SpecificationError(
                f"model {name!r} ({o['outcome']!r}) does not model the same outcome as "
                f"{n0!r} ({f['outcome']!r}): the values differ first at estimation row {bad}; "
                "LOO values of different outcomes cannot be ranked")
        if (o["trials"] is not None and f["trials"] is not None
                and not np.array_equal(o["trials"], f["trials"])):
            raise SpecificationError(
                f"model {name!r} and {n0!r} count successes out of different numbers of "
                "trials, so they predict different outcomes and cannot be ranked")
    measures = {}
    for name, obj in models.items():
        fam = _family_of(obj)
        if fam is not None:
            measures.setdefault(outcome_measure(fam), []).append(f"{name!r} ({fam})")
    if len(measures) > 1:
        raise SpecificationError(
            "these models score the outcome on different scales: "
            + ", ".join(measures["mass"]) + " give log probabilities of a discrete outcome, "
            + ", ".join(measures["density"]) + " log densities of a continuous one; their "
            "ELPDs are not comparable at any level (see docs/comparison.md). Compare models "
            "of one kind: the count or binary families among themselves, or the Gaussian "
            "and Student-t models among themselves")


def _evaluate(name, obj, level, reference_folds, loo_kwargs, seed, progress=None):
    """``(LOOResult or None, kind, note)``."""
    if loo_kwargs.get("subsample") is not None:
        raise SpecificationError(
            "loo_kwargs: compare needs every pointwise value for the paired differences; "
            "sub-sampled LOO cannot be compared here (use reference_folds and K-fold instead)")
    if isinstance(obj, LOOResult):
        if obj.level != level:
            raise SpecificationError(
                f"model {name!r}: the LOO result is at the {obj.level} level, not {level!r}")
        if not np.all(np.isfinite(obj.elpd_i)):
            raise SpecificationError(
                f"model {name!r}: the LOO result lacks pointwise values (sub-sampled?); "
                "compare needs every point for the paired differences")
        return obj, "bayes" if obj.method.startswith(("PSIS", "grouped")) else "reference", ""
    if _is_posterior(obj):
        try:
            return loo(obj, level, **loo_kwargs), "bayes", ""
        except EstimationError as exc:  # the level is undefined for this model
            return None, "bayes", str(exc)
    if _is_reference(obj):
        try:
            return (reference_cv(obj, level, folds=reference_folds, seed=seed,
                                 progress=progress), "reference", "")
        except EstimationError as exc:
            return None, "reference", str(exc)
    raise SpecificationError(
        f"model {name!r} is a {type(obj).__name__}; give a Posterior, a ReferenceResult or a "
        "LOOResult")


def _stacking(results: dict, common, classes=()) -> dict:
    """Stacking weights of the Bayesian models on the common points (arviz-stats), over
    classes of equivalent models: a class enters as the equal mixture of its members'
    LOO predictive densities, ``log mean_m exp(elpd_m,i)``, and its weight is shared
    equally by its members."""
    from scipy.special import logsumexp

    groups = [[n for n in c if n in results] for c in classes]
    groups = [g for g in groups if g]
    grouped = {n for g in groups for n in g}
    groups += [[n] for n in results if n not in grouped]
    if len(groups) == 1:
        return {n: 1.0 / len(groups[0]) for n in groups[0]}
    import warnings

    import arviz_stats
    import xarray as xr
    from arviz_stats.utils import ELPDDataLOO

    ics = {}
    for g in groups:
        e = logsumexp(np.vstack([_restrict(results[n], common) for n in g]), axis=0) \
            - np.log(len(g))
        ics[g[0]] = ELPDDataLOO(elpd=float(e.sum()), se=float(np.sqrt(len(e) * np.var(e, ddof=1))),
                                p=0.0, n_samples=results[g[0]].n_draws or 1,
                                n_data_points=len(e), scale="log", warning=False, good_k=0.7,
                                elpd_i=xr.DataArray(e, dims=["point"]))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        table = arviz_stats.compare(ics, method="stacking", round_to="none")
    return {n: float(table.loc[g[0], "weight"]) / len(g) for g in groups for n in g}


# ---------------------------------------------------------------------------- equivalence
def _signature(obj):
    """``(likelihood key, columns)`` of a model, or ``None`` when unknown (a LOOResult).

    Two models with the same key and the same column span on the same rows have the same
    likelihood up to a reparametrisation of the coefficients."""
    if _is_posterior(obj):
        from .loo import from_posterior

        fd = from_posterior(obj)
        lspec = getattr(obj, "lspec", None)
        slopes = tuple(getattr(lspec, "slope_labels", ()) or ())
        # independent and AR(1) errors are different likelihoods on the same columns
        errors = "ar1" if fd.rho is not None else "iid"
        key = ("posterior", fd.unit_effects, fd.family, slopes, errors)
        return key, fd.M
    if _is_reference(obj):
        from .loo.reference_cv import reference_columns

        if obj.estimator == "between" or obj.design is None:
            return None
        M, _ = reference_columns(obj)
        return ("reference", kinds.reference(obj.estimator).unit_effects, obj.method), M
    return None


def _same_span(A, B) -> bool:
    """Whether the columns of ``A`` and ``B`` (same rows) span the same space, judged on
    the cross-products with the reference fits' collinearity tolerance."""
    from ..core.linalg import rank_of

    C = np.column_stack([A, B])
    norms = np.sqrt(np.einsum("ij,ij->j", C, C))
    C = C[:, norms > 0] / norms[norms > 0]
    cp = C.T @ C
    ka = int(np.sum(norms[:A.shape[1]] > 0))
    ra = rank_of(cp[:ka, :ka])
    rb = rank_of(cp[ka:, ka:])
    return ra == rb == rank_of(cp)


def equivalence_classes(models: dict) -> list:
    """Groups of models that are reparametrisations of each other.

    Two models are equivalent when they have the same likelihood family, the same kind of
    unit effects (none, random, fixed) and, for posteriors, the same random slopes and
    occasion-level errors (independent or AR(1)), or for
    reference fits the same estimator family and variance-component method, and their
    columns span the same space on the same rows. The within-between and Mundlak models
    always are (``x = x_within + x_between``); the random intercept joins them when no
    covariate varies within units. Equivalent posteriors differ only through their priors
    (alike when the priors are weak, as the defaults are); equivalent reference fits give
    identical predictions.

    Parameters
    ----------
    models : dict of str -> Posterior, ReferenceResult or LOOResult
        LOOResults carry no design and are never grouped.

    Returns
    -------
    list of list of str
        Classes of two or more models, in the order the models were given.
    """
    sigs = {}
    for name, obj in models.items():
        sig = _signature(obj)
        if sig is not None:
            sigs[name] = sig
    classes, seen = [], set()
    names = list(sigs)
    for a_i, a in enumerate(names):
        if a in seen:
            continue
        group = [a]
        for b in names[a_i + 1:]:
            if b in seen or sigs[a][0] != sigs[b][0]:
                continue
            A, B = sigs[a][1], sigs[b][1]
            if A.shape[0] == B.shape[0] and _same_span(A, B):
                group.append(b)
        if len(group) > 1:
            classes.append(group)
            seen.update(group)
    return classes


def methods_note(methods) -> str:
    """What a table mixing LOO methods means for its ranking ("" when it does not mix).

    ``methods`` are the ``method`` labels of the rows (``undefined`` rows ignored)."""
    methods = [m for m in methods if m and m != "undefined"]
    kfold = sorted({m for m in methods if "K-fold" in m})
    loo_rows = [m for m in methods if "K-fold" not in m]
    parts = []
    if kfold and loo_rows:
        parts.append(
            f"Rows scored by {' and '.join(kfold)} sit beside leave-one-out rows. A K-fold "
            "refit leaves out a whole fold, so it predicts from fewer rows than a "
            "leave-one-out refit and its ELPD is lower for the same model (more so for "
            "models with more parameters): a difference between a K-fold row and a "
            "leave-one-out row mixes the models' accuracy with this difference of method. "
            "Rank such rows as approximate, or score every row by leave-one-out")
    sub = sorted({m for m in methods if "sub-sampled" in m})
    if sub and len(sub) < len(set(methods)):
        parts.append("Sub-sampled estimates carry extra sampling error (their SE includes "
                     "it); differences to exact rows are less certain than their SE of "
                     "difference suggests")
    return ". ".join(parts) + ("." if parts else "")


def _restrict(r: LOOResult, common) -> np.ndarray:
    pw = r.pointwise.set_index("position")
    return pw.loc[common, "elpd"].to_numpy(dtype=float)


def compare(models: dict, level: str = "occasion", *, reference_folds=None, seed: int = 0,
            loo_kwargs=None, equivalent=None, progress=None) -> ComparisonTable:
    """Compare Bayesian posteriors and reference fits by LOO at one level.

    Parameters
    ----------
    models : dict of str -> Posterior, ReferenceResult or LOOResult
        All fitted on the same estimation rows and outcome (checked). Latent-effect
        posteriors (``family=``, ``random_slopes=``) enter through the same PSIS-LOO on
        their own terms (quadrature at the unit level, the factorised conditional at the
        occasion level); a discrete family (log probabilities) is refused beside a
        continuous model (log densities) at either level.
    level : {"unit", "occasion"}
        ``"unit"`` ranks the models by how well they predict a new unit; ``"occasion"`` by
        how well they predict a new occasion of a unit already seen. See
        docs/comparison.md.
    reference_folds : int, optional
        Reference fits use exact leave-one-out by default (one closed-form refit per
        point, from downdated statistics, at every size); an integer ``K`` uses grouped
        K-fold instead (the table then says what mixing methods means for the ranking).
    seed : int
        Seed of the reference K-fold folds.
    loo_kwargs : dict, optional
        Passed to :func:`bayespanel.analysis.loo.loo` for the posteriors (e.g.
        ``{"refit_high_k": True}``). In a sub-sampled comparison (below),
        ``{"subsample": m}`` sets the points sampled (default :data:`SUBSAMPLE_POINTS`).
    equivalent : list of list of str, optional
        Classes of equivalent models (default: :func:`equivalence_classes` of
        ``models``; give them when the models are LOOResults).
    progress : callable, optional
        Receives progress lines of long reference cross-validations.

    Returns
    -------
    ComparisonTable
        A pandas DataFrame (with :meth:`ComparisonTable.to_record`, the ``comparison``
        record of results.json) indexed by model name, best first, with columns ``elpd``, ``se``, ``elpd_diff``
        (model minus best), ``se_diff`` (from the paired pointwise differences),
        ``p_loo`` (Bayesian only), ``weight`` (stacking over classes of equivalent
        models, Bayesian only), ``method`` (``"PSIS-LOO"``, ``"exact CV"``, ...),
        ``level``, ``n_points``, ``n_high_pareto_k``, ``equivalent_to`` (the other
        members of the model's equivalence class, comma-separated, or ``""``) and
        ``note``. Models for which the level is undefined (fixed effects at the unit
        level) come last with ``nan`` values and the reason in ``note``. Only plain
        floats, ints and strings, so ``to_json`` works. ``attrs`` hold ``level``,
        ``n_points``, ``n_points_all``, ``equivalent`` (the classes),
        ``methods_note`` (:func:`methods_note`, "" unless methods are mixed) and
        ``kinds`` (``"bayes"`` or ``"reference"`` by model).

    Raises
    ------
    SpecificationError
        When the models differ in their rows, their outcome (values, or binomial trials) or
        the scale of their terms (probabilities of a discrete outcome against densities of
        a continuous one); see docs/comparison.md.

    Notes
    -----
    Posteriors of models on a design without rows at hand (a Dask panel:
    ``Design.has_rows`` false), and sub-sampled LOOResults, are compared by sub-sampled
    LOO (Magnusson et al. 2019): every posterior is scored on the same seeded sample of
    points (``seed``), ``se_diff`` comes from the sampled points both models scored,
    reference fits and stacking weights are left out (their rows say why).

    When some model cannot predict some points (fixed effects and units with a single
    row, at the occasion level), every model is scored on the points all can predict,
    and the note says how many were left out.
    """
    check_level(level)
    if not isinstance(models, dict) or not models:
        raise SpecificationError("models must be a non-empty dict of name -> fitted model")
    if any(_sub_sampled(obj) for obj in models.values()):
        return _compare_subsampled(models, level, seed, dict(loo_kwargs or {}))
    _check_same_question(models)
    classes = equivalence_classes(models) if equivalent is None else [
        [n for n in c if n in models] for c in equivalent]
    classes = [c for c in classes if len(c) > 1]
    evaluated = {name: _evaluate(name, obj, level, reference_folds, dict(loo_kwargs or {}),
                                 seed, progress) for name, obj in models.items()}
    defined = {n: r for n, (r, _, _) in evaluated.items() if r is not None}
    if not defined:
        raise SpecificationError(f"no model has a predictive density at the {level} level")
    common = None
    for r in defined.values():
        pos = set(r.pointwise["position"].tolist())
        common = pos if common is None else common & pos
    common = sorted(common)
    n_all = max(len(r.pointwise) for r in defined.values())
    values = {n: _restrict(r, common) for n, r in defined.items()}
    rows = {}
    for name, (r, kind, note) in evaluated.items():
        if r is None:
            rows[name] = dict(elpd=np.nan, se=np.nan, p_loo=np.nan, method="undefined",
                              n_points=0, n_high_pareto_k=0, note=note, kind=kind)
            continue
        e = values[name]
        notes = list(r.notes)
        p = np.nan
        if kind == "bayes" and "p_loo" in r.pointwise:
            p = float(r.pointwise.set_index("position").loc[common, "p_loo"].sum())
        if len(common) < len(r.pointwise):
            notes.append(f"scored on the {len(common)} of {len(r.pointwise)} points every "
                         "model can predict")
        rows[name] = dict(elpd=float(e.sum()),
                          se=float(np.sqrt(len(e) * np.var(e, ddof=1))) if len(e) > 1 else np.nan,
                          p_loo=p, method=r.method, n_points=len(e),
                          n_high_pareto_k=int(r.n_high_pareto_k), note="; ".join(notes),
                          kind=kind)
    order = sorted(defined, key=lambda n: -rows[n]["elpd"])
    best = order[0]
    for name in order:
        d = values[name] - values[best]
        rows[name]["elpd_diff"] = float(d.sum())
        rows[name]["se_diff"] = float(np.sqrt(len(d) * np.var(d, ddof=1))) if len(d) > 1 else np.nan
    bayes = {n: defined[n] for n in order if rows[n]["kind"] == "bayes"}
    weights = _stacking(bayes, common, classes) if bayes else {}
    for name in rows:
        rows[name].setdefault("elpd_diff", np.nan)
        rows[name].setdefault("se_diff", np.nan)
        rows[name]["weight"] = weights.get(name, np.nan)
        rows[name]["level"] = level
        cls = next((c for c in classes if name in c), [])
        rows[name]["equivalent_to"] = ", ".join(n for n in cls if n != name)
        if cls and name in defined:
            rows[name]["note"] = "; ".join(x for x in (_equivalence_note(
                name, cls, values, rows[name]["kind"] == "bayes", weights), rows[name]["note"])
                if x)
    names = order + [n for n in models if n not in defined]
    out = ComparisonTable(pd.DataFrame([rows[n] for n in names],
                                       index=pd.Index(names, name="model"))[COMPARE_COLUMNS])
    for c in ("elpd", "se", "elpd_diff", "se_diff", "p_loo", "weight"):
        out[c] = out[c].astype(float)
    for c in ("n_points", "n_high_pareto_k"):
        out[c] = out[c].astype(int)
    out.attrs.update(level=level, n_points=len(common), n_points_all=n_all,
                     equivalent=[list(c) for c in classes],
                     methods_note=methods_note(out["method"].tolist()),
                     kinds={n: rows[n]["kind"] for n in names})
    return out


# ---------------------------------------------------------------------------- sub-sampled
#: points of the sub-sampled LOO when the rows are not at hand and no ``subsample`` is given
SUBSAMPLE_POINTS = 400


def _sub_sampled(obj) -> bool:
    """Whether ``obj`` is scored by sub-sampled LOO: a sub-sampled LOOResult, or a
    posterior whose design holds no rows (``Design.has_rows`` false: a partitioned
    source, whose pointwise terms are never all formed)."""
    if isinstance(obj, LOOResult):
        return obj.subsampling_se is not None
    return (_is_posterior(obj) and getattr(obj, "design", None) is not None
            and not obj.design.has_rows)


def _same_design(models):
    """Refuse posteriors on designs with other rows or another outcome (checked on the
    designs' sizes, units, occasions per unit and outcome unit means)."""
    first = None
    for name, obj in models.items():
        d = getattr(obj, "design", None) if _is_posterior(obj) else None
        if d is None:
            continue
        st = d.design_suffstats()
        key = (d.outcome, d.n, list(d.units), np.asarray(st.unit_count),
               np.asarray(st.unit_mean[:, -1]))
        if first is None:
            first = (name, key)
            continue
        n0, k0 = first
        if (key[1] != k0[1] or key[2] != k0[2] or not np.array_equal(key[3], k0[3])
                or not np.array_equal(key[4], k0[4])):
            raise SpecificationError(
                f"model {name!r} is not fitted on the same rows and outcome as {n0!r} "
                f"({key[0]!r} on {key[1]} rows vs {k0[0]!r} on {k0[1]}); LOO values can "
                "only be compared on the same rows")


def _compare_subsampled(models, level, seed, loo_kwargs) -> ComparisonTable:
    """:func:`compare` with sub-sampled LOO (Magnusson et al. 2019).

    Every posterior is scored by :func:`bayespanel.analysis.loo.loo_subsample` with the same seed,
    so the models share their sampled points; ELPD differences are differences of the
    estimates and their SE is ``sqrt(N var(d_j))`` over the sampled points ``j`` both
    models scored, as for full LOO. Reference fits (cross-validated from rows) and
    stacking (which needs every point) are left out, and their rows say why.
    """
    from .loo import loo_subsample

    _same_design(models)
    evaluated = {}
    for name, obj in models.items():
        if isinstance(obj, LOOResult):
            if obj.level != level:
                raise SpecificationError(
                    f"model {name!r}: the LOO result is at the {obj.level} level, not {level!r}")
            evaluated[name] = (obj, "")
        elif _is_posterior(obj):
            obs = loo_kwargs.get("subsample")
            if obs is None:
                points = obj.stats.n if level == "occasion" else obj.stats.n_units
                obs = min(SUBSAMPLE_POINTS, points)
            try:
                evaluated[name] = (loo_subsample(obj, level, obs, seed=seed), "")
            except EstimationError as exc:  # the level is undefined for this model
                evaluated[name] = (None, str(exc))
        elif _is_reference(obj):
            evaluated[name] = (None, "reference fits are cross-validated from the rows, "
                                     "which a sub-sampled comparison does not hold")
        else:
            raise SpecificationError(
                f"model {name!r} is a {type(obj).__name__}; give a Posterior, a "
                "ReferenceResult or a LOOResult")
    scored = {n: r for n, (r, _) in evaluated.items() if r is not None}
    if not scored:
        raise SpecificationError(f"no model has a predictive density at the {level} level")
    order = sorted(scored, key=lambda n: -scored[n].elpd)
    best = order[0]
    sampled = {n: r.pointwise.loc[np.isfinite(r.pointwise["elpd"].to_numpy(dtype=float))]
               .set_index("position")["elpd"] for n, r in scored.items()}
    rows = []
    for name in order + [n for n in models if n not in scored]:
        r, note = evaluated[name]
        rec = dict(elpd=np.nan, se=np.nan, elpd_diff=np.nan, se_diff=np.nan, p_loo=np.nan,
                   weight=np.nan, method="undefined", level=level, n_points=0,
                   n_high_pareto_k=0, equivalent_to="", note=note)
        if r is not None:
            d = (sampled[name] - sampled[best]).dropna()
            rec.update(elpd=r.elpd, se=r.se, p_loo=r.p_loo, method=r.method,
                       n_points=r.n_points, n_high_pareto_k=int(r.n_high_pareto_k),
                       elpd_diff=r.elpd - scored[best].elpd,
                       se_diff=(0.0 if name == best else
                                float(np.sqrt(r.n_points * np.var(d, ddof=1)))
                                if len(d) > 1 else np.nan),
                       note="" if name == best else
                       f"{len(d)} sampled points shared with the best model")
        rows.append(rec)
    names = order + [n for n in models if n not in scored]
    out = ComparisonTable(pd.DataFrame(rows, index=pd.Index(names, name="model"))[COMPARE_COLUMNS])
    for c in ("elpd", "se", "elpd_diff", "se_diff", "p_loo", "weight"):
        out[c] = out[c].astype(float)
    for c in ("n_points", "n_high_pareto_k"):
        out[c] = out[c].astype(int)
    out.attrs.update(level=level, n_points=max(r.n_points for r in scored.values()),
                     n_points_all=max(r.n_points for r in scored.values()), equivalent=[],
                     methods_note=methods_note(out["method"].tolist()),
                     kinds={n: "reference" if _is_reference(models[n]) else "bayes"
                            for n in names})
    return out


def _equivalence_note(name, cls, values, bayes, weights) -> str:
    """The note of a member of an equivalence class: who it is equivalent to, how far
    their ELPDs are apart and, for posteriors, how the class shares its weight."""
    others = [n for n in cls if n != name]
    scored = [n for n in cls if n in values]
    spread = max(values[n].sum() for n in scored) - min(values[n].sum() for n in scored)
    text = (f"equivalent to {', '.join(others)} (same likelihood, same column space: a "
            f"reparametrisation); ELPDs {spread:.2f} apart")
    if bayes and name in weights:
        total = sum(weights.get(n, 0.0) for n in cls)
        text += (f"; the class's stacking weight {total:.3f} is shared equally, since "
                 "equivalent models cannot be told apart by stacking")
    return text


# ---------------------------------------------------------------------------- coefficients
def _coef_frame(name, obj, prob):
    if _is_posterior(obj) or _is_reference(obj):  # the leading columns every table shares
        out = obj.table(prob)[leading_columns(obj.error_name)].set_axis(
            ["estimate", "sd/se", "lower", "upper"], axis=1).rename_axis(None)
    if _is_posterior(obj):
        if "icc" in out.index:
            out = out.rename(index={"icc": "ICC"})
        return out, "posterior mean, SD, equal-tailed interval"
    if _is_reference(obj):
        extra = pd.DataFrame({"estimate": [obj.sigma_unit, obj.sigma_obs, obj.icc]},
                             index=["sigma_unit", "sigma_obs", "ICC"])
        extra = extra[np.isfinite(extra["estimate"])]
        if obj.estimator == "within":
            extra = extra.drop(index=[i for i in ("sigma_unit", "ICC") if i in extra.index])
        return pd.concat([out, extra]), f"estimate, {obj.cov_type} SE, confidence interval"
    raise SpecificationError(f"model {name!r} is a {type(obj).__name__}; give a Posterior or "
                             "a ReferenceResult")


def coef_table(models: dict, prob: float | None = None, shape: str = "wide") -> pd.DataFrame:
    """Every model's estimates and intervals side by side, aligned by term.

    Parameters
    ----------
    models : dict of str -> Posterior or ReferenceResult
    prob : float
        Probability of the intervals (credible for posteriors, confidence for reference
        fits).
    shape : {"wide", "long"}
        ``"wide"``: one row per term, columns ``(model, statistic)`` with statistics
        ``estimate``, ``sd/se``, ``lower``, ``upper``. ``"long"``: one row per model and
        term (JSON-friendly).

    Returns
    -------
    pandas.DataFrame
        Terms in order of first appearance; the variance components (``sigma_unit``,
        ``sigma_obs``, ``ICC``) last. A term a model does not estimate is ``nan``. Labels
        are the models' own: the within effect of ``x`` is ``x`` in fixed effects and
        Mundlak models and ``x (within)`` in the within-between model.
    """
    prob = check_prob(prob)  # None: the interval option
    if shape not in ("wide", "long"):
        from ..core.errors import choices_error
        raise choices_error("shape", shape, ("wide", "long"))
    prob = check_prob(prob)
    if not isinstance(models, dict) or not models:
        raise SpecificationError("models must be a non-empty dict of name -> fitted model")
    frames, what = {}, {}
    for name, obj in models.items():
        frames[name], what[name] = _coef_frame(name, obj, prob)
    tail = ["sigma_unit", "sigma_obs", "ICC"]
    terms = []
    for f in frames.values():
        terms += [t for t in f.index if t not in terms and t not in tail]
    terms += [t for t in tail if any(t in f.index for f in frames.values())]
    if shape == "long":
        recs = []
        for name, f in frames.items():
            for t in f.index:
                r = f.loc[t]
                recs.append({"model": name, "term": t, **{c: float(r[c]) for c in f.columns},
                             "statistics": what[name]})
        out = pd.DataFrame(recs)
    else:
        out = pd.concat({name: f.reindex(terms) for name, f in frames.items()}, axis=1)
        out.index.name = "term"
    out.attrs.update(prob=prob, statistics=what)
    return out
