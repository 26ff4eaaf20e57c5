"""Where blocks of draws run: this process, local worker processes, or a Dask cluster.

Every executor runs the same pure task ``fn(*args)`` and hands back a future that supports
``add_done_callback``, ``result()`` and ``cancel()``. Seeds live in the study's resampling
spec, so which executor ran a block, on how many workers and in which order, cannot change a
digit of the result.

Nothing here imports numpy or Dask at module level: worker processes import this module to
run their initialiser, and Dask is an optional extra (``pip install 'noiseproof[dask]'``).
"""
from __future__ import annotations

import multiprocessing
import os
import signal
import time
from concurrent.futures import Future, ProcessPoolExecutor
from typing import Any, Callable, Optional

from estimators.core import SettingsError

__all__ = [
    "InlineExecutor",
    "ProcessExecutor",
    "DaskExecutor",
    "make_executor",
    "run_blocks_task",
    "WorkerLost",
]

#: Threading knobs set to 1 inside worker processes so that N workers use N cores
#: (BLAS and numba would otherwise each start one thread per core).
_THREAD_VARIABLES = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS",
                     "NUMBA_NUM_THREADS", "VECLIB_MAXIMUM_THREADS")


class WorkerLost(Exception):
    """A worker process died while it held a task (killed, out of memory)."""


def run_blocks_task(run_block: Callable, to_bytes: Callable, spec: Any, indices: tuple,
                    delay: float = 0.0) -> list:
    """The unit of work sent to a worker: run blocks ``indices`` of ``spec``.

    Parameters
    ----------
    run_block : callable
        Pure ``run_block(spec, index) -> BlockResult`` (module-level, so it pickles by name).
    to_bytes : callable
        ``to_bytes(block_result) -> bytes``: the durable, checksummed form.
    spec : object
        The study's resampling spec (seeds included).
    indices : tuple of int
        Consecutive block indices of one study (one, or several cheap ones: see
        ``noiseproof.batch.TASK_SECONDS`` and ``--blocks-per-task``).
    delay : float, default 0
        Seconds to sleep before each block (test hook ``NOISEPROOF_BATCH_BLOCK_DELAY``:
        slows a run down so that fault tests can interrupt it mid-way).

    Returns
    -------
    list of bytes
        One payload per index, in the order given.
    """
    out = []
    for i in indices:
        if delay > 0:
            time.sleep(delay)
        out.append(to_bytes(run_block(spec, i)))
    return out


