"""Register tiles from the register file (``tile --jam auto``): which loops inside the tiles to
unroll and jam, and by how much, from a documented model.

Two kinds of nest get a register tile; every other nest gets none, and the explanation says why.

1. Accumulators (a matrix multiply, a convolution). Every element the body writes stays the same
   during the innermost loop ``L`` (``C[i][j] += A[i][k] * B[k][j]`` with ``k`` innermost), so
   with ``--scalarize`` the copies of the body keep them in locals: an ``mr x nr`` block of
   accumulators over two loops inside the tiles, the *row loop* and the *vector loop*. The vector
   loop walks the last (contiguous) subscript of every accumulator with coefficient +-1, and every
   element read that moves with ``L`` either does not use it or walks its last subscript with it,
   so that the compiler can turn a row of ``nr`` copies into ``nr / N`` vector operations (``N``
   elements per vector register). The sizes follow the analytical model for the register block
   of a matrix-multiply micro-kernel (Low, Igual, Smith and Quintana-Orti, "Analytical modeling
   is enough for high-performance BLIS", ACM TOMS 2016, from memory): enough independent vector
   accumulators to cover the latency of the fused multiply-add units,
   ``mr * nr / N >= N_fma * L_fma``, with ``nr`` the smallest multiple of ``N`` at least
   ``sqrt(N * N_fma * L_fma)`` and ``mr = ceil(N * N_fma * L_fma / nr)``; then the block must fit
   the register file with the row of the reused operand and one register to spare,
   ``mr * nr / N + nr / N + 1 <= R - 1``. ``N_fma * L_fma`` is 2 units x 4 cycles (``FMA_UNITS``,
   ``FMA_LATENCY``: current x86-64 cores, from memory).
2. Row runs (a transpose). No element written stays during ``L``, but one written array's last
   subscript moves with another loop ``x`` inside the tiles, so the innermost loop writes one
   element per row: jamming ``x`` by ``RUN_BYTES / element size`` makes each iteration of ``L``
   write a run of 32 bytes of one row instead (looptile's rule; the factor was measured against 2
   and 8 on this project's transpose benchmark, bench/RESULTS.md).

Limits, each said in the explanation: bands whose bounds depend on each other (unroll-and-jam
after tiling is for rectangular bands), bodies with loops of their own, iterators narrower than
int. Factors never exceed a known trip count and divide given tile sizes (with ``--sizes auto`` the
sizes are chosen around them instead: ``autosize.choose(block=...)``). The factors only choose
among rewrites: the legality test runs on them as on any others, and a block that would break a
dependence falls back to the vector loop's factor alone, then to no register tile
(``pipeline._chosen_plan``).

The register file is read from the machine (``/proc/cpuinfo`` flags on x86-64: AVX-512 32
registers of 64 bytes, AVX 16 of 32, else 16 of 16; AArch64 32 of 16) or given as
``--registers COUNTxBYTES``; the fallback, when nothing can be read, is 16 registers of 16 bytes
(the x86-64 baseline, SSE2) and is said.
"""
from __future__ import annotations

import math
import platform
import re
from dataclasses import dataclass
from pathlib import Path

from .errors import UsageError
from .model import Access, Affine, Nest

FMA_LATENCY = 4  # cycles (from memory: Skylake and Zen 2 to Zen 4 cores)
FMA_UNITS = 2  # fused multiply-add pipes per core (from memory, the same cores)
SLIDING_BYTES = 32  # widest vector for reads that slide along the innermost loop (split loads)
RUN_BYTES = 32  # bytes of one row written per innermost iteration in a row-runs register tile
MAX_AUTO_COPIES = 128  # body copies at most (code size)
CPUINFO = Path("/proc/cpuinfo")
FALLBACK = (16, 16)  # SSE2, the x86-64 baseline
# gcc's loop vectoriser vectorises the reduction loop of an accumulator tile (with in-order sums
# and gathers) instead of the copies, which undoes the tile: measured 3.5x slower on the
# multiply (bench/RESULTS.md, "register tiles").
ADVICE = "with gcc, build with -fno-tree-loop-vectorize so that the copies are vectorised (not loop '{L}')"


