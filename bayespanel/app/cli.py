"""Command line: ``python -m bayespanel VERB ...`` (also installed as ``bayespanel``).

Verbs: ``demo``, ``describe FILE``, ``fit [FILE]`` and ``report DIR``. Exit codes: 0
success, 2 bad input (the message names the problem), 1 failure (or interrupted), 3
sampling problems under ``--strict`` (outputs are written). See docs/cli.md and
docs/guarantees.md.
"""

from __future__ import annotations

import argparse
import contextlib
import logging
import signal
import sys
import threading
import warnings
from dataclasses import fields
from pathlib import Path

import pandas as pd

from .. import kinds
from ..core.errors import BayespanelError, OutputError, SpecificationError, choices_error
from ..core.options import get_option
from ..report.text import printable
from ..core.terms import parse

EXIT_OK, EXIT_FAILURE, EXIT_BAD_INPUT, EXIT_SAMPLING = 0, 1, 2, 3
_STRICT_HELP = ("exit with code 3 when the run had problems: sampling (divergences, high "
                "R-hat, low ESS, low BFMI) or comparison (Pareto k above the threshold); the "
                "outputs are written either way")



def _has_unit_level(name) -> bool:
    """Whether a model kind in a results file separates the unit and occasion levels."""
    return name not in kinds.model_names() or kinds.model(name).unit_effects != "none"


def _models_help() -> str:
    names = kinds.model_names()
    return (f"comma-separated Bayesian models: {', '.join(names)}, or 'none' (default: all "
            f"{len(names)})")


def _reference_help() -> str:
    names = kinds.reference_names()
    return (f"comma-separated reference fits: {', '.join(names)}, or 'none' (default: all "
            f"{len(names)})")


_OOC_HELP = ("read a Parquet file or folder in partitions on Dask and work from one-pass "
             "statistics, without loading the table (docs/cli.md says what is left out); "
             "the scheduler comes from BAYESPANEL_DASK_SCHEDULER")


class _Printable:
    """A text stream that writes :func:`printable` text (the console output of a verb)."""

    def __init__(self, stream):
        self._stream = stream

    def write(self, text):
        return self._stream.write(printable(text))

    def __getattr__(self, name):
        return getattr(self._stream, name)


def _show_warning(message, category, filename, lineno, file=None, line=None):
    """The console's warning display: one line (:func:`format_warning`), the message made
    :func:`printable`."""
    print(format_warning(printable(message), category), file=file or sys.stderr, flush=True)


def _show_warning_debug(message, category, filename, lineno, file=None, line=None):
    """With ``--debug``: Python's warning display (file and source line), made printable."""
    text = warnings.formatwarning(printable(message), category, filename, lineno, line)
    (file or sys.stderr).write(text)


def _print_describe(panel, desc=None) -> None:
    s = panel.structure()
    print(f"{s['n_units']} units ({panel.unit}) observed on {s['n_occasions']} occasions "
          f"({panel.time}); {s['n_rows']} rows; "
          f"{'balanced' if s['balanced'] else 'unbalanced'}: {s['occasions_min']} to "
          f"{s['occasions_max']} occasions per unit; {s['n_units_with_gaps']} units with gaps; "
          f"{s['n_singleton_units']} units seen once.")
    desc = panel.describe() if desc is None else desc
    from ..report.tables import describe_display

    with pd.option_context("display.width", 120, "display.max_columns", 20):
        print(describe_display(desc))  # the report's digits rule and headings
    left_out = desc.attrs.get("left_out") or {}
    if left_out:
        print(f"left out ({len(left_out)}): "
              + "; ".join(f"{c} ({why})" for c, why in left_out.items()))


def _names(text):
    if text is None:
        return None
    text = text.strip()
    if text.lower() == "none":
        return ()
    return tuple(x.strip() for x in text.split(",") if x.strip())


