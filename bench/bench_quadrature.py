"""Held-out scoring cost and stated bounds, this tree's quadrature against another revision's, side by
side in one run on the same full-data fits of the quick demo.

For each structure: one full fit's wall time; the time to score every leaf (quadrature, predictive means
and curves) with this tree's `leafcv.cv.quadrature` and with the module as it was at ``--against``
(default HEAD~1 of main's history given as a git revision), each as a ratio to the full fit and to each
other; and the leaves' summed stated bound and largest per-leaf bound under both.

Run: python3 bench/bench_quadrature.py [--against REV] [--structures NAME ...] [--repeats N]
"""
from __future__ import annotations

import argparse
import importlib.util
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

import leafcv.cv.methods as methods
from leafcv.api import load
from leafcv.demo import write_demo
from leafcv.fitting import fit_structure
from leafcv.inits import fit_leaves


def _module_at(rev: str):
    """leafcv.cv.quadrature as it was at git revision ``rev``, loaded under another name."""
    root = Path(__file__).resolve().parents[1]
    text = subprocess.run(["git", "-C", str(root), "show", f"{rev}:src/leafcv/cv/quadrature.py"],
                          check=True, capture_output=True, text=True).stdout
    path = Path(tempfile.mkdtemp(prefix="leafcv-quad-")) / "quadrature_then.py"
    path.write_text(text)
    spec = importlib.util.spec_from_file_location("quadrature_then", path)
    mod = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = mod
    spec.loader.exec_module(mod)
    return mod


def _score(fit, dataset, leaf_fits, log_marginal) -> tuple[float, float, float]:
    """(seconds, summed bound, largest bound) of scoring every leaf of ``fit`` with ``log_marginal``."""
    saved = methods.leaf_log_marginal
    methods.leaf_log_marginal = log_marginal
    try:
        t0 = time.perf_counter()
        sc = methods.score_leaves(fit, dataset, np.arange(dataset.n_leaves), leaf_fits, in_fit=True)
        seconds = time.perf_counter() - t0
    finally:
        methods.leaf_log_marginal = saved
    bounds = np.array([q.bound for q in sc.quad])
    return seconds, float(np.sum(bounds)), float(np.max(bounds))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--against", default="HEAD~1")
    ap.add_argument("--structures", nargs="+", default=["leaf-vcmax-alpha", "traits-month-fixed"])
    ap.add_argument("--repeats", type=int, default=1, help="fits (seeds) per structure")
    args = ap.parse_args()
    then = _module_at(args.against)
    folder = Path(tempfile.mkdtemp(prefix="leafcv-bench-quad-"))
    comparison, dataset = load(write_demo(folder, quick=True))
    leaf_fits = fit_leaves(dataset)
    sampler = comparison.sampler
    print(f"quick demo: {dataset.n_leaves} leaves; {sampler.chains} chains x ({sampler.warmup} + {sampler.draws}); "
          f"this tree against {args.against}")
    for name in args.structures:
        s = comparison.structure(name)
        for r in range(args.repeats):
            t0 = time.perf_counter()
            fit = fit_structure(s, dataset, comparison.data, sampler, leaf_fits=leaf_fits, seed=sampler.seed + 17 * r)
            t_fit = time.perf_counter() - t0
            t_new, b_new, m_new = _score(fit, dataset, leaf_fits, methods.leaf_log_marginal)
            t_old, b_old, m_old = _score(fit, dataset, leaf_fits, then.leaf_log_marginal)
            print(f"{name} (seed +{17 * r}): full fit {t_fit:.1f} s; scoring now {t_new:.1f} s "
                  f"({t_new / t_fit:.2f} of a fit), then {t_old:.1f} s ({t_old / t_fit:.2f}); now / then "
                  f"{t_new / t_old:.2f}; summed bound now {b_new:.4f} (max leaf {m_new:.4f}), then {b_old:.4f} "
                  f"(max leaf {m_old:.4f}) nats", flush=True)


if __name__ == "__main__":
    sys.exit(main())
