"""The coordinator: drives every structure's plan, sends tasks to an executor, stores what finishes.

Every structure's plan (`leafcv.cv.plan`) advances as soon as the tasks it waits for are done, so the
structures' tasks run side by side. A task already in the store is not run again. A task that raises,
or whose worker is lost, is sent once more (same payload, same seed); a second failure is recorded and
its structure is given up while the batch goes on. Ctrl-C (or SIGTERM) ends the workers and their chain
processes and keeps every finished task.
"""
from __future__ import annotations

from collections import OrderedDict
from dataclasses import dataclass, field
from typing import Callable

from ..cv.tasks import Plan, Task, TaskOutput
from .store import TaskStore

#: Attempts of one task: the first and one more after an exception or a lost worker.
TASK_ATTEMPTS = 2


@dataclass
class TaskFailure:
    task: Task
    message: str
    details: str = ""


@dataclass
class _State:
    plan: Plan
    tasks: list[Task] = field(default_factory=list)
    outputs: list = field(default_factory=list)
    started: bool = False


class Runner:
    """Runs plans to their end. ``progress`` receives (event, task or None, counts) — see
    `leafcv.batch.progress`; ``on_finished`` (name, value) as each plan returns."""

    def __init__(self, executor, store: TaskStore, progress=None, on_finished: Callable | None = None):
        self.executor, self.store, self.progress = executor, store, progress
        self.on_finished = on_finished
        self._cache: OrderedDict[str, TaskOutput] = OrderedDict()

    def _output(self, key: str) -> TaskOutput:
        """A stored output, the few most recent ones kept in memory (inputs of many refits)."""
        if key in self._cache:
            self._cache.move_to_end(key)
            return self._cache[key]
        out = self.store.get(key)
        self._cache[key] = out
        while len(self._cache) > 4:
            self._cache.popitem(last=False)
        return out

    def run(self, plans: dict[str, Plan], expected: dict[str, int] | None = None
            ) -> tuple[dict[str, tuple], dict[str, TaskFailure]]:
        states = {name: _State(p) for name, p in plans.items()}
        results: dict[str, tuple] = {}
        failures: dict[str, TaskFailure] = {}
        pending: dict = {}                          # future -> task
        waiters: dict[str, list[tuple[str, int]]] = {}
        attempts: dict[str, int] = {}
        seen: dict[str, set] = {name: set() for name in plans}
        expected = dict(expected or {})
        counts = {"done": 0, "reused": 0, "failed": 0}

        def total() -> int:
            return sum(max(len(seen[n]), 0 if n in results or n in failures else expected.get(n, 0))
                       for n in plans)

        def note(event: str, task: Task | None = None, **extra) -> None:
            if self.progress is not None:
                self.progress(event, task, {**counts, "total": total(), **extra})

        def submit(task: Task) -> None:
            attempts[task.key] = attempts.get(task.key, 0) + 1
            self.store.log("start", task, attempt=attempts[task.key])
            inputs = {k: self._output(k) for k in task.inputs}
            pending[self.executor.submit(task, inputs)] = task

        def advance(name: str) -> None:
            st = states[name]
            while name not in failures:
                try:
                    if not st.started:
                        st.started = True
                        tasks = next(st.plan)
                    else:
                        tasks = st.plan.send(st.outputs)
                except StopIteration as stop:
                    results[name] = stop.value
                    note("structure", None, structure=name)
                    if self.on_finished is not None:
                        self.on_finished(name, stop.value)
                    return
                except Exception as exc:      # the plan itself refused (e.g. a fold it cannot score)
                    import traceback

                    failures[name] = TaskFailure(Task("", "plan", None, name), f"{type(exc).__name__}: {exc}",
                                                 traceback.format_exc())
                    return
                st.tasks, st.outputs = tasks, [None] * len(tasks)
                missing = 0
                for i, t in enumerate(tasks):
                    seen[name].add(t.key)
                    if self.store.has(t.key):
                        st.outputs[i] = self._output(t.key)
                        counts["reused"] += 1
                        note("reused", t)
                        continue
                    missing += 1
                    if t.key not in waiters:
                        waiters[t.key] = []
                        submit(t)
                    waiters[t.key].append((name, i))
                if missing:
                    note("planned")
                    return

        for name in plans:
            advance(name)
        while pending:
            done = self.executor.wait(list(pending), 0.5)
            if not done:
                note("tick")
                continue
            for fut in done:
                task = pending.pop(fut, None)
                if task is None:            # lost with its pool, already sent again
                    continue
                exc = fut.exception()
                if exc is not None:
                    if self.executor.lost(exc):          # a local worker died: its pool is broken
                        self._resubmit_all_lost(pending, submit)
                    self.store.log("failed", task, attempt=attempts[task.key], error=str(exc)[:500])
                    if attempts[task.key] < TASK_ATTEMPTS:
                        note("retry", task, error=str(exc))
                        submit(task)
                        continue
                    counts["failed"] += 1
                    failure = TaskFailure(task, str(exc), getattr(exc, "details", "") or repr(exc))
                    for name, _ in waiters.pop(task.key, []):
                        if name not in failures:
                            failures[name] = failure
                            states[name].plan.close()
                    note("failed", task, error=str(exc))
                    continue
                output = self.store.put(task, fut.result())
                self._cache[task.key] = output
                counts["done"] += 1
                note("done", task)
                ready = []
                for name, i in waiters.pop(task.key, []):
                    if name in failures:
                        continue
                    states[name].outputs[i] = output
                    if all(o is not None for o in states[name].outputs):
                        ready.append(name)
                for name in ready:
                    advance(name)
        return results, failures

    def _resubmit_all_lost(self, pending: dict, submit) -> None:
        """A local worker process died: the pool is broken and every task in it lost; restart the pool
        and send them again (each counts an attempt)."""
        lost = list(pending.values())
        pending.clear()
        self.executor.restart()
        for task in lost:
            submit(task)
