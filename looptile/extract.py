"""From a paired ``for`` statement to the model: loops, statements, accesses.

Everything outside the model is a ``Refusal`` that names the construct at
``file:line:col`` with the reason.  Bounds are read from the original text
(macros stay symbolic when their body is an integer); bodies from the AST.
"""
from __future__ import annotations

import re
from dataclasses import dataclass, field

from pycparser import c_ast

from .ctype import INT, CType, TypeTable, common_int_type, literal_type, literal_value
from .errors import Refusal
from .frontend import LoopSite, TranslationUnit
from .model import Access, Affine, ArrayInfo, Bound, Loop, Nest, Obligation, Param, Statement
from .scope import Symbol, visible_at_loops
from .source import Token, match_close, statement_end, tokenize

# Pure functions of math.h (C11 7.12) that looptile treats as side-effect free.
# Common practice: errno updates on domain errors are ignored (said in the guard comment).
PURE_MATH = frozenset(
    """acos asin atan atan2 cos sin tan acosh asinh atanh cosh sinh tanh exp exp2 expm1
    log log10 log1p log2 logb cbrt fabs hypot pow sqrt erf erfc tgamma lgamma ceil floor
    nearbyint rint round trunc fmod remainder copysign fdim fmax fmin fma ldexp""".split()
)
PURE = PURE_MATH | {f + "f" for f in PURE_MATH} | {f + "l" for f in PURE_MATH}


class NotAffine(Exception):
    def __init__(self, reason: str, node: c_ast.Node | None = None):
        super().__init__(reason)
        self.reason = reason
        self.node = node


@dataclass
class _Ctx:
    tu: TranslationUnit
    site: LoopSite
    scope: dict[str, Symbol]
    types: TypeTable
    assume_pure: frozenset[str]
    iterators: list[str] = field(default_factory=list)  # enclosing nest loops while walking
    params: dict[str, Param] = field(default_factory=dict)
    arrays: dict[str, ArrayInfo] = field(default_factory=dict)
    locals_: list[dict[str, str]] = field(default_factory=list)  # block scopes: C name -> array key
    written: dict[str, c_ast.Node] = field(default_factory=dict)  # scalar C names written
    used_as_param: dict[str, c_ast.Node] = field(default_factory=dict)
    obligations: list[Obligation] = field(default_factory=list)
    statements: list[Statement] = field(default_factory=list)
    inner: list[Loop] = field(default_factory=list)
    outer_declared: list[str] = field(default_factory=list)
    loop_types: dict[str, CType] = field(default_factory=dict)

    def refuse(self, what: str, node: c_ast.Node | None = None, offset: int | None = None) -> Refusal:
        src = self.tu.source
        line, col = None, None
        if offset is not None:
            line, col = src.line_col(offset)
        elif node is not None and node.coord is not None:
            line = node.coord.line
            col = _column_on_line(self.tu, line, node) or node.coord.column
        return Refusal(what, path=src.path, line=line, column=col,
                       source_line=src.line_text(line) if line else None)


def _column_on_line(tu: TranslationUnit, line: int, node: c_ast.Node) -> int | None:
    """Byte column in the original of the first token of ``node`` (matched by spelling)."""
    want = None
    if isinstance(node, c_ast.ID):
        want = node.name
    elif isinstance(node, c_ast.FuncCall) and isinstance(node.name, c_ast.ID):
        want = node.name.name
    elif isinstance(node, c_ast.ArrayRef):
        base = node
        while isinstance(base, c_ast.ArrayRef):
            base = base.name
        want = getattr(base, "name", None)
    elif isinstance(node, c_ast.StructRef):
        return _column_on_line(tu, line, node.name)
    else:
        want = {c_ast.Break: "break", c_ast.Continue: "continue", c_ast.Goto: "goto",
                c_ast.Return: "return", c_ast.While: "while", c_ast.DoWhile: "do",
                c_ast.Switch: "switch"}.get(type(node))
    if not want:
        return None
    text = tu.source.line_text(line)
    start = tu.source.offset(line)
    for t in tu.tokens:
        if t.start >= start and t.start < start + len(text) + 1 and t.text == want:
            return t.start - start + 1
    return None


# ---------------------------------------------------------------- affine expressions

