"""Generators of synthetic return histories drawn from a known "population".

Four generators, each a small frozen object with ``draw(rng, count, length)``
returning a float64 array of shape ``(count, length, N)`` (per-period decimal returns):

* :class:`NormalGenerator`: iid multivariate normal rows with the population mean and
  covariance.
* :class:`StudentTGenerator`: iid multivariate Student-t rows with the *same* mean and
  covariance (scale matrix ``cov * (nu - 2) / nu``) and ``nu > 2`` degrees of freedom,
  given or fitted by maximum likelihood (:func:`fit_degrees_of_freedom`).
* :class:`BootstrapGenerator`: rows of the history drawn with replacement (iid
  bootstrap).
* :class:`BlockBootstrapGenerator`: the stationary bootstrap of Politis & Romano (1994):
  blocks of geometric length (mean ``block_length``) with uniform start points, wrapping
  around circularly; the mean block length is chosen automatically by
  :func:`optimal_block_length` (Politis & White 2004 with the correction of Patton,
  Politis & White 2009) when not given.

For the bootstrap generators the population is the history's empirical distribution:
its mean is the sample mean and its covariance the sample covariance with divisor T
(:func:`population_moments`). The normal and Student-t generators use the same
moments when the population is estimated from a history, so switching the generator
changes the shape of the distribution, not its first two moments.

The random numbers come from the ``numpy.random.Generator`` the caller passes in; the
engine gives every chunk of draws its own child of the study's ``SeedSequence``.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize, special
from scipy.linalg.blas import dtrmm

from estimators.core import DataError, SettingsError, SingularCovarianceError

from . import _kernels, _random

__all__ = [
    "GENERATORS",
    "NormalGenerator",
    "SampleMoments",
    "StudentTGenerator",
    "BootstrapGenerator",
    "BlockBootstrapGenerator",
    "make_generator",
    "population_moments",
    "fit_degrees_of_freedom",
    "student_t_loglik",
    "optimal_block_length",
    "BlockLength",
    "covariance_factor",
]

GENERATORS = ("normal", "student-t", "bootstrap", "block-bootstrap")


# --------------------------------------------------------------------------- population

def population_moments(history: np.ndarray):
    """Mean and covariance of a history's empirical distribution.

    Parameters
    ----------
    history : ndarray, shape (T, N)
        Per-period decimal returns, finite.

    Returns
    -------
    mean : ndarray, shape (N,)
        The sample mean.
    cov : ndarray, shape (N, N)
        The covariance with divisor ``T`` (the empirical distribution's covariance, i.e.
        the maximum-likelihood estimate under normality), exactly symmetric.
    """
    x = np.asarray(history, dtype=np.float64)
    mean = x.mean(axis=0)
    dev = x - mean
    cov = dev.T @ dev / x.shape[0]
    cov = 0.5 * (cov + cov.T)
    return mean, cov


def covariance_factor(cov: np.ndarray, what: str = "population covariance") -> np.ndarray:
    """Lower Cholesky factor ``L`` with ``L @ L.T == cov``.

    Raises
    ------
    SingularCovarianceError
        When ``cov`` is not positive definite (e.g. a history with ``T <= N`` rows).
    """
    try:
        return np.linalg.cholesky(cov)
    except np.linalg.LinAlgError:
        raise SingularCovarianceError(
            f"the {what} is not positive definite (singular or not a covariance; a history "
            f"with no more rows than assets gives a singular one): the normal and Student-t "
            f"generators need a positive-definite covariance") from None


def _normals(rng: np.random.Generator, shape) -> np.ndarray:
    """``rng.standard_normal(shape)``: the same numbers and generator state, drawn by a
    compiled loop (``simulate._random``; about 2.7 times faster on the benchmark machine)."""
    return _random.standard_normal_into(rng, np.empty(shape))


#: From this many assets, ``Z L'`` is formed by a triangular product (BLAS ``trmm``, in
#: place) instead of a general one: it skips the zeros above the factor's diagonal, about
#: half the work (at T = 120 on the benchmark machine, per draw: 11 against 14 us at N = 50,
#: 108 against 187 us at N = 200). Below it the general product is as fast or faster. The
#: two round differently in the last bits, so the choice is a fixed function of N.
TRIANGULAR_MIN_ASSETS = 40


def times_factor_t(z: np.ndarray, chol_t: np.ndarray) -> np.ndarray:
    """``z @ chol_t`` for ``z`` (m, N), C-contiguous and ours to overwrite, and ``chol_t``
    (N, N) upper triangular (the transposed lower Cholesky factor), C-contiguous.

    From :data:`TRIANGULAR_MIN_ASSETS` assets the product overwrites ``z`` (BLAS
    ``dtrmm`` on the Fortran view: ``(z L')' = L z'``) and ``z`` is returned; below, a new
    array from the general product.
    """
    n = chol_t.shape[0]
    if n < TRIANGULAR_MIN_ASSETS or z.shape[0] == 0:
        return z @ chol_t
    out = dtrmm(1.0, chol_t.T, z.T, side=0, lower=1, trans_a=0, diag=0, overwrite_b=1)
    return out.T


# --------------------------------------------------------------------------- generators

@dataclass(frozen=True)
class NormalGenerator:
    """iid multivariate normal rows: ``x = mean + L z`` with ``L L' = cov``.

    Attributes
    ----------
    mean : ndarray, shape (N,)
    cov : ndarray, shape (N, N), positive definite
    """

    mean: np.ndarray
    cov: np.ndarray
    name: str = field(default="normal", init=False)

    def __post_init__(self):
        chol = covariance_factor(self.cov)
        object.__setattr__(self, "_chol_t", np.ascontiguousarray(chol.T))
        object.__setattr__(self, "_chol", np.ascontiguousarray(chol))
        object.__setattr__(self, "_mean64", np.ascontiguousarray(self.mean, dtype=np.float64))

    def draw(self, rng: np.random.Generator, count: int, length: int) -> np.ndarray:
        """``count`` histories of ``length`` rows, shape ``(count, length, N)``."""
        n = self.mean.shape[0]
        z = _normals(rng, (count * length, n))
        x = times_factor_t(z, self._chol_t)
        _kernels.add_row(x, self._mean64)          # x += mean, without numpy's short rows
        return x.reshape(count, length, n)

    def draw_moments(self, rng: np.random.Generator, count: int, length: int) -> "SampleMoments":
        """Sample mean and scatter matrix of ``count`` normal histories, without the histories.

        For iid ``N(mu, Sigma)`` rows the sample mean is ``N(mu, Sigma / T)``, the scatter
        matrix ``sum (x_t - m)(x_t - m)'`` is Wishart with ``T - 1`` degrees of freedom and
        scale ``Sigma``, and the two are independent. The Wishart matrix is drawn by the
        Bartlett decomposition (Smith & Hocking 1972; Odell & Feiveson 1966):
        ``W = L A A' L'`` with ``A`` lower triangular, ``A_ii = sqrt(chi2(T - 1 - i))``
        (i = 0 .. N-1) and standard normal ``A_ij`` below the diagonal. Needs
        ``T - 1 >= N``. Random numbers, in this order: N normals per draw for the mean, N
        chi-squares, then N (N - 1) / 2 normals.

        Returns
        -------
        SampleMoments
            ``mean`` (count, N) and ``scatter`` (count, N, N), exactly symmetric.
        """
        n = self.mean.shape[0]
        df = length - 1
        if df < n:
            raise SettingsError(f"the moments path needs T - 1 >= N (T = {length}, N = {n}): "
                                f"the scatter matrix would be singular")
        z = _normals(rng, (count, n))
        chi = rng.chisquare(np.arange(df, df - n, -1, dtype=np.float64), size=(count, n))
        low = _normals(rng, (count, n * (n - 1) // 2))
        # A: sqrt(chi) on the diagonal, the normals below it row by row (tril_indices
        # order), zeros above; W = (L A)(L A)' from the triangles alone, exactly symmetric
        w = _kernels.wishart_triangular(self._chol, chi, low, np.empty((count, n, n)))
        mean = z @ self._chol_t
        mean *= 1.0 / math.sqrt(length)
        mean += self.mean
        return SampleMoments(mean=mean, scatter=w, length=int(length))

    def describe(self) -> dict:
        return {"name": self.name}


@dataclass(frozen=True)
class SampleMoments:
    """Drawn sample moments of ``count`` synthetic histories of ``length`` rows.

    Attributes
    ----------
    mean : ndarray, shape (count, N)
        Sample means.
    scatter : ndarray, shape (count, N, N)
        ``sum_t (x_t - m)(x_t - m)'``: the sample covariance is ``scatter / (T - 1)``, the
        maximum-likelihood one ``scatter / T``.
    length : int
        T.
    """

    mean: np.ndarray
    scatter: np.ndarray
    length: int

    @property
    def shape(self):
        return (self.mean.shape[0], self.length, self.mean.shape[1])


@dataclass(frozen=True)
class StudentTGenerator:
    """iid multivariate Student-t rows with the given mean and covariance.

    ``x = mean + sqrt((nu - 2) / g) L z`` with ``g ~ chi2(nu)`` per row and
    ``L L' = cov``: the scale matrix is ``cov (nu - 2) / nu`` so that the covariance of
    ``x`` is ``cov`` (which needs ``nu > 2``).
    """

    mean: np.ndarray
    cov: np.ndarray
    degrees_of_freedom: float
    fitted: bool = False
    name: str = field(default="student-t", init=False)

    def __post_init__(self):
        if not (self.degrees_of_freedom > 2.0 and math.isfinite(self.degrees_of_freedom)):
            raise SettingsError(f"[resample] degrees_of_freedom must be > 2 (the covariance "
                                f"must exist), not {self.degrees_of_freedom!r}")
        object.__setattr__(self, "_chol_t", np.ascontiguousarray(covariance_factor(self.cov).T))

    def draw(self, rng: np.random.Generator, count: int, length: int) -> np.ndarray:
        n = self.mean.shape[0]
        nu = float(self.degrees_of_freedom)
        z = _normals(rng, (count * length, n))
        g = rng.chisquare(nu, size=count * length)
        x = times_factor_t(z, self._chol_t)
        x *= np.sqrt((nu - 2.0) / g)[:, None]
        x += self.mean
        return x.reshape(count, length, n)

    def describe(self) -> dict:
        return {"name": self.name, "degrees_of_freedom": float(self.degrees_of_freedom),
                "degrees_of_freedom_source": "fitted (maximum likelihood)" if self.fitted
                else "given"}


@dataclass(frozen=True)
class BootstrapGenerator:
    """iid bootstrap: each row of a synthetic history is a uniformly drawn history row."""

    history: np.ndarray
    name: str = field(default="bootstrap", init=False)

    def draw(self, rng: np.random.Generator, count: int, length: int) -> np.ndarray:
        t = self.history.shape[0]
        idx = rng.integers(0, t, size=(count, length))
        return self.history[idx]

    def describe(self) -> dict:
        return {"name": self.name}


@dataclass(frozen=True)
class BlockBootstrapGenerator:
    """Stationary bootstrap (Politis & Romano 1994) of the history's rows.

    Each synthetic history starts at a uniform row; each next row is the following
    history row (wrapping around to the first after the last) with probability
    ``1 - p`` and a fresh uniform row with probability ``p = 1 / block_length``.
    Whole rows are resampled, so the cross-section's dependence is kept.
    """

    history: np.ndarray
    block_length: float
    automatic: bool = False
    name: str = field(default="block-bootstrap", init=False)

    def __post_init__(self):
        if not (self.block_length >= 1.0 and math.isfinite(self.block_length)):
            raise SettingsError(f"[resample] block_length must be >= 1, not {self.block_length!r}")

    def indices(self, rng: np.random.Generator, count: int, length: int) -> np.ndarray:
        """Row indices, shape ``(count, length)``; the random numbers are drawn here."""
        t = self.history.shape[0]
        starts = rng.integers(0, t, size=(count, length))
        restart = rng.random((count, length)) < (1.0 / self.block_length)
        return _kernels.stationary_indices(starts, restart, t)

    def draw(self, rng: np.random.Generator, count: int, length: int) -> np.ndarray:
        return self.history[self.indices(rng, count, length)]

    def describe(self) -> dict:
        return {"name": self.name, "block_length": float(self.block_length),
                "block_length_source": "automatic (Politis & White 2004; Patton, Politis & "
                                       "White 2009), mean over assets" if self.automatic
                else "given"}


def make_generator(name, *, mean, cov, history=None, degrees_of_freedom=None,
                   block_length=None):
    """Build a generator by name from the population and (for bootstraps) the history.

    ``degrees_of_freedom=None`` fits it on the history (Student-t); ``block_length=None``
    chooses it automatically (block bootstrap).
    """
    if name == "normal":
        return NormalGenerator(mean, cov)
    if name == "student-t":
        if degrees_of_freedom is None:
            if history is None:
                raise SettingsError("[resample] generator 'student-t' without a history needs "
                                    "degrees_of_freedom (there is nothing to fit it on)")
            return StudentTGenerator(mean, cov, fit_degrees_of_freedom(history), fitted=True)
        return StudentTGenerator(mean, cov, float(degrees_of_freedom))
    if name in ("bootstrap", "block-bootstrap"):
        if history is None:
            raise SettingsError(f"[resample] generator '{name}' resamples a history; capital-"
                                f"market assumptions have none (use 'normal' or 'student-t')")
        if name == "bootstrap":
            return BootstrapGenerator(history)
        if block_length is None:
            b = optimal_block_length(history).stationary
            return BlockBootstrapGenerator(history, float(max(1.0, np.mean(b))), automatic=True)
        return BlockBootstrapGenerator(history, float(block_length))
    raise SettingsError(f"[resample] generator = {name!r} is not one of: {', '.join(GENERATORS)}")


# --------------------------------------------------------------------------- Student-t fit

def student_t_loglik(nu, history, mean, cov):
    """Log-likelihood of iid rows under the multivariate t with covariance ``cov``.

    The density is the multivariate t with location ``mean``, scale matrix
    ``cov (nu - 2) / nu`` and ``nu`` degrees of freedom (so its covariance is ``cov``):

    ``log f(x) = lnG((nu+N)/2) - lnG(nu/2) - N/2 ln((nu-2) pi) - 1/2 ln|cov|
    - (nu+N)/2 ln(1 + d2 / (nu - 2))``, with ``d2 = (x-mean)' cov^-1 (x-mean)``.
    """
    x = np.asarray(history, dtype=np.float64)
    n = x.shape[1]
    chol = covariance_factor(cov, "history's covariance")
    dev = np.linalg.solve(chol, (x - mean).T)
    d2 = np.einsum("it,it->t", dev, dev)
    logdet = 2.0 * np.log(np.diag(chol)).sum()
    return _t_loglik_from_d2(nu, d2, n, logdet)


def _t_loglik_from_d2(nu, d2, n, logdet):
    t = d2.shape[0]
    return (t * (special.gammaln((nu + n) / 2.0) - special.gammaln(nu / 2.0)
                 - 0.5 * n * np.log((nu - 2.0) * np.pi) - 0.5 * logdet)
            - 0.5 * (nu + n) * np.log1p(d2 / (nu - 2.0)).sum())


def fit_degrees_of_freedom(history, *, low=2.05, high=200.0) -> float:
    """Maximum-likelihood degrees of freedom of a multivariate t with the history's moments.

    The location and covariance are fixed at the history's sample mean and covariance
    (divisor T); only ``nu`` is fitted, by maximising :func:`student_t_loglik` over
    ``[low, high]`` (bounded Brent search on ``log(nu - 2)``). The likelihood pools all
    assets through the squared Mahalanobis distances of the standardised rows, so joint
    tail events count. Near-normal data give a value at the ``high`` end, which is
    returned as is (the t generator is then practically normal).

    Parameters
    ----------
    history : ndarray, shape (T, N)
        Needs ``T > N`` rows for a positive-definite covariance.

    Returns
    -------
    float
        The fitted ``nu`` in ``[low, high]``.
    """
    x = np.asarray(history, dtype=np.float64)
    mean, cov = population_moments(x)
    n = x.shape[1]
    chol = covariance_factor(cov, "history's covariance (for fitting the degrees of freedom)")
    dev = np.linalg.solve(chol, (x - mean).T)
    d2 = np.einsum("it,it->t", dev, dev)
    logdet = 2.0 * np.log(np.diag(chol)).sum()

    def neg(s):
        return -_t_loglik_from_d2(2.0 + math.exp(s), d2, n, logdet)

    res = optimize.minimize_scalar(neg, bounds=(math.log(low - 2.0), math.log(high - 2.0)),
                                   method="bounded", options={"xatol": 1e-6})
    return float(2.0 + math.exp(res.x))


# --------------------------------------------------------------------------- block length

@dataclass(frozen=True)
class BlockLength:
    """Automatic block lengths per column (Politis & White 2004; Patton et al. 2009).

    Attributes
    ----------
    stationary : ndarray, shape (N,)
        Optimal mean block length of the stationary bootstrap.
    circular : ndarray, shape (N,)
        Optimal block length of the circular block bootstrap.
    bandwidth : ndarray, shape (N,), int
        The flat-top lag-window bandwidth ``M`` used.
    """

    stationary: np.ndarray
    circular: np.ndarray
    bandwidth: np.ndarray


def _band_lag(col: np.ndarray, n: int, kn: int, mmax: int, c: float):
    """Autocovariances (divisor n) up to ``mmax`` and the first insignificant lag run.

    The lag-i autocorrelation is ``|sum e_t e_{t-i}|`` over the norms of ``e[i+1:]`` and
    ``e[:-(i+1)]``; ``m_hat`` is the first lag m at which the ``kn`` autocorrelations at
    lags m .. m+kn-1 all lie inside ``+-c``, searched while m + kn <= mmax. These are the
    conventions of ``arch.bootstrap.optimal_block_length`` (arch 8.0.0), which the tests
    compare against; ``None`` when no such run exists.
    """
    acv = np.zeros(mmax + 1)
    acorr = np.zeros(mmax + 1)
    m_hat = None
    for i in range(mmax + 1):
        v1 = col[i + 1:] @ col[i + 1:]
        v2 = col[:-(i + 1)] @ col[:-(i + 1)]
        cross = col[i:] @ col[:n - i]
        acv[i] = cross / n
        acorr[i] = abs(cross) / math.sqrt(v1 * v2)
        if i >= kn and m_hat is None and np.all(acorr[i - kn:i] < c):
            m_hat = i - kn
    return acv, m_hat


def optimal_block_length(x) -> BlockLength:
    """Automatic block length per column (Politis & White 2004, Patton, Politis & White 2009).

    For each column (demeaned, length n): ``K_n = max(5, floor(log10 n))`` and
    ``m_max = ceil(sqrt(n)) + K_n``; ``m_hat`` is the first lag at which ``K_n``
    consecutive autocorrelations lie inside ``+-2 sqrt(log10(n) / n)``; ``M = 2 m_hat``
    capped at ``m_max`` (``M = m_max`` when no such lag exists). With the flat-top window ``lam(t) = 1`` on ``|t| <= 1/2``,
    ``2(1 - |t|)`` on ``1/2 < |t| <= 1`` and autocovariances ``R(k)`` (divisor n):

    ``G = sum_{|k|<=M} lam(k/M) |k| R(k)``, ``g0 = sum_{|k|<=M} lam(k/M) R(k)``,
    ``D_SB = 2 g0^2``, ``D_CB = 4/3 g0^2``, ``b = (2 G^2 / D)^(1/3) n^(1/3)``,
    capped at ``ceil(min(3 sqrt(n), n / 3))``.

    The tuning conventions follow ``arch.bootstrap.optimal_block_length`` (arch 8.0.0),
    against which ``tests/test_simulate_generators.py`` checks exact equality.

    Parameters
    ----------
    x : array_like, shape (n,) or (n, N)

    Returns
    -------
    BlockLength
    """
    a = np.asarray(x, dtype=np.float64)
    if a.ndim == 1:
        a = a[:, None]
    if a.ndim != 2 or a.shape[0] < 9:
        raise DataError(f"automatic block length needs at least 9 rows, got {a.shape[0]}")
    if not np.all(np.isfinite(a)):
        raise DataError("automatic block length: the history holds NaN or infinite values")
    n = a.shape[0]
    kn = max(5, int(math.log10(n)))
    mmax = int(math.ceil(math.sqrt(n))) + kn
    c = 2.0 * math.sqrt(math.log10(n) / n)
    cap = math.ceil(min(3.0 * math.sqrt(n), n / 3.0))
    sb = np.empty(a.shape[1])
    cb = np.empty(a.shape[1])
    bw = np.empty(a.shape[1], dtype=np.int64)
    for j in range(a.shape[1]):
        col = a[:, j] - a[:, j].mean()
        acv, m_hat = _band_lag(col, n, kn, mmax, c)
        big_m = min(2 * max(m_hat, 1), mmax) if m_hat is not None else mmax
        g = 0.0
        g0 = acv[0]
        for k in range(1, big_m + 1):
            lam = 1.0 if k / big_m <= 0.5 else 2.0 * (1.0 - k / big_m)
            g += 2.0 * lam * k * acv[k]
            g0 += 2.0 * lam * acv[k]
        d_sb = 2.0 * g0 ** 2
        d_cb = 4.0 / 3.0 * g0 ** 2
        sb[j] = min((2.0 * g ** 2 / d_sb) ** (1.0 / 3.0) * n ** (1.0 / 3.0), cap)
        cb[j] = min((2.0 * g ** 2 / d_cb) ** (1.0 / 3.0) * n ** (1.0 / 3.0), cap)
        bw[j] = big_m
    return BlockLength(stationary=sb, circular=cb, bandwidth=bw)
