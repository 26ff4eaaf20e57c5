"""The exact efficient frontier by Markowitz's critical line algorithm.

For ``min 1/2 w'Sigma w - lambda mu'w`` subject to ``1'w = 1`` and ``l <= w <= u`` the
solution is piecewise linear in ``lambda >= 0``: on each piece a fixed set of assets is
*free* (strictly inside its bounds) and the others sit on a bound, and the free weights
solve the linear KKT system

    Sigma_FF w_F + Sigma_FB w_B - lambda mu_F + gamma 1 = 0,     1'w_F = 1 - 1'w_B,

so ``w_F = a + lambda b`` and ``gamma = g0 + lambda g1``. A piece ends where a free weight
reaches a bound or where the gradient ``(Sigma w)_j - lambda mu_j + gamma`` of a bounded
asset changes sign (it wants to move off its bound). The weights at these ends are the
turning points (corner portfolios); every efficient portfolio is the linear interpolation
of the two adjacent corners.

Sources: Markowitz, H.M. (1956), "The optimization of a quadratic function subject to
linear constraints", *Naval Research Logistics Quarterly* 3, 111-133; the procedure is
written from the KKT conditions above (Niedermayer & Niedermayer 2010 discuss the same
steps). This implementation walks *up* from ``lambda = 0`` (the minimum-variance portfolio,
found by the active-set solver) so that ties among the highest means are resolved by the
path itself: after the last event the weights no longer change, and that last corner is
the least-variance portfolio among those with the largest attainable mean.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from estimators.core import SettingsError, SingularCovarianceError

from .constraints import Constraints, _greedy_fill
from .rules import _SHRINK_HINT, _run_qp

__all__ = ["Frontier", "efficient_frontier"]

_COND_LIMIT = 1e12


@dataclass(frozen=True)
class Frontier:
    """Turning points of the efficient frontier, highest expected return first.

    Attributes
    ----------
    lambdas : ndarray, shape (K,)
        The trade-off ``lambda`` (return weight, i.e. 1 / risk aversion) at each turning
        point, decreasing; the last one is 0 (minimum variance). The first turning point
        is optimal for every ``lambda`` at or above its value.
    weights : ndarray, shape (K, N)
    means : ndarray, shape (K,)
        Expected returns per period, decreasing.
    variances : ndarray, shape (K,)
        Variances per period, decreasing.
    assets : tuple of str
    """

    lambdas: np.ndarray
    weights: np.ndarray
    means: np.ndarray
    variances: np.ndarray
    assets: tuple = ()

    @property
    def volatilities(self) -> np.ndarray:
        return np.sqrt(np.maximum(self.variances, 0.0))

    def at_returns(self, targets) -> np.ndarray:
        """Efficient portfolios at given expected returns (linear between turning points).

        Parameters
        ----------
        targets : array_like, shape (P,)
            Expected returns per period within ``[means[-1], means[0]]`` (a relative
            slack of 1e-12 is clipped).

        Returns
        -------
        ndarray, shape (P, N)
        """
        t = np.atleast_1d(np.asarray(targets, dtype=float))
        lo, hi = float(self.means[-1]), float(self.means[0])
        span = max(hi - lo, 1e-300)
        slack = 1e-12 * max(span, abs(hi), abs(lo))
        if np.any(~np.isfinite(t)) or np.any(t < lo - slack) or np.any(t > hi + slack):
            raise SettingsError(f"target returns must lie on the frontier, between {lo:.6g} "
                                f"and {hi:.6g}")
        t = np.clip(t, lo, hi)
        if len(self.means) == 1:
            return np.repeat(self.weights[:1], len(t), axis=0)
        m = self.means[::-1]           # increasing
        W = self.weights[::-1]
        k = np.clip(np.searchsorted(m, t, side="right") - 1, 0, len(m) - 2)
        dm = m[k + 1] - m[k]
        # equal means on consecutive turning points (a singular covariance) are a jump in
        # the weights at one mean: both sides are optimal, take the lower one
        frac = np.where(dm > 0, (t - m[k]) / np.where(dm > 0, dm, 1.0), 0.0)
        frac = np.clip(frac, 0.0, 1.0)
        return W[k] + frac[:, None] * (W[k + 1] - W[k])

    def points(self, n: int) -> np.ndarray:
        """``n`` efficient portfolios equally spaced in expected return, from the
        minimum-variance portfolio (rank 0) to the maximum-return end (rank n - 1).

        Returns
        -------
        ndarray, shape (n, N)
        """
        if int(n) < 1:
            raise SettingsError(f"the number of frontier points must be at least 1, got {n}")
        if int(n) == 1:
            return self.weights[-1:].copy()
        return self.at_returns(np.linspace(self.means[-1], self.means[0], int(n)))


def efficient_frontier(mean, covariance, constraints: Constraints) -> Frontier:
    """The long-only or box-bounded, fully invested efficient frontier (critical line).

    Parameters
    ----------
    mean : ndarray, shape (N,)
        Expected returns per period.
    covariance : ndarray, shape (N, N)
    constraints : Constraints
        ``budget = "full"``, no groups, every weight bounded (long-only, or finite bounds).

    Returns
    -------
    Frontier

    Raises
    ------
    SettingsError
        Unsupported constraints or malformed inputs.
    SingularCovarianceError
        A free block of the covariance is singular, so the frontier is not unique there.
    """
    mu, S, lower, upper = _frontier_iv(mean, covariance, constraints)
    n = mu.size
    # minimum-variance portfolio and its partition from the active-set solver
    A, lo, hi = constraints.rows()
    # start at the vertex that fills the lowest-variance assets first (few iterations)
    x0 = _greedy_fill(-0.5 * np.diag(S)[None, :], lower, upper)
    X, Z, NU, status = _run_qp(S[None], np.zeros((1, n)), A[None], lo[None], hi[None],
                               lower, upper, x0)
    if status[0] != 0:
        raise SingularCovarianceError("the minimum-variance portfolio is not unique (singular "
                                      "covariance); " + _SHRINK_HINT)
    w = X[0].copy()
    tol_b = 1e-12
    state = np.zeros(n, dtype=int)          # 0 free, -1 lower, +1 upper
    state[np.abs(w - lower) <= tol_b] = -1
    state[(np.abs(w - upper) <= tol_b) & (state == 0)] = 1
    if not np.any(state == 0):
        # a vertex: one asset must carry the budget row. At lambda = 0 its gradient fixes
        # gamma = -(Sigma w)_k, which must lie between the upper-bounded assets' largest
        # and the lower-bounded assets' smallest (Sigma w)_j; take it from that end.
        sw = S @ w
        ups = np.flatnonzero(state > 0)
        lows = np.flatnonzero(state < 0)
        if ups.size and (not lows.size or sw[ups].max() <= sw[lows].min() + 1e-15):
            state[ups[int(np.argmax(sw[ups]))]] = 0
        else:
            state[lows[int(np.argmin(sw[lows]))]] = 0
    w[state < 0] = lower[state < 0]
    w[state > 0] = upper[state > 0]
    lam = 0.0
    lams = [0.0]
    corners = [w.copy()]
    last_moved = -1
    null_moves = 0
    entered = -1
    blocked = set()
    for _ in range(20 * n + 100):
        part = _solve_partition(S, mu, state, lower, upper)
        if isinstance(part, _NullDirection):
            # the free block is singular on the budget hyperplane: along d the variance is
            # flat (and, at an optimum with lambda > 0, so is the mean), so every point on
            # the line is optimal at this lambda. Move to the first bound, preferring the
            # higher mean, and continue with the smaller free set.
            null_moves += 1
            if null_moves > 4 * n:
                raise SingularCovarianceError(
                    "critical line algorithm: the covariance of the free assets is singular "
                    "and the path does not resolve; " + _SHRINK_HINT)
            w, hit, side = _move_along(w, part.d, mu, state, lower, upper)
            state[hit] = side
            if hit == entered:
                # the flat direction sends the asset that just entered straight back to its
                # bound: entering gains nothing at this lambda; ignore it until lambda moves
                blocked.add(hit)
            last_moved = hit
            if lam == 0.0:
                corners[-1] = w.copy()      # the least-variance end with the higher mean
            else:
                lams.append(lam)            # same lambda, same mean and variance
                corners.append(w.copy())
            continue
        a, b, g0, g1 = part
        F = np.flatnonzero(state == 0)
        wa = np.where(state < 0, lower, np.where(state > 0, upper, 0.0))
        wb = np.zeros(n)
        wa[F] = a
        wb[F] = b
        # gradients of every asset, linear in lambda: p + lambda q
        p = S @ wa + g0
        q = S @ wb - mu + g1
        best = np.inf
        who = -1
        kind = 0
        eps = 1e-12 * max(1.0, lam)
        btol = 1e-12 * max(1.0, float(np.max(np.abs(wb))))
        qtol = 1e-12 * (float(np.max(np.abs(mu))) + float(np.max(np.abs(S @ wb))) + abs(g1))
        # gradient tolerance for "already on the wrong side" (sign: + state means wrong)
        ptol = 1e-11 * (float(np.max(np.abs(S @ wa))) + abs(g0) + lam * float(np.max(np.abs(mu))))
        for j in range(n):
            if state[j] == 0:
                bj = wb[j]
                if F.size < 2 or abs(bj) <= btol:
                    continue
                ev = ((upper[j] if bj > 0 else lower[j]) - wa[j]) / bj
                kind_j = 1 if bj > 0 else -1
            else:
                gj = p[j] + lam * q[j]
                if j != last_moved and j not in blocked and (gj * state[j] > ptol):
                    ev = lam          # already on the wrong side: it leaves its bound now
                elif state[j] < 0 and q[j] < -qtol:
                    ev = -p[j] / q[j]
                elif state[j] > 0 and q[j] > qtol:
                    ev = -p[j] / q[j]
                else:
                    continue
                kind_j = 0
            floor = lam + (eps if (j == last_moved or j in blocked) else -eps)
            if ev < floor:
                continue
            ev = max(ev, lam)
            if ev < best:
                best, who, kind = ev, j, kind_j
        if who < 0:
            break
        if best > lam + eps:
            blocked.clear()
        lam = best
        w = wa + lam * wb
        w[state < 0] = lower[state < 0]
        w[state > 0] = upper[state > 0]
        lams.append(lam)
        corners.append(w.copy())
        if kind == 0:
            state[who] = 0
            entered = who
        else:
            state[who] = kind
            w[who] = upper[who] if kind > 0 else lower[who]
        last_moved = who
        if np.sum(state == 0) == 0:
            break
    else:  # pragma: no cover - the loop is bounded by the number of partitions
        raise RuntimeError("critical line algorithm: too many turning points")
    lams = np.array(lams)[::-1]
    W = np.array(corners)[::-1]
    keep = [0]
    for k in range(1, len(W)):
        if np.max(np.abs(W[k] - W[keep[-1]])) > 1e-12:
            keep.append(k)
        else:
            lams[keep[-1]] = max(lams[keep[-1]], lams[k])
    W = np.clip(W[keep], lower, upper)
    lams = lams[keep]
    lams[-1] = 0.0
    means = W @ mu
    variances = np.einsum("ki,ij,kj->k", W, S, W)
    _check_path(W, means, variances, mu, lower, upper)
    if null_moves:
        _check_optimal(W, lams, S, mu, lower, upper)
    for arr in (lams, W, means, variances):
        arr.setflags(write=False)
    return Frontier(lams, W, means, variances, constraints.assets)


def _check_path(W, means, variances, mu, lower, upper):
    """Re-check the traced frontier before returning it: feasible corners, means and
    variances falling from the top corner to the bottom one, and the top corner at the
    largest attainable mean. Only a singular covariance can make this fail."""
    top = float((_greedy_fill(mu[None, :], lower, upper)[0]) @ mu)
    scale_m = max(1e-300, float(np.max(np.abs(mu))))
    scale_v = max(1e-300, float(np.max(np.abs(variances))))
    ok = (np.all(W >= lower - 1e-9) and np.all(W <= upper + 1e-9)
          and np.all(np.abs(W.sum(axis=1) - 1.0) <= 1e-9)
          and np.all(np.diff(means) <= 1e-10 * scale_m)
          and np.all(np.diff(variances) <= 1e-10 * scale_v)
          and means[0] >= top - 1e-10 * scale_m)
    if not ok:
        raise SingularCovarianceError(
            "critical line algorithm: the covariance is singular and the frontier could not "
            "be traced reliably; " + _SHRINK_HINT)


def _check_optimal(W, lams, S, mu, lower, upper):
    """After singular steps, certify the traced frontier: every turning point and every
    midpoint of a piece must have the least variance at its mean. Each point starts the
    active-set solver on ``min w'Sw`` s.t. ``1'w = 1``, ``mu'w`` = its mean and the
    bounds; a variance lower by more than 1e-9 (relative) rejects the frontier."""
    n = mu.size
    pts = [W[k] for k in range(len(W))]
    pts += [0.5 * (W[k] + W[k + 1]) for k in range(len(W) - 1)]
    P = np.array(pts)
    D = P.shape[0]
    A = np.broadcast_to(np.vstack([np.ones(n), mu]), (D, 2, n))
    lo = np.column_stack([np.ones(D), P @ mu])
    X, _, _, status = _run_qp(np.broadcast_to(S, (D, n, n)), np.zeros((D, n)), A, lo,
                              lo.copy(), lower, upper, P.copy(), warm=False)
    v_path = np.einsum("ki,ij,kj->k", P, S, P)
    v_best = np.einsum("ki,ij,kj->k", X, S, X)
    scale = max(float(np.max(np.abs(S))), 1e-300)
    if np.any(status != 0) or np.any(v_path > v_best + 1e-9 * np.maximum(v_best, scale * 1e-6)):
        raise SingularCovarianceError(
            "critical line algorithm: the covariance is singular and the traced frontier "
            "fails the optimality check; " + _SHRINK_HINT)


class _NullDirection:
    """A direction d (N,) on the free assets with 1'd = 0 and Sigma_FF d = -c 1 (so
    d'Sigma d = 0): the bordered system of the partition is singular."""

    def __init__(self, d):
        self.d = d