_DELIMITER_NAMES = {"tab": "\t", "\\t": "\t", "comma": ",", "semicolon": ";", "pipe": "|",
                    "space": " "}
_DELIMITER_HELP = ("field delimiter of a CSV file: one character such as ';' or '|', or tab, "
                   "comma, semicolon, pipe, space (default ',', tab for .tsv)")


def _delimiter(text):
    """``--delimiter``: one character, or its name (``tab`` is easier to type than a tab)."""
    return None if text is None else _DELIMITER_NAMES.get(text.lower(), text)


def delimiter_option(text):
    """``--delimiter`` of describe and design-check, checked (fit checks it in Settings)."""
    delim = _delimiter(text)
    if delim is not None and len(delim) != 1:
        raise SpecificationError(f"--delimiter {text!r} must be one character, or tab, "
                                 "comma, semicolon, pipe, space")
    return delim


def parse_prior(text: str):
    """``KEY=FAMILY`` or ``KEY=FAMILY:param=value,param=value`` -> (key, spec)."""
    if "=" not in text:
        raise SpecificationError(
            f"--prior {text!r} must look like KEY=FAMILY or KEY=FAMILY:param=value, e.g. "
            "sigma_unit=gamma2 or 'coef=normal:sigma=10'")
    key, spec = text.split("=", 1)
    key, spec = key.strip(), spec.strip()
    if ":" not in spec:
        return key, spec
    family, params = spec.split(":", 1)
    out = {"family": family.strip()}
    for part in params.split(","):
        if not part.strip():
            continue
        if "=" not in part:
            raise SpecificationError(f"--prior {text!r}: parameter {part.strip()!r} needs a "
                                     "value, as in sigma=10")
        k, v = part.split("=", 1)
        try:
            out[k.strip()] = float(v)
        except ValueError:
            raise SpecificationError(f"--prior {text!r}: {k.strip()}={v.strip()!r} is not a "
                                     "number") from None
    return key, out


# ---------------------------------------------------------------------- verbs
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


def print_problems(results) -> list:
    """Print the run's problem list (``results["problems"]``, the list results.json and
    the report hold), grouped by kind; return it."""
    from ..report.problems import stored

    items = stored(results)
    heads = {"sampling": "the estimates of these models may be unreliable",
             "comparison": "the LOO estimates of these models are unreliable"}
    for kind, head in heads.items():
        mine = [p for p in items if p["kind"] == kind]
        if mine:
            print(f"\n{kind} problems ({len(mine)}): {head}")
            for p in mine:
                print(f"  {p['title']}: {p['text']}")
    return items


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


def _fmt(v, u=None):
    """A console number by the report's digits rule (bayespanel.report.numbers): to the
    decimals of its uncertainty ``u``, three significant digits without one."""
    from ..report import numbers

    return numbers.estimate(v, u)


def _sd(u):
    from ..report import numbers

    return f"({numbers.uncertainty(u)})"


#: occasion indicators are listed term by term up to this many; beyond, one line
_OCCASIONS_LISTED = 6


def _print_terms(rows):
    """``(term, centre, spread, lower, upper, extra)`` lines, the centre and interval to the
    decimals of ``spread`` (the SD or SE, shown in brackets), columns sized to the block;
    many occasion indicators are summarised in one line (every value is in results.json
    and the report)."""
    from ..report import numbers
    from ..report.text import label

    occ = [r for r in rows if parse(r[0]).is_occasion]
    many = len(occ) > _OCCASIONS_LISTED
    cells = [(_fmt(r[1], r[2]), f"({numbers.uncertainty(r[2])})") for r in rows]
    w1 = max([len(c) for c, _ in cells] + [9])
    w2 = max([len(d) for _, d in cells] + [0])
    for r, (c, d) in zip(rows, cells):
        if many and r in occ:
            if r is occ[0]:
                vals = [o[1] for o in occ if o[1] is not None]
                print(f"  {len(occ)} occasion terms, from {_fmt(min(vals))} to "
                      f"{_fmt(max(vals))} (each in the report and results.json)")
            continue
        print(f"  {label(r[0]):<28} {c:>{w1}}  {d:>{w2}}  "
              f"{numbers.interval(r[3], r[4], r[2])}{r[5]}")


