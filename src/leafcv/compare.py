"""The main job: cross-validate every structure of a comparison, rank them, write the run folder.

Run folder (default ``runs/<file stem>/`` beside the comparison file):
  manifest.json            versions, data and specification hashes, seeds, settings actually used,
                           and per structure its model options and priors
  structures.txt           each structure's terms, model options and priors in words
  study.json               what the report needs of the comparison file and data, as data (runfolder.StudyRecord)
  results/<structure>.json one per structure, written atomically; reused on a re-run when its inputs match
  fits/<structure>.nc      its full-data fit as an ArviZ data tree (posterior, sample_stats,
                           observed_data, and log_likelihood "leaf_log_marginal": each leaf's log marginal
                           per draw, so that arviz.loo gives its leave-one-leaf-out PSIS)
  predictions/<structure>-points.csv   every point's observed and held-out predicted A
  predictions/<structure>-curves.csv   each leaf's held-out predictive curves: predictive mean and the
                           5-95 % interval of a new observation on a grid of Ci (A-Ci) or PPFD (A-Q)
                           (leafcv.cv.predictions)
  ranking.csv, ranking.txt the ranking (columns as in DESIGN.md)
  pointwise.csv            per held-out unit (leaf, or level of a grouping) and structure: elpd, how it
                           was scored, its Monte Carlo SE, quadrature bound and Pareto k-hat (NaN if
                           not computed or not scored by PSIS)
  report.html, figures/, tables/   the report (leafcv.report), written at the end of a run
"""
from __future__ import annotations

import hashlib
import json
import os
import platform
import sys
import time
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Callable

import numpy as np
import pandas as pd

from .cv.result import CVResult
from .diagnostics import grade_definitions
from .errors import EngineError
from .data.dataset import Dataset
from .inits import fit_leaves
from .atomic import replacing, write_atomic
from .jsonio import json_float, json_floats, plain
from .manifest import file_hash
from .ranking import format_ranking, rank, summary_notes
from .runfolder import PREDICTION_PARTS, RunPaths, write_study
from .spec import Comparison, SamplerSpec, Structure

if TYPE_CHECKING:
    from .cv.methods import CVDetails

RESULT_VERSION = 2


def _versions() -> dict[str, str]:
    from importlib.metadata import PackageNotFoundError, version

    out = {"python": platform.python_version()}
    for pkg in ("leafcv", "pystan", "httpstan", "cmdstanpy", "arviz-base", "arviz-stats", "numpy", "scipy", "pandas"):
        try:
            out[pkg] = version(pkg)
        except PackageNotFoundError:
            out[pkg] = "not installed"
    return out


def _program_hash() -> str:
    from .engines.program import program_text

    return hashlib.sha256(program_text().encode()).hexdigest()


def _data_reading(comparison: Comparison) -> str:
    """How the data file is read (columns, units, groups, traits, centring), without where it is: its
    content is hashed apart, so a run folder and its data moved together keep every finished task."""
    from dataclasses import replace

    return repr(replace(comparison.data, file=Path(comparison.data.file).name))


def structure_key(structure: Structure, comparison: Comparison, data_hash: str, settings: dict) -> str:
    """Hash of everything a structure's result depends on."""
    payload = json.dumps({"structure": repr(structure), "data": _data_reading(comparison), "data_hash": data_hash,
                          "settings": settings, "program": _program_hash(), "version": RESULT_VERSION},
                         sort_keys=True, default=str)
    return hashlib.sha256(payload.encode()).hexdigest()


