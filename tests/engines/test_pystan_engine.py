"""The PyStan engine's compile step (leafcv.engines.pystan_engine), without compiling: processes that
start cold on one machine compile once, under a lock, and the compiler's output (written by child
processes straight to the file descriptors) lands in the compile log, never on the terminal."""
from __future__ import annotations

import os
import threading
import time

import pytest


def fake_build(monkeypatch, tmp_path):
    """stan.build replaced by a slow 'compiler' that writes to file descriptor 2 as g++ does, and
    httpstan's cache moved to a temporary folder (called in the test itself: the suite's guard against
    sampling outside tests/sampling/ replaces stan.build around each phase of a test)."""
    import httpstan.cache
    import stan

    from leafcv.engines.pystan_engine import PyStanEngine

    compiled: set[str] = set()
    builds: list[str] = []

    def build(program, data=None, random_seed=None):
        builds.append(program)
        os.write(2, b"warning: a C++ compiler note\n")
        time.sleep(0.3)
        compiled.add(program)
        raise RuntimeError("the program needs data")     # what stan.build says when given none

    monkeypatch.setattr(stan, "build", build)
    monkeypatch.setattr(httpstan.cache, "cache_directory", lambda: tmp_path / "cache")
    monkeypatch.setattr(PyStanEngine, "is_compiled", lambda self, program: program in compiled)
    return builds


def test_engines_starting_cold_together_compile_once(monkeypatch, tmp_path, capfd):
    from leafcv.engines.pystan_engine import PyStanEngine

    builds = fake_build(monkeypatch, tmp_path)
    log = tmp_path / "compile.log"
    messages: list[str] = []
    engines = [PyStanEngine(log=messages.append, compile_log=str(log)) for _ in range(3)]
    threads = [threading.Thread(target=e.precompile, args=("program text",)) for e in engines]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert builds == ["program text"]
    assert len([m for m in messages if m.startswith("compiling the Stan program")]) == 1
    assert "a C++ compiler note" in log.read_text()
    err = capfd.readouterr().err
    assert "a C++ compiler note" not in err


def test_a_program_that_does_not_compile_names_the_log(monkeypatch, tmp_path):
    import httpstan.cache
    import stan

    from leafcv.engines.pystan_engine import PyStanEngine
    from leafcv.errors import EngineError

    def build(program, data=None, random_seed=None):
        os.write(2, b"error: expected ';'\n")
        raise RuntimeError("compilation failed")

    monkeypatch.setattr(stan, "build", build)
    monkeypatch.setattr(httpstan.cache, "cache_directory", lambda: tmp_path / "cache")
    monkeypatch.setattr(PyStanEngine, "is_compiled", lambda self, program: False)
    log = tmp_path / "compile.log"
    with pytest.raises(EngineError) as err:
        PyStanEngine(log=lambda m: None, compile_log=str(log)).precompile("broken program")
    assert str(log) in str(err.value) and "expected ';'" in log.read_text()


def _flaky_build(monkeypatch, tmp_path, first_error):
    """stan.build failing once with ``first_error``, then compiling (as httpstan does after a stanc
    timeout on a busy machine)."""
    import httpstan.cache
    import stan

    from leafcv.engines.pystan_engine import PyStanEngine

    compiled: set[str] = set()
    builds: list[str] = []

    def build(program, data=None, random_seed=None):
        builds.append(program)
        if len(builds) == 1:
            raise first_error
        compiled.add(program)
        raise RuntimeError("the program needs data")

    monkeypatch.setattr(stan, "build", build)
    monkeypatch.setattr(httpstan.cache, "cache_directory", lambda: tmp_path / "cache")
    monkeypatch.setattr(PyStanEngine, "is_compiled", lambda self, program: program in compiled)
    return builds


def test_a_quick_compiler_failure_is_tried_again(monkeypatch, tmp_path):
    # httpstan 4.13 gives stanc 1 s (httpstan/compile.py: subprocess.run(..., timeout=1)); the timeout
    # reaches stan.build as a RuntimeError
    from leafcv.engines.pystan_engine import PyStanEngine

    builds = _flaky_build(monkeypatch, tmp_path, RuntimeError("Command '['stanc']' timed out after 1 seconds"))
    messages: list[str] = []
    PyStanEngine(log=messages.append, compile_log=str(tmp_path / "c.log")).precompile("program text")
    assert builds == ["program text", "program text"]
    assert any("trying again (2 of 3)" in m and "timed out" in m for m in messages)


def test_a_syntax_error_is_not_tried_again(monkeypatch, tmp_path):
    from leafcv.engines.pystan_engine import PyStanEngine
    from leafcv.errors import EngineError

    builds = _flaky_build(monkeypatch, tmp_path, ValueError("Syntax error"))
    with pytest.raises(EngineError, match="Syntax error"):
        PyStanEngine(log=lambda m: None, compile_log=str(tmp_path / "c.log")).precompile("program text")
    assert builds == ["program text"]
