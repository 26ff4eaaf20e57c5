"""Portfolio rules: one registry maps a rule type and its parameters to weights.

Every rule takes per-period decimal inputs: ``mean`` (N,) expected returns and
``covariance`` (N, N). They are validated once in :meth:`Rule.weights` /
:meth:`Rule.weights_batch`; the solver kernels in ``_kernels.py`` trust clean arrays.

Rule types (``RULE_TYPES``) and what they solve
-----------------------------------------------
``equal-weight``
    ``w_i = 1/N``.
``inverse-volatility``
    ``w_i`` proportional to ``1/sigma_i``.
``equal-risk-contribution``
    Long-only weights whose risk contributions ``w_i (Sigma w)_i`` are equal (Maillard,
    Roncalli & Teiletche 2010, *J. Portfolio Management* 36(4)).
``min-variance``
    ``min w'Sigma w`` under the constraints.
``mean-variance``
    ``max w'mu - (gamma/2) w'Sigma w``; with ``budget = "cash"`` the cash earns
    ``risk_free`` so the linear term is ``w'(mu - risk_free)``. Cash with shorting and no
    bounds gives the closed form ``w = Sigma^-1 (mu - risk_free) / gamma``.
``max-sharpe``
    ``max (w'mu - risk_free) / sqrt(w'Sigma w)``, solved as the convex problem
    ``min y'Sigma y`` s.t. ``(mu - risk_free)'y = 1`` and ``y`` in the cone of the
    constraints scaled by ``kappa = 1'y >= 0``; then ``w = y / 1'y`` (the standard
    homogenisation of a fractional programme, e.g. Cornuejols & Tutuncu 2007,
    *Optimization Methods in Finance*, section 8.2; citation from memory).
``target-return``
    ``min w'Sigma w`` s.t. ``w'mu >= target`` (with cash: ``w'(mu - rf) + rf >= target``).
``target-volatility``
    ``max w'mu`` s.t. ``sqrt(w'Sigma w) <= target`` (with cash: ``w'(mu - rf)``).
``fixed``
    The weights given in the study (``weights = {asset = weight}``; assets left out hold
    0), checked once against the budget, long-only, bounds and groups; they do not depend
    on the inputs (like 1/N). A study's current (policy) allocation is usually one.

Tracking error against a policy
-------------------------------
``min-variance``, ``mean-variance``, ``target-return``, ``max-sharpe`` and
``target-volatility`` accept
``max_tracking_error`` (``tracking_error_units`` = ``"per period"``, the default, or
``"annualised"``): the second-order cone constraint ``(w - p)'Sigma (w - p) <= te^2`` with
``p`` the policy's weights. It is solved exactly through its Lagrangian: for a multiplier
``eta >= 0`` the problem with ``eta/2 (w - p)'Sigma (w - p)`` added to the objective is a
QP the active-set solver handles; writing ``t = eta / (1 + eta)`` the QP's linear term is
``(1 - t) c + t Sigma p`` and its solution is piecewise affine in ``t`` with a tracking
error that does not increase in ``t``. A bracketing search in ``t`` steps to the exact root
of ``TE(t)^2 = te^2`` on the affine piece of the newest bracket end (its slope from the
KKT system of its active set, ``_kernels.path_slopes``), else along the straight path
between the ends, bisecting when three steps did not halve the bracket; it stops when the
constraint binds to ``1e-10`` relative. ``t = 1`` minimises the tracking error itself: a
limit below that minimum is infeasible, and a limit of 0 returns the policy when the
rule's constraints allow it. For ``max-sharpe`` the limited mean-variance solution
``w(tau)`` is searched over the risk tolerance ``tau`` for ``w'Sigma w = tau w'mu_ex``
(the Sharpe ratio is quasi-concave, so that stationary point is its maximum). For
``target-volatility`` (two cones: the volatility and the tracking error) the same limited
``w(tau)``, whose variance does not decrease in ``tau``, is searched for
``w'Sigma w = target^2``; when even the largest return within the limit is inside the
target that is the answer, and a target below the least volatility within the limit is
infeasible.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Mapping, Optional

import numpy as np

from estimators.core import InfeasibleError, SettingsError, SingularCovarianceError

from . import _kernels as K
from .constraints import Constraints, _greedy_fill, make_constraints
from .kkt import KKTResiduals, kkt_residuals

__all__ = ["RULE_TYPES", "Rule", "Allocation", "make_rule", "KKT_TOLERANCE", "COND_LIMIT",
           "tracking_error", "TE_TYPES"]

#: Largest KKT residual a solve may report (scaled by max(1, |gradient terms|)).
KKT_TOLERANCE = 1e-8
#: Condition number above which a rule that needs the covariance's inverse refuses it.
COND_LIMIT = 1e10
_MAXITER_FACTOR = 20

_SHRINK_HINT = ("use a shrinkage covariance estimator (e.g. 'ledoit-wolf-identity' or 'oas'), "
                "or constrain the weights (long-only or bounds)")

_COMMON = ("long_only", "budget", "bounds", "groups")
_TE = ("max_tracking_error", "tracking_error_units")
RULE_PARAMS = {
    "equal-weight": (),
    "min-variance": _COMMON + _TE,
    "mean-variance": _COMMON + ("risk_aversion", "risk_free") + _TE,
    "max-sharpe": _COMMON + ("risk_free",) + _TE,
    "target-return": _COMMON + ("target", "risk_free") + _TE,
    "target-volatility": _COMMON + ("target", "risk_free") + _TE,
    "inverse-volatility": (),
    "equal-risk-contribution": (),
    "fixed": ("weights",) + _COMMON,
}
#: Rule types that take ``max_tracking_error``.
TE_TYPES = ("min-variance", "mean-variance", "target-return", "max-sharpe", "target-volatility")
#: Accepted spellings of ``tracking_error_units``.
TE_UNITS = {"per period": "per period", "per-period": "per period", "period": "per period",
            "annualised": "annualised", "annualized": "annualised", "annual": "annualised"}
#: Relative accuracy to which a binding tracking-error limit is met (on TE^2).
TE_RTOL = 1e-10
RULE_TYPES = tuple(RULE_PARAMS)
_QP_TYPES = ("min-variance", "mean-variance", "max-sharpe", "target-return")


@dataclass(frozen=True)
class Allocation:
    """The weights a rule proposes for one set of inputs.

    Attributes
    ----------
    weights : ndarray, shape (N,)
        Risky-asset weights (decimals).
    cash : float
        ``1 - sum(weights)`` with ``budget = "cash"``, else 0.
    rule_type : str
    kkt : float or None
        Largest KKT residual of the solve, scaled by ``max(1, |c|, |Hx|)`` (for
        ``equal-risk-contribution``: the relative spread of the risk contributions; None
        for ``equal-weight`` and ``inverse-volatility``).
    implied_risk_aversion : float or None
        For ``target-volatility``: the risk aversion of the mean-variance problem with the
        same solution (0 when the volatility limit does not bind: the largest return; inf
        when the target equals the least attainable volatility). With
        ``max_tracking_error``: of the mean-variance problem under the same limit.
    """

    weights: np.ndarray
    cash: float = 0.0
    rule_type: str = ""
    kkt: Optional[float] = None
    implied_risk_aversion: Optional[float] = None


@dataclass(frozen=True, eq=False)
class Rule:
    """A configured portfolio rule (build it with :func:`make_rule`).

    Attributes
    ----------
    name, type : str
    constraints : Constraints
    params : dict
        The parameters as given.
    risk_aversion : float or None
    risk_free : float
        Per period; 0 unless given.
    target : float or None
        Target return or volatility, per period.
    needs_mean, needs_covariance : bool
    """

    name: str
    type: str
    constraints: Constraints
    params: dict = field(default_factory=dict)
    risk_aversion: Optional[float] = None
    risk_free: float = 0.0
    target: Optional[float] = None
    fixed_weights: Optional[np.ndarray] = None
    policy_weights: Optional[np.ndarray] = None
    max_tracking_error: Optional[float] = None

    @property
    def needs_mean(self) -> bool:
        return self.type in ("mean-variance", "max-sharpe", "target-return", "target-volatility")

    @property
    def needs_covariance(self) -> bool:
        return self.type not in ("equal-weight", "fixed")

    @property
    def assets(self) -> tuple:
        return self.constraints.assets

    # ------------------------------------------------------------------ public API
    def weights(self, mean, covariance) -> Allocation:
        """Weights for one set of inputs.

        Parameters
        ----------
        mean : ndarray, shape (N,) or None
            Expected returns per period (ignored by rules that do not use them).
        covariance : ndarray, shape (N, N) or None

        Returns
        -------
        Allocation
        """
        means, covs = self._iv(mean, covariance, batch=False)
        W, kkt, gam = self._solve(means, covs, single=True)
        w = W[0]
        cash = 1.0 - float(w.sum()) if self.constraints.budget == "cash" else 0.0
        if abs(cash) <= 1e-13:
            cash = 0.0
        return Allocation(w, cash, self.type, None if kkt is None else float(kkt[0]),
                          None if gam is None else float(gam[0]))

    def weights_batch(self, means, covariances, *, warm: bool = True) -> np.ndarray:
        """Weights for D sets of inputs in one call (batched kernel).

        Parameters
        ----------
        means : ndarray, shape (D, N) or None
        covariances : ndarray, shape (D, N, N) or None
        warm : bool
            Let the active-set solver start each problem from the previous problem's
            solution when that is a better start than its own cold start (helps for
            neighbouring problems such as overlapping backtest windows). Pass False for
            unrelated problems, such as independent resampled draws, to skip the test.
            The weights do not depend on it (the final working set decides them).

        Returns
        -------
        ndarray, shape (D, N)
            Risky-asset weights; with ``budget = "cash"`` the cash is ``1 - sum``.
        """
        means, covs = self._iv(means, covariances, batch=True)
        W, _, _ = self._solve(means, covs, single=False, warm=warm)
        return W

    def weights_batch_details(self, means, covariances):
        """Like :meth:`weights_batch` but also returns the (D,) largest KKT residuals
        (NaN for rules without an optimisation)."""
        means, covs = self._iv(means, covariances, batch=True)
        W, kkt, _ = self._solve(means, covs, single=False)
        return W, (np.full(W.shape[0], np.nan) if kkt is None else kkt)

    def check(self, mean, covariance, weights) -> KKTResiduals:
        """KKT residuals of ``weights`` for this rule's optimisation problem, with
        multipliers estimated independently of the solver (see :func:`kkt_residuals`).

        For ``max-sharpe`` the residuals are those of the homogenised problem at
        ``y = w / (w'(mu - rf))``; for ``target-volatility`` the volatility constraint
        enters with its own multiplier.
        """
        means, covs = self._iv(mean, covariance, batch=False)
        mu, S = means[0], covs[0]
        w = np.asarray(weights, dtype=float)
        cons = self.constraints
        if self.type == "max-sharpe" and self.max_tracking_error is not None:
            # a stationary point of the Sharpe ratio over the convex set is its maximum
            # (quasi-concavity): KKT of min 1/2 w'Sw - tau mu_ex'w, tau = w'Sw / mu_ex'w,
            # under the linear constraints and the cone
            ex = mu - self.risk_free
            tau = float(w @ S @ w) / float(ex @ w)
            A, lo, hi = cons.rows()
            d = w - self.policy_weights
            te2 = self.max_tracking_error ** 2
            gap = te2 - float(d @ S @ d)
            extra = [S @ d] if abs(gap) <= 1e-8 * max(te2, 1e-300) else []
            r = kkt_residuals(w, S, tau * ex, A, lo, hi, cons.lower, cons.upper,
                              extra_gradients=extra)
            return KKTResiduals(r.stationarity, max(r.primal, -gap / max(te2, 1e-300)), r.dual,
                                r.complementarity)
        if self.type == "max-sharpe":
            H, c, A, lo, hi, lb, ub = self._sharpe_problem(mu[None, :], S[None])
            y = w / float((mu - self.risk_free) @ w)
            return kkt_residuals(y, H[0], c[0], A[0], lo[0], hi[0], lb, ub)
        if self.type == "target-volatility":
            A, lo, hi = cons.rows()
            v2 = self.target ** 2
            gap = v2 - float(w @ S @ w)
            extra = [2.0 * S @ w] if abs(gap) <= 1e-9 * max(v2, 1e-300) else []
            if self.max_tracking_error is None:
                return kkt_residuals(w, np.zeros_like(S), self._excess(mu), A, lo, hi,
                                     cons.lower, cons.upper, extra_gradients=extra)
            # both cones: the volatility and the tracking error, each with its own
            # multiplier when it binds; their violations count as primal
            d = w - self.policy_weights
            te2 = self.max_tracking_error ** 2
            gap_te = te2 - float(d @ S @ d)
            if abs(gap_te) <= 1e-8 * max(te2, 1e-300):
                extra.append(S @ d)
            r = kkt_residuals(w, np.zeros_like(S), self._excess(mu), A, lo, hi, cons.lower,
                              cons.upper, extra_gradients=extra)
            return KKTResiduals(r.stationarity,
                                max(r.primal, -gap / max(v2, 1e-300),
                                    -gap_te / max(te2, 1e-300)), r.dual, r.complementarity)
        if self.type not in _QP_TYPES:
            raise SettingsError(f"rule type '{self.type}' is not an optimisation; nothing to check")
        H, c, A, lo, hi, lb, ub = self._qp_problem(mu[None, :], S[None])
        if self.max_tracking_error is None:
            return kkt_residuals(w, H[0], c[0], A[0], lo[0], hi[0], lb, ub)
        # the cone constraint (w - p)'S(w - p) <= te^2 enters with its own multiplier
        # when it binds (its gradient is S (w - p)); its violation counts as primal
        d = w - self.policy_weights
        te2 = self.max_tracking_error ** 2
        gap = te2 - float(d @ S @ d)
        extra = [S @ d] if abs(gap) <= 1e-8 * max(te2, 1e-300) else []
        r = kkt_residuals(w, H[0], c[0], A[0], lo[0], hi[0], lb, ub, extra_gradients=extra)
        return KKTResiduals(r.stationarity, max(r.primal, -gap / max(te2, 1e-300)), r.dual,
                            r.complementarity)

    # ------------------------------------------------------------------ validation
    def _iv(self, mean, cov, batch: bool):
        n = self.constraints.n_assets
        nd = 2 if batch else 1
        if self.needs_covariance:
            if cov is None:
                raise SettingsError(f"rule '{self.name}' ({self.type}) needs a covariance")
            cov = np.asarray(cov, dtype=float)
            if cov.ndim != nd + 1 or cov.shape[-2:] != (n, n):
                raise SettingsError(f"rule '{self.name}': covariance must have shape "
                                    f"{'(D, N, N)' if batch else '(N, N)'} with N = {n}, got {cov.shape}")
            covs = np.ascontiguousarray(cov.reshape(-1, n, n))
            bad, asym, neg = K.cov_checks(covs)
            where = (lambda d: f" (draw {d})" if batch else "")
            if bad >= 0:
                raise SettingsError(f"rule '{self.name}': covariance has NaN or infinite "
                                    f"entries{where(bad)}")
            if asym > 1e-10:
                raise SettingsError(f"rule '{self.name}': covariance is not symmetric "
                                    f"(relative asymmetry {asym:.2g})")
            if asym > 0:    # round-off only: the kernels read both triangles
                covs = 0.5 * (covs + covs.transpose(0, 2, 1))
            if neg >= 0:
                raise SettingsError(f"rule '{self.name}': covariance has a negative "
                                    f"variance{where(neg)}")
            D = covs.shape[0]
        else:
            covs = None
            D = None
        if self.needs_mean:
            if mean is None:
                raise SettingsError(f"rule '{self.name}' ({self.type}) needs expected returns")
            mean = np.asarray(mean, dtype=float)
            if mean.ndim != nd or mean.shape[-1] != n:
                raise SettingsError(f"rule '{self.name}': mean must have shape "
                                    f"{'(D, N)' if batch else '(N,)'} with N = {n}, got {mean.shape}")
            if not np.all(np.isfinite(mean)):
                raise SettingsError(f"rule '{self.name}': mean has NaN or infinite entries")
            means = np.ascontiguousarray(mean.reshape(-1, n))
            if D is not None and means.shape[0] != D:
                raise SettingsError(f"rule '{self.name}': {means.shape[0]} means but {D} covariances")
            D = means.shape[0]
        else:
            means = None
        if D is None:
            if batch:
                arr = mean if mean is not None else cov
                D = 1 if arr is None else int(np.asarray(arr).shape[0])
            else:
                D = 1
        if means is None:
            means = np.zeros((D, n))
        return means, covs

    # ------------------------------------------------------------------ dispatch
    def _solve(self, means, covs, single: bool, warm: bool = True):
        t = self.type
        n = self.constraints.n_assets
        D = means.shape[0]
        if t == "equal-weight":
            return np.full((D, n), 1.0 / n), None, None
        if t == "fixed":
            return np.repeat(self.fixed_weights[None, :], D, axis=0), None, None
        if t == "inverse-volatility":
            vol = np.sqrt(np.diagonal(covs, axis1=1, axis2=2))
            if np.any(vol <= 0):
                d, i = np.argwhere(vol <= 0)[0]
                raise SingularCovarianceError(
                    f"rule '{self.name}': asset '{self.assets[i]}' has zero volatility"
                    + (f" (draw {d})" if not single else "") + "; inverse volatility is undefined")
            inv = 1.0 / vol
            return inv / inv.sum(axis=1, keepdims=True), None, None
        if t == "equal-risk-contribution":
            return self._erc(covs, single)
        if t == "target-volatility":
            if self.max_tracking_error is not None:
                return self._target_vol_te(means, covs, single)
            return self._target_vol(means, covs, single)
        if self.max_tracking_error is not None:
            return self._qp_te(means, covs, single)
        return self._qp(means, covs, single, warm)

    # ------------------------------------------------------------------ QP rules
    def _excess(self, mu):
        return mu - self.risk_free if self.constraints.budget == "cash" else mu

    def _qp_problem(self, means, covs):
        """Arrays of the QP for each draw: H (D,N,N), c (D,N), A (D,M,N), lo/hi (D,M), lb, ub."""
        cons = self.constraints
        D, n = means.shape
        A, lo, hi = cons.rows()
        if self.type == "max-sharpe":
            return self._sharpe_problem(means, covs)
        if self.type == "min-variance":
            H = covs
            c = np.zeros((D, n))
        elif self.type == "mean-variance":
            # the same minimiser as H = gamma Sigma, c = mu, without a (D, N, N) copy
            H = covs
            c = self._excess(means) / self.risk_aversion
        elif self.type == "target-return":
            H = covs
            c = np.zeros((D, n))
            rf = self.risk_free if cons.budget == "cash" else 0.0
            row = means - rf
            Ad = np.concatenate([np.broadcast_to(A, (D,) + A.shape), row[:, None, :]], axis=1)
            lod = np.concatenate([np.broadcast_to(lo, (D, lo.size)), np.full((D, 1), self.target - rf)], axis=1)
            hid = np.concatenate([np.broadcast_to(hi, (D, hi.size)), np.full((D, 1), np.inf)], axis=1)
            return H, c, np.ascontiguousarray(Ad), np.ascontiguousarray(lod), np.ascontiguousarray(hid), \
                cons.lower.copy(), cons.upper.copy()
        else:  # pragma: no cover - dispatch guards this
            raise AssertionError(self.type)
        return (H, c, np.broadcast_to(A, (D,) + A.shape), np.broadcast_to(lo, (D, lo.size)),
                np.broadcast_to(hi, (D, hi.size)), cons.lower.copy(), cons.upper.copy())

    def _sharpe_problem(self, means, covs):
        """Homogenised maximum-Sharpe problem in y = kappa w, kappa = 1'y >= 0."""
        cons = self.constraints
        D, n = means.shape
        rows, lo, hi = [], [], []
        lb = np.full(n, -np.inf)
        ub = np.full(n, np.inf)
        ones = np.ones(n)
        for i in range(n):
            li, ui = cons.lower[i], cons.upper[i]
            if li == 0.0:
                lb[i] = 0.0
            elif np.isfinite(li):
                rows.append(np.eye(n)[i] - li * ones)       # y_i - l_i 1'y >= 0
                lo.append(0.0)
                hi.append(np.inf)
            implied = cons.long_only and ui >= 1.0        # y_i <= 1'y already
            if np.isfinite(ui) and not implied:
                rows.append(np.eye(n)[i] - ui * ones)       # y_i - u_i 1'y <= 0
                lo.append(-np.inf)
                hi.append(0.0)
        for g in range(len(cons.group_names)):
            a = cons.group_matrix[g]
            if np.isfinite(cons.group_lower[g]):
                rows.append(a - cons.group_lower[g] * ones)
                lo.append(0.0)
                hi.append(np.inf)
            if np.isfinite(cons.group_upper[g]):
                rows.append(a - cons.group_upper[g] * ones)
                lo.append(-np.inf)
                hi.append(0.0)
        if not np.all(lb >= 0):
            rows.append(ones)                               # kappa = 1'y >= 0
            lo.append(0.0)
            hi.append(np.inf)
        M = len(rows) + 1
        A = np.empty((D, M, n))
        A[:, 0, :] = means - self.risk_free                 # (mu - rf)'y = 1
        if rows:
            A[:, 1:, :] = np.array(rows)
        lod = np.empty((D, M))
        hid = np.empty((D, M))
        lod[:, 0] = hid[:, 0] = 1.0
        lod[:, 1:] = np.array(lo)
        hid[:, 1:] = np.array(hi)
        return covs, np.zeros((D, n)), A, lod, hid, lb, ub

    def _check_conditioning(self, covs, single: bool):
        """Rules whose feasible set is unbounded need an invertible covariance."""
        if self.constraints.bounded:
            return
        ev = np.linalg.eigvalsh(covs)
        top = ev[:, -1]
        bad = (ev[:, 0] <= 0) | (ev[:, 0] * COND_LIMIT < top)
        if np.any(bad):
            d = int(np.flatnonzero(bad)[0])
            cond = np.inf if ev[d, 0] <= 0 else top[d] / ev[d, 0]
            where = "" if single else f" (draw {d})"
            raise SingularCovarianceError(
                f"rule '{self.name}' ({self.type}): the covariance{where} is singular or "
                f"ill-conditioned (condition number {cond:.3g} > {COND_LIMIT:.0e}) and the weights "
                f"are not bounded, so the solution is not determined; {_SHRINK_HINT}")

    def _starts(self, means, covs, H, c, A, lo, hi, lb, ub, single):
        """Feasible start points (D, N) for the kernel."""
        cons = self.constraints
        D, n = means.shape
        if self.type == "target-return":
            rf = self.risk_free if cons.budget == "cash" else 0.0
            need = self.target - rf
            vals, W = self._max_returns(means - rf if cons.budget == "cash" else means,
                                        np.full(D, need))
            bad = vals < need - 1e-12 * max(1.0, abs(need))
            if np.any(bad):
                d = int(np.flatnonzero(bad)[0])
                top = vals[d] + rf
                where = "" if single else f" in draw {d}"
                raise InfeasibleError(
                    f"rule '{self.name}': target return {self.target:.6g} is above the largest "
                    f"attainable expected return {top:.6g}{where} under the constraints")
            return W
        if self.type == "max-sharpe":
            vals, W = self._max_returns(means - self.risk_free)
            bad = vals <= 1e-14
            if np.any(bad):
                d = int(np.flatnonzero(bad)[0])
                where = "" if single else f" in draw {d}"
                raise InfeasibleError(
                    f"rule '{self.name}': no portfolio allowed by the constraints has an expected "
                    f"return above the risk-free rate {self.risk_free:.6g}{where} (largest "
                    f"{vals[d] + self.risk_free:.6g}); the maximum Sharpe ratio is not defined")
            return W / vals[:, None]
        return self._cold_points(H, c)

    def _cold_points(self, H, c):
        """Cold starts (D, N). With box bounds, full budget and no groups: the minimiser
        of the problem without the covariances between assets (``separable_start_rows``;
        a water level over ``(c_i - lam) / H_ii``), whose support is usually close to the
        optimum's, so the active-set method needs few changes; where a draw's diagonal
        does not allow it, the vertex that fills the best single assets first (score
        ``c_i - H_ii / 2``). Otherwise the constraints' feasible point."""
        cons = self.constraints
        D, n = c.shape
        if cons.bounded and not cons.group_names and cons.budget == "full":
            lower, cap, _ = _fill_limits(cons.lower, cons.upper)
            x0 = np.empty((D, n))
            done = np.zeros(D, dtype=bool)
            K.separable_start_rows(np.ascontiguousarray(H, dtype=np.float64),
                                   np.ascontiguousarray(c, dtype=np.float64), lower, cap, x0,
                                   done)
            if not done.all():
                rest = ~done
                score = c[rest] - 0.5 * np.diagonal(H[rest], axis1=1, axis2=2)
                x0[rest] = _greedy_fill_fast(score, cons.lower, cons.upper)
            return x0
        return np.broadcast_to(cons.feasible_point, (D, n)).copy()

    def _max_returns(self, means, need=None):
        """Feasible portfolios (D, N) with a large ``mean'w`` and those values (D,).

        With bounded weights: the largest attainable value. With unbounded weights the
        return has no maximum; a feasible portfolio reaching ``need`` (D,) is returned,
        tilting the feasible point from the lowest- to the highest-mean unbounded asset.
        """
        cons = self.constraints
        if cons.bounded:
            if not cons.group_names and np.all(np.isfinite(cons.lower)):
                # full budget: fill to 1; cash (long-only, no borrowing): only assets with a
                # positive (excess) mean, the rest stays in cash
                W = _greedy_fill(means, cons.lower, cons.upper, cons.budget == "cash")
                return np.einsum("dn,dn->d", means, W), W
            out = [cons.max_return(m) for m in means]
            return np.array([v for v, _ in out]), np.array([w for _, w in out])
        D, n = means.shape
        x0 = cons.feasible_point
        W = np.broadcast_to(x0, (D, n)).copy()
        base = means @ x0
        up_ok = ~np.isfinite(cons.upper)
        dn_ok = ~np.isfinite(cons.lower)
        if cons.group_names or not (np.any(up_ok) and np.any(dn_ok)):
            return self._boxed_lp(means)
        i = np.argmax(np.where(up_ok, means, -np.inf), axis=1)
        j = np.argmin(np.where(dn_ok, means, np.inf), axis=1)
        gain = means[np.arange(D), i] - means[np.arange(D), j]
        if need is None:
            need = base + 1.0
        s = np.where(gain > 0, np.maximum(need - base, 0.0) / np.where(gain > 0, gain, 1.0), 0.0)
        W[np.arange(D), i] += s
        W[np.arange(D), j] -= s
        vals = np.einsum("dn,dn->d", means, W)
        if np.any(gain <= 0):
            bv, bw = self._boxed_lp(means[gain <= 0])
            vals[gain <= 0] = bv
            W[gain <= 0] = bw
        return vals, W

    def _boxed_lp(self, means):
        """Maximum return within the constraints plus |w_i| <= 100 (unbounded weights)."""
        from scipy.optimize import linprog

        from .constraints import _snap, _split_rows

        cons = self.constraints
        A, lo, hi = cons.rows()
        A_ub, b_ub, A_eq, b_eq = _split_rows(A, lo, hi)
        lb = np.maximum(cons.lower, -100.0)
        ub = np.minimum(cons.upper, 100.0)
        vals, W = [], []
        for m in means:
            res = linprog(-m, A_ub=A_ub, b_ub=b_ub, A_eq=A_eq, b_eq=b_eq,
                          bounds=list(zip(lb, ub)), method="highs")
            if res.status != 0:
                raise InfeasibleError(f"rule '{self.name}': no feasible portfolio found ({res.message})")
            w = _snap(res.x, cons)
            vals.append(float(m @ w))
            W.append(w)
        return np.array(vals), np.array(W)

    def _qp_core(self, H, c, A, lo, hi, lb, ub, x0, single: bool, warm: bool = True):
        """Solve the D QPs from feasible starts ``x0``; retry slow ones cold; check KKT.

        Returns (X, Z, NU, kkt)."""
        X, Z, NU, status = _run_qp(H, c, A, lo, hi, lb, ub, x0, warm=warm,
                                   rescale_row=0 if self.type == "max-sharpe" else -1)
        retry = np.flatnonzero(status == K.MAXITER)
        if retry.size:   # cold start with a ten times larger iteration limit, one by one
            for d in retry:
                sl = slice(d, d + 1)
                Xd, Zd, Nd, sd = _run_qp(H[sl], c[sl], A[sl], lo[sl], hi[sl], lb, ub, x0[sl],
                                         warm=False, maxiter_factor=10 * _MAXITER_FACTOR)
                X[d], Z[d], NU[d], status[d] = Xd[0], Zd[0], Nd[0], sd[0]
        self._raise_status(status, single)
        kkt = _kkt_batch(H, c, A, lo, hi, lb, ub, X, Z, NU)
        self._raise_kkt(kkt, single)
        return X, Z, NU, kkt

    def _qp(self, means, covs, single: bool, warm: bool = True):
        cons = self.constraints
        self._check_conditioning(covs, single)     # only when the weights are unbounded
        H, c, A, lo, hi, lb, ub = self._qp_problem(means, covs)
        x0 = self._starts(means, covs, H, c, A, lo, hi, lb, ub, single)
        X, Z, NU, kkt = self._qp_core(H, c, A, lo, hi, lb, ub, x0, single, warm=warm)
        if self.type == "max-sharpe":
            kappa = X.sum(axis=1)
            bad = kappa <= 1e-12 * np.max(np.abs(X), axis=1)
            if np.any(bad):
                d = int(np.flatnonzero(bad)[0])
                raise InfeasibleError(
                    f"rule '{self.name}': the Sharpe ratio has no maximum under these constraints"
                    + ("" if single else f" (draw {d})") + " (it is approached only by ever "
                    "larger long-short positions); bound the weights or use long_only")
            X = X / kappa[:, None]
        return _clean(X, cons), kkt, None

    def _raise_status(self, status, single):
        bad = status != K.OK
        if not np.any(bad):
            return
        d = int(np.flatnonzero(bad)[0])
        where = "" if single else f" (draw {d})"
        if status[d] == K.SINGULAR:
            raise SingularCovarianceError(
                f"rule '{self.name}' ({self.type}): the covariance{where} is singular along a "
                f"direction the constraints do not bound, so no finite optimum exists; {_SHRINK_HINT}")
        raise RuntimeError(f"rule '{self.name}' ({self.type}): the active-set solver stopped with "
                           f"status {int(status[d])}{where}")  # a bug, not a user error

    def _raise_kkt(self, kkt, single):
        bad = ~(kkt <= KKT_TOLERANCE)
        if np.any(bad):
            d = int(np.flatnonzero(bad)[0])
            raise SingularCovarianceError(
                f"rule '{self.name}' ({self.type}): the solution{'' if single else f' of draw {d}'} "
                f"fails the optimality check (KKT residual {kkt[d]:.3g} > {KKT_TOLERANCE:g}), "
                f"which happens with a numerically singular covariance; {_SHRINK_HINT}")

    # ------------------------------------------------------------------ tracking error
    def _qp_te(self, means, covs, single: bool):
        """QP rules with ``(w - p)'Sigma (w - p) <= te^2`` (see the module docstring).

        For each draw: solve at ``t = 0`` (the rule without the limit); where the limit
        is slack that is the answer. Else solve at ``t = 1`` (least tracking error under
        the rule's constraints; above ``te`` means infeasible) and search ``t`` in the
        bracket: step to the root of ``TE^2 = te^2`` along the affine path between the
        bracket's two solutions (exact when they share an active set), bisect when that
        does not shrink the bracket enough.
        """
        self._check_conditioning(covs, single)
        if self.type == "max-sharpe":
            return self._sharpe_te(means, covs, single)
        H, c, A, lo, hi, lb, ub = self._qp_problem(means, covs)
        A = np.ascontiguousarray(np.broadcast_to(A, A.shape))
        lo = np.ascontiguousarray(lo)
        hi = np.ascontiguousarray(hi)
        x0 = self._starts(means, covs, H, c, A, lo, hi, lb, ub, single)
        X, kkt, _ = self._te_core(covs, H, c, A, lo, hi, lb, ub, x0, single)
        return X, kkt, None

    def _te_core(self, covs, H, c, A, lo, hi, lb, ub, x0, single: bool, least=None,
                 t_guess=None):
        """The tracking-error search for QPs ``min 1/2 x'Hx - c'x`` with ``H = Sigma``.

        ``least``: the solutions at ``t = 1`` (X, Z, NU, kkt), when the caller has them
        (they do not depend on ``c``); ``t_guess`` (D,): a first point to try inside the
        bracket (e.g. the multiplier of a nearby problem).

        Returns (X (D, N), kkt (D,), t (D,)) with ``t = eta / (1 + eta)`` of each draw.
        """
        p = self.policy_weights
        te2 = float(self.max_tracking_error) ** 2
        D, n = c.shape
        Sp = np.einsum("dij,j->di", covs, p)
        X, Z, NU, kkt = self._qp_core(H, c, A, lo, hi, lb, ub, x0, single)

        def te2_of(Xs, idx):
            dd = Xs - p
            return np.maximum(np.einsum("dn,dn->d", np.einsum("dij,dj->di", covs[idx], dd), dd),
                              0.0)

        def solve(idx, t, start):
            ct = (1.0 - t)[:, None] * c[idx] + t[:, None] * Sp[idx]
            return self._qp_core(H[idx], ct, A[idx], lo[idx], hi[idx], lb, ub,
                                 np.ascontiguousarray(start), single, warm=False)

        # TE^2 accuracy: relative to the limit, with a floor at round-off of the variances
        tol = TE_RTOL * te2 + 1e-13 * np.max(np.diagonal(covs, axis1=1, axis2=2), axis=1)
        f0 = te2_of(X, np.arange(D)) - te2
        T = np.zeros(D)
        act = np.flatnonzero(f0 > tol)
        if act.size:
            one = np.ones(act.size)
            if least is None:
                X1, Z1, N1, k1 = solve(act, one, X[act])
            else:
                X1, Z1, N1, k1 = (np.array(a[act]) for a in least)
            f1 = te2_of(X1, act) - te2
            tol_a = tol[act]
            bad = f1 > tol_a
            if np.any(bad):
                j = int(np.flatnonzero(bad)[0])
                d = int(act[j])
                least = math.sqrt(f1[j] + te2)
                raise InfeasibleError(
                    f"rule '{self.name}': max_tracking_error {self.max_tracking_error:.6g} per "
                    f"period is below the least tracking error {least:.6g} that the rule's "
                    f"constraints allow against the policy" + ("" if single else f" (draw {d})")
                    + "; loosen the limit or the rule's constraints")
            # bracket [t_lo, t_hi]: TE too large at t_lo, within the limit at t_hi
            t_lo, t_hi = np.zeros(act.size), one.copy()
            f_lo, f_hi = f0[act], f1
            X_lo, X_hi = X[act].copy(), X1
            Z_hi, N_hi, k_hi = Z1, N1, k1
            done = f_hi >= -tol_a           # binds at t = 1 (a limit of 0, or exactly the least)
            if te2 == 0.0 and self.constraints.is_feasible(p, 1e-12):
                X_hi[:] = p                  # a limit of 0 with a feasible policy: the policy
            covs_a = covs[act]
            slope_dir = np.ascontiguousarray(Sp[act] - c[act])     # d c_t / d t
            newest_hi = np.ones(act.size, dtype=bool)              # which end was set last
            w_mark = np.ones(act.size)
            for it in range(200):
                todo = np.flatnonzero(~done)
                if todo.size == 0:
                    break
                width = t_hi[todo] - t_lo[todo]
                # 1. Newton along the active set of the newest end: exact when the root
                #    lies on that end's affine piece (slope from the KKT system)
                nh = newest_hi[todo][:, None]
                Xe = np.ascontiguousarray(np.where(nh, X_hi[todo], X_lo[todo]))
                te_ = np.where(nh[:, 0], t_hi[todo], t_lo[todo])
                fe = np.where(nh[:, 0], f_hi[todo], f_lo[todo])
                ia = act[todo]
                V = np.empty_like(Xe)
                K.path_slopes(np.ascontiguousarray(H[ia]), slope_dir[todo], A[ia], lo[ia], hi[ia],
                              lb, ub, Xe, 1e-10, V)
                SV = np.einsum("dij,dj->di", covs_a[todo], V)
                qa = np.einsum("dn,dn->d", V, SV)
                qb = 2.0 * np.einsum("dn,dn->d", Xe - p, SV)
                disc = qb * qb - 4.0 * qa * fe
                den = -qb + np.sqrt(np.maximum(disc, 0.0))
                with np.errstate(divide="ignore", invalid="ignore"):
                    tn = te_ + np.where((disc >= 0) & (den > 0), 2.0 * fe / den, np.nan)
                inside = np.isfinite(tn) & (tn > t_lo[todo]) & (tn < t_hi[todo])
                # 2. else the root of TE^2 along the straight path between the two ends
                d0 = X_lo[todo] - p
                dd = X_hi[todo] - X_lo[todo]
                Sdd = np.einsum("dij,dj->di", covs_a[todo], dd)
                s = _root_01(np.einsum("dn,dn->d", dd, Sdd),
                             2.0 * np.einsum("dn,dn->d", d0, Sdd), f_lo[todo])
                s = np.clip(s, 1e-3, 1.0 - 1e-3) if it >= 8 else np.clip(s, 0.0, 1.0)
                tn = np.where(inside, tn, t_lo[todo] + s * width)
                if it == 0 and t_guess is not None:
                    gs = t_guess[act[todo]]
                    tn = np.where((gs > t_lo[todo]) & (gs < t_hi[todo]), gs, tn)
                if it % 4 == 0:
                    w_mark[todo] = width
                elif it % 4 == 3:           # safeguard: bisect unless 3 steps halved the bracket
                    tn = np.where(width > 0.5 * w_mark[todo], t_lo[todo] + 0.5 * width, tn)
                Xn, Zn, Nn, kn = solve(act[todo], tn, X_hi[todo])
                fn = te2_of(Xn, act[todo]) - te2
                hit = np.abs(fn) <= tol_a[todo]
                tiny = width <= 1e-15
                lo_m = fn > tol_a[todo]              # still above the limit: new lower end
                hi_m = ~lo_m                         # within the limit: new upper end
                g = todo[hi_m]
                t_hi[g], f_hi[g], X_hi[g] = tn[hi_m], fn[hi_m], Xn[hi_m]
                Z_hi[g], N_hi[g], k_hi[g] = Zn[hi_m], Nn[hi_m], kn[hi_m]
                g = todo[lo_m]
                t_lo[g], f_lo[g], X_lo[g] = tn[lo_m], fn[lo_m], Xn[lo_m]
                newest_hi[todo] = hi_m
                done[todo[hit | tiny]] = True
            if not np.all(done):   # pragma: no cover - the bracket always shrinks
                raise RuntimeError(f"rule '{self.name}': tracking-error search did not converge")
            X[act], Z[act], NU[act], kkt[act], T[act] = X_hi, Z_hi, N_hi, k_hi, t_hi
        # certificate of the cone constraint: primal feasibility (TE^2 <= te^2 within the
        # tolerance) and complementary slackness eta (te^2 - TE^2) with eta = t / (1 - t)
        f = te2_of(X, np.arange(D)) - te2
        fin = T < 1.0
        eta = np.where(fin, T / np.where(fin, 1.0 - T, 1.0), 0.0)
        comp = np.where(T > 0, np.where(fin, eta * np.abs(f), np.abs(f)), 0.0)
        cone = np.maximum(np.maximum(f, 0.0), comp) / np.maximum(te2, tol * 1e8)
        bad = cone > 1e-8
        if np.any(bad):   # pragma: no cover - guarded by the search's stopping rule
            d = int(np.flatnonzero(bad)[0])
            raise RuntimeError(f"rule '{self.name}': tracking-error limit not met (draw {d}, "
                               f"relative residual {cone[d]:.3g})")
        return _clean(X, self.constraints), np.maximum(kkt, cone), T

    def _sharpe_te(self, means, covs, single: bool):
        """Maximum Sharpe ratio within the tracking-error limit.

        The Sharpe ratio is quasi-concave, so its maximum over the convex feasible set
        (linear constraints and the cone) is the point of that set's efficient frontier
        where ``Sigma w - tau mu_ex`` is normal to the set with ``tau = w'Sigma w /
        w'mu_ex``: the tracking-error-limited mean-variance solution ``w(tau)`` of
        ``min 1/2 w'Sigma w - tau mu_ex'w`` at the root of ``r(tau) = V(tau) - tau M(tau)``
        (``V`` variance, ``M`` excess mean). ``dSharpe/dtau`` has the sign of ``r``, so
        ``r`` falls through zero once; the root is bracketed and found by steps to the
        root of the quadratic that ``r`` is along the affine path between the bracket's
        solutions, with a bisection every third step.
        """
        cons = self.constraints
        D, n = means.shape
        mu = means - self.risk_free
        A0, lo0, hi0 = cons.rows()
        A = np.ascontiguousarray(np.broadcast_to(A0, (D,) + A0.shape))
        lo = np.ascontiguousarray(np.broadcast_to(lo0, (D, lo0.size)))
        hi = np.ascontiguousarray(np.broadcast_to(hi0, (D, hi0.size)))
        lb, ub = cons.lower.copy(), cons.upper.copy()
        H = covs
        x0 = self._cold_points(covs, np.zeros((D, n)))
        # the least-tracking-error solutions (t = 1) do not depend on tau: solved once
        Sp = np.einsum("dij,j->di", covs, self.policy_weights)
        least = self._qp_core(H, Sp, A, lo, hi, lb, ub, x0, single)
        t_prev = np.full(D, np.nan)            # last multiplier per draw: the next first guess

        def solve(idx, tau, start):
            X, kkt, T = self._te_core(covs[idx], H[idx], tau[:, None] * mu[idx], A[idx], lo[idx],
                                      hi[idx], lb, ub, np.ascontiguousarray(start), single,
                                      least=tuple(a[idx] for a in least), t_guess=t_prev[idx])
            t_prev[idx] = T
            return X, kkt

        def resid(X, idx, tau):
            V = np.einsum("dn,dn->d", np.einsum("dij,dj->di", covs[idx], X), X)
            M = np.einsum("dn,dn->d", mu[idx], X)
            return V - tau * M, V, M

        allidx = np.arange(D)
        X_lo, k_lo = solve(allidx, np.zeros(D), x0)
        t_lo = np.zeros(D)
        r_lo, V0, M0 = resid(X_lo, allidx, t_lo)
        # an upper end: grow tau until r < 0 (needs an attainable positive excess mean)
        scale = np.maximum(V0, 1e-300) / np.maximum(np.abs(mu).max(axis=1), 1e-300)
        t_hi = np.maximum(np.where(M0 > 0, V0 / np.where(M0 > 0, M0, 1.0), scale), 1e-300) * 2.0
        X_hi, k_hi = solve(allidx, t_hi, X_lo)
        r_hi, _, M_hi = resid(X_hi, allidx, t_hi)
        for _ in range(80):
            grow = np.flatnonzero(r_hi >= 0)
            if grow.size == 0:
                break
            t_lo[grow], X_lo[grow], r_lo[grow], k_lo[grow] = t_hi[grow], X_hi[grow], r_hi[grow], k_hi[grow]
            t_hi[grow] *= 8.0
            Xg, kg = solve(grow, t_hi[grow], X_hi[grow])
            X_hi[grow], k_hi[grow] = Xg, kg
            r_hi[grow], _, M_hi[grow] = resid(Xg, grow, t_hi[grow])
        bad = r_hi >= 0
        if np.any(bad):
            d = int(np.flatnonzero(bad)[0])
            raise InfeasibleError(
                f"rule '{self.name}': no portfolio within the tracking-error limit has an "
                f"expected return above the risk-free rate {self.risk_free:.6g}"
                + ("" if single else f" (draw {d})") + "; the maximum Sharpe ratio is not defined")
        done = np.abs(r_lo) <= 1e-13 * np.maximum(V0, 1e-300)
        X_hi[done], k_hi[done], t_hi[done] = X_lo[done], k_lo[done], t_lo[done]
        for it in range(200):
            todo = np.flatnonzero(~done)
            if todo.size == 0:
                break
            a = X_lo[todo]
            b = X_hi[todo] - a
            ta, dt = t_lo[todo], t_hi[todo] - t_lo[todo]
            Sa = np.einsum("dij,dj->di", covs[todo], a)
            Sb = np.einsum("dij,dj->di", covs[todo], b)
            ma = np.einsum("dn,dn->d", mu[todo], a)
            mb = np.einsum("dn,dn->d", mu[todo], b)
            # r(s) = (a + s b)'S(a + s b) - (ta + s dt)(ma + s mb)
            q2 = np.einsum("dn,dn->d", b, Sb) - dt * mb
            q1 = 2.0 * np.einsum("dn,dn->d", a, Sb) - ta * mb - dt * ma
            q0 = np.einsum("dn,dn->d", a, Sa) - ta * ma
            s = _root_bracketed(q2, q1, q0)
            if it % 3 == 2:
                s = np.full(todo.size, 0.5)
            if it >= 12:
                s = np.clip(s, 1e-3, 1.0 - 1e-3)
            tn = ta + s * dt
            Xn, kn = solve(todo, tn, X_hi[todo])
            rn, Vn, _ = resid(Xn, todo, tn)
            hit = np.abs(rn) <= 1e-12 * np.maximum(Vn, 1e-300)
            tiny = dt <= 1e-14 * np.maximum(t_hi[todo], 1e-300)
            up = rn > 0
            g = todo[up]
            t_lo[g], X_lo[g], r_lo[g], k_lo[g] = tn[up], Xn[up], rn[up], kn[up]
            g = todo[~up]
            t_hi[g], X_hi[g], r_hi[g], k_hi[g] = tn[~up], Xn[~up], rn[~up], kn[~up]
            g = todo[hit & up]
            X_hi[g], k_hi[g], t_hi[g] = X_lo[g], k_lo[g], t_lo[g]
            done[todo[hit | tiny]] = True
        if not np.all(done):   # pragma: no cover - the bracket always shrinks
            raise RuntimeError(f"rule '{self.name}': maximum-Sharpe search did not converge")
        return X_hi, k_hi, None

    def tracking_multiplier(self, mean, covariance) -> float:
        """The multiplier ``eta >= 0`` of the tracking-error constraint at the solution
        (0 when the limit is slack; inf when it is met only at its least value)."""
        means, covs = self._iv(mean, covariance, batch=False)
        w = self._solve(means, covs, single=True)[0][0]
        return _te_multiplier(self, means[0], covs[0], w)

    # ------------------------------------------------------------------ target volatility
    def _target_vol(self, means, covs, single: bool):
        cons = self.constraints
        self._check_conditioning(covs, single)
        D, n = means.shape
        mu = self._excess(means)
        A, lo, hi = cons.rows()
        Ad = np.broadcast_to(A, (D,) + A.shape)
        lod = np.broadcast_to(lo, (D, lo.size))
        hid = np.broadcast_to(hi, (D, hi.size))
        if cons.bounded:
            _, xmax = self._max_returns(mu)
        else:  # unbounded weights: the maximum return is infinite, never inside the target
            xmax = np.full((D, n), np.nan)
        x0 = self._cold_points(covs, np.zeros((D, n)))   # a low-variance vertex when boxed
        X = np.empty((D, n))
        Z = np.empty((D, n))
        NU = np.empty((D, A.shape[0]))
        T = np.empty(D)
        status = np.empty(D, dtype=np.int64)
        K.target_vol_batch(covs, np.ascontiguousarray(mu), Ad, lod, hid, cons.lower.copy(),
                           cons.upper.copy(), x0, np.ascontiguousarray(xmax),
                           float(self.target) ** 2, _MAXITER_FACTOR * (n + A.shape[0]) + 50,
                           X, Z, NU, T, status)
        if np.any(status == K.OUT_OF_REACH):
            d = int(np.flatnonzero(status == K.OUT_OF_REACH)[0])
            raise InfeasibleError(
                f"rule '{self.name}': target volatility {self.target:.6g} is below the minimum "
                f"attainable volatility under the constraints"
                + ("" if single else f" in draw {d}"))
        self._raise_status(status, single)
        # KKT of the mean-variance problem at t: H = S, c = t mu (finite t only)
        fin = np.isfinite(T)
        kkt = np.zeros(D)
        if np.any(fin):
            kkt[fin] = _kkt_batch(covs[fin], T[fin, None] * mu[fin], Ad[fin], lod[fin], hid[fin],
                                  cons.lower, cons.upper, X[fin], Z[fin], NU[fin])
        self._raise_kkt(kkt, single)
        gam = np.where(T > 0, 1.0 / np.where(T > 0, T, 1.0), np.inf)
        return _clean(X, cons), kkt, gam

    def _target_vol_te(self, means, covs, single: bool):
        """Largest ``w'mu`` with ``sqrt(w'Sigma w) <= target`` and the tracking-error limit.

        Over the convex set ``C`` (linear constraints and the tracking-error cone) the
        mean-variance solution ``w(tau)`` of ``min 1/2 w'Sigma w - tau mu'w`` (each one a
        :meth:`_te_core` search) has a variance that does not decrease in ``tau``:

        1. ``tau = 0`` (least variance in ``C``): above the target means infeasible;
        2. the largest return in ``C`` (the limit ``tau -> inf``): the linear programme's
           maximum when it lies in ``C``, else the point where the cone binds, i.e. the
           tracking-error-limited solution of ``min 1/2 w'Sigma w - (Sigma p + k mu)'w``
           at its multiplier; within the target, it is the answer (the volatility is slack);
        3. else a bracket search in ``tau`` for ``w(tau)'Sigma w(tau) = target^2``: steps to
           the root of the quadratic the variance is along the straight path between the
           bracket's solutions, bisecting every third step; it stops when the volatility
           binds to ``1e-10`` relative.

        Returns (X (D, N), kkt (D,), implied risk aversion ``1/tau`` (D,); 0 when the
        volatility is slack, inf when it binds at the least variance, as without the limit).
        """
        cons = self.constraints
        self._check_conditioning(covs, single)
        D, n = means.shape
        mu = np.ascontiguousarray(self._excess(means))
        A0, lo0, hi0 = cons.rows()
        A = np.ascontiguousarray(np.broadcast_to(A0, (D,) + A0.shape))
        lo = np.ascontiguousarray(np.broadcast_to(lo0, (D, lo0.size)))
        hi = np.ascontiguousarray(np.broadcast_to(hi0, (D, hi0.size)))
        lb, ub = cons.lower.copy(), cons.upper.copy()
        H = covs
        p = self.policy_weights
        te2 = float(self.max_tracking_error) ** 2
        vt = float(self.target) ** 2
        Sp = np.einsum("dij,j->di", covs, p)
        x0 = self._cold_points(covs, np.zeros((D, n)))
        least = self._qp_core(H, Sp, A, lo, hi, lb, ub, x0, single)  # t = 1: independent of c
        diag = np.max(np.diagonal(covs, axis1=1, axis2=2), axis=1)
        vtol = TE_RTOL * vt + 1e-13 * diag           # accuracy of a binding volatility (on V)
        where = (lambda d: "" if single else f" (draw {d})")

        def solve(idx, c, start):
            X, kkt, T = self._te_core(covs[idx], H[idx], c, A[idx], lo[idx], hi[idx], lb, ub,
                                      np.ascontiguousarray(start), single,
                                      least=tuple(a[idx] for a in least))
            return X, kkt, T

        def var(X, idx):
            return np.einsum("dn,dn->d", np.einsum("dij,dj->di", covs[idx], X), X)

        allidx = np.arange(D)
        # 1. least variance within C
        X_lo, k_lo, _ = solve(allidx, np.zeros((D, n)), x0)
        V_lo = var(X_lo, allidx)
        bad = V_lo > vt + vtol
        if np.any(bad):
            d = int(np.flatnonzero(bad)[0])
            raise InfeasibleError(
                f"rule '{self.name}': target volatility {self.target:.6g} is below the least "
                f"volatility {math.sqrt(V_lo[d]):.6g} attainable within max_tracking_error "
                f"{self.max_tracking_error:.6g} under the constraints" + where(d)
                + "; raise the target or loosen the tracking-error limit")
        X = X_lo.copy()
        kkt = k_lo.copy()
        gam = np.full(D, np.inf)                     # tau = 0: the variance binds at its least
        done = V_lo >= vt - vtol
        # 2. largest return within C
        rest = np.flatnonzero(~done)
        X_inf = np.empty((D, n))
        k_inf = np.zeros(D)
        if rest.size:
            need = np.ones(rest.size, dtype=bool)
            if cons.bounded:
                _, xm = self._max_returns(mu[rest])
                dm = xm - p
                tm = np.einsum("dn,dn->d", np.einsum("dij,dj->di", covs[rest], dm), dm)
                ok = tm <= te2 + TE_RTOL * te2 + 1e-13 * diag[rest]
                X_inf[rest[ok]] = _clean(xm[ok], cons)
                need = ~ok
            idx = rest[need]
            if idx.size:
                mmax = np.maximum(np.abs(mu[idx]).max(axis=1), 1e-300)
                k = 1e-2 * max(math.sqrt(te2), 1e-8) * np.sqrt(diag[idx]) / mmax
                pending = np.ones(idx.size, dtype=bool)
                Xc = np.ascontiguousarray(X_lo[idx])
                for _ in range(60):
                    j = np.flatnonzero(pending)
                    if j.size == 0:
                        break
                    g = idx[j]
                    Xg, kg, Tg = solve(g, Sp[g] + k[j, None] * mu[g], Xc[j])
                    Xc[j] = Xg
                    X_inf[g], k_inf[g] = Xg, kg
                    # the cone binds (T > 0): the exact maximum return within C
                    pending[j[Tg > 0]] = False
                    k[j] *= 4.0
            slack = var(X_inf[rest], rest) <= vt + vtol
            g = rest[slack]
            X[g], kkt[g], done[g] = X_inf[g], k_inf[g], True
            gam[g] = 0.0                             # tau -> inf, as the rule without the limit
        # 3. bracket search in tau for the volatility root
        todo0 = np.flatnonzero(~done)
        if todo0.size:
            t_lo = np.zeros(D)
            V0 = V_lo.copy()
            mmax = np.maximum(np.abs(mu).max(axis=1), 1e-300)
            t_hi = np.maximum(V0, vt) / mmax
            X_hi = X_lo.copy()
            k_hi = k_lo.copy()
            V_hi = V_lo.copy()
            grow = todo0
            for _ in range(200):
                if grow.size == 0:
                    break
                Xg, kg, _ = solve(grow, t_hi[grow, None] * mu[grow], X_hi[grow])
                Vg = var(Xg, grow)
                X_hi[grow], k_hi[grow], V_hi[grow] = Xg, kg, Vg
                low = Vg < vt - vtol[grow]
                g = grow[low]
                t_lo[g], X_lo[g], V_lo[g], k_lo[g] = t_hi[g], Xg[low], Vg[low], kg[low]
                t_hi[g] *= 8.0
                grow = g
            if grow.size:   # pragma: no cover - step 2 found the largest return above target
                raise RuntimeError(f"rule '{self.name}': target-volatility search found no "
                                   f"bracket{where(int(grow[0]))}")
            hit = np.abs(V_hi - vt) <= vtol
            fin = np.zeros(D, dtype=bool)
            fin[todo0[hit[todo0]]] = True
            for it in range(200):
                todo = np.flatnonzero(~done & ~fin)
                if todo.size == 0:
                    break
                a = X_lo[todo]
                b = X_hi[todo] - a
                Sb = np.einsum("dij,dj->di", covs[todo], b)
                # -(V(a + s b) - vt): positive at s = 0, <= 0 at s = 1
                q2 = -np.einsum("dn,dn->d", b, Sb)
                q1 = -2.0 * np.einsum("dn,dn->d", a, Sb)
                q0 = vt - V_lo[todo]
                s = _root_bracketed(q2, q1, q0)
                if it % 3 == 2:
                    s = np.full(todo.size, 0.5)
                if it >= 12:
                    s = np.clip(s, 1e-3, 1.0 - 1e-3)
                dt = t_hi[todo] - t_lo[todo]
                tn = t_lo[todo] + s * dt
                Xn, kn, _ = solve(todo, tn[:, None] * mu[todo], X_hi[todo])
                Vn = var(Xn, todo)
                up = Vn >= vt
                g = todo[up]
                t_hi[g], X_hi[g], V_hi[g], k_hi[g] = tn[up], Xn[up], Vn[up], kn[up]
                g = todo[~up]
                t_lo[g], X_lo[g], V_lo[g], k_lo[g] = tn[~up], Xn[~up], Vn[~up], kn[~up]
                close = np.abs(Vn - vt) <= vtol[todo]
                g = todo[close & ~up]          # the root from below: take that end
                t_hi[g], X_hi[g], V_hi[g], k_hi[g] = t_lo[g], X_lo[g], V_lo[g], k_lo[g]
                tiny = dt <= 1e-14 * np.maximum(t_hi[todo], 1e-300)
                fin[todo[close | tiny]] = True
            if not np.all(fin[todo0]):   # pragma: no cover - the bracket always shrinks
                raise RuntimeError(f"rule '{self.name}': target-volatility search did not "
                                   f"converge")
            X[todo0], kkt[todo0] = X_hi[todo0], k_hi[todo0]
            gam[todo0] = np.where(t_hi[todo0] > 0, 1.0 / np.maximum(t_hi[todo0], 1e-300), np.inf)
        # certificate of the volatility constraint: primal feasibility
        Vf = var(X, allidx)
        viol = np.maximum(Vf - vt, 0.0) / max(vt, 1e-300)
        bad = viol > 1e-8
        if np.any(bad):   # pragma: no cover - guarded by the searches
            d = int(np.flatnonzero(bad)[0])
            raise RuntimeError(f"rule '{self.name}': volatility target not met{where(d)} "
                               f"(relative excess {viol[d]:.3g})")
        return _clean(X, cons), np.maximum(kkt, viol), gam

    # ------------------------------------------------------------------ ERC
    def _erc(self, covs, single: bool):
        D, n = covs.shape[:2]
        X = np.empty((D, n))
        status = np.empty(D, dtype=np.int64)
        iters = np.empty(D, dtype=np.int64)
        diag = np.diagonal(covs, axis1=1, axis2=2)
        if np.any(diag <= 0):
            d, i = np.argwhere(diag <= 0)[0]
            raise SingularCovarianceError(
                f"rule '{self.name}': asset '{self.assets[i]}' has zero variance"
                + ("" if single else f" (draw {d})") + "; equal risk contributions are undefined")
        K.erc_batch(covs, np.full(n, 1.0 / n), 1e-13 / n, 200, X, status, iters)
        rc = X * np.einsum("dij,dj->di", covs, X)
        spread = (rc.max(axis=1) - rc.min(axis=1)) / rc.sum(axis=1)
        bad = (status != K.OK) | ~(spread <= 1e-8)
        if np.any(bad):
            d = int(np.flatnonzero(bad)[0])
            raise SingularCovarianceError(
                f"rule '{self.name}' (equal-risk-contribution): no equal-risk-contribution "
                f"portfolio found{'' if single else f' for draw {d}'} (the covariance is singular "
                f"with a long-only zero-risk combination); {_SHRINK_HINT}")
        return X, spread, None


def _greedy_fill_fast(score, lower, upper):
    """``constraints._greedy_fill(score, lower, upper)`` through one numba kernel (the same
    numbers to the last bit; the numpy loop over N assets costs about 1 us per draw at
    N = 10 and 5 us at N = 50)."""
    lower, cap, left0 = _fill_limits(lower, upper)
    out = np.empty(score.shape)
    K.greedy_fill_rows(np.ascontiguousarray(score, dtype=np.float64), lower, cap, left0, out)
    return out


def _fill_limits(lower, upper):
    """(lower, cap, left0) of a fully invested box: the lower bounds, the most each weight
    can reach, ``minimum(upper, lower + 1 - sum(lower))``, and the budget left after the
    lower bounds, ``1 - sum(lower)`` (contiguous float64, as the kernels take them)."""
    lower = np.ascontiguousarray(lower, dtype=np.float64)
    left0 = 1.0 - lower.sum()
    # written as constraints._greedy_fill writes it, so the vertex matches it to the bit
    cap = np.ascontiguousarray(np.minimum(upper, lower + 1.0 - lower.sum()), dtype=np.float64)
    return lower, cap, float(left0)


def _run_qp(H, c, A, lo, hi, lb, ub, x0, rescale_row=-1, warm=True,
            maxiter_factor=_MAXITER_FACTOR):
    """Call the batch kernel; returns (X, Z, NU, status)."""
    D, n = c.shape
    m = A.shape[1]
    X = np.empty((D, n))
    Z = np.empty((D, n))
    NU = np.empty((D, m))
    status = np.empty(D, dtype=np.int64)
    iters = np.empty(D, dtype=np.int64)
    K.qp_batch(np.ascontiguousarray(H), np.ascontiguousarray(c), A, lo, hi, lb, ub,
               np.ascontiguousarray(x0), warm, rescale_row, maxiter_factor * (n + m) + 50,
               X, Z, NU, status, iters)
    return X, Z, NU, status


def _root_01(qa, qb, qc):
    """Root in [0, 1] of ``qa s^2 + qb s + qc`` with ``qa >= 0``, ``qc > 0 >= q(1)``
    (the smaller root; written to avoid cancellation). Shapes (D,)."""
    disc = np.maximum(qb * qb - 4.0 * qa * qc, 0.0)
    den = -qb + np.sqrt(disc)
    with np.errstate(divide="ignore", invalid="ignore"):
        s = np.where(den > 0, 2.0 * qc / np.where(den > 0, den, 1.0), 0.5)
    return np.where(np.isfinite(s), s, 0.5)


def _root_bracketed(q2, q1, q0):
    """A root in [0, 1] of ``q2 s^2 + q1 s + q0`` with ``q(0) > 0 >= q(1)`` (any
    curvature); 0.5 where round-off leaves none. Shapes (D,)."""
    out = np.full(q0.shape, 0.5)
    lin = np.abs(q2) <= 1e-14 * (np.abs(q1) + np.abs(q0))
    with np.errstate(divide="ignore", invalid="ignore"):
        s_lin = -q0 / q1
        disc = np.sqrt(np.maximum(q1 * q1 - 4.0 * q2 * q0, 0.0))
        # the two roots, written without cancellation
        big = -(q1 + np.copysign(disc, q1)) / 2.0
        r1 = big / q2
        r2 = q0 / big
    for cand in (r2, r1):
        ok = ~lin & np.isfinite(cand) & (cand >= 0.0) & (cand <= 1.0)
        out = np.where(ok & (out == 0.5), cand, out)
    ok = lin & np.isfinite(s_lin) & (s_lin >= 0) & (s_lin <= 1)
    return np.where(ok, s_lin, out)


def tracking_error(weights, policy, covariance) -> np.ndarray:
    """Tracking error ``sqrt((w - p)' Sigma (w - p))`` of weights against a policy.

    Parameters
    ----------
    weights : ndarray, shape (N,) or (D, N)
        Risky-asset weights (any cash earns the risk-free rate and adds no risk).
    policy : ndarray, shape (N,) or (D, N)
        The policy's risky-asset weights.
    covariance : ndarray, shape (N, N)
        Per-period covariance (of excess returns).

    Returns
    -------
    float or ndarray, shape (D,)
        Per period (multiply by ``sqrt(periods per year)`` to annualise).
    """
    d = np.asarray(weights, dtype=float) - np.asarray(policy, dtype=float)
    S = np.asarray(covariance, dtype=float)
    v = np.einsum("...i,ij,...j->...", d, S, d)
    out = np.sqrt(np.maximum(v, 0.0))
    return float(out) if out.ndim == 0 else out


def _te_multiplier(rule, mu, S, w) -> float:
    """Multiplier of the tracking-error constraint at ``w``, estimated independently of
    the solver: non-negative least squares on the KKT stationarity condition with the
    active bounds and rows plus the cone's gradient ``Sigma (w - p)``; 0 when slack."""
    from scipy.optimize import nnls

    p = rule.policy_weights
    te2 = rule.max_tracking_error ** 2
    d = w - p
    if float(d @ S @ d) < te2 * (1.0 - 1e-8):
        return 0.0
    cols = []
    if rule.type == "target-volatility":
        # max mu'w: a linear objective; the volatility cone's gradient 2 S w when it binds
        cons = rule.constraints
        A, lo, hi = cons.rows()
        H, c, lb, ub = np.zeros_like(S), rule._excess(mu), cons.lower, cons.upper
        v2 = rule.target ** 2
        if abs(v2 - float(w @ S @ w)) <= 1e-9 * max(v2, 1e-300):
            cols.append(2.0 * S @ w)
    else:
        H, c, A, lo, hi, lb, ub = rule._qp_problem(mu[None, :], S[None])
        H, c, A, lo, hi = H[0], c[0], np.asarray(A[0]), np.asarray(lo[0]), np.asarray(hi[0])
    grad = H @ w - c
    n = w.size
    tol = 1e-9
    for i in range(n):
        if np.isfinite(lb[i]) and w[i] - lb[i] <= tol:
            e = np.zeros(n)
            e[i] = -1.0
            cols.append(e)
        if np.isfinite(ub[i]) and ub[i] - w[i] <= tol:
            e = np.zeros(n)
            e[i] = 1.0
            cols.append(e)
    ax = A @ w
    for k in range(A.shape[0]):
        if lo[k] == hi[k]:
            cols.append(A[k])
            cols.append(-A[k])
            continue
        if np.isfinite(lo[k]) and ax[k] - lo[k] <= tol:
            cols.append(-A[k])
        if np.isfinite(hi[k]) and hi[k] - ax[k] <= tol:
            cols.append(A[k])
    cols.append(S @ d)
    M = np.array(cols).T
    lam, _ = nnls(M, -grad, maxiter=50 * M.shape[1] + 100)
    return float(lam[-1])


def _kkt_batch(H, c, A, lo, hi, lb, ub, X, Z, NU):
    """Largest KKT residual per problem (D,), scaled by max(1, |c|, |H x|) (numba)."""
    out = np.empty(c.shape[0])
    K.kkt_batch(np.ascontiguousarray(H), np.ascontiguousarray(c), A, lo, hi, lb, ub,
                X, Z, NU, out)
    return out


def _kkt_batch_numpy(H, c, A, lo, hi, lb, ub, X, Z, NU):
    """Plain-numpy reference of :func:`_kkt_batch` (a test compares the two)."""
    Hx = np.einsum("dij,dj->di", H, X)
    grad = Hx - c
    stat = np.abs(grad + np.einsum("dmn,dm->dn", A, NU) - Z).max(axis=1, initial=0.0)
    ax = np.einsum("dmn,dn->dm", A, X)
    with np.errstate(invalid="ignore"):
        prim = np.maximum.reduce([
            np.max(lb - X, axis=1, initial=0.0), np.max(X - ub, axis=1, initial=0.0),
            np.max(lo - ax, axis=1, initial=0.0), np.max(ax - hi, axis=1, initial=0.0)])
        fl, fu = np.isfinite(lb), np.isfinite(ub)
        dual = np.maximum.reduce([
            np.max(np.where(fl, 0.0, np.maximum(Z, 0)), axis=1, initial=0.0),
            np.max(np.where(fu, 0.0, np.maximum(-Z, 0)), axis=1, initial=0.0),
            np.max(np.where(np.isfinite(hi), 0.0, np.maximum(NU, 0)), axis=1, initial=0.0),
            np.max(np.where(np.isfinite(lo), 0.0, np.maximum(-NU, 0)), axis=1, initial=0.0)])
        eq = lo == hi
        sl = np.where(fl, X - lb, 0.0)
        su = np.where(fu, ub - X, 0.0)
        slo = np.where(np.isfinite(lo), ax - lo, 0.0)
        shi = np.where(np.isfinite(hi), hi - ax, 0.0)
        comp = np.maximum.reduce([
            np.max(np.where(Z > 0, Z * sl, 0.0), axis=1, initial=0.0),
            np.max(np.where(Z < 0, -Z * su, 0.0), axis=1, initial=0.0),
            np.max(np.where((NU < 0) & ~eq, -NU * slo, 0.0), axis=1, initial=0.0),
            np.max(np.where((NU > 0) & ~eq, NU * shi, 0.0), axis=1, initial=0.0)])
    scale = np.maximum(1.0, np.maximum(np.abs(c).max(axis=1, initial=0.0),
                                       np.abs(Hx).max(axis=1, initial=0.0)))
    return np.maximum.reduce([stat, prim, dual, comp]) / scale


def _clean(X, cons: Constraints):
    """Clip round-off (<= 1e-12) outside the bounds; anything larger is left for the checks."""
    lo = cons.lower
    hi = cons.upper
    Y = np.where((X < lo) & (X > lo - 1e-12), lo, X)
    Y = np.where((Y > hi) & (Y < hi + 1e-12), hi, Y)
    return Y


# ---------------------------------------------------------------------- registry
def _bool(v, key, name):
    if not isinstance(v, (bool, np.bool_)):
        raise SettingsError(f"rule '{name}': '{key}' must be true or false, got {v!r}")
    return bool(v)


def _num(v, key, name, *, positive=False, nonneg=False):
    if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)):
        raise SettingsError(f"rule '{name}': '{key}' must be a number, got {v!r}")
    v = float(v)
    if not math.isfinite(v):
        raise SettingsError(f"rule '{name}': '{key}' must be finite, got {v!r}")
    if positive and v <= 0:
        raise SettingsError(f"rule '{name}': '{key}' must be above 0, got {v:g}")
    if nonneg and v < 0:
        raise SettingsError(f"rule '{name}': '{key}' must not be negative, got {v:g}")
    return v


