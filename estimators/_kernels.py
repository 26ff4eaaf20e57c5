"""Kernels of the shrinkage covariance estimators, on clean float64 arrays.

Each kernel works on a chunk of ``B`` windows at once and trusts its input (the public
entry points in :mod:`estimators.api` validate once). Every numba kernel has a plain-numpy
twin ``*_numpy`` computing the same quantities with array expressions; a test compares
the two. The numba kernels are what the batched path runs.

Inputs common to all kernels
----------------------------
Y : ndarray, shape (B, T, N), float64, C-contiguous
    Each window's returns minus that window's column means (demeaned).
S : ndarray, shape (B, N, N), float64
    ``Y[b].T @ Y[b] / T``: the maximum-likelihood (1/T) sample covariance, exactly
    symmetric. The numba kernels overwrite it **in place** with the shrunk covariance
    ``delta * F + (1 - delta) * S``; the numpy twins return a new array.
delta : ndarray, shape (B,), float64
    Output: the shrinkage intensity of each window, clipped to [0, 1].

Why every kernel is O(T N) after ``S``
-------------------------------------
The Ledoit-Wolf intensities are sums over all pairs (i, j) of per-pair moments such as
``(1/T) sum_t (y_it y_jt - s_ij)**2``. Summed over the pairs, each collapses to sums
over t of products of per-row sums over i (for example ``sum_ij y_it**2 y_jt**2 =
(sum_i y_it**2)**2``), so no second N x N x T product is needed: the cost of a
shrinkage estimator is the cost of ``S`` plus one pass over ``Y`` and two over ``S``.
The per-pair formulas are in ../shared/REFERENCES.md sections 5 and 6 and in the
docstrings of :mod:`estimators.covariance`; the tests re-implement them as plain double
loops.
"""
from __future__ import annotations

import numpy as np
from numba import njit

__all__ = [
    "lw_identity",
    "lw_identity_numpy",
    "lw_constant_correlation",
    "lw_constant_correlation_numpy",
    "lw_single_index",
    "lw_single_index_numpy",
    "oas_intensity",
    "symmetrize_scale",
    "symmetrize_scale_numpy",
    "center",
    "center_numpy",
]


#: The target counts as equal to S (intensity reported as 0; the matrix is the same either
#: way) when ||F - S||_F^2 <= GAMMA_FLOOR * ||S||_F^2, i.e. they agree to about 12 digits.
#: Without this, round-off decides the intensity, e.g. with T = 2 rows (all correlations
#: are +-1 and the constant-correlation target can equal S).
GAMMA_FLOOR = 1e-24


def _clip_intensity(num, den, floor):
    """``clip(num / den, 0, 1)`` elementwise, with 0 where ``den <= floor``."""
    num = np.asarray(num, dtype=np.float64)
    den = np.asarray(den, dtype=np.float64)
    ok = den > floor
    safe = np.where(ok, den, 1.0)
    return np.where(ok, np.clip(num / safe, 0.0, 1.0), 0.0)


# --------------------------------------------------------------------------------------
# Ledoit & Wolf (2004, J. Multivariate Analysis): target (tr S / N) I
# --------------------------------------------------------------------------------------
@njit(cache=True)
def lw_identity(Y, S, delta):  # pragma: no cover - compiled; the numpy twin is tested too
    B, T, N = Y.shape
    for b in range(B):
        Sb = S[b]
        sq = 0.0
        for t in range(T):
            a = 0.0
            for i in range(N):
                y = Y[b, t, i]
                a += y * y
            sq += a * a
        fro2 = 0.0
        tr = 0.0
        for i in range(N):
            tr += Sb[i, i]
            for j in range(N):
                fro2 += Sb[i, j] * Sb[i, j]
        mu = tr / N
        gamma = 0.0
        for i in range(N):
            for j in range(N):
                f = mu if i == j else 0.0
                d = Sb[i, j] - f
                gamma += d * d
        pi = sq / T - fro2
        if pi < 0.0:
            pi = 0.0
        if gamma > GAMMA_FLOOR * fro2:
            dl = pi / (T * gamma)
            dl = min(max(dl, 0.0), 1.0)
        else:
            dl = 0.0
        delta[b] = dl
        for i in range(N):
            Sb[i, i] = dl * mu + (1.0 - dl) * Sb[i, i]
            for j in range(i + 1, N):
                v = (1.0 - dl) * Sb[i, j]
                Sb[i, j] = v
                Sb[j, i] = v


