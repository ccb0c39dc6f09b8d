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

import platform
from dataclasses import replace
from datetime import datetime, timezone
from pathlib import Path

from .. import kinds
from ..core.errors import SpecificationError
from ..analysis.occasions import true_occasion_coef
from ..analysis.persistence import persistence_notes
from .comparison_stage import comparison_stage
from .data_stage import SCHEDULER_ENV, data_stage, data_stage_large, open_out_of_core  # noqa: F401
from .model_stage import bayes_one
from .modelkit import check_prior_keys
from .notes import dynamic_notes, fit_notes, left_out
from .progress import HEARTBEAT, Progress, isolated  # noqa: F401
from .reference_stage import (SERIAL_TITLE, interval_check_stage, reference_stage,  # noqa: F401
                              serial_test, tests_stage, time_axis_reason)
from .settings import LEVELS, Settings, load_settings

__all__ = ["Settings", "run", "load_settings", "LEVELS", "software_versions"]

_PACKAGES = ("bayespanel", "numpy", "scipy", "pandas", "xarray", "pymc", "pytensor", "arviz",
             "arviz-base", "arviz-stats", "formulaic", "matplotlib", "h5netcdf", "nutpie")


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
    say = progress or Progress(quiet=quiet)
    if settings.out_of_core and df is not None:
        raise SpecificationError("out_of_core reads settings.data on Dask; pass no DataFrame")
    # the folder is locked for the whole run and every output is written to its staging
    # folder, then published at once (bayespanel.core.outputs): an error, an interrupt or a kill
    # leaves the earlier run or the new one, complete
    with RunFolder(out) if out is not None else nullcontext() as folder:
        panel, design, data, notes = (data_stage_large(settings, say) if settings.out_of_core
                                      else data_stage(settings, df, say))
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
        with isolated(failed, say, "tests", "Mundlak test (GLM)", "specification tests"):
            tests = family_stage.tests_stage(ref_fits, panel, design, settings, say)
    else:
        ref_fits, ref_entries = reference_stage(settings, design, say, failed)
        with isolated(failed, say, "tests", "Hausman and Mundlak tests",
                       "specification tests"):
            tests = tests_stage(design, say)
    # AR(1) errors refuse a time column without numeric spacing as bad input, here
    time_reason = time_axis_reason(settings, design) if design.has_rows else None
    if not settings.glm_reference and design.has_rows:
        with isolated(failed, say, "serial_correlation", "Serial-correlation test",
                       "serial-correlation test"):
            tests = tests + [serial_test(design, time_reason, say, settings.errors)]
    # a model this design cannot hold (fixed effects without a covariate that varies
    # within units) is refused as bad input here, before anything is sampled
    labels = {name: design.labels(kinds.model(name).columns) for name in settings.models}
    check_prior_keys(settings, labels)
    notes = notes + dynamic_notes(settings, design) + fit_notes(settings, design, time_reason)
    posts, entries = {}, []
    for name in settings.models:
        with isolated(failed, say, name, kinds.model(name).title, "Bayesian fit"):
            post, entry = bayes_one(name, settings, panel, design, labels[name], ref_fits,
                                     out_dir, say, progress_bars, lag1=time_reason is None)
            posts[name] = post
            entries.append(entry)
    # AR(1) errors near a random walk: the unit variance and the persistence blur
    notes = notes + persistence_notes(posts, {n: kinds.model(n).title for n in posts})
    interval_check = None
    if posts and not settings.glm_reference:
        with isolated(failed, say, "interval_check", "Narrow-interval check",
                       "narrow-interval check"):
            interval_check = interval_check_stage(settings, design, posts, ref_fits, tests,
                                                  say)
    comparison = None
    if posts or ref_fits:
        with isolated(failed, say, "comparison", "LOO comparison", "comparison"):
            comparison = comparison_stage(settings, design, posts, ref_fits, entries, say,
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
        results["out_of_core"] = left_out(settings, panel, design)
    results["problems"] = problems(results)  # the one list every output prints
    validate(results)
    return results