def _not_estimated(items: dict) -> str:
    """``term (reason)`` pairs, occasion indicators with one reason counted in one item."""
    occ = {}
    out = []
    for k, v in items.items():
        if parse(k).is_occasion and len(items) > _OCCASIONS_LISTED:
            occ.setdefault(v, []).append(k)
        else:
            out.append(f"{k} ({v})")
    out += [f"{len(ks)} occasion terms ({v})" for v, ks in occ.items()]
    return "; ".join(out)


def _print_reference(results) -> None:
    """The reference fits' estimates, SEs and intervals, and the specification tests."""
    from ..report import numbers
    from ..report.text import label

    pct = f"{100 * results['settings']['interval']:g}%"
    for f in results["reference"]:
        dist = f", tests on {f['test_distribution']}" if f.get("test_distribution") else ""
        print(f"\n{f['title']} (reference, {f['cov']} covariance{dist}; estimate, SE and "
              f"{pct} interval)")
        _print_terms([(c["term"], c["estimate"], c["se"], c["lower"], c["upper"], "")
                      for c in f["coefficients"]])
        zero = f.get("unit_variance_at_zero")
        parts = [f"{label(k)} {'0 (estimated at zero)' if zero and k != 'sigma_obs' else numbers.plain(f.get(k))}"
                 for k in ("sigma_unit", "sigma_obs", "icc") if f.get(k) is not None]
        if parts:
            print(f"  {'; '.join(parts)}")
        if f.get("unit_intercept_share") is not None:
            print(f"  unit intercepts account for {numbers.share(f['unit_intercept_share'])} "
                  "of the outcome's variance")
        if f.get("not_estimated"):
            print(f"  not estimated: {_not_estimated(f['not_estimated'])}")
    tests = results.get("tests") or []
    if tests:
        print("\nSpecification tests (are within and between effects equal? are a unit's "
              "errors correlated over time?):")
    reasons = {t["skipped"] for t in tests if t.get("skipped")}
    if len(tests) > 1 and len(reasons) == 1 and all(t.get("skipped") for t in tests):
        print(f"  not run: {reasons.pop()}")  # one line for all
        tests = []
    skipped = {}  # tests skipped for one reason share a line
    for t in tests:
        if t.get("skipped"):
            skipped.setdefault(t["skipped"], []).append(t["title"])
    for why, titles in skipped.items():
        print(f"  {'; '.join(titles)}: not run: {why}")
    for t in tests:
        if t.get("skipped"):
            continue
        p = numbers.p_value(t.get("reported_p_value", t.get("p_value")))
        dist = t.get("distribution") or (
            f"chi-squared({numbers.dof(t.get('df'))})" if t.get("df") is not None else "")
        print(f"  {t['title']}: statistic "
              f"{numbers.plain(t.get('reported_statistic', t.get('statistic')))} on {dist}, "
              f"{'p ' + p if p.startswith('<') else 'p = ' + p}; {t['conclusion']}")


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


