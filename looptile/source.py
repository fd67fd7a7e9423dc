"""Reading a C file as bytes and scanning its original text.

The original file is decoded as latin-1 so that characters equal bytes: every
offset here is a byte offset, every column a 1-based byte column.  The scanner
is a small C tokenizer that knows comments, string and character literals and
preprocessor lines; it is used to find loop headers and the exact end of a
loop nest in the original text (the analysis itself runs on the preprocessed
translation unit, see ``frontend.py``).
"""
from __future__ import annotations

import bisect
import re
from dataclasses import dataclass, field
from pathlib import Path

from .errors import InputError


@dataclass(frozen=True)
class Token:
    kind: str  # "id", "num", "str", "char", "punct", "comment", "pp"
    text: str
    start: int  # byte offset in the original file
    end: int


@dataclass
class SourceFile:
    path: str
    data: bytes
    text: str = field(init=False)  # latin-1 view: one character per byte
    newline: str = field(init=False)
    indent_unit: str = field(init=False)
    line_starts: list[int] = field(init=False)

    def __post_init__(self) -> None:
        self.text = self.data.decode("latin-1")
        self.newline = "\r\n" if "\r\n" in self.text else "\n"
        # A lone CR ends a line too, as it does for the C compiler.
        self.line_starts = [0] + [m.end() for m in re.finditer("\r\n|\r|\n", self.text)]
        self.indent_unit = _guess_indent_unit(self.text)

    def line_col(self, offset: int) -> tuple[int, int]:
        """1-based line and byte column of a byte offset."""
        idx = bisect.bisect_right(self.line_starts, offset) - 1
        return idx + 1, offset - self.line_starts[idx] + 1

    def offset(self, line: int, col: int = 1) -> int:
        return self.line_starts[line - 1] + col - 1

    def line_text(self, line: int) -> str:
        start = self.line_starts[line - 1]
        end = self.line_starts[line] if line < len(self.line_starts) else len(self.text)
        return self.text[start:end].rstrip("\r\n")

    def indent_of(self, offset: int) -> str:
        """The leading whitespace of the line holding ``offset``."""
        line, _ = self.line_col(offset)
        text = self.line_text(line)
        return text[: len(text) - len(text.lstrip(" \t"))]


def read_source(path: str) -> SourceFile:
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read the file; {exc.strerror}", path=path) from exc
    return SourceFile(path, data)


def _guess_indent_unit(text: str) -> str:
    """Tab if most indented lines start with a tab, else the smallest space step."""
    tabs = spaces = 0
    widths: list[int] = []
    for line in text.splitlines():
        stripped = line.lstrip(" \t")
        if not stripped or stripped.startswith(("*", "/*", "//", "#")) or line == stripped:
            continue
        lead = line[: len(line) - len(stripped)]
        if lead.startswith("\t"):
            tabs += 1
        elif lead.strip(" ") == "":
            spaces += 1
            widths.append(len(lead))
    if tabs > spaces:
        return "\t"
    if not widths:
        return "    "
    step = min(w for w in widths if w > 0)
    return " " * max(1, min(step, 8))


_PUNCTS = sorted(
    """... <<= >>= -> ++ -- << >> <= >= == != && || += -= *= /= %= &= ^= |= ##
    [ ] ( ) { } . & * + - ~ ! / % < > ^ | ? : ; = , #""".split(),
    key=len,
    reverse=True,
)
_ID = re.compile(r"[A-Za-z_$][A-Za-z0-9_$]*")
_NUM = re.compile(r"\.?[0-9](?:[eEpP][+-]|[0-9A-Za-z_.])*")
_WS = re.compile(r"(?:[ \t\r\n\f\v]|\\\r?\n)+")


def tokenize(text: str, start: int = 0, end: int | None = None) -> list[Token]:
    """Tokens of ``text[start:end]``, comments and preprocessor lines included."""
    end = len(text) if end is None else end
    toks: list[Token] = []
    pos = start
    at_line_start = True
    while pos < end:
        m = _WS.match(text, pos, end)
        if m:
            gap = m.group().replace("\\\r\n", "").replace("\\\n", "")
            if "\n" in gap or "\r" in gap:
                at_line_start = True
            pos = m.end()
            continue
        ch = text[pos]
        nxt = text[pos + 1] if pos + 1 < end else ""
        if ch == "/" and nxt == "*":
            close = text.find("*/", pos + 2, end)
            stop = end if close < 0 else close + 2
            toks.append(Token("comment", text[pos:stop], pos, stop))
            pos = stop
            continue
        if ch == "/" and nxt == "/":
            stop = _line_end(text, pos, end)
            toks.append(Token("comment", text[pos:stop], pos, stop))
            pos = stop
            continue
        if ch == "#" and at_line_start:
            stop = _directive_end(text, pos, end)
            toks.append(Token("pp", text[pos:stop], pos, stop))
            pos = stop
            continue
        at_line_start = False
        quotes = ("\"", "'")
        prefixed = ch in "LuU" and nxt in quotes or text.startswith("u8", pos) and text[pos + 2:pos + 3] in quotes
        if ch in "\"'" or prefixed:
            q = pos
            while text[q] not in "\"'":
                q += 1
            stop = _literal_end(text, q, end)
            toks.append(Token("str" if text[q] == '"' else "char", text[pos:stop], pos, stop))
            pos = stop
            continue
        m = _NUM.match(text, pos, end)
        if m and (ch.isdigit() or (ch == "." and nxt.isdigit())):
            toks.append(Token("num", m.group(), pos, m.end()))
            pos = m.end()
            continue
        m = _ID.match(text, pos, end)
        if m:
            toks.append(Token("id", m.group(), pos, m.end()))
            pos = m.end()
            continue
        for p in _PUNCTS:
            if text.startswith(p, pos):
                toks.append(Token("punct", p, pos, pos + len(p)))
                pos += len(p)
                break
        else:  # a stray byte (e.g. '@' or a non-ASCII byte outside comments)
            toks.append(Token("punct", ch, pos, pos + 1))
            pos += 1
    return toks


