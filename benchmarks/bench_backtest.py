"""Benchmark: the rolling backtest at the issue's size, against a window-by-window baseline.

Workload: 600 months x 25 assets of an invented market (normal returns from Recipe A of
REFERENCES.md section 0, fixed seed), 120-month rolling windows rebalanced monthly
(480 rebalances), 10 rule/estimator configurations plus 1/N, 10 bps costs, the
Ledoit-Wolf bootstrap at 1000 resamples for every rule.

Engine: estimators.estimate_batch over stacked windows, Rule.weights_batch, numba
kernels for the holdings and the bootstrap. Baseline (same run, same inputs): one
estimators.estimate and one Rule.weights call per window, and the bootstrap statistics
on numpy index arrays instead of the numba kernel. The script checks that both give the
same weights and p-values before printing times.

Run: ``python -m benchmarks backtest`` (``--quick`` for 200 resamples, one repeat).
"""
from __future__ import annotations

import argparse
import os
import platform
import time

import numpy as np

from benchmarks._machine import cpu_name


def _single_thread():
    try:
        from threadpoolctl import threadpool_limits
        return threadpool_limits(1)
    except ImportError:  # pragma: no cover
        return None


def _cpu() -> str:
    return cpu_name()


def market(T=600, N=25, seed=20261202):
    """Invented market: Recipe A moments (REFERENCES.md 0), iid normal, risk-free 0.3 %."""
    i = np.arange(N)
    vol = 0.04 + 0.004 * i
    corr = 0.5 ** np.abs(i[:, None] - i[None, :])
    mu = 0.005 + 0.0005 * i
    cov = corr * np.outer(vol, vol)
    rng = np.random.default_rng(seed)
    X = rng.multivariate_normal(mu, cov, size=T)
    dates = np.arange("1976-01", "2100-01", dtype="datetime64[M]")[:T]
    return X, dates, tuple(f"asset{j:02d}" for j in range(N))


def configs(assets):
    from backtest import BacktestConfig
    from optimise import make_rule

    spec = [
        ("mv-sample", "mean-variance", {"risk_aversion": 5.0}, "sample", "sample"),
        ("mv-lw", "mean-variance", {"risk_aversion": 5.0}, "sample", "ledoit-wolf-identity"),
        ("mv-bayes-stein-lw", "mean-variance", {"risk_aversion": 5.0}, "bayes-stein",
         "ledoit-wolf-identity"),
        ("minvar-sample", "min-variance", {}, "sample", "sample"),
        ("minvar-lw", "min-variance", {}, "sample", "ledoit-wolf-identity"),
        ("minvar-lw-cc", "min-variance", {}, "sample", "ledoit-wolf-constant-correlation"),
        ("maxsharpe-sample", "max-sharpe", {}, "sample", "sample"),
        ("maxsharpe-lw", "max-sharpe", {}, "sample", "ledoit-wolf-identity"),
        ("erc-sample", "equal-risk-contribution", {}, "sample", "sample"),
        ("erc-lw", "equal-risk-contribution", {}, "sample", "ledoit-wolf-identity"),
    ]
    return [BacktestConfig(make_rule(n, t, p, assets), m, c, {}) for n, t, p, m, c in spec]




