"""Portfolio constraints: budget, long-only, per-asset bounds and group bounds.

A :class:`Constraints` is checked for feasibility once, when it is made
(:func:`make_constraints`); an infeasible set raises :class:`InfeasibleError` whose message
names the conflict, before any optimisation runs.

Semantics
---------
* ``budget="full"``: the risky weights sum to one (fully invested).
* ``budget="cash"``: the risky weights need not sum to one; the rest, ``1 - sum(w)``, is
  held in cash at the risk-free rate. Long-only with cash means no borrowing
  (``sum(w) <= 1``); with shorting allowed, cash may be negative (borrowing).
* ``long_only=True`` (default): every weight is at least 0 (a lower bound below 0 is
  raised to 0). With shorting allowed, weights are unbounded unless ``bounds`` say so.
* ``bounds``: ``{asset: (low, high)}``, decimals (0.4 = 40 %); ``None`` or a missing side
  means no bound on that side (0 from below when long-only).
* ``groups``: ``{name: {"assets": [...], "bounds": (low, high)}}``: the members' weights
  sum to a value in ``[low, high]``.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping, Optional, Sequence, Union

import numpy as np

from estimators.core import InfeasibleError, SettingsError

__all__ = ["Constraints", "make_constraints"]

_TOL = 1e-12


@dataclass(frozen=True, eq=False)
class Constraints:
    """A feasible set of portfolio constraints.

    Attributes
    ----------
    assets : tuple of str, length N
    long_only : bool
    budget : str
        ``"full"`` or ``"cash"``.
    lower, upper : ndarray, shape (N,)
        Effective per-asset bounds (``-inf`` / ``inf`` where unbounded; ``lower >= 0``
        when long-only).
    group_names : tuple of str, length G
    group_matrix : ndarray, shape (G, N)
        0/1 membership.
    group_lower, group_upper : ndarray, shape (G,)
    feasible_point : ndarray, shape (N,)
        One portfolio meeting every constraint (the start of the active-set solver).
    """

    assets: tuple
    long_only: bool
    budget: str
    lower: np.ndarray
    upper: np.ndarray
    group_names: tuple
    group_matrix: np.ndarray
    group_lower: np.ndarray
    group_upper: np.ndarray
    feasible_point: np.ndarray

    @property
    def n_assets(self) -> int:
        return len(self.assets)

    @property
    def has_bounds(self) -> bool:
        """True when some asset bound is tighter than the long-only / free default."""
        default_lo = 0.0 if self.long_only else -np.inf
        return bool(np.any(self.lower != default_lo) or np.any(np.isfinite(self.upper)))

    @property
    def bounded(self) -> bool:
        """True when the feasible set is bounded (every weight is boxed, explicitly or by
        long-only plus the budget); then every QP rule has a solution even with a singular
        covariance."""
        if self.long_only:
            return True
        return bool(np.all(np.isfinite(self.lower)) and np.all(np.isfinite(self.upper)))

    def rows(self):
        """General linear rows ``lo <= A w <= hi``: the budget row (when any), then groups.

        Returns
        -------
        A : ndarray, shape (M, N); lo, hi : ndarray, shape (M,)
        """
        n = self.n_assets
        A, lo, hi = [], [], []
        if self.budget == "full":
            A.append(np.ones(n))
            lo.append(1.0)
            hi.append(1.0)
        elif self.long_only:
            A.append(np.ones(n))
            lo.append(-np.inf)
            hi.append(1.0)
        for g in range(len(self.group_names)):
            A.append(self.group_matrix[g])
            lo.append(self.group_lower[g])
            hi.append(self.group_upper[g])
        if not A:
            return np.zeros((0, n)), np.zeros(0), np.zeros(0)
        return np.array(A, dtype=float), np.array(lo, dtype=float), np.array(hi, dtype=float)

    def is_feasible(self, w, tol: float = 1e-9) -> bool:
        """Whether the weights ``w`` (N,) meet every constraint to within ``tol``."""
        return _violation(self, np.asarray(w, dtype=float)) <= tol

    def max_return(self, mean):
        """The largest attainable ``mean' w`` and a portfolio attaining it.

        Parameters
        ----------
        mean : ndarray, shape (N,)

        Returns
        -------
        value : float; weights : ndarray, shape (N,)
        """
        mean = np.asarray(mean, dtype=float)
        if not self.group_names and self.budget == "full" and self.bounded:
            w = _greedy_fill(mean[None, :], self.lower, self.upper)[0]
            return float(mean @ w), w
        return _lp_max(self, mean)


def _greedy_fill(means, lower, upper, positive_only=False):
    """Maximum-return portfolios under box bounds, one per row of ``means``.

    Start every weight at its lower bound and raise weights to their upper bound in order
    of decreasing mean until the budget is used (the standard start of the critical line
    algorithm, Markowitz 1956). With ``positive_only`` (a cash sleeve, ``sum(w) <= 1``)
    only assets with a positive mean are raised; the rest stays in cash.
    """
    D, n = means.shape
    order = np.argsort(-means, axis=1, kind="stable")
    W = np.broadcast_to(lower, (D, n)).copy()
    left = np.full(D, 1.0 - lower.sum())
    cap = np.minimum(upper, lower + 1.0 - lower.sum())  # no weight can exceed this
    for r in range(n):
        j = order[:, r]
        room = cap[j] - lower[j]
        add = np.clip(np.minimum(room, left), 0.0, None)
        if positive_only:
            add = np.where(means[np.arange(D), j] > 0, add, 0.0)
        W[np.arange(D), j] += add
        left = left - add
    return W


def _lp_max(cons: Constraints, mean):
    from scipy.optimize import linprog

    A, lo, hi = cons.rows()
    A_ub, b_ub, A_eq, b_eq = _split_rows(A, lo, hi)
    res = linprog(-mean, A_ub=A_ub, b_ub=b_ub, A_eq=A_eq, b_eq=b_eq,
                  bounds=list(zip(_none(cons.lower), _none(cons.upper))), method="highs")
    if res.status == 3:
        raise InfeasibleError("the expected return is unbounded above under these constraints "
                              "(shorting without bounds and cash budget); add bounds")
    if res.status != 0:
        raise InfeasibleError(f"could not find the maximum-return portfolio: {res.message}")
    w = _snap(res.x, cons)
    return float(mean @ w), w


def _none(a):
    return [None if not np.isfinite(v) else float(v) for v in a]


def _split_rows(A, lo, hi):
    A_ub, b_ub, A_eq, b_eq = [], [], [], []
    for k in range(A.shape[0]):
        if lo[k] == hi[k]:
            A_eq.append(A[k])
            b_eq.append(lo[k])
            continue
        if np.isfinite(hi[k]):
            A_ub.append(A[k])
            b_ub.append(hi[k])
        if np.isfinite(lo[k]):
            A_ub.append(-A[k])
            b_ub.append(-lo[k])
    f = (lambda rows: np.array(rows) if rows else None)
    return f(A_ub), f(b_ub), f(A_eq), f(b_eq)


def _violation(cons: Constraints, w) -> float:
    v = max(0.0, float(np.max(cons.lower - w, initial=0.0)), float(np.max(w - cons.upper, initial=0.0)))
    A, lo, hi = cons.rows()
    if A.shape[0]:
        aw = A @ w
        v = max(v, float(np.max(lo - aw, initial=0.0)), float(np.max(aw - hi, initial=0.0)))
    return v


def _snap(x, cons: Constraints):
    """Put values within 1e-9 of a bound exactly on it (the solver's working set reads them)."""
    x = np.array(x, dtype=float)
    near_lo = np.isfinite(cons.lower) & (np.abs(x - cons.lower) <= 1e-9)
    near_hi = np.isfinite(cons.upper) & (np.abs(x - cons.upper) <= 1e-9)
    x[near_lo] = cons.lower[near_lo]
    x[near_hi] = cons.upper[near_hi]
    return x


def _asset_names(n_or_assets) -> tuple:
    if isinstance(n_or_assets, (int, np.integer)):
        n = int(n_or_assets)
        if n < 1:
            raise SettingsError(f"the number of assets must be at least 1, got {n}")
        return tuple(f"asset {i + 1}" for i in range(n))
    assets = tuple(str(a) for a in n_or_assets)
    if not assets:
        raise SettingsError("the asset list is empty")
    if len(set(assets)) != len(assets):
        dup = sorted({a for a in assets if assets.count(a) > 1})
        raise SettingsError(f"asset names must be unique; repeated: {', '.join(dup)}")
    return assets


def _pair(value, what: str):
    """A (low, high) pair; None on either side means unbounded on that side."""
    if not isinstance(value, (list, tuple)) or len(value) != 2:
        raise SettingsError(f"{what} must be a pair [low, high], got {value!r}")
    out = []
    for v, default in zip(value, (-np.inf, np.inf)):
        if v is None:
            out.append(default)
            continue
        if isinstance(v, bool) or not isinstance(v, (int, float, np.floating, np.integer)):
            raise SettingsError(f"{what} must hold numbers, got {v!r}")
        if math.isnan(float(v)):
            raise SettingsError(f"{what} must not be NaN")
        out.append(float(v))
    return out[0], out[1]


def _asset_index(assets: tuple, key, what: str) -> int:
    if isinstance(key, (int, np.integer)) and not isinstance(key, bool):
        if not 0 <= int(key) < len(assets):
            raise SettingsError(f"{what}: asset index {key} out of range 0..{len(assets) - 1}")
        return int(key)
    if key not in assets:
        raise SettingsError(f"{what}: unknown asset '{key}' (known: {', '.join(assets)})")
    return assets.index(key)


def make_constraints(n_assets: Union[int, Sequence[str]], *, long_only: bool = True,
                     budget: str = "full", bounds: Optional[Mapping] = None,
                     groups: Optional[Mapping] = None) -> Constraints:
    """Build and check a set of portfolio constraints.

    Parameters
    ----------
    n_assets : int or sequence of str
        The number of assets, or their names (names are needed for ``bounds`` and
        ``groups`` keyed by asset).
    long_only : bool, default True
        No short positions.
    budget : {"full", "cash"}, default "full"
        ``"full"``: weights sum to 1. ``"cash"``: the remainder is cash at the risk-free
        rate (no borrowing when long-only).
    bounds : mapping asset -> (low, high), optional
        Per-asset bounds in decimals; ``None`` on a side means unbounded.
    groups : mapping name -> {"assets": [...], "bounds": (low, high)}, optional
        Bounds on the sum of the members' weights.

    Returns
    -------
    Constraints

    Raises
    ------
    SettingsError
        Unknown asset, malformed bound, unknown budget.
    InfeasibleError
        No portfolio meets the constraints; the message names the conflict.
    """
    assets = _asset_names(n_assets)
    n = len(assets)
    if budget not in ("full", "cash"):
        raise SettingsError(f"budget must be 'full' or 'cash', got {budget!r}")
    if not isinstance(long_only, (bool, np.bool_)):
        raise SettingsError(f"long_only must be true or false, got {long_only!r}")
    long_only = bool(long_only)
    lower = np.full(n, 0.0 if long_only else -np.inf)
    upper = np.full(n, np.inf)
    if bounds:
        if not isinstance(bounds, Mapping):
            raise SettingsError("bounds must map asset names to [low, high]")
        for key, pair in bounds.items():
            i = _asset_index(assets, key, "bounds")
            lo, hi = _pair(pair, f"bounds for '{assets[i]}'")
            if lo > hi:
                raise InfeasibleError(f"bounds for '{assets[i]}': low {lo:g} is above high {hi:g}")
            if long_only and hi < 0:
                raise InfeasibleError(f"bounds for '{assets[i]}': high {hi:g} is below 0 but the "
                                      "portfolio is long-only (set long_only = false to short)")
            lower[i] = max(lower[i], lo)
            upper[i] = hi
    gnames, gmat, glo, ghi = [], [], [], []
    if groups:
        if not isinstance(groups, Mapping):
            raise SettingsError("groups must map group names to {assets, bounds}")
        for gname, spec in groups.items():
            if not isinstance(spec, Mapping) or set(spec) != {"assets", "bounds"}:
                extra = sorted(set(spec) - {"assets", "bounds"}) if isinstance(spec, Mapping) else []
                raise SettingsError(f"group '{gname}' must have exactly the keys 'assets' and "
                                    f"'bounds'" + (f"; unknown: {', '.join(map(str, extra))}" if extra else ""))
            members = spec["assets"]
            if isinstance(members, str) or not members:
                raise SettingsError(f"group '{gname}': 'assets' must be a non-empty list")
            row = np.zeros(n)
            for a in members:
                row[_asset_index(assets, a, f"group '{gname}'")] = 1.0
            lo, hi = _pair(spec["bounds"], f"group '{gname}' bounds")
            if lo > hi:
                raise InfeasibleError(f"group '{gname}': low {lo:g} is above high {hi:g}")
            gnames.append(str(gname))
            gmat.append(row)
            glo.append(lo)
            ghi.append(hi)
    gmat = np.array(gmat, dtype=float).reshape(len(gnames), n)
    glo = np.array(glo, dtype=float)
    ghi = np.array(ghi, dtype=float)
    _check_feasible(assets, long_only, budget, lower, upper, gnames, gmat, glo, ghi)
    cons = Constraints(assets, long_only, budget, lower, upper, tuple(gnames), gmat, glo, ghi,
                       np.zeros(n))
    point = _find_point(cons)
    for arr in (lower, upper, gmat, glo, ghi, point):
        arr.setflags(write=False)
    object.__setattr__(cons, "feasible_point", point)
    return cons


def _fmt(v: float) -> str:
    return f"{v:.6g}"


def _check_feasible(assets, long_only, budget, lower, upper, gnames, gmat, glo, ghi):
    """Name the conflict of the simple kinds first, then an LP settles the rest."""
    slo = float(np.sum(lower))
    shi = float(np.sum(upper))
    if budget == "full":
        if slo > 1 + _TOL:
            raise InfeasibleError(f"the assets' lower bounds sum to {_fmt(slo)}, above 1 "
                                  "(fully invested budget)")
        if shi < 1 - _TOL:
            raise InfeasibleError(f"the assets' upper bounds sum to {_fmt(shi)}, below 1 "
                                  "(fully invested budget)")
    elif long_only and slo > 1 + _TOL:
        raise InfeasibleError(f"the assets' lower bounds sum to {_fmt(slo)}, above 1 "
                              "(long-only with cash cannot borrow)")
    for g, name in enumerate(gnames):
        members = gmat[g] > 0
        mlo = float(np.sum(lower[members]))
        mhi = float(np.sum(upper[members]))
        if mlo > ghi[g] + _TOL:
            raise InfeasibleError(f"group '{name}': its assets' lower bounds sum to {_fmt(mlo)}, "
                                  f"above the group's upper bound {_fmt(ghi[g])}")
        if mhi < glo[g] - _TOL:
            raise InfeasibleError(f"group '{name}': its assets' upper bounds sum to {_fmt(mhi)}, "
                                  f"below the group's lower bound {_fmt(glo[g])}")
        if budget == "full" or long_only:
            cap = 1.0 - float(np.sum(lower[~members])) if np.all(np.isfinite(lower[~members])) else np.inf
            if glo[g] > cap + _TOL and budget == "full":
                raise InfeasibleError(f"group '{name}': its lower bound {_fmt(glo[g])} leaves too "
                                      f"little for the other assets' lower bounds (at most "
                                      f"{_fmt(cap)} is possible)")
            if budget == "full" and long_only and glo[g] > 1 + _TOL:
                raise InfeasibleError(f"group '{name}': its lower bound {_fmt(glo[g])} is above 1")
            if budget == "full":
                others_hi = float(np.sum(upper[~members]))
                if ghi[g] + others_hi < 1 - _TOL:
                    raise InfeasibleError(f"group '{name}': its upper bound {_fmt(ghi[g])} plus the "
                                          f"other assets' upper bounds ({_fmt(others_hi)}) is below 1")


def _find_point(cons: Constraints):
    """A feasible portfolio: equal weights when they qualify, else a vertex found by LP."""
    n = cons.n_assets
    candidates = []
    if cons.budget == "full":
        candidates.append(np.full(n, 1.0 / n))
    else:
        candidates.append(np.zeros(n))
        candidates.append(np.full(n, 1.0 / n))
    for w in candidates:
        if _violation(cons, w) <= 1e-14:
            return _snap(w, cons)
    from scipy.optimize import linprog

    A, lo, hi = cons.rows()
    A_ub, b_ub, A_eq, b_eq = _split_rows(A, lo, hi)
    res = linprog(np.zeros(n), A_ub=A_ub, b_ub=b_ub, A_eq=A_eq, b_eq=b_eq,
                  bounds=list(zip(_none(cons.lower), _none(cons.upper))), method="highs")
    if res.status != 0:
        names = ", ".join(cons.group_names) or "none"
        raise InfeasibleError("the asset bounds, group bounds (groups: " + names + ") and budget "
                              "cannot all be met together")
    w = _snap(res.x, cons)
    if cons.budget == "full":
        # restore the budget exactly on a free coordinate after snapping
        free = (w > cons.lower) & (w < cons.upper)
        if np.any(free):
            j = int(np.flatnonzero(free)[0])
            w[j] += 1.0 - w.sum()
    if _violation(cons, w) > 1e-9:
        raise InfeasibleError("the asset bounds, group bounds and budget cannot all be met together")
    return w
