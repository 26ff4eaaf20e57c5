"""Statistics of a chunk of windows, computed once and shared by the estimators.

The batched entry point cuts the ``(D, T, N)`` input into chunks of ``B`` windows (a
memory and cache setting only: results do not depend on it) and hands each chunk to the
mean and covariance estimators as a :class:`Chunk`. The chunk computes the column means
and the demeaned windows up front in one pass (the means also serve the finiteness check),
and the scatter matrices only when an estimator asks for them.
"""
from __future__ import annotations

import numpy as np

from . import _kernels


class WindowProblem(Exception):
    """Raised inside an estimator for one window; the API turns it into a ``DataError``.

    Attributes: ``window`` (index within the chunk), ``asset`` (column index or None),
    ``message`` (what is wrong, without location), ``singular``
    (True when the problem is a covariance too ill-conditioned to invert).
    """

    def __init__(self, window, asset, message, singular=False):
        super().__init__(message)
        self.singular = bool(singular)
        self.window = int(window)
        self.asset = None if asset is None else int(asset)
        self.message = message


class Chunk:
    """A chunk of ``B`` windows of ``T`` rows and ``N`` assets.

    Parameters
    ----------
    X : ndarray, shape (B, T, N), float64, C-contiguous
        Per-period returns; finiteness is checked by the caller through :attr:`mean`.
    """

    __slots__ = ("X", "B", "T", "N", "mean", "_Y", "_scatter")

    def __init__(self, X):
        self.X = X
        self.B, self.T, self.N = X.shape
        #: (B, N) column means of each window.
        self.mean = np.empty((self.B, self.N))
        # the demeaned windows come out of the same pass over X (one numba kernel)
        self._Y = np.empty_like(X)
        _kernels.center(X, self.mean, self._Y)
        self._scatter = None

    @property
    def Y(self):
        """(B, T, N) demeaned windows ``X - mean``."""
        return self._Y

    @property
    def scatter(self):
        """(B, N, N) ``Y'Y`` per window, exactly symmetric (cached; do not modify)."""
        if self._scatter is None:
            Y = self.Y
            S = np.matmul(np.swapaxes(Y, 1, 2), Y)
            _kernels.symmetrize_scale(S, 1.0)
            self._scatter = S
        return self._scatter

    def scaled_scatter(self, factor, out):
        """Write ``factor * Y'Y`` into ``out`` (B, N, N), exactly symmetric; return ``out``.

        Uses the cached scatter when a mean estimator already computed it; otherwise the
        product is written straight into ``out`` without keeping a copy.
        """
        if self._scatter is not None:
            np.multiply(self._scatter, factor, out=out)
            return out
        Y = self.Y
        np.matmul(np.swapaxes(Y, 1, 2), Y, out=out)
        _kernels.symmetrize_scale(out, float(factor))
        return out

    def variances(self, ddof):
        """(B, N) column variances with divisor ``T - ddof``."""
        if self._scatter is not None:
            return np.diagonal(self._scatter, axis1=1, axis2=2) / (self.T - ddof)
        Y = self.Y
        return np.einsum("btn,btn->bn", Y, Y) / (self.T - ddof)
