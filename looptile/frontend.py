"""The analysis view of a file: the preprocessed translation unit parsed by pycparser.

Lines map back to the original file through the preprocessor's line markers;
each ``for`` statement of the AST is paired with its ``for`` keyword in the
original text (same line, same order), which gives exact byte positions.
"""
from __future__ import annotations

import bisect
import os
import re
from dataclasses import dataclass, field

from pycparser import c_ast, c_parser

from . import toolchain
from .errors import InputError
from .flags import CompileFlags
from .source import SourceFile, Token, code_tokens, tokenize

_MARKER = re.compile(r'^#\s*(?:line\s+)?(\d+)\s+"((?:[^"\\]|\\.)*)"')


@dataclass
class LoopSite:
    """One ``for`` statement of the file: AST node plus its place in the original text."""

    node: c_ast.For
    function: str
    line: int
    token_index: int | None  # index of the 'for' keyword in TranslationUnit.tokens; None if unpaired
    parent: LoopSite | None = None
    top_index: int | None = None  # K of FUNC:K for a top-level nest of its function
    children: list[LoopSite] = field(default_factory=list)


@dataclass
class FunctionInfo:
    name: str
    node: c_ast.FuncDef
    loops: list[LoopSite]  # every for statement, in source order


@dataclass
class TranslationUnit:
    source: SourceFile
    flags: CompileFlags
    ast: c_ast.FileAST
    macros: dict[str, str]
    tokens: list[Token]  # code tokens of the original file
    all_tokens: list[Token]  # with comments and preprocessor lines
    functions: list[FunctionInfo]
    identifiers: set[str]
    altered: frozenset[int] = frozenset()  # lines the header flags change (see altered_lines)
    cache: dict = field(default_factory=dict)  # per-unit memo of later stages (types, scopes)
    pre_lines: dict[int, list[str]] = field(default_factory=dict)  # preprocessed text of each original line

    def loops(self) -> list[LoopSite]:
        return [s for f in self.functions for s in f.loops]

    def code_index(self, offset: int) -> int:
        """Index of the first code token starting at or after ``offset``."""
        if "code_starts" not in self.cache:
            self.cache["code_starts"] = [t.start for t in self.tokens]
        return bisect.bisect_left(self.cache["code_starts"], offset)

    def code_between(self, start: int, end: int) -> list[Token]:
        return self.tokens[self.code_index(start):self.code_index(end)]

    def token_before(self, offset: int, skip: tuple[str, ...] = ()) -> Token | None:
        """The last token (comments and preprocessor lines included) ending before ``offset``."""
        if "all_starts" not in self.cache:
            self.cache["all_starts"] = [t.start for t in self.all_tokens]
        k = bisect.bisect_left(self.cache["all_starts"], offset) - 1
        while k >= 0 and self.all_tokens[k].kind in skip:
            k -= 1
        return self.all_tokens[k] if k >= 0 else None

    def all_between(self, start: int, end: int) -> list[Token]:
        """Tokens, comments and preprocessor lines included, starting in [start, end)."""
        if "all_starts" not in self.cache:
            self.cache["all_starts"] = [t.start for t in self.all_tokens]
        starts = self.cache["all_starts"]
        return self.all_tokens[bisect.bisect_left(starts, start):bisect.bisect_left(starts, end)]


def main_file_lines(pre: str, main: str) -> list[tuple[int, str]]:
    """(original line, text) of the preprocessed lines that come from the main file."""
    out: list[tuple[int, str]] = []
    current, line = None, 0
    for text in pre.splitlines():
        m = _MARKER.match(text)
        if m:
            line, current = int(m.group(1)), m.group(2)
            continue
        if current == main:
            if text.strip():
                out.append((line, text))
            line += 1
        else:
            line += 1
    return out


def _normalise(text: str) -> str:
    text = re.sub(r"\b__restrict\b", "restrict", text)
    text = re.sub(r"\b__inline\b", "inline", text)
    return " ".join(t.text for t in tokenize(text))


def altered_lines(src: SourceFile, flags: CompileFlags, parsed_text: str) -> frozenset[int]:
    """Lines of the user's file whose preprocessed tokens change because of the header flags.

    For example its own ``#ifdef __GNUC__`` branches, attributes, or macros from the
    system headers such as ``assert`` that expand differently.  A nest is refused when
    such a line can affect it (see ``extract.build_nest``)."""
    plain = toolchain.preprocess(src.path, flags, parseable=False).text
    main = os.path.abspath(src.path)

    def by_line(text: str) -> dict[int, str]:
        out: dict[int, list[str]] = {}
        for ln, t in main_file_lines(text, main):
            out.setdefault(ln, []).append(t)
        return {ln: " ".join(" ".join(parts).split()) for ln, parts in out.items()}

    # Same preprocessor, same spacing rules: compare whitespace-collapsed text first and
    # tokens only where that differs.
    a, b = by_line(plain), by_line(parsed_text)
    return frozenset(ln for ln in set(a) | set(b)
                     if a.get(ln, "") != b.get(ln, "") and _normalise(a.get(ln, "")) != _normalise(b.get(ln, "")))


