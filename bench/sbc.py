"""Simulation-based calibration of the generic Stan program (Talts, Betancourt, Simpson, Vehtari & Gelman
2018; Modrák, Moon, Kim, Bürkner, Huurre, Faltejsková, Gelman & Vehtari 2023).

At the quick demo's size (its 16 leaves, traits, groups, and each point's Ci, PPFD and leaf temperature;
`leafcv.demo`), for each structure and replicate: draw every parameter from the structure's prior
(leafcv's own prior specification, as the program states it), simulate net assimilation from the FvCB
model with normal noise, fit the generic program, thin the posterior to about 100 draws and record the
rank of each true population quantity (intercepts, coefficients, SDs of group and leaf effects, residual
SDs) among them, and of the joint log-likelihood log p(y | theta) at the true theta among its values at
the draws (Modrák et al. 2023: a data-dependent test quantity, sensitive to a wrong likelihood term).

Pass: a quantity's rank ECDF stays inside its 99 % simultaneous band for uniform ranks. The band is
computed by simulation (the simulation approach of Säilynoja, Bürkner & Vehtari 2022, "Graphical test for
discrete uniformity and its applications in goodness-of-fit evaluation and multiple sample comparison",
Statistics and Computing 32:32): many samples of uniform discrete ranks, each summarised by the smallest
two-sided binomial tail probability of its ECDF over the rank values; the 1 % quantile of that minimum is
the pointwise level whose binomial intervals form the simultaneous band.

Resumable: each replicate's ranks are saved to FOLDER/<structure>/rep-NNNN.json as it finishes (failed
fits too, with the reason); a re-run skips them. A prior draw whose data the program cannot fit is
recorded as failed and counted in the summary, never dropped silently.

    python3 bench/sbc.py --replicates 100 --workers 1 --folder /tmp/leafcv-sbc
    python3 bench/sbc.py --folder /tmp/leafcv-sbc --write-only       # docs from the replicates finished
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
import traceback
from dataclasses import replace
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT / "src") not in sys.path:
    sys.path.insert(0, str(ROOT / "src"))

STRUCTURES = ("leaf-vcmax-alpha", "traits-month-fixed")
THIN_TO = 100
LEVEL = 0.99
BAND_SIMULATIONS = 10_000
SEED = 20261204
LOGLIK = "joint log-likelihood"

_CACHE: dict = {}


# ------------------------------------------------------------------------------------------------------
# one replicate

def _setup(folder: Path):
    """The quick demo (written once into FOLDER/demo), loaded: (comparison, dataset)."""
    if "demo" not in _CACHE:
        from leafcv.api import load
        from leafcv.demo import write_demo

        path = folder / "demo" / "demo.toml"
        if not path.exists():
            write_demo(folder / "demo", quick=True)
        _CACHE["demo"] = load(path)
    return _CACHE["demo"]


def prior_draw(design, rng: np.random.Generator) -> dict[str, np.ndarray]:
    """One draw of every parameter of the program from the structure's prior, in the program's names
    (each with a leading draw axis of 1), the leaves' natural values in ``leaf_value`` (1, L, P)."""
    from scipy.special import logit

    from leafcv.design import leaf_link_values, natural_values

    d = design.stan_data
    if d["student_t"] or d["leaf_corr"]:
        raise ValueError(f"{design.structure.name}: Student-t likelihoods and correlated leaf effects are not "
                         "simulated by this script")
    b0 = np.array([rng.normal(a, b) if fam == 1 else logit(rng.beta(a, b))
                   for fam, a, b in zip(d["prior_family"], d["prior_a"], d["prior_b"])])
    beta = rng.normal(0, d["beta_sd"]) if d["K"] else np.zeros(0)
    tau = np.abs(rng.normal(0, d["tau_sd"])) if d["R"] else np.zeros(0)
    z_lev = rng.normal(size=len(design.lev_term))
    cen = design.lev_centred
    tau_leaf = np.abs(rng.normal(0, d["leaf_tau_sd"])) if d["Rl"] else np.zeros(0)
    zc, zn = rng.normal(size=len(design.cen_cells)), rng.normal(size=len(design.nc_cells))
    sigma = np.abs(rng.normal(0, d["sigma_sd"], size=d["S"]))
    draws = {"b0": b0, "beta": beta, "tau": tau, "u_c": (tau[design.lev_term] * z_lev)[cen] if cen.any() else np.zeros(0),
             "u_z": z_lev[~cen], "tau_leaf": tau_leaf, "eta_c": np.zeros(len(design.cen_cells)), "eta_z": zn,
             "sigma": sigma}
    draws = {k: np.asarray(v, float)[None, ...] for k, v in draws.items()}
    mu, _ = leaf_link_values(design, draws)
    mu_flat = mu[0].T.reshape(-1)
    draws["eta_c"] = (mu_flat[design.cen_cells] + tau_leaf[design.cen_term] * zc)[None, :]
    _, eta = leaf_link_values(design, draws)
    nat = natural_values(design, eta)
    draws["leaf_value"] = np.stack([nat[p] for p in design.params], axis=-1)
    return draws


