"""Local worker processes (leafcv.batch.executors) started without running the caller's script again."""
from __future__ import annotations


def test_workers_do_not_run_the_callers_script_again(tmp_path):
    # A spawned worker imports the parent's main script by path (Python docs, multiprocessing, "Safe importing
    # of main module"); a script without a __main__ guard would run again in every worker. Local workers
    # started by leafcv do not: the script below counts its own runs.
    import subprocess
    import sys
    from pathlib import Path

    root = Path(__file__).resolve().parents[2]
    runs = tmp_path / "runs.txt"
    script = tmp_path / "unguarded.py"
    script.write_text(
        "import concurrent.futures as cf, multiprocessing as mp, os\n"
        f"open({str(runs)!r}, 'a').write('run\\n')\n"
        "from leafcv.batch.executors import _main_not_rerun\n"
        "pool = cf.ProcessPoolExecutor(max_workers=2, mp_context=mp.get_context('spawn'))\n"
        "with _main_not_rerun():\n"
        "    futures = [pool.submit(os.getpid) for _ in range(4)]\n"
        "print(len({f.result() for f in futures}) >= 1)\n"
        "pool.shutdown()\n")
    env = {"PYTHONPATH": str(root / "src"), "PATH": "/usr/bin:/bin"}
    done = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, env=env, timeout=120)
    assert done.returncode == 0, done.stderr
    assert runs.read_text() == "run\n"


def _start_a_child_that_never_ends() -> tuple[int, int]:
    """Run in a pool worker: start a non-daemon process that sleeps for 10 minutes (as httpstan's chain pool
    stays up) and return (worker pid, its child's pid)."""
    import multiprocessing as mp
    import os
    import time

    child = mp.get_context("spawn").Process(target=time.sleep, args=(600,))
    child.start()
    return os.getpid(), child.pid


def test_stop_pool_ends_the_workers_and_the_processes_below_them():
    # A non-daemon child keeps its parent from exiting (Python docs, multiprocessing: "the parent process
    # ... will attempt to join all its non-daemonic children"), so a pool whose workers have such
    # children never finishes an ordinary shutdown. stop_pool ends them all.
    import concurrent.futures as cf
    import multiprocessing as mp
    import time

    import psutil

    from leafcv.batch.executors import stop_pool

    pool = cf.ProcessPoolExecutor(max_workers=1, mp_context=mp.get_context("spawn"))
    worker, child = pool.submit(_start_a_child_that_never_ends).result(timeout=120)
    assert psutil.pid_exists(worker) and psutil.pid_exists(child)
    start = time.monotonic()
    stop_pool(pool)
    while time.monotonic() - start < 20 and any(_alive(p) for p in (worker, child)):
        time.sleep(0.1)
    assert not _alive(worker) and not _alive(child)


def _alive(pid: int) -> bool:
    import psutil

    try:
        return psutil.Process(pid).status() != psutil.STATUS_ZOMBIE
    except psutil.NoSuchProcess:
        return False
