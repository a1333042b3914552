"""The engine interface: fit(program, data, settings, seed, inits) -> draws plus sampler diagnostics.

Tests: tests/engines/test_pystan_engine.py, tests/sampling/engines/test_cmdstan_engine.py.
"""
from __future__ import annotations

import contextlib
import os
import sys
import time
from dataclasses import dataclass, field
from typing import Any, Callable, Protocol

import numpy as np

from ..spec import SamplerSpec

#: Sampler quantities every engine returns, shaped (chains, draws).
SAMPLER_FIELDS: tuple[str, ...] = (
    "lp__", "accept_stat__", "stepsize__", "treedepth__", "n_leapfrog__", "divergent__", "energy__",
)


@dataclass(frozen=True)
class Draws:
    """Posterior draws of one fit.

    params
        Parameter name -> array shaped (chains, draws, *declared shape).
    sampler
        Each name in SAMPLER_FIELDS -> array shaped (chains, draws).
    sampling_seconds
        Wall time of sampling (warm-up included; compile excluded).
    """

    params: dict[str, np.ndarray]
    sampler: dict[str, np.ndarray]
    settings: SamplerSpec
    seed: int
    sampling_seconds: float
    engine: str
    messages: tuple[str, ...] = field(default=())

    @property
    def n_chains(self) -> int:
        return next(iter(self.sampler.values())).shape[0]

    @property
    def n_draws(self) -> int:
        return next(iter(self.sampler.values())).shape[1]


class Engine(Protocol):
    """What leafcv needs of a Stan engine."""

    name: str

    def compile(self, program: str) -> Any:
        """Compile (or fetch from cache) a program given as full text; returns an engine handle."""

    def fit(
        self,
        program: str,
        data: dict[str, Any],
        settings: SamplerSpec,
        seed: int,
        inits: list[dict[str, Any]],
        progress: Callable[[int, int], None] | None = None,
    ) -> Draws:
        """Sample; raise EngineError with the engine's messages on failure."""


@contextlib.contextmanager
def compile_lock(path):
    """Hold an exclusive lock on the file ``path`` while the block runs (released when the file closes,
    or the process dies): processes starting cold on one machine compile a program once."""
    import fcntl

    with open(path, "a") as lock:
        fcntl.flock(lock, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(lock, fcntl.LOCK_UN)


@contextlib.contextmanager
def output_to(path: str):
    """Send this process's standard output and error, at the file-descriptor level (child processes
    included), to the end of ``path`` while the block runs."""
    sys.stdout.flush()
    sys.stderr.flush()
    saved = os.dup(1), os.dup(2)
    with open(path, "a") as fh:
        fh.write(f"--- {time.strftime('%Y-%m-%d %H:%M:%S')}: compiling the Stan program\n")
        fh.flush()
        try:
            os.dup2(fh.fileno(), 1)
            os.dup2(fh.fileno(), 2)
            with contextlib.redirect_stdout(fh), contextlib.redirect_stderr(fh):
                yield
        finally:
            sys.stdout.flush()
            sys.stderr.flush()
            os.dup2(saved[0], 1)
            os.dup2(saved[1], 2)
            os.close(saved[0])
            os.close(saved[1])
