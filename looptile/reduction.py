"""Reductions by consent: the statements of a nest that accumulate into an object, and which
of those accumulations a rewrite may reorder.

An update is ``X += e``, ``X -= e``, ``X = X + e``, ``X = X - e``, ``X = e + X``, ``X++`` or
``X--`` (X a scalar or an array element) whose statement touches X only through that read and
that write of the same element (so ``e`` does not read X). Over the reals, + is associative and
commutative, so the updates between two other accesses of X may run in any order; in C:

- unsigned integer arithmetic is modular (C11 6.2.5p9): the result is the same in any order,
  no consent needed;
- signed integer arithmetic can overflow in the new order where the original did not
  (undefined behaviour, C11 6.5p5): the user must consent, and the guard records that they
  assert no partial sum overflows;
- floating-point addition rounds at every step: the user must consent, and the result may
  differ in the last bits.

The legality test then drops exactly the dependences between two allowed updates of the same
object (``deps.NestAnalysis._without_updates``); every dependence that involves any other access
(an initialisation ``s = 0``, a read ``out[i] = s``, a read of ``e``) stays.

For ``verify``: :func:`bound_source` writes the version of a file whose kernel adds the absolute
value of every term instead (the bound of the rounding error is relative to that sum).
"""
from __future__ import annotations

from dataclasses import dataclass

from pycparser import c_ast, c_generator

from .affine import column_on_line
from .ctype import INT, CType, common_int_type, literal_type, promote
from .errors import UsageError
from .frontend import TranslationUnit
from .model import Accumulation, Nest, Reassociation, Statement
from .source import match_close, statement_end

_gen = c_generator.CGenerator()


@dataclass(frozen=True)
class _Update:
    statement: str
    key: str
    name: str
    kind: str  # "float", "signed", "unsigned"


@dataclass(frozen=True)
class _NotUpdate:
    name: str
    reason: str


# ---------------------------------------------------------------- which statements are updates

def _body(tu: TranslationUnit, nest: Nest) -> c_ast.Node | None:
    off = nest.perfect[-1].for_offset
    for s in tu.loops():
        if s.token_index is not None and tu.tokens[s.token_index].start == off:
            return s.node.stmt
    return None


def _node_at(root: c_ast.Node, path: tuple[int | str, ...]) -> c_ast.Node | None:
    """The syntax tree node of a statement from its position in the body (``Statement.tail``,
    as body.BodyWalker numbers it: block items, if parts 0/1/2, ``iterator, 0`` into a loop)."""
    node, k = root, 0
    while k < len(path):
        p = path[k]
        if isinstance(node, c_ast.Compound) and isinstance(p, int):
            items = node.block_items or []
            node = items[p] if p < len(items) else None
            k += 1
        elif isinstance(node, c_ast.If) and isinstance(p, int):
            node = {0: node.cond, 1: node.iftrue, 2: node.iffalse}.get(p)
            k += 1
        elif isinstance(node, c_ast.For) and isinstance(p, str) and path[k + 1: k + 2] == (0,):
            node = node.stmt
            k += 2
        else:
            return None
        if node is None:
            return None
    return node


def _base(node: c_ast.Node) -> str | None:
    while isinstance(node, c_ast.ArrayRef):
        node = node.name
    return node.name if isinstance(node, c_ast.ID) else None


def _split(node: c_ast.Node) -> tuple[c_ast.Node, c_ast.Node | None, str] | None:
    """(the updated lvalue, the term or None for ++/--, the operator text) of an update."""
    if isinstance(node, c_ast.UnaryOp) and node.op in ("++", "--", "p++", "p--"):
        return node.expr, None, node.op
    if not isinstance(node, c_ast.Assignment):
        return None
    lv, rv = node.lvalue, node.rvalue
    if node.op in ("+=", "-="):
        return lv, rv, node.op
    if node.op == "=" and isinstance(rv, c_ast.BinaryOp) and rv.op in ("+", "-"):
        same = _gen.visit(lv)
        if _gen.visit(rv.left) == same:
            return lv, rv.right, "=" + rv.op
        if rv.op == "+" and _gen.visit(rv.right) == same:
            return lv, rv.left, "=+"
    return None


