"""`noiseproof batch PLAN.toml`: a plan of many studies, resumable, on local cores or Dask.

Exit statuses: 0 every study finished; 1 some studies failed (each recorded with its error
in comparison.csv and the log; the others completed); 2 bad plan or options, or the output
folder is held by a live batch or needs --resume; 3 the output could not be written (disk
full, unwritable folder): the batch stopped, finished blocks are intact and --resume
continues; 130 interrupted (Ctrl-C or SIGTERM), --resume continues.
"""
from __future__ import annotations

import os
import signal
import sys
import time
from pathlib import Path

HELP = "run a plan of many studies (grid of settings), resumable, on local cores or Dask"


def register(sub) -> None:
    p = sub.add_parser(
        "batch", help=HELP, description=(
            "Run every study of a plan: a base study file and a grid of values for its "
            "dotted keys. Each study goes to OUT/studies/NAME/, the comparison across studies "
            "to OUT/comparison.csv and OUT/comparison.html. Finished blocks of draws are kept on "
            "disk, so --resume continues after any crash with identical results."),
        epilog=("exit status: 0 all studies done; 1 some studies failed (others completed); "
                "2 bad plan or options, or the folder is in use; 3 output not writable (disk "
                "full): finished blocks intact, --resume continues; 130 interrupted."))
    p.add_argument("plan", metavar="PLAN.toml", help="the plan file")
    p.add_argument("--out", metavar="DIR", default=None,
                   help="output folder (default: runs/<plan file name without .toml>)")
    where = p.add_argument_group("where the blocks run (default: local processes on all cores)")
    where.add_argument("--workers", type=int, metavar="N", default=None,
                       help="local worker processes (default: all cores; 1 runs in this process)")
    where.add_argument("--scheduler", metavar="ADDRESS", default=None,
                       help="use an existing Dask cluster, e.g. tcp://10.0.0.5:8786 (needs the "
                            "'dask' extra; workers need noiseproof installed)")
    where.add_argument("--dask-local", type=int, metavar="N", default=None,
                       help="start a local Dask cluster of N single-threaded worker processes")
    where.add_argument("--blocks-per-task", type=int, metavar="K", default=None,
                       help="send exactly K consecutive blocks per task: less scheduler "
                            "overhead per block, coarser durable progress, worse balance; "
                            "results unchanged (default: cheap blocks of a study share a task "
                            "up to about 0.25 s of modelled work)")
    p.add_argument("--resume", action="store_true",
                   help="continue the batch in --out: skip finished studies and blocks, "
                        "recompute corrupt blocks, take over a stale lock")
    p.add_argument("--dry-run", action="store_true",
                   help="list the studies with the work each needs (prepares every study and "
                        "times a few blocks of the first), run nothing")
    p.add_argument("--quiet", action="store_true", help="no progress display or messages")
    p.add_argument("--no-pack", action="store_true", help="build no evidence packs")
    p.add_argument("--packs", nargs="+", metavar="WHICH", default=None,
                   help="which studies get a pack: all, none, or study-name patterns "
                        "(e.g. 'covariance=oas*'); default: the plan's 'packs', else all")
    p.set_defaults(func=run)


def _packs(values):
    if values is None:
        return None
    if values == ["all"] or values == ["none"]:
        return values[0]
    return tuple(values)


