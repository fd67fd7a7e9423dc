"""From a paired ``for`` statement to the model: the nest, its checks, iterator liveness.

Everything outside the model is a ``Refusal`` that names the construct at
``file:line:col`` with the reason (see affine.py, headers.py, body.py).
"""
from __future__ import annotations

import re
from dataclasses import replace

from pycparser import c_ast

from . import pragmas
from .affine import Ctx, outer_iterators
from .body import BodyWalker
from .ctype import TypeTable
from .errors import Refusal
from .frontend import LoopSite, TranslationUnit
from .headers import extract_loop
from .model import Affine, Loop, Nest, Obligation
from .scope import Symbol, visible_at_loops
from .source import tokenize


def _scope_of(tu: TranslationUnit, site: LoopSite) -> tuple[TypeTable, dict[str, Symbol]]:
    """Types and visible declarations at ``site``, computed once per translation unit."""
    if "types" not in tu.cache:
        tu.cache["types"] = TypeTable(tu.ast)
    types = tu.cache["types"]
    func = next(f for f in tu.functions if f.name == site.function)
    key = ("scopes", func.name)
    if key not in tu.cache:
        tu.cache[key] = visible_at_loops(tu.ast, types, func.node, tu.cache)
    return types, tu.cache[key][id(site.node)]


def single_for(node: c_ast.Node) -> c_ast.For | None:
    if isinstance(node, c_ast.For):
        return node
    if isinstance(node, c_ast.Compound) and node.block_items and len(node.block_items) == 1:
        only = node.block_items[0]
        return only if isinstance(only, c_ast.For) else None
    return None


def build_nest(tu: TranslationUnit, site: LoopSite, assume_pure: frozenset[str] = frozenset(),
               directive: int | None = None, keep_pragmas: bool = False) -> Nest:
    """The model of the nest whose outermost loop is ``site``, or a Refusal.

    ``keep_pragmas``: the job places the pragmas on and in the nest itself (pragmas.py); a pragma
    right before an inner perfect loop then does not end the perfect nest, and loop hints
    inside the body are accepted. Otherwise every pragma on or in the nest is refused.

    ``directive``: the offset of a pragma right before the nest that the rewrite carries out
    (and removes); any other pragma on the nest is still refused."""
    types, scope = _scope_of(tu, site)
    ctx = Ctx(tu, site, scope, types, assume_pure)
    func = next(f for f in tu.functions if f.name == site.function)
    if func.node.param_decls:
        raise ctx.refuse(f"'{site.function}' is an old-style (K&R) definition, whose parameter types looptile does "
                         "not read; declare the parameters in the prototype", func.node.decl)
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
        nxt = single_for(node.stmt)
        if nxt is None and keep_pragmas:
            nxt = pragmas.for_after_pragmas(node.stmt)
        if nxt is None:
            break
        s = next(c for c in s.children if c.node is nxt)
        node = nxt
    body = BodyWalker(ctx)
    if keep_pragmas:
        body.pragma_check = lambda n: pragmas.check_body_pragma(ctx, n)
    ctx.locals_.append({})
    body.stmt(node.stmt, ())
    _check_writes(ctx)
    _check_shapes(ctx)
    _check_altered(ctx, perfect[0])
    outer = perfect[0]
    innermost = perfect[-1]
    comments, pps = [], []
    for t in tu.all_between(outer.for_offset, outer.body_end):
        if innermost.body_start <= t.start < innermost.body_end:
            continue
        if t.kind == "comment":
            comments.append(t.text)
        elif t.kind == "pp":
            pps.append(t)
    if pps and keep_pragmas:
        pps = pragmas.between_headers(tu, pps, perfect)
    if pps:
        raise ctx.refuse("a preprocessor line between the loop headers would be detached by the rewrite",
                         offset=pps[0].start)
    if not keep_pragmas:
        _check_pragma_on(ctx, outer.for_offset, directive)
    macros = _subscript_macros(tu, innermost)
    return Nest(
        path=tu.source.path, function=site.function, line=outer.line, col=outer.col,
        start=outer.for_offset, end=outer.body_end, perfect=tuple(perfect), inner=tuple(ctx.inner),
        statements=tuple(ctx.statements), params=tuple(ctx.params.values()), arrays=tuple(ctx.arrays.values()),
        context=tuple(_enclosing_context(tu, site, assume_pure)), obligations=tuple(ctx.obligations),
        in_row=tuple(ctx.in_row),
        header_comments=tuple(comments), outer_declared=tuple(ctx.outer_declared), macros_used=tuple(macros),
    )


