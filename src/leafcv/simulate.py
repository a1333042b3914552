"""Selection reliability by simulated replicate studies (`leafcv simulate`).

K replicate studies are drawn from one structure's full-data posterior (the run's ``fits/<name>.nc``):
for replicate k, one posterior draw s of every population parameter (intercepts, slopes, level and leaf
SDs, residual SDs); every random grouping's levels get new effects from N(0, tau_s), every leaf new
effects from its fitted distribution, every point a new residual. The design is the run's own (the
same leaves' traits and levels, the same Ci, PPFD, temperature and O2 per point) or resized to
``leaves_per_level`` leaves in every level of one grouping (a level's leaves are copies of its own
leaves, drawn in turn, each with new effects). Each replicate is written as a study of its own (an
observation file in leafcv's units and a comparison file with the run's candidates and priors, trait
centres held at the run's values so that population parameters mean the same) and compared through
the task store like any run, so a stopped simulation continues where it stopped.

`leafcv.simulation_summary` turns the replicates' rankings and fits into the answers: how often each
candidate ranks first and is not told apart from the first (`leafcv.ranking.told_apart`), the
distribution of Δelpd between the generating structure and each rival, and the coverage of the
generating structure's 90 % intervals.
"""
from __future__ import annotations

import json
import logging
import tomllib
from dataclasses import asdict, dataclass, replace
from pathlib import Path

import numpy as np
import pandas as pd

from .data.dataset import LEAF_TERM, Dataset
from .design import Design, build_design, leaf_cov_chol, smooth_values
from .errors import UserInputError
from .runfolder import RunPaths, is_finished, read_ranking
from .simulation_summary import FOLDER, posterior_draws
from .spec import SamplerSpec

#: Seed stream of the replicates (apart from every other stream of a run's seed).
SIMULATION_STREAM = 7_301

logger = logging.getLogger("leafcv")


@dataclass(frozen=True)
class SimulationSettings:
    """What a simulation was asked to do (``settings.json`` of its folder)."""

    structure: str
    replicates: int
    leaves_per_level: int | None
    level_of: str | None
    chains: int
    warmup: int
    draws: int
    seed: int
    run: str

    def key(self) -> dict:
        """The settings that make two simulations the same (everything but the replicate count)."""
        d = asdict(self)
        d.pop("replicates")
        return d