def structure_record(structure: Structure, dataset: Dataset, comparison: Comparison) -> dict:
    """What a reader needs to know of one structure: origin, model options and every prior in words."""
    from .design import build_design

    from . import fvcb
    from .terms import responses

    design = build_design(structure, dataset, comparison.data)
    rset = fvcb.RUBISCO_SETS[fvcb.DEFAULT_RUBISCO_SET]
    return {"origin": structure.origin, "model": asdict(structure.options),
            "leaf_correlation": structure.leaf_correlation, "priors": list(design.prior_lines),
            "params": {p: asdict(ps) for p, ps in structure.params.items() if ps is not None},
            "terms": [t.record() for p in design.params for t in design.terms[p]],
            "temperature": {"rubisco_set": fvcb.DEFAULT_RUBISCO_SET, "rubisco": asdict(rset),
                            "responses": {k: asdict(r) for k, r in responses(structure.options).items()}},
            "parameterisation": [f"leaf effects on {lt.param}: {lt.reason}" for lt in design.leaf_terms]
                                + [f"{g.label}: {g.reason}" for g in design.group_terms]}


def structures_text(comparison: Comparison, records: dict[str, dict]) -> str:
    """structures.txt of a run: each structure's terms, model options and priors."""
    from .comparison import describe_options, describe_param
    from .spec import PARAMETERS

    lines = []
    for st in comparison.structures:
        rec = records[st.name]
        lines.append(f"structure {st.name!r}" + (f"  [{st.origin}]" if st.origin else ""))
        lines += [f"  {describe_param(p, st.params[p])}" for p in PARAMETERS]
        lines.append(f"  model: {describe_options(st.options)}"
                     + ("; correlated leaf effects" if st.leaf_correlation else ""))
        lines.append("  priors:")
        lines += [f"    {x}" for x in rec["priors"]]
        lines.append("")
    return "\n".join(lines)


def _result_to_json(result: CVResult, details: CVDetails | dict, key: str) -> str:
    """The result file of one structure (format :data:`RESULT_VERSION`; NaN written as null, infinities
    as "inf" and "-inf")."""
    return json.dumps(plain({
        "version": RESULT_VERSION, "key": key, "structure": result.structure, "method": result.method,
        "unit": result.unit, "leaves": list(result.leaves), "elpd_i": result.elpd_i, "n_draws": result.n_draws,
        "method_i": list(result.method_i), "pareto_k": result.pareto_k, "mcse_i": result.mcse_i,
        "quad_bound_i": result.quad_bound_i, "n_refits": result.n_refits, "grade": result.grade,
        "unscored": result.unscored, "warnings": list(result.warnings), "rmse": result.rmse, "r2": result.r2,
        "details": details if isinstance(details, dict) else asdict(details),
    }, strict=True), indent=1, allow_nan=False)


def _result_from_json(text: str) -> tuple[str, CVResult, dict]:
    """(key, result, details) of a result file; files of format 1 (a ``converged`` flag instead of a
    grade, no per-entry methods or errors) are read too."""
    d = json.loads(text)
    grade = d["grade"] if "grade" in d else ("converged" if d["converged"] else "failed")
    metrics = {name: {k: json_float(v) for k, v in d[name].items()} for name in ("rmse", "r2")}
    res = CVResult(d["structure"], d["method"], tuple(d["leaves"]), json_floats(d["elpd_i"]), d["n_draws"],
                   pareto_k=json_floats(d["pareto_k"]), n_refits=d["n_refits"], grade=grade,
                   warnings=tuple(d["warnings"]), rmse=metrics["rmse"], r2=metrics["r2"],
                   method_i=tuple(d.get("method_i", ())), mcse_i=json_floats(d.get("mcse_i")),
                   quad_bound_i=json_floats(d.get("quad_bound_i")), unscored=d.get("unscored", ""),
                   unit=d.get("unit", "leaf"))
    return d["key"], res, d["details"]


def _number(value: object, spec: str) -> str | None:
    """``value`` formatted by ``spec``, or None when it is missing or not a finite number."""
    if value is None or isinstance(value, bool):
        return None
    try:
        number = float(value)
    except (TypeError, ValueError):
        return None
    return format(number, spec) if np.isfinite(number) else None


