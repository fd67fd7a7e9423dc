"""Loop-transformation directives written right before a loop nest: finding and parsing them.

Two families are read from ``#pragma`` lines:

- OpenMP's loop-transformation constructs, with the semantics the OpenMP API
  specification gives them: ``#pragma omp tile sizes(s1, ..., sk)`` tiles the k
  outermost loops, floor loops outside and tile loops inside, each in the original
  order (OpenMP 5.1, section 2.11.9.1; 5.2, section 9.1), which is looptile's
  positional ``TileRequest`` with the default order; ``#pragma omp unroll`` with
  ``full`` or ``partial[(n)]`` (OpenMP 5.1, section 2.11.9.2, from memory).
  ``#pragma omp interchange`` (OpenMP 6.0) is recognised and refused: its exact form
  could not be checked against the specification text.
- looptile's own ``#pragma looptile`` with the clauses ``tile(i=32, j=32)``,
  ``jam(i=4)``, ``order(ii, jj, i, j)``, ``remainder(split|clamp)`` and ``scalarize``;
  ``tile(...)`` is repeatable, one clause per level, outermost first (the grammar is in
  the README).

Output: ``Found`` records, each with a typed ``Directive`` (the ``TileRequest`` of the
tile job, ``JamDirective``, ``UnrollDirective``) and the loop it applies to, or the
problem (an error for a malformed directive, a refusal for one that cannot be carried
out as written) at its exact ``file:line:col``.  Library code: raises and returns
values, never exits.
"""
from __future__ import annotations

import re
from dataclasses import dataclass

from .errors import InputError, LooptileError, Refusal
from .frontend import LoopSite, TranslationUnit
from .source import SourceFile, Token
from .transform.tile import TileRequest

# A pragma line that is one of the directives read here (the OpenMP names are the
# loop-transformation constructs; other omp pragmas are not directives for looptile).
DIRECTIVE = re.compile(r"#\s*pragma\s+(?:omp\s+(?P<omp>tile|unroll|interchange)\b|(?P<own>looptile)\b)")
_PRAGMA_OPERATOR = re.compile(r"^[LuU8]*\"\s*(?:omp\s+(?:tile|unroll|interchange)\b|looptile\b)")

LOOPTILE_CLAUSES = ("tile", "jam", "order", "remainder", "scalarize")
_INT = re.compile(r"(0[xX][0-9a-fA-F]+|0[0-7]*|[1-9][0-9]*)(?:[uU](?:ll|LL|l|L)?|(?:ll|LL|l|L)[uU]?)?")


@dataclass(frozen=True)
class JamDirective:
    """Unroll-and-jam: each named loop unrolled by its factor, the copies fused inside."""

    factors: tuple[tuple[str, int], ...]


@dataclass(frozen=True)
class UnrollDirective:
    """Plain unrolling of the outermost loop of the nest."""

    factor: int | None  # partial(n): n; None: full unrolling (full) or a factor left to the tool
    full: bool = False


@dataclass(frozen=True)
class Pragma:
    """Where a directive is written and how."""

    kind: str  # "omp tile", "omp unroll", "omp interchange" or "looptile"
    text: str  # as written, continuation lines joined, spacing collapsed
    offset: int  # of its '#'
    line: int
    column: int


@dataclass(frozen=True)
class Directive:
    pragma: Pragma
    tile: TileRequest | None = None  # tile and/or order: the tile job's request
    split_fallback: bool = True  # no remainder clause: split, or clamp where split cannot be built
    jam: JamDirective | None = None
    unroll: UnrollDirective | None = None
    scalarize: bool = False
    size_macros: tuple[tuple[str, int], ...] = ()  # sizes written as macros, with the values used
    levels: tuple[tuple[tuple[str, int], ...], ...] = ()  # tile(...) clauses after the first: levels 2, 3, ...
    level_offset: int | None = None  # where the second tile(...) clause is written
    # tile(i=auto, j=32): the clause's items, None for a size chosen from the cache geometry (autosize.py)
    auto: tuple[tuple[str, int | None], ...] | None = None
    jam_auto: bool = False  # tile(...) jam(auto): the register tile chosen by its model (regtile.py)


