"""Backtest statistics against published formulas, worked examples and simulation.

Sources are named beside each check. Per-period Sharpe ratios throughout.
"""
import math

import numpy as np
import pytest
from scipy import stats as st

from backtest import BacktestConfig, run_backtest
from backtest import _kernels
from backtest import stats as bs
from estimators.core import DataError, SettingsError


# --------------------------------------------------------------------------- one series

def test_psr_min_trl_dsr_worked_values():
    # REFERENCES.md section 7d, Bailey & Lopez de Prado (2012, J. Risk; 2014, J. Portfolio
    # Management): own PSR / MinTRL examples, monthly SR 0.3, T = 60, SR* = 0.
    assert bs.probabilistic_sharpe(0.3, 60, 0.0, 3.0) == pytest.approx(0.987908, abs=5e-7)
    assert bs.probabilistic_sharpe(0.3, 60, -1.0, 6.0) == pytest.approx(0.973743, abs=5e-7)
    assert bs.min_track_record(0.3, 0.0, 3.0) == pytest.approx(32.4144, abs=5e-5)
    assert bs.min_track_record(0.3, -1.0, 6.0) == pytest.approx(43.4620, abs=5e-5)
    # DSR worked example: annual SR 2.5 on 250 days, T = 1250, skew -3, kurt 10, K = 100,
    # cross-trial variance 0.5 a year (0.002 a day): SR0 = 0.113172, DSR = 0.900397.
    sr = 2.5 / math.sqrt(250)
    assert bs.expected_max_sharpe(0.5 / 250, 100) == pytest.approx(0.113172, abs=5e-7)
    assert bs.deflated_sharpe(sr, 1250, -3.0, 10.0, 0.5 / 250, 100) == pytest.approx(
        0.900397, abs=5e-7)
    assert bs.min_track_record(0.1, 0.0, 3.0, benchmark=0.2) == math.inf
    assert bs.expected_max_sharpe(0.3, 1) == 0.0


def test_expected_maximum_approximation_values():
    # REFERENCES.md section 7d table: the approximation for K iid N(0, 1) maxima.
    for k, v in [(10, 1.5746), (100, 2.5306), (1000, 3.2551)]:
        assert bs.expected_max_sharpe(1.0, k) == pytest.approx(v, abs=5e-5)


def test_lo_standard_error_against_noncentral_t():
    # Lo (2002, FAJ 58(4)): sqrt((1 + SR^2/2)/T) = 0.092195 at T=120, SR=0.2; the exact sd of
    # SR-hat is that of nct(T-1, sqrt(T) SR)/sqrt(T) (scipy 1.17 stats.nct): 0.093001.
    assert bs.lo_standard_error(0.2, 120) == pytest.approx(0.092195, abs=5e-7)
    exact = st.nct(df=119, nc=math.sqrt(120) * 0.2).std() / math.sqrt(120)
    assert exact == pytest.approx(0.093001, abs=5e-6)
    assert abs(bs.lo_standard_error(0.2, 120) / exact - 1) < 0.01
    # normal skew/kurt reduce the non-normal form to Lo's
    assert bs.sharpe_standard_error(0.2, 120, 0.0, 3.0) == pytest.approx(
        bs.lo_standard_error(0.2, 120), rel=1e-14)


def test_moments_of_matches_scipy():
    x = np.random.default_rng(0).standard_t(5, 300)
    m, sd, sk, ku = bs.moments_of(x)
    assert sk == pytest.approx(st.skew(x, bias=True), rel=1e-12)  # scipy 1.17
    assert ku == pytest.approx(st.kurtosis(x, fisher=False, bias=True), rel=1e-12)
    assert sd == pytest.approx(np.std(x, ddof=1), rel=1e-14)


# --------------------------------------------------------------------------- JKM

def jkm_by_delta_method(x, y):
    """Independent derivation (REFERENCES.md 7b): delta method on f = m1 s2 - m2 s1 with the
    normal-theory covariance of (m1, m2, s1, s2)."""
    T = len(x)
    m = np.array([x.mean(), y.mean()])
    S = np.cov(x, y, ddof=1)
    s1, s2 = np.sqrt(np.diag(S))
    V = np.zeros((4, 4))
    V[:2, :2] = S
    V[2, 2] = S[0, 0] / 2
    V[3, 3] = S[1, 1] / 2
    V[2, 3] = V[3, 2] = S[0, 1] ** 2 / (2 * s1 * s2)
    g = np.array([s2, -s1, -m[1], m[0]])
    return (m[0] * s2 - m[1] * s1) / math.sqrt(g @ V @ g / T)


