"""Batched covariance estimators against plain-numpy baselines, measured in the same run.

For D windows of T rows and N assets (default D = 10,000, T = 120, N = 50) this times:

* ``np.cov`` per window in a Python loop (the plain baseline);
* numpy's own batched product of the centred windows, ``Yc^T Yc`` on the stacked
  (D, T, N) array with the centring done beforehand and not timed (the bare floor);
* ``estimate_batch`` with the ``sample``, ``ledoit-wolf-constant-correlation``,
  ``ledoit-wolf-identity`` (and, for reference, ``ledoit-wolf-single-index`` and
  ``oas``) covariances, which include the centring and all validation.

It prints windows per second and each time as a ratio to the bare batched product. The
aims (issue 3): sample covariance at most 1.5x the bare product, constant-correlation
Ledoit-Wolf at most 3x. Methods are timed round-robin and each figure is the best of
``--repeat`` rounds; the 1-minute load average is printed before and after, since the
machine is shared. BLAS threading matters there: run with ``OPENBLAS_NUM_THREADS=1`` too.

Run: ``python -m benchmarks estimators --draws=2000`` (through the runner, options need
``=``) or ``python benchmarks/bench_estimators.py --draws 2000``.
"""
from __future__ import annotations

import argparse
import os
import platform
import sys
import time

import numpy as np


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="bench_estimators", description=__doc__.splitlines()[0])
    ap.add_argument("--draws", type=int, default=10_000, help="windows D (default 10000)")
    ap.add_argument("--periods", type=int, default=120, help="rows per window T (default 120)")
    ap.add_argument("--assets", type=int, default=50, help="assets N (default 50)")
    ap.add_argument("--repeat", type=int, default=3, help="best of this many runs (default 3)")
    ap.add_argument("--loop-draws", type=int, default=None,
                    help="windows for the np.cov loop (default: all; its rate is per window)")
    ap.add_argument("--no-twins", action="store_true",
                    help="skip the numpy-twin rows (numba vs numpy comparison)")
    args = ap.parse_args(argv)

    from estimators import estimate_batch

    D, T, N = args.draws, args.periods, args.assets
    rng = np.random.default_rng(12345)
    X = 0.005 + 0.04 * rng.standard_normal((D, T, N))
    # warm up (numba compiles or loads its cache) on a small slice
    for c in ("sample", "ledoit-wolf-constant-correlation", "ledoit-wolf-identity",
              "ledoit-wolf-single-index", "oas"):
        estimate_batch(X[:4], covariance=c)

    from estimators import _kernels
    from estimators._chunk import Chunk
    from estimators.api import DEFAULT_CHUNK_BYTES

    n_loop = min(D, args.loop_draws or D)

    def loop():
        for d in range(n_loop):
            np.cov(X[d], rowvar=False)

    Yc = X - X.mean(axis=1, keepdims=True)
    Yt = np.swapaxes(Yc, 1, 2)
    cw = max(1, DEFAULT_CHUNK_BYTES // (T * N * 8))

    def twin(fn):
        # the same chunked path with a plain-numpy twin instead of the numba kernel
        # (how the choice numba vs numpy for the O(T N) part was measured)
        out = np.empty((D, N, N))
        for s in range(0, D, cw):
            ch = Chunk(X[s:s + cw])
            out[s:s + cw] = fn(ch.Y, ch.scatter / T)[0]
        return out

    methods = [
        ("np.cov per window (Python loop)", loop),
        ("numpy batched Yc'Yc, pre-centred (bare)", lambda: np.matmul(Yt, Yc)),
    ]
    for c in ("sample", "ledoit-wolf-constant-correlation", "ledoit-wolf-identity",
              "ledoit-wolf-single-index", "oas"):
        methods.append((f"estimate_batch covariance={c}",
                        lambda c=c: estimate_batch(X, covariance=c)))
    if not args.no_twins:
        methods.append(("same path, numpy twin instead of numba: constant-correlation",
                        lambda: twin(_kernels.lw_constant_correlation_numpy)))
        methods.append(("same path, numpy twin instead of numba: identity",
                        lambda: twin(_kernels.lw_identity_numpy)))

    # round-robin: every method once per round, best of the rounds, so that a change of
    # load on the shared machine hits all methods alike
    load0 = os.getloadavg()[0]
    best = [float("inf")] * len(methods)
    for _ in range(args.repeat):
        for k, (_, fn) in enumerate(methods):
            t0 = time.perf_counter()
            fn()
            best[k] = min(best[k], time.perf_counter() - t0)
    load1 = os.getloadavg()[0]
    best[0] *= D / n_loop
    t_loop, t_bare = best[0], best[1]
    rows = [(name, t) for (name, _), t in zip(methods, best)]

    print(f"D={D} windows, T={T}, N={N}; best of {args.repeat}; "
          f"numpy {np.__version__}; {platform.processor() or platform.machine()}, "
          f"{os.cpu_count()} cores; load (1 min) {load0:.2f} -> {load1:.2f}")
    w = max(len(r[0]) for r in rows)
    print(f"{'method':<{w}}  {'seconds':>9}  {'windows/s':>11}  {'x bare':>7}  {'vs loop':>8}")
    for name, t in rows:
        print(f"{name:<{w}}  {t:9.4f}  {D / t:11.0f}  {t / t_bare:7.2f}  {t_loop / t:7.1f}x")
    return 0


if __name__ == "__main__":
    sys.exit(main())
