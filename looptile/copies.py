"""Copies of a loop body, made on the text for unroll-and-jam: which bodies can be copied
faithfully, which elements a run of the innermost loop can keep in locals, and the check that
every emitted copy parses to the original body with the substitution done on the syntax tree.
"""
from __future__ import annotations

from pycparser import c_ast, c_generator, c_parser

from . import frontend, toolchain
from .emit_jam import (
    CopySite,
    JamEmitter,
    JamFacts,
    Offsets,
    ScalarGroup,
    expected_items,
    holders_in_order,
    reference_end,
)
from .errors import InternalError, Refusal
from .frontend import TranslationUnit
from .model import Affine, Loop, Nest
from .source import tokenize


def wide_distances(nest: Nest, analysis, iterators) -> frozenset[str]:
    """The unrolled loops whose distance to the bound must be computed unsigned: signed
    iterators whose low end isl cannot prove non-negative."""
    wide = set()
    for it in iterators:
        lp = nest.loop(it)
        low = lp.start.value if lp.direction > 0 else lp.limit.value
        outer = nest.iterators[: nest.iterators.index(it)]
        if not lp.ctype.is_unsigned and not analysis.always_nonnegative(low, outer):
            wide.add(it)
    return frozenset(wide)


def shift_affine(a: Affine, offs: dict[str, int]) -> Affine:
    """``a`` with each iterator x replaced by x + offs[x]."""
    return a + Affine(const=sum(a.coeff(x) * k for x, k in offs.items()))


def scalarizer(tu: TranslationUnit, nest: Nest, analysis, em: JamEmitter, renames: list[str], innermost: str):
    """For one run of the innermost loop with the given copies: the elements to keep in locals.

    An element qualifies when its subscripts use only the loops outside the innermost one, one
    reference to it runs unconditionally in every iteration (so the load and the store touch an
    element the original touches whenever the loop runs), and the analysis proves that no other
    access of the run (any copy, any statement) can touch it."""
    src = tu.source
    target = em.target  # the loop whose body is copied
    varying = {innermost} | {lp.iterator for lp in nest.inner}
    perfect = tuple(nest.iterators)
    refs = []
    for st in nest.statements:
        for a in st.accesses:
            info = nest.array(a.array)
            off = None
            if a.at is not None and not info.local:
                line, col = a.at
                cand = src.line_starts[line - 1] + col - 1
                if target.body_start <= cand < target.body_end and \
                        src.text[cand:cand + len(info.name)] == info.name and \
                        not (src.text[cand + len(info.name): cand + len(info.name) + 1].isalnum()
                             or src.text[cand + len(info.name): cand + len(info.name) + 1] == "_"):
                    off = cand
            refs.append((st, a, off))
    taken = set(tu.identifiers) | set(renames)

    def groups(copies: tuple[Offsets, ...]) -> list[ScalarGroup]:
        cand: dict[tuple, list] = {}
        for n, offs in enumerate(copies):
            d = dict(offs)
            for st, a, off in refs:
                if off is None or nest.array(a.array).local:
                    continue
                if any(x in varying for sub in a.subscripts for x in sub.names()):
                    continue
                key = (a.array, tuple(shift_affine(sub, d) for sub in a.subscripts))
                cand.setdefault(key, []).append((n, st, a, off))
        out: list[ScalarGroup] = []
        used = set(taken)
        for (arr, element), members in cand.items():
            info = nest.array(arr)
            if not info.elem.spelling or not any(not st.guards and st.loops == perfect for _, st, _, _ in members):
                continue
            mine = {(n, off) for n, _, _, off in members}
            safe = True
            for n2, offs2 in enumerate(copies):
                back = {x: -k for x, k in offs2}
                for st, a, off in refs:
                    if a.array != arr or (off is not None and (n2, off) in mine):
                        continue
                    if analysis.may_touch(st, a, tuple(shift_affine(e, back) for e in element)):
                        safe = False
                        break
                if not safe:
                    break
            if not safe:
                continue
            n0, _, _, off0 = members[0]
            text = em.copy_text(copies[n0], n0, (), (off0, reference_end(src.text, off0, target.body_end)))
            k = 0
            while f"{info.name}_{k}" in used:
                k += 1
            name = f"{info.name}_{k}"
            used.add(name)
            writes = [st for _, st, a, _ in members if a.write]
            load = any(not a.write for _, _, a, _ in members) or any(st.guards or st.loops != perfect for st in writes)
            out.append(ScalarGroup(name, info.elem.spelling, text, load, bool(writes),
                                   frozenset(mine), frozenset((n, a.at[0], a.at[1]) for n, _, a, _ in members)))
        return out

    return groups


def body_node(tu: TranslationUnit, for_offset: int) -> c_ast.Node:
    for s in tu.loops():
        if s.token_index is not None and tu.tokens[s.token_index].start == for_offset:
            return s.node.stmt
    raise InternalError("the innermost loop of the nest has no syntax tree node", path=tu.source.path)


