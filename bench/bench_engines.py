"""PyStan against CmdStan (cmdstanpy), side by side in one run: compile time, sampling time, demo wall time.

1. Cold compile of leafcv's program under each engine. The program text gets a comment line with a fresh
   token, so neither engine finds it compiled (httpstan caches by program text; the CmdStan engine by a
   hash of text, CmdStan version and flags, here in a fresh cache folder). PyStan's compiled module is
   deleted from httpstan's cache afterwards; nothing else there is touched. ``--no-cold`` skips this.
2. Sampling time (warm-up included) of the quick demo's full fit of traits-month-fixed at the demo's
   sampler settings, same seed and inits under both engines, runs interleaved; median of ``--repeats``.
   The draws are checked to be the same.
3. With ``--demo``: wall time of ``leafcv demo DIR --quick`` under each engine (programs compiled).

Run: CMDSTAN=$(../shared/cmdstan/install.sh) python3 bench/bench_engines.py [--repeats 3] [--no-cold] [--demo]
"""
from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
import uuid
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "src"))

from leafcv.api import load  # noqa: E402
from leafcv.demo import write_demo  # noqa: E402
from leafcv.engines.choice import check_engine, engine_version, make_engine  # noqa: E402
from leafcv.engines.program import program_text  # noqa: E402
from leafcv.fitting import fit_structure  # noqa: E402
from leafcv.inits import fit_leaves  # noqa: E402


def cold_compiles() -> dict[str, float]:
    text = program_text() + f"\n// bench_engines {uuid.uuid4().hex}\n"
    out = {}
    with tempfile.TemporaryDirectory(prefix="leafcv-bench-cmdstan-") as cache:
        os.environ["LEAFCV_CMDSTAN_CACHE"] = cache
        for name in ("pystan", "cmdstan"):
            log = os.path.join(cache, f"{name}-compile.log")
            engine = make_engine(name, log=lambda _: None, compile_log=log)
            for attempt in (1, 2):      # httpstan gives stanc 1 s: on a busy machine the first try can fail
                start = time.perf_counter()
                try:
                    engine.precompile(text)
                except Exception as exc:
                    print(f"  {name} compile attempt {attempt} failed after {time.perf_counter() - start:.0f} s: "
                          f"{str(exc)[:120]}")
                    continue
                out[name] = time.perf_counter() - start
                break
            else:
                out[name] = float("nan")
        del os.environ["LEAFCV_CMDSTAN_CACHE"]
    from httpstan.cache import delete_model_directory
    from httpstan.models import calculate_model_name

    delete_model_directory(calculate_model_name(text))
    return out


def sampling(repeats: int) -> tuple[dict[str, list[float]], bool]:
    folder = Path(tempfile.mkdtemp(prefix="leafcv-bench-engines-"))
    study = load(write_demo(folder, quick=True))
    comparison, dataset = study.comparison, study.dataset
    st = comparison.structure("traits-month-fixed")
    leaf_fits = fit_leaves(dataset)
    engines = {name: make_engine(name, log=lambda _: None) for name in ("pystan", "cmdstan")}
    for engine in engines.values():
        engine.compile(program_text()) if engine.name == "cmdstan" else engine.precompile(program_text())
    times: dict[str, list[float]] = {name: [] for name in engines}
    same = True
    for _ in range(repeats):
        draws = {}
        for name, engine in engines.items():
            fit = fit_structure(st, dataset, comparison.data, comparison.sampler, engine=engine, leaf_fits=leaf_fits)
            times[name].append(fit.draws.sampling_seconds)
            draws[name] = fit.draws
        same &= all(np.array_equal(draws["pystan"].params[k], draws["cmdstan"].params[k])
                    for k in draws["pystan"].params if draws["pystan"].params[k].size)
    print(f"  quick demo, traits-month-fixed, {comparison.sampler.chains} chains x ({comparison.sampler.warmup} "
          f"warm-up + {comparison.sampler.draws} draws), seed {comparison.sampler.seed}")
    return times, same


def demo_wall() -> dict[str, float]:
    out = {}
    for name in ("pystan", "cmdstan"):
        with tempfile.TemporaryDirectory(prefix=f"leafcv-bench-demo-{name}-") as folder:
            env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT / "src"), os.environ.get("PYTHONPATH", "")]))
            start = time.perf_counter()
            subprocess.run([sys.executable, "-m", "leafcv.cli", "demo", folder, "--quick", "--force", "--engine", name,
                            "--progress", "quiet"], check=True, env=env, stdout=subprocess.DEVNULL)
            out[name] = time.perf_counter() - start
    return out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--no-cold", action="store_true")
    ap.add_argument("--demo", action="store_true")
    args = ap.parse_args()
    check_engine("cmdstan")
    print(f"engines: pystan = {engine_version('pystan')}; cmdstan = {engine_version('cmdstan')}; "
          f"{os.cpu_count()} cores")
    print(f"{'':44s}{'pystan':>10s}{'cmdstan':>10s}{'cmdstan/pystan':>16s}")

    def row(label: str, a: float, b: float) -> None:
        print(f"{label:44s}{a:10.1f}{b:10.1f}{b / a:16.2f}")

    if not args.no_cold:
        c = cold_compiles()
        row("cold compile of leafcv's program (s)", c["pystan"], c["cmdstan"])
    times, same = sampling(args.repeats)
    row(f"full fit sampling, median of {args.repeats} (s)", statistics.median(times["pystan"]),
        statistics.median(times["cmdstan"]))
    print(f"  each run (s): pystan {', '.join(f'{t:.1f}' for t in times['pystan'])}; "
          f"cmdstan {', '.join(f'{t:.1f}' for t in times['cmdstan'])}; same draws: {same}")
    if args.demo:
        d = demo_wall()
        row("leafcv demo --quick wall time (s)", d["pystan"], d["cmdstan"])


if __name__ == "__main__":
    main()
