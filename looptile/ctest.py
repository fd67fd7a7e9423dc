"""Exact C tests of affine conditions on parameters, for run-time versioning.

``if (m <= ld) { rewrite } else { original }`` is only correct if the C expression is true
exactly when (or at least only when) the mathematical condition holds. C compares after the
usual arithmetic conversions and can overflow or wrap while adding, so a condition is printed
with every operand converted to a 64-bit type of its own signedness (value-preserving for every
integer type of LP64) and with the sums arranged so that nothing leaves the type's range:
for 32-bit operands the sum is taken in ``long long``; for 64-bit operands the condition must
compare two parameters with a constant offset, and each combination of signedness has its own
overflow-free form (derived here; checked against Python's integers by compiling them in
tests/test_flatten.py).
"""
from __future__ import annotations

import re

from .model import Affine, Param

MAX_S, MIN_S, MAX_U = 2**63 - 1, -(2**63), 2**64 - 1


def _lit(v: int, unsigned: bool) -> str:
    if unsigned:
        assert 0 <= v <= MAX_U
        return f"{v}ULL"
    if v == MIN_S:
        return "(-9223372036854775807LL - 1)"
    return f"{v}LL" if v >= 0 else f"-{-v}LL"


def _wide(p: Param) -> str:
    text = p.text if re.fullmatch(r"[A-Za-z_]\w*", p.text) else f"({p.text})"
    return f"(unsigned long long){text}" if p.ctype.is_unsigned else f"(long long){text}"


def _plain(p: Param) -> str:
    return p.text if re.fullmatch(r"[A-Za-z_]\w*", p.text) else f"({p.text})"


def at_most(x: Param, y: Param, c: int) -> str:
    """C text true exactly when x <= y + c (mathematically)."""
    ux, uy = x.ctype.is_unsigned, y.ctype.is_unsigned
    if x.ctype.bits <= 32 and y.ctype.bits <= 32:
        if c == 0 and ux == uy:
            return f"{_plain(x)} <= {_plain(y)}"
        tail = "" if c == 0 else (f" + {c}" if c > 0 else f" - {-c}")
        return f"(long long){_plain(x)} <= (long long){_plain(y)}{tail}"
    X, Y = _wide(x), _wide(y)
    if ux == uy and c == 0:
        return f"{X} <= {Y}"
    if not ux and not uy:
        if c > 0:  # y + c above the maximum: true
            return f"({Y} > {_lit(MAX_S - c, False)} || {X} <= {Y} + {c})"
        return f"({Y} >= {_lit(MIN_S - c, False)} && {X} <= {Y} - {-c})"
    if ux and uy:
        if c > 0:
            return f"({Y} > {_lit(MAX_U - c, True)} || {X} <= {Y} + {c}ULL)"
        return f"({Y} >= {-c}ULL && {X} <= {Y} - {-c}ULL)"
    if not ux and uy:  # a negative x is below every y + c >= c when c >= 0
        if c >= 0:
            plus = f" + {c}ULL" if c else ""
            top = f"{Y} > {_lit(MAX_U - c, True)} || " if c else ""
            return f"({X} < 0 || {top}(unsigned long long){_plain(x)} <= {Y}{plus})"
        return (f"({Y} >= {-c}ULL ? ({X} < 0 || (unsigned long long){_plain(x)} <= {Y} - {-c}ULL) : "
                f"{X} <= (long long){_plain(y)} - {-c})")
    # x unsigned, y signed: y + c must be >= 0; then it is exact in unsigned long long
    tail = "" if c == 0 else (f" + {c}ULL" if c > 0 else f" - {-c}ULL")
    return f"({Y} >= {_lit(-c, False)} && {X} <= (unsigned long long){_plain(y)}{tail})"


def _bound(p: Param, k: int, upper: bool) -> str:
    """p <= k (upper) or p >= k, exactly."""
    lo, hi = ((0, 2**p.ctype.bits - 1) if p.ctype.is_unsigned else
              (-(2 ** (p.ctype.bits - 1)), 2 ** (p.ctype.bits - 1) - 1))
    if (upper and k >= hi) or (not upper and k <= lo):
        return "1"
    if (upper and k < lo) or (not upper and k > hi):
        return "0"
    value = str(k) if -(2**31) < k < 2**31 else _lit(k, p.ctype.is_unsigned)  # converted exactly to p's type
    return f"{_plain(p)} {'<=' if upper else '>='} {value}"


def nonnegative(a: Affine, params: dict[str, Param]) -> str | None:
    """C text true exactly when ``a >= 0``, or None when looptile cannot print it exactly."""
    ps = [(params[n], c) for n, c in a.terms]
    if not ps:
        return "1" if a.const >= 0 else "0"
    if any(not p.ctype.is_int for p, _ in ps):
        return None
    if len(ps) == 1 and abs(ps[0][1]) == 1:
        p, c = ps[0]
        return _bound(p, -a.const, False) if c > 0 else _bound(p, a.const, True)
    if len(ps) == 2 and sorted(c for _, c in ps) == [-1, 1]:
        (y, _), (x, _) = sorted(ps, key=lambda pc: -pc[1])  # y - x + k >= 0: x <= y + k
        return at_most(x, y, a.const)
    if all(p.ctype.bits <= 32 for p, _ in ps) and sum(abs(c) for _, c in ps) < 2**29 and abs(a.const) < 2**60:
        pos = [f"{c} * (long long){_plain(p)}" if c != 1 else f"(long long){_plain(p)}" for p, c in ps if c > 0]
        neg = [f"{-c} * (long long){_plain(p)}" if c != -1 else f"(long long){_plain(p)}" for p, c in ps if c < 0]
        if a.const > 0:
            pos.append(str(a.const))
        elif a.const < 0:
            neg.append(str(-a.const))
        return f"{' + '.join(neg) or '0'} <= {' + '.join(pos) or '0'}"
    return None


def condition(disjuncts: list[list[tuple[Affine, bool]]], params: dict[str, Param]) -> str | None:
    """A disjunction of conjunctions of ``a >= 0`` / ``a == 0`` as one C expression."""
    ors = []
    for conj in disjuncts:
        ands = []
        for a, eq in conj:
            for part in ((a, a.scale(-1)) if eq else (a,)):
                t = nonnegative(part, params)
                if t is None:
                    return None
                if t != "1":
                    ands.append(t)
        if "0" in ands:
            continue
        if not ands:
            return "1"
        ors.append(" && ".join(ands))
    if not ors:
        return "0"
    if len(ors) == 1:
        return ors[0]
    return "(" + " || ".join(f"({o})" if "&&" in o else o for o in ors) + ")"
