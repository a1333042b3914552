"""A run folder built in Python without a sampler, in the formats ``leafcv compare`` writes.

The per-leaf scores are invented; ranking.csv, ranking.txt and pointwise.csv are written by leafcv's own
``write_ranking`` and the result files by its own ``_result_to_json``, structures.txt by its own
``structures_text`` and study.json by its own ``write_study`` (from the comparison and data as
``load_dataset`` reads them), so the report reads exactly what a real run leaves. ``study=False`` leaves
study.json out, as a run folder of an earlier leafcv. Five structures over 12 leaves
of three species and two campaigns:

- ``traits-month-fixed`` (the best), ``traits-month-random`` (close behind; differs in one term: campaign
  on vcmax25 fixed vs random), ``leaf-vcmax`` (behind), ``pooled`` (far behind; differs from leaf-vcmax in
  one term: leaf effects on vcmax25);
- ``traits-month-fixed-t`` (graded failed, so not ranked, although it scores higher than the best).

``fits/traits-month-fixed.nc`` is a hand-built ArviZ data tree in the labelled layout (see
:func:`labelled_idata`); the other structures have no saved fit.
"""
from __future__ import annotations

import hashlib
import json
from dataclasses import asdict, replace
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd

from leafcv.compare import _result_to_json, structures_text, write_ranking
from leafcv.cv.result import CVResult
from leafcv.data import load_dataset
from leafcv.runfolder import write_study
from leafcv.spec import Comparison, CVSpec, DataSpec, ModelOptions, ParamSpec, SamplerSpec, Structure

LEAVES = [f"L{i:03d}" for i in range(1, 13)]
TAXON = ["SP-A", "SP-B", "SP-C"] * 4
CAMPAIGN = ["2026-05"] * 6 + ["2026-06"] * 6
QUESTION = "is the campaign shift of Vcmax25 better fixed or random, and does Vcmax25 need leaf effects?"
N_DRAWS = 400

COMPARISON = """\
# An invented comparison for the report's tests.
# Question: is the campaign shift of Vcmax25 better fixed or random, and does Vcmax25 need
# leaf effects? Read the answer in the ranking.

format = 1

[data]
file = "observations.csv"
[data.columns]
net_assimilation = "assim"
intercellular_co2 = "ci_ppm"
photon_flux = "par_in"
leaf = "plant_leaf"
curve = "run"
[data.leaf]
groups = ["taxon", "campaign"]
traits = ["n_area"]
[data.leaf.centre]
n_area = 2.0
[data.leaf.scale]
n_area = 0.5
"""

RATIO = {"jmax25": ParamSpec(ratio_to="vcmax25"), "rd25": ParamSpec(ratio_to="vcmax25")}


def structures() -> list[Structure]:
    def make(name, vcmax, options=ModelOptions()):
        return Structure(name, {"vcmax25": vcmax, "alpha": ParamSpec(random=("leaf",)), "theta": ParamSpec(), **RATIO},
                         options=options)

    fixed = make("traits-month-fixed", ParamSpec(fixed=("n_area", "campaign"), random=("leaf",)))
    return [
        make("pooled", ParamSpec()),
        make("leaf-vcmax", ParamSpec(random=("leaf",))),
        fixed,
        make("traits-month-random", ParamSpec(fixed=("n_area",), random=("leaf", "campaign"))),
        replace(fixed, name="traits-month-fixed-t", options=ModelOptions(student_t=True)),
    ]


def prior_lines(st: Structure) -> list[str]:
    v = st.params["vcmax25"]
    lines = ["vcmax25 at reference traits and levels: lognormal, median 60, 95 % within 8.45-426 "
             "(normal(4.09, 1) on the log scale)"]
    if "n_area" in v.fixed:
        lines.append("vcmax25 slope on n_area (per 0.5 units, centred at 2): normal(0, 1) on the log scale")
    if "campaign" in v.fixed:
        lines.append("vcmax25 campaign levels vs reference '2026-05': normal(0, 0.5) on the log scale")
    if "leaf" in v.random:
        lines.append("SD of leaf effects on vcmax25: half-normal(0, 0.5) on the log scale")
    if "campaign" in v.random:
        lines.append("SD of campaign effects on vcmax25: half-normal(0, 0.5) on the log scale")
    lines += ["jmax25/vcmax25 at reference: lognormal, median 1.7, 95 % within 0.638-4.53 (normal(0.531, 0.5) "
              "on the log scale)", "SD of leaf effects on alpha: half-normal(0, 0.5) on the logit scale",
              "residual SD: half-normal(0, 2) umol m-2 s-1"]
    return lines


