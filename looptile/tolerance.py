"""verify with --reassociate: comparing reassociated floating-point values within a bound.

A sum of n terms computed in any order in floating point (unit roundoff u) is within
gamma_{n-1} * sum |x_k| of the exact sum, gamma_k = k*u / (1 - k*u) (the error bound of recursive
summation; Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed., section 4.2 --
from memory). Two orders of the same terms are then within 2 * gamma_{n-1} * sum |x_k| of each
other. The bound is relative to the sum of the absolute values of the terms, not to the result:
with mixed signs the result can be tiny (or zero) while the rounding errors are not, so ULPs of
the result do not work.

The harness computes ``sum |x_k|`` for each element with a third build of the original
(reduction.bound_source), on the same inputs. The default tolerance covers the worst case of
the bound for sums of up to DEFAULT_TERMS terms per element (in practice rounding errors grow
like sqrt(n) * u, so much longer sums pass too); ``--tolerance`` sets another relative bound.
"""
from __future__ import annotations

import math
import struct
from fractions import Fraction

DEFAULT_TERMS = 4096
# unit roundoff of IEEE binary32 and binary64 (round to nearest): 2^-24, 2^-53 (IEEE 754-2008, 3.6)
_UNIT_ROUNDOFF = {4: 2.0 ** -24, 8: 2.0 ** -53}


def default_tolerance(size: int) -> float:
    """2 * gamma_{DEFAULT_TERMS} for an element of ``size`` bytes (float or double)."""
    nu = DEFAULT_TERMS * _UNIT_ROUNDOFF[size]
    return 2 * nu / (1 - nu)


def tolerant_objects(spec, names: tuple[str, ...]) -> set[str]:
    """The dumped objects compared within the tolerance. The reassociated objects themselves
    when the harness sees them all (array parameters, file-scope variables); when one is local
    to the kernel its values reach the outputs through code looptile does not follow, so every
    floating-point object the harness dumps (and a floating-point return value)."""
    if not names:
        return set()
    floats = {p.name for p in spec.params if p.kind == "array" and p.ctype.kind == "float"}
    floats |= {g.name for g in spec.globals if g.elem.kind == "float"}
    if set(names) <= floats:
        return set(names)
    floats = {n for n in floats if not any(p.name == n and p.ctype.const for p in spec.params)}  # inputs stay exact
    if spec.return_type is not None and spec.return_type.kind == "float":
        floats.add("return")
    return floats


def _unpack(raw: bytes) -> float:
    return struct.unpack("<f" if len(raw) == 4 else "<d", raw)[0]


def compare_within(a, b, bound, kinds: dict[str, str], tolerant: set[str], tolerance: float | None) -> str | None:
    """Like verify.compare, but the elements of the objects in ``tolerant`` (float or double)
    may differ by ``tolerance`` times their value in ``bound`` (the sum of the absolute values
    of the terms). Everything else is compared bit for bit."""
    from .verify import _indices, _value, compare
    if len(a) != len(b) or len(a) != len(bound):
        return "the versions dumped different objects"
    for x, y, s in zip(a, b, bound):
        if x.name not in tolerant or kinds.get(x.name) != "float" or x.size not in _UNIT_ROUNDOFF \
                or len(x.data) != len(y.data) or len(s.data) != len(x.data) or s.name != x.name:
            diff = compare([x], [y], kinds)
            if diff:
                return diff
            continue
        if x.data == y.data:
            continue
        tol = Fraction(tolerance if tolerance is not None else default_tolerance(x.size))
        for k in range(0, len(x.data), x.size):
            rx, ry = x.data[k:k + x.size], y.data[k:k + x.size]
            if rx == ry:
                continue
            vx, vy, vs = _unpack(rx), _unpack(ry), _unpack(s.data[k:k + x.size])
            where = x.name if x.name == "return" else x.name + _indices(k // x.size, x.dims or (1,))
            finite = all(math.isfinite(v) for v in (vx, vy, vs))
            if not finite or abs(Fraction(vx) - Fraction(vy)) > tol * abs(Fraction(vs)):
                return (f"{where} differs by more than the tolerance: original {_value(rx, 'float')}, rewritten "
                        f"{_value(ry, 'float')}; allowed {float(tol):.3g} x {abs(vs)!r} (the sum of the absolute "
                        "values of its terms)")
    return None
