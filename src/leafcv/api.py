"""leafcv's Python API. The command line only calls these functions.

    import leafcv
    study = leafcv.load("compare.toml")            # comparison file + its data, every problem checked
    study = leafcv.from_frame(df, roles={...}, structures=[...], folder="study")   # or a DataFrame
    fit = study.fit("traits-month-fixed")          # one structure on all leaves
    fit.summary; fit.diagnostics; fit.to_datatree(); fit.save("fit.nc")
    run = study.run(out="runs/x", method="auto")   # the main job; resumable
    run.ranking; run.pointwise; run.fit("traits-month-fixed")   # read from the run folder on demand
    run.predict("traits-month-fixed", "new_leaves.csv")         # new leaves' parameters, no sampler
    run.rewrite_ranking(); run.write_report()                    # the ranking and report.html again
    run = leafcv.open_run("runs/x")                # a finished (or unfinished) run folder

Progress and notes go to the ``logging`` logger ``"leafcv"`` (the command line prints them); library
code prints nothing. Everything works inside a running event loop (Jupyter): the PyStan engine then
runs its HTTP client in a worker thread.

Tests: tests/test_api.py, tests/test_cli.py, tests/test_predict.py, tests/sampling/test_api.py.
"""
from __future__ import annotations

import json
import logging
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pandas as pd

from .data.dataset import Dataset
from .errors import SpecError, UserInputError
from .runfolder import PREDICTION_PARTS, RunPaths, read_pointwise, read_ranking
from .spec import Comparison

if TYPE_CHECKING:
    import xarray as xr

    from .diagnostics import Diagnostics
    from .fitting import StructureFit

logger = logging.getLogger("leafcv")

__all__ = ["Study", "Fit", "Run", "load", "from_frame", "open_run", "demo", "simulation_text"]


def load(path: str | Path) -> "Study":
    """Read a comparison file and its data table; raise one error listing every problem found.

    Raises
    ------
    leafcv.errors.UserInputError
        (``DataError`` or ``SpecError``) naming the file, column, rows or structure and what to do.
    """
    from .comparison import check_against_data, load_comparison
    from .data import load_dataset

    path = Path(path)
    comparison = load_comparison(path)
    try:
        dataset = load_dataset(comparison.data)
    except UserInputError as exc:
        raise type(exc)(exc.source, [_with_users(m, comparison) for m in exc.problems]) from None
    problems = check_against_data(comparison, dataset)
    if problems:
        raise SpecError(str(path), problems)
    return Study(comparison, dataset)


def from_frame(
    table: pd.DataFrame,
    *,
    roles: dict[str, str],
    structures: list[dict[str, Any]],
    folder: str | Path,
    groups: list[str] | tuple[str, ...] = (),
    traits: list[str] | tuple[str, ...] = (),
    units: dict[str, Any] | None = None,
    centre: dict[str, float] | None = None,
    scale: dict[str, float] | None = None,
    sampler: dict[str, Any] | None = None,
    cv: dict[str, Any] | None = None,
    model: dict[str, Any] | None = None,
    question: str | None = None,
) -> "Study":
    """A study from a DataFrame, structures and column roles, written down as files first.

    ``table`` is written to ``folder/observations.csv`` and the rest to ``folder/comparison.toml`` (the
    comparison-file format, so the inputs of a run are files with hashes a reviewer can check and a
    re-run can reuse); both are then read by `load` with every check a file gets.

    Parameters
    ----------
    roles
        Data role -> column of ``table``: ``net_assimilation``, ``intercellular_co2``, ``photon_flux``,
        ``leaf`` (required), ``leaf_temperature``, ``oxygen``, ``curve`` (optional).
    structures
        One dict per structure, as a ``[[structure]]`` entry of a comparison file, e.g.
        ``{"name": "leaf-vcmax", "vcmax25": {"random": ["leaf"]}, "jmax25": {"ratio_to": "vcmax25"}}``.
    groups, traits, units, centre, scale
        ``[data.leaf]`` groups and traits, ``[data.units]``, ``[data.leaf.centre]`` and ``[data.leaf.scale]``.
    sampler, cv, model
        ``[sampler]``, ``[cv]`` and ``[model]`` tables (defaults when None).
    question
        The question the comparison answers (shown in the report).
    """
    from .comparison.writing import comparison_text

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    if not isinstance(table, pd.DataFrame):
        raise UserInputError("from_frame", [f"table: expected a pandas DataFrame, got {type(table).__name__}"])
    table.to_csv(folder / "observations.csv", index=False)
    leaf: dict[str, Any] = {"groups": list(groups), "traits": list(traits)}
    if centre:
        leaf["centre"] = dict(centre)
    if scale:
        leaf["scale"] = dict(scale)
    data: dict[str, Any] = {"file": "observations.csv", "columns": dict(roles)}
    if units:
        data["units"] = dict(units)
    data["leaf"] = leaf
    raw: dict[str, Any] = {"format": 2}
    if question:
        raw["question"] = question
    raw["data"] = data
    for key, value in (("sampler", sampler), ("cv", cv), ("model", model)):
        if value:
            raw[key] = dict(value)
    raw["structure"] = [dict(s) for s in structures]
    try:
        text = comparison_text(raw, "written by leafcv.from_frame")
    except (TypeError, ValueError) as exc:
        raise UserInputError(str(folder / "comparison.toml"), [str(exc)]) from None
    (folder / "comparison.toml").write_text(text, encoding="utf-8")
    return load(folder / "comparison.toml")


