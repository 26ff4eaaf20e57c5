"""Resampling engine throughput, side by side with per-draw loops and the machine's floor.

End to end per draw: generate a normal history (T = 120), estimate the sample mean and
covariance, solve the long-only (full-budget) mean-variance rule (gamma = 3), score the
weights under the population. Measured in one run:

* engine, one core (BLAS limited to one thread) and on two local worker processes;
* (a) a straightforward per-draw loop: numpy generation and estimation, scipy's SLSQP
  (timed on a subset of draws);
* (b) the same loop with quadprog's dense Goldfarb-Idnani solver instead of SLSQP;
* the floor: drawing the normals and doing the matrix products the history path needs
  (Z L', the scatter matrix), with this machine's matrix-multiply and random-number rates.

Also the start-up time of a fresh process running a tiny study, with an empty numba cache
(cold) and with the cache filled (warm).

``python -m benchmarks simulate [--quick] [--sizes 10,50,200]``
"""
from __future__ import annotations

import argparse
import datetime as dt
import os
import platform
import subprocess
import sys
import tempfile
import time

import numpy as np

from benchmarks._machine import cpu_name

TARGETS = {10: 40_000, 50: 8_000, 200: 1_000}
#: Issue 5: two workers at least this many times one (best of the interleaved rounds each)
TWO_WORKER_TARGET = 1.8
#: Rounds whose two-worker run took at most this times the CPU seconds of the one-core run
#: are listed apart: there the host ran both cores at the one-core speed
CALM_CPU = 1.05
LENGTH = 120
GAMMA = 3.0


def recipe(n):
    """Recipe A of REFERENCES.md §0 (vol 0.04 + 0.004 i, corr 0.5^|i-j|, mu 0.005 + 0.0005 i)."""
    i = np.arange(n)
    vol = 0.04 + 0.004 * i
    corr = 0.5 ** np.abs(i[:, None] - i[None, :])
    return 0.005 + 0.0005 * i, corr * np.outer(vol, vol)


def _cpu_name():
    return cpu_name()


def _load():
    try:
        return "%.2f %.2f %.2f" % os.getloadavg()
    except OSError:
        return "n/a"


# ------------------------------------------------------------------ machine rates

def machine_rates():
    from threadpoolctl import threadpool_limits

    rng = np.random.default_rng(0)
    with threadpool_limits(1):
        a = rng.standard_normal((600, 600))
        a @ a
        reps = 5
        t = time.perf_counter()
        for _ in range(reps):
            a @ a
        gemm = 2 * 600 ** 3 * reps / (time.perf_counter() - t) / 1e9
        from simulate._random import standard_normal_into

        buf = np.empty(2_000_000)
        normals = {}
        for name, bg, fill in (("PCG64", np.random.PCG64, None), ("SFC64", np.random.SFC64, None),
                               ("compiled", np.random.SFC64, standard_normal_into)):
            g = np.random.Generator(bg(0))
            draw = (lambda: g.standard_normal(out=buf)) if fill is None else (lambda: fill(g, buf))
            draw()
            t = time.perf_counter()
            for _ in range(5):
                draw()
            normals[name] = 5 * buf.size / (time.perf_counter() - t)
    return gemm, normals


def floor_rate(n, draws, length=LENGTH):
    """Draws/s of: T x N normals (SFC64, the engine's compiled draw: the fastest this
    machine has), Z L' + mu (a triangular product from 40 assets, as in the engine), the
    scatter matrix X'X (chunks of 125)."""
    from threadpoolctl import threadpool_limits

    mu, cov = recipe(n)
    lt = np.ascontiguousarray(np.linalg.cholesky(cov).T)
    from simulate._random import standard_normal_into
    from simulate.engine import chunk_generator, retain_freed_memory
    from simulate.generators import times_factor_t

    retain_freed_memory()                   # as in the engine: no fresh pages per chunk
    rng = chunk_generator(1, 0, 0)          # the engine's bit generator (SFC64)
    d = 125
    with threadpool_limits(1):
        t = time.perf_counter()
        done = 0
        while done < draws:
            z = standard_normal_into(rng, np.empty((d * length, n)))
            x = times_factor_t(z, lt)          # triangular from 40 assets, as the engine
            x += mu
            x = x.reshape(d, length, n)
            np.matmul(x.transpose(0, 2, 1), x)
            done += d
        return done / (time.perf_counter() - t)


