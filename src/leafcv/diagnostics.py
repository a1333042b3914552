"""Convergence diagnostics of one fit: R-hat, bulk and tail ESS, divergences, tree-depth hits, E-BFMI.

Thresholds follow Vehtari, Gelman, Simpson, Carpenter & Buerkner 2021 (Bayesian Analysis 16:667-718:
R-hat < 1.01, ESS above 100 per chain) and Betancourt 2016 (arXiv:1604.00695, E-BFMI below 0.3 is a
problem); values recalled from memory. ESS uses ArviZ's rank-normalised estimators (arviz-stats).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import arviz_arrays as az
from .engines.base import Draws
from .errors import Problem

#: Codes of the sampler problems a fit can have (`diagnose`); `leafcv.cv.methods.remedy` acts on them.
MIXING_CODES = ("rhat", "ess-bulk", "ess-tail", "ebfmi", "treedepth")
DIVERGENCE_CODE = "divergences"

RHAT_MAX = 1.01
ESS_PER_CHAIN_MIN = 100
EBFMI_MIN = 0.3
TREEDEPTH_HIT_FRACTION_MAX = 0.01
#: A fit that misses the thresholds above but stays within these is "marginal": ranked with a warning,
#: its Monte Carlo error (from the chains' ESS) reflecting the low ESS. Common practice, no source:
#: R-hat up to 1.05 was the older rule of thumb (Gelman et al. 2013, BDA3 sec. 11.4 gives 1.1; from
#: memory), 100 draws of bulk and tail ESS in total still give usable means and intervals, and a
#: handful of divergent transitions in thousands of draws bias little when nothing else is wrong.
MARGINAL_RHAT_MAX = 1.05
MARGINAL_ESS_MIN = 100
MARGINAL_DIVERGENCES_MAX = 5
MARGINAL_EBFMI_MIN = 0.2
MARGINAL_TREEDEPTH_HIT_FRACTION_MAX = 0.05
GRADES = ("converged", "marginal", "failed")


@dataclass(frozen=True)
class Diagnostics:
    max_rhat: float
    min_ess_bulk: float
    min_ess_tail: float
    divergences: int
    treedepth_hits: int
    min_ebfmi: float
    n_draws: int
    chains: int
    worst: str              # parameter with the largest R-hat
    problems: tuple[str, ...]

    @property
    def converged(self) -> bool:
        return not self.problems

    @property
    def grade(self) -> str:
        """converged (every threshold met), marginal (within the MARGINAL_* limits) or failed."""
        if not self.problems:
            return "converged"
        within = (np.isfinite(self.max_rhat) and self.max_rhat <= MARGINAL_RHAT_MAX
                  and self.min_ess_bulk >= MARGINAL_ESS_MIN and self.min_ess_tail >= MARGINAL_ESS_MIN
                  and self.divergences <= MARGINAL_DIVERGENCES_MAX and self.min_ebfmi >= MARGINAL_EBFMI_MIN
                  and self.treedepth_hits <= MARGINAL_TREEDEPTH_HIT_FRACTION_MAX * self.chains * self.n_draws)
        return "marginal" if within else "failed"

    def as_dict(self) -> dict:
        """Plain values for a result file."""
        return {"max_rhat": self.max_rhat, "min_ess_bulk": self.min_ess_bulk, "min_ess_tail": self.min_ess_tail,
                "divergences": self.divergences, "treedepth_hits": self.treedepth_hits, "min_ebfmi": self.min_ebfmi,
                "chains": self.chains, "draws": self.n_draws, "worst": self.worst, "problems": list(self.problems),
                "grade": self.grade}


def grade_definitions() -> dict[str, str]:
    """The three grades in words, for the run folder."""
    return {
        "converged": f"R-hat <= {RHAT_MAX}, bulk and tail ESS >= {ESS_PER_CHAIN_MIN} per chain, no divergent transition, "
                     f"tree-depth hits <= {TREEDEPTH_HIT_FRACTION_MAX:.0%} of draws, E-BFMI >= {EBFMI_MIN} in every chain: "
                     "ranked",
        "marginal": f"short of that but R-hat <= {MARGINAL_RHAT_MAX}, bulk and tail ESS >= {MARGINAL_ESS_MIN}, "
                    f"at most {MARGINAL_DIVERGENCES_MAX} divergent transitions, tree-depth hits <= "
                    f"{MARGINAL_TREEDEPTH_HIT_FRACTION_MAX:.0%}, E-BFMI >= {MARGINAL_EBFMI_MIN}: ranked with a warning; "
                    "its Monte Carlo error uses the chains' own ESS",
        "failed": "anything worse, after targeted retries: not ranked, listed apart with the reason",
        "scope": "a structure's grade is the worst grade of the fits whose draws feed its score (the full-data fit "
                 "and the refits whose values are used; spot-check refits that agree with PSIS are recorded only)",
    }


def worst_grade(grades) -> str:
    """The worst of several grades (failed < marginal < converged); converged when there are none."""
    grades = list(grades)
    for g in reversed(GRADES):
        if g in grades:
            return g
    return "converged"


def ebfmi(energy: np.ndarray) -> np.ndarray:
    """E-BFMI per chain from the energy draws (chains, draws) (Betancourt 2016, eq. for BFMI)."""
    return np.sum(np.diff(energy, axis=1) ** 2, axis=1) / np.sum((energy - energy.mean(axis=1, keepdims=True)) ** 2, axis=1)


def chain_arrays(draws: Draws, names: list[str] | None = None) -> dict[str, np.ndarray]:
    """Scalar-by-scalar (chains, draws) arrays of the named parameters (all if None)."""
    out = {}
    for name in names or list(draws.params):
        arr = draws.params[name]
        if arr.ndim == 2:
            out[name] = arr
        else:
            flat = arr.reshape(arr.shape[0], arr.shape[1], -1)
            for k in range(flat.shape[2]):
                idx = np.unravel_index(k, arr.shape[2:])
                out[f"{name}[{','.join(str(i + 1) for i in idx)}]"] = flat[:, :, k]
    return out


def diagnose(draws: Draws, names: list[str] | None = None, max_treedepth: int = 10) -> Diagnostics:
    """Diagnostics over the named parameters (default: all parameters of the fit)."""
    arrays = chain_arrays(draws, names)
    rhat, bulk, tail = {}, {}, {}
    for k, v in arrays.items():
        if np.ptp(v) == 0:
            continue
        rhat[k] = float(az.rhat(v))
        bulk[k] = float(az.ess(v, method="bulk"))
        tail[k] = float(az.ess(v, method="tail"))
    chains, n = draws.n_chains, draws.n_draws
    div = int(draws.sampler["divergent__"].sum())
    hits = int((draws.sampler["treedepth__"] >= max_treedepth).sum())
    bfmi = ebfmi(draws.sampler["energy__"])
    max_rhat = max(rhat.values(), default=np.nan)
    worst = max(rhat, key=rhat.get) if rhat else ""
    min_bulk = min(bulk.values(), default=np.nan)
    min_tail = min(tail.values(), default=np.nan)
    problems = []
    if max_rhat > RHAT_MAX:
        problems.append(Problem(f"R-hat {max_rhat:.3f} > {RHAT_MAX} (worst: {worst})", "rhat", worst))
    if min_bulk < ESS_PER_CHAIN_MIN * chains:
        problems.append(Problem(f"bulk ESS {min_bulk:.0f} < {ESS_PER_CHAIN_MIN * chains}", "ess-bulk"))
    if min_tail < ESS_PER_CHAIN_MIN * chains:
        problems.append(Problem(f"tail ESS {min_tail:.0f} < {ESS_PER_CHAIN_MIN * chains}", "ess-tail"))
    if div:
        problems.append(Problem(f"{div} divergent transition(s)", "divergences"))
    if hits > TREEDEPTH_HIT_FRACTION_MAX * chains * n:
        problems.append(Problem(f"{hits} iterations hit the maximum tree depth {max_treedepth}", "treedepth"))
    if np.min(bfmi) < EBFMI_MIN:
        problems.append(Problem(f"E-BFMI {np.min(bfmi):.2f} < {EBFMI_MIN} in some chain", "ebfmi"))
    return Diagnostics(max_rhat, min_bulk, min_tail, div, hits, float(np.min(bfmi)), n, chains, worst, tuple(problems))
