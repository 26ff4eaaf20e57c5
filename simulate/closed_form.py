"""Closed forms the engine checks itself against.

Kan, R. & Zhou, G. (2007), "Optimal portfolio choice with parameter uncertainty",
Journal of Financial and Quantitative Analysis 42(3), 621-656: for iid normal excess
returns ``N(mu, Sigma)`` and the plug-in rule ``w = S_mle^-1 m / gamma`` (sample mean
``m``, covariance with divisor T, a risk-free asset, no other constraint), the expected
out-of-sample utility ``U(w) = w'mu - gamma / 2 w' Sigma w`` is

``E[U] = (1 / gamma) (k1 theta2 - k2 (theta2 + N / T) / 2)``, with
``k1 = T / (T - N - 2)``, ``k2 = T^2 (T - 2) / ((T - N - 1)(T - N - 2)(T - N - 4))``
and ``theta2 = mu' Sigma^-1 mu`` (needs ``T > N + 4``).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from estimators.core import SettingsError

__all__ = ["KanZhou", "kan_zhou", "squared_sharpe"]


@dataclass(frozen=True)
class KanZhou:
    """Kan & Zhou (2007) terms. ``optimum`` is the true optimal utility theta2 / (2 gamma)."""

    k1: float
    k2: float
    theta2: float
    expected_utility: float
    optimum: float


def squared_sharpe(mean, cov) -> float:
    """``theta2 = mu' Sigma^-1 mu``, the squared maximum Sharpe ratio (per period)."""
    mu = np.asarray(mean, dtype=np.float64)
    return float(mu @ np.linalg.solve(np.asarray(cov, dtype=np.float64), mu))


def kan_zhou(theta2: float, n_assets: int, length: int, gamma: float) -> KanZhou:
    """Expected utility of the plug-in mean-variance rule (Kan & Zhou 2007).

    Parameters
    ----------
    theta2 : float
        Squared maximum Sharpe ratio of the population, per period.
    n_assets, length : int
        N and T; needs ``T > N + 4``.
    gamma : float
        Risk aversion.
    """
    n, t = int(n_assets), int(length)
    if t <= n + 4:
        raise SettingsError(f"the Kan & Zhou closed form needs T > N + 4 (T = {t}, N = {n})")
    k1 = t / (t - n - 2)
    k2 = t * t * (t - 2) / ((t - n - 1) * (t - n - 2) * (t - n - 4))
    eu = (k1 * theta2 - 0.5 * k2 * (theta2 + n / t)) / gamma
    return KanZhou(k1=k1, k2=k2, theta2=theta2, expected_utility=eu, optimum=theta2 / (2 * gamma))
