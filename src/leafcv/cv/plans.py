"""One plan per cross-validation method (`leafcv.cv.plan.plan` picks one): each a generator of tasks
(`leafcv.cv.tasks`) that returns ``(CVResult, CVDetails, keep)``.

- `auto_plan` (method auto, by leaf): ``full`` (the full-data fit with targeted retries), ``score`` tasks
  (blocks of leaves scored under it: quadrature, integrated PSIS, predictions), then ``refit`` tasks
  (a refit without one leaf, warm-started from ``full``) for the leaves PSIS flags and a few seeded spot
  checks; every leaf when two or more spot checks disagree.
- `leaf_fold_plan` (methods exact and kfold, by leaf): one ``refit`` (exact) or ``fold`` (kfold) task per
  held-out fold, each held-out leaf scored under its fold's fit.
- `level_plan` (held-out levels of a grouping: exact by a grouping, kfold of levels, or auto by a
  grouping, which is exact): one ``level`` task per fold of levels, each level scored jointly.

With ``estimates``, the fold and level plans also fit all leaves (``full``, not contributing to the
score) and score every leaf under it, for the fit file's log-likelihood group. `expected_count` is the
task arithmetic of these plans, for a progress total.

Tests: tests/cv/test_plan.py (task counts), tests/cv/test_methods.py (spot checks, retries and draws
through the plans), tests/batch/test_runner.py, tests/sampling/cv/test_methods.py.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property
from typing import Generator

import numpy as np
import pandas as pd

from ..data.dataset import LEAF_TERM, Dataset
from ..diagnostics import worst_grade
from ..spec import SamplerSpec, Structure
from .methods import (REFIT_SEED_OFFSET, SPOT_DISAGREE_REFIT_ALL, SPOT_MCSE_MULTIPLE, SPOT_MIN_NATS, SPOT_STREAM,
                      CVDetails, Leafwise, check_curve_types, fit_warnings, fold_seed_base, folds_for,
                      note_quadrature, prediction_scores, set_curve, spot_tolerance)
from .predictions import curves_table, points_table
from .psis import khat_threshold
from .quadrature import LEAF_TOL, QuadratureInfo
from .result import CVResult
from . import tasks
from .tasks import Plan, Task, TaskOutput, curve_frame, task_key

#: What a plan's step returns to the plan that runs it (``yield from``).
Steps = Generator[list[Task], list[TaskOutput], object]


@dataclass(frozen=True)
class Setting:
    """What one structure's plan is made of; ``method`` is the method the plan runs (auto by a grouping
    runs as exact, see `resolved_method`)."""

    structure: Structure
    dataset: Dataset
    sampler: SamplerSpec
    method: str
    by: str = LEAF_TERM
    folds: int = 10
    spot_checks: int = 3
    estimates: bool = False
    base: str = ""

    @property
    def n_leaves(self) -> int:
        return self.dataset.n_leaves

    @cached_property
    def leaf_ids(self) -> tuple[str, ...]:
        return tuple(self.dataset.leaves[LEAF_TERM].astype(str))

    def task(self, kind: str, what: str, payload: dict, inputs: tuple[str, ...] = ()) -> Task:
        """A task of this structure, labelled "<structure>: <what>"."""
        return Task(task_key(self.base, kind, self.structure, payload, inputs), kind, self.structure,
                    f"{self.structure.name}: {what}", payload, inputs)

    def held_role(self, prefix: str, held) -> str:
        return f"{prefix} without {', '.join(self.leaf_ids[g] for g in held)}"


@dataclass(frozen=True)
class FullFit:
    """A full-data fit (its ``full`` task and output) and the ``score`` outputs of every leaf under it."""

    task: Task
    output: TaskOutput
    scores: tuple[TaskOutput, ...]

    @property
    def n_draws(self) -> int:
        return int(np.prod(self.output.arrays["s/lp__"].shape))

    def log_m(self, n_leaves: int) -> np.ndarray:
        """Each leaf's log marginal likelihood per draw of the fit (draws by leaves)."""
        log_m = np.empty((self.n_draws, n_leaves))
        for s in self.scores:
            log_m[:, s.record["leaves"]] = s.arrays["log_m"]
        return log_m


