"""Write hand-made run folders for the pack's tests (no engine needed).

The numbers are invented (a made-up market of twelve asset classes) but internally
consistent in shape and units: per-period decimal figures, monthly data, and the field
names of .work/CONTRACTS.md and of the producers' ``to_summary``/``tables`` (simulate,
backtest). ``make(folder, backtest=False)`` writes the failing-section case kept in
``tests/data/reports/run_backtest_skipped/`` (the backtest was skipped because the history
is too short); ``backtest=True`` adds a backtest with its series. Regenerate with::

    .venv/bin/python tests/data/reports/make_fixture.py
"""
from __future__ import annotations

import hashlib
import json
import math
import shutil
from pathlib import Path

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
ASSETS = ["Core Equity", "Global Equity", "Frontier Equity", "Small Cap", "Short Bonds",
          "Long Bonds", "Credit", "High Yield", "Real Estate", "Infrastructure",
          "Commodities", "Cash Plus"]
PPY = 12
GAMMA = 5.0

STUDY_TEXT = """name = "Harbourview trustees, fixture"
risk_aversion = 5

[data]
path = "history.csv"
kind = "returns"

[estimate]
mean = "sample"
covariance = "ledoit-wolf-constant-correlation"

[[rules]]
name = "proposed"
type = "mean-variance"
risk_aversion = 5

[[rules]]
name = "min-var"
type = "min-variance"

[resample]
generator = "normal"
draws = 400
length = 60
seed = 7

[backtest]
window = 120

[verdict]
max_band_width = 0.3
"""


def _metrics(rng, mu, var):
    vol = math.sqrt(var)
    return {"expected_return": mu, "variance": var, "volatility": vol, "sharpe": mu / vol,
            "ceq": mu - GAMMA / 2 * var}


