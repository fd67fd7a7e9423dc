"""The cache model of ``looptile simulate``: results, and a pure-Python twin of the C model.

The fast model is the C header ``templates/cachesim.h`` (``header_path()``), included by the
instrumented program that ``simulate`` generates; it prints one JSON line that
``SimResult.from_json`` reads. ``simulate_python`` runs exactly the same policy in Python, for
tiny cases and as a second implementation in the tests.

Policy (an ideal set-associative LRU hierarchy; the header comment says the same):

- Levels L1..Ln are checked in turn; each is LRU within a set; the set of a line is
  ``(address // line) % sets``. ``ways`` 0, or equal to the number of lines, is fully associative.
- A hit stops the lookup (the line becomes the most recently used of its set). A miss allocates
  the line in that level (write-allocate: write misses too), evicting the set's least recently
  used line when the set is full, and goes on to the next level as a read of that line; a miss
  in the last level reads one last-level line from memory.
- A write marks the line dirty in L1 only.
- An evicted dirty line is written back: its level counts one write-back, and the line goes to
  the next level before the miss that evicted it goes on. A write-back is not a demand access
  (it is in no ``accesses``/``hits``/``misses``). If the next level holds the line, it becomes
  dirty and most recently used there; if not, the write-back passes on, not allocated, to the
  level after (out of the last level: memory write traffic of the written line's size). So a
  write-back never evicts a line. Clean evictions are silent.
- Levels are not inclusive: a line evicted from L2 stays in L1.
- At the end every level is flushed, L1 first: each dirty line is written back as above and
  counted in its level's ``writebacks``.
- Per-array counts are demand accesses of that array at each level (a lower level's access
  belongs to the array whose miss caused it).
- Memory traffic: read = last-level misses x last-level line; write = bytes of the write-backs
  that left the last level (dirty lines flushed at the end included).
- Line sizes must not decrease towards memory; an element access never straddles a line.

``miss_ratio`` is ``misses / accesses``, and ``None`` (JSON ``null``) for a level or array with
no accesses.
"""
from __future__ import annotations

import json
from collections import OrderedDict
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from .cachegeom import Level
from .errors import UsageError

HEADER = "cachesim.h"


def header_path() -> Path:
    """The C model, ``cachesim.h`` in looptile's templates directory."""
    from .emit import _template_dir
    return _template_dir() / HEADER


def check_levels(levels: Sequence[Level]) -> None:
    """The geometries the model accepts (the C header checks the same and exits 2)."""
    if not 1 <= len(levels) <= 8:
        raise UsageError(f"the cache model takes 1 to 8 levels, not {len(levels)}")
    for prev, lv in zip(levels, levels[1:]):
        if lv.line < prev.line:
            raise UsageError(f"cache level {lv.name} has {lv.line}-byte lines, smaller than {prev.name}'s "
                             f"{prev.line}: line sizes must not decrease towards memory")


def c_init_call(levels: Sequence[Level], narrays: int) -> str:
    """C statements (for a function body) that initialise the model with ``levels``."""
    check_levels(levels)
    sizes = ", ".join(f"{lv.size}ULL" for lv in levels)
    ways = ", ".join(f"{lv.ways}u" for lv in levels)
    lines = ", ".join(f"{lv.line}u" for lv in levels)
    return ("{\n"
            f"    static const unsigned long long lt_size[] = {{{sizes}}};\n"
            f"    static const unsigned lt_ways[] = {{{ways}}};\n"
            f"    static const unsigned lt_line[] = {{{lines}}};\n"
            f"    lt_sim_init({len(levels)}, lt_size, lt_ways, lt_line, {max(1, narrays)});\n"
            "}\n")


def _ratio(misses: int, accesses: int) -> float | None:
    return misses / accesses if accesses else None


@dataclass
class ArrayCounts:
    name: str
    accesses: int = 0
    hits: int = 0
    misses: int = 0

    @property
    def miss_ratio(self) -> float | None:
        return _ratio(self.misses, self.accesses)

    def to_dict(self) -> dict:
        return {"accesses": self.accesses, "hits": self.hits, "misses": self.misses,
                "miss_ratio": self.miss_ratio}


@dataclass
class SimLevel:
    name: str
    accesses: int
    hits: int
    misses: int
    writebacks: int
    arrays: list[ArrayCounts] = field(default_factory=list)

    @property
    def miss_ratio(self) -> float | None:
        return _ratio(self.misses, self.accesses)


