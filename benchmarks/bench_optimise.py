"""Benchmark: long-only, fully invested mean-variance (gamma = 5) re-solved for D draws.

With ``--rule min-variance`` the same problems without the means (the baselines then get
zero means, which leaves them the minimum-variance problem); with ``--periods`` below N
the sample covariances are singular (the kernel's proximal-point path).

Each draw is a (mean, covariance) pair estimated (sample mean, sample covariance T-1) from
a resampled history of T = 120 periods of one invented population, as the resampling
engine produces them. Side by side in one run:

* noiseproof's batched, warm-started numba active-set kernel (``optimise._kernels``),
  timed as the kernel call and as the public ``Rule.weights_batch_details`` call (which
  adds validation and a KKT check of every solve);
* quadprog (dense Goldfarb-Idnani) called once per problem;
* scipy SLSQP with analytic gradient and the previous solution as warm start (ftol 1e-9;
  with ftol 1e-12, 20 problems at N = 50 took 15.8 ms per solve against 10.1 ms).

The slow baselines are timed on a subset of the draws (the table says how many) and
their per-solve time is compared with ours. Usage::

    python -m benchmarks optimise [--draws D] [--n 10,50,200] [--periods T]
                                  [--rule mean-variance|min-variance] [--quadprog-subset K]
                                  [--slsqp-subset K] [--seed S]
"""
from __future__ import annotations

import argparse
import os
import platform
import time

import numpy as np

#: CPU time of this process: the machine is shared, and every method here runs on one core,
#: so CPU seconds measure one core's throughput better than wall time under others' load.
CLOCK = time.process_time


def population(n: int, rng):
    """An invented population: vols 2-7 % a month, one-factor correlation, means 0.2-1.2 %."""
    vol = rng.uniform(0.02, 0.07, n)
    beta = rng.uniform(0.3, 0.8, n)
    C = np.outer(beta, beta)
    np.fill_diagonal(C, 1.0)
    S = C * np.outer(vol, vol)
    mu = rng.uniform(0.002, 0.012, n)
    return mu, S


def resampled_moments(mu, S, D, T, rng, chunk=250):
    """Yield (means (d, N), covs (d, N, N)) chunks from D normal histories of T periods."""
    n = mu.size
    L = np.linalg.cholesky(S)
    done = 0
    while done < D:
        d = min(chunk, D - done)
        R = mu + rng.standard_normal((d, T, n)) @ L.T
        m = R.mean(axis=1)
        Rc = R - m[:, None, :]
        c = np.einsum("dti,dtj->dij", Rc, Rc, optimize=True) / (T - 1)
        yield m, np.ascontiguousarray(c)
        done += d


def solve_ours(rule, means, covs):
    from optimise.rules import _kkt_batch, _run_qp

    H, c, A, lo, hi, lb, ub = rule._qp_problem(means, covs)
    H = np.ascontiguousarray(H)
    x0 = rule._starts(means, covs, H, c, A, lo, hi, lb, ub, False)
    t = CLOCK()
    X, Z, NU, status = _run_qp(H, c, A, lo, hi, lb, ub, x0)
    t_kernel = CLOCK() - t
    kkt = _kkt_batch(H, c, A, lo, hi, lb, ub, X, Z, NU)
    return X, t_kernel, status, kkt


def solve_quadprog(means, covs, gamma, W0):
    import quadprog

    D, n = means.shape
    C = np.hstack([np.ones((n, 1)), np.eye(n)])
    b = np.r_[1.0, np.zeros(n)]
    out = []
    ridged = 0
    t = CLOCK()
    for d in range(D):
        G = gamma * covs[d]
        try:
            out.append(quadprog.solve_qp(G, means[d], C, b, 1)[0])
        except ValueError:   # T <= N: singular covariance, quadprog needs a ridge
            ridged += 1
            G = G + 1e-10 * np.trace(G) / n * np.eye(n)
            out.append(quadprog.solve_qp(G, means[d], C, b, 1)[0])
    t = CLOCK() - t
    return np.array(out), t, ridged


