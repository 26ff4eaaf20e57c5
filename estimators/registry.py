"""The one registry of estimator names, their row needs and their parameters.

Adding an estimator means writing its chunk function (in :mod:`estimators.means` or
:mod:`estimators.covariance`) and adding one entry below.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from numbers import Real
from types import MappingProxyType
from typing import Callable, Optional

from . import covariance as _cov
from . import means as _means
from .core import SettingsError

__all__ = [
    "Estimator",
    "MEAN_ESTIMATORS",
    "COVARIANCE_ESTIMATORS",
    "PARAMETERS",
    "min_rows",
    "needs_observations",
    "resolve_params",
]


@dataclass(frozen=True)
class Estimator:
    """One registered estimator.

    Attributes
    ----------
    name : str
        The name used in study files and on the command line.
    kind : str
        ``"mean"`` or ``"covariance"``.
    summary : str
        One line for help texts: what it computes, its convention and its source.
    compute : callable or None
        The chunk function (None for ``given``, which the API fills in itself).
    min_rows : callable
        ``min_rows(n_assets) -> int``: the fewest rows it needs.
    divisor : str or None
        ``"T-1"``, ``"T"`` or None (covariances only).
    shrinks : bool
        Whether it reports a shrinkage intensity.
    """

    name: str
    kind: str
    summary: str
    compute: Optional[Callable]
    min_rows: Callable[[int], int]
    divisor: Optional[str] = None
    shrinks: bool = False


def _two(n):
    return 2


def _one(n):
    return 1


def _zero(n):
    return 0


_MEANS = (
    Estimator("sample", "mean", "sample mean (1/T) sum r_t", _means.sample, _one),
    Estimator(
        "bayes-stein", "mean",
        "Bayes-Stein shrinkage toward the sample minimum-variance portfolio's mean "
        "(Jorion 1986, JFQA); needs T >= N + 3 and an invertible sample covariance",
        _means.bayes_stein, lambda n: n + 3, shrinks=True,
    ),
    Estimator(
        "james-stein", "mean",
        "positive-part James-Stein shrinkage toward the grand mean, intensity "
        "(N-3) v / (T ||m - g||^2), v the average variance (James & Stein 1961; "
        "Efron & Morris 1975)",
        _means.james_stein, _two, shrinks=True,
    ),
    Estimator("given", "mean", "a given mean vector (capital-market assumptions)", None, _zero),
)

_COVS = (
    Estimator("sample", "covariance", "sample covariance, divisor T-1", _cov.sample, _two,
              divisor="T-1"),
    Estimator("sample-mle", "covariance", "maximum-likelihood covariance, divisor T",
              _cov.sample_mle, _two, divisor="T"),
    Estimator(
        "ewma", "covariance",
        "exponentially weighted covariance: weights decay**age (age 0 = latest row), "
        "demeaned with the weighted mean, divided by 1 - sum w^2 (pandas ewm(...).cov() "
        "convention); half-life h means decay = 0.5**(1/h)",
        _cov.ewma, _two,
    ),
    Estimator(
        "ledoit-wolf-identity", "covariance",
        "Ledoit-Wolf shrinkage toward (tr S/N) I (Ledoit & Wolf 2004, J. Multivariate "
        "Analysis); S demeaned, divisor T",
        _cov.ledoit_wolf_identity, _two, divisor="T", shrinks=True,
    ),
    Estimator(
        "ledoit-wolf-constant-correlation", "covariance",
        "Ledoit-Wolf shrinkage toward constant correlation (Ledoit & Wolf 2004, J. "
        "Portfolio Management); S demeaned, divisor T",
        _cov.ledoit_wolf_constant_correlation, _two, divisor="T", shrinks=True,
    ),
    Estimator(
        "ledoit-wolf-single-index", "covariance",
        "Ledoit-Wolf shrinkage toward a single-index model, market = equal-weighted "
        "average of the assets (Ledoit & Wolf 2003, J. Empirical Finance); divisor T",
        _cov.ledoit_wolf_single_index, _two, divisor="T", shrinks=True,
    ),
    Estimator(
        "oas", "covariance",
        "oracle approximating shrinkage toward (tr S/N) I, eq. (23) with its 2/N terms "
        "(Chen, Wiesel, Eldar & Hero 2010, IEEE Trans. Signal Processing); divisor T",
        _cov.oas, _two, divisor="T", shrinks=True,
    ),
    Estimator("given", "covariance", "a given covariance matrix (capital-market assumptions)",
              None, _zero),
)

#: name -> :class:`Estimator`, in the order help texts list them (read-only).
MEAN_ESTIMATORS = MappingProxyType({e.name: e for e in _MEANS})
#: name -> :class:`Estimator`, in the order help texts list them (read-only).
COVARIANCE_ESTIMATORS = MappingProxyType({e.name: e for e in _COVS})

#: Estimator parameters accepted in ``params`` (None values count as not given).
PARAMETERS = MappingProxyType({
    "ewma_half_life": "half-life of the 'ewma' covariance, in periods (> 0)",
    "ewma_decay": "decay factor of the 'ewma' covariance, 0 < decay <= 1",
})


def lookup(name, kind):
    """The :class:`Estimator` called ``name``; ``SettingsError`` listing the known names."""
    table = MEAN_ESTIMATORS if kind == "mean" else COVARIANCE_ESTIMATORS
    if not isinstance(name, str) or name not in table:
        raise SettingsError(
            f"unknown {kind} estimator {name!r}; known: {', '.join(table)}"
        )
    return table[name]


def min_rows(mean, covariance, n_assets):
    """Fewest rows (periods) the pair of estimators needs for ``n_assets`` assets.

    Parameters
    ----------
    mean, covariance : str
        Registered estimator names.
    n_assets : int
        Number of assets N.

    Returns
    -------
    int
        The larger of the two needs: 1 for the sample mean, 2 for every covariance
        estimator and James-Stein, N + 3 for Bayes-Stein, 0 for ``given``.
    """
    n = int(n_assets)
    return max(lookup(mean, "mean").min_rows(n), lookup(covariance, "covariance").min_rows(n))


def needs_observations(mean, covariance):
    """Whether the pair needs the simulated observations themselves.

    ``False`` exactly when the mean is ``sample`` and the covariance ``sample`` or
    ``sample-mle``: those are functions of the sample mean and sample covariance alone, so
    a caller may draw those moments directly instead of whole histories. Anything else
    (including ``given``) returns ``True``.
    """
    lookup(mean, "mean")
    lookup(covariance, "covariance")
    return not (mean == "sample" and covariance in ("sample", "sample-mle"))


def _real(key, value):
    if isinstance(value, bool) or not isinstance(value, Real) or not math.isfinite(value):
        raise SettingsError(f"estimator parameter {key!r} must be a finite number, got {value!r}")
    return float(value)


def resolve_params(params, covariance):
    """Validate ``params`` and return what the chosen covariance estimator uses.

    Returns a dict; for ``ewma`` it holds ``ewma_decay`` (the half-life converted by
    ``decay = 0.5 ** (1 / half_life)``). Unknown keys raise ``SettingsError``; known keys
    that the chosen estimators do not use are ignored.
    """
    params = {} if params is None else dict(params)
    unknown = sorted(k for k in params if k not in PARAMETERS)
    if unknown:
        raise SettingsError(
            f"unknown estimator parameter(s) {', '.join(map(repr, unknown))}; "
            f"known: {', '.join(PARAMETERS)}"
        )
    half = params.get("ewma_half_life")
    decay = params.get("ewma_decay")
    out = {}
    if half is not None:
        half = _real("ewma_half_life", half)
        if not half > 0:
            raise SettingsError(f"'ewma_half_life' must be > 0 periods, got {half}")
    if decay is not None:
        decay = _real("ewma_decay", decay)
        if not 0.0 < decay <= 1.0:
            raise SettingsError(f"'ewma_decay' must satisfy 0 < decay <= 1, got {decay}")
    if covariance == "ewma":
        if half is not None and decay is not None:
            raise SettingsError("give either 'ewma_half_life' or 'ewma_decay' for 'ewma', not both")
        if half is None and decay is None:
            raise SettingsError(
                "covariance estimator 'ewma' needs a half-life ('ewma_half_life', in periods) "
                "or a decay ('ewma_decay'); a decay of 0.94 for daily data is common practice"
            )
        out["ewma_decay"] = decay if decay is not None else 0.5 ** (1.0 / half)
        if half is not None:
            out["ewma_half_life"] = half
    return out
