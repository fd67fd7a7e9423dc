"""Emission of unroll-and-jam and plain unrolling as C text in the file's own style.

Each unrolled loop becomes a block with a main loop over whole strips and a remainder loop
that continues from where the main loop stopped; the body of the innermost covered loop holds
one copy of the original body per combination of strip offsets, outermost loop first. Copies
are made on the original text (comments and macros kept): each unrolled iterator becomes
``(i + k)``, and locals declared at the top of the body get a fresh name per copy.

``BodyCopies`` also says which copies went where, so that the pipeline can parse the result
again and compare every copy with the substitution done on the syntax tree.
"""
from __future__ import annotations

import copy
import itertools
from dataclasses import dataclass

from pycparser import c_ast

from .emit import Line, full_form, literal, paren, render, unsigned_of
from .model import Loop, Nest
from .source import SourceFile, Token, spelled, tokenize
from .transform.jam import JamPlan

Offsets = tuple[tuple[str, int], ...]  # (iterator, value added in this copy), outermost first


@dataclass(frozen=True)
class ScalarGroup:
    """An element that one run of the innermost loop keeps in a local: ``name`` replaces the
    references (copy index, offset of the array's name) of the copies; it is loaded before
    the loop and stored after it."""

    name: str
    ctype: str
    element: str  # the element in C, for the load and the store
    load: bool
    store: bool
    refs: frozenset[tuple[int, int]]
    nodes: frozenset[tuple[int, int, int]] = frozenset()  # (copy index, line, column) of the references


@dataclass(frozen=True)
class CopySite:
    """A loop (or, for full unrolling, a block) that holds these copies of the body, in this
    order; a block also holds ``skip_front`` statements before them and ``skip_back`` after."""

    copies: tuple[Offsets, ...]
    scalars: tuple[ScalarGroup, ...] = ()
    block: bool = False
    skip_front: int = 0
    skip_back: int = 0


@dataclass(frozen=True)
class SiteLine(Line):
    """The header line of a loop that holds copies (kept through re-indentation, which uses
    dataclasses.replace, so the re-parse check can find its line)."""

    site: CopySite | None = None


@dataclass(frozen=True)
class JamFacts:
    wide_distance: frozenset[str] = frozenset()  # loops whose `limit - i` must be computed unsigned
    c89: bool = False
    renames: tuple[str, ...] = ()  # locals declared at the top of the copied body
    fresh: tuple[tuple[str, ...], ...] = ()  # per copy index >= 1: the new names of ``renames``


@dataclass(frozen=True)
class LoopForm:
    """How one covered loop is emitted. Not unrolled (factor 1): ``header``. Unrolled: an
    optional declaration of its iterator, ``main`` over whole strips with copies, and
    ``remainder`` (None when every strip is whole) continuing from where ``main`` stopped."""

    iterator: str
    factor: int = 1
    header: str = ""
    decl: str | None = None
    main: str = ""
    remainder: str | None = None
    offset: int = 1  # what the iterator advances by per iteration (step, negative counting down)
    runs: str = ""  # a C condition that holds when the loop runs at least once


def loop_header(src: SourceFile, lp: Loop) -> str:
    toks = [t for t in tokenize(src.text, lp.for_offset, lp.header_end) if t.kind not in ("comment", "pp")]
    return spelled(src.text, toks)


def step_text(src: SourceFile, lp: Loop) -> str:
    toks = [t for t in tokenize(src.text, lp.for_offset, lp.header_end) if t.kind not in ("comment", "pp")]
    semis = [k for k, t in enumerate(toks) if t.text == ";"]
    return spelled(src.text, toks[semis[-1] + 1:-1])


def distance(lp: Loop, wide: bool, far: str | None = None) -> str:
    """The distance from the iterator to the loop's bound, in a type where it cannot overflow."""
    far, v = paren(lp.limit.text) if far is None else far, lp.iterator
    if wide:
        u = unsigned_of(lp)
        return f"({u}){far} - ({u}){v}" if lp.direction > 0 else f"({u}){v} - ({u}){far}"
    return f"{far} - {v}" if lp.direction > 0 else f"{v} - {far}"


class JamContext:
    """What the tile emitter needs to unroll-and-jam inside the tiles: the copied body, its
    loop, the facts, the scalarization callback; it collects the emitted copy sites."""

    def __init__(self, body: c_ast.Node, target: Loop, facts: JamFacts, scalarize=None) -> None:
        self.body, self.target, self.facts, self.scalarize = body, target, facts, scalarize
        self.sites: list[tuple[int, CopySite]] = []  # (line index in the emitted text, site)