def spot_check_line(structure: str, check: dict) -> str:
    """One line of ranking.txt about a spot check (PSIS against an exact refit of one unit).

    Parameters
    ----------
    structure
        Name of the structure.
    check
        Keys ``leaf, khat, elpd_psis, elpd_exact, mcse_psis, mcse_exact, disagree``; missing
        keys are left out of the line (``elpd_auto`` is read where ``elpd_psis`` is missing).

    Returns
    -------
    str
        E.g. ``"spot check L003 in s: PSIS -45.21 ± 0.03 vs exact refit -45.19 ± 0.04 nats (k-hat 0.31)"``,
        ending ``" — DISAGREES: the exact value is used"`` when ``disagree`` is true.
    """
    def value(elpd_key: str, mcse_key: str) -> str:
        elpd = _number(check.get(elpd_key), ".2f") or "?"
        mcse = _number(check.get(mcse_key), ".2f")
        return elpd if mcse is None else f"{elpd} ± {mcse}"

    check = dict(check)
    check.setdefault("elpd_psis", check.get("elpd_auto"))
    khat = _number(check.get("khat"), ".2f")
    line = (f"spot check {check.get('leaf', '?')} in {structure}: PSIS {value('elpd_psis', 'mcse_psis')} "
            f"vs exact refit {value('elpd_exact', 'mcse_exact')} nats" + (f" (k-hat {khat})" if khat else ""))
    return line + (" — DISAGREES: the exact value is used" if check.get("disagree") else "")


def pointwise_table(results: list[CVResult]) -> pd.DataFrame:
    """pointwise.csv: the unit's ids, then per structure its elpd, method, MCSE, quadrature bound
    and Pareto k-hat of each unit (NaN where not computed or not scored by PSIS)."""
    point: dict[str, object] = {results[0].unit: list(results[0].leaves)}
    for r in results:
        point[f"elpd:{r.structure}"] = r.elpd_i
        point[f"method:{r.structure}"] = list(r.method_i)
        point[f"mcse:{r.structure}"] = r.mcse_i
        point[f"quad_bound:{r.structure}"] = r.quad_bound_i
        point[f"khat:{r.structure}"] = r.pareto_k
    return pd.DataFrame(point)


def write_ranking(out: Path, results: list[CVResult], all_details: dict[str, dict], n_leaves: int
                  ) -> tuple[str, pd.DataFrame]:
    """Rank the results and write ranking.csv, ranking.txt and pointwise.csv into ``out``.

    ``n_leaves`` is the number of held-out units (leaves, or levels of the results' unit).
    """
    table = rank(results)
    pointwise = pointwise_table(results)
    paths = RunPaths(out)
    write_atomic(paths.ranking, table.to_csv(index=False))
    notes = summary_notes(table, n_leaves, results[0].unit, pointwise)
    spot = [spot_check_line(name, s) for name, d in all_details.items() for s in d.get("spot_checks", [])]
    text = format_ranking(table) + "\n\n" + "\n".join(notes + spot) + "\n"
    write_atomic(paths.ranking_text, text)
    write_atomic(paths.pointwise, pointwise.to_csv(index=False))
    return text, table


def write_fit(path: Path, fit, dataset: Dataset, log_m: np.ndarray | None) -> None:
    """Write a structure's full-data fit as an ArviZ data tree (NetCDF, h5netcdf engine) atomically."""
    from .cv.arviz_bridge import to_datatree

    tree = to_datatree(fit, dataset, log_m)
    with replacing(path) as tmp:
        tree.to_netcdf(tmp, engine="h5netcdf")


def rewrite_report(run_dir: Path) -> str:
    """Re-rank a run from the result files of its manifest's method; returns the ranking text."""
    from .errors import UserInputError
    from .manifest import read_manifest

    run_dir = Path(run_dir)
    manifest = read_manifest(run_dir)
    results, details = [], {}
    for name in manifest.get("results", {}):
        path = RunPaths(run_dir).result(name)
        if not path.exists():
            raise UserInputError(str(run_dir), [f"result file {path} of structure {name!r} is missing; re-run `leafcv compare`"])
        _, res, det = _result_from_json(path.read_text())
        results.append(res)
        details[res.structure] = det
    if not results:
        raise UserInputError(str(run_dir), ["no finished structure results in results/"])
    text, _ = write_ranking(run_dir, results, details, len(results[0].leaves))
    return text


