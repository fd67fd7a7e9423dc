"""Shared helpers of the looptile test suite.

- ``cc``: a fixture (and the marker ``cc``) for tests that need a working
  system C compiler.  looptile itself runs the compiler as its preprocessor,
  so nearly every test here needs one; without it they skip with the reason,
  they never pass.
- ``run_cli``: the click command line in-process (``CliRunner``; click 8.2+
  keeps stderr apart from stdout: ``result.stdout_bytes``/``result.stderr``).
- ``run_cli_subprocess``: the same command line as a separate process, for
  work done in a thread pool (``CliRunner`` swaps ``sys.stdout`` and is not
  thread safe).
- ``build``/``run_program``/``compile_and_run``: compile a C file with the
  sanitizers and run it; a non-zero exit or any ``runtime error:`` report
  is a failure.
"""
from __future__ import annotations

import functools
import os
import re
import shlex
import shutil
import subprocess
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path

import pytest
from click.testing import CliRunner

from looptile.cli import main

TESTS = Path(__file__).resolve().parent
REPO = TESTS.parent
SAMPLES = REPO / "samples"
FIXTURES = TESTS / "fixtures"

# The compile-and-run flags of the differential checks: no contraction into
# fused multiply-adds (it could differ between original and rewrite), and
# the sanitizers stop at the first report.
SANITIZE_FLAGS = (
    "-O1",
    "-ffp-contract=off",
    "-fsanitize=address,undefined",
    "-fno-sanitize-recover=undefined",
)
DEFAULT_STD = "gnu11"
# Leak checking needs ptrace in some containers and is not what these tests
# are about; every other sanitizer report fails the run.
RUN_ENV = {"ASAN_OPTIONS": "detect_leaks=0", "UBSAN_OPTIONS": "print_stacktrace=1"}


def cc_command() -> list[str]:
    return shlex.split(os.environ.get("CC", "cc")) or ["cc"]


@functools.cache
def cc_problem() -> str | None:
    """None when the C compiler can build and run a sanitized trivial program, else why not."""
    cc = cc_command()
    if shutil.which(cc[0]) is None:
        return f"no C compiler: '{cc[0]}' (from $CC, default cc) is not on PATH"
    with tempfile.TemporaryDirectory(prefix="looptile-cc-probe-") as tmp:
        src = Path(tmp, "probe.c")
        src.write_text('#include <stdio.h>\nint main(void) { printf("ok\\n"); return 0; }\n')
        exe = Path(tmp, "probe")
        try:
            proc = subprocess.run(cc + [f"-std={DEFAULT_STD}", *SANITIZE_FLAGS, str(src), "-o", str(exe), "-lm"],
                                  capture_output=True, text=True, timeout=120)
        except (OSError, subprocess.TimeoutExpired) as exc:
            return f"the C compiler '{cc[0]}' cannot be run: {exc}"
        if proc.returncode != 0:
            return (f"the C compiler '{' '.join(cc)}' cannot compile a trivial program with "
                    f"{' '.join(SANITIZE_FLAGS)}: {proc.stderr.strip()[:300]}")
        try:
            run = subprocess.run([str(exe)], capture_output=True, text=True, timeout=60,
                                 env={**os.environ, **RUN_ENV})
        except (OSError, subprocess.TimeoutExpired) as exc:
            return f"a sanitized trivial program does not run: {exc}"
        if run.returncode != 0 or run.stdout != "ok\n":
            return f"a sanitized trivial program does not run: exit {run.returncode}, {run.stderr.strip()[:300]}"
    return None


def require_cc() -> list[str]:
    reason = cc_problem()
    if reason:
        pytest.skip(reason)
    return cc_command()


@pytest.fixture
def cc() -> list[str]:
    """The C compiler command; skips the test (with the reason) when none works."""
    return require_cc()


def pytest_collection_modifyitems(config, items):
    # A test that asks for the cc fixture carries the marker too (so `-m "not cc"` deselects it).
    for item in items:
        if "cc" in getattr(item, "fixturenames", ()) and item.get_closest_marker("cc") is None:
            item.add_marker(pytest.mark.cc)


def pytest_runtest_setup(item):
    if item.get_closest_marker("cc") is not None:
        require_cc()


# ---------------------------------------------------------------- the command line

def run_cli(*args, cwd: str | os.PathLike | None = None):
    """``looptile ARGS...`` through click's CliRunner; returns the click Result.

    Exceptions that escape the command are not swallowed (catch_exceptions=False):
    an uncaught exception must fail the test, not look like exit status 1.
    """
    runner = CliRunner()
    old = os.getcwd()
    if cwd is not None:
        os.chdir(cwd)
    try:
        return runner.invoke(main, [str(a) for a in args], catch_exceptions=False)
    finally:
        os.chdir(old)


@dataclass(frozen=True)
class Proc:
    exit_code: int
    stdout_bytes: bytes
    stderr: str


def run_cli_subprocess(*args, cwd: str | os.PathLike | None = None, timeout: int = 300) -> Proc:
    """``looptile ARGS...`` as a child process (the installed package's ``looptile.cli``)."""
    proc = subprocess.run([sys.executable, "-m", "looptile.cli", *[str(a) for a in args]], cwd=cwd,
                          capture_output=True, timeout=timeout)
    return Proc(proc.returncode, proc.stdout, proc.stderr.decode("utf-8", "replace"))


HEADLINE = re.compile(r"^(?P<path>[^\n]*?):(?P<line>\d+):(?P<col>\d+): (?P<kind>error|refused): (?P<msg>.*)$")


def headline(stderr: str) -> re.Match:
    """The first line of a looptile message, parsed as ``file:line:col: kind: message``."""
    first = stderr.split("\n", 1)[0]
    m = HEADLINE.match(first)
    assert m, f"first line of stderr is not 'file:line:col: error|refused: ...': {first!r}\n{stderr}"
    return m


# ---------------------------------------------------------------- compile and run

class ProgramFailed(AssertionError):
    pass


def build(src: str | os.PathLike, exe: str | os.PathLike, extra: tuple[str, ...] | list[str] = (),
          std: str = DEFAULT_STD) -> None:
    """Compile ``src`` with the sanitizer flags; a compiler error fails the test."""
    argv = cc_command() + [f"-std={std}", *SANITIZE_FLAGS, *extra, str(src), "-o", str(exe), "-lm"]
    proc = subprocess.run(argv, capture_output=True, text=True, timeout=300)
    if proc.returncode != 0:
        raise ProgramFailed(f"compilation failed: {shlex.join(argv)}\n{proc.stderr}")


def run_program(exe: str | os.PathLike, env: dict[str, str] | None = None, timeout: int = 120) -> str:
    """stdout of ``exe``; a non-zero exit or a sanitizer ``runtime error:`` fails the test."""
    proc = subprocess.run([str(exe)], capture_output=True, text=True, timeout=timeout,
                          env={**os.environ, **RUN_ENV, **(env or {})})
    if proc.returncode != 0 or "runtime error:" in proc.stderr or "ERROR: AddressSanitizer" in proc.stderr:
        raise ProgramFailed(f"{exe} (env {env}) failed with exit {proc.returncode}:\n{proc.stderr[-3000:]}")
    return proc.stdout


def compile_and_run(src: str | os.PathLike, workdir: str | os.PathLike, extra=(), std: str = DEFAULT_STD,
                    env: dict[str, str] | None = None, name: str | None = None) -> str:
    exe = Path(workdir, (name or Path(src).stem) + ".exe")
    build(src, exe, extra, std)
    return run_program(exe, env)
