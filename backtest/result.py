"""The backtest's result: per-rule series, measures and tests against 1/N.

Units: every figure is per period (decimal) unless its name ends in ``_annualised``.
Annualised copies follow the common practice for iid returns: mean, CEQ and cost drag
times P (periods per year), volatility and Sharpe ratio times sqrt(P), turnover times
the rebalances per year.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np
import pandas as pd

from . import stats as _stats

__all__ = ["BacktestResult", "SeriesMeasures", "drawdown_path", "rolling_sharpe"]


# --------------------------------------------------------------------------- helpers

def drawdown_path(growth_factors: np.ndarray):
    """Wealth, drawdown and the maximum drawdown of a path of gross returns.

    Parameters
    ----------
    growth_factors : ndarray, shape (P,)
        ``1 + net total return`` of each period. Wealth starts at 1 before the first
        period and is absorbed at 0 once a factor is <= 0 (wealth wiped out).

    Returns
    -------
    wealth : ndarray (P,)
        Wealth at each period end.
    drawdown : ndarray (P,)
        ``wealth / running peak - 1`` (<= 0); the starting wealth counts as a peak.
    max_dd : float
        Largest loss from a peak, as a positive fraction.
    peak, trough, recovery : int
        Period indices of the peak (-1 = the start), the trough, and the first
        period end at or above the peak's wealth after the trough (-1 = none).
    ruined_at : int
        First period whose factor is <= 0, or -1.
    """
    g = np.asarray(growth_factors, dtype=np.float64)
    P = g.shape[0]
    ruin = np.flatnonzero(g <= 0)
    ruined_at = int(ruin[0]) if ruin.size else -1
    gg = g.copy()
    if ruined_at >= 0:
        gg[ruined_at:] = 0.0
    wealth = np.cumprod(gg)
    peaks = np.maximum.accumulate(np.concatenate(([1.0], wealth)))[1:]
    dd = wealth / peaks - 1.0
    if P == 0:
        return wealth, dd, 0.0, -1, -1, -1, ruined_at
    trough = int(np.argmin(dd))
    max_dd = float(-dd[trough])
    if max_dd <= 0:
        return wealth, dd, 0.0, -1, -1, -1, ruined_at
    level = peaks[trough]
    before = np.concatenate(([1.0], wealth[:trough + 1]))
    peak = int(np.flatnonzero(before >= level)[-1]) - 1  # before[0] is the start
    after = np.flatnonzero(wealth[trough + 1:] >= level)
    recovery = int(trough + 1 + after[0]) if after.size else -1
    return wealth, dd, max_dd, peak, trough, recovery, ruined_at


def rolling_sharpe(x: np.ndarray, window: int) -> np.ndarray:
    """Sharpe ratio (mean / sd, divisor n - 1) over each trailing ``window`` periods; NaN
    before the first full window and where the sd is zero. Shape (P,)."""
    x = np.asarray(x, dtype=np.float64)
    out = np.full(x.shape[0], np.nan)
    if x.shape[0] < window:
        return out
    v = np.lib.stride_tricks.sliding_window_view(x, window)
    m = v.mean(axis=1)
    s = v.std(axis=1, ddof=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        out[window - 1:] = np.where(s > 0, m / s, np.nan)
    return out


def _num(v):
    """JSON-safe float: NaN and +-inf become None."""
    if v is None:
        return None
    v = float(v)
    return v if math.isfinite(v) else None


def _date(idx, i):
    """ISO date of ``idx[i]`` (a plain string for non-date labels)."""
    d = idx[i]
    if isinstance(d, pd.Timestamp):
        return d.date().isoformat() if d == d.normalize() else d.isoformat()
    return str(d)


# --------------------------------------------------------------------------- results

@dataclass(frozen=True)
class SeriesMeasures:
    """Measures and tests of one rule's out-of-sample series (per period unless annualised).

    Sharpe-ratio tests compare the rule with 1/N (rule minus 1/N); they are None for
    1/N itself.
    """

    name: str
    mean: float
    volatility: float
    sharpe: float
    ceq: float
    skewness: float
    kurtosis: float
    sharpe_se: float
    sharpe_se_nonnormal: float
    psr: float
    psr_vs_equal_weight: float
    dsr: float
    min_track_record: float
    turnover: float
    cost_drag: float
    cost_total: float
    max_drawdown: float
    max_drawdown_peak: Any
    max_drawdown_trough: Any
    max_drawdown_recovery: Any
    total_return: float
    wealth_wiped_out: Any
    hit_rate: Any
    jkm: Any
    lw: Any
    ceq_test: Any
    fallback_dates: tuple
    policy_jkm: Any = None
    policy_lw: Any = None
    policy_ceq_test: Any = None
    tracking_error_vs_policy: Any = None
    hit_rate_vs_policy: Any = None
    psr_vs_policy: Any = None


@dataclass(frozen=True)
class BacktestResult:
    """Out-of-sample results of several rules and 1/N on the same windows.

    Attributes
    ----------
    names : tuple of str
        Series names; ``names[0]`` is ``"equal-weight"`` (1/N).
    dates : pandas.Index, shape (P,)
        Period-end dates of the out-of-sample rows.
    rebalance_dates : pandas.Index, shape (R,)
        Rebalancing (trade) dates: the period end of the last row each window holds;
        each target is held from the next row on.
    returns, gross_returns : ndarray, shape (P, K)
        Excess returns after and before costs.
    risk_free : ndarray, shape (P,)
    wealth, drawdown, rolling_sharpe : ndarray, shape (P, K)
        Growth of 1 from net total returns, its drawdown, the rolling Sharpe ratio.
    targets : ndarray, shape (K, R, N)
        Target risky weights at each rebalancing date (cash = 1 - sum).
    turnover, costs : ndarray, shape (K, R)
        Traded weight and cost paid at each rebalancing date (NaN / 0 at the first).
    measures : dict name -> SeriesMeasures
    settings : dict
        What produced the result (JSON-safe).
    timings : dict
        Seconds spent in estimation, optimisation, simulation and statistics.
    """

    names: tuple
    assets: tuple
    dates: pd.Index
    rebalance_dates: pd.Index
    returns: np.ndarray
    gross_returns: np.ndarray
    risk_free: np.ndarray
    wealth: np.ndarray
    drawdown: np.ndarray
    rolling_sharpe: np.ndarray
    targets: np.ndarray
    turnover: np.ndarray
    costs: np.ndarray
    measures: Mapping[str, SeriesMeasures]
    settings: Mapping[str, Any]
    timings: dict = field(default_factory=dict, compare=False)

    # ------------------------------------------------------------------ summary
    def settings_summary(self) -> dict:
        """The backtest's settings and span, for ``summary.json`` ``backtest``."""
        return dict(self.settings)

    def to_summary(self) -> dict:
        """``{rule_name: {...}}`` of JSON-safe numbers (None where undefined), per period
        unless the key ends in ``_annualised``; see README for every field."""
        P = float(self.settings["periods_per_year"])
        k = int(self.settings["rebalance_every"])
        out = {}
        for name in self.names:
            m = self.measures[name]
            d = {
                "periods": int(self.returns.shape[0]),
                "first_date": self.settings["first_date"],
                "last_date": self.settings["last_date"],
                "rebalances": int(self.rebalance_dates.shape[0]),
                "mean": _num(m.mean),
                "volatility": _num(m.volatility),
                "sharpe": _num(m.sharpe),
                "ceq": _num(m.ceq),
                "mean_annualised": _num(m.mean * P),
                "volatility_annualised": _num(m.volatility * math.sqrt(P)),
                "sharpe_annualised": _num(m.sharpe * math.sqrt(P)),
                "ceq_annualised": _num(m.ceq * P),
                "skewness": _num(m.skewness),
                "kurtosis": _num(m.kurtosis),
                "sharpe_se": _num(m.sharpe_se),
                "sharpe_se_nonnormal": _num(m.sharpe_se_nonnormal),
                "psr": _num(m.psr),
                "psr_vs_equal_weight": _num(m.psr_vs_equal_weight),
                "dsr": _num(m.dsr),
                "dsr_benchmark_sharpe": _num(self.settings["dsr_benchmark_sharpe"]),
                "min_track_record": _num(m.min_track_record),
                "min_track_record_years": _num(m.min_track_record / P),
                "turnover": _num(m.turnover),
                "turnover_annualised": _num(m.turnover * P / k),
                "cost_drag": _num(m.cost_drag),
                "cost_drag_annualised": _num(m.cost_drag * P),
                "cost_total": _num(m.cost_total),
                "max_drawdown": _num(m.max_drawdown),
                "max_drawdown_peak": m.max_drawdown_peak,
                "max_drawdown_trough": m.max_drawdown_trough,
                "max_drawdown_recovery": m.max_drawdown_recovery,
                "total_return": _num(m.total_return),
                "wealth_wiped_out": m.wealth_wiped_out,
                "hit_rate": _num(m.hit_rate),
                "sharpe_diff": _num(m.jkm.difference) if m.jkm else None,
                "sharpe_diff_z_jkm": _num(m.jkm.statistic) if m.jkm else None,
                "sharpe_diff_p_jkm": _num(m.jkm.p_value) if m.jkm else None,
                "sharpe_diff_p_lw": _num(m.lw.p_value) if m.lw else None,
                "ceq_diff": _num(m.ceq_test.difference) if m.ceq_test else None,
                "ceq_diff_z": _num(m.ceq_test.statistic) if m.ceq_test else None,
                "ceq_diff_p": _num(m.ceq_test.p_value) if m.ceq_test else None,
                "fallback_dates": list(m.fallback_dates),
            }
            pol = self.settings.get("policy")
            if pol is not None:
                te = m.tracking_error_vs_policy
                d.update({
                    "sharpe_diff_policy": _num(m.policy_jkm.difference) if m.policy_jkm else None,
                    "sharpe_diff_policy_z_jkm": (_num(m.policy_jkm.statistic) if m.policy_jkm
                                                 else None),
                    "sharpe_diff_policy_p_jkm": (_num(m.policy_jkm.p_value) if m.policy_jkm
                                                 else None),
                    "sharpe_diff_policy_p_lw": _num(m.policy_lw.p_value) if m.policy_lw else None,
                    "ceq_diff_policy": (_num(m.policy_ceq_test.difference) if m.policy_ceq_test
                                        else None),
                    "ceq_diff_policy_z": (_num(m.policy_ceq_test.statistic)
                                          if m.policy_ceq_test else None),
                    "ceq_diff_policy_p": (_num(m.policy_ceq_test.p_value) if m.policy_ceq_test
                                          else None),
                    "hit_rate_vs_policy": _num(m.hit_rate_vs_policy),
                    "psr_vs_policy": _num(m.psr_vs_policy),
                    "tracking_error_vs_policy": _num(te),
                    "tracking_error_vs_policy_annualised": (None if te is None
                                                            else _num(te * math.sqrt(P))),
                })
            out[name] = d
        return out

    # ------------------------------------------------------------------ tables
    def tables(self) -> dict:
        """DataFrames for ``RUN/tables/<name>.csv``; dates are the index (named ``date``)."""
        idx = pd.Index(self.dates, name="date")
        cols = list(self.names)
        t = {
            "backtest_returns": pd.DataFrame(self.returns, index=idx, columns=cols),
            "backtest_returns_gross": pd.DataFrame(self.gross_returns, index=idx, columns=cols),
            "backtest_cumulative": pd.DataFrame(self.wealth, index=idx, columns=cols),
            "backtest_rolling_sharpe": pd.DataFrame(self.rolling_sharpe, index=idx, columns=cols),
            "backtest_drawdown": pd.DataFrame(self.drawdown, index=idx, columns=cols),
        }
        ridx = pd.Index(self.rebalance_dates, name="date")
        t["backtest_turnover"] = pd.DataFrame(self.turnover.T, index=ridx, columns=cols).iloc[1:]
        t["backtest_costs"] = pd.DataFrame(self.costs.T, index=ridx, columns=cols).iloc[1:]
        K, R, N = self.targets.shape
        w = pd.DataFrame(self.targets.reshape(K * R, N), columns=list(self.assets))
        w.insert(0, "rule", np.repeat(cols, R))
        w.insert(0, "date", np.tile(np.asarray(self.rebalance_dates), K))
        w["cash"] = 1.0 - self.targets.reshape(K * R, N).sum(axis=1)
        t["backtest_weights"] = w.set_index("date")
        summ = self.to_summary()
        keys = ["sharpe", "sharpe_se", "sharpe_diff", "sharpe_diff_z_jkm", "sharpe_diff_p_jkm",
                "sharpe_diff_p_lw", "ceq", "ceq_diff", "ceq_diff_z", "ceq_diff_p", "psr",
                "psr_vs_equal_weight", "dsr", "min_track_record"]
        if self.settings.get("policy") is not None:
            keys += ["sharpe_diff_policy", "sharpe_diff_policy_p_jkm", "sharpe_diff_policy_p_lw",
                     "ceq_diff_policy", "ceq_diff_policy_p", "tracking_error_vs_policy",
                     "tracking_error_vs_policy_annualised"]
        t["backtest_tests"] = pd.DataFrame(
            [[summ[n][k] for k in keys] for n in cols], index=pd.Index(cols, name="rule"),
            columns=keys, dtype=float)
        mkeys = ["periods", "mean", "volatility", "sharpe", "ceq", "mean_annualised",
                 "volatility_annualised", "sharpe_annualised", "ceq_annualised", "turnover",
                 "cost_drag", "cost_total", "max_drawdown", "total_return", "hit_rate"]
        t["backtest_measures"] = pd.DataFrame(
            [[summ[n][k] for k in mkeys] for n in cols], index=pd.Index(cols, name="rule"),
            columns=mkeys, dtype=float)
        return t