def seed_plan(seed: int) -> dict:
    """Every seed of a run, derived from the run seed (so a re-run gives identical numbers)."""
    from .cv.methods import (KFOLD_SEED_OFFSET, REFIT_SEED_OFFSET, RETRY_SEED_OFFSET, SPOT_STREAM)

    return {"run": seed, "full_fit": seed,
            "leaf_refit": f"{seed} + {REFIT_SEED_OFFSET} + leaf index (0-based; the same for every structure); "
                          f"exact by a grouping: {seed} + {REFIT_SEED_OFFSET} + level index",
            "kfold_fold": f"{seed} + {KFOLD_SEED_OFFSET} + fold index", "kfold_assignment": seed,
            "spot_checks": f"numpy default_rng([{seed}, {SPOT_STREAM}]) orders the leaves; the first leaves not "
                           f"flagged by k-hat are checked",
            "retries": f"attempt a (1-based) of any fit: its seed + (a - 1) x {RETRY_SEED_OFFSET}",
            "range": "every fit's seed is taken modulo 2^32"}


def task_base(comparison: Comparison, data_hash: str, sampler, engine: str = "") -> str:
    """Hash of what every task of a run depends on besides its own payload: the data file and its
    reading, the sampler settings, the Stan program and the engine (``engine``: its name and Stan
    version, `engines.choice.engine_identity`; "" for PyStan, whose keys it leaves as they were)."""
    fields = {"data": _data_reading(comparison), "data_hash": data_hash, "sampler": asdict(sampler),
              "program": _program_hash()}
    if engine:
        fields["engine"] = engine
    payload = json.dumps(fields, sort_keys=True, default=str)
    return hashlib.sha256(payload.encode()).hexdigest()


class BatchIncomplete(EngineError):
    """Some structures failed (a task failed twice, or the plan refused); the others are ranked."""


def run_comparison(comparison: Comparison, dataset: Dataset, out: Path, *, method: str | None = None,
                   engine=None, log: Callable[[str], None] | None = None, spot_checks: int = 3,
                   sampler=None, workers: int | None = None, scheduler: str | None = None,
                   progress: str | None = None, report: bool = True) -> pd.DataFrame:
    """Cross-validate every structure and rank them, every unit of work a task kept in the run folder's
    task store (`leafcv.batch`), so a re-run, or a run started again after being killed, recomputes only
    unfinished tasks. Messages go to ``log`` (default: the "leafcv" logger at INFO).

    ``workers``: tasks run at once (default: one per core; 1 runs them in this process); ``scheduler``:
    a Dask scheduler address, or "local" for a LocalCluster of ``workers`` processes; ``progress``:
    "bar", "plain" or "quiet" (default: a bar on a terminal, else plain lines). ``engine``: tasks use it
    in place of PyStan (tests); it must be picklable for worker processes. ``report``: write the HTML
    report at the end (False for the replicate studies of a simulation).
    """
    import logging

    from .batch.store import RunLock

    log = log or logging.getLogger("leafcv").info
    out = Path(out)
    with RunLock(out):
        return _run_locked(comparison, dataset, out, method=method, engine=engine, log=log,
                           spot_checks=spot_checks, sampler=sampler, workers=workers, scheduler=scheduler,
                           progress=progress, report=report)


