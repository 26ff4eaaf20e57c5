"""`noiseproof optimise`: the allocation a portfolio rule proposes from a history file."""
from __future__ import annotations

import argparse
import json
import math
import sys

from estimators.core import SettingsError
from ._common import add_data_arguments, add_estimator_arguments, estimator_params, load_history_from

HELP = "print the allocation a portfolio rule proposes from a history file"

DESCRIPTION = """\
Estimate the per-period mean and covariance of a return (or price) history, then print
the weights a portfolio rule proposes under the given constraints, with the portfolio's
expected return, volatility and Sharpe ratio under those same estimates (in-sample figures:
they flatter the rule). Infeasible constraints stop with one line naming the conflict."""

EPILOG = """\
rule types (--rule):
  equal-weight             1/N in every asset (no parameters)
  inverse-volatility       weights proportional to 1/volatility (no parameters)
  equal-risk-contribution  long-only weights with equal risk contributions
  min-variance             the least-variance portfolio under the constraints
  mean-variance            maximise w'mu - (G/2) w'Sigma w   (needs --risk-aversion G)
  max-sharpe               the largest (w'mu - R) / volatility  (--risk-free R, default 0)
  target-return            least variance with w'mu >= X         (needs --target X)
  target-volatility        largest w'mu with volatility <= X     (needs --target X)
  fixed                    the weights given with --weight ASSET=W (assets left out hold
                           0; they must sum to 1 unless --budget cash), shown with their
                           in-sample figures

constraints: long-only unless --allow-short; fully invested (--budget full) or with a
cash sleeve earning --risk-free (--budget cash: risky weights may sum to less than 1; with
shorting allowed, cash may be negative, i.e. borrowing). --bound ASSET=LOW:HIGH and
--group NAME=A,B,C:LOW:HIGH take decimals (0.4 = 40 per cent); leave a side empty for no bound
on that side. All rates are per period (the data's frequency), as decimals.

JSON fields: rule, params, assets, weights (asset -> decimal), cash (decimal, 0 when fully
invested), expected_return, volatility, sharpe (per period, under the estimated inputs),
expected_return_annualised, volatility_annualised, sharpe_annualised (x periods per year,
x sqrt(periods per year)), risk_free, mean_estimator, covariance_estimator, periods,
frequency, kkt_residual (null for the heuristic rules), implied_risk_aversion
(target-volatility only), source, sha256, units.

Figures are estimates from past data, hypothetical as forecasts; decision support, not
investment advice."""


#: The rule types (kept literal so that ``--help`` does not import numba; a test checks it
#: equals ``optimise.RULE_TYPES``).
RULE_TYPES = ("equal-weight", "min-variance", "mean-variance", "max-sharpe", "target-return",
              "target-volatility", "inverse-volatility", "equal-risk-contribution", "fixed")


