"""`noiseproof optimise`: not built yet."""
from __future__ import annotations

from estimators.core import NoiseproofError


def register(sub) -> None:
    p = sub.add_parser("optimise", help="(not built yet)")
    p.set_defaults(func=run)


def run(args) -> int:
    raise NoiseproofError("'noiseproof optimise' is not built yet")