@dataclass(frozen=True)
class _Run:
    """What one run of `run_comparison` is, settled before any structure is scored."""

    comparison: Comparison
    dataset: Dataset
    out: Path
    method: str
    sampler: SamplerSpec
    spot_checks: int
    data_hash: str
    settings: dict              # what results depend on besides the structure (`structure_key`)
    engine: object
    engine_label: str
    identity: str               # the engine's identity in task keys ("" for PyStan)
    n_workers: int
    cores: int
    workers: int | None
    scheduler: str | None
    progress: str | None
    log: Callable[[str], None]

    @property
    def paths(self) -> RunPaths:
        return RunPaths(self.out)

    @property
    def local(self) -> bool:
        """Workers on this machine (no Dask scheduler elsewhere)."""
        return self.scheduler is None or self.scheduler == "local"

    def plan_options(self) -> dict:
        """The arguments of every structure's plan (`leafcv.cv.plan.plan`) besides the structure."""
        cv = self.comparison.cv
        return {"sampler": self.sampler, "method": self.method, "by": cv.by, "folds": cv.folds,
                "spot_checks": self.spot_checks, "estimates": True}


def _run_locked(comparison, dataset, out, *, method, engine, log, spot_checks, sampler, workers, scheduler,
                progress, report=True) -> pd.DataFrame:
    run = _settle(comparison, dataset, out, method=method, engine=engine, log=log, spot_checks=spot_checks,
                  sampler=sampler, workers=workers, scheduler=scheduler, progress=progress)
    manifest = _write_inputs(run)
    finished, todo = _reusable_results(run)
    failures = _score_structures(run, todo, finished) if todo else {}
    return _rank_and_finish(run, manifest, finished, failures, report)


def _settle(comparison, dataset, out, *, method, engine, log, spot_checks, sampler, workers, scheduler,
            progress) -> _Run:
    """The run's method, sampler, settings and workers; a named engine that cannot run here stops it now."""
    from .batch.executors import default_workers
    from .batch.worker import machine_cores
    from .engines.choice import check_engine, engine_identity

    method = method or comparison.cv.method
    sampler = sampler or comparison.sampler
    data_hash = file_hash(comparison.data.file)
    settings = {"method": method, "by": comparison.cv.by, "folds": comparison.cv.folds,
                "spot_checks": spot_checks, "sampler": asdict(sampler)}
    cores = machine_cores()
    engine_label = check_engine(engine)            # a named engine that cannot run here stops the run now
    identity = engine_identity(engine)
    if identity:
        settings["engine"] = identity             # results of another engine are not reused
    n_workers = workers or (1 if scheduler is None and engine is not None and not isinstance(engine, str)
                            else default_workers())
    if n_workers < 1:
        raise ValueError(f"workers must be at least 1, not {n_workers}")
    return _Run(comparison, dataset, Path(out), method, sampler, spot_checks, data_hash, settings, engine, engine_label, identity, n_workers, cores, workers, scheduler, progress, log)


def _write_inputs(run: _Run) -> dict:
    """Write the manifest (as the run starts), the leaves and the structures in words; returns the manifest."""
    from .cv.quadrature import LEAF_TOL
    from .cv.result import khat_threshold
    from .engines.choice import engine_version

    comparison, sampler = run.comparison, run.sampler
    manifest = {
        "comparison": str(comparison.path), "comparison_sha256": file_hash(comparison.path),
        "data": str(comparison.data.file), "data_sha256": run.data_hash, "settings": run.settings,
        "seeds": seed_plan(sampler.seed), "grades": grade_definitions(),
        "versions": _versions(), "engine": {"name": run.engine_label, "version": engine_version(run.engine)},
        "started": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "command": " ".join(sys.argv),
    }
    manifest["accuracy"] = {"quadrature_tolerance_nats": LEAF_TOL,
                            "khat_threshold": f"min(1 - 1 / log10(draws), 0.7) (Vehtari et al. 2024): "
                                              f"{khat_threshold(sampler.chains * sampler.draws):.2f} at "
                                              f"{sampler.chains * sampler.draws} draws"}
    manifest["structures"] = {st.name: structure_record(st, run.dataset, comparison) for st in comparison.structures}
    paths = run.paths
    write_atomic(paths.leaves, run.dataset.leaves.to_csv(index=False))
    write_atomic(paths.manifest, json.dumps(manifest, indent=1))
    write_atomic(paths.structures_text, structures_text(comparison, manifest["structures"]))
    write_study(run.out, comparison, run.dataset)
    return manifest