def solve_slsqp(means, covs, gamma):
    from scipy.optimize import minimize

    D, n = means.shape
    x = np.full(n, 1.0 / n)
    out = []
    cons = [{"type": "eq", "fun": lambda w: w.sum() - 1.0, "jac": lambda w: np.ones_like(w)}]
    t = CLOCK()
    for d in range(D):
        mu, S = means[d], covs[d]
        res = minimize(lambda w: -(mu @ w - 0.5 * gamma * w @ S @ w), x,
                       jac=lambda w: -(mu - gamma * S @ w), method="SLSQP",
                       bounds=[(0.0, 1.0)] * n, constraints=cons,
                       options={"ftol": 1e-9, "maxiter": 1000})
        x = res.x
        out.append(res.x)
    t = CLOCK() - t
    return np.array(out), t


def _gap(W, Wref, means, covs, gamma):
    """Largest (utility of the reference - utility of ours) over the problems, in the
    objective's units (per-period return); <= 0 means ours is at least as good."""
    d = W.shape[0]
    u = lambda V: (np.einsum("dn,dn->d", means[:d], V)
                   - 0.5 * gamma * np.einsum("dn,dnm,dm->d", V, covs[:d], V))
    return float(np.max(u(Wref) - u(W)))


def _viol(W):
    """Largest violation of w >= 0 and sum(w) = 1 over the problems."""
    return float(max(np.max(-W, initial=0.0), np.max(np.abs(W.sum(axis=1) - 1.0))))


def machine() -> str:
    cpu = platform.processor() or ""
    try:
        with open("/proc/cpuinfo") as fh:
            for line in fh:
                if line.startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    load = os.getloadavg() if hasattr(os, "getloadavg") else (float("nan"),) * 3
    return (f"{cpu}, {os.cpu_count()} cores, Python {platform.python_version()}, "
            f"load average {load[0]:.2f} {load[1]:.2f} {load[2]:.2f}")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="bench_optimise", description=__doc__.split("\n")[0])
    ap.add_argument("--draws", type=int, default=10_000, help="problems per N (default 10000)")
    ap.add_argument("--n", default="10,50,200", help="asset counts (default 10,50,200)")
    ap.add_argument("--periods", type=int, default=120, help="history length T (default 120)")
    ap.add_argument("--gamma", type=float, default=5.0, help="risk aversion (default 5)")
    ap.add_argument("--rule", choices=("mean-variance", "min-variance"),
                    default="mean-variance", help="the rule solved (default mean-variance)")
    ap.add_argument("--quadprog-subset", type=int, default=2000,
                    help="problems timed with quadprog (default 2000; 200 at N >= 200)")
    ap.add_argument("--slsqp-subset", type=int, default=50,
                    help="problems timed with SLSQP (default 50; 10 at N >= 200)")
    ap.add_argument("--seed", type=int, default=20261202)
    args = ap.parse_args(argv)
    # one core for every method: BLAS threads would also spin and bill CPU time. Load
    # every library first, so that the limit reaches the BLAS each one brings.
    import quadprog  # noqa: F401
    import scipy.optimize  # noqa: F401

    import optimise  # noqa: F401
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - scikit-learn brings it
        threadpool_limits = None
    if threadpool_limits is not None:
        with threadpool_limits(limits=1):
            return _run(args)
    return _run(args)


