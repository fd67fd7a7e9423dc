"""Cache geometry: the levels a model simulates or sizes tiles for.

A level is ``size/ways/line`` (``L1=48KiB/12/64``); ``ways`` 0, or equal to the number of
lines, is fully associative. The machine's data and unified caches are read from Linux sysfs
(``/sys/devices/system/cpu/cpu0/cache/index*/{level,type,size,ways_of_associativity,
coherency_line_size}``); when that cannot be read, a documented fallback is used and said.
"""
from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

from .errors import UsageError

SYSFS = Path("/sys/devices/system/cpu/cpu0/cache")

# When sysfs cannot be read: a common desktop/server geometry of recent x86-64 cores
# (from memory; an assumption, said in the output): 32 KiB 8-way L1d, 1 MiB 16-way L2.
FALLBACK = ("L1=32KiB/8/64", "L2=1MiB/16/64")

_UNITS = {"": 1, "b": 1, "k": 1024, "kb": 1024, "kib": 1024, "m": 1024 ** 2, "mb": 1024 ** 2, "mib": 1024 ** 2,
          "g": 1024 ** 3, "gb": 1024 ** 3, "gib": 1024 ** 3}


@dataclass(frozen=True)
class Level:
    name: str
    size: int  # bytes
    ways: int  # 0: fully associative
    line: int  # bytes

    @property
    def lines(self) -> int:
        return self.size // self.line

    @property
    def assoc(self) -> int:
        """Ways per set (the number of lines when fully associative)."""
        return self.lines if self.ways in (0, self.lines) else self.ways

    @property
    def sets(self) -> int:
        return self.lines // self.assoc

    def spec(self) -> str:
        return f"{self.name}={_bytes(self.size)}/{self.ways}/{self.line}"


def _bytes(n: int) -> str:
    for unit, k in (("GiB", 1024 ** 3), ("MiB", 1024 ** 2), ("KiB", 1024)):
        if n % k == 0:
            return f"{n // k}{unit}"
    return str(n)


def parse_size(text: str) -> int:
    m = re.fullmatch(r"\s*(\d+)\s*([A-Za-z]*)\s*", text)
    if not m or m.group(2).lower() not in _UNITS:
        raise UsageError(f"'{text}' is not a size (write e.g. 48KiB, 2MiB or 32768)")
    return int(m.group(1)) * _UNITS[m.group(2).lower()]


def parse_level(spec: str, default_name: str = "L1") -> Level:
    """``L1=48KiB/12/64`` (or ``48KiB/12/64``) to a Level; a usage error says what is wrong."""
    name, eq, rest = spec.partition("=")
    if not eq:
        name, rest = default_name, spec
    parts = rest.split("/")
    if len(parts) != 3 or not name.strip():
        raise UsageError(f"--cache '{spec}' is not NAME=SIZE/WAYS/LINE (e.g. L1=48KiB/12/64; WAYS 0 is fully "
                         "associative)")
    size, line = parse_size(parts[0]), parse_size(parts[2])
    try:
        ways = int(parts[1])
    except ValueError:
        raise UsageError(f"--cache '{spec}': WAYS must be a number (0 for fully associative)") from None
    if line <= 0 or line & (line - 1):
        raise UsageError(f"--cache '{spec}': the line size must be a power of two")
    if size <= 0 or size % line:
        raise UsageError(f"--cache '{spec}': the size must be a positive multiple of the line size")
    lines = size // line
    if ways < 0 or (ways and lines % ways):
        raise UsageError(f"--cache '{spec}': {lines} lines cannot be split into sets of {ways} ways")
    return Level(name.strip(), size, ways, line)


def machine_levels(root: Path = SYSFS) -> tuple[list[Level], str | None]:
    """The data and unified caches of cpu0, innermost first, and None; or the fallback and a
    sentence saying why it is used."""
    found: dict[int, Level] = {}
    try:
        for d in sorted(root.glob("index*")):
            kind = (d / "type").read_text().strip()
            if kind not in ("Data", "Unified"):
                continue
            level = int((d / "level").read_text())
            size = parse_size((d / "size").read_text().strip())
            ways = int((d / "ways_of_associativity").read_text())
            line = int((d / "coherency_line_size").read_text())
            found[level] = Level(f"L{level}", size, ways, line)
    except (OSError, ValueError, UsageError):
        found = {}
    if not found:
        return [parse_level(s) for s in FALLBACK], (
            f"the cache geometry could not be read from {root}; using {', '.join(FALLBACK)} (a common "
            "geometry; give --cache for this machine's)")
    return [found[k] for k in sorted(found)], None
