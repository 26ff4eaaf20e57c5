"""Benchmark of `noiseproof batch`: one plan on 1 and 2 local workers and on a Dask cluster.

The plan: 24 studies on an invented market of N = 30 funds with T = 120 monthly returns,
2,000 draws each (grid: 4 covariance estimators x 2 mean estimators x 3 risk aversions;
rules: mean-variance and minimum variance, plus 1/N; no history-length sweep, no backtest,
no pack: the executors are what is measured). It runs

* in this process (``--workers 1``): the baseline;
* on 2 local worker processes (``--workers 2``);
* on a 2-worker local Dask cluster of separate processes (``--dask-local 2``);

checks that the three give identical numbers, and prints wall times, speed-ups and
scaling efficiency. Like the command line, it runs with one OpenBLAS thread per process
(``OPENBLAS_NUM_THREADS=1`` for the processes it starts). It also measures the scheduling overhead per block: the same batch
machinery (durable block writes included) driving blocks that compute nothing, with 1
and with K blocks per task (``--blocks-per-task``, the option that shrinks it).

With ``--repeat=R`` the three executors run R times in turn and each keeps its best wall
time; the ``others`` column is the share of the machine's CPU that other processes used
during that run (the machine may be shared).

``python -m benchmarks batch [--quick] [--studies=S] [--draws=D] [--no-dask]
[--overhead-blocks=B] [--blocks-per-task=K] [--repeat=R]``
"""
from __future__ import annotations

import argparse
import dataclasses
import json
import logging
import os
import platform
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np

from noiseproof import batch
from noiseproof.executors import DaskExecutor, InlineExecutor, ProcessExecutor

ASSET_PREFIX = "Meridian Fund"   # an invented market


def _write_inputs(folder: Path, *, n: int, t: int, draws: int, studies: int) -> Path:
    rng = np.random.default_rng(20261202)
    i = np.arange(n)
    vol = 0.03 + 0.002 * i
    corr = 0.25 + 0.75 * np.eye(n)
    returns = rng.multivariate_normal(0.004 + 0.0002 * i, corr * np.outer(vol, vol), size=t)
    import pandas as pd

    df = pd.DataFrame(returns, columns=[f"{ASSET_PREFIX} {k:02d}" for k in range(n)])
    df.insert(0, "date", pd.date_range("2010-01-31", periods=t, freq="ME").strftime("%Y-%m-%d"))
    df.to_csv(folder / "history.csv", index=False)
    (folder / "study.toml").write_text(f"""\
[data]
path = "history.csv"
kind = "returns"

[[rules]]
name = "proposed"
type = "mean-variance"
risk_aversion = 5

[[rules]]
name = "minvar"
type = "min-variance"

[resample]
generator = "normal"
draws = {draws}
length = {t}
seed = 7
sweep_years = []
""")
    if studies == 24:
        grid = ('"estimate.covariance" = ["sample", "ledoit-wolf-identity", '
                '"ledoit-wolf-constant-correlation", "oas"]\n'
                '"estimate.mean" = ["sample", "bayes-stein"]\n'
                '"rules.proposed.risk_aversion" = [2, 5, 10]\n')
    else:
        grid = f'"resample.seed" = {list(range(1, studies + 1))}\n'
    (folder / "plan.toml").write_text(f'study = "study.toml"\ntitle = "Benchmark plan"\n[grid]\n{grid}')
    return folder / "plan.toml"


def _numbers(out: Path) -> dict:
    res = {}
    for p in sorted((out / "studies").glob("*/summary.json")):
        s = json.loads(p.read_text())
        s.pop("study", None)
        res[p.parent.name] = s
    return res


# ---------------------------------------------------------------- blocks that compute nothing

@dataclasses.dataclass(frozen=True)
class _NoopSpec:
    blocks: int


@dataclasses.dataclass(frozen=True)
class _NoopBlock:
    index: int
    start: int
    stop: int


def _noop_prepare(settings):
    return _NoopSpec(settings.resample.draws)


def _noop_plan(spec):
    return [_NoopBlock(i, i, i + 1) for i in range(spec.blocks)]


def _noop_run(spec, index):
    return index


def _noop_bytes(result) -> bytes:
    return int(result).to_bytes(8, "little") * 64   # 512 bytes, like a small real block


def _noop_from(data: bytes):
    if len(data) != 512:
        raise ValueError("damaged")
    return int.from_bytes(data[:8], "little")


def _noop_merge(spec, results):
    return len(results)


def _noop_finish(prepared, result, out, *, quiet, pack, argv, started):
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    (out / "summary.json").write_text(json.dumps({"rules": {}, "blocks": result}))
    return out


NOOP = batch.Engine(prepare=_noop_prepare, spec_of=lambda p: p, block_plan=_noop_plan,
                    run_block=_noop_run, to_bytes=_noop_bytes, from_bytes=_noop_from,
                    merge=_noop_merge, finish=_noop_finish, ident="noop")