def test_jkm_small_worked_example():
    # Jobson & Korkie (1981, J. Finance 36(4)) with Memmel (2003, Finance Letters 1(1)).
    x = np.array([0.021, -0.013, 0.034, 0.008, -0.022, 0.017, 0.011, 0.029])
    y = np.array([0.015, -0.004, 0.019, 0.012, -0.015, 0.010, 0.002, 0.018])
    res = bs.jobson_korkie_memmel(x, y)
    z = jkm_by_delta_method(x, y)
    assert res.statistic == pytest.approx(z, rel=1e-12)
    assert res.p_value == pytest.approx(2 * st.norm.sf(abs(z)), rel=1e-12)
    # the closed-form theta written out by hand for this data
    T = 8
    m1, m2 = x.mean(), y.mean()
    v1, v2 = x.var(ddof=1), y.var(ddof=1)
    c = np.cov(x, y)[0, 1]
    theta = (2 * v1 * v2 - 2 * math.sqrt(v1 * v2) * c + 0.5 * m1 ** 2 * v2 + 0.5 * m2 ** 2 * v1
             - m1 * m2 / math.sqrt(v1 * v2) * c ** 2) / T
    assert res.statistic == pytest.approx(
        (math.sqrt(v2) * m1 - math.sqrt(v1) * m2) / math.sqrt(theta), rel=1e-12)
    assert res.difference == pytest.approx(m1 / math.sqrt(v1) - m2 / math.sqrt(v2), rel=1e-12)
    # symmetry and identical series
    assert bs.jobson_korkie_memmel(y, x).statistic == pytest.approx(-res.statistic, rel=1e-12)
    same = bs.jobson_korkie_memmel(x, x)
    assert same.p_value == 1.0 and same.statistic == 0.0


def test_input_validation():
    with pytest.raises(DataError, match="row 2"):
        bs.jobson_korkie_memmel([0.1, 0.2, np.nan, 0.1], [0.1, 0.2, 0.3, 0.1])
    with pytest.raises(DataError, match="same length"):
        bs.ceq_difference_test([0.1, 0.2, 0.3], [0.1, 0.2, 0.3, 0.4], 1.0)
    with pytest.raises(SettingsError, match="block_length"):
        bs.ledoit_wolf_bootstrap(np.arange(5.0), np.arange(5.0) ** 2, block_length=3,
                                 rng=np.random.default_rng(0))
    with pytest.raises(TypeError):
        bs.ledoit_wolf_bootstrap(np.arange(5.0), np.arange(5.0), rng=0)


# --------------------------------------------------------------------------- Ledoit-Wolf

def lw_numpy_reference(x, y, starts, b, delta_hat):
    """The kernel's plain-numpy twin (vectorised on index arrays), studentized."""
    delta, se = _kernels.block_bootstrap_stats_numpy(x, y, starts, b)
    return np.abs(delta - delta_hat) / se


