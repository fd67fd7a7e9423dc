"""Tiling a band of loops: strip-mine each, then order tile and point loops.

Input: the nest model and a request; output: a ``TilePlan`` (the new loop
order as slots, and the schedule that deps.py proves and emit.py prints).
"""
from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, replace

from ..errors import Refusal, UsageError
from ..model import Affine, Nest, ScheduleDim


@dataclass(frozen=True)
class TileRequest:
    sizes: tuple[tuple[str | None, int], ...] = ()  # (iterator or None for positional, size)
    order: tuple[str, ...] | None = None
    remainder: str = "split"
    jam: tuple[tuple[str, int], ...] = ()  # unroll-and-jam of loops inside the tiles afterwards
    scalarize: bool = False
    # More levels of tiles inside the first (level 2, 3, ...), each given like ``sizes``.
    levels: tuple[tuple[tuple[str | None, int], ...], ...] = ()


@dataclass(frozen=True)
class Slot:
    kind: str  # "tile" (the loop over tiles), "point" (inside a tile) or "loop" (not tiled)
    iterator: str  # the original loop's iterator
    name: str  # the emitted iterator name
    size: int | None = None  # tile size in iterations (tiled loops; a point loop: its innermost level's)
    level: int = 1  # tile loops: 1 for the outermost tiles, 2 for the tiles inside those, ...
    # Tile loops of non-rectangular loops run over the loop's hull: the loop's values given the
    # iterators defined outside the tile loop lie in max(lowers) .. min(uppers), computed by the
    # analysis. The end the tiles start from (the low end going up) is one expression.
    hull: tuple[tuple[Affine, ...], tuple[Affine, ...]] | None = None
    defined: tuple[str, ...] = ()  # iterators with a value where this loop starts
    # Point and untouched loops moved across loops they are not rectangular with run
    # over max(lowers) .. min(uppers), computed by the analysis (else: their own bounds).
    scan: tuple[tuple[Affine, ...], tuple[Affine, ...]] | None = None


@dataclass(frozen=True)
class TilePlan:
    band: tuple[str, ...]
    sizes: tuple[int, ...]
    slots: tuple[Slot, ...]  # new order of the perfect loops, outermost first
    remainder: str
    schedule: tuple[ScheduleDim, ...]
    # Unroll-and-jam after tiling (register tiles): (iterator, factor) of loops inside the
    # tiles, outermost first; the copies go into the body of the innermost loop.
    jam: tuple[tuple[str, int], ...] = ()
    scalarize: bool = False
    levels: tuple[tuple[tuple[str, int], ...], ...] = ()  # levels 2, 3, ...: (iterator, size) in band order

    def size_of(self, iterator: str) -> int | None:
        """The size of the innermost tiles of ``iterator`` (what its point loop runs over)."""
        for level in reversed(self.levels):
            for it, s in level:
                if it == iterator:
                    return s
        for it, s in zip(self.band, self.sizes):
            if it == iterator:
                return s
        return None

    @property
    def depth(self) -> int:
        return 1 + len(self.levels)

    def describe(self) -> str:
        if not self.band:
            return "permuted loops to (" + ", ".join(s.name for s in self.slots) + ")"
        what = f"tiled ({', '.join(self.band)}) by ({', '.join(map(str, self.sizes))})"
        for level in self.levels:
            what += f", then ({', '.join(it for it, _ in level)}) by ({', '.join(str(sz) for _, sz in level)})"
        what = f"{what}, order {', '.join(s.name for s in self.slots)}, remainder {self.remainder}"
        if self.jam:
            what += (f"; then unrolled {', '.join(f'{it} by {u}' for it, u in self.jam)} and jammed the copies "
                     f"into the body of loop '{self.slots[-1].iterator}'")
            if self.scalarize:
                what += "; elements that loop keeps touching are held in locals"
        return what