def _overhead(folder: Path, executor, blocks: int, per_task: int) -> float:
    """Seconds per block of the batch machinery alone (submit, run nothing, write, merge)."""
    plan_dir = folder / f"noop-{time.time_ns()}"
    plan_dir.mkdir()
    (plan_dir / "history.csv").write_text("date,A\n2020-01-31,0.01\n")
    (plan_dir / "study.toml").write_text(
        f'[data]\npath = "history.csv"\n[resample]\ndraws = {blocks}\n')
    (plan_dir / "plan.toml").write_text('study = "study.toml"\n')
    plan = batch.load_plan(plan_dir / "plan.toml")
    t = time.perf_counter()
    batch.run_batch(plan, plan_dir / "out", executor=executor, engine=NOOP, quiet=True,
                    pack=False, blocks_per_task=per_task)
    return (time.perf_counter() - t) / blocks


# ---------------------------------------------------------------- CPU accounting

def _machine_busy() -> tuple:
    """(busy, total) CPU seconds of the whole machine so far, from /proc/stat (Linux)."""
    try:
        with open("/proc/stat") as f:
            vals = [int(x) for x in f.readline().split()[1:]]
    except OSError:
        return (0.0, 0.0)
    hz = os.sysconf("SC_CLK_TCK")
    idle = vals[3] + (vals[4] if len(vals) > 4 else 0)
    return ((sum(vals) - idle) / hz, sum(vals) / hz)


def _tree_cpu() -> float:
    """CPU seconds used so far by this process and its live descendants."""
    try:
        import psutil
    except ImportError:  # pragma: no cover
        return float("nan")
    me = psutil.Process()
    total = 0.0
    for p in [me] + me.children(recursive=True):
        try:
            t = p.cpu_times()
            total += t.user + t.system
        except psutil.Error:
            continue
    return total


class _Phase:
    """Wall time of a phase, and how much of the machine other people's processes used."""

    def __enter__(self):
        self.busy0, self.total0 = _machine_busy()
        self.mine0 = _tree_cpu()
        self.t0 = time.perf_counter()
        return self

    def stop(self):
        """Call before the executor's workers exit (their CPU time is read live)."""
        self.wall = time.perf_counter() - self.t0
        busy1, total1 = _machine_busy()
        mine = _tree_cpu() - self.mine0
        cores = os.cpu_count() or 1
        self.others = max(0.0, (busy1 - self.busy0) - mine) / (self.wall * cores)
        return self

    def __exit__(self, *exc):
        return False


# ---------------------------------------------------------------- main