def make_rule(name: str, type: str, params: Optional[Mapping] = None, assets=None, *,
              policy_weights=None, periods_per_year=None) -> Rule:
    """Build a rule from its type and parameters (the one registry of rule types).

    Parameters
    ----------
    name : str
        The rule's name in the study (used in messages).
    type : str
        One of :data:`RULE_TYPES`.
    params : mapping, optional
        ``long_only`` (bool, default true), ``budget`` ("full" | "cash"),
        ``risk_aversion`` (> 0; required by ``mean-variance``), ``risk_free`` (per
        period, default 0), ``target`` (per period; required by ``target-return`` and
        ``target-volatility``), ``bounds`` ({asset: [low, high]}), ``groups``
        ({name: {"assets": [...], "bounds": [low, high]}}). Which keys a type accepts is
        in ``RULE_PARAMS``.
    assets : sequence of str or int
        Asset names (or their number).
    policy_weights : ndarray, shape (N,), optional
        The policy's risky-asset weights; needed by ``max_tracking_error``.
    periods_per_year : float, optional
        Needed by ``tracking_error_units = "annualised"`` (the limit is divided by
        ``sqrt(periods_per_year)``).

    ``fixed`` takes ``weights`` ({asset: weight}; assets left out hold 0). The
    ``min-variance``, ``mean-variance``, ``target-return`` and ``max-sharpe`` types take
    ``max_tracking_error`` (>= 0) and ``tracking_error_units`` (``"per period"`` by
    default, or ``"annualised"``).

    Returns
    -------
    Rule

    Raises
    ------
    SettingsError
        Unknown type or parameter (named), wrong value, missing required parameter.
    InfeasibleError
        Constraints that no portfolio meets (the conflict is named).
    """
    if type not in RULE_PARAMS:
        raise SettingsError(f"rule '{name}': unknown rule type '{type}' "
                            f"(known: {', '.join(RULE_TYPES)})")
    if assets is None:
        raise SettingsError(f"rule '{name}': the asset names are needed")
    params = dict(params or {})
    allowed = RULE_PARAMS[type]
    unknown = sorted(k for k in params if k not in allowed)
    if unknown:
        hint = f"; '{type}' accepts: {', '.join(allowed)}" if allowed else f"; '{type}' takes no parameters"
        raise SettingsError(f"rule '{name}': unknown parameter{'s' if len(unknown) > 1 else ''} "
                            f"{', '.join(repr(k) for k in unknown)}{hint}")
    long_only = _bool(params.get("long_only", True), "long_only", name)
    budget = params.get("budget", "full")
    if budget not in ("full", "cash"):
        raise SettingsError(f"rule '{name}': 'budget' must be 'full' or 'cash', got {budget!r}")
    risk_aversion = None
    if type == "mean-variance":
        if "risk_aversion" not in params:
            raise SettingsError(f"rule '{name}' (mean-variance) needs 'risk_aversion' (gamma > 0)")
        risk_aversion = _num(params["risk_aversion"], "risk_aversion", name, positive=True)
    risk_free = _num(params.get("risk_free", 0.0), "risk_free", name)
    target = None
    if type in ("target-return", "target-volatility"):
        if "target" not in params:
            raise SettingsError(f"rule '{name}' ({type}) needs 'target' (per period)")
        target = _num(params["target"], "target", name, positive=type == "target-volatility")
    if type == "min-variance" and budget == "cash":
        raise SettingsError(f"rule '{name}': min-variance with budget = 'cash' is all cash; "
                            "use budget = 'full'")
    if type == "max-sharpe" and budget == "cash":
        raise SettingsError(f"rule '{name}': max-sharpe is fully invested by definition; for a "
                            "cash sleeve use mean-variance with budget = 'cash'")
    if isinstance(assets, (int, np.integer)):
        assets = int(assets)
    cons = make_constraints(assets, long_only=long_only, budget=budget,
                            bounds=params.get("bounds"), groups=params.get("groups"))
    fixed = _fixed_weights(name, params, cons) if type == "fixed" else None
    te, policy = None, None
    if "max_tracking_error" in params:
        te, policy = _tracking_limit(name, type, params, cons, policy_weights, periods_per_year)
    elif "tracking_error_units" in params:
        raise SettingsError(f"rule '{name}': 'tracking_error_units' is given without "
                            "'max_tracking_error'")
    return Rule(str(name), type, cons, params, risk_aversion, risk_free, target, fixed,
                policy, te)


