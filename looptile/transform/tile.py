"""Tiling a band of loops: strip-mine each, then order tile and point loops.

Input: the nest model and a request; output: a ``TilePlan`` (the new loop
order as slots, and the schedule that deps.py proves and emit.py prints).
"""
from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

from ..errors import Refusal, UsageError
from ..model import Affine, Nest, ScheduleDim


@dataclass(frozen=True)
class TileRequest:
    sizes: tuple[tuple[str | None, int], ...] = ()  # (iterator or None for positional, size)
    order: tuple[str, ...] | None = None
    remainder: str = "split"
    jam: tuple[tuple[str, int], ...] = ()  # unroll-and-jam of loops inside the tiles afterwards
    scalarize: bool = False


@dataclass(frozen=True)
class Slot:
    kind: str  # "tile" (the loop over tiles), "point" (inside a tile) or "loop" (not tiled)
    iterator: str  # the original loop's iterator
    name: str  # the emitted iterator name
    size: int | None = None  # tile size in iterations (tiled loops only)
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

    def size_of(self, iterator: str) -> int | None:
        for it, s in zip(self.band, self.sizes):
            if it == iterator:
                return s
        return None

    def describe(self) -> str:
        if not self.band:
            return "permuted loops to (" + ", ".join(s.name for s in self.slots) + ")"
        what = f"tiled ({', '.join(self.band)}) by ({', '.join(map(str, self.sizes))})"
        what = f"{what}, order {', '.join(s.name for s in self.slots)}, remainder {self.remainder}"
        if self.jam:
            what += (f"; then unrolled {', '.join(f'{it} by {u}' for it, u in self.jam)} and jammed the copies "
                     f"into the body of loop '{self.slots[-1].iterator}'")
            if self.scalarize:
                what += "; elements that loop keeps touching are held in locals"
        return what


def fresh_tile_name(iterator: str, taken: set[str]) -> str:
    """``ii`` for ``i`` unless that name is used anywhere in the file; then ``i_tile``, ``i_tile2``..."""
    for cand in [iterator * 2, iterator + "_tile"] + [f"{iterator}_tile{k}" for k in range(2, 100)]:
        if cand not in taken:
            return cand
    raise UsageError(f"cannot find a fresh name for the tile loop of '{iterator}'")


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


def _resolve(token: str, nest: Nest, band: tuple[str, ...], names: dict[str, str]) -> tuple[str, str]:
    """An --order item to (kind, iterator): ``i`` point/loop, ``ii`` or ``i.1`` tile of i."""
    its = nest.iterators
    if token.endswith(".1") and token[:-2] in its:
        it = token[:-2]
        if it not in band:
            raise UsageError(f"--order lists '{token}', but loop '{it}' is not tiled (not in --sizes)")
        return "tile", it
    if token in its:
        return ("point" if token in band else "loop"), token
    for it in band:
        if token in (it * 2, names[it]):
            if token in its or token in _source_loop_names(nest):
                raise UsageError(f"--order item '{token}' is ambiguous: the source has its own loop '{token}'; "
                                 f"write '{it}.1' for the tile loop of '{it}'")
            return "tile", it
    raise UsageError(f"--order item '{token}' names no loop of the nest; use the iterators "
                     f"({', '.join(its)}) and, for tile loops, 'ii' or 'i.1'")


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
    names = {it: fresh_tile_name(it, taken) for it in band}
    its = nest.iterators
    if req.order is None:
        first = its.index(band[0])
        last = first + len(band)
        order = [("loop", it) for it in its[:first]] + [("tile", it) for it in band] + \
                [("point", it) for it in band] + [("loop", it) for it in its[last:]]
    else:
        listed = [_resolve(t, nest, band, names) for t in req.order]
        if len(set(listed)) != len(listed):
            raise UsageError("--order lists a loop twice")
        need = {("tile", b) for b in band} | {("point", b) for b in band}
        missing = need - set(listed)
        if missing:
            show = sorted(names[i] if k == "tile" else i for k, i in missing)
            raise UsageError(f"--order must list every tile and point loop of the band; missing: {', '.join(show)}")
        listed_its = {i for _, i in listed}
        rest = [it for it in its if it not in listed_its]
        positions = [its.index(i) for _, i in listed]
        lo = min(positions)
        order = [("loop", it) for it in rest if its.index(it) < lo] + listed + \
                [("loop", it) for it in rest if its.index(it) > lo]
    for k, (kind, it) in enumerate(order):
        if kind == "point" and ("tile", it) not in order[:k]:
            raise UsageError(f"--order places the point loop '{it}' outside its own tile loop '{names[it]}'")
    slots = []
    defined: list[str] = []
    for kind, it in order:
        slot = Slot(kind, it, names[it] if kind == "tile" else it, dict(zip(band, sizes)).get(it),
                    defined=tuple(defined))
        if kind == "tile" and _needs_projection(nest, it, defined):
            slot = _hull_slot(nest, slot, hull)
        if kind != "tile" and _needs_projection(nest, it, defined):
            slot = _scan_slot(nest, slot, scan)
        if kind != "tile":
            defined.append(it)
        slots.append(slot)
    slots = tuple(slots)
    schedule = tuple(_dim(nest, s) for s in slots)
    return TilePlan(band, sizes, slots, req.remainder, schedule)


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
    return Slot(slot.kind, slot.iterator, slot.name, slot.size, slot.hull, slot.defined, bounds)


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
    return Slot(slot.kind, slot.iterator, slot.name, slot.size, lo_hi, slot.defined)


def _dim(nest: Nest, slot: Slot) -> ScheduleDim:
    if slot.kind != "tile":
        return ScheduleDim(slot.iterator)
    lp = nest.loop(slot.iterator)
    origin = lp.start.value
    if slot.hull is not None:
        origin = slot.hull[0][0] if lp.direction > 0 else slot.hull[1][0]
    return ScheduleDim(slot.iterator, block=lp.step * (slot.size or 1), origin=origin)
