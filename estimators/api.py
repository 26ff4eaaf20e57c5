"""Public entry points: one window (:func:`estimate`) and a batch (:func:`estimate_batch`).

Both validate once, then run the same chunked code path (a single window is a batch of
one), so a batch gives the same numbers as a loop over its windows.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Optional

import numpy as np

from ._chunk import Chunk, WindowProblem
from .core import DataError, History, SettingsError, SingularCovarianceError
from .registry import lookup, resolve_params

__all__ = [
    "Moments",
    "MomentsBatch",
    "estimate",
    "estimate_batch",
    "check_invertible",
    "MAX_CONDITION",
    "DEFAULT_CHUNK_BYTES",
]

#: Default largest condition number :func:`check_invertible` accepts. Above about 1e12 an
#: inverse in float64 keeps fewer than 4 significant digits (machine epsilon ~2.2e-16),
#: so portfolio weights computed through it are mostly noise (common practice).
MAX_CONDITION = 1e12

#: Memory setting of the batched path: windows are processed in chunks of about this many
#: bytes of input. It does not change any result (a test checks it).
DEFAULT_CHUNK_BYTES = 2 ** 20

_SHRINK_SUGGESTION = (
    "'ledoit-wolf-constant-correlation', 'ledoit-wolf-identity' or 'oas'"
)


@dataclass(frozen=True)
class Moments:
    """Estimated moments of one window of per-period returns.

    Attributes
    ----------
    mean : ndarray, shape (N,)
        Per-period decimal mean returns.
    covariance : ndarray, shape (N, N)
        Per-period covariance (squared decimal units), exactly symmetric, positive
        semi-definite up to round-off.
    mean_name, covariance_name : str
        The registered estimator names that produced them.
    shrinkage : float or None
        Covariance shrinkage intensity (weight on the target, in [0, 1]); None for
        estimators that do not shrink.
    mean_shrinkage : float or None
        Bayes-Stein / James-Stein intensity (weight on the target, in [0, 1]).
    divisor : str or None
        ``"T-1"`` or ``"T"`` for the covariances built on the sample covariance, None for
        ``ewma`` (weighted) and ``given``.
    n_obs : int
        Rows used (0 when both estimators are ``given``).
    assets : tuple of str or None
        Asset labels (from a DataFrame's columns), None for a bare array.
    params : dict
        Estimator parameters used (for ``ewma``: ``ewma_decay`` and, when given,
        ``ewma_half_life``).
    """

    mean: np.ndarray
    covariance: np.ndarray
    mean_name: str
    covariance_name: str
    shrinkage: Optional[float]
    mean_shrinkage: Optional[float]
    divisor: Optional[str]
    n_obs: int
    assets: Optional[tuple] = None
    params: dict = field(default_factory=dict)

    @property
    def volatility(self) -> np.ndarray:
        """(N,) per-period volatilities ``sqrt(diag(covariance))``."""
        return np.sqrt(np.diagonal(self.covariance))

    @property
    def correlation(self) -> np.ndarray:
        """(N, N) correlation matrix; NaN rows/columns for zero-variance assets."""
        v = self.volatility
        with np.errstate(divide="ignore", invalid="ignore"):
            c = self.covariance / np.outer(v, v)
        np.fill_diagonal(c, np.where(v > 0, 1.0, np.nan))
        return c


@dataclass(frozen=True)
class MomentsBatch:
    """Estimated moments of ``D`` windows.

    Attributes
    ----------
    mean : ndarray, shape (D, N)
    covariance : ndarray, shape (D, N, N)
    shrinkage : ndarray, shape (D,), or None
    mean_shrinkage : ndarray, shape (D,), or None
    mean_name, covariance_name : str
    divisor : str or None
    n_obs : int
        Rows per window (T).
    params : dict
    """

    mean: np.ndarray
    covariance: np.ndarray
    shrinkage: Optional[np.ndarray]
    mean_shrinkage: Optional[np.ndarray]
    mean_name: str
    covariance_name: str
    divisor: Optional[str]
    n_obs: int = 0
    params: dict = field(default_factory=dict)

    def __len__(self) -> int:
        return int(self.mean.shape[0])

    def window(self, d) -> Moments:
        """The ``d``-th window's moments as a :class:`Moments`."""
        return Moments(
            mean=self.mean[d], covariance=self.covariance[d], mean_name=self.mean_name,
            covariance_name=self.covariance_name,
            shrinkage=None if self.shrinkage is None else float(self.shrinkage[d]),
            mean_shrinkage=None if self.mean_shrinkage is None else float(self.mean_shrinkage[d]),
            divisor=self.divisor, n_obs=self.n_obs, params=dict(self.params),
        )


# --------------------------------------------------------------------------------------
# validation
# --------------------------------------------------------------------------------------
def _returns_iv(returns):
    """(T, N) float64 array, asset labels or None, row labels or None."""
    try:
        import pandas as pd
    except ImportError:  # pragma: no cover - pandas is a dependency
        pd = None
    if isinstance(returns, History):
        arr = np.ascontiguousarray(returns.returns, dtype=np.float64)
        if arr.ndim != 2 or arr.shape[1] == 0:
            raise DataError(f"History returns must be (T, N) with N >= 1; got {arr.shape}")
        rows = pd.DatetimeIndex(returns.dates) if pd is not None else None
        return arr, tuple(returns.assets), rows
    if pd is not None and isinstance(returns, pd.Series):
        returns = returns.to_frame()
    if pd is not None and isinstance(returns, pd.DataFrame):
        for col in returns.columns:
            if not (pd.api.types.is_numeric_dtype(returns[col]) and
                    not pd.api.types.is_bool_dtype(returns[col])):
                raise DataError(f"returns column {str(col)!r} is not numeric "
                                f"(dtype {returns[col].dtype})")
        assets = tuple(str(c) for c in returns.columns)
        if len(set(assets)) != len(assets):
            raise DataError("returns have duplicate column names")
        rows = returns.index
        arr = returns.to_numpy(dtype=np.float64, na_value=np.nan)
    else:
        assets, rows = None, None
        try:
            arr = np.asarray(returns, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise DataError(f"returns are not numeric: {exc}") from None
    if arr.ndim != 2:
        raise DataError(
            f"returns must be a (T, N) table of periods x assets; got shape {arr.shape}")
    if arr.shape[1] == 0:
        raise DataError("returns have no assets (N = 0)")
    return np.ascontiguousarray(arr), assets, rows


def _where_not_finite(arr, assets=None, rows=None, offset=0):
    idx = np.argwhere(~np.isfinite(arr))[0]
    *d, t, i = idx
    val = arr[tuple(idx)]
    col = repr(assets[i]) if assets is not None else str(int(i))
    label = ""
    if rows is not None:
        label = str(rows[t])
        if label.endswith(" 00:00:00"):
            label = label[: -len(" 00:00:00")]
        label = f" ({label})"
    row = f"index {int(t)}{label}"
    what = "NaN" if np.isnan(val) else "an infinite value"
    where = f"draw {int(d[0]) + offset}, " if d else ""
    return f"returns contain {what} at {where}row {row}, column {col}"


def _given_iv(given_mean, given_covariance, n, assets, need_mean, need_cov):
    gm = gc = None
    if need_mean:
        if given_mean is None:
            raise SettingsError("mean estimator 'given' needs given_mean (a vector of N means)")
        gm = _labelled(given_mean, assets, "given_mean", vector=True)
        if gm.ndim != 1 or (n is not None and gm.shape[0] != n):
            raise DataError(f"given_mean must have shape ({n if n is not None else 'N'},); "
                            f"got {gm.shape}")
        if not np.isfinite(gm).all():
            raise DataError(f"given_mean contains NaN or infinite values at position "
                            f"{int(np.argmin(np.isfinite(gm)))}")
        n = gm.shape[0]
    if need_cov:
        if given_covariance is None:
            raise SettingsError("covariance estimator 'given' needs given_covariance (N x N)")
        gc = _labelled(given_covariance, assets, "given_covariance", vector=False)
        if gc.ndim != 2 or gc.shape[0] != gc.shape[1] or (n is not None and gc.shape[0] != n):
            raise DataError(f"given_covariance must be square with N = "
                            f"{n if n is not None else 'N'} rows; got shape {gc.shape}")
        if not np.isfinite(gc).all():
            r, c = np.argwhere(~np.isfinite(gc))[0]
            raise DataError(f"given_covariance contains NaN or infinite values at [{r}, {c}]")
        scale = max(float(np.abs(gc).max()), np.finfo(float).tiny)
        asym = float(np.abs(gc - gc.T).max())
        if asym > 1e-10 * scale:
            raise DataError(f"given_covariance is not symmetric (largest |C - C'| = {asym:.3g})")
        gc = 0.5 * (gc + gc.T)
        lo = float(np.linalg.eigvalsh(gc)[0])
        if lo < -1e-10 * scale:
            raise DataError(
                f"given_covariance is not positive semi-definite (smallest eigenvalue {lo:.3g})"
            )
    return gm, gc


def _labelled(x, assets, what, vector):
    try:
        import pandas as pd
    except ImportError:  # pragma: no cover
        pd = None
    if pd is not None and assets is not None:
        try:
            if vector and isinstance(x, pd.Series):
                x = x.reindex(list(assets))
                if x.isna().any():
                    raise DataError(f"{what} has no value for asset(s) "
                                    f"{', '.join(map(str, x.index[x.isna()]))}")
            elif not vector and isinstance(x, pd.DataFrame):
                x = x.reindex(index=list(assets), columns=list(assets))
                if x.isna().any().any():
                    raise DataError(f"{what} does not cover every asset ({', '.join(assets)})")
        except (KeyError, ValueError) as exc:
            if isinstance(exc, DataError):
                raise
            raise DataError(f"{what} does not match the assets: {exc}") from None
    if isinstance(x, dict):
        if assets is None:
            raise DataError(f"{what} given by asset name, but the returns have no labels")
        missing = [a for a in assets if a not in x]
        if missing:
            raise DataError(f"{what} has no value for asset(s) {', '.join(missing)}")
        x = [x[a] for a in assets]
    try:
        return np.array(x, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise DataError(f"{what} is not numeric: {exc}") from None


def _too_few_rows(kind, est, n_rows, n_assets, lead=""):
    need = est.min_rows(n_assets)
    if n_rows >= need:
        return
    extra = ""
    if est.name == "bayes-stein":
        extra = (" (its covariance divisor is T - N - 2); with fewer rows use the "
                 "'james-stein' mean")
    raise DataError(
        f"{lead}{kind} estimator {est.name!r} needs at least {need} rows for {n_assets} "
        f"asset(s){extra}; got {n_rows}"
    )


# --------------------------------------------------------------------------------------
# the chunked engine
# --------------------------------------------------------------------------------------
def _run(X, mean_est, cov_est, params, chunk_windows, assets=None, rows=None, single=False):
    """Estimate every window of clean-shaped X (D, T, N). Returns arrays."""
    D, T, N = X.shape
    means = np.empty((D, N))
    covs = np.empty((D, N, N))
    msh = np.empty(D) if mean_est.shrinks else None
    csh = np.empty(D) if cov_est.shrinks else None
    for s in range(0, D, chunk_windows):  # chunks of windows (memory only), not per draw
        e = min(D, s + chunk_windows)
        ch = Chunk(X[s:e])
        if not np.isfinite(ch.mean).all():
            # a non-finite value anywhere in a column makes that column's mean non-finite
            sub = X[s] if single else X[s:e]
            raise DataError(_where_not_finite(sub, assets, rows, offset=s))
        try:
            if mean_est.compute is not None:
                mu, w = mean_est.compute(ch, params)
                means[s:e] = mu
                if msh is not None:
                    msh[s:e] = w
            if cov_est.compute is not None:
                dl = cov_est.compute(ch, params, covs[s:e])
                if csh is not None:
                    csh[s:e] = dl
        except WindowProblem as p:
            where = "" if single else f"draw {p.window + s}: "
            if p.asset is not None:
                name = repr(assets[p.asset]) if assets is not None else f"column {p.asset}"
                msg = f"{where}asset {name} {p.message}"
            else:
                msg = f"{where}{p.message}"
            if p.singular:
                raise SingularCovarianceError(msg) from None
            raise DataError(msg) from None
    return means, covs, msh, csh


def _chunk_windows(T, N, chunk_windows):
    if chunk_windows is None:
        return max(1, DEFAULT_CHUNK_BYTES // max(1, T * N * 8))
    if isinstance(chunk_windows, bool) or not isinstance(chunk_windows, (int, np.integer)) \
            or chunk_windows < 1:
        raise SettingsError(f"chunk_windows must be a positive integer, got {chunk_windows!r}")
    return int(chunk_windows)


def estimate(returns, mean="sample", covariance="sample", *, params=None,
             given_mean=None, given_covariance=None) -> Moments:
    """Estimate the mean vector and covariance matrix of one window of returns.

    Parameters
    ----------
    returns : array_like, shape (T, N), pandas.DataFrame, History, or None
        Per-period decimal simple returns, rows are dates. The asset labels of a DataFrame
        or a :class:`~estimators.core.History` are kept in ``Moments.assets`` and used in
        error messages. May be None only when both
        estimators are ``given``.
    mean : str, default "sample"
        A name in ``MEAN_ESTIMATORS``: ``sample``, ``bayes-stein``, ``james-stein``,
        ``given``.
    covariance : str, default "sample"
        A name in ``COVARIANCE_ESTIMATORS``: ``sample`` (T-1), ``sample-mle`` (T),
        ``ewma``, ``ledoit-wolf-identity``, ``ledoit-wolf-constant-correlation``,
        ``ledoit-wolf-single-index``, ``oas``, ``given``.
    params : dict, optional
        Estimator parameters: ``ewma_half_life`` (periods) or ``ewma_decay``.
    given_mean : array_like (N,), pandas.Series or dict, optional
        The vector for ``mean="given"`` (per-period decimal).
    given_covariance : array_like (N, N) or pandas.DataFrame, optional
        The matrix for ``covariance="given"`` (per period); must be symmetric PSD.

    Returns
    -------
    Moments

    Raises
    ------
    SettingsError
        Unknown estimator name or parameter (the message lists the known ones).
    DataError
        Non-numeric, NaN or infinite input (row and column named), too few rows for an
        estimator (estimator, rows needed and given), or a window where a target is
        undefined (zero variance).
    SingularCovarianceError
        ``bayes-stein`` on a singular or ill-conditioned sample covariance.

    Examples
    --------
    >>> import numpy as np
    >>> x = np.array([[0.01, 0.02], [0.03, -0.01], [-0.02, 0.00], [0.02, 0.01]])
    >>> m = estimate(x, covariance="ledoit-wolf-identity")
    >>> m.covariance.shape, 0.0 <= m.shrinkage <= 1.0
    ((2, 2), True)
    """
    mest = lookup(mean, "mean")
    cest = lookup(covariance, "covariance")
    p = resolve_params(params, covariance)
    if returns is None:
        if mest.compute is not None or cest.compute is not None:
            raise DataError(
                f"estimators mean={mean!r}, covariance={covariance!r} need a return history"
            )
        gm, gc = _given_iv(given_mean, given_covariance, None, None, True, True)
        if gm.shape[0] != gc.shape[0]:
            raise DataError(f"given_mean has {gm.shape[0]} assets but given_covariance "
                            f"{gc.shape[0]}")
        return Moments(gm, gc, mean, covariance, None, None, None, 0, None, p)
    arr, assets, rows = _returns_iv(returns)
    T, N = arr.shape
    _too_few_rows("mean", mest, T, N)
    _too_few_rows("covariance", cest, T, N)
    gm, gc = _given_iv(given_mean, given_covariance, N, assets,
                       mest.compute is None, cest.compute is None)
    means, covs, msh, csh = _run(arr[None], mest, cest, p, 1, assets, rows, single=True)
    mu = gm if gm is not None else means[0]
    cov = gc if gc is not None else covs[0]
    return Moments(
        mean=mu, covariance=cov, mean_name=mean, covariance_name=covariance,
        shrinkage=None if csh is None else float(csh[0]),
        mean_shrinkage=None if msh is None else float(msh[0]),
        divisor=cest.divisor, n_obs=T, assets=assets, params=p,
    )


def estimate_batch(returns, mean="sample", covariance="sample", *, params=None,
                   given_mean=None, given_covariance=None, chunk_windows=None) -> MomentsBatch:
    """Estimate the moments of ``D`` windows at once (no Python loop per window).

    Parameters
    ----------
    returns : ndarray, shape (D, T, N)
        ``D`` windows of ``T`` rows of per-period decimal returns (float64; C-contiguous
        avoids a copy).
    mean, covariance, params, given_mean, given_covariance
        As in :func:`estimate` (``given`` values are repeated for every window).
    chunk_windows : int, optional
        Windows per chunk (memory and cache only; does not change results). Default: about
        ``DEFAULT_CHUNK_BYTES`` of input per chunk.

    Returns
    -------
    MomentsBatch
        ``mean`` (D, N), ``covariance`` (D, N, N), ``shrinkage`` and ``mean_shrinkage``
        (D,) or None.

    Notes
    -----
    Finiteness is checked through each window's column means (a NaN or infinity anywhere
    in a column makes its mean non-finite), which costs nothing extra; the offending draw,
    row and column are located only when there is one.
    """
    mest = lookup(mean, "mean")
    cest = lookup(covariance, "covariance")
    p = resolve_params(params, covariance)
    X = np.asarray(returns)
    if X.ndim != 3:
        raise DataError(f"batched returns must have shape (D, T, N); got {X.shape}")
    if X.dtype != np.float64 or not X.flags.c_contiguous:
        try:
            X = np.ascontiguousarray(X, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise DataError(f"batched returns are not numeric: {exc}") from None
    D, T, N = X.shape
    if N == 0:
        raise DataError("batched returns have no assets (N = 0)")
    _too_few_rows("mean", mest, T, N)
    _too_few_rows("covariance", cest, T, N)
    gm, gc = _given_iv(given_mean, given_covariance, N, None,
                       mest.compute is None, cest.compute is None)
    cw = _chunk_windows(T, N, chunk_windows)
    means, covs, msh, csh = _run(X, mest, cest, p, cw)
    if gm is not None:
        means[:] = gm
    if gc is not None:
        covs[:] = gc
    return MomentsBatch(
        mean=means, covariance=covs, shrinkage=csh, mean_shrinkage=msh, mean_name=mean,
        covariance_name=covariance, divisor=cest.divisor, n_obs=T, params=p,
    )


def check_invertible(cov, what="covariance", *, max_condition=MAX_CONDITION):
    """Raise ``SingularCovarianceError`` unless ``cov`` is safely invertible.

    Parameters
    ----------
    cov : ndarray, shape (N, N) or (D, N, N)
        Symmetric covariance matrix or matrices.
    what : str
        What the matrix is, for the message (e.g. ``"the covariance of rule 'mv'"``).
    max_condition : float, default ``MAX_CONDITION`` (1e12)
        Largest accepted condition number ``lambda_max / lambda_min`` (2-norm, from the
        symmetric eigenvalues).

    Returns
    -------
    float or ndarray (D,)
        The condition number(s).
    """
    c = np.asarray(cov, dtype=np.float64)
    if c.ndim not in (2, 3) or c.shape[-1] != c.shape[-2]:
        raise DataError(f"{what}: expected a square matrix (N, N) or a stack (D, N, N); "
                        f"got shape {c.shape}")
    if not np.isfinite(c).all():
        raise DataError(f"{what} contains NaN or infinite values")
    ev = np.linalg.eigvalsh(c)
    lo, hi = ev[..., 0], ev[..., -1]
    with np.errstate(divide="ignore", invalid="ignore"):
        cond = np.where(lo > 0, hi / np.where(lo > 0, lo, 1.0), np.inf)
    bad = ~(cond <= max_condition)
    if np.any(bad):
        first = int(np.argmax(bad.ravel()))
        where = f" (draw {first})" if c.ndim == 3 else ""
        value = float(cond.ravel()[first])
        desc = ("singular" if not np.isfinite(value)
                else f"ill-conditioned (condition number {value:.3g})")
        raise SingularCovarianceError(
            f"{what}{where} is {desc}, above the limit {max_condition:.0e} for an inverse; "
            f"use a shrinkage covariance estimator such as {_SHRINK_SUGGESTION}"
            + (", or more rows than assets" if c.shape[-1] > 1 else "")
        )
    return float(cond) if c.ndim == 2 else cond