@dataclass(frozen=True)
class Found:
    """A directive in a file and the loop nest it applies to, or why it cannot be carried out."""

    pragma: Pragma
    directive: Directive | None = None  # None when malformed or refused as written
    problem: LooptileError | None = None
    site: LoopSite | None = None
    inactive: bool = False  # in a conditional branch the preprocessor leaves out


# ---------------------------------------------------------------- finding

# A pragma line with a continuation or a comment in it might be a directive too: such files are read.
_MENTION = re.compile(r"^[ \t]*#[ \t]*pragma[ \t]+(?:omp[ \t]+(?:tile|unroll|interchange)\b|looptile\b)"
                      r"|^[ \t]*#[ \t]*pragma\b[^\r\n]*(?:\\[ \t]*\r?$|/\*)|\b_Pragma\b", re.M)


def mentions_directive(text: str) -> bool:
    """A cheap test on the raw text: could the file hold a directive at all?"""
    return _MENTION.search(text) is not None


def find(tu: TranslationUnit) -> list[Found]:
    """Every directive of the file, in file order."""
    src = tu.source
    sites = {s.token_index: s for s in tu.loops() if s.token_index is not None}
    out: list[Found] = []
    for tok in tu.all_tokens:
        if tok.kind == "pp" and DIRECTIVE.match(tok.text):
            out.append(_found(tu, tok, sites))
    for k, tok in enumerate(tu.tokens):  # the _Pragma operator form is not read: say so
        if tok.text == "_Pragma" and k + 2 < len(tu.tokens) and tu.tokens[k + 1].text == "(" \
                and _PRAGMA_OPERATOR.match(tu.tokens[k + 2].text):
            p = _pragma_of(src, tok, "_Pragma", src.text[tok.start:tu.tokens[k + 2].end] + ")")
            out.append(Found(p, problem=_refusal(src, tok.start, "the _Pragma operator form of a directive is not "
                                                 "read; write the directive as a #pragma line of its own")))
    return sorted(out, key=lambda f: f.pragma.offset)


def _found(tu: TranslationUnit, tok: Token, sites: dict[int, LoopSite]) -> Found:
    src = tu.source
    m = DIRECTIVE.match(tok.text)
    assert m is not None
    kind = f"omp {m.group('omp')}" if m.group("omp") else "looptile"
    p = _pragma_of(src, tok, kind, tok.text)
    if p.line not in tu.pre_lines:
        return Found(p, inactive=True)
    try:
        d = parse(p, src, tu.macros, tok.text)
    except LooptileError as exc:
        return Found(p, problem=exc)
    try:
        site = loop_after(tu, tok, sites)
    except LooptileError as exc:
        return Found(p, d, problem=exc)
    return Found(p, d, site=site)


def _pragma_of(src: SourceFile, tok: Token, kind: str, text: str) -> Pragma:
    line, col = src.line_col(tok.start)
    joined = re.sub(r"\\(\r\n|\n|\r)", " ", text)
    return Pragma(kind, " ".join(joined.split()), tok.start, line, col)