@dataclass(frozen=True)
class HeldOutLeaf:
    """One held-out leaf scored under a fit without it (an entry of a refit or fold task's record)."""

    leaf: int
    elpd: float
    mcse: float
    bound: float                  # the quadrature's error bound, nats
    pred: np.ndarray              # held-out predictions of its points
    quad: QuadratureInfo
    curve: pd.DataFrame | None    # held-out predictive curves
    grade: str                    # the grade of the fit it was scored under

    @classmethod
    def all_of(cls, output: TaskOutput) -> list[HeldOutLeaf]:
        r = output.record
        return [cls(int(g), lf["elpd"], lf["mcse"], lf["bound"], np.asarray(lf["pred"], float),
                    QuadratureInfo(**lf["quad"]), curve_frame(lf["curve"]), r["grade"])
                for g, lf in zip(r["held"], r["leaves"])]


@dataclass
class Tally:
    """What a plan gathers as its tasks finish: the details, the grades of the fits behind the scores,
    and what the run folder keeps (``full_output``, ``log_m``, ``points``, ``curves``)."""

    details: CVDetails = field(default_factory=CVDetails)
    grades: list[str] = field(default_factory=list)
    keep: dict = field(default_factory=dict)

    def add_refit(self, output: TaskOutput) -> None:
        """A refit, fold or level task's fits and time."""
        self.details.fits.extend(output.record["fits"])
        self.details.refit_seconds += output.record["seconds"]

    def closing_fields(self, dataset: Dataset, preds: dict, curves: dict) -> dict:
        """The CVResult fields every method fills alike (prediction scores, grade, warnings), and the
        held-out predictions kept for the run folder."""
        rmse, r2 = prediction_scores(dataset, preds)
        self.keep["points"], self.keep["curves"] = points_table(dataset, preds), curves_table(dataset, curves)
        grade = worst_grade(self.grades)
        return {"grade": grade, "warnings": tuple(fit_warnings(self.details, grade) + self.details.notes),
                "rmse": rmse, "r2": r2}


# ----------------------------------------------------------------------------------------------
# helpers the plans share

def resolved_method(method: str, by: str) -> str:
    """The method a plan runs: integrated PSIS integrates one leaf's effects, so auto by a grouping is exact."""
    return "exact" if method == "auto" and by != LEAF_TERM else method


def score_blocks(n_leaves: int) -> list[list[int]]:
    """The leaves of each ``score`` task, SCORE_BLOCK at a time."""
    size = tasks.SCORE_BLOCK
    return [list(range(i, min(i + size, n_leaves))) for i in range(0, n_leaves, size)]


def fold_sets(s: Setting) -> list[np.ndarray]:
    """The held-out leaves of each refit, fold or level task of methods exact and kfold."""
    return folds_for(s.dataset, s.by, s.method, s.folds, s.sampler.seed)


def full_fit(s: Setting, tally: Tally, role: str, contributes: bool) -> Steps:
    """The full-data fit, then every leaf scored under it, a block per task; returns a `FullFit`."""
    full = s.task("full", f"{role} fit", {"seed": s.sampler.seed, "role": role, "contributes": contributes})
    (out,) = yield [full]
    tally.details.fits.extend(out.record["fits"])
    ids = s.leaf_ids
    scores = yield [s.task("score", f"score leaves {ids[b[0]]}-{ids[b[-1]]}", {"leaves": b}, (full.key,))
                    for b in score_blocks(s.n_leaves)]
    return FullFit(full, out, tuple(scores))


def estimates_fit(s: Setting, tally: Tally) -> Steps:
    """The full-data fit of methods exact and kfold (estimates only) and every leaf's log marginal."""
    fit = yield from full_fit(s, tally, "full data (estimates only)", False)
    tally.keep.update(full_output=fit.output, log_m=fit.log_m(s.n_leaves))


