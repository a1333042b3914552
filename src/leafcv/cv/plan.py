"""One structure's cross-validation as tasks (`leafcv.cv.tasks`): the plan of a method, how a task runs,
and the simplest driver.

`plan` is the entry point: the plan of the chosen method (one per method in `leafcv.cv.plans`), a
generator that yields lists of tasks, receives their outputs and returns ``(CVResult, CVDetails,
keep)``; `expected_tasks` is its task count for a progress total. `execute` runs one task in this
process from its payload, its inputs' outputs and the shared context (`Context`). Task kinds: ``full``
(a full-data fit with targeted retries; output: its draws), ``score`` (a block of leaves scored under
that fit: quadrature, integrated PSIS, predictions), ``refit`` (a refit without one leaf or one exact
fold, warm-started from ``full`` under method auto), ``fold`` (a K-fold fold) and ``level`` (a fold of
levels of a grouping, each level scored jointly). `cross_validate` runs a plan here, task after task.

Tests: tests/cv/test_plan.py, tests/cv/test_methods.py, tests/batch/test_runner.py,
tests/sampling/cv/test_methods.py.
"""
from __future__ import annotations

import time
from dataclasses import asdict, dataclass
from typing import TYPE_CHECKING, Any, Callable

import numpy as np

from ..data.dataset import LEAF_TERM, Dataset
from ..inits import LeafFits
from ..spec import Comparison, SamplerSpec, Structure
from .predictions import summarise_curves
from .psis import integrated_loo, refit_elpd
from .tasks import Plan, Task, TaskOutput, curve_record, roundtrip

if TYPE_CHECKING:
    from .methods import CVDetails
    from .result import CVResult


@dataclass
class Context:
    """What every task of a comparison shares. ``engine``: an engine's name ("pystan", "cmdstan"; None:
    PyStan), from which the process that runs a task builds its own engine, or an engine object (tests'
    fakes); ``chains_at_once``: chains one task runs at the same time (None: all)."""

    comparison: Comparison
    dataset: Dataset
    leaf_fits: LeafFits
    sampler: SamplerSpec
    engine: Any = None
    chains_at_once: int | None = None
    compile_log: str | None = None
    chains_by_worker: dict | None = None     # Dask: worker address -> chains at once there

    def __getstate__(self):
        state = dict(self.__dict__)
        if getattr(self.engine, "name", None) in ("pystan", "cmdstan"):
            state["engine"] = self.engine.name      # each process builds (and compiles for) its own
        return state

    def get_engine(self):
        if self.engine is None or isinstance(self.engine, str):
            from ..engines.choice import make_engine

            self.engine = make_engine(self.engine, chains_at_once=self.chains_at_once, compile_log=self.compile_log)
        return self.engine


# ----------------------------------------------------------------------------------------------
# running one task

def _fit_output(fit, details, seconds: float) -> TaskOutput:
    from .methods import centring_of
    d = fit.draws
    arrays = {f"p/{k}": np.asarray(v) for k, v in d.params.items()}
    arrays.update({f"s/{k}": np.asarray(v) for k, v in d.sampler.items()})
    record = {"fits": details.fits, "seconds": seconds, "grade": fit.diagnostics.grade,
              "centring": centring_of(fit.design.structure),
              "settings": asdict(d.settings), "seed": d.seed, "sampling_seconds": d.sampling_seconds,
              "engine": d.engine, "messages": list(d.messages), "init_note": fit.init_note}
    return TaskOutput(record, arrays)


def restore_fit(ctx: Context, structure: Structure, output: TaskOutput):
    """The StructureFit a ``full`` task made, rebuilt from its output (the design is rebuilt; the draws,
    derived quantities included, are the stored ones)."""
    from ..design import build_design
    from ..diagnostics import diagnose
    from ..engines.base import Draws
    from ..fitting import POPULATION, StructureFit
    from .methods import noncentred_groups, with_centring

    rec = output.record
    if "centring" in rec:           # the parameterisation the fit ended with, after any retries
        st = with_centring(structure, rec["centring"])
    else:                           # a store written before the centring was recorded
        st = structure if rec["variant"] == "given" else noncentred_groups(structure)
    design = build_design(st, ctx.dataset, ctx.comparison.data, leaf_fits=ctx.leaf_fits)
    params = {k[2:]: np.asarray(v) for k, v in output.arrays.items() if k.startswith("p/")}
    sampler = {k[2:]: np.asarray(v) for k, v in output.arrays.items() if k.startswith("s/")}
    settings = SamplerSpec(**rec["settings"])
    draws = Draws(params, sampler, settings, int(rec["seed"]), float(rec["sampling_seconds"]), rec["engine"],
                  tuple(rec["messages"]))
    names = [n for n in POPULATION if n in params and params[n].size]
    return StructureFit(design, draws, diagnose(draws, names, settings.max_treedepth), rec["init_note"])