def loop_after(tu: TranslationUnit, tok: Token, sites: dict[int, LoopSite]) -> LoopSite:
    """The for loop right after the directive (only comments may stand between them)."""
    src = tu.source
    k = tu.code_index(tok.end)
    stop = tu.tokens[k].start if k < len(tu.tokens) else len(src.text)
    before = tu.token_before(tok.start, skip=("comment",))
    if before is not None and before.kind == "pp" and DIRECTIVE.match(before.text):
        line = src.line_col(before.start)[0]
        raise _refusal(src, tok.start, f"the directive at line {line} applies to the loops this one generates; "
                       "combining directives on one nest is not supported yet; write one directive per nest")
    for t in tu.all_between(tok.end, stop):
        if t.kind != "pp":
            continue
        if DIRECTIVE.match(t.text):
            line = src.line_col(t.start)[0]
            raise _refusal(src, tok.start, f"this directive applies to the loops that the directive at line {line} "
                           "generates; combining directives on one nest is not supported yet; write one directive "
                           "per nest")
        name = " ".join(t.text.split())
        raise _refusal(src, tok.start, f"the preprocessor line '{name}' stands between the directive and its loop; "
                       "put the directive right before the for statement")
    if k >= len(tu.tokens) or tu.tokens[k].text != "for":
        found = f"'{tu.tokens[k].text}'" if k < len(tu.tokens) else "the end of the file"
        raise _error(src, tok.start, f"a loop-transformation directive must come right before a for statement, "
                     f"but {found} follows it")
    site = sites.get(k)
    if site is None:
        raise _refusal(src, tu.tokens[k].start, "this for statement could not be matched with the preprocessed "
                       "file (a loop written by a macro, or several loops on one line), so looptile cannot analyse "
                       "it; write the loop out on its own line")
    return site


# ---------------------------------------------------------------- messages

def _error(src: SourceFile, offset: int, message: str) -> InputError:
    line, col = src.line_col(offset)
    return InputError(message, path=src.path, line=line, column=col, source_line=src.line_text(line))


def _refusal(src: SourceFile, offset: int, message: str) -> Refusal:
    line, col = src.line_col(offset)
    return Refusal(message, path=src.path, line=line, column=col, source_line=src.line_text(line))


# ---------------------------------------------------------------- the directive's own tokens

@dataclass(frozen=True)
class _Tok:
    kind: str  # "id", "num" or "punct"
    text: str
    offset: int  # in the file


_LEX = re.compile(r"(?P<skip>\\\r\n|\\\n|\\\r|[ \t\f\v\r\n]+|/\*.*?\*/|//[^\r\n]*)"
                  r"|(?P<id>[A-Za-z_$][A-Za-z0-9_$]*)|(?P<num>\.?[0-9][0-9A-Za-z_.]*)|(?P<punct>.)", re.S)


def _lex(text: str, base: int) -> list[_Tok]:
    out = []
    for m in _LEX.finditer(text):
        if m.lastgroup != "skip":
            out.append(_Tok(m.lastgroup or "punct", m.group(), base + m.start()))
    return out