def _print_summary(results) -> None:
    """Reference fits and tests, estimates per Bayesian model (truth beside them for
    simulated data) and the comparison."""
    _print_reference(results)
    by = (results.get("truth") or {}).get("by_model", {})
    for m in results["models"]:
        print(f"\n{m['title']} (Bayesian; posterior mean, SD and "
              f"{100 * results['settings']['interval']:g}% interval)")
        known = by.get(m["name"], {})
        rows = []
        for c in m["coefficients"]:
            tv = known.get(c["term"])
            rows.append((c["term"], c["estimate"], c.get("sd"), c["lower"], c["upper"],
                         f"   true {_fmt(tv, c.get('sd'))}" if tv is not None else ""))
        for q in m.get("scale", []):
            # a model without unit effects has a residual SD that mixes both levels: no
            # true value to show
            tv = ((results.get("truth") or {}).get(q["name"])
                  if known and _has_unit_level(m["name"]) else None)
            rows.append((q["name"], q["estimate"], q.get("sd"), q["lower"], q["upper"],
                         f"   true {_fmt(tv, q.get('sd'))}" if tv is not None else ""))
        _print_terms(rows)
        ame = m.get("average_marginal_effects") or []
        if ame:
            print("  average marginal effects (outcome scale; reference GLM beside):")
            for a in ame:
                ref = ("" if a.get("reference_estimate") is None else
                       f"   ref. {_fmt(a['reference_estimate'])} (SE {_fmt(a['reference_se'])})")
                print(f"    {a['effect']:<26} {_fmt(a['estimate'])!s:>9}  [{_fmt(a['lower'])}, "
                      f"{_fmt(a['upper'])}]{ref}")
        _print_serial(m)
        for w in m["diagnostics"]["warnings"]:
            print(f"  warning: {w}")
    for w in results.get("warnings") or []:  # rows dropped, occasions read as dates, ...
        print(f"\nnote: {w}")
    comp = results.get("comparison")
    if comp and comp.get("rows"):
        print(f"\nLOO comparison ({comp['level']} level; ELPD difference to the best, its "
              "SE, stacking weight, method):")
        title = {r["model"]: r["title"] for r in comp["rows"]}
        for r in comp["rows"]:
            flags = []
            if r.get("elpd") is None and r.get("note"):
                flags.append(r["note"])  # why the level is undefined for this model
            if r.get("n_high_pareto_k"):
                flags.append(f"{r['n_high_pareto_k']} point(s) with high Pareto k")
            if r.get("equivalent_to"):
                flags.append("equivalent to " + ", ".join(
                    title.get(n, n) for n in r["equivalent_to"].split(", ")))
            flags += [p for p in (r.get("note") or "").split("; ") if p.startswith("scored on")]
            from ..report import numbers

            w = "" if r.get("weight") is None else numbers.share(r["weight"])
            print(f"  {r['title']:<40} {_fmt(r.get('elpd_diff'), r.get('se_diff')):>9}  "
                  f"{_sd(r.get('se_diff')):>8}  {w:>5}  "
                  f"{r.get('method') or ''}" + (f"  ({'; '.join(flags)})" if flags else ""))
        for text in (comp.get("note"), comp.get("methods_note")):
            if text:
                print(f"  note: {text}")
    check = results.get("interval_check") or {}
    if check.get("message"):  # last, where a reader looks when the run ends
        print(f"\nwarning: {check['message']}")


def _print_serial(m) -> None:
    """A model's correlation over time: the correlation of two occasions one time unit
    apart (AR(1) errors) and the lag-one predictive check of its within residuals."""
    from ..analysis.serialcheck import STATISTIC
    from ..data.resultshape import LAG_ONE
    from ..report import numbers

    vp = m.get("variance_partition") or {}
    for q in vp.get("summary") or []:
        if q["quantity"] == LAG_ONE:
            print(f"  {LAG_ONE}: {_fmt(q['estimate'], q['sd'])} "
                  f"{numbers.interval(q['lower'], q['upper'], q['sd'])}")
    for c in m.get("ppc") or []:
        if c["statistic"] == STATISTIC:
            p = c["p_value"]
            reading = ("" if 0.025 <= p <= 0.975 else
                       "; the residuals are more correlated over time than the model allows"
                       if p < 0.025 else
                       "; the residuals are less correlated over time than the model allows")
            print(f"  {c['label']}: observed {numbers.plain(c['observed'])}, replicated "
                  f"{numbers.plain(c['replicated_mean'])} on average, P(replicated >= "
                  f"observed) {numbers.probability(p)}{reading}")


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


