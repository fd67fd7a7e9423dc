"""Emission: the new loop structure as C text in the file's own style.

Loop headers come from templates/*.c.j2; bodies are copied verbatim from the
original text (comments and macros included) and only re-indented.  The
iteration order of every emitted form is exactly the plan's schedule.
"""
from __future__ import annotations

import re
from dataclasses import dataclass, replace
from pathlib import Path

import jinja2

from .model import Affine, Loop, Nest
from .source import SourceFile, spelled, tokenize
from .transform.tile import Slot, TilePlan


def _template_dir() -> Path:
    here = Path(__file__).resolve().parent
    for cand in (here / "templates", here.parent / "templates"):
        if cand.is_dir():
            return cand
    raise FileNotFoundError("looptile templates directory not found")


_ENV = jinja2.Environment(
    loader=jinja2.FileSystemLoader(str(_template_dir())),
    undefined=jinja2.StrictUndefined,
    keep_trailing_newline=True,
    autoescape=False,
)


def render(template: str, **values: object) -> str:
    return _ENV.get_template(template).render(**values).rstrip("\n")


_LOW_PRECEDENCE = {"<<", ">>", "<", ">", "<=", ">=", "==", "!=", "&", "^", "|", "&&", "||", "?", ":", "=", ","}


def paren(text: str) -> str:
    """``text`` wrapped in parentheses unless it binds at least as tightly as binary minus."""
    toks = tokenize(text)
    depth = 0
    for t in toks:
        if t.text in "([":
            depth += 1
        elif t.text in ")]":
            depth -= 1
        elif depth == 0 and t.kind == "punct" and t.text in _LOW_PRECEDENCE:
            return f"({text})"
    return text


def literal(value: int, lp: Loop) -> str:
    """A tile span or distance as a C constant of the loop's type (suffixed beyond int)."""
    if value <= 2**31 - 1:
        return str(value)
    return f"{value}{'L' if lp.ctype.signed else 'UL'}"


def unsigned_of(lp: Loop) -> str:
    return "unsigned long" if lp.ctype.bits == 64 else "unsigned"


@dataclass(frozen=True)
class Line:
    indent: str
    text: str


class Marked(str):
    """A loop header with the pragma line that goes right before it (placed by pragmas.py)."""

    pragma: str = ""


def marked(header: str, pragma: str) -> str:
    if not pragma:
        return header
    out = Marked(header)
    out.pragma = pragma
    return out


def pragma_lines(indent: str, header: str) -> list[Line]:
    pragma = getattr(header, "pragma", "")
    return [Line(indent, pragma)] if pragma else []


@dataclass(frozen=True)
class EmitFacts:
    """What the analysis established for emission (plain data from deps.py)."""

    wide_distance: frozenset[str] = frozenset()  # loops whose `ub - ii` must be computed unsigned
    c89: bool = False
    # Whole-tile conditions beyond the per-loop distance tests (non-rectangular bands):
    # (a, is_equality) meaning a >= 0 or a == 0, over tile iterators, iterators and parameters.
    full_extra: tuple[tuple[Affine, bool], ...] = ()


def _is_int(text: str) -> bool:
    return re.fullmatch(r"-?\d+", text.strip()) is not None


def _minus(a: str, b: str) -> str:
    if b.strip() == "0":
        return a
    if _is_int(a) and _is_int(b):
        return str(int(a) - int(b))
    return f"{a} - {paren(b) if _is_int(b) and b.strip().startswith('-') else b}"


def _plus(a: str, k: int) -> str:
    if _is_int(a):
        return str(int(a) + k)
    return f"{a} + {k}" if k >= 0 else f"{a} - {-k}"


def c_affine(a: Affine, nest: Nest, keep_order: bool = False) -> str:
    """An affine expression in C, parameters in their source spelling (terms in the order
    given when ``keep_order``, else sorted by name)."""
    spell = {p.name: (p.text if p.kind != "opaque" else paren(p.text)) for p in nest.params}
    if keep_order:
        a = _Ordered(a.terms, a.const)
    return a.render(lambda n: spell.get(n, n)).replace("*", " * ")


