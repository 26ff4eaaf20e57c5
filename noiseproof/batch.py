"""Overnight batches: a plan of many studies, resumable after any crash.

A plan (TOML) names a base study file and a grid of values for dotted keys of it; the
product of the grid is the list of studies, each named from its values. Each study's
resampling is split into blocks of draws (the engine fixes the blocks and their seeds);
blocks run on an executor (this process, local worker processes or Dask), every finished
block is written atomically into ``OUT/studies/NAME/blocks/``, and once all blocks of a
study are on disk they are read back, checked, merged in block order and the study is
finished (backtest, ``summary.json``, pack) into ``OUT/studies/NAME/``. Because the merge
always reads the blocks back from disk, an uninterrupted run and a resumed one merge the
very same bytes.

Layout of the output folder::

    OUT/
      batch.lock            PID, host and start time of the batch writing here
      batch.log             timestamped log (appended across resumed runs)
      plan.toml             copy of the plan as last run
      comparison.csv        one row per study and rule (failed studies: one row with the error)
      comparison.html       self-contained comparison page
      studies/NAME/
        study.toml          the effective study file (base study + this study's values)
        batch.json          status of the study: fingerprint, blocks, done | failed, error
        blocks/block-000000.bin ...   finished blocks (checksummed)
        blocks/rejected/    corrupt blocks moved aside on resume (never merged)
        summary.json, manifest.json, tables/, pack/, log.txt   written by the runner

Memory stays bounded: studies are streamed (at most a few are prepared at once), a block's
result is written to disk as soon as it arrives, and only one study's blocks are read back
at a time.
"""
from __future__ import annotations

import copy
import dataclasses
import csv
import datetime as _dt
import errno
import fnmatch
import hashlib
import html
import io
import json
import math
import os
import queue
import re
import socket
import sys
import time
import tomllib
import traceback
from collections import deque
from concurrent.futures import CancelledError, ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Optional, Sequence

from estimators.core import NoiseproofError, SettingsError

from .studyfile import StudySettings, parse_study, read_settings_text

__all__ = [
    "Plan",
    "PlannedStudy",
    "Engine",
    "BatchOutputError",
    "BatchLockedError",
    "CorruptBlockError",
    "BlockStore",
    "BatchLock",
    "BatchOutcome",
    "StudyOutcome",
    "load_plan",
    "parse_plan",
    "study_settings",
    "dumps_toml",
    "default_engine",
    "dry_run",
    "run_batch",
    "EXIT_OK",
    "EXIT_STUDIES_FAILED",
    "EXIT_BAD_INPUT",
    "EXIT_OUTPUT",
]

#: Exit statuses of ``noiseproof batch``.
EXIT_OK = 0                 # every study finished
EXIT_STUDIES_FAILED = 1     # some studies failed (recorded in comparison.csv and the log)
EXIT_BAD_INPUT = 2          # bad plan or options, or the folder is locked by a live batch
EXIT_OUTPUT = 3             # output could not be written (disk full, unwritable): stopped
EXIT_INTERRUPTED = 130

PLAN_KEYS = ("study", "title", "grid", "set", "packs")
NAME_LIMIT = 96
BLOCK_MAGIC = b"noiseproof-block 1\n"
#: Output errors that stop the batch (retrying the next study would hit them again).
_OUTPUT_ERRNOS = {errno.ENOSPC, errno.EDQUOT, errno.EROFS, errno.EACCES, errno.EPERM,
                  errno.ENOTDIR, errno.EEXIST, errno.EISDIR, errno.EIO}


class BatchOutputError(NoiseproofError):
    """The output folder cannot be written (disk full, read-only, not a folder)."""


class BatchLockedError(SettingsError):
    """Another batch (alive) holds the output folder's lock, or the folder needs --resume."""


class CorruptBlockError(Exception):
    """A block file failed its checks (truncated, altered, or from other settings)."""


def _output_error(exc: OSError, what: Path) -> BatchOutputError:
    reason = exc.strerror or exc.__class__.__name__
    return BatchOutputError(
        f"cannot write {what}: {reason}; finished blocks are intact, rerun with --resume "
        f"once the output folder is writable")


# ----------------------------------------------------------------------------- TOML out

_BARE_KEY = re.compile(r"^[A-Za-z0-9_-]+$")


def _toml_key(key: str) -> str:
    return key if _BARE_KEY.fullmatch(key) else _toml_string(key)


def _toml_string(s: str) -> str:
    # JSON string escapes are valid TOML basic-string escapes; TOML also forbids raw DEL.
    return json.dumps(s, ensure_ascii=False).replace("\x7f", "\\u007f")


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        return repr(v)  # 'inf', '-inf', '1e-05', '0.25' are all TOML floats
    if isinstance(v, str):
        return _toml_string(v)
    if isinstance(v, (_dt.datetime, _dt.date, _dt.time)):
        return v.isoformat()
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        if not v:
            return "{}"
        return "{ " + ", ".join(f"{_toml_key(str(k))} = {_toml_value(x)}" for k, x in v.items()) + " }"
    raise SettingsError(f"cannot write {v!r} ({type(v).__name__}) as a TOML value")


def dumps_toml(doc: dict) -> str:
    """Serialise a parsed TOML document (as :mod:`tomllib` returns it) back to TOML text.

    Top-level tables become ``[section]`` headers, top-level arrays of tables become
    ``[[name]]`` entries, anything deeper is written inline. ``tomllib.loads`` of the
    result equals ``doc`` (a test checks it on generated documents).
    """
    lines = []
    tables, arrays = [], []
    for k, v in doc.items():
        if isinstance(v, dict):
            tables.append((k, v))
        elif isinstance(v, list) and v and all(isinstance(x, dict) for x in v):
            arrays.append((k, v))
        else:
            lines.append(f"{_toml_key(str(k))} = {_toml_value(v)}")
    for k, t in tables:
        lines.append("")
        lines.append(f"[{_toml_key(str(k))}]")
        for kk, vv in t.items():
            lines.append(f"{_toml_key(str(kk))} = {_toml_value(vv)}")
    for k, items in arrays:
        for item in items:
            lines.append("")
            lines.append(f"[[{_toml_key(str(k))}]]")
            for kk, vv in item.items():
                lines.append(f"{_toml_key(str(kk))} = {_toml_value(vv)}")
    return "\n".join(lines).lstrip("\n") + "\n"


# ----------------------------------------------------------------------------- the plan

@dataclass(frozen=True)
class PlannedStudy:
    """One study of a plan.

    Attributes
    ----------
    name : str
        Filesystem-safe, deterministic and unique within the plan; built from the values.
    base : Path
        The base study file (resolved).
    values : tuple of (str, object)
        This study's grid values, ``(dotted key, value)`` in grid order (the key ``study``
        stands for the base study file when the plan names several).
    """

    name: str
    base: Path
    values: tuple


@dataclass(frozen=True)
class Plan:
    """A parsed plan file.

    Attributes
    ----------
    path : Path
        The plan file (resolved); relative paths in it are relative to its folder.
    text : str
        The plan file's text (copied into the output folder).
    title : str
        Title of the comparison page (the plan's ``title``, else the file's stem).
    grid_keys : tuple of str
        The grid's dotted keys in file order (``study`` first when several base studies).
    fixed : tuple of (str, object)
        The plan's ``[set]`` overrides, applied to every study before its grid values.
    studies : tuple of PlannedStudy
        The product of the grid, in file order (last key varying fastest).
    packs : str or tuple of str
        ``"all"``, ``"none"``, or glob patterns of study names that get a pack.
    """

    path: Path
    text: str
    title: str
    grid_keys: tuple
    fixed: tuple
    studies: tuple
    packs: Any = "all"


def _split_key(key: str, src: str) -> list:
    """Split a dotted key; double-quoted parts may hold dots (``rules."a.b".target``)."""
    parts, buf, quoted, i = [], "", False, 0
    while i < len(key):
        c = key[i]
        if c == '"':
            quoted = not quoted
        elif c == "." and not quoted:
            parts.append(buf)
            buf = ""
        else:
            buf += c
        i += 1
    parts.append(buf)
    if quoted or any(p == "" for p in parts):
        raise SettingsError(f"{src}: '{key}' is not a valid dotted key")
    return parts


def _apply(doc: dict, key: str, value, src: str) -> None:
    """Set dotted ``key`` to ``value`` in the parsed study document ``doc`` (in place).

    Missing tables are created (so ``backtest.cost_bps`` adds a ``[backtest]`` section);
    inside an array of tables (``[[rules]]``) a part selects an entry by its ``name`` or by
    its 1-based position.
    """
    parts = _split_key(key, src)
    node = doc
    for depth, part in enumerate(parts[:-1]):
        where = ".".join(parts[:depth + 1])
        if isinstance(node, list):
            node = _select_entry(node, part, key, src)
            continue
        if part not in node:
            node[part] = {}
        child = node[part]
        if not isinstance(child, (dict, list)) or (isinstance(child, list) and not all(
                isinstance(x, dict) for x in child)):
            raise SettingsError(f"{src}: key '{key}': '{where}' is a value, not a table")
        node = child
    if isinstance(node, list):
        raise SettingsError(f"{src}: key '{key}' names an entry of an array of tables; "
                            f"set a key inside it (e.g. '{key}.NAME.KEY')")
    node[parts[-1]] = copy.deepcopy(value)


def _select_entry(items: list, part: str, key: str, src: str) -> dict:
    if part.isdigit():
        k = int(part)
        if 1 <= k <= len(items):
            return items[k - 1]
        raise SettingsError(f"{src}: key '{key}': there is no entry {k} (the base study has "
                            f"{len(items)})")
    for item in items:
        if item.get("name") == part:
            return item
    names = ", ".join(str(x.get("name")) for x in items)
    raise SettingsError(f"{src}: key '{key}': no entry named '{part}' (known: {names})")


def _value_label(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float, str)):
        return str(v)
    return json.dumps(v, sort_keys=True, separators=(",", ":"), default=str)


def _safe(s: str) -> str:
    s = re.sub(r"[^A-Za-z0-9._+=-]+", "-", s)
    s = re.sub(r"-{2,}", "-", s).strip("-.")
    return s or "x"


def _safe_value(v) -> str:
    """A value's part of a name: numbers keep their sign, other text loses edge dashes."""
    text = re.sub(r"-{2,}", "-", re.sub(r"[^A-Za-z0-9._+=-]+", "-", _value_label(v)))
    if isinstance(v, (int, float)) and not isinstance(v, bool):
        return text
    return text.strip("-.") or "empty"


