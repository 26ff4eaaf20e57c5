"""`noiseproof batch`: plans, names, durable blocks, the lock, executors, resume, faults.

Most tests drive the batch machinery with a small stand-in engine defined here (pure block
function seeded per fixed chunk from one SeedSequence, like the real engine), so that
they are fast and can fail blocks or kill workers on purpose. The tests with the real
resampling engine live in test_batch_engine.py.
"""
from __future__ import annotations

import csv
import dataclasses
import errno
import hashlib
import io
import json
import os
import re
import signal
import socket
import subprocess
import sys
import time
import tomllib
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings as hsettings, strategies as hst

from estimators.core import InfeasibleError, SettingsError
from noiseproof import batch
from noiseproof.batch import (BatchLock, BatchLockedError, BatchOutputError, BlockStore,
                              CorruptBlockError, Engine, dumps_toml, parse_plan, run_batch,
                              study_names, study_settings)
from noiseproof.cli import main
from noiseproof.executors import InlineExecutor, ProcessExecutor

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent


# ----------------------------------------------------------------------------- stand-in engine

CHUNK = 10  # draws per seed chunk: seeds do not depend on the block size


@dataclasses.dataclass(frozen=True)
class StandInSpec:
    seed: int
    draws: int
    block_size: int
    length: int
    scale: float
    assets: tuple = ("A", "B")
    die_marker: str = ""      # when set: the process computing block `die_index` kills
    die_index: int = -1       # itself the first time (marker file absent), to fake a crash
    fail_block: int = -1      # this block raises InfeasibleError inside the worker


@dataclasses.dataclass(frozen=True)
class StandInBlock:
    index: int
    start: int
    stop: int


@dataclasses.dataclass(frozen=True)
class StandInResult:
    index: int
    values: np.ndarray        # (draws in block,): one number per draw

    def to_bytes(self) -> bytes:
        raw = self.values.astype("<f8").tobytes()
        head = json.dumps({"index": self.index, "n": len(self.values),
                           "sha": hashlib.sha256(raw).hexdigest()}).encode()
        return head + b"\n" + raw


@dataclasses.dataclass(frozen=True)
class StandInPrepared:
    settings: object
    spec: object


LIVE = {"now": 0, "max": 0}   # studies prepared and not yet finished (memory bound check)


def standin_prepare(settings):
    if settings.estimate.covariance == "infeasible":
        raise InfeasibleError("group bounds cannot be met: lows sum to 1.2 > 1 (stand-in)")
    LIVE["now"] += 1
    LIVE["max"] = max(LIVE["max"], LIVE["now"])
    r = settings.resample
    if r is None:
        return StandInPrepared(settings, None)
    scale = {"sample": 1.0, "ledoit-wolf-identity": 0.5}.get(settings.estimate.covariance, 2.0)
    return StandInPrepared(settings, StandInSpec(r.seed, r.draws, r.block_size, r.length or 60,
                                                 scale))


def standin_block_plan(spec):
    return [StandInBlock(i, s, min(s + spec.block_size, spec.draws))
            for i, s in enumerate(range(0, spec.draws, spec.block_size))]