def _spin(n):
    s = 0
    for i in range(n):
        s += i * i
    return s


def machine_parallel_speedup(n=4_000_000):
    """Speed-up of 2 processes over 1 on a pure-Python loop: what the cores give right now."""
    import multiprocessing as mp

    t = time.perf_counter()
    _spin(n)
    _spin(n)
    one = time.perf_counter() - t
    ctx = mp.get_context("fork") if "fork" in mp.get_all_start_methods() else None
    with (ctx or mp).Pool(2) as pool:
        pool.map(_spin, [1000, 1000])
        t = time.perf_counter()
        pool.map(_spin, [n, n])
        two = time.perf_counter() - t
    return one / two


# ------------------------------------------------------------------ per-draw loops

def _draw_and_estimate(rng, lt, mu, n):
    x = rng.standard_normal((LENGTH, n)) @ lt + mu
    return x.mean(axis=0), np.cov(x, rowvar=False)


def _score(w, mu, cov):
    return w @ mu - 0.5 * GAMMA * w @ cov @ w


def slsqp_loop(n, draws):
    from scipy.optimize import minimize
    from threadpoolctl import threadpool_limits

    mu, cov = recipe(n)
    lt = np.ascontiguousarray(np.linalg.cholesky(cov).T)
    rng = np.random.default_rng(2)
    cons = ({"type": "eq", "fun": lambda w: w.sum() - 1.0, "jac": lambda w: np.ones_like(w)},)
    with threadpool_limits(1):
        t = time.perf_counter()
        for _ in range(draws):
            m, s = _draw_and_estimate(rng, lt, mu, n)
            res = minimize(lambda w: -(w @ m - 0.5 * GAMMA * w @ s @ w), np.full(n, 1.0 / n),
                           jac=lambda w: -(m - GAMMA * s @ w), method="SLSQP",
                           bounds=[(0.0, 1.0)] * n, constraints=cons,
                           options={"maxiter": 500, "ftol": 1e-12})
            _score(res.x, mu, cov)
        return draws / (time.perf_counter() - t)


def quadprog_loop(n, draws):
    import quadprog
    from threadpoolctl import threadpool_limits

    mu, cov = recipe(n)
    lt = np.ascontiguousarray(np.linalg.cholesky(cov).T)
    rng = np.random.default_rng(3)
    c = np.hstack([np.ones((n, 1)), np.eye(n)])
    b = np.hstack([[1.0], np.zeros(n)])
    with threadpool_limits(1):
        t = time.perf_counter()
        for _ in range(draws):
            m, s = _draw_and_estimate(rng, lt, mu, n)
            # quadprog needs a positive-definite matrix; with T <= N the sample covariance is
            # singular, so a ridge of 1e-10 times the mean variance is added
            s[np.diag_indices(n)] += 1e-10 * np.trace(s) / n
            w = quadprog.solve_qp(GAMMA * s, m, c, b, meq=1)[0]
            _score(w, mu, cov)
        return draws / (time.perf_counter() - t)


# ------------------------------------------------------------------ the engine

def _spec(n, draws, draw="histories", generator="normal", length=LENGTH):
    from optimise import make_rule
    from simulate import ResampleSpec, RuleSpec, population_moments

    mu, cov = recipe(n)
    history = None
    if generator != "normal":
        # the bootstraps resample a history: 240 rows drawn once from the recipe
        history = np.random.default_rng(4).multivariate_normal(mu, cov, size=240)
        mu, cov = population_moments(history)
    assets = tuple(f"asset{i}" for i in range(n))
    rules = (RuleSpec(make_rule("equal-weight", "equal-weight", {}, assets)),
             RuleSpec(make_rule("mv", "mean-variance", {"risk_aversion": GAMMA}, assets),
                      "sample", "sample"))
    return ResampleSpec(mu, cov, history, assets, rules, generator, draws, length, 1, GAMMA,
                        frontier_points=0, attribution=False, self_check_draws=0,
                        block_size=0, draw=draw)   # automatic blocks, as a study gets


