"""Read a finished run folder: ``summary.json``, ``manifest.json`` and ``tables/*.csv``.

Nothing here computes a result; it only reads, checks that the folder is a finished run,
and offers tolerant look-ups (a missing optional field is ``None``, never an exception).
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Optional

import pandas as pd

from estimators.core import DataError

__all__ = ["RunFolder", "read_run", "dig"]

def dig(mapping: Any, *path, default=None):
    """``mapping[path[0]][path[1]]...`` or ``default`` when any step is missing or null."""
    node = mapping
    for key in path:
        if isinstance(node, Mapping) and key in node:
            node = node[key]
        elif isinstance(node, (list, tuple)) and isinstance(key, int) and -len(node) <= key < len(node):
            node = node[key]
        else:
            return default
        if node is None:
            return default
    return node


def as_float(value) -> Optional[float]:
    """A finite float, or None for anything else (missing, null, text, NaN)."""
    if isinstance(value, bool) or value is None:
        return None
    try:
        x = float(value)
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) else None


@dataclass(frozen=True)
class RunFolder:
    """A finished run folder, read once.

    Attributes
    ----------
    path : Path
        The run folder.
    summary : dict
        ``summary.json`` as read.
    manifest : dict
        ``manifest.json`` as read (empty when the file is absent: the pack says so).
    tables : dict of str to DataFrame
        ``tables/<name>.csv`` by file stem.
    """

    path: Path
    summary: dict
    manifest: dict
    tables: dict = field(default_factory=dict)

    # ---- look-ups used across sections -------------------------------------------------
    @property
    def periods_per_year(self) -> int:
        ppy = dig(self.summary, "periods_per_year")
        if ppy is None:
            from estimators.core import PERIODS_PER_YEAR

            ppy = PERIODS_PER_YEAR.get(dig(self.summary, "data", "frequency", default=""), None)
        try:
            ppy = int(ppy)
        except (TypeError, ValueError):
            raise DataError(f"{self.path / 'summary.json'}: 'periods_per_year' is missing "
                            f"and the data frequency is unknown") from None
        if ppy < 1:
            raise DataError(f"{self.path / 'summary.json'}: 'periods_per_year' must be >= 1")
        return ppy

    @property
    def assets(self) -> list:
        assets = dig(self.summary, "data", "assets")
        if assets:
            return [str(a) for a in assets]
        for rule in self.rules.values():
            w = dig(rule, "in_sample_weights") or dig(rule, "weights")
            if isinstance(w, Mapping):
                return [str(a) for a in w]
        return []

    @property
    def rules(self) -> dict:
        rules = dig(self.summary, "rules", default={})
        return rules if isinstance(rules, dict) else {}

    @property
    def study_name(self) -> str:
        return str(dig(self.summary, "study", "name", default="") or self.path.name)

    @property
    def created(self) -> str:
        return str(dig(self.summary, "study", "created", default="") or "")

    def table(self, *names) -> Optional[pd.DataFrame]:
        """The first of ``tables/<name>.csv`` that exists, else None."""
        for name in names:
            if name in self.tables:
                return self.tables[name]
        return None


def _read_json(path: Path, *, required: bool) -> dict:
    if not path.is_file():
        if required:
            raise DataError(f"{path}: not found; is this a finished run folder?")
        return {}
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError) as exc:
        raise DataError(f"{path}: cannot be read ({exc.__class__.__name__})") from None
    except json.JSONDecodeError as exc:
        raise DataError(f"{path}: not valid JSON (line {exc.lineno}, column {exc.colno})") from None
    if not isinstance(doc, dict):
        raise DataError(f"{path}: expected a JSON object at the top level")
    return doc


def read_run(run_dir) -> RunFolder:
    """Read a finished run folder; a missing or malformed one is a :class:`DataError`."""
    path = Path(run_dir)
    if not path.exists():
        raise DataError(f"{path}: run folder not found")
    if not path.is_dir():
        raise DataError(f"{path}: not a folder (give the run folder, not a file in it)")
    summary = _read_json(path / "summary.json", required=True)
    rules = summary.get("rules")
    if not isinstance(rules, dict) or not rules:
        raise DataError(f"{path / 'summary.json'}: key 'rules' is missing or empty")
    for name, rule in rules.items():
        if not isinstance(rule, dict):
            raise DataError(f"{path / 'summary.json'}: rules.{name} must be an object")
    manifest = _read_json(path / "manifest.json", required=False)
    tables = {}
    tdir = path / "tables"
    if tdir.is_dir():
        for csv in sorted(tdir.glob("*.csv")):
            try:
                tables[csv.stem] = pd.read_csv(csv)
            except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
                raise DataError(f"{csv}: not a readable CSV table ({exc.__class__.__name__})") from None
    run = RunFolder(path=path, summary=summary, manifest=manifest, tables=tables)
    run.periods_per_year  # validates
    return run
