"""Mean and covariance estimators: one window or thousands at once, one registry of names.

>>> from estimators import estimate, estimate_batch, MEAN_ESTIMATORS, COVARIANCE_ESTIMATORS

Means: ``sample``, ``bayes-stein``, ``james-stein``, ``given``. Covariances: ``sample``
(divisor T-1), ``sample-mle`` (T), ``ewma``, ``ledoit-wolf-identity``,
``ledoit-wolf-constant-correlation``, ``ledoit-wolf-single-index``, ``oas``, ``given``.
Formulas, conventions and sources are in each estimator's docstring
(:mod:`estimators.means`, :mod:`estimators.covariance`). Units are per period throughout.
The shared error family and :class:`History` live in :mod:`estimators.core`.
"""
from .api import (
    MAX_CONDITION,
    Moments,
    MomentsBatch,
    check_invertible,
    estimate,
    estimate_batch,
)
from .core import (
    DataError,
    History,
    InfeasibleError,
    NoiseproofError,
    SettingsError,
    SingularCovarianceError,
)
from .registry import (
    COVARIANCE_ESTIMATORS,
    MEAN_ESTIMATORS,
    PARAMETERS,
    Estimator,
    min_rows,
    needs_observations,
)

__all__ = [
    "estimate",
    "estimate_batch",
    "Moments",
    "MomentsBatch",
    "MEAN_ESTIMATORS",
    "COVARIANCE_ESTIMATORS",
    "PARAMETERS",
    "Estimator",
    "min_rows",
    "needs_observations",
    "check_invertible",
    "MAX_CONDITION",
    "NoiseproofError",
    "DataError",
    "SettingsError",
    "InfeasibleError",
    "SingularCovarianceError",
    "History",
]
