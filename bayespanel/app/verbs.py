"""The verbs of the command line (``demo``, ``describe``, ``fit``, ``report``,
``design-check``): each reads its parsed arguments, does the work through the package and
returns its exit code (:mod:`bayespanel.app.cliargs`)."""

from __future__ import annotations

import sys
import warnings
from pathlib import Path

import pandas as pd

from .. import kinds
from ..core.errors import SpecificationError, choices_error
from .cliargs import (EXIT_FAILURE, EXIT_OK, EXIT_SAMPLING, _delimiter, _names, _pairs,
                      delimiter_option, parse_prior)
from .console import _print_describe, _print_summary, print_problems


def cmd_describe(args) -> int:
    from ..data.panel import Panel

    if args.out_of_core:
        return _describe_out_of_core(args)
    panel = Panel.from_file(args.file, unit=args.unit, time=args.time,
                            sep=delimiter_option(args.delimiter))
    _print_describe(panel)
    return EXIT_OK


def _describe_out_of_core(args) -> int:
    """One pass over Parquet files on Dask (describe + structure); nothing is loaded."""
    from .data_stage import open_out_of_core
    from .progress import Progress

    say = Progress(quiet=args.quiet)
    panel = open_out_of_core(args.file, args.unit, args.time, say)
    say(f"pass: describe and structure ({panel.npartitions} partitions)")
    desc = panel.describe()  # the structure comes with this pass
    say(f"  {panel.n_rows} rows of {panel.n_units} units")
    _print_describe(panel, desc)
    return EXIT_OK


def _settings_from_args(args):
    from .runner import Settings, load_settings

    priors = dict(parse_prior(p) for p in (args.prior or []))
    over = {
        "data": str(Path(args.file).resolve()) if args.file else None,
        "unit": args.unit, "time": args.time, "formula": args.formula,
        "models": _names(args.models), "reference": _names(args.reference),
        "draws": args.draws, "tune": args.tune, "chains": args.chains, "seed": args.seed,
        "sampler": args.sampler, "cov": args.cov, "re_method": args.method,
        "level": args.level, "rope": args.rope, "interval": args.interval,
        "occasion_effects": True if args.occasion_effects else None, "title": args.title,
        "ppc_draws": args.ppc_draws, "reference_folds": args.reference_folds,
        "refit_high_k": True if args.refit_high_k else None, "max_refits": args.max_refits,
        "out_of_core": True if args.out_of_core else None,
        "delimiter": _delimiter(args.delimiter),
        "loo_observations": args.loo_observations,
        "family": args.family, "trials": args.trials, "exposure": args.exposure,
        "random_slopes": _names(args.random_slopes),
        "centred": True if args.centred_effects else None,
        "errors": args.errors,
        "initial_conditions": False if args.no_initial_conditions else None,
    }
    if args.config:
        s = load_settings(args.config, **over)
        if priors:
            from dataclasses import replace
            s = replace(s, priors={**s.priors, **priors})
        return s.check()
    missing = [f"--{k}" for k in ("unit", "time", "formula") if over[k] is None]
    if not args.file:
        missing.insert(0, "FILE")
    if missing:
        raise SpecificationError(f"fit needs {', '.join(missing)} (or --config ANALYSIS.toml)")
    over["priors"] = priors
    return Settings(**{k: v for k, v in over.items() if v is not None}).check()


def cmd_fit(args) -> int:
    from .runner import run

    settings = _settings_from_args(args)
    out = Path(args.out)
    results = run(settings, out=out, quiet=args.quiet, progress_bars=args.progress_bars)
    _print_summary(results)
    print(f"report: {(out / 'report.html').resolve()}")
    code = _strict_exit(results, args.strict)
    return _failed_exit(results) or code


def _failed_exit(results) -> int:
    """Fits that failed (the others were finished and written): listed, exit code 1."""
    failed = results.get("failed") or []
    if not failed:
        return EXIT_OK
    print(f"\nfailed ({len(failed)}): the other fits are complete and written")
    for f in failed:
        print(f"  {f['title']} ({f['stage']}): {f['error']}")
    print(f"bayespanel: failed: {len(failed)} fit(s) or stage(s) did not finish ("
          f"{', '.join(f['name'] for f in failed)}); the outputs hold everything else; "
          f"exit code {EXIT_FAILURE}", file=sys.stderr)
    return EXIT_FAILURE


def _strict_exit(results, strict) -> int:
    items = print_problems(results)
    if items and strict:
        print(f"bayespanel: --strict: {len(items)} problem(s) (sampling or comparison); exit "
              f"code {EXIT_SAMPLING}", file=sys.stderr)
        return EXIT_SAMPLING
    return EXIT_OK