def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="python -m benchmarks batch", description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="6 studies of 500 draws (a smoke run)")
    ap.add_argument("--studies", type=int, default=None)
    ap.add_argument("--draws", type=int, default=None)
    ap.add_argument("--assets", type=int, default=30)
    ap.add_argument("--periods", type=int, default=120)
    ap.add_argument("--no-dask", action="store_true", help="skip the Dask cluster")
    ap.add_argument("--overhead-blocks", type=int, default=400)
    ap.add_argument("--repeat", type=int, default=1,
                    help="run the three executors R times in turn and keep each one's best "
                         "wall time (the machine is shared: the best run is the least disturbed)")
    ap.add_argument("--blocks-per-task", type=int, default=8,
                    help="K for the grouped-task overhead measurement (default 8)")
    args = ap.parse_args(argv)
    studies = args.studies or (6 if args.quick else 24)
    draws = args.draws or (500 if args.quick else 2000)

    # configured as the command line configures its processes (noiseproof/cli.py): one
    # OpenBLAS thread here and in every worker process started from here (the fork server
    # and the Dask cluster's workers inherit the variable and load numpy with it)
    os.environ["OPENBLAS_NUM_THREADS"] = "1"
    from simulate import pin_one_blas_thread

    pin_one_blas_thread()
    work = Path(tempfile.mkdtemp(prefix="noiseproof-bench-batch-"))
    load_before = os.getloadavg()
    try:
        plan_path = _write_inputs(work, n=args.assets, t=args.periods, draws=draws, studies=studies)
        plan = batch.load_plan(plan_path)
        engine = batch.default_engine()
        # warm the compile cache (not timed): one block of the first study
        prepared = engine.prepare(batch.study_settings(plan, plan.studies[0]))
        engine.run_block(engine.spec_of(prepared), 0)
        blocks = len(engine.block_plan(engine.spec_of(prepared)))
        del prepared
        print(f"plan: {len(plan.studies)} studies, N = {args.assets}, T = {args.periods}, "
              f"{draws} draws each ({blocks} blocks per study), no sweep, no backtest, no pack")
        print(f"machine: {platform.machine()}, {os.cpu_count()} cores, Python "
              f"{platform.python_version()}; load average before: "
              f"{load_before[0]:.2f} {load_before[1]:.2f} {load_before[2]:.2f}")

        results = {}
        walls: dict = {}
        others: dict = {}
        dask_start = None

        every: dict = {}

        def keep(name, phase):
            every.setdefault(name, []).append(phase.wall)
            if name not in walls or phase.wall < walls[name]:
                walls[name] = phase.wall
                others[name] = phase.others

        def timed(name, tag, rep, ex):
            """Run the plan on ``ex`` (closed afterwards) as one timed phase named ``name``."""
            try:
                with _Phase() as ph:
                    batch.run_batch(plan, work / f"{tag}{rep}", executor=ex, engine=engine,
                                    quiet=True, pack=False)
                    keep(name, ph.stop())
            finally:
                ex.close()
            results[f"{tag}{rep}"] = _numbers(work / f"{tag}{rep}")

        for rep in range(max(1, args.repeat)):
            timed("1 local worker (baseline)", "one", rep, InlineExecutor())

            def local_two():
                # the pool starts its fork server at the first task, inside the timed phase
                timed("2 local workers", "two", rep,
                      ProcessExecutor(2, preload=(engine.run_block.__module__,)))

            def dask_two():
                nonlocal dask_start
                t = time.perf_counter()
                dx = DaskExecutor(local_workers=2)
                dask_start = time.perf_counter() - t
                timed("2-worker Dask cluster", "dask", rep, dx)

            # the two 2-worker executors swap places every repetition, so that neither
            # always runs in the later (possibly slower) part of the host's day
            order = [local_two] if args.no_dask else [local_two, dask_two]
            for phase in (order if rep % 2 == 0 else order[::-1]):
                phase()
            for rep_out in work.glob(f"*{rep}"):
                if rep_out.is_dir():
                    shutil.rmtree(rep_out, ignore_errors=True)

        ex = ProcessExecutor(2, preload=(engine.run_block.__module__,))
        try:
            over_local = _overhead(work, ex, args.overhead_blocks, 1)
            over_local_k = _overhead(work, ex, args.overhead_blocks, args.blocks_per_task)
        finally:
            ex.close()
        over_inline = _overhead(work, InlineExecutor(), args.overhead_blocks, 1)
        over_dask = over_dask_k = None
        if not args.no_dask:
            dx = DaskExecutor(local_workers=2)
            try:
                over_dask = _overhead(work, dx, args.overhead_blocks, 1)
                over_dask_k = _overhead(work, dx, args.overhead_blocks, args.blocks_per_task)
            finally:
                dx.close()

        load_after = os.getloadavg()
        same = all(r == results["one0"] for r in results.values())
        base = walls["1 local worker (baseline)"]
        print()
        print(f"best of {max(1, args.repeat)} run(s) each; 'others' = share of the machine's "
              f"CPU used by other processes during that run")
        print(f"{'executor':<28}{'wall s':>9}{'speed-up':>10}{'efficiency':>12}{'others':>9}")
        for name, w in walls.items():
            workers = 1 if name.startswith("1 ") else 2
            print(f"{name:<28}{w:>9.1f}{base / w:>9.2f}x{base / w / workers:>11.0%}"
                  f"{others[name]:>9.0%}")
        for name, ws in every.items():
            print(f"  every run, {name}: " + ", ".join(f"{w:.1f}" for w in ws) + " s")
        if "2-worker Dask cluster" in walls:
            pairs = [d / l for d, l in zip(every["2-worker Dask cluster"], every["2 local workers"])]
            print("  Dask / local, repetition by repetition: "
                  + ", ".join(f"{r:.2f}" for r in pairs))
            ratio = walls["2-worker Dask cluster"] / walls["2 local workers"]
            print(f"Dask / local processes (2 workers): {ratio:.2f} "
                  f"(cluster start-up {dask_start:.1f} s, not included; local worker start-up "
                  f"included)")
        print(f"identical numbers on every executor: {'yes' if same else 'NO'}")
        print()
        print("scheduling overhead per block (blocks computing nothing; durable write, "
              f"merge and book-keeping included; {args.overhead_blocks} blocks):")
        print(f"{'executor':<28}{'1 block/task':>14}{f'{args.blocks_per_task} blocks/task':>16}")
        print(f"{'this process':<28}{1e3 * over_inline:>11.2f} ms{'':>16}")
        print(f"{'2 local workers':<28}{1e3 * over_local:>11.2f} ms{1e3 * over_local_k:>13.2f} ms")
        if over_dask is not None:
            print(f"{'2-worker Dask cluster':<28}{1e3 * over_dask:>11.2f} ms{1e3 * over_dask_k:>13.2f} ms")
        mean_block = base / (len(plan.studies) * blocks)
        print(f"mean compute per block on one core: {1e3 * mean_block:.0f} ms")
        print(f"load average after: {load_after[0]:.2f} {load_after[1]:.2f} {load_after[2]:.2f}")
        return 0 if same else 1
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    import sys

    logging.getLogger("distributed").setLevel(logging.ERROR)
    sys.exit(main())