def execute(ctx: Context, task: Task, inputs: dict[str, TaskOutput]) -> TaskOutput:
    """Run one task in this process."""
    from .methods import (CVDetails, check_curve_types, fit_with_retries, score_leaves, score_level)
    p = task.payload
    st = task.structure
    dataset, engine = ctx.dataset, None
    L = dataset.n_leaves
    if task.kind in ("full", "refit", "fold", "level"):
        engine = ctx.get_engine()
    if task.kind == "full":
        details = CVDetails()
        t = time.perf_counter()
        fit = fit_with_retries(st, dataset, ctx.comparison, ctx.sampler, ctx.leaf_fits, None, p["seed"], engine,
                               details, p["role"])
        for f in details.fits:
            f["contributes"] = p["contributes"]
        return _fit_output(fit, details, time.perf_counter() - t)
    if task.kind == "score":
        t = time.perf_counter()
        fit = restore_fit(ctx, st, inputs[task.inputs[0]])
        leaves = np.asarray(p["leaves"], int)
        record = {"leaves": leaves, "elpd": [], "mcse": [], "khat": [], "quad": [], "preds": [], "curves": []}
        log_m = []
        for g in leaves:        # one leaf at a time: its curve draws are summarised and dropped before the next
            sc = score_leaves(fit, dataset, np.array([g]), ctx.leaf_fits, in_fit=True)
            est = integrated_loo(sc.log_m, sc.chains)        # per leaf: the same as over the whole block
            for name, value in (("elpd", est.elpd[0]), ("mcse", est.mcse[0]), ("khat", est.khat[0]),
                                ("quad", asdict(sc.quad[0])), ("preds", np.exp(est.log_weights[0]) @ sc.pred_mean[0]),
                                ("curves", None if sc.curves[0] is None
                                 else curve_record(summarise_curves(sc.curves[0], est.log_weights[0])))):
                record[name].append(value)
            log_m.append(sc.log_m[:, 0])
        record.update(chains=fit.draws.n_chains, seconds=time.perf_counter() - t)
        return TaskOutput(record, {"log_m": np.stack(log_m, axis=1)})
    held = np.asarray(p["held"], int)
    train = np.ones(L, bool)
    train[held] = False
    check_curve_types(st, dataset, train, held)
    warm = restore_fit(ctx, st, inputs[task.inputs[0]]) if task.inputs else None
    if warm is not None:        # a refit starts in the parameterisation the full-data fit ended with
        st = warm.design.structure
    details = CVDetails()
    t = time.perf_counter()
    fit = fit_with_retries(st, dataset, ctx.comparison, ctx.sampler, ctx.leaf_fits, train, p["seed"], engine,
                           details, p["role"], warm, retry_marginal=p.get("retry_marginal", True))
    sc = score_leaves(fit, dataset, held, ctx.leaf_fits, in_fit=False)
    grade = fit.diagnostics.grade
    record: dict = {"fits": details.fits, "grade": grade, "held": held, "n_draws": int(sc.log_m.shape[0])}
    if task.kind == "level":
        by = p["by"]
        level_of = dataset.leaves[by].astype(str).to_numpy()
        record["preds"] = [sc.pred_mean[j].mean(axis=0) for j in range(len(held))]
        record["curves"] = [None if c is None else curve_record(summarise_curves(c)) for c in sc.curves]
        levels = {}
        for name in sorted(set(level_of[held])):
            members = held[level_of[held] == name]
            joint, b, bad = score_level(fit, dataset, members, ctx.leaf_fits)
            e, m = refit_elpd(joint, fit.draws.n_chains)
            levels[name] = {"elpd": e, "mcse": m, "bound": b, "bad": bad}
        record["levels"] = levels
    else:
        leaves = []
        for j in range(len(held)):
            e, m = refit_elpd(sc.log_m[:, j], sc.chains)
            curve = curve_record(summarise_curves(sc.curves[j])) if sc.curves[j] is not None else None
            leaves.append({"elpd": e, "mcse": m, "bound": sc.quad[j].bound, "pred": sc.pred_mean[j].mean(axis=0),
                           "quad": asdict(sc.quad[j]), "curve": curve})
        record["leaves"] = leaves
    record["seconds"] = time.perf_counter() - t
    return TaskOutput(record)