def run(args) -> int:
    from .. import batch

    plan = batch.load_plan(args.plan)
    out = Path(args.out) if args.out else Path("runs") / Path(args.plan).stem
    if args.dry_run:
        return _dry_run(plan, out, args)

    from ..executors import make_executor

    engine = batch.default_engine()
    executor = make_executor(workers=args.workers, scheduler=args.scheduler,
                             dask_local=args.dask_local,
                             preload=(engine.run_block.__module__,))
    previous = signal.getsignal(signal.SIGTERM)

    def _terminate(signum, frame):  # a scheduler's SIGTERM stops as cleanly as Ctrl-C
        raise KeyboardInterrupt

    signal.signal(signal.SIGTERM, _terminate)
    try:
        outcome = batch.run_batch(
            plan, out, executor=executor, engine=engine, resume=args.resume, quiet=args.quiet,
            pack=not args.no_pack, packs=_packs(args.packs), blocks_per_task=args.blocks_per_task,
            argv=["noiseproof", "batch"] + list(sys.argv[2:] if sys.argv[1:2] == ["batch"] else []))
    except batch.BatchOutputError as exc:
        print(f"noiseproof: error: {' '.join(str(exc).split())}", file=sys.stderr)
        return batch.EXIT_OUTPUT
    except KeyboardInterrupt:
        print(f"noiseproof: batch interrupted; finished blocks are kept in {out}: "
              f"rerun with --resume to continue", file=sys.stderr)
        return batch.EXIT_INTERRUPTED
    finally:
        signal.signal(signal.SIGTERM, previous)
        try:
            executor.close()
        except Exception:  # pragma: no cover - closing after an interrupt
            pass
    if not args.quiet:
        done = sum(1 for s in outcome.studies if s.status == "done")
        print(f"{len(outcome.studies)} studies: {done} done, {len(outcome.failed)} failed "
              f"({outcome.seconds:.1f} s, {outcome.executor})")
        for s in outcome.failed:
            print(f"  failed: {s.name}: {s.error}")
        print(f"comparison: {outcome.comparison_csv}")
        print(f"page:       {outcome.comparison_html}")
    return outcome.exit_status


def _dry_run(plan, out, args) -> int:
    from .. import batch

    t0 = time.time()
    rows = batch.dry_run(plan, out=out if args.resume else None, calibrate=True)
    timed = any(r.seconds is not None for r in rows)
    if args.scheduler is not None:
        slots, where = None, f"the cluster at {args.scheduler}"
    elif args.dask_local is not None:
        slots, where = args.dask_local, f"{args.dask_local} Dask workers"
    else:
        slots = args.workers or os.cpu_count() or 1
        where = f"{slots} local worker{'s' if slots != 1 else ''}"
    name_w = max([len(r.name) for r in rows] + [5])
    print(f"plan {plan.path}: {len(rows)} studies")
    print(f"{'study':<{name_w}}  {'status':<6}  {'blocks':>6}  {'draws':>7}  {'T':>5}  "
          f"{'N':>4}  {'rules':>5}  {'est. s':>8}")
    total_blocks = total_draws = 0
    total_seconds = 0.0
    for r in rows:
        secs = r.seconds
        if r.status == "ready":
            total_blocks += r.blocks
            total_draws += r.draws
            total_seconds += secs or 0.0
        if r.status == "error":
            print(f"{r.name:<{name_w}}  error   {r.error}")
            continue
        print(f"{r.name:<{name_w}}  {r.status:<6}  {r.blocks:>6}  {r.draws:>7}  "
              f"{r.length if r.length is not None else '-':>5}  "
              f"{r.assets if r.assets is not None else '-':>4}  {r.rules:>5}  "
              f"{(f'{secs:.1f}' if secs is not None else '-'):>8}")
    errors = sum(1 for r in rows if r.status == "error")
    print(f"to run: {sum(1 for r in rows if r.status == 'ready')} studies, {total_blocks} blocks, "
          f"{total_draws} draws; {errors} with errors")
    if timed:
        if slots:
            print(f"rough time: {total_seconds / slots / 60:.1f} min on {where} "
                  f"({total_seconds / 60:.1f} min of one core; resampling only, from timing a "
                  f"sample of blocks; backtests and packs come on top)")
        else:
            print(f"rough time: {total_seconds / 60:.1f} min of one core, divided among "
                  f"{where}'s workers (resampling only, from timing a sample of blocks)")
    print(f"(checked in {time.time() - t0:.1f} s; nothing was run)")
    return batch.EXIT_STUDIES_FAILED if errors else batch.EXIT_OK
