"""Backtest mechanics: timing (no look-ahead), drift, turnover, costs, measures, errors.

Hand-computed cases use constant or two-state returns; drift/turnover/costs are also
checked against an independent currency-holdings loop written here. Formulas for drift
and turnover: DeMiguel, Garlappi & Uppal (2009), Review of Financial Studies 22(5).
"""
import math

import numpy as np
import pandas as pd
import pytest

from backtest import BacktestConfig, run_backtest
from backtest import _kernels
from backtest.result import drawdown_path, rolling_sharpe
from estimators.core import DataError, SettingsError, SingularCovarianceError


class FnRule:
    """A closed-form rule for tests: ``fn(mean, cov) -> weights``; records what it saw."""

    def __init__(self, name, fn, type="test"):
        self.name = name
        self.type = type
        self.fn = fn
        self.seen = []

    def weights(self, mean, cov):
        self.seen.append(np.array(mean))
        return self.fn(mean, cov)


def months(n, start="2000-01"):
    return pd.date_range(start, periods=n, freq="MS")


def cfg(name, fn, **kw):
    return BacktestConfig(FnRule(name, fn), "sample", "sample", kw)


def run(R, configs=(), **kw):
    R = np.asarray(R, dtype=float)
    kw.setdefault("window", 2)
    kw.setdefault("bootstrap_resamples", 0)
    kw.setdefault("seed", 0)
    return run_backtest(R, months(R.shape[0]), [f"a{i}" for i in range(R.shape[1])],
                        list(configs), **kw)


# --------------------------------------------------------------------------- hand-computed

def test_constant_returns_hand_computed():
    # Asset a0 earns 10 % every period, a1 earns 0 %, rf = 0; window 2, 4 OOS periods.
    R = np.tile([0.10, 0.0], (6, 1))
    res = run(R, [cfg("all-a0", lambda m, c: np.array([1.0, 0.0]))], cost_bps=100,
              risk_aversion=2.0)
    s = res.to_summary()
    ew = s["equal-weight"]
    # 1/N: 5 % a period gross; drifted weights (0.55, 0.5)/1.05, so turnover 0.05/1.05
    tv = 0.05 / 1.05
    assert ew["turnover"] == pytest.approx(tv, rel=1e-12)
    np.testing.assert_allclose(res.turnover[0, 1:], tv, rtol=1e-12)
    # cost 1 % of the trade paid from wealth at the start of periods 2..4
    net_later = (1 - 0.01 * tv) * 1.05 - 1
    np.testing.assert_allclose(res.returns[:, 0], [0.05, net_later, net_later, net_later],
                               rtol=1e-12)
    np.testing.assert_allclose(res.gross_returns[:, 0], 0.05, rtol=1e-12)
    mean = (0.05 + 3 * net_later) / 4
    var = ((0.05 - mean) ** 2 + 3 * (net_later - mean) ** 2) / 3
    assert ew["mean"] == pytest.approx(mean, rel=1e-12)
    assert ew["volatility"] == pytest.approx(math.sqrt(var), rel=1e-9)
    assert ew["sharpe"] == pytest.approx(mean / math.sqrt(var), rel=1e-9)
    assert ew["ceq"] == pytest.approx(mean - var, rel=1e-12)  # gamma = 2
    assert ew["cost_drag"] == pytest.approx(3 * (0.05 - net_later) / 4, rel=1e-12)
    assert ew["cost_total"] == pytest.approx(3 * 0.01 * tv, rel=1e-12)
    assert ew["max_drawdown"] == 0.0 and ew["max_drawdown_peak"] is None
    assert ew["total_return"] == pytest.approx(1.05 * (1 + net_later) ** 3 - 1, rel=1e-12)
    assert ew["periods"] == 4 and ew["first_date"] == "2000-03-01"
    assert ew["last_date"] == "2000-06-01"
    assert ew["mean_annualised"] == pytest.approx(12 * mean, rel=1e-12)
    assert ew["volatility_annualised"] == pytest.approx(math.sqrt(12 * var), rel=1e-9)
    assert ew["sharpe_diff_p_jkm"] is None and ew["hit_rate"] is None
    # all in a0: constant 10 %, no trades; volatility 0 makes the Sharpe ratio undefined
    a = s["all-a0"]
    assert a["mean"] == pytest.approx(0.10, rel=1e-12)
    assert a["volatility"] == 0.0
    assert a["sharpe"] is None and a["sharpe_diff_p_jkm"] is None and a["psr"] is None
    assert a["turnover"] == 0.0 and a["cost_drag"] == 0.0
    assert a["hit_rate"] == 1.0
    assert a["ceq"] == pytest.approx(0.10, rel=1e-12)