def _line_end(text: str, pos: int, end: int) -> int:
    """End of a // comment or directive line, following backslash continuations."""
    while True:
        found = [k for k in (text.find("\n", pos, end), text.find("\r", pos, end)) if k >= 0]
        if not found:
            return end
        nl = min(found)
        if text.startswith("\r\n", nl):
            nl += 1
        stop = nl - 1 if text[nl] == "\n" and nl > 0 and text[nl - 1] == "\r" else nl
        if stop > 0 and text[stop - 1] == "\\":
            pos = nl + 1
            continue
        return stop


def _directive_end(text: str, pos: int, end: int) -> int:
    """End of a preprocessor line; block comments inside it may span lines."""
    p = pos
    while p < end:
        stop = _line_end(text, p, end)
        seg = text[p:stop]
        opened = seg.rfind("/*")
        if opened >= 0 and seg.find("*/", opened) < 0:
            close = text.find("*/", p + opened + 2, end)
            if close < 0:
                return end
            p = close + 2
            continue
        return stop
    return end


def _literal_end(text: str, q: int, end: int) -> int:
    quote = text[q]
    p = q + 1
    while p < end:
        c = text[p]
        if c == "\\":
            p += 2
            continue
        if c == quote or c == "\n":
            return p + 1
        p += 1
    return end


def code_tokens(tokens: list[Token]) -> list[Token]:
    """Tokens without comments and preprocessor lines."""
    return [t for t in tokens if t.kind not in ("comment", "pp")]


def match_close(tokens: list[Token], i: int) -> int:
    """Index of the token closing the bracket at ``tokens[i]`` (code tokens only)."""
    pairs = {"(": ")", "[": "]", "{": "}"}
    open_, close = tokens[i].text, pairs[tokens[i].text]
    depth = 0
    for k in range(i, len(tokens)):
        t = tokens[k].text
        if tokens[k].kind != "punct":
            continue
        if t == open_:
            depth += 1
        elif t == close:
            depth -= 1
            if depth == 0:
                return k
    return -1


def statement_end(tokens: list[Token], i: int) -> int:
    """Index of the last token of the statement starting at ``tokens[i]``.

    Knows compound statements, ``for``/``while``/``if``/``else``/``do`` and
    plain statements ending in ``;``; returns -1 when the text is unbalanced.
    """
    t = tokens[i]
    if t.text == "{":
        return match_close(tokens, i)
    if t.kind == "id" and t.text in ("for", "while", "if", "switch"):
        if i + 1 >= len(tokens) or tokens[i + 1].text != "(":
            return -1
        close = match_close(tokens, i + 1)
        if close < 0 or close + 1 >= len(tokens):
            return -1
        last = statement_end(tokens, close + 1)
        if t.text == "if" and last >= 0 and last + 1 < len(tokens) and tokens[last + 1].text == "else":
            return statement_end(tokens, last + 2)
        return last
    if t.kind == "id" and t.text == "do":
        body_end = statement_end(tokens, i + 1)
        if body_end < 0:
            return -1
        # while ( ... ) ;
        k = body_end + 1
        if k + 1 < len(tokens) and tokens[k].text == "while" and tokens[k + 1].text == "(":
            close = match_close(tokens, k + 1)
            return close + 1 if close >= 0 and close + 1 < len(tokens) else -1
        return -1
    depth = 0
    for k in range(i, len(tokens)):
        s = tokens[k].text
        if tokens[k].kind != "punct":
            continue
        if s in "([{":
            depth += 1
        elif s in ")]}":
            depth -= 1
            if depth < 0:
                return -1
        elif s == ";" and depth == 0:
            return k
    return -1


def spelled(text: str, toks: list[Token]) -> str:
    """Code tokens as written, comments dropped: a gap of plain spaces is kept, any other gap
    (a comment, a line break) becomes one space."""
    out: list[str] = []
    for k, t in enumerate(toks):
        if k:
            gap = text[toks[k - 1].end:t.start]
            if gap:
                out.append(gap if gap.strip(" \t") == "" and "\n" not in gap else " ")
        out.append(t.text)
    return "".join(out)