def _short_hash(obj) -> str:
    text = json.dumps(obj, sort_keys=True, default=str)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:8]


def _key_labels(keys: Sequence[str], src: str) -> dict:
    """Shortest dotted suffix of each key that tells the keys apart."""
    split = {k: _split_key(k, src) if k != "study" else ["study"] for k in keys}
    depth = {k: 1 for k in keys}
    while True:
        labels = {k: ".".join(split[k][-depth[k]:]) for k in keys}
        seen: dict = {}
        for k, lab in labels.items():
            seen.setdefault(lab, []).append(k)
        clashes = [ks for ks in seen.values() if len(ks) > 1]
        if not clashes:
            return labels
        grown = False
        for ks in clashes:
            for k in ks:
                if depth[k] < len(split[k]):
                    depth[k] += 1
                    grown = True
        if not grown:  # identical keys cannot happen in a TOML table
            return {k: ".".join(split[k]) for k in keys}


def study_names(value_sets: Sequence[tuple], keys: Sequence[str], src: str = "<plan>") -> list:
    """Names for studies from their values: filesystem-safe, deterministic, unique.

    ``label=value`` parts joined by ``__`` in grid order; characters outside
    ``A-Z a-z 0-9 . _ + = -`` become ``-``; names longer than 96 characters are cut and
    given a hash of the full values; names that would clash (also when only letter case
    differs, for case-insensitive file systems) get a hash of their exact values.
    """
    labels = _key_labels(keys, src) if keys else {}
    names = []
    for values in value_sets:
        parts = [f"{labels[k]}={_safe_value(v)}" for k, v in values]
        name = _safe("__".join(parts)) if parts else "study"
        if len(name) > NAME_LIMIT:
            name = name[:NAME_LIMIT].rstrip("-.") + "~" + _short_hash(list(values))
        names.append(name)
    groups: dict = {}
    for i, n in enumerate(names):
        groups.setdefault(n.lower(), []).append(i)
    for idx in groups.values():
        if len(idx) > 1:
            for i in idx:
                names[i] = names[i] + "~" + _short_hash([[k, v] for k, v in value_sets[i]])
    if len({n.lower() for n in names}) != len(names):  # pragma: no cover - hash clash
        raise SettingsError(f"{src}: study names clash; give the grid values distinct spellings")
    return names


def parse_plan(text: str, path: Path) -> Plan:
    """Parse plan text. ``path`` (the plan file) anchors the base study path and names errors.

    Keys: ``study`` (the base study file, or a list of them), ``title``, ``packs``
    (``"all"``, ``"none"`` or a list of glob patterns of study names), ``[grid]``
    (dotted key -> non-empty list of values) and ``[set]`` (dotted key -> one value,
    applied to every study).
    """
    path = Path(path).resolve()
    src = str(path)
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SettingsError(f"{src}: not valid TOML: {exc}") from None
    unknown = [k for k in doc if k not in PLAN_KEYS]
    if unknown:
        raise SettingsError(f"{src}: unknown key{'s' if len(unknown) > 1 else ''} "
                            f"{', '.join(repr(k) for k in unknown)} (known: {', '.join(PLAN_KEYS)})")
    if "study" not in doc:
        raise SettingsError(f"{src}: the plan needs 'study' (the base study file)")
    bases = doc["study"]
    if isinstance(bases, str):
        bases = [bases]
        several = False
    elif isinstance(bases, list) and bases and all(isinstance(b, str) for b in bases):
        several = True
    else:
        raise SettingsError(f"{src}: 'study' must be a file name or a non-empty list of them")
    base_paths = []
    for b in bases:
        p = Path(b)
        p = (p if p.is_absolute() else path.parent / p).resolve()
        if not p.is_file():
            raise SettingsError(f"{src}: study = '{b}': no such file ({p})")
        base_paths.append(p)
    if len(set(base_paths)) != len(base_paths):
        raise SettingsError(f"{src}: 'study' names the same file twice")
    grid = doc.get("grid", {})
    fixed = doc.get("set", {})
    for section, table in (("grid", grid), ("set", fixed)):
        if not isinstance(table, dict):
            raise SettingsError(f"{src}: '{section}' must be a table ([{section}])")
    grid_items = list(_flatten_dotted(grid))
    fixed_items = list(_flatten_dotted(fixed))
    for section, items in (("grid", grid_items), ("set", fixed_items)):
        keys = [".".join(_split_key(k, src)) for k, _ in items]
        dup = sorted({k for k in keys if keys.count(k) > 1})
        if dup:
            raise SettingsError(f"{src}: [{section}] sets {', '.join(dup)} twice")
    for key, values in grid_items:
        if not isinstance(values, list) or not values:
            raise SettingsError(f"{src}: [grid] \"{key}\" must be a non-empty list of values")
        labels = [json.dumps(v, sort_keys=True, default=str) for v in values]
        if len(set(labels)) != len(labels):
            raise SettingsError(f"{src}: [grid] \"{key}\" lists a value twice")
        _split_key(key, src)
    grid_keys = [k for k, _ in grid_items]
    if "study" in grid_keys:
        raise SettingsError(f"{src}: [grid] \"study\": list several base studies in the "
                            f"top-level 'study' key instead")
    both = sorted(set(grid_keys) & {k for k, _ in fixed_items})
    if both:
        raise SettingsError(f"{src}: {', '.join(both)} in both [grid] and [set]")
    for key, _ in fixed_items:
        _split_key(key, src)
    packs = doc.get("packs", "all")
    packs = _check_packs(packs, src)
    title = doc.get("title", path.stem)
    if not isinstance(title, str):
        raise SettingsError(f"{src}: 'title' must be a string")

    dims = [[(k, v) for v in vals] for k, vals in grid_items]
    if several:
        dims.insert(0, [("study", p) for p in base_paths])
    combos = [()]
    for dim in dims:
        combos = [c + (kv,) for c in combos for kv in dim]
    keys = (["study"] if several else []) + grid_keys
    label_sets = [tuple((k, (v.stem if k == "study" else v)) for k, v in c) for c in combos]
    names = study_names(label_sets, keys, src)
    studies = []
    for name, combo in zip(names, combos):
        base = dict(combo).get("study", base_paths[0])
        values = tuple((k, (str(v) if k == "study" else v)) for k, v in combo)
        studies.append(PlannedStudy(name=name, base=base, values=values))
    return Plan(path=path, text=text, title=title, grid_keys=tuple(keys),
                fixed=tuple(fixed_items), studies=tuple(studies), packs=packs)


def _flatten_dotted(table: dict, prefix: str = ""):
    """Yield (dotted key, value) pairs of a ``[grid]`` or ``[set]`` table.

    A quoted top-level key holding dots (``"backtest.cost_bps" = ...``) is a dotted path
    whose value is taken as given, a table included. Bare dotted keys and sub-tables
    (``backtest.cost_bps = ...``, ``[set.backtest]``) are walked into, as TOML itself
    merges them, so a table reached that way is set key by key; a nested key holding a
    dot (a quoted rule name) is quoted in the path.
    """
    for k, v in table.items():
        if not prefix and "." in k:  # a quoted dotted key: the value is taken as given
            yield k, v
            continue
        part = (f'"{k}"' if "." in k else k) if prefix else k
        key = f"{prefix}.{part}" if prefix else part
        if isinstance(v, dict) and v:
            yield from _flatten_dotted(v, key)
        else:
            yield key, v


def _check_packs(packs, src):
    if packs in ("all", "none"):
        return packs
    if isinstance(packs, str):
        return (packs,)
    if isinstance(packs, list) and all(isinstance(p, str) for p in packs):
        return tuple(packs)
    raise SettingsError(f"{src}: 'packs' must be \"all\", \"none\" or a list of study-name patterns")


def load_plan(path) -> Plan:
    """Read and parse a plan file; a missing or unreadable file is a SettingsError."""
    p = Path(path)
    return parse_plan(read_settings_text(p, "plan file"), p)


def wants_pack(name: str, packs) -> bool:
    """Whether study ``name`` gets a pack under the ``packs`` selection."""
    if packs == "all":
        return True
    if packs == "none":
        return False
    return any(fnmatch.fnmatchcase(name, pat) for pat in packs)


def study_settings(plan: Plan, study: PlannedStudy) -> StudySettings:
    """The study's settings: the base study with ``[set]`` and then its grid values applied.

    The effective study text (what ``parse_study`` reads and the manifest records) starts
    with a comment naming the plan, the base study and the values.
    """
    src = f"{plan.path} (study {study.name})"
    try:
        base_text = study.base.read_text(encoding="utf-8")
    except OSError as exc:
        raise SettingsError(f"{study.base}: cannot read the base study ({exc.__class__.__name__})") from None
    try:
        doc = tomllib.loads(base_text)
    except tomllib.TOMLDecodeError as exc:
        raise SettingsError(f"{study.base}: not valid TOML: {exc}") from None
    for key, value in plan.fixed:
        _apply(doc, key, value, src)
    for key, value in study.values:
        if key != "study":
            _apply(doc, key, value, src)
    doc["name"] = study.name
    data = doc.get("data")
    if isinstance(data, dict):  # absolute data paths: the effective study file stands alone
        for key in ("path", "assumptions", "risk_free_path"):
            if isinstance(data.get(key), str) and not Path(data[key]).is_absolute():
                data[key] = str((study.base.parent / data[key]).resolve())
    header = [f"# Study {study.name} of the batch plan {plan.path.name}",
              f"# base study: {study.base}"]
    for key, value in study.values:
        if key != "study":
            header.append(f"# {key} = {_toml_value(value)}")
    text = "\n".join(header) + "\n" + dumps_toml(doc)
    try:
        return parse_study(text, study.base)
    except SettingsError as exc:
        raise SettingsError(f"study {study.name}: {exc}") from None


def _file_sha256(p: Optional[Path]) -> Optional[str]:
    if p is None:
        return None
    h = hashlib.sha256()
    try:
        with open(p, "rb") as f:
            for chunk in iter(lambda: f.read(1 << 20), b""):
                h.update(chunk)
    except OSError:
        return "unreadable"
    return h.hexdigest()


#: Packages whose code computes the blocks: their source is part of every fingerprint.
BLOCK_CODE_PACKAGES = ("simulate", "optimise", "estimators")


