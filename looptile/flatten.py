"""Flattened subscripts: ``A[i*ld + j]`` read as the two-dimensional access ``A[i][j]``.

A subscript that is a polynomial in the iterators and parameters, whose products all carry
one parameter ``ld`` (the row length), is divided by it: ``P*ld + Q`` with ``P`` and ``Q``
affine. When ``0 <= Q < ld`` holds wherever the access runs, the pair ``(P, Q)`` is the
element's quotient and remainder by ``ld``, so two accesses touch the same element exactly
when their pairs are equal: the two-dimensional model is exact. That in-row condition is an
obligation the dependence analysis proves, turns into a run-time test, or takes from the
user (``--assume-in-row``). Three dimensions (``(i*n + j)*m + k``) divide twice.

This is the textbook idea of delinearisation (recovering the multi-dimensional form of a
linearised access from its polynomial subscript; from memory, as described in the compiler
literature on dependence analysis of linearised arrays); the division and the obligations are
our own.
"""
from __future__ import annotations

from dataclasses import dataclass

from pycparser import c_ast

from .affine import Ctx, NotAffine, int_affine
from .ctype import CType, common_int_type
from .model import Affine

Monomial = tuple[str, ...]  # sorted symbols, repeated for powers; () is the constant
Poly = dict[Monomial, int]


@dataclass(frozen=True)
class Flat:
    """A flattened subscript read as ``len(rows) + 1`` subscripts; ``rows[k]`` is the model
    symbol of the length of dimension ``k + 1``."""

    subscripts: tuple[Affine, ...]
    rows: tuple[str, ...]


def _add(a: Poly, b: Poly, k: int = 1) -> Poly:
    out = dict(a)
    for m, c in b.items():
        out[m] = out.get(m, 0) + k * c
    return {m: c for m, c in out.items() if c}


def _mul(a: Poly, b: Poly) -> Poly:
    out: Poly = {}
    for ma, ca in a.items():
        for mb, cb in b.items():
            m = tuple(sorted(ma + mb))
            out[m] = out.get(m, 0) + ca * cb
    return {m: c for m, c in out.items() if c}


def _of_affine(a: Affine) -> Poly:
    p: Poly = {(n,): c for n, c in a.terms}
    if a.const:
        p[()] = a.const
    return p


@dataclass
class Polynomial:
    terms: Poly
    ctype: CType
    # The narrowest unsigned type any sum, difference or product is computed in (None: none).
    narrow: CType | None = None
    # ``a >= 0`` side conditions of the affine leaves (a signed value converted to unsigned).
    obligations: tuple[Affine, ...] = ()


def polynomial(ctx: Ctx, node: c_ast.Node) -> Polynomial:
    """The subscript as a polynomial over iterators and parameters, with its C type.

    Sums, differences and products are expanded; every leaf is an affine value
    (``int_affine``). C computes the value modulo the type's range when it is unsigned, which
    equals the polynomial whenever the result is a valid index: with 64-bit arithmetic a value
    outside 0..2^63 is outside every object, undefined behaviour the original already has. The
    caller refuses narrower unsigned arithmetic (``narrow``), where a product that wraps around
    can be a valid index again."""
    if isinstance(node, c_ast.BinaryOp) and node.op in ("+", "-", "*"):
        a, b = polynomial(ctx, node.left), polynomial(ctx, node.right)
        t = common_int_type(a.ctype, b.ctype)
        narrow = min((x for x in (a.narrow, b.narrow, t if t.is_unsigned else None) if x is not None),
                     key=lambda x: x.bits, default=None)
        terms = _mul(a.terms, b.terms) if node.op == "*" else _add(a.terms, b.terms, 1 if node.op == "+" else -1)
        return Polynomial(terms, t, narrow, a.obligations + b.obligations)
    if isinstance(node, c_ast.UnaryOp) and node.op in ("-", "+"):
        a = polynomial(ctx, node.expr)
        return Polynomial(_add({}, a.terms, -1) if node.op == "-" else a.terms, a.ctype, a.narrow, a.obligations)
    value, t, obl = int_affine(ctx, node)
    narrow = t if t.is_unsigned and obl else None  # unsigned arithmetic inside the leaf
    return Polynomial(_of_affine(value), t, narrow, tuple(o for o in obl if type(o) is Affine))


def _affine(p: Poly) -> Affine:
    terms = {m[0]: c for m, c in p.items() if len(m) == 1}
    return Affine.of(p.get((), 0), **terms) if not any(len(m) > 1 for m in p) else Affine()


def delinearise(p: Poly, iterators: set[str], spell, indices: set[str] = frozenset()) -> Flat:
    """Divide ``p`` by its row lengths, innermost first; NotAffine with the reason when the
    products do not have that shape. ``spell`` gives a symbol's C spelling for messages;
    ``indices`` are parameters that are row indices rather than lengths (the iterators of the
    loops around a nest selected inside them)."""
    subs: list[Affine] = []
    rows: list[str] = []
    while any(len(m) > 1 for m in p):
        products = [m for m in p if len(m) > 1]
        common = set(products[0])
        for m in products[1:]:
            common &= set(m)
        common -= iterators
        if len(common) > 1 and common - indices:
            common -= indices
        if not common:
            raise NotAffine("its products do not share one parameter, so it is not a row-major flattened access "
                            "(write it as A[i*ld + j] with the row length ld in every product)")
        if len(common) > 1:
            names = " * ".join(spell(s) for s in sorted(common))
            raise NotAffine(f"every product carries {names}, so the row length is itself a product; looptile "
                            "reads a flattened subscript whose row lengths are single parameters")
        size = common.pop()
        quotient: Poly = {}
        rest: Poly = {}
        for m, c in p.items():
            if size in m:
                k = m.index(size)
                quotient[m[:k] + m[k + 1:]] = quotient.get(m[:k] + m[k + 1:], 0) + c
            else:
                rest[m] = c
        if any(len(m) > 1 for m in rest):
            raise NotAffine(f"it has a product without the row length {spell(size)}, so it is not a row-major "
                            "flattened access")
        remainder = _affine(rest)
        # A row walked backwards (A[i*ld + ld - 1 - j]): the remainder is ld - 1 - j, not -1 - j.
        if quotient.get((), 0) > 0 and remainder.terms and all(c < 0 for n, c in remainder.terms if n in iterators) \
                and any(n in iterators for n in remainder.names()):
            quotient[()] -= 1
            remainder = remainder + Affine.symbol(size)
        subs.insert(0, remainder)
        rows.insert(0, size)
        p = {m: c for m, c in quotient.items() if c}
    if any(len(m) > 1 for m in p):  # pragma: no cover - the loop above divides every product away
        raise NotAffine("the product of two variables is not affine")
    subs.insert(0, _affine(p))
    return Flat(tuple(subs), tuple(rows))
