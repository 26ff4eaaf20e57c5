"""Numerical kernels of the backtest: clean float64 arrays in, arrays out.

Each kernel is written once as a plain Python function (the undecorated twin, named
``*_py``) and compiled with numba (``cache=True``) under the public kernel name. The
tests run both on the same inputs and compare. Kernels never validate, never draw
random numbers (the bootstrap receives its block starts) and never touch pandas.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit

__all__ = [
    "hold_path",
    "hold_path_py",
    "block_bootstrap_sharpe",
    "block_bootstrap_sharpe_py",
    "circular_block_psi",
    "circular_block_psi_py",
]


# --------------------------------------------------------------------------- holdings

def hold_path_py(excess, risk_free, start, rebalance_rows, targets, cost_rate):
    """Hold target weights between rebalancing dates, drifting with returns.

    Parameters
    ----------
    excess : ndarray, shape (T, N)
        Per-period asset returns in excess of ``risk_free`` (decimal).
    risk_free : ndarray, shape (T,)
        Per-period risk-free rate (decimal); total return = excess + risk_free.
    start : int
        First out-of-sample row; must equal ``rebalance_rows[0]``.
    rebalance_rows : ndarray, shape (R,), int64
        Strictly increasing rows at whose start the portfolio is reset to the target.
    targets : ndarray, shape (R, N)
        Target risky-asset weights; the rest, ``1 - sum``, is cash at ``risk_free``.
    cost_rate : ndarray, shape (N,)
        Proportional cost per unit of traded weight (bps / 10 000).

    Returns
    -------
    gross : ndarray, shape (P,)
        Excess return before costs of each out-of-sample period, P = T - start.
    net : ndarray, shape (P,)
        Excess return after costs: ``(1 - cost) (1 + R_p) - 1 - rf`` where ``R_p`` is
        the total portfolio return and ``cost`` the fraction of wealth paid to trade
        at the start of the period (zero between rebalancing dates).
    turnover : ndarray, shape (R,)
        ``sum |target - drifted|`` at each rebalancing date; NaN at the first
        (the initial allocation is not counted as a trade and pays no cost).
    cost : ndarray, shape (R,)
        Fraction of wealth paid at each rebalancing date (0 at the first).
    drifted : ndarray, shape (R, N)
        Weights just before each rebalance (NaN row at the first).
    """
    T, N = excess.shape
    P = T - start
    R = rebalance_rows.shape[0]
    gross = np.empty(P)
    net = np.empty(P)
    turnover = np.empty(R)
    cost = np.zeros(R)
    drifted = np.empty((R, N))
    w = np.zeros(N)
    j = 0
    for t in range(start, T):
        paid = 0.0
        if j < R and rebalance_rows[j] == t:
            if j == 0:
                turnover[0] = np.nan
                for i in range(N):
                    drifted[0, i] = np.nan
            else:
                tv = 0.0
                c = 0.0
                for i in range(N):
                    drifted[j, i] = w[i]
                    d = abs(targets[j, i] - w[i])
                    tv += d
                    c += cost_rate[i] * d
                turnover[j] = tv
                cost[j] = c
                paid = c
            for i in range(N):
                w[i] = targets[j, i]
            j += 1
        rf = risk_free[t]
        g = 0.0
        for i in range(N):
            g += w[i] * excess[t, i]
        total = g + rf  # sum w_i (x_i + rf) + (1 - sum w) rf
        gross[t - start] = g
        if paid == 0.0:
            net[t - start] = g
        else:
            net[t - start] = (1.0 - paid) * (1.0 + total) - 1.0 - rf
        denom = 1.0 + total
        for i in range(N):
            w[i] = w[i] * (1.0 + excess[t, i] + rf) / denom
    return gross, net, turnover, cost, drifted


hold_path = njit(cache=True)(hold_path_py)


# --------------------------------------------------------------------------- bootstrap

def _sharpe_pieces_py(m1, m2, g1, g2):
    """Difference of Sharpe ratios from first and (uncentred) second moments, and its gradient."""
    v1 = g1 - m1 * m1
    v2 = g2 - m2 * m2
    if v1 <= 0.0 or v2 <= 0.0:
        return np.nan, np.nan, np.nan, np.nan, np.nan
    s1 = v1 ** 1.5
    s2 = v2 ** 1.5
    delta = m1 / math.sqrt(v1) - m2 / math.sqrt(v2)
    return delta, g1 / s1, -g2 / s2, -0.5 * m1 / s1, 0.5 * m2 / s2


# Shared by both twins (a scalar helper; the twins differ in everything else).
_sharpe_pieces = njit(cache=True)(_sharpe_pieces_py)


def _raw_moments_py(x, y):
    """Means and raw second moments (divisor T) of two series: (m1, m2, g1, g2)."""
    T = x.shape[0]
    m1 = 0.0
    m2 = 0.0
    g1 = 0.0
    g2 = 0.0
    for t in range(T):
        m1 += x[t]
        m2 += y[t]
        g1 += x[t] * x[t]
        g2 += y[t] * y[t]
    return m1 / T, m2 / T, g1 / T, g2 / T


_raw_moments = njit(cache=True)(_raw_moments_py)


def circular_block_psi_py(x, y, block_length):
    """Long-run covariance of (x - m1, y - m2, x^2 - g1, y^2 - g2) from circular block sums.

    ``Psi = 1 / (T b) * sum_s S_s S_s'`` with ``S_s`` the sum over the b observations
    starting at s (wrapping round the end), s = 0..T-1. This is the expected value of
    the block estimator used inside the circular block bootstrap; with b = 1 it is
    the iid covariance (divisor T). Returns the Sharpe difference (divisor-T
    moments) and its standard error ``sqrt(grad' Psi grad / T)``.
    """
    T = x.shape[0]
    b = block_length
    m1, m2, g1, g2 = _raw_moments(x, y)
    delta, d0, d1, d2, d3 = _sharpe_pieces(m1, m2, g1, g2)
    if math.isnan(delta):
        return np.nan, np.nan
    psi = np.zeros((4, 4))
    s = np.empty(4)
    for start in range(T):
        s[:] = 0.0
        for u in range(b):
            t = (start + u) % T
            s[0] += x[t] - m1
            s[1] += y[t] - m2
            s[2] += x[t] * x[t] - g1
            s[3] += y[t] * y[t] - g2
        for a in range(4):
            for c in range(4):
                psi[a, c] += s[a] * s[c]
    grad = np.array([d0, d1, d2, d3])
    var = 0.0
    for a in range(4):
        for c in range(4):
            var += grad[a] * psi[a, c] * grad[c]
    var /= T * b * T
    if var <= 0.0:
        return delta, np.nan
    return delta, math.sqrt(var)


circular_block_psi = njit(cache=True)(circular_block_psi_py)


def block_bootstrap_sharpe_py(x, y, starts, block_length, delta_hat):
    """Studentized statistics of a circular block bootstrap of a Sharpe-ratio difference.

    Parameters
    ----------
    x, y : ndarray, shape (T,)
        The paired return series.
    starts : ndarray, shape (B, L), int64
        Block starting rows in [0, T) for each of B resamples; L = ceil(T / b).
        Blocks wrap round the end; the concatenation is cut at T rows.
    block_length : int
        b, the block length.
    delta_hat : float
        Sharpe difference of the original series (divisor-T moments).

    Returns
    -------
    stat : ndarray, shape (B,)
        ``|delta* - delta_hat| / se*`` per resample, with ``se*`` from the block sums
        of the resample itself: ``Psi* = (1/T) sum_j S_j S_j'`` over its blocks
        (the cut last block included). NaN where a resample is degenerate.
    """
    T = x.shape[0]
    B, L = starts.shape
    b = block_length
    out = np.empty(B)
    xs = np.empty(T)
    ys = np.empty(T)
    psi = np.empty((4, 4))
    s = np.empty(4)
    grad = np.empty(4)
    for k in range(B):
        pos = 0
        for j in range(L):
            st = starts[k, j]
            for u in range(b):
                if pos >= T:
                    break
                t = st + u
                if t >= T:
                    t -= T
                xs[pos] = x[t]
                ys[pos] = y[t]
                pos += 1
        m1, m2, g1, g2 = _raw_moments(xs, ys)
        delta, d0, d1, d2, d3 = _sharpe_pieces(m1, m2, g1, g2)
        if math.isnan(delta):
            out[k] = np.nan
            continue
        psi[:, :] = 0.0
        pos = 0
        while pos < T:
            s[:] = 0.0
            stop = min(pos + b, T)
            for t in range(pos, stop):
                s[0] += xs[t] - m1
                s[1] += ys[t] - m2
                s[2] += xs[t] * xs[t] - g1
                s[3] += ys[t] * ys[t] - g2
            for a in range(4):
                for c in range(4):
                    psi[a, c] += s[a] * s[c]
            pos = stop
        var = 0.0
        grad[0] = d0
        grad[1] = d1
        grad[2] = d2
        grad[3] = d3
        for a in range(4):
            for c in range(4):
                var += grad[a] * psi[a, c] * grad[c]
        var /= T * T
        if var <= 0.0:
            out[k] = np.nan
        else:
            out[k] = abs(delta - delta_hat) / math.sqrt(var)
    return out


block_bootstrap_sharpe = njit(cache=True)(block_bootstrap_sharpe_py)


def block_bootstrap_stats_numpy(x, y, starts, b):
    """Plain-numpy twin of :func:`block_bootstrap_sharpe`: on index arrays, all resamples
    at once. Returns ``(delta, se)``, each shape (B,): the resampled Sharpe differences and
    their block standard errors (divisor-T moments)."""
    T = len(x)
    B, L = starts.shape
    idx = ((starts[:, :, None] + np.arange(b)) % T).reshape(B, L * b)[:, :T]
    X, Y = x[idx], y[idx]
    m1, m2 = X.mean(1), Y.mean(1)
    g1, g2 = (X * X).mean(1), (Y * Y).mean(1)
    v1, v2 = g1 - m1 ** 2, g2 - m2 ** 2
    delta = m1 / np.sqrt(v1) - m2 / np.sqrt(v2)
    grad = np.stack([g1 / v1 ** 1.5, -g2 / v2 ** 1.5, -m1 / (2 * v1 ** 1.5),
                     m2 / (2 * v2 ** 1.5)], axis=1)
    Yc = np.stack([X - m1[:, None], Y - m2[:, None], X * X - g1[:, None],
                   Y * Y - g2[:, None]], axis=2)
    pad = np.zeros((B, L * b, 4))
    pad[:, :T] = Yc
    S = pad.reshape(B, L, b, 4).sum(axis=2)
    psi = np.einsum("blk,blm->bkm", S, S) / T
    se = np.sqrt(np.einsum("bk,bkm,bm->b", grad, psi, grad) / T)
    return delta, se