def int_affine(ctx: _Ctx, node: c_ast.Node) -> tuple[Affine, CType, list[Affine]]:
    """Affine value, C type and non-negativity side conditions (for unsigned wrap-around)."""
    if isinstance(node, c_ast.Constant):
        if node.type in ("char",) or "." in node.value or node.value[-1:] in "fF" and not node.value.startswith("0x"):
            raise NotAffine(f"the constant {node.value} is not an integer", node)
        try:
            return Affine(const=literal_value(node.value)), literal_type(node.value), []
        except ValueError as exc:
            raise NotAffine(f"the constant {node.value} is not an integer", node) from exc
    if isinstance(node, c_ast.ID):
        return _id_affine(ctx, node)
    if isinstance(node, c_ast.UnaryOp) and node.op in ("-", "+"):
        a, t, obl = int_affine(ctx, node.expr)
        if node.op == "-" and t.is_unsigned and not a.is_constant():
            obl = obl + [a.scale(-1)]
        return (a.scale(-1) if node.op == "-" else a), t, obl
    if isinstance(node, c_ast.BinaryOp) and node.op in ("+", "-", "*"):
        a, ta, oa = int_affine(ctx, node.left)
        b, tb, ob = int_affine(ctx, node.right)
        t = common_int_type(ta, tb)
        obl = oa + ob
        if t.is_unsigned:  # converting a signed operand to unsigned is exact only when it is >= 0
            for v, tv in ((a, ta), (b, tb)):
                if tv.signed and not (v.is_constant() and v.const >= 0):
                    obl.append(v)
        if node.op == "+":
            return a + b, t, obl
        if node.op == "-":
            if t.is_unsigned:
                obl.append(a - b)
            return a - b, t, obl
        if a.is_constant():
            return b.scale(a.const), t, obl
        if b.is_constant():
            return a.scale(b.const), t, obl
        raise NotAffine("the product of two variables is not affine", node)
    if isinstance(node, c_ast.Cast):
        inner, ti, obl = int_affine(ctx, node.expr)
        t = ctx.types.of(node.to_type.type)
        if not t.is_int:
            raise NotAffine("a cast to a non-integer type", node)
        if t.bits < ti.bits or (t.signed != ti.signed):
            obl = obl + [inner]  # value-preserving only for non-negative values that fit
        return inner, t, obl
    raise NotAffine(_describe(node), node)


def _describe(node: c_ast.Node) -> str:
    if isinstance(node, c_ast.BinaryOp):
        return f"it uses operator {node.op}"
    if isinstance(node, c_ast.FuncCall):
        return "it calls a function"
    if isinstance(node, c_ast.ArrayRef):
        return "it reads an array element, so it is data-dependent"
    if isinstance(node, c_ast.StructRef):
        return "it reads a struct member"
    if isinstance(node, c_ast.UnaryOp):
        return f"it uses operator {node.op}"
    return f"it is a {type(node).__name__}"


def _id_affine(ctx: _Ctx, node: c_ast.ID) -> tuple[Affine, CType, list[Affine]]:
    name = node.name
    if name in ctx.iterators:
        return Affine.symbol(name), ctx.loop_types[name], []
    sym = ctx.scope.get(name)
    if sym is None:
        raise NotAffine(f"'{name}' is not declared where the loop is", node)
    if sym.kind == "enum" and sym.value is not None:
        return Affine(const=sym.value), INT, []
    if sym.kind in ("param", "local", "global") and sym.ctype.is_int:
        if sym.ctype.volatile:
            raise NotAffine(f"'{name}' is volatile", node)
        ctx.used_as_param.setdefault(name, node)
        kind = "outer-iterator" if name in _outer_iterators(ctx) else "variable"
        ctx.params.setdefault(name, Param(name, name, sym.ctype, kind))
        return Affine.symbol(name), sym.ctype, []
    raise NotAffine(f"'{name}' is not an integer variable", node)


def _outer_iterators(ctx: _Ctx) -> set[str]:
    out = set()
    s = ctx.site.parent
    while s is not None:
        for var in _for_iterator_names(s.node):
            out.add(var)
        s = s.parent
    return out


def _for_iterator_names(node: c_ast.For) -> list[str]:
    if isinstance(node.init, c_ast.DeclList):
        return [d.name for d in node.init.decls]
    if isinstance(node.init, c_ast.Assignment) and isinstance(node.init.lvalue, c_ast.ID):
        return [node.init.lvalue.name]
    return []


# ---------------------------------------------------------------- bounds from the original text

def _text_affine(ctx: _Ctx, toks: list[Token]) -> Affine | None:
    """Affine value of a bound's original tokens, integer macros kept as symbols.

    Returns None when the spelling is not a plain +, -, * expression of
    literals, variables and integer macros (then the AST value is used).
    """
    pos = 0

    def peek() -> str:
        return toks[pos].text if pos < len(toks) else ""

    def primary() -> Affine:
        nonlocal pos
        t = toks[pos] if pos < len(toks) else None
        if t is None:
            raise NotAffine("empty")
        pos += 1
        if t.text == "(":
            v = expr()
            if peek() != ")":
                raise NotAffine("paren")
            pos += 1
            return v
        if t.kind == "num":
            if not t.text.rstrip("uUlL").isdigit():
                raise NotAffine("literal")
            return Affine(const=int(t.text.rstrip("uUlL")))
        if t.kind == "id":
            body = ctx.tu.macros.get(t.text)
            if body is not None:
                b = body.strip("() ")
                if b.lstrip("-").rstrip("uUlL").isdigit() and not b.rstrip("0123456789").endswith(("u", "U", "l", "L")):
                    ctx.params.setdefault(t.text, Param(t.text, t.text, INT, "macro"))
                    return Affine.symbol(t.text)
                raise NotAffine("macro")
            if t.text in ctx.iterators:
                return Affine.symbol(t.text)
            sym = ctx.scope.get(t.text)
            if sym is not None and sym.kind in ("param", "local", "global") and sym.ctype.is_int:
                return Affine.symbol(t.text)
            if sym is not None and sym.kind == "enum" and sym.value is not None:
                return Affine(const=sym.value)
        raise NotAffine("token")

    def unary() -> Affine:
        nonlocal pos
        if peek() == "-":
            pos += 1
            return unary().scale(-1)
        if peek() == "+":
            pos += 1
            return unary()
        return primary()

    def term() -> Affine:
        nonlocal pos
        v = unary()
        while peek() == "*":
            pos += 1
            w = unary()
            if v.is_constant():
                v = w.scale(v.const)
            elif w.is_constant():
                v = v.scale(w.const)
            else:
                raise NotAffine("product")
        return v

    def expr() -> Affine:
        nonlocal pos
        v = term()
        while peek() in ("+", "-"):
            op = peek()
            pos += 1
            w = term()
            v = v + w if op == "+" else v - w
        return v

    try:
        v = expr()
    except NotAffine:
        return None
    return v if pos == len(toks) else None