def lw_identity_numpy(Y, S):
    """Plain-numpy twin of :func:`lw_identity`. Returns ``(shrunk (B, N, N), delta (B,))``."""
    B, T, N = Y.shape
    sq = ((Y * Y).sum(axis=2) ** 2).sum(axis=1)              # sum_t (sum_i y_it^2)^2
    fro2 = (S * S).sum(axis=(1, 2))
    mu = np.trace(S, axis1=1, axis2=2) / N
    eye = np.eye(N)
    gamma = ((S - mu[:, None, None] * eye) ** 2).sum(axis=(1, 2))
    pi = np.maximum(sq / T - fro2, 0.0)
    delta = _clip_intensity(pi, T * gamma, T * GAMMA_FLOOR * fro2)
    F = mu[:, None, None] * eye
    out = delta[:, None, None] * F + (1.0 - delta[:, None, None]) * S
    return out, delta


# --------------------------------------------------------------------------------------
# Ledoit & Wolf (2004, J. Portfolio Management): constant-correlation target
# --------------------------------------------------------------------------------------
@njit(cache=True)
def lw_constant_correlation(Y, S, delta):  # pragma: no cover - compiled; twin tested
    B, T, N = Y.shape
    sd = np.empty(N)
    isd = np.empty(N)
    for b in range(B):
        Sb = S[b]
        diag2 = 0.0
        for i in range(N):
            sd[i] = np.sqrt(Sb[i, i])
            isd[i] = 1.0 / sd[i]
            diag2 += Sb[i, i] * Sb[i, i]
        acc = 0.0
        for i in range(N):
            for j in range(i + 1, N):
                acc += Sb[i, j] * isd[i] * isd[j]
        rbar = 2.0 * acc / (N * (N - 1)) if N > 1 else 0.0
        sq = 0.0      # sum_t (sum_i y^2)^2
        q4 = 0.0      # sum_t sum_i y^4
        aa = 0.0      # sum_t z_t * sum_i y^3 / sd_i,  z_t = sum_j sd_j y_jt
        for t in range(T):
            a = 0.0
            z = 0.0
            c = 0.0
            for i in range(N):
                y = Y[b, t, i]
                y2 = y * y
                a += y2
                z += sd[i] * y
                c += y2 * y * isd[i]
                q4 += y2 * y2
            sq += a * a
            aa += z * c
        fro2 = 0.0
        sds = 0.0     # sd' S sd
        gamma = 0.0
        for i in range(N):
            for j in range(N):
                s = Sb[i, j]
                fro2 += s * s
                sds += sd[i] * s * sd[j]
                if i != j:
                    d = rbar * sd[i] * sd[j] - s
                    gamma += d * d
        pi = sq / T - fro2
        pi_diag = q4 / T - diag2
        rho = pi_diag + rbar * (aa / T - q4 / T - (sds - diag2))
        if gamma > GAMMA_FLOOR * fro2:
            dl = (pi - rho) / gamma / T
            dl = min(max(dl, 0.0), 1.0)
        else:
            dl = 0.0
        delta[b] = dl
        for i in range(N):
            for j in range(i + 1, N):
                v = dl * (rbar * sd[i] * sd[j]) + (1.0 - dl) * Sb[i, j]
                Sb[i, j] = v
                Sb[j, i] = v