def _with_users(message: str, comparison: Comparison) -> str:
    """A leaf-level column that varies within a leaf: say which structures use it as a leaf-level term."""
    if getattr(message, "code", None) != "varies-within-leaf":
        return message
    uses = []
    for name in (*comparison.data.traits, *comparison.data.groups):
        if name != message.location:
            continue
        for st in comparison.structures:
            for p, ps in st.params.items():
                if name in ps.columns_used():
                    uses.append(f"structure {st.name!r} uses {name!r} on {p}")
    return message + (" (" + "; ".join(uses) + ")" if uses else "")


@dataclass
class Study:
    """A comparison (structures, sampler and cross-validation settings) with its data."""

    comparison: Comparison
    dataset: Dataset

    def __iter__(self):
        """``comparison, dataset = leafcv.load(path)`` unpacks the two."""
        return iter((self.comparison, self.dataset))

    def _warn(self) -> None:
        for warning in self.dataset.warnings:
            logger.warning("%s: warning: %s", self.dataset.source, warning)

    @property
    def structures(self) -> list[str]:
        """Structure names in file order."""
        return [s.name for s in self.comparison.structures]

    def describe(self) -> str:
        """The comparison in words: data roles, units and every structure's terms, options and priors."""
        from .comparison import describe

        return describe(self.comparison)

    def data_summary(self) -> list[str]:
        """The data in a few lines (what ``leafcv check`` prints before `describe`): the file, leaves, curves
        by type and points, each group's levels, each trait's range and mean, then every note and warning
        of the reading."""
        dataset = self.dataset
        obs = dataset.obs
        curve_types = obs.groupby("curve")["curve_type"].first().value_counts()
        lines = [f"data: {dataset.source}",
                 f"  {dataset.n_leaves} leaves, {obs.groupby(['leaf', 'curve']).ngroups} curves "
                 f"({', '.join(f'{k}: {v}' for k, v in curve_types.items())}), {len(obs)} points"]
        for g in dataset.groups:
            levels = sorted(dataset.leaves[g].astype(str).unique())
            lines.append(f"  group {g}: {len(levels)} levels ({', '.join(levels[:8])}{', ...' if len(levels) > 8 else ''})")
        for t in dataset.traits:
            x = dataset.leaves[t]
            lines.append(f"  trait {t}: {x.min():.4g} to {x.max():.4g}, mean {x.mean():.4g}")
        lines += [f"  note: {note}" for note in dataset.notes]
        lines += [f"  warning: {warning}" for warning in dataset.warnings]
        return lines

    def fit(self, structure: str, *, engine=None, progress=None) -> "Fit":
        """Fit one structure on all leaves with the comparison's sampler settings. ``engine``: "pystan"
        or "cmdstan" (default: the comparison file's [engine] name, else PyStan), or an engine object."""
        from .engines.choice import check_engine
        from .fitting import fit_structure

        st = self.comparison.structure(structure)
        engine = engine if engine is not None else self.comparison.engine
        check_engine(engine)
        self._warn()
        logger.info("fitting %s on %d leaves", st.name, self.dataset.n_leaves)
        f = fit_structure(st, self.dataset, self.comparison.data, self.comparison.sampler, engine=engine,
                          progress=progress)
        return Fit(f, self.dataset)

    def run(self, out: str | Path | None = None, *, method: str | None = None, engine=None,
            workers: int | None = None, scheduler: str | None = None, progress: str | None = None) -> "Run":
        """Cross-validate every structure, rank them and write the run folder ``out`` (default:
        ``runs/<file stem>/`` beside the comparison file). Every finished task (a fit, a block of scores,
        a refit) is kept in the folder's task store, so an interrupted run continues where it stopped.

        ``workers``: tasks at once (default: one per core; 1 runs them in this process);
        ``scheduler``: a Dask scheduler address, or "local" for a LocalCluster; ``progress``: "bar",
        "plain" or "quiet" (default: a bar on a terminal, plain lines otherwise); ``engine``: "pystan" or
        "cmdstan" (default: the comparison file's [engine] name, else PyStan)."""
        from .compare import run_comparison

        engine = engine if engine is not None else self.comparison.engine
        self._warn()
        out = Path(out) if out is not None else self.comparison.path.parent / "runs" / self.comparison.path.stem
        run_comparison(self.comparison, self.dataset, out, method=method, engine=engine, log=logger.info,
                       workers=workers, scheduler=scheduler, progress=progress)
        return open_run(out)