@dataclass
class SimResult:
    levels: list[SimLevel]
    read_bytes: int
    write_bytes: int

    @classmethod
    def from_json(cls, text: str, levels: Sequence[Level], array_names: Sequence[str]) -> SimResult:
        """The line ``lt_sim_report`` printed, named after ``levels`` and ``array_names``."""
        doc = json.loads(text)
        if len(doc["levels"]) != len(levels):
            raise ValueError(f"the report has {len(doc['levels'])} levels, expected {len(levels)}")
        out = []
        for lv, d in zip(levels, doc["levels"]):
            if len(d["arrays"]) != len(array_names):
                raise ValueError(f"the report has {len(d['arrays'])} arrays, expected {len(array_names)}")
            arrays = [ArrayCounts(n, a["accesses"], a["hits"], a["misses"]) for n, a in zip(array_names, d["arrays"])]
            out.append(SimLevel(lv.name, d["accesses"], d["hits"], d["misses"], d["writebacks"], arrays))
        return cls(out, doc["memory"]["read_bytes"], doc["memory"]["write_bytes"])

    def to_json(self) -> dict:
        """The JSON document of ``simulate`` (a dict; ``json.dumps`` it)."""
        return {
            "levels": [{"name": lv.name, "accesses": lv.accesses, "hits": lv.hits, "misses": lv.misses,
                        "miss_ratio": lv.miss_ratio, "writebacks": lv.writebacks,
                        "arrays": {a.name: a.to_dict() for a in lv.arrays}} for lv in self.levels],
            "memory_bytes": {"read": self.read_bytes, "write": self.write_bytes,
                             "total": self.read_bytes + self.write_bytes},
        }


class _PyLevel:
    """One level: per set an OrderedDict line -> dirty, least recently used first."""

    def __init__(self, lv: Level):
        self.level = lv
        self.sets = [OrderedDict() for _ in range(lv.sets)]
        self.writebacks = 0
        self.accesses: list[int] = []
        self.misses: list[int] = []

    def touch(self, ln: int, dirty: bool) -> tuple[bool, int | None]:
        """(hit, the dirty line evicted or None); a miss allocates ln."""
        s = self.sets[ln % len(self.sets)]
        if ln in s:
            s.move_to_end(ln)
            if dirty:
                s[ln] = True
            return True, None
        victim = None
        if len(s) == self.level.assoc:
            old, was_dirty = s.popitem(last=False)
            victim = old if was_dirty else None
        s[ln] = dirty
        return False, victim

    def mark(self, ln: int) -> bool:
        s = self.sets[ln % len(self.sets)]
        if ln not in s:
            return False
        s.move_to_end(ln)
        s[ln] = True
        return True


class _PyModel:
    def __init__(self, levels: Sequence[Level]):
        check_levels(levels)
        self.lv = [_PyLevel(lv) for lv in levels]
        self.read_bytes = 0
        self.write_bytes = 0

    def writeback(self, k: int, addr: int, nbytes: int) -> None:
        for L in self.lv[k:]:
            if L.mark(addr // L.level.line):
                return
        self.write_bytes += nbytes

    def access(self, addr: int, array: int, is_write: bool) -> None:
        for k, L in enumerate(self.lv):
            while len(L.accesses) <= array:
                L.accesses.append(0)
                L.misses.append(0)
            L.accesses[array] += 1
            hit, victim = L.touch(addr // L.level.line, bool(is_write) and k == 0)
            if victim is not None:
                L.writebacks += 1
                self.writeback(k + 1, victim * L.level.line, L.level.line)
            if hit:
                return
            L.misses[array] += 1
        self.read_bytes += self.lv[-1].level.line

    def finish(self) -> None:
        for k, L in enumerate(self.lv):
            for s in L.sets:
                for ln, dirty in list(s.items()):
                    if dirty:
                        s[ln] = False
                        L.writebacks += 1
                        self.writeback(k + 1, ln * L.level.line, L.level.line)


def simulate_python(levels: Sequence[Level], trace: Iterable[tuple[int, int, bool]],
                    array_names: Sequence[str] | None = None) -> SimResult:
    """Run ``(addr, array, is_write)`` accesses through the model (streamed) and flush it.

    ``array_names`` names the arrays 0..n-1 (all of them appear in the result); without it the
    arrays are named by their index, up to the largest index seen.
    """
    model = _PyModel(levels)
    for addr, array, is_write in trace:
        model.access(addr, array, is_write)
    model.finish()
    seen = max((len(L.accesses) for L in model.lv), default=0)
    n = len(array_names) if array_names is not None else seen
    if seen > n:
        raise ValueError(f"the trace has array {seen - 1}, but only {n} arrays are named")
    names = list(array_names) if array_names is not None else [str(i) for i in range(n)]
    out = []
    for L in model.lv:
        acc = L.accesses + [0] * (n - len(L.accesses))
        mis = L.misses + [0] * (n - len(L.misses))
        arrays = [ArrayCounts(names[i], acc[i], acc[i] - mis[i], mis[i]) for i in range(n)]
        out.append(SimLevel(L.level.name, sum(acc), sum(acc) - sum(mis), sum(mis), L.writebacks, arrays))
    return SimResult(out, model.read_bytes, model.write_bytes)