# ---------------------------------------------------------------------- parser
def _sampling_args(p, draws, tune, chains, shown=None):
    """``--draws``, ``--tune``, ``--chains``, ``--seed``; ``shown`` gives the defaults the
    help states when the options' own default is None (values come from Settings)."""
    shown = shown or {"draws": draws, "tune": tune, "chains": chains, "seed": 1}
    g = p.add_argument_group("sampling")
    g.add_argument("--draws", type=int, default=draws,
                   help=f"posterior draws per chain (default {shown['draws']})")
    g.add_argument("--tune", type=int, default=tune,
                   help=f"tuning steps per chain, discarded (default {shown['tune']})")
    g.add_argument("--chains", type=int, default=chains,
                   help=f"chains (default {shown['chains']})")
    g.add_argument("--seed", type=int, default=None,
                   help="seed of every random draw; the same seed repeats the run (default "
                        f"{shown['seed']})")
    return g


def _family_args(p):
    """Outcome family, its columns and random slopes (docs/families.md, docs/cli.md)."""
    from ..bayes.families import FAMILIES

    g = p.add_argument_group("outcome family and random slopes")
    g.add_argument("--family", choices=FAMILIES, default=None,
                   help="distribution of the outcome: gaussian (default), student_t, "
                        "bernoulli (0/1), binomial (successes of --trials), poisson or "
                        "negative_binomial (counts); families other than gaussian are fitted "
                        "by random_intercept, within_between and correlated_effects, beside "
                        "pooled GLMs as reference fits")
    g.add_argument("--trials", metavar="COL",
                   help="column with the number of trials of every row (binomial)")
    g.add_argument("--exposure", metavar="COL",
                   help="column with each row's exposure (time at risk, population), entering "
                        "counts as log(exposure) (poisson, negative_binomial)")
    g.add_argument("--random-slopes", metavar="X[,Z]",
                   help="comma-separated time-varying covariates (at most two) whose slope "
                        "varies by unit")
    g.add_argument("--centred-effects", action="store_true",
                   help="centred latent unit effects instead of the non-centred default "
                        "(try it when units have many occasions and sampling reports "
                        "divergences)")


def _pairs(items, option):
    out = {}
    for text in items or []:
        if "=" not in text:
            raise SpecificationError(f"{option} {text!r} must look like NAME=NUMBER")
        k, v = text.rsplit("=", 1)
        try:
            out[k.strip()] = float(v)
        except ValueError:
            raise SpecificationError(f"{option} {text!r}: {v.strip()!r} is not a number") from None
    return out


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


