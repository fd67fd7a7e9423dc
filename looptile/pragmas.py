"""Pragmas on and in a nest: where each goes after a rewrite, or why the rewrite is refused.

Only the placement of a pragma changes; its loop is always the same original loop:

- ``#pragma omp parallel for`` / ``#pragma omp for`` on the outermost loop goes on the
  outermost loop of the new order when the analysis proves that loop carries no dependence
  (``NestAnalysis.carried``), with its clauses where they stay valid and ``private`` gaining
  every iterator declared outside the construct; ``--parallel`` adds one on the outermost loop
  outside the tiles that carries no dependence.
- ``#pragma omp simd`` and the loop hints ``GCC ivdep``, ``GCC unroll N``, ``GCC novector`` on
  the innermost loop go on every copy of that loop's point loop (full path, clamped path,
  remainder loop) when it is still innermost.
- Loop hints on loops inside the copied body stay where they are (the body is copied verbatim).

Everything else is a ``Refusal`` at the pragma's own ``file:line:col``.  OpenMP rules are
cited from the OpenMP API specification 5.2 (from memory) beside each check.
"""
from __future__ import annotations

import re
from dataclasses import dataclass, field

from pycparser import c_ast

from .errors import Refusal
from .frontend import TranslationUnit
from .model import Affine, Nest
from .source import Token, tokenize
from .transform.tile import TilePlan

PRAGMA = re.compile(r"#\s*pragma\b")
# Loop hints whose meaning is a property of the iterations of one run of their loop: they hold
# for any run of a subset of those iterations in the same order (a point loop). GCC manual,
# "Loop-Specific Pragmas" (from memory).
GCC_HINTS = ("ivdep", "unroll", "novector")
# OpenMP directive names (5.2, 3.1 "Directive Format" and the constructs' own sections, from
# memory), so that a clause spelled like a directive (``ordered``) is read as a clause.
_OMP_DIRECTIVES = {tuple(d.split()) for d in """parallel for|for|simd|for simd|parallel for simd|parallel|loop|
    parallel loop|teams|distribute|teams distribute|distribute parallel for|taskloop|taskloop simd|masked|master|
    unroll|tile|ordered|critical|atomic|single|sections|section|task|barrier|flush|threadprivate|scan|
    metadirective|nothing|target|target teams|target parallel|target parallel for|declare simd|
    declare target|declare reduction|interchange|reverse""".replace("\n", "").split("|")}


@dataclass(frozen=True)
class Clause:
    name: str
    args: str | None = None  # the text between the parentheses, as written

    def render(self) -> str:
        return self.name if self.args is None else f"{self.name}({self.args})"

    def names(self) -> list[str]:
        """The list items of a variable-list clause (``private(a, b)``)."""
        return [x.strip() for x in (self.args or "").split(",") if x.strip()]


@dataclass(frozen=True)
class Pragma:
    text: str  # as written (continuation lines included)
    start: int
    end: int
    line: int
    col: int
    family: str  # "omp", "GCC" or the first word
    directive: str  # "parallel for", "simd", "ivdep", ...
    clauses: tuple[Clause, ...] = ()
    problem: str | None = None  # why the clauses could not be read

    @property
    def name(self) -> str:
        return " ".join(["#pragma", self.family, self.directive]).strip()

    def clause(self, name: str) -> list[Clause]:
        return [c for c in self.clauses if c.name == name]


def parse(tok: Token, src) -> Pragma:
    """A pragma line read as family, directive name and a clause list ``name(args)``."""
    text = tok.text.replace("\\\r\n", " ").replace("\\\n", " ")
    body = PRAGMA.sub("", text, count=1).strip()
    toks = [t for t in tokenize(body) if t.kind != "comment"]
    line, col = src.line_col(tok.start)
    where = dict(text=tok.text, start=tok.start, end=tok.end, line=line, col=col)
    if not toks:
        return Pragma(family="", directive="", **where)
    family = toks[0].text
    k = 1
    words = []
    if family == "omp":
        while k < len(toks) and any(d[:len(words) + 1] == (*words, toks[k].text) for d in _OMP_DIRECTIVES):
            words.append(toks[k].text)
            k += 1
    elif family == "GCC" and k < len(toks):
        words.append(toks[k].text)
        k += 1
    clauses, problem = _clauses(body, toks[k:])
    return Pragma(family=family, directive=" ".join(words), clauses=tuple(clauses), problem=problem, **where)


