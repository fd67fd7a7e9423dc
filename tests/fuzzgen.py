"""Soundness fuzzing of ``looptile tile``, ``jam`` and ``unroll``: random affine loop nests, random
requests, outside checks.

The project rule is "never emit a wrong program".  This module generates, from a
seeded ``random.Random``, small C programs with one loop nest in ``kernel(int n, int m)``
and one ``looptile tile`` request for it, runs looptile, and judges the answer
without trusting anything looptile computes:

- exit 0 (rewritten): the system C compiler builds original and rewrite with the
  sanitizers (``-O1 -ffp-contract=off -fsanitize=address,undefined``); both run over
  the same list of (n, m) pairs and print an FNV-1a hash of the raw bytes of every
  array and scalar after each call.  Any difference, sanitizer report, non-zero
  exit or time-out is a MISMATCH (a soundness bug).
- exit 1 with a legality refusal: the witness pair is re-derived by tracing the
  original program (a copy whose statements log their instance and the elements
  they read and write), run at the witness parameters; both instances must run,
  touch the named element in the named ways, and run source first; then the
  requested order is computed here, in Python, from the request alone (tile index
  ``floor(dir * (x - origin) / (step * T))``, origin the loop's first value, for a
  non-rectangular loop the first value over the iterations that agree on the loops
  placed outside its tile loop), and the sink must come first in it.
- exit 1 with another refusal: counted with its reason.
- exit 2: the generator built a wrong request (a bug here); exit 3: a looptile bug.

"Legal by construction" requests (no dependence at all in the nest, an identity
permutation, or all tile sizes 1 with the default order) must nearly never be refused.

``generate(seed, index, kind)`` makes the same nest for every ``kind``; only the request
differs: ``tile`` (the default), ``jam`` (``looptile jam`` and, about one in five,
``looptile unroll`` requests, tests/fuzzjam.py) or ``all`` (a mix of the three).  For jam
and unroll the requested order of the witness check is the jammed order, derived by hand
from the shape of the emitted code (``fuzzjam.jam_order_key``); a plain unroll and a jam of
the innermost loop alone keep every order, so they are legal by construction.

Used by tests/test_fuzz.py (a small fixed-seed batch) and bench/fuzz.py (the large batch).
"""
from __future__ import annotations

import os
import random
import re
import shlex
import shutil
import subprocess
import time
from dataclasses import dataclass, field, replace
from pathlib import Path

import fuzzjam

PAD = 4  # added to every subscript, so offsets down to -2 stay inside the arrays
DIM = 40  # extent of each dimension of 1-, 2- and 3-d arrays (iterators stay in 0..13)
DIM4 = 24  # 4-d arrays (single-iterator subscripts only)
TILE_SIZES = (1, 2, 3, 4, 5, 8)
ITERATORS = ("i", "j", "k", "l")
# (n, m) pairs every program runs; they include 0, 1, 2, 3, 5, 7, 8, 9, 13 for both.
SIZE_PAIRS = ((0, 0), (1, 1), (2, 2), (3, 3), (5, 5), (7, 7), (8, 8), (9, 9), (13, 13), (0, 5), (5, 0),
              (1, 13), (13, 1), (2, 9), (9, 2), (3, 8), (8, 3), (7, 13), (13, 7), (5, 9))
MAX_SIZE = 13
TRACE_LIMIT = 400_000  # statement executions a witness trace may log

CC_FLAGS = ("-std=gnu11", "-O1", "-ffp-contract=off", "-fsanitize=address,undefined",
            "-fno-sanitize-recover=undefined")
RUN_ENV = {"ASAN_OPTIONS": "detect_leaks=0", "UBSAN_OPTIONS": "print_stacktrace=1"}


# ---------------------------------------------------------------- the model of a generated nest

@dataclass(frozen=True)
class LoopSpec:
    it: str
    init: str  # C expression of the first value
    op: str  # comparison of the condition, iterator on the left
    bound: str
    step: int  # signed: +1, +2, -1, -2
    uses: tuple[str, ...]  # outer iterators the bounds read
    inc: str  # C text of the increment

    @property
    def direction(self) -> int:
        return 1 if self.step > 0 else -1

    def header(self) -> str:
        return f"for (int {self.it} = {self.init}; {self.it} {self.op} {self.bound}; {self.inc})"


@dataclass(frozen=True)
class Access:
    name: str
    subs: tuple[str, ...]  # C expressions ((): a scalar)

    def text(self) -> str:
        return self.name + "".join(f"[{s}]" for s in self.subs)


@dataclass(frozen=True)
class Stmt:
    text: str  # C text, without indentation
    reads: tuple[Access, ...]
    writes: tuple[Access, ...]
    loops: tuple[str, ...]  # the nest's loops around it, outermost first
    temp: str | None = None  # the block-local temporary it declares
    guard: str | None = None  # "if (COND)": this entry is the condition (a statement of its own in looptile)
    guarded: bool = False  # runs only when the condition just before it holds


@dataclass(frozen=True)
class ArrayDecl:
    name: str
    dims: int  # 0: a scalar global

    def decl(self) -> str:
        if self.dims == 0:
            return f"double {self.name};"
        ext = DIM4 if self.dims == 4 else DIM
        return f"static double {self.name}" + f"[{ext}]" * self.dims + ";"


@dataclass(frozen=True)
class Request:
    kind: str  # "tile", "permute", "jam" or "unroll"
    band: tuple[str, ...]  # tiled loops
    sizes: tuple[int, ...]
    slots: tuple[tuple[str, str], ...]  # the requested order: ("tile"|"point"|"loop", iterator)
    args: tuple[str, ...]  # command-line arguments after --nest kernel
    default_order: bool
    note: str = ""
    factors: tuple[tuple[str, int], ...] = ()  # jam and unroll: (iterator, factor), outermost first
    sizes2: tuple[int, ...] = ()  # a second level of tiles (README: each divides the size outside); slot "tile2"

    @property
    def verb(self) -> str:
        """The looptile command of the request."""
        return self.kind if self.kind in ("jam", "unroll") else "tile"

    def text(self) -> str:
        return " ".join(shlex.quote(a) for a in self.args)


@dataclass
class Case:
    index: int
    seed: int
    loops: tuple[LoopSpec, ...]  # every loop of the nest, outermost first
    perfect: int  # loops in the perfectly nested part
    body: tuple[Stmt, ...]  # statements in textual order (S1, S2, ...)
    imperfect: tuple[int, str] | None  # (statement index, "before"|"after" the innermost loop)
    arrays: tuple[ArrayDecl, ...]
    local_acc: bool  # a 0-d local `acc` declared outside the nest
    no_deps: bool  # legal by construction: no dependence at all
    request: Request
    source: str = ""
    trace_source: str = ""
    flat: bool = False  # two-dimensional arrays as flat buffers (see flattened())

    @property
    def legal_by_construction(self) -> bool:
        r = self.request
        if self.no_deps and r.kind != "jam":
            return True
        if r.kind == "permute":
            return [it for _, it in r.slots] == [lp.it for lp in self.loops[: self.perfect]]
        if r.kind == "unroll":
            return True  # the copies run one after the other: nothing changes order
        if r.kind == "jam":  # only the innermost loop unrolled: the same order
            if any(fuzzjam.bound_user(self.loops[: self.perfect], it) for it, _ in r.factors):
                return False  # refused by design: an inner loop's bounds use an unrolled iterator
            return self.no_deps or [it for it, _ in r.factors] == [self.loops[self.perfect - 1].it]
        return r.default_order and all(s == 1 for s in r.sizes)

    def nonrectangular(self, it: str) -> bool:
        """The loop's bounds read another perfect loop, or another perfect loop's bounds read it."""
        perf = self.loops[: self.perfect]
        lp = next(lp for lp in perf if lp.it == it)
        return bool(set(lp.uses) & {p.it for p in perf}) or any(it in p.uses for p in perf)

    def command(self, path: str = "case.c", out: str = "out.c") -> list[str]:
        return [self.request.verb, path, "--nest", "kernel", *self.request.args, "-o", out]