def check_planned(s: Setting, held) -> None:
    """Refuse, before any task runs, a fold whose held-out curve types no training leaf has."""
    train = np.ones(s.n_leaves, bool)
    train[np.asarray(held, int)] = False
    check_curve_types(s.structure, s.dataset, train, np.asarray(held, int))


def kept_draws(outs: list[TaskOutput]) -> int:
    """The draws behind the scores of refit, fold or level tasks: the fewest any of their kept fits has
    (a retry may have doubled a fold's draws; the k-hat threshold and ArviZ's n_samples use this)."""
    return min(int(o.record["n_draws"]) for o in outs)


def leafwise_result(s: Setting, tally: Tally, acc: Leafwise, n_draws: int, n_refits: int,
                    unresolved: list[int]) -> tuple[CVResult, CVDetails, dict]:
    """The return value of a plan that scores leaf by leaf (auto, and exact or kfold by leaf)."""
    closing = tally.closing_fields(s.dataset, acc.preds, acc.curves)
    unscored = ""
    if unresolved:
        unscored = ("the held-out quadrature did not settle for " + ", ".join(s.leaf_ids[g] for g in unresolved)
                    + " (" + "; ".join(tally.details.unresolved) + ")")
    result = CVResult(s.structure.name, s.method, s.leaf_ids, acc.elpd, n_draws, pareto_k=acc.khat,
                      n_refits=n_refits, method_i=tuple(acc.how), mcse_i=acc.mcse, quad_bound_i=acc.bound,
                      unscored=unscored, **closing)
    return result, tally.details, tally.keep


# ----------------------------------------------------------------------------------------------
# method auto: integrated PSIS, exact refits of flagged leaves and spot checks

def auto_plan(s: Setting, tally: Tally) -> Plan:
    details, L, ids = tally.details, s.n_leaves, s.leaf_ids
    fit = yield from full_fit(s, tally, "full data", True)
    details.full_fit_seconds = fit.output.record["seconds"]
    tally.grades.append(fit.output.record["grade"])
    acc = Leafwise(L)
    quads = _psis_scores(fit, acc, details)
    tally.keep.update(full_output=fit.output, log_m=fit.log_m(L))
    note_quadrature(details, ids, range(L), quads)
    details.psis_khat = [float(k) for k in acc.khat]
    acc.how = ["psis"] * L
    thr = khat_threshold(fit.n_draws)
    flagged = [int(g) for g in np.flatnonzero(acc.khat > thr)]
    order = np.random.default_rng([s.sampler.seed, SPOT_STREAM]).permutation(L)
    spots = [int(g) for g in order if g not in flagged][:s.spot_checks]
    todo = flagged + spots
    exact = yield from _leaf_refits(s, tally, fit.task, todo, frozenset(spots))
    n_refits = len(todo)
    note_quadrature(details, ids, todo, [exact[g].quad for g in todo])
    disagree = _spot_checks(s, details, acc, exact, spots)
    replace_leaves = flagged + disagree
    if len(disagree) >= SPOT_DISAGREE_REFIT_ALL:
        rest = [g for g in range(L) if g not in todo]
        more = yield from _leaf_refits(s, tally, fit.task, rest, frozenset())
        exact.update(more)
        n_refits += len(rest)
        note_quadrature(details, ids, rest, [more[g].quad for g in rest])
        replace_leaves += rest
        details.notes.append(f"{len(disagree)} spot checks disagreed: every leaf was refitted exactly")
    used_roles = {s.held_role("refit", [g]) for g in replace_leaves}
    for f in details.fits:
        if f["role"].startswith("refit without ") and f["role"] not in used_roles:
            f["contributes"] = False        # a spot check that agreed: recorded, not scored
    for g in replace_leaves:
        ex = exact[g]
        acc.elpd[g], acc.mcse[g], acc.bound[g], acc.khat[g], acc.how[g] = ex.elpd, ex.mcse, ex.bound, np.nan, "refit"
        acc.preds[g] = ex.pred
        set_curve(acc, g, ex.curve)
        tally.grades.append(ex.grade)
        details.refit_leaves.append(ids[g])
    if flagged:
        details.notes.append(f"{len(flagged)} leaf/leaves with k-hat above {thr:.2f} refitted exactly: "
                             + ", ".join(ids[g] for g in flagged))
    unresolved = [g for g in range(L) if acc.how[g] == "psis" and quads[g].bound > LEAF_TOL] + \
                 [g for g in replace_leaves if exact[g].quad.bound > LEAF_TOL]
    return leafwise_result(s, tally, acc, fit.n_draws, n_refits, unresolved)


