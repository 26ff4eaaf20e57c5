"""`noiseproof demo`: the full study on the invented demo market."""
from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

from estimators.core import NoiseproofError

DESCRIPTION = """\
Run the example study shipped with noiseproof on its invented demo market: the
Kestrelmoor Civic Pension Trust (a fictional institution) reviewing a strategic
allocation across ten asset sleeves, with 30 years of illustrative monthly
returns drawn from a documented, seeded model (not real market data).

The study file is demo_market/data/study.toml; it resamples histories,
backtests the rules against 1/N and writes a run folder (summary.json,
manifest.json, tables, and the evidence pack) under --out.
"""


def _default_workers() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)


def study_path() -> Path:
    """The demo study file shipped in the ``demo_market`` package."""
    from importlib.resources import files

    return Path(str(files("demo_market") / "data" / "study.toml"))


def register(sub) -> None:
    p = sub.add_parser(
        "demo",
        help="run the example study on the invented demo market",
        description=DESCRIPTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--out", metavar="DIR", default="runs/demo",
                   help="run folder to write (default: runs/demo)")
    p.add_argument("--workers", type=int, metavar="N", default=None,
                   help="worker processes for the resampling (default: the CPUs available to this "
                        "process); results do not depend on it")
    p.add_argument("--quiet", action="store_true", help="no progress output")
    p.add_argument("--no-pack", action="store_true",
                   help="skip the evidence pack (HTML and PDF); write the results only")
    p.set_defaults(func=run)


def run(args) -> int:
    from noiseproof.intake import inspect_history
    from noiseproof.studyfile import load_study

    workers = args.workers if args.workers is not None else _default_workers()
    if workers < 1:
        raise NoiseproofError("--workers must be at least 1")
    settings = load_study(study_path())
    d = settings.data
    # what exists so far: the data are read and checked by the intake
    history, summary = inspect_history(
        d.path, kind=d.kind, frequency=d.frequency, date_column=d.date_column, missing=d.missing,
        risk_free=d.risk_free, risk_free_column=d.risk_free_column, risk_free_path=d.risk_free_path,
    )
    if not args.quiet:
        print(f"noiseproof demo: {settings.name}")
        print(f"study file: {settings.path}")
        print(f"data: {history.n_periods} months x {history.n_assets} sleeves, "
              f"{summary.first_date} to {summary.last_date}, excess of cash; invented and illustrative")
    try:
        from noiseproof.runner import run_study
    except ImportError as exc:
        missing = getattr(exc, "name", None) or str(exc)
        raise NoiseproofError(
            f"the demo data and study file are in place and were checked, but the study runner is not "
            f"built yet (cannot import {missing}); no results were computed and nothing was written"
        ) from None
    out = Path(args.out)
    argv = ["noiseproof", "demo", "--out", str(out), "--workers", str(workers)]
    if args.quiet:
        argv.append("--quiet")
    if args.no_pack:
        argv.append("--no-pack")
    run_dir = run_study(settings, out, workers=workers, quiet=args.quiet, pack=not args.no_pack, argv=argv)
    if not args.quiet:
        print(f"run folder: {run_dir}", file=sys.stdout)
    return 0
