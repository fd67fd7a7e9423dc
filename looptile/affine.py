"""From C expressions to affine values: subscripts and loop bounds.

The shared walking context (``Ctx``) lives here too.  Bounds are read from the
original tokens where possible, so that an integer macro stays a symbolic
parameter; otherwise from the AST.  Unsigned arithmetic that could wrap gives
``Obligation``s (checked with isl) or makes a loop-invariant bound opaque.
"""
from __future__ import annotations

from dataclasses import dataclass, field

from pycparser import c_ast

from .ctype import INT, CType, TypeTable, common_int_type, literal_type, literal_value
from .errors import Refusal
from .frontend import LoopSite, TranslationUnit
from .model import Affine, ArrayInfo, Bound, Loop, Obligation, Param, Statement
from .scope import Symbol
from .source import Token, spelled, tokenize


class AboveMax(Affine):
    """An obligation against unsigned wrap-around above the type's maximum.

    Only bounds need it: a subscript that large is outside every object, which is
    undefined behaviour the original program already has."""


class NotAffine(Exception):
    def __init__(self, reason: str, node: c_ast.Node | None = None):
        super().__init__(reason)
        self.reason = reason
        self.node = node


@dataclass
class Ctx:
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
    in_row: list[Obligation] = field(default_factory=list)  # flattened subscripts stay in their rows
    # array key -> (row lengths, (line, col), subscript text) of each access through one subscript
    shapes: dict[str, list[tuple[tuple[str, ...], tuple[int, int], str]]] = field(default_factory=dict)

    def refuse(self, what: str, node: c_ast.Node | None = None, offset: int | None = None) -> Refusal:
        src = self.tu.source
        line, col = None, None
        if offset is not None:
            line, col = src.line_col(offset)
        elif node is not None and node.coord is not None:
            line = node.coord.line
            col = column_on_line(self.tu, line, node) or node.coord.column
        return Refusal(what, path=src.path, line=line, column=col,
                       source_line=src.line_text(line) if line else None)


_KEYWORDS = {c_ast.Break: "break", c_ast.Continue: "continue", c_ast.Goto: "goto", c_ast.Return: "return",
             c_ast.While: "while", c_ast.DoWhile: "do", c_ast.Switch: "switch", c_ast.If: "if",
             c_ast.For: "for", c_ast.Cast: "("}


def first_spelling(node: c_ast.Node) -> str | None:
    """The spelling of the first token of ``node``."""
    while True:
        if isinstance(node, c_ast.ID):
            return node.name
        if isinstance(node, c_ast.Constant):
            return node.value
        if isinstance(node, c_ast.UnaryOp):
            if node.op in ("p++", "p--"):
                node = node.expr
                continue
            return node.op
        if isinstance(node, (c_ast.ArrayRef, c_ast.FuncCall, c_ast.StructRef)):
            node = node.name
            continue
        if isinstance(node, c_ast.BinaryOp):
            node = node.left
            continue
        if isinstance(node, c_ast.Assignment):
            node = node.lvalue
            continue
        if isinstance(node, c_ast.TernaryOp):
            node = node.cond
            continue
        if isinstance(node, c_ast.Decl):
            return node.name
        return _KEYWORDS.get(type(node))


