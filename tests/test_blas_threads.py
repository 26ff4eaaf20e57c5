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
