"""PyStan 3 engine (the default: pip-installable, httpstan ships Stan and its compiler).

Models are compiled once per program text and cached by httpstan. Sampling talks to httpstan
directly so that every fit is deleted from httpstan's on-disk fit cache right after it is read: a
repeated (program, data, seed, settings) never returns a stale cached fit, and batches do not fill
the disk.
"""
from __future__ import annotations

import asyncio
import concurrent.futures
import logging
import contextlib
import io
import json
import re
import time
from typing import Any, Callable

import numpy as np

from ..errors import EngineError
from ..jsonio import plain
from ..spec import SamplerSpec
from .base import SAMPLER_FIELDS, Draws, compile_lock, output_to

_ITER = re.compile(r"Iteration:\s+(\d+)\s+/\s+(\d+)")
#: httpstan 4.13 runs stanc with a 1 s timeout (httpstan/compile.py), which a busy machine can exceed: a
#: compile that fails within QUICK_FAILURE seconds, other than by a syntax or semantic error (ValueError),
#: is tried again, at most COMPILE_ATTEMPTS times in all. A C++ failure comes after minutes and is not.
COMPILE_ATTEMPTS = 3
QUICK_FAILURE = 20.0


class PyStanEngine:
    """Engine backed by PyStan 3 / httpstan.

    ``chains_at_once``: chains of one fit sampled at the same time (None: all of them; httpstan's own
    pool then runs up to one per core). The others wait and start as running ones finish, so a
    worker that shares a machine with other workers keeps to its share of the cores; each chain's draws
    depend only on the seed and the chain number, not on when it ran.
    ``compile_log``: file that receives the compiler's output (default: ``leafcv-compile.log`` in
    httpstan's cache folder); the terminal never does.
    """

    name = "pystan"

    def __init__(self, log: Callable[[str], None] | None = None, chains_at_once: int | None = None,
                 compile_log: str | None = None):
        self.log = log or logging.getLogger("leafcv").info
        self.compiler_messages: dict[str, str] = {}
        self.chains_at_once = chains_at_once
        self.compile_log = compile_log

    def is_compiled(self, program: str) -> bool:
        """Whether httpstan already holds a compiled module for this program text."""
        from httpstan.cache import list_model_names
        from httpstan.models import calculate_model_name

        return calculate_model_name(program) in list_model_names()

    def compile(self, program: str, data: dict[str, Any] | None = None, seed: int | None = None) -> Any:
        """Build the model for ``data`` (compiling once per program text; PyStan's chatter is kept, not printed)."""
        import stan

        out, err = io.StringIO(), io.StringIO()
        try:
            if not self.is_compiled(program):
                self.precompile(program)
            with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
                model = outside_event_loop(stan.build, program, data=plain(data or {}), random_seed=seed)
        except EngineError:
            raise
        except Exception as exc:  # httpstan reports compile and data errors as plain exceptions
            raise EngineError(f"PyStan could not build the model: {exc}", out.getvalue() + err.getvalue() + str(exc)) from exc
        self.compiler_messages[model.model_name] = out.getvalue() + err.getvalue()
        return model

    def precompile(self, program: str) -> None:
        """Compile ``program`` into httpstan's cache unless it is there: under a lock file in the cache
        folder, so that processes starting cold on one machine compile it once (the others wait, then
        find it cached), with the compiler's output (C++ notes and warnings, printed by child processes
        straight to the terminal's file descriptors) sent to the compile log."""
        import stan
        from httpstan.cache import cache_directory

        folder = cache_directory()
        folder.mkdir(parents=True, exist_ok=True)
        log_path = self.compile_log or str(folder / "leafcv-compile.log")
        with compile_lock(folder / "leafcv-compile.lock"):
            if self.is_compiled(program):
                return
            self.log(f"compiling the Stan program (once per program version on this machine; 1-2 minutes; "
                     f"compiler output in {log_path})...")
            for attempt in range(1, COMPILE_ATTEMPTS + 1):
                start = time.perf_counter()
                with output_to(log_path):
                    try:
                        outside_event_loop(stan.build, program, data={})
                    except Exception as exc:    # no data: the program compiled, then wanted data; or it failed
                        if self.is_compiled(program):
                            return
                        quick = time.perf_counter() - start < QUICK_FAILURE
                        if attempt < COMPILE_ATTEMPTS and quick and not isinstance(exc, ValueError):
                            self.log(f"the Stan compiler failed after {time.perf_counter() - start:.1f} s "
                                     f"({str(exc)[:100]}); trying again ({attempt + 1} of {COMPILE_ATTEMPTS})")
                            continue
                        raise EngineError(f"PyStan could not compile the program: {exc} (compiler output in "
                                          f"{log_path})", str(exc)) from exc
                return

    def fit(
        self,
        program: str,
        data: dict[str, Any],
        settings: SamplerSpec,
        seed: int,
        inits: list[dict[str, Any]],
        progress: Callable[[int, int], None] | None = None,
    ) -> Draws:
        model = self.compile(program, data, seed)
        if len(inits) != settings.chains:
            raise ValueError(f"{len(inits)} init sets for {settings.chains} chains")
        payloads = []
        for chain in range(1, settings.chains + 1):
            payloads.append({
                "function": "stan::services::sample::hmc_nuts_diag_e_adapt",
                "chain": chain,
                "data": model.data,
                "init": plain(inits[chain - 1]),
                "random_seed": int(seed),
                "num_warmup": int(settings.warmup),
                "num_samples": int(settings.draws),
                "delta": float(settings.adapt_delta),
                "max_depth": int(settings.max_treedepth),
                "refresh": max(1, (settings.warmup + settings.draws) // 20),
            })
        start = time.perf_counter()
        try:
            outputs = outside_event_loop(_run_coroutine, _run_chains(model.model_name, payloads, progress,
                                                                       self.chains_at_once))
        except EngineError:
            raise
        except Exception as exc:
            raise EngineError(f"PyStan sampling failed: {exc}", repr(exc)) from exc
        seconds = time.perf_counter() - start
        return _to_draws(model, outputs, settings, seed, seconds)


def _run_coroutine(coro):
    """Run ``coro`` on a new event loop. Not ``asyncio.run``: its Ctrl-C handler only cancels the
    coroutine, and a cancellation swallowed inside the HTTP client then loses the Ctrl-C altogether
    (seen: a batch that went on to its end). Here Ctrl-C raises KeyboardInterrupt where it lands."""
    loop = asyncio.new_event_loop()
    try:
        result = loop.run_until_complete(coro)
        loop.run_until_complete(loop.shutdown_asyncgens())
        return result
    finally:                        # interrupted: the loop and its pending tasks are abandoned
        loop.close()


def outside_event_loop(func: Callable[..., Any], *args: Any, **kwargs: Any) -> Any:
    """``func(*args, **kwargs)``, in a worker thread when this thread runs an event loop (Jupyter, an
    async application): PyStan and leafcv's chain client call ``asyncio.run``, which refuses to start
    inside a running loop."""
    try:
        asyncio.get_running_loop()
    except RuntimeError:
        return func(*args, **kwargs)
    # httpstan runs chains in a module-level fork-based process pool that starts its processes on first
    # use; forked from the worker thread they crash (measured: a segmentation fault in every chain), so
    # start them here, in the calling thread
    from httpstan.services_stub import executor

    executor.submit(int).result()
    with concurrent.futures.ThreadPoolExecutor(max_workers=1, thread_name_prefix="leafcv-stan") as pool:
        return pool.submit(func, *args, **kwargs).result()


async def _run_chains(
    model_name: str, payloads: list[dict[str, Any]], progress: Callable[[int, int], None] | None,
    at_once: int | None = None,
) -> list[bytes]:
    """Sample every chain, at most ``at_once`` at the same time; the outputs in chain order."""
    import stan.common

    async with stan.common.HttpstanClient() as client:
        operations = []

        async def start(payload):
            resp = await client.post(f"/{model_name}/fits", json=payload)
            if resp.status != 201:
                raise EngineError(f"httpstan refused the fit (HTTP {resp.status})", resp.content.decode(errors="replace"))
            operations.append(resp.json())

        waiting = list(payloads)
        limit = len(payloads) if not at_once else max(1, int(at_once))
        iters: dict[str, int] = {}
        total = 0
        while waiting or not all(op["done"] for op in operations):
            while waiting and sum(not op["done"] for op in operations) < limit:
                await start(waiting.pop(0))
            for op in operations:
                if op["done"]:
                    continue
                resp = await client.get(f"/{op['name']}")
                op.update(resp.json())
                found = _ITER.findall(op["metadata"].get("progress") or "")
                if found:
                    it, total = map(int, found[-1])
                    iters[op["name"]] = it
            if progress is not None and total:
                progress(sum(iters.values()), total * len(payloads))
            await asyncio.sleep(0.1)
        outputs, errors = [], []
        for op in operations:
            fit_name = op["result"].get("name")
            if fit_name is None:
                errors.append(str(op["result"].get("message", op["result"])))
                continue
            resp = await client.get(f"/{fit_name}")
            if resp.status != 200:
                errors.append(resp.content.decode(errors="replace"))
            else:
                outputs.append(resp.content)
            await client.delete(f"/{fit_name}")
        if errors:
            raise EngineError("Stan sampling failed in %d chain(s)" % len(errors), "\n".join(errors))
        return outputs


def _to_draws(model: Any, outputs: list[bytes], settings: SamplerSpec, seed: int, seconds: float) -> Draws:
    import stan.fit

    fit = stan.fit.Fit(
        tuple(outputs), len(outputs), model.param_names, model.constrained_param_names, model.dims,
        settings.warmup, settings.draws, 1, False,
    )
    messages = []
    for out in outputs:
        for line in out.splitlines():
            if b'"logger"' not in line:
                continue
            text = json.loads(line)["values"][0]
            if text.startswith(("info:Iteration:", "info: Elapsed", "info:" + " " * 15)) or text == "info:":
                continue
            messages.append(text.replace("info:", "").strip())
    raw = fit._draws  # (sampler and flat parameters, draws, chains); flat names in column-major order
    params = {}
    for name, dims in zip(model.param_names, model.dims):
        idx = list(fit._parameter_indexes(name))
        block = raw[idx, :, :].transpose(2, 1, 0)  # (chains, draws, flat)
        if dims:
            block = block.reshape(block.shape[:2] + tuple(reversed(dims)))
            block = block.transpose((0, 1) + tuple(range(block.ndim - 1, 1, -1)))
        else:
            block = block[:, :, 0]
        params[name] = np.ascontiguousarray(block)
    sampler = {}
    for name in SAMPLER_FIELDS:
        sampler[name] = np.ascontiguousarray(raw[fit.sample_and_sampler_param_names.index(name)].T)
    return Draws(params, sampler, settings, seed, seconds, "pystan", tuple(m for m in messages if m))