def _worker_init() -> None:
    """Initialise a local worker process: one thread each, Ctrl-C handled by the parent."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    for name in _THREAD_VARIABLES:
        # numba re-reads NUMBA_NUM_THREADS at each compile and refuses a value that differs
        # from its launched pool: cap numba with set_num_threads instead
        if name != "NUMBA_NUM_THREADS":
            os.environ[name] = "1"
    try:
        import numba

        numba.set_num_threads(1)
    except Exception:  # pragma: no cover - numba missing or already running threads
        pass
    # one BLAS thread: a no-op when the worker inherited one (the command line sets
    # OPENBLAS_NUM_THREADS=1 before numpy loads); setting it anyway would restart
    # OpenBLAS's helper threads, which busy-wait for about 0.1 s
    try:
        from simulate import pin_one_blas_thread
    except ImportError:  # pragma: no cover - a custom engine without the simulate package
        pass
    else:
        pin_one_blas_thread()
    _retain_freed_memory()


def _retain_freed_memory() -> None:
    """The engine's chunks reuse freed memory instead of faulting in new pages (local
    processes only; see ``simulate.retain_freed_memory``)."""
    try:
        from simulate import retain_freed_memory
    except ImportError:  # pragma: no cover - a custom engine without the simulate package
        return
    retain_freed_memory()


class InlineExecutor:
    """Runs each task at submission, in this process (``--workers 1``)."""

    kind = "inline"
    slots = 1

    def __init__(self):
        _retain_freed_memory()

    def describe(self) -> str:
        return "1 worker (this process)"

    def share(self, obj, key: str = ""):
        return obj

    def unshare(self, ref) -> None:
        return None

    def submit(self, fn, *args, key: str = "") -> Future:
        fut: Future = Future()
        try:
            fut.set_result(fn(*args))
        except (KeyboardInterrupt, SystemExit):
            raise
        except BaseException as exc:  # handed to the caller through the future
            fut.set_exception(exc)
        return fut

    def restart(self, generation: Optional[int] = None) -> None:
        return None

    def close(self) -> None:
        return None


class ProcessExecutor:
    """A pool of local worker processes (``--workers N``).

    Workers start through ``forkserver`` (``spawn`` where that is missing), never ``fork``:
    a forked child would inherit the batch's lock and the parent's threads. Each worker
    runs single-threaded BLAS and numba so that N workers use N cores.
    """

    kind = "processes"

    def __init__(self, workers: int, *, preload: tuple = ()):
        if workers < 1:
            raise SettingsError(f"--workers must be at least 1, not {workers}")
        self.slots = int(workers)
        method = "forkserver" if "forkserver" in multiprocessing.get_all_start_methods() else "spawn"
        self._ctx = multiprocessing.get_context(method)
        if method == "forkserver" and preload:
            # modules imported once by the fork server, so each worker (and each restart
            # after a dead worker) starts without importing them again
            self._ctx.set_forkserver_preload(["__main__", *preload])
        self.generation = 0
        self._pool = self._new_pool()

    def _new_pool(self) -> ProcessPoolExecutor:
        return ProcessPoolExecutor(max_workers=self.slots, mp_context=self._ctx,
                                   initializer=_worker_init)

    def describe(self) -> str:
        return f"{self.slots} local worker process{'es' if self.slots != 1 else ''}"

    def share(self, obj, key: str = ""):
        return obj

    def unshare(self, ref) -> None:
        return None

    def submit(self, fn, *args, key: str = "") -> Future:
        from concurrent.futures.process import BrokenProcessPool

        try:
            fut = self._pool.submit(fn, *args)
        except BrokenProcessPool:  # a worker died since the last submission
            self.restart(self.generation)
            fut = self._pool.submit(fn, *args)
        fut.generation = self.generation
        return fut

    def restart(self, generation: Optional[int] = None) -> None:
        """Replace a pool broken by a dead worker (every future it held has failed).

        ``generation`` is the pool generation of a failed future: the pool is replaced only
        if that is still the current one (every future of a broken pool reports it).
        """
        if generation is not None and generation != self.generation:
            return
        try:
            self._pool.shutdown(wait=False, cancel_futures=True)
        finally:
            self.generation += 1
            self._pool = self._new_pool()

    def close(self) -> None:
        self._pool.shutdown(wait=True, cancel_futures=True)


#: Dask settings of a ``--dask-local`` cluster's periodic house-keeping. With Dask's defaults
#: (event-loop tick every 20 ms, system monitor every 0.5 s with disk counters, memory
#: monitor every 0.1 s) an idle 2-worker cluster used about 10 % of a core (scheduler and
#: nannies 4-5 %, each worker 2-3 %); with these about 1.7 % (measured over 15 s, twice).
#: The memory monitor still pauses or restarts a worker near its memory limit, within a
#: second instead of a tenth.
LOCAL_CLUSTER_HOUSEKEEPING = {"distributed.admin.tick.interval": "1s",
                              "distributed.admin.system-monitor.interval": "5s",
                              "distributed.admin.system-monitor.disk": False,
                              "distributed.worker.memory.monitor-interval": "1s"}


def _hold(obj):
    """Identity task: keeps a study's spec on the cluster, recomputable if its worker dies."""
    return obj


def _import_distributed():
    try:
        import distributed  # noqa: F401
    except ImportError:
        raise SettingsError(
            "the Dask executor needs the 'dask' extra: pip install 'noiseproof[dask]'") from None
    return distributed


