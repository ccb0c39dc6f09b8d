"""The command line's argument parser: its verbs, their options and help texts
(docs/cli.md); each verb's function is in :mod:`bayespanel.app.verbs`."""

from __future__ import annotations

import argparse
from dataclasses import fields

from .. import kinds
from ..core.options import get_option
from .cliargs import _DELIMITER_HELP
from .settings import SAMPLERS
from .verbs import cmd_demo, cmd_describe, cmd_design_check, cmd_fit, cmd_report


_STRICT_HELP = ("exit with code 3 when the run had problems: sampling (divergences, high "
                "R-hat, low ESS, low BFMI) or comparison (Pareto k above the threshold); the "
                "outputs are written either way")


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
    g.add_argument("--sampler", choices=list(SAMPLERS), default=None,
                   help=f"NUTS implementation (default {default['sampler']}: bayespanel's "
                        "own for the marginal models, nutpie for large latent ones, else "
                        "PyMC's)")
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