@dataclass(frozen=True)
class Registers:
    count: int  # vector registers
    vector_bytes: int  # bytes per register
    source: str = ""  # where the figures come from

    def spec(self) -> str:
        return f"{self.count}x{self.vector_bytes}"


def parse_registers(text: str) -> Registers:
    """``COUNTxBYTES``: 32x64 is 32 vector registers of 64 bytes."""
    m = re.fullmatch(r"\s*(\d+)\s*[xX]\s*(\d+)\s*", text)
    if not m:
        raise UsageError(f"--registers '{text}' is not COUNTxBYTES (e.g. 16x32: 16 vector registers of 32 bytes)")
    count, size = int(m.group(1)), int(m.group(2))
    if not 4 <= count <= 256:
        raise UsageError(f"--registers: {count} registers is outside 4..256")
    if size < 4 or size & (size - 1):
        raise UsageError(f"--registers: a register of {size} bytes is not a power of two of at least 4")
    return Registers(count, size, "given with --registers")


def machine_registers(cpuinfo: Path = CPUINFO, machine: str | None = None) -> Registers:
    """The vector registers of this machine, from /proc/cpuinfo's flags (x86-64) or the
    architecture (AArch64: 32 NEON registers of 16 bytes); the stated fallback otherwise."""
    machine = (machine or platform.machine()).lower()
    if machine in ("aarch64", "arm64"):
        return Registers(32, 16, f"{machine}: 32 NEON registers of 16 bytes")
    try:
        text = cpuinfo.read_text(errors="replace")
    except OSError:
        text = ""
    m = re.search(r"^flags\s*:(.*)$", text, re.M)
    if machine in ("x86_64", "amd64") and m:
        flags = set(m.group(1).split())
        if "avx512f" in flags:
            return Registers(32, 64, f"{cpuinfo} flags: avx512f (32 registers of 64 bytes)")
        if "avx" in flags:
            return Registers(16, 32, f"{cpuinfo} flags: avx (16 registers of 32 bytes)")
        return Registers(16, 16, f"{cpuinfo} flags: no avx (16 registers of 16 bytes)")
    return Registers(*FALLBACK, f"could not read the vector registers of this machine ({machine}); assumed "
                                f"{FALLBACK[0]} of {FALLBACK[1]} bytes (the x86-64 baseline); give --registers")


@dataclass(frozen=True)
class RegisterTiling:
    """``--jam auto``: the register file to size for, and the parameter values that bound trip counts."""

    registers: Registers
    params: tuple[tuple[str, int], ...] = ()


@dataclass(frozen=True)
class RegChoice:
    factors: tuple[tuple[str, int], ...]  # () : no register tile
    kind: str  # "accumulators", "row runs" or "none"
    scalarize: bool  # the tile needs the accumulators kept in locals
    explanation: tuple[str, ...]
    advice: str = ""  # how to build the result so that the tile is kept ("" if nothing)

    def spec(self) -> str:
        return ",".join(f"{x}={u}" for x, u in self.factors)


def _uses(a: Affine, x: str) -> int:
    return dict(a.terms).get(x, 0)


def _limit(u: int, x: str, trips: dict[str, int | None], sizes: dict[str, int], multiple: int = 1) -> int:
    """The largest factor <= u (a multiple of ``multiple`` when possible) within the trip count of
    loop x and dividing its given tile size."""
    cap = u
    if trips.get(x) is not None:
        cap = min(cap, trips[x])  # type: ignore[type-var]
    size = sizes.get(x)
    for v in range(cap, 0, -1):
        if size is not None and size % v:
            continue
        if multiple > 1 and v % multiple and v > multiple:
            continue
        return v
    return 1