def _psis_scores(fit: FullFit, acc: Leafwise, details: CVDetails) -> list[QuadratureInfo]:
    """Every leaf's integrated-PSIS score, prediction and curves from the score tasks, into ``acc``;
    returns each leaf's quadrature."""
    quads: list = [None] * acc.L
    for out in fit.scores:
        r = out.record
        for j, g in enumerate(r["leaves"]):
            acc.elpd[g], acc.mcse[g], acc.khat[g] = r["elpd"][j], r["mcse"][j], r["khat"][j]
            quads[g] = QuadratureInfo(**r["quad"][j])
            acc.bound[g] = quads[g].bound
            acc.preds[g] = np.asarray(r["preds"][j], float)
            if r["curves"][j] is not None:
                acc.curves[g] = curve_frame(r["curves"][j])
        details.quadrature_seconds += r["seconds"]
    return quads


def _leaf_refits(s: Setting, tally: Tally, full: Task, leaves: list[int], spots: frozenset) -> Steps:
    """A refit without each of ``leaves``, warm-started from the full-data fit; returns each leaf's
    `HeldOutLeaf` by leaf. A spot check is not retried for a marginal grade (it only checks PSIS)."""
    planned = []
    for g in leaves:
        role = s.held_role("refit", [g])
        check_planned(s, [g])
        planned.append(s.task("refit", role, {"held": [g], "seed": s.sampler.seed + REFIT_SEED_OFFSET + g,
                                              "role": role, "retry_marginal": g not in spots}, (full.key,)))
    outs = yield planned
    scored = {}
    for g, out in zip(leaves, outs):
        tally.add_refit(out)
        scored[g] = HeldOutLeaf.all_of(out)[0]
    return scored


def _spot_checks(s: Setting, details: CVDetails, acc: Leafwise, exact: dict[int, HeldOutLeaf],
                 spots: list[int]) -> list[int]:
    """Each spot check's PSIS score against its exact refit, recorded; returns the leaves that disagree."""
    disagree = []
    for g in spots:
        ex = exact[g]
        tol = spot_tolerance(acc.mcse[g], ex.mcse, acc.bound[g], ex.bound)
        bad = abs(acc.elpd[g] - ex.elpd) > tol
        details.spot_checks.append({"leaf": s.leaf_ids[g], "khat": float(acc.khat[g]),
                                    "elpd_psis": float(acc.elpd[g]), "elpd_exact": float(ex.elpd),
                                    "mcse_psis": float(acc.mcse[g]), "mcse_exact": float(ex.mcse),
                                    "bound_psis": float(acc.bound[g]), "bound_exact": float(ex.bound),
                                    "tolerance": tol, "disagree": bool(bad), "refit_grade": ex.grade})
        if bad:
            disagree.append(g)
    if disagree:
        details.notes.append(f"spot check(s) of {', '.join(s.leaf_ids[g] for g in disagree)} disagree with PSIS "
                             f"beyond max({SPOT_MIN_NATS:g} nats, {SPOT_MCSE_MULTIPLE:g} x MCSE) plus both quadrature "
                             "bounds: the exact values are used")
    return disagree


# ----------------------------------------------------------------------------------------------
# methods exact and kfold: one fit per held-out fold

