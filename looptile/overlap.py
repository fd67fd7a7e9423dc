"""``--check-overlap``: a run-time test that the arrays a nest reaches through pointers do not
overlap, so the rewrite (proven for distinct arrays) runs only when that holds.

For each array the nest touches, the elements lie in a box of indices (one affine lower and
upper bound per dimension, from isl). Its byte range is computed as an integer: the base
address converted to ``uintptr_t`` plus the box's corner offsets times the sizes of the
sub-objects (``sizeof A[0]``...). All of it is unsigned integer arithmetic, so no pointer is
formed outside an object, and it is exact modulo 2^N: the value is the real address of the
corner whenever the nest touches the array (C11 7.20.1.4: ``uintptr_t`` round-trips a pointer;
that its value is the linear address is common practice on the flat address spaces looptile
targets, said in the guard comment). Two ranges are disjoint when one ends before the other
begins; an empty box (an upper bound below its lower bound) overlaps nothing.
"""
from __future__ import annotations

import re
from dataclasses import dataclass

from . import ctest, deps
from .deps import NestAnalysis
from .errors import Refusal, UsageError
from .frontend import TranslationUnit
from .model import Affine, ArrayInfo, Nest


@dataclass(frozen=True)
class OverlapCheck:
    condition: str  # C text, true when no two checked arrays overlap
    pairs: tuple[tuple[str, str], ...]  # the pairs of C names it checks


def _u(a: Affine, spell: dict[str, str]) -> str:
    """``a`` computed in uintptr_t (exact modulo 2^N)."""
    parts = []
    for n, c in a.terms:
        v = spell[n]
        v = v if re.fullmatch(r"[A-Za-z_]\w*", v) else f"({v})"
        term = f"(uintptr_t){v}" if abs(c) == 1 else f"{abs(c)}u * (uintptr_t){v}"
        parts.append(("- " if c < 0 else "+ ") + term)
    if a.const:
        parts.append(("- " if a.const < 0 else "+ ") + f"{abs(a.const)}u")
    if not parts:
        return "0u"
    text = " ".join(parts)
    return text[2:] if text.startswith("+ ") else "0u " + text


def _name(info: ArrayInfo) -> str:
    return info.name if re.fullmatch(r"[A-Za-z_]\w*", info.name) else f"({info.name})"


def _strides(info: ArrayInfo) -> list[str]:
    """The byte size of one step in each model dimension of ``info``."""
    name = _name(info)
    declared = info.ndims - len(info.rows)
    out = [f"sizeof {name}" + "[0]" * (k + 1) for k in range(declared)]
    if info.rows:  # a flattened array: its last declared dimension splits into rows
        elem = out.pop()
        rows = [r if re.fullmatch(r"[A-Za-z_]\w*", r) else f"({r})" for r in info.rows]
        for k in range(len(rows) + 1):
            out.append(" * ".join([f"(uintptr_t){r}" for r in rows[k:]] + [elem]))
    return out


def _range(info: ArrayInfo, box: list[tuple[Affine, Affine]], spell: dict[str, str]) -> tuple[str, str]:
    base = f"(uintptr_t){_name(info)}"
    strides = _strides(info)
    def offset(values: list[Affine]) -> str:
        return "".join(f" + ({_u(v, spell)}) * {s}" for v, s in zip(values, strides) if v != Affine())
    return (base + offset([lo for lo, _ in box]),
            base + offset([hi for _, hi in box]) + f" + {strides[-1]}")


def overlap_check(tu: TranslationUnit, nest: Nest, analysis: NestAnalysis) -> OverlapCheck | None:
    """The test for the nest's arrays reached through pointers without ``restrict`` (None when
    no pair needs one); a refusal when a range cannot be bounded."""
    if "uintptr_t" not in tu.cache.get("types").typedefs:
        raise UsageError("--check-overlap compares addresses as uintptr_t, which this file does not declare; "
                         "include <stdint.h> in it", path=nest.path, line=nest.line)
    written = {a.array for st in nest.statements for a in st.accesses if a.write}
    arrays = [a for a in nest.arrays if not a.local and a.ndims > 0]
    pairs = []
    for k, x in enumerate(arrays):
        for y in arrays[k + 1:]:
            if not (x.pointer or y.pointer) or x.restrict or y.restrict:
                continue  # two distinct objects; or restrict, which already says they do not overlap
            if x.key in written or y.key in written:
                pairs.append((x, y))
    if not pairs:
        return None
    spell = {p.name: p.text for p in nest.params}
    params = {p.name: p for p in nest.params}
    ranges: dict[str, tuple[str, str, list[str]]] = {}
    for info in {a.key: a for pair in pairs for a in pair}.values():
        try:
            box = deps.touched_box(analysis, info.key)
        except deps.BoundsNotAffine as exc:
            raise Refusal(f"--check-overlap cannot bound the elements of '{info.name}' that the nest touches "
                          f"({exc}), so it cannot test them at run time", path=nest.path, line=nest.line,
                          column=nest.col) from None
        empty: list[str] = []
        for lo, hi in box:
            t = ctest.nonnegative(lo - hi - Affine(const=1), params)  # hi < lo: nothing touched
            if t is not None and t != "0" and t not in empty:
                empty.append(t)
        lo_text, hi_text = _range(info, box, spell)
        ranges[info.key] = (lo_text, hi_text, empty)
    parts = []
    for x, y in pairs:
        lx, hx, ex = ranges[x.key]
        ly, hy, ey = ranges[y.key]
        alts = list(dict.fromkeys(ex + ey)) + [f"{hx} <= {ly}", f"{hy} <= {lx}"]
        parts.append("(" + " || ".join(alts) + ")")
    return OverlapCheck(" && ".join(parts), tuple((x.name, y.name) for x, y in pairs))