def fresh_tile_name(iterator: str, taken: set[str], level: int = 1) -> str:
    """``ii`` for ``i`` unless that name is used anywhere in the file; then ``i_tile``, ``i_tile2``...
    Level 2: ``iii``, then ``i_tile_l2``, ``i_tile_l2_2``, ...; and so on."""
    if level == 1:
        cands = [iterator * 2, iterator + "_tile"] + [f"{iterator}_tile{k}" for k in range(2, 100)]
    else:
        cands = [iterator * (level + 1), f"{iterator}_tile_l{level}"] + \
            [f"{iterator}_tile_l{level}_{k}" for k in range(2, 100)]
    for cand in cands:
        if cand not in taken:
            return cand
    raise UsageError(f"cannot find a fresh name for the tile loop of '{iterator}'")


def _levels(nest: Nest, req: TileRequest, band: tuple[str, ...],
            sizes: tuple[int, ...]) -> tuple[tuple[tuple[str, int], ...], ...]:
    """The extra levels of ``req``: loops of the first level's band with sizes that divide
    the size of the level outside (so each tile lies inside the tile that contains it)."""
    out = []
    current = dict(zip(band, sizes))
    for k, spec in enumerate(req.levels, start=2):
        named = [n for n, _ in spec if n is not None]
        if named and len(named) != len(spec):
            raise UsageError("--sizes mixes named (i=32) and positional (32) sizes; use one form")
        if not named and len(spec) > len(band):
            raise UsageError(f"--sizes of level {k} gives {len(spec)} sizes for a band of {len(band)} loop(s)")
        given = dict(spec) if named else dict(zip(band, (sz for _, sz in spec)))
        extra = [it for it in given if it not in band]
        if extra:
            raise UsageError(f"--sizes of level {k} names loop '{extra[0]}', which the first --sizes does not tile")
        if named and len(set(named)) != len(named):
            raise UsageError("--sizes names a loop twice")
        lb = tuple(it for it in band if it in given)
        ls = tuple(given[it] for it in lb)
        for it, sz in zip(lb, ls):
            if sz < 1:
                raise UsageError(f"the tile size of '{it}' must be at least 1, not {sz}")
        for it, sz in zip(lb, ls):
            if current[it] % sz:
                raise UsageError(f"the level-{k} tile size {sz} of '{it}' does not divide its size {current[it]} at "
                                 "the level outside; choose sizes that nest (e.g. 256 then 32)")
            current[it] = sz
        out.append(tuple(zip(lb, ls)))
    return tuple(out)


def _band(nest: Nest, req: TileRequest) -> tuple[tuple[str, ...], tuple[int, ...]]:
    its = list(nest.iterators)
    if not req.sizes:
        return (), ()
    named = [n for n, _ in req.sizes if n is not None]
    if named and len(named) != len(req.sizes):
        raise UsageError("--sizes mixes named (i=32) and positional (32) sizes; use one form")
    if not named:
        if len(req.sizes) > len(its):
            raise UsageError(f"--sizes gives {len(req.sizes)} sizes but the perfectly nested part of the nest has "
                             f"only {len(its)} loop(s) ({', '.join(its)})", path=nest.path, line=nest.line,
                             column=nest.col)
        band = tuple(its[: len(req.sizes)])
    else:
        for n in named:
            if n not in its:
                extra = " (it is not perfectly nested: statements between loops)" if any(
                    lp.iterator == n for lp in nest.inner) else ""
                raise UsageError(f"--sizes names loop '{n}', which is not one of the perfectly nested loops "
                                 f"({', '.join(its)}) of the selected nest{extra}", path=nest.path,
                                 line=nest.line, column=nest.col)
        if len(set(named)) != len(named):
            raise UsageError("--sizes names a loop twice")
        idx = sorted(its.index(n) for n in named)
        if idx != list(range(idx[0], idx[0] + len(idx))):
            raise UsageError("the loops in --sizes must be consecutive loops of the nest (a band)",
                             path=nest.path, line=nest.line, column=nest.col)
        band = tuple(its[k] for k in idx)
    sizes = tuple(dict((n if n is not None else band[k], s) for k, (n, s) in enumerate(req.sizes))[b] for b in band)
    for b, s in zip(band, sizes):
        lp = nest.loop(b)
        top = 2 ** (lp.ctype.bits - (1 if lp.ctype.signed else 0)) - 1
        if s < 1:
            raise UsageError(f"the tile size of '{b}' must be at least 1, not {s}")
        if s * lp.step > top:
            raise UsageError(f"the tile size {s} of '{b}' does not fit its type {lp.ctype.spelling} "
                             f"(a tile spans {s * lp.step} values; the largest is {top})")
    return band, sizes


