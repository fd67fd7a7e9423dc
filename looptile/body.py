"""Loop bodies: statements and their array accesses, or a refusal naming the construct."""
from __future__ import annotations

from pycparser import c_ast

from .affine import (
    AboveMax,
    Ctx,
    NotAffine,
    column_on_line,
    declared_in_nest,
    field_path,
    int_affine,
    outer_iterators,
)
from .ctype import CType
from .flatten import delinearise, polynomial
from .headers import extract_loop
from .model import Access, Affine, ArrayInfo, Condition, Obligation, Statement

# Pure functions of math.h (C11 7.12) that looptile treats as side-effect free.
# Common practice: errno updates on domain errors are ignored (said in the guard comment).
PURE_MATH = frozenset(
    """acos asin atan atan2 cos sin tan acosh asinh atanh cosh sinh tanh exp exp2 expm1
    log log10 log1p log2 logb cbrt fabs hypot pow sqrt erf erfc tgamma lgamma ceil floor
    nearbyint rint round trunc fmod remainder copysign fdim fmax fmin fma ldexp""".split()
)
PURE = PURE_MATH | {f + "f" for f in PURE_MATH} | {f + "l" for f in PURE_MATH}




class BodyWalker:
    """Walks the statements of the nest, collecting statements and their accesses."""

    def __init__(self, ctx: Ctx) -> None:
        self.ctx = ctx
        self.accesses: list[Access] = []
        self.guards: list[Condition | None] = []  # conditions of the enclosing ifs (None: not affine)
        # Called with a pragma inside the nest: refuses it or accepts it in place (pragmas.py);
        # None: every pragma inside the nest is refused.
        self.pragma_check = None

    def affine_condition(self, node: c_ast.Node) -> Condition | None:
        """A condition built from affine comparisons with ``&&``, ``||`` and ``!``; None when it
        is anything else (it then restricts nothing)."""
        if isinstance(node, c_ast.BinaryOp) and node.op in ("&&", "||"):
            left, right = self.affine_condition(node.left), self.affine_condition(node.right)
            if left is None or right is None:
                return None
            return Condition("and" if node.op == "&&" else "or", parts=(left, right))
        if isinstance(node, c_ast.UnaryOp) and node.op == "!":
            inner = self.affine_condition(node.expr)
            return Condition("not", parts=(inner,)) if inner is not None else None
        if not (isinstance(node, c_ast.BinaryOp) and node.op in ("<", "<=", ">", ">=", "==", "!=")):
            return None
        try:
            a, _, oa = int_affine(self.ctx, node.left)
            b, _, ob = int_affine(self.ctx, node.right)
        except NotAffine:
            return None
        if oa or ob:
            return None  # unsigned arithmetic that may wrap: not the integers the model uses
        one = Affine(const=1)
        if node.op == "!=":
            return Condition("not", parts=(Condition("eq", a - b),))
        op, value = {"<": ("ge", b - a - one), "<=": ("ge", b - a), ">": ("ge", a - b - one),
                     ">=": ("ge", a - b), "==": ("eq", a - b)}[node.op]
        return Condition(op, value)

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
            cond = self.affine_condition(node.cond)
            self.guards.append(cond)
            self.stmt(node.iftrue, path + (1,))
            self.guards.pop()
            if node.iffalse is not None:
                self.guards.append(Condition("not", parts=(cond,)) if cond is not None else None)
                self.stmt(node.iffalse, path + (2,))
                self.guards.pop()
        elif isinstance(node, (c_ast.Assignment, c_ast.UnaryOp, c_ast.FuncCall, c_ast.ExprList,
                               c_ast.TernaryOp, c_ast.BinaryOp, c_ast.Cast, c_ast.ID, c_ast.ArrayRef)):
            self.leaf(node, path, node)
        elif isinstance(node, c_ast.EmptyStatement):
            pass
        elif isinstance(node, c_ast.Pragma) and self.pragma_check is not None:
            self.pragma_check(node)
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
        col = column_on_line(ctx.tu, line, at) or 1
        name = f"S{len(ctx.statements) + 1}"
        guards = tuple(g for g in self.guards if g is not None)
        ctx.statements.append(Statement(name, line, col, tuple(ctx.iterators), path, tuple(self.accesses), guards))

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
        elif isinstance(node, (c_ast.ID, c_ast.ArrayRef, c_ast.StructRef)):
            self.lvalue(node, write=False)
        elif isinstance(node, c_ast.Constant):
            pass
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
        member: tuple[str, CType] | None = None
        if isinstance(base, c_ast.StructRef):
            try:
                member = field_path(ctx, base)
            except NotAffine as exc:
                raise ctx.refuse(f"this struct member access is outside the model; {exc.reason}", base) from None
        elif not isinstance(base, c_ast.ID):
            raise ctx.refuse("an element whose base is not a named array is outside the model", node)
        name = member[0] if member else base.name
        for s in subs:
            self.expr(s)
        local = member is None and declared_in_nest(ctx, name)
        if name in ctx.iterators and not subs and not local:
            if write:
                raise ctx.refuse(f"the body writes the iterator '{name}'", node)
            return
        if name in outer_iterators(ctx) and not subs and not write and not local:
            return
        key, info = self.array_of(name, base, len(subs), member[1] if member else None)
        affs: list[Affine] = []
        for s in subs:
            line = s.coord.line if s.coord else ctx.site.line
            col = column_on_line(ctx.tu, line, node) or 1
            try:
                a, t, obl = int_affine(ctx, s)
            except NotAffine as exc:
                if len(subs) == 1 and not info.local:
                    affs.extend(self.flattened(name, key, s, exc, (line, col)))
                    continue
                raise ctx.refuse(f"a subscript of '{name}' is not an affine function of the loop iterators and "
                                 f"parameters; {exc.reason}", exc.node or s) from None
            if len(subs) == 1 and not info.local:
                ctx.shapes.setdefault(key, []).append(((), (line, col), spelled_subscript(ctx, s, (line, col))))
            for o in obl:
                if not isinstance(o, AboveMax):
                    ctx.obligations.append(Obligation(o, tuple(ctx.iterators), line, col,
                                                      f"a subscript of '{name}'"))
            affs.append(a)
        if info.local:
            affs = [Affine.symbol(i) for i in ctx.iterators[: info.ndims - len(affs)]] + affs
        if write and not subs:
            ctx.written.setdefault(name, node)
        root = base
        while isinstance(root, c_ast.StructRef):
            root = root.name
        at = (root.coord.line, root.coord.column) if root.coord is not None and root.coord.column else None
        self.accesses.append(Access(key, tuple(affs), write, at))

    def flattened(self, name: str, key: str, sub: c_ast.Node, why: NotAffine,
                  at: tuple[int, int]) -> list[Affine]:
        """The subscripts of a flattened access ``A[i*ld + j]`` (see flatten.py), with the in-row
        obligations ``0 <= j`` and ``j < ld``; a refusal with the reason when it is not one."""
        ctx = self.ctx
        try:
            poly = polynomial(ctx, sub)
            spell = {p.name: p.text for p in ctx.params.values()}
            indices = {p.name for p in ctx.params.values() if p.kind == "outer-iterator"}
            flat = delinearise(poly.terms, set(ctx.iterators), lambda x: spell.get(x, x), indices)
        except NotAffine as exc:
            reason = why.reason if exc.reason == why.reason else f"{why.reason}, and {exc.reason}"
            raise ctx.refuse(f"a subscript of '{name}' is not an affine function of the loop iterators and "
                             f"parameters; {reason}", sub) from None
        t = poly.narrow or poly.ctype
        for o in poly.obligations:  # as for affine subscripts: a signed value converted to unsigned is >= 0
            ctx.obligations.append(Obligation(o, tuple(ctx.iterators), at[0], at[1], f"a subscript of '{name}'"))
        if t.is_unsigned and t.bits < 64:
            kind = t.spelling or "a narrow unsigned type"
            raise ctx.refuse(f"the flattened subscript of '{name}' is computed in {kind}, where a product that "
                             "wraps around can be a valid index again; compute it in size_t or a signed type", sub)
        text = spelled_subscript(ctx, sub, at)
        loops = tuple(ctx.iterators)
        for k, row in enumerate(flat.rows):
            q = flat.subscripts[k + 1]
            length = next(p.text for p in ctx.params.values() if p.name == row)
            what = f"the subscript {name}[{text}] stays in its row of {length} elements"
            ctx.in_row.append(Obligation(q, loops, at[0], at[1], what))
            ctx.in_row.append(Obligation(Affine.symbol(row) - q - Affine(const=1), loops, at[0], at[1], what))
        ctx.shapes.setdefault(key, []).append((tuple(flat.rows), at, text))
        return list(flat.subscripts)

    def array_of(self, name: str, node: c_ast.Node, nsubs: int,
                 member: CType | None = None) -> tuple[str, ArrayInfo]:
        """The array (or scalar) ``name`` is: a local of the nest, a variable, or a struct member
        (``member`` is its type; the spelling ``g->u`` is its name)."""
        ctx = self.ctx
        for scope in reversed(ctx.locals_):
            if member is None and name in scope:
                info = ctx.arrays[scope[name]]
                if info.ndims < nsubs:
                    raise ctx.refuse(f"'{name}' has fewer dimensions than subscripts", node)
                return info.key, info
        if member is not None:
            t = member
        else:
            sym = ctx.scope.get(name)
            if sym is None or sym.kind not in ("param", "local", "global"):
                raise ctx.refuse(f"'{name}' is not a variable the analysis knows", node)
            t = sym.ctype
        if t.volatile or t.scalar_elem().volatile:
            raise ctx.refuse(f"'{name}' is volatile; its accesses must not be reordered", node)
        if t.kind in ("int", "float"):
            ndims, elem = 0, t
        elif t.kind in ("array", "pointer"):
            ndims, elem = array_dims(t)
        else:
            raise ctx.refuse(f"'{name}' is not an array or a number", node)
        if nsubs != ndims:
            raise ctx.refuse(f"'{name}' has {ndims} dimension(s) but is used with {nsubs} subscript(s); "
                             "a partial subscript or a pointer-typed element is outside the model", node)
        if elem.kind not in ("int", "float"):
            raise ctx.refuse(f"the elements of '{name}' are not numbers", node)
        # Reached through a pointer: a pointer variable or field, or an array parameter (C adjusts
        # its type to a pointer); its elements may then be those of another array of the nest.
        pointer = t.kind == "pointer" or (member is None and t.kind == "array" and sym.kind == "param") or \
            (member is not None and "->" in name)  # a member of a struct reached through a pointer
        info = ctx.arrays.setdefault(name, ArrayInfo(name, name, elem, ndims, restrict=t.restrict,
                                                     pointer=pointer and ndims > 0))
        return name, info


def spelled_subscript(ctx: Ctx, sub: c_ast.Node, at: tuple[int, int] | None = None) -> str:
    """A subscript as the source spells it, for messages: the text between the brackets after
    the access at ``at`` (line, column of its first token); as the preprocessed code spells it
    when that is not found (a macro)."""
    if at is not None:
        src = ctx.tu.source
        start = src.offset(at[0], at[1])
        toks = ctx.tu.code_between(start, start + 4096)
        k = next((n for n, t in enumerate(toks[:8]) if t.text == "["), None)
        if k is not None:
            depth = 0
            for t in toks[k:]:
                depth += {"[": 1, "]": -1}.get(t.text, 0)
                if depth == 0:
                    return " ".join(src.text[toks[k].end:t.start].split())
    from pycparser import c_generator
    return c_generator.CGenerator().visit(sub)


def array_dims(t: CType) -> tuple[int, CType]:
    n = 0
    while t.kind in ("array", "pointer") and t.elem is not None:
        n += t.ndims
        t = t.elem
    return n, t