def cmd_report(args) -> int:
    from ..core.outputs import REPORT_SCOPE, RunFolder
    from ..report import load_results, write_report

    folder = Path(args.folder)
    target = Path(args.out) if args.out else folder
    # the report and tables are published like a run's outputs, replacing only those
    with RunFolder(target, command="bayespanel report", scope=REPORT_SCOPE) as dest:
        results = load_results(folder)  # read under the lock when writing into the folder
        _refuse_other_run(folder, target)
        write_report(results, dest.stage)
        dest.publish()
    print(f"report: {(target / 'report.html').resolve()}")
    return EXIT_OK


def _refuse_other_run(source: Path, target: Path) -> None:
    """``report SRC --out DEST``: DEST must not hold another run's results."""
    theirs = target / "results.json"
    mine = source / "results.json" if source.is_dir() else source
    if target.resolve() == (mine.parent.resolve()) or not theirs.is_file():
        return
    if theirs.read_bytes() != mine.read_bytes():
        raise SpecificationError(
            f"--out {str(target)!r} holds the outputs of another run (its own results.json); "
            "write the report into an empty folder or into that run's own folder")


def cmd_demo(args) -> int:
    from ..data.datasets import clinic_panel
    from ..data.panel import Panel
    from .runner import Settings, run

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        df, truth = clinic_panel(seed=args.seed)
    panel = Panel(df, unit=truth["unit"], time=truth["time"])
    print("Demo scenario: simulated clinics, quarterly patient-satisfaction scores.")
    print(f"Formula: {truth['formula']}")
    _print_describe(panel)
    print(f"True values: within effects {truth['within']}, between effects {truth['between']}, "
          f"time-constant {truth['constant']}, sigma_unit {truth['sigma_unit']}, "
          f"sigma_obs {truth['sigma_obs']}, ICC {truth['icc']:.3f}")
    out = Path(args.out)
    csv = out / "clinic_panel.csv"
    out.mkdir(parents=True, exist_ok=True)
    df.to_csv(csv, index=False)
    settings = Settings(data=str(csv.resolve()), unit=truth["unit"], time=truth["time"],
                        formula=truth["formula"], draws=args.draws, tune=args.tune,
                        chains=args.chains, seed=args.seed, title="Demo: simulated clinic panel",
                        level=args.level)
    results = run(settings, out=out, truth=truth, quiet=args.quiet)
    _print_summary(results)
    print(f"\nreport: {(out / 'report.html').resolve()}")
    print(f"rerun exactly: python -m bayespanel fit --config {out / 'analysis.toml'} --out NEW_FOLDER")
    code = _strict_exit(results, args.strict)
    return _failed_exit(results) or code


def cmd_design_check(args) -> int:
    """The ``design-check`` verb of the command line (see ``bayespanel design-check -h``)."""
    from ..data.panel import Panel
    from ..analysis.recovery import design_check

    if kinds.snake_name(args.model) not in kinds.model_names():  # any of a kind's names
        raise choices_error("--model", args.model, kinds.model_names())
    coef = _pairs(args.coef, "--coef")
    if coef:
        missing = [o for o, v in (("--sigma-obs", args.sigma_obs),) if v is None]
        if missing:
            raise SpecificationError("with --coef, give --sigma-obs (and --sigma-unit)")
        truth = {"coef": coef, "sigma_unit": args.sigma_unit, "sigma_obs": args.sigma_obs}
        if args.rho is not None:
            truth["rho"] = args.rho
    elif args.sigma_unit is not None or args.sigma_obs is not None or args.rho is not None:
        raise SpecificationError("--sigma-unit, --sigma-obs and --rho need --coef for every "
                                 "term")
    else:
        truth = "reference"
    panel = Panel.from_file(args.file, unit=args.unit, time=args.time,
                            sep=delimiter_option(args.delimiter))
    res = design_check(panel, args.model, args.formula, truth=truth,
                       replicates=args.replicates, difference=_pairs(args.difference,
                                                                     "--difference") or None,
                       draws=args.draws, tune=args.tune, chains=args.chains,
                       bayes=not args.reference_only,
                       seed=1 if args.seed is None else args.seed, workers=args.workers,
                       progress=not args.quiet, errors=args.errors)
    print(res.summary())
    with pd.option_context("display.width", 160, "display.max_columns", 20,
                           "display.float_format", "{:.3f}".format):
        print(res.table().drop(columns=[c for c in res.table().columns
                                        if c.startswith("mcse")]))
    if args.out:
        out = Path(args.out)
        out.mkdir(parents=True, exist_ok=True)
        res.table().to_csv(out / "design_check.csv")
        fig = res.figure()
        fig.savefig(out / "design_check.png", dpi=120)
        print(f"table: {(out / 'design_check.csv').resolve()}")
        print(f"figure: {(out / 'design_check.png').resolve()}")
    return 0
