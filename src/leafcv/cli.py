"""Command line: parses arguments, calls the public API (`leafcv.api`, nothing else of leafcv but its
names of engines and methods and its errors) and prints.

Exit codes: 0 success (non-converged fits are flagged in the output), 1 a problem with the user's
data or files, 2 usage, 3 an engine or internal failure, or structures left unfinished by tasks that
failed twice (message plus where the details were saved), 130 stopped by Ctrl-C or SIGTERM.

Tests: tests/test_cli.py, tests/engines/test_choice.py, tests/report/test_report_page.py,
tests/sampling/test_batch.py, tests/sampling/test_no_warnings.py, tests/sampling/test_simulate.py.
"""
from __future__ import annotations

import argparse
import logging
import signal
import sys
import tempfile
import time
import traceback
from pathlib import Path

from .engines.choice import ENGINE_NAMES, EngineUnavailable
from .errors import EngineError, UserInputError
from .spec import CV_METHODS

EXIT_OK, EXIT_USER, EXIT_USAGE, EXIT_ENGINE = 0, 1, 2, 3
#: Stopped by Ctrl-C or SIGTERM (the shell's convention for SIGINT: 128 + 2).
EXIT_INTERRUPTED = 130
ENGINE_HELP = ("the Stan engine: pystan (the default) or cmdstan (CmdStan through cmdstanpy; pip install "
               "\"leafcv[cmdstan]\"); overrides the comparison file's [engine] name")


def _interrupt(signum, frame):
    raise KeyboardInterrupt


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="leafcv", description=__doc__.splitlines()[0])
    sub = p.add_subparsers(dest="command", required=True)
    d = sub.add_parser("demo", help="write the invented demo scenario into DIR and run the main job on it")
    d.add_argument("dir", type=Path)
    d.add_argument("--quick", action="store_true", help="a small version: 16 leaves, the three structures of the season and trait question")
    d.add_argument("--no-run", action="store_true", help="only write the files")
    d.add_argument("--force", action="store_true", help="write into a non-empty DIR")
    d.add_argument("--workers", type=int, metavar="N", help="as for compare")
    d.add_argument("--progress", choices=("bar", "plain", "quiet"), help="as for compare")
    d.add_argument("--engine", choices=ENGINE_NAMES, help=ENGINE_HELP)
    c = sub.add_parser("check", help="validate data and structures, print a summary")
    c.add_argument("file", type=Path)
    f = sub.add_parser("fit", help="fit one structure on all data")
    f.add_argument("file", type=Path)
    f.add_argument("--structure", required=True)
    f.add_argument("--save", type=Path, metavar="FILE.nc", help="also write the fit as an ArviZ data tree (NetCDF)")
    f.add_argument("--engine", choices=ENGINE_NAMES, help=ENGINE_HELP)
    m = sub.add_parser("compare", help="fit every structure and rank them (the main job)")
    m.add_argument("file", type=Path)
    m.add_argument("--out", type=Path)
    m.add_argument("--method", choices=CV_METHODS)
    m.add_argument("--workers", type=int, metavar="N",
                   help="tasks run at once in local worker processes (default: one per core, each sampling "
                        "max(1, cores // N) chains at a time; 1 runs every task in this process)")
    m.add_argument("--scheduler", metavar="ADDRESS",
                   help="send the tasks to the Dask scheduler at ADDRESS (e.g. tcp://host:8786), or 'local' to "
                        "start a Dask LocalCluster of N workers here")
    m.add_argument("--progress", choices=("bar", "plain", "quiet"),
                   help="a progress bar (default on a terminal), plain log lines (default otherwise), or quiet")
    m.add_argument("--engine", choices=ENGINE_NAMES, help=ENGINE_HELP)
    r = sub.add_parser("report", help="rewrite the ranking of a run folder from its results and write report.html")
    r.add_argument("rundir", type=Path)
    r.add_argument("--structure", help="the structure whose estimates are shown (default: the best ranked)")
    r.add_argument("--group", help="the group column the per-leaf differences are coloured by (default: the first)")
    q = sub.add_parser("predict", help="predict Vcmax25, Jmax25, alpha, theta, Rd25 (and A) of new leaves from a run")
    q.add_argument("rundir", type=Path)
    q.add_argument("--structure", required=True, help="the structure whose fit predicts")
    q.add_argument("--leaves", required=True, type=Path, metavar="NEW.csv",
                   help="one row per new leaf: the traits and groups the structure uses (the data file's names)")
    q.add_argument("--at", type=Path, metavar="CONDITIONS.csv",
                   help="also the expected A at these conditions: columns intercellular_co2, photon_flux, "
                        "leaf_temperature (and optionally oxygen)")
    q.add_argument("--out", type=Path, metavar="DIR", help="also write parameters.csv (and assimilation.csv) here")
    s = sub.add_parser("simulate", help="how reliable is the choice: replicate studies drawn from a fitted structure, "
                                        "compared over the same candidates")
    s.add_argument("rundir", type=Path)
    s.add_argument("--structure", help="the generating structure (default: the best ranked)")
    s.add_argument("--replicates", type=int, default=20, metavar="K", help="replicate studies (default 20)")
    s.add_argument("--leaves-per-level", type=int, metavar="N",
                   help="resize the design to N leaves in every level of --level-of (default: the run's own design)")
    s.add_argument("--level-of", metavar="COLUMN", help="the grouping --leaves-per-level counts in (default: the first)")
    s.add_argument("--out", type=Path, metavar="DIR",
                   help="the simulation's folder (default RUNDIR/simulation, which the run's report shows)")
    for flag, what in (("--chains", "chains"), ("--warmup", "warm-up draws"), ("--draws", "draws")):
        s.add_argument(flag, type=int, metavar="N", help=f"{what} per replicate fit (default: the run's)")
    s.add_argument("--workers", type=int, metavar="N", help="as for compare")
    s.add_argument("--scheduler", metavar="ADDRESS", help="as for compare")
    s.add_argument("--progress", choices=("bar", "plain", "quiet"), help="as for compare")
    s.add_argument("--engine", choices=ENGINE_NAMES, help="the Stan engine of the replicates (default: the run's)")
    return p