# ---------------------------------------------------------------- generation

def _off(rng: random.Random) -> int:
    return rng.choice((0, 0, 0, 1, -1, 1, -1, 2, -2))


def _padded(expr: str, off: int) -> str:
    v = off + PAD
    return f"{expr} + {v}" if v else expr


def _gen_loop(rng: random.Random, it: str, outer: list[str], params: tuple[str, ...]) -> LoopSpec:
    """A loop with step 1 or -1 (``_with_steps`` sets some steps to 2 afterwards)."""
    p = rng.choice(params)
    down = rng.random() < 0.22
    tri = bool(outer) and rng.random() < 0.35
    step = 1
    if tri:
        o = rng.choice(outer)
        if not down:
            init, op, bound = rng.choice([(o, "<", p), (f"{o} + 1", "<", p), ("0", "<=", o), ("0", "<", o),
                                          ("1", "<=", o), (o, "<=", f"{p} - 1")])
        else:
            init, op, bound = rng.choice([(f"{p} - 1", ">=", o), (f"{p} - 1", ">", o), (o, ">=", "0"),
                                          (f"{o} - 1", ">=", "0")])
        uses = (o,)
    else:
        if not down:
            init, op, bound = rng.choice([("0", "<", p), ("1", "<", f"{p} - 1"), ("0", "<=", f"{p} - 1"),
                                          ("2", "<", p), ("1", "<=", p), ("0", "<", p)])
        else:
            init, op, bound = rng.choice([(f"{p} - 1", ">=", "0"), (f"{p} - 2", ">=", "1"), (p, ">", "0"),
                                          (f"{p} - 1", ">", "0"), (f"{p} - 1", ">=", "0")])
        uses = ()
    if step == 1:
        inc = rng.choice([f"{it}++", f"{it}++", f"++{it}", f"{it} += 1"]) if not down else \
            rng.choice([f"{it}--", f"{it}--", f"--{it}", f"{it} -= 1"])
    else:
        inc = rng.choice([f"{it} += 2", f"{it} = {it} + 2"]) if not down else \
            rng.choice([f"{it} -= 2", f"{it} = {it} - 2"])
    return LoopSpec(it, init, op, bound, step if not down else -step, uses, inc)


def _with_steps(rng: random.Random, loops: list[LoopSpec]) -> list[LoopSpec]:
    """Steps of 2 (or -2): often on rectangular loops, rarely on loops of a triangle (looptile
    supports only step 1 there; those requests are refused as unsupported, by design)."""
    out = []
    for lp in loops:
        tri = bool(lp.uses) or any(lp.it in o.uses for o in loops)
        if rng.random() < (0.04 if tri else 0.18):
            d = lp.direction
            inc = rng.choice([f"{lp.it} += 2", f"{lp.it} = {lp.it} + 2"]) if d > 0 else \
                rng.choice([f"{lp.it} -= 2", f"{lp.it} = {lp.it} - 2"])
            lp = LoopSpec(lp.it, lp.init, lp.op, lp.bound, 2 * d, lp.uses, inc)
        out.append(lp)
    return out


def _gen_sub(rng: random.Random, its: list[str]) -> str:
    r = rng.random()
    off = _off(rng)
    if r < 0.74 or not its:
        if not its:
            return str(PAD + off)
        return _padded(rng.choice(its), off)
    if r < 0.86 and len(its) >= 2:
        x, y = rng.sample(its, 2)
        return _padded(f"{x} + {y}", off)
    if r < 0.94:
        return _padded(f"2 * {rng.choice(its)}", off)
    return str(PAD + off)


def _iters_of(expr: str) -> set[str]:
    return set(re.findall(r"[a-z]", expr)) & set(ITERATORS)


def _neighbour(rng: random.Random, subs: tuple[str, ...], its: list[str]) -> tuple[str, ...]:
    """A subscript close to ``subs``: one dimension's offset moved by +-1 or +-2, or two dimensions swapped."""
    out = list(subs)
    r = rng.random()
    if r < 0.15 and len(out) >= 2:
        a, b = rng.sample(range(len(out)), 2)
        out[a], out[b] = out[b], out[a]
        return tuple(out)
    k = rng.randrange(len(out)) if out else None
    if k is None:
        return ()
    m = re.fullmatch(r"(.*?)(?: \+ (\d+))?", out[k])
    assert m
    base, val = m.group(1), int(m.group(2) or 0)
    if base.isdigit():
        base, val = "", int(base)
    val = min(max(val + rng.choice((-1, 1, -2, 2, 1, -1)), PAD - 2), PAD + 2)
    if rng.random() < 0.15 and its:
        base = rng.choice(its)
    out[k] = (f"{base} + {val}" if val else base) if base else str(val)
    return tuple(out)


def _rhs(rng: random.Random, terms: list[str]) -> str:
    text = terms[0]
    for t in terms[1:]:
        op = rng.choice((" + ", " - ", " + ", " * 0.5 + "))
        text = f"{text}{op}{t}"
    if rng.random() < 0.3:
        text = f"{text} * 0.5" if len(terms) == 1 else f"({text}) * 0.5"
    return text


def _dims_for(rng: random.Random, depth: int) -> int:
    return rng.choice((1, 2, 2, 2, 3)) if depth >= 3 else rng.choice((1, 2, 2, 2, 2))


