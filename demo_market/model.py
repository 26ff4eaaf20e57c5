"""The invented demo market: a seeded model of 30 years of monthly returns on ten sleeves.

The scenario is invented. The Kestrelmoor Civic Pension Trust (a fictional
institution) reviews its strategic allocation across ten broad asset sleeves with
generic names. Nothing here is real market data; the numbers are illustrative.

The model (one draw of it is committed as ``data/demo_returns.csv``)
--------------------------------------------------------------------
* **Regimes.** A two-state Markov chain, calm (0) and crisis (1), starting calm,
  with monthly switching probabilities P(calm -> crisis) = 0.02 and
  P(crisis -> calm) = 0.15: about 12 % of months are in crisis, a crisis lasts
  about 6.7 months on average.
* **Correlation.** Standardised shocks follow a three-factor structure (growth,
  duration, inflation): ``C_s = B_s B_s' + diag(1 - rowsum(B_s**2))`` for regime
  ``s``. In a crisis the growth loadings rise (equities, credit, real estate and
  commodities move together) and government bonds load negatively on growth
  (flight to quality), so correlations among risky sleeves are higher.
* **Fat tails.** The shocks are multivariate Student-t with 5 degrees of freedom:
  a normal vector divided by one common ``sqrt(chi2_5 / 5)`` per month, rescaled
  to unit variance. The common divisor also gives tail dependence.
* **Moments.** Each sleeve has an unconditional annual excess return over cash
  and volatility (``Sleeve.excess_return``, ``Sleeve.volatility``), a crisis
  mean (annualised) and a crisis volatility multiplier. The calm mean and
  volatility are solved so that the mixture of the two regimes has the stated
  unconditional mean and variance (at the stationary crisis probability).
* **Appraisal smoothing.** Private Infrastructure is illiquid and valued by
  appraisal: its reported return is ``y_t = (1 - phi) x_t + phi y_{t-1}`` with
  ``phi = 0.6`` (an AR(1) filter of the underlying return ``x_t``). Its reported
  volatility is about half the underlying one and its lag-1 autocorrelation
  about 0.6.
* **Cash.** An annual cash rate follows a mean-reverting AR(1) around 2.5 %
  (persistence 0.985 a month, shock sd 0.15 %, floored at 0); the monthly rate is
  the annual rate / 12. Each sleeve's total return is cash plus its excess return.

All random numbers come from one ``numpy.random.SeedSequence(seed)`` that
spawns four children in a fixed order: regimes, chi-square mixing, normal
shocks, cash rate. The files are written with fixed formatting (6 decimals, ``\\n``
line ends), so ``python -m demo_market`` regenerates them byte for byte with the
same numpy release (numpy does not promise identical streams across releases).

The moment ranges are typical of long-run capital-market-assumption tables
(common practice; the values are illustrative, not a forecast).
"""
from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

__all__ = [
    "INSTITUTION",
    "SLEEVES",
    "DEFAULT_SEED",
    "Sleeve",
    "DemoMarket",
    "generate",
    "write",
    "DATA_DIR",
    "RETURNS_FILE",
    "CASH_FILE",
]

INSTITUTION = "Kestrelmoor Civic Pension Trust"  # invented
DEFAULT_SEED = 20260131
MONTHS = 360
START = "1995-01-31"
DATA_DIR = Path(__file__).resolve().parent / "data"
RETURNS_FILE = "demo_returns.csv"
CASH_FILE = "demo_cash.csv"

#: Monthly regime switching probabilities.
P_CALM_TO_CRISIS = 0.02
P_CRISIS_TO_CALM = 0.15
DEGREES_OF_FREEDOM = 5.0
SMOOTHING = 0.6
CASH_MEAN, CASH_PERSISTENCE, CASH_SHOCK, CASH_START = 0.025, 0.985, 0.0015, 0.045


@dataclass(frozen=True)
class Sleeve:
    """One asset sleeve of the demo market (annual, decimal, in excess of cash).

    ``calm_loadings`` and ``crisis_loadings`` are the (growth, duration,
    inflation) factor loadings of the standardised shock in each regime.
    ``smoothing`` is the appraisal-smoothing coefficient (0 = none).
    """

    name: str
    excess_return: float
    volatility: float
    crisis_return: float
    crisis_vol_multiplier: float
    calm_loadings: tuple
    crisis_loadings: tuple
    smoothing: float = 0.0


