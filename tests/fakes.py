"""A fake engine for tests of cross-validation logic (retries, grades, spot checks, refit scaling,
labelled InferenceData, held-out predictions) without a sampler: each chain's draws are the inits plus
small noise, and the engine misbehaves on request."""
from __future__ import annotations

import numpy as np

from leafcv.engines.base import SAMPLER_FIELDS, Draws
from leafcv.spec import SamplerSpec


class FakeEngine:
    """Draws = the first chain's inits + N(0, 0.01) noise, in every chain. ``split_below``: while settings.draws is below it, chain c is
    shifted by c (R-hat far above 1); ``divergent_below``: while adapt_delta is below it, 10 divergences."""

    name = "fake"

    def __init__(self, split_below: int = 0, divergent_below: float = 0.0):
        self.split_below, self.divergent_below = split_below, divergent_below
        self.calls: list[SamplerSpec] = []

    def fit(self, program, data, settings, seed, inits, progress=None):
        self.calls.append(settings)
        rng = np.random.default_rng(seed)
        C, D = settings.chains, settings.draws
        params = {}
        for name in inits[0]:
            arr = np.stack([np.asarray(inits[0][name], float)] * C)                      # (C, *shape)
            draws = arr[:, None, ...] + rng.normal(0, 0.01, (C, D) + arr.shape[1:])
            if D < self.split_below:
                draws = draws + np.arange(C).reshape((C, 1) + (1,) * (arr.ndim - 1))
            params[name] = draws
        sampler = {f: rng.normal(size=(C, D)) for f in SAMPLER_FIELDS}
        sampler["divergent__"] = np.zeros((C, D))
        if settings.adapt_delta < self.divergent_below:
            sampler["divergent__"][0, :10] = 1
        sampler["treedepth__"] = np.full((C, D), 3)
        return Draws(params, sampler, settings, seed, 0.1, "fake")
