"""Covariance estimators, each working on a chunk of windows at once.

Every function here has the signature ``fn(chunk, params, out) -> intensity or None``:
``chunk`` is an :class:`estimators._chunk.Chunk` of ``B`` windows of ``T`` rows and
``N`` assets (per-period decimal returns), ``params`` the validated estimator parameters,
``out`` a ``(B, N, N)`` float64 array the estimate is written into (per period, squared
decimal units). The return value is the ``(B,)`` shrinkage intensity of a shrinkage
estimator (the weight on the target, in [0, 1]) or ``None``. Outputs are exactly
symmetric and positive semi-definite up to round-off.

Notation: ``m`` is a window's column mean, ``y_t = r_t - m`` the demeaned rows,
``S = (1/T) sum_t y_t y_t'`` the maximum-likelihood (1/T) covariance. All shrinkage
estimators shrink this 1/T matrix (the convention of the papers' estimators and of
scikit-learn 1.9.1), so their divisor is reported as ``"T"``.
"""
from __future__ import annotations

import numpy as np

from . import _kernels
from ._chunk import WindowProblem

__all__ = [
    "sample",
    "sample_mle",
    "ewma",
    "ewma_weights",
    "ledoit_wolf_identity",
    "ledoit_wolf_constant_correlation",
    "ledoit_wolf_single_index",
    "oas",
]

#: A variance counts as zero when its standard deviation is below this fraction of the
#: window's scale (the larger of the asset's |mean| and the largest volatility).
ZERO_VARIANCE_RTOL = 1e-12


def sample(chunk, params, out):
    """Unbiased sample covariance, ``sum_t y_t y_t' / (T - 1)``.

    The textbook estimator; ``numpy.cov(x, rowvar=False)`` computes the same (checked in
    the tests against numpy). Singular when ``T <= N``.
    """
    chunk.scaled_scatter(1.0 / (chunk.T - 1), out)
    return None


def sample_mle(chunk, params, out):
    """Maximum-likelihood covariance ``S = sum_t y_t y_t' / T`` (Gaussian MLE).

    Equals ``numpy.cov(x, rowvar=False, bias=True)``. Singular when ``T <= N``.
    """
    chunk.scaled_scatter(1.0 / chunk.T, out)
    return None


def ewma_weights(T, decay):
    """Normalised exponential weights of ``T`` rows, oldest first.

    Row ``t`` (0 = oldest) has age ``T - 1 - t`` and weight proportional to
    ``decay ** age``; the weights sum to 1.

    Returns
    -------
    ndarray, shape (T,)
    """
    age = np.arange(T - 1, -1, -1, dtype=np.float64)
    w = decay ** age
    return w / w.sum()


def ewma(chunk, params, out):
    """Exponentially weighted covariance, demeaned with the weighted mean, bias-corrected.

    Convention (stated because several are in use):

    * weights ``w_t`` proportional to ``decay ** age``, age 0 for the most recent row,
      normalised to sum to 1; a half-life ``h`` (in periods) means ``decay = 0.5 ** (1/h)``;
    * demeaned: ``m_w = sum_t w_t r_t`` and ``C = sum_t w_t (r_t - m_w)(r_t - m_w)'``;
    * bias-corrected: the estimate is ``C / (1 - sum_t w_t**2)`` (the usual correction
      for reliability weights). With ``decay = 1`` this is exactly the unbiased sample
      covariance.

    This is the convention of pandas' ``DataFrame.ewm(alpha=1 - decay, adjust=True)
    .cov(bias=False)`` (its defaults), checked against pandas 3.1.1 in the tests. A decay of
    0.94 for daily data is common practice (no source); pick the half-life in periods of
    your data's frequency. Only the covariance is weighted: the mean estimators are not.
    """
    T = chunk.T
    w = ewma_weights(T, params["ewma_decay"])
    X = chunk.X
    mw = np.matmul(w, X)                                   # (B, N)
    Z = (X - mw[:, None, :]) * np.sqrt(w)[None, :, None]
    np.matmul(np.swapaxes(Z, 1, 2), Z, out=out)
    _kernels.symmetrize_scale(out, 1.0 / (1.0 - float(np.dot(w, w))))
    return None


def _check_positive_variances(chunk, S, what):
    d = np.diagonal(S, axis1=1, axis2=2)
    scale = np.maximum(np.abs(chunk.mean), np.sqrt(d.max(axis=1, keepdims=True)))
    bad = np.sqrt(d) <= ZERO_VARIANCE_RTOL * scale
    if bad.any():
        b, i = np.argwhere(bad)[0]
        raise WindowProblem(
            b, i,
            f"has zero variance in the window, so the {what} target is undefined "
            "(use 'ledoit-wolf-identity' or 'oas', or drop the asset)",
        )


def ledoit_wolf_identity(chunk, params, out):
    """Ledoit-Wolf shrinkage toward a scaled identity.

    ``Sigma = delta * (tr S / N) I + (1 - delta) * S`` with
    ``delta = clip(pi / (T * gamma), 0, 1)``, where
    ``pi = sum_ij (1/T) sum_t (y_it y_jt - s_ij)**2`` and
    ``gamma = ||S - (tr S / N) I||_F**2``: the paper's ``b**2 / d**2`` with
    ``b**2 = min(bbar**2, d**2)``.

    Source: Ledoit, O. & Wolf, M. (2004), "A well-conditioned estimator for
    large-dimensional covariance matrices", Journal of Multivariate Analysis 88(2),
    365-411 (pages from memory). Conventions: data demeaned by the column means, ``S``
    with divisor 1/T; this is what scikit-learn's ``LedoitWolf`` (1.9.1,
    ``assume_centered=False``) does, and the tests check intensity and matrix against it.
    One asset: ``delta = 0``.
    """
    chunk.scaled_scatter(1.0 / chunk.T, out)
    delta = np.empty(chunk.B)
    _kernels.lw_identity(chunk.Y, out, delta)
    return delta