def _reusable_results(run: _Run) -> tuple[dict[str, tuple[CVResult, dict]], list[tuple[Structure, str]]]:
    """The structures whose result (with its fit and predictions) is in the run folder for the same
    inputs, by name; and the others to score, each with its result key."""
    paths = run.paths
    finished: dict[str, tuple[CVResult, dict]] = {}
    todo = []
    for s in run.comparison.structures:
        key = structure_key(s, run.comparison, run.data_hash, run.settings)
        path = paths.result(s.name)
        if path.exists():
            try:
                old_key, res, det = _result_from_json(path.read_text())
            except (ValueError, KeyError, TypeError):
                old_key = None
            kept = [paths.fit(s.name)] + [paths.prediction(s.name, part) for part in PREDICTION_PARTS]
            if old_key == key and all(f.exists() for f in kept):
                run.log(f"{s.name}: reusing the finished result in {path}")
                finished[s.name] = (res, det)
                continue
            if old_key == key:
                run.log(f"{s.name}: the result matches but its fit or predictions are missing: computing again")
        todo.append((s, key))
    return finished, todo


def _score_structures(run: _Run, todo: list[tuple[Structure, str]], finished: dict) -> dict:
    """Every task of the structures in ``todo``, run and stored (`leafcv.batch`); each structure's files
    are written, and it is added to ``finished``, as its plan ends. Returns the failures by structure."""
    from functools import partial

    from .batch.executors import Lazy, chains_at_once
    from .batch.progress import Progress, default_mode
    from .batch.runner import Runner
    from .batch.store import TaskStore
    from .cv.plan import Context, expected_tasks, plan

    leaf_fits = fit_leaves(run.dataset)
    run.paths.logs.mkdir(parents=True, exist_ok=True)
    ctx = Context(run.comparison, run.dataset, leaf_fits, run.sampler, engine=run.engine,
                  chains_at_once=chains_at_once(run.cores, run.n_workers) if run.n_workers > 1 else None,
                  compile_log=str(run.paths.compile_log) if run.local else None)
    base = task_base(run.comparison, run.data_hash, run.sampler, run.identity)
    options = run.plan_options()
    plans = {s.name: plan(s, run.dataset, run.comparison, base=base, **options) for s, _ in todo}
    expected = {s.name: expected_tasks(s, run.dataset, **options) for s, _ in todo}
    bar = Progress(run.progress or default_mode(), run.log)
    executor = Lazy(partial(_start_executor, run, ctx, bar, len(todo)))
    store = TaskStore(run.out)
    store.log("run", workers=run.n_workers, scheduler=run.scheduler, pid=os.getpid())
    written = partial(_write_structure, run, ctx, {s.name: (s, key) for s, key in todo}, finished, bar)
    runner = Runner(executor, store, bar, on_finished=written)
    try:
        _, failures = runner.run(plans, expected)
    except BaseException as exc:
        bar.close()
        executor.close(kill=True)
        if isinstance(exc, KeyboardInterrupt):
            done = sum(1 for e in store.journal() if e["event"] == "done")
            run.log(f"stopped: every finished task is kept in {run.out / 'tasks'} ({done} stored); run the same "
                    f"command again to continue")
        raise
    bar.close()
    executor.close()
    return failures