def _clauses(body: str, toks: list[Token]) -> tuple[list[Clause], str | None]:
    out: list[Clause] = []
    k = 0
    while k < len(toks):
        t = toks[k]
        if t.text == ",":
            k += 1
            continue
        if t.kind not in ("id", "num"):
            return out, f"'{t.text}' is not a clause"
        if k + 1 < len(toks) and toks[k + 1].text == "(":
            depth, j = 0, k + 1
            while j < len(toks):
                depth += {"(": 1, ")": -1}.get(toks[j].text, 0)
                if depth == 0:
                    break
                j += 1
            if j == len(toks):
                return out, f"the parenthesis after '{t.text}' is not closed"
            out.append(Clause(t.text, body[toks[k + 1].end:toks[j].start].strip()))
            k = j + 1
        else:
            out.append(Clause(t.text))
            k += 1
    return out, None


def _refuse(tu: TranslationUnit, p: Pragma, why: str) -> Refusal:
    text = " ".join(p.text.replace("\\\r\n", " ").replace("\\\n", " ").split())
    return Refusal(f"'{text}' {why}", path=tu.source.path, line=p.line, column=p.col,
                   source_line=tu.source.line_text(p.line))


# ---------------------------------------------------------------- finding them

@dataclass(frozen=True)
class NestPragmas:
    on_loops: tuple[tuple[int, Pragma], ...] = ()  # (index of the perfect loop, the pragma right before it)
    body: tuple[Pragma, ...] = ()  # loop hints inside the copied body

    def on(self, k: int) -> Pragma | None:
        return next((p for j, p in self.on_loops if j == k), None)


def pragma_before(tu: TranslationUnit, offset: int, skip_offset: int | None = None) -> Token | None:
    """The pragma line right before ``offset`` (comments between are allowed), else None;
    ``skip_offset`` is a directive being carried out, which is looked past."""
    prev = tu.token_before(offset, skip=("comment",))
    if prev is not None and skip_offset is not None and prev.start == skip_offset:
        prev = tu.token_before(prev.start, skip=("comment",))
    if prev is not None and prev.kind == "pp" and PRAGMA.match(prev.text):
        return prev
    return None


def collect(tu: TranslationUnit, nest: Nest, directive: int | None) -> NestPragmas:
    """The pragmas right before each perfect loop and the loop hints inside the body."""
    on = []
    for k, lp in enumerate(nest.perfect):
        tok = pragma_before(tu, lp.for_offset, directive if k == 0 else None)
        if tok is None:
            continue
        p = parse(tok, tu.source)
        if k == 0 and directive is not None and tok.start < directive:
            raise _refuse(tu, p, "comes before the looptile directive, so it would apply to the loops that the "
                          "directive generates; move it after the directive")
        if pragma_before(tu, tok.start) is not None:
            raise _refuse(tu, p, "follows another pragma; looptile moves one pragma per loop, so it leaves a loop "
                          "with several pragmas alone")
        on.append((k, p))
    inner = nest.perfect[-1]
    body = tuple(parse(t, tu.source) for t in tu.all_between(inner.body_start, inner.body_end)
                 if t.kind == "pp" and PRAGMA.match(t.text))
    return NestPragmas(tuple(on), body)


def between_headers(tu: TranslationUnit, pps: list[Token], nest_loops) -> list[Token]:
    """The preprocessor lines between the perfect loops' headers that are not a pragma right
    before one of the inner perfect loops (those are placed by ``place``)."""
    attached = {t.start for lp in nest_loops[1:] for t in [pragma_before(tu, lp.for_offset)] if t is not None}
    return [t for t in pps if t.start not in attached]