def standin_run_block(spec, index):
    b = standin_block_plan(spec)[index]
    if index == spec.fail_block:
        raise InfeasibleError(f"stand-in failure in block {index}")
    if spec.die_marker and index == spec.die_index and not os.path.exists(spec.die_marker):
        Path(spec.die_marker).write_text(str(os.getpid()))
        os.kill(os.getpid(), signal.SIGKILL)
    root = np.random.SeedSequence(spec.seed)
    out = np.empty(b.stop - b.start)
    for d in range(b.start, b.stop, CHUNK):  # one seed child per fixed chunk of draws
        stop = min(d + CHUNK, b.stop)
        child = np.random.SeedSequence(spec.seed, spawn_key=(d // CHUNK,))
        g = np.random.default_rng(child)
        x = g.standard_normal((CHUNK, spec.length))[: stop - d]
        out[d - b.start: stop - b.start] = spec.scale * x.mean(axis=1) + 0.01 * x.std(axis=1)
    del root
    return StandInResult(index, out)


def standin_to_bytes(result):
    return result.to_bytes()


def standin_from_bytes(data):
    head, sep, raw = data.partition(b"\n")
    meta = json.loads(head)
    if len(raw) != 8 * meta["n"] or hashlib.sha256(raw).hexdigest() != meta["sha"]:
        raise ValueError("stand-in block damaged")
    return StandInResult(meta["index"], np.frombuffer(raw, dtype="<f8").copy())


def standin_merge(spec, results):
    assert [r.index for r in results] == list(range(len(results))), "merged out of order"
    allv = np.concatenate([r.values for r in results])
    return {"mean": float(allv.mean()), "sd": float(allv.std(ddof=1)), "n": int(allv.size),
            "sha": hashlib.sha256(allv.tobytes()).hexdigest()}


def standin_finish(prepared, result, out, *, quiet, pack, argv, started):
    """Like the runner: build the run folder aside, then replace the folder as a whole."""
    import shutil

    LIVE["now"] -= 1
    out = Path(out)
    tmp = out.parent / f".{out.name}.partial-{os.getpid()}"
    tmp.mkdir(parents=True)
    ceq = result["mean"] if result else 0.0
    summary = {
        "schema": 1, "study": {"name": prepared.settings.name},
        "resample": result,
        "rules": {
            "equal-weight": {"type": "equal-weight", "estimator": {"mean": "sample", "covariance": "sample"},
                             "population": {"ceq_mean": 0.001, "ceq_se": 1e-4,
                                            "prob_beats_equal_weight_ceq": None},
                             "optimum": {"ceq": 0.004},
                             "weights": {"A": {"p5": 0.5, "p95": 0.5}, "B": {"p5": 0.5, "p95": 0.5}}},
            "proposed": {"type": "mean-variance",
                         "estimator": {"mean": prepared.settings.estimate.mean,
                                       "covariance": prepared.settings.estimate.covariance},
                         "population": {"ceq_mean": ceq, "ceq_se": 1e-4,
                                        "prob_beats_equal_weight_ceq": 0.4},
                         "optimum": {"ceq": 0.004},
                         "weights": {"A": {"p5": 0.1, "p95": 0.9}, "B": {"p5": 0.1, "p95": 0.9}},
                         "backtest": {"sharpe": 0.3}},
        },
    }
    (tmp / "summary.json").write_text(json.dumps(summary, indent=1))
    (tmp / "manifest.json").write_text(json.dumps({"study_file": str(prepared.settings.path)}))
    if pack:
        (tmp / "pack").mkdir()
        (tmp / "pack" / "report.html").write_text("<html>stand-in pack</html>")
    if out.exists():
        shutil.rmtree(out)
    os.replace(tmp, out)
    return out


STANDIN = Engine(prepare=standin_prepare, spec_of=lambda p: p.spec,
                 block_plan=standin_block_plan, run_block=standin_run_block,
                 to_bytes=standin_to_bytes, from_bytes=standin_from_bytes, merge=standin_merge,
                 finish=standin_finish, ident="stand-in")


def _engine_with(**spec_changes) -> Engine:
    """The stand-in with spec fields changed (e.g. a block that kills its worker)."""
    def prepare(settings):
        p = standin_prepare(settings)
        return StandInPrepared(p.settings, dataclasses.replace(p.spec, **spec_changes))
    return dataclasses.replace(STANDIN, prepare=prepare)


STUDY = """\
name = "base"
risk_aversion = 3

[data]
path = "history.csv"

[estimate]
mean = "sample"
covariance = "sample"

[[rules]]
name = "proposed"
type = "mean-variance"
risk_aversion = 3

[[rules]]
name = "minvar"
type = "min-variance"

[resample]
generator = "normal"
draws = 60
length = 24
seed = 7
block_size = 10
"""

PLAN = """\
study = "study.toml"
title = "Overnight check"

[grid]
"estimate.covariance" = ["sample", "ledoit-wolf-identity"]
"resample.length" = [24, 36]
"""


@pytest.fixture
def plan_dir(tmp_path):
    d = tmp_path / "plan"
    d.mkdir()
    (d / "study.toml").write_text(STUDY)
    (d / "history.csv").write_text("date,A,B\n2020-01-31,0.01,0.02\n2020-02-29,0.00,-0.01\n")
    (d / "plan.toml").write_text(PLAN)
    return d


def _plan(plan_dir, text=PLAN):
    (plan_dir / "plan.toml").write_text(text)
    return batch.load_plan(plan_dir / "plan.toml")


def _summaries(out: Path) -> dict:
    return {p.parent.name: json.loads(p.read_text())["resample"]
            for p in sorted((out / "studies").glob("*/summary.json"))}


# ----------------------------------------------------------------------------- plans and names

def test_plan_expands_the_grid_in_file_order_with_names_from_values(plan_dir):
    plan = batch.load_plan(plan_dir / "plan.toml")
    assert [s.name for s in plan.studies] == [
        "covariance=sample__length=24", "covariance=sample__length=36",
        "covariance=ledoit-wolf-identity__length=24", "covariance=ledoit-wolf-identity__length=36"]
    assert plan.grid_keys == ("estimate.covariance", "resample.length")
    assert plan.title == "Overnight check"
    s = study_settings(plan, plan.studies[2])
    assert s.estimate.covariance == "ledoit-wolf-identity"
    assert s.resample.length == 24 and s.resample.draws == 60
    assert s.name == plan.studies[2].name
    assert s.data.path == plan_dir / "history.csv"   # relative to the base study, not the plan
    assert s.text.startswith("# Study covariance=ledoit-wolf-identity__length=24")


def test_dotted_keys_reach_rules_by_name_and_position_and_create_sections(plan_dir):
    text = """study = "study.toml"
[set]
"rules.proposed.risk_aversion" = 8
"rules.2.long_only" = false
"backtest.cost_bps" = 25
[grid]
resample.draws = [40, 50]
"""
    plan = _plan(plan_dir, text)
    assert [s.name for s in plan.studies] == ["draws=40", "draws=50"]
    s = study_settings(plan, plan.studies[1])
    rules = {r.name: r for r in s.rules}
    assert rules["proposed"].params["risk_aversion"] == 8
    assert rules["minvar"].params["long_only"] is False
    assert s.backtest is not None and s.backtest.cost_bps == 25
    assert s.resample.draws == 50


@pytest.mark.parametrize("text, match", [
    ('study = "study.toml"\nbogus = 1\n', "unknown key 'bogus'"),
    ('[grid]\n"a.b" = [1]\n', "needs 'study'"),
    ('study = "nope.toml"\n', "no such file"),
    ('study = "study.toml"\n[grid]\n"resample.draws" = []\n', "non-empty list"),
    ('study = "study.toml"\n[grid]\n"resample.draws" = 5\n', "non-empty list"),
    ('study = "study.toml"\n[grid]\n"resample.draws" = [5, 5]\n', "lists a value twice"),
    ('study = "study.toml"\n[grid]\n"resample.draws" = [5]\n[set]\n"resample.draws" = 6\n',
     "both"),
    ('study = "study.toml"\n[grid]\n"resample..draws" = [5]\n', "not a valid dotted key"),
    ('study = "study.toml"\npacks = 3\n', "packs"),
    ('study = "study.toml"\n[grid]\n"resample.draws" = [1\n', "not valid TOML"),
])
def test_bad_plans_are_settings_errors_naming_the_problem(plan_dir, text, match):
    with pytest.raises(SettingsError, match=match):
        _plan(plan_dir, text)


@pytest.mark.parametrize("text, match", [
    ('study = "study.toml"\n[set]\n"rules.nobody.x" = 1\n', "no entry named 'nobody'"),
    ('study = "study.toml"\n[set]\n"rules.9.x" = 1\n', "no entry 9"),
    ('study = "study.toml"\n[set]\n"resample.draws.x" = 1\n', "is a value, not a table"),
    ('study = "study.toml"\n[set]\n"resample.bogus" = 1\n', "unknown key 'bogus'"),
    ('study = "study.toml"\n[set]\n"resample.draws" = 0\n', "draws must be >= 1"),
])
def test_bad_overrides_name_the_study_and_key(plan_dir, text, match):
    plan = _plan(plan_dir, text)
    with pytest.raises(SettingsError, match=match):
        study_settings(plan, plan.studies[0])


def test_names_are_filesystem_safe_deterministic_and_unique():
    keys = ["data.path", "rules.proposed.bounds"]
    sets = [(("data.path", "a/b c.csv"), ("rules.proposed.bounds", {"A": [0, 0.5]})),
            (("data.path", "a_b c.csv"), ("rules.proposed.bounds", {"A": [0, 0.5]})),
            (("data.path", "a/b_c.csv"), ("rules.proposed.bounds", {"A": [0, 0.5]}))]
    names = study_names(sets, keys)
    assert names == study_names(sets, keys)                       # deterministic
    assert len({n.lower() for n in names}) == 3                   # unique, also ignoring case
    for n in names:
        assert all(c.isalnum() or c in "._+=-~" for c in n), n   # filesystem-safe
        assert not n.startswith((".", "-"))
    # case-only differences clash on case-insensitive file systems: told apart by a hash
    a, b = study_names([(("x", "Big"),), (("x", "big"),)], ["x"])
    assert a.lower() != b.lower()
    # long values are cut and keep a hash of the full values
    long = study_names([(("k", "v" * 300),), (("k", "v" * 301),)], ["k"])
    assert all(len(n) <= batch.NAME_LIMIT + 9 for n in long) and long[0] != long[1]
    # labels: the shortest dotted suffix that tells the keys apart
    n2 = study_names([(("estimate.covariance", "oas"), ("rules.a.covariance", "sample"))],
                     ["estimate.covariance", "rules.a.covariance"])
    assert n2 == ["estimate.covariance=oas__a.covariance=sample"]


def test_several_base_studies_form_a_grid_dimension(plan_dir):
    (plan_dir / "other.toml").write_text(STUDY.replace('seed = 7', 'seed = 8'))
    plan = _plan(plan_dir, 'study = ["study.toml", "other.toml"]\n[grid]\n"resample.draws" = [20, 30]\n')
    assert [s.name for s in plan.studies] == ["study=study__draws=20", "study=study__draws=30",
                                             "study=other__draws=20", "study=other__draws=30"]
    assert study_settings(plan, plan.studies[3]).resample.seed == 8


toml_keys = hst.text(alphabet=hst.characters(codec="utf-8", exclude_categories=("Cs",)),
                     min_size=1, max_size=8)
toml_scalars = (hst.booleans() | hst.integers(-2**63, 2**63 - 1)
                | hst.floats(allow_nan=False) | hst.text(
                    alphabet=hst.characters(codec="utf-8", exclude_categories=("Cs",)), max_size=12))
toml_values = hst.recursive(toml_scalars, lambda inner: hst.lists(inner, max_size=3)
                            | hst.dictionaries(toml_keys, inner, max_size=3), max_leaves=8)


@hsettings(max_examples=150, deadline=None)
@given(hst.dictionaries(toml_keys, toml_values | hst.dictionaries(toml_keys, toml_values, max_size=3)
                        | hst.lists(hst.dictionaries(toml_keys, toml_values, max_size=3),
                                    min_size=1, max_size=2), max_size=5))
def test_dumps_toml_round_trips_through_tomllib(doc):
    assert tomllib.loads(dumps_toml(doc)) == doc


# ----------------------------------------------------------------------------- block store

def test_block_store_round_trip_and_every_kind_of_damage_is_detected(tmp_path):
    store = BlockStore(tmp_path / "blocks", "f" * 64)
    payload = os.urandom(1000)
    store.write(3, payload)
    assert store.read(3) == payload
    assert store.present() == [3]
    assert not list((tmp_path / "blocks").glob(".*tmp*"))         # no temporary left
    raw = store.path(3).read_bytes()
    store.path(3).write_bytes(raw[:-10])                          # truncated
    with pytest.raises(CorruptBlockError, match="truncated"):
        store.read(3)
    store.path(3).write_bytes(raw[:-1] + bytes([raw[-1] ^ 1]))    # one bit flipped
    with pytest.raises(CorruptBlockError, match="checksum"):
        store.read(3)
    store.path(3).write_bytes(raw[:20])                           # cut inside the header
    with pytest.raises(CorruptBlockError, match="header"):
        store.read(3)
    store.path(3).write_bytes(raw)
    with pytest.raises(CorruptBlockError, match="other settings"):
        BlockStore(tmp_path / "blocks", "e" * 64).read(3)
    with pytest.raises(CorruptBlockError, match="missing"):
        store.read(4)
    dest = store.reject(3, "test")
    assert dest.parent.name == "rejected" and dest.read_bytes() == raw and store.present() == []


def test_a_failed_write_leaves_the_old_block_and_no_temporary(tmp_path, monkeypatch):
    store = BlockStore(tmp_path / "blocks", "f" * 64)
    store.write(0, b"first")

    def full(*a, **k):
        raise OSError(errno.ENOSPC, "No space left on device")
    monkeypatch.setattr(batch.os, "replace", full)
    with pytest.raises(OSError):
        store.write(0, b"second")
    monkeypatch.undo()
    assert store.read(0) == b"first"
    assert [p.name for p in (tmp_path / "blocks").iterdir()] == ["block-000000.bin"]


# ----------------------------------------------------------------------------- the lock

def _dead_pid() -> int:
    p = subprocess.Popen([sys.executable, "-c", "pass"])
    p.wait()
    return p.pid


def test_lock_records_the_holder_and_refuses_a_second_batch(tmp_path):
    with BatchLock(tmp_path).acquire(resume=False):
        info = json.loads((tmp_path / "batch.lock").read_text())
        assert info["pid"] == os.getpid() and info["host"] == socket.gethostname()
        assert info["started"].endswith("+00:00")
        with pytest.raises(BatchLockedError, match=f"PID {os.getpid()}"):
            BatchLock(tmp_path).acquire(resume=True)
    assert not (tmp_path / "batch.lock").exists()


def test_stale_lock_needs_resume_and_is_taken_over_by_it(tmp_path):
    pid = _dead_pid()
    (tmp_path / "batch.lock").write_text(json.dumps(
        {"pid": pid, "host": socket.gethostname(), "started": "2026-12-01T22:00:00+00:00"}))
    with pytest.raises(BatchLockedError, match="--resume"):
        BatchLock(tmp_path).acquire(resume=False)
    lock = BatchLock(tmp_path).acquire(resume=True)
    assert lock.took_over["pid"] == pid
    assert json.loads((tmp_path / "batch.lock").read_text())["pid"] == os.getpid()
    lock.release()


def test_lock_of_a_live_process_is_not_taken_over(tmp_path):
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(30)"])
    try:
        (tmp_path / "batch.lock").write_text(json.dumps(
            {"pid": sleeper.pid, "host": socket.gethostname(), "started": "x",
             "start_ticks": batch._process_start_ticks(sleeper.pid)}))
        with pytest.raises(BatchLockedError, match="another batch is writing here"):
            BatchLock(tmp_path).acquire(resume=True)
        # the same PID with another start time is a reused PID: the lock is stale
        (tmp_path / "batch.lock").write_text(json.dumps(
            {"pid": sleeper.pid, "host": socket.gethostname(), "started": "x",
             "start_ticks": (batch._process_start_ticks(sleeper.pid) or 0) + 1}))
        BatchLock(tmp_path).acquire(resume=True).release()
        (tmp_path / "batch.lock").write_text(json.dumps(
            {"pid": sleeper.pid, "host": "another-host", "started": "x"}))
        with pytest.raises(BatchLockedError, match="cannot check"):
            BatchLock(tmp_path).acquire(resume=True)
    finally:
        sleeper.kill()
        sleeper.wait()


# ----------------------------------------------------------------------------- running

def test_batch_runs_every_study_writes_comparison_and_log(plan_dir, tmp_path):
    plan = batch.load_plan(plan_dir / "plan.toml")
    out = tmp_path / "out"
    res = run_batch(plan, out, engine=STANDIN, quiet=True)
    assert res.exit_status == 0 and all(s.status == "done" for s in res.studies)
    for s in plan.studies:
        folder = out / "studies" / s.name
        assert (folder / "summary.json").is_file() and (folder / "pack" / "report.html").is_file()
        assert len(list((folder / "blocks").glob("block-*.bin"))) == 6
        rec = json.loads((folder / "batch.json").read_text())
        assert rec["status"] == "done" and rec["blocks"] == 6
        effective = tomllib.loads((folder / "study.toml").read_text())
        assert effective["name"] == s.name
        assert effective["data"]["path"] == str(plan_dir / "history.csv")   # stands alone
        manifest = json.loads((folder / "manifest.json").read_text())
        assert manifest["study_file"] == str(folder / "study.toml")
    rows = list(csv.DictReader(io.StringIO((out / "comparison.csv").read_text())))
    assert len(rows) == 2 * len(plan.studies)
    assert {"grid:estimate.covariance", "grid:resample.length", "ceq_mean", "band_width_mean",
            "ceq_rank", "backtest_sharpe"} <= set(rows[0])
    row = next(r for r in rows if r["rule"] == "proposed")
    assert float(row["band_width_mean"]) == pytest.approx(0.8)
    assert float(row["ceq_loss"]) == pytest.approx(0.004 - float(row["ceq_mean"]))
    page = (out / "comparison.html").read_text()
    assert "<script" not in page and "http" not in page and "held up best" in page
    log = (out / "batch.log").read_text()
    assert "batch started" in log and "batch finished" in log
    assert all(re.match(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z  ", line)
               for line in log.splitlines() if not line.startswith(" "))
    assert not (out / "batch.lock").exists()
    # the summary numbers come from all 60 draws merged in block order
    assert all(v["n"] == 60 for v in _summaries(out).values())


def test_results_do_not_depend_on_executor_workers_or_task_grouping(plan_dir, tmp_path):
    plan = batch.load_plan(plan_dir / "plan.toml")
    run_batch(plan, tmp_path / "one", engine=STANDIN, quiet=True)
    ex = ProcessExecutor(2)
    try:
        run_batch(plan, tmp_path / "two", engine=STANDIN, quiet=True, executor=ex)
        run_batch(plan, tmp_path / "grouped", engine=STANDIN, quiet=True, executor=ex,
                  blocks_per_task=4)
    finally:
        ex.close()
    one = _summaries(tmp_path / "one")
    assert len(one) == 4
    assert _summaries(tmp_path / "two") == one
    assert _summaries(tmp_path / "grouped") == one
    # and not on the block size either (seeds come per fixed chunk of draws)
    (plan_dir / "study.toml").write_text(STUDY.replace("block_size = 10", "block_size = 30"))
    run_batch(batch.load_plan(plan_dir / "plan.toml"), tmp_path / "big", engine=STANDIN, quiet=True)
    assert _summaries(tmp_path / "big") == one


def test_a_failing_study_is_recorded_and_the_others_complete(plan_dir, tmp_path):
    plan = _plan(plan_dir, 'study = "study.toml"\n[grid]\n'
                 '"estimate.covariance" = ["sample", "infeasible", "ledoit-wolf-identity"]\n')
    out = tmp_path / "out"
    res = run_batch(plan, out, engine=STANDIN, quiet=True)
    assert res.exit_status == batch.EXIT_STUDIES_FAILED
    status = {s.name: s.status for s in res.studies}
    assert status == {"covariance=sample": "done", "covariance=infeasible": "failed",
                      "covariance=ledoit-wolf-identity": "done"}
    rows = list(csv.DictReader(io.StringIO((out / "comparison.csv").read_text())))
    bad = [r for r in rows if r["study"] == "covariance=infeasible"]
    assert len(bad) == 1 and bad[0]["status"] == "failed" and "lows sum to 1.2" in bad[0]["error"]
    assert "covariance=infeasible: FAILED" in (out / "batch.log").read_text()
    rec = json.loads((out / "studies" / "covariance=infeasible" / "batch.json").read_text())
    assert rec["status"] == "failed" and "lows sum" in rec["error"]
    assert "did not finish" in (out / "comparison.html").read_text()


def test_a_block_failing_in_a_worker_fails_only_its_study(plan_dir, tmp_path):
    plan = batch.load_plan(plan_dir / "plan.toml")
    engine = _engine_with(fail_block=2)
    ex = ProcessExecutor(2)
    try:
        res = run_batch(plan, tmp_path / "out", engine=engine, quiet=True, executor=ex)
    finally:
        ex.close()
    assert res.exit_status == 1 and {s.status for s in res.studies} == {"failed"}
    assert all("stand-in failure in block 2" in s.error for s in res.studies)


def test_studies_are_streamed_so_memory_stays_bounded(plan_dir, tmp_path):
    plan = _plan(plan_dir, 'study = "study.toml"\n[grid]\n"resample.seed" = [1, 2, 3, 4, 5, 6, 7, 8, 9, 10]\n')
    LIVE.update(now=0, max=0)
    run_batch(plan, tmp_path / "out", engine=STANDIN, quiet=True)
    assert LIVE["now"] == 0
    assert 1 <= LIVE["max"] <= 4          # never all ten studies prepared at once


def test_resume_skips_finished_work_and_recomputes_corrupt_blocks(plan_dir, tmp_path):
    plan = batch.load_plan(plan_dir / "plan.toml")
    clean = tmp_path / "clean"
    run_batch(plan, clean, engine=STANDIN, quiet=True)
    out = tmp_path / "out"
    run_batch(plan, out, engine=STANDIN, quiet=True)
    name = plan.studies[1].name
    folder = out / "studies" / name
    (folder / "batch.json").unlink()
    (folder / "summary.json").unlink()
    b1, b4 = folder / "blocks" / "block-000001.bin", folder / "blocks" / "block-000004.bin"
    b1.write_bytes(b1.read_bytes()[:-7])                            # half-written
    raw = bytearray(b4.read_bytes())
    raw[-3] ^= 0xFF                                                 # altered
    b4.write_bytes(bytes(raw))
    (folder / "blocks" / ".block-000002.bin.tmp-999").write_bytes(b"partial")
    with pytest.raises(BatchLockedError, match="not empty"):
        run_batch(plan, out, engine=STANDIN, quiet=True)
    res = run_batch(plan, out, engine=STANDIN, quiet=True, resume=True)
    by = {s.name: s for s in res.studies}
    assert by[name].rejected == 2 and by[name].computed == 2
    assert all(by[s.name].computed == 0 for s in plan.studies if s.name != name)
    assert len(list((folder / "blocks" / "rejected").iterdir())) == 2
    assert not list((folder / "blocks").glob(".block-*"))
    log = (out / "batch.log").read_text()
    assert "block 1 rejected (truncated" in log and "block 4 rejected (checksum mismatch)" in log
    assert _summaries(out) == _summaries(clean)


def test_blocks_parked_by_a_crash_during_finishing_are_restored(plan_dir, tmp_path):
    """The runner replaces a run folder as a whole, so blocks are parked aside meanwhile."""
    plan = batch.load_plan(plan_dir / "plan.toml")
    out = tmp_path / "out"
    run_batch(plan, out, engine=STANDIN, quiet=True)
    before = _summaries(out)
    folder = out / "studies" / plan.studies[0].name
    os.replace(folder / "blocks", out / "studies" / f".{folder.name}.blocks")   # crash here
    (folder / "batch.json").unlink()
    res = run_batch(plan, out, engine=STANDIN, quiet=True, resume=True)
    assert [s.computed for s in res.studies] == [0, 0, 0, 0]
    assert len(list((folder / "blocks").glob("block-*.bin"))) == 6
    assert not list((out / "studies").glob(".*"))
    assert _summaries(out) == before


def test_engine_checksum_is_checked_too(plan_dir, tmp_path):
    """A payload that passes the store's checks but not the engine's is never merged."""
    plan = _plan(plan_dir, 'study = "study.toml"\n')
    out = tmp_path / "out"
    run_batch(plan, out, engine=STANDIN, quiet=True)
    folder = out / "studies" / "study"
    first = json.loads((folder / "summary.json").read_text())["resample"]
    (folder / "batch.json").unlink()
    store = BlockStore(folder / "blocks", batch.fingerprint(study_settings(plan, plan.studies[0]),
                                                            batch.engine_id(STANDIN)))
    store.write(0, store.read(0)[:-8])          # re-wrapped correctly, payload short by a draw
    res = run_batch(plan, out, engine=STANDIN, quiet=True, resume=True)
    assert res.studies[0].rejected == 1
    assert json.loads((folder / "summary.json").read_text())["resample"] == first


def test_changed_settings_never_merge_old_blocks(plan_dir, tmp_path):
    plan = _plan(plan_dir, 'study = "study.toml"\n')
    out = tmp_path / "out"
    run_batch(plan, out, engine=STANDIN, quiet=True)
    (plan_dir / "study.toml").write_text(STUDY.replace("seed = 7", "seed = 8"))
    plan = batch.load_plan(plan_dir / "plan.toml")
    res = run_batch(plan, out, engine=STANDIN, quiet=True, resume=True)
    assert res.studies[0].rejected == 6 and res.studies[0].computed == 6
    fresh = tmp_path / "fresh"
    run_batch(plan, fresh, engine=STANDIN, quiet=True)
    assert _summaries(out) == _summaries(fresh)


def test_disk_full_mid_run_stops_cleanly_and_resume_finishes(plan_dir, tmp_path, monkeypatch):
    plan = batch.load_plan(plan_dir / "plan.toml")
    clean = tmp_path / "clean"
    run_batch(plan, clean, engine=STANDIN, quiet=True)
    out = tmp_path / "out"
    real = BlockStore.write
    calls = {"n": 0}

    def write(self, i, payload, **kw):
        calls["n"] += 1
        if calls["n"] == 9:
            raise OSError(errno.ENOSPC, "No space left on device")
        return real(self, i, payload, **kw)
    monkeypatch.setattr(BlockStore, "write", write)
    with pytest.raises(BatchOutputError, match="No space left on device; finished blocks are intact"):
        run_batch(plan, out, engine=STANDIN, quiet=True)
    monkeypatch.undo()
    assert not (out / "batch.lock").exists()
    kept = sorted((out / "studies").glob("*/blocks/block-*.bin"))
    assert len(kept) == 8                                            # everything written before
    assert "No space left" in (out / "batch.log").read_text()
    res = run_batch(plan, out, engine=STANDIN, quiet=True, resume=True)
    assert res.exit_status == 0 and sum(s.rejected for s in res.studies) == 0
    assert sum(s.computed for s in res.studies) == 24 - 8
    assert _summaries(out) == _summaries(clean)


def test_real_disk_full_on_a_tiny_file_system(plan_dir, tmp_path):
    """A 64 KiB tmpfs fills up mid-run: clear error, the blocks on it intact and reused by a
    resume once there is room (the folder copied elsewhere)."""
    mnt = tmp_path / "tiny"
    mnt.mkdir()
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=64k", "tmpfs", str(mnt)],
                       capture_output=True)
    if r.returncode != 0:
        pytest.skip("cannot mount a tmpfs here (needs root and CAP_SYS_ADMIN)")
    try:
        (plan_dir / "study.toml").write_text(STUDY.replace("draws = 60", "draws = 4000")
                                             .replace("block_size = 10", "block_size = 500"))
        plan = _plan(plan_dir, 'study = "study.toml"\n[grid]\n"resample.seed" = [1, 2, 3]\n')
        out = mnt / "out"
        with pytest.raises(BatchOutputError, match="No space left on device"):
            run_batch(plan, out, engine=STANDIN, quiet=True)
        blocks = sorted(out.glob("studies/*/blocks/block-*.bin"))
        assert blocks, "the file system should have held a few blocks"
        fp = {}
        for b in blocks:
            st = b.parent.parent.name
            s = next(p for p in plan.studies if p.name == st)
            fp.setdefault(st, batch.fingerprint(study_settings(plan, s), batch.engine_id(STANDIN)))
            standin_from_bytes(BlockStore(b.parent, fp[st]).read(int(b.stem.split("-")[1])))
        assert not list(out.glob("studies/*/blocks/.block-*"))       # no temporaries left
        assert not (out / "batch.lock").exists()
        import shutil

        moved = tmp_path / "moved"                                   # room again: resume
        shutil.copytree(out, moved)
    finally:
        subprocess.run(["umount", str(mnt)], check=False)
    res = run_batch(plan, moved, engine=STANDIN, quiet=True, resume=True)
    assert res.exit_status == 0
    assert sum(s.blocks - s.computed for s in res.studies) == len(blocks)   # all reused
    run_batch(plan, tmp_path / "clean", engine=STANDIN, quiet=True)
    assert _summaries(moved) == _summaries(tmp_path / "clean")


def test_unwritable_output_folder_is_one_clear_line_and_status_3(plan_dir, tmp_path, capsys,
                                                                monkeypatch):
    monkeypatch.setenv("NOISEPROOF_BATCH_ENGINE", "test_batch:STANDIN")
    afile = tmp_path / "a-file"
    afile.write_text("not a folder")
    rc = main(["batch", str(plan_dir / "plan.toml"), "--out", str(afile / "out"), "--workers", "1"])
    err = capsys.readouterr().err.strip()
    assert rc == 3 and len(err.splitlines()) == 1
    assert err.startswith("noiseproof: error: cannot write") and "a-file/out" in err
    rc = main(["batch", str(plan_dir / "plan.toml"), "--out", "/proc/noiseproof-out",
               "--workers", "1"])
    assert rc == 3 and "cannot write /proc/noiseproof-out" in capsys.readouterr().err


def test_local_worker_death_is_retried_and_results_unchanged(plan_dir, tmp_path):
    plan = batch.load_plan(plan_dir / "plan.toml")
    run_batch(plan, tmp_path / "clean", engine=STANDIN, quiet=True)
    marker = tmp_path / "died"
    ex = ProcessExecutor(2)
    try:
        res = run_batch(plan, tmp_path / "out", engine=_engine_with(die_marker=str(marker),
                                                                   die_index=3),
                        quiet=True, executor=ex)
    finally:
        ex.close()
    assert marker.exists()                         # a worker really died mid-block
    assert res.exit_status == 0
    assert "worker process died" in (tmp_path / "out" / "batch.log").read_text()
    assert _summaries(tmp_path / "out") == _summaries(tmp_path / "clean")


# ----------------------------------------------------------------------------- command line

def test_cli_dry_run_lists_studies_with_their_work(plan_dir, capsys, monkeypatch):
    monkeypatch.setenv("NOISEPROOF_BATCH_ENGINE", "test_batch:STANDIN")
    (plan_dir / "plan.toml").write_text(PLAN.replace('"resample.length" = [24, 36]',
                                                     '"resample.length" = [24, 36]\n'
                                                     '"rules.proposed.risk_aversion" = [2]'))
    rc = main(["batch", str(plan_dir / "plan.toml"), "--dry-run", "--workers", "2",
               "--out", str(plan_dir / "never")])
    out = capsys.readouterr().out
    assert rc == 0 and "4 studies" in out and "to run: 4 studies, 24 blocks, 240 draws" in out
    assert "covariance=ledoit-wolf-identity__length=36__risk_aversion=2" in out
    assert "rough time" in out and not (plan_dir / "never").exists()
    (plan_dir / "plan.toml").write_text('study = "study.toml"\n[grid]\n'
                                        '"estimate.covariance" = ["sample", "infeasible"]\n')
    rc = main(["batch", str(plan_dir / "plan.toml"), "--dry-run"])
    out = capsys.readouterr().out
    assert rc == 1 and "covariance=infeasible  error   group bounds cannot be met" in out


def test_cli_run_quiet_exit_statuses_and_lock(plan_dir, tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("NOISEPROOF_BATCH_ENGINE", "test_batch:STANDIN")
    out = tmp_path / "out"
    rc = main(["batch", str(plan_dir / "plan.toml"), "--out", str(out), "--workers", "1",
               "--quiet", "--packs", "*length=24"])
    cap = capsys.readouterr()
    assert rc == 0 and cap.out == "" and cap.err == ""
    packs = sorted(p.parent.parent.name for p in out.glob("studies/*/pack/report.html"))
    assert packs == ["covariance=ledoit-wolf-identity__length=24", "covariance=sample__length=24"]
    rc = main(["batch", str(plan_dir / "plan.toml"), "--out", str(out), "--workers", "1"])
    assert rc == 2 and "not empty; use --resume" in capsys.readouterr().err
    rc = main(["batch", str(plan_dir / "plan.toml"), "--out", str(out), "--resume", "--no-pack"])
    cap = capsys.readouterr()
    assert rc == 0 and "4 studies: 4 done, 0 failed" in cap.out
    # a live batch holds the folder: a second one is refused with status 2
    with BatchLock(out).acquire(resume=True):
        rc = main(["batch", str(plan_dir / "plan.toml"), "--out", str(out), "--resume"])
        assert rc == 2 and "another batch is writing here" in capsys.readouterr().err
    rc = main(["batch", str(plan_dir / "missing.toml")])
    assert rc == 2 and "plan file not found" in capsys.readouterr().err
    rc = main(["batch", str(plan_dir / "plan.toml"), "--scheduler", "tcp://x:1", "--dask-local", "2"])
    assert rc == 2 and "not both" in capsys.readouterr().err


def _cli_env(**extra):
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(HERE), str(ROOT), env.get("PYTHONPATH", "")])
    env.update(extra)
    return env


def test_sigkill_mid_run_then_resume_gives_the_uninterrupted_numbers(plan_dir, tmp_path):
    """The batch process is killed with SIGKILL; --resume takes over its stale lock."""
    plan = batch.load_plan(plan_dir / "plan.toml")
    run_batch(plan, tmp_path / "clean", engine=STANDIN, quiet=True)
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "noiseproof", "batch", str(plan_dir / "plan.toml"),
           "--out", str(out), "--workers", "2", "--quiet"]
    env = _cli_env(NOISEPROOF_BATCH_ENGINE="test_batch:STANDIN",
                   NOISEPROOF_BATCH_BLOCK_DELAY="0.15")
    proc = subprocess.Popen(cmd, env=env, start_new_session=True)
    try:
        deadline = time.time() + 60
        while len(list(out.glob("studies/*/blocks/block-*.bin"))) < 5:
            assert proc.poll() is None, "the batch ended before it could be killed"
            assert time.time() < deadline
            time.sleep(0.02)
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
    finally:
        try:
            os.killpg(proc.pid, signal.SIGKILL)    # its worker processes, if any are left
        except ProcessLookupError:
            pass
    written = len(list(out.glob("studies/*/blocks/block-*.bin")))
    assert 5 <= written < 24 and (out / "batch.lock").exists()
    r = subprocess.run(cmd[:-1] + ["--resume"], env=_cli_env(
        NOISEPROOF_BATCH_ENGINE="test_batch:STANDIN"), capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    assert f"took over a stale lock left by PID {proc.pid}" in r.stderr
    assert "4 studies: 4 done" in r.stdout
    assert _summaries(out) == _summaries(tmp_path / "clean")


def test_dask_options_without_the_extra_are_one_clear_line(plan_dir, capsys, monkeypatch):
    monkeypatch.setitem(sys.modules, "distributed", None)      # as if not installed
    rc = main(["batch", str(plan_dir / "plan.toml"), "--dask-local", "2"])
    err = capsys.readouterr().err
    assert rc == 2 and "needs the 'dask' extra: pip install 'noiseproof[dask]'" in err
    assert len(err.strip().splitlines()) == 1


def test_set_assigns_quoted_keys_as_given_and_merges_sub_tables(plan_dir):
    plan = _plan(plan_dir, 'study = "study.toml"\n[set]\n"backtest.cost_bps" = {A = 10, B = 5}\n'
                 '[set.resample]\ndraws = 30\n')
    s = study_settings(plan, plan.studies[0])
    assert s.backtest.cost_bps == {"A": 10, "B": 5} and s.resample.draws == 30
    assert s.resample.length == 24                      # merged, not replaced
    plan = _plan(plan_dir, 'study = "study.toml"\n[grid]\nresample.draws = [10, 20]\n'
                 '"rules.proposed.bounds" = [{}, {A = [0.0, 0.5]}]\n')
    assert [s.name for s in plan.studies] == ["draws=10__bounds=empty", "draws=10__bounds=A-0.0-0.5",
                                             "draws=20__bounds=empty", "draws=20__bounds=A-0.0-0.5"]
    assert study_settings(plan, plan.studies[1]).rules[0].params["bounds"] == {"A": [0.0, 0.5]}


def test_sigterm_stops_cleanly_with_status_130_and_resume_finishes(plan_dir, tmp_path):
    """A job scheduler's SIGTERM: lock released, blocks kept, --resume completes."""
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "noiseproof", "batch", str(plan_dir / "plan.toml"),
           "--out", str(out), "--workers", "1"]
    env = _cli_env(NOISEPROOF_BATCH_ENGINE="test_batch:STANDIN",
                   NOISEPROOF_BATCH_BLOCK_DELAY="0.1")
    proc = subprocess.Popen(cmd, env=env, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.time() + 60
        while len(list(out.glob("studies/*/blocks/block-*.bin"))) < 3:
            assert proc.poll() is None and time.time() < deadline
            time.sleep(0.02)
        proc.send_signal(signal.SIGTERM)
        _, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 130 and "rerun with --resume" in err
    assert not (out / "batch.lock").exists()
    assert "batch interrupted" in (out / "batch.log").read_text()
    r = subprocess.run(cmd + ["--resume", "--quiet"], env=_cli_env(
        NOISEPROOF_BATCH_ENGINE="test_batch:STANDIN"), capture_output=True, text=True, timeout=120)
    assert r.returncode == 0 and "took over" not in r.stderr
    run_batch(batch.load_plan(plan_dir / "plan.toml"), tmp_path / "clean", engine=STANDIN,
              quiet=True)
    assert _summaries(out) == _summaries(tmp_path / "clean")


def test_blocks_of_changed_settings_are_reported_once(plan_dir, tmp_path):
    plan = _plan(plan_dir, 'study = "study.toml"\n')
    out = tmp_path / "out"
    run_batch(plan, out, engine=STANDIN, quiet=True)
    (plan_dir / "study.toml").write_text(STUDY.replace("seed = 7", "seed = 9"))
    run_batch(batch.load_plan(plan_dir / "plan.toml"), out, engine=STANDIN, quiet=True,
              resume=True)
    log = (out / "batch.log").read_text()
    assert log.count("6 block(s) were written for other settings") == 1
    assert "block 0 rejected" not in log


def test_tasks_group_consecutive_cheap_blocks_up_to_the_modelled_budget():
    from collections import deque

    from noiseproof.batch import TASK_SECONDS, _next_task

    costs = [0.6, 0.6, 0.05, 0.05, 0.2, 0.01, 0.01, 0.3, 0.01, 0.01]
    todo = deque(range(len(costs)))
    tasks = []
    while todo:
        tasks.append(_next_task(todo, 1, costs))
    # an expensive block goes alone; cheap ones share a task while they fit the budget
    assert tasks == [[0], [1], [2, 3], [4, 5, 6], [7], [8, 9]]
    for t in tasks:
        assert len(t) == 1 or sum(costs[i] for i in t) <= TASK_SECONDS
    # only consecutive blocks share a task (a gap: blocks already on disk)
    todo = deque([2, 3, 5, 6])
    assert _next_task(todo, 1, costs) == [2, 3] and _next_task(todo, 1, costs) == [5, 6]
    # without costs: a fixed number of consecutive blocks
    todo = deque([0, 1, 2, 4, 5])
    assert [_next_task(todo, 2, None) for _ in range(3)] == [[0, 1], [2], [4, 5]]