@dataclass
class Fit:
    """One structure fitted on all leaves."""

    result: "StructureFit"
    dataset: Dataset

    @property
    def structure(self) -> str:
        return self.result.design.structure.name

    @property
    def diagnostics(self) -> "Diagnostics":
        """R-hat, ESS, divergences, tree-depth hits, E-BFMI and the grade (converged / marginal / failed)."""
        return self.result.diagnostics

    @property
    def summary(self) -> pd.DataFrame:
        """Population parameters on the scale a reader uses, with 90 % intervals, R-hat and ESS."""
        from .fitting import summary_table

        return summary_table(self.result)

    def text(self) -> str:
        """Parameters, diagnostics and priors in words (what ``leafcv fit`` prints)."""
        from .fitting import format_fit

        return format_fit(self.result, f"structure {self.structure!r} on {self.dataset.n_leaves} leaves")

    def to_datatree(self, log_marginals: bool = False) -> "xr.DataTree":
        """The fit as an ArviZ data tree (xarray DataTree: ArviZ 1.x's InferenceData; groups posterior,
        sample_stats, observed_data); with ``log_marginals`` also the ``log_likelihood`` group of each
        leaf's integrated log marginal per draw (quadrature; seconds to a minute)."""
        from .cv.arviz_bridge import to_datatree

        log_m = None
        if log_marginals:
            import numpy as np

            from .cv.methods import score_leaves
            from .inits import fit_leaves

            log_m = score_leaves(self.result, self.dataset, np.arange(self.dataset.n_leaves),
                                 fit_leaves(self.dataset), in_fit=True).log_m
        return to_datatree(self.result, self.dataset, log_m)

    #: The earlier name of `to_datatree`.
    to_inference_data = to_datatree

    def save(self, path: str | Path) -> Path:
        """Write the fit as an ArviZ data tree (NetCDF, the layout of a run's ``fits/<structure>.nc``, without
        the log marginals) atomically; returns the path."""
        from .compare import write_fit

        path = Path(path)
        write_fit(path, self.result, self.dataset, None)
        return path