def site_lines(lines: list[Line]) -> list[tuple[int, CopySite]]:
    """(index in ``lines``, site) of every line that holds copies."""
    return [(k, ln.site) for k, ln in enumerate(lines) if isinstance(ln, SiteLine) and ln.site is not None]


def own_bounds_form(src: SourceFile, lp: Loop, u: int, wide: bool) -> LoopForm:
    """A loop with its own header, unrolled by ``u`` (1: as it is)."""
    runs = f"{lp.start.text} {lp.op} {paren(lp.limit.text)}"
    if u == 1:
        return LoopForm(lp.iterator, header=loop_header(src, lp), runs=runs)
    it, limit = lp.iterator, paren(lp.limit.text)
    main = render("main_loop.c.j2", name=it, start=lp.start.text, op=lp.op, limit=limit, dist=distance(lp, wide),
                  full=literal(full_form(lp, u), lp), span=literal(lp.step * u, lp),
                  sign="+" if lp.direction > 0 else "-")
    rem = render("jam_remainder.c.j2", name=it, op=lp.op, limit=limit, step=step_text(src, lp))
    return LoopForm(it, u, decl=f"{lp.ctype.spelling} {it};" if lp.declared_in_for else None, main=main,
                    remainder=rem, offset=lp.step * lp.direction, runs=runs)


def plain_forms(src: SourceFile, nest: Nest, plan: JamPlan, facts: JamFacts) -> list[LoopForm]:
    """The covered loops of a nest unrolled in place (no tiling)."""
    return [own_bounds_form(src, nest.loop(it), plan.factor(it), it in facts.wide_distance) for it in plan.loops]