SLEEVES = (
    Sleeve("Domestic Equity", 0.050, 0.160, -0.30, 1.8, (0.80, 0.00, 0.00), (0.92, 0.00, 0.00)),
    Sleeve("Global Equity", 0.048, 0.150, -0.28, 1.8, (0.85, 0.00, 0.00), (0.94, 0.00, 0.00)),
    Sleeve("Emerging Equity", 0.060, 0.220, -0.40, 1.7, (0.70, 0.00, 0.15), (0.88, 0.00, 0.10)),
    Sleeve("Government Bonds", 0.012, 0.055, 0.06, 1.3, (-0.05, 0.90, -0.10), (-0.40, 0.80, -0.05)),
    Sleeve("Inflation-Linked Bonds", 0.012, 0.060, 0.00, 1.4, (0.00, 0.65, 0.45), (-0.10, 0.60, 0.40)),
    Sleeve("Corporate Credit", 0.018, 0.065, -0.06, 1.6, (0.30, 0.75, 0.00), (0.55, 0.55, 0.00)),
    Sleeve("High Yield", 0.035, 0.100, -0.25, 1.9, (0.65, 0.25, 0.05), (0.85, 0.10, 0.00)),
    Sleeve("Real Estate", 0.040, 0.170, -0.30, 1.8, (0.60, 0.20, 0.10), (0.80, 0.10, 0.05)),
    Sleeve("Private Infrastructure", 0.045, 0.140, -0.12, 1.5, (0.35, 0.20, 0.20), (0.55, 0.10, 0.10),
           smoothing=SMOOTHING),
    Sleeve("Commodities", 0.025, 0.180, -0.30, 1.5, (0.30, -0.10, 0.60), (0.60, -0.10, 0.45)),
)


@dataclass(frozen=True)
class DemoMarket:
    """One draw of the demo market.

    Attributes
    ----------
    dates : ndarray, shape (T,), datetime64[ns]
        Month-ends.
    returns : ndarray, shape (T, N)
        Reported total monthly simple returns (cash + excess, smoothed where the
        sleeve is appraisal-smoothed).
    cash : ndarray, shape (T,)
        Monthly cash (risk-free) rate.
    regimes : ndarray, shape (T,), int
        0 calm, 1 crisis.
    assets : tuple of str
    seed : int
    """

    dates: np.ndarray
    returns: np.ndarray
    cash: np.ndarray
    regimes: np.ndarray
    assets: tuple
    seed: int


def _correlation(loadings: np.ndarray) -> np.ndarray:
    c = loadings @ loadings.T
    np.fill_diagonal(c, 1.0)
    return c


def regime_parameters(sleeves=SLEEVES):
    """Monthly (mean, sd) per regime solved from the unconditional targets.

    Returns
    -------
    mu : ndarray, shape (2, N)
    sd : ndarray, shape (2, N)
    """
    pi = P_CALM_TO_CRISIS / (P_CALM_TO_CRISIS + P_CRISIS_TO_CALM)
    mu = np.empty((2, len(sleeves)))
    sd = np.empty((2, len(sleeves)))
    for i, s in enumerate(sleeves):
        m = s.excess_return / 12.0
        mk = s.crisis_return / 12.0
        mc = (m - pi * mk) / (1.0 - pi)
        var = s.volatility ** 2 / 12.0 - pi * (1.0 - pi) * (mc - mk) ** 2
        sc2 = var / ((1.0 - pi) + pi * s.crisis_vol_multiplier ** 2)
        if sc2 <= 0:
            raise ValueError(f"sleeve {s.name}: crisis mean too far from the calm mean for its volatility")
        mu[:, i] = (mc, mk)
        sd[:, i] = (np.sqrt(sc2), s.crisis_vol_multiplier * np.sqrt(sc2))
    return mu, sd


