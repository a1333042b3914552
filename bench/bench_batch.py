"""How a `leafcv compare` batch grows with leaves, how well it uses the machine, and a projection.

Everything below is measured in this one run, side by side; timings vary with machine load (other
jobs on the machine slow every run and lower the utilisation), so compare numbers from the same run.

1. Growth with leaves. For each size in --leaves: a simulated demo of that many leaves, cut to the one
   structure "traits-month-fixed", run as `leafcv compare FILE --out RUN --workers 1 --progress quiet`
   in a subprocess. While it runs, the process tree is polled every 0.2 s (psutil): peak RSS of the
   leafcv process itself (also its kernel high-water mark, VmHWM, which no poll can miss) and peak of
   the summed RSS of all its descendants (the chain processes; forked processes share pages, which RSS
   counts once per process), and CPU seconds of the whole tree (each pid's last seen user + system time,
   summed at the end; a process that lives less than one poll is missed). Per task kind ("full" fit,
   "score" of a block of 16 leaves, "refit" without one leaf): count and summed wall seconds, from the
   run's journal (tasks/journal.jsonl, "done" events). "other" is wall minus the summed task seconds
   (start-up, per-leaf initial values, writing results; with --workers 1 tasks run one after another).
2. Batch utilisation over the quick demo (16 leaves, 3 structures), with the default workers and with
   --workers 1, each from an empty run folder: wall, CPU seconds of the tree, and utilisation =
   CPU / (wall x cores), cores = len(os.sched_getaffinity(0)). --skip-utilisation skips it.
3. A projection (not a measurement) of a 200-leaf, 17-structure comparison on 2, 16 and 64 cores,
   computed from the per-task times of part 1 as explained where it is printed.

Run: python3 bench/bench_batch.py [--leaves 16 32 64 128] [--warmup 500] [--draws 1000]
                                  [--skip-utilisation] [--keep DIR]
"""
from __future__ import annotations

import argparse
import json
import math
import os
import re
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

import psutil

from leafcv.demo import write_demo

STRUCTURE = "traits-month-fixed"
POLL = 0.2
SCORE_BLOCK = 16          # leaves per score task (leafcv.cv.tasks.SCORE_BLOCK)
SPOT_CHECKS = 3           # refits of unflagged leaves per structure (method auto)
PROJECT_LEAVES, PROJECT_STRUCTURES, PROJECT_CORES = 200, 17, (2, 16, 64)
MB = 1024 ** 2


# ----------------------------------------------------------------------------------------------
# comparison files

def one_structure(text: str, name: str) -> str:
    """The comparison text cut to its header (up to the first [[structure]]) and the block of ``name``."""
    header, *blocks = text.split("[[structure]]")
    keep = [b for b in blocks if re.search(rf'^name\s*=\s*"{re.escape(name)}"\s*$', b, re.M)]
    if len(keep) != 1:
        sys.exit(f"bench_batch: structure {name!r} not found once in the demo comparison file")
    return header + "[[structure]]" + keep[0].rstrip() + "\n"


def set_sampler(text: str, warmup: int | None, draws: int | None) -> str:
    for key, value in (("warmup", warmup), ("draws", draws)):
        if value is not None:
            text, n = re.subn(rf"^{key} = .*$", f"{key} = {value}", text, count=1, flags=re.M)
            if n != 1:
                sys.exit(f"bench_batch: no '{key} = ' line in the comparison file")
    return text


def sampler_of(text: str) -> dict:
    return {k: int(re.search(rf"^{k} = (\d+)", text, re.M).group(1)) for k in ("chains", "warmup", "draws")}


# ----------------------------------------------------------------------------------------------
# one monitored run

def _hwm(pid: int) -> int:
    """The kernel's peak RSS (VmHWM) of ``pid`` in bytes, 0 when unreadable."""
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return 0


