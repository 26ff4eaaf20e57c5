"""The evidence pack: what an investment committee reads, built from a finished run folder.

``build_pack(run_dir)`` reads ``RUN/summary.json``, ``RUN/manifest.json`` and
``RUN/tables/*.csv`` (it never recomputes a result) and writes ``RUN/pack/``:

* ``report.html``: one self-contained file (figures embedded, no network, print CSS);
* ``report.pdf``: paged A4 with a table of contents, page numbers, and the study's name and
  the run's date on every page;
* ``data/<key>.csv``: for every figure and table, exactly the numbers drawn (unrounded,
  after the stated annualisation);
* ``manifest.json``: every file of the pack and every input it read, with SHA-256.

The pack is written into a temporary sibling folder and moved into place at the end, so a
failure never leaves a half-written pack.
"""
from __future__ import annotations

import hashlib
import json
import os
import shutil
import tempfile
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

from estimators.core import DataError

from ._html import render_html
from ._model import Figure, Table
from ._pdf import render_pdf
from ._run import RunFolder, read_run
from ._sections import build_sections

__all__ = ["build_pack", "PackResult", "PACK_FORMAT"]

#: Version of the pack's layout (files and data CSV names), recorded in pack/manifest.json.
PACK_FORMAT = 1


@dataclass(frozen=True)
class PackResult:
    """Where the pack was written.

    Attributes
    ----------
    html, pdf : Path
        ``RUN/pack/report.html`` and ``RUN/pack/report.pdf``.
    data_dir : Path
        ``RUN/pack/data``: one CSV per figure and table.
    manifest : Path
        ``RUN/pack/manifest.json``.
    sections : tuple of str
        Section titles in order; ``absent`` lists the sections whose results were absent.
    absent : tuple of str
    """

    html: Path
    pdf: Path
    data_dir: Path
    manifest: Path = None
    sections: tuple = ()
    absent: tuple = ()


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _write_data(sections, data_dir: Path) -> list:
    data_dir.mkdir(parents=True, exist_ok=True)
    written = []
    for s in sections:
        for b in s.blocks:
            if isinstance(b, Table):
                frame = b.frame()
            elif isinstance(b, Figure):
                frame = b.data
            else:
                continue
            path = data_dir / f"{b.key}.csv"
            frame.to_csv(path, index=False, float_format="%.17g")
            written.append(path)
    return written


def build_pack(run_dir) -> PackResult:
    """Build the evidence pack of a finished run folder.

    Parameters
    ----------
    run_dir : str or Path
        A run folder holding ``summary.json`` (required), ``manifest.json`` and ``tables/``.

    Returns
    -------
    PackResult

    Raises
    ------
    DataError
        When the folder is missing, is not a finished run, or a file in it cannot be read.
    """
    run: RunFolder = read_run(run_dir)
    sections = build_sections(run)
    generated = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    title = run.study_name
    final = run.path / "pack"
    try:
        tmp = Path(tempfile.mkdtemp(prefix=".pack-", dir=run.path))
    except OSError as exc:
        raise DataError(f"{run.path}: cannot write the pack there ({exc.strerror})") from None
    try:
        (tmp / "report.html").write_text(
            render_html(title, run.created, sections, generated=generated), encoding="utf-8")
        render_pdf(tmp / "report.pdf", title, run.created, sections, generated=generated)
        data_files = _write_data(sections, tmp / "data")
        # the files the pack's numbers come from (manifest.json is shown as text and may be
        # re-stamped by the runner after the pack is built, so it is not hashed here)
        inputs = [run.path / "summary.json"]
        inputs += sorted((run.path / "tables").glob("*.csv")) if (run.path / "tables").is_dir() else []
        files = [tmp / "report.html", tmp / "report.pdf"] + data_files
        manifest = {
            "pack_format": PACK_FORMAT,
            "built": generated,
            "study": title,
            "run_created": run.created,
            "sections": [{"number": s.number, "title": s.title, "absent": s.absent} for s in sections],
            "files": {str(p.relative_to(tmp)): _sha256(p) for p in files},
            "inputs": {str(p.relative_to(run.path)): _sha256(p) for p in inputs},
        }
        (tmp / "manifest.json").write_text(json.dumps(manifest, indent=2), encoding="utf-8")
        old = None
        if final.exists():
            old = run.path / f".pack-old-{os.getpid()}"
            if old.exists():
                shutil.rmtree(old)
            final.rename(old)
        os.chmod(tmp, 0o755)
        tmp.rename(final)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return PackResult(html=final / "report.html", pdf=final / "report.pdf", data_dir=final / "data",
                      manifest=final / "manifest.json",
                      sections=tuple(s.title for s in sections),
                      absent=tuple(s.title for s in sections if s.absent))