def _type_of(node: c_ast.Node, names: dict[str, CType], tu: TranslationUnit) -> CType | None:
    """The C type of an expression, as far as the kind matters (integer signedness and width,
    floating); None when looptile cannot tell."""
    def of(n: c_ast.Node) -> CType | None:
        if isinstance(n, c_ast.Constant):
            if n.type == "int":
                try:
                    return literal_type(n.value)
                except ValueError:
                    return None
            if n.type == "char":
                return INT
            return CType("float", bits=32 if n.value.lower().endswith("f") else 64) if n.type in (
                "float", "double") else None
        if isinstance(n, (c_ast.ID, c_ast.ArrayRef)):
            return names.get(_base(n) or "")
        if isinstance(n, c_ast.Cast):
            types = tu.cache.get("types")
            return types.of(n.to_type.type) if types is not None else None
        if isinstance(n, c_ast.FuncCall):  # the pure functions of math.h return floating values
            return CType("float", bits=64)
        if isinstance(n, c_ast.UnaryOp):
            if n.op == "!":
                return INT
            if n.op == "sizeof":
                return CType("int", False, 64, 4)
            inner = of(n.expr)
            return promote(inner) if inner is not None and inner.is_int else inner
        if isinstance(n, c_ast.TernaryOp):
            return both(of(n.iftrue), of(n.iffalse))
        if isinstance(n, c_ast.BinaryOp):
            if n.op in ("&&", "||", "==", "!=", "<", "<=", ">", ">="):
                return INT
            left = of(n.left)
            if n.op in ("<<", ">>"):
                return promote(left) if left is not None and left.is_int else None
            return both(left, of(n.right))
        return None

    def both(a: CType | None, b: CType | None) -> CType | None:
        if a is None or b is None:
            return None
        if a.kind == "float" or b.kind == "float":
            return a if a.kind == "float" and (b.kind != "float" or a.bits >= b.bits) else b
        if a.is_int and b.is_int:
            return common_int_type(a, b)
        return None

    return of(node)


def _classify(st: Statement, node: c_ast.Node, nest: Nest, tu: TranslationUnit) -> _Update | _NotUpdate | None:
    parts = _split(node)
    if parts is None:
        if isinstance(node, c_ast.Assignment) and node.op != "=" and _base(node.lvalue):
            return _NotUpdate(_base(node.lvalue) or "", f"it is updated with '{node.op}', and only sums "
                              "(+=, -=, x = x + e, ++, --) can be reassociated")
        return None
    lv, term, op = parts
    name = _base(lv)
    if name is None:
        return None
    arrays = {nest.array(a.array).name: nest.array(a.array) for a in st.accesses}
    info = arrays.get(name)
    if info is None:
        return None
    mine = [a for a in st.accesses if a.array == info.key]
    if not (len(mine) == 2 and {a.write for a in mine} == {True, False} and mine[0].subscripts == mine[1].subscripts):
        return _NotUpdate(name, "the statement touches it other than by reading and writing the one element "
                          "it updates")
    names: dict[str, CType] = {n: a.elem for n, a in arrays.items()}
    names |= {lp.iterator: lp.ctype for lp in nest.perfect + nest.inner}
    names |= {p.text: p.ctype for p in nest.params if p.kind != "opaque"}
    t = info.elem
    if t.kind == "float":
        return _Update(st.name, info.key, name, "float")
    if not t.is_int or t.rank == 0:
        return _NotUpdate(name, "it is not an arithmetic accumulator (_Bool or another type)")
    et = INT if term is None else _type_of(term, names, tu)
    if et is None:
        return _NotUpdate(name, "looptile cannot tell the type of the term it adds")
    if et.kind == "float":
        return _NotUpdate(name, "it is an integer that adds a floating-point term: every step rounds to an integer, "
                          "so a new order changes the result")
    op_type = common_int_type(t, et)
    return _Update(st.name, info.key, name, "unsigned" if t.is_unsigned and op_type.is_unsigned else "signed")


