"""Tile sizes from the cache geometry (``--sizes auto``, ``tile(i=auto)``): a documented model.

The model, per level of cache (``cachegeom.Level``):

1. Footprint. The accesses of the nest are grouped per array into uniformly generated
   references (the same subscripts up to constants: Gannon, Jalby and Gallivan, "Strategies for
   cache and local memory management by global program transformation", 1988, from memory). One
   tile of the band runs each band loop over T iterations and each loop inside the band (untiled
   perfect loops after it, loops of the imperfect part) over its whole trip count; loops outside
   the band are fixed. A group then touches a box of elements whose extent in dimension d is
   ``sum(|coefficient| * step * (T - 1)) + 1`` plus the spread of the group's constants; its
   footprint in lines is the product of the extents of the outer dimensions times the lines of
   the innermost (contiguous, row-major) one, ``ceil(extent * element size / line)`` (rows counted
   from a line boundary); a tile as wide as the rows is one contiguous run of its rows' bytes.
   An array indexed by a subset of the band's iterators has the product of those tile sizes as
   its footprint.
2. Reuse. A group is *reused* inside a tile when a loop of the tile does not appear in its
   subscripts (temporal reuse across that loop), when several accesses differ by constants
   (group reuse, a stencil), or when its contiguous dimension moves with a loop other than the
   innermost (spatial reuse carried by an outer loop of the tile: the lines must survive one run
   of the loops inside). The others are streams: each line is used by consecutive iterations of
   the innermost loop only, and whether they stay in the cache does not matter. The reused groups
   must fit (Wolf and Lam, "A data locality optimizing algorithm", PLDI 1991, from memory: tile so
   that the data reused across the tile loops stays in the cache).
3. Fit. The footprint of the reused groups must be at most ``FRACTION`` of the level's lines.
   One half, the classic rule of thumb (from memory: Lam, Rothberg and Wolf, "The cache
   performance and optimizations of blocked algorithms", ASPLOS 1991, show that a tile that fills
   the cache suffers heavy interference; a fraction of about a half to three quarters is the
   usual advice): the streams, the stack, the next tile's data arriving before the last one is
   dead, and the cross-interference between arrays whose base addresses the model does not know
   all need room.
4. Self-interference. With the row lengths known (``params``), the lines of each group's tile are
   mapped to sets (``line index mod sets``, arrays starting at a set boundary); the largest count
   of one group's lines in one set, summed over the groups, must not exceed the ways: then no set
   overflows wherever the arrays start relative to each other. This rejects the classic
   pathological sizes where rows a multiple of ``sets * line`` bytes apart all land in the same
   sets (Lam, Rothberg and Wolf 1991; Coleman and McKinley, "Tile size selection using cache
   organization and data layout", PLDI 1995, from memory, choose among non-conflicting sizes the
   same way).
5. Choice. Among the sizes that fit and do not conflict, the one with the fewest reused lines
   per iteration (footprint / iterations of a tile: the misses of a tile loaded once); ties go to
   the larger tile, then the squarer, then the larger sizes of the outer loops (deterministic).
   Candidate sizes: 1, 2, 3, 4, 6, 8, 12, 16, 24, 32, ... (powers of two and three times powers
   of two, so that levels nest), for a loop that walks the contiguous dimension of a reused
   array multiples of the line's element count (and smaller powers of two), never larger than
   the loop's trip count when ``params`` (or constant bounds) give it. When no size is free of
   conflicts, the one with the smallest overflow is taken and said.
6. Two levels. With two or more levels, the L1 sizes are chosen first (inner tiles), then the
   L2 sizes (outer tiles) among multiples of them (looptile's multi-level rule: inner sizes divide
   outer ones) with the L2 geometry; a level whose sizes equal the level inside is dropped. Bands
   whose bounds depend on each other (triangular) get one level (multi-level tiling is for
   rectangular bands). Levels beyond the second are not used.

Deterministic: the same nest, geometry and parameters give the same sizes. Every decision is in
``Choice.explanation``. The sizes only choose among rewrites: the legality test runs on them as on
any others. Library code: returns values, raises ``UsageError`` for requests it cannot size.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

from .cachegeom import Level
from .errors import UsageError
from .model import Affine, Loop, Nest

FRACTION = 0.5  # of a level's lines, for the reused footprint (see 3. above)
NOMINAL_TRIP = 1024  # an untiled loop inside the band whose trip count is unknown (said in the explanation)
_STEPS = (1, 2, 3, 4, 6, 8, 12, 16, 24, 32, 48, 64, 96, 128, 192, 256, 384, 512, 768, 1024, 1536, 2048, 3072,
          4096, 6144, 8192)
_MAX_SIZE = 8192  # no tile larger than this in one loop, trip count unknown
_CONFLICT_CHECKS = 4000  # candidates examined for conflicts at one level, best first


@dataclass(frozen=True)
class Choice:
    sizes: dict[str, int]  # the innermost level of tiles: every band loop's size there
    levels: list[dict[str, int]]  # outermost level first (one entry for one level), as --sizes per level
    explanation: list[str] = field(default_factory=list)


@dataclass(frozen=True)
class Group:
    """Accesses of one array with the same subscripts up to constants."""

    array: str  # C name
    esize: int  # bytes per element
    coeffs: tuple[tuple[tuple[str, int], ...], ...]  # per dimension: (iterator, coefficient) of the tile's loops
    spread: tuple[int, ...]  # per dimension: max - min of the constants of the group's accesses
    strides: tuple[int, ...] | None  # per dimension: bytes between consecutive indices (None: unknown)
    accesses: int
    reuse: str  # why it is reused ("" for a stream)
    spelled: str  # e.g. C[i][j]


# ---------------------------------------------------------------- trip counts

def _interval(a: Affine, ranges: dict[str, tuple[int, int]]) -> tuple[int, int] | None:
    lo = hi = a.const
    for name, c in a.terms:
        if name not in ranges:
            return None
        x, y = ranges[name]
        lo += min(c * x, c * y)
        hi += max(c * x, c * y)
    return lo, hi


def _loop_range(lp: Loop, ranges: dict[str, tuple[int, int]]) -> tuple[int, int] | None:
    start, limit = _interval(lp.start.value, ranges), _interval(lp.limit.value, ranges)
    if start is None or limit is None:
        return None
    excl = 0 if lp.inclusive else 1
    if lp.direction > 0:
        return start[0], limit[1] - excl
    return limit[0] + excl, start[1]


def trip_counts(nest: Nest, params: dict[str, int]) -> dict[str, int | None]:
    """The largest trip count of every loop of the nest (None: unknown), by interval arithmetic over
    the enclosing loops' ranges with the parameters' values."""
    ranges: dict[str, tuple[int, int]] = {}
    for p in nest.params:
        for key in (p.name, p.text):
            if key in params:
                ranges[p.name] = (params[key], params[key])
    out: dict[str, int | None] = {}
    for lp in nest.perfect + nest.inner:
        r = _loop_range(lp, ranges)
        if r is None:
            out[lp.iterator] = None
            continue
        out[lp.iterator] = max(0, (r[1] - r[0]) // lp.step + 1)
        if r[1] >= r[0]:
            ranges[lp.iterator] = r
    return out


# ---------------------------------------------------------------- groups

def _element_bytes(nest: Nest, key: str) -> int:
    bits = nest.array(key).elem.bits or 8
    return max(1, bits // 8)


def _row_lengths(nest: Nest, analysis, key: str, params: dict[str, int]) -> tuple[int, ...] | None:
    """Element counts of dimensions 1.. of an array: a flattened array's row lengths from the
    parameters; otherwise the touched extent of each dimension (the declared lengths are not in the
    model; the extent is what the nest walks, usually the whole row)."""
    info = nest.array(key)
    if info.ndims <= 1:
        return ()
    if info.rows:
        spell = {p.text: p.name for p in nest.params}
        vals = [params.get(r, params.get(spell.get(r, r))) for r in info.rows]
        return None if any(v is None for v in vals) else tuple(vals)  # type: ignore[misc]
    from . import deps
    values = {}
    for p in nest.params:
        for k in (p.name, p.text):
            if k in params:
                values[p.text] = params[k]
        if p.text not in values:  # the extent would range over the parameter's type
            return None
    try:
        ext = deps.access_extent(analysis, key, values)
    except deps.BoundsNotAffine:
        return None
    if ext is None:
        return None
    return tuple(hi - lo + 1 for lo, hi in ext[1:])


def groups(nest: Nest, analysis, band: tuple[str, ...], inside: tuple[str, ...],
           params: dict[str, int]) -> tuple[list[Group], list[str]]:
    """The uniformly generated groups of the nest's accesses, and what was left out (and why)."""
    tile_loops = band + inside
    innermost = tile_loops[-1]
    found: dict[tuple, list] = {}
    left: list[str] = []
    for st in nest.statements:
        for acc in st.accesses:
            info = nest.array(acc.array)
            if info.ndims == 0 or info.local:
                what = f"'{info.name}' ({'a scalar' if info.ndims == 0 else 'local to the nest'})"
                if what not in left:
                    left.append(what)
                continue
            shape = tuple(tuple((n, c) for n, c in s.terms) for s in acc.subscripts)
            found.setdefault((acc.array, shape), []).append(acc)
    out = []
    for (key, shape), accs in found.items():
        info = nest.array(key)
        consts = [[s.const for s in a.subscripts] for a in accs]
        spread = tuple(max(c[d] for c in consts) - min(c[d] for c in consts) for d in range(len(shape)))
        coeffs = tuple(tuple((n, c) for n, c in dim if n in tile_loops) for dim in shape)
        used = {n for dim in coeffs for n, _ in dim}
        reasons = []
        absent = [x for x in tile_loops if x not in used]
        if absent:
            reasons.append(f"reuses across {', '.join(absent)}")
        if len({tuple(c) for c in consts}) > 1:
            reasons.append(f"{len({tuple(c) for c in consts})} accesses a constant apart")
        carried = [n for n, _ in coeffs[-1] if n != innermost]
        if carried:
            reasons.append(f"its rows are walked by {', '.join(carried)}, outside the innermost loop")
        esize = _element_bytes(nest, key)
        lengths = _row_lengths(nest, analysis, key, params)
        strides = None
        if lengths is not None:
            acc_stride = [esize]
            for n in reversed(lengths):
                acc_stride.insert(0, acc_stride[0] * n)
            strides = tuple(acc_stride)
        spelled = info.name + "".join(f"[{a.render()}]" for a in accs[0].subscripts)
        out.append(Group(info.name, esize, coeffs, spread, strides, len(accs), "; ".join(reasons), spelled))
    return out, left


