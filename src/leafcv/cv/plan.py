"""One structure's cross-validation as tasks: units of work that run anywhere and are stored when done.

A structure's plan (`plan`) is a generator: it yields a list of tasks, receives their outputs (in the
order yielded) and yields the next list, until it returns ``(CVResult, CVDetails, keep)``. Every task
is a pure function of its payload, its inputs' outputs and the shared context (`Context`), so the same
tasks give the same numbers whichever process, machine or order runs them, and a run folder's task
store (`leafcv.batch.store`) can keep every finished output and skip it on a re-run.

Task kinds (method auto): ``full`` (the full-data fit with targeted retries; output: its draws),
``score`` (a block of leaves scored under that fit: quadrature, integrated PSIS, predictions),
``refit`` (a refit without one leaf, warm-started from ``full``, and the held-out leaf scored). Methods
exact and kfold: one ``refit`` or ``fold`` task per held-out fold; leave-one-level-out: one ``level``
task per fold of levels. With ``estimates``, methods exact and kfold also fit all leaves (``full``,
not contributing to the score) and score every leaf under it for the fit file's log-likelihood group.

Outputs are ``TaskOutput(record, arrays)``: a JSON record and named float arrays (draws, per-draw log
marginals). Every driver passes outputs through `roundtrip`, the form a store returns, so that an
output read back from disk and one just computed are the same values.

Tests: tests/cv/test_methods.py, tests/batch/test_runner.py, tests/batch/test_store.py,
tests/sampling/cv/test_methods.py.
"""
from __future__ import annotations

import hashlib
import json
import time
from dataclasses import asdict, dataclass, field
from typing import TYPE_CHECKING, Any, Callable, Generator

import numpy as np
import pandas as pd

from ..data.dataset import LEAF_TERM, Dataset
from ..inits import LeafFits
from ..jsonio import plain
from ..spec import Comparison, SamplerSpec, Structure
from .predictions import summarise_curves
from .psis import integrated_loo, refit_elpd

if TYPE_CHECKING:
    from .methods import CVDetails
    from .result import CVResult

#: Version of task payloads and outputs: part of every task key, so a change of what a task computes
#: never reuses an output stored by an earlier leafcv. 3: quadrature checked by shifted rules and a
#: brute-force screen, refit draw counts recorded, PSIS by arviz-stats (its Pareto tail fit differs slightly
#: from ArviZ 0.23's ``psislw``), so no stored score of version 2 is reused.
TASK_VERSION = 3
#: Leaves scored per ``score`` task: blocks bound a worker's memory (curve draws of a block's leaves)
#: and let several workers score one fit at once. The scores do not depend on the block size.
SCORE_BLOCK = 16


@dataclass(frozen=True)
class Task:
    """One unit of work of one structure."""

    key: str                      # hash of everything the output depends on
    kind: str                     # full | score | refit | fold | level
    structure: Structure
    label: str                    # in words, for progress and errors
    payload: dict = field(hash=False, default_factory=dict)
    inputs: tuple[str, ...] = ()  # keys of the tasks whose outputs this one reads


@dataclass
class TaskOutput:
    record: dict
    arrays: dict[str, np.ndarray] = field(default_factory=dict)


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


def record_text(record: dict) -> str:
    """A record as JSON text (NaN and infinities as JSON's common extension; floats exact)."""
    return json.dumps(plain(record), allow_nan=True, sort_keys=True)


def roundtrip(output: TaskOutput) -> TaskOutput:
    """``output`` as a store gives it back: the record through JSON, the arrays as float arrays."""
    return TaskOutput(json.loads(record_text(output.record)),
                      {k: np.asarray(v) for k, v in output.arrays.items()})


def task_key(base: str, kind: str, structure: Structure, payload: dict, inputs: tuple[str, ...]) -> str:
    text = json.dumps([TASK_VERSION, base, kind, repr(structure), {k: repr(v) for k, v in sorted(payload.items())},
                       list(inputs)])
    return hashlib.sha256(text.encode()).hexdigest()


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


