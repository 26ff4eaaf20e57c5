"""Compiled kernels of the resampling engine (numba, ``cache=True``).

Kernels take clean float64/int64 arrays and scalars only: no pandas, no random
generator inside (the random numbers they need are drawn by the caller and passed
in), no validation. Each kernel has an undecorated plain-Python twin
(``<name>_py``) that ``tests/test_simulate_kernels.py`` compares it against.
"""
from __future__ import annotations

import numpy as np
from numba import njit

__all__ = [
    "stationary_indices",
    "stationary_indices_py",
    "bin_counts",
    "bin_counts_py",
    "bartlett_factors",
    "bartlett_factors_py",
    "symmetrize_half",
    "symmetrize_half_py",
    "wishart_blocked",
    "wishart_blocked_py",

    "score_columns",
    "score_columns_py",
    "add_row",
    "add_row_py",
    "beats_counts",
    "beats_counts_py",
    "chan_fold",
    "chan_fold_py",
]


def stationary_indices_py(starts, restart, n):
    """Row indices of stationary-bootstrap histories (Politis & Romano 1994).

    Parameters
    ----------
    starts : ndarray, shape (D, L), int64
        Uniform random row indices in ``[0, n)``; ``starts[d, 0]`` starts history ``d``
        and ``starts[d, t]`` is used when a new block starts at ``t``.
    restart : ndarray, shape (D, L), bool
        ``restart[d, t]`` is true when a new block starts at position ``t`` (drawn with
        probability ``p = 1 / mean block length``); ``restart[:, 0]`` is ignored.
    n : int
        Number of rows in the history; the series wraps around circularly.

    Returns
    -------
    ndarray, shape (D, L), int64
        ``idx[d, t] = starts[d, t]`` on a restart, else ``(idx[d, t-1] + 1) mod n``.
    """
    d_count, length = starts.shape
    out = np.empty((d_count, length), dtype=np.int64)
    for d in range(d_count):
        cur = starts[d, 0]
        out[d, 0] = cur
        for t in range(1, length):
            if restart[d, t]:
                cur = starts[d, t]
            else:
                cur = cur + 1
                if cur >= n:
                    cur = 0
            out[d, t] = cur
    return out


stationary_indices = njit(cache=True, nogil=True)(stationary_indices_py)


def bin_counts_py(values, low, width, n_bins, zero_tol, counts):
    """Add fixed-width histogram counts of ``values`` column by column into ``counts``.

    Parameters
    ----------
    values : ndarray, shape (D, K), float64
        D observations of K quantities (e.g. per-draw weights of K rule-asset pairs).
    low : float
        Left edge of regular bin 1.
    width : float
        Bin width; regular bin ``b`` (1-based) covers ``[low + (b-1) width, low + b width)``.
    n_bins : int
        Number of regular bins.
    zero_tol : float
        Values with ``|x| <= zero_tol`` are counted in the zero atom instead (weights of
        assets a constrained rule leaves out are exactly zero, a point mass).
    counts : ndarray, shape (K, n_bins + 3), int64
        Updated in place. Column 0 counts values below ``low``, columns ``1..n_bins`` the
        regular bins, column ``n_bins + 1`` values at or above ``low + n_bins width`` and
        column ``n_bins + 2`` the zero atom.
    """
    d_count, k_count = values.shape
    for d in range(d_count):
        for k in range(k_count):
            v = values[d, k]
            if abs(v) <= zero_tol:
                b = n_bins + 2
            else:
                x = (v - low) / width
                if x < 0.0:
                    b = 0
                elif x >= n_bins:
                    b = n_bins + 1
                else:
                    b = int(x) + 1
            counts[k, b] += 1


bin_counts = njit(cache=True, nogil=True)(bin_counts_py)


def bartlett_factors_py(chi, low, out):
    """Lower-triangular Bartlett factors ``A`` of a chunk of Wishart draws, into ``out``.

    Parameters
    ----------
    chi : ndarray, shape (D, N), float64
        Chi-square variates; ``A[d, i, i] = sqrt(chi[d, i])``.
    low : ndarray, shape (D, N (N - 1) / 2), float64
        Standard normals, placed below the diagonal row by row (the order of
        ``numpy.tril_indices(N, -1)``).
    out : ndarray, shape (D, N, N), float64
        Written in full: the diagonal, the normals below it and zeros above it.
    """
    d_count, n = chi.shape
    for d in range(d_count):
        k = 0
        for i in range(n):
            for j in range(i):
                out[d, i, j] = low[d, k]
                k += 1
            out[d, i, i] = np.sqrt(chi[d, i])
            for j in range(i + 1, n):
                out[d, i, j] = 0.0
    return out


