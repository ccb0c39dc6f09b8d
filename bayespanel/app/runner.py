"""The whole job, shared by the command line and the Python API.

settings -> panel -> reference fits -> Bayesian fits -> variance partition, contrasts,
LOO -> comparison -> ``results.json``, posteriors, tables and ``report.html``.

>>> import bayespanel as bp
>>> from bayespanel.app.runner import Settings, run
>>> df, truth = bp.datasets.clinic_panel(seed=1)
>>> s = Settings(unit="clinic", time="quarter", formula=truth["formula"],
...              models=("random_intercept",), draws=300, tune=300, chains=2)
>>> results = run(s, df=df, out="clinic-run")                  # doctest: +SKIP

:class:`Settings` is a frozen record of every choice; it is written to the output folder
as ``analysis.toml`` so ``bayespanel fit --config analysis.toml`` repeats the run
exactly (same data file, checked by its SHA-256, same seeds).
"""

from __future__ import annotations

import hashlib
import logging
import os
import platform
import re
import sys
import threading
import time
import warnings
import weakref
from contextlib import contextmanager
from dataclasses import replace
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from .. import kinds
from ..core.errors import (BayespanelError, EstimationError, SamplingWarning, SpecificationError,
                           choices_error)
from ..core.jsonsafe import json_record as _floats  # flat records for results.json
from ..core.mathcore import unit_sd_draws
from ..analysis.occasions import true_occasion_coef
from .modelkit import (check_prior_keys, contrasts_of, model_priors, prior_text, sample_timed,
                       tests_skip_reason, thin_for)
from .settings import LEVELS, LOO_OBSERVATIONS, Settings, load_settings

__all__ = ["Settings", "run", "load_settings", "LEVELS", "software_versions"]

_PACKAGES = ("bayespanel", "numpy", "scipy", "pandas", "xarray", "pymc", "pytensor", "arviz",
             "arviz-base", "arviz-stats", "formulaic", "matplotlib", "h5netcdf", "nutpie")
_LOG = logging.getLogger("bayespanel")