def engine_rate(n, draws, workers, **kw):
    from dataclasses import replace

    from threadpoolctl import threadpool_limits

    from simulate import run_resampling

    spec = _spec(n, draws, **kw).resolved()
    with threadpool_limits(1):
        run_resampling(replace(spec, draws=250))          # compile / warm caches
        c0 = _cpu()
        t = time.perf_counter()
        run_resampling(spec, workers=workers)
        wall = time.perf_counter() - t
        cpu = _cpu() - c0
    _CPU_LOG[(n, workers, kw.get("draw"), kw.get("generator"))] = cpu / draws * 1e6
    return draws / wall


#: CPU microseconds per draw of each engine run, by (N, workers, draw, generator).
_CPU_LOG = {}


def _cpu():
    """CPU seconds of this process and its reaped children (worker processes)."""
    import resource

    me = resource.getrusage(resource.RUSAGE_SELF)
    ch = resource.getrusage(resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime + ch.ru_utime + ch.ru_stime


_STARTUP = (
    "import time; t = time.perf_counter();"
    "import numpy as np;"
    "from benchmarks.bench_simulate import _spec;"
    "from simulate import run_resampling;"
    "run_resampling(_spec(5, 125, draw='histories'));"
    "print(time.perf_counter() - t)"
)


_KERNELS_ONLY = (
    "import time; t = time.perf_counter();"
    "import numpy as np;"
    "from simulate import _kernels as K;"
    "K.stationary_indices(np.zeros((2, 3), np.int64), np.zeros((2, 3), bool), 3);"
    "K.bin_counts(np.zeros((2, 2)), 0.0, 0.1, 10, 0.0, np.zeros((2, 13), np.int64));"
    "print(time.perf_counter() - t)"
)


def startup_times(code=_STARTUP):
    """(cold, warm) seconds for a fresh process to run ``code`` with an empty, then a
    filled, numba cache directory."""
    with tempfile.TemporaryDirectory() as cache:
        env = dict(os.environ, NUMBA_CACHE_DIR=cache)
        root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
        out = []
        for _ in range(2):
            r = subprocess.run([sys.executable, "-c", code], env=env, cwd=root,
                               capture_output=True, text=True, check=True)
            out.append(float(r.stdout.strip().splitlines()[-1]))
    return out[0], out[1]


# ------------------------------------------------------------------ main

def main(argv=None):
    ap = argparse.ArgumentParser(prog="bench_simulate", description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer draws (for a smoke run)")
    ap.add_argument("--sizes", default="10,50,200", help="asset counts, comma separated")
    ap.add_argument("--no-startup", action="store_true", help="skip the cold/warm start-up run")
    ap.add_argument("--no-moments", action="store_true", help="skip the moments-path table")
    ap.add_argument("--rounds", type=int, default=2,
                    help="interleaved rounds of the engine runs (best of each)")
    args = ap.parse_args(argv)
    sizes = [int(s) for s in args.sizes.split(",") if s]
    scale = 0.2 if args.quick else 1.0

    print(f"date       {dt.datetime.now(dt.timezone.utc):%Y-%m-%d %H:%M} UTC")
    print(f"machine    {_cpu_name()}, {os.cpu_count()} logical cores, {platform.system()} "
          f"{platform.release()}, Python {platform.python_version()}, numpy {np.__version__}")
    print(f"load avg   {_load()} (before)")
    gemm, normals = machine_rates()
    print(f"rates      matmul {gemm:.1f} GFLOP/s (600x600, one thread); normals "
          f"{normals['compiled'] / 1e6:.1f} M/s by the engine's compiled draw (SFC64, "
          f"the same numbers), {normals['SFC64'] / 1e6:.1f} M/s by numpy's method with SFC64, "
          f"{normals['PCG64'] / 1e6:.1f} M/s with PCG64 (numpy's default)")
    if not args.no_startup:
        cold, warm = startup_times()
        print(f"start-up   cold {cold:.2f} s (empty numba cache), warm {warm:.2f} s (cached), "
              f"import + 125-draw study in a fresh process (all packages' kernels)")
        kc, kw = startup_times(_KERNELS_ONLY)
        print(f"           simulate's own kernels: cold {kc:.2f} s, warm {kw:.2f} s "
              f"(import + first call)")
    par = machine_parallel_speedup()
    print(f"cores now  2 processes of a pure-Python loop run {par:.2f}x one (the ceiling for "
          f"2 workers at this moment; 2.00 on an idle 2-core machine)")
    rows = []
    rounds_by_cpu = {}
    for n in sizes:
        # about 5 s on one core: a short study, long enough that starting the worker
        # processes (measured separately below) does not dominate the two-worker figure
        d_engine = int({10: 200_000, 50: 40_000, 200: 5_000}.get(n, 5_000) * scale) or 250
        d_slsqp = max(2, int({10: 200, 50: 40, 200: 3}.get(n, 10) * scale))
        d_qp = max(10, int({10: 3000, 50: 1000, 200: 100}.get(n, 200) * scale))
        one = two = two_short = 0.0
        short = max(d_engine // 8, min(1000, d_engine // 2))   # shorter than the long run
        pairs = []
        for _ in range(args.rounds):            # interleaved; the best of each
            r1 = engine_rate(n, d_engine, 1, draw="histories")
            c1 = _CPU_LOG[(n, 1, "histories", None)]
            r2 = engine_rate(n, d_engine, 2, draw="histories")
            c2 = _CPU_LOG[(n, 2, "histories", None)]
            pairs.append((r1, r2, c2 / c1))
            one, two = max(one, r1), max(two, r2)
            two_short = max(two_short, engine_rate(n, short, 2, draw="histories"))
        # wall = fixed + draws / rate: the fixed cost of a two-worker run (starting the
        # processes, their first chunks in fresh memory, the last block's wait) and the
        # steady rate once the workers run, from the long and the short run
        wall_long, wall_short = d_engine / two, short / two_short
        steady = (d_engine - short) / max(wall_long - wall_short, 1e-9)
        fixed = max(0.0, wall_short - short / steady)
        fl = floor_rate(n, max(250, min(d_engine, 40_000) // 2))
        sl = slsqp_loop(n, d_slsqp)
        qp = quadprog_loop(n, d_qp)
        rows.append((n, one, two, fl, sl, qp, short, two_short, fixed, steady))
        print(f"  N={n}: done (engine {d_engine} draws x {args.rounds} rounds, SLSQP {d_slsqp}, "
              f"quadprog {d_qp}); each round 1 core / 2 workers (2w/1w; CPU time 2w/1w): "
              + ", ".join(f"{a:,.0f} / {b:,.0f} ({b / a:.2f}x; {c:.2f})" for a, b, c in pairs),
              flush=True)
        rounds_by_cpu[n] = pairs
    print()
    head = ("N", "engine 1 core", "engine 2 workers", "2w/1w", "CPU us/draw 1w / 2w",
            "2 workers, short run", "2w start-up (s)", "2w steady", "steady/1w",
            "SLSQP loop", "quadprog loop",
            "floor", "engine/quadprog", "engine/floor", "target 1 core", "met",
            f"2w/1w at least {TWO_WORKER_TARGET}x")
    print(" | ".join(head))
    print(" | ".join("---" for _ in head))
    for n, one, two, fl, sl, qp, short, two_short, fixed, steady in rows:
        target = TARGETS.get(n)
        c1 = _CPU_LOG.get((n, 1, "histories", None))
        c2 = _CPU_LOG.get((n, 2, "histories", None))
        cpu = f"{c1:.1f} / {c2:.1f}" if c1 and c2 else "-"
        print(" | ".join([str(n), f"{one:,.0f}", f"{two:,.0f}", f"{two / one:.2f}x", cpu,
                          f"{two_short:,.0f} ({short:,} draws)", f"{fixed:.2f}",
                          f"{steady:,.0f}", f"{steady / one:.2f}x",
                          f"{sl:,.1f}",
                          f"{qp:,.0f}", f"{fl:,.0f}", f"{one / qp:.2f}x", f"{one / fl:.2f}",
                          f"{target:,}" if target else "-",
                          ("yes" if one >= target else "no") if target else "-",
                          "yes" if two >= TWO_WORKER_TARGET * one else "no"]))
    print("(draws per second; T = 120, long-only mean-variance, sample estimates, gamma = 3;")
    print(" the engine on the history path, draw = 'histories', automatic block size (about")
    print(" 0.25 s of work each); engine figures are the best of the interleaved rounds. CPU")
    print(" us/draw: CPU seconds of the process and its workers per draw (last round).")
    print(" 2w start-up and 2w steady: wall = start-up + draws / steady rate, solved from the")
    print(" long and the short two-worker runs; the start-up is the fork, each worker's first")
    print(" chunks in memory the parent never used, and the wait for the last block)")
    print("CPU time of the same draws, two workers against one core (a ratio above 1 is the")
    print(" host slowing each core while both run, plus the start-up above); 2w/1w by round:")
    for n, pairs in rounds_by_cpu.items():
        calm = [b / a for a, b, c in pairs if c <= CALM_CPU]
        busy = [b / a for a, b, c in pairs if c > CALM_CPU]
        print(f"  N={n}: CPU within {CALM_CPU:.2f}x: "
              + (", ".join(f"{r:.2f}x" for r in sorted(calm)) or "none")
              + "; above: " + (", ".join(f"{r:.2f}x" for r in sorted(busy)) or "none"))

    if not args.no_moments:
        print()
        print("Moments path (issue 9) vs history path, one core, same study; bootstraps on a "
              "240-row history")
        mrows = []
        for n, t in [(n, LENGTH) for n in sizes] + ([(200, 260)] if 200 in sizes else []):
            d = int({10: 100_000, 50: 30_000, 200: 2_000}.get(n, 5_000) * scale) or 250
            hist = mom = boot = bb = 0.0
            for _ in range(args.rounds):       # interleaved; the best of each, as above
                hist = max(hist, engine_rate(n, max(250, d // 3), 1, draw="histories", length=t))
                if t - 1 >= n:
                    mom = max(mom, engine_rate(n, d, 1, draw="moments", length=t))
                boot = max(boot, engine_rate(n, max(250, d // 3), 1, generator="bootstrap",
                                             length=t))
                bb = max(bb, engine_rate(n, max(250, d // 3), 1, generator="block-bootstrap",
                                         length=t))
            mom = mom or None
            fl = floor_rate(n, max(250, d // 3), length=t)
            mrows.append((n, t, mom, hist, fl, boot, bb))
            print(f"  N={n}, T={t}: done", flush=True)
        head = ("N", "T", "moments path", "history path", "history floor", "moments/history",
                "bootstrap", "block bootstrap", "target (moments)", "met")
        print(" | ".join(head))
        print(" | ".join("---" for _ in head))
        mt = {10: 100_000, 50: 25_000}
        for n, t, mom, hist, fl, boot, bb in mrows:
            target = mt.get(n) if t == LENGTH else None
            print(" | ".join([str(n), str(t), "n/a (T-1 < N)" if mom is None else f"{mom:,.0f}",
                              f"{hist:,.0f}", f"{fl:,.0f}",
                              "-" if mom is None else f"{mom / hist:.2f}x",
                              f"{boot:,.0f}", f"{bb:,.0f}",
                              f"{target:,}" if target else "-",
                              ("yes" if mom and mom >= target else "no") if target else "-"]))
        print(f"(draws per second, one core, best of {args.rounds} interleaved rounds; bootstrap "
              f"rates use the history path, as they must)")
    par_after = machine_parallel_speedup()
    print(f"cores now  2 processes of a pure-Python loop run {par_after:.2f}x one (after)")
    print(f"load avg   {_load()} (after)")
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