class _Parser:
    """A cursor over the tokens after ``#pragma omp NAME`` or ``#pragma looptile``."""

    def __init__(self, toks: list[_Tok], src: SourceFile, end: int, macros: dict[str, str]) -> None:
        self.toks, self.src, self.end, self.macros = toks, src, end, macros
        self.k = 0
        self.used_macros: list[tuple[str, int]] = []
        self.auto_at: _Tok | None = None  # the first 'auto' size of a tile(...) clause

    def peek(self) -> _Tok | None:
        return self.toks[self.k] if self.k < len(self.toks) else None

    def take(self) -> _Tok | None:
        t = self.peek()
        self.k += t is not None
        return t

    def error(self, message: str, at: _Tok | None) -> InputError:
        return _error(self.src, at.offset if at is not None else self.end, message)

    def refuse(self, message: str, at: _Tok) -> Refusal:
        return _refusal(self.src, at.offset, message)

    def spelled(self, toks: list[_Tok]) -> str:
        return self.src.text[toks[0].offset:toks[-1].offset + len(toks[-1].text)]

    def items(self, clause: _Tok) -> list[list[_Tok]]:
        """``( item, item, ... )`` after a clause name: each item's tokens."""
        opening = self.take()
        if opening is None or opening.text != "(":
            raise self.error(f"'{clause.text}' needs a parenthesised list, e.g. {clause.text}(...)", opening or None)
        items: list[list[_Tok]] = [[]]
        depth = 0
        while True:
            t = self.take()
            if t is None:
                raise self.error(f"missing ')' to close '{clause.text}(' (opened at column "
                                 f"{self.src.line_col(opening.offset)[1]})", None)
            if t.text == ")" and depth == 0:
                break
            if t.text == "," and depth == 0:
                if not items[-1]:
                    raise self.error(f"an empty item in '{clause.text}(...)'", t)
                items.append([])
                continue
            depth += (t.text == "(") - (t.text == ")")
            items[-1].append(t)
        if not items[-1]:
            raise self.error(f"an empty item in '{clause.text}(...)'", t if len(items) > 1 else opening)
        return items

    def size(self, toks: list[_Tok], what: str) -> int:
        """A positive integer constant: a literal or an integer macro with a known value."""
        inner = toks
        while len(inner) >= 3 and inner[0].text == "(" and inner[-1].text == ")":
            inner = inner[1:-1]
        sign = 1
        if len(inner) == 2 and inner[0].text in "+-" and inner[1].kind in ("num", "id"):
            sign, inner = (-1 if inner[0].text == "-" else 1), inner[1:]
        written = self.spelled(toks)
        if len(inner) == 1 and inner[0].kind == "num":
            value = _int_value(inner[0].text)
            if value is None:
                raise self.error(f"{what} '{written}' is not an integer", toks[0])
        elif len(inner) == 1 and inner[0].kind == "id":
            value = self.macro_value(inner[0], what)
        else:
            raise self.refuse(f"{what} '{written}' is not an integer constant; looptile needs the value when it "
                              "rewrites the nest: write a number or an integer macro", toks[0])
        value *= sign
        if value < 1:
            raise self.error(f"{what} must be at least 1, not {value}", toks[0])
        return value

    def macro_value(self, name: _Tok, what: str) -> int:
        if name.text == "auto" and what.startswith("sizes(...)"):
            raise self.refuse(f"{what} 'auto' is not an integer constant, and the OpenMP sizes clause takes "
                              "positive integer constant expressions (OpenMP 5.1, section 2.11.9.1, from memory); "
                              "for sizes chosen by looptile from the cache geometry write "
                              "'#pragma looptile tile(i=auto, ...)'", name)
        if name.text == "auto":
            raise self.refuse(f"{what} 'auto': only tile sizes are chosen by looptile (tile(i=auto)); write a "
                              "number", name)
        text, seen = name.text, []
        while text in self.macros and len(seen) < 16:
            seen.append(text)
            body = self.macros[text]
            if body.startswith("\0function-like\0"):
                raise self.refuse(f"{what} '{name.text}' is a function-like macro, not an integer constant", name)
            text = body.strip()
            while text.startswith("(") and text.endswith(")"):
                text = text[1:-1].strip()
            value = _int_value(text[1:] if text.startswith("-") else text)
            if value is not None:
                value = -value if text.startswith("-") else value
                self.used_macros.append((name.text, value))
                return value
        if seen:
            raise self.refuse(f"{what} '{name.text}' is a macro whose value '{self.macros[seen[-1]].strip()}' is "
                              "not an integer constant; write a number or an integer macro", name)
        raise self.refuse(f"{what} '{name.text}' is not an integer constant (it is not a macro with a known value, "
                          "so it could be any value at run time); write a number or an integer macro", name)

    def named_sizes(self, clause: _Tok, items: list[list[_Tok]], what: str,
                    allow_auto: bool = False) -> tuple[tuple[str, int], ...]:
        """NAME=VALUE items; with ``allow_auto``, NAME=auto gives the size None (chosen by looptile)."""
        out: list[tuple[str, int]] = []
        for item in items:
            if len(item) < 3 or item[0].kind != "id" or item[1].text != "=":
                raise self.error(f"'{clause.text}(...)' takes NAME=VALUE items (e.g. {clause.text}(i=32, j=32)), "
                                 f"not '{self.spelled(item)}'", item[0])
            if any(n == item[0].text for n, _ in out):
                raise self.error(f"loop '{item[0].text}' is named twice in '{clause.text}(...)'", item[0])
            if allow_auto and len(item) == 3 and item[2].text == "auto":
                out.append((item[0].text, None))  # type: ignore[arg-type]
                self.auto_at = self.auto_at if self.auto_at is not None else item[2]
                continue
            out.append((item[0].text, self.size(item[2:], f"the {what} of '{item[0].text}'")))
        return tuple(out)