def restore_fit(ctx: Context, structure: Structure, output: TaskOutput, options=None, priors=None):
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
    design = build_design(st, ctx.dataset, ctx.comparison.data, options, priors, None, ctx.leaf_fits)
    params = {k[2:]: np.asarray(v) for k, v in output.arrays.items() if k.startswith("p/")}
    sampler = {k[2:]: np.asarray(v) for k, v in output.arrays.items() if k.startswith("s/")}
    settings = SamplerSpec(**rec["settings"])
    draws = Draws(params, sampler, settings, int(rec["seed"]), float(rec["sampling_seconds"]), rec["engine"],
                  tuple(rec["messages"]))
    names = [n for n in POPULATION if n in params and params[n].size]
    return StructureFit(design, draws, diagnose(draws, names, settings.max_treedepth), rec["init_note"])


def _curve_record(curve: pd.DataFrame | None) -> dict | None:
    return None if curve is None else {c: curve[c].tolist() for c in curve.columns}


def curve_frame(record: dict | None) -> pd.DataFrame | None:
    return None if record is None else pd.DataFrame(record)


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
                               details, p["role"], p.get("options"), p.get("priors"))
        for f in details.fits:
            f["contributes"] = p["contributes"]
        return _fit_output(fit, details, time.perf_counter() - t)
    if task.kind == "score":
        t = time.perf_counter()
        fit = restore_fit(ctx, st, inputs[task.inputs[0]], p.get("options"), p.get("priors"))
        leaves = np.asarray(p["leaves"], int)
        record = {"leaves": leaves, "elpd": [], "mcse": [], "khat": [], "quad": [], "preds": [], "curves": []}
        log_m = []
        for g in leaves:        # one leaf at a time: its curve draws are summarised and dropped before the next
            sc = score_leaves(fit, dataset, np.array([g]), ctx.leaf_fits, in_fit=True)
            est = integrated_loo(sc.log_m, sc.chains)        # per leaf: the same as over the whole block
            for name, value in (("elpd", est.elpd[0]), ("mcse", est.mcse[0]), ("khat", est.khat[0]),
                                ("quad", asdict(sc.quad[0])), ("preds", np.exp(est.log_weights[0]) @ sc.pred_mean[0]),
                                ("curves", None if sc.curves[0] is None
                                 else _curve_record(summarise_curves(sc.curves[0], est.log_weights[0])))):
                record[name].append(value)
            log_m.append(sc.log_m[:, 0])
        record.update(chains=fit.draws.n_chains, seconds=time.perf_counter() - t)
        return TaskOutput(record, {"log_m": np.stack(log_m, axis=1)})
    held = np.asarray(p["held"], int)
    train = np.ones(L, bool)
    train[held] = False
    check_curve_types(st, dataset, train, held)
    warm = restore_fit(ctx, st, inputs[task.inputs[0]], p.get("options"), p.get("priors")) if task.inputs else None
    if warm is not None:        # a refit starts in the parameterisation the full-data fit ended with
        st = warm.design.structure
    details = CVDetails()
    t = time.perf_counter()
    fit = fit_with_retries(st, dataset, ctx.comparison, ctx.sampler, ctx.leaf_fits, train, p["seed"], engine,
                           details, p["role"], p.get("options"), p.get("priors"), warm,
                           retry_marginal=p.get("retry_marginal", True))
    sc = score_leaves(fit, dataset, held, ctx.leaf_fits, in_fit=False)
    grade = fit.diagnostics.grade
    record: dict = {"fits": details.fits, "grade": grade, "held": held, "n_draws": int(sc.log_m.shape[0])}
    if task.kind == "level":
        by = p["by"]
        level_of = dataset.leaves[by].astype(str).to_numpy()
        record["preds"] = [sc.pred_mean[j].mean(axis=0) for j in range(len(held))]
        record["curves"] = [None if c is None else _curve_record(summarise_curves(c)) for c in sc.curves]
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
            curve = _curve_record(summarise_curves(sc.curves[j])) if sc.curves[j] is not None else None
            leaves.append({"elpd": e, "mcse": m, "bound": sc.quad[j].bound, "pred": sc.pred_mean[j].mean(axis=0),
                           "quad": asdict(sc.quad[j]), "curve": curve})
        record["leaves"] = leaves
    record["seconds"] = time.perf_counter() - t
    return TaskOutput(record)