def _gen_random_body(rng: random.Random, loops: list[LoopSpec], stmt_loops: list[tuple[str, ...]]
                     ) -> tuple[list[Stmt], set[tuple[str, int]], bool, bool]:
    """Statements with reads and writes of shared arrays, so that dependences in all directions occur."""
    names = ["A", "B", "C", "D"]
    dims = {nm: _dims_for(rng, len(loops)) for nm in names}
    used: set[tuple[str, int]] = set()
    written: list[Access] = []
    out: list[Stmt] = []
    temp_loops: tuple[str, ...] | None = None
    local_acc = False
    global_acc = False
    for sidx, its_t in enumerate(stmt_loops):
        its = list(its_t)
        # the temporary is visible in statements inside the block that declares it
        temp_done = temp_loops is not None and len(its_t) >= len(temp_loops)

        # accesses of earlier statements whose subscripts only use the loops around this one
        visible = [w for w in written if all(_iters_of(x) <= set(its) for x in w.subs)]

        def read_term(visible: list[Access] = visible, its: list[str] = its) -> Access:
            if visible and rng.random() < 0.6:
                w = rng.choice(visible)
                return Access(w.name, _neighbour(rng, w.subs, its) if rng.random() < 0.8 else w.subs)
            nm = rng.choice(names)
            return Access(nm, tuple(_gen_sub(rng, its) for _ in range(dims[nm])))

        r = rng.random()
        if sidx == 0 and len(stmt_loops) > 1 and r < 0.3:
            # a block-local temporary, read by the statements after it
            reads = [read_term() for _ in range(rng.choice((1, 1, 2)))]
            text = f"double t = {_rhs(rng, [a.text() for a in reads])};"
            out.append(Stmt(text, tuple(reads), (Access("t", ()),), its_t, temp="t"))
            temp_loops = its_t
            for a in reads:
                used.add((a.name, dims[a.name]))
            continue
        if r < 0.15 and sidx > 0 or r < 0.12:
            # an accumulation into a scalar: a global double or a 0-d local declared outside the nest
            acc = "acc" if rng.random() < 0.5 else "s"
            local_acc |= acc == "acc"
            global_acc |= acc == "s"
            reads = [read_term()]
            use_t = temp_done and rng.random() < 0.5
            if use_t:
                text = f"{acc} += t * 0.5 + {reads[0].text()};"
            else:
                text = f"{acc} += {reads[0].text()};"
            treads = (Access("t", ()),) if use_t else ()
            out.append(Stmt(text, tuple(reads) + treads + (Access(acc, ()),), (Access(acc, ()),), its_t))
            for a in reads:
                used.add((a.name, dims[a.name]))
            continue
        nm = rng.choice(names)
        if visible and rng.random() < 0.35:
            w = rng.choice(visible)
            nm = w.name
            target = Access(nm, _neighbour(rng, w.subs, its) if rng.random() < 0.5 else w.subs)
        else:
            target = Access(nm, tuple(_gen_sub(rng, its) for _ in range(dims[nm])))
        nreads = rng.choice((1, 1, 2, 2, 3))
        reads = [read_term() for _ in range(nreads)]
        terms = [a.text() for a in reads]
        if temp_done and rng.random() < 0.7:
            terms.insert(rng.randrange(len(terms) + 1), "t")
        compound = rng.random() < 0.35
        text = f"{target.text()} {'+=' if compound else '='} {_rhs(rng, terms)};"
        all_reads = list(reads) + ([Access("t", ())] if "t" in terms else []) + ([target] if compound else [])
        out.append(Stmt(text, tuple(all_reads), (target,), its_t))
        written.append(target)
        used.add((nm, dims[nm]))
        for a in reads:
            used.add((a.name, dims[a.name]))
    return out, used, local_acc, global_acc


def _gen_nodep_body(rng: random.Random, stmt_loops: list[tuple[str, ...]]
                    ) -> tuple[list[Stmt], set[tuple[str, int]]]:
    """No dependence at all: every statement writes its own array at a subscript that is one-to-one in
    the loops around it (each iterator alone in one dimension), and reads only arrays nobody writes."""
    used: set[tuple[str, int]] = set()
    out: list[Stmt] = []
    ro = {"X": rng.choice((1, 2, 2, 3)), "Y": rng.choice((2, 2, 3))}
    temp_loops: tuple[str, ...] | None = None
    for sidx, its_t in enumerate(stmt_loops):
        its = list(its_t)
        temp_done = temp_loops is not None and len(its_t) >= len(temp_loops)

        def read_term(its: list[str] = its) -> Access:
            nm = rng.choice(sorted(ro))
            return Access(nm, tuple(_gen_sub(rng, its) for _ in range(ro[nm])))

        if sidx == 0 and len(stmt_loops) > 1 and rng.random() < 0.3:
            reads = [read_term() for _ in range(rng.choice((1, 2)))]
            text = f"double t = {_rhs(rng, [a.text() for a in reads])};"
            out.append(Stmt(text, tuple(reads), (Access("t", ()),), its_t, temp="t"))
            temp_loops = its_t
            used |= {(a.name, ro[a.name]) for a in reads}
            continue
        dims = max(len(its), 1)
        name = f"W{sidx}"
        perm = its[:]
        if rng.random() < 0.4:
            rng.shuffle(perm)
        subs = tuple(_padded(x, _off(rng)) for x in perm) if perm else (str(PAD),)
        target = Access(name, subs)
        reads = [read_term() for _ in range(rng.choice((1, 2, 2, 3)))]
        terms = [a.text() for a in reads]
        if temp_done and rng.random() < 0.7:
            terms.insert(rng.randrange(len(terms) + 1), "t")
        compound = rng.random() < 0.3  # reads and writes only its own element
        text = f"{target.text()} {'+=' if compound else '='} {_rhs(rng, terms)};"
        all_reads = list(reads) + ([Access("t", ())] if "t" in terms else []) + ([target] if compound else [])
        out.append(Stmt(text, tuple(all_reads), (target,), its_t))
        used.add((name, dims))
        used |= {(a.name, ro[a.name]) for a in reads}
    return out, used


def _with_guards(rng: random.Random, body: list[Stmt], depth: int, params: tuple[str, ...]) -> list[Stmt]:
    """Put some statements of the innermost body under an affine ``if``."""
    out: list[Stmt] = []
    for st in body:
        if st.temp is None and len(st.loops) == depth and rng.random() < 0.1:
            its = list(st.loops)
            x, y = rng.sample(its, 2) if len(its) >= 2 else (its[0], its[0])
            p = rng.choice(params)
            cond = rng.choice([f"{x} > {y}", f"{x} <= {y}", f"{x} >= 2", f"{x} < {p} - 1", f"{x} + {y} < {p}",
                               f"{x} != {y}"] if x != y else [f"{x} >= 2", f"{x} < {p} - 1"])
            out.append(Stmt(f"if ({cond})", (), (), st.loops, guard=cond))
            st = Stmt(st.text, st.reads, st.writes, st.loops, guarded=True)
        out.append(st)
    return out