def generate(seed: int = DEFAULT_SEED, months: int = MONTHS, start: str = START,
             sleeves=SLEEVES) -> DemoMarket:
    """Draw the demo market (see the module docstring for the model).

    Parameters
    ----------
    seed : int
        Root of the one SeedSequence all draws come from.
    months : int
        Number of monthly periods T.
    start : str
        First month-end.
    """
    n = len(sleeves)
    regime_ss, mix_ss, normal_ss, cash_ss = np.random.SeedSequence(seed).spawn(4)
    u = np.random.default_rng(regime_ss).random(months)
    w = np.random.default_rng(mix_ss).chisquare(DEGREES_OF_FREEDOM, size=months)
    g = np.random.default_rng(normal_ss).standard_normal((months, n))
    eta = np.random.default_rng(cash_ss).standard_normal(months)

    regimes = np.empty(months, dtype=np.int64)
    state = 0
    for t in range(months):
        if state == 0 and u[t] < P_CALM_TO_CRISIS:
            state = 1
        elif state == 1 and u[t] < P_CRISIS_TO_CALM:
            state = 0
        regimes[t] = state

    chol = [np.linalg.cholesky(_correlation(np.array([s.calm_loadings for s in sleeves]))),
            np.linalg.cholesky(_correlation(np.array([s.crisis_loadings for s in sleeves])))]
    nu = DEGREES_OF_FREEDOM
    scale = np.sqrt((nu - 2.0) / nu) / np.sqrt(w / nu)          # unit-variance Student-t
    mu, sd = regime_parameters(sleeves)

    excess = np.empty((months, n))
    for t in range(months):
        s = regimes[t]
        z = (chol[s] @ g[t]) * scale[t]
        excess[t] = mu[s] + sd[s] * z

    for i, sl in enumerate(sleeves):
        if sl.smoothing:
            phi = sl.smoothing
            y = np.empty(months)
            prev = sl.excess_return / 12.0
            for t in range(months):
                prev = (1.0 - phi) * excess[t, i] + phi * prev
                y[t] = prev
            excess[:, i] = y

    rate = np.empty(months)
    c = CASH_START
    for t in range(months):
        c = max(0.0, CASH_MEAN + CASH_PERSISTENCE * (c - CASH_MEAN) + CASH_SHOCK * eta[t])
        rate[t] = c
    cash = rate / 12.0

    dates = pd.date_range(start=start, periods=months, freq="ME").to_numpy(dtype="datetime64[ns]")
    return DemoMarket(dates=dates, returns=cash[:, None] + excess, cash=cash, regimes=regimes,
                      assets=tuple(s.name for s in sleeves), seed=seed)


def _date_strings(dates) -> list:
    return [str(d)[:10] for d in np.asarray(dates, dtype="datetime64[D]")]


def _fmt(x: float) -> str:
    s = f"{x:.6f}"
    return "0.000000" if s == "-0.000000" else s


def returns_csv(market: DemoMarket) -> bytes:
    """The returns file's bytes: ``date`` and one column per sleeve, 6 decimals."""
    lines = ["date," + ",".join(market.assets)]
    for d, row in zip(_date_strings(market.dates), market.returns):
        lines.append(d + "," + ",".join(_fmt(v) for v in row))
    return ("\n".join(lines) + "\n").encode("utf-8")


def cash_csv(market: DemoMarket) -> bytes:
    """The cash file's bytes: ``date`` and ``cash_rate`` (monthly, decimal, 6 decimals)."""
    lines = ["date,cash_rate"]
    for d, v in zip(_date_strings(market.dates), market.cash):
        lines.append(f"{d},{_fmt(v)}")
    return ("\n".join(lines) + "\n").encode("utf-8")


def write(out_dir=DATA_DIR, seed: int = DEFAULT_SEED) -> dict:
    """Generate and write the demo files into ``out_dir``; return {file name: sha256}."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    market = generate(seed)
    written = {}
    for name, data in ((RETURNS_FILE, returns_csv(market)), (CASH_FILE, cash_csv(market))):
        tmp = out / (name + ".tmp")
        tmp.write_bytes(data)
        tmp.replace(out / name)
        written[name] = hashlib.sha256(data).hexdigest()
    return written