def cmd_simulate(args) -> int:
    from .api import open_run, simulation_text

    run = open_run(args.rundir)
    tables = run.simulate(args.structure, replicates=args.replicates, leaves_per_level=args.leaves_per_level,
                          level_of=args.level_of, out=args.out, chains=args.chains, warmup=args.warmup,
                          draws=args.draws, workers=args.workers, scheduler=args.scheduler, progress=args.progress,
                          engine=args.engine)
    print(simulation_text(tables))
    return EXIT_OK


def cmd_predict(args) -> int:
    from .api import open_run

    pred = open_run(args.rundir).predict(args.structure, args.leaves, args.at, out=args.out)
    print(f"structure {args.structure!r}: medians and 90 % intervals; 'mean' = the population mean for these "
          f"traits and levels, 'new leaf' = a new leaf's own effects (and new levels) drawn too")
    print(pred.parameters.to_string(index=False, float_format=lambda v: f"{v:.4g}"))
    if pred.assimilation is not None:
        print("\nexpected net assimilation A (umol m-2 s-1) at the given conditions:")
        print(pred.assimilation.to_string(index=False, float_format=lambda v: f"{v:.4g}"))
    for note in pred.notes:
        print(f"note: {note}")
    if args.out:
        print(f"written to {args.out}")
    return EXIT_OK


def cmd_check(args) -> int:
    from .api import load

    study = load(args.file)
    print(f"{args.file}: OK")
    for line in study.data_summary():
        print(line)
    print(study.describe())
    return EXIT_OK


def cmd_fit(args) -> int:
    from .api import load as api_load

    study = api_load(args.file)
    fit = study.fit(args.structure, engine=args.engine, progress=_progress(args.structure))
    sys.stderr.write("\n")
    print(fit.text())
    if args.save:
        fit.save(args.save)
        print(f"fit written to {args.save} (ArviZ data tree, NetCDF)")
    return EXIT_OK