bartlett_factors = njit(cache=True, nogil=True)(bartlett_factors_py)


def symmetrize_half_py(w):
    """``w <- (w + w') / 2`` per matrix, in place, in one pass.

    Parameters
    ----------
    w : ndarray, shape (D, N, N), float64
        Each entry becomes ``(w[d, i, j] + w[d, j, i]) * 0.5``: the same two roundings as
        ``w += w.transpose(0, 2, 1).copy(); w *= 0.5``, so the result is identical to the
        last bit, and exactly symmetric.
    """
    d_count, n, _ = w.shape
    for d in range(d_count):
        for i in range(n):
            for j in range(i, n):
                v = (w[d, i, j] + w[d, j, i]) * 0.5
                w[d, i, j] = v
                w[d, j, i] = v
    return w


symmetrize_half = njit(cache=True, nogil=True)(symmetrize_half_py)


def wishart_blocked_py(chol, chi, low, out):
    """Wishart matrices ``W = (L A)(L A)'`` of a chunk from their Bartlett factors, with
    the products cut in 2 x 2 blocks so that the zeros of the two triangular factors are
    never multiplied.

    ``L = chol`` (lower triangular) and ``A`` (lower triangular, ``A[i, i] =
    sqrt(chi[d, i])``, the normals of ``low[d]`` below the diagonal row by row, as
    :func:`bartlett_factors`). With ``h = N // 2``: ``B11 = L11 A11``, ``B21 = L21 A11 +
    L22 A21``, ``B22 = L22 A22`` (``B12 = 0``), then ``W11 = B11 B11'``, ``W21 = B21 B11'``,
    ``W22 = B21 B21' + B22 B22'``: eight half-size matrix products (BLAS) instead of two
    full ones, half the multiply-adds. The upper half is mirrored, so ``W`` is exactly
    symmetric. Needs N >= 2.

    Parameters
    ----------
    chol : ndarray, shape (N, N), float64
    chi : ndarray, shape (D, N), float64
    low : ndarray, shape (D, N (N - 1) / 2), float64
    out : ndarray, shape (D, N, N), float64
        Written in full.
    """
    d_count, n = chi.shape
    h = n // 2
    m = n - h
    l11 = np.ascontiguousarray(chol[:h, :h])
    l21 = np.ascontiguousarray(chol[h:, :h])
    l22 = np.ascontiguousarray(chol[h:, h:])
    a11 = np.zeros((h, h))
    a21 = np.empty((m, h))
    a22 = np.zeros((m, m))
    b11 = np.empty((h, h))
    b21 = np.empty((m, h))
    b22 = np.empty((m, m))
    b11t = np.empty((h, h))
    b21t = np.empty((h, m))
    b22t = np.empty((m, m))
    t21 = np.empty((m, h))
    w11 = np.empty((h, h))
    w21 = np.empty((m, h))
    w22 = np.empty((m, m))
    t22 = np.empty((m, m))
    for d in range(d_count):
        k = 0
        for i in range(n):
            for j in range(i):
                v = low[d, k]
                k += 1
                if i < h:
                    a11[i, j] = v
                elif j < h:
                    a21[i - h, j] = v
                else:
                    a22[i - h, j - h] = v
            if i < h:
                a11[i, i] = np.sqrt(chi[d, i])
            else:
                a22[i - h, i - h] = np.sqrt(chi[d, i])
        np.dot(l11, a11, b11)
        np.dot(l21, a11, b21)
        np.dot(l22, a21, t21)
        b21 += t21
        np.dot(l22, a22, b22)
        b11t[:, :] = b11.T
        b21t[:, :] = b21.T
        b22t[:, :] = b22.T
        np.dot(b11, b11t, w11)
        np.dot(b21, b11t, w21)
        np.dot(b21, b21t, w22)
        np.dot(b22, b22t, t22)
        w22 += t22
        o = out[d]
        for i in range(h):
            for j in range(i + 1):
                v = w11[i, j]
                o[i, j] = v
                o[j, i] = v
        for i in range(m):
            for j in range(h):
                v = w21[i, j]
                o[h + i, j] = v
                o[j, h + i] = v
            for j in range(i + 1):
                v = w22[i, j]
                o[h + i, h + j] = v
                o[h + j, h + i] = v
    return out


wishart_blocked = njit(cache=True, nogil=True)(wishart_blocked_py)


