"""Rolling (or expanding) out-of-sample backtest of portfolio rules against 1/N.

Timing convention (no look-ahead)
---------------------------------
Rows are periods; row t holds the returns earned over period t. With a window of M
rows, the first out-of-sample row is t = M. The rebalancing dates are the starts of
rows M, M + k, M + 2k, ... (k = ``rebalance_every``). At the rebalancing date that
starts row t the rule sees rows t - M .. t - 1 (rolling) or 0 .. t - 1 (expanding)
and nothing else; its target weights are held over rows t .. t + k - 1, drifting
with returns. A rebalancing date is labelled with the period-end date of row t - 1 (the
last date the rule saw, when the trade is made); out-of-sample returns are labelled with
the period-end date of the row that earned them.

Drift, turnover and costs (DeMiguel, Garlappi & Uppal 2009, RFS 22(5))
------------------------------------------------------------------------
Between rebalancing dates weight i moves as ``w_i (1 + R_i) / (1 + R_p)`` with R the
total returns (excess + risk-free) and ``R_p = sum w_i R_i + (1 - sum w_i) R_f``:
whatever the rule does not place in risky assets is cash earning the risk-free rate.
Turnover at a rebalancing date is ``sum_i |target_i - drifted_i|``; the first date
(the initial allocation) is not counted as a trade and pays no cost. Proportional
costs ``c_i = cost_bps_i / 10 000`` per unit of traded weight are paid out of wealth
at the start of the period: the period's net total return is
``(1 - sum_i c_i |trade_i|) (1 + R_p) - 1`` and its net excess return subtracts R_f.
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Any, Mapping, Optional, Sequence

import numpy as np
import pandas as pd

from estimators.core import (DataError, NoiseproofError, SettingsError,
                             SingularCovarianceError)

from . import _kernels
from .result import BacktestResult, build_result
from .stats import default_block_length

__all__ = ["BacktestConfig", "run_backtest", "EQUAL_WEIGHT", "ON_RULE_ERROR"]

#: Name of the 1/N benchmark that every backtest includes.
EQUAL_WEIGHT = "equal-weight"

#: Choices for what happens when a rule fails on a window.
ON_RULE_ERROR = ("raise", "keep-previous")

# Bytes of stacked windows estimated at once (memory only: results do not depend on it).
_CHUNK_BYTES = 64 * 2 ** 20


@dataclass(frozen=True)
class BacktestConfig:
    """One rule with the estimators that feed it on each window.

    Attributes
    ----------
    rule : optimise.Rule
        Any object with ``name``, ``type`` and ``weights(mean (N,), covariance (N, N))``
        returning an object with ``weights`` (N,) (an ``optimise.Allocation``);
        ``weights_batch(means (D, N), covariances (D, N, N)) -> (D, N)`` is used
        when present.
    mean, covariance : str
        Estimator names (``estimators.MEAN_ESTIMATORS`` / ``COVARIANCE_ESTIMATORS``);
        ``given`` is not allowed (every window is estimated).
    params : dict
        Estimator parameters passed to ``estimators.estimate``.
    """

    rule: Any
    mean: str = "sample"
    covariance: str = "sample"
    params: Mapping[str, Any] = field(default_factory=dict)

    @property
    def name(self) -> str:
        return str(self.rule.name)


@dataclass(frozen=True)
class _Inputs:
    excess: np.ndarray          # (T, N)
    risk_free: np.ndarray       # (T,)
    dates: pd.Index             # (T,)
    assets: tuple
    configs: tuple
    window: int
    expanding: bool
    rebalance_every: int
    cost_rate: np.ndarray       # (N,), bps / 1e4
    cost_bps: Any               # as given (float or per-asset tuple), for the record
    risk_aversion: float
    periods_per_year: float
    resamples: int
    block_length: int
    block_length_rule: str
    rolling_window: int
    seed_sequence: np.random.SeedSequence
    n_trials: int
    on_rule_error: str
    risk_free_given: bool
    policy: Optional[str] = None


# --------------------------------------------------------------------------- validation

def _int_iv(value, name, low, high=None) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise SettingsError(f"{name} must be an integer, not {value!r}")
    value = int(value)
    if value < low or (high is not None and value > high):
        rng = f">= {low}" if high is None else f"between {low} and {high}"
        raise SettingsError(f"{name} must be {rng}, not {value}")
    return value


def _run_backtest_iv(returns, dates, assets, configs, *, window, expanding, rebalance_every,
                     cost_bps, risk_aversion, periods_per_year, bootstrap_resamples,
                     bootstrap_block_length, rolling_sharpe_window, seed, risk_free, n_trials,
                     on_rule_error, policy=None) -> _Inputs:
    # returns
    if isinstance(returns, pd.DataFrame):
        cols = tuple(str(c) for c in returns.columns)
        arr = returns.to_numpy(dtype=np.float64)
    else:
        cols = None
        arr = np.asarray(returns, dtype=np.float64)
    if arr.ndim != 2 or arr.shape[0] < 1 or arr.shape[1] < 1:
        raise DataError(f"returns must be a (T, N) table with T, N >= 1, got shape {arr.shape}")
    T, N = arr.shape
    # assets
    if assets is None:
        if cols is None:
            raise SettingsError("assets are needed when returns is not a DataFrame")
        assets = cols
    assets = tuple(str(a) for a in assets)
    if len(assets) != N:
        raise DataError(f"{len(assets)} asset names for {N} return columns")
    if len(set(assets)) != N:
        dup = next(a for a in assets if assets.count(a) > 1)
        raise DataError(f"asset name '{dup}' appears twice")
    # dates
    if dates is None:
        if isinstance(returns, pd.DataFrame):
            dates = returns.index
        else:
            raise SettingsError("dates are needed (one per row of returns)")
    didx = pd.Index(dates)
    if didx.dtype.kind in "OSU":  # text labels: dates if they all parse, else kept as text
        try:
            didx = pd.DatetimeIndex(pd.to_datetime(didx))
        except (TypeError, ValueError):
            pass
    if len(didx) != T:
        raise DataError(f"{len(didx)} dates for {T} rows of returns")
    if didx.dtype.kind in "iufM" and T > 1:
        keys = didx.asi8 if isinstance(didx, pd.DatetimeIndex) else didx.to_numpy()
        if not np.all(np.diff(keys) > 0):
            bad = int(np.flatnonzero(np.diff(keys) <= 0)[0]) + 1
            raise DataError(f"dates must increase: row {bad} ({_label(didx[bad])}) is not "
                            f"after the row before it")
    bad = np.argwhere(~np.isfinite(arr))
    if bad.size:
        r, c = bad[0]
        raise DataError(f"returns: column '{assets[c]}', row {int(r)} ({_label(didx[r])}) is "
                        f"not a finite number")
    # risk-free
    if risk_free is None:
        rf = np.zeros(T)
    else:
        rf = np.asarray(risk_free, dtype=np.float64)
        if rf.ndim == 0:
            rf = np.full(T, float(rf))
        if rf.shape != (T,):
            raise DataError(f"risk_free must be a number or one value per row ({T}), "
                            f"got shape {rf.shape}")
        badrf = np.flatnonzero(~np.isfinite(rf))
        if badrf.size:
            raise DataError(f"risk_free: row {int(badrf[0])} ({_label(didx[badrf[0]])}) is not "
                            f"a finite number")
    # settings
    window = _int_iv(window, "backtest window", 2)
    if window > T - 3:
        raise SettingsError(f"backtest window ({window}) must leave at least 3 out-of-sample "
                            f"periods in the history ({T} rows)")
    rebalance_every = _int_iv(rebalance_every, "backtest rebalance_every", 1)
    P = T - window
    if not isinstance(expanding, (bool, np.bool_)):
        raise SettingsError(f"backtest expanding must be true or false, not {expanding!r}")
    if not (isinstance(periods_per_year, (int, float)) and not isinstance(periods_per_year, bool)
            and periods_per_year > 0):
        raise SettingsError(f"periods_per_year must be a positive number, not {periods_per_year!r}")
    if not (isinstance(risk_aversion, (int, float)) and not isinstance(risk_aversion, bool)
            and math.isfinite(risk_aversion) and risk_aversion > 0):
        raise SettingsError(f"risk_aversion must be a positive number, not {risk_aversion!r}")
    # costs
    if isinstance(cost_bps, Mapping):
        unknown = [a for a in cost_bps if str(a) not in assets]
        if unknown:
            raise SettingsError(f"backtest cost_bps names unknown asset '{unknown[0]}' "
                                f"(assets: {', '.join(assets)})")
        missing = [a for a in assets if a not in {str(k) for k in cost_bps}]
        if missing:
            raise SettingsError(f"backtest cost_bps has no entry for asset '{missing[0]}'")
        lookup = {str(k): v for k, v in cost_bps.items()}
        cost = np.array([lookup[a] for a in assets], dtype=np.float64)
    else:
        cost = np.asarray(cost_bps, dtype=np.float64)
        if cost.ndim == 0:
            cost = np.full(N, float(cost))
        if cost.shape != (N,):
            raise SettingsError(f"backtest cost_bps must be one number or one per asset ({N}), "
                                f"got shape {cost.shape}")
    if not np.all(np.isfinite(cost)) or np.any(cost < 0):
        i = int(np.flatnonzero(~(np.isfinite(cost) & (cost >= 0)))[0])
        raise SettingsError(f"backtest cost_bps for asset '{assets[i]}' must be a number >= 0")
    cost_record = float(cost[0]) if np.all(cost == cost[0]) else tuple(float(c) for c in cost)
    # bootstrap
    resamples = _int_iv(bootstrap_resamples, "backtest bootstrap_resamples", 0)
    if bootstrap_block_length is None:
        block = default_block_length(P)
        block_rule = "round(T^(1/3))"
    else:
        block = _int_iv(bootstrap_block_length, "backtest bootstrap_block_length", 1,
                        max(1, P // 2))
        block_rule = "set"
    if rolling_sharpe_window is None:
        rolling = max(2, int(round(3 * periods_per_year)))
    else:
        rolling = _int_iv(rolling_sharpe_window, "backtest rolling_sharpe_window", 2)
    # seed
    if seed is None:
        ss = np.random.SeedSequence()
    elif isinstance(seed, np.random.SeedSequence):
        ss = seed
    elif isinstance(seed, (int, np.integer)) and not isinstance(seed, bool) and seed >= 0:
        ss = np.random.SeedSequence(int(seed))
    else:
        raise TypeError(f"seed must be a non-negative int, a numpy SeedSequence or None, "
                        f"not {type(seed).__name__}")
    # configs
    configs = tuple(configs)
    names = []
    kept = []
    for i, c in enumerate(configs):
        if not isinstance(c, BacktestConfig):
            raise SettingsError(f"backtest configuration #{i + 1} must be a BacktestConfig, "
                                f"not {type(c).__name__}")
        name = c.name
        if name in names:
            raise SettingsError(f"backtest rule name '{name}' is used twice")
        if name == EQUAL_WEIGHT:
            if getattr(c.rule, "type", None) != "equal-weight":
                raise SettingsError(f"the rule name '{EQUAL_WEIGHT}' is reserved for the 1/N "
                                    f"benchmark; rename the rule of type "
                                    f"'{getattr(c.rule, 'type', '?')}'")
            continue  # the built-in 1/N benchmark stands for it
        if c.mean == "given" or c.covariance == "given":
            raise SettingsError(f"backtest rule '{name}': 'given' moments cannot be used in a "
                                f"backtest (each window is estimated)")
        names.append(name)
        kept.append(c)
    K = len(kept) + 1
    if n_trials is None:
        n_trials = K
    else:
        n_trials = _int_iv(n_trials, "n_trials", 1)
        if n_trials < K:
            raise SettingsError(f"n_trials ({n_trials}) cannot be fewer than the {K} "
                                f"configurations in this backtest (1/N included)")
    if policy is not None and policy != EQUAL_WEIGHT and policy not in names:
        raise SettingsError(f"backtest policy '{policy}' names no rule of the backtest "
                            f"(rules: {', '.join([EQUAL_WEIGHT] + names)})")
    if on_rule_error not in ON_RULE_ERROR:
        raise SettingsError(f"on_rule_error must be one of {', '.join(ON_RULE_ERROR)}, "
                            f"not {on_rule_error!r}")
    return _Inputs(
        excess=np.ascontiguousarray(arr), risk_free=np.ascontiguousarray(rf), dates=didx,
        assets=assets, configs=tuple(kept), window=window, expanding=bool(expanding),
        rebalance_every=rebalance_every, cost_rate=cost / 1e4, cost_bps=cost_record,
        risk_aversion=float(risk_aversion), periods_per_year=float(periods_per_year),
        resamples=resamples, block_length=block, block_length_rule=block_rule,
        rolling_window=rolling, seed_sequence=ss, n_trials=n_trials,
        on_rule_error=on_rule_error, risk_free_given=risk_free is not None,
        policy=None if policy is None else str(policy))


def _label(d) -> str:
    if isinstance(d, pd.Timestamp):
        return str(d.date()) if d == d.normalize() else str(d)
    return str(d)


# --------------------------------------------------------------------------- targets

def _window_bounds(inp: _Inputs, rows: np.ndarray):
    lo = np.zeros_like(rows) if inp.expanding else rows - inp.window
    return lo, rows


def _estimates(inp: _Inputs, config: BacktestConfig, rows: np.ndarray, batched=True):
    """Means (D, N) and covariances (D, N, N) of every window; estimators called once per window
    (or once per chunk of windows through ``estimate_batch`` for rolling windows)."""
    import estimators

    X = inp.excess
    N = X.shape[1]
    D = rows.shape[0]
    params = dict(config.params)
    lo, hi = _window_bounds(inp, rows)
    if hasattr(estimators, "min_rows"):
        need = int(estimators.min_rows(config.mean, config.covariance, N))
        if int((hi - lo).min()) < need:
            raise SettingsError(f"backtest rule '{config.name}': the estimators "
                                f"{config.mean}/{config.covariance} need at least {need} rows "
                                f"per window, the window has {int((hi - lo).min())}")
    means = np.empty((D, N))
    covs = np.empty((D, N, N))
    batch = getattr(estimators, "estimate_batch", None) if batched else None
    if batch is not None and not inp.expanding:
        M = inp.window
        view = np.lib.stride_tricks.sliding_window_view(X, (M, N))[:, 0]  # (T-M+1, M, N)
        chunk = max(1, _CHUNK_BYTES // (M * N * 8))
        for a in range(0, D, chunk):
            b = min(D, a + chunk)
            stack = np.ascontiguousarray(view[lo[a:b]])
            try:
                mb = batch(stack, config.mean, config.covariance, params=params)
            except (NoiseproofError, np.linalg.LinAlgError) as exc:
                # find and name the failing window
                for d in range(a, b):
                    _estimate_one(estimators, inp, config, params, lo[d], hi[d])
                cls = type(exc) if isinstance(exc, NoiseproofError) else SingularCovarianceError
                raise cls(f"backtest rule '{config.name}', windows ending "
                          f"{_label(inp.dates[hi[a] - 1])} to {_label(inp.dates[hi[b - 1] - 1])}: "
                          f"{exc}") from None
            means[a:b] = mb.mean
            covs[a:b] = mb.covariance
    else:
        for d in range(D):
            m = _estimate_one(estimators, inp, config, params, lo[d], hi[d])
            means[d] = m.mean
            covs[d] = m.covariance
    return means, covs


def _where(inp: _Inputs, config_name: str, lo: int, hi: int) -> str:
    return (f"backtest rule '{config_name}' at the rebalancing date {_label(inp.dates[hi - 1])} "
            f"(window rows {lo}-{hi - 1}, {_label(inp.dates[lo])} to "
            f"{_label(inp.dates[hi - 1])}; weights held from row {hi})")


def _estimate_one(estimators, inp, config, params, lo, hi):
    try:
        return estimators.estimate(inp.excess[lo:hi], config.mean, config.covariance,
                                   params=params)
    except NoiseproofError as exc:
        raise type(exc)(f"{_where(inp, config.name, lo, hi)}: {exc}") from None
    except np.linalg.LinAlgError as exc:
        raise SingularCovarianceError(f"{_where(inp, config.name, lo, hi)}: {exc}") from None


def _rule_one(inp, config, mean, cov, lo, hi) -> np.ndarray:
    try:
        alloc = config.rule.weights(mean, cov)
    except NoiseproofError as exc:
        raise type(exc)(f"{_where(inp, config.name, lo, hi)}: {exc}") from None
    except np.linalg.LinAlgError as exc:
        raise SingularCovarianceError(f"{_where(inp, config.name, lo, hi)}: {exc}") from None
    w = np.asarray(getattr(alloc, "weights", alloc), dtype=np.float64)
    if w.shape != mean.shape:
        raise SettingsError(f"{_where(inp, config.name, lo, hi)}: the rule returned weights of "
                            f"shape {w.shape}, expected {mean.shape}")
    if not np.all(np.isfinite(w)):
        raise SingularCovarianceError(f"{_where(inp, config.name, lo, hi)}: the rule returned "
                                      f"weights that are not finite")
    return w


def _targets(inp: _Inputs, config: BacktestConfig, means, covs, rows, batched=True):
    """Target weights (D, N) and the rows where a fallback replaced a failed window."""
    lo, hi = _window_bounds(inp, rows)
    D = rows.shape[0]
    rule = config.rule
    wb = getattr(rule, "weights_batch", None) if batched else None
    if wb is not None and inp.on_rule_error == "raise":
        try:
            W = np.asarray(wb(means, covs), dtype=np.float64)
        except (NoiseproofError, np.linalg.LinAlgError):
            W = None  # fall through to the per-window loop, which names the window
        if W is not None:
            if W.shape != means.shape:
                raise SettingsError(f"backtest rule '{config.name}': weights_batch returned "
                                    f"shape {W.shape}, expected {means.shape}")
            badrows = np.flatnonzero(~np.all(np.isfinite(W), axis=1))
            if badrows.size == 0:
                return W, ()
            d = int(badrows[0])
            raise SingularCovarianceError(f"{_where(inp, config.name, lo[d], hi[d])}: the rule "
                                          f"returned weights that are not finite")
    W = np.empty_like(means)
    fallbacks = []
    for d in range(D):
        try:
            W[d] = _rule_one(inp, config, means[d], covs[d], lo[d], hi[d])
        except NoiseproofError:
            if inp.on_rule_error == "raise":
                raise
            W[d] = W[d - 1] if d > 0 else np.full(means.shape[1], 1.0 / means.shape[1])
            fallbacks.append(int(rows[d]) - 1)  # labelled by the rebalancing date
    return W, tuple(fallbacks)


# --------------------------------------------------------------------------- entry point

def run_backtest(returns, dates, assets, configs: Sequence[BacktestConfig], *, window: int,
                 expanding: bool = False, rebalance_every: int = 1, cost_bps=0.0,
                 risk_aversion: float = 1.0, periods_per_year: float = 12,
                 bootstrap_resamples: int = 1000, bootstrap_block_length: Optional[int] = None,
                 rolling_sharpe_window: Optional[int] = None, seed=None, risk_free=None,
                 n_trials: Optional[int] = None, on_rule_error: str = "raise",
                 policy: Optional[str] = None) -> BacktestResult:
    """Run rules through rolling out-of-sample windows against 1/N.

    Parameters
    ----------
    returns : ndarray or DataFrame, shape (T, N)
        Per-period decimal returns, in excess of ``risk_free`` when it is given (the
        ``History`` convention); otherwise taken as they are with a zero risk-free rate.
    dates : array_like, shape (T,)
        Period-end date of each row (strictly increasing).
    assets : sequence of str, length N
    configs : sequence of BacktestConfig
        The rules with their estimators. 1/N is always added as ``"equal-weight"``
        (a config named so, of type equal-weight, is absorbed into it).
    window : int
        M, rows per estimation window (the minimum for expanding windows).
    expanding : bool, default False
        Estimate on all rows before the rebalancing date instead of the last M.
    rebalance_every : int, default 1
        k, periods between rebalancing dates (1 monthly, 3 quarterly, 12 yearly on
        monthly data).
    cost_bps : float, (N,) array or mapping asset -> float, default 0
        Proportional trading cost in basis points of the traded value.
    risk_aversion : float, default 1
        gamma in CEQ = mean - gamma/2 variance.
    periods_per_year : float, default 12
        For the ``_annualised`` copies.
    bootstrap_resamples : int, default 1000
        B of the Ledoit-Wolf bootstrap test (0 skips the test).
    bootstrap_block_length : int or None
        Block length; None uses round(P^(1/3)) with P out-of-sample periods.
    rolling_sharpe_window : int or None
        Periods in the rolling Sharpe series (default three years of periods).
    seed : int, numpy.random.SeedSequence or None
        Root of the bootstrap's random numbers; rule j (in config order) uses the
        j-th spawned child, so adding rules does not change earlier rules' p-values.
    risk_free : float, ndarray (T,) or None
        Per-period risk-free rate that ``returns`` are in excess of.
    n_trials : int or None
        Configurations tried in the study (for the deflated Sharpe ratio); default the
        number of series in this backtest, 1/N included.
    on_rule_error : {"raise", "keep-previous"}, default "raise"
        What a rule failure on a window does: raise an error naming the rule and the
        date, or hold the previous target (1/N for a first window) and record the date
        in the result (``fallback_dates``).
    policy : str or None
        Name of the rule held today (one of the configs). Every other series is then
        also compared with it as with 1/N: Sharpe and CEQ differences with their
        p-values, and the realised tracking error (sd of the return differences).

    Returns
    -------
    BacktestResult
    """
    t0 = time.perf_counter()
    inp = _run_backtest_iv(
        returns, dates, assets, configs, window=window, expanding=expanding,
        rebalance_every=rebalance_every, cost_bps=cost_bps, risk_aversion=risk_aversion,
        periods_per_year=periods_per_year, bootstrap_resamples=bootstrap_resamples,
        bootstrap_block_length=bootstrap_block_length,
        rolling_sharpe_window=rolling_sharpe_window, seed=seed, risk_free=risk_free,
        n_trials=n_trials, on_rule_error=on_rule_error, policy=policy)
    result = _execute(inp, batched=True)
    result.timings["total"] = time.perf_counter() - t0
    return result


def _execute(inp: _Inputs, *, batched: bool = True) -> BacktestResult:
    """Run validated inputs. ``batched=False`` estimates and optimises window by window
    (the baseline the benchmark compares against; same results)."""
    T, N = inp.excess.shape
    rows = np.arange(inp.window, T, inp.rebalance_every, dtype=np.int64)
    timings = {"estimation": 0.0, "optimisation": 0.0, "simulation": 0.0, "statistics": 0.0}

    names = [EQUAL_WEIGHT]
    targets = [np.full((rows.shape[0], N), 1.0 / N)]
    fallbacks = {EQUAL_WEIGHT: ()}
    cache = {}
    for config in inp.configs:
        key = (config.mean, config.covariance, repr(sorted(dict(config.params).items())))
        t = time.perf_counter()
        if not (getattr(config.rule, "needs_mean", True)
                or getattr(config.rule, "needs_covariance", True)):
            key = ("input-free",)      # e.g. a fixed policy: nothing to estimate
            if key not in cache:
                cache[key] = (np.zeros((rows.shape[0], N)), np.zeros((rows.shape[0], N, N)))
        elif key not in cache:
            cache[key] = _estimates(inp, config, rows, batched=batched)
        means, covs = cache[key]
        timings["estimation"] += time.perf_counter() - t
        t = time.perf_counter()
        W, fb = _targets(inp, config, means, covs, rows, batched=batched)
        timings["optimisation"] += time.perf_counter() - t
        names.append(config.name)
        targets.append(W)
        fallbacks[config.name] = fb

    t = time.perf_counter()
    paths = [_kernels.hold_path(inp.excess, inp.risk_free, inp.window, rows, W, inp.cost_rate)
             for W in targets]
    timings["simulation"] += time.perf_counter() - t
    for name, path in zip(names, paths):
        bad = np.flatnonzero(~np.isfinite(path[1]))
        if bad.size:
            r = inp.window + int(bad[0])
            raise SettingsError(f"backtest rule '{name}': the portfolio return is not finite at "
                                f"row {r} ({_label(inp.dates[r])}); the previous period wiped "
                                f"out its wealth exactly")
    t = time.perf_counter()
    result = build_result(inp, names, rows, targets, paths, fallbacks, timings)
    timings["statistics"] += time.perf_counter() - t
    return result
