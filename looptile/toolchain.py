"""The one place that runs the system C compiler (``CC``, default ``cc``)."""
from __future__ import annotations

import os
import re
import shlex
import subprocess
from dataclasses import dataclass

from .errors import InputError, InternalError
from .flags import CompileFlags

# Flags that make glibc and gcc system headers parseable by pycparser (measured with
# gcc 12 / glibc 2.36 on stdio, stdlib, string, math, stdint, stddef, time, stdbool,
# float, limits, assert, inttypes and complex; see tests/test_frontend.py).  They can
# change the user's own code too, which frontend.py detects and refuses.
PARSEABLE_HEADER_FLAGS: tuple[str, ...] = (
    "-U__GNUC__",
    "-D__attribute__(x)=",
    "-D__extension__=",
    "-D__asm__(x)=",
    "-D__asm(x)=",
    "-D__restrict=restrict",
    "-D__inline=inline",
    "-D__builtin_va_list=int",
)


def _c_locale() -> dict[str, str]:
    """The environment for compiler runs: plain ASCII diagnostics (no typographic quotes)."""
    return dict(os.environ, LC_ALL="C", LANG="C")


def compiler() -> list[str]:
    return shlex.split(os.environ.get("CC", "cc")) or ["cc"]


@dataclass(frozen=True)
class Preprocessed:
    text: str  # latin-1 text of the translation unit, line markers kept
    command: tuple[str, ...]


def _run(argv: list[str], cwd: str | None, path: str, what: str) -> str:
    try:
        proc = subprocess.run(argv, cwd=cwd, capture_output=True, timeout=120, env=_c_locale())
    except FileNotFoundError as exc:
        raise InputError(f"cannot run the C compiler '{argv[0]}'; set CC to a C compiler", path=path) from exc
    except subprocess.TimeoutExpired as exc:
        raise InputError(f"{what} timed out after 120 s", path=path) from exc
    if proc.returncode != 0:
        err = proc.stderr.decode("latin-1").strip().splitlines()
        where = first_error(err, path)
        if where is not None:
            line, col, msg = where
            raise InputError(f"{what} failed: {msg}; fix it or pass the flags the file needs (-I, -D, --compile-db)",
                             path=path, line=line, column=col, details=err[:20])
        raise InputError(
            f"{what} failed; fix the error below or pass the flags the file needs (-I, -D, --compile-db)",
            path=path,
            details=err[:20],
        )
    return proc.stdout.decode("latin-1")


_DIAGNOSTIC = re.compile(r"^(?P<file>.*?):(?P<line>\d+):(?P<col>\d+): (?:fatal )?error: (?P<msg>.*)$")


def first_error(lines: list[str], path: str) -> tuple[int, int, str] | None:
    """Line, column and text of the compiler's first error in ``path`` (from its stderr lines)."""
    target = os.path.realpath(path)
    for line in lines:
        m = _DIAGNOSTIC.match(line)
        if m and (os.path.realpath(m.group("file")) == target or m.group("file") == path):
            return int(m.group("line")), int(m.group("col")), m.group("msg")
    return None


def syntax_error(path: str, flags: CompileFlags) -> tuple[int, int, str] | None:
    """The compiler's own first error in the file (``cc -fsyntax-only``), or None if it accepts it."""
    argv = compiler() + ["-fsyntax-only"] + list(flags.args) + [os.path.abspath(path)]
    try:
        proc = subprocess.run(argv, capture_output=True, cwd=flags.directory, timeout=120, env=_c_locale())
    except (OSError, subprocess.TimeoutExpired):
        return None
    if proc.returncode == 0:
        return None
    return first_error(proc.stderr.decode("latin-1").splitlines(), path)


def preprocess(path: str, flags: CompileFlags, parseable: bool = True) -> Preprocessed:
    """``cc -E`` of the file with the user's flags (and the header flags when ``parseable``)."""
    argv = compiler() + ["-E"] + list(flags.args)
    if parseable:
        argv += list(PARSEABLE_HEADER_FLAGS)
    argv.append(os.path.abspath(path))
    return Preprocessed(_run(argv, flags.directory, path, "preprocessing"), tuple(argv))


def macro_definitions(path: str, flags: CompileFlags) -> dict[str, str]:
    """Macros defined at the end of the file (``cc -E -dM``), name -> body; a function-like
    macro's value starts with "\\0function-like\\0" and then has its parameters and body."""
    argv = compiler() + ["-E", "-dM"] + list(flags.args) + [os.path.abspath(path)]
    out: dict[str, str] = {}
    for line in _run(argv, flags.directory, path, "preprocessing").splitlines():
        if not line.startswith("#define "):
            continue
        rest = line[len("#define "):]
        name, _, body = rest.partition(" ")
        if "(" in name:  # name(params) body: kept behind a marker no integer test accepts
            head, _, tail = rest.partition(")")
            out[name.split("(", 1)[0]] = "\0function-like\0" + head.split("(", 1)[1] + ")" + tail
            continue
        out[name] = body.strip()
    return out


