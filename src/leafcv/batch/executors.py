"""Where tasks run: this process, local worker processes, or a Dask cluster.

Each executor offers ``submit(task, inputs) -> future``, ``wait(futures, timeout) -> done`` and
``close(kill)``. The coordinator (`leafcv.batch.runner`) decides what runs and stores what finishes;
workers only compute, so results never depend on the executor.
"""
from __future__ import annotations

import concurrent.futures as cf
import contextlib
import multiprocessing as mp
import os
import pickle

from .worker import kill_descendants, machine_cores


def default_workers() -> int:
    """Workers when ``--workers`` is not given: one per core (each then samples one chain at a time)."""
    return machine_cores()


def chains_at_once(cores: int, workers: int) -> int:
    """Chains one worker samples at the same time: its share of the machine's cores, at least one."""
    return max(1, cores // max(1, workers))


class InProcess:
    """Every task in the coordinator's own process, one at a time (``--workers 1``): a task sent waits in
    a queue and runs when the coordinator waits for results, so each one is stored as it finishes."""

    name = "in-process"
    workers = 1

    def __init__(self, ctx):
        from .worker import limit_chain_pool

        self.ctx = ctx
        self._queue: list = []
        limit_chain_pool(ctx.chains_at_once)

    def submit(self, task, inputs):
        fut: cf.Future = cf.Future()
        self._queue.append((fut, task, inputs))
        return fut

    def wait(self, futures, timeout):
        """Run the first task sent that has not run; return it as done."""
        from .worker import TaskError, _run

        while self._queue:
            fut, task, inputs = self._queue.pop(0)
            if fut.cancelled():
                continue
            try:
                fut.set_result(_run(self.ctx, task, inputs))
            except TaskError as exc:
                fut.set_exception(exc)
            return {fut}
        return {f for f in futures if f.done()}

    def lost(self, exc: BaseException) -> bool:
        return False

    def close(self, kill: bool = False) -> None:
        self._queue.clear()
        if kill:      # chains of an interrupted fit still running in httpstan's pool: end them, fresh pool
            kill_descendants()
            _fresh_chain_pool()


def stop_pool(pool: cf.ProcessPoolExecutor) -> None:
    """Stop a process pool's workers and every process below them. A worker that sampled with PyStan keeps
    httpstan's chain pool, which never exits on its own: a worker left to exit waits on it for ever, and
    so does ``shutdown(wait=True)`` (or the end of a ``with`` block)."""
    pids = list(getattr(pool, "_processes", {}) or {})
    pool.shutdown(wait=False, cancel_futures=True)
    for pid in pids:
        kill_descendants(pid)
        _kill(pid)


def _kill(pid: int) -> None:
    import psutil

    try:
        psutil.Process(pid).kill()
    except psutil.NoSuchProcess:
        pass


def _fresh_chain_pool() -> None:
    try:
        import httpstan.services_stub as stub
    except ImportError:
        return
    stub.executor = cf.ProcessPoolExecutor(mp_context=mp.get_context("fork"), initializer=stub.init_worker)


@contextlib.contextmanager
def _main_not_rerun():
    """Workers started in this block do not run the caller's script again. A spawned process imports the
    parent's main script by path (as ``__mp_main__``) so that functions defined there can be unpickled; a
    script without an ``if __name__ == "__main__":`` guard (examples/notebook.py, a user's) would then run
    its whole comparison again in every worker. Workers only run leafcv's own functions, so they are told
    the main module is one that needs no import (multiprocessing skips a module named ``__main__``)."""
    import sys
    import types

    main = sys.modules.get("__main__")
    if main is None or getattr(main, "__spec__", None) is not None:
        yield                                   # run as ``python -m``, or interactive: nothing to do
        return
    main.__spec__ = types.SimpleNamespace(name="__main__")
    try:
        yield
    finally:
        main.__spec__ = None


class LocalProcesses:
    """``workers`` local worker processes (started fresh, not forked from the coordinator)."""

    name = "local processes"

    def __init__(self, ctx, workers: int):
        from .worker import init_local_worker

        self.workers = workers
        self._args = (pickle.dumps(ctx), os.getpid())
        self._init = init_local_worker
        self._pool = self._start()

    def _start(self):
        return cf.ProcessPoolExecutor(max_workers=self.workers, mp_context=mp.get_context("spawn"),
                                      initializer=self._init, initargs=self._args)

    def submit(self, task, inputs):
        from .worker import run_local

        with _main_not_rerun():
            try:
                return self._pool.submit(run_local, task, inputs)
            except cf.process.BrokenProcessPool:
                self.restart()
                return self._pool.submit(run_local, task, inputs)

    def wait(self, futures, timeout):
        done, _ = cf.wait(futures, timeout=timeout, return_when=cf.FIRST_COMPLETED)
        return done

    def lost(self, exc: BaseException) -> bool:
        """Whether ``exc`` says a worker process died (the pool is then restarted)."""
        return isinstance(exc, cf.process.BrokenProcessPool)

    def restart(self) -> None:
        self._pool.shutdown(wait=False, cancel_futures=True)
        self._pool = self._start()

    def close(self, kill: bool = False) -> None:
        """Stop the workers and their chain processes (`stop_pool`)."""
        stop_pool(self._pool)
        if kill:
            kill_descendants()


class DaskCluster:
    """Tasks sent to a Dask distributed scheduler at ``address``, or (``"local"``) to a LocalCluster of
    ``workers`` single-threaded worker processes started here."""

    name = "dask"

    def __init__(self, ctx, address: str, workers: int | None = None):
        try:
            from distributed import Client, LocalCluster
        except ImportError:
            from ..errors import UserInputError

            raise UserInputError("--scheduler", ["Dask is not installed: pip install 'leafcv[cluster]' (here and on "
                                                 "every worker machine)"]) from None
        import dask

        self._cluster = None
        if address == "local":
            n = workers or default_workers()
            with dask.config.set({"distributed.worker.daemon": False}):   # workers start chain processes
                self._cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                                             dashboard_address=None)
            self.client = Client(self._cluster)
        else:
            self.client = Client(address, timeout="30s")
        info = self.client.scheduler_info(n_workers=-1)["workers"] if _takes_n_workers(self.client) \
            else self.client.scheduler_info()["workers"]
        if not info:
            from ..errors import UserInputError

            raise UserInputError("--scheduler", [f"the Dask scheduler at {address} has no workers; start some with "
                                                 f"`dask worker {address} --nthreads 1`"])
        cores = self.client.run(machine_cores)
        per_host: dict[str, int] = {}
        for addr, w in info.items():
            per_host[w["host"]] = per_host.get(w["host"], 0) + w.get("nthreads", 1)
        ctx.chains_by_worker = {addr: chains_at_once(cores.get(addr, 1), per_host[w["host"]])
                                for addr, w in info.items()}
        self.workers = sum(w.get("nthreads", 1) for w in info.values())
        self._ctx = self.client.scatter(ctx, broadcast=True)

    def submit(self, task, inputs):
        from .worker import run_dask

        return self.client.submit(run_dask, self._ctx, task, inputs, pure=False)

    def wait(self, futures, timeout):
        from distributed import wait
        from distributed.utils import TimeoutError as DaskTimeout

        try:
            done, _ = wait(list(futures), timeout=timeout, return_when="FIRST_COMPLETED")
        except (DaskTimeout, TimeoutError):
            return set()
        return set(done)

    def lost(self, exc: BaseException) -> bool:
        """Never a broken pool here: Dask moves a lost worker's tasks itself, and a task whose workers
        keep dying (KilledWorker) is sent again like any failed task."""
        return False

    def close(self, kill: bool = False) -> None:
        """Disconnect; a cluster started here is stopped with its workers' chain processes. Workers of
        an existing cluster end the chain processes of their last tasks."""
        try:
            if self._cluster is not None or kill:
                self.client.run(kill_descendants)
        except Exception:       # a worker already gone
            pass
        try:
            self.client.close()
        finally:
            if self._cluster is not None:
                self._cluster.close()
                if kill:
                    kill_descendants()


def _takes_n_workers(client) -> bool:
    import inspect

    return "n_workers" in inspect.signature(client.scheduler_info).parameters


class Lazy:
    """An executor made on the first task sent: a run whose tasks are all in the store starts no worker
    and compiles nothing."""

    def __init__(self, factory):
        self._factory = factory
        self.real = None

    def _get(self):
        if self.real is None:
            self.real = self._factory()
        return self.real

    def submit(self, task, inputs):
        return self._get().submit(task, inputs)

    def wait(self, futures, timeout):
        return self._get().wait(futures, timeout)

    def lost(self, exc: BaseException) -> bool:
        return self._get().lost(exc)

    def restart(self) -> None:
        self._get().restart()

    def close(self, kill: bool = False) -> None:
        if self.real is not None:
            self.real.close(kill)