# --------------------------------------------------------------------------- assembly

def _child(ss: np.random.SeedSequence, j: int) -> np.random.Generator:
    """The j-th child of ``ss`` as ``ss.spawn`` would make it first, without mutating ``ss``."""
    child = np.random.SeedSequence(ss.entropy, spawn_key=tuple(ss.spawn_key) + (j,),
                                   pool_size=ss.pool_size)
    return np.random.default_rng(child)


def _policy_tests(inp, x, net, pol, k, pol_ss, P, pieces) -> dict:
    """Tests of series ``k`` (net excess returns ``x``) against the policy's series.

    The same tests as against 1/N (Jobson-Korkie-Memmel, Ledoit-Wolf bootstrap, CEQ
    difference) and the realised tracking error: the sd (divisor P - 1) of the
    per-period return differences. The policy itself gets tracking error 0 and no tests.
    """
    if pol is None:
        return {}
    y = net[:, pol]
    diff = x - y
    te = float(np.std(diff, ddof=1)) if diff.size > 1 else float("nan")
    if k == pol:
        return {"tracking_error_vs_policy": 0.0}
    _, _, skew, kurt, sr = pieces[k]
    sr_pol = pieces[pol][4]
    out = {"policy_jkm": _stats._jkm(x, y), "policy_ceq_test": _stats._ceq(x, y, inp.risk_aversion),
           "tracking_error_vs_policy": te, "hit_rate_vs_policy": float(np.mean(x > y)),
           "psr_vs_policy": (_stats.probabilistic_sharpe(sr, P, skew, kurt, sr_pol)
                             if np.isfinite(sr_pol) else float("nan"))}
    if inp.resamples > 0:
        rng = _child(pol_ss, k)
        starts = rng.integers(0, P, size=(inp.resamples, -(-P // inp.block_length)),
                              dtype=np.int64)
        out["policy_lw"] = _stats._lw(x, y, starts, inp.block_length)
    return out


def build_result(inp, names, rows, targets, paths, fallbacks, timings) -> BacktestResult:
    """Measures and tests for every series (called by :func:`backtest.run_backtest`)."""
    T = inp.excess.shape[0]
    start = inp.window
    dates = inp.dates[start:]
    rdates = inp.dates[rows - 1]  # trade date: the end of the last period the rule saw
    rf = inp.risk_free[start:]
    K = len(names)
    P = T - start
    gross = np.column_stack([p[0] for p in paths])
    net = np.column_stack([p[1] for p in paths])
    turnover = np.vstack([p[2] for p in paths])
    costs = np.vstack([p[3] for p in paths])
    wealth = np.empty((P, K))
    dd = np.empty((P, K))
    roll = np.empty((P, K))
    base = net[:, 0]
    sharpes = []
    pieces = []
    for k in range(K):
        x = net[:, k]
        mean, sd, skew, kurt = _stats.moments_of(x)
        sr = mean / sd if sd > 0 else float("nan")
        sharpes.append(sr)
        pieces.append((mean, sd, skew, kurt, sr))
    finite = np.array([s for s in sharpes if np.isfinite(s)])
    trial_var = float(np.var(finite, ddof=1)) if finite.size > 1 else 0.0
    measures = {}
    pol = None if inp.policy is None else list(names).index(inp.policy)
    # the policy comparisons' bootstrap draws come from their own branch of the seed, so
    # naming a policy leaves every p-value against 1/N unchanged
    pol_ss = np.random.SeedSequence(inp.seed_sequence.entropy,
                                    spawn_key=tuple(inp.seed_sequence.spawn_key) + (2 ** 31,),
                                    pool_size=inp.seed_sequence.pool_size)
    for k, name in enumerate(names):
        x = net[:, k]
        mean, sd, skew, kurt, sr = pieces[k]
        w, d, mdd, pk, tr, rec, ruin = drawdown_path(1.0 + x + rf)
        wealth[:, k] = w
        dd[:, k] = d
        roll[:, k] = rolling_sharpe(x, inp.rolling_window)
        tv = turnover[k, 1:]
        if k == 0:
            jkm = lw = ceq = None
            hit = None
        else:
            jkm = _stats._jkm(x, base)
            ceq = _stats._ceq(x, base, inp.risk_aversion)
            hit = float(np.mean(x > base))
            if inp.resamples > 0:
                rng = _child(inp.seed_sequence, k - 1)
                starts = rng.integers(0, P, size=(inp.resamples, -(-P // inp.block_length)),
                                      dtype=np.int64)
                lw = _stats._lw(x, base, starts, inp.block_length)
            else:
                lw = None
        measures[name] = SeriesMeasures(
            name=name, mean=mean, volatility=sd, sharpe=sr,
            ceq=mean - 0.5 * inp.risk_aversion * sd * sd,
            skewness=skew, kurtosis=kurt,
            sharpe_se=_stats.lo_standard_error(sr, P) if np.isfinite(sr) else float("nan"),
            sharpe_se_nonnormal=(_stats.sharpe_standard_error(sr, P, skew, kurt)
                                 if np.isfinite(sr) else float("nan")),
            psr=_stats.probabilistic_sharpe(sr, P, skew, kurt, 0.0),
            psr_vs_equal_weight=(_stats.probabilistic_sharpe(sr, P, skew, kurt, sharpes[0])
                                 if k > 0 and np.isfinite(sharpes[0]) else float("nan")),
            dsr=(_stats.deflated_sharpe(sr, P, skew, kurt, trial_var, inp.n_trials)
                 if (finite.size > 1 or inp.n_trials == 1) else float("nan")),
            min_track_record=_stats.min_track_record(sr, skew, kurt, 0.0, 0.95),
            turnover=float(np.mean(tv)) if tv.size else float("nan"),
            cost_drag=float(np.mean(gross[:, k] - x)),
            cost_total=float(np.sum(costs[k])),
            max_drawdown=mdd,
            max_drawdown_peak=(_date(inp.dates, start - 1) if pk == -1 and mdd > 0
                               else (_date(dates, pk) if mdd > 0 else None)),
            max_drawdown_trough=_date(dates, tr) if mdd > 0 else None,
            max_drawdown_recovery=_date(dates, rec) if (mdd > 0 and rec >= 0) else None,
            total_return=float(w[-1] - 1.0),
            wealth_wiped_out=_date(dates, ruin) if ruin >= 0 else None,
            hit_rate=hit, jkm=jkm, lw=lw, ceq_test=ceq,
            fallback_dates=tuple(_date(inp.dates, r) for r in fallbacks.get(name, ())),
            **_policy_tests(inp, x, net, pol, k, pol_ss, P, pieces),
        )
    ss = inp.seed_sequence
    settings = {
        "window": inp.window,
        "expanding": inp.expanding,
        "rebalance_every": inp.rebalance_every,
        "cost_bps": (inp.cost_bps if isinstance(inp.cost_bps, float)
                     else dict(zip(inp.assets, inp.cost_bps))),
        "cost_convention": "cost_bps/1e4 x sum|target - drifted| paid from wealth at the start "
                           "of the period: net = (1 - cost)(1 + R_p) - 1; first allocation free",
        "risk_aversion": inp.risk_aversion,
        "periods_per_year": inp.periods_per_year,
        "bootstrap_resamples": inp.resamples,
        "bootstrap_block_length": inp.block_length,
        "bootstrap_block_length_rule": inp.block_length_rule,
        "rolling_sharpe_window": inp.rolling_window,
        "n_trials": inp.n_trials,
        "dsr_trial_variance": trial_var if finite.size > 1 else None,
        "dsr_benchmark_sharpe": (_stats.expected_max_sharpe(trial_var, inp.n_trials)
                                 if (finite.size > 1 or inp.n_trials == 1) else None),
        "on_rule_error": inp.on_rule_error,
        "risk_free": "given" if inp.risk_free_given else "zero",
        "seed_entropy": str(ss.entropy),
        "seed_spawn_key": list(ss.spawn_key),
        "periods": P,
        "rebalances": int(rows.shape[0]),
        "first_date": _date(inp.dates, start),
        "last_date": _date(inp.dates, T - 1),
        "rules": list(names),
        "benchmark": names[0],
        "policy": inp.policy,
    }
    return BacktestResult(
        names=tuple(names), assets=inp.assets, dates=dates, rebalance_dates=rdates,
        returns=net, gross_returns=gross, risk_free=rf, wealth=wealth, drawdown=dd,
        rolling_sharpe=roll, targets=np.stack(targets), turnover=turnover, costs=costs,
        measures=measures, settings=settings, timings=timings)