def _add_design_check_verb(sub):
    """``design-check``: coverage, bias, width and power on the file's own panel structure."""
    p = sub.add_parser(
        "design-check", help="simulate replicate outcomes on a panel's structure and report "
                             "coverage, bias, width and power per parameter",
        description="Keep the file's panel structure (units, occasions, covariate values), "
                    "simulate outcomes from given or fitted values, refit the Bayesian model "
                    "and its reference on each replicate, and print coverage of the 90% and "
                    "95% intervals, bias, median width, power for a between-minus-within "
                    "difference and how often the reference unit variance is zero.",
        epilog="example: bayespanel design-check clinics.csv --unit clinic --time quarter "
               "--formula 'satisfaction ~ staffing + caseload' --model within_between "
               "--difference staffing=2 --replicates 100 --out check1")
    p.add_argument("file", help="CSV or Parquet file, one row per unit and occasion")
    p.add_argument("--unit", required=True, help="column identifying the units")
    p.add_argument("--time", required=True, help="column identifying the occasions")
    p.add_argument("--delimiter", metavar="CHAR", help=_DELIMITER_HELP)
    p.add_argument("--formula", required=True, help="Wilkinson formula, e.g. 'y ~ x + z'")
    p.add_argument("--model", default="random_intercept",
                   help=f"{', '.join(kinds.model_names())} (default random_intercept)")
    p.add_argument("--replicates", type=int, default=100, help="replicates (default 100)")
    p.add_argument("--coef", action="append", metavar="TERM=VALUE",
                   help="true coefficient, repeatable; without --coef the values come from "
                        "the REML reference fit on the file's outcome")
    p.add_argument("--sigma-unit", type=float, help="true unit-level SD")
    p.add_argument("--sigma-obs", type=float, help="true occasion-level SD")
    p.add_argument("--errors", choices=("iid", "ar1"), default="iid",
                   help="errors of the replicates and the refitted models: iid (default) or "
                        "ar1, AR(1) within units (give --rho with --coef)")
    p.add_argument("--rho", type=float,
                   help="true correlation of errors one time unit apart (--errors ar1)")
    p.add_argument("--difference", action="append", metavar="X=SIZE",
                   help="between-minus-within difference to detect, repeatable")
    p.add_argument("--reference-only", action="store_true",
                   help="skip the Bayesian refits (reference and known-variance GLS only)")
    p.add_argument("--workers", type=int, default=2, help="threads (default 2)")
    p.add_argument("--out", metavar="DIR", help="write design_check.csv and design_check.png")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    _sampling_args(p, 500, 500, 2)
    p.set_defaults(func=cmd_design_check)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="bayespanel",
        description="Bayesian and reference fits of panel-data models (pooled, fixed effects, "
                    "random intercept, within-between, Mundlak) with LOO comparison. "
                    "Exit codes: 0 success, 2 bad input, 1 failure or interrupted, 3 "
                    "sampling problems under --strict.",
    )
    from ..core.version import __version__
    from .runner import Settings

    default = {f.name: f.default for f in fields(Settings)}
    parser.add_argument("--version", action="version", version=f"bayespanel {__version__}",
                        help="print the version and exit")
    parser.add_argument("--debug", action="store_true",
                        help="show the full traceback when a run fails")
    sub = parser.add_subparsers(dest="verb", required=True, metavar="VERB")

    p = sub.add_parser(
        "demo", help="run the whole job on the built-in simulated clinic panel",
        description="Simulate the clinic panel (true values known), fit the reference and "
                    "Bayesian models, compare them by LOO, write the report and print the "
                    "estimates beside the true values.")
    p.add_argument("--seed", type=int, default=2026,
                   help="seed of the simulated panel and of the sampler (default 2026)")
    p.add_argument("--out", default="bayespanel-demo",
                   help="output folder (default ./bayespanel-demo)")
    p.add_argument("--draws", type=int, default=1000, help="draws per chain (default 1000)")
    p.add_argument("--tune", type=int, default=1000, help="tuning steps per chain (default 1000)")
    p.add_argument("--chains", type=int, default=4, help="chains (default 4)")
    p.add_argument("--level", default="occasion", choices=["occasion", "unit"],
                   help="LOO level of the comparison (default occasion)")
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    p.add_argument("--strict", action="store_true", help=_STRICT_HELP)
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser("describe", help="check a table and decompose each variable within/between",
                       description="Read a CSV or Parquet file, check it as a panel and print, "
                                   "per variable, the overall, between and within SDs.")
    p.add_argument("file", help="CSV or Parquet file, one row per unit and occasion")
    p.add_argument("--unit", required=True, help="column identifying the units")
    p.add_argument("--time", required=True, help="column identifying the occasions")
    p.add_argument("--delimiter", metavar="CHAR", help=_DELIMITER_HELP)
    p.add_argument("--out-of-core", action="store_true", help=_OOC_HELP)
    p.add_argument("--quiet", action="store_true", help="no progress lines")
    p.set_defaults(func=cmd_describe)

    p = sub.add_parser(
        "fit", help="fit models to a CSV or Parquet file and write results and a report",
        description="Fit reference and Bayesian panel models on the same rows, compare them "
                    "by LOO and write results.json, posteriors/*.nc, tables/ and report.html "
                    "into --out. Settings come from the options, from --config (an analysis "
                    "file, TOML) or both; options override the file. The folder gets "
                    "analysis.toml, which repeats the run exactly.",
        epilog="example: bayespanel fit clinics.csv --unit clinic --time quarter "
               "--formula 'satisfaction ~ staffing + caseload + rural' "
               "--models random_intercept,within_between --out run1")
    p.add_argument("file", nargs="?", help="CSV or Parquet file (or give it in --config)")
    p.add_argument("--config", metavar="TOML", help="analysis file with the settings")
    p.add_argument("--out", required=True, metavar="DIR", help="output folder (created)")
    g = p.add_argument_group("data and model")
    g.add_argument("--unit", help="column identifying the units")
    g.add_argument("--time", help="column identifying the occasions")
    g.add_argument("--delimiter", metavar="CHAR", help=_DELIMITER_HELP)
    g.add_argument("--formula", help="Wilkinson formula, e.g. 'y ~ x + z' (unit effects come "
                   "from the model, not the formula)")
    g.add_argument("--models", help=_models_help())
    g.add_argument("--occasion-effects", action="store_true",
                   help="add one indicator per occasion to every model")
    g.add_argument("--no-initial-conditions", action="store_true",
                   help="with the lagged outcome among the covariates (lag(y)), do not model "
                        "the unit effect given the first outcome (docs/serial-correlation.md)")
    g.add_argument("--out-of-core", action="store_true", help=_OOC_HELP)
    g.add_argument("--errors", choices=["iid", "ar1"], default=None,
                   help="occasion-level errors of the Gaussian models: iid (default: "
                        "independent given the unit intercept) or ar1 (correlated over time "
                        "within units, rho^gap for occasions a gap apart on the time column's "
                        "own scale; docs/serial-correlation.md)")
    _family_args(p)
    g.add_argument("--prior", action="append", metavar="KEY=SPEC",
                   help="prior override, repeatable: KEY is a term label, 'coef' (all slopes), "
                        "'sigma_obs', 'sigma_unit' or 'rho' (with --errors ar1); SPEC is a family (normal, student_t, "
                        "flat, half_normal, half_student_t, exponential, gamma2, half_flat) "
                        "optionally with parameters, e.g. sigma_unit=gamma2 or "
                        "'coef=normal:sigma=10'")
    # the option defaults stay None so that an analysis file's values are not overridden;
    # the help shows the defaults a run uses (those of Settings)
    g = _sampling_args(p, None, None, None, shown=default)
    g.add_argument("--sampler", choices=["auto", "pymc", "nutpie"], default=None,
                   help=f"NUTS implementation (default {default['sampler']}: picked by "
                        "model size)")
    g.add_argument("--ppc-draws", type=int, default=None,
                   help=f"posterior draws used for predictive checks (default "
                        f"{default['ppc_draws']})")
    g.add_argument("--progress-bars", action="store_true", help="show the sampler's progress bars")
    g = p.add_argument_group("reference fits and comparison")
    g.add_argument("--reference", help=_reference_help())
    g.add_argument("--cov", choices=["classical", "cluster", "cr2"], default=None,
                   help=f"covariance of the reference fits (default {default['cov']}: CR1 by unit)")
    g.add_argument("--method", choices=["swamy-arora", "ml", "reml"], default=None,
                   help="variance components of the random-intercept reference fits "
                        f"(default {default['re_method']})")
    g.add_argument("--level", choices=["occasion", "unit"], default=None,
                   help="LOO level: occasion = new occasions of known units, unit = new "
                        f"units (default {default['level']})")
    g.add_argument("--reference-folds", type=int, default=None, metavar="K",
                   help="reference fits in the LOO table: 0 = exact leave-one-out refits, "
                        "K >= 2 = grouped K-fold (default: exact leave-one-out at every size, "
                        "from downdated closed-form refits)")
    g.add_argument("--refit-high-k", action="store_true",
                   help="replace PSIS-LOO points whose Pareto k is above the threshold by "
                        "exact refits of the Bayesian model without them (one posterior "
                        "sample each)")
    g.add_argument("--max-refits", type=int, default=None, metavar="N",
                   help="with --refit-high-k, most refits per model; with more high-k points "
                        "the PSIS values stay and the problem list says so (default 10)")
    g.add_argument("--loo-observations", type=int, default=None, metavar="M",
                   help="out of core: points scored in full by the sub-sampled LOO "
                        "(default 400)")
    g.add_argument("--rope", type=float, default=None,
                   help="half-width of the region of practical equivalence for the "
                        "between-minus-within contrasts (outcome units per covariate unit)")
    g.add_argument("--interval", type=float, default=None,
                   help=f"probability of every reported interval (default "
                        f"{get_option('interval')}, the package's interval option)")
    g.add_argument("--title", help="title of the report")
    g.add_argument("--quiet", action="store_true", help="no progress lines")
    g.add_argument("--strict", action="store_true", help=_STRICT_HELP)
    p.set_defaults(func=cmd_fit)

    _add_design_check_verb(sub)

    p = sub.add_parser(
        "report", help="rebuild report.html and tables from a saved results folder",
        description="Read results.json from a folder written by fit (or demo) and write "
                    "report.html and tables/ again, without refitting.")
    p.add_argument("folder", help="output folder of an earlier fit")
    p.add_argument("--out", metavar="DIR", help="write there instead of into FOLDER")
    p.set_defaults(func=cmd_report)
    return parser