def score_columns_py(er, var, half_gamma, out):
    """Fill the (D, 5) population metrics from expected returns and variances.

    Parameters
    ----------
    er : ndarray, shape (D,), float64
        ``w' mu`` per draw.
    var : ndarray, shape (D,), float64
        ``w' Sigma w`` per draw (round-off may make it slightly negative; NaN for a
        failed draw).
    half_gamma : float
        ``0.5 * gamma``.
    out : ndarray, shape (D, 5), float64
        Columns: expected return, variance clipped at 0, volatility, Sharpe ratio
        (``er / vol``; 0 without risk; NaN when the variance is NaN) and CEQ
        ``er - half_gamma * var``. Element by element the same operations as the numpy
        form in ``simulate.engine.score`` (``numpy.maximum`` semantics for NaN and signed
        zeros included), so the results are identical to the last bit.
    """
    for d in range(er.shape[0]):
        e = er[d]
        v = var[d]
        if v <= 0.0:            # numpy.maximum(v, 0.0): NaN stays NaN, -0.0 becomes 0.0
            v = 0.0
        vol = np.sqrt(v)
        if vol > 0.0:
            sh = e / vol
        elif np.isnan(vol):
            sh = np.nan
        else:
            sh = 0.0
        out[d, 0] = e
        out[d, 1] = v
        out[d, 2] = vol
        out[d, 3] = sh
        out[d, 4] = e - half_gamma * v
    return out


score_columns = njit(cache=True, nogil=True)(score_columns_py)


def add_row_py(x, row):
    """``x += row`` for a (R, N) array and an (N,) row, in place, element by element.

    The same additions as numpy's broadcast ``x += row``; numpy's inner loop has the
    length N, which costs about 15 ns per row of x at N = 10 (2 us per 120-row draw).
    """
    r_count, n = x.shape
    for r in range(r_count):
        for j in range(n):
            x[r, j] += row[j]
    return x


add_row = njit(cache=True, nogil=True)(add_row_py)


def beats_counts_py(metrics, ref, rtol, out):
    """Per rule, the draws whose CEQ and Sharpe ratio beat the reference rule's.

    Parameters
    ----------
    metrics : ndarray, shape (D, R, 5), float64
        Population metrics (columns of ``simulate.engine.METRICS``: CEQ is column 4,
        Sharpe column 3, variance column 1); NaN for failed draws, which never beat.
    ref : int
        Index of the reference rule (1/N or the policy).
    rtol : float
        Relative tie margin: a draw beats on CEQ when its CEQ exceeds the reference's by
        more than ``rtol (|ceq| + variance) + 1e-300`` of the reference, on Sharpe when it
        exceeds by more than ``rtol |sharpe| + 1e-300``.
    out : ndarray, shape (R, 2), int64
        Written with the counts (CEQ, Sharpe). The same comparisons, element by element,
        as ``simulate.engine._beats``.
    """
    d_count, r_count, _ = metrics.shape
    for r in range(r_count):
        out[r, 0] = 0
        out[r, 1] = 0
    for d in range(d_count):
        e4 = metrics[d, ref, 4]
        e3 = metrics[d, ref, 3]
        tol_ceq = rtol * (abs(e4) + abs(metrics[d, ref, 1])) + 1e-300
        tol_sh = rtol * abs(e3) + 1e-300
        lim_ceq = e4 + tol_ceq
        lim_sh = e3 + tol_sh
        for r in range(r_count):
            if metrics[d, r, 4] > lim_ceq:
                out[r, 0] += 1
            if metrics[d, r, 3] > lim_sh:
                out[r, 1] += 1
    return out


beats_counts = njit(cache=True, nogil=True)(beats_counts_py)


def chan_fold_py(n, mean, m2, cn, cm, c2):
    """Fold chunk moments into running ones, chunk after chunk, in place.

    Parameters
    ----------
    n, mean, m2 : ndarray, shape (K,), float64
        Running count, mean and sum of squared deviations; updated in place.
    cn, cm, c2 : ndarray, shape (C, K), float64
        The chunks' counts, means and sums of squared deviations, in chunk order.

    Each step is the pairwise update of Chan, Golub & LeVeque (1979), with the same
    operations in the same order as ``simulate.stats._chan``: ``n = na + nb``,
    ``frac = nb / n`` (0 when ``n = 0``), ``mean = ma + (mb - ma) frac``,
    ``m2 = m2a + m2b + delta delta na frac``.
    """
    c_count, k_count = cn.shape
    for c in range(c_count):
        for k in range(k_count):
            na = n[k]
            ma = mean[k]
            nb = cn[c, k]
            tot = na + nb
            delta = cm[c, k] - ma
            frac = nb / tot if tot > 0 else 0.0
            n[k] = tot
            mean[k] = ma + delta * frac
            m2[k] = m2[k] + c2[c, k] + delta * delta * na * frac


chan_fold = njit(cache=True, nogil=True)(chan_fold_py)