def code_digest(packages: Sequence[str] = BLOCK_CODE_PACKAGES) -> str:
    """SHA-256 of the Python sources of ``packages`` (missing packages are skipped).

    Part of each study's fingerprint, so that blocks computed by other code (an upgrade,
    a local edit) are never merged with blocks of this code.
    """
    import importlib.util

    h = hashlib.sha256()
    for name in packages:
        spec = importlib.util.find_spec(name)
        if spec is None or not spec.submodule_search_locations:
            continue
        for folder in spec.submodule_search_locations:
            for p in sorted(Path(folder).rglob("*.py")):
                h.update(str(p.relative_to(folder)).encode("utf-8"))
                h.update(p.read_bytes())
    return h.hexdigest()


def engine_id(engine: "Engine") -> str:
    """The engine's part of a fingerprint: its name and the digest of the block code."""
    return f"{engine.ident}:{code_digest()}"


def fingerprint(settings: StudySettings, engine_id: str = "") -> str:
    """What a study's blocks depend on: its effective text, its data files, the code.

    ``engine_id`` is :func:`engine_id` of the engine. Blocks written under another
    fingerprint are never merged into this study.
    """
    try:
        from importlib.metadata import version

        ver = version("noiseproof")
    except Exception:  # pragma: no cover - not installed
        ver = "unknown"
    d = settings.data
    parts = {
        "text": settings.text,
        "data": [_file_sha256(d.path), _file_sha256(d.assumptions), _file_sha256(d.risk_free_path)],
        "version": ver,
        "engine": engine_id,
    }
    return hashlib.sha256(json.dumps(parts, sort_keys=True).encode("utf-8")).hexdigest()


# ----------------------------------------------------------------------------- the engine

def _result_to_bytes(result) -> bytes:
    return result.to_bytes()


@dataclass(frozen=True)
class Engine:
    """The functions a batch drives. :func:`default_engine` wires the real ones.

    ``run_block`` and ``to_bytes`` travel to worker processes, so they must be
    module-level functions; the rest run in the batch process.

    Attributes
    ----------
    prepare : callable
        ``prepare(settings) -> prepared`` (loads data, estimates the population, builds
        the rules and the resampling spec). Raises the NoiseproofError family.
    spec_of : callable
        ``spec_of(prepared) -> spec or None`` (None: the study does no resampling).
    block_plan : callable
        ``block_plan(spec) -> sequence of blocks`` (fixed by the spec).
    run_block : callable
        ``run_block(spec, index) -> block result`` (pure).
    to_bytes, from_bytes : callable
        Durable, checksummed form of a block result and back; ``from_bytes`` raises on a
        damaged payload.
    merge : callable
        ``merge(spec, results_in_block_order) -> resample result``.
    finish : callable
        ``finish(prepared, resample_result, out, *, quiet, pack, argv, started) -> Path``.
    ident : str
        Part of every study's fingerprint (blocks of another engine are never merged).
    block_cost : callable, optional
        ``block_cost(spec, block) -> seconds``: modelled work of a block on one core. When
        given, consecutive cheap blocks of a study share one task (up to
        :data:`TASK_SECONDS`) unless ``blocks_per_task`` is set.
    """

    prepare: Callable
    spec_of: Callable
    block_plan: Callable
    run_block: Callable
    to_bytes: Callable
    from_bytes: Callable
    merge: Callable
    finish: Callable
    ident: str = "noiseproof"
    block_cost: Optional[Callable] = None


def default_engine() -> Engine:
    """The real engine: :mod:`simulate`'s block API and :mod:`noiseproof.runner`.

    The test hook ``NOISEPROOF_BATCH_ENGINE=module:attribute`` names another engine
    (a stand-in) for the command-line fault tests.
    """
    hook = os.environ.get("NOISEPROOF_BATCH_ENGINE")
    if hook:
        import importlib

        mod, _, attr = hook.partition(":")
        return getattr(importlib.import_module(mod), attr)
    try:
        import simulate
        from . import runner
        block_plan = simulate.block_plan
        run_block = simulate.run_block
        merge_blocks = simulate.merge_blocks
        from_bytes = simulate.BlockResult.from_bytes
        block_cost = simulate.block_seconds
        prepare = runner.prepare_study
        finish = runner.finish_study
    except (ImportError, AttributeError) as exc:
        raise NoiseproofError(f"the resampling engine is not available in this installation "
                              f"({exc})") from None
    return Engine(prepare=prepare, spec_of=_spec_of, block_plan=block_plan, run_block=run_block,
                  to_bytes=_result_to_bytes, from_bytes=from_bytes, merge=merge_blocks,
                  finish=finish, ident="simulate", block_cost=block_cost)


def _spec_of(prepared):
    for name in ("spec", "resample_spec", "resample"):
        if hasattr(prepared, name):
            return getattr(prepared, name)
    raise AttributeError("PreparedStudy has no resampling spec attribute")


# ----------------------------------------------------------------------------- durable files

def _fsync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:  # pragma: no cover - platforms without directory fds
        return
    try:
        os.fsync(fd)
    except OSError:  # pragma: no cover
        pass
    finally:
        os.close(fd)


def atomic_write(path: Path, data: bytes, *, sync_folder: bool = True) -> None:
    """Write ``data`` to ``path`` atomically: temporary file, fsync, rename, fsync folder.

    A crash leaves either the old file or the new one, never a mix; a failure (disk full)
    removes the temporary file and raises the OSError. ``sync_folder=False`` leaves the
    folder's fsync to the caller (one fsync after several renames into the same folder).
    """
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    try:
        with open(tmp, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            tmp.unlink()
        except OSError:
            pass
        raise
    if sync_folder:
        _fsync_dir(path.parent)


class BlockStore:
    """Finished blocks of one study, one checksummed file each.

    A file is ``BLOCK_MAGIC``, one JSON header line (study fingerprint, block index, payload
    size and SHA-256), then the engine's payload. :meth:`read` rejects a file that is
    truncated, altered or written for other settings; the engine's own checksum is checked
    by the caller through ``from_bytes``.
    """

    def __init__(self, folder: Path, study_fingerprint: str):
        self.folder = Path(folder)
        self.fingerprint = study_fingerprint

    def path(self, index: int) -> Path:
        return self.folder / f"block-{index:06d}.bin"

    def write(self, index: int, payload: bytes, *, sync_folder: bool = True) -> None:
        """Write block ``index`` atomically (raises OSError on failure).

        ``sync_folder=False`` skips the folder's fsync (the caller syncs once after a run
        of blocks, see :meth:`sync`).
        """
        header = {"study": self.fingerprint, "index": int(index), "size": len(payload),
                  "sha256": hashlib.sha256(payload).hexdigest()}
        data = BLOCK_MAGIC + json.dumps(header, sort_keys=True).encode("ascii") + b"\n" + payload
        self.folder.mkdir(parents=True, exist_ok=True)
        atomic_write(self.path(index), data, sync_folder=sync_folder)

    def sync(self) -> None:
        """fsync the block folder (makes the renames of the blocks written so far durable)."""
        _fsync_dir(self.folder)

    def read(self, index: int) -> bytes:
        """The payload of block ``index``; CorruptBlockError says what is wrong with it."""
        p = self.path(index)
        try:
            data = p.read_bytes()
        except FileNotFoundError:
            raise CorruptBlockError("missing") from None
        except OSError as exc:
            raise CorruptBlockError(f"unreadable ({exc.strerror})") from None
        if not data.startswith(BLOCK_MAGIC):
            raise CorruptBlockError("not a block file (bad header)")
        rest = data[len(BLOCK_MAGIC):]
        line, sep, payload = rest.partition(b"\n")
        if not sep:
            raise CorruptBlockError("truncated header")
        try:
            header = json.loads(line.decode("ascii"))
        except (UnicodeDecodeError, ValueError):
            raise CorruptBlockError("damaged header") from None
        if header.get("study") != self.fingerprint:
            raise CorruptBlockError("written for other settings")
        if header.get("index") != index:
            raise CorruptBlockError(f"holds block {header.get('index')}, not {index}")
        if len(payload) != header.get("size"):
            raise CorruptBlockError(f"truncated ({len(payload)} of {header.get('size')} bytes)")
        if hashlib.sha256(payload).hexdigest() != header.get("sha256"):
            raise CorruptBlockError("checksum mismatch")
        return payload

    def present(self) -> list:
        """Indices of the block files present (whatever their state)."""
        out = []
        if self.folder.is_dir():
            for p in self.folder.glob("block-*.bin"):
                try:
                    out.append(int(p.stem.split("-")[1]))
                except (IndexError, ValueError):
                    continue
        return sorted(out)

    def reject(self, index: int, reason: str) -> Path:
        """Move a bad block file aside into ``blocks/rejected/`` (kept for inspection)."""
        dest_dir = self.folder / "rejected"
        dest_dir.mkdir(parents=True, exist_ok=True)
        stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%S%fZ")
        dest = dest_dir / f"block-{index:06d}.{stamp}.bin"
        os.replace(self.path(index), dest)
        return dest

    def clean_temporaries(self) -> int:
        """Remove temporary files left by a crash mid-write; returns how many."""
        n = 0
        if self.folder.is_dir():
            for p in self.folder.glob(".block-*.tmp-*"):
                try:
                    p.unlink()
                    n += 1
                except OSError:
                    pass
        return n


# ----------------------------------------------------------------------------- the lock

def _process_start_ticks(pid: int) -> Optional[int]:
    """Start time of process ``pid`` in clock ticks since boot (Linux), else None."""
    try:
        with open(f"/proc/{pid}/stat", "rb") as f:
            stat = f.read().decode("ascii", "replace")
        return int(stat.rsplit(")", 1)[1].split()[19])
    except (OSError, ValueError, IndexError):
        return None


def _pid_alive(pid: int, start_ticks: Optional[int]) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    except OSError:  # pragma: no cover
        return False
    if start_ticks is not None:
        now = _process_start_ticks(pid)
        if now is not None and now != start_ticks:
            return False  # the PID was reused by another process
    return True


class BatchLock:
    """``OUT/batch.lock``: one batch writes into an output folder at a time.

    The file records the holder's PID, host, process start time and the time the batch
    started. While the batch runs it also holds an exclusive ``flock`` on the file, which
    the kernel drops when the process dies. A lock whose process is gone (no flock held,
    and on this host no live process with that PID and start time) is stale: ``--resume``
    takes it over and says so; without ``--resume`` the folder is refused.
    """

    def __init__(self, out: Path):
        self.path = Path(out) / "batch.lock"
        self._fd: Optional[int] = None
        self.took_over: Optional[dict] = None

    def acquire(self, *, resume: bool) -> "BatchLock":
        try:
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as exc:
            raise _output_error(exc, self.path) from None
        try:
            self._acquire_fd(fd, resume)
        except BaseException:
            os.close(fd)
            raise
        self._fd = fd
        return self

    def _acquire_fd(self, fd: int, resume: bool) -> None:
        import fcntl

        held_elsewhere = False
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            held_elsewhere = True
        except OSError:  # file systems without flock: PID liveness alone decides
            pass
        raw = os.pread(fd, 65536, 0)
        info = None
        if raw.strip():
            try:
                info = json.loads(raw.decode("utf-8"))
            except (UnicodeDecodeError, ValueError):
                info = {"pid": None, "host": "?", "started": "?"}
        who = (f"PID {info.get('pid')} on {info.get('host')} since {info.get('started')}"
               if info else "another process")
        if held_elsewhere:
            raise BatchLockedError(f"{self.path.parent}: another batch is writing here ({who}); "
                                   f"wait for it or use another --out")
        if info:
            host = info.get("host")
            pid = info.get("pid")
            if host != socket.gethostname():
                raise BatchLockedError(
                    f"{self.path}: held by {who}, which this host cannot check; if that batch "
                    f"has ended, delete the lock file and rerun with --resume")
            if isinstance(pid, int) and pid != os.getpid() and _pid_alive(pid, info.get("start_ticks")):
                raise BatchLockedError(f"{self.path.parent}: another batch is writing here ({who})")
            if not resume:
                raise BatchLockedError(
                    f"{self.path.parent}: a batch ({who}) stopped without finishing; "
                    f"rerun with --resume to continue it")
            self.took_over = info
        now = _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat()
        mine = {"pid": os.getpid(), "host": socket.gethostname(), "started": now,
                "start_ticks": _process_start_ticks(os.getpid())}
        data = json.dumps(mine).encode("utf-8")
        try:
            os.ftruncate(fd, 0)
            os.pwrite(fd, data, 0)
            os.fsync(fd)
        except OSError as exc:
            raise _output_error(exc, self.path) from None

    def release(self) -> None:
        if self._fd is None:
            return
        try:
            self.path.unlink()
        except OSError:
            pass
        os.close(self._fd)  # closing drops the flock
        self._fd = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.release()


# ----------------------------------------------------------------------------- the log

class BatchLog:
    """``OUT/batch.log``: one timestamped line per event, appended across resumed runs."""

    def __init__(self, path: Path):
        self.path = Path(path)
        try:
            self._f = open(self.path, "a", encoding="utf-8", buffering=1)
        except OSError as exc:
            raise _output_error(exc, self.path) from None
        self.broken = False

    def write(self, message: str) -> None:
        stamp = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="milliseconds")
        stamp = stamp.replace("+00:00", "Z")
        for i, line in enumerate(str(message).splitlines() or [""]):
            try:
                self._f.write(f"{stamp}  {'' if i == 0 else '    '}{line}\n")
            except OSError:  # disk full: the batch reports the failure elsewhere
                self.broken = True
                return

    def close(self) -> None:
        try:
            self._f.close()
        except OSError:
            pass