def _resolve(token: str, nest: Nest, tiled: dict[tuple[str, int], str]) -> tuple[str, str, int]:
    """An --order item to (kind, iterator, level): ``i`` point/loop, ``ii`` or ``i.1`` the
    level-1 tile loop of i, ``iii`` or ``i.2`` the level-2 one, ..."""
    its = nest.iterators
    band = {it for it, _ in tiled}
    head, dot, num = token.rpartition(".")
    if dot and head in its and num.isdigit():
        if (head, int(num)) not in tiled:
            raise UsageError(f"--order lists '{token}', but loop '{head}' has no tiles at level {num} "
                             "(see --sizes)")
        return "tile", head, int(num)
    if token in its:
        return ("point" if token in band else "loop"), token, 0
    for (it, level), name in tiled.items():
        if token in (it * (level + 1), name):
            if token in its or token in _source_loop_names(nest):
                raise UsageError(f"--order item '{token}' is ambiguous: the source has its own loop '{token}'; "
                                 f"write '{it}.{level}' for the level-{level} tile loop of '{it}'")
            return "tile", it, level
    raise UsageError(f"--order item '{token}' names no loop of the nest; use the iterators "
                     f"({', '.join(its)}) and, for tile loops, 'ii' or 'i.1' (level 2: 'iii' or 'i.2')")


def _source_loop_names(nest: Nest) -> set[str]:
    return {lp.iterator for lp in nest.perfect + nest.inner}


HullFn = Callable[[str, tuple[str, ...]], tuple[tuple[Affine, ...], tuple[Affine, ...]]]
ScanFn = Callable[[str, tuple[str, ...]], tuple[tuple[Affine, ...], tuple[Affine, ...]]]


def plan_tiling(nest: Nest, req: TileRequest, taken: set[str], hull: HullFn | None = None,
                scan: ScanFn | None = None) -> TilePlan:
    """The new loop order for ``req``; usage errors for impossible orders."""
    if not req.sizes and not req.order:
        raise UsageError("give --sizes (tiling) or --order (a permutation), or both")
    if req.remainder not in ("split", "clamp"):
        raise UsageError(f"--remainder must be split or clamp, not '{req.remainder}'")
    band, sizes = _band(nest, req)
    levels = _levels(nest, req, band, sizes) if req.levels else ()
    names = {it: fresh_tile_name(it, taken) for it in band}
    tiled = {(it, 1): names[it] for it in band}
    for k, level in enumerate(levels, start=2):
        for it, _ in level:
            tiled[(it, k)] = fresh_tile_name(it, taken | set(tiled.values()), k)
    size_at = {(it, 1): sz for it, sz in zip(band, sizes)}
    size_at.update({(it, k): sz for k, level in enumerate(levels, start=2) for it, sz in level})
    innermost = {it: max(k for (x, k) in tiled if x == it) for it in band}
    its = nest.iterators
    if req.order is None:
        first = its.index(band[0])
        last = first + len(band)
        order = [("loop", it, 0) for it in its[:first]] + [("tile", it, 1) for it in band]
        for k, level in enumerate(levels, start=2):
            order += [("tile", it, k) for it, _ in level]
        order += [("point", it, 0) for it in band] + [("loop", it, 0) for it in its[last:]]
    else:
        listed = [_resolve(t, nest, tiled) for t in req.order]
        if len(set(listed)) != len(listed):
            raise UsageError("--order lists a loop twice")
        need = {("tile", it, k) for it, k in tiled} | {("point", b, 0) for b in band}
        missing = need - set(listed)
        if missing:
            show = sorted(tiled[(i, k)] if kind == "tile" else i for kind, i, k in missing)
            raise UsageError(f"--order must list every tile and point loop of the band; missing: {', '.join(show)}")
        listed_its = {i for _, i, _ in listed}
        rest = [it for it in its if it not in listed_its]
        positions = [its.index(i) for _, i, _ in listed]
        lo = min(positions)
        order = [("loop", it, 0) for it in rest if its.index(it) < lo] + listed + \
                [("loop", it, 0) for it in rest if its.index(it) > lo]
    for k, (kind, it, level) in enumerate(order):
        if kind == "point" and ("tile", it, innermost[it]) not in order[:k]:
            raise UsageError(f"--order places the point loop '{it}' outside its own tile loop "
                             f"'{tiled[(it, innermost[it])]}'")
        if kind == "tile" and level > 1:
            outer = max(x for (y, x) in tiled if y == it and x < level)
            if ("tile", it, outer) not in order[:k]:
                raise UsageError(f"--order places the level-{level} tile loop '{tiled[(it, level)]}' outside the "
                                 f"level-{outer} tile loop '{tiled[(it, outer)]}'")
    slots = []
    defined: list[str] = []
    for kind, it, level in order:
        if kind == "tile":
            slot = Slot(kind, it, tiled[(it, level)], size_at[(it, level)], level=level, defined=tuple(defined))
        else:
            slot = Slot(kind, it, it, size_at.get((it, innermost.get(it, 1))), defined=tuple(defined))
        needs = _needs_projection(nest, it, defined)
        if needs and levels:
            lp = nest.loop(it)
            raise Refusal("tiling at several levels is supported for rectangular bands only (bounds that do not "
                          "depend on other loops of the nest)", path=nest.path, line=lp.line, column=lp.col)
        if kind == "tile" and needs:
            slot = _hull_slot(nest, slot, hull)
        if kind != "tile" and needs:
            slot = _scan_slot(nest, slot, scan)
        if kind != "tile":
            defined.append(it)
        slots.append(slot)
    slots = tuple(slots)
    schedule = tuple(_dim(nest, s) for s in slots)
    return TilePlan(band, sizes, slots, req.remainder, schedule, levels=levels)


