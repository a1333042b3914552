"""Method auto against exact leave-one-leaf-out on the quick demo, side by side in one run.

For each structure prints: one full fit's wall time, the quadrature and PSIS time, auto's cost
(full fit + quadrature) / one full fit (goal <= 1.5; refits of flagged and spot-check leaves are
counted and timed separately), the number of refits, exact's time / auto's time, and
|elpd_auto - elpd_exact| against max(0.3 x SE of their paired per-leaf difference, 2 x their combined
Monte Carlo SE) (the goal), and whether the two methods order every pair of structures the same way
where exact's difference exceeds 2 SE of the paired difference.

Run: python3 bench/bench_cv.py [--structures leaf-vcmax-alpha traits-month-fixed]
"""
from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np

from leafcv.api import load
from leafcv.cv.plan import cross_validate
from leafcv.demo import write_demo
from leafcv.inits import fit_leaves
from leafcv.spec import SamplerSpec


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--structures", nargs="+", default=["leaf-vcmax-alpha", "traits-month-fixed"])
    args = ap.parse_args()
    folder = Path(tempfile.mkdtemp(prefix="leafcv-bench-cv-"))
    comparison, dataset = load(write_demo(folder, quick=True))
    leaf_fits = fit_leaves(dataset)
    seed = int(time.time()) % 2**31      # fresh seeds: no engine cache can serve a fit
    base = comparison.sampler
    sampler = SamplerSpec(chains=base.chains, warmup=base.warmup, draws=base.draws, seed=seed,
                          adapt_delta=base.adapt_delta)
    print(f"quick demo: {dataset.n_leaves} leaves, {len(dataset.obs)} points; {sampler.chains} chains x "
          f"({sampler.warmup} + {sampler.draws}); seed {seed}")
    totals = {}
    for name in args.structures:
        s = comparison.structure(name)
        t0 = time.perf_counter()
        auto, da = cross_validate(s, dataset, comparison, method="auto", leaf_fits=leaf_fits, sampler=sampler)
        t_auto = time.perf_counter() - t0
        t0 = time.perf_counter()
        exact, dx = cross_validate(s, dataset, comparison, method="exact", leaf_fits=leaf_fits, sampler=sampler)
        t_exact = time.perf_counter() - t0
        d = auto.elpd_i - exact.elpd_i
        se_d = float(np.sqrt(len(d) * np.var(d, ddof=1)))
        mc = float(np.hypot(auto.mcse, exact.mcse))
        allowed = max(0.3 * se_d, 2 * mc)
        auto_cost = da.full_fit_seconds + da.quadrature_seconds
        totals[name] = (auto, exact)
        print(f"\n{name}:")
        print(f"  full fit {da.full_fit_seconds:.1f} s; quadrature + PSIS {da.quadrature_seconds:.1f} s; "
              f"auto / one fit = {auto_cost / da.full_fit_seconds:.2f} (goal <= 1.5)")
        print(f"  refits in auto: {auto.n_refits} ({len(da.refit_leaves)} flagged, {len(da.spot_checks)} spot checks), "
              f"{da.refit_seconds:.1f} s; auto total incl. refits {t_auto:.1f} s")
        print(f"  exact: {exact.n_refits} refits, {t_exact:.1f} s; exact / auto (incl. refits) = {t_exact / t_auto:.2f}")
        diff = abs(auto.elpd - exact.elpd)
        print(f"  elpd auto {auto.elpd:.2f} (MCSE {auto.mcse:.3f}), exact {exact.elpd:.2f} (MCSE {exact.mcse:.3f}); "
              f"|diff| {diff:.3f} vs allowed max(0.3 x {se_d:.3f}, 2 x {mc:.3f}) = {allowed:.3f}: "
              f"{'met' if diff <= allowed else 'MISSED'}; max per-leaf |diff| {np.max(np.abs(d)):.3f} nats; "
              f"max k-hat {auto.max_khat:.2f}; grade auto {auto.grade}, exact {exact.grade}")
    names = list(totals)
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            dx = totals[a][1].elpd_i - totals[b][1].elpd_i
            da_ = totals[a][0].elpd_i - totals[b][0].elpd_i
            se = float(np.sqrt(len(dx) * np.var(dx, ddof=1)))
            clear = abs(dx.sum()) > 2 * se
            same = np.sign(dx.sum()) == np.sign(da_.sum())
            print(f"{a} - {b}: exact {dx.sum():.2f} (SE {se:.2f}), auto {da_.sum():.2f}; "
                  + (f"clear under exact, same order: {bool(same)}" if clear else "not clear under exact (no order required)"))


if __name__ == "__main__":
    main()
