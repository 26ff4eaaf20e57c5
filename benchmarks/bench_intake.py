"""Intake speed: ``load_history`` (full validation) against a bare pandas read of the same file.

The baseline is ``pandas.read_csv(path, index_col=0, parse_dates=True)`` followed by
``to_numpy(float)``: no checks, no row-naming errors. The ratio says what the checks cost.

``python -m benchmarks intake [--quick]``
"""
from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from noiseproof.intake import load_history


def _write(path: Path, rows: int, assets: int, seed: int = 0, hole: bool = False) -> None:
    rng = np.random.default_rng(seed)
    dates = pd.bdate_range("2000-01-03", periods=rows)
    r = rng.normal(0.0003, 0.01, size=(rows, assets))
    if hole:
        r[rows // 2, 0] = np.nan       # one missing cell: the exact (row-naming) reader runs
    df = pd.DataFrame(r, index=dates, columns=[f"Asset {k:03d}" for k in range(assets)])
    df.to_csv(path, index_label="date", float_format="%.6f")


def _best(fn, repeat: int) -> float:
    best = float("inf")
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t)
    return best


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="bench_intake")
    p.add_argument("--quick", action="store_true", help="smaller files, one repeat")
    args = p.parse_args(argv)
    sizes = [(1_000, 10, False), (5_000, 100, False), (5_000, 100, True)]
    if not args.quick:
        sizes += [(10_000, 500, False), (10_000, 500, True)]
    repeat = 1 if args.quick else 3
    print("one missing cell = load_history(missing='drop-rows'), which falls back to the exact reader")
    print(f"{'rows x assets':>14}  {'missing':>7}  {'file MB':>8}  {'pandas read (s)':>16}  "
          f"{'load_history (s)':>17}  {'ratio':>6}")
    with tempfile.TemporaryDirectory() as tmp:
        for rows, assets, hole in sizes:
            path = Path(tmp) / f"r_{rows}_{assets}_{int(hole)}.csv"
            _write(path, rows, assets, hole=hole)
            base = _best(lambda: pd.read_csv(path, index_col=0, parse_dates=True).to_numpy(float), repeat)
            ours = _best(lambda: load_history(path, kind="returns", missing="drop-rows"), repeat)
            mb = path.stat().st_size / 1e6
            print(f"{f'{rows} x {assets}':>14}  {('1 cell' if hole else 'none'):>7}  {mb:>8.1f}  "
                  f"{base:>16.3f}  {ours:>17.3f}  {ours / base:>6.2f}")
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
