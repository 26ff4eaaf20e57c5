"""Benchmark: the tracking-error limit against a policy, solved for D resampled draws.

Long-only, fully invested rules on an invented population (N assets, D draws estimated
from normal histories of T = 120 periods), with ``max_tracking_error`` set to half the
unconstrained rule's median tracking error against 1/N-like policy weights, so that the
limit binds in most draws. Side by side in one run:

* noiseproof: ``Rule.weights_batch`` (the Lagrangian search over batched active-set QPs,
  every solve KKT-checked), for mean-variance and maximum Sharpe ratio;
* the same rules without the limit (the cost of the limit);
* cvxpy with the Clarabel interior-point solver, the second-order cone problem built once
  with parameters and re-solved per draw (a subset of draws; per-solve time compared).

CPU time of this process (``time.process_time``): the machine is shared. Usage::

    python -m benchmarks policy [--draws D] [--n 10,30] [--cvxpy-subset K] [--seed S]
"""
from __future__ import annotations

import argparse
import platform
import time

import numpy as np

CLOCK = time.process_time


def _population(n, rng):
    vol = rng.uniform(0.02, 0.07, n)
    beta = rng.uniform(0.3, 0.8, n)
    C = np.outer(beta, beta)
    np.fill_diagonal(C, 1.0)
    return rng.uniform(0.002, 0.012, n), C * np.outer(vol, vol)


def _draws(mu, S, D, T, rng):
    L = np.linalg.cholesky(S)
    R = mu + rng.standard_normal((D, T, mu.size)) @ L.T
    m = R.mean(axis=1)
    Rc = R - m[:, None, :]
    return m, np.ascontiguousarray(np.einsum("dti,dtj->dij", Rc, Rc, optimize=True) / (T - 1))


def _cvxpy_solver(kind, n, p, gamma):
    import cvxpy as cp

    w = cp.Variable(n)
    mu = cp.Parameter(n)
    Lt = cp.Parameter((n, n))
    te = cp.Parameter(nonneg=True)
    if kind == "mean-variance":
        prob = cp.Problem(cp.Minimize(0.5 * gamma * cp.sum_squares(Lt @ w) - mu @ w),
                          [cp.sum(w) == 1, w >= 0, cp.norm(Lt @ (w - p)) <= te])

        def solve(m, S, t):
            mu.value, Lt.value, te.value = m, np.linalg.cholesky(S).T, t
            prob.solve(solver=cp.CLARABEL)
            return w.value
        return solve
    k = cp.sum(w)          # homogenised maximum Sharpe ratio: w plays y = kappa w
    prob = cp.Problem(cp.Minimize(cp.sum_squares(Lt @ w)),
                      [mu @ w == 1, w >= 0, cp.norm(Lt @ w - Lt @ p * k) <= te * k])

    def solve(m, S, t):
        mu.value, Lt.value, te.value = m, np.linalg.cholesky(S).T, t
        prob.solve(solver=cp.CLARABEL)
        return w.value / w.value.sum()
    return solve


def main(argv=None) -> int:
    from optimise import make_rule, tracking_error

    ap = argparse.ArgumentParser(prog="python -m benchmarks policy")
    ap.add_argument("--draws", type=int, default=1000)
    ap.add_argument("--n", default="10,30")
    ap.add_argument("--cvxpy-subset", type=int, default=50)
    ap.add_argument("--seed", type=int, default=20261202)
    args = ap.parse_args(argv)
    print(f"machine: {platform.machine()}, {platform.processor() or 'cpu'}, python "
          f"{platform.python_version()}; CPU seconds of this process")
    print(f"{'N':>4} {'rule':<14} {'draws':>6} {'binds':>6} {'free ms/draw':>13} "
          f"{'limited ms/draw':>16} {'ratio':>6} {'cvxpy ms/solve':>15} {'cvxpy/ours':>11} "
          f"{'max |w - cvxpy|':>16}")
    for n in (int(x) for x in args.n.split(",")):
        rng = np.random.default_rng(args.seed + n)
        mu, S = _population(n, rng)
        means, covs = _draws(mu, S, args.draws, 120, rng)
        assets = tuple(f"a{i}" for i in range(n))
        p = np.full(n, 1.0 / n)
        for kind, params in (("mean-variance", {"risk_aversion": 5.0}), ("max-sharpe", {})):
            free = make_rule("r", kind, params, assets)
            free.weights_batch(means[:5], covs[:5])            # compile outside the timing
            t0 = CLOCK()
            W0 = free.weights_batch(means, covs)
            t_free = CLOCK() - t0
            te0 = np.array([tracking_error(W0[d], p, covs[d]) for d in range(args.draws)])
            limit = 0.5 * float(np.median(te0))
            rule = make_rule("r", kind, {**params, "max_tracking_error": limit}, assets,
                             policy_weights=p)
            rule.weights_batch(means[:5], covs[:5])
            t0 = CLOCK()
            W = rule.weights_batch(means, covs)
            t_lim = CLOCK() - t0
            binds = float(np.mean(te0 > limit))
            k = min(args.cvxpy_subset, args.draws)
            solve = _cvxpy_solver(kind, n, p, 5.0)
            solve(means[0], covs[0], limit)
            t0 = CLOCK()
            ref = np.array([solve(means[d], covs[d], limit) for d in range(k)])
            t_cvx = (CLOCK() - t0) / k
            ours = t_lim / args.draws
            print(f"{n:>4} {kind:<14} {args.draws:>6} {binds:>6.0%} "
                  f"{1e3 * t_free / args.draws:>13.3f} {1e3 * ours:>16.3f} "
                  f"{t_lim / max(t_free, 1e-12):>6.1f} {1e3 * t_cvx:>15.3f} "
                  f"{t_cvx / max(ours, 1e-12):>11.1f} {np.abs(W[:k] - ref).max():>16.2e}")
    return 0


if __name__ == "__main__":   # pragma: no cover
    raise SystemExit(main())