# ---------------------------------------------------------------- the model at one level

def _extents(g: Group, n: dict[str, int], steps: dict[str, int]) -> tuple[int, ...]:
    return tuple(sum(abs(c) * steps[x] * (n[x] - 1) for x, c in dim) + 1 + sp for dim, sp in zip(g.coeffs, g.spread))


def _spans(g: Group, ext: tuple[int, ...]) -> tuple[tuple[int, ...], int]:
    """The extents of the dimensions whose indices start separate runs of bytes, and the bytes of one
    run: a row of the tile, or, when the tile covers whole rows (its width reaches the row length),
    the rows of the last two dimensions as one contiguous run."""
    width = ext[-1] * g.esize
    if g.strides is not None and len(ext) >= 2 and width >= g.strides[-2]:
        return ext[:-2], (ext[-2] - 1) * g.strides[-2] + width
    return ext[:-1], width


def footprint(g: Group, n: dict[str, int], steps: dict[str, int], line: int) -> int:
    """Lines one tile touches of the group (``n``: iterations of each loop of the tile)."""
    outer, width = _spans(g, _extents(g, n, steps))
    return math.prod(outer) * math.ceil(width / line)


def set_load(g: Group, n: dict[str, int], steps: dict[str, int], level: Level) -> int | None:
    """The largest number of the group's tile lines that fall into one set (the array's start at a
    set boundary); None when the row lengths are unknown."""
    if g.strides is None:
        return None
    outer, width = _spans(g, _extents(g, n, steps))
    sets, line = level.sets, level.line
    diff = [0] * (sets + 1)
    every = 0
    rows = [0]
    for e, stride in zip(outer, g.strides):
        rows = [r + k * stride for r in rows for k in range(e)]
    for r in rows:
        first, last = r // line, (r + width - 1) // line
        count = last - first + 1
        every += count // sets
        rem, s0 = count % sets, first % sets
        if rem:
            end = s0 + rem
            diff[s0] += 1
            if end <= sets:
                diff[end] -= 1
            else:
                diff[sets] -= 1
                diff[0] += 1
                diff[end - sets] -= 1
    run = best = 0
    for k in range(sets):
        run += diff[k]
        best = max(best, run)
    return best + every