class _Ordered(Affine):
    """An Affine whose terms keep their given order (for printing only)."""


def condition_sides(a: Affine, signed: bool) -> tuple[list[tuple[str, int]], list[tuple[str, int]], int, int]:
    """How ``a >= 0`` is printed: (left terms, right terms, left constant, right constant).

    Signed: ``x - y >= c`` (differences of values of one range rarely overflow);
    unsigned: ``x + c1 >= y + c2``, without any subtraction, which would wrap."""
    pos = [(n, c) for n, c in a.terms if c > 0]
    neg = [(n, -c) for n, c in a.terms if c < 0]
    if signed:
        return pos + [(n, -c) for n, c in neg], [], 0, -a.const
    return pos, neg, max(a.const, 0), max(-a.const, 0)


def _terms_text(terms: list[tuple[str, int]], const: int, nest: Nest) -> str:
    return c_affine(Affine(tuple(terms), const), nest, keep_order=True)


def c_condition(a: Affine, eq: bool, nest: Nest, signed: bool = True) -> str:
    left, right, lc, rc = condition_sides(a, signed)
    op = "==" if eq else ">="
    return f"{_terms_text(left, lc, nest)} {op} {_terms_text(right, rc, nest)}"


@dataclass(frozen=True)
class SplitPoint:
    """Where the whole-tile test goes: after the last tile loop."""

    kept: tuple[str, ...]  # iterators with a value at the test
    boxed: tuple[Slot, ...]  # point loops inside the test (their tiles form the box)
    rect: tuple[str, ...]  # boxed loops tested by the distance form (bounds known at the test)


def split_point(nest: Nest, plan: TilePlan) -> SplitPoint:
    slots = list(plan.slots)
    last = max((k for k, s in enumerate(slots) if s.kind == "tile"), default=-1)
    kept = tuple(s.iterator for s in slots[: last + 1] if s.kind != "tile")
    boxed = tuple(s for s in slots[last + 1:] if s.kind == "point")
    rect = []
    for s in boxed:
        tile = next(t for t in slots if t.kind == "tile" and t.iterator == s.iterator)
        lp = nest.loop(s.iterator)
        uses = (lp.start.value.names() | lp.limit.value.names()) & set(nest.iterators)
        if tile.hull is None and s.scan is None and uses <= set(kept):
            rect.append(s.iterator)
    return SplitPoint(kept, boxed, tuple(rect))


def main_and_remainder(plan: TilePlan) -> bool:
    """One strip-mined rectangular loop in split style: a main loop over whole tiles and a
    remainder loop (a non-rectangular one takes the general whole-tile test instead)."""
    rectangular = all(s.hull is None and s.scan is None for s in plan.slots)
    return len(plan.band) == 1 and plan.remainder == "split" and rectangular and not plan.levels


def full_form(lp: Loop, size: int) -> int:
    """Smallest distance to the bound for which a whole tile of ``size`` iterations remains."""
    return lp.step * (size - 1) + (0 if lp.inclusive else 1)


