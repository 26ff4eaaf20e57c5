"""`noiseproof batch` with the real resampling engine and runner (tiny studies, small blocks).

The reference run is a plain ``noiseproof study`` of each effective study file: a batch
must reproduce its numbers whatever the executor, the number of workers, a SIGKILL and
resume in the middle, or a damaged block file on disk.
"""
from __future__ import annotations

import csv
import io
import json
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from noiseproof import batch
from noiseproof.batch import run_batch, study_settings
from noiseproof.executors import ProcessExecutor

simulate = pytest.importorskip("simulate")
runner = pytest.importorskip("noiseproof.runner")

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent

# An invented market of four funds (no real institutions or data).
ASSETS = ["Harbor Growth", "Quay Income", "Ridge Value", "Fen Bonds"]

STUDY = """\
[data]
path = "history.csv"
kind = "returns"

[[rules]]
name = "proposed"
type = "mean-variance"
risk_aversion = 4

[resample]
generator = "bootstrap"
draws = 600
length = 48
seed = 11
block_size = 50
sweep_years = [5]
sweep_draws = 50

[backtest]
window = 48
rebalance_every = 6
bootstrap_resamples = 20
"""

PLAN = """\
study = "study.toml"
[grid]
"estimate.covariance" = ["sample", "ledoit-wolf-identity"]
"""


def _write_inputs(folder: Path) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(5)
    t = 72
    r = rng.normal(0.005, 0.04, size=(t, len(ASSETS))) + 0.002 * np.arange(len(ASSETS))
    df = pd.DataFrame(r, columns=ASSETS)
    df.insert(0, "date", pd.date_range("2015-01-31", periods=t, freq="ME").strftime("%Y-%m-%d"))
    df.to_csv(folder / "history.csv", index=False)
    (folder / "study.toml").write_text(STUDY)
    (folder / "plan.toml").write_text(PLAN)


def total_blocks(inputs: Path) -> int:
    plan = batch.load_plan(inputs / "plan.toml")
    return sum(len(simulate.block_plan(runner.prepare_study(study_settings(plan, s)).spec))
               for s in plan.studies)


def differences(a, b, path="") -> list:
    """Paths where two JSON-like values differ (empty when equal)."""
    if isinstance(a, dict) and isinstance(b, dict):
        out = []
        for k in sorted(set(a) | set(b), key=str):
            if k not in a or k not in b:
                out.append(f"{path}/{k} (only in {'second' if k not in a else 'first'})")
            else:
                out += differences(a[k], b[k], f"{path}/{k}")
        return out
    if isinstance(a, list) and isinstance(b, list) and len(a) == len(b):
        return [d for i, (x, y) in enumerate(zip(a, b)) for d in differences(x, y, f"{path}[{i}]")]
    return [] if a == b else [f"{path}: {a!r} != {b!r}"[:200]]


def numbers(out: Path) -> dict:
    """Every study's summary.json without the fields that name the run (file, time)."""
    res = {}
    for p in sorted((Path(out) / "studies").glob("*/summary.json")):
        s = json.loads(p.read_text())
        s.pop("study", None)
        res[p.parent.name] = s
    return res


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """The plan's studies, each run as a plain single study (the `study` command's path)."""
    base = tmp_path_factory.mktemp("engine")
    inputs = base / "inputs"
    _write_inputs(inputs)
    plan = batch.load_plan(inputs / "plan.toml")
    for st in plan.studies:
        runner.run_study(study_settings(plan, st), base / "single" / "studies" / st.name,
                         quiet=True, pack=False)
    return inputs, numbers(base / "single")


def test_batch_reproduces_single_study_runs_on_one_and_two_local_workers(reference, tmp_path):
    inputs, expected = reference
    plan = batch.load_plan(inputs / "plan.toml")
    res = run_batch(plan, tmp_path / "one", quiet=True, pack=False)
    assert res.exit_status == 0
    assert len(expected) == 2 and differences(numbers(tmp_path / "one"), expected) == []
    ex = ProcessExecutor(2)
    try:
        res = run_batch(plan, tmp_path / "two", quiet=True, pack=False, executor=ex,
                        blocks_per_task=2)
    finally:
        ex.close()
    assert res.exit_status == 0 and differences(numbers(tmp_path / "two"), expected) == []
    rows = list(csv.DictReader(io.StringIO((tmp_path / "two" / "comparison.csv").read_text())))
    prop = {r["study"]: r for r in rows if r["rule"] == "proposed"}
    for name, summary in expected.items():
        pop = summary["rules"]["proposed"]["population"]
        assert float(prop[name]["ceq_mean"]) == pop["ceq_mean"]
        assert float(prop[name]["prob_beats_equal_weight_ceq"]) == pop["prob_beats_equal_weight_ceq"]


class _RecordingExecutor(ProcessExecutor):
    """Local worker processes that note the block indices of every task."""

    def __init__(self, workers):
        super().__init__(workers)
        self.tasks = []

    def submit(self, fn, *args, key=""):
        self.tasks.append((args[2], tuple(args[3])))
        return super().submit(fn, *args, key=key)