def _subscript_macros(tu: TranslationUnit, innermost: Loop) -> list[tuple[str, str]]:
    """Integer macros spelled inside subscripts of the body: the proof used their values."""
    out: list[tuple[str, str]] = []
    depth = 0
    for t in tu.code_between(innermost.body_start, innermost.body_end):
        if t.text == "[":
            depth += 1
        elif t.text == "]":
            depth -= 1
        elif depth > 0 and t.kind == "id" and t.text in tu.macros:
            body_text = tu.macros[t.text].strip("() ")
            if body_text.lstrip("-").isdigit() and (t.text, body_text) not in out:
                out.append((t.text, body_text))
    return out


def _check_pragma_on(ctx: Ctx, offset: int, directive: int | None) -> None:
    """A pragma right before the nest applies to its outermost loop; a rewrite would move it.
    The directive being carried out is skipped (a pragma before it would apply to the loops it
    generates: refused too)."""
    prev = ctx.tu.token_before(offset, skip=("comment",))
    if prev is not None and directive is not None and prev.start == directive:
        prev = ctx.tu.token_before(prev.start, skip=("comment",))
    if prev is not None and prev.kind == "pp" and re.match(r"#\s*pragma\b", prev.text):
        name = " ".join(prev.text.split())
        raise ctx.refuse(f"'{name}' applies to this loop nest; the rewrite would attach it to a different loop, "
                         "so looptile leaves the nest alone (remove the pragma, tile, then add it back where it "
                         "belongs)", offset=prev.start)


def _check_altered(ctx: Ctx, outer: Loop) -> None:
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


def _check_shapes(ctx: Ctx) -> None:
    """Every access of a flattened array must use the same row lengths (one linearisation):
    only then are two accesses the same element exactly when their recovered subscripts are.
    The array then has the recovered number of dimensions."""
    spell = {p.name: p.text for p in ctx.params.values()}
    for key, seen in ctx.shapes.items():
        shapes = {r for r, _, _ in seen}
        if len(shapes) == 1 or (len(shapes) == 2 and () in shapes and all(len(r) <= 1 for r in shapes)):
            continue  # one linearisation (affine subscripts of a one-row-length array are divided too)
        first = next(x for x in seen if x[0])
        other = next(x for x in seen if x[0] != first[0])
        info = ctx.arrays[key]

        def how(x, name: str = info.name) -> str:
            return (f"{name}[{x[2]}] (rows of " + " x ".join(spell.get(r, r) for r in x[0]) + ")") if x[0] \
                else f"{name}[{x[2]}] (one dimension)"
        line, col = other[1]
        raise Refusal(f"'{info.name}' is accessed as {how(other)} here and as {how(first)} at "
                      f"{first[1][0]}:{first[1][1]}; "
                      "the two linearisations cannot be compared element by element, so the dependences between "
                      "them are unknown", path=ctx.tu.source.path, line=line, column=col,
                      source_line=ctx.tu.source.line_text(line))
    for key, seen in ctx.shapes.items():
        rows = next((r for r, _, _ in seen if r), ())
        if rows:
            info = ctx.arrays[key]
            ctx.arrays[key] = replace(info, ndims=1 + len(rows), rows=tuple(spell.get(r, r) for r in rows))
            _divide_affine(ctx, key, seen, rows[0])