class JamEmitter:
    """Lines for the covered loops ``forms`` with the copies of the body of the innermost one,
    starting at ``base`` + ``depth`` indentation units."""

    def __init__(self, src: SourceFile, target: Loop, forms: list[LoopForm], facts: JamFacts, body: c_ast.Node,
                 base: str, scalarize=None) -> None:
        self.src, self.target, self.forms, self.facts = src, target, forms, facts
        self.unit = src.indent_unit
        self.base = base
        self.body_ast = body
        self.sites: list[CopySite] = []
        # copies -> the elements kept in locals during one run of the innermost loop
        self.scalarize = scalarize

    @property
    def copies(self) -> int:
        n = 1
        for f in self.forms:
            n *= f.factor
        return n

    # -- structure
    def lines(self, depth: int = 0) -> list[Line]:
        return self._level(0, ((),), depth)

    def _level(self, k: int, copies: tuple[Offsets, ...], depth: int) -> list[Line]:
        f = self.forms[k]
        ind = self.base + self.unit * depth
        if f.factor == 1:
            return self._loop(f.header, k, copies, depth)
        return [Line(ind, "{")] + self._strips(k, copies, depth + 1) + [Line(ind, "}")]

    def _strips(self, k: int, copies: tuple[Offsets, ...], depth: int) -> list[Line]:
        """The inside of an unrolled loop's block: the iterator's declaration, the main loop
        over whole strips, and the remainder loop that continues from where it stopped."""
        f = self.forms[k]
        ind = self.base + self.unit * depth
        out = [Line(ind, f.decl)] if f.decl else []
        more = tuple(c + ((f.iterator, f.offset * a),) for c in copies for a in range(f.factor))
        out += self._loop(f.main, k, more, depth)
        if f.remainder is not None:
            out += self._loop(f.remainder, k, copies, depth)
        return out

    def _loop(self, header: str, k: int, copies: tuple[Offsets, ...], depth: int) -> list[Line]:
        """A loop header and what it runs: the next covered loop, or the copies of the body."""
        ind = self.base + self.unit * depth
        if k + 1 < len(self.forms):
            if self.forms[k + 1].factor > 1:  # its block opens on this line
                return [Line(ind, header + " {")] + self._strips(k + 1, copies, depth + 1) + [Line(ind, "}")]
            return [Line(ind, header)] + self._level(k + 1, copies, depth + 1)
        groups = tuple(self.scalarize(copies)) if self.scalarize is not None else ()
        out: list[Line] = []
        if groups:
            runs = self.forms[k].runs
            out.append(Line(ind, f"if ({runs}) {{" if runs else "{"))
            out += [Line(ind + self.unit, f"{g.ctype} {g.name} = {g.element};" if g.load else f"{g.ctype} {g.name};")
                    for g in groups]
            ind = ind + self.unit
        site = CopySite(copies, groups)
        self.sites.append(site)
        out.append(SiteLine(ind, header + " {", site))
        lead = self.lead()
        for n, offs in enumerate(copies):
            out += reindent(self.copy_text(offs, n, groups), ind + self.unit, lead)
        out.append(Line(ind, "}"))
        if groups:
            out += [Line(ind, f"{g.element} = {g.name};") for g in groups if g.store]
            out.append(Line(ind[: -len(self.unit)], "}"))
        return out

    def lead(self) -> str | None:
        """The whitespace before the copied text on its first line (None when code precedes it)."""
        start, _ = self.body_range()
        before = self.src.text[self.src.line_starts[self.src.line_col(start)[0] - 1]:start]
        return before if not before.strip() else None

    def _compound(self) -> bool:
        return isinstance(self.body_ast, c_ast.Compound)

    # -- copies
    def body_range(self) -> tuple[int, int]:
        """The copied text: inside the braces of a compound body, else the statement."""
        t = self.target
        if self._compound():
            toks = [x for x in tokenize(self.src.text, t.body_start, t.body_end) if x.kind != "comment"]
            return toks[0].end, toks[-1].start
        return t.body_start, t.body_end

    def copy_text(self, offs: Offsets, n: int, groups: tuple[ScalarGroup, ...] = (),
                  span: tuple[int, int] | None = None) -> str:
        start, end = span if span is not None else self.body_range()
        text = self.src.text
        subst = {it: k for it, k in offs if k != 0}
        renames = dict(zip(self.facts.renames, self.facts.fresh[n - 1])) if n >= 1 and self.facts.renames else {}
        kept = {off: g.name for g in groups for (c, off) in g.refs if c == n}
        out: list[str] = []
        pos = start
        prev: Token | None = None
        skip_to = -1
        for t in tokenize(text, start, end):
            if t.start < skip_to:
                continue
            if t.start in kept:  # an element kept in a local: the whole reference becomes its name
                out.append(text[pos:t.start])
                out.append(kept[t.start])
                pos = skip_to = reference_end(text, t.start, end)
                prev = None
                continue
            if t.kind == "id" and not (prev is not None and prev.text in (".", "->")):
                new = None
                if t.text in subst:
                    k = subst[t.text]
                    new = f"{t.text} + {k}" if k > 0 else f"{t.text} - {-k}"
                    nxt = next((x for x in tokenize(text, t.end, end) if x.kind != "comment"), None)
                    # a whole subscript needs no parentheses (an argument might be a macro's)
                    alone = prev is not None and prev.text == "[" and nxt is not None and nxt.text == "]"
                    if not alone:
                        new = f"({new})"
                elif t.text in renames:
                    new = renames[t.text]
                if new is not None:
                    out.append(text[pos:t.start])
                    out.append(new)
                    pos = t.end
            if t.kind not in ("comment",):
                prev = t
        out.append(text[pos:end])
        return "".join(out).replace("\r\n", "\n")


def reference_end(text: str, start: int, end: int) -> int:
    """The end of the array reference ``name[...][...]`` whose name starts at ``start``."""
    toks = [t for t in tokenize(text, start, end) if t.kind != "comment"]
    pos = toks[0].end
    k = 1
    while k < len(toks) and toks[k].text == "[":
        depth = 0
        while k < len(toks):
            if toks[k].text == "[":
                depth += 1
            elif toks[k].text == "]":
                depth -= 1
                if depth == 0:
                    break
            k += 1
        pos = toks[k].end
        k += 1
    return pos


def reindent(text: str, indent: str, lead: str | None = "") -> list[Line]:
    """Lines of ``text`` with their common leading whitespace replaced by ``indent``; blank
    lines at either end dropped. ``lead``: the whitespace before the text on its first line in
    the file (None when code precedes it there)."""
    raw = text.split("\n")
    first_blank = not raw[0].strip()
    while raw and not raw[0].strip():
        raw.pop(0)
        lead = ""
    while raw and not raw[-1].strip():
        raw.pop()
    if not raw:
        return []
    if not first_blank and lead is not None:
        raw[0] = lead + raw[0]
    widths = [len(ln) - len(ln.lstrip()) for ln in raw[1:] if ln.strip()]
    if first_blank or lead is not None:
        widths.append(len(raw[0]) - len(raw[0].lstrip()))
    common = min(widths) if widths else 0
    out = []
    for k, ln in enumerate(raw):
        if not ln.strip():
            out.append(Line("", ""))
        elif k == 0 and lead is None and not first_blank:
            out.append(Line(indent, ln.strip()))
        elif ln[:common].strip():
            out.append(Line("", ln))
        else:
            out.append(Line(indent, ln[common:].rstrip()))
    return out


