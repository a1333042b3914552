"""The main job: cross-validate every structure of a comparison, rank them, write the run folder.

Run folder (default ``runs/<file stem>/`` beside the comparison file):
  manifest.json            versions, data and specification hashes, seeds, settings actually used,
                           and per structure its model options and priors
  structures.txt           each structure's terms, model options and priors in words
  results/<structure>.json one per structure, written atomically; reused on a re-run when its inputs match
  ranking.csv, ranking.txt the ranking (columns as in DESIGN.md)
  pointwise.csv            per-leaf elpd (and Pareto k-hat) of every structure
"""
from __future__ import annotations

import hashlib
import json
import os
import platform
import sys
import tempfile
import time
from dataclasses import asdict
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from .cv.methods import KFOLD_FALLBACK, CVDetails, cross_validate
from .cv.result import CVResult
from .data.dataset import Dataset
from .inits import fit_leaves
from .ranking import format_ranking, rank, summary_notes
from .spec import Comparison, Structure

RESULT_VERSION = 1


def file_hash(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def write_atomic(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` so that a reader sees the old file or the new one, never a part."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def _versions() -> dict[str, str]:
    from importlib.metadata import PackageNotFoundError, version

    out = {"python": platform.python_version()}
    for pkg in ("leafcv", "pystan", "httpstan", "arviz", "numpy", "scipy", "pandas"):
        try:
            out[pkg] = version(pkg)
        except PackageNotFoundError:
            out[pkg] = "not installed"
    return out


def _program_hash() -> str:
    from .engines.program import program_text

    return hashlib.sha256(program_text().encode()).hexdigest()


def structure_key(structure: Structure, comparison: Comparison, data_hash: str, settings: dict) -> str:
    """Hash of everything a structure's result depends on."""
    payload = json.dumps({"structure": repr(structure), "data": repr(comparison.data), "data_hash": data_hash,
                          "settings": settings, "program": _program_hash(), "version": RESULT_VERSION},
                         sort_keys=True, default=str)
    return hashlib.sha256(payload.encode()).hexdigest()


def structure_record(structure: Structure, dataset: Dataset, comparison: Comparison) -> dict:
    """What a reader needs to know of one structure: origin, model options and every prior in words."""
    from .design import build_design

    design = build_design(structure, dataset, comparison.data)
    return {"origin": structure.origin, "model": asdict(structure.options),
            "leaf_correlation": structure.leaf_correlation, "priors": list(design.prior_lines)}


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


def _result_to_json(result: CVResult, details: CVDetails, key: str) -> str:
    return json.dumps({
        "key": key, "structure": result.structure, "method": result.method, "leaves": list(result.leaves),
        "elpd_i": result.elpd_i.tolist(), "n_draws": result.n_draws,
        "pareto_k": None if result.pareto_k is None else result.pareto_k.tolist(),
        "n_refits": result.n_refits, "converged": result.converged, "warnings": list(result.warnings),
        "rmse": result.rmse, "r2": result.r2, "details": asdict(details),
    }, indent=1)


def _result_from_json(text: str) -> tuple[str, CVResult, dict]:
    d = json.loads(text)
    res = CVResult(d["structure"], d["method"], tuple(d["leaves"]), np.asarray(d["elpd_i"]), d["n_draws"],
                   pareto_k=None if d["pareto_k"] is None else np.asarray(d["pareto_k"]),
                   n_refits=d["n_refits"], converged=d["converged"], warnings=tuple(d["warnings"]),
                   rmse=d["rmse"], r2=d["r2"])
    return d["key"], res, d["details"]


def write_ranking(out: Path, results: list[CVResult], all_details: dict[str, dict], n_leaves: int
                  ) -> tuple[str, pd.DataFrame]:
    """Rank the results and write ranking.csv, ranking.txt and pointwise.csv into ``out``."""
    table = rank(results)
    write_atomic(out / "ranking.csv", table.to_csv(index=False))
    notes = summary_notes(table, n_leaves)
    spot = [f"spot check {s['leaf']}: auto {s['elpd_auto']:.2f} vs exact {s['elpd_exact']:.2f} nats "
            f"(k-hat {s['khat']:.2f}) in {name}" for name, d in all_details.items() for s in d.get("spot_checks", [])]
    text = format_ranking(table) + "\n\n" + "\n".join(notes + spot) + "\n"
    write_atomic(out / "ranking.txt", text)
    point = {"leaf": list(results[0].leaves)}
    for r in results:
        point[f"elpd:{r.structure}"] = r.elpd_i
        if r.pareto_k is not None:
            point[f"khat:{r.structure}"] = r.pareto_k
    write_atomic(out / "pointwise.csv", pd.DataFrame(point).to_csv(index=False))
    return text, table


def rewrite_report(run_dir: Path) -> str:
    """Re-rank a run from the result files of its manifest's method; returns the ranking text."""
    from .errors import UserInputError

    run_dir = Path(run_dir)
    manifest_path = run_dir / "manifest.json"
    if not manifest_path.exists():
        raise UserInputError(str(run_dir), ["no manifest.json here: give the run folder written by `leafcv compare`"])
    manifest = json.loads(manifest_path.read_text())
    results, details = [], {}
    for name, filename in manifest.get("results", {}).items():
        path = run_dir / "results" / filename
        if not path.exists():
            raise UserInputError(str(run_dir), [f"result file {path} of structure {name!r} is missing; re-run `leafcv compare`"])
        _, res, det = _result_from_json(path.read_text())
        results.append(res)
        details[res.structure] = det
    if not results:
        raise UserInputError(str(run_dir), ["no finished structure results in results/"])
    text, _ = write_ranking(run_dir, results, details, len(results[0].leaves))
    return text


def run_comparison(comparison: Comparison, dataset: Dataset, out: Path, *, method: str | None = None,
                   engine=None, log: Callable[[str], None] = print, spot_checks: int = 3,
                   sampler=None) -> pd.DataFrame:
    """Cross-validate every structure (reusing finished results whose inputs match) and rank them."""
    out = Path(out)
    method = method or comparison.cv.method
    sampler = sampler or comparison.sampler
    data_hash = file_hash(comparison.data.file)
    settings = {"method": method, "by": comparison.cv.by, "folds": comparison.cv.folds,
                "spot_checks": spot_checks, "sampler": asdict(sampler)}
    manifest = {
        "comparison": str(comparison.path), "comparison_sha256": file_hash(comparison.path),
        "data": str(comparison.data.file), "data_sha256": data_hash, "settings": settings,
        "seeds": {"sampler": sampler.seed, "refits": f"{sampler.seed} + 1 + fold index; auto refits start at {sampler.seed + 1001}",
                  "spot_checks": sampler.seed, "kfold_assignment": sampler.seed},
        "versions": _versions(), "started": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "command": " ".join(sys.argv),
    }
    manifest["structures"] = {st.name: structure_record(st, dataset, comparison) for st in comparison.structures}
    write_atomic(out / "manifest.json", json.dumps(manifest, indent=1))
    write_atomic(out / "structures.txt", structures_text(comparison, manifest["structures"]))
    state = {"leaf_fits": None}

    files: dict[str, str] = {}

    def one(k: int, s: Structure, how: str) -> tuple[CVResult, dict]:
        how_settings = dict(settings, method=how)
        key = structure_key(s, comparison, data_hash, how_settings)
        path = out / "results" / (f"{s.name}.json" if how == method else f"{s.name}.{how}.json")
        files[s.name] = path.name
        if path.exists():
            try:
                old_key, res, det = _result_from_json(path.read_text())
            except (ValueError, KeyError):
                old_key = None
            if old_key == key:
                log(f"[{k}/{n}] {s.name}: reusing the finished result in {path}")
                return res, det
        if state["leaf_fits"] is None:
            state["leaf_fits"] = fit_leaves(dataset)
        t = time.perf_counter()
        log(f"[{k}/{n}] {s.name}: cross-validating ({how}, by {comparison.cv.by})")
        res, det = cross_validate(s, dataset, comparison, method=how, by=comparison.cv.by,
                                  folds=KFOLD_FALLBACK if (how == "kfold" and method == "auto") else comparison.cv.folds,
                                  spot_checks=spot_checks, engine=engine,
                                  leaf_fits=state["leaf_fits"], sampler=sampler)
        write_atomic(path, _result_to_json(res, det, key))
        log(f"[{k}/{n}] {s.name}: elpd {res.elpd:.1f} (SE {res.se:.1f}), {res.n_refits} refits, "
            f"{time.perf_counter() - t:.0f} s" + ("" if res.converged else " - NOT CONVERGED"))
        return res, asdict(det)

    n = len(comparison.structures)
    done = [one(k, s, method) for k, s in enumerate(comparison.structures, 1)]
    if len({r.method for r, _ in done}) > 1 and any(r.method == "kfold" for r, _ in done):
        # CROSS-VALIDATION.md: when auto falls back to K-fold, every structure uses the same folds
        log("some structures fell back to grouped K-fold: scoring every structure on the same folds")
        done = [d if d[0].method == "kfold" else one(k, s, "kfold")
                for k, (s, d) in enumerate(zip(comparison.structures, done), 1)]
        settings["method_used"] = "kfold"
    results = [r for r, _ in done]
    all_details = {r.structure: d for r, d in done}
    text, table = write_ranking(out, results, all_details, dataset.n_leaves)
    manifest["results"] = files
    manifest["finished"] = time.strftime("%Y-%m-%dT%H:%M:%S%z")
    write_atomic(out / "manifest.json", json.dumps(manifest, indent=1))
    log(text)
    return table
