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
    "wishart_triangular",
    "wishart_triangular_py",
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


def wishart_triangular_py(chol, chi, low, out):
    """Wishart matrices ``W = (L A)(L A)'`` of a chunk from their Bartlett factors.

    ``L = chol`` is lower triangular; ``A`` is lower triangular with ``A[i, i] =
    sqrt(chi[d, i])`` and the normals of ``low[d]`` below the diagonal, row by row (the
    order of ``numpy.tril_indices(N, -1)``). Both products use only the non-zero
    triangles, about N^3 / 3 multiply-adds in all (two dense products: 4 N^3):

    * ``Bt = (L A)' = A' L'``, row by row: ``Bt[j, :] = sum_{k >= j} A[k, j] L'[k, :]``;
    * the lower triangle of ``W = Bt' Bt``: ``W[i, c] = sum_{k <= c} Bt[k, i] Bt[k, c]``,
      mirrored to the upper one, so ``W`` is exactly symmetric.

    The sums run over ``k`` in groups of four (padding rows of zeros at the end), and the
    rows are padded with zeros to a multiple of eight entries so that the inner loops are
    whole vector lengths; the indices in the inner loops are unsigned so that the compiler
    can vectorise them (a signed index carries numba's negative-index wraparound). No
    fused multiply-add is allowed: each sum is the same rounded operations whatever the
    vector width, so ``W`` does not depend on the CPU's instruction set.

    Parameters
    ----------
    chol : ndarray, shape (N, N), float64
        Lower-triangular factor of the scale matrix (the upper triangle is not read).
    chi : ndarray, shape (D, N), float64
        Chi-square variates.
    low : ndarray, shape (D, N (N - 1) / 2), float64
        Standard normals.
    out : ndarray, shape (D, N, N), float64
        Written in full.
    """
    d_count, n = chi.shape
    w8 = (n + 7) // 8 * 8                     # padded row width
    p = n + 4                                 # rows, with four of zeros for the last group
    lt = np.zeros(p * w8)                     # lt[k, c] = L[c, k], zero for c < k
    for k in range(n):
        for c in range(k, n):
            lt[k * w8 + c] = chol[c, k]
    bt = np.zeros(p * w8)                     # rows of (L A)'
    av = np.zeros(p)                          # column j of A (rows k >= j), zeros past N
    w = np.zeros(n * w8)                      # lower triangle of W, padded rows
    nl = n * (n - 1) // 2
    ld = np.empty(max(nl, 1))                 # this draw's normals, read in order once
    for d in range(d_count):
        for q in range(nl):
            ld[q] = low[d, q]
        for j in range(n):
            av[j] = np.sqrt(chi[d, j])
            for k in range(j + 1, n):
                av[k] = ld[k * (k - 1) // 2 + j]
            jo = j * w8
            for c in range(w8):
                bt[jo + c] = 0.0
            for k in range(j, n, 4):
                a0 = av[k]
                a1 = av[k + 1]
                a2 = av[k + 2]
                a3 = av[k + 3]
                o0 = k * w8
                o1 = o0 + w8
                o2 = o1 + w8
                o3 = o2 + w8
                for c in range((k // 8) * 8, w8):
                    bt[np.uint64(jo + c)] += (a0 * lt[np.uint64(o0 + c)] + a1 * lt[np.uint64(o1 + c)]
                                              + a2 * lt[np.uint64(o2 + c)] + a3 * lt[np.uint64(o3 + c)])
        for i in range(n):
            io = i * w8
            ce = (i + 8) // 8 * 8                 # columns 0..i, padded
            for c in range(ce):
                w[io + c] = 0.0
            for k in range(0, i + 1, 4):
                o0 = k * w8
                o1 = o0 + w8
                o2 = o1 + w8
                o3 = o2 + w8
                b0 = bt[o0 + i]
                b1 = bt[o1 + i]
                b2 = bt[o2 + i]
                b3 = bt[o3 + i]
                for c in range((k // 8) * 8, ce):
                    w[np.uint64(io + c)] += (b0 * bt[np.uint64(o0 + c)] + b1 * bt[np.uint64(o1 + c)]
                                             + b2 * bt[np.uint64(o2 + c)] + b3 * bt[np.uint64(o3 + c)])
        # written row by row (the upper half read from the lower rows of w, which are in
        # cache), so that the output, which is not, is written in order
        o = out[d]
        for i in range(n):
            io = i * w8
            for c in range(i + 1):
                o[i, c] = w[io + c]
            for c in range(i + 1, n):
                o[i, c] = w[c * w8 + i]
    return out


wishart_triangular = njit(cache=True, nogil=True)(wishart_triangular_py)


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
