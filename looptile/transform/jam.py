"""Unroll-and-jam and plain unrolling: strip-mine loops by small factors and run the copies of
the innermost body one after another.

Input: the nest model and a request; output: a ``JamPlan`` with the loops it covers (from the
nest's outermost loop down to the loop whose body is copied), the factors, and the schedule of
the emitted code that deps.py proves.

For a loop ``i`` unrolled by ``u`` (strips of ``u * step`` from its start) over the loops inside
it, the emitted code runs a whole strip as ``[strip(i), ..., inner loops, i, body]`` -- the
copies of ``i`` innermost -- and the last, partial strip (the remainder loop, which runs the
copies one at a time) as ``[strip(i), i, ..., inner loops, body]``. Each unrolled loop adds one
pair of schedule dimensions whose values depend on whether its strip is whole.
"""
from __future__ import annotations

from dataclasses import dataclass, replace

from ..errors import Refusal, UsageError
from ..model import Nest, ScheduleDim
from .tile import TilePlan

MAX_COPIES = 256  # more body copies than this is almost certainly a typo in the factors


@dataclass(frozen=True)
class JamRequest:
    factors: tuple[tuple[str, int], ...]  # (iterator, factor) as given


@dataclass(frozen=True)
class JamPlan:
    loops: tuple[str, ...]  # the perfect loops the rewrite covers, outermost first
    factors: tuple[tuple[str, int], ...]  # (iterator, factor >= 2), outermost first
    kind: str  # "jam" (copies jammed into the innermost loop's body) or "unroll" (one loop)
    schedule: tuple[ScheduleDim, ...]
    scalarize: bool = False  # elements invariant in the innermost loop kept in locals where proven safe

    def factor(self, iterator: str) -> int:
        return dict(self.factors).get(iterator, 1)

    @property
    def copies(self) -> int:
        n = 1
        for _, u in self.factors:
            n *= u
        return n

    def describe(self) -> str:
        spec = ", ".join(f"{it} by {u}" for it, u in self.factors)
        if self.kind == "unroll-full":
            return f"unrolled loop '{self.loops[0]}' fully: one copy of its body per iteration, no loop"
        if self.kind == "unroll":
            return f"unrolled {spec}, with a remainder loop"
        kept = "; elements that loop keeps touching are held in locals" if self.scalarize else ""
        return f"unrolled {spec} and jammed the copies into the body of loop '{self.loops[-1]}', " \
               f"with remainder loops{kept}"


def plan_jam(nest: Nest, req: JamRequest) -> JamPlan:
    """Unroll each named loop of the perfectly nested part by its factor and jam the copies
    into the body of the innermost perfect loop."""
    its = list(nest.iterators)
    if not req.factors:
        raise UsageError("--factors needs at least one LOOP=FACTOR, e.g. i=4")
    seen: dict[str, int] = {}
    for name, u in req.factors:
        if name not in its:
            raise UsageError(f"--factors names loop '{name}', which is not one of the perfectly nested loops "
                             f"({', '.join(its)})", path=nest.path, line=nest.line, column=nest.col)
        if name in seen:
            raise UsageError(f"--factors names loop '{name}' twice")
        if u < 2:
            raise UsageError(f"the factor of '{name}' must be at least 2, not {u}")
        seen[name] = u
    return _plan(nest, tuple(its), tuple((it, seen[it]) for it in its if it in seen), "jam")


def plan_unroll(nest: Nest, factor: int) -> JamPlan:
    """Plain unrolling of the nest's outermost loop: its whole body, inner loops included,
    copied ``factor`` times, with a remainder loop. It never changes the order of anything."""
    if factor < 2:
        raise UsageError(f"the unroll factor must be at least 2, not {factor}")
    first = nest.perfect[0].iterator
    return _plan(nest, (first,), ((first, factor),), "unroll")