def for_after_pragmas(node: c_ast.Node) -> c_ast.For | None:
    """The loop of a block that holds only pragmas and then one ``for``."""
    if isinstance(node, c_ast.Compound) and node.block_items and len(node.block_items) >= 2:
        *lead, last = node.block_items
        if isinstance(last, c_ast.For) and all(isinstance(x, c_ast.Pragma) for x in lead):
            return last
    return None


def check_body_pragma(ctx, node: c_ast.Pragma) -> None:
    """A pragma inside the copied body: kept in place when it is a loop hint right before a
    ``for`` (the loop and its iterations are copied unchanged), else refused."""
    tu = ctx.tu
    src = tu.source
    line = node.coord.line if node.coord is not None else 0
    start = src.line_starts[line - 1] if 1 <= line <= len(src.line_starts) else 0
    end = src.line_starts[line] if line < len(src.line_starts) else len(src.text)
    tok = next((t for t in tu.all_between(start, end) if t.kind == "pp" and PRAGMA.match(t.text)), None)
    if tok is None:
        raise ctx.refuse(f"the pragma '{node.string}' inside the nest is not a #pragma line (a _Pragma operator or "
                         "a macro), so looptile cannot keep it in place; it leaves the nest alone", node)
    p = parse(tok, src)
    nxt = tu.tokens[tu.code_index(tok.end)] if tu.code_index(tok.end) < len(tu.tokens) else None
    hint = (p.family == "omp" and p.directive == "simd") or (p.family == "GCC" and p.directive in GCC_HINTS)
    if not hint:
        raise _refuse(tu, p, "inside the nest is not a loop hint (omp simd, GCC ivdep/unroll/novector) that the "
                      "rewrite could keep with its loop; looptile leaves the nest alone (remove it or select a nest "
                      "without it)")
    if nxt is None or nxt.text != "for" or pragma_before(tu, nxt.start) is not tok:
        raise _refuse(tu, p, "inside the nest is not right before a for loop, so looptile cannot tell what it "
                      "applies to; it leaves the nest alone")
    if p.problem:
        raise _refuse(tu, p, f"cannot be read ({p.problem})")


# ---------------------------------------------------------------- placing them

