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

__all__ = ["RULE_TYPES", "Rule", "Allocation", "make_rule", "KKT_TOLERANCE", "COND_LIMIT"]

#: Largest KKT residual a solve may report (scaled by max(1, |gradient terms|)).
KKT_TOLERANCE = 1e-8
#: Condition number above which a rule that needs the covariance's inverse refuses it.
COND_LIMIT = 1e10
_MAXITER_FACTOR = 20

_SHRINK_HINT = ("use a shrinkage covariance estimator (e.g. 'ledoit-wolf-identity' or 'oas'), "
                "or constrain the weights (long-only or bounds)")

_COMMON = ("long_only", "budget", "bounds", "groups")
RULE_PARAMS = {
    "equal-weight": (),
    "min-variance": _COMMON,
    "mean-variance": _COMMON + ("risk_aversion", "risk_free"),
    "max-sharpe": _COMMON + ("risk_free",),
    "target-return": _COMMON + ("target", "risk_free"),
    "target-volatility": _COMMON + ("target", "risk_free"),
    "inverse-volatility": (),
    "equal-risk-contribution": (),
}
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
        same solution (inf when the volatility limit does not bind).
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

    @property
    def needs_mean(self) -> bool:
        return self.type in ("mean-variance", "max-sharpe", "target-return", "target-volatility")

    @property
    def needs_covariance(self) -> bool:
        return self.type != "equal-weight"

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

    def weights_batch(self, means, covariances) -> np.ndarray:
        """Weights for D sets of inputs in one call (warm-started batched kernel).

        Parameters
        ----------
        means : ndarray, shape (D, N) or None
        covariances : ndarray, shape (D, N, N) or None

        Returns
        -------
        ndarray, shape (D, N)
            Risky-asset weights; with ``budget = "cash"`` the cash is ``1 - sum``.
        """
        means, covs = self._iv(means, covariances, batch=True)
        W, _, _ = self._solve(means, covs, single=False)
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
        if self.type == "max-sharpe":
            H, c, A, lo, hi, lb, ub = self._sharpe_problem(mu[None, :], S[None])
            y = w / float((mu - self.risk_free) @ w)
            return kkt_residuals(y, H[0], c[0], A[0], lo[0], hi[0], lb, ub)
        if self.type == "target-volatility":
            A, lo, hi = cons.rows()
            gap = self.target ** 2 - float(w @ S @ w)
            extra = [2.0 * S @ w] if abs(gap) <= 1e-9 * max(self.target ** 2, 1e-300) else []
            return kkt_residuals(w, np.zeros_like(S), self._excess(mu), A, lo, hi, cons.lower,
                                 cons.upper, extra_gradients=extra)
        if self.type not in _QP_TYPES:
            raise SettingsError(f"rule type '{self.type}' is not an optimisation; nothing to check")
        H, c, A, lo, hi, lb, ub = self._qp_problem(mu[None, :], S[None])
        return kkt_residuals(w, H[0], c[0], A[0], lo[0], hi[0], lb, ub)

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
    def _solve(self, means, covs, single: bool):
        t = self.type
        n = self.constraints.n_assets
        D = means.shape[0]
        if t == "equal-weight":
            return np.full((D, n), 1.0 / n), None, None
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
            return self._target_vol(means, covs, single)
        return self._qp(means, covs, single)

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
        """Cold starts (D, N): with box bounds, full budget and no groups, the vertex that
        fills the best single assets first (score ``c_i - H_ii / 2``), so the active-set
        method adds the few assets a long-only solution holds instead of removing most of
        N from an interior point; otherwise the constraints' feasible point."""
        cons = self.constraints
        D, n = c.shape
        if cons.bounded and not cons.group_names and cons.budget == "full":
            score = c - 0.5 * np.diagonal(H, axis1=1, axis2=2)
            return _greedy_fill(score, cons.lower, cons.upper)
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

    def _qp(self, means, covs, single: bool):
        cons = self.constraints
        self._check_conditioning(covs, single)     # only when the weights are unbounded
        H, c, A, lo, hi, lb, ub = self._qp_problem(means, covs)
        x0 = self._starts(means, covs, H, c, A, lo, hi, lb, ub, single)
        X, Z, NU, status = _run_qp(H, c, A, lo, hi, lb, ub, x0,
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


def make_rule(name: str, type: str, params: Optional[Mapping] = None, assets=None) -> Rule:
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
    return Rule(str(name), type, cons, params, risk_aversion, risk_free, target)