def preprocess_text(data: bytes, path: str, flags: CompileFlags) -> str:
    """``cc -E`` of rewritten file contents (read from stdin; includes resolve as for ``path``).

    Line markers name the file ``<stdin>``."""
    directory = os.path.dirname(os.path.abspath(path))
    argv = compiler() + ["-E", f"-I{directory}"] + list(flags.args) + list(PARSEABLE_HEADER_FLAGS) + ["-x", "c", "-"]
    try:
        proc = subprocess.run(argv, input=data, capture_output=True, cwd=flags.directory, timeout=120,
                              env=_c_locale())
    except (OSError, subprocess.TimeoutExpired) as exc:
        raise InputError(f"cannot preprocess the rewritten file ({exc})", path=path) from exc
    if proc.returncode != 0:
        raise InternalError("the rewritten file does not preprocess; this is a looptile bug, please report it",
                            path=path, details=proc.stderr.decode("latin-1").splitlines()[:10])
    return proc.stdout.decode("latin-1")


# Checking builds: contraction off (it could differ between two versions), sanitizers on and
# fatal.  Appended after the user's CFLAGS so that nothing there can switch them off.
CHECK_FLAGS: tuple[str, ...] = ("-O1", "-ffp-contract=off", "-fsanitize=address,undefined",
                                "-fno-sanitize-recover=undefined")


@dataclass(frozen=True)
class Build:
    ok: bool
    exe: str
    messages: str


@dataclass(frozen=True)
class Run:
    returncode: int | None  # None: timed out
    stdout: bytes
    stderr: str

    @property
    def sanitizer_report(self) -> str | None:
        for line in self.stderr.splitlines():
            if "runtime error:" in line or "AddressSanitizer" in line or "LeakSanitizer" in line:
                return line.strip()
        return None


def build(source: str, exe: str, flags: CompileFlags, include_dir: str) -> Build:
    """Compile a harness with the user's CFLAGS and flags, then the checking flags."""
    argv = compiler() + shlex.split(os.environ.get("CFLAGS", "")) + list(flags.args) + \
        [f"-I{include_dir}", source, "-o", exe] + list(CHECK_FLAGS) + ["-lm"]
    return _compile(argv, exe, flags)


def _compile(argv: list[str], exe: str, flags: CompileFlags, timeout: float = 300) -> Build:
    try:
        proc = subprocess.run(argv, capture_output=True, cwd=flags.directory, timeout=max(timeout, 1),
                              env=_c_locale())
    except FileNotFoundError:
        return Build(False, exe, f"cannot run the C compiler '{argv[0]}'; set CC to a C compiler")
    except subprocess.TimeoutExpired:
        return Build(False, exe, f"the compiler timed out after {timeout:.0f} s")
    return Build(proc.returncode == 0, exe, proc.stderr.decode("latin-1"))


def build_fast(source: str, exe: str, flags: CompileFlags, include_dir: str,
               opt: tuple[str, ...] = ("-O2",)) -> Build:
    """Compile a generated program for speed (no sanitizers): the user's flags, then ``opt``."""
    argv = compiler() + list(flags.args) + [f"-I{include_dir}", source, "-o", exe] + list(opt) + ["-lm"]
    return _compile(argv, exe, flags)


def run(exe: str, args: list[str], timeout: float | None, extra_env: dict[str, str] | None = None,
        stderr_to_terminal: bool = False) -> Run:
    env = dict(os.environ, **(extra_env or {}))
    env.setdefault("ASAN_OPTIONS", "detect_leaks=0")  # needs ptrace, which containers often forbid
    env.setdefault("UBSAN_OPTIONS", "print_stacktrace=0")
    try:
        proc = subprocess.run([exe] + args, stdout=subprocess.PIPE, stderr=None if stderr_to_terminal else
                              subprocess.PIPE, timeout=timeout, env=env)
    except subprocess.TimeoutExpired as exc:
        return Run(None, exc.stdout or b"", (exc.stderr or b"").decode("latin-1"))
    return Run(proc.returncode, proc.stdout, (proc.stderr or b"").decode("latin-1"))


# Timing builds (tune): the user's CFLAGS, or these when CFLAGS is not set.
DEFAULT_TUNE_CFLAGS: tuple[str, ...] = ("-O3", "-march=native")


def tune_cflags() -> list[str]:
    """CFLAGS from the environment, or DEFAULT_TUNE_CFLAGS when it is unset or empty."""
    return shlex.split(os.environ.get("CFLAGS", "")) or list(DEFAULT_TUNE_CFLAGS)


def build_timed(sources: list[str], exe: str, flags: CompileFlags, include_dir: str, cflags: list[str],
                timeout: float = 300) -> Build:
    """Compile a timing driver with ``cflags`` (no checking flags: it is timed, not checked)."""
    argv = compiler() + list(cflags) + list(flags.args) + [f"-I{include_dir}"] + sources + ["-o", exe, "-lm"]
    return _compile(argv, exe, flags, timeout)