def _fit(role: str, attempt: int, seed: int, grade: str, contributes=True, kept=True, cause="") -> dict:
    return {"role": role, "attempt": attempt, "seed": seed, "retry_cause": cause, "warm_start": role != "full data",
            "contributes": contributes, "kept": kept, "chains": 2, "warmup": 100 * attempt, "draws": 100 * attempt,
            "adapt_delta": 0.8, "seconds": 1.5, "max_rhat": 1.004 if grade == "converged" else 1.08,
            "min_ess_bulk": 350.0, "min_ess_tail": 300.0, "divergences": 0 if grade != "failed" else 12,
            "treedepth_hits": 0, "min_ebfmi": 0.71, "worst": "b0[1]",
            "problems": [] if grade == "converged" else ["R-hat 1.080 > 1.05"], "grade": grade}


def results() -> tuple[list[CVResult], dict[str, dict]]:
    """Invented results of the five structures, and their details."""
    rng = np.random.default_rng(11)
    base = -20 + rng.normal(0, 3, len(LEAVES))
    elpd = {
        "traits-month-fixed": base,
        "traits-month-random": base - 0.05 + rng.normal(0, 0.1, len(LEAVES)),
        "leaf-vcmax": base - 1.4 + rng.normal(0, 0.6, len(LEAVES)),
        "pooled": base - 25 + rng.normal(0, 5, len(LEAVES)),
        "traits-month-fixed-t": base + 0.5 + rng.normal(0, 0.05, len(LEAVES)),
    }
    out, details = [], {}
    for k, st in enumerate(structures()):
        name = st.name
        method_i = ["psis"] * len(LEAVES)
        method_i[k + 2] = "refit"
        khat = rng.uniform(0.05, 0.6, len(LEAVES))
        khat[k + 2] = np.nan
        grade = "failed" if name.endswith("-t") else ("marginal" if name == "leaf-vcmax" else "converged")
        fits = [_fit("full data", 1, 7, "marginal", kept=False),
                _fit("full data", 2, 7926, grade, cause="attempt 1 marginal (R-hat 1.080 > 1.05); mixing: warm-up "
                     "200, draws 200 per chain"),
                _fit(f"refit without {LEAVES[k + 2]}", 1, 1009 + k, "converged"),
                _fit(f"refit without {LEAVES[9]}", 1, 1016, "converged", contributes=False)]
        details[name] = {
            "full_fit_seconds": 3.0, "quadrature_seconds": 1.0, "refit_seconds": 2.5, "refit_leaves": [LEAVES[k + 2]],
            "spot_checks": [{"leaf": LEAVES[9], "khat": float(khat[9]), "elpd_psis": float(elpd[name][9]),
                             "elpd_exact": float(elpd[name][9] + 0.02), "mcse_psis": 0.03, "mcse_exact": 0.04,
                             "bound_psis": 0.002, "bound_exact": 0.001, "tolerance": 0.153, "disagree": False,
                             "refit_grade": "converged"}],
            "escalated_cells": 40 + k, "brute_force_cells": k, "unresolved_cells": 0, "unresolved": [],
            "notes": [f"1 leaf/leaves with k-hat above 0.62 refitted exactly: {LEAVES[k + 2]}"], "fits": fits}
        out.append(CVResult(
            structure=name, method="auto", leaves=tuple(LEAVES), elpd_i=elpd[name], n_draws=N_DRAWS, pareto_k=khat,
            n_refits=2, grade=grade, warnings=tuple(details[name]["notes"]),
            rmse={"all": 1.5 + k / 10, "aci": 1.7 + k / 10, "aq": 1.2 + k / 10},
            r2={"all": 0.95 - k / 100, "aci": 0.94 - k / 100, "aq": 0.96 - k / 100},
            method_i=tuple(method_i), mcse_i=rng.uniform(0.01, 0.08, len(LEAVES)),
            quad_bound_i=rng.uniform(1e-4, 3e-3, len(LEAVES)), unit="leaf"))
    return out, details