@dataclass(frozen=True)
class Placement:
    """Where the pragmas go in the rewritten nest (emit.py prints them)."""

    parallel_slot: int | None = None  # index in plan.slots of the loop that gets ``parallel_text``
    parallel_text: str = ""
    collapse: int = 1  # that many loops from parallel_slot are associated (canonical headers)
    innermost_text: str = ""  # before every copy of the innermost loop
    canonical_clamp: bool = False  # the clamped point loop in OpenMP canonical form (omp simd)
    removed: tuple[int, ...] = ()  # offsets of pragma lines before the nest that the rewrite removes
    original_prefix: tuple[str, ...] = ()  # lines before the untouched copy of a versioned output
    notes: tuple[str, ...] = field(default=())

    def parallel_at(self, k: int) -> bool:
        return self.parallel_slot is not None and self.parallel_slot <= k < self.parallel_slot + self.collapse

    def guard_lines(self, plan: TilePlan) -> tuple[str, ...]:
        """What the guard comment records about the pragmas."""
        out = []
        if self.parallel_slot is not None:
            names = ", ".join(s.name for s in plan.slots[self.parallel_slot:self.parallel_slot + self.collapse])
            out.append(f"worksharing on loop {names}: it carries no dependence (proven; the threads share only "
                       "what the analysis sees, so the no-overlap assumption below covers them too)")
        if self.innermost_text:
            out.append(f"'{self.innermost_text.removeprefix('#pragma ')}' kept on every copy of loop "
                       f"'{plan.slots[-1].name}'")
        return tuple(out)

    def overflow_terms(self, nest: Nest, plan: TilePlan) -> list[tuple[Affine, int, bool]]:
        """``ii + span`` of every canonical tile loop over a hull (its increment runs once past
        the last tile), for the overflow guard of pipeline (isl): (expression, bits, signed)."""
        out = []
        for k, s in enumerate(plan.slots):
            if s.kind == "tile" and self.parallel_at(k) and (s.hull is not None or
                                                              self._reach_check(nest, s) is None):
                lp = nest.loop(s.iterator)
                span = lp.step * (s.size or 1) * lp.direction
                out.append((Affine.symbol(s.name) + Affine(const=span), lp.ctype.bits, lp.ctype.signed))
        return out

    def overflow_checks(self, nest: Nest, plan: TilePlan) -> list[str]:
        """C conditions under which the increment ``ii += T`` of a canonical rectangular tile loop
        cannot overflow: the last tile starts at most at ``limit - 1`` (``limit`` for ``<=``), so
        ``limit - 1 + T`` must fit the iterator's type (down-counting: ``limit + 1 - T``)."""
        out = []
        for k, s in enumerate(plan.slots):
            if s.kind != "tile" or not self.parallel_at(k) or s.hull is not None:
                continue
            lp = nest.loop(s.iterator)
            where = dict(path=nest.path, line=lp.line, column=lp.col)
            if lp.ctype.bits < 32:
                raise Refusal(f"the worksharing tile loop of '{lp.iterator}' steps by {lp.step * (s.size or 1)} "
                              f"in type {lp.ctype.spelling}, narrower than int; looptile does not emit that", **where)
            check = self._reach_check(nest, s)
            if check is False:
                raise Refusal(f"the worksharing tile loop of '{lp.iterator}' ({s.name} "
                              f"{'+' if lp.direction > 0 else '-'}= {lp.step * (s.size or 1)}) would step out of the "
                              f"range of {lp.ctype.spelling} after its last tile, for every size", **where)
            if isinstance(check, str) and check not in out:  # None: left to the isl guard (overflow_terms)
                out.append(check)
        return out

    @staticmethod
    def _reach_check(nest: Nest, s) -> str | bool | None:
        lp = nest.loop(s.iterator)
        lo, hi = (-(2 ** (lp.ctype.bits - 1)), 2 ** (lp.ctype.bits - 1) - 1) if lp.ctype.signed else \
            (0, 2 ** lp.ctype.bits - 1)
        span = lp.step * (s.size or 1)
        edge = 0 if lp.inclusive else 1
        reach = lp.limit.value + Affine(const=span - edge) if lp.direction > 0 else \
            lp.limit.value - Affine(const=span - edge)
        check = _param_bound(reach, hi if lp.direction > 0 else lo, lp.direction > 0,
                             {p.name: p for p in nest.params})
        if check is None:  # the bound as written, which the original loop test evaluates too (loop-invariant)
            value = hi - (span - edge) if lp.direction > 0 else lo + (span - edge)
            suffix = "" if -2**31 <= value < 2**31 else ("L" if -2**63 <= value < 2**63 else "UL")
            return f"({lp.limit.text}) {'<=' if lp.direction > 0 else '>='} {value}{suffix}"
        return check


def _param_bound(reach: Affine, limit: int, up: bool, spell) -> str | bool | None:
    """``reach <= limit`` (``up``) or ``reach >= limit`` as a C test on one parameter: True when
    it always holds for the parameter's type, False when it never does, None when it is not a
    test on one variable or macro."""
    if reach.is_constant():
        return reach.const <= limit if up else reach.const >= limit
    if len(reach.terms) != 1 or abs(reach.terms[0][1]) != 1:
        return None
    (name, c), = reach.terms
    p = spell.get(name)
    if p is None or p.kind not in ("variable", "macro") or not p.ctype.is_int:
        return None
    value = (limit - reach.const) * c  # c*p + const <= limit  <=>  p <= (limit - const) (c = 1)
    at_most = up == (c > 0)  # p <= value, else p >= value
    bits, signed = p.ctype.bits, p.ctype.signed
    plo, phi = (-(2 ** (bits - 1)), 2 ** (bits - 1) - 1) if signed else (0, 2 ** bits - 1)
    if (at_most and phi <= value) or (not at_most and plo >= value):
        return True
    if (at_most and value < plo) or (not at_most and value > phi):
        return False
    suffix = "" if -2**31 <= value < 2**31 else ("L" if -2**63 <= value < 2**63 else "UL")
    return f"{p.text} {'<=' if at_most else '>='} {value}{suffix}"