def _move_along(w, d, mu, state, lower, upper):
    """Move from w along +/- d (the sign with the higher mean, or, on a tie, the shorter
    step) to the first bound of a free asset. Returns (w, asset, side)."""
    free = state == 0
    options = []
    for sign in (1.0, -1.0):
        step = sign * d
        t = np.inf
        hit, side = -1, 0
        for j in np.flatnonzero(free & (np.abs(step) > 1e-14 * np.max(np.abs(d)))):
            tj = ((upper[j] if step[j] > 0 else lower[j]) - w[j]) / step[j]
            if tj < t:
                t, hit, side = max(tj, 0.0), j, (1 if step[j] > 0 else -1)
        if hit >= 0:
            options.append((-(mu @ step) * t, t, hit, side, step))
    if not options:
        raise SingularCovarianceError("critical line algorithm: a singular direction of the "
                                      "covariance meets no bound; " + _SHRINK_HINT)
    mean_loss = min(o[0] for o in options)
    tied = [o for o in options if o[0] <= mean_loss + 1e-15]
    # among equal means, a zero-length move (an asset already at the bound it is pushed
    # towards) changes nothing: take the shortest move that goes somewhere
    moving = [o for o in tied if o[1] > 1e-15]
    _, t, hit, side, step = min(moving or tied, key=lambda o: o[1])
    w = w + t * step
    w[hit] = upper[hit] if side > 0 else lower[hit]
    return w, hit, side