def _bound(ctx: _Ctx, node: c_ast.Node, toks: list[Token], at: Loop | None, what: str,
           loops_for_obligation: tuple[str, ...]) -> Bound:
    """A loop bound: its value for the analysis and its spelling for emission."""
    text = ctx.tu.source.text[toks[0].start:toks[-1].end] if toks else ""
    try:
        value, t, obl = int_affine(ctx, node)
    except NotAffine as exc:
        value, t, obl = _opaque(ctx, node, text, exc)
    symbolic = _text_affine(ctx, toks)
    if symbolic is not None and not obl:
        value = symbolic
    line, col = ctx.tu.source.line_col(toks[0].start) if toks else (ctx.site.line, 1)
    for o in obl:
        if value.names() & set(ctx.iterators):
            ctx.obligations.append(Obligation(o, loops_for_obligation, line, col, f"the {what} {text}"))
        else:  # loop-invariant: stands for its C value as one opaque parameter
            value, _, _ = _opaque(ctx, node, text, None, t)
            break
    return Bound(value, text, toks[0].start if toks else 0, toks[-1].end if toks else 0)


def _opaque(ctx: _Ctx, node: c_ast.Node, text: str, why: NotAffine | None,
            t: CType | None = None) -> tuple[Affine, CType, list[Affine]]:
    """A loop-invariant bound expression treated as one fresh parameter (its C value)."""
    names = _ids_in(node)
    if names & set(ctx.iterators) or _has_call_or_write(node):
        reason = why.reason if why else "its C value can wrap around"
        raise ctx.refuse(f"the loop bound '{text}' is outside the model; {reason}", why.node if why else node)
    for n in names:
        ctx.used_as_param.setdefault(n, node)
    key = f"${len([p for p in ctx.params.values() if p.kind == 'opaque'])}"
    ctype = t or _expr_type(ctx, node)
    ctx.params[key] = Param(key, text, ctype, "opaque")
    return Affine.symbol(key), ctype, []


def _expr_type(ctx: _Ctx, node: c_ast.Node) -> CType:
    try:
        return int_affine(ctx, node)[1]
    except NotAffine:
        return INT


def _ids_in(node: c_ast.Node) -> set[str]:
    out: set[str] = set()

    class V(c_ast.NodeVisitor):
        def visit_ID(self, n):
            out.add(n.name)

        def visit_StructRef(self, n):
            self.visit(n.name)

    V().visit(node)
    return out


def _has_call_or_write(node: c_ast.Node) -> bool:
    found = []

    class V(c_ast.NodeVisitor):
        def visit_FuncCall(self, n):
            found.append(n)

        def visit_Assignment(self, n):
            found.append(n)

        def visit_UnaryOp(self, n):
            if n.op in ("++", "--", "p++", "p--"):
                found.append(n)
            self.generic_visit(n)

    V().visit(node)
    return bool(found)


# ---------------------------------------------------------------- loop headers

def _split_header(ctx: _Ctx, idx: int) -> tuple[list[list[Token]], int]:
    toks = ctx.tu.tokens
    if idx + 1 >= len(toks) or toks[idx + 1].text != "(":
        raise ctx.refuse("this for statement does not come from the file's own text", offset=toks[idx].start)
    close = match_close(toks, idx + 1)
    parts: list[list[Token]] = [[]]
    depth = 0
    for t in toks[idx + 2:close]:
        if t.text in "([{":
            depth += 1
        elif t.text in ")]}":
            depth -= 1
        if t.text == ";" and depth == 0:
            parts.append([])
            continue
        parts[-1].append(t)
    if len(parts) != 3:
        raise ctx.refuse("the loop header is not of the form (init; condition; step) in the source",
                         offset=toks[idx].start)
    return parts, close


def _after_top(toks: list[Token], ops: tuple[str, ...]) -> tuple[list[Token], str, list[Token]] | None:
    depth = 0
    found = None
    for k, t in enumerate(toks):
        if t.text in "([{":
            depth += 1
        elif t.text in ")]}":
            depth -= 1
        elif depth == 0 and t.kind == "punct" and t.text in ops:
            if found is not None:
                return None
            found = k
    if found is None:
        return None
    return toks[:found], toks[found].text, toks[found + 1:]


