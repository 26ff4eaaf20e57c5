"""Streaming statistics that merge exactly, whatever the block size or worker count.

The engine cuts the draws of a study into fixed chunks (:data:`CHUNK_DRAWS` draws).
Each chunk's floating-point sums are computed on exactly that chunk's draws and kept as
a separate partial; partials are added in chunk order by :class:`ChunkSums`. Integer
counts (histograms, "beats" counts) are order-free. Hence the merged numbers are the
same to the last digit whether a block holds one chunk or all of them.
"""
from __future__ import annotations

import math

import numpy as np

from . import _kernels

__all__ = ["CHUNK_DRAWS", "ChunkSums", "WeightHistogram", "mean_sd_se", "chunk_moments",
           "moments_mean_sd_se"]

#: Draws per chunk: every chunk gets its own child of the study's SeedSequence. Part of
#: the random design (changing it changes the draws), so it is recorded in summary.json.
CHUNK_DRAWS = 125


class ChunkSums:
    """Running totals of per-chunk partials, folded strictly in chunk order.

    Two kinds of partials arrive, each an array with one row per chunk:

    * ``"<name>"``: a plain sum, added;
    * ``"<name>:n"``, ``"<name>:mean"``, ``"<name>:m2"``: count, mean and sum of squared
      deviations from the chunk's own mean, combined with the pairwise update of Chan,
      Golub & LeVeque (1979): ``m2 = m2_a + m2_b + delta^2 n_a n_b / (n_a + n_b)``. This
      keeps the variance of constant values exactly zero and avoids the cancellation of
      "sum of squares minus n mean^2".

    ``total`` maps plain names to sums and moment names to ``(n, mean, m2)``.
    """

    def __init__(self):
        self.total: dict = {}
        self.next_chunk = 0

    def add(self, first_chunk: int, partials: dict) -> None:
        """Add a block's partials, shape ``(n_chunks, ...)`` each, starting at ``first_chunk``."""
        if first_chunk != self.next_chunk:
            raise ValueError(f"chunk {first_chunk} arrived, expected {self.next_chunk}: "
                             f"blocks must be merged in block order")
        n_chunks = 0
        for name, arr in partials.items():
            n_chunks = max(n_chunks, arr.shape[0])
            if name.endswith(":mean") or name.endswith(":m2"):
                continue
            if name.endswith(":n"):
                base = name[:-2]
                cn = partials[name]
                cm = partials[base + ":mean"]
                c2 = partials[base + ":m2"]
                acc = self.total.get(base)
                start = 0
                if acc is None:
                    if not arr.shape[0]:
                        self.total[base] = None
                        continue
                    acc = _chan(None, (cn[0], cm[0], c2[0]))
                    start = 1
                self.total[base] = _chan_fold(acc, cn[start:], cm[start:], c2[start:])
                continue
            acc = self.total.get(name)
            if acc is None:
                acc = np.zeros(arr.shape[1:], dtype=np.float64)
            for c in range(arr.shape[0]):
                acc = acc + arr[c]
            self.total[name] = acc
        self.next_chunk += n_chunks


def _chan(acc, part):
    """Combine (n, mean, m2) running moments with a chunk's (Chan, Golub & LeVeque 1979)."""
    nb, mb, m2b = (np.asarray(x, dtype=np.float64) for x in part)
    if acc is None:
        return nb.copy(), mb.copy(), m2b.copy()
    na, ma, m2a = acc
    n = na + nb
    with np.errstate(invalid="ignore", divide="ignore"):
        delta = mb - ma
        frac = np.where(n > 0, nb / np.where(n > 0, n, 1.0), 0.0)
        mean = ma + delta * frac
        m2 = m2a + m2b + delta * delta * na * frac
    return n, mean, m2


def _chan_fold(acc, cn, cm, c2):
    """:func:`_chan` applied chunk after chunk (rows of ``cn``, ``cm``, ``c2``) in one
    kernel; the same operations in the same order (a test compares the two)."""
    n, mean, m2 = (np.array(x, dtype=np.float64, copy=True) for x in acc)
    if cn.shape[0]:
        shape = n.shape
        k = n.size
        fn, fm, f2 = n.reshape(k), mean.reshape(k), m2.reshape(k)
        _kernels.chan_fold(fn, fm, f2,
                           *(np.ascontiguousarray(x, dtype=np.float64).reshape(-1, k)
                             for x in (cn, cm, c2)))
        n, mean, m2 = fn.reshape(shape), fm.reshape(shape), f2.reshape(shape)
    return n, mean, m2