def run_compare(toml: Path, out: Path, workers: int | None) -> dict:
    """Run `leafcv compare` in a subprocess, polling its process tree; return what was measured."""
    cmd = [sys.executable, "-m", "leafcv.cli", "compare", str(toml), "--out", str(out), "--progress", "quiet"]
    if workers is not None:
        cmd += ["--workers", str(workers)]
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    out.parent.mkdir(parents=True, exist_ok=True)
    log_out, log_err = out.parent / f"{out.name}.stdout.log", out.parent / f"{out.name}.stderr.log"
    with open(log_out, "w") as fo, open(log_err, "w") as fe:     # files, not pipes: a full pipe would block it
        proc = subprocess.Popen(cmd, stdout=fo, stderr=fe)
    root = psutil.Process(proc.pid)
    cpu: dict[tuple[int, float], float] = {}     # (pid, create time) -> last seen user + system seconds
    peak_self = peak_children = hwm = 0
    n_children = 0
    seen: set[tuple[int, float]] = set()

    def sample(p: psutil.Process) -> int:
        try:
            with p.oneshot():
                key = (p.pid, p.create_time())
                t = p.cpu_times()
                cpu[key] = t.user + t.system
                seen.add(key)
                return p.memory_info().rss
        except (psutil.NoSuchProcess, psutil.ZombieProcess, psutil.AccessDenied):
            return 0

    while proc.poll() is None:
        peak_self = max(peak_self, sample(root))
        hwm = max(hwm, _hwm(proc.pid))
        try:
            kids = root.children(recursive=True)
        except (psutil.NoSuchProcess, psutil.ZombieProcess):
            kids = []
        n_children = max(n_children, len(kids))
        peak_children = max(peak_children, sum(sample(k) for k in kids))
        time.sleep(POLL)
    proc.wait()
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    reaped = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return {"wall": wall, "cpu": sum(cpu.values()), "cpu_reaped": reaped, "rc": proc.returncode,
            "peak_self": max(peak_self, hwm), "peak_self_polled": peak_self, "hwm": hwm, "peak_children": peak_children,
            "max_children": n_children, "pids": len(seen), "stderr": log_err.read_text()}


def journal_tasks(out: Path) -> dict:
    """Per kind: the done tasks' wall seconds; fit tasks also their chains (from the task records)."""
    by_kind: dict[str, list[dict]] = defaultdict(list)
    failed = 0
    path = out / "tasks" / "journal.jsonl"
    for line in path.read_text().splitlines() if path.exists() else []:
        try:
            e = json.loads(line)
        except ValueError:
            continue
        if e.get("event") == "failed":
            failed += 1
        if e.get("event") != "done":
            continue
        rec_path = out / "tasks" / f"{e['key']}.json"
        chains = None
        if rec_path.exists():
            fits = json.loads(rec_path.read_text()).get("fits") or []
            chains = max((int(f.get("chains", 0)) for f in fits), default=None) or None
        by_kind[e["kind"]].append({"seconds": float(e.get("seconds") or 0.0), "chains": chains,
                                   "structure": e.get("structure")})
    return {"kinds": dict(by_kind), "failed": failed}


def check(r: dict, what: str) -> None:
    if r["rc"] != 0:
        sys.stderr.write(f"bench_batch: {what}: leafcv compare exited with {r['rc']}\n{r['stderr'][-3000:]}\n")
        sys.exit(1)


def hmm(seconds: float) -> str:
    m = int(round(seconds / 60))
    return f"{m // 60}:{m % 60:02d}"


def mean(xs) -> float:
    xs = list(xs)
    return sum(xs) / len(xs) if xs else float("nan")


# ----------------------------------------------------------------------------------------------