@dataclass
class Run:
    """A run folder written by `Study.run` (or ``leafcv compare``); tables are read on demand."""

    folder: Path
    manifest: dict = field(repr=False)

    @property
    def ranking(self) -> pd.DataFrame:
        """ranking.csv: one row per structure (columns as in DESIGN.md, plus ``mcse`` and ``quad_bound``,
        the summed per-unit quadrature bound)."""
        return read_ranking(self._existing(self.paths.ranking))

    @property
    def pointwise(self) -> pd.DataFrame:
        """pointwise.csv: per held-out leaf (or level) and structure, elpd, method, MCSE, bound, k-hat."""
        return read_pointwise(self._existing(self.paths.pointwise))

    @property
    def finished(self) -> bool:
        return "finished" in self.manifest

    def result(self, structure: str) -> dict[str, Any]:
        """The stored result of one structure (scores, diagnostics of every fit, seeds, notes)."""
        return json.loads(self._existing(self.paths.result(structure)).read_text())

    def fit(self, structure: str) -> "xr.DataTree":
        """The structure's full-data fit as an ArviZ data tree (groups posterior, sample_stats,
        observed_data, log_likelihood)."""
        from .cv.arviz_bridge import open_fit

        return open_fit(self._existing(self.paths.fit(structure)))

    def predictions(self, structure: str) -> tuple[pd.DataFrame, pd.DataFrame]:
        """Held-out predictions of one structure: every point's observed and predicted A, and each
        leaf's predictive curves (mean and 5-95 % interval of a new observation on a Ci or PPFD grid)."""
        return tuple(pd.read_csv(self._existing(self.paths.prediction(structure, part))) for part in PREDICTION_PARTS)

    def predict(self, structure: str, leaves: "str | Path | pd.DataFrame",
                conditions: "str | Path | pd.DataFrame | None" = None, *, out: str | Path | None = None):
        """Vcmax25, Jmax25, alpha, theta, Rd25 of new leaves (a table or CSV of their traits and groups)
        under ``structure``: the population-mean and the new-leaf 90 % intervals, and optionally the
        expected A at ``conditions`` (intercellular_co2, photon_flux, leaf_temperature[, oxygen]).
        Returns a `leafcv.predict.Prediction`; no sampler runs. ``out``: also write its tables into this
        folder, ``parameters.csv`` (and ``assimilation.csv`` with ``conditions``, ``notes.txt`` with notes such
        as leaves outside a smooth's observed range)."""
        from .predict import predict

        prediction = predict(self.folder, structure, leaves, conditions)
        if out is not None:
            out = Path(out)
            out.mkdir(parents=True, exist_ok=True)
            prediction.parameters.to_csv(out / "parameters.csv", index=False)
            if prediction.assimilation is not None:
                prediction.assimilation.to_csv(out / "assimilation.csv", index=False)
            if prediction.notes:
                (out / "notes.txt").write_text("".join(f"{n}\n" for n in prediction.notes), encoding="utf-8")
        return prediction

    def rewrite_ranking(self) -> str | None:
        """Rank a finished run again from the result files its manifest names, rewriting ranking.csv,
        ranking.txt and pointwise.csv; returns the ranking text, or None when the run has not finished
        (its ranking is then left as it is)."""
        if not self.finished:
            return None
        from .compare import rewrite_report

        return rewrite_report(self.folder)

    def write_report(self, structure: str | None = None, group: str | None = None) -> Path:
        """Write ``report.html`` with its ``figures/`` and ``tables/`` from the run folder alone (no sampler);
        ``structure``: whose estimates are shown (default: the best ranked), ``group``: the group column the
        per-leaf differences are coloured by (default: the first). Returns the page's path."""
        from .report import write_report

        return write_report(self.folder, structure=structure, group=group)

    def simulate(self, structure: str | None = None, *, replicates: int = 20, leaves_per_level: int | None = None,
                 level_of: str | None = None, out: str | Path | None = None, chains: int | None = None,
                 warmup: int | None = None, draws: int | None = None, workers: int | None = None,
                 scheduler: str | None = None, progress: str | None = None, engine=None) -> dict[str, Any]:
        """How reliable is the choice on a study like this one: ``replicates`` studies drawn from
        ``structure``'s posterior (default: the best ranked) on this run's design (or with
        ``leaves_per_level`` leaves in every level of grouping ``level_of``, default the first grouping),
        each compared over the same candidates through the task store (resumable; ``chains``, ``warmup``
        and ``draws`` lower the sampler settings of the replicates). Writes ``out`` (default
        ``RUNDIR/simulation``; the report shows that one) and returns its tables: ``candidates`` (how
        often each candidate ranked first or was not told apart from the first, and Δelpd of the
        generating structure minus each), ``coverage`` (of the generating structure's 90 % intervals),
        ``replicates`` (one row per replicate and candidate) and ``folder``. ``engine``: "pystan" or
        "cmdstan" (default: the run's own)."""
        from .simulate import simulate_run
        from .simulation_summary import summarise

        folder = simulate_run(self.folder, structure, replicates=replicates, leaves_per_level=leaves_per_level,
                              level_of=level_of, out=out, chains=chains, warmup=warmup, draws=draws,
                              workers=workers, scheduler=scheduler, progress=progress, engine=engine)
        tables = summarise(folder)
        tables["folder"] = folder
        return tables

    def prior_sensitivity(self, structure: str | None = None) -> pd.DataFrame:
        """Power-scaling prior and likelihood sensitivity (Kallioinen et al. 2023) of each population
        quantity of ``structure`` (default: the best ranked), from its saved full-data fit: columns
        structure, quantity, prior, likelihood (derivatives of the CJS distance w.r.t. log2 alpha; 0.05
        flags), diagnosis (in words), prior_khat, likelihood_khat. No sampler runs."""
        from .sensitivity import run_sensitivity

        if structure is None:
            ranked = self.ranking.dropna(subset=["rank"]).sort_values("rank")
            if ranked.empty:
                raise UserInputError(str(self.folder), ["no structure is ranked yet; name one: "
                                                        f"{', '.join(self.manifest.get('structures', {}))}"])
            structure = str(ranked.iloc[0]["structure"])
        return run_sensitivity(self.folder, structure)

    @property
    def paths(self) -> RunPaths:
        """Where each file of the run folder lives (`leafcv.runfolder`)."""
        return RunPaths(self.folder)

    def _existing(self, path: Path) -> Path:
        if not path.exists():
            known = ", ".join(self.manifest.get("structures", {})) or "none"
            raise UserInputError(str(self.folder), [f"no {path.relative_to(self.folder).as_posix()} in this run folder "
                                                    f"(structures of the run: {known}); run `leafcv compare` to finish it"])
        return path