@dataclass
class _Level:
    """The search at one level of cache."""

    level: Level
    reused: list[Group]
    steps: dict[str, int]
    inside: dict[str, int]  # iterations of untiled loops inside the band
    streams: list[Group] = field(default_factory=list)  # misses too, but they need not fit
    capacity: int = 0  # lines allowed for the reused footprint

    def __post_init__(self) -> None:
        self.capacity = int(FRACTION * self.level.lines)
        self._loads: dict[tuple, int | None] = {}

    def n(self, sizes: dict[str, int]) -> dict[str, int]:
        return {**self.inside, **sizes}

    def lines(self, sizes: dict[str, int]) -> int:
        n = self.n(sizes)
        return sum(footprint(g, n, self.steps, self.level.line) for g in self.reused)

    def cost(self, sizes: dict[str, int]) -> float:
        """Lines loaded per iteration: the tile's footprint, streams included, over its iterations."""
        n = self.n(sizes)
        streamed = sum(footprint(g, n, self.steps, self.level.line) for g in self.streams)
        return (self.lines(sizes) + streamed) / math.prod(n.values())

    def loads(self, sizes: dict[str, int]) -> list[int | None]:
        n = self.n(sizes)
        out = []
        for g in self.reused:
            ext = _extents(g, n, self.steps)
            key = (g.spelled, g.array, ext)
            if key not in self._loads:
                self._loads[key] = set_load(g, n, self.steps, self.level)
            out.append(self._loads[key])
        return out

    def overflow(self, sizes: dict[str, int]) -> int:
        """How many lines one set would hold beyond the ways, at worst (0: no self-interference); a
        stream holds one line (the one in use) in the worst set."""
        held = sum(x for x in self.loads(sizes) if x is not None) + len(self.streams)
        return max(0, held - self.level.assoc)


