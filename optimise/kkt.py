"""Karush-Kuhn-Tucker residuals: the certificate that a solution is optimal.

For the convex QP ``min 1/2 x'Hx - c'x`` subject to ``lb <= x <= ub`` and
``lo <= A x <= hi`` a point ``x`` is optimal exactly when multipliers exist with

* stationarity: ``H x - c + A' nu - z = 0``;
* primal feasibility: every bound and row holds;
* dual feasibility: ``z_i >= 0`` where only the lower bound can hold it, ``z_i <= 0`` at
  the upper bound, ``nu_k <= 0`` at ``lo_k``, ``nu_k >= 0`` at ``hi_k``;
* complementary slackness: a multiplier is non-zero only on a constraint that holds with
  equality.

(Karush 1939; Kuhn & Tucker 1951; e.g. Nocedal & Wright 2006, *Numerical Optimization*,
theorem 12.1 and section 16.1; citations from memory.)

:func:`kkt_residuals` measures the four conditions. Given the solver's multipliers it
checks them; without multipliers it finds the best ones itself by non-negative least
squares on the constraints active at ``x`` (so the check does not trust the solver).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["KKTResiduals", "kkt_residuals"]


@dataclass(frozen=True)
class KKTResiduals:
    """Largest absolute violation of each KKT condition (units of the objective gradient,
    or of the weights for primal feasibility)."""

    stationarity: float
    primal: float
    dual: float
    complementarity: float

    @property
    def max(self) -> float:
        return max(self.stationarity, self.primal, self.dual, self.complementarity)


def _arrays(x, H, c, A, lo, hi, lb, ub):
    x = np.asarray(x, dtype=float)
    n = x.shape[0]
    H = np.asarray(H, dtype=float)
    c = np.zeros(n) if c is None else np.asarray(c, dtype=float)
    A = np.zeros((0, n)) if A is None else np.asarray(A, dtype=float).reshape(-1, n)
    m = A.shape[0]
    lo = np.full(m, -np.inf) if lo is None else np.asarray(lo, dtype=float)
    hi = np.full(m, np.inf) if hi is None else np.asarray(hi, dtype=float)
    lb = np.full(n, -np.inf) if lb is None else np.asarray(lb, dtype=float)
    ub = np.full(n, np.inf) if ub is None else np.asarray(ub, dtype=float)
    return x, H, c, A, lo, hi, lb, ub


def kkt_residuals(x, H, c=None, A=None, lo=None, hi=None, lb=None, ub=None, *,
                  z=None, nu=None, extra_gradients=None, active_tol: float = 1e-9
                  ) -> KKTResiduals:
    """KKT residuals of ``x`` for ``min 1/2 x'Hx - c'x`` s.t. ``lb<=x<=ub``, ``lo<=Ax<=hi``.

    Parameters
    ----------
    x : ndarray, shape (N,)
        The candidate solution.
    H : ndarray, shape (N, N)
    c : ndarray, shape (N,), optional (zero)
    A : ndarray, shape (M, N), optional; lo, hi : ndarray, shape (M,), optional
    lb, ub : ndarray, shape (N,), optional (unbounded)
    z, nu : ndarray, shapes (N,), (M,), optional
        Multipliers (sign conventions in the module docstring). When both are omitted
        they are estimated by non-negative least squares over the constraints active at
        ``x`` (within ``active_tol``), which makes dual feasibility hold by construction
        and reports the smallest stationarity error any valid multipliers can achieve.
    extra_gradients : sequence of ndarray (N,), optional
        Gradients ``a`` of further active inequality constraints of the form
        ``a'x <= const`` written as extra columns with non-negative multipliers
        (stationarity becomes ``Hx - c + A'nu - z + sum_j eta_j a_j = 0``); used for the
        volatility constraint of the target-volatility rule. Only with estimated
        multipliers.
    active_tol : float
        How close to a bound a constraint counts as active.

    Returns
    -------
    KKTResiduals
    """
    x, H, c, A, lo, hi, lb, ub = _arrays(x, H, c, A, lo, hi, lb, ub)
    n = x.shape[0]
    m = A.shape[0]
    grad = H @ x - c
    ax = A @ x
    primal = max(0.0, float(np.max(lb - x, initial=0.0)), float(np.max(x - ub, initial=0.0)),
                 float(np.max(lo - ax, initial=0.0)), float(np.max(ax - hi, initial=0.0)))
    if z is None and nu is None:
        return _estimated(x, grad, A, ax, lo, hi, lb, ub, primal, extra_gradients, active_tol)
    z = np.zeros(n) if z is None else np.asarray(z, dtype=float)
    nu = np.zeros(m) if nu is None else np.asarray(nu, dtype=float)
    stat = float(np.max(np.abs(grad + A.T @ nu - z), initial=0.0))
    # dual feasibility: a positive z needs a finite lower bound, a negative one an upper
    zpos = np.where(np.isfinite(lb), 0.0, np.maximum(z, 0.0))
    zneg = np.where(np.isfinite(ub), 0.0, np.maximum(-z, 0.0))
    npos = np.where(np.isfinite(hi), 0.0, np.maximum(nu, 0.0))
    nneg = np.where(np.isfinite(lo), 0.0, np.maximum(-nu, 0.0))
    dual = float(max(np.max(zpos, initial=0.0), np.max(zneg, initial=0.0),
                     np.max(npos, initial=0.0), np.max(nneg, initial=0.0)))
    with np.errstate(invalid="ignore"):
        s_lb = np.where(np.isfinite(lb), x - lb, np.inf)
        s_ub = np.where(np.isfinite(ub), ub - x, np.inf)
        s_lo = np.where(np.isfinite(lo), ax - lo, np.inf)
        s_hi = np.where(np.isfinite(hi), hi - ax, np.inf)
        eq = lo == hi
        comp = [np.where(z > 0, z * s_lb, 0.0), np.where(z < 0, -z * s_ub, 0.0),
                np.where((nu < 0) & ~eq, -nu * s_lo, 0.0), np.where((nu > 0) & ~eq, nu * s_hi, 0.0)]
    compl = float(max(np.max(np.nan_to_num(v, posinf=np.inf), initial=0.0) for v in comp))
    return KKTResiduals(stat, primal, dual, compl)


def _estimated(x, grad, A, ax, lo, hi, lb, ub, primal, extra, tol):
    from scipy.optimize import nnls

    n = x.shape[0]
    cols, slacks = [], []
    # with stationarity grad + A'nu - z (+ extra) = 0 write -grad = sum_j lam_j col_j, lam >= 0
    for i in range(n):
        if np.isfinite(lb[i]) and x[i] - lb[i] <= tol * (1 + abs(lb[i])):   # z_i >= 0
            e = np.zeros(n)
            e[i] = -1.0
            cols.append(e)
            slacks.append(abs(x[i] - lb[i]))
        if np.isfinite(ub[i]) and ub[i] - x[i] <= tol * (1 + abs(ub[i])):   # z_i <= 0
            e = np.zeros(n)
            e[i] = 1.0
            cols.append(e)
            slacks.append(abs(ub[i] - x[i]))
    for k in range(A.shape[0]):
        at_lo = np.isfinite(lo[k]) and abs(ax[k] - lo[k]) <= tol * (1 + abs(lo[k]))
        at_hi = np.isfinite(hi[k]) and abs(hi[k] - ax[k]) <= tol * (1 + abs(hi[k]))
        if at_lo:                                   # nu_k <= 0
            cols.append(-A[k])
            slacks.append(abs(ax[k] - lo[k]))
        if at_hi:                                   # nu_k >= 0
            cols.append(A[k])
            slacks.append(abs(hi[k] - ax[k]))
    for a in (extra or ()):
        cols.append(np.asarray(a, dtype=float))
        slacks.append(0.0)
    if cols:
        M = np.array(cols).T
        scale = max(1.0, float(np.max(np.abs(M))))
        lam, _ = nnls(M / scale, -grad, maxiter=50 * M.shape[1] + 100)
        lam = lam / scale
        resid = grad + M @ lam
        compl = float(np.max(lam * np.array(slacks), initial=0.0))
    else:
        resid = grad
        compl = 0.0
    return KKTResiduals(float(np.max(np.abs(resid), initial=0.0)), primal, 0.0, compl)
