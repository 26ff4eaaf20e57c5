"""Statistics of out-of-sample return series: Sharpe-ratio inference and tests against 1/N.

All inputs are per-period decimal returns; all outputs are per period (not
annualised). Each public function validates its inputs once and then computes.

References
----------
Jobson, J.D. & Korkie, B.M. (1981), "Performance hypothesis testing with the Sharpe and
Treynor measures", Journal of Finance 36(4), 889-908.
Memmel, C. (2003), "Performance hypothesis testing with the Sharpe ratio", Finance
Letters 1(1), 21-23.
Lo, A.W. (2002), "The statistics of Sharpe ratios", Financial Analysts Journal 58(4), 36-52.
Ledoit, O. & Wolf, M. (2008), "Robust performance hypothesis testing with the Sharpe
ratio", Journal of Empirical Finance 15(5), 850-859.
DeMiguel, V., Garlappi, L. & Uppal, R. (2009), "Optimal versus naive diversification:
how inefficient is the 1/N portfolio strategy?", Review of Financial Studies 22(5),
1915-1953.
Bailey, D.H. & Lopez de Prado, M. (2012), "The Sharpe ratio efficient frontier",
Journal of Risk 15(2), 3-44.
Bailey, D.H. & Lopez de Prado, M. (2014), "The deflated Sharpe ratio: correcting for
selection bias, backtest overfitting and non-normality", Journal of Portfolio
Management 40(5), 94-107.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats as _st

from estimators.core import DataError, SettingsError

from . import _kernels

__all__ = [
    "EULER_GAMMA",
    "SharpeTest",
    "CeqTest",
    "sharpe_ratio",
    "moments_of",
    "lo_standard_error",
    "sharpe_standard_error",
    "probabilistic_sharpe",
    "min_track_record",
    "expected_max_sharpe",
    "deflated_sharpe",
    "jobson_korkie_memmel",
    "ceq_difference_test",
    "ledoit_wolf_bootstrap",
    "default_block_length",
]

#: Euler-Mascheroni constant (used by the expected maximum of K normal draws).
EULER_GAMMA = 0.5772156649015329


@dataclass(frozen=True)
class SharpeTest:
    """A test of equal Sharpe ratios, SR(x) - SR(y) = 0.

    Attributes
    ----------
    difference : float
        SR(x) - SR(y), per period, with the moments the test uses.
    statistic : float
        The standardised difference (z for Jobson-Korkie-Memmel, the original
        studentized statistic for the bootstrap).
    p_value : float
        Two-sided p-value; NaN when undefined (a series with zero variance).
    method : str
    resamples : int
        Bootstrap resamples (0 for the asymptotic test).
    block_length : int
        Bootstrap block length (0 for the asymptotic test).
    """

    difference: float
    statistic: float
    p_value: float
    method: str
    resamples: int = 0
    block_length: int = 0


@dataclass(frozen=True)
class CeqTest:
    """The delta-method test of equal certainty-equivalent returns, CEQ(x) - CEQ(y) = 0."""

    difference: float
    statistic: float
    p_value: float
    risk_aversion: float


# --------------------------------------------------------------------------- validation

def _series_iv(x, name="x", min_len=3) -> np.ndarray:
    a = np.asarray(x, dtype=np.float64)
    if a.ndim != 1:
        raise DataError(f"{name} must be one-dimensional (T,), got shape {a.shape}")
    if a.shape[0] < min_len:
        raise DataError(f"{name} needs at least {min_len} observations, got {a.shape[0]}")
    bad = np.flatnonzero(~np.isfinite(a))
    if bad.size:
        raise DataError(f"{name} is not finite at row {int(bad[0])}")
    return np.ascontiguousarray(a)


def _pair_iv(x, y):
    x = _series_iv(x, "x")
    y = _series_iv(y, "y")
    if x.shape != y.shape:
        raise DataError(f"x and y must have the same length, got {x.shape[0]} and {y.shape[0]}")
    return x, y


# --------------------------------------------------------------------------- one series

def _constant(x) -> bool:
    """All values equal (then the sd is 0 exactly, not the rounding residue of the mean)."""
    return bool(x.min() == x.max())


def sharpe_ratio(x) -> float:
    """Sharpe ratio mean / standard deviation (divisor T - 1) of excess returns x (T,).

    NaN when the series is constant (the ratio is undefined).
    """
    x = _series_iv(x, min_len=2)
    if _constant(x):
        return float("nan")
    return float(x.mean() / x.std(ddof=1))


def moments_of(x):
    """Return (mean, sd ddof=1, skewness, kurtosis) of x; skewness and (non-excess)
    kurtosis use divisor-T central moments, as in Bailey & Lopez de Prado (2012)."""
    x = _series_iv(x, min_len=2)
    m = x.mean()
    d = x - m
    m2 = np.mean(d * d)
    if m2 <= 0 or _constant(x):
        return float(x[0]) if _constant(x) else float(m), 0.0, float("nan"), float("nan")
    skew = np.mean(d ** 3) / m2 ** 1.5
    kurt = np.mean(d ** 4) / m2 ** 2
    return float(m), float(x.std(ddof=1)), float(skew), float(kurt)


def lo_standard_error(sharpe: float, periods: int) -> float:
    """Asymptotic standard error of a Sharpe ratio under iid normal returns (Lo 2002):
    ``sqrt((1 + SR^2 / 2) / T)``."""
    return math.sqrt((1.0 + 0.5 * sharpe * sharpe) / periods)


def _nonnormal_factor(sharpe, skew, kurt):
    return 1.0 - skew * sharpe + (kurt - 1.0) / 4.0 * sharpe * sharpe


def sharpe_standard_error(sharpe: float, periods: int, skew: float, kurt: float) -> float:
    """Standard error under iid non-normal returns:
    ``sqrt((1 - skew SR + (kurt - 1)/4 SR^2) / T)`` (kurt non-excess; Mertens 2002 and
    Opdyke 2007, from memory; the same expression sits inside the probabilistic Sharpe
    ratio)."""
    f = _nonnormal_factor(sharpe, skew, kurt)
    return math.sqrt(f / periods) if f > 0 else float("nan")


def probabilistic_sharpe(sharpe: float, periods: int, skew: float, kurt: float,
                         benchmark: float = 0.0) -> float:
    """Probabilistic Sharpe ratio (Bailey & Lopez de Prado 2012):
    ``Phi((SR - SR*) sqrt(T - 1) / sqrt(1 - skew SR + (kurt - 1)/4 SR^2))``.

    All Sharpe ratios per period; kurt is the (non-excess) kurtosis.
    """
    if not (np.isfinite(sharpe) and np.isfinite(skew) and np.isfinite(kurt)) or periods < 2:
        return float("nan")
    f = _nonnormal_factor(sharpe, skew, kurt)
    if f <= 0:
        return float("nan")
    return float(_st.norm.cdf((sharpe - benchmark) * math.sqrt(periods - 1) / math.sqrt(f)))


def min_track_record(sharpe: float, skew: float, kurt: float, benchmark: float = 0.0,
                     confidence: float = 0.95) -> float:
    """Minimum track record length, in periods (Bailey & Lopez de Prado 2012):
    ``1 + (1 - skew SR + (kurt - 1)/4 SR^2) (z_conf / (SR - SR*))^2``.

    Infinite when SR <= SR* (no track record is long enough); NaN when undefined.
    """
    if not (np.isfinite(sharpe) and np.isfinite(skew) and np.isfinite(kurt)):
        return float("nan")
    if sharpe <= benchmark:
        return float("inf")
    f = _nonnormal_factor(sharpe, skew, kurt)
    if f <= 0:
        return float("nan")
    z = _st.norm.ppf(confidence)
    return float(1.0 + f * (z / (sharpe - benchmark)) ** 2)


def expected_max_sharpe(trial_variance: float, n_trials: int) -> float:
    """Expected maximum Sharpe ratio of K trials under the null of zero skill
    (Bailey & Lopez de Prado 2014):
    ``sqrt(V) ((1 - g) Phi^-1(1 - 1/K) + g Phi^-1(1 - 1/(K e)))``, g = Euler's constant.

    0 for K = 1 (nothing was selected).
    """
    if n_trials < 1:
        raise SettingsError(f"n_trials must be at least 1, got {n_trials}")
    if n_trials == 1 or trial_variance <= 0:
        return 0.0
    k = float(n_trials)
    return float(math.sqrt(trial_variance) * (
        (1.0 - EULER_GAMMA) * _st.norm.ppf(1.0 - 1.0 / k)
        + EULER_GAMMA * _st.norm.ppf(1.0 - 1.0 / (k * math.e))))


def deflated_sharpe(sharpe: float, periods: int, skew: float, kurt: float,
                    trial_variance: float, n_trials: int) -> float:
    """Deflated Sharpe ratio (Bailey & Lopez de Prado 2014): the probabilistic Sharpe ratio
    against the expected maximum Sharpe ratio of ``n_trials`` unskilled trials whose
    Sharpe ratios vary with variance ``trial_variance`` (per period squared)."""
    sr0 = expected_max_sharpe(trial_variance, n_trials)
    return probabilistic_sharpe(sharpe, periods, skew, kurt, benchmark=sr0)


# --------------------------------------------------------------------------- two series

def _two_sided(z: float) -> float:
    if not np.isfinite(z):
        return float("nan")
    return float(2.0 * _st.norm.sf(abs(z)))


def jobson_korkie_memmel(x, y) -> SharpeTest:
    """Jobson & Korkie (1981) test of SR(x) = SR(y) with Memmel's (2003) correction.

    ``z = (s_y m_x - s_x m_y) / sqrt(theta)``, ``theta = (1/T) [2 s_x^2 s_y^2
    - 2 s_x s_y s_xy + m_x^2 s_y^2 / 2 + m_y^2 s_x^2 / 2 - m_x m_y s_xy^2 / (s_x s_y)]``,
    with sample moments (divisor T - 1). Asymptotically N(0, 1) under iid normal
    returns. Identical series give z = 0, p = 1; a constant series gives NaN.
    """
    x, y = _pair_iv(x, y)
    return _jkm(x, y)


def _jkm(x, y) -> SharpeTest:
    T = x.shape[0]
    mx, my = x.mean(), y.mean()
    c = np.cov(x, y, ddof=1)
    vx, vy, sxy = c[0, 0], c[1, 1], c[0, 1]
    if vx <= 0 or vy <= 0 or _constant(x) or _constant(y):
        return SharpeTest(float("nan"), float("nan"), float("nan"), "jobson-korkie-memmel")
    sx, sy = math.sqrt(vx), math.sqrt(vy)
    diff = mx / sx - my / sy
    theta = (2 * vx * vy - 2 * sx * sy * sxy + 0.5 * mx * mx * vy + 0.5 * my * my * vx
             - mx * my / (sx * sy) * sxy * sxy) / T
    num = sy * mx - sx * my
    scale = max(abs(sy * mx), abs(sx * my), sx * sy)
    if theta <= 1e-30 * scale * scale or abs(num) <= 1e-14 * scale:
        # theta = 0 only for perfectly correlated series; then the difference is exact.
        if abs(num) <= 1e-14 * scale:
            return SharpeTest(float(diff), 0.0, 1.0, "jobson-korkie-memmel")
        return SharpeTest(float(diff), float(math.copysign(math.inf, num)), 0.0,
                          "jobson-korkie-memmel")
    z = num / math.sqrt(theta)
    return SharpeTest(float(diff), float(z), _two_sided(z), "jobson-korkie-memmel")


def ceq_difference_test(x, y, risk_aversion: float) -> CeqTest:
    """Delta-method test of CEQ(x) = CEQ(y), CEQ = mean - gamma/2 variance (divisor T - 1).

    Under iid normal returns the sample means are independent of the sample
    (co)variances, ``Var(s_i^2) = 2 s_i^4 / T`` and ``Cov(s_x^2, s_y^2) = 2 s_xy^2 / T``,
    so the difference has asymptotic variance
    ``(1/T) [s_x^2 + s_y^2 - 2 s_xy + gamma^2 / 2 (s_x^4 + s_y^4 - 2 s_xy^2)]``
    (the delta-method test DeMiguel, Garlappi & Uppal 2009 use; the normal-theory
    moment covariances are our reading of it).
    """
    x, y = _pair_iv(x, y)
    if not (np.isfinite(risk_aversion) and risk_aversion > 0):
        raise SettingsError(f"risk_aversion must be a positive number, got {risk_aversion!r}")
    return _ceq(x, y, float(risk_aversion))


def _ceq(x, y, gamma) -> CeqTest:
    T = x.shape[0]
    c = np.cov(x, y, ddof=1)
    vx, vy, sxy = c[0, 0], c[1, 1], c[0, 1]
    diff = (x.mean() - 0.5 * gamma * vx) - (y.mean() - 0.5 * gamma * vy)
    var = (vx + vy - 2 * sxy + 0.5 * gamma * gamma * (vx * vx + vy * vy - 2 * sxy * sxy)) / T
    scale = max(vx, vy, 1e-300)
    if var <= 1e-28 * scale:
        if abs(diff) <= 1e-14 * max(abs(x.mean()), abs(y.mean()), scale):
            return CeqTest(float(diff), 0.0, 1.0, gamma)
        return CeqTest(float(diff), float(math.copysign(math.inf, diff)), 0.0, gamma)
    z = diff / math.sqrt(var)
    return CeqTest(float(diff), float(z), _two_sided(z), gamma)


def default_block_length(periods: int) -> int:
    """The block length used when none is set: ``round(T^(1/3))``, at least 1.

    T^(1/3) is the rate for block-bootstrap variance estimation (Hall, Horowitz &
    Jing 1995, Biometrika, from memory); the constant 1 is our choice. Ledoit &
    Wolf (2008) calibrate b by simulation instead, which costs far more.
    """
    return max(1, int(round(periods ** (1.0 / 3.0))))


def ledoit_wolf_bootstrap(x, y, *, resamples: int = 1000, block_length=None,
                          rng: np.random.Generator) -> SharpeTest:
    """Studentized circular block bootstrap test of SR(x) = SR(y) (Ledoit & Wolf 2008).

    Parameters
    ----------
    x, y : array_like, shape (T,)
        Paired per-period excess returns.
    resamples : int, default 1000
        Bootstrap resamples B.
    block_length : int or None
        Block length b, 1 <= b <= T/2 (a block as long as the series leaves no
        variation between blocks); None uses :func:`default_block_length`.
    rng : numpy.random.Generator
        Source of the block starts (the only random numbers used).

    Notes
    -----
    The difference uses divisor-T moments, ``SR = m / sqrt(g - m^2)`` with ``g`` the
    mean of squares. Its standard error is ``sqrt(grad' Psi grad / T)`` where Psi is
    the long-run covariance of ``(x - m_x, y - m_y, x^2 - g_x, y^2 - g_y)``: on the
    data, the circular block estimator with the same b (the expectation of the
    bootstrap's own block estimator; the paper uses a prewhitened kernel estimator
    here, from memory); on each resample, ``(1/T) sum_j S_j S_j'`` over its blocks. The p-value is
    ``(1 + #{|d* - d| / se* >= |d| / se}) / (B + 1)``, which is valid under fat
    tails and serial dependence (as T and b grow). Resamples with a degenerate
    variance count as exceedances (conservative).
    """
    x, y = _pair_iv(x, y)
    if not isinstance(rng, np.random.Generator):
        raise TypeError("rng must be a numpy.random.Generator")
    T = x.shape[0]
    b = default_block_length(T) if block_length is None else int(block_length)
    if b < 1 or b > max(1, T // 2):
        raise SettingsError(f"bootstrap_block_length must be between 1 and T/2 = {T // 2}, "
                            f"got {b}")
    if resamples < 1:
        raise SettingsError(f"bootstrap_resamples must be at least 1, got {resamples}")
    starts = rng.integers(0, T, size=(resamples, -(-T // b)), dtype=np.int64)
    return _lw(x, y, starts, b)


def _lw(x, y, starts, b, *, psi=None, boot=None) -> SharpeTest:
    """The test on clean arrays; ``psi``/``boot`` swap in the kernels' Python twins."""
    psi = _kernels.circular_block_psi if psi is None else psi
    boot = _kernels.block_bootstrap_sharpe if boot is None else boot
    B = starts.shape[0]
    if _constant(x) or _constant(y):  # a Sharpe ratio is undefined
        return SharpeTest(float("nan"), float("nan"), float("nan"), "ledoit-wolf-bootstrap", B, b)
    delta, se = psi(x, y, b)
    if not (np.isfinite(delta) and np.isfinite(se)) or se <= 0:
        if np.isfinite(delta) and np.array_equal(x, y):
            return SharpeTest(0.0, 0.0, 1.0, "ledoit-wolf-bootstrap", B, b)
        return SharpeTest(float(delta), float("nan"), float("nan"), "ledoit-wolf-bootstrap", B, b)
    stat = abs(delta) / se
    tstar = boot(x, y, starts, b, delta)
    exceed = int(np.sum(~(tstar < stat)))  # NaN counts as an exceedance
    p = (1.0 + exceed) / (B + 1.0)
    return SharpeTest(float(delta), float(math.copysign(stat, delta)), float(p),
                      "ledoit-wolf-bootstrap", B, b)