def make(folder: Path, *, backtest: bool) -> Path:
    rng = np.random.default_rng(11)
    folder = Path(folder)
    if folder.exists():
        shutil.rmtree(folder)
    (folder / "tables").mkdir(parents=True)
    n = len(ASSETS)
    ew_m = _metrics(rng, 0.0052, 0.0011)
    rules, quant_rows = {}, []
    plan = (("proposed", "mean-variance", rng.dirichlet(np.full(n, 0.4))),
            ("min-var", "min-variance", rng.dirichlet(np.full(n, 0.8))),
            ("equal-weight", "equal-weight", np.full(n, 1 / n)))
    for name, rtype, w in plan:
        weights = {}
        for a, wi in zip(ASSETS, w):
            if rtype == "equal-weight":
                p = np.full(5, 1 / n)
            else:
                s = 0.01 + 0.4 * wi * (0.5 + rng.random())
                p = np.clip(wi + s * np.array([-1.6, -0.7, 0.0, 0.7, 1.6]), 0.0, 1.0)
            weights[a] = {"mean": float(p.mean()), "sd": float(p[3] - p[1]), "p5": float(p[0]),
                          "p25": float(p[1]), "p50": float(p[2]), "p75": float(p[3]),
                          "p95": float(p[4]), "held": 1.0 if rtype == "equal-weight"
                          else float(np.clip(0.2 + 2 * wi, 0, 1)),
                          "min": float(p[0]), "max": float(p[4])}
        mu = ew_m["expected_return"] if rtype == "equal-weight" else 0.004 + 0.002 * rng.random()
        var = ew_m["variance"] if rtype == "equal-weight" else 0.0009 + 0.0006 * rng.random()
        m = _metrics(rng, mu, var)
        sd = {"expected_return": 0.0006, "variance": 0.0001, "volatility": 0.002, "sharpe": 0.02,
              "ceq": 0.0005}
        if rtype == "equal-weight":
            sd = {k: 0.0 for k in sd}
        pop = {}
        for k, v in m.items():
            pop[f"{k}_mean"] = v
            pop[f"{k}_sd"] = sd[k]
            pop[f"{k}_se"] = sd[k] / math.sqrt(400)
            for q in np.round(np.arange(1, 100) / 100.0, 2):
                from statistics import NormalDist
                quant_rows.append({"rule": name, "metric": k, "quantile": float(q),
                                   "value": v + sd[k] * NormalDist().inv_cdf(float(q))})
        is_ew = rtype == "equal-weight"
        pop["prob_beats_equal_weight_ceq"] = None if is_ew else round(0.3 + 0.5 * rng.random(), 4)
        pop["prob_beats_equal_weight_sharpe"] = None if is_ew else round(0.3 + 0.5 * rng.random(), 4)
        opt = _metrics(rng, 0.0058, 0.0009)
        pop["ceq_loss_vs_optimum"] = opt["ceq"] - m["ceq"]
        avg_w = {a: weights[a]["mean"] for a in ASSETS}
        rules[name] = {
            "type": rtype, "params": {"risk_aversion": 5} if rtype == "mean-variance" else {},
            "estimator": {"mean": "sample", "covariance": "ledoit-wolf-constant-correlation"},
            "in_sample_weights": dict(zip(ASSETS, map(float, w))), "in_sample_cash": 0.0,
            "weights": weights, "cash": {"mean": 0.0, "sd": 0.0},
            "resampled_allocation": {"weights": avg_w, "cash": 0.0, **_metrics(rng, mu * 0.98, var)},
            "population": pop,
            "optimum": {"weights": dict(zip(ASSETS, map(float, w))), "cash": 0.0, **opt},
        }
    k = 11
    t = np.linspace(0, 1, k)
    true_m, true_v = 0.003 + 0.006 * t, 0.025 + 0.035 * t ** 1.5
    frontiers = {"rule": "proposed", "points": k, "draws": 400, "broadie_violations": 0,
                 "true_expected_return": list(true_m), "true_volatility": list(true_v),
                 "estimated_expected_return": list(true_m * 1.25 + 0.0005),
                 "estimated_volatility": list(true_v * 0.93),
                 "actual_expected_return": list(true_m * 0.85), "actual_volatility": list(true_v * 1.04),
                 "averaged_expected_return": list(true_m * 0.9), "averaged_volatility": list(true_v * 1.01)}
    lengths = [36, 60, 120, 240, 480]
    sweep = {"draws": 200, "lengths": lengths, "years": [x / PPY for x in lengths], "rules": {
        "proposed": {"lengths": lengths, "prob_beats_equal_weight_ceq": [0.31, 0.42, 0.55, 0.71, 0.86],
                     "shortest_length_50": 120, "shortest_length_90": None},
        "min-var": {"lengths": lengths, "prob_beats_equal_weight_ceq": [0.2, 0.3, 0.5, 0.8, 0.95],
                    "shortest_length_50": 120, "shortest_length_90": 480},
        "equal-weight": {"note": "1/N is the comparison"}}}
    attribution = {}
    for name in ("proposed", "min-var"):
        o = rules[name]["optimum"]["ceq"]
        b = rules[name]["population"]["ceq_mean"]
        attribution[name] = {"ceq_optimum": o, "ceq_estimated_both": b,
                             "loss_estimated_both": o - b, "loss_from_mean_error": 0.8 * (o - b),
                             "loss_from_covariance_error": 0.15 * (o - b)}
    self_check = {"check": "expected utility of the plug-in cash-budget mean-variance rule",
                  "length": 60, "n_assets": n, "risk_aversion": GAMMA, "draws": 2000,
                  "expected_utility_closed_form": 0.001234567, "expected_utility_monte_carlo": 0.00125,
                  "monte_carlo_se": 0.00002, "standardised_difference": 0.7716, "within_3_se": True}
    summary = {
        "schema": 1,
        "study": {"name": "Harbourview trustees, fixture", "file": "study.toml",
                  "created": "2026-12-02T01:00:00+00:00"},
        "units": "per period", "periods_per_year": PPY,
        "data": {"source": "history.csv", "sha256": hashlib.sha256(b"fixture").hexdigest(),
                 "kind": "returns", "frequency": "monthly", "assets": ASSETS,
                 "first_date": "2019-01-31", "last_date": "2023-12-31", "periods": 60,
                 "excess": True, "risk_free": 0.002, "dropped_rows": 0, "missing_policy": "raise",
                 "assumptions": False},
        "estimate": {"mean": "sample", "covariance": "ledoit-wolf-constant-correlation",
                     "divisor": "T-1", "shrinkage": 0.3125, "mean_shrinkage": None},
        "risk_aversion": GAMMA, "risk_aversion_source": "study",
        "resample": {"generator": {"name": "normal"}, "draws": 400, "length": 60, "T": 60,
                     "seed": 7, "n_assets": n, "hold_threshold": 0.005, "equal_weight": ew_m},
        "backtest": {"skipped": "the history has 60 periods; the backtest needs more than the "
                                "120-period window"},
        "rules": rules, "frontiers": frontiers, "sweep": sweep, "attribution": attribution,
        "self_check": self_check,
        "verdict_settings": {"max_band_width": 0.3, "min_prob_beats_equal_weight": 0.5,
                             "significance": 0.05},
    }
    if backtest:
        _add_backtest(summary, folder, rng)
    (folder / "summary.json").write_text(json.dumps(summary, indent=2))
    manifest = {
        "versions": {"python": "3.11.2", "noiseproof": "0.1.0", "numpy": "2.4.6"},
        "platform": "Linux x86_64", "command": ["noiseproof", "study", "study.toml"],
        "study_text": STUDY_TEXT, "seed": 7, "data_sha256": summary["data"]["sha256"],
        "wall_time_seconds": 3.21,
    }
    (folder / "manifest.json").write_text(json.dumps(manifest, indent=2))
    pd.DataFrame(quant_rows).to_csv(folder / "tables" / "population_quantiles.csv", index=False)
    return folder


