"""The design check's entry point: :func:`design_check` runs the replicates."""

from __future__ import annotations

import warnings
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pandas as pd

from ...core import ar1
from ...core.errors import SamplingWarning, SpecificationError, choices_error
from .fits import REFERENCE_METHODS
from .replicate import _one
from .result import DesignCheckResult
from .sampler import _Sampler
from .truth import _contrasts, _make_model, _truth_vector


def design_check(source, model="RandomIntercept", formula=None, *, truth="reference",
                 replicates=200, difference=None, draws=500, tune=500, chains=2,
                 bayes=True, reference=True, reference_method="reml", probs=(0.9, 0.95), seed=1, workers=2,
                 progress=True, priors=None, occasion_effects=False, target_accept=0.8,
                 errors=None):
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
    priors : dict, optional
        Priors of a model built here (a built model keeps its own).
    occasion_effects : bool
        Occasion dummies in a model built here.
    target_accept : float
        Of the Bayesian refits (nutpie).
    errors : {"iid", "ar1"}, optional
        Error structure of a model built here (default ``"iid"``; a built model keeps its
        own). With ``"ar1"`` every replicate's errors follow the model's AR(1) within units,
        ``Cov(e_it, e_is) = sigma_obs^2 rho^|time_t - time_s|`` on the rows' own occasions;
        the truth then needs ``rho`` (``"reference"``: the maximum of the AR(1) marginal
        likelihood of the real outcome), the Bayesian rows report ``rho``'s coverage, the
        known-variance GLS uses the true ``rho``, and the reference fit's covariance is
        cluster-robust (CR2), the frequentist answer to serially correlated errors.

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
    from ...bayes.sampling import check_int

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
    if errors is not None and errors not in ar1.ERRORS:
        raise choices_error("errors", errors, ar1.ERRORS)
    m = _make_model(source, model, formula, priors, occasion_effects, errors)
    M, _, codes = m.rows
    M = np.asarray(M, dtype=float)
    codes = np.asarray(codes, dtype=np.int64)
    labels = list(m.labels)
    b, su, so, rho = _truth_vector(truth, m, difference)
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
           "sampler": sampler, "seeds": seeds, "spawned": spawned, "rho": rho}
    if rho is not None:   # AR(1) errors on the occasions of the model's own rows
        ctx["time"] = np.asarray(m.ar1_time, dtype=float)
        ctx["timeline"] = ar1.Timeline.build(codes, ctx["time"])
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
                "difference": dict(difference or {}), "errors": getattr(m, "errors", "iid")}
    res = DesignCheckResult(records=records, replicate_info=info,
                            truth={"coef": dict(zip(labels, map(float, b))),
                                   "sigma_unit": su, "sigma_obs": so,
                                   **({} if rho is None else {"rho": rho})},
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