def _gen_request(rng: random.Random, perfect: list[LoopSpec]) -> Request:
    its = [lp.it for lp in perfect]
    p = len(its)
    if p >= 2 and rng.random() < 0.15:
        order = its[:]
        if rng.random() < 0.85:
            while order == its:
                rng.shuffle(order)
        return Request("permute", (), (), tuple(("loop", it) for it in order), ("--order", ",".join(order)),
                       order == its)
    length = rng.randint(1, min(3, p))
    start = rng.randrange(p - length + 1)
    band = its[start: start + length]
    if rng.random() < 0.2:
        sizes = [1] * length
    else:
        sizes = [rng.choice(TILE_SIZES) for _ in band]
    args: list[str] = []
    if start == 0 and rng.random() < 0.5:
        args += ["--sizes", ",".join(map(str, sizes))]
    else:
        args += ["--sizes", ",".join(f"{b}={s}" for b, s in zip(band, sizes))]
    before = [("loop", it) for it in its[:start]]
    after = [("loop", it) for it in its[start + length:]]
    default = [("tile", b) for b in band] + [("point", b) for b in band]
    if rng.random() < 0.55:
        slots = before + default + after
        default_order = True
        if rng.random() < 0.1:  # the default order, spelled out
            args += ["--order", ",".join(_token(rng, k, it) for k, it in slots)]
    else:
        full = rng.random() < 0.5 or not (before or after)
        pool = ([("tile", b) for b in band] + [("point", b) for b in band] +
                ((before + after) if full else []))
        listed: list[tuple[str, str]] = []
        while pool:
            ready = [x for x in pool if x[0] != "point" or ("tile", x[1]) in listed]
            x = rng.choice(ready)
            listed.append(x)
            pool.remove(x)
        slots = listed if full else before + listed + after
        default_order = slots == before + default + after
        args += ["--order", ",".join(_token(rng, k, it) for k, it in (slots if full else listed))]
    if rng.random() < 0.3:
        args += ["--remainder", "clamp"]
    if all(sz > 1 for sz in sizes) and rng.random() < 0.2:
        return _second_level(rng, band, sizes, slots, args)
    return Request("tile", tuple(band), tuple(sizes), tuple(slots), tuple(args), default_order)


def _second_level(rng: random.Random, band: list[str], sizes: list[int], slots: list[tuple[str, str]],
                  args: list[str]) -> Request:
    """Add a second level of tiles inside the first: sizes that divide the first level's
    (README, multi-level tiling), the level-2 tile loops placed anywhere after their level-1
    tile loop and before their point loop."""
    sizes2 = [rng.choice([d for d in range(1, sz + 1) if sz % d == 0]) for sz in sizes]
    args = [a for a in args]
    k = args.index("--sizes") + 2
    args[k:k] = ["--sizes", ",".join(f"{b}={d}" for b, d in zip(band, sizes2))]
    new = list(slots)
    for b in band:
        lo = new.index(("tile", b)) + 1
        hi = new.index(("point", b))
        new.insert(rng.randint(lo, hi), ("tile2", b))
    if "--order" in args:
        j = args.index("--order")
        listed = [x for x in new if x[0] != "loop" or x[1] in args[j + 1].split(",")]
        args[j + 1] = ",".join(_token(rng, kind, it) for kind, it in listed)
    else:
        args += ["--order", ",".join(_token(rng, kind, it) for kind, it in new)]
    return Request("tile", tuple(band), tuple(sizes), tuple(new), tuple(args), False, sizes2=tuple(sizes2))


def _token(rng: random.Random, kind: str, it: str) -> str:
    if kind == "tile":
        return it * 2 if rng.random() < 0.6 else f"{it}.1"
    if kind == "tile2":
        return it * 3 if rng.random() < 0.6 else f"{it}.2"
    return it


KINDS = ("tile", "jam", "all")


def generate(seed: int, index: int, kind: str = "tile") -> Case:
    """Case ``index`` of the batch with ``seed``: the same pair always gives the same case.

    ``kind`` chooses the request (see the module's docstring); the nest does not depend on it."""
    if kind not in KINDS:
        raise ValueError(f"kind must be one of {KINDS}, not {kind!r}")
    rng = random.Random(f"looptile-fuzz/{seed}/{index}")
    depth = rng.choice((2, 2, 2, 3, 3, 3, 4))
    params = ("n", "m") if rng.random() < 0.7 else ("n",)
    loops: list[LoopSpec] = []
    for d in range(depth):
        loops.append(_gen_loop(rng, ITERATORS[d], [lp.it for lp in loops], params))
    loops = _with_steps(rng, loops)
    its = [lp.it for lp in loops]
    nstmts = rng.choice((1, 1, 2, 2, 3))
    stmt_loops = [tuple(its)] * nstmts
    imperfect = None
    perfect = depth
    if depth >= 2 and rng.random() < 0.12:
        where = rng.choice(("before", "after"))
        imperfect = (0 if where == "before" else nstmts, where)
        stmt_loops.insert(imperfect[0], tuple(its[:-1]))
        perfect = depth - 1
    no_deps = rng.random() < 0.3
    if no_deps:
        body, used = _gen_nodep_body(rng, stmt_loops)
        local_acc = global_acc = False
    else:
        body, used, local_acc, global_acc = _gen_random_body(rng, loops, stmt_loops)
    body = _with_guards(rng, body, len(loops), params)
    arrays = sorted({ArrayDecl(nm, d) for nm, d in used}, key=lambda a: a.name)
    if global_acc:
        arrays.append(ArrayDecl("s", 0))
    if kind == "all":
        kind = random.Random(f"looptile-fuzz-kind/{seed}/{index}").choice(("tile", "tile", "jam"))
    if kind == "tile":
        request = _gen_request(rng, loops[:perfect])
    else:
        verb, factors, args = fuzzjam.gen_copy_request(rng, loops[:perfect])
        request = Request(verb, tuple(it for it, _ in factors), tuple(u for _, u in factors), (), args, True,
                          factors=factors)
    case = Case(index, seed, tuple(loops), perfect, tuple(body), imperfect, tuple(arrays), local_acc, no_deps,
                request)
    case.source = render_program(case)
    case.trace_source = render_trace(case)
    return case


# ---------------------------------------------------------------- flattened arrays

# Row lengths each flattened case runs with: the full row (the in-row test holds), one more
# than the largest size (it may hold or fail, by the subscripts' offsets), and 3 (rows overlap:
# the in-row test fails and the original nest must run).
FLAT_ROWS = (f"{DIM}", "(n > m ? n : m) + 1", "3")


def flattened(case: Case) -> Case | None:
    """The same case with its two-dimensional arrays as flat buffers of row length ``ld`` (a
    kernel parameter): ``A[x][y]`` becomes ``A[(x)*ld + (y)]``. None when it has none. The flat
    index stays inside the buffer for every ``ld <= DIM``, so every run is defined C; witnesses
    name elements of the two-dimensional reading and are not re-derived for these cases."""
    two = [a.name for a in case.arrays if a.dims == 2]
    if not two:
        return None
    src = case.source
    for name in two:
        decl = f"static double {name}[{DIM}][{DIM}];"
        assert decl in src
        src = src.replace(decl, f"static double {name}[{DIM} * {DIM}];")
    head, rest = src.split("void kernel(int n, int m)\n{", 1)
    body, tail = rest.split("\n}\n", 1)
    pat = re.compile(r"\b(" + "|".join(two) + r")\[([^\[\]]+)\]\[([^\[\]]+)\]")
    body = pat.sub(lambda m: f"{m[1]}[({m[2]})*ld + ({m[3]})]", body) + "\n    (void)ld;"
    call = "        init();\n        kernel(n, m);\n"
    assert call in tail
    rows = " : ".join(f"w == {k} ? {r}" for k, r in enumerate(FLAT_ROWS[:-1])) + f" : {FLAT_ROWS[-1]}"
    tail = tail.replace(call, f"        for (int w = 0; w < {len(FLAT_ROWS)}; w++) {{\n        int ld = {rows};\n"
                              "        init();\n        kernel(n, m, ld);\n")
    line = '        printf("n=%d m=%d %016llx\\n", n, m, (unsigned long long)h);\n'
    assert line in tail
    tail = tail.replace(line, '        printf("n=%d m=%d ld=%d %016llx\\n", n, m, ld, (unsigned long long)h);\n'
                              "        }\n")
    out = replace(case, flat=True)
    out.source = head + "void kernel(int n, int m, int ld)\n{" + body + "\n}\n" + tail
    out.trace_source = ""
    return out