def _witness_text(array: str, w) -> str:
    verb_src = "writes" if w.source_writes else "reads"
    verb_dst = "writes" if w.sink_writes else "reads"
    text = (f"{w.source.render()} {verb_src} {w.element} and {w.sink.render()} {verb_dst} it "
            f"({w.kind} dependence on '{array}')")
    if w.params:
        text += " with " + ", ".join(f"{k} = {v}" for k, v in w.params)
    return text


def _slot_words(plan: TilePlan, k: int) -> str:
    s = plan.slots[k]
    return f"the tile loop '{s.name}' of '{s.iterator}'" if s.kind == "tile" else f"loop '{s.name}'"


def _candidate_problem(plan: TilePlan, k: int) -> str | None:
    """Why loop ``k`` of the new order cannot carry a worksharing pragma (None: it can)."""
    s = plan.slots[k]
    if s.kind == "point":
        return f"{_slot_words(plan, k)} is a point loop inside its tile (its bounds are clamped to the tile)"
    if s.scan is not None:
        return f"{_slot_words(plan, k)} runs over a max/min of bounds, which is not OpenMP's canonical loop form"
    if s.level > 1:
        return f"{_slot_words(plan, k)} is a tile loop of level {s.level}, clamped to the tile outside it"
    jammed = {it for it, _ in plan.jam}
    if any(x.iterator in jammed for x in plan.slots[: k + 1]) or k >= len(plan.schedule) or \
            any(d.iterator != x.iterator or d.when is not None for d, x in zip(plan.schedule, plan.slots[: k + 1])):
        return f"{_slot_words(plan, k)} is unrolled and jammed"
    return None


def _outside_tests(plan: TilePlan, k: int) -> bool:
    """Loop ``k`` is printed once, outside the whole-tile test and the remainder loops."""
    last_tile = max((j for j, s in enumerate(plan.slots) if s.kind == "tile"), default=len(plan.slots) - 1)
    return k <= last_tile