def _fixed_weights(name, params, cons: Constraints) -> np.ndarray:
    """Validate a fixed rule's ``weights`` against its constraints; (N,) array."""
    raw = params.get("weights")
    if not isinstance(raw, Mapping) or not raw:
        raise SettingsError(f"rule '{name}' (fixed) needs 'weights' = {{asset = weight, ...}}")
    assets = cons.assets
    w = np.zeros(len(assets))
    for key, value in raw.items():
        if str(key) not in assets:
            raise SettingsError(f"rule '{name}': 'weights' names unknown asset '{key}' "
                                f"(assets: {', '.join(map(str, assets))})")
        w[assets.index(str(key))] = _num(value, f"weights.{key}", name)
    total = float(w.sum())
    tol = 1e-9
    if cons.budget == "full" and abs(total - 1.0) > tol:
        raise SettingsError(f"rule '{name}': 'weights' sum to {total:.10g}, not 1; give all of "
                            f"the allocation, or set budget = \"cash\" to hold the remaining "
                            f"{1.0 - total:.10g} in cash")
    for i, a in enumerate(assets):
        if cons.long_only and w[i] < 0:
            raise SettingsError(f"rule '{name}': weight of '{a}' is {w[i]:g}, negative in a "
                                f"long-only rule (set long_only = false to allow it)")
        if w[i] < cons.lower[i] - tol or w[i] > cons.upper[i] + tol:
            raise SettingsError(f"rule '{name}': weight of '{a}' is {w[i]:g}, outside its "
                                f"bounds [{cons.lower[i]:g}, {cons.upper[i]:g}]")
    if cons.budget == "cash" and cons.long_only and total > 1.0 + tol:
        raise SettingsError(f"rule '{name}': 'weights' sum to {total:.10g} > 1, a negative cash "
                            f"sleeve (borrowing) in a long-only rule")
    for g, gname in enumerate(cons.group_names):
        x = float(cons.group_matrix[g] @ w)
        if x < cons.group_lower[g] - tol or x > cons.group_upper[g] + tol:
            raise SettingsError(f"rule '{name}': group '{gname}' holds {x:g}, outside its "
                                f"bounds [{cons.group_lower[g]:g}, {cons.group_upper[g]:g}]")
    return w