def _candidates(trip: int | None, contiguous: int | None, multiple_of: int = 1) -> list[int]:
    """Sizes tried for one loop, ascending (``multiple_of``: the size of the level inside)."""
    cap = min(trip, _MAX_SIZE) if trip is not None else _MAX_SIZE
    cap = max(cap, 1)
    if multiple_of > 1:
        vals = {multiple_of * k for k in _STEPS if multiple_of * k <= cap}
        if trip is not None and trip % multiple_of == 0 and trip <= _MAX_SIZE:
            vals.add(trip)
        return sorted(vals or {multiple_of})
    if contiguous:
        vals = {k for k in _STEPS if k < contiguous and contiguous % k == 0} | \
               {contiguous * k for k in _STEPS if contiguous * k <= cap}
    else:
        vals = set(_STEPS)
    vals = {v for v in vals if v <= cap}
    if trip is not None and 1 <= trip <= _MAX_SIZE:
        vals.add(trip)  # the whole loop in one tile
    return sorted(vals or {1})


def _rank(lv: _Level, sizes: dict[str, int], order: tuple[str, ...]) -> tuple:
    vol = math.prod(sizes.values())
    spread = max(sizes.values()) / max(1, min(sizes.values()))
    return (round(lv.cost(sizes), 12), -vol, spread, tuple(-sizes[x] for x in order))