class DaskExecutor:
    """Blocks as tasks on a Dask distributed cluster.

    ``address`` connects to an existing scheduler (``--scheduler``); ``local_workers``
    starts a local cluster of that many single-threaded worker processes
    (``--dask-local``); ``client`` uses a client the caller owns (tests, notebooks).

    A worker that dies mid-block loses nothing but time: the scheduler reruns the task
    elsewhere (up to the cluster's ``allowed-failures``). The spec each block needs travels
    with the task (or, when large, is held by a recomputable task rather than scattered
    data), so it survives the death too.
    Worker machines need noiseproof installed (the same version as the client).
    """

    kind = "dask"

    def __init__(self, *, address: Optional[str] = None, local_workers: Optional[int] = None,
                 client=None, connect_timeout: float = 20.0):
        distributed = _import_distributed()
        self._cluster = None
        self._own_client = client is None
        if client is not None:
            self._client = client
        elif address is not None:
            try:
                self._client = distributed.Client(address, timeout=f"{connect_timeout}s")
            except (OSError, TimeoutError) as exc:
                raise SettingsError(
                    f"cannot reach the Dask scheduler at {address} ({exc.__class__.__name__})"
                ) from None
        else:
            n = int(local_workers or 1)
            if n < 1:
                raise SettingsError(f"--dask-local must be at least 1, not {n}")
            import logging

            import dask

            # one thread per numerical library in each worker, whatever the environment says
            env = {name: "1" for name in _THREAD_VARIABLES}
            # this cluster's workers are ours, like local worker processes: the C allocator
            # keeps freed memory for reuse (see simulate.retain_freed_memory; Dask's own
            # default trims at 64 KiB, so every chunk's arrays would come back as fresh
            # pages), and the thread counts again, for libraries loaded before the worker
            # applies `env`. Read when a process starts (glibc) or loads the library, hence
            # set before the nannies spawn their workers (restarted workers get them too)
            spawn_env = dict(dask.config.get("distributed.nanny.pre-spawn-environ") or {})
            spawn_env.update({name: 1 for name in _THREAD_VARIABLES})
            try:
                from simulate.engine import MALLOC_SETTINGS
            except ImportError:  # pragma: no cover - a custom engine without simulate
                MALLOC_SETTINGS = {}
            spawn_env.update(MALLOC_SETTINGS)
            # the workers' sampling profiler and GIL monitor cost compute time in every
            # task (the worker's threads interrupt the one computing); a batch needs neither;
            # and the periodic house-keeping runs less often (LOCAL_CLUSTER_HOUSEKEEPING)
            with dask.config.set({"distributed.worker.profile.enabled": False,
                                  "distributed.admin.system-monitor.gil.enabled": False,
                                  "distributed.nanny.pre-spawn-environ": spawn_env,
                                  **LOCAL_CLUSTER_HOUSEKEEPING}):
                self._cluster = distributed.LocalCluster(
                    n_workers=n, threads_per_worker=1, processes=True, dashboard_address=":0",
                    silence_logs=logging.ERROR, env=env)
            self._client = distributed.Client(self._cluster)
        self._address = address
        info = self._client.scheduler_info()
        self.slots = max(1, sum(int(w.get("nthreads", 1)) for w in info.get("workers", {}).values()))
        self._n_workers = len(info.get("workers", {}))

    @property
    def client(self):
        return self._client

    def describe(self) -> str:
        where = f"scheduler {self._address}" if self._address else "a local cluster"
        w, t = self._n_workers, self.slots
        return (f"Dask, {w} worker{'s' if w != 1 else ''} / {t} thread{'s' if t != 1 else ''} "
                f"on {where}")

    #: Specs smaller than this (pickled) travel inside every task; larger ones are held on
    #: the cluster once and replicated to every worker.
    INLINE_SPEC_BYTES = 1 << 20

    def share(self, obj, key: str = ""):
        """What the tasks of one study receive as their spec.

        A small spec goes by value with every task: a task that depended on data held by
        one worker would be scheduled on that worker (data locality), leaving the others
        idle. A large one is held by a recomputable task and replicated to every worker.
        """
        import pickle

        if len(pickle.dumps(obj, protocol=pickle.HIGHEST_PROTOCOL)) < self.INLINE_SPEC_BYTES:
            return obj
        fut = self._client.submit(_hold, obj, key=f"noiseproof-spec-{key}-{time.time_ns()}",
                                  pure=False)
        try:
            self._client.replicate([fut])
        except Exception:  # pragma: no cover - replication is an optimisation only
            pass
        return fut

    def unshare(self, ref) -> None:
        if not hasattr(ref, "release") or not hasattr(ref, "key"):
            return
        try:
            ref.release()
        except Exception:  # pragma: no cover - already released or client closing
            pass

    def submit(self, fn, *args, key: str = ""):
        return self._client.submit(fn, *args, key=f"noiseproof-{key}-{time.time_ns()}",
                                   pure=False)

    def restart(self, generation: Optional[int] = None) -> None:
        return None

    def close(self) -> None:
        if self._own_client:
            self._client.close()
        if self._cluster is not None:
            self._cluster.close()


def make_executor(*, workers: Optional[int] = None, scheduler: Optional[str] = None,
                  dask_local: Optional[int] = None, preload: tuple = ()):
    """The executor the command-line options ask for (validated here, once)."""
    if scheduler is not None and dask_local is not None:
        raise SettingsError("give --scheduler or --dask-local, not both")
    if scheduler is not None or dask_local is not None:
        if workers is not None:
            raise SettingsError("--workers is for local processes; with Dask the cluster's "
                                "workers are used")
        return DaskExecutor(address=scheduler, local_workers=dask_local)
    n = (os.cpu_count() or 1) if workers is None else int(workers)
    if n < 1:
        raise SettingsError(f"--workers must be at least 1, not {n}")
    return InlineExecutor() if n == 1 else ProcessExecutor(n, preload=preload)


def is_worker_lost(exc: BaseException) -> bool:
    """True when a local worker process died under the task (the pool must be restarted).

    Dask retries tasks of dead workers by itself; its ``KilledWorker`` (raised after the
    cluster's ``allowed-failures``) is a failure of the study, not a case for this.
    """
    from concurrent.futures.process import BrokenProcessPool

    return isinstance(exc, (BrokenProcessPool, WorkerLost))