def _int_value(text: str) -> int | None:
    m = _INT.fullmatch(text)
    if not m:
        return None
    digits = m.group(1)
    if digits.lower().startswith("0x"):
        return int(digits, 16)
    return int(digits, 8) if len(digits) > 1 and digits.startswith("0") else int(digits)


# ---------------------------------------------------------------- parsing

def parse(p: Pragma, src: SourceFile, macros: dict[str, str], raw: str) -> Directive:
    """The typed requests of one directive (``raw``: its preprocessor line as written);
    InputError if malformed, Refusal if it asks for something looptile cannot do as written."""
    toks = _lex(raw, p.offset)
    head = 4 if p.kind.startswith("omp") else 3  # '#' 'pragma' then 'omp' NAME or 'looptile'
    parser = _Parser(toks[head:], src, p.offset + len(raw.rstrip()), macros)
    if p.kind == "looptile":
        return _looptile(p, parser)
    if p.kind == "omp tile":
        return _omp_tile(p, parser)
    if p.kind == "omp unroll":
        return _omp_unroll(p, parser)
    raise _refusal(src, p.offset, "'#pragma omp interchange' (OpenMP 6.0) is not read by this version; for a "
                   "permutation write '#pragma looptile order(...)' with the loops in their new order")


def _clauses(parser: _Parser, known: tuple[str, ...], family: str) -> list[tuple[_Tok, list[list[_Tok]] | None]]:
    """Clause names (each optionally followed by a parenthesised list), separated by spaces or commas."""
    out: list[tuple[_Tok, list[list[_Tok]] | None]] = []
    while parser.peek() is not None:
        t = parser.take()
        assert t is not None
        if t.text == "," and out:
            continue
        if t.kind != "id":
            raise parser.error(f"expected a clause name of {family}, found '{t.text}'", t)
        if t.text not in known:
            raise parser.error(f"unknown clause '{t.text}' in {family} (clauses: {', '.join(known)})", t)
        nxt = parser.peek()
        out.append((t, None) if nxt is None or nxt.text != "(" else (t, parser.items(t)))
    return out


def _looptile(p: Pragma, parser: _Parser) -> Directive:
    clauses = _clauses(parser, LOOPTILE_CLAUSES, "'#pragma looptile'")
    if not clauses:
        raise parser.error("'#pragma looptile' needs at least one clause: tile(...), jam(...), order(...), "
                           "remainder(...), scalarize", None)
    seen: dict[str, _Tok] = {}
    for name, _ in clauses:
        if name.text in seen and name.text != "tile":
            col = parser.src.line_col(seen[name.text].offset)[1]
            raise parser.error(f"duplicate clause '{name.text}' (first at column {col})", name)
        seen.setdefault(name.text, name)
    levels: list[tuple[tuple[str, int], ...]] = []
    order: tuple[str, ...] | None = None
    remainder: str | None = None
    jam: JamDirective | None = None
    jam_auto = False
    for name, items in clauses:
        if name.text == "scalarize":
            if items is not None:
                raise parser.error("'scalarize' takes no arguments", name)
        elif items is None:
            raise parser.error(f"'{name.text}' needs a parenthesised list, e.g. {_EXAMPLE[name.text]}", name)
        elif name.text == "tile":
            levels.append(parser.named_sizes(name, items, "tile size", allow_auto=True))
        elif name.text == "jam" and len(items) == 1 and [t.text for t in items[0]] == ["auto"]:
            jam_auto = True
        elif name.text == "jam":
            jam = JamDirective(parser.named_sizes(name, items, "unroll factor"))
        elif name.text == "order":
            order = _order(parser, items)
        else:
            remainder = _remainder(parser, items)
    tiles = [name for name, _ in clauses if name.text == "tile"]
    if remainder is not None and not levels:
        raise parser.error("remainder(...) chooses how partial tiles run; it needs a tile(...) clause",
                           seen["remainder"])
    if jam_auto and not levels:
        raise parser.error("jam(auto) chooses a register tile inside tiles; it needs tile(...) (for a jam without "
                           "tiles give the factors, jam(i=4))", seen["jam"])
    if "scalarize" in seen and jam is None and not jam_auto:
        raise parser.error("scalarize keeps elements in locals between the jammed copies; it needs jam(...)",
                           seen["scalarize"])
    if jam is not None and order is not None and not levels:
        raise parser.error("jam(...) with order(...) jams inside tiles, so it needs tile(...); without tiles give "
                           "jam(...) alone", seen["jam"])
    auto = None
    if parser.auto_at is not None:  # tile(i=auto, j=32): the sizes are chosen when the directive is carried out
        if len(levels) > 1:
            raise parser.error("'auto' chooses every level of tiles from the cache geometry; give one tile(...) "
                               "clause with it", parser.auto_at)
        auto, levels = levels[0], [()]
    tile = TileRequest(levels[0] if levels else (), order, remainder or "split") if levels or order else None
    return Directive(p, tile, remainder is None, jam, None, "scalarize" in seen, tuple(parser.used_macros),
                     tuple(levels[1:]), tiles[1].offset if len(tiles) > 1 else None, auto, jam_auto)