def _fitting(lv: _Level, cands: dict[str, list[int]], order: tuple[str, ...]) -> list[dict[str, int]]:
    """Every combination of candidates whose reused footprint fits (the footprint grows with each
    size, so a loop's larger candidates are skipped once one does not fit)."""
    out: list[dict[str, int]] = []

    def walk(k: int, chosen: dict[str, int]) -> None:
        if k == len(order):
            out.append(dict(chosen))
            return
        x = order[k]
        rest = {y: cands[y][0] for y in order[k + 1:]}
        for v in cands[x]:
            trial = {**chosen, x: v, **rest}
            if lv.lines(trial) > lv.capacity and v != cands[x][0]:
                break
            chosen[x] = v
            walk(k + 1, chosen)
            del chosen[x]

    walk(0, {})
    return [s for s in out if lv.lines(s) <= lv.capacity] or [min(out, key=lv.lines)]


def pick(lv: _Level, cands: dict[str, list[int]], order: tuple[str, ...]) -> tuple[dict[str, int], list[str]]:
    """The best sizes at one level, and what was rejected on the way."""
    ranked = sorted(_fitting(lv, cands, order), key=lambda s: _rank(lv, s, order))
    notes: list[str] = []
    best_over: tuple[int, int] | None = None
    for k, sizes in enumerate(ranked[:_CONFLICT_CHECKS]):
        over = lv.overflow(sizes)
        if over == 0:
            return sizes, notes
        if not notes:
            notes.append(_conflict_note(lv, sizes))
        if best_over is None or over < best_over[0]:
            best_over = (over, k)
    assert best_over is not None
    sizes = ranked[best_over[1]]
    notes.append(f"no candidate size is free of self-interference in {lv.level.name}; taking "
                 f"{_show(sizes, order)}, whose worst set holds {best_over[0]} line(s) beyond the "
                 f"{lv.level.assoc} ways")
    return sizes, notes


def _conflict_note(lv: _Level, sizes: dict[str, int]) -> str:
    loads = lv.loads(sizes)
    worst = max(range(len(loads)), key=lambda k: loads[k] or 0)
    g = lv.reused[worst]
    span = lv.level.sets * lv.level.line
    strides = g.strides or ()
    why = ""
    if len(strides) >= 2 and strides[-2] % span == 0:
        why = (f": its rows are {strides[-2]} bytes apart, a multiple of sets x line = {span} bytes, so they all "
               "fall into the same sets")
    elif len(strides) >= 2:
        why = f" (rows {strides[-2]} bytes apart)"
    return (f"rejected {_show(sizes, tuple(sizes))} in {lv.level.name}: self-interference, {g.spelled} puts "
            f"{loads[worst]} of its lines into one set{why}; with the other arrays' worst sets that is "
            f"{lv.overflow(sizes) + lv.level.assoc} lines for {lv.level.assoc} ways"
            + (" (streams: one line each)" if lv.streams else ""))


def _show(sizes: dict[str, int], order: tuple[str, ...]) -> str:
    return ", ".join(f"{x}={sizes[x]}" for x in order if x in sizes)


def _kib(lines: int, line: int) -> str:
    b = lines * line
    return f"{b // 1024} KiB" if b % 1024 == 0 else f"{b / 1024:.1f} KiB"


def _ctype_word(g: Group) -> str:
    return {1: "bytes", 2: "2-byte elements", 4: "4-byte elements", 8: "8-byte elements"}.get(
        g.esize, f"{g.esize}-byte elements")