def _add_backtest(summary, folder, rng):
    names = ["equal-weight", "proposed", "min-var"]
    p = 96
    dates = pd.date_range("2016-01-31", periods=p, freq="ME").strftime("%Y-%m-%d")
    r = 0.005 + 0.04 * rng.standard_normal((p, 3))
    wealth = np.cumprod(1 + r, axis=0)
    dd = wealth / np.maximum.accumulate(wealth, axis=0) - 1
    roll = pd.DataFrame(r).rolling(36).apply(lambda x: x.mean() / x.std(ddof=1), raw=True).to_numpy()
    for name, arr in (("backtest_returns", r), ("backtest_cumulative", wealth),
                      ("backtest_drawdown", dd), ("backtest_rolling_sharpe", roll)):
        df = pd.DataFrame(arr, columns=names)
        df.insert(0, "date", dates)
        df.to_csv(folder / "tables" / f"{name}.csv", index=False)
    summary["backtest"] = {"window": 120, "expanding": False, "rebalance_every": 1, "cost_bps": 10.0,
                           "bootstrap_resamples": 200, "rolling_sharpe_window": 36, "n_trials": 3,
                           "periods": p, "first_date": dates[0], "last_date": dates[-1]}
    sh0 = r[:, 0].mean() / r[:, 0].std(ddof=1)
    for k, name in enumerate(names):
        x = r[:, k]
        m, s = float(x.mean()), float(x.std(ddof=1))
        d = {"periods": p, "first_date": dates[0], "mean": m, "volatility": s, "sharpe": m / s,
             "ceq": m - GAMMA / 2 * s * s, "psr": 0.81 - 0.1 * k, "dsr": 0.62 + 0.15 * k,
             "turnover": 0.02 + 0.1 * k, "cost_drag": 0.00002 * (1 + 5 * k),
             "max_drawdown": float(-dd[:, k].min()), "min_track_record": 80.0 + k}
        if k:
            d.update({"sharpe_diff": m / s - sh0, "sharpe_diff_p_jkm": 0.2 / k,
                      "sharpe_diff_p_lw": 0.00031 if k == 2 else 0.2468,
                      "ceq_diff": d["ceq"] - (r[:, 0].mean() - GAMMA / 2 * r[:, 0].var(ddof=1)),
                      "ceq_diff_p": 0.5 / k})
        summary["rules"][name]["backtest"] = d


if __name__ == "__main__":
    make(HERE / "run_backtest_skipped", backtest=False)