def _run(args) -> int:

    import numba
    import scipy

    from optimise import make_rule

    sizes = [int(s) for s in args.n.split(",") if s.strip()]
    print(f"machine: {machine()}")
    print(f"numpy {np.__version__}, scipy {scipy.__version__}, numba {numba.__version__}; "
          f"{time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}")
    print("timings: CPU seconds of this process (time.process_time); BLAS limited to one "
          "thread (threadpoolctl), so every method runs on one core")
    mv = args.rule == "mean-variance"
    what = f"mean-variance, gamma = {args.gamma:g}" if mv else "minimum variance"
    print(f"problem: long-only fully invested {what}; "
          f"{args.draws} draws of (sample mean, sample covariance) from T = {args.periods}")
    # compile (cached) outside the timing
    warm_rule = make_rule("mv", "mean-variance", {"risk_aversion": args.gamma}, 3)
    warm_rule.weights_batch(np.full((2, 3), 0.01), np.broadcast_to(np.eye(3) * 1e-3, (2, 3, 3)))

    rows = []
    for n in sizes:
        seq = np.random.SeedSequence([args.seed, n])
        rng = np.random.default_rng(seq)
        mu, S = population(n, rng)
        rule = (make_rule("mv", "mean-variance", {"risk_aversion": args.gamma}, n) if mv
                else make_rule("minv", "min-variance", {}, n))
        t_kernel = t_api = 0.0
        kkt_max = 0.0
        iters_bad = 0
        q_sub = args.quadprog_subset if n < 200 else min(args.quadprog_subset, 200)
        s_sub = args.slsqp_subset if n < 200 else min(args.slsqp_subset, 10)
        first = None
        for means, covs in resampled_moments(mu, S, args.draws, args.periods, rng):
            X, tk, status, kkt = solve_ours(rule, means, covs)
            t_kernel += tk
            iters_bad += int(np.sum(status != 0))
            kkt_max = max(kkt_max, float(np.max(kkt)))
            t = CLOCK()
            W, _ = rule.weights_batch_details(means, covs)
            t_api += CLOCK() - t
            if first is None:
                first = (means, covs, X)
        means, covs, X = first
        if not mv:
            means = np.zeros_like(means)     # the baselines' objective: variance alone
        # independent check: multipliers re-estimated by NNLS (optimise.kkt_residuals)
        indep = max(rule.check(means[d], covs[d], X[d]).max for d in range(min(20, len(X))))
        q_sub = min(q_sub, means.shape[0])
        s_sub = min(s_sub, means.shape[0])
        Wq, tq, q_ridged = solve_quadprog(means[:q_sub], covs[:q_sub], args.gamma, X[:q_sub])
        Ws, ts = solve_slsqp(means[:s_sub], covs[:s_sub], args.gamma)
        rows.append(dict(
            n=n, D=args.draws, ours=t_kernel / args.draws, api=t_api / args.draws,
            q=tq / q_sub, q_sub=q_sub, q_ridged=q_ridged, s=ts / s_sub, s_sub=s_sub, kkt=kkt_max, indep=indep, bad=iters_bad,
            dq=float(np.max(np.abs(Wq - X[:q_sub]))), ds=float(np.max(np.abs(Ws - X[:s_sub]))),
            gq=_gap(X[:q_sub], Wq, means, covs, args.gamma),
            gs=_gap(X[:s_sub], Ws, means, covs, args.gamma), vq=_viol(Wq), vs=_viol(Ws),
            vo=_viol(X)))
        r = rows[-1]
        print(f"  N = {n}: done (kernel {1e6 * r['ours']:.1f} us/solve)", flush=True)

    us = lambda s: f"{1e6 * s:,.1f}"
    print()
    print("| N | ours: kernel us/solve | ours: API us/solve (incl. checks) | solves/s (kernel) "
          "| quadprog us/solve (subset) | SLSQP us/solve (subset) | quadprog / ours "
          "| SLSQP / ours | max KKT residual (ours, all) | max KKT, independent multipliers (20) "
          "| max abs w diff vs quadprog | vs SLSQP | utility gain of quadprog over ours (max) "
          "| of SLSQP over ours (max) | max constraint violation: ours / quadprog / SLSQP |")
    print("|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|")
    for r in rows:
        print(f"| {r['n']} | {us(r['ours'])} | {us(r['api'])} | {1 / r['ours']:,.0f} "
              f"| {us(r['q'])} ({r['q_sub']}) | {us(r['s'])} ({r['s_sub']}) "
              f"| {r['q'] / r['ours']:,.1f}x | {r['s'] / r['ours']:,.0f}x "
              f"| {r['kkt']:.1e} | {r['indep']:.1e} | {r['dq']:.1e} | {r['ds']:.1e} "
              f"| {r['gq']:.1e} | {r['gs']:.1e} | {r['vo']:.0e} / {r['vq']:.0e} / {r['vs']:.0e} |")
    for r in rows:
        if r["q_ridged"]:
            print(f"N = {r['n']}: T = {args.periods} <= N, the sample covariance is singular; quadprog "
                  f"needed a ridge of 1e-10 x mean variance on {r['q_ridged']} of {r['q_sub']} "
                  "problems (ours solves the singular problem as it is)")
    print("A positive utility gain of a baseline comes with its constraint violation (a "
          "baseline that leaves the feasible set can score higher).")
    bad = sum(r["bad"] for r in rows)
    print(f"\nsolver failures: {bad}; KKT residual = largest of stationarity, primal, dual and "
          "complementarity violations, scaled by max(1, |c|, |Hx|).")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
