"""Loop headers: ``for (init; condition; step)`` to a ``Loop`` of the model."""
from __future__ import annotations

from pycparser import c_ast

from .affine import Ctx, expr_type, loop_bound, opaque_param
from .ctype import CType, common_int_type, literal_value
from .model import Affine, Bound, Loop, Obligation
from .source import Token, match_close, statement_end


def _split_header(ctx: Ctx, idx: int) -> tuple[list[list[Token]], int]:
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


def _step(ctx: Ctx, nxt: c_ast.Node, it: str) -> tuple[int, int]:
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


def extract_loop(ctx: Ctx, node: c_ast.For, idx: int | None) -> Loop:
    """One loop header: iterator, bounds in the model, step, direction, byte spans."""
    if idx is None:
        raise ctx.refuse("this for loop cannot be matched to the source text (it comes from a macro)", node)
    toks = ctx.tu.tokens
    (init_t, cond_t, _), close = _split_header(ctx, idx)
    it, ctype, in_for, start_node = _iterator(ctx, node, init_t)
    step, direction = _step(ctx, node.next, it)
    op, limit_node, limit_t = _condition(ctx, node.cond or node, cond_t, it, ctype, step, direction)
    eq = next((k for k, t in enumerate(init_t) if t.text == "="), None)
    if eq is None:
        raise ctx.refuse(f"cannot find the initial value of '{it}' in the source", node)
    outer = tuple(ctx.iterators)
    ctx.loop_types[it] = ctype
    start = loop_bound(ctx, start_node, init_t[eq + 1:], None, "initial value", outer)
    limit = _compared_as(ctx, node, it, ctype, limit_node,
                         loop_bound(ctx, limit_node, limit_t, None, "bound", outer), outer)
    body_idx = close + 1
    body_last = statement_end(toks, body_idx)
    if body_last < 0:
        raise ctx.refuse(f"cannot find the end of the body of loop '{it}' in the source", node)
    line, col = ctx.tu.source.line_col(toks[idx].start)
    return Loop(it, ctype, in_for, start, limit, op, step, direction, line, col,
                toks[idx].start, toks[close].end, toks[body_idx].start, toks[body_last].end)


def _iterator(ctx: Ctx, node: c_ast.For, init_t: list[Token]) -> tuple[str, CType, bool, c_ast.Node]:
    """The iterator, its type, whether the for declares it, and its initial value's AST."""
    init = node.init
    if isinstance(init, c_ast.DeclList) and len(init.decls) == 1 and init.decls[0].init is not None:
        d = init.decls[0]
        it, ctype, in_for, start_node = d.name, ctx.types.of(d.type, _type_spelling(init_t, d.name)), True, d.init
    elif isinstance(init, c_ast.Assignment) and init.op == "=" and isinstance(init.lvalue, c_ast.ID):
        it = init.lvalue.name
        sym = ctx.scope.get(it)
        if sym is None:
            raise ctx.refuse(f"the iterator '{it}' is not declared", init)
        ctype, in_for, start_node = sym.ctype, False, init.rvalue
        if sym.kind != "local" or "static" in sym.storage:
            raise ctx.refuse(f"the iterator '{it}' is not a local variable of the function", init)
    else:
        raise ctx.refuse("the loop must initialise exactly one iterator (int i = ... or i = ...)", node)
    if not ctype.is_int:
        raise ctx.refuse(f"the iterator '{it}' is not of an integer type", node)
    if ctype.volatile:
        raise ctx.refuse(f"the iterator '{it}' is volatile", node)
    if ctype.bits < 32:
        raise ctx.refuse(f"the iterator '{it}' is narrower than int (it is promoted in arithmetic)", node)
    return it, ctype, in_for, start_node


def _condition(ctx: Ctx, cond: c_ast.Node, cond_t: list[Token], it: str, ctype: CType, step: int,
               direction: int) -> tuple[str, c_ast.Node, list[Token]]:
    """The comparison as ``it OP limit``: the operator, the limit's AST and its original tokens."""
    if not (isinstance(cond, c_ast.BinaryOp) and cond.op in ("<", "<=", ">", ">=", "!=")):
        raise ctx.refuse(f"the condition of loop '{it}' is not one comparison of '{it}' with a bound", cond)
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
    return op, limit_node, limit_t


def _compared_as(ctx: Ctx, node: c_ast.For, it: str, ctype: CType, limit_node: c_ast.Node, limit: Bound,
                 outer: tuple[str, ...]) -> Bound:
    """A comparison in unsigned arithmetic with a signed side is exact only when that side is >= 0."""
    limit_type = expr_type(ctx, limit_node)
    cmp_type = common_int_type(ctype, limit_type)
    if cmp_type.is_unsigned and not ctype.is_unsigned:
        ctx.obligations.append(Obligation(Affine.symbol(it), outer + (it,), node.coord.line, 1,
                                          f"'{it}' compared as an unsigned value"))
    elif cmp_type.is_unsigned and not limit_type.is_unsigned:
        if limit.value.names() & set(ctx.iterators):
            ctx.obligations.append(Obligation(limit.value, outer, node.coord.line, 1,
                                              f"the bound {limit.text} converted to unsigned"))
        else:
            v, _, _ = opaque_param(ctx, limit_node, limit.text, None, cmp_type)
            return Bound(v, limit.text, limit.start, limit.end)
    return limit


def _type_spelling(init_t: list[Token], name: str) -> str:
    words = []
    for t in init_t:
        if t.text == name:
            break
        words.append(t.text)
    return " ".join(w for w in words if w not in ("register",))


