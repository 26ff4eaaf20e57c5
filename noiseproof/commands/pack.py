"""`noiseproof pack`: not built yet."""
from __future__ import annotations

from estimators.core import NoiseproofError


def register(sub) -> None:
    p = sub.add_parser("pack", help="(not built yet)")
    p.set_defaults(func=run)


def run(args) -> int:
    raise NoiseproofError("'noiseproof pack' is not built yet")