# ----------------------------------------------------------------------------------------------
# the plan of one structure

Plan = Generator[list[Task], list[TaskOutput], tuple]


def plan(structure: Structure, dataset: Dataset, comparison: Comparison, *, sampler: SamplerSpec,
         method: str = "auto", by: str = LEAF_TERM, folds: int = 10, spot_checks: int = 3, options=None,
         priors=None, estimates: bool = False, base: str = "") -> Plan:
    """The tasks of one structure's cross-validation, as described in the module docstring; returns
    ``(CVResult, CVDetails, keep)`` where ``keep`` holds ``fit`` (the full-data StructureFit, when one
    was made), ``log_m``, ``points`` and ``curves``."""
    from .methods import (REFIT_SEED_OFFSET, fold_seed_base, SPOT_DISAGREE_REFIT_ALL, SPOT_MCSE_MULTIPLE,
                          SPOT_MIN_NATS, SPOT_STREAM, CVDetails, fit_warnings, Leafwise, note_quadrature,
                          prediction_scores, set_curve, folds_for, spot_tolerance)
    from ..diagnostics import worst_grade
    from .predictions import curves_table, points_table
    from .psis import khat_threshold
    from .quadrature import LEAF_TOL, QuadratureInfo
    from .result import CVResult

    extra = {k: v for k, v in (("options", options), ("priors", priors)) if v is not None}

    def make(kind: str, label: str, payload: dict, inputs: tuple[str, ...] = ()) -> Task:
        payload = {**payload, **extra}
        return Task(task_key(base, kind, structure, payload, inputs), kind, structure, label, payload, inputs)

    details = CVDetails()
    L = dataset.n_leaves
    leaf_ids = tuple(dataset.leaves["leaf"].astype(str))
    keep: dict = {}

    def full_and_scores(role: str, contributes: bool):
        full = make("full", f"{structure.name}: {role} fit", {"seed": sampler.seed, "role": role,
                                                                "contributes": contributes})
        (out,) = yield [full]
        details.fits.extend(out.record["fits"])
        blocks = [list(range(i, min(i + SCORE_BLOCK, L))) for i in range(0, L, SCORE_BLOCK)]
        scores = yield [make("score", f"{structure.name}: score leaves {leaf_ids[b[0]]}-{leaf_ids[b[-1]]}",
                             {"leaves": b}, (full.key,)) for b in blocks]
        return full, out, scores

    def held_role(prefix: str, held) -> str:
        return f"{prefix} without {', '.join(leaf_ids[g] for g in held)}"

    acc = Leafwise(L)
    grades: list[str] = []
    n_refits = 0
    n_draws = sampler.chains * sampler.draws
    if method == "auto" and by != LEAF_TERM:
        details.notes.append(f"integrated PSIS integrates one leaf's effects; folds by {by!r} are refitted exactly, "
                             f"each held-out leaf scored with the effects of its held-out {by} integrated too")
        method = "exact"
    if method == "auto":
        full, out, scores = yield from full_and_scores("full data", True)
        details.full_fit_seconds = out.record["seconds"]
        grades.append(out.record["grade"])
        n_draws = int(np.prod(out.arrays["s/lp__"].shape))
        quads: list = [None] * L
        log_m = np.empty((n_draws, L))
        for s in scores:
            r = s.record
            for j, g in enumerate(r["leaves"]):
                acc.elpd[g], acc.mcse[g], acc.khat[g] = r["elpd"][j], r["mcse"][j], r["khat"][j]
                quads[g] = QuadratureInfo(**r["quad"][j])
                acc.bound[g] = quads[g].bound
                acc.preds[g] = np.asarray(r["preds"][j], float)
                if r["curves"][j] is not None:
                    acc.curves[g] = curve_frame(r["curves"][j])
            log_m[:, r["leaves"]] = s.arrays["log_m"]
            details.quadrature_seconds += r["seconds"]
        keep.update(full_output=out, log_m=log_m)
        note_quadrature(details, leaf_ids, range(L), quads)
        details.psis_khat = [float(k) for k in acc.khat]
        acc.how = ["psis"] * L
        thr = khat_threshold(n_draws)
        flagged = [int(g) for g in np.flatnonzero(acc.khat > thr)]
        order = np.random.default_rng([sampler.seed, SPOT_STREAM]).permutation(L)
        spots = [int(g) for g in order if g not in flagged][:spot_checks]
        todo = flagged + spots

        def refits(leaves, spot_set):
            tasks = []
            for g in leaves:
                role = held_role("refit", [g])
                _check_planned(structure, dataset, [g])
                tasks.append(make("refit", f"{structure.name}: {role}",
                                  {"held": [g], "seed": sampler.seed + REFIT_SEED_OFFSET + g, "role": role,
                                   "retry_marginal": g not in spot_set}, (full.key,)))
            outs = yield tasks
            result = {}
            for g, o in zip(leaves, outs):
                details.fits.extend(o.record["fits"])
                details.refit_seconds += o.record["seconds"]
                lf = o.record["leaves"][0]
                result[g] = (lf["elpd"], lf["mcse"], lf["bound"], np.asarray(lf["pred"], float),
                             QuadratureInfo(**lf["quad"]), o.record["grade"], curve_frame(lf["curve"]))
            return result

        ex = yield from refits(todo, frozenset(spots))
        n_refits = len(todo)
        note_quadrature(details, leaf_ids, todo, [ex[g][4] for g in todo])
        replace_leaves = list(flagged)
        disagree = []
        for g in spots:
            e, m, b = ex[g][0], ex[g][1], ex[g][2]
            tol = spot_tolerance(acc.mcse[g], m, acc.bound[g], b)
            bad = abs(acc.elpd[g] - e) > tol
            details.spot_checks.append({"leaf": leaf_ids[g], "khat": float(acc.khat[g]), "elpd_psis": float(acc.elpd[g]),
                                        "elpd_exact": float(e), "mcse_psis": float(acc.mcse[g]), "mcse_exact": float(m),
                                        "bound_psis": float(acc.bound[g]), "bound_exact": float(b),
                                        "tolerance": tol, "disagree": bool(bad), "refit_grade": ex[g][5]})
            if bad:
                disagree.append(g)
                replace_leaves.append(g)
        if disagree:
            details.notes.append(f"spot check(s) of {', '.join(leaf_ids[g] for g in disagree)} disagree with PSIS "
                                 f"beyond max({SPOT_MIN_NATS:g} nats, {SPOT_MCSE_MULTIPLE:g} x MCSE) plus both quadrature "
                                 "bounds: the exact values are used")
        if len(disagree) >= SPOT_DISAGREE_REFIT_ALL:
            rest = [g for g in range(L) if g not in todo]
            more = yield from refits(rest, frozenset())
            ex.update(more)
            n_refits += len(rest)
            note_quadrature(details, leaf_ids, rest, [more[g][4] for g in rest])
            replace_leaves += rest
            details.notes.append(f"{len(disagree)} spot checks disagreed: every leaf was refitted exactly")
        used_roles = {held_role("refit", [g]) for g in replace_leaves}
        for f in details.fits:
            if f["role"].startswith("refit without ") and f["role"] not in used_roles:
                f["contributes"] = False        # a spot check that agreed: recorded, not scored
        for g in replace_leaves:
            e, m, b, pred, _, grade, curve = ex[g]
            acc.elpd[g], acc.mcse[g], acc.bound[g], acc.khat[g], acc.how[g] = e, m, b, np.nan, "refit"
            acc.preds[g] = pred
            set_curve(acc, g, curve)
            grades.append(grade)
            details.refit_leaves.append(leaf_ids[g])
        if flagged:
            details.notes.append(f"{len(flagged)} leaf/leaves with k-hat above {thr:.2f} refitted exactly: "
                                 + ", ".join(leaf_ids[g] for g in flagged))
        unresolved_in = [g for g in range(L) if acc.how[g] == "psis" and quads[g].bound > LEAF_TOL] + \
                        [g for g in replace_leaves if ex[g][4].bound > LEAF_TOL]
    else:
        fold_sets = folds_for(dataset, by, method, folds, sampler.seed)
        seed0 = fold_seed_base(sampler, method)
        prefix = "refit" if method == "exact" else "fold"
        tasks = []
        for i, held in enumerate(fold_sets):
            _check_planned(structure, dataset, held)
            if by == LEAF_TERM:
                role = held_role(prefix, held)
                kind = "refit" if method == "exact" else "fold"
            else:
                names = sorted(set(dataset.leaves[by].astype(str).to_numpy()[held]))
                role = f"{prefix} without {by} {', '.join(names)}"
                kind = "level"
            tasks.append(make(kind, f"{structure.name}: {role}", {"held": [int(g) for g in held],
                                                                 "seed": seed0 + i, "role": role, "by": by}))
        outs = yield tasks
        for o in outs:
            details.fits.extend(o.record["fits"])
            details.refit_seconds += o.record["seconds"]
            grades.append(o.record["grade"])
        n_refits = len(fold_sets)
        n_draws = _kept_draws(outs)
        if by != LEAF_TERM:
            return (yield from _assemble_levels(structure, dataset, by, method, n_draws, details, outs, grades,
                                                keep, estimates, full_and_scores))
        quads = {}
        for o in outs:
            for g, lf in zip(o.record["held"], o.record["leaves"]):
                acc.elpd[g], acc.mcse[g], acc.bound[g], acc.how[g] = lf["elpd"], lf["mcse"], lf["bound"], method
                acc.preds[g] = np.asarray(lf["pred"], float)
                set_curve(acc, g, curve_frame(lf["curve"]))
                quads[g] = QuadratureInfo(**lf["quad"])
        note_quadrature(details, leaf_ids, list(quads), list(quads.values()))
        unresolved_in = [g for g, q in quads.items() if q.bound > LEAF_TOL]
        if estimates:
            yield from _estimates(keep, full_and_scores, L)
    rmse, r2 = prediction_scores(dataset, acc.preds)
    keep["points"], keep["curves"] = points_table(dataset, acc.preds), curves_table(dataset, acc.curves)
    grade = worst_grade(grades)
    warnings = fit_warnings(details, grade) + details.notes
    unscored = ""
    if unresolved_in:
        unscored = ("the held-out quadrature did not settle for " + ", ".join(leaf_ids[g] for g in unresolved_in)
                    + " (" + "; ".join(details.unresolved) + ")")
    result = CVResult(structure.name, method, leaf_ids, acc.elpd, n_draws, pareto_k=acc.khat, n_refits=n_refits,
                      grade=grade, warnings=tuple(warnings), rmse=rmse, r2=r2, method_i=tuple(acc.how),
                      mcse_i=acc.mcse, quad_bound_i=acc.bound, unscored=unscored)
    return result, details, keep