def labelled_idata(seed: int = 3, chains: int = 2, draws: int = 200):
    """A hand-built ArviZ data tree in the labelled layout of a fit of traits-month-fixed, with known draws.

    ``b0`` (parameter; link scale, jmax25 and rd25 as log ratios), ``beta`` (coefficient; per-coefficient
    parameter, kind, term, grouping and scale as coordinates ``coefficient_*``), ``tau_leaf``
    (leaf_term), ``sigma`` (sigma_group) and ``leaf_value`` (leaf, parameter) on the natural scale.
    """
    from arviz_base import from_dict

    rng = np.random.default_rng(seed)
    params = ["vcmax25", "jmax25", "alpha", "theta", "rd25"]
    b0_mean = np.array([np.log(60), np.log(1.7), np.log(0.3 / 0.7), np.log(0.7 / 0.3), np.log(0.015)])
    coef = ["n_area", "campaign=2026-06"]
    shape = (chains, draws)
    b0 = b0_mean + rng.normal(0, 0.05, shape + (5,))
    beta = np.array([0.2, -0.1]) + rng.normal(0, 0.03, shape + (2,))
    leaf_value = np.exp(rng.normal(0, 0.1, shape + (len(LEAVES), 5))) * np.array([60, 100, 0.3, 0.7, 0.9])
    idata = from_dict(
        {"posterior": {"b0": b0, "beta": beta, "tau_leaf": np.abs(rng.normal(0.2, 0.02, shape + (2,))),
                       "sigma": np.abs(rng.normal(0.8, 0.05, shape + (1,))), "leaf_value": leaf_value}},
        dims={"b0": ["parameter"], "beta": ["coefficient"], "tau_leaf": ["leaf_term"], "sigma": ["sigma_group"],
              "leaf_value": ["leaf", "parameter"]},
        coords={"parameter": params, "coefficient": coef, "leaf_term": ["vcmax25", "alpha"],
                "sigma_group": ["all points"], "leaf": LEAVES})
    idata["posterior"] = idata["posterior"].to_dataset().assign_coords(
        parameter_link=("parameter", ["log", "log", "logit", "logit", "log"]),
        parameter_ratio_to_vcmax25=("parameter", [0, 1, 0, 0, 1]),
        coefficient_parameter=("coefficient", ["vcmax25", "vcmax25"]),
        coefficient_kind=("coefficient", ["trait", "level"]),
        coefficient_term=("coefficient", ["n_area", "campaign"]),
        coefficient_grouping=("coefficient", ["", ""]),
        coefficient_scale=("coefficient", [0.5, np.nan]))
    return idata


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def comparison_of(path: Path) -> Comparison:
    """The fake run's comparison as `load_comparison` would give it with the structures of `structures`
    (COMPARISON names none, so that the report's prior sensitivity stops at reading it)."""
    data = DataSpec(file=path.parent / "observations.csv",
                    columns={"a_net": "assim", "ci": "ci_ppm", "ppfd": "par_in", "leaf": "plant_leaf", "curve": "run"},
                    groups=("taxon", "campaign"), traits=("n_area",), centre={"n_area": 2.0}, scale={"n_area": 0.5})
    return Comparison(path=path, data=data, sampler=SamplerSpec(), cv=CVSpec(), structures=tuple(structures()))