def column_on_line(tu: TranslationUnit, line: int, node: c_ast.Node) -> int | None:
    """Byte column in the original of the first token of ``node``.

    pycparser's column is one of the preprocessed line (macros expanded, tabs as
    they are): find which occurrence of the token's spelling it is there, and take
    the same occurrence on the original line."""
    start = tu.source.offset(line)
    if isinstance(node, c_ast.Pragma):  # `#pragma` line or the `_Pragma` operator
        end = start + len(tu.source.line_text(line)) + 1
        hit = next((t for t in tu.all_between(start, end) if t.text == "_Pragma" or t.kind == "pp"), None)
        return hit.start - start + 1 if hit is not None else None
    if isinstance(node, c_ast.UnaryOp) and node.op not in ("p++", "p--"):
        # pycparser places a prefix operator at its operand: take the operator before it.
        inner = column_on_line(tu, line, node.expr)
        if inner is not None:
            before = [t for t in tu.code_between(start, start + inner - 1) if t.text == node.op]
            if before:
                return before[-1].start - start + 1
        return inner
    want = first_spelling(node)
    if not want:
        return None
    original = [t for t in tu.code_between(start, start + len(tu.source.line_text(line)) + 1) if t.text == want]
    if not original:
        return None
    occurrence = 0
    col = node.coord.column if node.coord is not None else None
    seen = 0
    for fragment in tu.pre_lines.get(line, []):
        toks = [t for t in tokenize(fragment) if t.text == want]
        hit = next((k for k, t in enumerate(toks) if col is not None and t.start == col - 1), None)
        if hit is not None:
            occurrence = seen + hit
            break
        seen += len(toks)
    return original[min(occurrence, len(original) - 1)].start - start + 1


# ---------------------------------------------------------------- affine expressions

def int_affine(ctx: Ctx, node: c_ast.Node) -> tuple[Affine, CType, list[Affine]]:
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
    if isinstance(node, c_ast.StructRef):
        return _field_affine(ctx, node)
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
        if node.op == "-":
            value = a - b
            if t.is_unsigned:
                obl.append(value)  # no wrap-around below zero
        elif node.op == "+":
            value = a + b
        elif a.is_constant():
            value = b.scale(a.const)
        elif b.is_constant():
            value = a.scale(b.const)
        else:
            raise NotAffine("the product of two variables is not affine", node)
        if t.is_unsigned and node.op != "-" and not value.is_constant():
            above = Affine(const=2 ** t.bits - 1) - value  # no wrap-around above the maximum
            obl.append(AboveMax(above.terms, above.const))
        return value, t, obl
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


def declared_in_nest(ctx: Ctx, name: str) -> bool:
    """Is ``name`` a variable declared inside the nest's body (in scope here)? It then hides
    any iterator, parameter or global of that name."""
    return any(name in scope for scope in ctx.locals_)


def _id_affine(ctx: Ctx, node: c_ast.ID) -> tuple[Affine, CType, list[Affine]]:
    name = node.name
    if declared_in_nest(ctx, name):
        raise NotAffine(f"'{name}' is a variable declared inside the nest, whose value the analysis does not "
                        "follow", node)
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
        kind = "outer-iterator" if name in outer_iterators(ctx) else "variable"
        ctx.params.setdefault(name, Param(name, name, sym.ctype, kind))
        return Affine.symbol(name), sym.ctype, []
    raise NotAffine(f"'{name}' is not an integer variable", node)


def field_path(ctx: Ctx, node: c_ast.StructRef) -> tuple[str, CType]:
    """``g->u``, ``grid.n``, ``g->sub.v``: a member reached from a named variable, its canonical
    spelling (the model's name for it) and its type. Anything else is NotAffine with the reason."""
    chain: list[tuple[str, str]] = []
    base: c_ast.Node = node
    while isinstance(base, c_ast.StructRef):
        chain.insert(0, (base.type, base.field.name))
        base = base.name
    if not isinstance(base, c_ast.ID):
        raise NotAffine("the member is reached through an expression, not from a named variable", node)
    name = base.name
    if declared_in_nest(ctx, name) or name in ctx.iterators:
        raise NotAffine(f"'{name}' is a variable of the nest itself", node)
    sym = ctx.scope.get(name)
    if sym is None or sym.kind not in ("param", "local", "global"):
        raise NotAffine(f"'{name}' is not a variable the analysis knows", node)
    t, text = sym.ctype, name
    for op, member in chain:
        if op == "->":
            if t.kind != "pointer" or t.elem is None or t.elem.kind != "struct":
                raise NotAffine(f"'{text}' is not a pointer to a struct", node)
            t = t.elem
        elif t.kind != "struct":
            raise NotAffine(f"'{text}' is not a struct", node)
        if t.volatile:
            raise NotAffine(f"'{text}' is volatile", node)
        found = ctx.types.member(t, member)
        if found is None:
            raise NotAffine(f"the type of member '{member}' of '{text}' is not known", node)
        t, text = found, f"{text}{op}{member}"
    return text, t


