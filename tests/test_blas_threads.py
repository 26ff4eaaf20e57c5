"""One BLAS thread per process: the command line sets it before numpy loads, and the
engine limits BLAS only when it is not already at one thread (setting it again in a forked
worker restarts OpenBLAS's helper threads, which busy-wait; see simulate.engine)."""
import contextlib
import os
import subprocess
import sys
from pathlib import Path

import pytest
from threadpoolctl import threadpool_info, threadpool_limits

from simulate import engine

ROOT = Path(__file__).resolve().parents[1]


def _blas_threads():
    return [i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"]


def test_one_blas_thread_limits_only_when_needed():
    with threadpool_limits(2, user_api="blas"):
        if max(_blas_threads()) < 2:
            pytest.skip("BLAS here cannot run two threads")
        ctx = engine._one_blas_thread()
        assert not isinstance(ctx, contextlib.nullcontext)
        with ctx:
            assert _blas_threads() and all(n == 1 for n in _blas_threads())
        assert max(_blas_threads()) == 2
    with threadpool_limits(1, user_api="blas"):
        assert isinstance(engine._one_blas_thread(), contextlib.nullcontext)


def test_command_line_sets_one_openblas_thread_unless_the_user_did():
    code = ("import os, noiseproof.cli; from threadpoolctl import threadpool_info; "
            "print(os.environ['OPENBLAS_NUM_THREADS'], "
            "max(i['num_threads'] for i in threadpool_info() if i['user_api'] == 'blas'))")
    env = {k: v for k, v in os.environ.items() if k != "OPENBLAS_NUM_THREADS"}
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, env=env, check=True,
                         capture_output=True, text=True).stdout.split()
    assert out == ["1", "1"]
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT,
                         env=dict(env, OPENBLAS_NUM_THREADS="2"), check=True,
                         capture_output=True, text=True).stdout.split()
    assert out[0] == "2"


def test_the_engine_limits_every_blas_library_it_calls():
    """numpy and scipy each bring their own OpenBLAS; the histories of 40 assets or more use
    scipy's (``dtrmm`` in ``simulate.generators.times_factor_t``). The engine's limit must
    cover both, or an in-process block would run scipy's product on two threads while a
    worker runs it on one (whose last bits can differ)."""
    import scipy.linalg.blas  # noqa: F401  (the library times_factor_t calls)

    loaded = {i["filepath"] for i in threadpool_info() if i["user_api"] == "blas"}
    limited = {c.filepath for c in engine._blas_controller().lib_controllers
               if c.user_api == "blas"}
    assert len(loaded) >= 1 and loaded <= limited
    with threadpool_limits(2, user_api="blas"):
        if max(_blas_threads()) < 2:
            pytest.skip("BLAS here cannot run two threads")
        with engine._one_blas_thread():
            assert all(n == 1 for n in _blas_threads())