# ----------------------------------------------------------------------------- outcomes

@dataclass(frozen=True)
class StudyOutcome:
    """What happened to one study of a batch.

    ``status`` is ``"done"``, ``"failed"`` or ``"not run"`` (batch stopped before it).
    ``blocks`` is the study's block count; ``computed`` how many were computed in this run
    (the others were reused from disk); ``rejected`` how many block files failed their
    checks and were recomputed.
    """

    name: str
    status: str
    error: Optional[str] = None
    blocks: int = 0
    computed: int = 0
    rejected: int = 0
    folder: Optional[Path] = None


@dataclass(frozen=True)
class BatchOutcome:
    """The result of :func:`run_batch`."""

    out: Path
    studies: tuple
    comparison_csv: Optional[Path]
    comparison_html: Optional[Path]
    seconds: float
    executor: str

    @property
    def failed(self) -> tuple:
        return tuple(s for s in self.studies if s.status != "done")

    @property
    def exit_status(self) -> int:
        return EXIT_OK if not self.failed else EXIT_STUDIES_FAILED


# ----------------------------------------------------------------------------- dry run

@dataclass(frozen=True)
class DryRunRow:
    """One line of ``--dry-run``: a study, its size and whether it can run.

    ``seconds`` is a rough single-core estimate of the study's resampling (None without
    calibration): up to 8 blocks of the first ready study, spread evenly over its block
    plan, are timed; other studies are scaled by their work, the sum over blocks of
    draws x rows x rules x assets^2. Backtests and packs come on top.
    """

    name: str
    status: str                 # "ready", "done" (resume would skip it), "error"
    error: Optional[str]
    blocks: int
    draws: int                  # draws over all the study's blocks (main, sweep, checks)
    length: Optional[int]
    assets: Optional[int]
    rules: int
    seconds: Optional[float] = None


def _block_draws(block) -> int:
    start, stop = getattr(block, "start", None), getattr(block, "stop", None)
    return int(stop - start) if start is not None and stop is not None else 0


def _spec_numbers(spec, settings: StudySettings) -> tuple:
    draws = getattr(spec, "draws", None) or (settings.resample.draws if settings.resample else 0)
    length = getattr(spec, "length", None) or (settings.resample.length if settings.resample else None)
    assets = getattr(spec, "assets", None)
    n = len(assets) if assets is not None else None
    rules = len(getattr(spec, "rules", ()) or ()) or (len(settings.rules) + 1)
    return int(draws or 0), length, n, rules


def _time_once(engine: Engine, spec, index: int) -> float:
    t = time.perf_counter()
    engine.run_block(spec, index)
    return time.perf_counter() - t


def _time_block(engine: Engine, spec, index: int) -> float:
    best = math.inf
    for _ in range(2):  # the faster of two: a cold compile cache does not count
        t = time.perf_counter()
        engine.run_block(spec, index)
        best = min(best, time.perf_counter() - t)
    return best


def dry_run(plan: Plan, *, out: Optional[Path] = None, engine: Optional[Engine] = None,
            calibrate: bool = False) -> list:
    """Prepare every study (checking its settings and data) without running the batch.

    Parameters
    ----------
    plan : Plan
    out : Path, optional
        An existing batch folder: studies a ``--resume`` would skip are marked ``done``.
    engine : Engine, optional
    calibrate : bool
        Time up to 8 blocks of the first ready study to estimate each study's seconds.

    Returns
    -------
    list of DryRunRow
    """
    engine = engine or default_engine()
    ident = engine_id(engine)
    found = []
    model = None  # (seconds, work) of the first ready study
    for st in plan.studies:
        try:
            settings = study_settings(plan, st)
            fp = fingerprint(settings, ident)
            prepared = engine.prepare(settings)
            spec = engine.spec_of(prepared)
            blocks = list(engine.block_plan(spec)) if spec is not None else []
        except NoiseproofError as exc:
            found.append((DryRunRow(st.name, "error", _one_line(exc), 0, 0, None, None, 0), None))
            continue
        if spec is not None:
            draws, length, n, rules = _spec_numbers(spec, settings)
        else:
            draws, length, n, rules = 0, None, None, len(settings.rules) + 1
        status = "ready"
        if out is not None and _study_done(Path(out) / "studies" / st.name, fp):
            status = "done"
        sizes = [(_block_draws(b), getattr(b, "length", None) or length or 0) for b in blocks]
        weight = rules * (n or 0) ** 2
        row = DryRunRow(st.name, status, None, len(blocks), sum(d for d, _ in sizes) or draws,
                        length, n, rules)
        found.append((row, (sizes, weight)))
        if calibrate and model is None and status == "ready" and blocks and weight > 0:
            # time up to 8 blocks spread evenly over the plan (block costs differ: some
            # parts carry extra work), block 0 twice so that compiling does not count
            k = min(8, len(blocks))
            sample = sorted({round(j * (len(blocks) - 1) / max(k - 1, 1)) for j in range(k)})
            spent = 0.0
            for i in sample:
                spent += _time_block(engine, spec, i) if i == 0 else _time_once(engine, spec, i)
            per_block = spent / len(sample)
            model = (per_block * len(blocks), sum(d * t for d, t in sizes) * weight)
        del prepared, spec
    rows = []
    for row, info in found:
        if model is not None and info is not None and row.status != "error":
            sizes, weight = info
            seconds0, work0 = model
            work = sum(d * t for d, t in sizes) * weight
            row = dataclasses.replace(row, seconds=seconds0 * work / work0)
        rows.append(row)
    return rows


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return text or exc.__class__.__name__