def lw_constant_correlation_numpy(Y, S):
    """Plain-numpy twin of :func:`lw_constant_correlation`. Returns ``(shrunk, delta)``."""
    B, T, N = Y.shape
    d = np.diagonal(S, axis1=1, axis2=2)
    sd = np.sqrt(d)
    R = S / (sd[:, :, None] * sd[:, None, :])
    if N > 1:
        rbar = (R.sum(axis=(1, 2)) - np.trace(R, axis1=1, axis2=2)) / (N * (N - 1))
    else:
        rbar = np.zeros(B)
    F = rbar[:, None, None] * sd[:, :, None] * sd[:, None, :]
    idx = np.arange(N)
    F[:, idx, idx] = d
    y2 = Y * Y
    sq = (y2.sum(axis=2) ** 2).sum(axis=1)
    q4 = (y2 * y2).sum(axis=(1, 2))
    z = np.einsum("btn,bn->bt", Y, sd)
    c = np.einsum("btn,bn->bt", y2 * Y, 1.0 / sd)
    aa = (z * c).sum(axis=1)
    fro2 = (S * S).sum(axis=(1, 2))
    diag2 = (d * d).sum(axis=1)
    sds = np.einsum("bi,bij,bj->b", sd, S, sd)
    pi = sq / T - fro2
    rho = (q4 / T - diag2) + rbar * (aa / T - q4 / T - (sds - diag2))
    gamma = ((F - S) ** 2).sum(axis=(1, 2))
    delta = _clip_intensity(pi - rho, T * gamma, T * GAMMA_FLOOR * fro2)
    out = delta[:, None, None] * F + (1.0 - delta[:, None, None]) * S
    return out, delta


# --------------------------------------------------------------------------------------
# Ledoit & Wolf (2003, J. Empirical Finance): single-index target, market = equal-weighted
# average of the N assets
# --------------------------------------------------------------------------------------
@njit(cache=True)
def lw_single_index(Y, S, delta):  # pragma: no cover - compiled; twin tested
    B, T, N = Y.shape
    s0 = np.empty(N)
    for b in range(B):
        Sb = S[b]
        s00 = 0.0
        for i in range(N):
            acc = 0.0
            for j in range(N):
                acc += Sb[i, j]
            s0[i] = acc / N
            s00 += acc
        s00 /= N * N
        sq = 0.0
        q4 = 0.0
        r1 = 0.0
        for t in range(T):
            a = 0.0    # sum_i y^2
            bb = 0.0   # sum_i s_i0 y
            c = 0.0    # sum_i s_i0 y^3
            e = 0.0    # sum_i s_i0^2 y^2
            y0 = 0.0   # market: mean_i y
            for i in range(N):
                y = Y[b, t, i]
                y2 = y * y
                a += y2
                bb += s0[i] * y
                c += s0[i] * y2 * y
                e += s0[i] * s0[i] * y2
                y0 += y
                q4 += y2 * y2
            y0 /= N
            sq += a * a
            r1 += 2.0 * (y0 / s00) * (a * bb - c) - (y0 * y0 / (s00 * s00)) * (bb * bb - e)
        fro2 = 0.0
        diag2 = 0.0
        fs = 0.0
        gamma = 0.0
        for i in range(N):
            diag2 += Sb[i, i] * Sb[i, i]
            for j in range(N):
                s = Sb[i, j]
                fro2 += s * s
                if i != j:
                    f = s0[i] * s0[j] / s00
                    fs += f * s
                    d = f - s
                    gamma += d * d
        pi = sq / T - fro2
        rho = (q4 / T - diag2) + r1 / T - fs
        if gamma > GAMMA_FLOOR * fro2:
            dl = (pi - rho) / gamma / T
            dl = min(max(dl, 0.0), 1.0)
        else:
            dl = 0.0
        delta[b] = dl
        for i in range(N):
            for j in range(i + 1, N):
                v = dl * (s0[i] * s0[j] / s00) + (1.0 - dl) * Sb[i, j]
                Sb[i, j] = v
                Sb[j, i] = v