def test_two_state_drawdown_hand_computed():
    # One asset: wealth 1.25, 1.0, 1.25, 1.875 (binary-exact): drawdown 20 %, peak period 1,
    # trough period 2, recovery period 3.
    R = np.array([[0.0], [0.0], [0.25], [-0.2], [0.25], [0.5]])
    res = run(R)
    e = res.to_summary()["equal-weight"]
    assert e["max_drawdown"] == pytest.approx(0.2, rel=1e-12)
    assert e["max_drawdown_peak"] == "2000-03-01"
    assert e["max_drawdown_trough"] == "2000-04-01"
    assert e["max_drawdown_recovery"] == "2000-05-01"
    np.testing.assert_allclose(res.wealth[:, 0], [1.25, 1.0, 1.25, 1.875], rtol=1e-15)
    np.testing.assert_allclose(res.drawdown[:, 0], [0, -0.2, 0, 0], atol=1e-15)
    x = np.array([0.25, -0.2, 0.25, 0.5])
    assert e["mean"] == pytest.approx(0.2, rel=1e-12)
    assert e["volatility"] == pytest.approx(math.sqrt(0.255 / 3), rel=1e-12)
    assert e["turnover"] == 0.0
    # skewness / kurtosis with divisor-T central moments (Bailey & Lopez de Prado 2012)
    d = x - 0.2
    skew = np.mean(d ** 3) / np.mean(d ** 2) ** 1.5
    kurt = np.mean(d ** 4) / np.mean(d ** 2) ** 2
    assert e["skewness"] == pytest.approx(skew, rel=1e-12)
    assert e["kurtosis"] == pytest.approx(kurt, rel=1e-12)
    sr = 0.2 / math.sqrt(0.255 / 3)
    assert e["sharpe"] == pytest.approx(sr, rel=1e-12)
    # Lo (2002) iid SE; PSR(0) and MinTRL(95 %) of Bailey & Lopez de Prado (2012)
    assert e["sharpe_se"] == pytest.approx(math.sqrt((1 + sr * sr / 2) / 4), rel=1e-12)
    f = 1 - skew * sr + (kurt - 1) / 4 * sr * sr
    assert e["psr"] == pytest.approx(0.5 * math.erfc(-sr * math.sqrt(3) / math.sqrt(f)
                                                     / math.sqrt(2)), rel=1e-12)
    assert e["min_track_record"] == pytest.approx(1 + f * (1.6448536269514722 / sr) ** 2,
                                                  rel=1e-12)
    assert e["dsr"] == e["psr"]  # one series, one trial: nothing to deflate


def test_drawdown_from_start_and_ruin():
    w, dd, mdd, pk, tr, rec, ruin = drawdown_path(np.array([0.5, 1.5, 1.5]))
    assert mdd == pytest.approx(0.5) and pk == -1 and tr == 0 and rec == 2 and ruin == -1
    w, dd, mdd, pk, tr, rec, ruin = drawdown_path(np.array([1.1, -0.2, 2.0]))
    assert ruin == 1 and mdd == 1.0 and np.all(w[1:] == 0)


def test_cash_at_risk_free_rate_drift_hand_computed():
    # a0 total return 10 %, a1 total 0 %, rf 1 %: rule holds 50 % a0 and 50 % cash.
    rf = 0.01
    total = np.tile([0.10, 0.0], (5, 1))
    res = run(total - rf, [cfg("half", lambda m, c: np.array([0.5, 0.0]))], risk_free=rf)
    rp = 0.5 * 0.10 + 0.5 * rf
    np.testing.assert_allclose(res.returns[:, 1], rp - rf, rtol=1e-12)
    drifted = 0.5 * 1.10 / (1 + rp)
    np.testing.assert_allclose(res.turnover[1, 1:], drifted - 0.5, rtol=1e-12)
    # cash 1 - sum(w) earns rf: the excess return is sum w_i x_i = 0.5 * 0.09
    assert res.to_summary()["half"]["mean"] == pytest.approx(0.045, rel=1e-12)