def chunk_moments(values: np.ndarray):
    """(n, mean, m2) of one chunk along axis 0, ignoring NaN (a draw without a value)."""
    x = np.asarray(values, dtype=np.float64)
    valid = ~np.isnan(x)
    if valid.all():
        d = x.shape[0]
        mean = x.sum(axis=0) / d
        dev = x - mean
        return np.full(mean.shape, float(d)), mean, (dev * dev).sum(axis=0)
    n = valid.sum(axis=0).astype(np.float64)
    xs = np.where(valid, x, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(n > 0, xs.sum(axis=0) / np.where(n > 0, n, 1.0), 0.0)
    dev = np.where(valid, x - mean, 0.0)
    return n, mean, (dev * dev).sum(axis=0)


def moments_mean_sd_se(total):
    """Mean, sd (divisor n - 1) and standard error from ``(n, mean, m2)``; NaN for n < 2."""
    n, mean, m2 = total
    with np.errstate(invalid="ignore", divide="ignore"):
        sd = np.where(n > 1, np.sqrt(np.maximum(m2, 0.0) / (n - 1.0)), np.nan)
        se = sd / np.sqrt(n)
        mean = np.where(n > 0, mean, np.nan)
    return mean, sd, se


def mean_sd_se(s1, s2, n):
    """Mean, standard deviation (divisor n - 1) and Monte Carlo standard error of the mean.

    From the sum ``s1`` and the sum of squares ``s2`` of ``n`` values (``n`` a number or
    an array broadcasting against ``s1``). The variance is clipped at zero (it can come
    out at -1e-20 for constant values through rounding); sd and se are NaN for n < 2.
    """
    s1 = np.asarray(s1, dtype=np.float64)
    s2 = np.asarray(s2, dtype=np.float64)
    n = np.asarray(n, dtype=np.float64)
    mean = s1 / n
    with np.errstate(invalid="ignore", divide="ignore"):
        var = np.maximum(s2 - n * mean * mean, 0.0) / (n - 1.0)
        sd = np.where(n > 1, np.sqrt(var), np.nan)
        se = sd / np.sqrt(n)
    return mean, sd, se


class WeightHistogram:
    """Fixed-bin layout of per-draw weights, for percentiles exact to half a bin.

    Parameters
    ----------
    low, high : float
        Range of the regular bins (values outside go to an under- or overflow bin).
    width : float
        Bin width; percentiles are exact to ``width / 2``.
    zero_tol : float
        Weights with ``|w| <= zero_tol`` form a separate atom at exactly zero.
    """

    def __init__(self, low: float, high: float, width: float, zero_tol: float = 1e-10):
        self.low = float(low)
        self.width = float(width)
        self.n_bins = int(round((high - low) / width)) + 1
        self.zero_tol = float(zero_tol)
        nb = self.n_bins
        centers = self.low + (np.arange(nb) + 0.5) * self.width
        # regular bins that lie wholly at or below zero come before the atom
        self._split = int(np.sum(self.low + (np.arange(nb) + 1) * self.width <= 0.0))
        # value of each position along the real line (see percentiles)
        self._seq_values = np.concatenate(([np.nan], centers[:self._split], [0.0],
                                           centers[self._split:], [np.nan]))
        # the count columns in that order (see percentiles_rows)
        regular = np.arange(1, nb + 1)
        self._seq_order = np.concatenate(([0], regular[:self._split], [nb + 2],
                                          regular[self._split:], [nb + 1]))

    @property
    def n_columns(self) -> int:
        return self.n_bins + 3

    def percentiles(self, counts: np.ndarray, qs, vmin: float, vmax: float):
        """Percentiles (0-100) from one row of counts; None when in an overflow bin.

        Uses the inverted empirical distribution function (the smallest value at which
        the share of draws at or below it reaches q): the zero atom reports 0.0, a
        regular bin its midpoint clipped to the observed ``[vmin, vmax]``.
        """
        return self.percentiles_rows(np.asarray(counts)[None, :], qs, [vmin], [vmax])[0]

    def percentiles_rows(self, counts: np.ndarray, qs, vmin, vmax) -> list:
        """:meth:`percentiles` of every row of ``counts`` (rows, :attr:`n_columns`) at once.

        ``vmin`` and ``vmax`` hold each row's observed range. Returns one list of
        ``len(qs)`` values (float or None) per row.
        """
        # Order of the mass along the real line: underflow, regular bins below zero, the
        # zero atom, regular bins at or above zero, overflow (layout fixed at __init__).
        cum = np.cumsum(np.asarray(counts, dtype=np.int64)[:, self._seq_order], axis=1)
        total = cum[:, -1].copy()                                         # (rows,)
        targets = np.stack([np.maximum(1, np.ceil(q / 100.0 * total - 1e-9)) for q in qs],
                           axis=1)                                        # (rows, Q)
        # the first position whose cumulative count reaches the target (searchsorted, left),
        # for all rows in one search: row r is shifted by r * step, above every count
        rows, width = cum.shape
        step = int(total.max(initial=0)) + 2
        shift = np.arange(rows, dtype=np.int64)[:, None] * step
        cum += shift
        pos = np.searchsorted(cum.ravel(), (targets.astype(np.int64) + shift).ravel())
        pos = pos.reshape(rows, -1) - np.arange(rows)[:, None] * width
        np.minimum(pos, width - 1, out=pos)                 # rows without draws (None below)
        values = self._seq_values[pos].tolist()
        out = []
        for r, row in enumerate(values):
            if total[r] == 0:
                out.append([None for _ in qs])
                continue
            lo, hi = float(vmin[r]), float(vmax[r])
            out.append([None if not math.isfinite(v) else
                        (float(min(max(v, lo), hi)) if v != 0.0 else 0.0) for v in row])
        return out