def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--leaves", type=int, nargs="+", default=[16, 32, 64, 128])
    ap.add_argument("--warmup", type=int, help="warm-up iterations per chain (default: the demo file's)")
    ap.add_argument("--draws", type=int, help="draws per chain (default: the demo file's)")
    ap.add_argument("--skip-utilisation", action="store_true", help="skip part 2 (the quick demo batch, twice)")
    ap.add_argument("--keep", type=Path, metavar="DIR", help="write the runs here (default: a temporary folder)")
    args = ap.parse_args()
    sizes = sorted(set(args.leaves))
    if sizes[0] < 1:
        sys.exit("bench_batch: --leaves must be 1 or more")
    root = args.keep or Path(tempfile.mkdtemp(prefix="leafcv-bench-batch-"))
    root.mkdir(parents=True, exist_ok=True)
    cores = len(os.sched_getaffinity(0))
    print(f"machine: {cores} cores (sched_getaffinity), {psutil.virtual_memory().total / 1024 ** 3:.1f} GB RAM; "
          f"load average at start {', '.join(f'{x:.2f}' for x in os.getloadavg())}; runs in {root}")

    # ---- 1. growth with leaves -------------------------------------------------------------
    rows = []
    for k in sizes:
        folder = root / f"leaves-{k}"
        text = write_demo(folder, quick=True, n_leaves=k).read_text()
        text = set_sampler(one_structure(text, STRUCTURE), args.warmup, args.draws)
        toml = folder / "one.toml"
        toml.write_text(text)
        r = run_compare(toml, folder / "run", workers=1)
        check(r, f"{k} leaves")
        r.update(journal_tasks(folder / "run"), leaves=k, sampler=sampler_of(text))
        rows.append(r)
        print(f"  ran {k} leaves: {r['wall']:.1f} s", flush=True)

    s = rows[0]["sampler"]
    print(f"\n1. Growth with leaves: structure {STRUCTURE!r} alone, --workers 1 (tasks in the leafcv process, "
          f"chains in its child processes); {s['chains']} chains x ({s['warmup']} warm-up + {s['draws']} draws)")
    head = (f"{'leaves':>6} {'wall s':>8} {'s/leaf':>7} {'leafcv MB':>9} {'VmHWM MB':>8} {'chains MB':>9} "
            f"{'CPU s':>8} {'full n/s':>10} {'score n/s':>10} {'refit n/s':>11} {'other s':>8} {'refits':>6}")
    print(head)
    print("-" * len(head))
    for r in rows:
        kinds = r["kinds"]

        def cell(kind: str, width: int) -> str:
            ts = kinds.get(kind, [])
            return f"{len(ts)}/{sum(t['seconds'] for t in ts):.1f}".rjust(width)

        task_s = sum(t["seconds"] for ts in kinds.values() for t in ts)
        print(f"{r['leaves']:>6} {r['wall']:>8.1f} {r['wall'] / r['leaves']:>7.2f} {r['peak_self_polled'] / MB:>9.0f} "
              f"{r['hwm'] / MB:>8.0f} "
              f"{r['peak_children'] / MB:>9.0f} {r['cpu']:>8.1f} {cell('full', 10)} {cell('score', 10)} "
              f"{cell('refit', 11)} {r['wall'] - task_s:>8.1f} {len(kinds.get('refit', [])):>6}")
    print("  leafcv MB: peak RSS of the leafcv process over the 0.2 s polls; VmHWM MB: the kernel's record of "
          "its peak RSS (read while it ran); chains MB: peak of "
          "the summed RSS of its descendants (shared pages counted in each); n/s: tasks done / their summed "
          "wall seconds (journal); other: wall minus task seconds")
    fails = sum(r["failed"] for r in rows)
    if fails:
        print(f"  failed task attempts (journal 'failed' events): {fails}")
    for r in rows:
        if abs(r["cpu"] - r["cpu_reaped"]) > 0.1 * max(r["cpu"], 1.0):
            print(f"  note ({r['leaves']} leaves): polled CPU {r['cpu']:.1f} s vs CPU of reaped children "
                  f"(getrusage) {r['cpu_reaped']:.1f} s")
    first, last = rows[0], rows[-1]
    if len(rows) > 1:
        print(f"wall {last['leaves']} / {first['leaves']} leaves: {last['wall'] / first['wall']:.2f} "
              f"against a leaves ratio of {last['leaves'] / first['leaves']:.2f} (linear growth: equal)")
    mem = last["peak_self"] / MB
    print(f"leafcv process at {last['leaves']} leaves: peak RSS {mem:.0f} MB (larger of polls and VmHWM), "
          f"{'under' if mem < 1024 else 'NOT under'} 1 GB")

    # ---- 2. utilisation --------------------------------------------------------------------
    if not args.skip_utilisation:
        folder = root / "quick"
        toml = write_demo(folder, quick=True)
        text = set_sampler(toml.read_text(), args.warmup, args.draws)
        toml.write_text(text)
        s2 = sampler_of(text)
        n_struct = text.count("[[structure]]")
        runs = []
        for label, workers in (("default workers", None), ("--workers 1", 1)):
            out = folder / ("run-default" if workers is None else "run-1")
            r = run_compare(toml, out, workers)
            check(r, label)
            r.update(journal_tasks(out))
            runs.append((label, r))
            print(f"  ran quick demo, {label}: {r['wall']:.1f} s", flush=True)
        print(f"\n2. Batch utilisation: quick demo ({n_struct} structures, 16 leaves), {s2['chains']} chains x "
              f"({s2['warmup']} + {s2['draws']}), each run from an empty folder; cores = {cores}")
        head = f"{'run':<16} {'wall s':>8} {'CPU s':>8} {'CPU s (rusage)':>14} {'utilisation':>11} {'tasks':>6} {'procs':>6}"
        print(head)
        print("-" * len(head))
        for label, r in runs:
            n = sum(len(v) for v in r["kinds"].values())
            print(f"{label:<16} {r['wall']:>8.1f} {r['cpu']:>8.1f} {r['cpu_reaped']:>14.1f} "
                  f"{r['cpu'] / (r['wall'] * cores):>11.2f} {n:>6} {r['pids']:>6}")
        print("  utilisation = CPU s / (wall s x cores), CPU from the 0.2 s polls; CPU s (rusage): user + system "
              "of every descendant that was waited for (a cross-check); procs: distinct processes seen")
        if runs[0][1]["wall"] > 0:
            print(f"  wall --workers 1 / default workers: {runs[1][1]['wall'] / runs[0][1]['wall']:.2f}")

    # ---- 3. projection ---------------------------------------------------------------------
    print(f"\n3. PROJECTION (computed, not measured) of a {PROJECT_LEAVES}-leaf, {PROJECT_STRUCTURES}-structure "
          f"comparison, from the per-task wall times of part 1:")

    def per_size(r, kind):
        ts = r["kinds"].get(kind, [])
        return mean(t["seconds"] for t in ts) if ts else float("nan")

    def at_target(kind: str) -> tuple[float, str]:
        pts = [(r["leaves"], per_size(r, kind)) for r in rows if not math.isnan(per_size(r, kind))]
        if not pts:
            return float("nan"), "not measured"
        if len(pts) == 1:
            (k1, y1), = pts
            return y1 * PROJECT_LEAVES / k1, f"{y1:.1f} s at {k1} leaves, scaled in proportion to leaves (one size only)"
        (k1, y1), (k2, y2) = pts[-2], pts[-1]
        slope = (y2 - y1) / (k2 - k1)
        y = y2 + slope * (PROJECT_LEAVES - k2)
        how = f"line through {y1:.1f} s at {k1} and {y2:.1f} s at {k2} leaves"
        if y < y2:
            y, how = y2, how + f" falls with leaves (noise): the {k2}-leaf time kept"
        return y, how

    full_s, full_how = at_target("full")
    refit_s, refit_how = at_target("refit")
    score_ts = last["kinds"].get("score", [])
    score_block = sum(t["seconds"] for t in score_ts) / last["leaves"] * SCORE_BLOCK if score_ts else float("nan")
    chains = max((t["chains"] or 0 for r in rows for kind in ("full", "refit") for t in r["kinds"].get(kind, [])),
                 default=0) or last["sampler"]["chains"]
    used = min(chains, cores)
    n_refit_last = len(last["kinds"].get("refit", []))
    flagged_frac = max(0, n_refit_last - SPOT_CHECKS) / last["leaves"]
    n_blocks = math.ceil(PROJECT_LEAVES / SCORE_BLOCK)
    n_refits = SPOT_CHECKS + flagged_frac * PROJECT_LEAVES
    core_full, core_refit = full_s * used, refit_s * used
    per_structure = core_full + n_blocks * score_block + n_refits * core_refit
    total = PROJECT_STRUCTURES * per_structure
    critical = core_full / chains + score_block + core_refit / chains
    print(f"  full fit at {PROJECT_LEAVES} leaves: {full_s:.1f} s wall ({full_how})")
    print(f"  refit at {PROJECT_LEAVES} leaves: {refit_s:.1f} s wall ({refit_how})")
    print(f"  score block of {SCORE_BLOCK} leaves: {score_block:.1f} s (score seconds per leaf at {last['leaves']} "
          f"leaves x {SCORE_BLOCK}; single-threaded)")
    print(f"  core-seconds: fit tasks ran {chains} chains on {cores} cores, so a fit's core-seconds = wall x "
          f"min(chains, cores) = wall x {used}; a score block's = its wall")
    print(f"  per structure: 1 full fit + {n_blocks} score blocks + {n_refits:.1f} refits ({SPOT_CHECKS} spot "
          f"checks + {flagged_frac:.3f} flagged per leaf x {PROJECT_LEAVES}; measured at {last['leaves']} leaves: "
          f"{n_refit_last} refits) = {per_structure / 3600:.2f} core-hours; "
          f"x {PROJECT_STRUCTURES} structures = {total / 3600:.1f} core-hours")
    print(f"  critical path of one structure: full fit with its {chains} chains in parallel ({core_full / chains:.0f} s)"
          f" + one score block ({score_block:.0f} s) + one refit ({core_refit / chains:.0f} s) = {critical:.0f} s")
    print("  projected wall on P cores = max(total core-seconds / P, critical path); assumes perfect packing of "
          "tasks, no start-up or scheduling cost, and the per-core speed of this run")
    print(f"{'cores P':>8} {'projected wall (h:mm)':>22}")
    for p in PROJECT_CORES:
        w = max(total / p, critical)
        print(f"{p:>8} {hmm(w):>22}" + ("  (critical path)" if critical >= total / p else ""))
    print(f"\nload average at end {', '.join(f'{x:.2f}' for x in os.getloadavg())} (other jobs share the cores)")
    if not args.keep:
        shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main()
