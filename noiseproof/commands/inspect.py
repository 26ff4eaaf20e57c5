"""`noiseproof inspect`: read a history or an assumptions file, check it, and describe it."""
from __future__ import annotations

import argparse
import json
import os
import sys

from estimators.core import NoiseproofError, SettingsError

DESCRIPTION = """\
Read a history file (CSV or Parquet: a date column and one column per asset,
holding prices or decimal simple returns) or a capital-market assumptions file
(TOML, or CSV with the columns asset, expected_return, volatility and one
correlation column per asset), check it, and print what it holds: rows, assets,
date range, frequency, missing cells, annualised mean and volatility per asset,
and the range of the correlations.

Nothing is written. A problem in the file stops with one line naming the file,
the column and the data row (counted from 1 after the header line), and exit
status 2.
"""

EPILOG = """\
annualising: mean x P and volatility x sqrt(P), with P = 252, 52, 12, 4 or 1
periods a year for daily, weekly, monthly, quarterly or annual data (common
practice); volatility uses the T-1 divisor.

An assumptions file is recognised by its content (a .toml file, or a CSV whose
header starts with asset, expected_return, volatility); --assumptions forces it.

examples:
  noiseproof inspect prices.csv --kind prices
  noiseproof inspect returns.csv --risk-free-file cash.csv --json
  noiseproof inspect returns.csv --missing drop-rows --min-rows 120
  noiseproof inspect assumptions.toml --repair
"""


def register(sub) -> None:
    p = sub.add_parser(
        "inspect",
        help="check a history or assumptions file and summarise it",
        description=DESCRIPTION,
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("file", metavar="FILE", help="history (CSV or Parquet) or assumptions (TOML or CSV) file")
    h = p.add_argument_group("history options")
    h.add_argument("--kind", choices=("prices", "returns"),
                   help="what the cells hold; detected only when unambiguous (any value <= 0: returns; "
                        "every value >= 1: prices), otherwise required")
    h.add_argument("--frequency", choices=("daily", "weekly", "monthly", "quarterly", "annual"),
                   help="override the frequency inferred from the median spacing of the dates")
    h.add_argument("--date-column", metavar="C",
                   help="name of the date column (default: a column named 'date', 'time', 'period', "
                        "'month'..., else a first column of dates)")
    h.add_argument("--missing", choices=("raise", "drop-rows"), default="raise",
                   help="missing cells: stop at the first one (raise, the default) or drop every row "
                        "holding one and report how many (drop-rows)")
    rf = h.add_mutually_exclusive_group()
    rf.add_argument("--risk-free", type=float, metavar="RATE",
                    help="constant risk-free rate per period, as a decimal (0.002 = 0.2%% a period); "
                         "returns become excess returns")
    rf.add_argument("--risk-free-column", metavar="C",
                    help="a column of FILE holding the per-period risk-free rate (it is not an asset)")
    rf.add_argument("--risk-free-file", metavar="F",
                    help="a separate file (date column and one rate column) with the per-period "
                         "risk-free rate for every date of FILE")
    h.add_argument("--min-rows", type=int, metavar="N",
                   help="stop unless there are at least N return periods (e.g. what your estimator needs)")
    h.add_argument("--mean", metavar="NAME",
                   help="with --covariance: stop unless there are enough rows for this estimator pair")
    h.add_argument("--covariance", metavar="NAME",
                   help="covariance estimator to check the row count for (see --mean)")
    a = p.add_argument_group("assumptions options")
    a.add_argument("--assumptions", action="store_true",
                   help="read FILE as capital-market assumptions even if its content does not say so")
    a.add_argument("--repair", action="store_true",
                   help="if the correlation matrix is not positive semi-definite, use the nearest valid "
                        "correlation matrix (Higham 2002) and report how far it moved")
    a.add_argument("--assumptions-frequency", choices=("daily", "weekly", "monthly", "quarterly", "annual"),
                   metavar="F",
                   help="the period the assumptions refer to (default: the file's 'frequency', else annual)")
    p.add_argument("--json", action="store_true", help="print the summary as JSON instead of text")
    p.set_defaults(func=run)


def _check_estimator_rows(history, mean, covariance) -> None:
    try:
        from estimators import min_rows
    except ImportError:
        raise NoiseproofError("--mean/--covariance: the estimators part is not built yet "
                              "(estimators.min_rows is missing); use --min-rows N") from None
    from noiseproof.intake import require_rows

    n = int(min_rows(mean, covariance, history.n_assets))
    require_rows(history, n, f"the estimators mean='{mean}', covariance='{covariance}' for "
                             f"{history.n_assets} assets")


def run(args) -> int:
    from noiseproof.assumptions import assumptions_text, describe_assumptions
    from noiseproof.intake import inspect_history, load_assumptions, looks_like_assumptions, require_rows

    if args.assumptions or looks_like_assumptions(args.file):
        history_only = [o for o, v in (("--kind", args.kind), ("--frequency", args.frequency),
                                       ("--date-column", args.date_column),
                                       ("--risk-free", args.risk_free),
                                       ("--risk-free-column", args.risk_free_column),
                                       ("--risk-free-file", args.risk_free_file),
                                       ("--min-rows", args.min_rows), ("--mean", args.mean),
                                       ("--covariance", args.covariance)) if v is not None]
        if args.missing != "raise":
            history_only.append("--missing")
        if history_only:
            raise SettingsError(f"{args.file} is an assumptions file; {', '.join(history_only)} "
                                f"apply to history files only")
        a = load_assumptions(args.file, repair=args.repair, frequency=args.assumptions_frequency)
        d = describe_assumptions(a)
        return _emit(json.dumps(d, indent=2) if args.json else assumptions_text(d))

    if args.repair or args.assumptions_frequency:
        raise SettingsError("--repair and --assumptions-frequency apply to assumptions files only")
    if (args.mean is None) != (args.covariance is None):
        raise SettingsError("give --mean and --covariance together")
    if args.min_rows is not None and args.min_rows < 1:
        raise SettingsError("--min-rows must be at least 1")
    history, summary = inspect_history(
        args.file, kind=args.kind, frequency=args.frequency, date_column=args.date_column,
        missing=args.missing, risk_free=args.risk_free, risk_free_column=args.risk_free_column,
        risk_free_path=args.risk_free_file,
    )
    if args.min_rows is not None:
        require_rows(history, args.min_rows, "the requested minimum (--min-rows)")
    if args.mean is not None:
        _check_estimator_rows(history, args.mean, args.covariance)
    return _emit(json.dumps(summary.to_dict(), indent=2) if args.json else summary.to_text())


def _emit(text: str) -> int:
    """Print ``text``; a reader that stops early (``| head``) is not an error."""
    try:
        print(text, flush=True)
    except BrokenPipeError:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    return 0