class NestEmitter:
    def __init__(self, src: SourceFile, nest: Nest, plan: TilePlan, facts: EmitFacts, jam=None, omp=None) -> None:
        self.src, self.nest, self.plan, self.facts = src, nest, plan, facts
        self.jam = jam  # an emit_jam.JamContext when the plan unrolls and jams inside the tiles
        self.omp = omp  # a pragmas.Placement: which loops get which pragma lines
        self.unit = src.indent_unit
        self.base = src.indent_of(nest.start)
        inner = nest.perfect[-1]
        self.body_indent = src.indent_of(inner.for_offset)
        self.loops = {lp.iterator: lp for lp in nest.perfect}
        self.hulls = {s.iterator: s.hull is not None for s in plan.slots if s.kind == "tile"}

    # -- pieces of loop headers
    def _decl(self, lp: Loop, tile: bool) -> str:
        if self.facts.c89:
            return ""
        if lp.declared_in_for or tile:
            return lp.ctype.spelling + " "
        return ""

    def _limit(self, lp: Loop) -> str:
        return paren(lp.limit.text)

    def _dist(self, lp: Loop, v: str, far: str | None = None) -> str:
        """Distance from ``v`` to the loop's far end, in a type where it cannot overflow."""
        far = self._limit(lp) if far is None else far
        if lp.iterator in self.facts.wide_distance:
            u = unsigned_of(lp)
            return f"({u}){far} - ({u}){v}" if lp.direction > 0 else f"({u}){v} - ({u}){far}"
        return _minus(far, v) if lp.direction > 0 else _minus(v, far)

    def _past(self, lp: Loop) -> str:
        far = self._limit(lp)
        if not lp.inclusive:
            return far
        return _plus(far, 1 if lp.direction > 0 else -1)

    def _step_text(self, lp: Loop) -> str:
        toks = self._header_tokens(lp)
        semis = [k for k, t in enumerate(toks) if t.text == ";"]
        return spelled(self.src.text, toks[semis[-1] + 1:-1])

    def _full(self, lp: Loop, size: int) -> int:
        return full_form(lp, size)

    def tile_header(self, s: Slot) -> str:
        lp = self.loops[s.iterator]
        span = literal(lp.step * (s.size or 1), lp)
        if s.hull is not None:
            return self._hull_tile_header(s, lp, span)
        if s.level > 1:  # inside the tile of the level outside: starts there, ends at its end or the bound
            parent = max((t for t in self.plan.slots if t.kind == "tile" and t.iterator == s.iterator
                          and t.level < s.level), key=lambda t: t.level)
            offset = f"{s.name} - {parent.name}" if lp.direction > 0 else f"{parent.name} - {s.name}"
            return render("tile_loop_inner.c.j2", decl=self._decl(lp, True), name=s.name, parent=parent.name,
                          op=lp.op, limit=self._limit(lp), offset=offset,
                          parent_span=literal(lp.step * (parent.size or 1), lp), dist=self._dist(lp, s.name),
                          more=">=" if lp.inclusive else ">", span=span, sign="+" if lp.direction > 0 else "-",
                          past=self._past(lp))
        return render("tile_loop.c.j2", decl=self._decl(lp, True), name=s.name, start=lp.start.text, op=lp.op,
                      limit=self._limit(lp), dist=self._dist(lp, s.name), more=">=" if lp.inclusive else ">",
                      span=span, sign="+" if lp.direction > 0 else "-", past=self._past(lp))

    def _marked(self, k: int, s: Slot, header: str) -> str:
        """Slot ``k``'s header with the pragma the placement gives it: a worksharing loop's tile
        loop in OpenMP's canonical form (OpenMP 5.2, 4.4.1 "Canonical Loop Nest Form", from
        memory: incr-expr ``var += incr`` with a loop-invariant incr, test-expr ``var op b``; the
        conditional increment of our tile loops is not one of them)."""
        om = self.omp
        if om is None:
            return header
        if om.parallel_at(k):
            if s.kind == "tile":
                header = self.omp_tile_header(s)
            return marked(header, om.parallel_text if k == om.parallel_slot else "")
        if k == len(self.plan.slots) - 1:
            return marked(header, om.innermost_text)
        return header

    def omp_tile_header(self, s: Slot) -> str:
        """``for (ii = start; ii < limit; ii += T)``: the increment past the last tile is covered by
        the overflow guard (pragmas.Placement.overflow_terms)."""
        lp = self.loops[s.iterator]
        start, op, limit = lp.start.text, lp.op, self._limit(lp)
        if s.hull is not None:
            lowers, uppers = s.hull
            if lp.direction > 0:
                one = Affine(const=1)
                start, op = c_affine(lowers[0], self.nest), "<"
                limit = self._extremum([c_affine(hi + one, self.nest) for hi in uppers], "<")
            else:
                start, op = c_affine(uppers[0], self.nest), ">="
                limit = self._extremum([c_affine(lo, self.nest) for lo in lowers], ">")
        return render("tile_loop_omp.c.j2", decl=self._decl(lp, True), name=s.name, start=start, op=op,
                      limit=limit, sign="+" if lp.direction > 0 else "-", span=literal(lp.step * (s.size or 1), lp))

    def omp_clamp_header(self, s: Slot, tile: str) -> str:
        """The clamped point loop in canonical form, its bound one loop-invariant expression:
        ``i < (n - ii > T ? ii + T : n)`` (``<=``: ``i <= (n - ii >= T ? ii + (T-1) : n)``); the
        near end is computed only when it is inside the loop's range."""
        lp = self.loops[s.iterator]
        span = lp.step * (s.size or 1)
        sign = "+" if lp.direction > 0 else "-"
        near = f"{tile} {sign} {literal(span - 1 if lp.inclusive else span, lp)}"
        bound = f"({self._dist(lp, tile)} {'>=' if lp.inclusive else '>'} {literal(span, lp)} ? {near} : " \
                f"{self._limit(lp)})"
        start = tile
        if self.hulls.get(s.iterator):
            own = paren(lp.start.text)
            start = f"({tile} > {own} ? {tile} : {own})" if lp.direction > 0 else f"({tile} < {own} ? {tile} : {own})"
        return f"for ({self._decl(lp, False)}{s.name} = {start}; {s.name} {lp.op} {bound}; {self._step_text(lp)})"

    def _hull_tile_header(self, s: Slot, lp: Loop, span: int) -> str:
        """Tile loop over the loop's hull, written like a rectangular loop.

        Up: from the smallest value while below the largest + 1; down: from the
        largest value while not below the smallest.  Both ends are values the
        original loop also computes, so no new overflow."""
        assert s.hull is not None
        lowers, uppers = s.hull
        one = Affine(const=1)
        if lp.direction > 0:
            near = c_affine(lowers[0], self.nest)
            far = self._extremum([c_affine(hi + one, self.nest) for hi in uppers], "<")
            op, more, past = "<", ">", far
        else:
            near = c_affine(uppers[0], self.nest)
            far = self._extremum([c_affine(lo, self.nest) for lo in lowers], ">")
            op, more, past = ">=", ">=", _plus(far, -1)
        return render("tile_loop.c.j2", decl=self._decl(lp, True), name=s.name, start=near, op=op, limit=far,
                      dist=self._dist(lp, s.name, far), more=more, span=span,
                      sign="+" if lp.direction > 0 else "-", past=past)

    @staticmethod
    def _extremum(terms: list[str], op: str) -> str:
        """min (op "<") or max (op ">") of C expressions, as nested conditionals."""
        out = paren(terms[0])
        for t in terms[1:]:
            out = f"({out} {op} {paren(t)} ? {out} : {paren(t)})"
        return out

    def point_header(self, s: Slot, tile: str, full: bool) -> str:
        lp = self.loops[s.iterator]
        span = literal(lp.step * (s.size or 1), lp)
        if s.scan is not None and not full:
            return self.scan_header(s, tile, lp)
        if full:
            return render("point_loop_full.c.j2", decl=self._decl(lp, False), name=s.name, tile=tile,
                          op="<" if lp.direction > 0 else ">", sign="+" if lp.direction > 0 else "-", span=span,
                          step=self._step_text(lp))
        offset = f"{s.name} - {tile}" if lp.direction > 0 else f"{tile} - {s.name}"
        start = tile
        if self.hulls.get(s.iterator):  # the tile grid starts below this loop's own start
            own = paren(lp.start.text)
            start = f"({tile} > {own} ? {tile} : {own})" if lp.direction > 0 else f"({tile} < {own} ? {tile} : {own})"
        return render("point_loop_clamp.c.j2", decl=self._decl(lp, False), name=s.name, start=start, op=lp.op,
                      limit=self._limit(lp), offset=offset, span=span, step=self._step_text(lp))

    def plain_header(self, s: Slot) -> str:
        lp = self.loops[s.iterator]
        if s.scan is not None:
            return self.scan_header(s, None, lp)
        return spelled(self.src.text, self._header_tokens(lp))

    def _header_tokens(self, lp: Loop):
        """The code tokens of ``for (...)`` (comments there are moved before the nest)."""
        return [t for t in tokenize(self.src.text, lp.for_offset, lp.header_end) if t.kind not in ("comment", "pp")]

    def scan_header(self, s: Slot, tile: str | None, lp: Loop) -> str:
        """A loop over max(lowers) .. min(uppers) (reversed for a down-counting loop),
        clamped to its tile when it is a point loop."""
        assert s.scan is not None
        lowers, uppers = s.scan
        up = lp.direction > 0
        near = [c_affine(a, self.nest) for a in (lowers if up else uppers)]
        if tile is not None:
            near = [tile] + near
        start = near[0]
        for other in near[1:]:
            start = f"({start} > {paren(other)} ? {start} : {paren(other)})" if up else \
                f"({start} < {paren(other)} ? {start} : {paren(other)})"
        if up:
            conds = [f"{s.name} < {paren(c_affine(u + Affine(const=1), self.nest))}" for u in uppers]
        else:
            conds = [f"{s.name} >= {paren(c_affine(lo_, self.nest))}" for lo_ in lowers]
        if tile is not None:
            span = literal(lp.step * (s.size or 1), lp)
            conds.append(f"{s.name} - {tile} < {span}" if up else f"{tile} - {s.name} < {span}")
        decl = self._decl(lp, False)
        return f"for ({decl}{s.name} = {start}; {' && '.join(conds)}; {self._step_text(lp)})"

    def full_test(self, slots: list[Slot], tiles: dict[str, str]) -> str:
        parts = []
        for s in slots:
            if s.kind == "point":
                lp = self.loops[s.iterator]
                if s.iterator in split_point(self.nest, self.plan).rect:
                    full = literal(self._full(lp, s.size or 1), lp)
                    parts.append(f"{self._dist(lp, tiles[s.iterator])} >= {full}")
        signed = self.loops[self.plan.band[0]].ctype.signed
        parts += [c_condition(a, eq, self.nest, signed) for a, eq in self.facts.full_extra]
        return " && ".join(parts)

    # -- structure
    def body_lines(self, indent: str) -> list[Line]:
        inner = self.nest.perfect[-1]
        text = self.src.text[inner.body_start:inner.body_end].replace("\r\n", "\n")
        raw = text.split("\n")
        out = []
        for k, line in enumerate(raw):
            if k == 0:
                out.append(Line(indent, line))
            elif not line.strip():
                out.append(Line("", ""))
            elif line.startswith(self.body_indent):
                out.append(Line(indent, line[len(self.body_indent):]))
            else:
                out.append(Line("", line))
        return out

    def _body_same_line(self) -> bool:
        inner = self.nest.perfect[-1]
        return "\n" not in self.src.text[inner.header_end:inner.body_start]

    def _body_rel_indent(self) -> str:
        inner = self.nest.perfect[-1]
        ind = self.src.indent_of(inner.body_start)
        if ind.startswith(self.body_indent) and len(ind) > len(self.body_indent):
            return ind[len(self.body_indent):]
        return self.unit

    def loops_and_body(self, headers: list[str], depth: int) -> list[Line]:
        out = []
        for h in headers:
            out += pragma_lines(self.base + self.unit * depth, h)
            out.append(Line(self.base + self.unit * depth, h))
            depth += 1
        ind = self.base + self.unit * (depth - 1)
        body = self.body_lines(ind)
        if self._body_same_line() and out:
            first = out.pop()
            out.append(Line(first.indent, first.text + " " + body[0].text))
        else:
            rel = self._body_rel_indent() if out else ""
            out.append(Line(ind + rel, body[0].text))
        out.extend(body[1:])
        return out

    def nest_lines(self) -> list[Line]:
        plan = self.plan
        slots = list(plan.slots)
        tiles: dict[str, str] = {}
        headers: list[str] = []
        tile_positions = [k for k, s in enumerate(slots) if s.kind == "tile"]
        if not tile_positions:
            return self.loops_and_body([self._marked(k, s, self.plain_header(s)) for k, s in enumerate(slots)], 0)
        last_tile = tile_positions[-1]
        single = main_and_remainder(plan)
        for k, s in enumerate(slots[: last_tile + (0 if single else 1)]):
            if s.kind == "tile":
                tiles[s.iterator] = s.name
                headers.append(self._marked(k, s, self.tile_header(s)))
            elif s.kind == "point":
                headers.append(self._marked(k, s, self.point_header(s, tiles[s.iterator], full=False)))
            else:
                headers.append(self._marked(k, s, self.plain_header(s)))
        rest = slots[last_tile + 1:]
        depth = len(headers)
        if single:
            return self._main_and_remainder(headers, slots[last_tile], rest)
        if plan.remainder == "clamp" or not any(s.kind == "point" for s in rest):
            return self._run(headers, rest, "clamp", tiles, 0)
        out = self._headers_only(headers, 0)
        ind = self.base + self.unit * depth
        test = self.full_test(rest, tiles)
        if not test:  # every tile is whole wherever these loops run: the fast path alone
            return out + self._run([], rest, "fast", tiles, depth)
        out.append(Line(ind, f"if ({test}) {{"))
        out.extend(self._run([], rest, "fast", tiles, depth + 1))
        out.append(Line(ind, "} else {"))
        out.extend(self._run([], rest, "clamp", tiles, depth + 1))
        out.append(Line(ind, "}"))
        return out

    def _run(self, prefix: list[str], rest: list[Slot], mode: str, tiles: dict[str, str], depth: int) -> list[Line]:
        """The loops inside the tiles and the body: ``prefix`` headers, then the ``rest`` slots
        in ``mode`` "fast" (whole tiles), "clamp" (bounds clamped to the tile) or "remainder"
        (the single loop's remainder tile); unrolled and jammed when the plan says so."""
        if self.jam is None:
            return self.loops_and_body(prefix + [self._rest_header(s, mode, tiles) for s in rest], depth)
        from .emit_jam import JamEmitter
        em = JamEmitter(self.src, self.jam.target, [self._form(s, mode, tiles) for s in rest], self.jam.facts,
                        self.jam.body, self.base, self.jam.scalarize)
        return self._headers_only(prefix, depth) + em.lines(depth + len(prefix))

    def _rest_header(self, s: Slot, mode: str, tiles: dict[str, str]) -> str:
        last = len(self.plan.slots) - 1
        if self.omp is not None and s is self.plan.slots[last]:  # every copy of the innermost loop
            canonical = self.omp.canonical_clamp and s.kind == "point" and mode == "clamp"
            header = self.omp_clamp_header(s, tiles[s.iterator]) if canonical else \
                self._unmarked_rest_header(s, mode, tiles)
            return self._marked(last, s, header)
        return self._unmarked_rest_header(s, mode, tiles)

    def _unmarked_rest_header(self, s: Slot, mode: str, tiles: dict[str, str]) -> str:
        if s.kind != "point":
            return self.plain_header(s)
        if mode == "remainder":
            lp = self.loops[s.iterator]
            return render("remainder_loop.c.j2", decl=self._decl(lp, False), name=s.name, tile=tiles[s.iterator],
                          op=lp.op, limit=self._limit(lp), step=self._step_text(lp))
        return self.point_header(s, tiles[s.iterator], mode == "fast")

    def _form(self, s: Slot, mode: str, tiles: dict[str, str]):
        """How a loop inside the tiles is emitted when the plan unrolls and jams (emit_jam.LoopForm)."""
        from .emit_jam import LoopForm, distance, own_bounds_form
        lp = self.loops[s.iterator]
        u = dict(self.plan.jam).get(s.iterator, 1)
        wide = s.iterator in self.facts.wide_distance or s.iterator in self.jam.facts.wide_distance
        if s.kind != "point" and s.scan is None:  # an untouched loop inside the tiles: its own header
            return own_bounds_form(self.src, lp, u, wide)
        header = self._rest_header(s, mode, tiles)
        name, limit = s.name, self._limit(lp)
        tile = tiles[s.iterator]
        runs = "" if mode == "fast" else f"{tile} {lp.op} {limit}"
        if u == 1:
            return LoopForm(s.iterator, header=header, runs=runs)
        sign = "+" if lp.direction > 0 else "-"
        strip = literal(lp.step * u, lp)
        whole = f"{distance(lp, wide, limit)} >= {literal(full_form(lp, u), lp)}"
        step = self._step_text(lp)
        decl = f"{lp.ctype.spelling} {name};" if self._decl(lp, False) else None
        rem: str | None
        if mode == "fast":  # a whole tile: every strip is whole (the tile size is a multiple of u)
            span = literal(lp.step * (s.size or 1), lp)
            main = f"for ({name} = {tile}; {name} {'<' if lp.direction > 0 else '>'} {tile} {sign} {span}; " \
                   f"{name} {sign}= {strip})"
            rem = None
        elif mode == "clamp":
            span = literal(lp.step * (s.size or 1), lp)
            offset = f"{name} - {tile}" if lp.direction > 0 else f"{tile} - {name}"
            main = f"for ({name} = {tile}; {name} {lp.op} {limit} && {offset} < {span} && {whole}; " \
                   f"{name} {sign}= {strip})"
            rem = f"for (; {name} {lp.op} {limit} && {offset} < {span}; {step})"
        else:
            main = f"for ({name} = {tile}; {name} {lp.op} {limit} && {whole}; {name} {sign}= {strip})"
            rem = f"for (; {name} {lp.op} {limit}; {step})"
        return LoopForm(s.iterator, u, decl=decl, main=main, remainder=rem, offset=lp.step * lp.direction, runs=runs)

    def _headers_only(self, headers: list[str], depth: int) -> list[Line]:
        out: list[Line] = []
        for k, h in enumerate(headers):
            out += pragma_lines(self.base + self.unit * (depth + k), h)
            out.append(Line(self.base + self.unit * (depth + k), h))
        return out

    def _main_and_remainder(self, headers: list[str], tile: Slot, rest: list[Slot]) -> list[Line]:
        """One strip-mined loop: a main loop over whole tiles, then the remainder loop."""
        lp = self.loops[tile.iterator]
        out = self._headers_only(headers, 0)
        depth = len(headers)
        ind = self.base + self.unit * depth
        span = literal(lp.step * (tile.size or 1), lp)
        out.append(Line(ind, "{"))
        out.append(Line(ind + self.unit, f"{lp.ctype.spelling} {tile.name};"))
        main = render("main_loop.c.j2", name=tile.name, start=lp.start.text, op=lp.op, limit=self._limit(lp),
                      dist=self._dist(lp, tile.name), full=literal(self._full(lp, tile.size or 1), lp), span=span,
                      sign="+" if lp.direction > 0 else "-")
        tiles = {tile.iterator: tile.name}
        out.extend(self._run([main], rest, "fast", tiles, depth + 1))
        out.extend(self._run([], rest, "remainder", tiles, depth + 1))
        out.append(Line(ind, "}"))
        return out

    def _shift(self, lines: list[Line]) -> list[Line]:
        return [replace(ln, indent=ln.indent + self.unit) if ln.indent.startswith(self.base) else ln for ln in lines]

    def versioned(self, lines: list[Line], checks: list[str]) -> list[Line]:
        """``if (checks) { rewrite } else { original nest }``."""
        text = self.src.text[self.nest.start:self.nest.end].replace("\r\n", "\n").split("\n")
        original = [Line(self.base, text[0])] + [
            Line(self.base, ln[len(self.base):]) if ln.startswith(self.base) else Line("", ln) for ln in text[1:]]
        if self.omp is not None:  # the untouched copy keeps the pragma the rewrite moved
            original = [Line(self.base, p) for p in self.omp.original_prefix] + original
        return ([Line(self.base, f"if ({' && '.join(checks)}) {{")] + self._shift(lines) +
                [Line(self.base, "} else {")] + self._shift(original) + [Line(self.base, "}")])

    def c89_wrap(self, lines: list[Line]) -> list[Line]:
        decls = [f"{self.loops[s.iterator].ctype.spelling} {s.name};" for s in self.plan.slots if s.kind == "tile"]
        if not self.facts.c89 or not decls or main_and_remainder(self.plan):
            return lines
        shifted = self._shift(lines)
        return [Line(self.base, "{")] + [Line(self.base + self.unit, d) for d in decls] + shifted + \
               [Line(self.base, "}")]