def choose(nest: Nest, inside: tuple[str, ...], tiling: RegisterTiling, sizes: dict[str, int] | None = None,
           scalarize: bool = False) -> RegChoice:
    """The register tile for the loops ``inside`` the tiles (outermost first, the innermost loop
    last); ``sizes`` are given tile sizes the factors must divide (None: sizes are chosen later,
    as multiples of the factors)."""
    regs = tiling.registers
    params = dict(tiling.params)
    sizes = dict(sizes or {})
    why = [f"vector registers: {regs.count} of {regs.vector_bytes} bytes ({regs.source})"]

    def none(reason: str) -> RegChoice:
        return RegChoice((), "none", False, tuple(why + [f"no register tile: {reason}"]))

    if len(inside) < 2:
        return none("fewer than two loops run inside the tiles")
    its = set(nest.iterators)
    if any((lp.start.value.names() | lp.limit.value.names()) & its for lp in nest.perfect):
        return none("the bounds of the nest depend on its loops (unroll-and-jam after tiling is for rectangular "
                    "bands)")
    if nest.inner:
        return none("the body has loops of its own (the model sizes straight-line bodies)")
    innermost = inside[-1]
    cands = [x for x in inside[:-1] if nest.loop(x).ctype.bits >= 32]
    accesses = [a for st in nest.statements for a in st.accesses
                if nest.array(a.array).ndims > 0 and not nest.array(a.array).local]
    writes = [a for a in accesses if a.write]
    if not writes:
        return none("the body writes no array element")
    from .autosize import trip_counts
    counted = trip_counts(nest, params)
    trips = {x: counted.get(x) for x in inside}
    invariant = [a for a in writes if not any(_uses(s, innermost) for s in a.subscripts)]
    if len(invariant) == len(writes):
        return _accumulators(nest, inside, cands, accesses, writes, trips, sizes, regs, why, scalarize, none)
    if invariant:
        return none(f"some elements written stay during loop '{innermost}' and others do not")
    return _row_runs(nest, innermost, cands, writes, trips, sizes, why, none)


def _name(nest: Nest, a: Access) -> str:
    return nest.array(a.array).name + "".join(f"[{s.render()}]" for s in a.subscripts)