def _study_done(folder: Path, fp: str) -> bool:
    try:
        rec = json.loads((folder / "batch.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return (rec.get("status") == "done" and rec.get("fingerprint") == fp
            and (folder / "summary.json").is_file())


# ----------------------------------------------------------------------------- the run

class _Study:
    """Book-keeping of one study while its blocks are in flight (batch process only)."""

    def __init__(self, planned: PlannedStudy, position: int):
        self.planned = planned
        self.name = planned.name
        self.position = position
        self.folder: Optional[Path] = None
        self.settings: Optional[StudySettings] = None
        self.fp = ""
        self.prepared = None
        self.spec = None
        self.ref = None
        self.store: Optional[BlockStore] = None
        self.n_blocks = 0
        self.todo: deque = deque()
        self.costs: Optional[list] = None      # modelled seconds per block (task grouping)
        self.on_disk: set = set()
        self.inflight = 0
        self.computed = 0
        self.rejected = 0
        self.attempts: dict = {}
        self.failed = False
        self.started = time.perf_counter()


@dataclass
class _Progress:
    """Progress across the plan: a tqdm bar on a terminal, nothing otherwise."""

    quiet: bool
    studies_total: int
    bar: Any = None
    studies_done: int = 0
    studies_failed: int = 0

    def start(self, blocks_total: int, already: int) -> None:
        self.blocks_known = blocks_total
        if self.quiet or not sys.stderr.isatty():
            return
        from tqdm import tqdm

        self.bar = tqdm(total=blocks_total, initial=already, unit="block", dynamic_ncols=True,
                        desc="batch", leave=True)
        self._postfix()

    def _postfix(self) -> None:
        if self.bar is not None:
            extra = f", {self.studies_failed} failed" if self.studies_failed else ""
            self.bar.set_postfix_str(f"studies {self.studies_done}/{self.studies_total}{extra}")

    blocks_known: int = 0
    studies_unactivated: int = 0
    activated_blocks: int = 0
    activated_studies: int = 0

    def plan(self, studies_to_run: int) -> None:
        self.studies_unactivated = studies_to_run

    def activated(self, n_blocks: int, on_disk: int) -> None:
        """A study was prepared: its block count is known; re-estimate the plan's total."""
        self.studies_unactivated = max(0, self.studies_unactivated - 1)
        self.activated_blocks += n_blocks
        self.activated_studies += 1
        if self.bar is not None:
            mean = self.activated_blocks / self.activated_studies
            self.bar.total = (self.blocks_known + self.activated_blocks
                              + int(round(mean * self.studies_unactivated)))
            self.bar.update(on_disk)

    def block(self, n: int = 1) -> None:
        if self.bar is not None:
            self.bar.update(n)

    def study(self, failed: bool = False) -> None:
        self.studies_done += not failed
        self.studies_failed += bool(failed)
        self._postfix()

    def say(self, message: str, only_without_bar: bool = False) -> None:
        if self.quiet or (only_without_bar and self.bar is not None):
            return
        if self.bar is not None:
            self.bar.write(message, file=sys.stderr)
        else:
            print(message, file=sys.stderr, flush=True)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()
            self.bar = None


def _write_record(folder: Path, record: dict) -> None:
    data = (json.dumps(record, indent=2, sort_keys=True, default=str) + "\n").encode("utf-8")
    try:
        atomic_write(folder / "batch.json", data)
    except OSError as exc:
        raise _output_error(exc, folder / "batch.json") from None


#: Modelled seconds of work (on one core) up to which consecutive blocks of a study share
#: one task when the engine models block costs (``Engine.block_cost``). Each task costs the
#: batch a round trip to a worker: about 1-1.5 ms CPU with local worker processes, about
#: 7 ms on a local Dask cluster (4 in the batch process, which hosts the scheduler, and 3 in
#: the worker; measured with 400 empty tasks), against blocks of a few milliseconds in
#: the cheap parts of a study (the draws after the frontier ones, the self-check). A fixed
#: number of blocks per task balances worse, because the frontier blocks cost tens of
#: times the others: an 8-study, 30-asset plan on a 2-worker Dask cluster took 18.2 s with
#: 1 block per task, 21.8 s with 2 and 25.2 s with 4 (local processes: 21.1 s).
TASK_SECONDS = 0.25


def _next_task(todo: deque, blocks_per_task: int, costs: Optional[list]) -> list:
    """Pop the block indices of the next task from the front of ``todo``: consecutive
    indices, at most ``blocks_per_task`` of them, or, given ``costs``, as many as fit in
    :data:`TASK_SECONDS` of modelled work (always at least one)."""
    idx: list = []
    work = 0.0
    while todo and (not idx or todo[0] == idx[-1] + 1):
        if costs is None:
            if len(idx) >= blocks_per_task:
                break
        else:
            c = costs[todo[0]]
            if idx and work + c > TASK_SECONDS:
                break
            work += c
        idx.append(todo.popleft())
    return idx


def run_batch(plan: Plan, out, *, executor=None, engine: Optional[Engine] = None,
              resume: bool = False, quiet: bool = False, pack: bool = True,
              packs=None, blocks_per_task: Optional[int] = None, argv=None,
              max_attempts: int = 3) -> BatchOutcome:
    """Run every study of ``plan`` into ``out``; see the module docstring for the layout.

    Parameters
    ----------
    plan : Plan
        The parsed plan.
    out : path
        The batch's output folder (created). Without ``resume`` it must be empty or new.
    executor : InlineExecutor, ProcessExecutor or DaskExecutor, optional
        Where blocks run (default: this process). The caller closes it.
    engine : Engine, optional
        Default :func:`default_engine`.
    resume : bool
        Continue a batch in ``out``: finished studies and finished blocks are skipped,
        corrupt block files are moved aside and recomputed, a stale lock is taken over.
    quiet : bool
        No progress display and no messages on stderr (the log is still written).
    pack : bool
        False skips every study's pack (``--no-pack``).
    packs : "all", "none" or sequence of glob patterns, optional
        Which studies get a pack (default: the plan's ``packs``).
    blocks_per_task : int, optional
        Blocks grouped into one task (fewer, larger tasks: less scheduler overhead per
        block, coarser durable progress). Results do not depend on it. Default: when the
        engine models block costs, consecutive blocks of a study share a task up to
        :data:`TASK_SECONDS` of modelled work (a block that holds more goes alone);
        otherwise one block per task.
    argv : list of str, optional
        The command line, recorded in each study's manifest.
    max_attempts : int
        A block whose local worker process dies this many times fails its study.

    Returns
    -------
    BatchOutcome

    Raises
    ------
    BatchLockedError, SettingsError
        The folder is in use or needs ``--resume``; bad options.
    BatchOutputError
        The output folder cannot be written (disk full, unwritable). The batch stops;
        every finished block on disk is intact and ``--resume`` continues.
    """
    from .executors import InlineExecutor, run_blocks_task, is_worker_lost

    t0 = time.time()
    out = Path(out)
    engine = engine or default_engine()
    executor = executor or InlineExecutor()
    packs = plan.packs if packs is None else packs
    by_cost = blocks_per_task is None and engine.block_cost is not None
    if blocks_per_task is None:
        blocks_per_task = 1
    if blocks_per_task < 1:
        raise SettingsError(f"--blocks-per-task must be at least 1, not {blocks_per_task}")
    delay = float(os.environ.get("NOISEPROOF_BATCH_BLOCK_DELAY", "0") or 0)

    _prepare_out(out, resume)
    lock = BatchLock(out).acquire(resume=resume)
    log = None
    progress = _Progress(quiet=quiet, studies_total=len(plan.studies))
    finisher = ThreadPoolExecutor(max_workers=1, thread_name_prefix="noiseproof-finish")
    events: "queue.Queue" = queue.Queue()
    inflight: dict = {}
    finishing: dict = {}
    outcomes: dict = {}
    try:
        log = BatchLog(out / "batch.log")
        if lock.took_over:
            info = lock.took_over
            msg = (f"took over a stale lock left by PID {info.get('pid')} on {info.get('host')} "
                   f"(started {info.get('started')}); that process is gone")
            log.write(msg)
            progress.say(f"noiseproof: {msg}")
        log.write(f"batch {'resumed' if resume else 'started'}: plan {plan.path}, "
                  f"{len(plan.studies)} studies, {executor.describe()}, PID {os.getpid()}")
        try:
            atomic_write(out / "plan.toml", plan.text.encode("utf-8"))
            (out / "studies").mkdir(exist_ok=True)
        except OSError as exc:
            raise _output_error(exc, out / "plan.toml") from None

        # Pass 1: settings, fingerprints, skip finished studies, count blocks for progress.
        ident = engine_id(engine)
        pending: deque = deque()
        blocks_total = blocks_already = 0
        for pos, planned in enumerate(plan.studies):
            st = _Study(planned, pos)
            st.folder = out / "studies" / planned.name
            try:
                st.settings = study_settings(plan, planned)
                st.fp = fingerprint(st.settings, ident)
            except NoiseproofError as exc:
                _fail(st, exc, log, progress, outcomes)
                continue
            if resume and _study_done(st.folder, st.fp):
                rec = json.loads((st.folder / "batch.json").read_text(encoding="utf-8"))
                outcomes[st.name] = StudyOutcome(st.name, "done", None, rec.get("blocks", 0),
                                                 0, 0, st.folder)
                blocks_total += rec.get("blocks", 0)
                blocks_already += rec.get("blocks", 0)
                progress.study()
                log.write(f"study {st.name}: finished in an earlier run, skipped")
                continue
            pending.append(st)
        progress.plan(len(pending))
        progress.start(blocks_total, blocks_already)

        # about 4 tasks per worker slot in flight: the batch thread writes each result
        # (fsync) before it submits again, and short blocks must not leave workers idle
        slots = int(getattr(executor, "slots", 1))
        window = max(2, 4 * slots)
        study_cap = max(4, 2 * slots)     # studies prepared at once (memory bound)
        active: list = []

        def activate(st: _Study) -> None:
            """Prepare a study, check its blocks on disk, queue the missing ones."""
            try:
                st.folder.mkdir(parents=True, exist_ok=True)
                atomic_write(st.folder / "study.toml", st.settings.text.encode("utf-8"))
            except OSError as exc:
                raise _output_error(exc, st.folder) from None
            _restore_parked_blocks(st.folder)
            st.started = time.perf_counter()
            # the manifest then points at the effective study file, which stands alone
            st.settings = dataclasses.replace(st.settings, path=st.folder / "study.toml")
            st.prepared = engine.prepare(st.settings)
            st.spec = engine.spec_of(st.prepared)
            blocks = list(engine.block_plan(st.spec)) if st.spec is not None else []
            st.n_blocks = len(blocks)
            if by_cost:
                st.costs = [float(engine.block_cost(st.spec, b)) for b in blocks]
            st.store = BlockStore(st.folder / "blocks", st.fp)
            if resume:
                _scan_store(st, engine, log, progress)
            st.todo = deque(i for i in range(st.n_blocks) if i not in st.on_disk)
            progress.activated(st.n_blocks, len(st.on_disk))
            _write_record(st.folder, _record(st, "running", plan.fixed))
            log.write(f"study {st.name}: {st.n_blocks} blocks, {len(st.on_disk)} already on "
                      f"disk, {len(st.todo)} to compute")
            if st.todo:
                st.ref = executor.share(st.spec, key=st.fp[:16])

        def start_finish(st: _Study) -> None:
            """All blocks are on disk: read them back (checked), merge and finish in a thread."""
            results = []
            for i in range(st.n_blocks):
                try:
                    results.append(engine.from_bytes(st.store.read(i)))
                except Exception as exc:  # corrupt since written: move aside, recompute
                    reason = str(exc) if isinstance(exc, CorruptBlockError) else f"engine check failed ({_one_line(exc)})"
                    _reject(st, i, reason, log, progress)
                    st.todo.append(i)
            if st.todo:
                results.clear()
                if st.ref is None:
                    st.ref = executor.share(st.spec, key=st.fp[:16])
                return
            if st.ref is not None:
                executor.unshare(st.ref)
                st.ref = None
            do_pack = bool(pack) and wants_pack(st.name, packs)
            fut = finisher.submit(_finish_study, engine, st.prepared, st.spec, results, st.folder,
                                  do_pack, argv, st.started)
            finishing[fut] = st
            fut.add_done_callback(events.put)

        def submit_next() -> bool:
            for st in active:
                if st.todo and not st.failed:
                    idx = _next_task(st.todo, blocks_per_task, st.costs)
                    fut = executor.submit(run_blocks_task, engine.run_block, engine.to_bytes,
                                          st.ref, tuple(idx), delay,
                                          key=f"{st.fp[:12]}-{idx[0]}")
                    inflight[fut] = (st, tuple(idx))
                    st.inflight += 1
                    fut.add_done_callback(events.put)
                    return True
            return False

        while True:
            # Keep the executor fed, activating studies in plan order; bound the studies
            # held in memory (being computed or waiting to be finished).
            while len(inflight) < window:
                if submit_next():
                    continue
                if not pending or len(active) >= study_cap:
                    break
                st = pending.popleft()
                try:
                    activate(st)
                except NoiseproofError as exc:
                    if isinstance(exc, BatchOutputError):
                        raise
                    _fail(st, exc, log, progress, outcomes)
                    continue
                except Exception as exc:  # a bug: record it with its traceback, go on
                    _fail(st, exc, log, progress, outcomes, tb=traceback.format_exc())
                    continue
                active.append(st)
                if not st.todo:
                    start_finish(st)
            if not inflight and not finishing and not pending and not any(s.todo for s in active):
                break
            try:
                fut = events.get(timeout=0.5)
            except queue.Empty:
                if progress.bar is not None:
                    progress.bar.refresh()
                for f in list(inflight) + list(finishing):  # safety net for lost callbacks
                    if f.done():
                        events.put(f)
                continue
            if fut in inflight:
                st, idx = inflight.pop(fut)
                st.inflight -= 1
                if st.failed:
                    continue
                try:
                    payloads = fut.result()
                except NoiseproofError as exc:
                    _fail(st, exc, log, progress, outcomes)
                    _cancel_study(st, inflight, executor)
                    active.remove(st)
                    continue
                except Exception as exc:
                    if is_worker_lost(exc):
                        _worker_lost(st, idx, fut, inflight, executor, log, progress,
                                     max_attempts, outcomes, active)
                        continue
                    if isinstance(exc, CancelledError):  # cancelled by a pool restart
                        for i in reversed(idx):
                            st.todo.appendleft(i)
                        continue
                    _fail(st, exc, log, progress, outcomes, tb=_remote_traceback(exc))
                    _cancel_study(st, inflight, executor)
                    active.remove(st)
                    continue
                for k, (i, payload) in enumerate(zip(idx, payloads)):
                    try:  # one folder fsync per task, after its last block
                        st.store.write(i, payload, sync_folder=k == len(idx) - 1)
                    except OSError as exc:
                        raise _output_error(exc, st.store.path(i)) from None
                    st.on_disk.add(i)
                    st.computed += 1
                    progress.block()
                del payloads
                if len(st.on_disk) == st.n_blocks and st.inflight == 0 and not st.todo:
                    start_finish(st)
            elif fut in finishing:
                st = finishing.pop(fut)
                active.remove(st)
                try:
                    folder = fut.result()
                except BatchOutputError:
                    raise
                except OSError as exc:
                    if exc.errno in _OUTPUT_ERRNOS:
                        raise _output_error(exc, Path(exc.filename or st.folder)) from None
                    _fail(st, exc, log, progress, outcomes, tb=traceback.format_exc())
                    continue
                except NoiseproofError as exc:
                    _fail(st, exc, log, progress, outcomes)
                    continue
                except Exception as exc:
                    _fail(st, exc, log, progress, outcomes,
                          tb="".join(traceback.format_exception(exc)))
                    continue
                _write_record(st.folder, _record(st, "done", plan.fixed))
                outcomes[st.name] = StudyOutcome(st.name, "done", None, st.n_blocks, st.computed,
                                                 st.rejected, Path(folder))
                progress.study()
                progress.say(f"noiseproof: study {st.name} done "
                             f"({progress.studies_done + progress.studies_failed}/{len(plan.studies)})",
                             only_without_bar=True)
                log.write(f"study {st.name}: done ({st.computed} blocks computed, "
                          f"{st.n_blocks - st.computed} reused, {st.rejected} rejected) "
                          f"in {time.perf_counter() - st.started:.1f} s")
                st.prepared = st.spec = None

        progress.close()
        studies = tuple(outcomes.get(p.name) or StudyOutcome(p.name, "not run")
                        for p in plan.studies)
        csv_path, html_path = write_comparison(plan, out, studies)
        seconds = time.time() - t0
        n_failed = sum(1 for s in studies if s.status != "done")
        log.write(f"batch finished in {seconds:.1f} s: {len(studies) - n_failed} studies done, "
                  f"{n_failed} failed; comparison in {csv_path.name} and {html_path.name}")
        return BatchOutcome(out, studies, csv_path, html_path, seconds, executor.describe())
    except BaseException as exc:
        progress.close()
        for fut in list(inflight):
            try:
                fut.cancel()
            except Exception:  # pragma: no cover
                pass
        if log is not None:
            if isinstance(exc, KeyboardInterrupt):
                log.write("batch interrupted; finished blocks are on disk, --resume continues")
            elif isinstance(exc, NoiseproofError):
                log.write(f"batch stopped: {_one_line(exc)}")
            else:
                log.write("batch stopped by an internal error:\n" + traceback.format_exc())
        raise
    finally:
        finisher.shutdown(wait=True, cancel_futures=True)
        if log is not None:
            log.close()
        lock.release()


def _prepare_out(out: Path, resume: bool) -> None:
    """Create ``out``; refuse a non-empty folder unless resuming a batch."""
    if out.exists() and not out.is_dir():
        raise BatchOutputError(f"cannot write {out}: it is a file, not a folder")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise _output_error(exc, out) from None
    if not os.access(out, os.W_OK | os.X_OK):
        raise BatchOutputError(f"cannot write {out}: permission denied")
    if not resume:
        entries = [p.name for p in out.iterdir()]
        if entries:
            raise BatchLockedError(
                f"{out} is not empty; use --resume to continue the batch in it, or another --out")


def _scan_store(st: _Study, engine: Engine, log: BatchLog, progress: _Progress) -> None:
    """Resume: keep the block files that pass every check, move the others aside."""
    removed = st.store.clean_temporaries()
    if removed:
        log.write(f"study {st.name}: removed {removed} temporary file(s) left mid-write")
    foreign = []
    for i in st.store.present():
        if i >= st.n_blocks:
            _reject(st, i, f"block {i} is beyond this study's {st.n_blocks} blocks", log, progress)
            continue
        try:
            engine.from_bytes(st.store.read(i))
        except CorruptBlockError as exc:
            if str(exc) == "written for other settings":
                foreign.append(i)
                continue
            _reject(st, i, str(exc), log, progress)
            continue
        except Exception as exc:
            _reject(st, i, f"engine check failed ({_one_line(exc)})", log, progress)
            continue
        st.on_disk.add(i)
    if foreign:  # one message for the lot: the study's settings, data or code changed
        for i in foreign:
            _reject(st, i, "written for other settings", log, progress, quiet=True)
        msg = (f"study {st.name}: {len(foreign)} block(s) were written for other settings (the "
               f"study, its data or the code changed since); moved to blocks/rejected/, "
               f"recomputing")
        log.write(msg)
        progress.say(f"noiseproof: {msg}")


def _reject(st: _Study, i: int, reason: str, log: BatchLog, progress: _Progress,
            quiet: bool = False) -> None:
    try:
        dest = st.store.reject(i, reason)
    except OSError as exc:
        raise _output_error(exc, st.store.path(i)) from None
    st.rejected += 1
    st.on_disk.discard(i)
    if quiet:
        return
    msg = (f"study {st.name}: block {i} rejected ({reason}); moved to "
           f"{dest.relative_to(st.folder)}, recomputing")
    log.write(msg)
    progress.say(f"noiseproof: {msg}")


def _record(st: _Study, status: str, fixed: tuple, error: Optional[str] = None) -> dict:
    return {
        "name": st.name,
        "status": status,
        "error": error,
        "fingerprint": st.fp,
        "base_study": str(st.planned.base),
        "values": {k: v for k, v in st.planned.values},
        "set": {k: v for k, v in fixed},
        "blocks": st.n_blocks,
        "updated": _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat(),
    }


def _fail(st: _Study, exc: BaseException, log: BatchLog, progress: _Progress, outcomes: dict,
          tb: Optional[str] = None) -> None:
    st.failed = True
    if isinstance(exc, NoiseproofError):
        error = _one_line(exc)
    elif exc.__class__.__name__ == "KilledWorker":
        error = ("Dask workers died repeatedly while computing this study's blocks "
                 "(out of memory?)")
    else:
        error = f"internal error: {exc.__class__.__name__}: {_one_line(exc)}"
    outcomes[st.name] = StudyOutcome(st.name, "failed", error, st.n_blocks, st.computed,
                                     st.rejected, st.folder)
    log.write(f"study {st.name}: FAILED: {error}" + (f"\n{tb.rstrip()}" if tb else ""))
    progress.study(failed=True)
    progress.say(f"noiseproof: study {st.name} failed: {error}")
    st.prepared = st.spec = None
    if st.folder is not None and st.folder.parent.is_dir():
        try:
            st.folder.mkdir(exist_ok=True)
        except OSError:
            return
        try:
            _write_record(st.folder, _record(st, "failed", (), error))
        except BatchOutputError:
            pass


def _cancel_study(st: _Study, inflight: dict, executor) -> None:
    for fut, (owner, _) in list(inflight.items()):
        if owner is st:
            try:
                if fut.cancel() is True:
                    inflight.pop(fut, None)
                    owner.inflight -= 1
            except Exception:  # pragma: no cover
                pass
    if st.ref is not None:
        executor.unshare(st.ref)
        st.ref = None


def _worker_lost(st, idx, fut, inflight, executor, log, progress, max_attempts, outcomes,
                 active):
    """A local worker process died: put the task's blocks back, restart the pool once.

    Every task the broken pool held reports the death; each is requeued on its own report.
    A block requeued ``max_attempts`` times fails its study (it may be what kills workers).
    """
    for i in idx:
        st.attempts[i] = st.attempts.get(i, 0) + 1
    worst = max(st.attempts[i] for i in idx)
    if worst >= max_attempts:
        _fail(st, NoiseproofError(
            f"a worker process died {worst} times while computing block {idx[0]} "
            f"(out of memory?)"), log, progress, outcomes)
        _cancel_study(st, inflight, executor)
        if st in active:
            active.remove(st)
        return
    log.write(f"study {st.name}: a worker process died while holding block(s) {list(idx)}; "
              f"computing them again")
    progress.say(f"noiseproof: a worker process died; retrying block(s) {list(idx)} of {st.name}")
    for i in reversed(idx):
        st.todo.appendleft(i)
    executor.restart(getattr(fut, "generation", None))


def _remote_traceback(exc: BaseException) -> str:
    return "".join(traceback.format_exception(exc))


def _parking(folder: Path) -> Path:
    return folder.parent / f".{folder.name}.blocks"


def _restore_parked_blocks(folder: Path) -> None:
    """Put back blocks parked by a finish that a crash interrupted (see _finish_study)."""
    park = _parking(folder)
    if park.is_dir():
        folder.mkdir(parents=True, exist_ok=True)
        if (folder / "blocks").exists():
            old = folder / "blocks"
            for p in park.glob("block-*.bin"):
                if not (old / p.name).exists():
                    os.replace(p, old / p.name)
            import shutil as _shutil

            _shutil.rmtree(park, ignore_errors=True)
        else:
            os.replace(park, folder / "blocks")
    import shutil

    # the runner's own temporaries for this folder, left by a crash while it wrote them
    for pattern in (f".{folder.name}.partial-*", f".{folder.name}.old-*"):
        for stray in folder.parent.glob(pattern):
            shutil.rmtree(stray, ignore_errors=True)


def _finish_study(engine: Engine, prepared, spec, results: list, folder: Path, do_pack: bool,
                  argv, started: float) -> Path:
    """Merge a study's blocks (in block order) and let the runner write its run folder.

    The runner replaces the run folder as a whole (built aside, renamed into place), so the
    blocks are parked beside it meanwhile (one directory rename each way) and put back
    afterwards; a crash in between leaves them parked, and the next ``--resume`` restores
    them before anything else.
    """
    merged = engine.merge(spec, results) if spec is not None else None
    results.clear()
    park = _parking(folder)
    if (folder / "blocks").is_dir():
        os.replace(folder / "blocks", park)
    try:
        engine.finish(prepared, merged, folder, quiet=True, pack=do_pack, argv=argv,
                      started=started)
    finally:
        if park.is_dir():
            folder.mkdir(parents=True, exist_ok=True)
            os.replace(park, folder / "blocks")
    atomic_write(folder / "study.toml", prepared_text(prepared))
    return folder


def prepared_text(prepared) -> bytes:
    settings = getattr(prepared, "settings", None)
    return (settings.text if settings is not None else "").encode("utf-8")


# ----------------------------------------------------------------------------- comparison

COMPARISON_COLUMNS = (
    "study", "status", "error", "rule", "rule_type", "mean_estimator", "covariance_estimator",
    "ceq_mean", "ceq_se", "optimum_ceq", "ceq_loss", "sharpe_mean", "variance_mean",
    "prob_beats_equal_weight_ceq", "prob_beats_equal_weight_sharpe",
    "band_width_mean", "band_width_max",
    "backtest_sharpe", "backtest_ceq", "backtest_turnover", "backtest_max_drawdown",
    "backtest_cost_drag", "ceq_rank", "stability_rank", "backtest_rank",
)
EQUAL_WEIGHT = "equal-weight"


def _num(x) -> Optional[float]:
    if isinstance(x, bool) or x is None:
        return None
    if isinstance(x, (int, float)):
        return float(x) if math.isfinite(float(x)) else None
    return None


def _rule_rows(study: str, summary: dict) -> list:
    """Comparison rows of one finished study, with within-study ranks.

    ``band_width_*`` are the 5th-to-95th percentile spreads of the per-asset weights over
    draws (mean and largest over assets). ``stability_rank`` ranks the optimised rules
    only: 1/N has no spread by construction.
    """
    rows = []
    for rule, r in (summary.get("rules") or {}).items():
        pop = r.get("population") or {}
        opt = r.get("optimum") or {}
        bt = r.get("backtest") or {}
        est = r.get("estimator") or {}
        widths = []
        for w in (r.get("weights") or {}).values():
            lo, hi = _num(w.get("p5")), _num(w.get("p95"))
            if lo is not None and hi is not None:
                widths.append(hi - lo)
        ceq = _num(pop.get("ceq_mean"))
        oceq = _num(opt.get("ceq"))
        rows.append({
            "study": study, "status": "done", "error": "", "rule": rule,
            "rule_type": r.get("type", ""),
            "mean_estimator": est.get("mean", "") if isinstance(est, dict) else "",
            "covariance_estimator": est.get("covariance", "") if isinstance(est, dict) else "",
            "ceq_mean": ceq, "ceq_se": _num(pop.get("ceq_se")), "optimum_ceq": oceq,
            "ceq_loss": _num(pop.get("ceq_loss_vs_optimum")) if _num(
                pop.get("ceq_loss_vs_optimum")) is not None else (
                (oceq - ceq) if (ceq is not None and oceq is not None) else None),
            "sharpe_mean": _num(pop.get("sharpe_mean")),
            "variance_mean": _num(pop.get("variance_mean")),
            "prob_beats_equal_weight_ceq": _num(pop.get("prob_beats_equal_weight_ceq")),
            "prob_beats_equal_weight_sharpe": _num(pop.get("prob_beats_equal_weight_sharpe")),
            "band_width_mean": (sum(widths) / len(widths)) if widths else None,
            "band_width_max": max(widths) if widths else None,
            "backtest_sharpe": _num(bt.get("sharpe")),
            "backtest_ceq": _num(bt.get("ceq")),
            "backtest_turnover": _num(bt.get("turnover")),
            "backtest_max_drawdown": _num(bt.get("max_drawdown")),
            "backtest_cost_drag": _num(bt.get("cost_drag")),
        })
    _rank(rows, "ceq_mean", "ceq_rank", descending=True)
    _rank(rows, "band_width_mean", "stability_rank", descending=False,
          skip=lambda r: r["rule"] == EQUAL_WEIGHT or r["rule_type"] == EQUAL_WEIGHT)
    _rank(rows, "backtest_sharpe", "backtest_rank", descending=True)
    return rows


def _rank(rows: list, key: str, out: str, *, descending: bool, skip=None) -> None:
    vals = [(r[key], i) for i, r in enumerate(rows)
            if r[key] is not None and not (skip and skip(r))]
    vals.sort(key=lambda t: (-t[0] if descending else t[0], t[1]))
    for rank, (_, i) in enumerate(vals, start=1):
        rows[i][out] = rank
    for r in rows:
        r.setdefault(out, None)


def comparison_rows(plan: Plan, out: Path, studies: Sequence[StudyOutcome]) -> list:
    """One row per study and rule (a failed study: one row with its error), plan order."""
    rows = []
    for st, planned in zip(studies, plan.studies):
        values = {k: (Path(v).stem if k == "study" else v) for k, v in planned.values}
        base = {f"grid:{k}": _value_label(v) for k, v in values.items()}
        summary = None
        if st.status == "done":
            try:
                summary = json.loads((out / "studies" / st.name / "summary.json").read_text(
                    encoding="utf-8"))
            except (OSError, ValueError) as exc:
                st = StudyOutcome(st.name, "failed",
                                  f"summary.json unreadable ({exc.__class__.__name__})")
        if summary is not None:
            rrows = _rule_rows(st.name, summary)
            if not rrows:
                rrows = [{"study": st.name, "status": "done", "error": "", "rule": ""}]
        else:
            rrows = [{"study": st.name, "status": st.status, "error": st.error or "", "rule": ""}]
        for r in rrows:
            row = {c: r.get(c) for c in COMPARISON_COLUMNS}
            row.update(base)
            rows.append(row)
    return rows


def write_comparison(plan: Plan, out: Path, studies: Sequence[StudyOutcome]) -> tuple:
    """Write ``comparison.csv`` and ``comparison.html`` (atomically); returns their paths."""
    rows = comparison_rows(plan, out, studies)
    grid_cols = [f"grid:{k}" for k in plan.grid_keys]
    cols = list(COMPARISON_COLUMNS[:3]) + grid_cols + list(COMPARISON_COLUMNS[3:])
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=cols, lineterminator="\n", extrasaction="ignore")
    w.writeheader()
    for r in rows:
        w.writerow({c: ("" if r.get(c) is None else (repr(r[c]) if isinstance(r[c], float) else r[c]))
                    for c in cols})
    csv_path, html_path = out / "comparison.csv", out / "comparison.html"
    try:
        atomic_write(csv_path, buf.getvalue().encode("utf-8"))
        atomic_write(html_path, comparison_page(plan, rows, studies).encode("utf-8"))
    except OSError as exc:
        raise _output_error(exc, csv_path) from None
    return csv_path, html_path