def _updates(tu: TranslationUnit, nest: Nest) -> tuple[list[_Update], list[_NotUpdate]]:
    root = _body(tu, nest)
    ups: list[_Update] = []
    nots: list[_NotUpdate] = []
    if root is None:
        return ups, nots
    for st in nest.statements:
        node = _node_at(root, st.tail)
        if node is None or node.coord is None or node.coord.line != st.line:
            continue  # not found where the model says: not an update (the dependences stay)
        got = _classify(st, node, nest, tu)
        if isinstance(got, _Update):
            ups.append(got)
        elif isinstance(got, _NotUpdate):
            nots.append(got)
    return ups, nots


def reassociation(tu: TranslationUnit, nest: Nest, consent: tuple[str, ...] = ()) -> Reassociation:
    """The accumulations of ``nest``: unsigned ones always allowed, the others when their C
    name is in ``consent`` (--reassociate). A consented name the nest does not accumulate (with
    + or -, touching only the updated element) is a usage error."""
    ups, nots = _updates(tu, nest)
    groups: dict[tuple[str, str], list[_Update]] = {}
    for u in ups:
        groups.setdefault((u.key, u.kind), []).append(u)
    accumulated = {u.name for u in ups}
    for name in dict.fromkeys(consent):
        if name in accumulated:
            continue
        why = next((n.reason for n in nots if n.name == name), None)
        if why is None:
            known = ", ".join(sorted(accumulated))
            why = ("no statement of the nest adds to it (NAME += e, NAME -= e, NAME = NAME + e)"
                   + (f"; the nest accumulates into {known}" if known else ""))
        raise UsageError(f"--reassociate {name}: the selected nest has no accumulation into '{name}' that "
                         f"looptile can reorder; {why}", path=nest.path, line=nest.line, column=nest.col)
    accs = []
    for (key, kind), us in groups.items():
        name = us[0].name
        accs.append(Accumulation(key, name, kind, tuple(u.statement for u in us),
                                 kind == "unsigned" or name in consent))
    return Reassociation(tuple(accs))


# ---------------------------------------------------------------- what the output says

def _kind_of(r: Reassociation, name: str) -> str:
    kinds = {a.kind for a in r.accumulations if a.name == name and a.allowed}
    return "float" if "float" in kinds else ("signed" if "signed" in kinds else "unsigned")


def floating(r: Reassociation, reordered: tuple[str, ...]) -> tuple[str, ...]:
    """The reordered names whose results may differ in the last bits."""
    return tuple(n for n in reordered if _kind_of(r, n) == "float")


def guard_phrases(r: Reassociation, reordered: tuple[str, ...]) -> list[str]:
    """What the guard comment records about the reordered accumulations."""
    out = []
    for n in reordered:
        kind = _kind_of(r, n)
        if kind == "float":
            out.append(f"the floating-point additions into {n} run in a new order (--reassociate {n}): "
                       f"results of {n} may differ in the last bits")
        elif kind == "signed":
            out.append(f"no partial sum of the signed integer accumulation into {n} overflows in the new order "
                       f"(--reassociate {n}, asserted by the user)")
        else:
            out.append(f"the unsigned additions into {n} run in a new order (modular arithmetic: the same result)")
    return out


def notes(r: Reassociation, reordered: tuple[str, ...]) -> list[str]:
    """The note lines a command prints about the reordered accumulations."""
    out = []
    for n in reordered:
        kind = _kind_of(r, n)
        if kind == "float":
            out.append(f"results of '{n}' may differ in the last bits: its floating-point additions run in a new "
                       f"order (--reassociate {n})")
        elif kind == "signed":
            out.append(f"assumed: no partial sum of '{n}' overflows in the new order of its additions "
                       f"(--reassociate {n})")
        else:
            out.append(f"the unsigned additions into '{n}' run in a new order (modular arithmetic gives the same "
                       "result)")
    return out