def _step(ctx: _Ctx, nxt: c_ast.Node, it: str) -> tuple[int, int]:
    def const(n: c_ast.Node) -> int | None:
        if isinstance(n, c_ast.Constant) and n.type == "int":
            return literal_value(n.value)
        return None

    if isinstance(nxt, c_ast.UnaryOp) and isinstance(nxt.expr, c_ast.ID) and nxt.expr.name == it:
        if nxt.op in ("p++", "++"):
            return 1, 1
        if nxt.op in ("p--", "--"):
            return 1, -1
    if isinstance(nxt, c_ast.Assignment) and isinstance(nxt.lvalue, c_ast.ID) and nxt.lvalue.name == it:
        c = const(nxt.rvalue)
        if nxt.op in ("+=", "-=") and c is not None and c > 0:
            return c, 1 if nxt.op == "+=" else -1
        r = nxt.rvalue
        if nxt.op == "=" and isinstance(r, c_ast.BinaryOp) and r.op in ("+", "-"):
            if isinstance(r.left, c_ast.ID) and r.left.name == it and const(r.right):
                c = const(r.right)
                if c and c > 0:
                    return c, 1 if r.op == "+" else -1
            if r.op == "+" and isinstance(r.right, c_ast.ID) and r.right.name == it and const(r.left):
                c = const(r.left)
                if c and c > 0:
                    return c, 1
    raise ctx.refuse(f"the step of loop '{it}' is not ++, --, += c, -= c or = {it} + c with a positive constant c",
                     nxt)


def extract_loop(ctx: _Ctx, node: c_ast.For, idx: int | None) -> Loop:
    """One loop header: iterator, bounds in the model, step, direction, byte spans."""
    if idx is None:
        raise ctx.refuse("this for loop cannot be matched to the source text (it comes from a macro)", node)
    toks = ctx.tu.tokens
    src = ctx.tu.source
    (init_t, cond_t, _), close = _split_header(ctx, idx)
    if isinstance(node.init, c_ast.DeclList) and len(node.init.decls) == 1 and node.init.decls[0].init is not None:
        d = node.init.decls[0]
        it, ctype, in_for, start_node = d.name, ctx.types.of(d.type, _type_spelling(init_t, d.name)), True, d.init
    elif isinstance(node.init, c_ast.Assignment) and node.init.op == "=" and isinstance(node.init.lvalue, c_ast.ID):
        it = node.init.lvalue.name
        sym = ctx.scope.get(it)
        if sym is None:
            raise ctx.refuse(f"the iterator '{it}' is not declared", node.init)
        ctype, in_for, start_node = sym.ctype, False, node.init.rvalue
        if sym.kind != "local" or "static" in sym.storage:
            raise ctx.refuse(f"the iterator '{it}' is not a local variable of the function", node.init)
    else:
        raise ctx.refuse("the loop must initialise exactly one iterator (int i = ... or i = ...)", node)
    if not ctype.is_int:
        raise ctx.refuse(f"the iterator '{it}' is not of an integer type", node)
    if ctype.volatile:
        raise ctx.refuse(f"the iterator '{it}' is volatile", node)
    if ctype.bits < 32:
        raise ctx.refuse(f"the iterator '{it}' is narrower than int (it is promoted in arithmetic)", node)
    step, direction = _step(ctx, node.next, it)
    cond = node.cond
    if not (isinstance(cond, c_ast.BinaryOp) and cond.op in ("<", "<=", ">", ">=", "!=")):
        raise ctx.refuse(f"the condition of loop '{it}' is not one comparison of '{it}' with a bound", cond or node)
    flip = {"<": ">", "<=": ">=", ">": "<", ">=": "<=", "!=": "!="}
    split = _after_top(cond_t, ("<", "<=", ">", ">=", "!="))
    if split is None:
        raise ctx.refuse(f"the condition of loop '{it}' is not one comparison in the source", cond)
    left_t, _, right_t = split
    if isinstance(cond.left, c_ast.ID) and cond.left.name == it:
        op, limit_node, limit_t = cond.op, cond.right, right_t
    elif isinstance(cond.right, c_ast.ID) and cond.right.name == it:
        op, limit_node, limit_t = flip[cond.op], cond.left, left_t
    else:
        raise ctx.refuse(f"the condition of loop '{it}' does not compare the iterator itself", cond)
    if op == "!=":
        if step != 1 or ctype.is_unsigned:
            raise ctx.refuse(f"the condition {it} != ... is supported only for signed iterators with step 1", cond)
        op = "<" if direction > 0 else ">"
    if (direction > 0) != (op in ("<", "<=")):
        raise ctx.refuse(f"loop '{it}' counts {'up' if direction > 0 else 'down'} but its condition is {it} {op} ...",
                         cond)
    eq = next((k for k, t in enumerate(init_t) if t.text == "="), None)
    if eq is None:
        raise ctx.refuse(f"cannot find the initial value of '{it}' in the source", node)
    outer = tuple(ctx.iterators)
    ctx.loop_types[it] = ctype
    start = _bound(ctx, start_node, init_t[eq + 1:], None, "initial value", outer)
    limit = _bound(ctx, limit_node, limit_t, None, "bound", outer)
    cmp_type = common_int_type(ctype, _expr_type(ctx, limit_node))
    if cmp_type.is_unsigned and not ctype.is_unsigned:
        ctx.obligations.append(Obligation(Affine.symbol(it), outer + (it,), node.coord.line, 1,
                                          f"'{it}' compared as an unsigned value"))
    elif cmp_type.is_unsigned and not _expr_type(ctx, limit_node).is_unsigned:
        if limit.value.names() & set(ctx.iterators):
            ctx.obligations.append(Obligation(limit.value, outer, node.coord.line, 1,
                                              f"the bound {limit.text} converted to unsigned"))
        else:
            v, _, _ = _opaque(ctx, limit_node, limit.text, None, cmp_type)
            limit = Bound(v, limit.text, limit.start, limit.end)
    body_idx = close + 1
    body_last = statement_end(toks, body_idx)
    if body_last < 0:
        raise ctx.refuse(f"cannot find the end of the body of loop '{it}' in the source", node)
    line, col = src.line_col(toks[idx].start)
    return Loop(it, ctype, in_for, start, limit, op, step, direction, line, col,
                toks[idx].start, toks[close].end, toks[body_idx].start, toks[body_last].end)