def place(tu: TranslationUnit, nest: Nest, analysis, plan: TilePlan, found: NestPragmas, parallel: bool,
          c89: bool) -> Placement:
    """Where every pragma of ``found`` goes in the rewrite ``plan`` (and the one ``--parallel``
    asks for), or a Refusal saying why it cannot be kept."""
    notes: list[str] = []
    last = len(nest.perfect) - 1
    if found.body and plan.jam:
        raise _refuse(tu, found.body[0], "is inside the body, which unroll-and-jam copies into one loop with other "
                      "iterations; the hint was given for one iteration's loop alone, so looptile leaves the nest "
                      "alone")
    if found.body:
        notes.append("kept in place inside the copied body: " + ", ".join(sorted({p.name for p in found.body})))
    par: tuple[int, str, int] | None = None
    inner_text, canonical = "", False
    for k, p in found.on_loops:
        if p.problem:
            raise _refuse(tu, p, f"cannot be read ({p.problem}); looptile leaves the nest alone")
        if p.family == "omp" and p.directive in ("parallel for", "for"):
            if k != 0:
                raise _refuse(tu, p, f"is on loop '{nest.perfect[k].iterator}', inside the nest; looptile moves "
                              "a worksharing pragma only from the outermost loop of the nest")
            par = _existing_parallel(tu, nest, analysis, plan, p, c89)
        elif k == last and ((p.family == "omp" and p.directive == "simd") or
                            (p.family == "GCC" and p.directive in GCC_HINTS)):
            inner_text, canonical = _innermost(tu, nest, plan, p)
        elif k != last and ((p.family == "omp" and p.directive == "simd") or
                            (p.family == "GCC" and p.directive in GCC_HINTS)):
            raise _refuse(tu, p, f"is on loop '{nest.perfect[k].iterator}', which has loops inside it in the "
                          "nest; looptile keeps a loop hint only on the innermost loop, which the rewrite keeps "
                          "innermost")
        else:
            where = "applies to this loop nest" if k == 0 else "inside the nest"
            raise _refuse(tu, p, f"{where} would be detached from its loop by the rewrite: it is not one looptile "
                          "knows how to keep with its loop (omp parallel for / omp for on the outermost loop, omp "
                          "simd or GCC ivdep/unroll/novector on the innermost), so looptile leaves the nest alone")
    if par is None and parallel:
        par = _chosen_parallel(tu, nest, analysis, plan, c89)
    elif par is not None and parallel:
        notes.append("--parallel: the nest's own worksharing pragma is placed (no second one is added)")
    if par is not None and inner_text and par[0] + par[2] - 1 >= len(plan.slots) - 1:
        p = found.on(last)
        assert p is not None
        raise _refuse(tu, p, f"and the worksharing pragma would both be on loop '{plan.slots[-1].name}'; looptile "
                      "puts one pragma on a loop (tile the loop, or combine them by hand)")
    first = found.on(0)
    return Placement(
        parallel_slot=par[0] if par else None, parallel_text=par[1] if par else "",
        collapse=par[2] if par else 1, innermost_text=inner_text, canonical_clamp=canonical,
        removed=(first.start,) if first is not None else (),
        original_prefix=(first.text.replace("\r\n", "\n"),) if first is not None else (), notes=tuple(notes))


def _private_needed(nest: Nest, plan: TilePlan, k: int, collapse: int, c89: bool) -> list[str]:
    """Variables the rewrite's loops inside loop ``k`` (and its collapsed loops) use as iterators
    but that are declared outside the construct: shared by default, so they must be private.
    OpenMP 5.2, 5.1.1 "Variables Referenced in a Construct" (from memory): the iteration
    variables of the associated loops are predetermined private; a variable declared outside
    the construct and not listed is shared (default(shared) of parallel); a variable declared
    in a for statement inside the construct is private."""
    inside = {s.iterator for s in plan.slots[k + collapse:]} | {lp.iterator for lp in nest.inner}
    out = [it for it in nest.outer_declared if it in inside]
    if c89:  # the tile iterators are declared at the start of a block around the nest
        out += [s.name for s in plan.slots[k + collapse:] if s.kind == "tile"]
    return out


# Clauses of the worksharing-loop construct and of parallel that keep their meaning when the
# construct moves to the outermost loop of the new order over the same iterations (5.2, 10.2 /
# 11.5 "Worksharing-Loop Construct", 10.1 "parallel Construct", from memory): they speak of the
# threads, the schedule of the iterations or variables, none of which the rewrite changes.
_KEPT = {"private", "firstprivate", "shared", "default", "schedule", "num_threads", "if", "proc_bind", "copyin",
         "allocate", "nowait", "order"}
_WHY_NOT = {
    "lastprivate": "copies out the value of the sequentially last iteration; after tiling the last iteration "
                   "of the new outermost loop is a whole tile, whose final values looptile does not prove equal",
    "reduction": "declares a reduction, which is a dependence the iterations carry; looptile places worksharing "
                 "only on a loop that provably carries none (reassociating a reduction changes its rounding)",
    "linear": "ties a variable to the iteration number of the original loop, which the tile loop does not have",
    "ordered": "orders part of each iteration by the original loop's iterations, which the tile loop does not "
               "have",
}


