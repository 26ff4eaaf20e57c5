"""Shared core types of noiseproof: the user-facing error family and the return history.

They live in the bottom package of the dependency chain (``estimators``) because every
other package needs them and nothing may import ``noiseproof`` (the command line) back.

Conventions used everywhere
---------------------------
* Returns are decimal simple returns per period (0.01 = 1 %), shaped ``(T, N)``:
  rows are dates, columns are assets.
* Means are ``(N,)``, covariances ``(N, N)``, weights ``(N,)``; batches of draws
  put the draw axis first: ``(D, N)``, ``(D, N, N)``, ``(D, T, N)``.
* Nothing is annualised except in ``reports/`` and in fields with the suffix
  ``_annualised``.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Optional

import numpy as np

__all__ = [
    "NoiseproofError",
    "DataError",
    "SettingsError",
    "InfeasibleError",
    "SingularCovarianceError",
    "History",
    "PERIODS_PER_YEAR",
]

#: Periods per year used for annualising, by frequency name (common practice).
PERIODS_PER_YEAR = {
    "daily": 252,
    "weekly": 52,
    "monthly": 12,
    "quarterly": 4,
    "annual": 1,
}


class NoiseproofError(Exception):
    """Base of every problem the user can fix (bad input, bad settings, infeasible constraints).

    The command line catches only this family, prints the message as one line and exits
    with status 2. Anything else is a bug and keeps its traceback.
    """


class DataError(NoiseproofError, ValueError):
    """Bad input data. The message names the file, column and row where they apply."""


class SettingsError(NoiseproofError, ValueError):
    """Bad study-file or command-line settings. The message names the key."""


class InfeasibleError(NoiseproofError, ValueError):
    """Constraints that no portfolio can satisfy. The message names the conflict."""


class SingularCovarianceError(NoiseproofError, ValueError):
    """A covariance that is singular or too ill-conditioned for a rule that needs its inverse."""


@dataclass(frozen=True)
class History:
    """A validated history of per-period simple returns.

    Attributes
    ----------
    returns : ndarray, shape (T, N), float64
        Decimal simple returns per period; excess of the risk-free rate when
        ``excess`` is true. Finite everywhere.
    dates : ndarray, shape (T,), datetime64[ns]
        Strictly increasing period-end dates.
    assets : tuple of str, length N
        Unique asset names in column order.
    frequency : str
        One of ``PERIODS_PER_YEAR``'s keys.
    source : str
        Where the data came from (a file path or a description).
    sha256 : str
        SHA-256 of the source file's bytes ("" when not from a file).
    risk_free : ndarray, shape (T,), or None
        The per-period risk-free rate that was subtracted, when one was given.
    excess : bool
        Whether ``returns`` are in excess of ``risk_free``.
    dropped_rows : int
        Rows removed by an explicit missing-data policy (0 by default).
    kind : str
        ``"returns"`` or ``"prices"``: what the file held.
    """

    returns: np.ndarray
    dates: np.ndarray
    assets: tuple
    frequency: str
    source: str = ""
    sha256: str = ""
    risk_free: Optional[np.ndarray] = None
    excess: bool = False
    dropped_rows: int = 0
    kind: str = "returns"
    notes: tuple = field(default_factory=tuple)

    @property
    def n_periods(self) -> int:
        return int(self.returns.shape[0])

    @property
    def n_assets(self) -> int:
        return int(self.returns.shape[1])

    @property
    def periods_per_year(self) -> int:
        return PERIODS_PER_YEAR[self.frequency]