def _fors(node: c_ast.Node):
    """For statements under ``node`` (itself included), in textual order."""
    if isinstance(node, c_ast.For):
        yield node
    for _, child in node.children():
        yield from _fors(child)


def fors_in_order(node: c_ast.Node) -> list[c_ast.For]:
    return list(_fors(node))


def holders_in_order(node: c_ast.Node) -> list[c_ast.Node]:
    """For statements and blocks under ``node``, in textual order."""
    out = []
    if isinstance(node, (c_ast.For, c_ast.Compound)):
        out.append(node)
    for _, child in node.children():
        out += holders_in_order(child)
    return out


# ---------------------------------------------------------------- the copies on the syntax tree

def substituted(node: c_ast.Node, offs: Offsets, renames: dict[str, str],
                kept: dict[tuple[int, int], str] | None = None) -> c_ast.Node:
    """A deep copy of ``node`` with each unrolled iterator ``i`` replaced by ``i + k`` (as the
    copy's text spells it), the renamed locals renamed and the references kept in locals
    (by the line and column of the array's name) replaced: what the copy must parse to."""
    new = copy.deepcopy(node)
    subst = {it: k for it, k in offs if k != 0}
    kept = kept or {}

    def fix(n: c_ast.Node) -> c_ast.Node:
        if isinstance(n, c_ast.ArrayRef) and kept:
            base = n
            while isinstance(base, c_ast.ArrayRef):
                base = base.name
            if isinstance(base, c_ast.ID) and base.coord is not None and (base.coord.line, base.coord.column) in kept:
                return c_ast.ID(kept[(base.coord.line, base.coord.column)])
        if isinstance(n, c_ast.ID):
            if n.name in subst:
                k = subst[n.name]
                return c_ast.BinaryOp("+" if k > 0 else "-", c_ast.ID(n.name), c_ast.Constant("int", str(abs(k))))
            if n.name in renames:
                return c_ast.ID(renames[n.name])
            return n
        if isinstance(n, c_ast.Decl) and n.name in renames:
            n.name = renames[n.name]
        if isinstance(n, c_ast.TypeDecl) and n.declname in renames:
            n.declname = renames[n.declname]
        if isinstance(n, c_ast.StructRef):  # the field name is not a variable
            n.name = fix(n.name)
            return n
        for attr in n.__slots__:
            if attr in ("coord", "__weakref__"):
                continue
            v = getattr(n, attr, None)
            if isinstance(v, c_ast.Node):
                setattr(n, attr, fix(v))
            elif isinstance(v, list):
                setattr(n, attr, [fix(x) if isinstance(x, c_ast.Node) else x for x in v])
        return n

    return fix(new)


def expected_items(body: c_ast.Node, copies: tuple[Offsets, ...], facts: JamFacts,
                   scalars: tuple[ScalarGroup, ...] = ()) -> list[c_ast.Node]:
    """The statements the body of one emitted loop must hold."""
    items: list[c_ast.Node] = []
    for n, offs in enumerate(copies):
        renames = dict(zip(facts.renames, facts.fresh[n - 1])) if n >= 1 and facts.renames else {}
        kept = {(line, col): g.name for g in scalars for (c, line, col) in g.nodes if c == n}
        sub = substituted(body, offs, renames, kept)
        items += list(sub.block_items or []) if isinstance(sub, c_ast.Compound) else [sub]
    return items


def fresh_names(names: list[str], copies: int, taken: set[str]) -> tuple[tuple[str, ...], ...]:
    """New names for the body's locals in copies 1 .. copies-1: ``t_1``, ``t_2``, ... (another
    suffix if one is taken)."""
    out = []
    used = set(taken)
    for n in range(1, copies):
        row = []
        for name in names:
            for cand in itertools.chain([f"{name}_{n}"], (f"{name}_{n}_{k}" for k in itertools.count(2))):
                if cand not in used:
                    used.add(cand)
                    row.append(cand)
                    break
        out.append(tuple(row))
    return tuple(out)
