"""Run benchmarks: ``python -m benchmarks`` runs all, ``python -m benchmarks NAME ...`` some.

Each ``benchmarks/bench_<name>.py`` exposes ``main(argv=None)`` and prints its own table.
"""
from __future__ import annotations

import importlib
import pkgutil
import sys
from pathlib import Path


def available():
    here = Path(__file__).parent
    return sorted(m.name[len("bench_"):] for m in pkgutil.iter_modules([str(here)])
                  if m.name.startswith("bench_"))


def main(argv=None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    names = [a for a in argv if not a.startswith("-")] or available()
    rest = [a for a in argv if a.startswith("-")]
    for name in names:
        if name not in available():
            print(f"unknown benchmark '{name}' (known: {', '.join(available())})", file=sys.stderr)
            return 2
        print(f"\n=== benchmark: {name} ===", flush=True)
        importlib.import_module(f"benchmarks.bench_{name}").main(rest)
    return 0


if __name__ == "__main__":
    sys.exit(main())
