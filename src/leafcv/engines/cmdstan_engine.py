"""CmdStan engine through cmdstanpy (chosen with ``--engine cmdstan``).

The program is compiled once per machine per (program text, CmdStan version, compiler flags): the
executable lives in a cache folder named by a hash of the three, under the same kind of lock file as
PyStan's compile, so processes starting cold on one machine compile it once. Sampling matches the PyStan
engine call for call: the same service (NUTS, diagonal metric, adaptation with Stan's default windows),
chain ``k`` (1-based) seeded by (seed, k) as httpstan seeds it, inits given for every parameter, and
draws written with 18 significant digits, so that both engines give the same draws. Each fit's CSV files
go to a temporary folder that is removed once they are read.
"""
from __future__ import annotations

import contextlib
import hashlib
import logging
import os
import shutil
import tempfile
import time
from pathlib import Path
from typing import Any, Callable

import numpy as np

from ..errors import EngineError
from ..spec import SamplerSpec
from .base import SAMPLER_FIELDS, Draws, compile_lock, output_to
from .cmdstan_install import cmdstan_folder, cmdstan_label

#: Compiler flags of leafcv's executables (part of the cache key). Chains run one process each.
CPP_OPTIONS: dict[str, Any] = {}
#: Significant digits of CmdStan's CSV output: enough for every double to be read back exactly.
SIG_FIGS = 18


def cache_root() -> Path:
    """Folder of compiled executables (env LEAFCV_CMDSTAN_CACHE, else ~/.cache/leafcv/cmdstan-models)."""
    env = os.environ.get("LEAFCV_CMDSTAN_CACHE")
    return Path(env) if env else Path.home() / ".cache" / "leafcv" / "cmdstan-models"


@contextlib.contextmanager
def _quiet_cmdstanpy(messages: list[str]):
    """cmdstanpy logs to the terminal itself: keep its records for the fit's messages instead."""
    import cmdstanpy  # noqa: F401  (sets up its logger)

    logger = logging.getLogger("cmdstanpy")

    class Keep(logging.Handler):
        def emit(self, record):
            messages.append(record.getMessage())

    saved = logger.handlers[:], logger.propagate, logger.level
    logger.handlers = [Keep(level=logging.WARNING)]
    logger.propagate = False
    try:
        yield
    finally:
        logger.handlers, logger.propagate, _ = saved


