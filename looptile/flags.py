"""Preprocessor flags as a compiler takes them, and the JSON compilation database."""
from __future__ import annotations

import json
import os
import shlex
from dataclasses import dataclass

from .errors import InputError

# Flags that take a value, joined (-Idir) or separate (-I dir).
_VALUE_FLAGS = ("-I", "-isystem", "-iquote", "-idirafter", "-D", "-U", "-include", "-imacros")
_PATH_FLAGS = ("-I", "-isystem", "-iquote", "-idirafter", "-include", "-imacros")


@dataclass(frozen=True)
class CompileFlags:
    """What looptile passes to the preprocessor for one file."""

    args: tuple[str, ...] = ()  # preprocessor-relevant flags, in order
    directory: str | None = None  # where the compiler would run (compilation database)

    @property
    def std(self) -> str | None:
        stds = [a[5:] for a in self.args if a.startswith("-std=")]
        return stds[-1] if stds else None

    @property
    def c89(self) -> bool:
        """True for standards where declarations must open a block (no `for (int i...`)."""
        return self.std in ("c89", "c90", "gnu89", "gnu90", "iso9899:1990", "iso9899:199409", "ansi")

    def plus(self, other: CompileFlags) -> CompileFlags:
        return CompileFlags(self.args + other.args, self.directory or other.directory)



def from_options(
    includes: tuple[str, ...] = (),
    isystem: tuple[str, ...] = (),
    defines: tuple[str, ...] = (),
    undefines: tuple[str, ...] = (),
    include_files: tuple[str, ...] = (),
    std: str | None = None,
) -> CompileFlags:
    args: list[str] = []
    args += [f"-I{d}" for d in includes]
    for d in isystem:
        args += ["-isystem", d]
    args += [f"-D{d}" for d in defines]
    args += [f"-U{u}" for u in undefines]
    for f in include_files:
        args += ["-include", f]
    if std:
        args.append(f"-std={std}")
    return CompileFlags(tuple(args))


def select_preprocessor_flags(argv: list[str], directory: str) -> tuple[str, ...]:
    """The flags of a compiler command line that change what the preprocessor sees.

    Relative include paths are made absolute against the command's directory.
    """
    out: list[str] = []
    i = 1  # argv[0] is the compiler
    while i < len(argv):
        a = argv[i]
        flag, value = None, None
        for f in _VALUE_FLAGS:
            if a == f and i + 1 < len(argv):
                flag, value = f, argv[i + 1]
                i += 1
                break
            if a.startswith(f) and len(a) > len(f) and f not in ("-include", "-imacros"):
                flag, value = f, a[len(f):]
                break
        if flag is not None:
            if flag in _PATH_FLAGS and not os.path.isabs(value):
                value = os.path.normpath(os.path.join(directory, value))
            out += [flag + value] if flag in ("-I", "-D", "-U") else [flag, value]
        elif a.startswith("-std=") or a in ("-ansi", "-pthread", "-fopenmp"):
            out.append(a)
        i += 1
    return tuple(out)


def from_compile_db(db: str, source_path: str) -> CompileFlags:
    """Flags of ``source_path`` from compile_commands.json (a file, or a directory holding it)."""
    path = os.path.join(db, "compile_commands.json") if os.path.isdir(db) else db
    try:
        with open(path, encoding="utf-8") as fh:
            entries = json.load(fh)
    except OSError as exc:
        raise InputError(f"cannot read the compilation database; {exc.strerror}", path=path) from exc
    except ValueError as exc:
        raise InputError(f"the compilation database is not valid JSON; {exc}", path=path) from exc
    if not isinstance(entries, list):
        raise InputError("the compilation database must be a JSON array of entries", path=path)
    target = os.path.realpath(source_path)
    for entry in entries:
        if not isinstance(entry, dict) or "file" not in entry:
            continue
        directory = entry.get("directory", os.path.dirname(os.path.abspath(path)))
        file = entry["file"] if os.path.isabs(entry["file"]) else os.path.join(directory, entry["file"])
        if os.path.realpath(file) != target:
            continue
        if "arguments" in entry:
            argv = list(entry["arguments"])
        elif "command" in entry:
            argv = shlex.split(entry["command"])
        else:
            raise InputError("the entry for this file has neither 'arguments' nor 'command'", path=path)
        return CompileFlags(select_preprocessor_flags(argv, directory), directory)
    raise InputError(
        f"the compilation database has no entry for {source_path}; "
        "regenerate it or give the flags on the command line",
        path=path,
    )