def _tracking_limit(name, type, params, cons, policy_weights, periods_per_year):
    """(limit per period, policy weights (N,)) of ``max_tracking_error``."""
    if type not in TE_TYPES:
        raise SettingsError(f"rule '{name}': max_tracking_error is available for "
                            f"{', '.join(TE_TYPES)} rules, not '{type}'")
    te = _num(params["max_tracking_error"], "max_tracking_error", name, nonneg=True)
    units = params.get("tracking_error_units", "per period")
    if not isinstance(units, str) or units.strip().lower() not in TE_UNITS:
        raise SettingsError(f"rule '{name}': tracking_error_units must be \"per period\" or "
                            f"\"annualised\", got {units!r}")
    if TE_UNITS[units.strip().lower()] == "annualised":
        if periods_per_year is None or not periods_per_year > 0:
            raise SettingsError(f"rule '{name}': an annualised max_tracking_error needs the "
                                f"data's periods per year")
        te = te / math.sqrt(float(periods_per_year))
    if policy_weights is None:
        raise SettingsError(f"rule '{name}': max_tracking_error is measured against the "
                            f"policy; name a rule of type 'fixed' with the top-level key "
                            f"policy = \"...\"")
    p = np.asarray(policy_weights, dtype=float)
    if p.shape != (cons.n_assets,) or not np.all(np.isfinite(p)):
        raise SettingsError(f"rule '{name}': policy weights must be {cons.n_assets} finite "
                            f"numbers, got shape {p.shape}")
    return te, p.copy()