# ---------------------------------------------------------------- C text

def _nest_text(case: Case, stmt_text, indent: str = "    ") -> list[str]:
    """The loop nest, with ``stmt_text(k, stmt)`` giving the C lines of statement k (0-based)."""
    loops = case.loops
    body = case.body
    lines: list[str] = []
    inner_idx = [k for k, s in enumerate(body) if len(s.loops) == len(loops)]
    outer_idx = [k for k, s in enumerate(body) if len(s.loops) < len(loops)]
    rng = random.Random(f"layout/{case.seed}/{case.index}")  # brace style only

    def emit_loop(d: int, ind: str) -> None:
        lp = loops[d]
        lines.append(ind + lp.header())
        if d == len(loops) - 1:
            stmts = [ln for k in inner_idx for ln in stmt_text(k, body[k])]
            if len(stmts) == 1 and not any(body[k].temp for k in inner_idx) and rng.random() < 0.6:
                lines.append(ind + "    " + stmts[0])
            else:
                lines[-1] += " {"
                lines.extend(ind + "    " + s for s in stmts)
                lines.append(ind + "}")
            return
        if d == len(loops) - 2 and outer_idx:
            lines[-1] += " {"
            k = outer_idx[0]
            if case.imperfect and case.imperfect[1] == "before":
                lines.extend(ind + "    " + s for s in stmt_text(k, body[k]))
                emit_loop(d + 1, ind + "    ")
            else:
                emit_loop(d + 1, ind + "    ")
                lines.extend(ind + "    " + s for s in stmt_text(k, body[k]))
            lines.append(ind + "}")
            return
        emit_loop(d + 1, ind + "    ")

    emit_loop(0, indent)
    return lines


def render_program(case: Case) -> str:
    # No system headers: looptile parses the whole preprocessed file, and the declarations of
    # <stdio.h> and <stdlib.h> would cost more time than the nest (the trace program includes them).
    out = ["typedef __SIZE_TYPE__ size_t;", "typedef __UINT64_TYPE__ uint64_t;",
           "int printf(const char *format, ...);", "int sscanf(const char *str, const char *format, ...);", ""]
    out += [a.decl() for a in case.arrays]
    if case.local_acc:
        out.append("double acc_out;")
    out += ["", "void kernel(int n, int m)", "{"]
    if case.local_acc:
        out.append("    double acc = 0.25;")
    out += _nest_text(case, lambda k, s: ["    " + s.text] if s.guarded else [s.text])
    if case.local_acc:
        out.append("    acc_out = acc;")
    out.append("    (void)n;")
    out.append("    (void)m;")
    out += ["}", ""]
    out += [
        "static uint64_t fnv1a(uint64_t h, const void *p, size_t len)",
        "{",
        "    const unsigned char *b = p;",
        "    for (size_t q = 0; q < len; q++) {",
        "        h ^= b[q];",
        "        h *= 1099511628211ULL;",
        "    }",
        "    return h;",
        "}",
        "",
        "static void fill(double *p, size_t count, unsigned salt)",
        "{",
        "    for (size_t q = 0; q < count; q++)",
        "        p[q] = (double)((q * 37u + salt * 11u) % 61u) * 0.1 - 3.0; /* not dyadic: sums round */",
        "}",
        "",
        "static void init(void)",
        "{",
    ]
    scalars = [a for a in case.arrays if a.dims == 0]
    for salt, a in enumerate(case.arrays, 1):
        if a.dims:
            out.append(f"    fill((double *){a.name}, sizeof {a.name} / sizeof(double), {salt}u);")
    for a in scalars:
        out.append(f"    {a.name} = 0.5;")
    if case.local_acc:
        out.append("    acc_out = 0.0;")
    out += ["}", "",
            "int main(int argc, char **argv)",
            "{",
            "    static const int pairs[][2] = {" + ", ".join(f"{{{a}, {b}}}" for a, b in SIZE_PAIRS) + "};",
            "    int count = argc > 1 ? argc - 1 : (int)(sizeof pairs / sizeof pairs[0]);",
            "    for (int q = 0; q < count; q++) {",
            "        int n = pairs[q % 20][0], m = pairs[q % 20][1];",
            "        if (argc > 1 && sscanf(argv[q + 1], \"%d,%d\", &n, &m) != 2)",
            "            return 2;",
            "        init();",
            "        kernel(n, m);",
            "        uint64_t h = 14695981039346656037ULL;"]
    for a in case.arrays:
        out.append(f"        h = fnv1a(h, &{a.name}, sizeof {a.name});")
    if case.local_acc:
        out.append("        h = fnv1a(h, &acc_out, sizeof acc_out);")
    out += ["        printf(\"n=%d m=%d %016llx\\n\", n, m, (unsigned long long)h);",
            "    }",
            "    return 0;",
            "}", ""]
    return "\n".join(out)


def _c_str(s: str) -> str:
    return s.replace("%", "%%")


def _trace_lines(case: Case, k: int, s: Stmt) -> list[str]:
    """Statement k replaced by: log the instance, then every element it reads and writes."""
    fmt = f"S{k + 1}" + " %d" * len(s.loops)
    args = "".join(f", {it}" for it in s.loops)
    lines = ["EV();", f'printf("{fmt}\\n"{args});']
    temp_loops = _temp_loops(case)
    for verb, accs in (("R", s.reads), ("W", s.writes)):
        for a in accs:
            if a.name == "t" and temp_loops is not None:
                # a block-local temporary: one object per iteration of the loops around its declaration
                f2 = "t@" + ",".join(["%d"] * len(temp_loops))
                lines.append(f'printf("{verb} {f2}\\n"' + "".join(f", {it}" for it in temp_loops) + ");")
            else:
                f2 = a.name + "[%d]" * len(a.subs)
                lines.append(f'printf("{verb} {f2}\\n"' + "".join(f", (int)({x})" for x in a.subs) + ");")
    return lines


def _temp_loops(case: Case) -> tuple[str, ...] | None:
    for s in case.body:
        if s.temp:
            return s.loops
    return None


def render_trace(case: Case) -> str:
    """The original nest with each statement replaced by a log of its instance and accesses."""
    out = ["#include <stdio.h>", "#include <stdlib.h>", "", "static long ev;",
           f'#define EV() do {{ if (++ev > {TRACE_LIMIT}L) {{ puts("LIMIT"); exit(0); }} }} while (0)', "",
           "static void kernel(int n, int m)", "{"]
    def text(k: int, s: Stmt) -> list[str]:
        log = "{ " + " ".join(_trace_lines(case, k, s)) + " }"
        if s.guard is not None:
            return [log, s.text]  # the condition is evaluated (logged) every time, then the if
        return ["    " + log] if s.guarded else [log]

    out += _nest_text(case, text)
    out += ["    (void)n;", "    (void)m;", "}", "",
            "int main(int argc, char **argv)", "{",
            "    if (argc != 3)", "        return 2;",
            "    kernel(atoi(argv[1]), atoi(argv[2]));", "    return 0;", "}", ""]
    return "\n".join(out)