def _divide_affine(ctx: Ctx, key: str, seen, row: str) -> None:
    """Affine subscripts of an array flattened with one row length (``A[3*ld + j]``, ``A[j]``)
    are divided by it too: ``(3, j)``, ``(0, j)``, with the same in-row obligations."""
    k = 0
    statements = []
    for st in ctx.statements:
        accesses = []
        for acc in st.accesses:
            if acc.array == key:
                _, (line, col), text = seen[k]
                k += 1
                if len(acc.subscripts) == 1:
                    a = acc.subscripts[0]
                    quotient = a.coeff(row)
                    rest = a - Affine.symbol(row).scale(quotient)
                    its = [c for n, c in rest.terms if n in st.loops]
                    if quotient > 0 and its and all(c < 0 for c in its):  # a row walked backwards
                        quotient, rest = quotient - 1, rest + Affine.symbol(row)
                    length = next(p.text for p in ctx.params.values() if p.name == row)
                    what = f"the subscript {ctx.arrays[key].name}[{text}] stays in its row of {length} elements"
                    ctx.in_row.append(Obligation(rest, st.loops, line, col, what))
                    ctx.in_row.append(Obligation(Affine.symbol(row) - rest - Affine(const=1), st.loops, line, col,
                                                 what))
                    acc = replace(acc, subscripts=(Affine(const=quotient), rest))
            accesses.append(acc)
        statements.append(replace(st, accesses=tuple(accesses)))
    ctx.statements[:] = statements


def _check_writes(ctx: Ctx) -> None:
    arrays = {a.key: a.name for a in ctx.arrays.values() if not a.local}
    for st in ctx.statements:  # an array element a bound reads (an opaque bound such as len[0])
        for acc in st.accesses:
            name = arrays.get(acc.array)
            if acc.write and name in ctx.used_as_param:
                raise ctx.refuse(f"the nest writes elements of '{name}', which a loop bound reads; the trip counts "
                                 "could change while the loops run", offset=_statement_offset(ctx, st))
    for name, node in ctx.written.items():
        if name in ctx.used_as_param:
            raise ctx.refuse(f"the nest writes '{name}', which a loop bound or subscript reads; "
                             "the trip counts would change while the loops run", node)
        if name in outer_iterators(ctx):
            raise ctx.refuse(f"the nest writes '{name}', the iterator of an enclosing loop", node)


def _statement_offset(ctx: Ctx, st) -> int:
    return ctx.tu.source.offset(st.line, st.col)


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
            ctx = Ctx(tu, anc, scope, types, assume_pure)
            lp = extract_loop(ctx, anc.node, anc.token_index)
        except Refusal:
            continue
        if any(p.kind == "opaque" for p in ctx.params.values()) or lp.step != 1:
            continue  # only plain affine bounds say something useful about the parameters
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
    toks = tu.tokens
    # Up to the end of the function: the brace depth at the nest's end says how many blocks to close.
    open_blocks = sum(1 if t.text == "{" else -1 if t.text == "}" else 0 for t in toks[:tu.code_index(nest.end)])
    regions: list[tuple[int, int | None]] = [(nest.end, None)]
    if top is not site and top.token_index is not None:
        regions.insert(0, (toks[top.token_index].start, nest.start))
    for begin, stop in regions:
        depth = 0
        first = tu.code_index(begin)
        last = tu.code_index(stop) if stop is not None else len(toks)
        for k in range(first, last):
            t = toks[k]
            if t.text == "{":
                depth += 1
            elif t.text == "}":
                depth -= 1
                if depth <= -open_blocks:  # the function's closing brace
                    break
            if t.kind == "id" and t.text == name:
                nxt = toks[k + 1].text if k + 1 < len(toks) else ""
                if nxt == "=" and stop is None:
                    break  # assigned before any use: the old value is dead
                return t.start
    return None
