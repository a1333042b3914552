"""The generic program against the hand-written reference program of the same structure, side by side.

Fits the reference structure (leaf effects on vcmax25 and alpha, N slope and month levels on vcmax25,
chlorophyll and SLA slopes on alpha, jmax25 and rd25 as ratios; reference/stan/reference_traits_month.stan)
to the demo data with both programs: same data, priors and inits, fresh seeds per repeat, runs
interleaved. The generic program runs twice: with leafcv's automatic centring (what a user gets) and
with every leaf effect centred (the reference's own parameterisation). Prints, per run, min ESS_bulk
over the population quantities both programs share, sampling seconds (warm-up included), leapfrog
steps and time per leapfrog step; then the ratio generic / reference of min ESS_bulk per second
(goal >= 0.85) per repeat and its median.

Run: python3 bench/bench_reference.py [--quick] [--repeats 3] [--chains 2 --warmup 500 --draws 1000]
"""
from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from leafcv.api import load  # noqa: E402
from leafcv.design import build_design  # noqa: E402
from leafcv.engines.program import program_text  # noqa: E402
from leafcv.engines.pystan_engine import PyStanEngine  # noqa: E402
from leafcv.demo import write_demo  # noqa: E402
from leafcv.inits import fit_leaves, structure_inits  # noqa: E402
from leafcv.spec import SamplerSpec  # noqa: E402
from reference.programs import TRAITS_MONTH, population, reference_data, reference_inits  # noqa: E402


def _min_ess(pop: dict[str, np.ndarray]) -> tuple[float, str]:
    from leafcv import arviz_arrays as az

    ess = {k: float(az.ess(v, method="bulk")) for k, v in pop.items()}
    worst = min(ess, key=ess.get)
    return ess[worst], worst


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="the quick demo (16 leaves) instead of the default (32)")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--chains", type=int, default=2)
    ap.add_argument("--warmup", type=int, default=500)
    ap.add_argument("--draws", type=int, default=1000)
    args = ap.parse_args()
    ref = TRAITS_MONTH
    folder = Path(tempfile.mkdtemp(prefix="leafcv-bench-ref-"))
    comparison, dataset = load(write_demo(folder, quick=args.quick))
    fits = fit_leaves(dataset)
    engine = PyStanEngine(log=lambda _: None)
    variants = {
        "generic (auto centring)": build_design(ref.structure(), dataset, comparison.data, leaf_fits=fits),
        "generic (all centred)": build_design(ref.structure("centred"), dataset, comparison.data, leaf_fits=fits),
    }
    rdata = reference_data(ref, dataset, comparison.data)
    for name, design in variants.items():
        lt = ", ".join(f"{t.param} {t.centred_leaves}/{t.centred_leaves + t.noncentred_leaves}" for t in design.leaf_terms)
        print(f"{name}: centred leaf effects {lt}")
    seed0 = int(time.time()) % 2**30      # fresh seeds: no engine cache can serve a fit
    print(f"{'quick' if args.quick else 'default'} demo: {dataset.n_leaves} leaves, {len(dataset.obs)} points; "
          f"{args.chains} chains x ({args.warmup} + {args.draws}); first seed {seed0}\n")
    rates: dict[str, list[float]] = {k: [] for k in [*variants, "reference"]}
    for rep in range(args.repeats):
        seed = seed0 + 101 * rep
        sampler = SamplerSpec(chains=args.chains, warmup=args.warmup, draws=args.draws, seed=seed, adapt_delta=0.9)
        inits = {name: structure_inits(design, fits, dataset, args.chains, seed) for name, design in variants.items()}
        runs = {name: (engine.fit(program_text(), design.stan_data, sampler, seed, inits[name]), design)
                for name, design in variants.items()}
        base = "generic (auto centring)"
        runs["reference"] = (engine.fit(ref.program_text(), rdata, sampler, seed,
                                        reference_inits(ref, variants[base], inits[base])), None)
        print(f"repeat {rep + 1} (seed {seed}):")
        for name, (draws, design) in runs.items():
            ess, worst = _min_ess(population(ref, draws.params, design))
            steps = int(draws.sampler["n_leapfrog__"].sum())
            rate = ess / draws.sampling_seconds
            rates[name].append(rate)
            print(f"  {name:24s} min ESS_bulk {ess:7.0f} ({worst}); {draws.sampling_seconds:6.1f} s; "
                  f"{rate:6.1f} ESS/s; {steps} leapfrog steps, {1e6 * draws.sampling_seconds / steps:.0f} us each; "
                  f"divergences {int(draws.sampler['divergent__'].sum())}")
        for name in variants:
            print(f"  ratio {name} / reference: {rates[name][-1] / rates['reference'][-1]:.2f}")
    print("\nmin ESS_bulk per second, generic / reference (goal >= 0.85):")
    for name in variants:
        r = np.array(rates[name]) / np.array(rates["reference"])
        print(f"  {name}: median {np.median(r):.2f}; per repeat {', '.join(f'{x:.2f}' for x in r)}")


if __name__ == "__main__":
    main()