def cmd_compare(args) -> int:
    from .api import load as api_load

    if args.workers is not None and args.workers < 1:
        sys.stderr.write("leafcv compare: --workers must be 1 or more\n")
        return EXIT_USAGE
    if args.progress == "quiet":
        logging.getLogger("leafcv").setLevel(logging.WARNING)
    study = api_load(args.file)
    signal.signal(signal.SIGTERM, _interrupt)      # `kill PID` stops as cleanly as Ctrl-C
    try:
        run = study.run(args.out, method=args.method, workers=args.workers, scheduler=args.scheduler,
                        progress=args.progress, engine=args.engine)
    except KeyboardInterrupt:
        sys.stderr.write("leafcv compare: stopped; finished tasks are kept: run the same command to continue\n")
        return EXIT_INTERRUPTED
    print(f"run folder: {run.folder}")
    return EXIT_OK


def cmd_report(args) -> int:
    from .api import open_run

    run = open_run(args.rundir)
    text = run.rewrite_ranking()
    print(f"{args.rundir}: the run has not finished; its ranking is not rewritten" if text is None else text)
    path = run.write_report(structure=args.structure, group=args.group)
    print(f"report: {path}")
    return EXIT_OK


def cmd_demo(args) -> int:
    from .api import demo

    folder: Path = args.dir
    if folder.exists() and any(folder.iterdir()) and not args.force:
        sys.stderr.write(f"leafcv demo: {folder} is not empty; choose an empty folder or add --force\n")
        return EXIT_USAGE
    path = demo(folder, quick=args.quick)
    print(f"wrote {folder / 'observations.csv'}, {folder / 'truth.csv'} and {path}")
    if args.no_run:
        return EXIT_OK
    return cmd_compare(argparse.Namespace(file=path, out=None, method=None, workers=args.workers, scheduler=None,
                                          progress=args.progress, engine=args.engine))


def _progress(label: str):
    start = time.perf_counter()
    last = [0.0]

    def report(done: int, total: int) -> None:
        now = time.perf_counter()
        if now - last[0] < 1.0 and done < total:
            return
        last[0] = now
        frac = done / total if total else 0.0
        eta = f"ETA {(now - start) * (1 - frac) / frac:5.0f} s" if frac > 0.02 else "ETA ..."
        sys.stderr.write(f"\r{label}: {100 * frac:3.0f}% of iterations, {eta}   ")
        sys.stderr.flush()

    return report


COMMANDS = {"check": cmd_check, "fit": cmd_fit, "compare": cmd_compare, "demo": cmd_demo, "report": cmd_report,
            "predict": cmd_predict, "simulate": cmd_simulate}


def _show_progress() -> None:
    """Print the library's progress messages (logger "leafcv", INFO) on stdout, once."""
    log = logging.getLogger("leafcv")
    if not any(getattr(h, "_leafcv_cli", False) for h in log.handlers):
        handler = logging.StreamHandler(sys.stdout)
        handler.setFormatter(logging.Formatter("%(message)s"))
        handler._leafcv_cli = True
        log.addHandler(handler)
    log.setLevel(logging.INFO)
    log.propagate = False


def main(argv: list[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    _show_progress()
    try:
        return COMMANDS[args.command](args)
    except UserInputError as exc:
        sys.stderr.write(f"leafcv {args.command}: {exc}\n")
        return EXIT_USER
    except EngineUnavailable as exc:       # nothing to save: the message says what to install
        sys.stderr.write(f"leafcv {args.command}: {exc}\n")
        return EXIT_ENGINE
    except EngineError as exc:
        path = _save_details(exc, exc.engine_messages)
        sys.stderr.write(f"leafcv {args.command}: {exc}\n  details saved to {path}\n")
        return EXIT_ENGINE
    except Exception as exc:  # an internal failure: say where the traceback went
        path = _save_details(exc, traceback.format_exc())
        sys.stderr.write(f"leafcv {args.command}: internal error: {exc}\n  details saved to {path}\n")
        return EXIT_ENGINE


def _save_details(exc: BaseException, details: str) -> Path:
    fd, name = tempfile.mkstemp(prefix="leafcv-error-", suffix=".log")
    with open(fd, "w") as fh:
        fh.write(f"{type(exc).__name__}: {exc}\n\n{details}\n")
    return Path(name)


if __name__ == "__main__":
    sys.exit(main())