def simulate(design, dataset, truth: dict, rng: np.random.Generator):
    """The data set with net assimilation simulated from ``truth`` at every point (normal noise)."""
    from leafcv import fvcb
    from leafcv.terms import responses

    pts, opts = design.points, design.options
    r = responses(opts)
    f = fvcb.PointFactors.at(pts.ci, pts.q, pts.t_leaf, pts.o2, electron=opts.electron, vcmax_response=r["vcmax"],
                             jmax_response=r["jmax"], rd_response=r["rd"], tpu_response=r["tpu"])
    v = truth["leaf_value"][0][pts.leaf]
    col = {p: v[:, i] for i, p in enumerate(design.params)}
    a_hat = f.net_assimilation(col["vcmax25"], col["jmax25"], col["alpha"], col["theta"], col["rd25"],
                               col.get("tpu25"), opts.transition, opts.smooth_curvature)
    a = a_hat + rng.normal(0, truth["sigma"][0][pts.sigma_group])
    obs = dataset.obs.copy()
    obs.loc[obs.index[design.obs_index], "a_net"] = a
    return replace(dataset, obs=obs), a


def _engine():
    if "engine" not in _CACHE:
        from leafcv.engines.pystan_engine import PyStanEngine

        _CACHE["engine"] = PyStanEngine(log=lambda _: None)
    return _CACHE["engine"]


