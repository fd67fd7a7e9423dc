"""How much work one call of a nest does, for rates in tune's table.

From the model and the parameter values: the number of times each statement runs (its
loops' trip counts, counted exactly for affine bounds, triangular ones included) times
the floating-point operations in it (``+ - * /`` and the compound assignments, outside
subscripts, counted on the syntax tree) gives floating-point operations per call. When
that cannot be told (an ``if`` around a statement, a call, integer arithmetic, a bound
without a value), the bytes of the arrays' footprint (the box of elements each array
touches, from the analysis) give a data rate instead; else only seconds are reported.
"""
from __future__ import annotations

from dataclasses import dataclass

from pycparser import c_ast

from . import deps
from .deps import NestAnalysis
from .frontend import TranslationUnit
from .model import Affine, Loop, Nest, Statement
from .reduction import _body, _node_at  # the statement's tree node from its position (Statement.tail)


@dataclass(frozen=True)
class Workload:
    flops: int | None  # floating-point operations per call, when known
    bytes: int | None  # bytes of the arrays' footprint, when known
    how: str  # one sentence: what the rate in the table is computed from

    @property
    def unit(self) -> str:
        return "GFLOP/s" if self.flops else ("GB/s" if self.bytes else "")

    def rate(self, seconds: float) -> float | None:
        """GFLOP/s or GB/s for one call of ``seconds``; None when only seconds are known."""
        if seconds <= 0:
            return None
        amount = self.flops or self.bytes
        return amount / seconds * 1e-9 if amount else None


class _Unknown(Exception):
    pass


def param_values(tu: TranslationUnit, nest: Nest, given: dict[str, int]) -> dict[str, int]:
    """Values of the nest's parameters (model names): from ``given`` (C names), integer macros
    from the file's macro table."""
    out = {}
    for p in nest.params:
        if p.text in given:
            out[p.name] = given[p.text]
        elif p.name in given:
            out[p.name] = given[p.name]
        elif p.kind == "macro":
            try:
                out[p.name] = int(tu.macros.get(p.text, "").strip("()uUlL "), 0)
            except ValueError:
                continue
    return out


def _eval(a: Affine, env: dict[str, int]) -> int:
    try:
        return a.const + sum(c * env[n] for n, c in a.terms)
    except KeyError as exc:
        raise _Unknown(f"no value for {exc.args[0]}") from None


def _values(lp: Loop, env: dict[str, int]) -> range:
    start, limit = _eval(lp.start.value, env), _eval(lp.limit.value, env)
    if lp.direction > 0:
        return range(start, limit + (1 if lp.inclusive else 0), lp.step)
    return range(start, limit - (1 if lp.inclusive else 0), -lp.step)


def iterations(loops: list[Loop], env: dict[str, int]) -> int:
    """How many times the innermost of ``loops`` (outermost first) runs its body. A loop whose
    iterator no inner bound uses contributes its trip count as a factor (no enumeration), so
    rectangular nests cost one evaluation per loop and triangular ones one per outer value."""
    if not loops:
        return 1
    lp, rest = loops[0], loops[1:]
    used = set().union(*(q.start.value.names() | q.limit.value.names() for q in rest)) if rest else set()
    vals = _values(lp, env)
    if lp.iterator not in used:
        return len(vals) * iterations(rest, env) if vals else 0
    return sum(iterations(rest, dict(env, **{lp.iterator: x})) for x in vals)


class _Flops(c_ast.NodeVisitor):
    ARITH = {"+", "-", "*", "/"}

    def __init__(self) -> None:
        self.count = 0

    def visit_ArrayRef(self, node: c_ast.ArrayRef) -> None:
        self.visit(node.name)  # a subscript's arithmetic is addressing, not work

    def visit_BinaryOp(self, node: c_ast.BinaryOp) -> None:
        if node.op in self.ARITH:
            self.count += 1
        elif node.op not in ("<", "<=", ">", ">=", "==", "!="):
            raise _Unknown(f"the operator {node.op}")
        self.generic_visit(node)

    def visit_Assignment(self, node: c_ast.Assignment) -> None:
        if node.op != "=":
            if node.op[:-1] not in self.ARITH:
                raise _Unknown(f"the operator {node.op}")
            self.count += 1
        self.generic_visit(node)

    def visit_FuncCall(self, node: c_ast.FuncCall) -> None:
        raise _Unknown("a call")

    def visit_TernaryOp(self, node: c_ast.TernaryOp) -> None:
        raise _Unknown("a conditional expression")


def _statement_flops(tu: TranslationUnit, nest: Nest, st: Statement) -> int:
    if st.guards:
        raise _Unknown("an if around a statement")
    if any(a.write and nest.array(a.array).elem.kind != "float" for a in st.accesses):
        raise _Unknown("integer arithmetic")
    root = _body(tu, nest)
    node = _node_at(root, st.tail) if root is not None else None
    if node is None:
        raise _Unknown("a statement not found in the syntax tree")
    v = _Flops()
    v.visit(node)
    return v.count


def flops(tu: TranslationUnit, nest: Nest, values: dict[str, int]) -> int:
    total = 0
    for st in nest.statements:
        per = _statement_flops(tu, nest, st)
        if per:
            total += per * iterations([nest.loop(it) for it in st.loops], values)
    return total


def footprint(analysis: NestAnalysis, given: dict[str, int]) -> int:
    """Bytes of the box of elements each non-local array touches (flattened ones as their flat range)."""
    total = 0
    for a in analysis.nest.arrays:
        if a.local:
            continue
        try:
            ext = deps.access_extent(analysis, a.key, given)
        except deps.BoundsNotAffine as exc:
            raise _Unknown(str(exc)) from None
        if ext is None:
            continue
        count = 1
        for lo, hi in ext:
            count *= hi - lo + 1
        total += count * max(a.elem.bits // 8, 1)
    return total


def of_nest(tu: TranslationUnit, nest: Nest, analysis: NestAnalysis, given: dict[str, int]) -> Workload:
    values = param_values(tu, nest, given)
    try:
        n = flops(tu, nest, values)
        if n:
            return Workload(n, None, "floating-point operations: the statements' + - * / (outside subscripts) "
                                     "times the number of times each runs")
        why = "the nest does no floating-point arithmetic"
    except _Unknown as exc:
        why = f"the operation count is unknown ({exc})"
    try:
        b = footprint(analysis, given)
        if b:
            return Workload(None, b, f"{why}; bytes of the arrays' footprint (each array's box of touched "
                                     "elements, counted once per call)")
    except _Unknown as exc:
        why += f"; the footprint is unknown ({exc})"
    return Workload(None, None, f"{why}: only times are reported")
