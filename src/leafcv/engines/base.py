"""The engine interface: fit(program, data, settings, seed, inits) -> draws plus sampler diagnostics."""
from __future__ import annotations

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