# ---------------------------------------------------------------- running looptile

@dataclass
class ToolRun:
    exit_code: int
    stderr: str
    seconds: float


def run_looptile_inprocess(args: list[str], cwd: str | os.PathLike) -> ToolRun:
    """``looptile ARGS`` through click's CliRunner in this process (not thread safe)."""
    from click.testing import CliRunner

    from looptile.cli import main
    t0 = time.perf_counter()
    old = os.getcwd()
    os.chdir(cwd)
    try:
        try:
            res = CliRunner().invoke(main, args, catch_exceptions=False)
        except Exception as exc:  # noqa: BLE001 - an escaped exception is an internal error too
            return ToolRun(3, f"uncaught {type(exc).__name__}: {exc}", time.perf_counter() - t0)
        try:
            err = res.stderr
        except ValueError:
            err = res.output
        return ToolRun(res.exit_code, err, time.perf_counter() - t0)
    finally:
        os.chdir(old)


def run_looptile_subprocess(args: list[str], cwd: str | os.PathLike, python: str | None = None) -> ToolRun:
    import sys
    t0 = time.perf_counter()
    try:
        p = subprocess.run([python or sys.executable, "-m", "looptile.cli", *args], cwd=cwd, capture_output=True,
                           timeout=600)
    except subprocess.TimeoutExpired:
        return ToolRun(3, "looptile timed out after 600 s", time.perf_counter() - t0)
    return ToolRun(p.returncode, p.stderr.decode("utf-8", "replace"), time.perf_counter() - t0)


# ---------------------------------------------------------------- checking

WITNESS = re.compile(
    r"^(?P<what>.*?) would run (?P<sink>S\d+\([^)]*\)) before (?P<src>S\d+\([^)]*\)), but "
    r"(?P<src2>S\d+\([^)]*\)) (?P<vsrc>writes|reads) (?P<elem>\S+), which (?P<sink2>S\d+\([^)]*\)) "
    r"(?P<vsink>writes|reads) \((?P<kind>flow|anti|output) dependence\)$")
HEAD = re.compile(r"^(?P<path>[^\n]*?):(?P<line>\d+):(?P<col>\d+): (?P<kind>error|refused): (?P<msg>.*)$")
INSTANCE = re.compile(r"^S(?P<k>\d+)\((?P<vals>[^)]*)\)$")


@dataclass
class Result:
    index: int
    status: str  # ok | mismatch | legality | unsupported | internal | usage | generator
    lbc: bool
    request: str
    witness: str | None = None  # checked | unchecked | bad (legality refusals)
    reason: str = ""  # refusal reason (normalised) or what went wrong
    detail: str = field(default="", repr=False)
    tool_seconds: float = 0.0
    seconds: float = 0.0
    files: dict[str, str] = field(default_factory=dict, repr=False)
    verb: str = "tile"  # the looptile command of the request

    @property
    def failed(self) -> bool:
        return self.status in ("mismatch", "internal", "usage", "generator") or self.witness == "bad"


def normalise_reason(msg: str) -> str:
    msg = re.sub(r"'[^']*'", "'_'", msg)
    msg = re.sub(r"\([^()]*\)", "(...)", msg)
    msg = re.sub(r"\d+", "N", msg)
    return msg


def cc_command() -> list[str]:
    return shlex.split(os.environ.get("CC", "cc")) or ["cc"]


def cc_problem() -> str | None:
    cc = cc_command()
    if shutil.which(cc[0]) is None:
        return f"no C compiler: '{cc[0]}' (from $CC, default cc) is not on PATH"
    return None


def _compile(src: Path, exe: Path, sanitize: bool = True) -> str | None:
    flags = list(CC_FLAGS) if sanitize else ["-std=gnu11", "-O0"]
    p = subprocess.run(cc_command() + flags + [str(src), "-o", str(exe), "-lm"], capture_output=True, text=True,
                       timeout=300)
    return None if p.returncode == 0 else p.stderr[-3000:]


def _run(exe: Path, args: list[str] | None = None, timeout: int = 60) -> tuple[int, str, str]:
    try:
        p = subprocess.run([str(exe), *(args or [])], capture_output=True, text=True, timeout=timeout,
                           env={**os.environ, **RUN_ENV})
    except subprocess.TimeoutExpired:
        return -999, "", f"timed out after {timeout} s"
    return p.returncode, p.stdout, p.stderr


def _sanitizer_failed(code: int, err: str) -> bool:
    return code != 0 or "runtime error:" in err or "ERROR: AddressSanitizer" in err


def run_tool(case: Case, workdir: Path, runner=run_looptile_inprocess) -> ToolRun:
    workdir.mkdir(parents=True, exist_ok=True)
    (workdir / "case.c").write_text(case.source)
    out = workdir / "out.c"
    if out.exists():
        out.unlink()
    return runner(case.command(), workdir)


def verify(case: Case, workdir: Path, tool: ToolRun) -> Result:
    """Judge looptile's answer ``tool`` for ``case`` (files in ``workdir``) with the outside checks."""
    t0 = time.perf_counter()
    res = Result(case.index, "", case.legal_by_construction, case.request.text(), tool_seconds=tool.seconds,
                 verb=case.request.verb)
    res.files = {"case.c": case.source}
    try:
        _verify(case, workdir, tool, res)
    finally:
        res.seconds = tool.seconds + time.perf_counter() - t0
    return res