def emit_nest(src: SourceFile, nest: Nest, plan: TilePlan, facts: EmitFacts, guard: str,
              checks: list[str] | None = None, jam=None, omp=None) -> str:
    """The replacement text for nest.start..nest.end (first line starts at the for's column).

    With ``checks``, the rewrite runs only when they hold and the original nest otherwise.
    With ``jam`` (an emit_jam.JamContext), loops inside the tiles are unrolled and jammed; the
    lines of the loops holding copies are recorded in it. With ``omp`` (a pragmas.Placement), the
    pragmas of the nest are printed on their loops."""
    em = NestEmitter(src, nest, plan, facts, jam, omp)
    lines = [Line(em.base, ln) for ln in guard.split("\n")]
    lines += [Line(em.base, c.replace("\r\n", "\n")) for c in nest.header_comments]
    body = em.c89_wrap(em.nest_lines())
    if checks:
        body = em.versioned(body, checks)
    lines += body
    text = render("nest.c.j2", lines=lines)
    line_start = src.line_starts[src.line_col(nest.start)[0] - 1]
    prefix = 0
    if src.text[line_start:nest.start].strip():  # code or a comment before the nest on its line
        text = "\n" + em.base + text
        prefix = 1
    if jam is not None:
        from .emit_jam import site_lines
        jam.sites = [(k + prefix, site) for k, site in site_lines(lines)]
    return text.replace("\n", src.newline) if src.newline != "\n" else text


