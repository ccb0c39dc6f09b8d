"""Command line: ``python -m bayespanel VERB ...`` (also installed as ``bayespanel``).

Exit codes: 0 success, 2 bad input (the message names the problem), 1 failure.
"""

from __future__ import annotations

import argparse
import sys
import warnings

import pandas as pd

from .errors import BayespanelError

EXIT_OK, EXIT_FAILURE, EXIT_BAD_INPUT = 0, 1, 2


def _print_describe(panel) -> None:
    s = panel.structure()
    print(f"{s['n_units']} units ({panel.unit}) observed on {s['n_occasions']} occasions "
          f"({panel.time}); {s['n_rows']} rows; "
          f"{'balanced' if s['balanced'] else 'unbalanced'}: {s['occasions_min']} to "
          f"{s['occasions_max']} occasions per unit; {s['n_units_with_gaps']} units with gaps; "
          f"{s['n_singleton_units']} units seen once.")
    with pd.option_context("display.width", 120, "display.max_columns", 20,
                           "display.float_format", "{:.3f}".format):
        print(panel.describe())


def cmd_demo(args) -> int:
    from .datasets import clinic_panel
    from .panel import Panel

    df, truth = clinic_panel(seed=args.seed)
    panel = Panel(df, unit=truth["unit"], time=truth["time"])
    print("Demo scenario: simulated clinics, quarterly patient-satisfaction scores.")
    print(f"Formula: {truth['formula']}")
    _print_describe(panel)
    print("True values used to simulate:", truth)
    return EXIT_OK


def cmd_describe(args) -> int:
    from .panel import Panel

    panel = Panel.from_file(args.file, unit=args.unit, time=args.time)
    _print_describe(panel)
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="bayespanel",
        description="Bayesian and reference fits of panel-data models (pooled, fixed effects, "
                    "random intercept, within-between, Mundlak) with LOO comparison.",
    )
    sub = parser.add_subparsers(dest="verb", required=True, metavar="VERB")
    p = sub.add_parser("demo", help="run the whole job on the built-in simulated clinic panel",
                       description="Run on the built-in simulated clinic panel, whose true "
                                   "values are known, and print them beside the estimates.")
    p.add_argument("--seed", type=int, default=2026, help="seed of the simulated panel (default 2026)")
    p.set_defaults(func=cmd_demo)
    p = sub.add_parser("describe", help="check a table and decompose each variable within/between",
                       description="Read a CSV or Parquet file, check it as a panel and print, "
                                   "per variable, the overall, between and within SDs.")
    p.add_argument("file", help="CSV or Parquet file, one row per unit and occasion")
    p.add_argument("--unit", required=True, help="column identifying the units")
    p.add_argument("--time", required=True, help="column identifying the occasions")
    p.set_defaults(func=cmd_describe)
    return parser


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("default")
            return int(args.func(args) or 0)
    except BayespanelError as exc:
        print(f"bayespanel: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("bayespanel: interrupted", file=sys.stderr)
        return EXIT_FAILURE


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