def _verify(case: Case, workdir: Path, tool: ToolRun, res: Result) -> None:
    if tool.exit_code == 0:
        out = workdir / "out.c"
        if not out.exists():
            res.status, res.detail = "mismatch", "exit 0 but no output file was written"
            return
        res.files["out.c"] = out.read_text(encoding="latin-1")
        # outside check: the system C compiler runs original and rewrite; outputs compared bit for bit
        err = _compile(workdir / "case.c", workdir / "orig.exe")
        if err:
            res.status, res.detail = "generator", f"the generated program does not compile:\n{err}"
            return
        code, want, e1 = _run(workdir / "orig.exe")
        if _sanitizer_failed(code, e1):
            res.status, res.detail = "generator", f"the generated program fails (exit {code}):\n{e1[-2000:]}"
            return
        err = _compile(out, workdir / "new.exe")
        if err:
            res.status, res.detail = "mismatch", f"the rewritten program does not compile:\n{err}"
            return
        code, got, e2 = _run(workdir / "new.exe")
        if _sanitizer_failed(code, e2):
            res.status, res.detail = "mismatch", f"the rewritten program fails (exit {code}):\n{e2[-2000:]}"
            return
        if got != want:
            diff = [f"  original {a}\n  rewrite  {b}" for a, b in zip(want.splitlines(), got.splitlines()) if a != b]
            res.status = "mismatch"
            res.detail = "results differ (bit for bit) for:\n" + "\n".join(diff[:8])
            return
        res.status = "ok"
        return
    # a refusal or an error is only about looptile when the generated program is valid C
    p = subprocess.run(cc_command() + ["-std=gnu11", "-fsyntax-only", "-Wall", "-Werror=implicit-function-declaration",
                                       str(workdir / "case.c")], capture_output=True, text=True, timeout=120)
    if p.returncode != 0:
        res.status, res.detail = "generator", f"the generated program is not valid C:\n{p.stderr[-3000:]}"
        return
    if tool.exit_code == 1:
        first = tool.stderr.split("\n", 1)[0]
        m = HEAD.match(first)
        if not m or m.group("kind") != "refused":
            res.status, res.detail = "internal", f"exit 1 without a 'refused:' headline:\n{tool.stderr}"
            return
        msg = m.group("msg")
        w = WITNESS.match(msg)
        if not w:
            res.status, res.reason = "unsupported", normalise_reason(msg)
            res.detail = tool.stderr
            return
        res.status, res.reason = "legality", f"{w.group('kind')} dependence"
        res.detail = tool.stderr
        if case.flat:  # the witness names elements of the two-dimensional reading
            res.witness = "unchecked"
            return
        # outside check: the witness pair is re-derived by tracing the original program
        res.witness, why = check_witness(case, workdir, tool.stderr, w)
        if why:
            res.detail = tool.stderr + "\nwitness check: " + why
        return
    if tool.exit_code == 2:
        res.status, res.detail = "usage", f"exit 2 (the generator built a wrong request?):\n{tool.stderr}"
        return
    res.status, res.detail = "internal", f"exit {tool.exit_code}:\n{tool.stderr}"


# ---------------------------------------------------------------- the witness

def _instance(text: str) -> tuple[int, dict[str, int]]:
    m = INSTANCE.match(text)
    if not m:
        raise ValueError(f"cannot read the instance {text!r}")
    vals: dict[str, int] = {}
    for part in filter(None, (p.strip() for p in m.group("vals").split(","))):
        k, _, v = part.partition("=")
        vals[k.strip()] = int(v)
    return int(m.group("k")), vals


@dataclass
class Event:
    pos: int
    stmt: int  # 1-based
    vals: tuple[int, ...]
    reads: set[str]
    writes: set[str]


def parse_trace(text: str) -> tuple[list[Event], bool]:
    events: list[Event] = []
    full = True
    for line in text.splitlines():
        if line == "LIMIT":
            full = False
            break
        if line.startswith("S"):
            parts = line.split()
            events.append(Event(len(events), int(parts[0][1:]), tuple(int(x) for x in parts[1:]), set(), set()))
        elif line.startswith("R "):
            events[-1].reads.add(line[2:])
        elif line.startswith("W "):
            events[-1].writes.add(line[2:])
    return events, full


def check_witness(case: Case, workdir: Path, stderr: str, w: re.Match) -> tuple[str, str]:
    """("checked" | "unchecked" | "bad", why not checked)."""
    if w.group("src") != w.group("src2") or w.group("sink") != w.group("sink2"):
        return "bad", "the message names different instances in its two halves"
    kind = w.group("kind")
    want = {"flow": ("writes", "reads"), "anti": ("reads", "writes"), "output": ("writes", "writes")}[kind]
    if (w.group("vsrc"), w.group("vsink")) != want:
        return "bad", f"a {kind} dependence, but the source {w.group('vsrc')} and the sink {w.group('vsink')}"
    try:
        sk, svals = _instance(w.group("src"))
        tk, tvals = _instance(w.group("sink"))
    except ValueError as exc:
        return "bad", str(exc)
    params = {"n": 0, "m": 0}
    pm = re.search(r"^\s*for example with (.*)$", stderr, re.M)
    if pm:
        for part in pm.group(1).split(","):
            k, _, v = part.partition("=")
            if k.strip() not in params:
                return "bad", f"the witness sets '{k.strip()}', which is not a parameter"
            params[k.strip()] = int(v)
    elem = w.group("elem")
    if not (1 <= sk <= len(case.body) and 1 <= tk <= len(case.body)):
        return "bad", "a statement number outside the nest"
    for k, vals in ((sk, svals), (tk, tvals)):
        if list(vals) != list(case.body[k - 1].loops):
            return "bad", f"S{k} is shown with iterators {list(vals)}, but it is inside loops {case.body[k - 1].loops}"
    src_c = workdir / "trace.c"
    src_c.write_text(case.trace_source)
    err = _compile(src_c, workdir / "trace.exe", sanitize=False)
    if err:
        return "bad", f"(generator) the trace program does not compile:\n{err}"
    code, out, e = _run(workdir / "trace.exe", [str(params["n"]), str(params["m"])])
    if code != 0:
        return "bad", f"(generator) the trace program fails: exit {code} {e[-500:]}"
    events, full = parse_trace(out)
    if not full:
        return "unchecked", f"the trace at {params} has more than {TRACE_LIMIT} statement executions"
    by_inst = {(ev.stmt, ev.vals): ev for ev in events}
    src_ev = by_inst.get((sk, tuple(svals.values())))
    dst_ev = by_inst.get((tk, tuple(tvals.values())))
    if src_ev is None:
        return "bad", f"the source instance {w.group('src')} does not run with {params}"
    if dst_ev is None:
        return "bad", f"the sink instance {w.group('sink')} does not run with {params}"

    def touches(ev: Event, verb: str) -> set[str]:
        acc = ev.writes if verb == "writes" else ev.reads
        return {a for a in acc if a == elem or a.split("@")[0] == elem}

    hs, hd = touches(src_ev, want[0]), touches(dst_ev, want[1])
    if not hs:
        return "bad", f"{w.group('src')} does not {want[0][:-1]} {elem} (it reads {sorted(src_ev.reads)}, " \
                      f"writes {sorted(src_ev.writes)})"
    if not hd:
        return "bad", f"{w.group('sink')} does not {want[1][:-1]} {elem} (it reads {sorted(dst_ev.reads)}, " \
                      f"writes {sorted(dst_ev.writes)})"
    if not hs & hd:
        return "bad", f"source and sink touch different objects named {elem}: {sorted(hs)} vs {sorted(hd)}"
    if not src_ev.pos < dst_ev.pos:
        return "bad", f"in the original order the sink runs first (positions {dst_ev.pos} < {src_ev.pos})"
    # Now the requested order, computed from the request alone.
    p = case.perfect
    if case.request.kind in ("jam", "unroll"):
        perf = case.loops[:p]
        factors = dict(case.request.factors)

        def jam_key(ev: Event) -> tuple:
            return fuzzjam.jam_order_key(perf, case.request.kind, factors, dict(zip((lp.it for lp in perf), ev.vals)),
                                         params, ev.pos)
        if jam_key(dst_ev) < jam_key(src_ev):
            return "checked", ""
        return "bad", (f"in the jammed order the source still runs first: keys {jam_key(src_ev)} (source) "
                       f"{jam_key(dst_ev)} (sink)")
    domain = sorted({ev.vals[:p] for ev in events})
    key_src = new_order_key(case, src_ev, domain, params)
    key_dst = new_order_key(case, dst_ev, domain, params)
    if key_dst < key_src:
        return "checked", ""
    nonrect = [b for b in case.request.band if case.nonrectangular(b)]
    if nonrect:
        # the tile grid of a non-rectangular loop may start elsewhere: check only that the
        # sink's tile coordinates do not come after the source's
        if new_order_key(case, dst_ev, domain, params, tiles_only=True) <= \
                new_order_key(case, src_ev, domain, params, tiles_only=True):
            return "unchecked", (f"non-rectangular loops {nonrect}: with the grid reproduced here the source "
                                 f"still runs first ({key_src} vs {key_dst}); the tile coordinates agree")
    return "bad", f"in the requested order the source still runs first: keys {key_src} (source) {key_dst} (sink)"