def test_cheap_blocks_share_tasks_and_change_no_number(reference, tmp_path):
    """By default the batch groups consecutive blocks of a study into tasks of up to
    TASK_SECONDS of modelled work (simulate.block_seconds): fewer round trips to the
    workers, every block still written on its own, the same numbers."""
    inputs, expected = reference
    plan = batch.load_plan(inputs / "plan.toml")
    ex = _RecordingExecutor(2)
    try:
        res = run_batch(plan, tmp_path / "grouped", quiet=True, pack=False, executor=ex)
    finally:
        ex.close()
    assert res.exit_status == 0
    assert differences(numbers(tmp_path / "grouped"), expected) == []
    by_spec = {}
    for spec, idx in ex.tasks:
        by_spec.setdefault(id(spec), (spec, []))[1].append(idx)
    assert len(by_spec) == 2
    for spec, tasks in by_spec.values():
        blocks = simulate.block_plan(spec)
        flat = [i for t in tasks for i in t]
        assert sorted(flat) == list(range(len(blocks)))        # each block once
        assert len(tasks) < len(blocks)                          # some were grouped
        for t in tasks:
            assert list(t) == list(range(t[0], t[0] + len(t)))   # consecutive
            cost = sum(simulate.block_seconds(spec, blocks[i]) for i in t)
            assert len(t) == 1 or cost <= batch.TASK_SECONDS
    files = sorted((tmp_path / "grouped" / "studies").glob("*/blocks/block-*.bin"))
    assert len(files) == sum(len(simulate.block_plan(s)) for s, _ in by_spec.values())


def test_infeasible_study_is_recorded_and_the_other_completes(reference, tmp_path):
    inputs, _ = reference
    (inputs / "bad.toml").write_text(
        'study = "study.toml"\n[grid]\n"rules.proposed.bounds" = ['
        '{"Fen Bonds" = [0.0, 0.5]}, {"Harbor Growth" = [0.7, 1.0], "Quay Income" = [0.5, 1.0]}]\n'
        '[set]\n"resample.draws" = 100\n"resample.sweep_years" = []\n')
    plan = batch.load_plan(inputs / "bad.toml")
    res = run_batch(plan, tmp_path / "out", quiet=True, pack=False)
    assert res.exit_status == batch.EXIT_STUDIES_FAILED
    assert [s.status for s in res.studies] == ["done", "failed"]
    assert "lower bounds sum to 1.2" in res.studies[1].error
    rows = list(csv.DictReader(io.StringIO((tmp_path / "out" / "comparison.csv").read_text())))
    assert [r["status"] for r in rows if r["study"] == res.studies[1].name] == ["failed"]
    assert (tmp_path / "out" / "studies" / res.studies[0].name / "summary.json").is_file()


def test_truncated_block_is_recomputed_on_resume_never_merged(reference, tmp_path):
    inputs, expected = reference
    plan = batch.load_plan(inputs / "plan.toml")
    out = tmp_path / "out"
    run_batch(plan, out, quiet=True, pack=False)
    folder = out / "studies" / plan.studies[0].name
    (folder / "batch.json").unlink()                 # as if the crash came before the end
    blk = folder / "blocks" / "block-000002.bin"
    blk.write_bytes(blk.read_bytes()[: blk.stat().st_size // 2])
    res = run_batch(plan, out, quiet=True, pack=False, resume=True)
    assert res.studies[0].rejected == 1 and res.studies[0].computed == 1
    assert res.studies[1].computed == 0
    assert "block 2 rejected (truncated" in (out / "batch.log").read_text()
    assert differences(numbers(out), expected) == []


def test_sigkill_mid_run_then_resume_matches_uninterrupted(reference, tmp_path):
    inputs, expected = reference
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "noiseproof", "batch", str(inputs / "plan.toml"), "--out",
           str(out), "--workers", "2", "--no-pack", "--quiet"]
    env = dict(os.environ, NOISEPROOF_BATCH_BLOCK_DELAY="0.25",
               PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    proc = subprocess.Popen(cmd, env=env, start_new_session=True)
    try:
        deadline = time.time() + 120
        while len(list(out.glob("studies/*/blocks/block-*.bin"))) < 3:
            assert proc.poll() is None, "the batch ended before it could be killed"
            assert time.time() < deadline
            time.sleep(0.02)
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
    finally:
        try:
            os.killpg(proc.pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
    kept = len(list(out.glob("studies/*/blocks/block-*.bin")))
    assert 3 <= kept < total_blocks(inputs) and not list(out.glob("studies/*/summary.json"))
    env.pop("NOISEPROOF_BATCH_BLOCK_DELAY")
    cmd[cmd.index("--workers") + 1] = "1"          # resumed on another worker count
    r = subprocess.run(cmd[:-1] + ["--resume"], env=env, capture_output=True, text=True,
                       timeout=300)
    assert r.returncode == 0, r.stderr
    assert "took over a stale lock" in r.stderr
    log = (out / "batch.log").read_text()
    assert "batch resumed" in log
    resumed = log[log.index("batch resumed"):]
    reused = sum(int(n) for n in re.findall(r"(\d+) already on disk", resumed))
    assert reused == kept                            # nothing finished was computed twice
    assert differences(numbers(out), expected) == []


def dying_run_block(marker: str, die_index: int, spec, index):
    """simulate.run_block, except that the first process to reach block ``die_index`` dies."""
    if index == die_index and not os.path.exists(marker):
        Path(marker).write_text(str(os.getpid()))
        os.kill(os.getpid(), signal.SIGKILL)
    return simulate.run_block(spec, index)


@pytest.mark.slow   # the stand-in local case and the real-engine Dask case run in the suite
def test_local_worker_killed_mid_block_with_the_real_engine(reference, tmp_path):
    import dataclasses
    import functools

    inputs, expected = reference
    plan = batch.load_plan(inputs / "plan.toml")
    marker = tmp_path / "died"
    engine = dataclasses.replace(batch.default_engine(),
                                 run_block=functools.partial(dying_run_block, str(marker), 2))
    ex = ProcessExecutor(2)
    try:
        res = run_batch(plan, tmp_path / "out", quiet=True, pack=False, executor=ex,
                        engine=engine)
    finally:
        ex.close()
    assert marker.exists() and res.exit_status == 0
    assert differences(numbers(tmp_path / "out"), expected) == []