def _describe(lv: _Level, sizes: dict[str, int], order: tuple[str, ...]) -> list[str]:
    n = lv.n(sizes)
    out = []
    loads = lv.loads(sizes)
    for g, load in zip(lv.reused, loads):
        ext = _extents(g, n, lv.steps)
        lines = footprint(g, n, lv.steps, lv.level.line)
        shape = "x".join(map(str, ext))
        out.append(f"  {g.spelled} {g.reuse}: footprint {shape} {_ctype_word(g)} = {lines} lines = "
                   f"{_kib(lines, lv.level.line)}" + (f", at most {load} in one set" if load is not None else
                                                      ", sets not checked (row length unknown; give --params)"))
    total = lv.lines(sizes)
    lvl = lv.level
    assoc = "fully associative" if lvl.sets == 1 else f"{lvl.assoc}-way, {lvl.sets} sets"
    out.append(f"  total {total} lines = {_kib(total, lvl.line)} of {lvl.name} ({_kib(lvl.lines, lvl.line)}, "
               f"{assoc}, {lvl.line}-byte lines); fraction {FRACTION} allows {lv.capacity} lines; "
               f"{lv.cost(sizes):.4g} lines loaded per iteration" + (" (streams included)" if lv.streams else ""))
    return out


# ---------------------------------------------------------------- the choice

