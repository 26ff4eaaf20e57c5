"""The ``noiseproof`` command line: parse, validate once, call the engines.

Every subcommand lives in ``noiseproof/commands/<name>.py`` and exposes
``register(subparsers)``, which adds its parser and sets ``func(args) -> int``.
Only the :class:`~estimators.core.NoiseproofError` family is caught here: it is
printed as one line on stderr and the exit status is 2. Anything else is a bug
and keeps its traceback.
"""
from __future__ import annotations

import os

# Before numpy loads OpenBLAS: one BLAS thread per process. The engine's parallelism is
# its worker processes, and every block is computed with one BLAS thread anyway (so that
# its numbers cannot depend on where it ran); OpenBLAS's own helper threads would only
# busy-wait beside the workers (about 0.1 s each time a process sets its thread count).
# A value the user set is kept.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import argparse  # noqa: E402
import sys  # noqa: E402
from typing import Optional, Sequence  # noqa: E402

from estimators.core import NoiseproofError  # noqa: E402

from .commands import COMMANDS  # noqa: E402

DESCRIPTION = (
    "Evidence that an optimised portfolio allocation is not an artefact of noisy inputs: "
    "resample alternative histories, re-estimate and re-optimise on each, backtest against 1/N, "
    "and write an evidence pack. Decision support, not investment advice."
)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="noiseproof",
        description=DESCRIPTION,
        epilog="Run 'noiseproof COMMAND --help' for a command's options.",
    )
    parser.add_argument("--version", action="store_true", help="print the version and exit")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for module in COMMANDS:
        module.register(sub)
    return parser


def main(argv: Optional[Sequence[str]] = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.version:
        from importlib.metadata import version

        print(f"noiseproof {version('noiseproof')}")
        return 0
    if not getattr(args, "command", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except NoiseproofError as exc:
        message = " ".join(str(exc).split())
        print(f"noiseproof: error: {message}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("noiseproof: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # the reader went away (e.g. `| head`): stop quietly, as other command-line tools do
        import os

        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