def test_drift_turnover_costs_against_holdings_loop():
    rng = np.random.default_rng(7)
    T, N, M, k = 40, 3, 10, 3
    X = rng.normal(0.005, 0.05, (T, N))
    rf = rng.uniform(0.0, 0.004, T)
    cost_bps = np.array([10.0, 25.0, 40.0])
    fn = lambda m, c: np.array([0.6, -0.2, 0.4]) + m * 3  # sums to 1 + 3 sum(m): cash varies
    res = run(X, [cfg("r", fn)], window=M, rebalance_every=k, cost_bps=cost_bps, risk_free=rf)
    rows = np.arange(M, T, k)
    W = res.targets[1]
    # independent reference: currency holdings traded to target values at each rebalance
    h = np.zeros(N)
    cash = 1.0
    net = []
    tv = []
    j = 0
    for t in range(M, T):
        w0 = h.sum() + cash
        if j < len(rows) and rows[j] == t:
            if j > 0:
                trade = np.abs(W[j] * w0 - h) / w0
                tv.append(trade.sum())
                paid = (cost_bps / 1e4 * trade).sum() * w0
            else:
                paid = 0.0
            after = w0 - paid
            h = W[j] * after
            cash = after - h.sum()
            j += 1
        h = h * (1 + X[t] + rf[t])
        cash = cash * (1 + rf[t])
        net.append((h.sum() + cash) / w0 - 1 - rf[t])
    np.testing.assert_allclose(res.returns[:, 1], net, rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(res.turnover[1, 1:], tv, rtol=1e-10)
    assert res.turnover.shape == (2, len(rows))
    assert len(res.tables()["backtest_turnover"]) == len(rows) - 1


def test_hold_path_kernel_matches_python_twin():
    rng = np.random.default_rng(3)
    T, N = 30, 4
    X = rng.normal(0, 0.05, (T, N))
    rf = rng.uniform(0, 0.003, T)
    rows = np.arange(6, T, 2, dtype=np.int64)
    W = rng.normal(0.25, 0.3, (rows.size, N))
    c = np.array([0.001, 0.002, 0.0, 0.0005])
    a = _kernels.hold_path(X, rf, 6, rows, W, c)
    b = _kernels.hold_path_py(X, rf, 6, rows, W, c)
    for u, v in zip(a, b):
        np.testing.assert_allclose(u, v, rtol=1e-13, atol=1e-15, equal_nan=True)


# --------------------------------------------------------------------------- no look-ahead

def test_rule_sees_exactly_the_window_rows():
    # column 0 carries the row number: the window mean reveals which rows the rule saw
    T, M = 30, 7
    R = np.zeros((T, 2))
    R[:, 0] = np.arange(T) * 1e-4
    R[:, 1] = np.sin(np.arange(T))
    rule = FnRule("spy", lambda m, c: np.array([0.5, 0.5]))
    run(R, [BacktestConfig(rule, "sample", "sample", {})], window=M, rebalance_every=2)
    rows = np.arange(M, T, 2)
    seen = np.array([m[0] for m in rule.seen]) / 1e-4
    np.testing.assert_allclose(seen, (rows - M + rows - 1) / 2, rtol=1e-12)  # rows t-M..t-1
    rule2 = FnRule("spy", lambda m, c: np.array([0.5, 0.5]))
    run(R, [BacktestConfig(rule2, "sample", "sample", {})], window=M, expanding=True)
    seen = np.array([m[0] for m in rule2.seen]) / 1e-4
    np.testing.assert_allclose(seen, (np.arange(M, T) - 1) / 2, rtol=1e-12)  # rows 0..t-1


def test_no_one_period_peek():
    # A rule whose weights depend on the mean: changing row t0 must leave every target up to
    # and including the one set at the start of row t0 unchanged, and change later ones.
    rng = np.random.default_rng(11)
    T, N, M, t0 = 48, 3, 12, 30
    X = rng.normal(0.01, 0.04, (T, N))
    fn = lambda m, c: np.exp(20 * m) / np.exp(20 * m).sum()
    a = run(X, [cfg("tilt", fn)], window=M)
    Y = X.copy()
    Y[t0] = [0.5, -0.5, 0.2]
    b = run(Y, [cfg("tilt", fn)], window=M)
    j0 = t0 - M  # rebalance index whose holding period is row t0
    np.testing.assert_array_equal(a.targets[1, :j0 + 1], b.targets[1, :j0 + 1])
    assert np.abs(a.targets[1, j0 + 1] - b.targets[1, j0 + 1]).max() > 1e-3
    # the return of row t0 itself changes (it is earned), earlier returns do not
    np.testing.assert_array_equal(a.returns[:j0], b.returns[:j0])
    assert a.returns[j0, 1] != b.returns[j0, 1]


# --------------------------------------------------------------------------- pairing, seeds

def test_series_are_paired_and_seeded():
    rng = np.random.default_rng(5)
    X = rng.normal(0.006, 0.04, (90, 4))
    fa = lambda m, c: np.linalg.solve(c, np.ones(4)) / np.linalg.solve(c, np.ones(4)).sum()
    fb = lambda m, c: np.clip(m, 0, None) / np.clip(m, 0, None).sum() if (m > 0).any() \
        else np.full(4, 0.25)
    r1 = run(X, [cfg("gmv", fa)], window=24, bootstrap_resamples=200, seed=42)
    r2 = run(X, [cfg("gmv", fa), cfg("pos", fb)], window=24, bootstrap_resamples=200, seed=42)
    r3 = run(X, [cfg("gmv", fa)], window=24, bootstrap_resamples=200,
             seed=np.random.SeedSequence(42))
    s1, s2, s3 = r1.to_summary(), r2.to_summary(), r3.to_summary()
    assert s1["gmv"]["sharpe_diff_p_lw"] == s2["gmv"]["sharpe_diff_p_lw"] == \
        s3["gmv"]["sharpe_diff_p_lw"]
    t = r2.tables()["backtest_returns"]
    assert list(t.columns) == ["equal-weight", "gmv", "pos"] and len(t) == 66
    np.testing.assert_array_equal(r1.returns, r2.returns[:, :2])
    r4 = run(X, [cfg("gmv", fa)], window=24, bootstrap_resamples=200, seed=43)
    assert r4.to_summary()["gmv"]["sharpe_diff_p_lw"] != s1["gmv"]["sharpe_diff_p_lw"]
    assert s2["gmv"]["sharpe_diff_p_jkm"] == s1["gmv"]["sharpe_diff_p_jkm"]


def test_summary_fields_and_tables_complete():
    rng = np.random.default_rng(2)
    X = rng.normal(0.006, 0.04, (80, 3))
    res = run(X, [cfg("tilt", lambda m, c: np.array([0.5, 0.3, 0.2]))], window=20,
              bootstrap_resamples=99, cost_bps=5.0, rolling_sharpe_window=12)
    s = res.to_summary()["tilt"]
    need = ["mean", "volatility", "sharpe", "ceq", "turnover", "max_drawdown", "cost_drag",
            "periods", "first_date", "sharpe_diff_p_jkm", "sharpe_diff_p_lw", "ceq_diff_p",
            "psr", "dsr", "mean_annualised", "volatility_annualised", "sharpe_annualised",
            "ceq_annualised", "hit_rate", "sharpe_se", "min_track_record", "last_date",
            "max_drawdown_peak", "max_drawdown_trough"]
    for k in need:
        assert k in s
        assert s[k] is not None, k
    assert 0 < s["sharpe_diff_p_lw"] <= 1 and 0 < s["sharpe_diff_p_jkm"] <= 1
    t = res.tables()
    assert set(t) >= {"backtest_returns", "backtest_cumulative", "backtest_rolling_sharpe",
                      "backtest_drawdown", "backtest_turnover", "backtest_tests",
                      "backtest_weights", "backtest_measures"}
    rs = t["backtest_rolling_sharpe"]["tilt"].to_numpy()
    x = t["backtest_returns"]["tilt"].to_numpy()
    assert np.isnan(rs[:11]).all()
    assert rs[20] == pytest.approx(x[9:21].mean() / x[9:21].std(ddof=1), rel=1e-12)
    np.testing.assert_allclose(t["backtest_cumulative"]["tilt"].to_numpy(),
                               np.cumprod(1 + x), rtol=1e-12)
    assert res.settings_summary()["bootstrap_block_length"] == round(60 ** (1 / 3))


def test_rolling_sharpe_short_series_is_nan():
    assert np.isnan(rolling_sharpe(np.arange(5.0), 6)).all()


# --------------------------------------------------------------------------- errors

def test_rule_failure_names_rule_and_date():
    X = np.random.default_rng(1).normal(0, 0.04, (30, 2))

    def fails(m, c):
        if m[0] > 0.01:
            raise SingularCovarianceError("covariance is singular")
        return np.array([0.5, 0.5])

    X[15] = [0.3, 0.0]  # enters the window of the rebalance starting row 16
    with pytest.raises(SingularCovarianceError,
                       match=r"'boom' at the rebalancing date 2001-04-01 \(window rows 6-15"):
        run(X, [cfg("boom", fails)], window=10)
    res = run(X, [cfg("boom", fails)], window=10, on_rule_error="keep-previous")
    s = res.to_summary()["boom"]
    assert s["fallback_dates"][0] == "2001-04-01"
    np.testing.assert_array_equal(res.targets[1, 6], res.targets[1, 5])
    with pytest.raises(SingularCovarianceError, match="'nan'.*not finite"):
        run(X, [cfg("nan", lambda m, c: np.array([np.nan, 1.0]))], window=10)


def test_bad_inputs_are_one_line_errors():
    X = np.random.default_rng(1).normal(0, 0.04, (30, 2))
    Y = X.copy()
    Y[4, 1] = np.nan
    with pytest.raises(DataError, match=r"column 'a1', row 4 \(2000-05-01\)"):
        run(Y)
    with pytest.raises(SettingsError, match="window"):
        run(X, window=30)
    with pytest.raises(SettingsError, match="cost_bps has no entry for asset 'a1'"):
        run(X, cost_bps={"a0": 5})
    with pytest.raises(SettingsError, match="n_trials"):
        run(X, [cfg("x", lambda m, c: np.array([1.0, 0.0]))], n_trials=1)
    with pytest.raises(SettingsError, match="reserved"):
        run(X, [cfg("equal-weight", lambda m, c: np.array([1.0, 0.0]))])
    with pytest.raises(SettingsError, match="given"):
        run(X, [BacktestConfig(FnRule("g", lambda m, c: m), "given", "sample", {})])
    with pytest.raises(TypeError):
        run(X, seed="abc")
    with pytest.raises(DataError, match="dates"):
        run_backtest(X, months(29), ["a", "b"], [], window=5)


# --------------------------------------------------------------------------- with the real parts

def _optimise_configs(assets):
    optimise = pytest.importorskip("optimise")
    mk = optimise.make_rule
    return [
        BacktestConfig(mk("mv", "mean-variance", {"risk_aversion": 4.0}, assets), "sample",
                       "ledoit-wolf-identity"),
        BacktestConfig(mk("minvar", "min-variance", {}, assets), "sample", "sample"),
        BacktestConfig(mk("erc", "equal-risk-contribution", {}, assets), "sample", "oas"),
    ]


def test_batching_and_chunking_do_not_change_results(monkeypatch):
    from backtest import engine

    rng = np.random.default_rng(17)
    X = rng.normal(0.006, 0.045, (70, 5))
    assets = tuple(f"a{i}" for i in range(5))
    cfgs = _optimise_configs(assets)
    kw = dict(window=24, cost_bps=20.0, bootstrap_resamples=99, seed=3)
    a = run_backtest(X, months(70), assets, cfgs, **kw)
    monkeypatch.setattr(engine, "_CHUNK_BYTES", 24 * 5 * 8 * 7)  # 7 windows per chunk
    b = run_backtest(X, months(70), assets, cfgs, **kw)
    np.testing.assert_allclose(a.targets, b.targets, rtol=0, atol=1e-12)
    inp = engine._run_backtest_iv(X, months(70), assets, cfgs, expanding=False,
                                  rebalance_every=1, risk_aversion=1.0, periods_per_year=12,
                                  bootstrap_block_length=None, rolling_sharpe_window=None,
                                  risk_free=None, n_trials=None, on_rule_error="raise", **kw)
    c = engine._execute(inp, batched=False)
    np.testing.assert_allclose(a.targets, c.targets, rtol=0, atol=1e-9)
    assert a.to_summary()["mv"]["sharpe_diff_p_lw"] == c.to_summary()["mv"]["sharpe_diff_p_lw"]
    # weights of the long-only rules are long-only and fully invested at every date
    assert (a.targets[1:] >= -1e-9).all()
    np.testing.assert_allclose(a.targets.sum(axis=2), 1.0, atol=1e-9)


def test_expanding_windows_with_estimators():
    rng = np.random.default_rng(19)
    X = rng.normal(0.006, 0.045, (50, 4))
    assets = ("a", "b", "c", "d")
    cfgs = _optimise_configs(assets)[1:2]
    res = run_backtest(X, months(50), assets, cfgs, window=20, expanding=True,
                       rebalance_every=3, bootstrap_resamples=0, seed=0)
    from optimise import make_rule

    rule = make_rule("minvar", "min-variance", {}, assets)
    for j, t in enumerate(range(20, 50, 3)):
        w = rule.weights(X[:t].mean(0), np.cov(X[:t], rowvar=False)).weights
        np.testing.assert_allclose(res.targets[1, j], w, atol=1e-9)
    assert res.settings_summary()["expanding"] is True
    assert res.to_summary()["minvar"]["rebalances"] == 10


def test_optimiser_error_names_rule_and_window():
    optimise = pytest.importorskip("optimise")
    rng = np.random.default_rng(23)
    X = rng.normal(0.01, 0.04, (40, 3))
    X[:, 2] = X[:, 0]  # a duplicated asset makes the sample covariance singular
    rule = optimise.make_rule("tangent", "max-sharpe", {"long_only": False}, ("a", "b", "c"))
    with pytest.raises(SingularCovarianceError,
                       match=r"rule 'tangent' at the rebalancing date 2000-12-01 "
                             r"\(window rows 0-11, 2000-01-01 to 2000-12-01; weights held "
                             r"from row 12\)"):
        run_backtest(X, months(40), ("a", "b", "c"),
                     [BacktestConfig(rule, "sample", "sample")], window=12, seed=0)


def test_single_series_deflated_sharpe_needs_trials():
    X = np.random.default_rng(1).normal(0.01, 0.04, (30, 2))
    s = run(X, window=10, n_trials=5).to_summary()["equal-weight"]
    assert s["dsr"] is None and s["psr"] is not None
    s = run(X, window=10).to_summary()["equal-weight"]
    assert s["dsr"] == s["psr"]


def test_decreasing_numeric_dates_rejected():
    X = np.random.default_rng(1).normal(0.01, 0.04, (10, 2))
    with pytest.raises(DataError, match="row 5"):
        run_backtest(X, [0, 1, 2, 3, 4, 4, 6, 7, 8, 9], ["a", "b"], [], window=3)


def test_costs_only_ever_lower_returns_property():
    hypothesis = pytest.importorskip("hypothesis")
    st = pytest.importorskip("hypothesis.strategies")

    @hypothesis.settings(max_examples=25, deadline=None)
    @hypothesis.given(seed=st.integers(0, 2 ** 32 - 1), bps=st.floats(0.0, 500.0, allow_subnormal=False),
                      every=st.integers(1, 4))
    def check(seed, bps, every):
        rng = np.random.default_rng(seed)
        X = rng.normal(0.005, 0.05, (24, 3))
        rows = np.arange(6, 24, every, dtype=np.int64)
        W = rng.dirichlet(np.ones(3), rows.size)
        gross, net, tv, cost, _ = _kernels.hold_path(X, np.full(24, 0.002), 6, rows, W,
                                                     np.full(3, bps / 1e4))
        assert np.all(net <= gross + 1e-15)
        np.testing.assert_allclose(cost[1:], bps / 1e4 * tv[1:], rtol=1e-12, atol=1e-300)  # costs below 1e-300 are round-off
        # a period without a trade loses nothing to costs
        traded = np.zeros(18, bool)
        traded[rows[1:] - 6] = True
        np.testing.assert_array_equal(net[~traded], gross[~traded])

    check()


def test_summary_is_strict_json():
    import json

    X = np.tile([0.10, 0.0], (8, 1))  # a zero-volatility rule: undefined figures become null
    res = run(X, [cfg("all-a0", lambda m, c: np.array([1.0, 0.0]))], bootstrap_resamples=19)
    text = json.dumps({"rules": res.to_summary(), "backtest": res.settings_summary()},
                      allow_nan=False)
    back = json.loads(text)
    assert back["rules"]["all-a0"]["sharpe"] is None
    assert back["backtest"]["rules"] == ["equal-weight", "all-a0"]