def _existing_parallel(tu: TranslationUnit, nest: Nest, analysis, plan: TilePlan, p: Pragma,
                       c89: bool) -> tuple[int, str, int]:
    """The nest's own worksharing pragma on the outermost loop of the new order (slot 0)."""
    collapse = 1
    for c in p.clauses:
        if c.name == "collapse":
            try:
                collapse = int(c.args or "")
            except ValueError:
                raise _refuse(tu, p, f"has collapse({c.args}), whose argument is not an integer constant; looptile "
                              "cannot tell which loops it associates") from None
        elif c.name in _WHY_NOT:
            raise _refuse(tu, p, f"cannot be kept: its clause '{c.name}' {_WHY_NOT[c.name]}")
        elif c.name not in _KEPT:
            raise _refuse(tu, p, f"has the clause '{c.name}', which looptile does not know to stay valid after the "
                          "rewrite; it leaves the nest alone")
        if c.name == "order" and (c.args or "").strip() not in ("concurrent", "reproducible:concurrent"):
            raise _refuse(tu, p, f"has order({c.args}), which looptile does not know")
    # 5.2, 4.4.1 "Canonical Loop Nest Form" (from memory): collapse(n) associates the n outermost
    # loops, which must be perfectly nested (nothing between their headers) and, for the rectangular
    # form looptile emits, have bounds that do not use the iterators of the loops outside them.
    if collapse > len(nest.perfect) or collapse < 1:
        raise _refuse(tu, p, f"has collapse({collapse}), but the nest has {len(nest.perfect)} perfectly nested "
                      "loop(s)")
    for k in range(collapse):
        why = _candidate_problem(plan, k) or (None if _outside_tests(plan, k) else
                                              f"{_slot_words(plan, k)} is inside the whole-tile test")
        if why is None and k > 0:
            s = plan.slots[k]
            lp = nest.loop(s.iterator)
            if s.hull is not None or (lp.start.value.names() | lp.limit.value.names()) & set(nest.iterators):
                why = f"{_slot_words(plan, k)} has bounds that depend on another loop of the nest"
        if why is not None:
            what = "the outermost loop after the rewrite" if k == 0 else f"loop {k + 1} after the rewrite"
            extra = f"; collapse({collapse}) would associate it" if collapse > 1 else ""
            raise _refuse(tu, p, f"cannot be placed: {what}, {why}{extra}")
        hit = analysis.carried(list(plan.schedule), k)
        if hit is not None:
            where = "the outermost loop after the rewrite" if k == 0 else f"loop {k + 1} after the rewrite"
            raise _refuse(tu, p, f"cannot be placed: {where}, {_slot_words(plan, k)}, carries a dependence, so its "
                          f"iterations cannot run in parallel: {_witness_text(*hit)}")
    shared = {n for c in p.clause("shared") for n in c.names()}
    listed = {n for c in p.clauses if c.name in ("private", "firstprivate") for n in c.names()}
    need = [n for n in _private_needed(nest, plan, 0, collapse, c89) if n not in listed]
    clash = sorted(shared & set(need))
    if clash:
        raise _refuse(tu, p, f"lists '{clash[0]}' as shared, but it is the iterator of a loop inside the construct "
                      "and must be private")
    return 0, _render(p, need, collapse), collapse


def _render(p: Pragma, private: list[str], collapse: int) -> str:
    """The pragma with ``private`` gaining ``private`` (one clause, merged with the user's)."""
    parts = ["#pragma", p.family, p.directive]
    merged = False
    for c in p.clauses:
        if c.name == "private" and private and not merged:
            parts.append(f"private({', '.join(c.names() + [n for n in private if n not in c.names()])})")
            merged = True
        elif c.name == "collapse":
            parts.append(f"collapse({collapse})")
        else:
            parts.append(c.render())
    if private and not merged:
        parts.append(f"private({', '.join(private)})")
    return " ".join(parts)