def _terminate(signum, frame):
    raise KeyboardInterrupt(f"terminated by signal {signum}")


def format_warning(message, category) -> str:
    """A warning as the console shows it: one line, no file name or Python source line
    (``bayespanel: warning: ...``; the category is named unless it is a plain
    ``UserWarning`` or one of ours, whose messages say what they are about)."""
    text = " ".join(str(message).split())
    ours = category.__module__.startswith("bayespanel") or category is UserWarning
    return f"bayespanel: warning: {text if ours else f'{category.__name__}: {text}'}"


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.debug:  # tracebacks of fits that failed while the run went on
        log = logging.getLogger("bayespanel")
        log.setLevel(logging.DEBUG)
        log.addHandler(logging.StreamHandler(sys.stderr))
    previous = None
    if threading.current_thread() is threading.main_thread():
        # SIGTERM (a scheduler's time limit, `kill`) ends a run like Ctrl-C: the staging
        # folder is discarded and the folder keeps its earlier run (docs/guarantees.md)
        previous = signal.signal(signal.SIGTERM, _terminate)
    try:
        return _main(args)
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


def _main(args) -> int:
    try:
        with warnings.catch_warnings(), contextlib.redirect_stdout(_Printable(sys.stdout)):
            warnings.simplefilter("default")
            warnings.showwarning = _show_warning_debug if args.debug else _show_warning
            return int(args.func(args) or 0)
    except OutputError as exc:  # the input was fine; the outputs could not be written
        print(f"bayespanel: failed: {exc}", file=sys.stderr)
        return EXIT_FAILURE
    except BayespanelError as exc:
        print(f"bayespanel: error: {printable(exc)}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt as exc:
        print(f"bayespanel: interrupted{f' ({exc})' if str(exc) else ''}", file=sys.stderr)
        return EXIT_FAILURE
    except MemoryError:
        print("bayespanel: failed: out of memory (lower --draws, --chains or --ppc-draws)",
              file=sys.stderr)
        return EXIT_FAILURE
    except Exception as exc:  # a failure, not bad input: say what and how to see more
        if args.debug:
            raise
        print(f"bayespanel: failed: {type(exc).__name__}: {printable(exc)} (rerun with "
              "--debug for the traceback)", file=sys.stderr)
        return EXIT_FAILURE


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
