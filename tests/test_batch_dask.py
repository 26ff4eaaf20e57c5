"""`noiseproof batch` on a real local Dask cluster (worker processes, not threads).

One 2-worker cluster is started for the module (a few seconds) and used through both
``DaskExecutor(client=...)`` and the command line's ``--scheduler ADDRESS``.
"""
from __future__ import annotations

import json

import pytest

distributed = pytest.importorskip("distributed")

from noiseproof import batch  # noqa: E402
from noiseproof.batch import run_batch  # noqa: E402
from noiseproof.cli import main  # noqa: E402
from noiseproof.executors import DaskExecutor  # noqa: E402

from test_batch import STANDIN, _engine_with, _summaries, plan_dir  # noqa: E402,F401
from test_batch_engine import reference  # noqa: E402,F401


@pytest.fixture(scope="module")
def cluster():
    import logging

    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=":0", silence_logs=logging.ERROR) as c:
        with distributed.Client(c) as client:
            yield c, client


def test_dask_gives_the_same_numbers_as_one_local_worker(plan_dir, tmp_path, cluster):
    _, client = cluster
    plan = batch.load_plan(plan_dir / "plan.toml")
    run_batch(plan, tmp_path / "one", engine=STANDIN, quiet=True)
    ex = DaskExecutor(client=client)
    assert ex.slots == 2
    res = run_batch(plan, tmp_path / "dask", engine=STANDIN, quiet=True, executor=ex)
    ex.close()
    assert res.exit_status == 0 and res.executor.startswith("Dask, 2 workers")
    assert _summaries(tmp_path / "dask") == _summaries(tmp_path / "one")


def test_a_dask_worker_dying_mid_block_is_retried_elsewhere(plan_dir, tmp_path, cluster):
    _, client = cluster
    plan = batch.load_plan(plan_dir / "plan.toml")
    run_batch(plan, tmp_path / "one", engine=STANDIN, quiet=True)
    marker = tmp_path / "died"
    pids_before = set(client.run(lambda: __import__("os").getpid()).values())
    ex = DaskExecutor(client=client)
    res = run_batch(plan, tmp_path / "dask", engine=_engine_with(die_marker=str(marker),
                                                                 die_index=4),
                    quiet=True, executor=ex)
    ex.close()
    assert marker.exists()                                  # the worker really died mid-block
    assert int(marker.read_text()) in pids_before           # it was one of the cluster's workers
    client.wait_for_workers(2, timeout=30)
    assert res.exit_status == 0
    assert _summaries(tmp_path / "dask") == _summaries(tmp_path / "one")


def test_cli_scheduler_address(plan_dir, tmp_path, cluster, capsys, monkeypatch):
    c, _ = cluster
    monkeypatch.setenv("NOISEPROOF_BATCH_ENGINE", "test_batch:STANDIN")
    rc = main(["batch", str(plan_dir / "plan.toml"), "--out", str(tmp_path / "out"),
               "--scheduler", c.scheduler_address, "--no-pack"])
    out = capsys.readouterr().out
    assert rc == 0 and "4 studies: 4 done" in out and "Dask, 2 workers" in out
    assert not list((tmp_path / "out").glob("studies/*/pack"))
    rec = json.loads(next((tmp_path / "out").glob("studies/*/batch.json")).read_text())
    assert rec["status"] == "done"


def test_unreachable_scheduler_is_a_clear_settings_error():
    with pytest.raises(batch.SettingsError, match="cannot reach the Dask scheduler at tcp://127.0.0.1:1"):
        DaskExecutor(address="tcp://127.0.0.1:1", connect_timeout=1)


def test_real_engine_on_dask_matches_single_runs_even_when_a_worker_dies(reference, tmp_path,
                                                                         cluster):
    import dataclasses
    import functools

    from test_batch_engine import differences, dying_run_block, numbers

    _, client = cluster
    inputs, expected = reference
    plan = batch.load_plan(inputs / "plan.toml")
    ex = DaskExecutor(client=client)
    res = run_batch(plan, tmp_path / "dask", quiet=True, pack=False, executor=ex)
    assert res.exit_status == 0 and differences(numbers(tmp_path / "dask"), expected) == []
    marker = tmp_path / "died"
    engine = dataclasses.replace(batch.default_engine(),
                                 run_block=functools.partial(dying_run_block, str(marker), 2))
    res = run_batch(plan, tmp_path / "dask-death", quiet=True, pack=False, executor=ex,
                    engine=engine)
    ex.close()
    assert res.exit_status == 0, [s.error for s in res.studies]
    assert marker.exists()
    assert differences(numbers(tmp_path / "dask-death"), expected) == []
    client.wait_for_workers(2, timeout=30)


def test_cli_dask_local_starts_and_stops_its_own_cluster(plan_dir, tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("NOISEPROOF_BATCH_ENGINE", "test_batch:STANDIN")
    rc = main(["batch", str(plan_dir / "plan.toml"), "--out", str(tmp_path / "out"),
               "--dask-local", "1", "--no-pack"])
    out = capsys.readouterr().out
    assert rc == 0 and "Dask, 1 worker / 1 thread on a local cluster" in out
    run_batch(batch.load_plan(plan_dir / "plan.toml"), tmp_path / "one", engine=STANDIN,
              quiet=True)
    assert _summaries(tmp_path / "out") == _summaries(tmp_path / "one")


def _worker_settings():
    import os

    import dask
    from threadpoolctl import threadpool_info

    from noiseproof.executors import LOCAL_CLUSTER_HOUSEKEEPING

    return ({k: os.environ.get(k) for k in ("MALLOC_MMAP_THRESHOLD_", "MALLOC_TRIM_THRESHOLD_",
                                            "OPENBLAS_NUM_THREADS")},
            max(i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"),
            {k: dask.config.get(k) for k in LOCAL_CLUSTER_HOUSEKEEPING},
            dask.config.get("distributed.worker.profile.enabled"))


def test_local_cluster_workers_run_like_local_worker_processes(monkeypatch):
    """A cluster started for the batch (``--dask-local``) is ours: its workers start with
    one BLAS thread and with the allocator settings of simulate.retain_freed_memory, as
    environment variables glibc reads at a process's start (Dask's own default trims freed
    memory at 64 KiB); and with the quieter house-keeping and no sampling profiler."""
    from noiseproof.executors import LOCAL_CLUSTER_HOUSEKEEPING
    from simulate.engine import MALLOC_SETTINGS

    for name in MALLOC_SETTINGS:
        monkeypatch.delenv(name, raising=False)
    ex = DaskExecutor(local_workers=1)
    try:
        (env, threads, housekeeping, profiling), = ex.client.run(_worker_settings).values()
    finally:
        ex.close()
    assert env == {"MALLOC_MMAP_THRESHOLD_": str(32 << 20),
                   "MALLOC_TRIM_THRESHOLD_": str(1 << 30), "OPENBLAS_NUM_THREADS": "1"}
    assert threads == 1
    assert housekeeping == LOCAL_CLUSTER_HOUSEKEEPING and profiling is False
    import dask

    assert dask.config.get("distributed.admin.tick.interval") != "1s"   # this process: untouched