def _accumulators(nest, inside, cands, accesses, writes, trips, sizes, regs: Registers, why, scalarize, none):
    innermost = inside[-1]
    moving = [a for a in accesses if not a.write and any(_uses(s, innermost) for s in a.subscripts)]

    def vector_loop_ok(x: str) -> bool:
        for a in writes:  # the last subscript walks x by one, no other subscript uses it
            if abs(_uses(a.subscripts[-1], x)) != 1 or any(_uses(s, x) for s in a.subscripts[:-1]):
                return False
        for a in moving:  # a read that moves with the innermost loop is contiguous along x, or does not use x
            if any(_uses(s, x) for s in a.subscripts[:-1]):
                return False
            if _uses(a.subscripts[-1], x) not in (0, 1, -1):
                return False
        return True

    vec = [x for x in reversed(cands) if vector_loop_ok(x)]
    shown = ", ".join(dict.fromkeys(_name(nest, a) for a in writes))
    why.append(f"accumulators: {shown} stay during the innermost loop '{innermost}' (kept in locals)")
    if not vec:
        return none(f"no loop inside the tiles walks the last subscript of {shown} with every element read "
                    "contiguous along it (the copies could not become vector operations)")
    xv = vec[0]
    rows = [x for x in reversed(cands) if x != xv and any(_uses(s, x) for a in writes for s in a.subscripts)]
    esize = max(1, (nest.array(writes[0].array).elem.bits or 8) // 8)
    row = rows[0] if rows else None
    vector_reads = [a for a in moving if _uses(a.subscripts[-1], xv)]
    sliding = [a for a in vector_reads if _uses(a.subscripts[-1], innermost)]
    vbytes = min(regs.vector_bytes, SLIDING_BYTES) if sliding else regs.vector_bytes
    n = max(1, vbytes // esize)
    why.append(f"vector loop '{xv}' ({n} elements per register"
               + (f"; at most {SLIDING_BYTES} bytes: {_name(nest, sliding[0])} slides along '{innermost}', and "
                  "wider unaligned loads split cache lines" if sliding and vbytes < regs.vector_bytes else "")
               + "); " + (f"row loop '{row}'" if row else "no row loop (no other loop inside the tiles moves the "
                                                          "accumulators)"))
    own = [a for a in vector_reads if row and any(_uses(s, row) for s in a.subscripts)]
    units = 1 if own else FMA_UNITS
    need = n * units * FMA_LATENCY
    nr = n * math.ceil(math.sqrt(need) / n)
    mr = math.ceil(need / nr) if rows else 1
    if own:
        why.append(f"load-bound: every row of copies loads its own {_name(nest, own[0])}, one vector load per "
                   "multiply-add, so the loads set the rate and the accumulators cover the latency of one unit")
    why.append(f"latency cover: {units} FMA unit(s) x {FMA_LATENCY} cycles x {n} elements = {need} accumulator "
               f"elements in flight; nr = {nr} (a multiple of {n}, at least sqrt({need})), mr = {mr}")
    held = len({a.array for a in vector_reads if a not in own})
    distinct = len({(a.array, a.subscripts) for a in writes})

    def registers(m: int, r: int) -> int:
        return m * math.ceil(r / n) * distinct + held * math.ceil(r / n) + 1

    while registers(mr, nr) > regs.count - 1 and mr > 1:
        mr -= 1
    while registers(mr, nr) > regs.count - 1 and nr > n:
        nr -= n
    nr = _limit(nr, xv, trips, sizes, n)
    if rows:
        mr = _limit(mr, rows[0], trips, sizes)
    while mr * nr > MAX_AUTO_COPIES and mr > 1:
        mr -= 1
    factors = tuple((x, u) for x, u in ((x, mr if rows and x == rows[0] else nr if x == xv else 1) for x in inside)
                    if u > 1)
    if not factors:
        return none("the trip counts or the given tile sizes leave factors of 1")
    why.append(f"register block {mr} x {nr}: {registers(mr, nr)} of {regs.count} registers "
               f"({mr * math.ceil(nr / n) * distinct} accumulators, {held * math.ceil(nr / n)} for the reused row, "
               "1 to load into; one kept spare)")
    why.append("jam " + ", ".join(f"{x}={u}" for x, u in factors) + " with --scalarize"
               + ("" if scalarize else " (implied)"))
    advice = ADVICE.format(L=innermost)
    why.append(advice)
    return RegChoice(factors, "accumulators", True, tuple(why), advice)


def _row_runs(nest, innermost, cands, writes, trips, sizes, why, none):
    for a in writes:
        if any(_uses(s, innermost) for s in a.subscripts[-1:]):
            continue  # the innermost loop walks its rows: the compiler's vectoriser has that one
        for x in reversed(cands):
            if abs(_uses(a.subscripts[-1], x)) == 1 and any(_uses(s, innermost) for s in a.subscripts[:-1]):
                esize = max(1, (nest.array(a.array).elem.bits or 8) // 8)
                u = _limit(max(2, RUN_BYTES // esize), x, trips, sizes)
                if u < 2:
                    return none(f"the trip count or tile size of '{x}' leaves a factor of 1")
                why.append(f"row runs: the innermost loop '{innermost}' writes {_name(nest, a)} one row apart each "
                           f"iteration; jamming '{x}' by {u} writes {u * esize} consecutive bytes of a row instead")
                return RegChoice(((x, u),), "row runs", False, tuple(why + [f"jam {x}={u}"]))
    return none(f"the innermost loop '{innermost}' already walks the rows of what it writes (the compiler's "
                "vectoriser handles that loop)")
