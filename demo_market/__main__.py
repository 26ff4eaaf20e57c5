"""``python -m demo_market``: regenerate the invented demo market's data files.

Writes ``demo_returns.csv`` and ``demo_cash.csv`` into the package's ``data/``
folder (or ``--out DIR``), byte for byte the committed files. ``--check`` writes
nothing and exits 1 if the committed files differ from a fresh draw.
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

from .model import CASH_FILE, DATA_DIR, DEFAULT_SEED, INSTITUTION, RETURNS_FILE, cash_csv, generate, \
    returns_csv, write


def main(argv=None) -> int:
    p = argparse.ArgumentParser(
        prog="python -m demo_market",
        description=f"Regenerate the invented demo market ({INSTITUTION}, a fictional institution): "
                    f"30 years of illustrative monthly returns on ten asset sleeves.",
    )
    p.add_argument("--out", metavar="DIR", default=str(DATA_DIR),
                   help="folder to write into (default: the package's data folder)")
    p.add_argument("--check", action="store_true",
                   help="write nothing; exit 1 if the files in --out differ from a fresh draw")
    args = p.parse_args(argv)
    out = Path(args.out)
    if args.check:
        market = generate(DEFAULT_SEED)
        ok = True
        for name, data in ((RETURNS_FILE, returns_csv(market)), (CASH_FILE, cash_csv(market))):
            path = out / name
            same = path.exists() and path.read_bytes() == data
            print(f"{path}: {'identical' if same else 'DIFFERS'}")
            ok &= same
        return 0 if ok else 1
    for name, sha in write(out).items():
        print(f"wrote {out / name}  sha256 {sha}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