def register(sub) -> None:
    p = sub.add_parser("optimise", help=HELP, description=DESCRIPTION, epilog=EPILOG,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    add_data_arguments(p)
    p.add_argument("--rule", required=True, choices=RULE_TYPES, metavar="TYPE",
                   help="rule type (list below)")
    add_estimator_arguments(p, see_also="see 'noiseproof estimate --help'")
    p.add_argument("--allow-short", action="store_true",
                   help="allow negative weights (default: long-only)")
    p.add_argument("--budget", choices=("full", "cash"), default="full",
                   help="full: weights sum to 1 (default); cash: the rest is cash at --risk-free")
    p.add_argument("--risk-aversion", type=float, metavar="G",
                   help="risk aversion gamma of the mean-variance rule (> 0)")
    p.add_argument("--risk-free", type=float, metavar="R",
                   help="risk-free rate per period (max-sharpe reference, cash return); default 0")
    p.add_argument("--target", type=float, metavar="X",
                   help="target return (target-return) or volatility (target-volatility), per period")
    p.add_argument("--bound", action="append", default=[], metavar="ASSET=LOW:HIGH",
                   help="bounds on one asset's weight, e.g. --bound 'Harbour Bonds=0.1:0.5' (repeatable)")
    p.add_argument("--group", action="append", default=[], metavar="NAME=A,B,C:LOW:HIGH",
                   help="bounds on the summed weight of assets A, B, C (repeatable)")
    p.add_argument("--weight", action="append", default=[], metavar="ASSET=W",
                   help="a weight of --rule fixed, as a decimal (repeatable)")
    p.add_argument("--json", action="store_true", help="print the result as JSON")
    p.set_defaults(func=run)


def _parse_bound(text: str):
    name, eq, rng = text.rpartition("=")
    if not eq or not name:
        raise SettingsError(f"--bound {text!r}: expected ASSET=LOW:HIGH")
    lo, hi = _parse_range(rng, f"--bound {text!r}")
    return name, (lo, hi)


def _parse_range(rng: str, where: str):
    parts = rng.split(":")
    if len(parts) != 2:
        raise SettingsError(f"{where}: expected LOW:HIGH after '=' (decimals; a side may be empty)")
    out = []
    for s in parts:
        s = s.strip()
        if not s:
            out.append(None)
            continue
        try:
            v = float(s)
        except ValueError:
            raise SettingsError(f"{where}: {s!r} is not a number") from None
        if not math.isfinite(v):
            raise SettingsError(f"{where}: {s!r} is not a finite number")
        out.append(v)
    return tuple(out)


def _parse_group(text: str):
    name, eq, rest = text.partition("=")
    if not eq or not name:
        raise SettingsError(f"--group {text!r}: expected NAME=A,B,C:LOW:HIGH")
    members, _, rng = rest.partition(":")
    if not rng:
        raise SettingsError(f"--group {text!r}: expected NAME=A,B,C:LOW:HIGH")
    assets = [a.strip() for a in members.split(",") if a.strip()]
    if not assets:
        raise SettingsError(f"--group {text!r}: no assets listed")
    return name, {"assets": assets, "bounds": _parse_range(rng, f"--group {text!r}")}


def rule_params(args) -> dict:
    """The rule parameters the options describe (checked by ``optimise.make_rule``)."""
    params = {}
    if args.rule not in ("equal-weight", "inverse-volatility", "equal-risk-contribution"):
        params["long_only"] = not args.allow_short
        if args.budget != "full":
            params["budget"] = args.budget
    elif args.allow_short or args.budget != "full":
        raise SettingsError(f"--rule {args.rule} is long-only and fully invested; "
                            "--allow-short and --budget cash do not apply")
    for flag, key in (("risk_aversion", "risk_aversion"), ("risk_free", "risk_free"),
                      ("target", "target")):
        value = getattr(args, flag)
        if value is not None:
            params[key] = value
    weights = getattr(args, "weight", None) or []
    if weights and args.rule != "fixed":
        raise SettingsError(f"--weight applies to --rule fixed, not --rule {args.rule}")
    if weights:
        params["weights"] = {}
        for text in weights:
            name, eq, value = text.rpartition("=")
            if not eq or not name:
                raise SettingsError(f"--weight {text!r}: expected ASSET=W")
            try:
                params["weights"][name] = float(value)
            except ValueError:
                raise SettingsError(f"--weight {text!r}: {value!r} is not a number") from None
    if args.bound:
        params["bounds"] = dict(_parse_bound(b) for b in args.bound)
    if args.group:
        groups = {}
        for text in args.group:
            name, spec = _parse_group(text)
            if name in groups:
                raise SettingsError(f"--group: the group name {name!r} is used twice")
            groups[name] = spec
        params["groups"] = groups
    return params


def run(args) -> int:
    from estimators import estimate
    from optimise import make_rule
    params = rule_params(args)
    est_params = estimator_params(args)
    history = load_history_from(args)
    assets = tuple(history.assets)
    rule = make_rule(args.rule, args.rule, params, assets)   # settings checked before estimating
    m = estimate(history.returns, mean=args.mean, covariance=args.covariance, params=est_params)
    alloc = rule.weights(m.mean, m.covariance)
    doc = summarise(rule, alloc, m.mean, m.covariance, history.periods_per_year)
    doc.update({
        "mean_estimator": m.mean_name, "covariance_estimator": m.covariance_name,
        "periods": history.n_periods, "frequency": history.frequency,
        "source": history.source, "sha256": history.sha256, "units": "per period",
    })
    if args.json:
        json.dump(doc, sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        sys.stdout.write(format_table(doc, history.periods_per_year))
    return 0


def _num(x):
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def summarise(rule, alloc, mean, cov, periods_per_year: int) -> dict:
    """Weights, cash and the in-sample figures of an allocation as a JSON-ready dict."""
    w = alloc.weights
    rf = rule.risk_free
    ret = float(w @ mean + alloc.cash * rf)
    vol = math.sqrt(max(float(w @ cov @ w), 0.0))
    sharpe = (ret - rf) / vol if vol > 0 else None
    return {
        "rule": rule.type,
        "params": {k: v for k, v in rule.params.items()},
        "assets": list(rule.assets),
        "weights": {a: float(x) for a, x in zip(rule.assets, w)},
        "cash": float(alloc.cash),
        "expected_return": ret,
        "volatility": vol,
        "sharpe": _num(sharpe),
        "risk_free": rf,
        "expected_return_annualised": ret * periods_per_year,
        "volatility_annualised": vol * math.sqrt(periods_per_year),
        "sharpe_annualised": None if sharpe is None else _num(sharpe * math.sqrt(periods_per_year)),
        "kkt_residual": _num(alloc.kkt) if rule.type not in (
            "equal-weight", "inverse-volatility", "fixed") else None,
        "implied_risk_aversion": _num(alloc.implied_risk_aversion),
    }


def format_table(doc: dict, ppy: int) -> str:
    assets = doc["assets"]
    width = max(8, max(len(a) for a in assets))
    lines = [f"rule: {doc['rule']}" + (f"  {json.dumps(doc['params'])}" if doc["params"] else ""),
             f"estimates: mean {doc['mean_estimator']}, covariance {doc['covariance_estimator']}, "
             f"{doc['periods']} {doc['frequency']} periods from {doc['source']}",
             "", f"{'asset':<{width}}  {'weight':>8}"]
    for a in assets:
        lines.append(f"{a:<{width}}  {100 * doc['weights'][a]:7.2f}%")
    if doc["cash"] != 0.0 or doc["params"].get("budget") == "cash":
        lines.append(f"{'cash':<{width}}  {100 * doc['cash']:7.2f}%")
    sr = doc["sharpe"]
    lines += [
        "",
        f"expected return  {100 * doc['expected_return']:.3f}% per period "
        f"({100 * doc['expected_return_annualised']:.2f}% a year)",
        f"volatility       {100 * doc['volatility']:.3f}% per period "
        f"({100 * doc['volatility_annualised']:.2f}% a year)",
        "Sharpe ratio     " + ("n/a (zero volatility)" if sr is None else
                               f"{sr:.3f} per period ({doc['sharpe_annualised']:.3f} a year, "
                               f"x sqrt({ppy}))"),
        "",
        "In-sample figures under the estimated inputs; hypothetical, decision support, not "
        "investment advice.",
    ]
    return "\n".join(lines) + "\n"
