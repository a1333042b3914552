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