def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="bench_backtest")
    ap.add_argument("--quick", action="store_true", help="200 resamples, one repeat")
    ap.add_argument("--repeats", type=int, default=2)
    args = ap.parse_args(argv)
    limiter = _single_thread()  # noqa: F841  (one core, as the issue's target says)

    from backtest import engine
    from backtest import _kernels
    from backtest.result import _child

    resamples = 200 if args.quick else 1000
    repeats = 1 if args.quick else max(1, args.repeats)
    X, dates, assets = market()
    cfgs = configs(assets)
    kw = dict(window=120, rebalance_every=1, cost_bps=10.0, risk_aversion=5.0,
              periods_per_year=12, bootstrap_resamples=resamples, seed=7,
              risk_free=0.003)

    # warm-up (numba loads its on-disk cache; the optimiser compiles its kernels)
    t = time.perf_counter()
    engine.run_backtest(X[:200], dates[:200], assets, cfgs[:1] + cfgs[3:4] + cfgs[6:7]
                        + cfgs[8:9], **{**kw, "bootstrap_resamples": 20})
    warm = time.perf_counter() - t

    best = None
    for _ in range(repeats):
        res = engine.run_backtest(X, dates, assets, cfgs, **kw)
        if best is None or res.timings["total"] < best.timings["total"]:
            best = res
    eng = best.timings

    # baseline: window by window, numpy bootstrap
    t = time.perf_counter()
    inp = engine._run_backtest_iv(X, dates, assets, cfgs, expanding=False, n_trials=None,
                                  bootstrap_block_length=None, rolling_sharpe_window=None,
                                  on_rule_error="raise", **kw)
    base_res = engine._execute(inp, batched=False)
    base = dict(base_res.timings)
    # replace the statistics stage's bootstrap with the numpy version, timed on its own
    P = best.returns.shape[0]
    b = best.settings["bootstrap_block_length"]
    t_np = 0.0
    t_nb = 0.0
    worst = 0.0
    for k in range(1, len(best.names)):
        x, y = best.returns[:, k], best.returns[:, 0]
        starts = _child(inp.seed_sequence, k - 1).integers(
            0, P, size=(resamples, -(-P // b)), dtype=np.int64)
        d0, se0 = _kernels.circular_block_psi(x, y, b)
        t1 = time.perf_counter()
        d, se = _kernels.block_bootstrap_stats_numpy(x, y, starts, b)
        stat_np = np.abs(d - d0) / se
        t_np += time.perf_counter() - t1
        t1 = time.perf_counter()
        stat_nb = _kernels.block_bootstrap_sharpe(x, y, starts, b, d0)
        t_nb += time.perf_counter() - t1
        worst = max(worst, float(np.max(np.abs(stat_np - stat_nb) / np.abs(stat_nb))))
        p_np = (1 + np.sum(~(stat_np < abs(d0) / se0))) / (resamples + 1)
        assert p_np == best.measures[best.names[k]].lw.p_value, "bootstrap p-values differ"
    dw = max(float(np.max(np.abs(a - c))) for a, c in zip(best.targets, base_res.targets))
    assert dw < 1e-6, f"batched and per-window weights differ by {dw:.2e}"

    eng_stats_other = eng["statistics"] - t_nb
    rows = [
        (f"estimation ({len({(c.mean, c.covariance) for c in cfgs})} distinct estimator pairs "
         f"x 480 windows)", eng["estimation"],
         base["estimation"]),
        ("optimisation (10 rules x 480 windows)", eng["optimisation"], base["optimisation"]),
        ("holdings: drift, turnover, costs (11 series)", eng["simulation"], base["simulation"]),
        (f"bootstrap ({resamples} resamples x 10 rules)", t_nb, t_np),
        ("other statistics (measures, JKM, CEQ, PSR, DSR)", eng_stats_other, eng_stats_other),
    ]
    tot_e = sum(r[1] for r in rows)
    tot_b = sum(r[2] for r in rows)
    print(f"machine: {_cpu()}, {os.cpu_count()} cores, {platform.python_version()}, "
          f"load {os.getloadavg()[0]:.2f} {os.getloadavg()[1]:.2f} {os.getloadavg()[2]:.2f}")
    print(f"workload: T=600, N=25, window 120, monthly rebalance, 10 configs + 1/N, "
          f"10 bps, bootstrap {resamples}, block {b}; warm-up {warm:.2f} s; "
          f"best of {repeats}")
    print(f"{'stage':58s} {'engine s':>9s} {'baseline s':>11s} {'ratio':>7s}")
    for name, e, bb in rows:
        print(f"{name:58s} {e:9.3f} {bb:11.3f} {bb / e if e > 0 else float('nan'):7.1f}")
    print(f"{'total':58s} {tot_e:9.3f} {tot_b:11.3f} {tot_b / tot_e:7.1f}")
    print(f"run_backtest wall time (engine, incl. validation): {eng['total']:.3f} s "
          f"(target < 10 s on one core)")
    print(f"checks: max |weights batched - per window| = {dw:.1e}; bootstrap statistic max "
          f"rel. diff numpy vs kernel = {worst:.1e}; p-values identical")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
