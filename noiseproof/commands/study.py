"""`noiseproof study STUDY.toml`: resample, backtest and write a run folder with its pack."""
from __future__ import annotations

import os
import re
from pathlib import Path

from estimators.core import SettingsError


def register(sub) -> None:
    p = sub.add_parser(
        "study",
        help="run a study file: resampling, backtest, run folder and evidence pack",
        description=(
            "Run the study described by STUDY.toml: draw synthetic histories from the "
            "population, re-estimate and re-optimise every rule on each, score them under the "
            "population against 1/N, backtest, and write RUN/summary.json, manifest.json, "
            "tables/*.csv, log.txt and the evidence pack. Figures are hypothetical; decision "
            "support, not investment advice."),
    )
    p.add_argument("study", metavar="STUDY.toml", help="the study file (TOML)")
    p.add_argument("--draws", type=int, default=None,
                   help="synthetic histories (overrides [resample] draws)")
    p.add_argument("--seed", type=int, default=None,
                   help="root seed of the study's random numbers (overrides [resample] seed)")
    p.add_argument("--workers", type=int, default=1,
                   help="local worker processes for the draws (default 1; results do not "
                        "depend on it)")
    p.add_argument("--out", default=None,
                   help="run folder (default runs/<study name>); replaced only when the run "
                        "has finished")
    p.add_argument("--quiet", action="store_true", help="no progress bar or closing message")
    p.add_argument("--no-pack", action="store_true", help="skip the evidence pack")
    p.set_defaults(func=run)


def folder_name(study_name: str) -> str:
    """A safe folder name from a study's name: lower case, runs of other characters -> '-'."""
    slug = re.sub(r"[^a-z0-9._]+", "-", study_name.lower()).strip("-.")
    return slug[:80].rstrip("-.") or "study"


def run(args) -> int:
    from ..runner import run_study
    from ..studyfile import load_study

    if args.draws is not None and args.draws < 1:
        raise SettingsError(f"--draws must be at least 1, not {args.draws}")
    if args.seed is not None and args.seed < 0:
        raise SettingsError(f"--seed must be >= 0, not {args.seed}")
    if args.workers < 1:
        raise SettingsError(f"--workers must be at least 1, not {args.workers}")
    if args.workers > (os.cpu_count() or 1) * 4:
        raise SettingsError(f"--workers {args.workers} is more than four per core on this "
                            f"machine ({os.cpu_count()} cores)")
    settings = load_study(args.study)
    out = Path(args.out) if args.out else Path("runs") / folder_name(settings.name)
    argv = ["noiseproof", "study", args.study]
    for flag, value in (("--draws", args.draws), ("--seed", args.seed),
                        ("--workers", args.workers if args.workers != 1 else None),
                        ("--out", args.out)):
        if value is not None:
            argv += [flag, str(value)]
    argv += [flag for flag, on in (("--quiet", args.quiet), ("--no-pack", args.no_pack)) if on]
    run_dir = run_study(settings, out, workers=args.workers, quiet=args.quiet,
                        pack=not args.no_pack, argv=argv, draws=args.draws, seed=args.seed)
    if not args.quiet:
        print(f"run folder: {run_dir}")
    return 0