def load(src: SourceFile, flags: CompileFlags) -> TranslationUnit:
    pre = toolchain.preprocess(src.path, flags)
    altered = altered_lines(src, flags, pre.text)
    main = os.path.abspath(src.path)
    try:
        ast = c_parser.CParser().parse(pre.text, main)
    except Exception as exc:  # pycparser raises ParseError with "file:line:col: msg"
        msg = str(exc)
        m = re.match(r"(.*?):(\d+):(\d+): (.*)", msg)
        if m and m.group(1) == main:
            line = int(m.group(2))
            raise InputError(
                f"cannot parse the preprocessed file; {m.group(4)} (looptile reads standard C99/C11)",
                path=src.path, line=line, column=int(m.group(3)), source_line=src.line_text(line),
            ) from exc
        where = toolchain.syntax_error(src.path, flags)  # pycparser gave no position: ask the compiler
        if where is not None:
            line, col, text = where
            raise InputError(f"cannot parse the file: {text}", path=src.path, line=line, column=col,
                             source_line=src.line_text(line)) from exc
        raise InputError(f"cannot parse the preprocessed file ({msg.replace(main + ': ', '')}); the compiler "
                         "accepts it, so it may use an extension looptile does not read", path=src.path) from exc
    all_tokens = tokenize(src.text)
    tokens = code_tokens(all_tokens)
    macros = toolchain.macro_definitions(src.path, flags)
    functions = _functions(ast, main, tokens, src)
    idents = {t.text for t in all_tokens if t.kind == "id"}
    idents |= set(re.findall(r"[A-Za-z_]\w*", pre.text))
    # names that macros define or test (also from -D): a fresh name must not be one of them;
    # names in pragmas (a directive's order(ii, i)) are not taken
    for t in all_tokens:
        if t.kind == "pp" and re.match(r"#\s*(define|undef|if|ifdef|ifndef|elif)\b", t.text):
            idents |= set(re.findall(r"[A-Za-z_]\w*", t.text))
    idents |= set(macros)
    pre_lines: dict[int, list[str]] = {}
    for ln, text in main_file_lines(pre.text, main):
        pre_lines.setdefault(ln, []).append(text)
    return TranslationUnit(src, flags, ast, macros, tokens, all_tokens, functions, idents, altered,
                           pre_lines=pre_lines)


class _ForCollector(c_ast.NodeVisitor):
    def __init__(self, function: str) -> None:
        self.function = function
        self.sites: list[LoopSite] = []
        self.stack: list[LoopSite] = []

    def visit_For(self, node: c_ast.For) -> None:
        site = LoopSite(node, self.function, node.coord.line, None, self.stack[-1] if self.stack else None)
        if site.parent:
            site.parent.children.append(site)
        self.sites.append(site)
        self.stack.append(site)
        self.generic_visit(node)
        self.stack.pop()


def _functions(ast: c_ast.FileAST, main: str, tokens: list[Token], src: SourceFile) -> list[FunctionInfo]:
    funcs: list[FunctionInfo] = []
    for ext in ast.ext:
        if isinstance(ext, c_ast.FuncDef) and ext.coord and ext.coord.file == main:
            col = _ForCollector(ext.decl.name)
            col.visit(ext.body)
            top = [s for s in col.sites if s.parent is None]
            for k, s in enumerate(top, 1):
                s.top_index = k
            funcs.append(FunctionInfo(ext.decl.name, ext, col.sites))
    by_line: dict[int, list[int]] = {}
    for idx, t in enumerate(tokens):
        if t.kind == "id" and t.text == "for":
            by_line.setdefault(src.line_col(t.start)[0], []).append(idx)
    sites_by_line: dict[int, list[LoopSite]] = {}
    for f in funcs:
        for s in f.loops:
            sites_by_line.setdefault(s.line, []).append(s)
    for line, sites in sites_by_line.items():
        toks = by_line.get(line, [])
        if len(toks) == len(sites):
            for s, ti in zip(sites, toks):
                s.token_index = ti
    return funcs