def demo(folder: str | Path, *, quick: bool = False) -> Path:
    """Write the invented demo scenario (observations.csv, truth.csv and a comparison file) into ``folder``;
    ``quick``: the small version (16 leaves, three structures). Returns the comparison file."""
    from .demo import write_demo

    return write_demo(Path(folder), quick=quick)


def simulation_text(tables: dict[str, Any]) -> str:
    """What ``leafcv simulate`` prints of a simulation's tables (`Run.simulate`): the generating structure,
    each candidate's per cent of replicates ranked first and not told apart from the first, and the median
    Δelpd of the generating structure minus it; the range of the generating structure's interval coverage;
    where the tables are."""
    cands = tables["candidates"]
    gen = cands.loc[cands["generating"], "structure"]
    shown = cands.assign(share_first=(100 * cands["share_first"]).round(0),
                         share_not_told_apart_from_first=(100 * cands["share_not_told_apart_from_first"]).round(0))
    table = (shown.rename(columns={"share_first": "% first",
                                   "share_not_told_apart_from_first": "% not told apart from first",
                                   "delta_median": "median Δelpd (generating − it)"})
             [["structure", "% first", "% not told apart from first", "median Δelpd (generating − it)"]])
    lines = [f"\n{tables['n_replicates']} replicate studies drawn from {gen.iloc[0] if len(gen) else '?'}:",
             table.to_string(index=False, float_format=lambda v: f"{v:.1f}")]
    cov = tables["coverage"]
    if len(cov):
        lines.append(f"coverage of the generating structure's 90 % intervals: {cov['coverage'].min():.0%} to "
                     f"{cov['coverage'].max():.0%} over {len(cov)} quantities (coverage.csv)")
    lines.append(f"tables in {tables['folder']}")
    return "\n".join(lines)


def open_run(folder: str | Path) -> Run:
    """Open a run folder (it must hold the manifest.json that ``compare`` writes first)."""
    from .manifest import read_manifest

    folder = Path(folder)
    return Run(folder, read_manifest(folder))