def _kept_draws(outs: list[TaskOutput]) -> int:
    """The draws behind the scores of refit, fold or level tasks: the fewest any of their kept fits has
    (a retry may have doubled a fold's draws; the k-hat threshold and ArviZ's n_samples use this)."""
    return min(int(o.record["n_draws"]) for o in outs)


def _check_planned(structure: Structure, dataset: Dataset, held) -> None:
    """Refuse, before any task runs, a fold whose held-out curve types no training leaf has."""
    from .methods import check_curve_types

    train = np.ones(dataset.n_leaves, bool)
    train[np.asarray(held, int)] = False
    check_curve_types(structure, dataset, train, np.asarray(held, int))


def _estimates(keep: dict, full_and_scores, L: int):
    """The full-data fit of exact and K-fold scoring (estimates only) and every leaf's log marginal."""
    full, out, scores = yield from full_and_scores("full data (estimates only)", False)
    log_m = np.empty((int(np.prod(out.arrays["s/lp__"].shape)), L))
    for s in scores:
        log_m[:, s.record["leaves"]] = s.arrays["log_m"]
    keep.update(full_output=out, log_m=log_m)


def _assemble_levels(structure, dataset, by, method, n_draws, details, outs, grades, keep, estimates,
                     full_and_scores):
    """Leave-one-level-out (or K folds of levels): each level scored jointly; SEs over levels."""
    from .methods import fit_warnings, prediction_scores
    from ..diagnostics import worst_grade
    from .predictions import curves_table, points_table
    from .quadrature import LEAF_TOL
    from .result import CVResult

    L = dataset.n_leaves
    levels = sorted(set(dataset.leaves[by].astype(str).to_numpy()))
    elpd, mcse, bound = (np.full(len(levels), np.nan) for _ in range(3))
    preds, curves, unresolved = {}, {}, []
    for o in outs:
        r = o.record
        for j, g in enumerate(r["held"]):
            preds[int(g)] = np.asarray(r["preds"][j], float)
            if r["curves"][j] is not None:
                curves[int(g)] = curve_frame(r["curves"][j])
        for name, v in r["levels"].items():
            k = levels.index(name)
            elpd[k], mcse[k], bound[k] = v["elpd"], v["mcse"], v["bound"]
            if v["bound"] > LEAF_TOL:
                unresolved.append(f"{by} {name} (bound {v['bound']:.3g} nats; {v['bad']} draws unsettled)")
    if estimates:
        yield from _estimates(keep, full_and_scores, L)
    rmse, r2 = prediction_scores(dataset, preds)
    keep["points"], keep["curves"] = points_table(dataset, preds), curves_table(dataset, curves)
    grade = worst_grade(grades)
    warnings = fit_warnings(details, grade) + details.notes
    unscored = ("the held-out quadrature did not settle for " + ", ".join(unresolved)) if unresolved else ""
    result = CVResult(structure.name, method, tuple(levels), elpd, n_draws,
                      n_refits=len(outs), grade=grade, warnings=tuple(warnings), rmse=rmse, r2=r2, mcse_i=mcse,
                      quad_bound_i=bound, unscored=unscored, unit=by)
    return result, details, keep


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
                   by: str = "leaf", folds: int = 10, spot_checks: int = 3, engine=None,
                   leaf_fits: LeafFits, sampler: SamplerSpec | None = None, options=None, priors=None,
                   keep: dict | None = None, estimates: bool = False) -> tuple[CVResult, CVDetails]:
    """Held-out scores of one structure by ``method`` (auto | exact | kfold), every task of its plan
    (`leafcv.cv.plan`) run in this process, one after another.

    ``keep``: a dict that receives, when the method makes one (or with ``estimates``), the full-data
    fit (``"fit"``) and each leaf's log marginal likelihood per draw of it (``"log_m"``, draws chain after
    chain by leaves), and the held-out predictions (``"points"``, ``"curves"``)."""
    sampler = sampler or comparison.sampler
    ctx = Context(comparison, dataset, leaf_fits, sampler, engine=engine)
    steps = plan(structure, dataset, comparison, sampler=sampler, method=method, by=by, folds=folds,
                 spot_checks=spot_checks, options=options, priors=priors, estimates=estimates)
    result, details, kept = run_in_process(steps, ctx)
    if keep is not None:
        keep.update(kept_outputs(ctx, structure, kept, options, priors))
    return result, details


def kept_outputs(ctx, structure: Structure, kept: dict, options=None, priors=None) -> dict:
    """A plan's ``keep`` with the full-data fit rebuilt from its task output (``"fit"``)."""
    out = {k: v for k, v in kept.items() if k != "full_output"}
    if "full_output" in kept:
        out["fit"] = restore_fit(ctx, structure, kept["full_output"], options, priors)
    return out