def _refs(nest: Nest, it: str) -> set[str]:
    lp = nest.loop(it)
    return (lp.start.value.names() | lp.limit.value.names()) & set(nest.iterators)


def _needs_projection(nest: Nest, it: str, defined: list[str]) -> bool:
    """Its own bounds do not describe the loop here: they use iterators without a value yet,
    or a loop already placed outside it has bounds that use this loop's iterator."""
    return bool(_refs(nest, it) - set(defined)) or any(it in _refs(nest, d) for d in defined)


def _scan_slot(nest: Nest, slot: Slot, scan: ScanFn | None) -> Slot:
    lp = nest.loop(slot.iterator)
    where = dict(path=nest.path, line=lp.line, column=lp.col)
    if scan is None or lp.step != 1:
        raise Refusal(f"moving loop '{slot.iterator}' across the loops its bounds depend on needs step 1", **where)
    try:
        bounds = scan(slot.iterator, slot.defined)
    except ValueError as exc:
        raise Refusal(f"after the reordering, the bounds of loop '{slot.iterator}' are not a max/min of affine "
                      f"expressions ({exc})", **where) from None
    return replace(slot, scan=bounds)


def _hull_slot(nest: Nest, slot: Slot, hull: HullFn | None) -> Slot:
    lp = nest.loop(slot.iterator)
    where = dict(path=nest.path, line=lp.line, column=lp.col)
    if hull is None:
        raise Refusal(f"tiling loop '{slot.iterator}' needs bounds from the analysis", **where)
    if lp.step != 1:
        raise Refusal(f"loop '{slot.iterator}' has step {lp.step} and bounds that depend on another loop of the "
                      "band; tiling it is not supported", **where)
    try:
        lo_hi = hull(slot.iterator, slot.defined)
    except ValueError as exc:
        raise Refusal(f"the tile loop of '{slot.iterator}' needs bounds that are not affine (or a max/min of "
                      f"affine expressions at the far end) ({exc}); tile a rectangular band or choose another "
                      "order", **where) from None
    return replace(slot, hull=lo_hi)


def _dim(nest: Nest, slot: Slot) -> ScheduleDim:
    if slot.kind != "tile":
        return ScheduleDim(slot.iterator)
    lp = nest.loop(slot.iterator)
    origin = lp.start.value
    if slot.hull is not None:
        origin = slot.hull[0][0] if lp.direction > 0 else slot.hull[1][0]
    return ScheduleDim(slot.iterator, block=lp.step * (slot.size or 1), origin=origin)