def _field_affine(ctx: Ctx, node: c_ast.StructRef) -> tuple[Affine, CType, list[Affine]]:
    """An integer member such as ``g->nx``: one parameter (its C value) named by its spelling."""
    text, t = field_path(ctx, node)
    if not t.is_int:
        raise NotAffine(f"'{text}' is not an integer member", node)
    if t.volatile:
        raise NotAffine(f"'{text}' is volatile", node)
    ctx.used_as_param.setdefault(text, node)
    return Affine.symbol(shared_param(ctx, text, t)), t, []


def shared_param(ctx: Ctx, text: str, ctype: CType) -> str:
    """The model name of the opaque parameter spelled ``text`` (one per spelling: a loop-invariant
    expression has one value wherever the nest spells it)."""
    key = " ".join(text.split())
    for p in ctx.params.values():
        if p.kind == "opaque" and " ".join(p.text.split()) == key:
            return p.name
    name = f"${len([p for p in ctx.params.values() if p.kind == 'opaque'])}"
    ctx.params[name] = Param(name, text, ctype, "opaque")
    return name


def outer_iterators(ctx: Ctx) -> set[str]:
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

def text_affine(ctx: Ctx, toks: list[Token]) -> Affine | None:
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
            if declared_in_nest(ctx, t.text):
                raise NotAffine("local")
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


def loop_bound(ctx: Ctx, node: c_ast.Node, toks: list[Token], at: Loop | None, what: str,
           loops_for_obligation: tuple[str, ...]) -> Bound:
    """A loop bound: its value for the analysis and its spelling for emission."""
    text = spelled(ctx.tu.source.text, toks)  # comments in a bound move before the nest
    try:
        value, t, obl = int_affine(ctx, node)
    except NotAffine as exc:
        value, t, obl = opaque_param(ctx, node, text, exc)
    symbolic = text_affine(ctx, toks)
    if symbolic is not None and not obl:
        value = symbolic
    line, col = ctx.tu.source.line_col(toks[0].start) if toks else (ctx.site.line, 1)
    for o in obl:
        if value.names() & set(ctx.iterators):
            ctx.obligations.append(Obligation(o, loops_for_obligation, line, col, f"the {what} {text}"))
        else:  # loop-invariant: stands for its C value as one opaque parameter
            value, _, _ = opaque_param(ctx, node, text, None, t)
            break
    return Bound(value, text, toks[0].start if toks else 0, toks[-1].end if toks else 0)


def opaque_param(ctx: Ctx, node: c_ast.Node, text: str, why: NotAffine | None,
            t: CType | None = None) -> tuple[Affine, CType, list[Affine]]:
    """A loop-invariant bound expression treated as one fresh parameter (its C value)."""
    names = _ids_in(node)
    if names & set(ctx.iterators) or _has_call_or_write(node):
        reason = why.reason if why else "its C value can wrap around"
        raise ctx.refuse(f"the loop bound '{text}' is outside the model; {reason}", why.node if why else node)
    local = sorted(n for n in names if declared_in_nest(ctx, n))
    if local:
        raise ctx.refuse(f"the loop bound '{text}' is outside the model; it uses '{local[0]}', a variable declared "
                         "inside the nest, whose value the analysis does not follow", node)
    for n in names | _fields_in(ctx, node):
        ctx.used_as_param.setdefault(n, node)
    ctype = t or expr_type(ctx, node)
    return Affine.symbol(shared_param(ctx, text, ctype)), ctype, []


def expr_type(ctx: Ctx, node: c_ast.Node) -> CType:
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


def _fields_in(ctx: Ctx, node: c_ast.Node) -> set[str]:
    """Spellings of the members (``g->len``) an expression reads, for the checks against writes."""
    out: set[str] = set()

    class V(c_ast.NodeVisitor):
        def visit_StructRef(self, n):
            try:
                out.add(field_path(ctx, n)[0])
            except NotAffine:
                pass
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