def _plan(nest: Nest, loops: tuple[str, ...], factors: tuple[tuple[str, int], ...], kind: str) -> JamPlan:
    copies = 1
    for _, u in factors:
        copies *= u
    if copies > MAX_COPIES:
        raise UsageError(f"the factors make {copies} copies of the body; at most {MAX_COPIES} are allowed")
    unrolled = dict(factors)
    for k, it in enumerate(loops):
        lp = nest.loop(it)
        if lp.ctype.bits < 32:
            raise Refusal(f"loop '{it}' has an iterator of type {lp.ctype.spelling}; in the copies, '{it} + 1' "
                          "would have another type (int), so unrolling it is not supported",
                          path=nest.path, line=lp.line, column=lp.col)
        uses = (lp.start.value.names() | lp.limit.value.names()) & set(unrolled)
        outer_unrolled = [u for u in uses if u in loops[:k]]
        if outer_unrolled:
            raise Refusal(f"the bounds of loop '{it}' depend on '{outer_unrolled[0]}', which is unrolled: its "
                          f"copies would need different ranges of '{it}'; unroll only loops that the inner "
                          "loops' bounds do not use", path=nest.path, line=lp.line, column=lp.col)
    # Schedule: for each loop in order, its strip and its position in a partial strip; then,
    # after the covered loops, the copies (the positions in whole strips), outermost first.
    dims: list[ScheduleDim] = []
    tail: list[ScheduleDim] = []
    for it in loops:
        lp = nest.loop(it)
        u = unrolled.get(it)
        if u is None:
            dims.append(ScheduleDim(it))
            continue
        block = lp.step * u
        dims.append(ScheduleDim(it, block=block, origin=lp.start.value))
        dims.append(ScheduleDim(it, when=(it, block, False)))
        tail.append(ScheduleDim(it, when=(it, block, True)))
    rest = [ScheduleDim(lp.iterator) for lp in nest.perfect[len(loops):]]
    return JamPlan(loops, factors, kind, tuple(dims + tail + rest))


def plan_tile_jam(nest: Nest, plan: TilePlan, factors: tuple[tuple[str, int], ...]) -> TilePlan:
    """Unroll-and-jam of loops inside the tiles (after the last tile loop): the point loops
    and untouched loops there. Each jammed point loop's tile size must be a multiple of its
    factor, so that strips never cross a tile boundary and line up with strips counted from
    the loop's start; the band must be rectangular."""
    slots = list(plan.slots)
    last_tile = max(k for k, s in enumerate(slots) if s.kind == "tile")
    inside = [s.iterator for s in slots[last_tile + 1:]]
    where = dict(path=nest.path, line=nest.line, column=nest.col)
    seen: dict[str, int] = {}
    for name, u in factors:
        if name not in inside:
            raise UsageError(f"--jam names loop '{name}', which does not run inside the tiles (the loops there: "
                             f"{', '.join(inside)})", **where)
        if name in seen:
            raise UsageError(f"--jam names loop '{name}' twice")
        if u < 2:
            raise UsageError(f"the factor of '{name}' must be at least 2, not {u}")
        size = plan.size_of(name)
        if size is not None and size % u:
            raise UsageError(f"the tile size {size} of '{name}' is not a multiple of its jam factor {u}; choose "
                             "sizes that are", **where)
        seen[name] = u
    if any(s.hull is not None or s.scan is not None for s in slots):
        raise Refusal("unroll-and-jam after tiling is supported for rectangular bands only (the loop bounds do not "
                      "depend on each other)", **where)
    copies = 1
    for u in seen.values():
        copies *= u
    if copies > MAX_COPIES:
        raise UsageError(f"the factors make {copies} copies of the body; at most {MAX_COPIES} are allowed")
    jammed = tuple((it, seen[it]) for it in inside if it in seen)
    for k, it in enumerate(inside):
        lp = nest.loop(it)
        if lp.ctype.bits < 32 and it in seen:
            raise Refusal(f"loop '{it}' has an iterator of type {lp.ctype.spelling}; unrolling it is not supported",
                          path=nest.path, line=lp.line, column=lp.col)
        uses = (lp.start.value.names() | lp.limit.value.names()) & set(seen) & set(inside[:k])
        if uses:
            raise Refusal(f"the bounds of loop '{it}' depend on '{sorted(uses)[0]}', which is unrolled: its copies "
                          f"would need different ranges of '{it}'", path=nest.path, line=lp.line, column=lp.col)
    dims: list[ScheduleDim] = []
    tail: list[ScheduleDim] = []
    for d in plan.schedule:
        u = seen.get(d.iterator) if d.block is None else None
        if u is None:
            dims.append(d)
            continue
        lp = nest.loop(d.iterator)
        block = lp.step * u
        dims.append(ScheduleDim(d.iterator, block=block, origin=lp.start.value))
        dims.append(ScheduleDim(d.iterator, when=(d.iterator, block, False)))
        tail.append(ScheduleDim(d.iterator, when=(d.iterator, block, True)))
    return replace(plan, jam=jammed, schedule=tuple(dims + tail))