def _estimator_key(r: dict) -> str:
    return f"{r.get('mean_estimator') or '?'} / {r.get('covariance_estimator') or '?'}"


def _mean(xs):
    xs = [x for x in xs if x is not None]
    return sum(xs) / len(xs) if xs else None


def _leaders(rows: list, group: str) -> list:
    """Per rule or per estimator pair: averages over studies and counts of first places.

    The estimator table leaves out 1/N, which estimates nothing.
    """
    acc: dict = {}
    for r in rows:
        if r.get("status") != "done" or not r.get("rule"):
            continue
        if group == "estimator":
            if r.get("rule_type") == EQUAL_WEIGHT or r.get("rule") == EQUAL_WEIGHT:
                continue
            key = _estimator_key(r)
        else:
            key = r["rule"]
        a = acc.setdefault(key, {"n": 0, "ceq": [], "loss": [], "band": [], "bt": [], "p": [],
                                 "wins": 0, "stable": 0, "btwins": 0})
        a["n"] += 1
        a["ceq"].append(r.get("ceq_mean"))
        a["loss"].append(r.get("ceq_loss"))
        a["band"].append(r.get("band_width_mean"))
        a["bt"].append(r.get("backtest_sharpe"))
        a["p"].append(r.get("prob_beats_equal_weight_ceq"))
        a["wins"] += r.get("ceq_rank") == 1
        a["stable"] += r.get("stability_rank") == 1
        a["btwins"] += r.get("backtest_rank") == 1
    out = []
    for key, a in acc.items():
        out.append({"key": key, "n": a["n"], "ceq": _mean(a["ceq"]), "loss": _mean(a["loss"]),
                    "band": _mean(a["band"]), "bt": _mean(a["bt"]), "p": _mean(a["p"]),
                    "wins": a["wins"], "stable": a["stable"], "btwins": a["btwins"]})
    out.sort(key=lambda d: (-(d["ceq"] if d["ceq"] is not None else -1e300), str(d["key"])))
    return out


