"""leafcv's generic program against the naive hand-written baseline, side by side in one run.

Both fit the baseline's structure (leaf effects on log Vcmax25 and logit alpha, N slope and month on
Vcmax25, chlorophyll and SLA slopes on alpha, Jmax25 and Rd25 as global multiples of Vcmax25) on the
same simulated data, with the same priors, the same initial values (leafcv's per-leaf least-squares
inits, mapped to the baseline's parameters), the same sampler settings and fresh seeds. Prints wall
times, min ESS_bulk over population-level parameters, ESS_bulk per second of sampling (warm-up
included, compile and inits excluded) and their ratio. Goal (DESIGN.md): ratio >= 10.

Run: python3 bench/bench_baseline.py [--leaves 40] [--chains 4] [--warmup 500] [--draws 500]
"""
from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
from scipy.special import expit

from leafcv.api import load
from leafcv.demo import write_demo
from leafcv.diagnostics import diagnose
from leafcv.engines.program import program_text
from leafcv.engines.pystan_engine import PyStanEngine
from leafcv.fitting import POPULATION, fit_structure
from leafcv.inits import fit_leaves
from leafcv.spec import SamplerSpec

BASELINE = Path(__file__).resolve().parents[2] / "shared" / "baseline" / "naive_hierarchical.stan"
BASELINE_POPULATION = ["b0", "bn", "bm_raw", "sd_v", "a0", "a_chl", "a_sla", "sd_a", "log_jr", "log_rf",
                       "theta", "sigma"]


def baseline_data(design, dataset) -> dict:
    d = design.stan_data
    leaves = dataset.leaves
    months = sorted(leaves["campaign"].astype(str).unique())
    return {
        "N": d["N"], "L": d["L"], "M": len(months), "leaf": d["leaf"], "ci": d["ci"], "q": d["q"],
        "tleaf": d["tleaf"], "a": d["a"],
        "n_c": leaves["n_area"].to_numpy() - leaves["n_area"].mean(),
        "chl_c": (leaves["chl_ug"].to_numpy() - leaves["chl_ug"].mean()) / 10,
        "sla_c": (leaves["sla_m2kg"].to_numpy() - leaves["sla_m2kg"].mean()) / 5,
        "month": np.searchsorted(months, leaves["campaign"].astype(str).to_numpy()) + 1,
    }


def baseline_inits(design, inits: list[dict]) -> list[dict]:
    """leafcv's inits, mapped to the baseline's parameters (same values, same point in the posterior)."""
    d = design.stan_data
    L = d["L"]
    labels = [c.label for c in design.coefficients]
    out = []
    for init in inits:
        b0, beta = np.asarray(init["b0"]), np.asarray(init["beta"])
        tau_leaf = np.asarray(init["tau_leaf"])
        eta = np.zeros(L * len(design.params))
        mu = np.repeat(b0[None, :], L, axis=0) + d["X"] @ (beta[:, None] * d["fixed_map"])
        mu_flat = mu.T.reshape(-1)
        eta[:] = mu_flat
        eta[design.cen_cells] = init["eta_c"]
        eta[design.nc_cells] = mu_flat[design.nc_cells] + tau_leaf[np.asarray(d["nc_term"]) - 1] * np.asarray(init["eta_z"])
        z_v = (eta[:L] - mu_flat[:L]) / tau_leaf[0]
        z_a = (eta[2 * L:3 * L] - mu_flat[2 * L:3 * L]) / tau_leaf[1]
        out.append({
            "b0": b0[0], "bn": beta[labels.index("n_area")],
            "bm_raw": [beta[i] for i, lab in enumerate(labels) if lab.startswith("campaign=")],
            "sd_v": tau_leaf[0], "z_v": z_v.tolist(),
            "a0": b0[2], "a_chl": beta[labels.index("chl_ug")], "a_sla": beta[labels.index("sla_m2kg")],
            "sd_a": tau_leaf[1], "z_a": z_a.tolist(),
            "log_jr": b0[1], "log_rf": b0[4], "theta": float(np.clip(expit(b0[3]), 0.02, 0.98)),
            "sigma": float(np.asarray(init["sigma"])[0]),
        })
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--leaves", type=int, default=40)
    ap.add_argument("--chains", type=int, default=4)
    ap.add_argument("--warmup", type=int, default=500)
    ap.add_argument("--draws", type=int, default=500)
    args = ap.parse_args()

    folder = Path(tempfile.mkdtemp(prefix="leafcv-bench-"))
    path = write_demo(folder, quick=True)
    # resize the scenario: rewrite the observations with the requested number of leaves
    from leafcv.demo import simulate

    obs, truth = simulate(args.leaves)
    obs.to_csv(folder / "observations.csv", index=False)
    text = path.read_text()
    # centre traits at their leaf-table means, as the baseline does
    text = text.split("[data.leaf.centre]")[0] + "[data.leaf.scale]" + text.split("[data.leaf.scale]")[1]
    path.write_text(text)
    comparison, dataset = load(path)
    structure = comparison.structure("traits-month-fixed")
    seed = int(time.time()) % 2**31  # fresh seeds: no engine cache can serve either run
    sampler = SamplerSpec(chains=args.chains, warmup=args.warmup, draws=args.draws, seed=seed)
    leaf_fits = fit_leaves(dataset)
    engine = PyStanEngine()

    ours = fit_structure(structure, dataset, comparison.data, sampler, engine=engine, leaf_fits=leaf_fits)
    from leafcv.inits import structure_inits

    inits = structure_inits(ours.design, leaf_fits, dataset, sampler.chains, seed)
    prog = program_text(BASELINE)
    engine.compile(prog, baseline_data(ours.design, dataset), seed + 1)  # compile outside the timing
    base = engine.fit(prog, baseline_data(ours.design, dataset), sampler, seed + 1,
                      baseline_inits(ours.design, inits))
    base_diag = diagnose(base, BASELINE_POPULATION, sampler.max_treedepth)

    def line(name, draws, diag):
        rate = diag.min_ess_bulk / draws.sampling_seconds
        steps = float(np.mean(draws.sampler["n_leapfrog__"]))
        print(f"{name:10s} sampling {draws.sampling_seconds:8.1f} s  min ESS_bulk {diag.min_ess_bulk:7.0f}  "
              f"ESS/s {rate:8.3f}  mean leapfrog steps {steps:6.1f}  divergences {diag.divergences}  "
              f"max R-hat {diag.max_rhat:.3f}")
        return rate

    print(f"data: {dataset.n_leaves} leaves, {len(dataset.obs)} points; {args.chains} chains x "
          f"({args.warmup} warm-up + {args.draws} draws); seeds {seed}, {seed + 1}")
    r_ours = line("leafcv", ours.draws, ours.diagnostics)
    r_base = line("baseline", base, base_diag)
    print(f"ratio of min ESS_bulk per second (leafcv / baseline): {r_ours / r_base:.2f}  (goal >= 10)")
    print(f"population-level parameters: leafcv {', '.join(n for n in POPULATION if n in ours.draws.params)}; "
          f"baseline {', '.join(BASELINE_POPULATION)}")


if __name__ == "__main__":
    main()