_EXAMPLE = {"tile": "tile(i=32, j=32)", "jam": "jam(i=4)", "order": "order(ii, jj, i, j)",
            "remainder": "remainder(split)"}


def _order(parser: _Parser, items: list[list[_Tok]]) -> tuple[str, ...]:
    order = []
    for item in items:
        text = "".join(t.text for t in item)
        if len(item) > 3 or not re.fullmatch(r"[A-Za-z_]\w*(?:\.\d+)?", text):
            raise parser.error(f"order(...) lists loop names (i, ii or i.1, iii or i.2), not "
                               f"'{parser.spelled(item)}'", item[0])
        order.append(text)
    return tuple(order)


def _remainder(parser: _Parser, items: list[list[_Tok]]) -> str:
    if len(items) != 1:
        raise parser.error("remainder(...) takes one style: split or clamp", items[1][0])
    text = "".join(t.text for t in items[0])
    if text not in ("split", "clamp"):
        raise parser.error(f"remainder(...) is split or clamp, not '{parser.spelled(items[0])}'", items[0][0])
    return text


def _omp_tile(p: Pragma, parser: _Parser) -> Directive:
    clauses = _clauses(parser, ("sizes",), "'#pragma omp tile'")
    if not clauses:
        raise parser.error("'#pragma omp tile' needs a sizes(...) clause (OpenMP 5.1, section 2.11.9.1)", None)
    if len(clauses) > 1:
        raise parser.error("at most one sizes(...) clause may appear on '#pragma omp tile'", clauses[1][0])
    name, items = clauses[0]
    if items is None:
        raise parser.error("'sizes' needs a parenthesised list, e.g. sizes(32, 32)", name)
    sizes = tuple((None, parser.size(item, f"sizes(...) item {k}")) for k, item in enumerate(items, 1))
    # OpenMP: the first size tiles the outermost loop, and so on; floor loops outside,
    # tile loops inside, each in the original order = looptile's default order.
    return Directive(p, TileRequest(sizes, None, "split"), True, size_macros=tuple(parser.used_macros))


def _omp_unroll(p: Pragma, parser: _Parser) -> Directive:
    clauses = _clauses(parser, ("full", "partial"), "'#pragma omp unroll'")
    if len(clauses) > 1:
        raise parser.error("at most one of full and partial may appear on '#pragma omp unroll'", clauses[1][0])
    if not clauses:
        return Directive(p, unroll=UnrollDirective(None))
    name, items = clauses[0]
    if name.text == "full":
        if items is not None:
            raise parser.error("'full' takes no arguments", name)
        return Directive(p, unroll=UnrollDirective(None, full=True))
    if items is None:
        return Directive(p, unroll=UnrollDirective(None))
    if len(items) != 1:
        raise parser.error("partial(...) takes one unroll factor", items[1][0])
    return Directive(p, unroll=UnrollDirective(parser.size(items[0], "the unroll factor")),
                     size_macros=tuple(parser.used_macros))