def test_bootstrap_kernel_twins_and_numpy_reference():
    rng = np.random.default_rng(9)
    x = rng.normal(0.01, 0.04, 37)
    y = 0.5 * x + rng.normal(0.005, 0.03, 37)
    for b in (1, 4, 9, 18):
        starts = rng.integers(0, 37, size=(25, -(-37 // b)), dtype=np.int64)
        a = _kernels.block_bootstrap_sharpe(x, y, starts, b, 0.05)
        p = _kernels.block_bootstrap_sharpe_py(x, y, starts, b, 0.05)
        r = lw_numpy_reference(x, y, starts, b, 0.05)
        np.testing.assert_allclose(a, p, rtol=1e-12)
        np.testing.assert_allclose(a, r, rtol=1e-10)
        d1, s1 = _kernels.circular_block_psi(x, y, b)
        d2, s2 = _kernels.circular_block_psi_py(x, y, b)
        assert (d1, s1) == pytest.approx((d2, s2), rel=1e-12)


def test_circular_psi_against_reference_and_iid_delta_method():
    rng = np.random.default_rng(4)
    x = rng.normal(0.01, 0.04, 50)
    y = 0.3 * x + rng.normal(0.004, 0.05, 50)
    T = 50
    m1, m2 = x.mean(), y.mean()
    g1, g2 = (x * x).mean(), (y * y).mean()
    v1, v2 = g1 - m1 ** 2, g2 - m2 ** 2
    grad = np.array([g1 / v1 ** 1.5, -g2 / v2 ** 1.5, -m1 / (2 * v1 ** 1.5), m2 / (2 * v2 ** 1.5)])
    Yc = np.column_stack([x - m1, y - m2, x * x - g1, y * y - g2])
    # b = 1: the iid delta method of Ledoit & Wolf (2008, J. Empirical Finance 15(5)),
    # REFERENCES.md 7c, with Psi the divisor-T covariance
    psi = Yc.T @ Yc / T
    d, se = _kernels.circular_block_psi(x, y, 1)
    assert d == pytest.approx(m1 / math.sqrt(v1) - m2 / math.sqrt(v2), rel=1e-12)
    assert se == pytest.approx(math.sqrt(grad @ psi @ grad / T), rel=1e-12)
    # b = 3: circular block sums, written with np.roll
    S = sum(np.roll(Yc, -u, axis=0) for u in range(3))
    psi3 = S.T @ S / (T * 3)
    assert _kernels.circular_block_psi(x, y, 3)[1] == pytest.approx(
        math.sqrt(grad @ psi3 @ grad / T), rel=1e-12)


def test_lw_bootstrap_behaviour():
    rng = np.random.default_rng(12)
    x = rng.normal(0.0, 0.04, 240)
    y = 0.2 * x + rng.normal(0.02, 0.04, 240)  # much higher Sharpe ratio
    r = bs.ledoit_wolf_bootstrap(x, y, resamples=499, block_length=4,
                                 rng=np.random.default_rng(1))
    assert r.p_value == pytest.approx(1 / 500) and r.difference < 0
    assert r.resamples == 499 and r.block_length == 4
    same = bs.ledoit_wolf_bootstrap(x, x, resamples=99, rng=np.random.default_rng(1))
    assert same.p_value == 1.0
    assert bs.default_block_length(480) == 8 and bs.default_block_length(1) == 1
    # reproducible from the generator's state
    a = bs.ledoit_wolf_bootstrap(x, 0.5 * x + y, resamples=199, rng=np.random.default_rng(5))
    b = bs.ledoit_wolf_bootstrap(x, 0.5 * x + y, resamples=199, rng=np.random.default_rng(5))
    assert a == b


def test_lw_close_to_iid_delta_method_on_large_iid_sample():
    # With b = 1 on iid data the bootstrap p-value estimates the asymptotic one
    # (Ledoit & Wolf 2008; REFERENCES.md 7c delta method): they agree within MC error.
    rng = np.random.default_rng(21)
    T = 600
    x = rng.normal(0.01, 0.04, T)
    y = 0.6 * x + rng.normal(0.002, 0.035, T)
    d, se = _kernels.circular_block_psi(x, y, 1)
    p_asym = 2 * st.norm.sf(abs(d) / se)
    r = bs.ledoit_wolf_bootstrap(x, y, resamples=2000, block_length=1,
                                 rng=np.random.default_rng(3))
    assert 0.02 < p_asym < 0.9
    assert abs(r.p_value - p_asym) < 0.04


# --------------------------------------------------------------------------- CEQ

def test_ceq_variance_formula_against_simulation():
    # Delta method (DeMiguel, Garlappi & Uppal 2009, RFS 22(5)) under normality: the sd of
    # the CEQ difference across simulated samples matches the formula's standard error.
    rng = np.random.default_rng(8)
    T, D, gamma = 120, 3000, 5.0
    cov = np.array([[0.04 ** 2, 0.7 * 0.04 * 0.06], [0.7 * 0.04 * 0.06, 0.06 ** 2]])
    L = np.linalg.cholesky(cov)
    diffs, ses = [], []
    for _ in range(D):
        z = rng.standard_normal((T, 2)) @ L.T + [0.005, 0.008]
        r = bs.ceq_difference_test(z[:, 0], z[:, 1], gamma)
        diffs.append(r.difference)
        ses.append(r.difference / r.statistic)
    sd_mc = np.std(diffs, ddof=1)
    # se of a sample sd is about sd / sqrt(2 D): 1.3 % here; allow 4 se
    assert abs(np.mean(ses) / sd_mc - 1) < 4 / math.sqrt(2 * D)


def test_ceq_identical_and_closed_form():
    x = np.array([0.01, -0.02, 0.03, 0.0, 0.015])
    assert bs.ceq_difference_test(x, x, 3.0).p_value == 1.0
    y = x[::-1] * 0.5 + 0.001
    r = bs.ceq_difference_test(x, y, 3.0)
    c = np.cov(x, y)
    diff = x.mean() - 1.5 * c[0, 0] - (y.mean() - 1.5 * c[1, 1])
    var = (c[0, 0] + c[1, 1] - 2 * c[0, 1] + 4.5 * (c[0, 0] ** 2 + c[1, 1] ** 2 - 2 * c[0, 1] ** 2)) / 5
    assert r.difference == pytest.approx(diff, rel=1e-12)
    assert r.statistic == pytest.approx(diff / math.sqrt(var), rel=1e-12)


# --------------------------------------------------------------------------- DSR in a run

def test_dsr_in_backtest_uses_all_trials():
    class R:
        def __init__(self, name, w):
            self.name, self.type, self.w = name, "fixed-test", np.array(w)

        def weights(self, m, c):
            return self.w

    rng = np.random.default_rng(6)
    X = rng.normal(0.008, 0.045, (150, 3))
    cfgs = [BacktestConfig(R("a", [0.6, 0.2, 0.2])), BacktestConfig(R("b", [0.1, 0.1, 0.8]))]
    res = run_backtest(X, np.arange(150), ["x", "y", "z"], cfgs, window=30,
                       bootstrap_resamples=0, seed=1, n_trials=10)
    s = res.to_summary()
    srs = [s[n]["sharpe"] for n in ("equal-weight", "a", "b")]
    var = np.var(srs, ddof=1)
    P = 120
    for n in ("equal-weight", "a", "b"):
        x = res.returns[:, res.names.index(n)]
        m, sd, sk, ku = bs.moments_of(x)
        assert s[n]["dsr"] == pytest.approx(
            bs.deflated_sharpe(m / sd, P, sk, ku, var, 10), rel=1e-12)
        assert s[n]["psr"] == pytest.approx(bs.probabilistic_sharpe(m / sd, P, sk, ku), rel=1e-12)
        assert s[n]["dsr"] < s[n]["psr"]
    assert s["equal-weight"]["first_date"] == "30"


# --------------------------------------------------------------------------- size

def _equal_sharpe_pairs(rng, D, T, *, df=None, phi=0.0):
    """D pairs of series with equal Sharpe ratio 0.125, sd (0.04, 0.06), correlation 0.7
    (REFERENCES.md 7b design); optional Student-t innovations and AR(1) coefficient phi."""
    sd = np.array([0.04, 0.06])
    C = np.linalg.cholesky(np.array([[1, 0.7], [0.7, 1]]))
    if df is None:
        e = rng.standard_normal((D, T + 50, 2))
    else:
        e = rng.standard_t(df, (D, T + 50, 2)) / math.sqrt(df / (df - 2))
    e = e @ C.T
    u = np.empty_like(e)
    u[:, 0] = e[:, 0]
    for t in range(1, T + 50):
        u[:, t] = phi * u[:, t - 1] + math.sqrt(1 - phi * phi) * e[:, t]
    u = u[:, 50:]
    return 0.125 * sd + u * sd


def _band(rate, n, k=4.0):
    se = math.sqrt(0.05 * 0.95 / n)
    return abs(rate - 0.05) <= k * se


def test_size_jkm_fast():
    rng = np.random.default_rng(101)
    z = _equal_sharpe_pairs(rng, 2000, 120)
    p = np.array([bs.jobson_korkie_memmel(a[:, 0], a[:, 1]).p_value for a in z])
    assert _band(np.mean(p < 0.05), 2000)


def test_size_lw_fast():
    rng = np.random.default_rng(102)
    D = 300
    z = _equal_sharpe_pairs(rng, D, 120)
    gens = [np.random.default_rng(s) for s in np.random.SeedSequence(7).spawn(D)]
    p = np.array([bs.ledoit_wolf_bootstrap(a[:, 0], a[:, 1], resamples=199, rng=g).p_value
                  for a, g in zip(z, gens)])
    assert _band(np.mean(p < 0.05), D)


def test_size_ceq_fast():
    rng = np.random.default_rng(103)
    gamma = 5.0
    z = _equal_sharpe_pairs(rng, 2000, 120)
    # shift the second series so the two CEQs are equal in the population
    mu = 0.125 * np.array([0.04, 0.06])
    z[:, :, 1] += (mu[0] - gamma / 2 * 0.04 ** 2) - (mu[1] - gamma / 2 * 0.06 ** 2)
    p = np.array([bs.ceq_difference_test(a[:, 0], a[:, 1], gamma).p_value for a in z])
    assert _band(np.mean(p < 0.05), 2000)


@pytest.mark.slow
@pytest.mark.parametrize("df,phi", [(None, 0.0), (5, 0.0), (5, 0.2)])
def test_size_full(df, phi):
    rng = np.random.default_rng(201 + (df or 0) + int(phi * 10))
    D, T = 2000, 240
    z = _equal_sharpe_pairs(rng, D, T, df=df, phi=phi)
    gens = [np.random.default_rng(s) for s in np.random.SeedSequence(8).spawn(D)]
    p_lw = np.array([bs.ledoit_wolf_bootstrap(a[:, 0], a[:, 1], resamples=499, rng=g).p_value
                     for a, g in zip(z, gens)])
    rate = np.mean(p_lw < 0.05)
    print(f"LW size df={df} phi={phi}: {rate:.4f}")
    assert _band(rate, D, 4.0)
    if df is None and phi == 0.0:
        zz = _equal_sharpe_pairs(np.random.default_rng(300), 20000, 120)
        p = np.array([bs.jobson_korkie_memmel(a[:, 0], a[:, 1]).p_value for a in zz])
        print(f"JKM size: {np.mean(p < 0.05):.4f}")
        assert _band(np.mean(p < 0.05), 20000, 4.0)
        gamma = 5.0
        mu = 0.125 * np.array([0.04, 0.06])
        zz[:, :, 1] += (mu[0] - gamma / 2 * 0.04 ** 2) - (mu[1] - gamma / 2 * 0.06 ** 2)
        p = np.array([bs.ceq_difference_test(a[:, 0], a[:, 1], gamma).p_value for a in zz])
        print(f"CEQ size: {np.mean(p < 0.05):.4f}")
        assert _band(np.mean(p < 0.05), 20000, 4.0)


def test_circular_psi_is_bartlett_hac_of_statsmodels_plus_wrap_terms():
    # statsmodels 0.15 S_hac_simple: Newey-West (Bartlett weights 1 - j/(L+1), L = b - 1)
    # inner matrix, unscaled. Our circular block estimator is the same kernel estimator with
    # circular autocovariances: adding the wrap-around products must give it exactly.
    sandwich = pytest.importorskip("statsmodels.stats.sandwich_covariance")
    rng = np.random.default_rng(31)
    T, b = 200, 5
    e = rng.standard_normal((T + 1, 2))
    x = 0.01 + 0.04 * (e[1:, 0] + 0.3 * e[:-1, 0])
    y = 0.008 + 0.05 * (0.5 * e[1:, 0] + e[1:, 1])
    m1, m2, g1, g2 = x.mean(), y.mean(), (x * x).mean(), (y * y).mean()
    Yc = np.column_stack([x - m1, y - m2, x * x - g1, y * y - g2])
    S = sandwich.S_hac_simple(Yc, nlags=b - 1)
    for j in range(1, b):
        w = Yc[:j].T @ Yc[T - j:]  # products that wrap round the end
        S = S + (1 - j / b) * (w + w.T)
    v1, v2 = g1 - m1 ** 2, g2 - m2 ** 2
    grad = np.array([g1 / v1 ** 1.5, -g2 / v2 ** 1.5, -m1 / (2 * v1 ** 1.5), m2 / (2 * v2 ** 1.5)])
    assert _kernels.circular_block_psi(x, y, b)[1] == pytest.approx(
        math.sqrt(grad @ (S / T) @ grad / T), rel=1e-10)