def _with_empty_blocks(draws: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """The program's empty blocks (a structure without group or leaf terms) as (S, 0) arrays."""
    S = len(draws["b0"])
    out = dict(draws)
    for name in ("beta", "tau", "u_c", "u_z", "tau_leaf", "eta_c", "eta_z", "nu", "tau_s", "z_s"):
        out.setdefault(name, np.zeros((S, 0)))
    return out


def resized_leaves(dataset: Dataset, level_of: str | None, leaves_per_level: int | None) -> np.ndarray:
    """Source leaf (0-based) of every simulated leaf: the run's leaves, or ``leaves_per_level`` per level
    of grouping ``level_of``, each level's own leaves taken in turn."""
    if leaves_per_level is None:
        return np.arange(dataset.n_leaves)
    levels = dataset.leaves[level_of].astype(str).to_numpy()
    out = []
    for lev in dict.fromkeys(levels):
        own = np.flatnonzero(levels == lev)
        out.extend(own[np.arange(leaves_per_level) % len(own)])
    return np.asarray(out, int)


def replicate_frame(design: Design, dataset: Dataset, draws: dict[str, np.ndarray], s: int,
                    source: np.ndarray, rng: np.random.Generator) -> pd.DataFrame:
    """One replicate's observations (leafcv's units, one row per point) from posterior draw ``s``."""
    from .cv.leafmodel import LeafModel

    one = _with_empty_blocks({k: v[s:s + 1] for k, v in draws.items()})
    # population means of every leaf at draw s: intercepts, fixed terms and new level effects (the
    # program's level and leaf blocks are not read: their centring was the run's pilot's choice)
    L, P = design.n_leaves, len(design.parameters)
    mu = np.repeat(one["b0"][0][None, :], L, axis=0)
    if len(design.coefficients):
        mu = mu + (design.X * one["beta"][0][None, :]) @ np.eye(P)[design.coef_param]
    for r, gt in enumerate(design.group_terms):
        pi = design.param_index(gt.param)
        n_levels = int(np.max(gt.level_of_leaf)) + 1
        u_new = rng.normal(0.0, float(one["tau"][0, r]), n_levels)      # new effects, shared by a level's leaves
        mu[:, pi] += u_new[gt.level_of_leaf] * gt.x
    mu = mu + smooth_values(design, one)[0]                                # the smooths' bends at draw s
    eta = mu[source].copy()                                                # (L', P)
    if design.leaf_terms:
        chol = leaf_cov_chol(design, one)[0]
        effect = rng.standard_normal((len(source), len(design.leaf_terms))) @ chol.T
        for j, pi in enumerate(design.leaf_term_params):
            eta[:, pi] += effect[:, j]
    link = (np.zeros((1, dataset.n_leaves, len(design.parameters))),) * 2
    frames = []
    counts: dict[int, int] = {}
    for j, g in enumerate(source):
        model = LeafModel(design, dataset, one, link, int(g))
        a = model.assimilation(eta[j][None, :])[0]
        sigma = model.sigma[0]
        if model.nu is not None:
            noise = sigma * rng.standard_t(float(model.nu[0]), len(a))
        else:
            noise = rng.normal(0.0, 1.0, len(a)) * sigma
        pts = model.points
        k = counts[int(g)] = counts.get(int(g), 0) + 1
        leaf_id = str(dataset.leaves[LEAF_TERM].iloc[g]) + ("" if k == 1 else f"~{k}")
        frame = pd.DataFrame({
            "leaf": leaf_id, "curve": [f"{leaf_id}/{c}" for c in pts["curve"].astype(str)],
            "net_assimilation": np.round(a + noise, 4), "intercellular_co2": pts["ci"].to_numpy(float),
            "photon_flux": pts["ppfd"].to_numpy(float), "leaf_temperature": pts["t_leaf"].to_numpy(float),
            "oxygen": pts["o2"].to_numpy(float)})
        for col in (*dataset.groups, *dataset.traits):
            frame[col] = dataset.leaves[col].iloc[g]
        frames.append(frame)
    return pd.concat(frames, ignore_index=True)


def truth_of(draws: dict[str, np.ndarray], labels: dict[str, list[str]], s: int) -> dict[str, float]:
    """The generating values of the population quantities at draw ``s``, by label."""
    out = {}
    for name, labs in labels.items():
        values = np.atleast_1d(draws[name][s]).ravel()
        out.update({lab: float(v) for lab, v in zip(labs, values)})
    return out


def replicate_comparison(raw: dict, design: Design, dataset: Dataset, settings: SimulationSettings) -> dict:
    """The run's comparison file (as parsed TOML) pointed at a replicate's observations: roles in
    leafcv's own names and units, trait centres and scales held at the run's, sampler settings lowered."""
    leaf: dict = {"groups": list(dataset.groups), "traits": list(dataset.traits)}
    if dataset.traits:
        leaf["centre"] = {t: float(design.trait_transform[t][0]) for t in dataset.traits}
        leaf["scale"] = {t: float(design.trait_transform[t][1]) for t in dataset.traits}
    data = {"file": "observations.csv",
            "columns": {r: r for r in ("net_assimilation", "intercellular_co2", "photon_flux",
                                       "leaf_temperature", "oxygen")} | {"leaf": "leaf", "curve": "curve"},
            "units": {"intercellular_co2": "umol/mol"}, "leaf": leaf}
    out = {k: v for k, v in raw.items() if k != "data"}
    out["data"] = data
    sampler = dict(raw.get("sampler", {}))
    sampler.update({"chains": settings.chains, "warmup": settings.warmup, "draws": settings.draws})
    out["sampler"] = sampler
    return out


def _ordered(raw: dict) -> dict:
    """Top-level keys in the order a comparison file lists them (format first, then tables)."""
    head = {k: raw[k] for k in ("format", "question") if k in raw}
    return head | {k: v for k, v in raw.items() if k not in head}


def simulate_run(run_dir: str | Path, structure: str | None = None, *, replicates: int = 20,
                 leaves_per_level: int | None = None, level_of: str | None = None, out: str | Path | None = None,
                 chains: int | None = None, warmup: int | None = None, draws: int | None = None,
                 workers: int | None = None, scheduler: str | None = None, progress: str | None = None,
                 engine=None) -> Path:
    """Draw and compare ``replicates`` replicate studies from ``structure`` of the run in ``run_dir``
    (default: its best ranked structure); returns the simulation's folder (default
    ``RUNDIR/simulation``). Replicates already compared are kept; asking for more adds to them."""
    from .comparison import check_against_data, load_comparison
    from .comparison.writing import comparison_text
    from .compare import run_comparison
    from .data import load_dataset
    from .manifest import run_inputs
    from .simulation_summary import summarise

    run_dir = Path(run_dir)
    manifest, comparison, dataset, _ = run_inputs(run_dir, None, "replicate studies drawn from the run's fit")
    ranking_path = RunPaths(run_dir).ranking
    if structure is None:
        if not ranking_path.exists():
            raise UserInputError(str(run_dir), ["the run has no ranking.csv yet: finish it with `leafcv compare`, "
                                                "or name the generating structure with --structure"])
        ranked = read_ranking(ranking_path)
        ranked = ranked[ranked["rank"].notna()]
        if ranked.empty:
            raise UserInputError(str(run_dir), ["no structure of this run is ranked; name the generating structure "
                                                "with --structure"])
        structure = str(ranked.iloc[0]["structure"])
    names = [s.name for s in comparison.structures if s.name in manifest.get("structures", {s.name: 0})]
    if structure not in names:
        raise UserInputError(str(run_dir), [f"no structure {structure!r} in this run; its structures: {', '.join(names)}"])
    fit_path = RunPaths(run_dir).fit(structure)
    if not fit_path.exists():
        raise UserInputError(str(run_dir), [f"no fit of {structure!r} in {fit_path.parent}: run `leafcv compare` "
                                            "again to finish it"])
    problems = []
    if replicates < 1:
        problems.append(f"--replicates must be at least 1, got {replicates}")
    if leaves_per_level is not None:
        level_of = level_of or (dataset.groups[0] if dataset.groups else None)
        if level_of is None:
            problems.append("--leaves-per-level needs a grouping of leaves, and the data have none ([data.leaf] groups)")
        elif level_of not in dataset.groups:
            problems.append(f"--level-of {level_of!r} is not a grouping of the data; groupings: {', '.join(dataset.groups)}")
        if leaves_per_level < 1:
            problems.append(f"--leaves-per-level must be at least 1, got {leaves_per_level}")
    base = SamplerSpec(**manifest["settings"]["sampler"]) if "settings" in manifest else comparison.sampler
    for flag, value in (("--chains", chains), ("--warmup", warmup), ("--draws", draws)):
        if value is not None and value < 1:
            problems.append(f"{flag} must be at least 1, got {value}")
    if problems:
        raise UserInputError("leafcv simulate", problems)
    if engine is None:                     # the replicates sample with the run's own engine
        from .engines.choice import ENGINE_NAMES

        used = (manifest.get("engine") or {}).get("name")
        engine = used if used in ENGINE_NAMES else None
    settings = SimulationSettings(structure, replicates, leaves_per_level, level_of if leaves_per_level else None,
                                  chains or base.chains, warmup or base.warmup, draws or base.draws,
                                  int(base.seed), str(run_dir.resolve()))
    folder = Path(out) if out is not None else run_dir / FOLDER
    folder.mkdir(parents=True, exist_ok=True)
    settings_path = folder / "settings.json"
    if settings_path.exists():
        before = json.loads(settings_path.read_text())
        if {k: before.get(k) for k in settings.key()} != settings.key():
            raise UserInputError(str(folder), [
                "this folder holds a simulation with other settings (structure, design or sampler); give another "
                "--out, or remove the folder to start again"])
    settings_path.write_text(json.dumps(asdict(settings), indent=2) + "\n")

    design = build_design(comparison.structure(structure), dataset, comparison.data)
    post, labels = posterior_draws(fit_path)
    raw = tomllib.loads(Path(manifest["comparison"]).read_text(encoding="utf-8"))
    source = resized_leaves(dataset, level_of, leaves_per_level)
    S = len(post["b0"])
    for k in range(replicates):
        rep = folder / f"replicate-{k + 1:03d}"
        rep_run = rep / "run"
        if is_finished(rep_run):
            continue
        rng = np.random.default_rng([settings.seed, SIMULATION_STREAM, k])
        s = int(rng.integers(S))
        rep.mkdir(parents=True, exist_ok=True)
        frame = replicate_frame(design, dataset, post, s, source, rng)
        frame.to_csv(rep / "observations.csv", index=False)
        text = comparison_text(_ordered(replicate_comparison(raw, design, dataset, settings)),
                               comment=f"replicate {k + 1} of a simulation from {structure!r} (posterior draw {s}); "
                                       f"compared: {', '.join(names)}")
        (rep / "comparison.toml").write_text(text + "\n", encoding="utf-8")
        (rep / "truth.json").write_text(json.dumps({"draw": s, "values": truth_of(post, labels, s)}, indent=2) + "\n")
        rep_comparison = load_comparison(rep / "comparison.toml")
        rep_comparison = replace(rep_comparison, structures=tuple(rep_comparison.structure(n) for n in names),
                                 sampler=replace(base, chains=settings.chains, warmup=settings.warmup,
                                                 draws=settings.draws))
        rep_data = load_dataset(rep_comparison.data)
        problems = check_against_data(rep_comparison, rep_data)
        if problems:
            raise UserInputError(str(rep / "comparison.toml"), problems)
        logger.info(f"replicate {k + 1} of {replicates} (posterior draw {s}): {len(source)} leaves")
        run_comparison(rep_comparison, rep_data, rep_run, engine=engine, workers=workers, scheduler=scheduler,
                       progress=progress, report=False)
    summarise(folder)
    return folder