def _solve_partition(S, mu, state, lower, upper):
    """Free weights a + lambda b and gamma g0 + lambda g1 for a fixed partition, or a
    :class:`_NullDirection` when the bordered system is singular."""
    F = np.flatnonzero(state == 0)
    B = np.flatnonzero(state != 0)
    wB = np.where(state[B] < 0, lower[B], upper[B])
    k = F.size
    M = np.zeros((k + 1, k + 1))
    M[:k, :k] = S[np.ix_(F, F)]
    M[:k, k] = 1.0
    M[k, :k] = 1.0
    rhs = np.zeros((k + 1, 2))
    rhs[:k, 0] = -S[np.ix_(F, B)] @ wB
    rhs[k, 0] = 1.0 - wB.sum()
    rhs[:k, 1] = mu[F]
    sv = np.linalg.svd(M, compute_uv=False)
    if not sv[-1] > sv[0] / _COND_LIMIT:
        _, _, vt = np.linalg.svd(M)
        d = np.zeros(state.size)
        d[F] = vt[-1, :k]
        if not np.any(d):
            raise SingularCovarianceError("critical line algorithm: singular system; " + _SHRINK_HINT)
        return _NullDirection(d / np.max(np.abs(d)))
    sol = np.linalg.solve(M, rhs)
    return sol[:k, 0], sol[:k, 1], sol[k, 0], sol[k, 1]


def _frontier_iv(mean, covariance, cons: Constraints):
    if not isinstance(cons, Constraints):
        raise SettingsError("constraints must be made with optimise.make_constraints")
    if cons.budget != "full" or cons.group_names:
        raise SettingsError("the critical line frontier needs budget = 'full' and no group bounds")
    if not cons.bounded:
        raise SettingsError("the critical line frontier needs bounded weights (long-only or "
                            "finite bounds on every asset)")
    n = cons.n_assets
    mu = np.asarray(mean, dtype=float)
    S = np.asarray(covariance, dtype=float)
    if mu.shape != (n,) or S.shape != (n, n):
        raise SettingsError(f"mean must be ({n},) and covariance ({n}, {n}); got {mu.shape}, {S.shape}")
    if not (np.all(np.isfinite(mu)) and np.all(np.isfinite(S))):
        raise SettingsError("mean and covariance must be finite")
    S = 0.5 * (S + S.T)
    lower = cons.lower.astype(float).copy()
    upper = np.minimum(cons.upper, lower + 1.0 - lower.sum())
    return mu, S, lower, upper