def _type_spelling(init_t: list[Token], name: str) -> str:
    words = []
    for t in init_t:
        if t.text == name:
            break
        words.append(t.text)
    return " ".join(w for w in words if w not in ("register",))


# ---------------------------------------------------------------- bodies

class _Body:
    """Walks the statements of the nest, collecting statements and their accesses."""

    def __init__(self, ctx: _Ctx) -> None:
        self.ctx = ctx
        self.accesses: list[Access] = []

    # -- statements
    def stmt(self, node: c_ast.Node, path: tuple[int | str, ...]) -> None:
        ctx = self.ctx
        if isinstance(node, c_ast.Compound):
            ctx.locals_.append({})
            for k, item in enumerate(node.block_items or []):
                self.stmt(item, path + (k,))
            ctx.locals_.pop()
        elif isinstance(node, c_ast.For):
            self.inner_for(node, path)
        elif isinstance(node, c_ast.Decl):
            self.decl(node, path)
        elif isinstance(node, c_ast.If):
            self.leaf(node.cond, path + (0,), node)
            self.stmt(node.iftrue, path + (1,))
            if node.iffalse is not None:
                self.stmt(node.iffalse, path + (2,))
        elif isinstance(node, (c_ast.Assignment, c_ast.UnaryOp, c_ast.FuncCall, c_ast.ExprList,
                               c_ast.TernaryOp, c_ast.BinaryOp, c_ast.Cast, c_ast.ID, c_ast.ArrayRef)):
            self.leaf(node, path, node)
        elif isinstance(node, c_ast.EmptyStatement):
            pass
        elif isinstance(node, c_ast.Pragma):
            raise ctx.refuse(f"'#pragma {node.string}' inside the nest would be detached from its place by the "
                             "rewrite; remove it or select a nest without it", node)
        elif isinstance(node, (c_ast.Break, c_ast.Continue, c_ast.Goto, c_ast.Return, c_ast.Label)):
            word = type(node).__name__.lower()
            raise ctx.refuse(f"'{word}' inside the nest is an early exit or jump; a rewrite cannot keep its meaning",
                             node)
        elif isinstance(node, (c_ast.While, c_ast.DoWhile)):
            raise ctx.refuse("a while/do loop inside the nest has no affine trip count", node)
        elif isinstance(node, c_ast.Switch):
            raise ctx.refuse("a switch statement inside the nest is outside the model", node)
        else:
            raise ctx.refuse(f"{type(node).__name__} inside the nest is outside the model", node)

    def inner_for(self, node: c_ast.For, path: tuple[int | str, ...]) -> None:
        ctx = self.ctx
        site = next((s for s in ctx.tu.loops() if s.node is node), None)
        loop = extract_loop(ctx, node, site.token_index if site else None)
        if loop.iterator in ctx.iterators:
            raise ctx.refuse(f"loop '{loop.iterator}' reuses the iterator of an enclosing loop", node)
        if not loop.declared_in_for:
            ctx.outer_declared.append(loop.iterator)
        ctx.inner.append(loop)
        ctx.iterators.append(loop.iterator)
        ctx.locals_.append({})
        self.stmt(node.stmt, path + (loop.iterator, 0))
        ctx.locals_.pop()
        ctx.iterators.pop()

    def decl(self, node: c_ast.Decl, path: tuple[int | str, ...]) -> None:
        ctx = self.ctx
        t = ctx.types.of(node.type)
        if "static" in (node.storage or []) or "extern" in (node.storage or []):
            raise ctx.refuse(f"the declaration of '{node.name}' inside the nest is static or extern", node)
        if t.volatile or t.scalar_elem().volatile:
            raise ctx.refuse(f"'{node.name}' is volatile", node)
        if t.kind not in ("int", "float", "array"):
            raise ctx.refuse(f"the local '{node.name}' is not a number or an array of numbers", node)
        key = f"{node.name}@{node.coord.line}" + ("" if len(ctx.locals_) < 2 else f".{len(ctx.locals_)}")
        ndims = t.ndims if t.kind == "array" else 0
        elem = t.elem if t.kind == "array" else t
        # A block-local variable is private to one iteration of every enclosing loop of the nest:
        # the model indexes it by those iterators (prefix dimensions).
        ctx.arrays[key] = ArrayInfo(key, node.name, elem, ndims + len(ctx.iterators), local=True)
        ctx.locals_[-1][node.name] = key
        if node.init is not None:
            if isinstance(node.init, c_ast.InitList):
                raise ctx.refuse(f"the initialiser list of '{node.name}' is outside the model", node)
            if ndims:
                raise ctx.refuse(f"the local array '{node.name}' has an initialiser", node)
            self.accesses = []
            self.expr(node.init)
            self.accesses.append(Access(key, tuple(Affine.symbol(i) for i in ctx.iterators), True))
            self._finish(node, path)

    def leaf(self, node: c_ast.Node, path: tuple[int | str, ...], at: c_ast.Node) -> None:
        self.accesses = []
        self.expr(node)
        self._finish(at, path)

    def _finish(self, at: c_ast.Node, path: tuple[int | str, ...]) -> None:
        ctx = self.ctx
        line = at.coord.line if at.coord else ctx.site.line
        col = _column_on_line(ctx.tu, line, at) or 1
        name = f"S{len(ctx.statements) + 1}"
        ctx.statements.append(Statement(name, line, col, tuple(ctx.iterators), path, tuple(self.accesses)))

    # -- expressions
    def expr(self, node: c_ast.Node) -> None:
        ctx = self.ctx
        if isinstance(node, c_ast.Assignment):
            if node.op != "=":
                self.lvalue(node.lvalue, write=False)
            self.expr(node.rvalue)
            self.lvalue(node.lvalue, write=True)
        elif isinstance(node, c_ast.UnaryOp):
            if node.op in ("++", "--", "p++", "p--"):
                self.lvalue(node.expr, write=False)
                self.lvalue(node.expr, write=True)
            elif node.op == "&":
                raise ctx.refuse("taking an address inside the nest (&) is a pointer trick the analysis cannot follow",
                                 node)
            elif node.op == "*":
                raise ctx.refuse("a pointer dereference inside the nest is outside the model; write it as an array "
                                 "element with an affine subscript", node)
            elif node.op == "sizeof":
                pass
            else:
                self.expr(node.expr)
        elif isinstance(node, c_ast.BinaryOp):
            self.expr(node.left)
            self.expr(node.right)
        elif isinstance(node, c_ast.TernaryOp):
            self.expr(node.cond)
            self.expr(node.iftrue)
            self.expr(node.iffalse)
        elif isinstance(node, c_ast.Cast):
            self.expr(node.expr)
        elif isinstance(node, c_ast.ExprList):
            for e in node.exprs:
                self.expr(e)
        elif isinstance(node, c_ast.FuncCall):
            self.call(node)
        elif isinstance(node, (c_ast.ID, c_ast.ArrayRef)):
            self.lvalue(node, write=False)
        elif isinstance(node, c_ast.Constant):
            pass
        elif isinstance(node, c_ast.StructRef):
            raise ctx.refuse("struct member access inside the nest is outside the model", node)
        else:
            raise ctx.refuse(f"{type(node).__name__} inside the nest is outside the model", node)

    def call(self, node: c_ast.FuncCall) -> None:
        ctx = self.ctx
        name = node.name.name if isinstance(node.name, c_ast.ID) else None
        sym = ctx.scope.get(name) if name else None
        pure = name is not None and (
            name in ctx.assume_pure or (name in PURE and sym is not None and sym.kind == "function" and sym.system)
        )
        if not pure:
            raise ctx.refuse(
                f"the call to '{name or 'a function pointer'}' may have side effects the analysis cannot see; "
                f"if it is pure, say so with --assume-pure {name or 'NAME'}", node)
        for a in (node.args.exprs if node.args else []):
            self.expr(a)

    def lvalue(self, node: c_ast.Node, write: bool) -> None:
        ctx = self.ctx
        subs: list[c_ast.Node] = []
        base = node
        while isinstance(base, c_ast.ArrayRef):
            subs.insert(0, base.subscript)
            base = base.name
        if not isinstance(base, c_ast.ID):
            if isinstance(base, c_ast.StructRef):
                raise ctx.refuse("struct member access inside the nest is outside the model", base)
            raise ctx.refuse("an element whose base is not a named array is outside the model", node)
        name = base.name
        for s in subs:
            self.expr(s)
        if name in ctx.iterators and not subs:
            if write:
                raise ctx.refuse(f"the body writes the iterator '{name}'", node)
            return
        if name in _outer_iterators(ctx) and not subs and not write:
            return
        key, info = self.array_of(name, base, len(subs))
        affs = []
        for s in subs:
            try:
                a, t, obl = int_affine(ctx, s)
            except NotAffine as exc:
                raise ctx.refuse(f"a subscript of '{name}' is not an affine function of the loop iterators and "
                                 f"parameters; {exc.reason}", exc.node or s) from None
            line = s.coord.line if s.coord else ctx.site.line
            col = _column_on_line(ctx.tu, line, node) or 1
            for o in obl:
                ctx.obligations.append(Obligation(o, tuple(ctx.iterators), line, col, f"a subscript of '{name}'"))
            affs.append(a)
        if info.local:
            affs = [Affine.symbol(i) for i in ctx.iterators[: info.ndims - len(affs)]] + affs
        if write and not subs:
            ctx.written.setdefault(name, node)
        self.accesses.append(Access(key, tuple(affs), write))

    def array_of(self, name: str, node: c_ast.Node, nsubs: int) -> tuple[str, ArrayInfo]:
        ctx = self.ctx
        for scope in reversed(ctx.locals_):
            if name in scope:
                info = ctx.arrays[scope[name]]
                if info.ndims - (len(ctx.iterators) if False else 0) < nsubs:
                    raise ctx.refuse(f"'{name}' has fewer dimensions than subscripts", node)
                return info.key, info
        sym = ctx.scope.get(name)
        if sym is None or sym.kind not in ("param", "local", "global"):
            raise ctx.refuse(f"'{name}' is not a variable the analysis knows", node)
        t = sym.ctype
        if t.volatile or t.scalar_elem().volatile:
            raise ctx.refuse(f"'{name}' is volatile; its accesses must not be reordered", node)
        if t.kind in ("int", "float"):
            ndims, elem = 0, t
        elif t.kind in ("array", "pointer"):
            ndims, elem = _dims(t)
        else:
            raise ctx.refuse(f"'{name}' is not an array or a number", node)
        if nsubs != ndims:
            raise ctx.refuse(f"'{name}' has {ndims} dimension(s) but is used with {nsubs} subscript(s); "
                             "a partial subscript or a pointer-typed element is outside the model", node)
        if elem.kind not in ("int", "float"):
            raise ctx.refuse(f"the elements of '{name}' are not numbers", node)
        info = ctx.arrays.setdefault(name, ArrayInfo(name, name, elem, ndims, restrict=t.restrict))
        return name, info