def lw_single_index_numpy(Y, S):
    """Plain-numpy twin of :func:`lw_single_index`. Returns ``(shrunk, delta)``."""
    B, T, N = Y.shape
    s0 = S.mean(axis=2)                                   # (B, N) cov(asset, market)
    s00 = S.mean(axis=(1, 2))                             # (B,) market variance
    F = s0[:, :, None] * s0[:, None, :] / s00[:, None, None]
    idx = np.arange(N)
    d = np.diagonal(S, axis1=1, axis2=2)
    F[:, idx, idx] = d
    y2 = Y * Y
    y0 = Y.mean(axis=2)                                   # (B, T)
    a = y2.sum(axis=2)
    bb = np.einsum("btn,bn->bt", Y, s0)
    c = np.einsum("btn,bn->bt", y2 * Y, s0)
    e = np.einsum("btn,bn->bt", y2, s0 * s0)
    k = s00[:, None]
    r1 = (2.0 * (y0 / k) * (a * bb - c) - (y0 * y0 / (k * k)) * (bb * bb - e)).sum(axis=1)
    sq = (a ** 2).sum(axis=1)
    q4 = (y2 * y2).sum(axis=(1, 2))
    fro2 = (S * S).sum(axis=(1, 2))
    diag2 = (d * d).sum(axis=1)
    off = ~np.eye(N, dtype=bool)
    fs = (F * S)[:, off].sum(axis=1)
    pi = sq / T - fro2
    rho = (q4 / T - diag2) + r1 / T - fs
    gamma = ((F - S) ** 2).sum(axis=(1, 2))
    delta = _clip_intensity(pi - rho, T * gamma, T * GAMMA_FLOOR * fro2)
    out = delta[:, None, None] * F + (1.0 - delta[:, None, None]) * S
    return out, delta


# --------------------------------------------------------------------------------------
# Chen, Wiesel, Eldar & Hero (2010): oracle approximating shrinkage. O(N^2) on S only.
# --------------------------------------------------------------------------------------
def oas_intensity(S, T, *, paper_form=True):
    """OAS intensity of each window from its 1/T covariance ``S`` (B, N, N).

    ``paper_form=True`` is eq. (23) of Chen et al. (2010), with the ``2/N`` terms;
    ``paper_form=False`` drops them, as scikit-learn does. Returns (B,) in [0, 1].
    """
    N = S.shape[-1]
    tr = np.trace(S, axis1=1, axis2=2)
    tr2 = (S * S).sum(axis=(1, 2))          # tr(S^2) for symmetric S
    c = 2.0 / N if paper_form else 0.0
    num = (1.0 - c) * tr2 + tr * tr
    den = (T + 1.0 - c) * (tr2 - tr * tr / N)
    # den ~ 0 only when S is already a multiple of I (including N = 1): intensity 0.
    return _clip_intensity(num, den, (T + 1.0 - c) * GAMMA_FLOOR * tr2)


# --------------------------------------------------------------------------------------
# Symmetrise and scale a stack of scatter matrices in place (one pass, no temporary)
# --------------------------------------------------------------------------------------
@njit(cache=True)
def symmetrize_scale(S, factor):  # pragma: no cover - compiled; twin tested
    """``S[b] <- factor * (S[b] + S[b].T) / 2`` in place, for every b; exact symmetry."""
    B, N, _ = S.shape
    h = 0.5 * factor
    for b in range(B):
        Sb = S[b]
        for i in range(N):
            Sb[i, i] = Sb[i, i] * factor
            for j in range(i + 1, N):
                v = (Sb[i, j] + Sb[j, i]) * h
                Sb[i, j] = v
                Sb[j, i] = v


def symmetrize_scale_numpy(S, factor):
    """Plain-numpy twin of :func:`symmetrize_scale`; returns a new array."""
    return (S + np.swapaxes(S, 1, 2)) * (0.5 * factor)


# --------------------------------------------------------------------------------------
# Column means and demeaned windows in one pass over the input
# --------------------------------------------------------------------------------------
@njit(cache=True)
def center(X, mean, Y):  # pragma: no cover - compiled; twin tested
    """``mean[b] <- X[b].mean(axis=0)`` and ``Y[b] <- X[b] - mean[b]`` for every window b.

    X : (B, T, N); mean : (B, N) output; Y : (B, T, N) output.
    """
    B, T, N = X.shape
    for b in range(B):
        mb = mean[b]
        for i in range(N):
            mb[i] = 0.0
        for t in range(T):
            for i in range(N):
                mb[i] += X[b, t, i]
        for i in range(N):
            mb[i] /= T
        for t in range(T):
            for i in range(N):
                Y[b, t, i] = X[b, t, i] - mb[i]


def center_numpy(X):
    """Plain-numpy twin of :func:`center`; returns ``(mean (B, N), Y (B, T, N))``."""
    mean = X.mean(axis=1)
    return mean, X - mean[:, None, :]