def _contiguous(reused: list[Group], band: tuple[str, ...], line: int) -> dict[str, int]:
    """Band loops that walk the contiguous dimension of a group with coefficient +-1, and the
    line's element count of that group."""
    out: dict[str, int] = {}
    for g in reused:
        for x, c in g.coeffs[-1]:
            if x in band and abs(c) == 1:
                out[x] = max(out.get(x, 1), max(1, line // g.esize))
    return out


def choose(nest: Nest, analysis, band: tuple[str, ...], levels: list[Level],
           params: dict[str, int] | None = None, fixed: dict[str, int] | None = None,
           multiples: dict[str, int] | None = None, block: dict[str, int] | None = None) -> Choice:
    """Tile sizes for ``band`` (consecutive perfectly nested loops of ``nest``) from the cache
    ``levels`` (innermost first); ``params`` bound the sizes by the trip counts and give the row
    lengths for the conflict test; ``fixed`` sizes are kept as given; ``multiples`` (jam factors)
    are what the innermost sizes of their loops must be multiples of; ``block`` is the register
    tile ``--jam auto`` chose: its loops' innermost tiles are the block itself, so the
    first level sizes the other loops (the reduction's run) around it, and a level whose sizes of
    those loops equal the block's is not emitted (the jammed point loop covers it)."""
    params = dict(params or {})
    fixed = dict(fixed or {})
    block = {x: u for x, u in (block or {}).items() if x in band and x not in fixed}
    multiples = {x: u for x, u in (multiples or {}).items() if x in band and x not in fixed and x not in block
                 and u > 1}
    if not band:
        raise UsageError("sizes chosen by the cache model need a band of loops to tile")
    if not levels:
        raise UsageError("sizes chosen by the cache model need a cache level (--cache L1=48KiB/12/64)")
    its = nest.iterators
    for x in band:
        if x not in its:
            raise UsageError(f"'{x}' is not one of the perfectly nested loops ({', '.join(its)})",
                             path=nest.path, line=nest.line, column=nest.col)
    trips = trip_counts(nest, params)
    last = its.index(band[-1])
    inside = tuple(its[last + 1:]) + tuple(lp.iterator for lp in nest.inner)
    why: list[str] = []
    geometry = ", ".join(lv.spec() for lv in levels)
    why.append(f"cache levels {geometry}; the reused data of a tile must fit {FRACTION} of a level (room for "
               "streams, the next tile and conflicts between arrays)")
    shown = []
    for x in band + inside:
        t = trips[x]
        shown.append(f"{x} {t}" if t is not None else f"{x} unknown")
    why.append(f"band ({', '.join(band)}); trip counts: {', '.join(shown)}" +
               ("" if params else " (give --params to bound the sizes and check conflicts)"))
    inside_n = {}
    for x in inside:
        t = trips[x]
        if t is None:
            why.append(f"the trip count of loop '{x}' inside the band is unknown: taken as {NOMINAL_TRIP}")
        inside_n[x] = max(1, t if t is not None else NOMINAL_TRIP)
    found, left = groups(nest, analysis, band, inside, params)
    reused = [g for g in found if g.reuse]
    streams = [g for g in found if not g.reuse]
    if streams:
        why.append("streams (each line used by consecutive iterations of the innermost loop only: loaded, but they "
                   "need not fit): "
                   + ", ".join(g.spelled for g in streams))
    if left:
        why.append("not counted: " + ", ".join(left))
    if not reused:
        reused = found
        if found:
            why.append("no array is reused inside a tile: the whole working set is counted instead")
    if not reused:
        raise UsageError("the nest touches no array, so the cache model has nothing to size tiles for",
                         path=nest.path, line=nest.line, column=nest.col)
    steps = {lp.iterator: lp.step for lp in nest.perfect + nest.inner}
    rectangular = not any((lp.start.value.names() | lp.limit.value.names()) & set(its) for lp in nest.perfect)
    use = list(levels[:2]) if rectangular else list(levels[:1])
    if len(levels) > 1 and not rectangular:
        why.append("the bounds of the nest depend on its loops (not rectangular): one level of tiles, for "
                   f"{levels[0].name} (several levels are for rectangular bands)")
    if len(levels) > 2:
        why.append(f"{', '.join(lv.name for lv in levels[2:])} not used: at most two levels of tiles")
    counted = [g for g in streams if g not in reused]
    inner_lv = _Level(use[0], reused, steps, inside_n, counted)
    contig = _contiguous(found, band, use[0].line)
    cands = {x: [fixed[x]] if x in fixed else _candidates(trips[x], contig.get(x)) for x in band}
    for x, u in multiples.items():
        cap = min(trips[x], _MAX_SIZE) if trips[x] is not None else _MAX_SIZE
        cands[x] = sorted({c for c in cands[x] if c % u == 0} | {u * k for k in _STEPS if u * k <= cap} or {u})
    if multiples:
        why.append("multiples of the jam factors: " + ", ".join(f"{x} of {u}" for x, u in multiples.items()))
    for x, u in block.items():
        cands[x] = [u]
    if block:
        why.append(f"{use[0].name} tiles around the register block " + ", ".join(f"{x}={u}" for x, u in block.items())
                   + " (its data and the run of the other loops must fit)")
    if contig:
        why.append("contiguous dimension walked by " + ", ".join(f"{x} (multiples of {e} elements = one line)"
                                                                for x, e in contig.items() if x not in fixed))
    for x, v in fixed.items():
        why.append(f"{x}={v} as given")
    inner, notes = pick(inner_lv, cands, band)
    why += notes
    why.append(f"{use[0].name} tiles {_show(inner, band)}:")
    why += _describe(inner_lv, inner, band)
    chosen = [dict(inner)]
    if len(use) > 1:
        outer_lv = _Level(use[1], reused, steps, inside_n, counted)
        cands2 = {x: [inner[x]] if x in fixed else _candidates(trips[x], None, inner[x]) for x in band}
        outer, notes = pick(outer_lv, cands2, band)
        why += notes
        if outer != inner:
            kept = {x: inner[x] for x in band if inner[x] < outer[x] and block.get(x) != inner[x]}
            last = (band + inside)[-1]
            if last in kept and kept[last] < contig.get(last, 0):
                why.append(f"no {use[0].name} tiles of the innermost loop '{last}': {kept[last]} iterations are less "
                           f"than a line of what it walks ({contig[last]} elements), and the line would be split "
                           "between tiles")
                del kept[last]
            chosen = [outer, kept] if kept else [outer]
            why.append(f"{use[1].name} tiles {_show(outer, band)} (multiples of the {use[0].name} tiles; inner "
                       f"level: {_show(kept, band)}):")
            why += _describe(outer_lv, outer, band)
        else:
            why.append(f"{use[1].name}: no larger multiple of the {use[0].name} tiles fits or pays off; one level")
    why.append("sizes: " + " then ".join(_show(level, band) for level in chosen))
    return Choice(dict(inner), chosen, why)


# ---------------------------------------------------------------- a request with auto sizes

@dataclass(frozen=True)
class AutoSizing:
    """``--sizes auto`` / ``tile(i=auto, ...)``: what to size, with which geometry."""

    items: tuple[tuple[str | None, int | None], ...] = ()  # () the whole band; size None: chosen
    levels: tuple[Level, ...] = ()
    params: tuple[tuple[str, int], ...] = ()  # trip counts and row lengths
    named: str = "--sizes"  # how the request was written, for messages


def band_of(nest: Nest, analysis, items: tuple[tuple[str | None, int | None], ...]) -> tuple[str, ...]:
    """The loops to tile: the named or the first len(items) loops; for a bare ``auto`` the longest
    run of outermost loops that is fully permutable (all distances >= 0: tiling it is legal for
    every size, Wolfe's condition, from memory), at least the outermost loop."""
    its = nest.iterators
    where = dict(path=nest.path, line=nest.line, column=nest.col)
    if not items:
        for hi in range(len(its) - 1, 0, -1):
            if analysis.permutable(0, hi):
                return tuple(its[:hi + 1])
        return tuple(its[:1])
    named = [n for n, _ in items if n is not None]
    if named and len(named) != len(items):
        raise UsageError("--sizes mixes named (i=auto) and positional (auto) sizes; use one form", **where)
    if not named:
        if len(items) > len(its):
            raise UsageError(f"--sizes gives {len(items)} sizes but the perfectly nested part of the nest has only "
                             f"{len(its)} loop(s) ({', '.join(its)})", **where)
        return tuple(its[:len(items)])
    for n in named:
        if n not in its:
            raise UsageError(f"--sizes names loop '{n}', which is not one of the perfectly nested loops "
                             f"({', '.join(its)}) of the selected nest", **where)
    if len(set(named)) != len(named):
        raise UsageError("--sizes names a loop twice", **where)
    idx = sorted(its.index(n) for n in named)
    if idx != list(range(idx[0], idx[0] + len(idx))):
        raise UsageError("the loops in --sizes must be consecutive loops of the nest (a band)", **where)
    return tuple(its[k] for k in idx)


def resolve(nest: Nest, analysis, req, auto: AutoSizing, multiples: dict[str, int] | None = None,
            block: dict[str, int] | None = None):
    """The request with the chosen sizes (``req`` a ``TileRequest`` without sizes), the choice, and
    the words the guard comment adds to its ``made by:`` line."""
    from dataclasses import replace
    if req.sizes or req.levels:
        raise UsageError(f"{auto.named} auto chooses every level of tiles; give no other sizes with it",
                         path=nest.path, line=nest.line, column=nest.col)
    band = band_of(nest, analysis, auto.items)
    if auto.items and auto.items[0][0] is None:
        fixed = {band[k]: v for k, (_, v) in enumerate(auto.items) if v is not None}
    else:
        fixed = {n: v for n, v in auto.items if n is not None and v is not None}
    choice = choose(nest, analysis, band, list(auto.levels), dict(auto.params), fixed, multiples, block)
    if not auto.items:
        why = ("the longest run of outermost loops that is fully permutable" if len(band) > 1 else
               "the outermost loop alone: the loops inside it are not fully permutable with it")
        choice = replace(choice, explanation=[f"band ({', '.join(band)}): {why}"] + choice.explanation)
    levels = [tuple((x, lvl[x]) for x in band if x in lvl) for lvl in choice.levels]
    new = replace(req, sizes=levels[0], levels=tuple(levels[1:]))
    spec = " ".join("--sizes " + ",".join(f"{x}={v}" for x, v in lvl) for lvl in levels)
    words = f"sizes chosen by the cache model for {', '.join(lv.spec() for lv in auto.levels)}: {spec}"
    return new, choice, words