def _dims(t: CType) -> tuple[int, CType]:
    n = 0
    while t.kind in ("array", "pointer") and t.elem is not None:
        n += t.ndims
        t = t.elem
    return n, t


# ---------------------------------------------------------------- the nest

_TYPES: dict[int, TypeTable] = {}
_SCOPES: dict[int, dict[int, dict[str, Symbol]]] = {}


def _scope_of(tu: TranslationUnit, site: LoopSite) -> tuple[TypeTable, dict[str, Symbol]]:
    types = _TYPES.setdefault(id(tu.ast), TypeTable(tu.ast))
    func = next(f for f in tu.functions if f.name == site.function)
    key = id(func.node)
    if key not in _SCOPES:
        _SCOPES[key] = visible_at_loops(tu.ast, types, func.node)
    return types, _SCOPES[key][id(site.node)]


def _single_for(node: c_ast.Node) -> c_ast.For | None:
    if isinstance(node, c_ast.For):
        return node
    if isinstance(node, c_ast.Compound) and node.block_items and len(node.block_items) == 1:
        only = node.block_items[0]
        return only if isinstance(only, c_ast.For) else None
    return None


def build_nest(tu: TranslationUnit, site: LoopSite, assume_pure: frozenset[str] = frozenset()) -> Nest:
    """The model of the nest whose outermost loop is ``site``, or a Refusal."""
    types, scope = _scope_of(tu, site)
    ctx = _Ctx(tu, site, scope, types, assume_pure)
    perfect: list[Loop] = []
    node, s = site.node, site
    while True:
        loop = extract_loop(ctx, node, s.token_index)
        if loop.iterator in ctx.iterators:
            raise ctx.refuse(f"loop '{loop.iterator}' reuses the iterator of an enclosing loop", node)
        perfect.append(loop)
        ctx.iterators.append(loop.iterator)
        if not loop.declared_in_for:
            ctx.outer_declared.append(loop.iterator)
        nxt = _single_for(node.stmt)
        if nxt is None:
            break
        s = next(c for c in s.children if c.node is nxt)
        node = nxt
    body = _Body(ctx)
    ctx.locals_.append({})
    body.stmt(node.stmt, ())
    _check_writes(ctx)
    _check_altered(ctx, perfect[0])
    outer = perfect[0]
    innermost = perfect[-1]
    comments, pps = [], []
    for t in tu.all_tokens:
        if t.start < outer.for_offset or t.end > outer.body_end:
            continue
        if innermost.body_start <= t.start < innermost.body_end:
            continue
        if any(lp.start.start <= t.start < lp.start.end or lp.limit.start <= t.start < lp.limit.end for lp in perfect):
            continue
        if t.kind == "comment":
            comments.append(t.text)
        elif t.kind == "pp":
            pps.append(t)
    if pps:
        raise ctx.refuse("a preprocessor line between the loop headers would be detached by the rewrite",
                         offset=pps[0].start)
    _check_pragma_on(ctx, outer)
    macros = _subscript_macros(tu, innermost)
    return Nest(
        path=tu.source.path, function=site.function, line=outer.line, col=outer.col,
        start=outer.for_offset, end=outer.body_end, perfect=tuple(perfect), inner=tuple(ctx.inner),
        statements=tuple(ctx.statements), params=tuple(ctx.params.values()), arrays=tuple(ctx.arrays.values()),
        context=tuple(_enclosing_context(tu, site, assume_pure)), obligations=tuple(ctx.obligations),
        header_comments=tuple(comments), outer_declared=tuple(ctx.outer_declared), macros_used=tuple(macros),
    )