def check_body(tu: TranslationUnit, nest: Nest, target: Loop, unrolled: set[str], copies: int,
               body: c_ast.Node) -> list[str]:
    """Refuse bodies whose textual copies would not mean the substituted body; return the
    locals declared at the top of the body (renamed per copy)."""
    src = tu.source

    def refuse(msg: str, offset: int | None = None, node: c_ast.Node | None = None) -> Refusal:
        if node is not None and node.coord is not None:
            line, col = node.coord.line, node.coord.column or 1
        else:
            line, col = src.line_col(offset if offset is not None else target.body_start)
        return Refusal(msg, path=nest.path, line=line, column=col, source_line=src.line_text(line))

    for t in tu.all_between(target.body_start, target.body_end):
        if t.kind == "pp":
            raise refuse("a preprocessor line inside the body would be copied once per copy of the body; "
                         "unrolling this loop is not supported", t.start)
    for n in _walk(body):
        if isinstance(n, c_ast.Decl) and n.name in unrolled:
            raise refuse(f"the local '{n.name}' declared in the body shadows the unrolled iterator "
                         f"'{n.name}'; rename it", node=n)
        if isinstance(n, c_ast.Typedef):
            raise refuse("a typedef inside the body would be declared once per copy", node=n)
    renames: list[str] = []
    if isinstance(body, c_ast.Compound) and copies > 1:
        for item in body.block_items or []:
            if isinstance(item, c_ast.Decl):
                if not item.name:
                    raise refuse("a declaration without a name (a struct or enum type) in the body would be "
                                 "declared once per copy", node=item)
                renames.append(item.name)
                line, col = item.coord.line, item.coord.column or 1
                at = src.line_starts[line - 1] + col - 1
                prev = None
                for t in tu.code_between(target.body_start, min(at, target.body_end)):
                    if t.kind == "id" and t.text == item.name and not (prev is not None and prev.text in (".", "->")):
                        raise refuse(f"the body uses '{item.name}' before it declares its own '{item.name}', so the "
                                     "name means two things in one copy; rename the local", t.start)
                    prev = t
    if renames and tu.flags.c89:
        raise refuse(f"the body declares {', '.join(renames)} and the file is C89: the copies would declare "
                     "after statements", node=body)
    watched = unrolled | set(renames)
    for t in tu.code_between(target.body_start, target.body_end):
        if t.kind == "id" and t.text in tu.macros:
            hit = _macro_mentions(tu, t.text, watched)
            if hit:
                raise refuse(f"the macro '{t.text}' uses '{hit}' in its definition, so copies of the body made by "
                             f"substituting '{hit}' in the text would not change it; pass '{hit}' to the macro as "
                             "an argument or expand it", t.start)
    return renames


def _macro_mentions(tu: TranslationUnit, name: str, watched: set[str], seen: set[str] | None = None) -> str | None:
    """A watched identifier that the macro ``name`` (or a macro it uses) names, outside its
    own parameters."""
    seen = seen if seen is not None else set()
    if name in seen:
        return None
    seen.add(name)
    value = tu.macros.get(name, "")
    params: set[str] = set()
    if value.startswith("\0function-like\0"):
        rest = value[len("\0function-like\0"):]
        plist, _, value = rest.partition(")")
        params = {p.strip() for p in plist.split(",") if p.strip()}
    for t in tokenize(value):
        if t.kind != "id" or t.text in params:
            continue
        if t.text in watched:
            return t.text
        if t.text in tu.macros:
            hit = _macro_mentions(tu, t.text, watched, seen)
            if hit:
                return hit
    return None


def _walk(node: c_ast.Node):
    yield node
    for _, child in node.children():
        yield from _walk(child)


def check_copies(tu: TranslationUnit, nest: Nest, new: bytes, body: c_ast.Node, facts: JamFacts,
                 sites: list[tuple[int, CopySite]], region_lines: tuple[int, int]) -> None:
    """Preprocess and parse the rewritten region again; the loop on each site's line must hold
    the original body with the substitution done on the syntax tree, copy after copy. A
    difference is an internal error: nothing is written."""
    src = tu.source
    pre = toolchain.preprocess_text(new, src.path, tu.flags)
    first, last = region_lines
    region = [f'# {ln} "<stdin>"\n{t}' for ln, t in frontend.main_file_lines(pre, "<stdin>") if first <= ln <= last]
    typedefs = tu.cache["types"].typedefs if "types" in tu.cache else {}
    prelude = "".join(f"typedef int {name};\n" for name in sorted(typedefs))
    fors: list[c_ast.For] | None = None
    try:
        ast = c_parser.CParser().parse(prelude + "void looptile_region_check(void) {\n" + "\n".join(region) + "\n}\n",
                                       "<region>")
        fors = holders_in_order(ast.ext[-1].body)
    except Exception:  # noqa: BLE001 - fall back to the whole file
        pass
    if fors is None:
        try:
            ast = c_parser.CParser().parse(pre, "<rewritten>")
        except Exception as exc:
            raise InternalError(f"the rewritten nest does not parse ({exc}); this is a looptile bug, please report "
                                "it", path=src.path, line=nest.line, column=nest.col) from exc
        fors = [f for ext in ast.ext if isinstance(ext, c_ast.FuncDef) and ext.decl.name == nest.function
                for f in holders_in_order(ext.body)]
    by_line: dict[tuple[bool, int], c_ast.Node] = {}
    for f in fors:
        if f.coord is not None and f.coord.file == "<stdin>":
            by_line.setdefault((isinstance(f, c_ast.Compound), f.coord.line), f)
    gen = c_generator.CGenerator()
    for line, site in sites:
        node = by_line.get((site.block, line))
        if node is None:
            raise InternalError(f"the rewritten nest has no {'block' if site.block else 'loop'} on line {line} where "
                                "one was emitted; this is a looptile bug", path=src.path, line=nest.line,
                                column=nest.col)
        got = node if site.block else node.stmt
        got_items = list(got.block_items or []) if isinstance(got, c_ast.Compound) else [got]
        if site.block:
            got_items = got_items[site.skip_front: len(got_items) - site.skip_back]
        want = expected_items(body, site.copies, facts, site.scalars)
        if len(got_items) != len(want) or any(gen.visit(a) != gen.visit(b) for a, b in zip(got_items, want)):
            raise InternalError("a copy of the body does not parse to the substituted original; this is a looptile "
                                "bug, please report it with the input file", path=src.path, line=nest.line,
                                column=nest.col)