def ledoit_wolf_constant_correlation(chunk, params, out):
    """Ledoit-Wolf shrinkage toward the constant-correlation matrix.

    Target ``F``: ``f_ii = s_ii``, ``f_ij = rbar * sqrt(s_ii s_jj)`` with ``rbar`` the
    average of the sample correlations over the pairs i < j. ``Sigma = delta F +
    (1 - delta) S`` with ``delta = clip((pi - rho) / (T * gamma), 0, 1)``:

    * ``pi = sum_ij (1/T) sum_t (y_it y_jt - s_ij)**2``;
    * ``rho = sum_i pi_ii + sum_{i != j} (rbar / 2) [sqrt(s_jj / s_ii) theta_ii,ij +
      sqrt(s_ii / s_jj) theta_jj,ij]``, ``theta_ii,ij = (1/T) sum_t (y_it**2 - s_ii)
      (y_it y_jt - s_ij)``;
    * ``gamma = ||F - S||_F**2``.

    Source: Ledoit, O. & Wolf, M. (2004), "Honey, I shrunk the sample covariance
    matrix", Journal of Portfolio Management 30(4), 110-119. Data demeaned, ``S`` with
    divisor 1/T. ``F`` is positive semi-definite because ``rbar >= -1/(N-1)`` for any
    correlation matrix. Every asset needs a non-zero variance in the window (else a
    ``DataError``). One asset: ``F = S`` and ``delta = 0``.
    """
    chunk.scaled_scatter(1.0 / chunk.T, out)
    _check_positive_variances(chunk, out, "constant-correlation")
    delta = np.empty(chunk.B)
    _kernels.lw_constant_correlation(chunk.Y, out, delta)
    return delta


def ledoit_wolf_single_index(chunk, params, out):
    """Ledoit-Wolf shrinkage toward a single-index (market-model) covariance.

    The market is the **equal-weighted average of the N assets** in the window (the
    paper uses a market index; with no index in the data this is the usual choice).
    With ``s_i0`` the covariance of asset i with the market and ``s_00`` the market's
    variance, the target is ``f_ii = s_ii``, ``f_ij = s_i0 s_j0 / s_00``, and
    ``delta = clip((pi - rho) / (T * gamma), 0, 1)`` with ``pi`` and ``gamma`` as for
    the constant-correlation target and
    ``rho = sum_i pi_ii + sum_{i != j} (1/T) sum_t r_ij,t``,
    ``r_ij,t = [s_j0 s_00 y_it + s_i0 s_00 y_jt - s_i0 s_j0 y_0t] y_0t y_it y_jt / s_00**2
    - f_ij s_ij`` (``y_0t`` the demeaned market return).

    Source: Ledoit, O. & Wolf, M. (2003), "Improved estimation of the covariance matrix
    of stock returns with an application to portfolio selection", Journal of Empirical
    Finance 10(5), 603-621. Data demeaned, ``S`` with divisor 1/T. ``F`` is positive
    semi-definite (``s_ii >= s_i0**2 / s_00`` by Cauchy-Schwarz). The market needs a
    non-zero variance (else a ``DataError``). One asset: ``F = S``, ``delta = 0``.
    """
    chunk.scaled_scatter(1.0 / chunk.T, out)
    s00 = out.mean(axis=(1, 2))
    dmax = np.diagonal(out, axis1=1, axis2=2).max(axis=1)
    bad = ~(s00 > (ZERO_VARIANCE_RTOL ** 2) * dmax)
    if bad.any():
        raise WindowProblem(
            int(np.argmax(bad)), None,
            "the equal-weighted market has zero variance in the window, so the "
            "single-index target is undefined (use 'ledoit-wolf-constant-correlation')",
        )
    delta = np.empty(chunk.B)
    _kernels.lw_single_index(chunk.Y, out, delta)
    return delta


def oas(chunk, params, out):
    """Oracle approximating shrinkage toward ``(tr S / N) I``, eq. (23) of the paper.

    ``delta = min(1, [(1 - 2/N) tr(S**2) + tr(S)**2] /
    [(T + 1 - 2/N) (tr(S**2) - tr(S)**2 / N)])`` and
    ``Sigma = delta (tr S / N) I + (1 - delta) S``, with ``S`` the 1/T covariance of the
    demeaned data.

    Source: Chen, Y., Wiesel, A., Eldar, Y.C. & Hero, A.O. (2010), "Shrinkage algorithms
    for MMSE covariance estimation", IEEE Transactions on Signal Processing 58(10),
    5016-5029, eq. (23). **This implements the paper's eq. (23) with its 2/N terms.**
    scikit-learn 1.9.1's ``OAS`` drops both 2/N terms (its docstring says so), which
    gives a slightly larger intensity (about +2.7 % relative at T = 60, N = 10); the
    tests check that difference explicitly and match scikit-learn's matrix when the
    other form is used. One asset: ``delta = 0``.
    """
    S = chunk.scaled_scatter(1.0 / chunk.T, out)
    delta = _kernels.oas_intensity(S, chunk.T, paper_form=True)
    mu = np.trace(S, axis1=1, axis2=2) / chunk.N
    k = (1.0 - delta)[:, None, None]
    S *= k
    idx = np.arange(chunk.N)
    S[:, idx, idx] += (delta * mu)[:, None]
    return delta