def _subscript_macros(tu: TranslationUnit, innermost: Loop) -> list[tuple[str, str]]:
    """Integer macros spelled inside subscripts of the body: the proof used their values."""
    out: list[tuple[str, str]] = []
    depth = 0
    for t in tu.tokens:
        if not innermost.body_start <= t.start < innermost.body_end:
            continue
        if t.text == "[":
            depth += 1
        elif t.text == "]":
            depth -= 1
        elif depth > 0 and t.kind == "id" and t.text in tu.macros:
            body_text = tu.macros[t.text].strip("() ")
            if body_text.lstrip("-").isdigit() and (t.text, body_text) not in out:
                out.append((t.text, body_text))
    return out


def _check_pragma_on(ctx: _Ctx, outer: Loop) -> None:
    """A pragma right before the nest applies to its outermost loop; a rewrite would move it."""
    prev = None
    for t in ctx.tu.all_tokens:
        if t.start >= outer.for_offset:
            break
        if t.kind != "comment":
            prev = t
    if prev is not None and prev.kind == "pp" and re.match(r"#\s*pragma\b", prev.text):
        name = " ".join(prev.text.split())
        raise ctx.refuse(f"'{name}' applies to this loop nest; the rewrite would attach it to a different loop, "
                         "so looptile leaves the nest alone (remove the pragma, tile, then add it back where it "
                         "belongs)", offset=prev.start)