def _start_executor(run: _Run, ctx, bar, n_structures: int):
    """The executor of the run's tasks, made when the first task is sent (after compiling the program
    here, for workers on this machine to find it cached)."""
    from .batch.executors import DaskCluster, InProcess, LocalProcesses

    if (run.engine is None or isinstance(run.engine, str)) and run.local:
        from .engines.choice import make_engine
        from .engines.program import program_text

        make_engine(run.engine, log=run.log, compile_log=ctx.compile_log).precompile(program_text())
    if run.scheduler is not None:
        ex = DaskCluster(ctx, run.scheduler, run.workers)
    elif run.n_workers == 1:
        ex = InProcess(ctx)
    else:
        ex = LocalProcesses(ctx, run.n_workers)
    bar.start = time.perf_counter()     # elapsed time and ETA count from here, not from the compile
    run.log(f"{n_structures} structure(s) to cross-validate ({run.method}, by {run.comparison.cv.by}) on {ex.name}: "
            f"{ex.workers} worker(s)"
            + (f", {ctx.chains_at_once} chain(s) at once each ({run.cores} cores)" if ctx.chains_at_once else "")
            + f"; finished tasks are kept in {run.out / 'tasks'}")
    return ex


def _write_structure(run: _Run, ctx, todo: dict[str, tuple[Structure, str]], finished: dict, bar, name: str,
                     value: tuple) -> None:
    """Write one structure's fit, predictions and result as its plan ends (``todo``: each structure and
    its result key by name; ``value``: what the plan returned), and say its score."""
    from .cv.plan import kept_outputs

    paths = run.paths
    res, det, kept = value
    structure, key = todo[name]
    kept = kept_outputs(ctx, structure, kept)
    write_fit(paths.fit(name), kept["fit"], run.dataset, kept["log_m"])
    for part in PREDICTION_PARTS:
        write_atomic(paths.prediction(name, part), kept[part].to_csv(index=False))
    write_atomic(paths.result(name), _result_to_json(res, det, key))
    finished[name] = (res, asdict(det))
    grade = {"converged": "", "marginal": " - MARGINAL CONVERGENCE", "failed": " - NOT CONVERGED"}[res.grade]
    mcse = f", MCSE {res.mcse:.2f}" if np.isfinite(res.mcse) else ""
    line = (f"{name}: elpd {res.elpd:.1f} (SE {res.se:.1f}{mcse}), {res.n_refits} refits" + grade
            + (f" - NOT SCORED: {res.unscored}" if res.unscored else ""))
    if bar.bar is not None:
        bar.bar.write(line, file=sys.stderr)
    else:
        run.log(line)


def _rank_and_finish(run: _Run, manifest: dict, finished: dict, failures: dict, report: bool) -> pd.DataFrame:
    """Rank the finished structures, complete the manifest, write the report; then raise if any
    structure failed."""
    if not finished:
        raise BatchIncomplete("no structure finished: " + "; ".join(f"{n}: {f.message}" for n, f in failures.items()),
                              "\n\n".join(f"{n} ({f.task.label}):\n{f.details}" for n, f in failures.items()))
    order = [s.name for s in run.comparison.structures if s.name in finished]
    results = [finished[n][0] for n in order]
    all_details = {n: finished[n][1] for n in order}
    text, table = write_ranking(run.out, results, all_details, len(results[0].leaves))
    manifest["results"] = {n: run.paths.result(n).name for n in order}
    if failures:
        manifest["failed"] = {n: f"{f.task.label}: {f.message}" for n, f in failures.items()}
    manifest["finished"] = time.strftime("%Y-%m-%dT%H:%M:%S%z")
    write_atomic(run.paths.manifest, json.dumps(manifest, indent=1))
    run.log(text)
    if report:
        from .report import write_report    # here: the report needs matplotlib, the scores do not

        run.log(f"report: {write_report(run.out)}")
    if failures:
        raise BatchIncomplete(
            f"{len(failures)} structure(s) not finished ({', '.join(failures)}): "
            + "; ".join(f"{f.task.label}: {f.message}" for f in failures.values())
            + f". The others are ranked in {run.out}; run the same command again to retry the failed tasks",
            "\n\n".join(f"{n} ({f.task.label}):\n{f.details}" for n, f in failures.items()))
    return table
