"""The one error type of looptile, with its exit code and position fields.

Library code raises these; only ``cli.py`` turns them into messages and exit
codes (0 done, 1 refused or mismatch, 2 usage/read/parse/write error, 3 internal).
"""
from __future__ import annotations

from dataclasses import dataclass, field

EXIT_REFUSED = 1
EXIT_USAGE = 2
EXIT_INTERNAL = 3


@dataclass
class LooptileError(Exception):
    """A problem tied (when possible) to a position in a source file."""

    message: str
    path: str | None = None
    line: int | None = None
    column: int | None = None
    details: list[str] = field(default_factory=list)
    source_line: str | None = None  # the original line, for a caret display
    kind: str = "error"  # "error" or "refused"
    exit_code: int = EXIT_USAGE

    def __str__(self) -> str:
        return self.headline()

    def headline(self) -> str:
        where = ""
        if self.path is not None:
            where = self.path
            if self.line is not None:
                where += f":{self.line}"
                if self.column is not None:
                    where += f":{self.column}"
            where += ": "
        return f"{where}{self.kind}: {self.message}"

    def render(self) -> str:
        """Headline, then the source line with a caret, then details."""
        out = [self.headline()]
        if self.source_line is not None and self.column is not None:
            text = self.source_line.rstrip("\r\n")
            out.append("    " + text)
            pad = "".join("\t" if ch == "\t" else " " for ch in text[: self.column - 1])
            out.append("    " + pad + "^")
        out.extend("  " + d for d in self.details)
        return "\n".join(out)


class Refusal(LooptileError):
    """A transformation that cannot be proven legal or is outside the model."""

    def __init__(self, message: str, **kw):
        kw.setdefault("kind", "refused")
        kw.setdefault("exit_code", EXIT_REFUSED)
        super().__init__(message, **kw)


class UsageError(LooptileError):
    """The request itself is wrong (bad selector, unknown loop in --order...)."""


class InputError(LooptileError):
    """A file cannot be read, preprocessed or parsed."""


class InternalError(LooptileError):
    """A bug in looptile (for instance an emitted region that does not parse)."""

    def __init__(self, message: str, **kw):
        kw.setdefault("exit_code", EXIT_INTERNAL)
        super().__init__(message, **kw)