def new_order_key(case: Case, ev: Event, domain: list[tuple[int, ...]], params: dict[str, int],
                  tiles_only: bool = False) -> tuple:
    """The position of instance ``ev`` in the requested order, as a sortable tuple.

    Tile loop of x (size T, step s, direction d): floor(d * (x - origin) / (|s| * T)).  The origin is
    the loop's initial value when its header makes sense at the tile loop's place (its bounds use only
    loops placed outside it, and no loop placed outside it has bounds that use x); otherwise (README:
    "the tile loop of such a loop runs over its range") the first value of x (the smallest for an
    up-counting loop, the largest for a down-counting one) among the iterations of the perfect loops
    that agree with ``ev`` on the loops placed outside this tile loop.  Point and untouched loops:
    d * x.  Ties (the same perfect iteration) keep the original order.
    """
    perf = case.loops[: case.perfect]
    pos = {lp.it: k for k, lp in enumerate(perf)}
    vals = {lp.it: ev.vals[k] for k, lp in enumerate(perf)}
    sizes = dict(zip(case.request.band, case.request.sizes))
    sizes2 = dict(zip(case.request.band, case.request.sizes2))
    key: list[int] = []
    defined: list[str] = []
    for kind, it in case.request.slots:
        lp = perf[pos[it]]
        x = vals[it]
        if kind == "tile2":
            # the level-2 tiles of a rectangular loop: they start at the level-1 tile, which starts
            # at the loop's initial value plus a multiple of T1; T2 divides T1, so that is a grid of
            # T2 from the initial value
            origin = eval(lp.init, {"__builtins__": {}}, {**params, **vals})  # noqa: S307 - our own text
            key.append((lp.direction * (x - origin)) // (abs(lp.step) * sizes2[it]))
            continue
        if kind == "tile":
            refs = set(lp.uses) & set(pos)
            if not (refs - set(defined)) and not any(it in perf[pos[d]].uses for d in defined):
                # its own header describes the loop here: the tiles start at its initial value
                origin = eval(lp.init, {"__builtins__": {}}, {**params, **vals})  # noqa: S307 - our own text
            else:
                # the hull: the first value over the perfect loops' iterations that agree with
                # ``ev`` on the loops placed outside this tile loop
                same = [v for v in domain if all(v[pos[d]] == vals[d] for d in defined)]
                firsts = [v[pos[it]] for v in same]
                origin = min(firsts) if lp.direction > 0 else max(firsts)
            key.append((lp.direction * (x - origin)) // (abs(lp.step) * sizes[it]))
        else:
            if not tiles_only:
                key.append(lp.direction * x)
            defined.append(it)
    if tiles_only:
        return tuple(key)
    return tuple(key) + (ev.pos,)


# ---------------------------------------------------------------- batches

@dataclass
class Summary:
    results: list[Result]
    wall: float

    def count(self, pred) -> int:
        return sum(1 for r in self.results if pred(r))

    @property
    def lbc(self) -> list[Result]:
        return [r for r in self.results if r.lbc]

    @property
    def lbc_refusal_rate(self) -> float:
        lbc = self.lbc
        return sum(r.status in ("legality", "unsupported") for r in lbc) / len(lbc) if lbc else 0.0

    def report(self) -> str:
        rs = self.results
        n = len(rs)
        verbs: dict[str, int] = {}
        for r in rs:
            verbs[r.verb] = verbs.get(r.verb, 0) + 1
        lines = [f"cases tried:            {n} ({', '.join(f'{v} {c}' for v, c in sorted(verbs.items()))})",
                 f"transformed (verified): {self.count(lambda r: r.status == 'ok')}",
                 f"refused, legality:      {self.count(lambda r: r.status == 'legality')}"
                 f"  (witness checked {self.count(lambda r: r.witness == 'checked')}, "
                 f"unchecked {self.count(lambda r: r.witness == 'unchecked')}, "
                 f"WRONG {self.count(lambda r: r.witness == 'bad')})",
                 f"refused, unsupported:   {self.count(lambda r: r.status == 'unsupported')}",
                 f"MISMATCHES:             {self.count(lambda r: r.status == 'mismatch')}",
                 f"internal errors:        {self.count(lambda r: r.status == 'internal')}",
                 f"usage errors (exit 2):  {self.count(lambda r: r.status == 'usage')}",
                 f"generator problems:     {self.count(lambda r: r.status == 'generator')}"]
        lbc = self.lbc
        refused_lbc = sum(r.status in ("legality", "unsupported") for r in lbc)
        lines.append(f"legal by construction:  {len(lbc)} requests, {refused_lbc} refused "
                     f"({100 * self.lbc_refusal_rate:.1f}%)")
        reasons: dict[str, int] = {}
        for r in rs:
            if r.status == "unsupported":
                reasons[r.reason] = reasons.get(r.reason, 0) + 1
        for reason, c in sorted(reasons.items(), key=lambda kv: -kv[1]):
            lines.append(f"  unsupported x{c}: {reason}")
        lbc_reasons: dict[str, int] = {}
        for r in lbc:
            if r.status in ("legality", "unsupported"):
                lbc_reasons[r.reason] = lbc_reasons.get(r.reason, 0) + 1
        for reason, c in sorted(lbc_reasons.items(), key=lambda kv: -kv[1]):
            lines.append(f"  refused although legal by construction x{c}: {reason}")
        if n:
            tool = sum(r.tool_seconds for r in rs) / n
            per = sum(r.seconds for r in rs) / n
            lines.append(f"time per case:          {per:.2f} s of work ({tool:.2f} s in looptile), "
                         f"{self.wall / n:.2f} s wall; total wall {self.wall:.0f} s")
        return "\n".join(lines)


def kernel_text(source: str) -> str:
    """The declarations and kernel() of a generated program (the rest is the same in every case)."""
    return source.split("static uint64_t fnv1a")[0].rstrip() + "\n"


def describe_failure(r: Result, whole: bool = False) -> str:
    src = r.files.get("case.c", "")
    parts = [f"--- case {r.index}: {r.status}" + (f", witness {r.witness}" if r.witness else ""),
             f"request: looptile {r.verb} case.c --nest kernel {r.request}", r.detail.rstrip(),
             "case.c:" if whole else "case.c (declarations and kernel; main() hashes every array):",
             src if whole else kernel_text(src)]
    return "\n".join(parts)