def replicate(folder: str, structure: str, r: int, chains: int, warmup: int, draws: int, seed: int = SEED) -> dict:
    """Prior draw -> data -> fit -> ranks. Returns the record saved as rep-NNNN.json."""
    from leafcv.design import build_design, leaf_link_values, natural_values
    from leafcv.fitting import fit_structure
    from leafcv.sensitivity import log_likelihood, population_quantities
    from leafcv.spec import SamplerSpec

    start = time.perf_counter()
    comparison, dataset = _setup(Path(folder))
    st = comparison.structure(structure)
    k = STRUCTURES.index(structure) if structure in STRUCTURES else len(STRUCTURES) + sum(map(ord, structure))
    rng = np.random.default_rng([seed, k, r])
    design = build_design(st, dataset, comparison.data)
    truth = prior_draw(design, rng)
    sim, a = simulate(design, dataset, truth, rng)
    record = {"structure": structure, "replicate": r, "seed": [seed, k, r],
              "truth": {n: np.asarray(v).ravel().tolist() for n, v in truth.items() if n != "leaf_value"},
              "data": {"a_min": float(a.min()), "a_max": float(a.max()), "share_negative": float(np.mean(a < 0))}}
    sampler = SamplerSpec(chains=chains, warmup=warmup, draws=draws, seed=int(rng.integers(1, 2**31 - 1)),
                          adapt_delta=0.95)
    try:
        fit = fit_structure(st, sim, comparison.data, sampler, engine=_engine())
    except Exception as exc:          # recorded, counted and reported; never dropped silently
        record.update(status="failed", reason=f"{type(exc).__name__}: {exc}"[:2000],
                      seconds=time.perf_counter() - start)
        return record
    per_chain = max(1, THIN_TO // chains)
    keep = np.unique(np.linspace(0, draws - 1, per_chain).round().astype(int))
    post = {n: np.asarray(v)[:, keep].reshape((-1,) + np.shape(v)[2:]) for n, v in fit.draws.params.items()
            if np.ndim(v) >= 2 and np.size(v)}
    fd = fit.design
    _, eta = leaf_link_values(fd, post)
    nat = natural_values(fd, eta)
    post["leaf_value"] = np.stack([nat[p] for p in fd.params], axis=-1)
    q_post, q_true = population_quantities(fd, post), population_quantities(design, truth)
    values = {lab: (q_post.values[:, j], float(q_true.values[0, j])) for j, lab in enumerate(q_post.labels)}
    values[LOGLIK] = (log_likelihood(fd, post["leaf_value"], post["sigma"]),
                      float(log_likelihood(fd, truth["leaf_value"], truth["sigma"])[0]))   # fd: the simulated A
    ranks = {}
    for lab, (x, t) in values.items():
        below, ties = int(np.sum(x < t)), int(np.sum(x == t))
        ranks[lab] = below + int(rng.integers(0, ties + 1))       # ties broken at random
    dg = fit.diagnostics
    record.update(status="ok", ranks=ranks, n_draws=int(len(next(iter(values.values()))[0])),
                  diagnostics={"max_rhat": float(dg.max_rhat), "divergences": int(dg.divergences),
                               "min_ess_bulk": float(dg.min_ess_bulk), "grade": dg.grade},
                  seconds=time.perf_counter() - start)
    return record


def _run_one(args) -> tuple[str, int, dict]:
    folder, structure, r, chains, warmup, draws, seed = args
    try:
        rec = replicate(folder, structure, r, chains, warmup, draws, seed)
    except Exception:                 # an error of this script, not of the fit: shown, not saved as done
        rec = {"structure": structure, "replicate": r, "status": "error", "traceback": traceback.format_exc()}
    return structure, r, rec


def rep_path(folder: Path, structure: str, r: int) -> Path:
    return folder / structure / f"rep-{r:04d}.json"


def run(folder: Path, structures, replicates: int, workers: int, chains: int, warmup: int, draws: int,
        seed: int = SEED) -> None:
    from concurrent.futures import ProcessPoolExecutor, as_completed
    import multiprocessing as mp

    _setup(folder)
    todo = [(str(folder), s, r, chains, warmup, draws, seed) for r in range(replicates) for s in structures
            if not rep_path(folder, s, r).exists()]     # structures interleaved: a cut-short run has both
    print(f"{len(todo)} replicates to run ({replicates} per structure; the others are done)", flush=True)
    t0 = time.perf_counter()

    def save(structure, r, rec):
        if rec["status"] == "error":
            print(f"{structure} #{r}: ERROR in this script (not saved):\n{rec['traceback']}", flush=True)
            return
        path = rep_path(folder, structure, r)
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.with_suffix(".tmp")
        tmp.write_text(json.dumps(rec))
        os.replace(tmp, path)
        print(f"{structure} #{r}: {rec['status']} {rec.get('seconds', 0):.0f} s "
              f"({time.perf_counter() - t0:.0f} s elapsed)", flush=True)

    if workers <= 1:
        for job in todo:
            save(*_run_one(job))
        return
    from leafcv.batch.executors import stop_pool

    pool = ProcessPoolExecutor(workers, mp_context=mp.get_context("spawn"))
    try:
        for fut in as_completed([pool.submit(_run_one, job) for job in todo]):
            save(*fut.result())
    finally:            # not `with`: its shutdown would wait for ever on the workers' chain pools
        stop_pool(pool)


# ------------------------------------------------------------------------------------------------------
# the band and the summary

def band_gamma(n: int, m: int, level: float = LEVEL, sims: int = BAND_SIMULATIONS, seed: int = 1) -> float:
    """Pointwise level gamma of the simultaneous band of ``level`` for the ECDF of ``n`` ranks uniform on
    0..m (by simulation, see the module's docstring)."""
    rng = np.random.default_rng(seed)
    ranks = rng.integers(0, m + 1, size=(sims, n))
    return float(np.quantile(min_tail(ranks, m), 1 - level))


def min_tail(ranks: np.ndarray, m: int) -> np.ndarray:
    """Smallest two-sided binomial tail probability of each row's ECDF over the rank values 0..m-1."""
    from scipy import stats

    ranks = np.atleast_2d(ranks)
    n = ranks.shape[1]
    z = np.arange(1, m + 1) / (m + 1)                           # P(rank <= j) for j = 0..m-1
    counts = np.stack([(ranks <= j).sum(axis=1) for j in range(m)], axis=1)
    lo = stats.binom.cdf(counts, n, z)
    hi = stats.binom.sf(counts - 1, n, z)
    return np.minimum(1.0, 2 * np.minimum(lo, hi)).min(axis=1)


def band(n: int, m: int, gamma: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(z, lower, upper) of the ECDF band at the rank values."""
    from scipy import stats

    z = np.arange(1, m + 1) / (m + 1)
    return z, stats.binom.ppf(gamma / 2, n, z) / n, stats.binom.ppf(1 - gamma / 2, n, z) / n


def collect(folder: Path, structure: str) -> tuple[list[dict], list[dict]]:
    ok, failed = [], []
    for path in sorted((folder / structure).glob("rep-*.json")):
        rec = json.loads(path.read_text())
        (ok if rec["status"] == "ok" else failed).append(rec)
    return ok, failed


def summarise(folder: Path, structures) -> list[dict]:
    """One row per (structure, quantity): replicates, the band check and its result."""
    rows = []
    for s in structures:
        ok, failed = collect(folder, s)
        if not ok:
            rows.append({"structure": s, "quantity": "(all)", "replicates": 0, "inside": "no replicate finished",
                         "result": "not run", "ranks": [], "m": THIN_TO, "failed": failed, "gamma": float("nan")})
            continue
        m = ok[0]["n_draws"]
        gamma = band_gamma(len(ok), m)
        for q in ok[0]["ranks"]:
            ranks = np.array([rec["ranks"][q] for rec in ok])
            p = float(min_tail(ranks[None, :], m)[0])
            inside = p >= gamma
            rows.append({"structure": s, "quantity": q, "replicates": len(ok),
                         "inside": "yes" if inside else f"no (smallest tail probability {p:.2g} < {gamma:.2g})",
                         "result": "pass" if inside else "FAIL", "ranks": ranks.tolist(), "m": m, "failed": failed,
                         "gamma": gamma})
    return rows


def plot(rows: list[dict], structure: str, path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    mine = [r for r in rows if r["structure"] == structure and r["ranks"]]
    if not mine:
        return
    cols = 4
    nrow = (len(mine) + cols - 1) // cols
    fig, axes = plt.subplots(nrow, cols, figsize=(3.2 * cols, 2.4 * nrow), squeeze=False, sharey=True)
    for ax, r in zip(axes.ravel(), mine):
        ranks, m = np.array(r["ranks"]), r["m"]
        z, lo, hi = band(len(ranks), m, r["gamma"])
        ecdf = np.array([(ranks <= j).mean() for j in range(m)])
        ax.fill_between(z, lo - z, hi - z, color="#cfe3f3", step="mid", label=f"{LEVEL:.0%} band")
        ax.step(z, ecdf - z, where="mid", color="#0072B2" if r["result"] == "pass" else "#D55E00", lw=1.2)
        ax.axhline(0, color="#888", lw=0.6)
        ax.set_title(r["quantity"], fontsize=7.5)
        ax.tick_params(labelsize=7)
    for ax in axes.ravel()[len(mine):]:
        ax.axis("off")
    fig.supxlabel("fractional rank", fontsize=8)
    fig.supylabel("ECDF − uniform", fontsize=8)
    fig.suptitle(f"SBC rank ECDF differences: {structure} ({mine[0]['replicates']} replicates)", fontsize=9)
    fig.tight_layout()
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    plt.close(fig)


def git_commit() -> str:
    try:
        return subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT, capture_output=True, text=True,
                              check=True).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        return "unknown"


def write_doc(folder: Path, structures, replicates: int, settings: str, doc: Path, notes: str = "") -> list[dict]:
    import leafcv
    from leafcv.report.reliability import VALIDATION_HEADER

    rows = summarise(folder, structures)
    for s in structures:
        plot(rows, s, doc.parent / "validation" / f"sbc-{s}.png")
    lines = ["# Validation of the generic program: simulation-based calibration", "",
             f"- Date: {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}",
             f"- leafcv version: {getattr(leafcv, '__version__', 'unknown')} (git {git_commit()})",
             f"- Settings: {settings}",
             "- Replicates: " + "; ".join(
                 f"{s}: {len(collect(folder, s)[0])} fitted of {replicates} planned, "
                 f"{len(collect(folder, s)[1])} could not be fitted" for s in structures),
             "- Command: `python3 bench/sbc.py` (see its docstring)", "",
             "Method: parameters drawn from each structure's prior, data simulated at the quick demo's design "
             "(16 leaves, their traits and groups, each point's Ci, PPFD and leaf temperature), the generic "
             "program fitted, and the rank of each true population quantity among about 100 thinned posterior "
             "draws recorded (Talts et al. 2018), with the joint log-likelihood as a test quantity (Modrák et "
             "al. 2023). Pass: the rank ECDF stays inside its 99 % simultaneous band, computed by simulation "
             "of uniform ranks (Säilynoja, Bürkner & Vehtari 2022). Each check alone fails 1 % of the time "
             "for a correct program, so among many quantities an isolated marginal failure is expected now "
             "and then.", "",
             VALIDATION_HEADER, "|---|---|---|---|---|"]
    for r in rows:
        lines.append(f"| {r['structure']} | {r['quantity']} | {r['replicates']} | {r['inside']} | {r['result']} |")
    lines.append("")
    for s in structures:
        failed = collect(folder, s)[1]
        if failed:
            lines.append(f"Replicates of {s} that could not be fitted ({len(failed)}): " + "; ".join(
                f"#{f['replicate']}: {f['reason'][:200]}" for f in failed) + ".")
            lines.append("")
        ok = collect(folder, s)[0]
        if ok:
            div = sum(rec["diagnostics"]["divergences"] > 0 for rec in ok)
            rh = max(rec["diagnostics"]["max_rhat"] for rec in ok)
            neg = np.mean([rec["data"]["share_negative"] for rec in ok])
            grades = {g: sum(rec["diagnostics"]["grade"] == g for rec in ok) for g in ("converged", "marginal", "failed")}
            lines.append(f"{s}: by leafcv's own convergence grades (strict for such short chains) "
                         + ", ".join(f"{n} {g}" for g, n in grades.items())
                         + f"; all are ranked. {div} of {len(ok)} fits had divergent transitions; largest R-hat {rh:.3f}; on "
                         f"average {neg:.0%} of the simulated points had A < 0 (prior draws give some implausible "
                         f"curves; they were fitted like any other). Plot: validation/sbc-{s}.png")
            lines.append("")
            lines.append(f"![{s}](validation/sbc-{s}.png)")
            lines.append("")
    if notes.strip():
        lines += ["## Reading of this run", "", notes.strip(), ""]
    doc.parent.mkdir(parents=True, exist_ok=True)
    doc.write_text("\n".join(lines) + "\n")
    return rows


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--folder", type=Path, default=Path("/tmp/leafcv-sbc"), help="replicates are saved here")
    ap.add_argument("--replicates", type=int, default=100)
    ap.add_argument("--structure", action="append", help=f"repeatable; default: {', '.join(STRUCTURES)}")
    ap.add_argument("--workers", type=int, default=1, help="local processes (each runs its chains at once)")
    ap.add_argument("--chains", type=int, default=2)
    ap.add_argument("--warmup", type=int, default=300)
    ap.add_argument("--draws", type=int, default=300)
    ap.add_argument("--seed", type=int, default=SEED,
                    help=f"base seed of the prior draws and fits (default {SEED}); another seed, another folder")
    ap.add_argument("--doc", type=Path, default=ROOT / "docs" / "validation.md")
    ap.add_argument("--write-only", action="store_true", help="write the doc from the replicates finished")
    ap.add_argument("--notes", type=Path, help="a Markdown file of findings, added to the doc as its last section")
    args = ap.parse_args(argv)
    structures = tuple(args.structure or STRUCTURES)
    args.folder.mkdir(parents=True, exist_ok=True)
    if not args.write_only:
        run(args.folder, structures, args.replicates, args.workers, args.chains, args.warmup, args.draws, args.seed)
    settings = (f"{args.chains} chains x ({args.warmup} warm-up + {args.draws} draws), adapt_delta 0.95, "
                f"thinned to about {THIN_TO} draws; quick-demo design; structures {', '.join(structures)}; "
                f"base seed {args.seed}")
    notes = args.notes.read_text() if args.notes else ""
    rows = write_doc(args.folder, structures, args.replicates, settings, args.doc, notes)
    for r in rows:
        print(f"{r['structure']:22s} {r['quantity']:45s} {r['replicates']:4d} {r['result']}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