# ----------------------------------------------------------------------------------------------
# the plan of one structure

def _setting(structure: Structure, dataset: Dataset, sampler: SamplerSpec, method: str, by: str, folds: int,
             spot_checks: int, estimates: bool, base: str):
    from .plans import Setting, resolved_method

    return Setting(structure, dataset, sampler, resolved_method(method, by), by=by, folds=folds,
                   spot_checks=spot_checks, estimates=estimates, base=base)


def plan(structure: Structure, dataset: Dataset, comparison: Comparison, *, sampler: SamplerSpec,
         method: str = "auto", by: str = LEAF_TERM, folds: int = 10, spot_checks: int = 3,
         estimates: bool = False, base: str = "") -> Plan:
    """The tasks of one structure's cross-validation by ``method`` (auto | exact | kfold), folds by
    ``by``: the plan of that method (`leafcv.cv.plans`). Returns ``(CVResult, CVDetails, keep)`` where
    ``keep`` holds ``full_output`` (the full-data fit's output, when one was made), ``log_m``, ``points``
    and ``curves``."""
    from .plans import Tally, method_plan

    tally = Tally()
    if method == "auto" and by != LEAF_TERM:
        tally.details.notes.append(f"integrated PSIS integrates one leaf's effects; folds by {by!r} are refitted "
                                   f"exactly, each held-out leaf scored with the effects of its held-out {by} "
                                   "integrated too")
    s = _setting(structure, dataset, sampler, method, by, folds, spot_checks, estimates, base)
    return (yield from method_plan(s, tally))


def expected_tasks(structure: Structure, dataset: Dataset, *, sampler: SamplerSpec, method: str = "auto",
                   by: str = LEAF_TERM, folds: int = 10, spot_checks: int = 3, estimates: bool = False) -> int:
    """The tasks `plan` (same arguments) yields, for a progress total: exactly for methods exact and
    kfold; for auto, without the refits of leaves that k-hat flags or of every leaf after spot checks
    disagree (`leafcv.cv.plans.expected_count`)."""
    from .plans import expected_count

    return expected_count(_setting(structure, dataset, sampler, method, by, folds, spot_checks, estimates, ""))


# ----------------------------------------------------------------------------------------------
# the simplest driver: every task in this process, in order

def run_in_process(steps: Plan, ctx: Context, on_output: Callable[[Task, TaskOutput], None] | None = None) -> tuple:
    """Drive a plan to its end here, task after task (what `cross_validate` does)."""
    done: dict[str, TaskOutput] = {}
    outputs = None
    try:
        while True:
            tasks = steps.send(outputs) if outputs is not None else next(steps)
            outputs = []
            for t in tasks:
                if t.key not in done:
                    done[t.key] = roundtrip(execute(ctx, t, {k: done[k] for k in t.inputs}))
                    if on_output is not None:
                        on_output(t, done[t.key])
                outputs.append(done[t.key])
    except StopIteration as stop:
        return stop.value


def cross_validate(structure: Structure, dataset: Dataset, comparison: Comparison, *, method: str = "auto",
                   by: str = LEAF_TERM, folds: int = 10, spot_checks: int = 3, engine=None,
                   leaf_fits: LeafFits, sampler: SamplerSpec | None = None,
                   keep: dict | None = None, estimates: bool = False) -> tuple[CVResult, CVDetails]:
    """Held-out scores of one structure by ``method`` (auto | exact | kfold), every task of its plan
    (`leafcv.cv.plan`) run in this process, one after another.

    ``keep``: a dict that receives, when the method makes one (or with ``estimates``), the full-data
    fit (``"fit"``) and each leaf's log marginal likelihood per draw of it (``"log_m"``, draws chain after
    chain by leaves), and the held-out predictions (``"points"``, ``"curves"``)."""
    sampler = sampler or comparison.sampler
    ctx = Context(comparison, dataset, leaf_fits, sampler, engine=engine)
    steps = plan(structure, dataset, comparison, sampler=sampler, method=method, by=by, folds=folds,
                 spot_checks=spot_checks, estimates=estimates)
    result, details, kept = run_in_process(steps, ctx)
    if keep is not None:
        keep.update(kept_outputs(ctx, structure, kept))
    return result, details


def kept_outputs(ctx, structure: Structure, kept: dict) -> dict:
    """A plan's ``keep`` with the full-data fit rebuilt from its task output (``"fit"``)."""
    out = {k: v for k, v in kept.items() if k != "full_output"}
    if "full_output" in kept:
        out["fit"] = restore_fit(ctx, structure, kept["full_output"])
    return out