class CmdStanEngine:
    """Engine backed by CmdStan through cmdstanpy.

    ``chains_at_once``: chains of one fit run at the same time (None: all of them). ``compile_log``:
    file that receives the compiler's output (default: ``compile.log`` in the executable's folder).
    """

    name = "cmdstan"

    def __init__(self, log: Callable[[str], None] | None = None, chains_at_once: int | None = None,
                 compile_log: str | None = None):
        self.log = log or logging.getLogger("leafcv").info
        self.chains_at_once = chains_at_once
        self.compile_log = compile_log
        self._models: dict[str, Any] = {}
        self._info: dict[str, dict] = {}

    def __getstate__(self):           # compiled models stay in the process that loaded them
        state = dict(self.__dict__)
        state["_models"], state["_info"] = {}, {}
        if not isinstance(self.log, logging.Logger) and getattr(self.log, "__self__", None) is not None:
            state["log"] = None
        return state

    def __setstate__(self, state):
        self.__dict__.update(state)
        self.log = self.log or logging.getLogger("leafcv").info

    @property
    def version(self) -> str:
        return cmdstan_label()

    def folder_for(self, program: str) -> Path:
        """The cache folder of ``program``'s executable: a hash of program text, CmdStan version and folder
        (an executable links to its CmdStan's libraries) and flags."""
        key = "\n".join([program, cmdstan_label(), cmdstan_folder(), repr(sorted(CPP_OPTIONS.items()))])
        return cache_root() / hashlib.sha256(key.encode()).hexdigest()[:20]

    def is_compiled(self, program: str) -> bool:
        folder = self.folder_for(program)
        return (folder / "leafcv").is_file() and (folder / "leafcv.stan").is_file()

    def compile(self, program: str) -> Any:
        """The model (compiled once per machine; later calls load the cached executable)."""
        if program in self._models:
            return self._models[program]
        import cmdstanpy

        self.precompile(program)
        folder = self.folder_for(program)
        messages: list[str] = []
        with _quiet_cmdstanpy(messages):
            try:
                model = cmdstanpy.CmdStanModel(stan_file=str(folder / "leafcv.stan"), exe_file=str(folder / "leafcv"),
                                               compile=False)
                info = model.src_info()
            except Exception as exc:
                raise EngineError(f"CmdStan could not load the compiled program in {folder}: {exc}",
                                  "\n".join(messages) + str(exc)) from exc
        self._models[program], self._info[program] = model, info
        return model

    def precompile(self, program: str) -> None:
        """Compile ``program`` into the cache unless it is there (under the cache's lock file; the
        compiler's output to the compile log)."""
        import cmdstanpy

        folder = self.folder_for(program)
        root = cache_root()
        root.mkdir(parents=True, exist_ok=True)
        with compile_lock(root / "leafcv-compile.lock"):
            if self.is_compiled(program):
                return
            building = Path(tempfile.mkdtemp(prefix=folder.name + ".", dir=root))
            log_path = self.compile_log or str(building / "compile.log")   # moves with the folder
            try:
                (building / "leafcv.stan").write_text(program)
                self.log(f"compiling the Stan program with CmdStan (once per program version on this machine; "
                         f"a few minutes; compiler output in {self.compile_log or folder / 'compile.log'})...")
                messages: list[str] = []
                Path(log_path).parent.mkdir(parents=True, exist_ok=True)
                with output_to(log_path), _quiet_cmdstanpy(messages):
                    try:
                        cmdstanpy.CmdStanModel(stan_file=str(building / "leafcv.stan"), cpp_options=CPP_OPTIONS,
                                               compile="force")
                    except Exception as exc:
                        raise EngineError(f"CmdStan could not compile the program: {exc} (compiler output in "
                                          f"{log_path})", str(exc)) from exc
                    finally:
                        if messages:
                            print("\n".join(messages))
                building.chmod(0o755)
                shutil.rmtree(folder, ignore_errors=True)
                os.replace(building, folder)       # whole folder at once: never a half-written executable
            finally:
                shutil.rmtree(building, ignore_errors=True)

    def fit(
        self,
        program: str,
        data: dict[str, Any],
        settings: SamplerSpec,
        seed: int,
        inits: list[dict[str, Any]],
        progress: Callable[[int, int], None] | None = None,
    ) -> Draws:
        from cmdstanpy import write_stan_json

        model = self.compile(program)
        if len(inits) != settings.chains:
            raise ValueError(f"{len(inits)} init sets for {settings.chains} chains")
        messages: list[str] = []
        out = tempfile.mkdtemp(prefix="leafcv-cmdstan-")
        start = time.perf_counter()
        try:
            with _quiet_cmdstanpy(messages):
                try:
                    # data and inits written here too (cmdstanpy's own folder empties only at exit)
                    write_stan_json(os.path.join(out, "data.json"), dict(data))
                    init_files = []
                    for k, init in enumerate(inits, start=1):
                        init_files.append(os.path.join(out, f"init-{k}.json"))
                        write_stan_json(init_files[-1], dict(init))
                    fit = model.sample(
                        data=os.path.join(out, "data.json"),
                        chains=settings.chains, chain_ids=list(range(1, settings.chains + 1)),
                        parallel_chains=min(settings.chains, self.chains_at_once or settings.chains),
                        seed=int(seed), inits=init_files,
                        iter_warmup=int(settings.warmup), iter_sampling=int(settings.draws),
                        adapt_delta=float(settings.adapt_delta), max_treedepth=int(settings.max_treedepth),
                        output_dir=out, sig_figs=SIG_FIGS, show_progress=False, force_one_process_per_chain=True)
                except Exception as exc:
                    raise EngineError(f"CmdStan sampling failed: {exc}", "\n".join(messages) + "\n" + str(exc)) from exc
                seconds = time.perf_counter() - start
                messages += _console_messages(fit)
                draws = _to_draws(fit, self._info[program], inits[0], settings, seed, seconds, messages)
        finally:
            shutil.rmtree(out, ignore_errors=True)
        if progress is not None:
            total = settings.chains * (settings.warmup + settings.draws)
            progress(total, total)
        return draws


#: Lines of CmdStan's console output kept as the fit's messages (rejections, exceptions, warnings); the
#: rest is progress and the echo of its arguments.
_KEPT = ("Informational Message", "Exception", "Warning", "Rejecting", "If this warning")


def _console_messages(fit: Any) -> list[str]:
    """Stan's messages from each chain's console output (read before its folder is removed)."""
    kept = []
    for path in getattr(fit.runset, "stdout_files", []):
        try:
            lines = Path(path).read_text(errors="replace").splitlines()
        except OSError:
            continue
        kept += [line.strip() for line in lines if line.strip().startswith(_KEPT)]
    return kept


def _to_draws(fit: Any, info: dict, init: dict[str, Any], settings: SamplerSpec, seed: int, seconds: float,
              messages: list[str]) -> Draws:
    raw = fit.draws()                               # (draws, chains, columns)
    found = fit.metadata.stan_vars
    params: dict[str, np.ndarray] = {}
    n_draws, n_chains = raw.shape[:2]
    for block in ("parameters", "transformed parameters", "generated quantities"):
        for name, decl in (info.get(block) or {}).items():
            if name in found:
                values = np.asarray(found[name].extract_reshape(raw), dtype=float)
                params[name] = np.ascontiguousarray(np.moveaxis(values, 1, 0))
            else:                                   # no CSV columns: a size-0 variable
                shape = np.shape(init[name]) if name in init else (0,) * int(decl.get("dimensions", 1))
                params[name] = np.zeros((n_chains, n_draws) + tuple(shape))
    method = fit.method_variables()
    sampler = {name: np.ascontiguousarray(np.asarray(method[name], dtype=float).T) for name in SAMPLER_FIELDS}
    return Draws(params, sampler, settings, seed, seconds, "cmdstan", tuple(m for m in messages if m))