def advice(r: Reassociation, name: str, first: str, second: str) -> str | None:
    """The refusal's detail line when the violated dependence is between two updates of an
    accumulation that consent would allow."""
    acc = r.of_statements(name, first, second)
    if acc is None or acc.allowed:
        return None
    if acc.kind == "float":
        return (f"'{name}' is a floating-point accumulation: reordering it would change the rounding of the result; "
                f"if results that may differ in the last bits are acceptable, allow it with --reassociate {name}")
    return (f"'{name}' is a signed integer accumulation: a new order could overflow where the original does not; "
            f"if no partial sum can overflow in any order, allow it with --reassociate {name}")


# ---------------------------------------------------------------- the bound build of verify

ABS_HELPER = "looptile_abs"
_PRELUDE = f"static long double {ABS_HELPER}(long double v) {{ return v < 0 ? -v : v; }}\n#line 1\n"


class BoundUnavailable(Exception):
    """The kernel's text does not let looptile write the sum of absolute values."""


def _statements(node: c_ast.Node):
    """Every statement-level node of a function body (expression statements and declarations)."""
    if node is None:
        return
    if isinstance(node, c_ast.Compound):
        for item in node.block_items or []:
            yield from _statements(item)
    elif isinstance(node, c_ast.If):
        yield from _statements(node.iftrue)
        yield from _statements(node.iffalse)
    elif isinstance(node, (c_ast.For, c_ast.While, c_ast.DoWhile)):
        if isinstance(node, c_ast.For) and isinstance(node.init, c_ast.DeclList):
            yield from node.init.decls
        yield from _statements(node.stmt)
    elif isinstance(node, (c_ast.Switch, c_ast.Case, c_ast.Default, c_ast.Label)):
        for s in (getattr(node, "stmt", None),) if not isinstance(node, (c_ast.Case, c_ast.Default)) else \
                tuple(node.stmts or ()):
            yield from _statements(s)
    elif isinstance(node, c_ast.DeclList):
        yield from node.decls
    else:
        yield node


def bound_source(tu: TranslationUnit, function: str, names: tuple[str, ...]) -> bytes:
    """The file with the kernel ``function`` rewritten to compute, for each floating-point
    object in ``names``, the sum of the absolute values of its terms: every update adds the
    absolute value of its term (``s -= e`` becomes ``s += |e|``) and every other value stored
    into it (``s = e``, ``double s = e``) is stored as its absolute value. The harness makes
    the initial values of such objects non-negative too.

    Raises BoundUnavailable when a statement that stores into one of them is not spelled so in
    the file (a macro)."""
    src = tu.source
    func = next(f for f in tu.functions if f.name == function)
    edits: list[tuple[int, int, str]] = []
    for node in _statements(func.node.body):
        if isinstance(node, c_ast.Decl):
            if node.name in names and node.init is not None and not isinstance(node.init, c_ast.InitList):
                edits += _decl_edits(tu, node)
            continue
        parts = _split(node)
        target = parts[0] if parts else (node.lvalue if isinstance(node, c_ast.Assignment) else None)
        if target is None or _base(target) not in names:
            continue
        if parts is None and node.op != "=":
            continue  # s *= e: stays (the value it gives is still a bound of that computation)
        edits += _update_edits(tu, node, parts)
    data = src.text
    for start, end, text in sorted(edits, reverse=True):
        data = data[:start] + text + data[end:]
    return (_PRELUDE + data).encode("latin-1")


def _code_tokens(tu: TranslationUnit, node: c_ast.Node):
    """The code tokens of the statement ``node`` in the original text (up to its ``;``)."""
    line = node.coord.line if node.coord is not None else None
    col = column_on_line(tu, line, node) if line else None
    if col is None:
        raise BoundUnavailable(f"cannot find the statement at line {line} in the file's text")
    start = tu.source.offset(line, col)
    toks = tu.code_between(start, len(tu.source.text))
    end = statement_end(toks, 0) if toks else -1
    if end < 0 or toks[end].text != ";":
        raise BoundUnavailable(f"cannot find the end of the statement at line {line}")
    return toks[: end + 1]


