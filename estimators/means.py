"""Mean estimators, each working on a chunk of windows at once.

Every function has the signature ``fn(chunk, params) -> (mean (B, N), intensity (B,) or
None)``: per-period decimal means, and for a shrinkage estimator the weight it puts on its
target (in [0, 1]).
"""
from __future__ import annotations

import numpy as np

from ._chunk import WindowProblem

__all__ = ["sample", "bayes_stein", "james_stein", "BAYES_STEIN_MAX_CONDITION"]

#: Bayes-Stein refuses a sample covariance whose condition number exceeds this.
BAYES_STEIN_MAX_CONDITION = 1e12


def sample(chunk, params):
    """Sample mean ``m = (1/T) sum_t r_t`` of each column."""
    return chunk.mean.copy(), None


def bayes_stein(chunk, params):
    """Bayes-Stein shrinkage of the mean toward the sample minimum-variance portfolio's mean.

    With ``m`` the sample mean and ``Sigma = sum_t y_t y_t' / (T - N - 2)`` (the unbiased
    sample covariance times ``(T - 1) / (T - N - 2)``)::

        mu0   = 1' Sigma^-1 m / 1' Sigma^-1 1          (mean of the sample GMV portfolio)
        w     = (N + 2) / [(N + 2) + T (m - mu0 1)' Sigma^-1 (m - mu0 1)]
        mu_BS = (1 - w) m + w mu0 1

    ``w`` is reported as the mean-shrinkage intensity. Source: Jorion, P. (1986),
    "Bayes-Stein estimation for portfolio analysis", Journal of Financial and
    Quantitative Analysis 21(3), 279-292 (pages from memory); the tests check the worked
    toy example of ../shared/REFERENCES.md section 10. Needs ``T >= N + 3`` rows and an
    invertible sample covariance (condition number at most
    ``BAYES_STEIN_MAX_CONDITION``); otherwise use ``'james-stein'``, which needs no inverse.
    Only the mean is shrunk: the covariance comes from the covariance estimator chosen
    alongside (Jorion's predictive covariance is not applied).
    """
    T, N = chunk.T, chunk.N
    m = chunk.mean
    sigma = chunk.scatter / (T - N - 2)
    try:
        L = np.linalg.cholesky(sigma)
    except np.linalg.LinAlgError:
        L = None
    if L is not None:
        dg = np.diagonal(L, axis1=1, axis2=2)
        ratio = (dg.max(axis=1) / dg.min(axis=1)) ** 2  # a lower bound on the condition number
        bad = ~(ratio <= BAYES_STEIN_MAX_CONDITION)
    else:
        bad = np.ones(chunk.B, dtype=bool)
        for b in range(chunk.B):  # error path only: find the first failing window
            try:
                np.linalg.cholesky(sigma[b])
                bad[b] = False
            except np.linalg.LinAlgError:
                break
    if bad.any():
        raise WindowProblem(
            int(np.argmax(bad)), None,
            "the sample covariance is singular or too ill-conditioned to invert "
            f"(condition number above {BAYES_STEIN_MAX_CONDITION:.0e}), which the "
            "'bayes-stein' mean needs; use the 'james-stein' mean (no inverse needed) or "
            "remove redundant assets",
            singular=True,
        )
    rhs = np.stack([np.ones_like(m), m], axis=2)           # (B, N, 2)
    x = np.linalg.solve(sigma, rhs)
    x1, xm = x[..., 0], x[..., 1]
    mu0 = (xm.sum(axis=1)) / (x1.sum(axis=1))              # 1'S^-1 m / 1'S^-1 1
    d = m - mu0[:, None]
    q = np.einsum("bn,bn->b", d, xm - mu0[:, None] * x1)   # d' Sigma^-1 d
    q = np.maximum(q, 0.0)
    w = (N + 2.0) / ((N + 2.0) + T * q)
    mean = (1.0 - w)[:, None] * m + (w * mu0)[:, None]
    return mean, w


def james_stein(chunk, params):
    """Positive-part James-Stein shrinkage of the mean toward the grand mean.

    With ``g`` the grand mean (average of the N sample means) and
    ``v = tr(S_unb) / N`` the average sample variance (unbiased, divisor T - 1)::

        w    = clip( (N - 3) v / (T ||m - g 1||^2), 0, 1 )
        mu_JS = g 1 + (1 - w) (m - g 1)

    ``v / T`` stands in for the common variance of the sample means, so no inverse is
    needed and the estimator works with fewer rows than assets. With three or fewer assets
    ``w = 0`` (no shrinkage); when all means are equal, ``w = 1``.

    Source: James, W. & Stein, C. (1961), "Estimation with quadratic loss", Proc. Fourth
    Berkeley Symposium on Mathematical Statistics and Probability 1, 361-379; the
    grand-mean form with ``N - 3`` is that of Efron, B. & Morris, C. (1975), "Data
    analysis using Stein's estimator and its generalizations", Journal of the American
    Statistical Association 70(350), 311-319 (volume and pages from memory). The
    equal-variance simplification ``v = tr(S_unb) / N`` is this project's choice.
    """
    T, N = chunk.T, chunk.N
    m = chunk.mean
    g = m.mean(axis=1)
    dev = m - g[:, None]
    ss = np.einsum("bn,bn->b", dev, dev)
    v = chunk.variances(ddof=1).mean(axis=1)
    num = (N - 3.0) * v
    den = T * ss
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(den > 0.0, num / np.where(den > 0.0, den, 1.0), np.where(N > 3, 1.0, 0.0))
    w = np.clip(w, 0.0, 1.0)
    mean = g[:, None] + (1.0 - w)[:, None] * dev
    return mean, w