def _check_altered(ctx: _Ctx, outer: Loop) -> None:
    """Refuse when the header flags changed the code of this function or a declaration it uses."""
    tu = ctx.tu
    if not tu.altered:
        return
    starts = sorted(f.node.coord.line for f in tu.functions)
    func = next(f for f in tu.functions if f.name == ctx.site.function)
    first = func.node.coord.line
    later = [ln for ln in starts if ln > first]
    last = later[0] - 1 if later else len(tu.source.line_starts)
    used = set(ctx.arrays) | set(ctx.params) | {a.name for a in ctx.arrays.values()}
    for line in sorted(tu.altered):
        inside = first <= line <= last
        names = {t.text for t in tokenize(tu.source.line_text(line)) if t.kind == "id"}
        if inside or (line < first and names & used):
            raise Refusal(
                "cannot analyse this nest faithfully; the flags that make the system headers parseable "
                "(for example -U__GNUC__) change the code here (a __GNUC__ branch, an attribute, or a macro "
                "such as assert that expands differently)",
                path=tu.source.path, line=line, column=1, source_line=tu.source.line_text(line))


def _check_writes(ctx: _Ctx) -> None:
    for name, node in ctx.written.items():
        if name in ctx.used_as_param:
            raise ctx.refuse(f"the nest writes '{name}', which a loop bound or subscript reads; "
                             "the trip counts would change while the loops run", node)
        if name in _outer_iterators(ctx):
            raise ctx.refuse(f"the nest writes '{name}', the iterator of an enclosing loop", node)


def _enclosing_context(tu: TranslationUnit, site: LoopSite, assume_pure: frozenset[str]) -> list[str]:
    """Constraints on the iterators of the loops around the nest (they are parameters here)."""
    out: list[str] = []
    chain = []
    s = site.parent
    while s is not None:
        chain.insert(0, s)
        s = s.parent
    for anc in chain:
        try:
            types, scope = _scope_of(tu, anc)
            ctx = _Ctx(tu, anc, scope, types, assume_pure)
            lp = extract_loop(ctx, anc.node, anc.token_index)
        except Refusal:
            continue
        if set(ctx.params) - {p for p in ctx.params if not p.startswith("$")} or lp.step != 1:
            continue
        x = lp.iterator
        lo, hi = lp.start.value.render(), lp.limit.value.render()
        if lp.direction > 0:
            out.append(f"{lo} <= {x} and {x} {lp.op} {hi}")
        else:
            out.append(f"{lo} >= {x} and {x} {lp.op} {hi}")
    return out


def live_after(tu: TranslationUnit, nest: Nest, name: str) -> int | None:
    """Offset of a use of ``name``'s value after the nest (or before it, in an enclosing loop)."""
    func = next(f for f in tu.functions if f.name == nest.function)
    site = next(s for s in func.loops if s.token_index is not None and tu.tokens[s.token_index].start == nest.start)
    top = site
    while top.parent is not None:
        top = top.parent
    top_start = tu.tokens[top.token_index].start if top.token_index is not None else nest.start
    end_line = func.node.body.coord.line if func.node.body.coord else 0
    regions = [(nest.end, None)]
    if top is not site:
        regions.insert(0, (top_start, nest.start))
    toks = tu.tokens
    for begin, stop in regions:
        depth = 0
        for k, t in enumerate(toks):
            if t.start < begin or (stop is not None and t.start >= stop):
                continue
            if t.text == "{":
                depth += 1
            elif t.text == "}":
                depth -= 1
                if depth < -_depth_at(toks, begin, func_line=end_line):
                    break
            if t.kind == "id" and t.text == name:
                nxt = toks[k + 1].text if k + 1 < len(toks) else ""
                if nxt == "=" and stop is None:
                    break  # assigned before any use: the old value is dead
                return t.start
    return None


def _depth_at(toks: list[Token], offset: int, func_line: int) -> int:
    """Brace depth inside the function at ``offset`` (number of open blocks)."""
    depth = 0
    for t in toks:
        if t.start >= offset:
            break
        if t.text == "{":
            depth += 1
        elif t.text == "}":
            depth -= 1
    return depth - 1