def _comment_safe(text: str) -> str:
    """Text that cannot end (or open) the C comment it is placed in."""
    return text.replace("*/", "*\\/").replace("/*", "/\\*")


def guard_comment(what: str, constrained: list[str], assumptions: str, command: str) -> str:
    return render("guard.c.j2", what=_comment_safe(what), constrained=[_comment_safe(c) for c in constrained],
                  assumptions=_comment_safe(assumptions), command=_comment_safe(command))


GUARD_MARK = re.compile(r"/\*\s*looptile:")


def _partials(a: Affine) -> list[Affine]:
    """The values C computes while evaluating ``c_affine(a)`` left to right: each product
    and each partial sum."""
    out: list[Affine] = []
    acc = Affine()
    for n, c in a.terms:
        term = Affine(((n, c),))
        out.append(term)
        acc = acc + term
        out.append(acc)
    if a.const:
        out.append(acc + Affine(const=a.const))
    return out


def printed_expressions(nest: Nest, plan: TilePlan, facts: EmitFacts) -> list[tuple[Affine, int, bool]]:
    """Every affine expression that emission prints from the analysis (hulls, moved-loop
    bounds, whole-tile tests), as (partial value, bits, signed) of the C type it is
    computed in, for the overflow check."""
    types = {p.name: p.ctype for p in nest.params}
    out: list[tuple[Affine, int, bool]] = []

    def add(a: Affine, lp: Loop) -> None:
        bits, signed = lp.ctype.bits, lp.ctype.signed
        for n in a.names():
            t = types.get(n)
            if t is not None and t.is_int:
                bits, signed = max(bits, t.bits), signed and t.signed
        out.extend((p, bits, signed) for p in _partials(a))

    one = Affine(const=1)
    for s in plan.slots:
        lp = nest.loop(s.iterator)
        if s.hull is not None:
            lowers, uppers = s.hull
            for a in ((*lowers, *(hi + one for hi in uppers)) if lp.direction > 0
                      else (*uppers, *lowers, *(lo - one for lo in lowers))):
                add(a, lp)
        if s.scan is not None:
            lowers, uppers = s.scan
            for a in (lowers if lp.direction > 0 else uppers):
                add(a, lp)
            for a in ([u + one for u in uppers] if lp.direction > 0 else list(lowers) + [lo - one for lo in lowers]):
                add(a, lp)  # down: the iterator also reaches lower - 1 (it must not wrap)
    first = nest.loop(plan.band[0]) if plan.band else nest.perfect[0]
    for a, _eq in facts.full_extra:
        left, right, lc, rc = condition_sides(a, first.ctype.signed)
        add(_Ordered(tuple(left), lc), first)
        add(_Ordered(tuple(right), rc), first)
    return out