def _chosen_parallel(tu: TranslationUnit, nest: Nest, analysis, plan: TilePlan, c89: bool) -> tuple[int, str, int]:
    """--parallel: the outermost loop printed once outside the tiles' tests (a tile loop, or an
    untouched loop outside them) that carries no dependence."""
    reasons = []
    for k in range(len(plan.slots)):
        if not _outside_tests(plan, k):
            break
        why = _candidate_problem(plan, k)
        if why is not None:
            continue
        hit = analysis.carried(list(plan.schedule), k)
        if hit is None:
            need = _private_needed(nest, plan, k, 1, c89)
            text = "#pragma omp parallel for" + (f" private({', '.join(need)})" if need else "")
            return k, text, 1
        reasons.append(f"{_slot_words(plan, k)} carries a dependence: {_witness_text(*hit)}")
    why = "; ".join(reasons) if reasons else "no loop outside the tiles can carry a worksharing pragma"
    raise Refusal(f"--parallel: no loop of the rewrite provably carries no dependence ({why})", path=nest.path,
                  line=nest.line, column=nest.col, source_line=tu.source.line_text(nest.line))


# simd clauses (5.2, 10.4 "simd Construct", from memory) that state properties of the iterations of
# one run of the loop, which hold for a run of a subset of them in the same order (a point loop).
_SIMD_KEPT = {"safelen", "simdlen", "aligned", "nontemporal", "if", "order", "private"}
_SIMD_WHY_NOT = {
    "lastprivate": "copies out the value of the loop's last iteration; each copy of the point loop has its own "
                   "last iteration",
    "reduction": "declares a reduction over the whole loop, whose runs the tiles split",
    "collapse": "associates loops that the rewrite separates",
}


def _innermost(tu: TranslationUnit, nest: Nest, plan: TilePlan, p: Pragma) -> tuple[str, bool]:
    """A loop hint on the innermost loop: kept on every copy of its point loop, if it stays innermost."""
    it = nest.perfect[-1].iterator
    inner = plan.slots[-1]
    if inner.iterator != it or inner.kind == "tile":
        raise _refuse(tu, p, f"is on loop '{it}', but the rewrite makes {_slot_words(plan, len(plan.slots) - 1)} "
                      "innermost; the hint would move to another loop, so looptile leaves the nest alone (choose an "
                      f"order that keeps '{it}' innermost)")
    if plan.jam:
        raise _refuse(tu, p, f"is on loop '{it}', whose body unroll-and-jam fills with copies of other iterations; "
                      "the hint was given for the original loop alone, so looptile leaves the nest alone")
    if p.family != "omp":
        return " ".join(p.text.replace("\\\r\n", " ").replace("\\\n", " ").split()), False
    if inner.scan is not None:
        raise _refuse(tu, p, f"is on loop '{it}', whose point loop runs over a max/min of bounds after the rewrite, "
                      "which is not OpenMP's canonical loop form")
    for c in p.clauses:
        if c.name in _SIMD_WHY_NOT and not (c.name == "collapse" and (c.args or "").strip() == "1"):
            raise _refuse(tu, p, f"cannot be kept: its clause '{c.name}' {_SIMD_WHY_NOT[c.name]}")
        if c.name == "linear":
            # the loop's own iterator is linear anyway (5.2, 5.1.1, from memory); another variable's
            # value would continue across the copies of the point loop, which looptile does not prove
            if [n.split(":")[0].strip() for n in c.names()] != [it]:
                raise _refuse(tu, p, f"cannot be kept: linear({c.args}) names a variable other than the loop's "
                              "own iterator")
        elif c.name not in _SIMD_KEPT and c.name not in _SIMD_WHY_NOT:
            raise _refuse(tu, p, f"has the clause '{c.name}', which looptile does not know to stay valid after the "
                          "rewrite; it leaves the nest alone")
    return " ".join(["#pragma", p.family, p.directive] + [c.render() for c in p.clauses]), True