def _spelled(toks) -> str:
    return "".join(t.text for t in toks)


def _lvalue_len(toks) -> int:
    """How many tokens the lvalue at the start of ``toks`` takes (a name, then [..] groups)."""
    k = 1
    while k < len(toks) and toks[k].text == "[":
        close = match_close(toks, k)
        if close < 0:
            return -1
        k = close + 1
    return k


def _update_edits(tu: TranslationUnit, node: c_ast.Node, parts) -> list[tuple[int, int, str]]:
    toks = _code_tokens(tu, node)
    line = node.coord.line
    if isinstance(node, c_ast.UnaryOp):
        opt = next((t for t in toks if t.text in ("++", "--")), None)
        if opt is None:
            raise BoundUnavailable(f"the update at line {line} is not spelled with ++ or -- in the file")
        return [(opt.start, opt.end, "++")]
    n = _lvalue_len(toks)
    if n < 0 or n >= len(toks) or _spelled(toks[:n]).replace(" ", "") != _gen.visit(node.lvalue).replace(" ", ""):
        raise BoundUnavailable(f"the assignment at line {line} is not spelled as its syntax tree in the file "
                               "(a macro?)")
    op, semi = toks[n], toks[-1]
    lv = _spelled(toks[:n])
    rest = toks[n + 1: -1]
    if not rest:
        raise BoundUnavailable(f"the assignment at line {line} has no value in the file's text")
    if parts is None or op.text in ("+=", "-="):  # s = e or s op= e
        if op.text not in ("=", "+=", "-="):
            raise BoundUnavailable(f"unexpected operator at line {line}")
        sign = [(op.start, op.end, "+=")] if op.text == "-=" else []
        return sign + [(rest[0].start, rest[0].start, f"{ABS_HELPER}("), (semi.start, semi.start, ")")]
    if op.text != "=":
        raise BoundUnavailable(f"unexpected operator at line {line}")
    if parts[2] in ("=+", "=-") and _spelled(rest[:n]) == lv and len(rest) > n + 1 and rest[n].text in "+-" \
            and _gen.visit(node.rvalue.left) == _gen.visit(node.lvalue):
        sign = rest[n]
        return [(sign.start, sign.end, "+"), (rest[n + 1].start, rest[n + 1].start, f"{ABS_HELPER}("),
                (semi.start, semi.start, ")")]
    if parts[2] == "=+" and len(rest) > n + 1 and _spelled(rest[-n:]) == lv and rest[-n - 1].text == "+":
        return [(rest[0].start, rest[0].start, f"{ABS_HELPER}("), (rest[-n - 2].end, rest[-n - 2].end, ")")]
    raise BoundUnavailable(f"the update at line {line} is not spelled as its syntax tree in the file (a macro?)")


def _decl_edits(tu: TranslationUnit, node: c_ast.Decl) -> list[tuple[int, int, str]]:
    line = node.coord.line
    start = tu.source.offset(line)
    toks = tu.code_between(start, len(tu.source.text))
    for k, t in enumerate(toks[:-1]):
        if t.text == node.name and toks[k + 1].text == "=":
            depth = 0
            for j in range(k + 2, len(toks)):
                x = toks[j].text
                if x in "([{":
                    depth += 1
                elif x in ")]}":
                    depth -= 1
                elif depth == 0 and x in (",", ";") and j > k + 2:
                    return [(toks[k + 2].start, toks[k + 2].start, f"{ABS_HELPER}("),
                            (toks[j - 1].end, toks[j - 1].end, ")")]
            break
    raise BoundUnavailable(f"cannot find the initialiser of '{node.name}' at line {line} in the file's text")