def held_out_folds(s: Setting, tally: Tally) -> Steps:
    """One task per fold of `fold_sets` (``refit``, ``fold`` or, by a grouping, ``level``); returns their
    outputs, their fits and grades tallied."""
    seed0 = fold_seed_base(s.sampler, s.method)
    prefix = "refit" if s.method == "exact" else "fold"
    planned = []
    for i, held in enumerate(fold_sets(s)):
        check_planned(s, held)
        if s.by == LEAF_TERM:
            role = s.held_role(prefix, held)
            kind = "refit" if s.method == "exact" else "fold"
        else:
            names = sorted(set(s.dataset.leaves[s.by].astype(str).to_numpy()[held]))
            role = f"{prefix} without {s.by} {', '.join(names)}"
            kind = "level"
        planned.append(s.task(kind, role, {"held": [int(g) for g in held], "seed": seed0 + i, "role": role,
                                           "by": s.by}))
    outs = yield planned
    for out in outs:
        tally.add_refit(out)
        tally.grades.append(out.record["grade"])
    return outs


def leaf_fold_plan(s: Setting, tally: Tally) -> Plan:
    """Methods exact and kfold by leaf: each held-out leaf scored under its fold's fit."""
    outs = yield from held_out_folds(s, tally)
    acc = Leafwise(s.n_leaves)
    quads = {}
    for out in outs:
        for lf in HeldOutLeaf.all_of(out):
            g = lf.leaf
            acc.elpd[g], acc.mcse[g], acc.bound[g], acc.how[g] = lf.elpd, lf.mcse, lf.bound, s.method
            acc.preds[g] = lf.pred
            set_curve(acc, g, lf.curve)
            quads[g] = lf.quad
    note_quadrature(tally.details, s.leaf_ids, list(quads), list(quads.values()))
    unresolved = [g for g, q in quads.items() if q.bound > LEAF_TOL]
    if s.estimates:
        yield from estimates_fit(s, tally)
    return leafwise_result(s, tally, acc, kept_draws(outs), len(outs), unresolved)


# ----------------------------------------------------------------------------------------------
# held-out levels of a grouping

def level_plan(s: Setting, tally: Tally) -> Plan:
    """Leave-one-level-out (or K folds of levels): each level scored jointly; SEs over levels."""
    outs = yield from held_out_folds(s, tally)
    levels = sorted(set(s.dataset.leaves[s.by].astype(str).to_numpy()))
    elpd, mcse, bound = (np.full(len(levels), np.nan) for _ in range(3))
    preds, curves, unresolved = {}, {}, []
    for out in outs:
        r = out.record
        for j, g in enumerate(r["held"]):
            preds[int(g)] = np.asarray(r["preds"][j], float)
            if r["curves"][j] is not None:
                curves[int(g)] = curve_frame(r["curves"][j])
        for name, v in r["levels"].items():
            k = levels.index(name)
            elpd[k], mcse[k], bound[k] = v["elpd"], v["mcse"], v["bound"]
            if v["bound"] > LEAF_TOL:
                unresolved.append(f"{s.by} {name} (bound {v['bound']:.3g} nats; {v['bad']} draws unsettled)")
    if s.estimates:
        yield from estimates_fit(s, tally)
    closing = tally.closing_fields(s.dataset, preds, curves)
    unscored = ("the held-out quadrature did not settle for " + ", ".join(unresolved)) if unresolved else ""
    result = CVResult(s.structure.name, s.method, tuple(levels), elpd, kept_draws(outs), n_refits=len(outs),
                      mcse_i=mcse, quad_bound_i=bound, unscored=unscored, unit=s.by, **closing)
    return result, tally.details, tally.keep


# ----------------------------------------------------------------------------------------------

def method_plan(s: Setting, tally: Tally) -> Plan:
    """The plan of ``s.method`` (resolved) and ``s.by``."""
    if s.method == "auto":
        return auto_plan(s, tally)
    return leaf_fold_plan(s, tally) if s.by == LEAF_TERM else level_plan(s, tally)


def expected_count(s: Setting) -> int:
    """The tasks the plan of ``s`` yields: exactly for methods exact and kfold; for auto, the full fit,
    its score blocks and the spot checks, without the refits of leaves that k-hat flags or of every
    leaf after spot checks disagree (known only once the fit is scored)."""
    full = 1 + len(score_blocks(s.n_leaves))
    if s.method == "auto":
        return full + min(s.spot_checks, s.n_leaves)
    return len(fold_sets(s)) + (full if s.estimates else 0)
