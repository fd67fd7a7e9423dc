"""Applying edits to the original bytes; nothing outside an edit changes."""
from __future__ import annotations

import difflib
import os
import tempfile
from dataclasses import dataclass

from .errors import InputError, InternalError


@dataclass(frozen=True)
class Edit:
    start: int  # byte offsets in the original
    end: int
    new_text: str  # latin-1 text (one character per byte)


def apply_edits(data: bytes, edits: list[Edit]) -> bytes:
    """Original bytes with every edit applied, back to front; edits may not overlap."""
    ordered = sorted(edits, key=lambda e: (e.start, e.end))
    for a, b in zip(ordered, ordered[1:]):
        if b.start < a.end:
            raise InternalError(f"overlapping edits at bytes {a.start}-{a.end} and {b.start}-{b.end}")
    out = data
    for e in reversed(ordered):
        out = out[: e.start] + e.new_text.encode("latin-1") + out[e.end :]
    return out


def unified_diff(path: str, old: bytes, new: bytes) -> str:
    """A unified diff with a/ and b/ prefixes, which `git apply` and `patch -p1` accept.

    Lines keep their own line endings (CRLF stays CRLF) so the patch applies.
    """
    rel = path.lstrip("/")
    a = old.decode("latin-1").splitlines(keepends=True)
    b = new.decode("latin-1").splitlines(keepends=True)
    out = []
    for line in difflib.unified_diff(a, b, f"a/{rel}", f"b/{rel}", lineterm="\n"):
        if not line.endswith("\n"):
            line += "\n\\ No newline at end of file\n"
        out.append(line)
    return "".join(out)


def write_atomic(path: str, data: bytes, mode_from: str | None = None) -> None:
    """Write through a temporary file and a rename; keep the mode of ``mode_from``."""
    directory = os.path.dirname(os.path.abspath(path))
    try:
        mode = os.stat(mode_from or path).st_mode & 0o7777
    except OSError:
        mode = 0o644
    tmp = None
    try:
        fd, tmp = tempfile.mkstemp(dir=directory, prefix=".looptile-", suffix=".tmp")
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        os.chmod(tmp, mode)
        os.replace(tmp, path)
        tmp = None
    except OSError as exc:
        raise InputError(f"cannot write the file; {exc.strerror}", path=path) from exc
    finally:
        if tmp is not None:  # the rename failed: leave nothing behind
            try:
                os.unlink(tmp)
            except OSError:
                pass
