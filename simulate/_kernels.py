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
