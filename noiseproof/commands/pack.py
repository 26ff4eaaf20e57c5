"""`noiseproof pack RUN_DIR`: rebuild the evidence pack from a finished run folder alone.

Nothing is recomputed: the pack is drawn from RUN/summary.json, RUN/manifest.json and
RUN/tables/*.csv. A missing or malformed run folder is a one-line error (exit status 2).
"""
from __future__ import annotations


def register(sub) -> None:
    p = sub.add_parser(
        "pack",
        help="rebuild the evidence pack (HTML, PDF, data) of a finished run folder",
        description=("Rebuild RUN_DIR/pack/ (report.html, report.pdf, data/*.csv, manifest.json) "
                     "from the run folder alone, without recomputing anything."),
    )
    p.add_argument("run_dir", metavar="RUN_DIR", help="a finished run folder (holds summary.json)")
    p.add_argument("--quiet", action="store_true", help="print nothing on success")
    p.set_defaults(func=run)


def run(args) -> int:
    from reports import build_pack

    result = build_pack(args.run_dir)
    if not args.quiet:
        print(f"pack written: {result.html}")
        print(f"              {result.pdf}")
        print(f"              {result.data_dir}/ ({sum(1 for _ in result.data_dir.glob('*.csv'))} CSV files)")
        if result.absent:
            print("sections without results (each says why): " + ", ".join(result.absent))
    return 0