def _fmt(x, kind="num") -> str:
    if x is None or x == "":
        return "&ndash;"
    if kind == "pct":
        return f"{100 * x:.1f}%"
    if kind == "bp":
        return f"{1e4 * x:.1f}"
    if isinstance(x, float):
        return f"{x:.3g}"
    return html.escape(str(x))


_CSS = (
    "body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;margin:2rem auto;"
    "max-width:75rem;color:#1d2430;line-height:1.4;padding:0 1rem}"
    "h1{font-size:1.5rem}h2{font-size:1.15rem;margin-top:2rem;border-bottom:1px solid #c9ced6}"
    "table{border-collapse:collapse;font-size:.85rem;margin:.5rem 0}"
    "th,td{padding:.25rem .6rem;border-bottom:1px solid #e3e6ea;text-align:right}"
    "th{background:#eef1f4}td.l,th.l{text-align:left}"
    "td.best{background:#e2f0e5;font-weight:600}.fail{color:#9b1c1c}"
    ".note{color:#55606e;font-size:.85rem}"
    ".bar{display:inline-block;height:.6rem;background:#4c6a92;vertical-align:middle;"
    "margin-left:.3rem}"
)


def comparison_page(plan: Plan, rows: list, studies: Sequence[StudyOutcome]) -> str:
    """The self-contained comparison page (HTML, inline CSS, no scripts, no external files)."""
    e = html.escape
    done = sum(1 for s in studies if s.status == "done")
    failed = [s for s in studies if s.status != "done"]
    created = _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat()
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>{e(plan.title)}: comparison across studies</title>",
        f"<style>{_CSS}</style></head><body>",
        f"<h1>{e(plan.title)}: comparison across {len(studies)} studies</h1>",
        f"<p class='note'>Plan {e(plan.path.name)}; {done} studies finished, {len(failed)} "
        f"did not; page written {e(created)}. Figures are per period; CEQ and loss in basis "
        "points of the period. Simulated and backtested figures are hypothetical: decision "
        "support, not investment advice.</p>",
        "<p class='note'><b>Population CEQ</b>: the certainty-equivalent return "
        "(mean &minus; &gamma;/2 &middot; variance) of each draw's allocation judged under the "
        "study's population, averaged over draws; higher is better. <b>Loss</b>: the gap to "
        "the population optimum under the same rule and constraints. <b>Band width</b>: the "
        "5th-to-95th percentile range of an asset's weight across draws, averaged over "
        "assets; narrower is more stable (1/N has none by construction and is not ranked on "
        "it). <b>Backtest</b>: the out-of-sample Sharpe ratio, where the study ran a backtest. "
        "First places are counted within each study.</p>",
    ]
    best_lines = []
    for group, title, label in (("rule", "Rules", "rule"),
                                ("estimator", "Estimators (mean / covariance), 1/N left out",
                                 "estimators")):
        lead = _leaders(rows, group)
        if not lead:
            continue
        top = {
            "ceq": max((d["ceq"] for d in lead if d["ceq"] is not None), default=None),
            "band": min((d["band"] for d in lead if d["band"] is not None
                         and not (group == "rule" and d["key"] == EQUAL_WEIGHT)), default=None),
            "bt": max((d["bt"] for d in lead if d["bt"] is not None), default=None),
        }
        bits = []
        for crit, name in (("ceq", "population CEQ"), ("band", "stability"), ("bt", "backtest")):
            if top[crit] is not None:
                who = next(d["key"] for d in lead if d[crit] == top[crit]
                           and not (crit == "band" and group == "rule" and d["key"] == EQUAL_WEIGHT))
                bits.append(f"{name}: <b>{e(str(who))}</b>")
        if bits:
            best_lines.append(f"<li>Best {e(label)} on average &mdash; " + "; ".join(bits) + "</li>")
        parts.append(f"<h2>{e(title)}</h2>")
        parts.append(f"<table><tr><th class='l'>{e(label)}</th><th>studies</th>"
                     "<th>population CEQ</th><th>loss vs optimum</th><th>P(beats 1/N)</th>"
                     "<th>first on CEQ</th><th>band width</th><th>most stable</th>"
                     "<th>backtest Sharpe</th><th>first on backtest</th></tr>")
        span = max((abs(d["ceq"]) for d in lead if d["ceq"] is not None), default=0) or 1.0
        for d in lead:
            def cell(crit, text):
                best = top[crit] is not None and d[crit] == top[crit] and not (
                    crit == "band" and group == "rule" and d["key"] == EQUAL_WEIGHT)
                return f"<td class='best'>{text}</td>" if best else f"<td>{text}</td>"
            bar = ""
            if d["ceq"] is not None and d["ceq"] > 0:
                bar = f"<span class='bar' style='width:{max(1, int(50 * d['ceq'] / span))}px'></span>"
            parts.append(
                f"<tr><td class='l'>{e(str(d['key']))}</td><td>{d['n']}</td>"
                + cell("ceq", _fmt(d["ceq"], "bp") + bar)
                + f"<td>{_fmt(d['loss'], 'bp')}</td><td>{_fmt(d['p'], 'pct')}</td>"
                + f"<td>{d['wins']}</td>" + cell("band", _fmt(d["band"], "pct"))
                + f"<td>{d['stable']}</td>" + cell("bt", _fmt(d["bt"]))
                + f"<td>{d['btwins']}</td></tr>")
        parts.append("</table>")
    if best_lines:
        parts.insert(5, "<h2>Which held up best</h2><ul>" + "".join(best_lines) + "</ul>")
    parts.extend(_pivot(rows))
    parts.append("<h2>Every study and rule</h2>")
    grid_cols = [f"grid:{k}" for k in plan.grid_keys]
    head = (["study"] + [c[5:] for c in grid_cols] + ["rule"],
            ["population CEQ", "&plusmn; s.e.", "loss", "P(beats 1/N)", "band width",
             "backtest Sharpe"])
    parts.append("<table><tr>" + "".join(f"<th class='l'>{e(h)}</th>" for h in head[0])
                 + "".join(f"<th>{h}</th>" for h in head[1]) + "</tr>")
    for r in rows:
        if r.get("status") != "done" or not r.get("rule"):
            continue
        cells = [f"<td class='l'>{e(r['study'])}</td>"]
        cells += [f"<td class='l'>{e(str(r.get(c, '')))}</td>" for c in grid_cols]
        cells.append(f"<td class='l'>{e(str(r.get('rule') or ''))}</td>")
        first = "<td class='best'>" if r.get("ceq_rank") == 1 else "<td>"
        cells += [f"{first}{_fmt(r.get('ceq_mean'), 'bp')}</td>",
                  f"<td>{_fmt(r.get('ceq_se'), 'bp')}</td>",
                  f"<td>{_fmt(r.get('ceq_loss'), 'bp')}</td>",
                  f"<td>{_fmt(r.get('prob_beats_equal_weight_ceq'), 'pct')}</td>",
                  f"<td>{_fmt(r.get('band_width_mean'), 'pct')}</td>",
                  f"<td>{_fmt(r.get('backtest_sharpe'))}</td>"]
        parts.append("<tr>" + "".join(cells) + "</tr>")
    parts.append("</table>")
    if failed:
        parts.append("<h2 class='fail'>Studies that did not finish</h2><table>"
                     "<tr><th class='l'>study</th><th class='l'>status</th>"
                     "<th class='l'>error</th></tr>")
        for s in failed:
            parts.append(f"<tr><td class='l'>{e(s.name)}</td><td class='l fail'>{e(s.status)}</td>"
                         f"<td class='l'>{e(s.error or '')}</td></tr>")
        parts.append("</table>")
    parts.append("<p class='note'>Each study's own evidence (weight bands, frontiers, backtest "
                 "series, its pack where built) is in studies/NAME/; every number here is in "
                 "comparison.csv.</p>")
    parts.append("</body></html>\n")
    return "\n".join(parts)


