"""leafcv's Python API. The command line only calls these functions.

    import leafcv
    study = leafcv.load("compare.toml")            # comparison file + its data, every problem checked
    fit = study.fit("traits-month-fixed")          # one structure on all leaves
    fit.summary; fit.diagnostics; fit.to_inference_data()
    run = study.run(out="runs/x", method="auto")   # the main job; resumable
    run.ranking; run.pointwise; run.fit("traits-month-fixed")   # read from the run folder on demand
    run = leafcv.open_run("runs/x")                # a finished (or unfinished) run folder

Progress and notes go to the ``logging`` logger ``"leafcv"`` (the command line prints them); library
code prints nothing. Everything works inside a running event loop (Jupyter): the PyStan engine then
runs its HTTP client in a worker thread.
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
from .spec import Comparison

if TYPE_CHECKING:
    import arviz as az

    from .diagnostics import Diagnostics
    from .fitting import StructureFit

logger = logging.getLogger("leafcv")

__all__ = ["Study", "Fit", "Run", "load", "open_run"]


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
                if name in {*ps.fixed, *ps.random, *(x for pair in ps.slopes + ps.split for x in pair)}:
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

    def fit(self, structure: str, *, engine=None, progress=None) -> "Fit":
        """Fit one structure on all leaves with the comparison's sampler settings."""
        from .fitting import fit_structure

        st = self.comparison.structure(structure)
        self._warn()
        logger.info("fitting %s on %d leaves", st.name, self.dataset.n_leaves)
        f = fit_structure(st, self.dataset, self.comparison.data, self.comparison.sampler, engine=engine,
                          progress=progress)
        return Fit(f, self.dataset)

    def run(self, out: str | Path | None = None, *, method: str | None = None, engine=None) -> "Run":
        """Cross-validate every structure, rank them and write the run folder ``out`` (default:
        ``runs/<file stem>/`` beside the comparison file). Finished structures whose inputs match are
        reused, so an interrupted run continues where it stopped."""
        from .compare import run_comparison

        self._warn()
        out = Path(out) if out is not None else self.comparison.path.parent / "runs" / self.comparison.path.stem
        run_comparison(self.comparison, self.dataset, out, method=method, engine=engine, log=logger.info)
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

    def to_inference_data(self, log_marginals: bool = False) -> "az.InferenceData":
        """The fit as ArviZ InferenceData; with ``log_marginals`` also the ``log_likelihood`` group of
        each leaf's integrated log marginal per draw (quadrature; seconds to a minute)."""
        from .cv.arviz_bridge import to_inference_data

        log_m = None
        if log_marginals:
            import numpy as np

            from .cv.methods import score_leaves
            from .inits import fit_leaves

            log_m = score_leaves(self.result, self.dataset, np.arange(self.dataset.n_leaves),
                                 fit_leaves(self.dataset), in_fit=True).log_m
        return to_inference_data(self.result, self.dataset, log_m)


@dataclass
class Run:
    """A run folder written by `Study.run` (or ``leafcv compare``); tables are read on demand."""

    folder: Path
    manifest: dict = field(repr=False)

    @property
    def ranking(self) -> pd.DataFrame:
        """ranking.csv: one row per structure (columns as in DESIGN.md, plus ``mcse``)."""
        return self._table("ranking.csv")

    @property
    def pointwise(self) -> pd.DataFrame:
        """pointwise.csv: per held-out leaf (or level) and structure, elpd, method, MCSE, bound, k-hat."""
        return self._table("pointwise.csv")

    @property
    def finished(self) -> bool:
        return "finished" in self.manifest

    def result(self, structure: str) -> dict[str, Any]:
        """The stored result of one structure (scores, diagnostics of every fit, seeds, notes)."""
        return json.loads(self._path("results", f"{structure}.json").read_text())

    def fit(self, structure: str) -> "az.InferenceData":
        """The structure's full-data fit (posterior, sample_stats, observed_data, log_likelihood)."""
        import arviz as az

        return az.from_netcdf(self._path("fits", f"{structure}.nc"), engine="h5netcdf")

    def _path(self, *parts: str) -> Path:
        path = self.folder.joinpath(*parts)
        if not path.exists():
            known = ", ".join(self.manifest.get("structures", {})) or "none"
            raise UserInputError(str(self.folder), [f"no {'/'.join(parts)} in this run folder (structures of the run: "
                                                    f"{known}); run `leafcv compare` to finish it"])
        return path

    def _table(self, name: str) -> pd.DataFrame:
        return pd.read_csv(self._path(name))


def open_run(folder: str | Path) -> Run:
    """Open a run folder (it must hold the manifest.json that ``compare`` writes first)."""
    folder = Path(folder)
    path = folder / "manifest.json"
    if not path.exists():
        raise UserInputError(str(folder), ["no manifest.json here: give the run folder written by `leafcv compare`"])
    return Run(folder, json.loads(path.read_text()))