# ---------------------------------------------------------------------- helpers
def software_versions() -> dict:
    from importlib import metadata

    pk = {}
    for name in _PACKAGES:
        try:
            pk[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            continue
    return {"python": platform.python_version(), "platform": platform.platform(),
            "packages": pk}


def _sha256(path) -> str:
    """SHA-256 of a file; of a folder (a Parquet dataset), the SHA-256 of its files'
    relative paths and digests in path order (hidden files left out), so a rerun notices
    a file changed, added, removed or renamed."""
    path = Path(path)
    if path.is_dir():
        h = hashlib.sha256()
        files = sorted(f for f in path.rglob("*") if f.is_file() and not any(
            part.startswith(".") for part in f.relative_to(path).parts))
        for f in files:
            h.update(f.relative_to(path).as_posix().encode() + b"\0")
            h.update(bytes.fromhex(_sha256(f)))
        return h.hexdigest()
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


#: seconds without a progress line after which the last stage is said to be still running
HEARTBEAT = 10.0


class _Progress:
    """Stage lines with elapsed time, to a stream (stderr on the command line).

    A stage that runs longer than :data:`HEARTBEAT` seconds without a line of its own
    (sampling a model, LOO of many points, drawing the figures) gets a line saying it is
    still running, every ``HEARTBEAT`` seconds, from a daemon thread that ends with the
    object (it holds only a weak reference).
    """

    def __init__(self, stream=None, quiet=False, heartbeat=HEARTBEAT):
        self.stream = stream if stream is not None else sys.stderr
        self.quiet = quiet
        self.t0 = time.perf_counter()
        self.heartbeat = heartbeat
        self._stage = None  # the last stage line, when it began, when a line was printed
        self._began = self._printed = self.t0
        self._lock = threading.Lock()
        self._beat = None

    def __call__(self, msg: str):
        if self.quiet:
            return
        with self._lock:
            self._print(msg)
            self._stage, self._began = _stage_name(msg), self._printed
        if self._beat is None and self.heartbeat:
            self._beat = threading.Thread(target=_heartbeat, args=(weakref.ref(self),),
                                          name="bayespanel-progress", daemon=True)
            self._beat.start()

    def _print(self, msg: str):
        self._printed = time.perf_counter()
        print(f"[{self._printed - self.t0:6.1f} s] {msg}", file=self.stream, flush=True)

    def _idle(self):
        """A line saying the last stage is still running, after ``heartbeat`` silent s."""
        with self._lock:
            if self._stage is not None and time.perf_counter() - self._printed >= self.heartbeat:
                self._print(f"  ... still running: {self._stage} "
                            f"({time.perf_counter() - self._began:.0f} s)")


def _stage_name(msg: str) -> str:
    """A stage line shortened for the heartbeat: ``sampling pooled: 4 chains x ...`` ->
    ``sampling pooled``; a closing parenthesis dropped (``LOO of x ... (PSIS, 816 points)``)."""
    text = re.sub(r"\s*\([^()]*\)$", "", msg.strip())
    head, sep, _ = text.partition(": ")
    return head if sep and " " in head else text


def _heartbeat(ref):
    """Loop of the heartbeat thread: ends when its :class:`_Progress` is gone."""
    while True:
        time.sleep(1.0)
        progress = ref()
        if progress is None:
            return
        progress._idle()
        del progress


def _records(df, index_name=None):
    out = []
    for idx, row in df.iterrows():
        rec = {index_name or (df.index.name or "name"): idx}
        rec.update({str(k): v for k, v in row.items()})
        out.append(rec)
    return out


# ---------------------------------------------------------------------- out of core
#: environment variable choosing where the out-of-core passes run (docs/cli.md)
SCHEDULER_ENV = "BAYESPANEL_DASK_SCHEDULER"


def open_out_of_core(path, unit, time_col, say):
    """A :class:`~bayespanel.data.sources.dask.DaskPanel` on a Parquet file or folder.

    CSV is refused (it cannot be split into partitions by row groups and read by
    column); the scheduler is ``$BAYESPANEL_DASK_SCHEDULER`` (``local``, the default: a
    local cluster of two thread workers; ``threads``; ``synchronous``).
    """
    from ..data.sources.dask import SCHEDULERS
    from ..data.io import regular_file
    from ..data.panel import Panel

    p = regular_file(path, folder=True)
    if not (p.is_dir() or p.suffix.lower() in (".parquet", ".pq")):
        raise SpecificationError(
            f"out_of_core: {str(p)!r} is not Parquet; the out-of-core route reads a Parquet "
            "file or a folder of Parquet files (write the CSV to Parquet first, or drop "
            "--out-of-core to read it into memory)")
    client = os.environ.get(SCHEDULER_ENV, "local").strip() or "local"
    if client not in SCHEDULERS:
        raise choices_error(SCHEDULER_ENV, client, SCHEDULERS)
    panel = Panel.from_parquet(str(p), unit=unit, time=time_col, engine="dask", client=client)
    say(f"opened {p.name} out of core: {panel.npartitions} partitions, "
        f"{len(panel.columns)} columns, scheduler {client}")
    return panel


# ---------------------------------------------------------------------- stages
def _source(settings, what):
    """The data file's record (path, SHA-256 of the file or folder); warns if it changed."""
    from ..core.errors import PanelDataError
    from ..data.io import regular_file

    if not settings.data:
        raise SpecificationError(f"no data: {what} (data = ...)")
    regular_file(settings.data, folder=True)  # never open a device or a pipe
    try:
        digest = _sha256(settings.data)
    except OSError as exc:
        raise PanelDataError(f"cannot read {settings.data!r}: {exc.strerror or exc}") from None
    source = {"file": str(settings.data), "sha256": digest}
    if settings.data_sha256 and source["sha256"] and settings.data_sha256 != source["sha256"]:
        warnings.warn(f"the data file {settings.data!r} has changed since the analysis "
                      "file was written (SHA-256 differs); results will differ", UserWarning)
    return source


def _data_stage(settings, df, say):
    from ..data.io import read_table
    from ..data.panel import Panel

    source = {"file": None, "sha256": None}
    if df is None:
        source = _source(settings, "give a CSV or Parquet file")
        df = read_table(settings.data, sep=settings.delimiter)
    say(f"read {len(df)} rows x {df.shape[1]} columns")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")  # occasions read as dates are reported too
        panel = Panel(df, unit=settings.unit, time=settings.time)
        design = panel.design(settings.formula, occasion_effects=settings.occasion_effects,
                              initial_conditions=settings.initial_conditions)
    return panel, design, _data_record(settings, panel, design, source, len(df), say), \
        [str(w.message) for w in caught]


def _data_stage_large(settings, say):
    """The out-of-core data stage: the design pass (statistics, structure and per-unit
    cross-products) and the describe pass over the Parquet partitions."""
    source = _source(settings, "out_of_core needs a Parquet file or folder")
    panel = open_out_of_core(settings.data, settings.unit, settings.time, say)
    say(f"pass: design (statistics, structure, per-unit cross-products; "
        f"{panel.npartitions} partitions)")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        design = panel.design(settings.formula, occasion_effects=settings.occasion_effects,
                              cluster=True)
    say(f"  {design.n_input_rows} rows read, {design.n} used, {design.n_units} units")
    data = _data_record(settings, panel, design, source, design.n_input_rows, say)
    return panel, design, data, [str(w.message) for w in caught]


def _data_record(settings, panel, design, source, n_read, say):
    """The ``data`` part of results.json (the describe pass, on the formula's columns)."""
    from ..data.formula import screen
    from ..data.lags import without_lags

    formula, lagged = without_lags(settings.formula, panel.columns)
    used = [c for c in dict.fromkeys(list(screen(formula, panel.columns).columns) + lagged)
            if c not in (panel.unit, panel.time) and c in panel.numeric_columns()]
    if not design.has_rows:
        say(f"pass: describe ({len(used)} columns)")
    desc = panel.describe(columns=used)
    return {
        "source": {**source, "n_rows_read": int(n_read)},
        "unit": panel.unit, "time": panel.time, "formula": settings.formula,
        "outcome": design.outcome,
        "structure": _floats(panel.structure()),
        "variables": [_floats(r) for r in _records(desc, "variable")],
        "sample": {"n_rows": design.n, "n_units": design.n_units, "n_dropped": design.n_dropped,
                   "dropped_by_column": dict(design.dropped_by_column)},
        "terms": [{"term": t, "varies_within": bool(design.varies_within[t])}
                  for t in design.terms],
        **_dynamic_record(design),
    }


def _dynamic_record(design) -> dict:
    """``lags`` (rows left without a lag, by reason) and ``initial_conditions`` (the
    columns of the initial-conditions model, or that it was switched off) for a formula
    with ``lag(...)``; nothing otherwise, so other runs keep their record."""
    lags = getattr(design, "lags", None)
    if lags is None:
        return {}
    out = {"lags": lags.to_record()}
    if lags.has_lagged_outcome:
        ic = getattr(design, "initial", None)
        out["initial_conditions"] = ic.to_record() if ic is not None else {"applied": False}
    return out


@contextmanager
def _isolated(failed, say, name, title, what, refuse=()):
    """Run one fit or stage; on an error, record it in ``failed`` and go on, so one
    model's failure never loses the others (``results["failed"]``, the console and the
    report list it; the command line exits with 1). Interrupts are not caught, nor the
    errors in ``refuse`` (the reference fits come first and take milliseconds, so data
    they cannot be fitted to is refused as bad input before anything is sampled). The
    traceback goes to the ``bayespanel`` logger (``--debug`` shows it)."""
    try:
        yield
    except refuse:
        raise
    except Exception as exc:  # noqa: BLE001 - any failure of one fit is recorded, not raised
        from ..core.outputs import cannot_write

        if cannot_write(exc):  # a full disk stops the run; the folder keeps its earlier run
            raise
        text = f"{type(exc).__name__}: {exc}" if str(exc) else type(exc).__name__
        failed.append({"name": name, "title": title, "stage": what, "error": text})
        _LOG.debug("%s of %s failed", what, name, exc_info=True)
        say(f"{what if name in (what, 'tests') else f'{what} of {name}'} failed ({text}); "
            "the run goes on without it")


def _reference_stage(settings, design, say, failed):
    fits, out = {}, []
    for name in settings.reference:
        with _isolated(failed, say, name, kinds.reference(name).title, "reference fit",
                       refuse=BayespanelError):
            res, entry = _reference_one(name, settings, design)
            fits[name] = res
            out.append(entry)
    say(f"reference fits ({settings.cov} covariance): {', '.join(fits) or 'none'}")
    return fits, out


def _reference_one(name, settings, design):
    from .. import reference as ref

    components = kinds.reference(name).variance_components
    kw = {"method": settings.re_method} if components else {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = ref.fit_design(design, name, cov=settings.cov, **kw)
    return res, {"name": name, "title": kinds.reference(name).title,
                 "assumptions": (_assumptions(res, settings.cov)
                                 or kinds.reference(name).assumptions),
                 **res.to_record(settings.interval)}


_TESTS = (("hausman", "Hausman (classical), fixed vs random effects"),
          ("mundlak", "Mundlak unit-mean terms (cluster-robust Wald)"))


def _tests_stage(design, say):
    """Classical Hausman and cluster-robust Mundlak tests, each when it applies; a test
    that does not apply is recorded with the reason (``skipped``)."""
    from .. import reference as ref

    why = tests_skip_reason(design)
    if why is not None:
        say(f"specification tests skipped: {why}")
        return [{"name": key, "title": title, "statistic": None, "df": None, "p_value": None,
                 "null": None, "conclusion": f"not run: {why}", "message": None,
                 "skipped": why} for key, title in _TESTS]
    tests = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fe = ref.fit_design(design, "within", cov="classical")
        re_ = ref.fit_design(design, "random", cov="classical", method="swamy-arora")
        found = (ref.hausman(fe, re_), ref.mundlak_test(ref.fit_design(
            design, "mundlak", method="swamy-arora", cov="cluster")))
        for (key, title), t in zip(_TESTS, found):
            # the cluster-robust Wald test is read on F(q, G - 1), as the coefficients'
            # tests use t(G - 1); the chi-squared form stays in statistic/df/p_value
            use_f = bool(np.isfinite(t.f_p_value))
            p_used = t.f_p_value if use_f else t.p_value
            reject = np.isfinite(p_used) and p_used < 0.05
            tests.append(_floats({
                "name": key, "title": title, "statistic": t.statistic, "df": t.df,
                "p_value": t.p_value, "null": t.null,
                "distribution": (f"F({t.df}, {t.f_df_denom:.0f})" if use_f
                                 else f"chi-squared({t.df})"),
                "reported_statistic": t.f_statistic if use_f else t.statistic,
                "reported_p_value": p_used,
                "conclusion": ("within and between effects differ (p < 0.05): the random-"
                               "intercept assumption is doubtful" if reject else
                               "no evidence at the 5% level that within and between "
                               "effects differ") + _rank_note(t),
                "message": t.message}))
    say("specification tests: Hausman, Mundlak")
    return tests


def _time_reason(settings, design) -> str | None:
    """Why the time column cannot order a unit's occasions on a numeric scale (the
    serial-correlation test and the lag-one check then do not run), or None. With AR(1)
    errors the same fault is bad input, refused here before anything is sampled."""
    from ..core.ar1 import occasion_times
    from ..core.errors import PanelDataError

    try:
        occasion_times(design.time, design.spec.time)
    except PanelDataError as exc:
        if settings.errors == "ar1":
            raise
        return str(exc)
    return None


#: title of the serial-correlation test among the run's tests
SERIAL_TITLE = "Serial correlation of the errors (first differences, cluster-robust)"


def _serial_test(design, time_reason, say, errors="iid") -> dict:
    """The serial-correlation test of Wooldridge (2002, 10.5.4) as a ``tests`` record,
    its reading in plain words; a test that cannot run is recorded with the reason."""
    from ..reference.serial import serial_correlation_arrays

    def skipped(why):
        say(f"serial-correlation test skipped: {why}")
        return {"name": "serial_correlation", "title": SERIAL_TITLE, "statistic": None,
                "df": None, "p_value": None, "null": None, "conclusion": f"not run: {why}",
                "message": None, "skipped": why}

    if time_reason is not None:
        return skipped(time_reason)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t = serial_correlation_arrays(design.X, design.y, design.unit_codes, design.time,
                                          labels=design.terms, column=design.spec.time)
    except EstimationError as exc:
        return skipped(str(exc).removeprefix("serial-correlation test: "))
    reject = np.isfinite(t.f_p_value) and t.f_p_value < 0.05
    remedy = ("the Bayesian models here allow AR(1) errors for it" if errors == "ar1" else
              "refit with AR(1) errors (--errors ar1)")
    if not reject:
        reading = ("no evidence at the 5% level that a unit's errors are correlated over "
                   f"time (coefficient {t.coef:.3g}; -0.5 means uncorrelated)")
    elif t.coef > -0.5:
        reading = ("a unit's errors are positively correlated over time (p < 0.05; "
                   f"coefficient {t.coef:.3g}, where -0.5 means uncorrelated): intervals of "
                   f"models that assume independent occasions are too narrow; {remedy}")
    else:
        reading = ("a unit's errors are negatively correlated over time (p < 0.05; "
                   f"coefficient {t.coef:.3g}, where -0.5 means uncorrelated): models that "
                   f"assume independent occasions misstate their intervals; {remedy}")
    say("serial-correlation test: first-differenced residuals on their lag")
    return _floats({
        "name": "serial_correlation", "title": SERIAL_TITLE, "statistic": t.statistic,
        "df": t.df, "p_value": t.p_value, "null": t.null,
        "distribution": f"F(1, {t.f_df_denom:.0f})", "reported_statistic": t.f_statistic,
        "reported_p_value": t.f_p_value, "conclusion": reading, "message": t.message})


def _interval_check(settings, design, posts, ref_fits, tests, say):
    """Posterior SDs against the matching reference fits' cluster-robust SEs
    (:func:`bayespanel.analysis.narrowcheck.narrow_interval_check`); a reference fit the run did
    not make, or made with classical errors, is fitted here with CR1 by unit."""
    from .. import reference as ref
    from ..analysis.narrowcheck import narrow_interval_check, serial_reading

    cov = settings.cov if settings.cov in ("cluster", "cr2") else "cluster"
    fits = []
    for name, post in posts.items():
        rname = kinds.model(name).reference
        res = ref_fits.get(rname) if settings.cov == cov else None
        if res is None:
            kw = {"method": settings.re_method} if kinds.reference(rname).variance_components \
                else {}
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    res = ref.fit_design(design, rname, cov=cov, **kw)
            except BayespanelError:
                continue
        fits.append({"model": name, "title": kinds.model(name).title, "reference": rname,
                     "reference_title": kinds.reference(rname).title, "sd": post.error,
                     "se": res.error})
    out = narrow_interval_check(fits, errors=settings.errors, n_units=design.n_units, cov=cov,
                                serial=serial_reading(tests))
    flagged = sum(r["narrow"] for r in out["rows"])
    say(f"narrow-interval check: {flagged} of {len(out['rows'])} posterior SDs below "
        f"{out['threshold']:g} x the cluster-robust SE")
    return out


def _rank_note(t) -> str:
    """Said beside a test's reading when its df is below the number of terms compared (the
    Hausman covariance difference is often not positive definite; Hausman 1978)."""
    q = len(t.terms or [])
    if not q or t.df >= q:
        return ""
    return (f" (on {t.df} of {q} df: the difference of the covariance matrices is not "
            "positive definite, so its generalised inverse was used)")


def _assumptions(res, cov) -> str:
    """The reference fit's assumptions, without the sentence on a covariance not used."""
    keep = [a for a in res.assumptions
            if not (cov != "classical" and a.startswith("Classical errors"))]
    return " ".join(keep)


def _ppc(post, design, n_draws, seed):
    """Panel statistics of replicated outcomes (same units, new occasion noise)."""
    thin = thin_for(post.n_chains * post.n_draws, n_draws)
    yrep = np.asarray(post.posterior_predictive(level="occasion", thin=thin, seed=seed).values)
    yrep = yrep.reshape(-1, yrep.shape[-1])
    codes, T, starts = design.unit_codes, design.T, design.starts

    def stats(y):
        y = np.atleast_2d(y)
        means = np.add.reduceat(y, starts, axis=1) / T
        dev = y - means[:, codes]
        return {"mean": y.mean(axis=1), "sd_between": means.std(axis=1, ddof=1),
                "sd_within": np.sqrt((dev ** 2).sum(axis=1) / (y.shape[1] - 1)),
                "max_unit_mean": means.max(axis=1), "min_unit_mean": means.min(axis=1)}

    obs, rep = stats(design.y), stats(yrep)
    labels = {"mean": "mean", "sd_between": "SD between units", "sd_within": "SD within units",
              "min_unit_mean": "lowest unit mean", "max_unit_mean": "highest unit mean"}
    return [{"statistic": k, "label": labels[k], "observed": float(obs[k][0]),
             "replicated_mean": float(rep[k].mean()), "p_value": float((rep[k] >= obs[k][0]).mean()),
             "replicated": [float(v) for v in rep[k]]} for k in labels]


def _partition(post, design, kind, coef_d, sigma_d, tau_d, ref):
    """The variance partition of one posterior (bayespanel.bayes.partition): the
    posterior's own, from its rows or, without rows at hand, its design's statistics."""
    ref = ref if ref is not None and getattr(ref, "design", None) is not None else None
    if hasattr(post, "variance_partition"):
        return post.variance_partition(reference=ref)
    from ..analysis import partition as part

    M, _, codes = post.rows
    return part.variance_partition(M, codes, kind, post.labels, coef_d, sigma_d, tau_d,
                                   reference=ref)


def _lag1_ppc(post, design, settings):
    """The posterior predictive check of the lag-one autocorrelation of within residuals
    (:func:`bayespanel.analysis.serialcheck.lag1_check`), on ``ppc_draws`` evenly thinned draws;
    None when no unit has two occasions one time unit apart."""
    from ..analysis.serialcheck import lag1_check

    thin = thin_for(post.n_chains * post.n_draws, settings.ppc_draws)
    M, y, codes = post.rows
    rho = post._flat("rho", thin) if post.spec.errors == "ar1" else None
    return lag1_check(M, y, codes, design.time, post._flat("coef", thin),
                      post._flat("sigma_obs", thin), rho, seed=settings.seed,
                      column=design.spec.time)


def _bayes_one(name, settings, panel, design, labels, ref_fits, out_dir, say, progress_bars,
               lag1=False):
    if settings.latent:  # a family other than the Gaussian, or random slopes
        from .family_stage import bayes_one
        return bayes_one(name, settings, panel, design, labels, ref_fits, out_dir, say,
                         progress_bars)
    cls = kinds.model(name).builder_class()
    prob = settings.interval
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # dropped rows were reported by the data stage
        priors = model_priors(settings, cls, labels)
        m = design.build(cls, priors=priors, errors=settings.errors)  # from the statistics
    say(f"sampling {name}: {settings.chains} chains x {settings.draws} draws "
        f"(+{settings.tune} tuning)")
    post, seconds = sample_timed(m, settings, progress_bars)
    diag = post.diagnostics(warn=False)
    say(f"  {name}: {seconds:.1f} s, max R-hat {diag['max_rhat']:.3f}, "
        f"{diag['divergences']} divergences")
    record = post.to_record(prob)
    kind = kinds.model(name).columns
    coef_d = post._flat("coef")
    sigma_d = post._flat("sigma_obs")
    tau_d = unit_sd_draws(m.unit_effects, post._flat("sigma_unit")
                          if m.unit_effects == "random" else None, sigma_d.shape)
    ref_for = ref_fits.get(kinds.model(name).reference)
    say(f"  {name}: summaries, variance partition, contrasts, predictive checks")
    vp = None
    if m.unit_effects == "random":
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            pr = _partition(post, design, kind, coef_d, sigma_d, tau_d, ref_for)
        vp = pr.to_record(prob)
    contrasts = []
    if kinds.model(name).contrasts:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            cr = contrasts_of(post, design, kind, coef_d, settings, ref_for)
        contrasts = cr.to_record(prob)
    ppc = []
    if design.has_rows:
        ppc = _ppc(post, design, settings.ppc_draws, settings.seed)
        if lag1:
            ppc += [r for r in [_lag1_ppc(post, design, settings)] if r is not None]
    rel = None
    if out_dir is not None:
        rel = f"posteriors/{name}.nc"
        (Path(out_dir) / "posteriors").mkdir(parents=True, exist_ok=True)
        post.save(Path(out_dir) / rel)  # the staging folder: published when the run completes
    entry = {
        "name": name, "builder": kinds.model(name).class_name, "title": kinds.model(name).title,
        "assumptions": kinds.model(name).assumptions, "reference_counterpart": kinds.model(name).reference,
        "posterior_file": rel,
        "sampling": _floats({"draws": settings.draws, "tune": settings.tune,
                             "chains": settings.chains, "seed": settings.seed,
                             "sampler": str(post.sampling.get("sampler", settings.sampler)),
                             "seconds": seconds}),
        "priors": {k: prior_text(v) for k, v in m.priors.items()},
        "coefficients": record["coefficients"],
        "scale": record["scale"],
        "variance_partition": vp,
        "contrasts": contrasts,
        "diagnostics": record["diagnostics"],
        "loo": None,
        "ppc": ppc,
    }
    return post, entry


def _reference_folds(settings):
    """Exact LOO for the reference fits at every size (downdated closed-form refits),
    grouped K-fold when the settings ask for it."""
    return settings.reference_folds or None


def _loo_observations(settings, design):
    """Points of the out-of-core sub-sampled LOO: the setting (default LOO_OBSERVATIONS),
    at most every point of the level."""
    points = design.n if settings.level == "occasion" else design.n_units
    return min(settings.loo_observations or LOO_OBSERVATIONS, points)


def _loo_refitted(post, level, settings):
    """PSIS-LOO with the high-k points replaced by exact refits (``refit_high_k``):
    ``(LOOResult, note or None, refit warnings)``. With more high-k points than
    ``max_refits``, or a model that cannot be refitted, the PSIS values stay and the note
    says why."""
    from ..analysis.loo.psis import MANY_REFITS

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", SamplingWarning)
        try:
            lr = post.loo(level, refit_high_k=True, max_refits=settings.max_refits)
            n = int(lr.pointwise["refit"].sum()) if "refit" in lr.pointwise else 0
            note = (f"{n} point(s) with high Pareto k replaced by exact refits" if n else None)
        except SpecificationError as exc:  # latent-effect models have no exact refits
            lr, note = post.loo(level), f"not refitted: {exc}"
        except EstimationError:  # more high-k points than max_refits
            lr = post.loo(level)
            n_high = int(lr.n_high_pareto_k)
            note = (f"not refitted: {n_high} points exceed max_refits = {settings.max_refits}"
                    f" (--max-refits N; from {MANY_REFITS} refits on they use nutpie, "
                    "compiled once) or compare by grouped K-fold")
    found = [str(w.message) for w in caught if issubclass(w.category, SamplingWarning)]
    return lr, note, [w for w in found if w.startswith("refit without")]


def _loo_entry(post, level, design=None, settings=None):
    """PSIS-LOO of one posterior (out of core: sub-sampled, Magnusson et al. 2019; with
    ``settings.refit_high_k``, high-k points refitted exactly), or None when the level is
    undefined for the model."""
    from ..analysis.loo import loo_subsample

    large = design is not None and not design.has_rows
    refit_note, refit_warnings = None, []
    try:
        if large:
            lr = loo_subsample(post, level, _loo_observations(settings, design),
                               seed=settings.seed)
        elif settings is not None and settings.refit_high_k:
            lr, refit_note, refit_warnings = _loo_refitted(post, level, settings)
        else:
            with warnings.catch_warnings():
                # high Pareto k enters the run's problem list (report.problems), once
                warnings.simplefilter("ignore", SamplingWarning)
                lr = post.loo(level)
    except BayespanelError as exc:
        return None, {"level": level, "elpd": None, "se": None, "p_loo": None,
                      "n_high_pareto_k": None, "max_k": None, "warning": str(exc)}
    entry = lr.to_record()
    if large:
        entry["observations"] = _loo_observations(settings, design)
    if refit_note:
        entry["refit_note"] = refit_note
    if refit_warnings:
        entry["refit_warnings"] = refit_warnings
    return lr, _floats(entry)


def _comparison_large(settings, design, posts, entries, say):
    """Without rows at hand: the Bayesian models' sub-sampled LOO side by side
    (:func:`bayespanel.analysis.comparison.compare` on the sub-sampled results, which shares one
    seeded sample of points between the models)."""
    from ..analysis.comparison import compare

    by_name = {e["name"]: e for e in entries}
    results = {}
    for name, post in posts.items():
        say(f"LOO of {name}: sub-sampled at the {settings.level} level "
            f"({_loo_observations(settings, design)} points"
            + ("; one more pass over the rows)" if settings.level == "occasion" else ")"))
        lr, by_name[name]["loo"] = _loo_entry(post, settings.level, design, settings)
        results[name] = lr
    scored = {n: r for n, r in results.items() if r is not None}
    table = compare(scored, level=settings.level) if scored else None
    rows = []
    for name in (list(table.index) if scored else []) + [n for n in results if n not in scored]:
        rec = {"model": name, "title": kinds.model(name).title, "kind": "bayesian",
               "elpd": None, "se": None, "elpd_diff": None, "se_diff": None,
               "method": "undefined", "level": settings.level,
               "note": by_name[name]["loo"]["warning"]}
        if name in scored:
            r = table.loc[name]
            rec.update(elpd=r["elpd"], se=r["se"], p_loo=r["p_loo"], method=r["method"],
                       elpd_diff=r["elpd_diff"], se_diff=r["se_diff"], note=r["note"] or None)
        rows.append(_floats(rec))
    say(f"LOO comparison done: {len(rows)} Bayesian fits (reference fits are not scored "
        "out of core)")
    return {"level": settings.level, "reference_folds": None, "rows": rows}


def _comparison_stage(settings, design, posts, ref_fits, entries, say, failed=None):
    """LOO at the chosen level for every Bayesian model and reference fit (a model whose
    LOO fails is left out of the table and recorded in ``failed``)."""
    from ..analysis.comparison import compare, equivalence_classes

    if not design.has_rows:  # sub-sampled LOO, Magnusson et al. (2019)
        return _comparison_large(settings, design, posts, entries, say)
    fits, titles = {}, {}
    by_name = {e["name"]: e for e in entries}
    models = {}
    for name, post in posts.items():
        if settings.refit_high_k:
            say(f"LOO of {name}: PSIS at the {settings.level} level, exact refits of points "
                f"with high Pareto k (at most {settings.max_refits})")
        else:
            say(f"LOO of {name} at the {settings.level} level (PSIS, "
                f"{design.n if settings.level == 'occasion' else design.n_units} points)")
        with _isolated(failed if failed is not None else [], say, name, kinds.model(name).title,
                       "LOO"):
            lr, by_name[name]["loo"] = _loo_entry(post, settings.level, settings=settings)
            fits[name] = lr if lr is not None else post
            models[name] = post
            titles[name] = kinds.model(name).title
    for name, res in ref_fits.items():
        if name == "between" or settings.glm_reference:
            continue  # between: one row per unit; GLMs: no cross-validation (docs/families.md)
        fits[f"ref:{name}"] = models[f"ref:{name}"] = res
        titles[f"ref:{name}"] = kinds.reference(name).title + " (ref.)"
    if not fits:  # e.g. only the between fit, or only GLM references: nothing to score
        say("LOO comparison skipped: no fit is scored by LOO (the between fit has one row "
            "per unit; reference GLMs are not cross-validated)")
        return None
    folds = _reference_folds(settings)
    say(f"LOO at the {settings.level} level; reference fits by "
        + ("exact leave-one-out refits" if folds is None else f"grouped {folds}-fold CV"))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        classes = equivalence_classes(models)
        table = compare(fits, level=settings.level, reference_folds=folds, seed=settings.seed,
                        equivalent=classes, progress=say)
    rows = []
    for key, r in table.iterrows():
        rec = _floats({str(k): v for k, v in r.items()})
        rec["model"] = str(key)
        rec["title"] = titles.get(str(key), str(key))
        if rec.get("equivalent_to") and rec.get("note"):  # titles, not internal names
            names = rec["equivalent_to"].split(", ")
            rec["note"] = rec["note"].replace(
                f"equivalent to {rec['equivalent_to']} (",
                f"equivalent to {', '.join(titles.get(n, n) for n in names)} (", 1)
        rec["kind"] = "reference" if str(key).startswith("ref:") else "bayesian"
        rows.append(rec)
    say(f"LOO comparison done: {len(rows)} fits")
    out = {"level": settings.level, "reference_folds": folds, "rows": rows,
           "methods_note": table.attrs.get("methods_note") or None,
           "equivalent": table.attrs.get("equivalent", [])}
    if settings.glm_reference and ref_fits:
        out["note"] = ("the reference GLMs are not scored: they have no cross-validation "
                       "here, and a pooled GLM's plug-in density would not predict a known "
                       "unit's occasions as the models do; compare them by their average "
                       "marginal effects")
    return out


def _truth_by_model(truth, entries, ref_entries):
    """The true value of each term under each model's parametrisation (demo only): the
    column map's :meth:`~bayespanel.kinds.ColumnMap.true_coefficients`, leaving out what a
    model with one coefficient for unequal within and between effects cannot carry."""
    out = {}
    for key, kind, e in ([(e["name"], kinds.model(e["name"]).columns, e) for e in entries]
                         + [(f"ref:{e['name']}", e["name"], e) for e in ref_entries]):
        out[key] = kinds.column_map(kind).true_coefficients(
            truth["within"], truth["between"], truth.get("constant", {}),
            truth["intercept"], strict=False)
        for row in e["coefficients"]:  # occasion terms (0 when the simulation has none)
            occ = true_occasion_coef(row["term"], truth)
            if occ is not None:
                out[key][row["term"]] = occ
    return {"icc": truth["icc"], "sigma_unit": truth["sigma_unit"],
            "sigma_obs": truth["sigma_obs"], "by_model": out}


# ---------------------------------------------------------------------- the job
def run(settings: Settings, df=None, out=None, truth=None, progress=None, quiet=False,
        progress_bars=False) -> dict:
    """Run the whole job and, when ``out`` is given, write every output there.

    Parameters
    ----------
    settings : Settings
    df : pandas.DataFrame, optional
        The table (otherwise read from ``settings.data``).
    out : path, optional
        Output folder: ``results.json``, ``analysis.toml``, ``posteriors/*.nc``,
        ``tables/*.{md,tex,csv}`` and ``report.html``, published together when the run
        completes (:mod:`bayespanel.core.outputs`); the folder is locked against other runs
        meanwhile (:class:`~bayespanel.core.errors.FolderInUseError`).
    truth : dict, optional
        Known true values (simulated data), shown beside the estimates.
    progress : callable, optional
        Receives one line per stage; default prints to stderr with elapsed time.
    progress_bars : bool
        Show the sampler's own progress bars.

    Returns
    -------
    dict
        The contents of ``results.json`` (see docs/results-schema.md).
    """
    from contextlib import nullcontext

    from ..core.budget import check_run_memory
    from ..core.outputs import RunFolder, write_atomic
    from ..report import write_report
    from ..report.results_json import write_json

    settings = settings.check()
    say = progress or _Progress(quiet=quiet)
    if settings.out_of_core and df is not None:
        raise SpecificationError("out_of_core reads settings.data on Dask; pass no DataFrame")
    # the folder is locked for the whole run and every output is written to its staging
    # folder, then published at once (bayespanel.core.outputs): an error, an interrupt or a kill
    # leaves the earlier run or the new one, complete
    with RunFolder(out) if out is not None else nullcontext() as folder:
        panel, design, data, notes = (_data_stage_large(settings, say) if settings.out_of_core
                                      else _data_stage(settings, df, say))
        if settings.data and data["source"]["sha256"]:
            settings = replace(settings, data=str(Path(settings.data).resolve()),
                               data_sha256=data["source"]["sha256"])
        check_run_memory(settings, design)  # draws x chains that fit, before any fit
        stage = folder.stage if folder is not None else None
        results = _fit_stages(settings, panel, design, data, notes, stage, truth, say,
                              progress_bars)
        if folder is not None:
            say("writing results.json, tables, figures and report.html")
            write_atomic(stage / "analysis.toml", settings.to_toml())
            write_report(results, stage)
            write_json(stage / "results.json", results)
            folder.publish()
            say(f"wrote {Path(out) / 'report.html'}")
    return results


def _left_out(settings, panel, design) -> dict:
    """What the out-of-core route leaves out and why (results.json and the report)."""
    why_rows = "needs the rows, which the out-of-core route does not load"
    items = [
        {"item": "posterior predictive checks",
         "reason": f"drawing replicated panels {why_rows}"},
        {"item": "figures of predictive checks", "reason": "no predictive draws"},
        {"item": "reference fits in the LOO comparison",
         "reason": "their exact or K-fold cross-validation refits the estimator without "
                   f"each point, and each refit {why_rows}; the comparison holds the "
                   "Bayesian models"},
        {"item": "full PSIS-LOO", "reason": "replaced by the sub-sampling estimator "
                 "(Magnusson et al. 2019): the approximation at the posterior means for every "
                 "point, full PSIS on a seeded simple random sample of "
                 f"{_loo_observations(settings, design)} points"},
        {"item": "exact refits of high Pareto-k points", "reason": f"each refit {why_rows}"},
        {"item": "serial-correlation test and lag-one predictive check",
         "reason": f"differencing and pairing consecutive occasions {why_rows}"},
        {"item": "design check (simulated replicates)", "reason": f"it {why_rows}"},
        {"item": "saved estimation rows in posteriors/*.nc",
         "reason": "the files hold the sufficient statistics only"},
    ]
    return {"scheduler": panel.client if isinstance(panel.client, str) else "distributed",
            "partitions": panel.npartitions, "rows_read": design.n_input_rows,
            "loo_observations": _loo_observations(settings, design), "left_out": items}


def _dynamic_notes(settings, design) -> list[str]:
    """What a lagged outcome means for this run's models (bayespanel.data.initial.notes):
    the initial-conditions assumption and why, the fixed-effects and pooled biases, and the
    moment estimator of the reference's variance components."""
    from ..data.initial import WITH_AR1, notes as initial_notes

    said = initial_notes(design, settings.models)
    if not said:
        return []
    if getattr(settings, "errors", "iid") == "ar1":
        said.append(WITH_AR1)
    if getattr(design, "initial", None) is None:
        said = said[1:]  # the design's own warning said it (the data stage's notes)
    said.append(
        "The Hausman test compares the random-effects fit with fixed effects, which a "
        "lagged outcome biases in short panels (Nickell 1981): a difference between them "
        "may come from that bias rather than from the random-effects assumption.")
    components = [n for n in settings.reference if kinds.reference(n).variance_components]
    if components and settings.re_method == "swamy-arora":
        said.append(
            "The random-effects reference fits estimate the variance components by Swamy-"
            "Arora moments, which take the within residuals; a lagged outcome biases those "
            "(Nickell 1981), so the unit variance may come out at zero and the fit fall back "
            "to pooled least squares: with a lagged outcome prefer method = 'ml' or 'reml' "
            "(--method).")
    return said


def _fit_stages(settings, panel, design, data, notes, out_dir, truth, say, progress_bars):
    """Reference fits, tests, Bayesian fits and the comparison -> the results dict."""
    from ..report.problems import problems
    from ..report.results_json import SCHEMA_NAME, SCHEMA_VERSION, validate

    from . import family_stage

    failed = []
    notes = notes + family_stage.data_checks(settings, panel, design)
    tests = []
    if settings.glm_reference:  # logit and log links: pooled GLMs, their Mundlak test
        ref_fits, ref_entries, more = family_stage.reference_stage(settings, panel, design, say)
        notes = notes + more
        with _isolated(failed, say, "tests", "Mundlak test (GLM)", "specification tests"):
            tests = family_stage.tests_stage(ref_fits, panel, design, settings, say)
    else:
        ref_fits, ref_entries = _reference_stage(settings, design, say, failed)
        with _isolated(failed, say, "tests", "Hausman and Mundlak tests",
                       "specification tests"):
            tests = _tests_stage(design, say)
    # AR(1) errors refuse a time column without numeric spacing as bad input, here
    time_reason = _time_reason(settings, design) if design.has_rows else None
    if not settings.glm_reference and design.has_rows:
        with _isolated(failed, say, "serial_correlation", "Serial-correlation test",
                       "serial-correlation test"):
            tests = tests + [_serial_test(design, time_reason, say, settings.errors)]
    # a model this design cannot hold (fixed effects without a covariate that varies
    # within units) is refused as bad input here, before anything is sampled
    labels = {name: design.labels(kinds.model(name).columns) for name in settings.models}
    check_prior_keys(settings, labels)
    notes = notes + _dynamic_notes(settings, design)
    for name in settings.models:
        if kinds.model(name).columns == "within" and design.time_constant:
            left = ", ".join(map(repr, design.time_constant))
            notes = notes + [f"{kinds.model(name).title} leaves out {left}: constant within "
                             "units, absorbed by the unit intercepts"]
    if time_reason is not None:
        notes = notes + [f"the serial-correlation test and the lag-one predictive check need "
                         f"a numeric time column: {time_reason}"]
    posts, entries = {}, []
    for name in settings.models:
        with _isolated(failed, say, name, kinds.model(name).title, "Bayesian fit"):
            post, entry = _bayes_one(name, settings, panel, design, labels[name], ref_fits,
                                     out_dir, say, progress_bars, lag1=time_reason is None)
            posts[name] = post
            entries.append(entry)
    interval_check = None
    if posts and not settings.glm_reference:
        with _isolated(failed, say, "interval_check", "Narrow-interval check",
                       "narrow-interval check"):
            interval_check = _interval_check(settings, design, posts, ref_fits, tests, say)
    comparison = None
    if posts or ref_fits:
        with _isolated(failed, say, "comparison", "LOO comparison", "comparison"):
            comparison = _comparison_stage(settings, design, posts, ref_fits, entries, say,
                                           failed)
    results = {
        "schema": SCHEMA_NAME, "schema_version": SCHEMA_VERSION,
        "created": datetime.now(timezone.utc).replace(microsecond=0).isoformat(),
        "title": settings.title or f"Panel analysis of {data['outcome']}",
        "settings": {**settings.to_dict(), "toml": settings.to_toml()},
        "software": software_versions(),
        "data": data, "models": entries, "reference": ref_entries, "tests": tests,
        "comparison": comparison, "interval_check": interval_check, "warnings": notes,
        "truth": _truth_by_model(truth, entries, ref_entries) if truth else None,
    }
    if failed:  # runs where everything was fitted keep the 1.0 layout
        results["failed"] = failed
    if not design.has_rows:
        results["out_of_core"] = _left_out(settings, panel, design)
    results["problems"] = problems(results)  # the one list every output prints
    validate(results)
    return results
