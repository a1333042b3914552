"""Predictions for new leaves from a finished run (``leafcv predict``).

For each new leaf, given its traits and groups, the posterior of one structure's fit (``fits/<name>.nc``)
gives two intervals of Vcmax25, Jmax25, alpha, theta and Rd25:

- the population mean: the structure's mean for a leaf with these traits and levels (uncertainty of
  the population effects only);
- a new leaf: that mean plus a new leaf's own effects, drawn from their fitted distribution (and, for a
  level of a random grouping the fit has not seen, a new level's effect drawn likewise).

A level of a fixed grouping the fit has not seen has no estimate and is refused. Optionally the
expected net assimilation A at given conditions, under both intervals. No sampler runs.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import DataError, UserInputError
from .terms import TermContext

#: Central interval reported.
INTERVAL = 0.90
#: Seed stream of the new-leaf effect draws (added to the run seed).
PREDICT_STREAM = 31
#: Condition columns of ``--at`` (leafcv's data roles; oxygen optional, default 210 mmol mol-1).
CONDITION_COLUMNS = {"intercellular_co2": "ci", "photon_flux": "ppfd", "leaf_temperature": "t_leaf",
                     "oxygen": "o2"}


@dataclass(frozen=True)
class Prediction:
    """``parameters``: one row per new leaf and parameter; ``assimilation``: one row per new leaf and
    condition (None without conditions); ``notes``: what the user should know about these predictions
    (e.g. leaves outside a smooth's observed range), in words."""

    parameters: pd.DataFrame
    assimilation: pd.DataFrame | None
    notes: tuple[str, ...] = ()


class NewLeaves:
    """The linear predictor of new leaves, built term by term (each term's ``predict`` calls these, in
    the order `leafcv.design.build_design` placed them). ``mean`` (S, N, P): the population mean on the
    link scale; ``extra``: a new leaf's own effects and those of levels the fit has not seen."""

    def __init__(self, design, ctx: TermContext, new: pd.DataFrame, draws: dict[str, np.ndarray],
                 rng: np.random.Generator):
        self.design, self.ctx, self.new, self.draws, self.rng = design, ctx, new, draws, rng
        S, N, P = len(draws["b0"]), len(new), len(design.parameters)
        self.mean = np.repeat(draws["b0"][:, None, :], N, axis=1)
        self.extra = np.zeros_like(self.mean)
        self.notes: list[str] = []
        self._coef = self._group = self._smooth = 0

    def add_fixed(self, param: str, column: np.ndarray) -> None:
        """The next fixed coefficient, acting on ``column`` (the new leaves' values, coded as the fit's)."""
        self.mean[:, :, self.design.param_index(param)] += self.draws["beta"][:, self._coef, None] * column[None, :]
        self._coef += 1

    def add_levels(self, param: str, idx: np.ndarray, x: np.ndarray) -> None:
        """The next group term: each new leaf's level among the fitted ones (-1: a level the fit has not
        seen, whose effect is drawn from the term's fitted SD) times the covariate ``x``."""
        r, gt = self._group, self.design.group_terms[self._group]
        pi = self.design.param_index(param)
        S, N = self.mean.shape[:2]
        known = idx >= 0
        u = np.zeros((S, N))
        u[:, known] = self.draws["level_value"][:, gt.start + idx[known]]
        self.mean[:, :, pi] += u * x
        self.extra[:, ~known, pi] += self.draws["tau"][:, r, None] * self.rng.standard_normal((S, int((~known).sum()))) \
            * x[None, ~known]
        self._group += 1

    def next_smooth(self):
        st = self.design.smooth_terms[self._smooth]
        self._smooth += 1
        return st

    def add_smooth(self, term, columns: np.ndarray) -> None:
        """A smooth's bend at the new leaves, from its basis ``columns`` (N, size) there."""
        r = self.design.smooth_terms.index(term)
        cols = slice(term.start, term.start + term.size)
        w = self.draws["tau_s"][:, r, None] * self.draws["z_s"][:, cols]
        self.mean[:, :, self.design.param_index(term.param)] += w @ columns.T

    def note(self, text: str) -> None:
        self.notes.append(text)

    def leaf_effects(self) -> None:
        """Each new leaf's own effects, drawn jointly over the leaf terms (correlated where the fit is)."""
        design = self.design
        if not design.leaf_terms:
            return
        S, N = self.mean.shape[:2]
        z = self.rng.standard_normal((S, N, len(design.leaf_terms)))
        tau = self.draws["tau_leaf"]
        if design.leaf_correlation:
            effect = np.einsum("sij,snj->sni", tau[:, :, None] * self.draws["leaf_chol"][:, 0], z)
        else:
            effect = tau[:, None, :] * z
        for j, pi in enumerate(design.leaf_term_params):
            self.extra[:, :, pi] += effect[:, :, j]


def predict(run_dir: str | Path, structure: str, leaves: str | Path | pd.DataFrame,
            conditions: str | Path | pd.DataFrame | None = None) -> Prediction:
    """Predict the FvCB parameters (and optionally A) of new leaves under ``structure`` of a run."""
    from .comparison import check_against_data
    from .cv.arviz_bridge import open_fit
    from .design import build_design, natural_values
    from .errors import SpecError
    from .manifest import run_inputs

    manifest, comparison, dataset, fit_path = run_inputs(run_dir, structure, "predictions")
    problems = check_against_data(comparison, dataset)
    if problems:
        raise SpecError(str(comparison.path), problems)
    st = comparison.structure(structure)
    design = build_design(st, dataset, comparison.data)
    post = open_fit(fit_path)["posterior"].to_dataset()
    _check_fit_matches(design, post, fit_path)

    traits, groups, fixed_groups = _used_columns(design)
    new, rows, source = _read(leaves, "new-leaf", "leaf", sorted(traits))
    leaf_col = comparison.data.columns.get("leaf")
    ids = (new[leaf_col].astype(str).to_numpy() if leaf_col in new.columns
           else np.array([f"row {r}" for r in rows]))
    ctx = TermContext(st, dataset.leaves, design.trait_transform, design.priors, design.train_leaves,
                      np.zeros(dataset.n_leaves, int))
    _check_new_leaves(design, ctx, new, rows, source, (traits, groups, fixed_groups))

    draws = {k: post[k].values.reshape((-1,) + post[k].shape[2:]) for k in post.data_vars}
    rng = np.random.default_rng([int(manifest["settings"]["sampler"]["seed"]), PREDICT_STREAM])
    pred = NewLeaves(design, ctx, new, draws, rng)
    for p in design.params:
        for term in design.terms[p]:
            term.predict(pred)
    pred.leaf_effects()
    mean, extra = pred.mean, pred.extra
    N = len(new)
    pop, one = natural_values(design, mean), natural_values(design, mean + extra)
    lo, hi = (1 - INTERVAL) / 2, 1 - (1 - INTERVAL) / 2
    rows = []
    for i in range(N):
        for p in design.params:
            a, b = pop[p][:, i], one[p][:, i]
            rows.append({"leaf": ids[i], "parameter": p, "median": float(np.median(a)),
                         "mean_q05": float(np.quantile(a, lo)), "mean_q95": float(np.quantile(a, hi)),
                         "new_leaf_q05": float(np.quantile(b, lo)), "new_leaf_q95": float(np.quantile(b, hi))})
    table = pd.DataFrame(rows)
    assim = None
    if conditions is not None:
        assim = _assimilation(design, pop, one, ids, conditions, lo, hi)
    return Prediction(table, assim, tuple(pred.notes))


def _read(source: str | Path | pd.DataFrame, what: str, rows_word: str, numeric: list[str]
          ) -> tuple[pd.DataFrame, np.ndarray, str]:
    """A table given as a DataFrame or as a file, the file read by the data layer's own reader (the same
    delimiters, decimal marks and text cells as the observation file: a level such as "05" stays "05");
    with each row's number (the line in the file; for a DataFrame, as in a CSV written from it) and how
    messages name it."""
    from .data.reading import read_text_table

    if isinstance(source, pd.DataFrame):
        return source.copy(), np.arange(len(source)) + 2, f"the {what} table"
    advice = f"give the path of a CSV file with one line per {rows_word}"
    frame, rows = read_text_table(Path(source), f"the {what} file", (advice, advice), rows_word, numeric)
    return frame, rows, str(source)


def _used_columns(design) -> tuple[set[str], set[str], set[str]]:
    """The traits, the groupings and the fixed (level-contrast) groupings the structure's terms use."""
    from .term_kinds import columns_needed

    need = columns_needed(design.terms)
    return need["traits"], need["groups"] - need["traits"], need["fixed_groups"]


def _check_fit_matches(design, post, path: Path) -> None:
    """The fit file's labels must be those of the structure built from the run's files."""
    problems = []
    if list(post["parameter"].values) != list(design.params):
        problems.append("its parameters differ from the structure's")
    if "coefficient" in post.dims and list(post["coefficient"].values) != [f"{c.param}: {c.label}"
                                                                           for c in design.coefficients]:
        problems.append("its coefficients differ from the structure's")
    if design.group_terms and "level_value" not in post:
        problems.append("it has no level_value")
    if problems:
        raise UserInputError(str(path), [f"the fit does not match the structure in the comparison file: {p}; it was "
                                         f"written for another version of the structure or by an earlier leafcv: "
                                         f"run `leafcv compare` into a new --out folder" for p in problems])


def _check_new_leaves(design, ctx: TermContext, new: pd.DataFrame, rows: np.ndarray, source: str,
                      used: tuple[set[str], set[str], set[str]]) -> None:
    """Every trait and grouping the structure uses is present and usable in every row."""
    traits, groups, fixed_groups = used
    missing = sorted((traits | groups) - set(new.columns))
    problems = []
    if missing:
        problems.append(f"column(s) {', '.join(map(repr, missing))} missing: structure {design.structure.name!r} "
                        f"uses them; add them with the same names as in the data file")
    if len(new) == 0:
        problems.append("no rows: give one row per new leaf")
    for t in sorted(traits - set(missing)):
        x = pd.to_numeric(new[t], errors="coerce")
        bad = np.flatnonzero(~np.isfinite(x.to_numpy(float)))
        if bad.size:
            problems.append(f"column {t!r}: no number in row(s) {', '.join(str(rows[b]) for b in bad[:10])} "
                            f"(rows counted with the header as row 1); give each new leaf's value")
        else:
            new[t] = x
    for g in sorted(groups - set(missing)):
        empty = np.flatnonzero((new[g].isna() | (new[g].astype(str).str.strip() == "")).to_numpy())
        if empty.size:
            problems.append(f"column {g!r}: empty in row(s) {', '.join(str(rows[b]) for b in empty[:10])}; give each "
                            f"new leaf's level (a level the fit has not seen is allowed for a random grouping)")
    for g in sorted(fixed_groups - set(missing)):
        levels, _ = ctx.levels(g)
        for i, v in enumerate(new[g].astype(str)):
            if v not in levels and not pd.isna(new[g].iloc[i]) and v.strip():
                problems.append(f"column {g!r}, row {rows[i]}: level {v!r} was not in the fitted data "
                                f"({', '.join(levels)}); {g} is a fixed effect in structure "
                                f"{design.structure.name!r}, so a new level has no estimate: use a fitted level, "
                                f"or a structure with {g} as a random effect")
    if problems:
        raise DataError(source, problems)


def _assimilation(design, pop, one, ids, conditions, lo, hi) -> pd.DataFrame:
    from . import fvcb
    from .terms import responses

    cond, rows, source = _read(conditions, "conditions", "condition", list(CONDITION_COLUMNS))
    need = [c for c in CONDITION_COLUMNS if c != "oxygen"]
    missing = [c for c in need if c not in cond.columns]
    problems = [f"column {c!r} missing; the conditions table needs {', '.join(need)} (and optionally oxygen, "
                f"mmol mol-1)" for c in missing]
    values = {}
    for role, var in CONDITION_COLUMNS.items():
        if role in missing:
            continue
        x = pd.to_numeric(cond[role], errors="coerce").to_numpy(float) if role in cond.columns \
            else np.full(len(cond), 210.0)
        bad = np.flatnonzero(~np.isfinite(x))
        if bad.size:
            problems.append(f"column {role!r}: no number in row(s) {', '.join(str(rows[b]) for b in bad[:10])}")
        values[var] = x
    if problems:
        raise DataError(source, problems)
    r = responses(design.options)
    f = fvcb.PointFactors.at(values["ci"], values["ppfd"], values["t_leaf"], values["o2"],
                             electron=design.options.electron, vcmax_response=r["vcmax"], jmax_response=r["jmax"],
                             rd_response=r["rd"], tpu_response=r["tpu"])
    opts = design.options
    rows = []
    for i, leaf in enumerate(ids):
        a = {}
        for name, nat in (("mean", pop), ("new_leaf", one)):
            v = {p: nat[p][:, i, None] for p in nat}
            a[name] = f.net_assimilation(v["vcmax25"], v["jmax25"], v["alpha"], v["theta"], v["rd25"], v.get("tpu25"),
                                         opts.transition, opts.smooth_curvature)
        for j in range(len(cond)):
            rows.append({"leaf": leaf, "intercellular_co2": values["ci"][j], "photon_flux": values["ppfd"][j],
                         "leaf_temperature": values["t_leaf"][j], "oxygen": values["o2"][j],
                         "a_median": float(np.median(a["mean"][:, j])),
                         "mean_q05": float(np.quantile(a["mean"][:, j], lo)),
                         "mean_q95": float(np.quantile(a["mean"][:, j], hi)),
                         "new_leaf_q05": float(np.quantile(a["new_leaf"][:, j], lo)),
                         "new_leaf_q95": float(np.quantile(a["new_leaf"][:, j], hi))})
    return pd.DataFrame(rows)
