"""`noiseproof estimate`: the mean and covariance the optimiser would see, from a history file."""
from __future__ import annotations

import argparse
import json
import math
import sys
import textwrap

from estimators import COVARIANCE_ESTIMATORS, MEAN_ESTIMATORS, estimate
from ._common import add_data_arguments, add_estimator_arguments, estimator_params, load_history_from

HELP = "show the estimated mean and covariance (annualised table, or per-period JSON)"

DESCRIPTION = """\
Estimate the per-period mean vector and covariance matrix of a return (or price) history
with the chosen estimators, i.e. the inputs a portfolio rule would be given. The table
shows annualised figures (mean x periods per year, volatility x sqrt(periods per year),
a common-practice scaling of simple returns), the correlation matrix and the shrinkage
intensities; --json prints the per-period figures for other programs."""


def _estimator_list(table):
    lines = []
    for name, est in table.items():
        if name == "given":
            continue
        lines.append(f"  {name}")
        lines += textwrap.wrap(est.summary, width=88, initial_indent="      ",
                               subsequent_indent="      ")
    return "\n".join(lines)


EPILOG = f"""\
mean estimators (--mean):
{_estimator_list(MEAN_ESTIMATORS)}

covariance estimators (--covariance):
{_estimator_list(COVARIANCE_ESTIMATORS)}

('given' moments come from an assumptions file in a study, not from this command.)

JSON fields: assets (list), frequency, periods, first_date, last_date, mean_estimator,
covariance_estimator, params, mean (asset -> per-period decimal), covariance (N x N
list of lists, per period, in the order of assets), divisor, shrinkage (number or null),
mean_shrinkage (number or null), units ("per period"), source, sha256.

Figures are estimates from past data, hypothetical as forecasts; decision support, not
investment advice."""


def register(sub) -> None:
    p = sub.add_parser(
        "estimate", help=HELP, description=DESCRIPTION, epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    add_data_arguments(p)
    add_estimator_arguments(p)
    p.add_argument("--json", action="store_true",
                   help="print per-period figures as JSON instead of the table")
    p.set_defaults(func=run)


def _num(x):
    x = float(x)
    return x if math.isfinite(x) else None


def _date(d):
    return str(d)[:10]


def run(args) -> int:
    params = estimator_params(args)  # settings errors before reading the file
    history = load_history_from(args)
    m = estimate(history, mean=args.mean, covariance=args.covariance,
                 params=params)
    assets = list(history.assets)
    if args.json:
        doc = {
            "assets": assets,
            "frequency": history.frequency,
            "periods": history.n_periods,
            "first_date": _date(history.dates[0]),
            "last_date": _date(history.dates[-1]),
            "mean_estimator": m.mean_name,
            "covariance_estimator": m.covariance_name,
            "params": m.params,
            "mean": {a: _num(v) for a, v in zip(assets, m.mean)},
            "covariance": [[_num(v) for v in row] for row in m.covariance],
            "divisor": m.divisor,
            "shrinkage": m.shrinkage,
            "mean_shrinkage": m.mean_shrinkage,
            "units": "per period",
            "source": history.source,
            "sha256": history.sha256,
        }
        json.dump(doc, sys.stdout, indent=2)
        sys.stdout.write("\n")
        return 0
    sys.stdout.write(format_table(m, history))
    return 0


def format_table(m, history) -> str:
    """The readable report: annualised mean and volatility, correlations, intensities."""
    ppy = history.periods_per_year
    assets = list(history.assets)
    w = max(8, max(len(a) for a in assets))
    lines = [
        f"{history.source}: {len(assets)} assets, {history.n_periods} {history.frequency} "
        f"periods ({_date(history.dates[0])} to {_date(history.dates[-1])})",
        f"mean estimator:       {m.mean_name}" + (
            f"  (weight on its target {m.mean_shrinkage:.3f})" if m.mean_shrinkage is not None
            else ""),
        f"covariance estimator: {m.covariance_name}" + (
            f"  (divisor {m.divisor})" if m.divisor else "") + (
            f"  {_ewma_note(m.params)}" if m.params else ""),
        "shrinkage intensity:  " + (
            f"{m.shrinkage:.4f} (weight on the target)" if m.shrinkage is not None
            else "none (not a shrinkage estimator)"),
        "",
        f"annualised: mean x {ppy}, volatility x sqrt({ppy}); per-period figures with --json",
        f"{'asset':<{w}}  {'mean p.a.':>10}  {'vol p.a.':>9}",
    ]
    vol = m.volatility
    for a, mu, v in zip(assets, m.mean, vol):
        lines.append(f"{a:<{w}}  {100 * mu * ppy:9.2f}%  {100 * v * math.sqrt(ppy):8.2f}%")
    lines += ["", "correlation"]
    corr = m.correlation
    cw = 7
    lines.append(" " * w + "".join(f"{a[:cw - 1]:>{cw}}" for a in assets))
    for a, row in zip(assets, corr):
        lines.append(f"{a:<{w}}" + "".join(
            f"{v:>{cw}.2f}" if math.isfinite(v) else f"{'n/a':>{cw}}" for v in row))
    return "\n".join(lines) + "\n"


def _ewma_note(params):
    parts = []
    if "ewma_half_life" in params:
        parts.append(f"half-life {params['ewma_half_life']:g} periods")
    if "ewma_decay" in params:
        parts.append(f"decay {params['ewma_decay']:.4f}")
    return "(" + ", ".join(parts) + ")"