def _pivot(rows: list) -> list:
    """Rule x estimator pair: mean population CEQ over the studies with both (bp)."""
    cells: dict = {}
    for r in rows:
        if r.get("status") != "done" or not r.get("rule") or r.get("ceq_mean") is None:
            continue
        if r.get("rule_type") == EQUAL_WEIGHT or r.get("rule") == EQUAL_WEIGHT:
            continue
        cells.setdefault((r["rule"], _estimator_key(r)), []).append(r["ceq_mean"])
    if not cells:
        return []
    rules = list(dict.fromkeys(k[0] for k in cells))
    ests = list(dict.fromkeys(k[1] for k in cells))
    if len(ests) < 2:
        return []
    e = html.escape
    out = ["<h2>Rule &times; estimator: mean population CEQ</h2>",
           "<table><tr><th class='l'>rule</th>" + "".join(f"<th>{e(x)}</th>" for x in ests)
           + "</tr>"]
    for rule in rules:
        vals = {est: _mean(cells.get((rule, est), [])) for est in ests}
        best = max((v for v in vals.values() if v is not None), default=None)
        tds = []
        for est in ests:
            v = vals[est]
            cls = " class='best'" if v is not None and v == best else ""
            tds.append(f"<td{cls}>{_fmt(v, 'bp')}</td>")
        out.append(f"<tr><td class='l'>{e(rule)}</td>" + "".join(tds) + "</tr>")
    out.append("</table><p class='note'>Best estimator per rule highlighted; averages over "
               "the studies that ran the pair.</p>")
    return out