def build_run(folder: Path, *, finished: bool = True, with_fit: bool = True, study: bool = True) -> Path:
    """Write the comparison file, the data and a run folder ``folder/runs/demo``; return the run folder."""
    folder.mkdir(parents=True, exist_ok=True)
    comparison = folder / "demo.toml"
    comparison.write_text(COMPARISON)
    data = pd.DataFrame([{"plant_leaf": leaf, "run": f"{leaf}-aci", "taxon": t, "campaign": c, "assim": 10.0 + i,
                          "ci_ppm": 50.0 * (i + 1), "par_in": 1500.0, "n_area": 1.5 + k / 10}
                         for k, (leaf, t, c) in enumerate(zip(LEAVES, TAXON, CAMPAIGN)) for i in range(6)])
    data.to_csv(folder / "observations.csv", index=False)
    run = folder / "runs" / "demo"
    res, details = results()
    write_ranking(run, res, details, len(LEAVES))
    for r in res:
        (run / "results").mkdir(parents=True, exist_ok=True)
        (run / "results" / f"{r.structure}.json").write_text(_result_to_json(r, details[r.structure], "key"))
    records = {st.name: {"origin": "", "model": asdict(st.options), "leaf_correlation": False,
                         "priors": prior_lines(st), "params": {p: asdict(ps) for p, ps in st.params.items()}}
               for st in structures()}
    (run / "structures.txt").write_text(structures_text(SimpleNamespace(structures=structures()), records))
    manifest = {
        "comparison": str(comparison), "comparison_sha256": _sha256(comparison),
        "data": str(folder / "observations.csv"), "data_sha256": _sha256(folder / "observations.csv"),
        "settings": {"method": "auto", "by": "leaf", "folds": 10, "spot_checks": 1,
                     "sampler": {"chains": 2, "warmup": 100, "draws": 100, "seed": 7, "adapt_delta": 0.8,
                                 "max_treedepth": 10}},
        "seeds": {"run": 7, "full_fit": 7}, "grades": {"converged": "every diagnostic within thresholds"},
        "versions": {"python": "3.11", "leafcv": "0.1.0"}, "started": "2026-12-01T10:00:00+0000",
        "command": f"leafcv compare {comparison}", "structures": records,
    }
    if finished:
        manifest["results"] = {st.name: f"{st.name}.json" for st in structures()}
        manifest["finished"] = "2026-12-01T10:05:00+0000"
    (run / "manifest.json").write_text(json.dumps(manifest, indent=1))
    if study:
        spec = comparison_of(comparison)
        write_study(run, spec, load_dataset(spec.data))
    write_predictions(run, [r.structure for r in res])
    if with_fit:
        (run / "fits").mkdir(exist_ok=True)
        labelled_idata().to_netcdf(str(run / "fits" / "traits-month-fixed.nc"), engine="h5netcdf")
    return run


def write_predictions(run: Path, structures: list[str]) -> None:
    """Invented held-out predictions in the formats of leafcv.cv.predictions: per structure, 6 A–Ci and 6 A–Q
    points per leaf (predicted = observed + noise growing with the structure's place in the list) and each
    leaf's curves on 40-value grids."""
    from leafcv.cv.predictions import CURVE_COLUMNS, GRID_POINTS, POINT_COLUMNS

    rng = np.random.default_rng(5)
    ci, q = np.linspace(60, 1200, 6), np.linspace(0, 1800, 6)
    base = []
    for leaf in LEAVES:
        for kind, x in (("aci", ci), ("aq", q)):
            for v in x:
                obs = 25 * (1 - np.exp(-v / (400 if kind == "aci" else 300))) - 1 + rng.normal(0, 0.5)
                base.append({"leaf": leaf, "curve": f"{leaf}-{kind}", "curve_type": kind,
                             "ci": v if kind == "aci" else 400.0, "ppfd": v if kind == "aq" else 1500.0,
                             "t_leaf": 25.0, "observed": obs})
    base = pd.DataFrame(base)
    (run / "predictions").mkdir(parents=True, exist_ok=True)
    for k, s in enumerate(structures):
        pts = base.assign(predicted=base["observed"] + rng.normal(0, 0.5 + k, len(base)))[POINT_COLUMNS]
        pts.to_csv(run / "predictions" / f"{s}-points.csv", index=False)
        rows = []
        for leaf in LEAVES:
            for kind, varied, lo, hi in (("aci", "ci", 60, 1200), ("aq", "ppfd", 0, 1800)):
                for v in np.linspace(lo, hi, GRID_POINTS):
                    m = 25 * (1 - np.exp(-v / (400 if kind == "aci" else 300))) - 1 + 0.3 * k
                    rows.append({"leaf": leaf, "curve_type": kind, "varied": varied,
                                 "ci": v if kind == "aci" else 400.0, "ppfd": v if kind == "aq" else 1500.0,
                                 "t_leaf": 25.0, "o2": 210.0, "mean": m, "q05": m - 2 - k, "q95": m + 2 + k})
        pd.DataFrame(rows)[CURVE_COLUMNS].to_csv(run / "predictions" / f"{s}-curves.csv", index=False)
