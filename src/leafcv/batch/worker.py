"""What runs in a worker process: the shared context, kept once per process, and one task at a time.

Chains at once: a worker runs one task at a time and samples at most ``chains_at_once`` chains of it at
the same time, ``max(1, cores // workers)`` (the cores of the worker's machine, shared by the workers on
that machine), so the chains running on a machine never outnumber its cores. httpstan's own chain pool
(a fork-based process pool of one process per core, per worker process) is replaced by one of that size
before the first fit, so that many workers do not fork many idle pools. ``[sampler] chains`` is never
changed; a chain's draws depend on the seed and chain number, not on when it ran.

Tests: tests/batch/test_runner.py, tests/sampling/test_batch.py.
"""
from __future__ import annotations

import os
import signal
import threading
import time
import traceback

_CONTEXT = None


class TaskError(Exception):
    """A task failed in a worker; ``details`` is the worker's traceback."""

    def __init__(self, message: str, details: str):
        super().__init__(message)
        self.details = details

    def __reduce__(self):
        return (TaskError, (str(self), self.details))


def limit_chain_pool(n: int | None, start_method: str = "fork") -> None:
    """Give httpstan's chain pool ``n`` processes (before it starts any). ``start_method``
    "forkserver" where tasks run in a thread of a process with other threads (a Dask worker): a chain
    process forked from such a thread crashes, one forked from a fork server does not."""
    if not n and start_method == "fork":
        return
    import concurrent.futures
    import multiprocessing as mp

    import httpstan.services_stub as stub

    current = stub.executor
    if getattr(current, "_processes", None):
        return
    stub.executor = concurrent.futures.ProcessPoolExecutor(max_workers=n or machine_cores(),
                                                           mp_context=mp.get_context(start_method),
                                                           initializer=stub.init_worker)


def kill_descendants(pid: int | None = None) -> int:
    """Kill every process below ``pid`` (default: this one); returns how many were killed."""
    import psutil

    try:
        children = psutil.Process(pid or os.getpid()).children(recursive=True)
    except psutil.NoSuchProcess:
        return 0
    for child in children:
        try:
            child.kill()
        except psutil.NoSuchProcess:
            pass
    psutil.wait_procs(children, timeout=5)
    return len(children)


def _watch_parent(parent: int) -> None:
    """End this worker and its chain processes when the process that started it is gone."""
    while True:
        if os.getppid() != parent:
            kill_descendants()
            os._exit(1)
        time.sleep(1.0)


def init_local_worker(context_bytes: bytes, parent: int) -> None:
    """Initialiser of a local worker process: the context; Ctrl-C is the coordinator's to handle."""
    import pickle

    global _CONTEXT
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _CONTEXT = pickle.loads(context_bytes)
    limit_chain_pool(_CONTEXT.chains_at_once)
    threading.Thread(target=_watch_parent, args=(parent,), daemon=True, name="leafcv-parent-watch").start()


def run_local(task, inputs):
    """A task in a local worker process (context from the initialiser)."""
    return _run(_CONTEXT, task, inputs)


_DASK_CONTEXTS: dict = {}


def run_dask(context, task, inputs):
    """A task in a Dask worker: the context is the coordinator's, once per worker process (its engine,
    and the compiled program, are reused by every later task there)."""
    from distributed import get_worker

    import multiprocessing

    address = get_worker().address
    if multiprocessing.current_process().daemon:
        raise TaskError("this Dask worker runs as a daemonic process, which may not start Stan's chain processes: "
                        "start the workers with DASK_DISTRIBUTED__WORKER__DAEMON=False in their environment "
                        "(see docs/large-comparisons.md)", "")
    key = (id(context), address)
    ctx = _DASK_CONTEXTS.get(key)
    if ctx is None:
        ctx = context
        limit = (ctx.chains_by_worker or {}).get(address)
        if limit:
            ctx.chains_at_once = limit
        limit_chain_pool(ctx.chains_at_once, "forkserver")
        _DASK_CONTEXTS[key] = ctx
    return _run(ctx, task, inputs)


def _run(ctx, task, inputs):
    from ..cv.plan import execute

    try:
        return execute(ctx, task, inputs)
    except Exception as exc:
        extra = getattr(exc, "engine_messages", "")
        raise TaskError(f"{type(exc).__name__}: {exc}",
                        traceback.format_exc() + (f"\nengine messages:\n{extra}" if extra else "")) from None


def machine_cores() -> int:
    """Cores this process may use."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:      # not Linux
        return os.cpu_count() or 1
