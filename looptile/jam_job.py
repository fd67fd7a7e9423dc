"""The jam and unroll jobs from file to new bytes: load, select, model, prove, copy the body,
emit, parse again and compare every copy, splice.

Library code: returns values, raises LooptileError subclasses, never exits.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace

from pycparser import c_ast, c_generator, c_parser

from . import frontend, toolchain
from .emit import Line, render
from .emit_jam import (
    CopySite,
    JamEmitter,
    JamFacts,
    Offsets,
    ScalarGroup,
    expected_items,
    fors_in_order,
    fresh_names,
    plain_forms,
    reference_end,
)
from .errors import InternalError, Refusal
from .frontend import TranslationUnit
from .model import Affine, Nest
from .pipeline import (
    TileOptions,
    _check_not_rewritten,
    _macro_guard,
    analyse,
    describe_witness,
    directive_removal,
    guard_text,
    select,
)
from .source import tokenize
from .splice import Edit, apply_edits
from .transform.jam import JamPlan, JamRequest, plan_jam, plan_unroll  # noqa: F401 - JamRequest re-exported


@dataclass(frozen=True)
class JamOutcome:
    path: str
    original: bytes
    new: bytes
    nest: Nest
    plan: JamPlan
    notes: tuple[str, ...] = field(default=())


def jam(tu: TranslationUnit, sel: str, req: JamRequest, opts: TileOptions, scalarize: bool = False) -> JamOutcome:
    """Unroll-and-jam: each loop of ``req`` unrolled by its factor, the copies jammed into the
    body of the innermost perfectly nested loop; with ``scalarize``, elements that one run of
    that loop keeps touching are kept in locals."""
    return _job(tu, sel, opts, lambda nest: plan_jam(nest, req), scalarize)


def unroll(tu: TranslationUnit, sel: str, factor: int, opts: TileOptions) -> JamOutcome:
    """Plain unrolling of the selected loop (its whole body copied ``factor`` times)."""
    return _job(tu, sel, opts, lambda nest: plan_unroll(nest, factor))


def _job(tu: TranslationUnit, sel: str, opts: TileOptions, make_plan, scalarize: bool = False) -> JamOutcome:
    src = tu.source
    site = select(tu, sel)
    _check_not_rewritten(tu, site, opts)
    nest, analysis = analyse(tu, site, opts.assume_pure, opts.assumptions, opts.directive)
    plan: JamPlan = make_plan(nest)
    if scalarize:
        plan = replace(plan, scalarize=True)
    legality = analysis.check(list(plan.schedule))
    if not legality.legal:
        assert legality.witness is not None
        what = "unrolling " + " and ".join(f"'{it}' by {u}" for it, u in plan.factors) + \
            (" and jamming the copies" if plan.kind == "jam" else "")
        head, details = describe_witness(what, legality.witness, nest)
        raise Refusal(head, path=nest.path, line=nest.line, column=nest.col,
                      source_line=src.line_text(nest.line), details=details)
    if nest.macros_used and src.text[src.line_starts[nest.line - 1]: nest.start].strip():
        raise Refusal("the nest needs a preprocessor guard for the macros its subscripts use, but it does not "
                      "start its own line", path=nest.path, line=nest.line, column=nest.col)
    target = nest.loop(plan.loops[-1])
    body = _body_node(tu, target.for_offset)
    renames = _check_body(tu, nest, plan, body)
    wide = set()
    for it, _ in plan.factors:
        lp = nest.loop(it)
        if lp.ctype.is_unsigned:
            continue
        low = lp.start.value if lp.direction > 0 else lp.limit.value
        if not analysis.always_nonnegative(low, nest.iterators[: nest.iterators.index(it)]):
            wide.add(it)
    facts = JamFacts(frozenset(wide), tu.flags.c89, tuple(renames),
                     fresh_names(renames, plan.copies, tu.identifiers) if renames else ())
    em = JamEmitter(src, target, plain_forms(src, nest, plan, facts), facts, body, src.indent_of(nest.start))
    if scalarize:
        if plan.factor(target.iterator) > 1:
            raise Refusal("--scalarize keeps elements in locals over the runs of the innermost loop "
                          f"'{target.iterator}', which is itself unrolled here; leave it out of --factors",
                          path=nest.path, line=target.line, column=target.col)
        em.scalarize = _scalarizer(tu, nest, analysis, em, renames)
    guard = guard_text(nest, plan, analysis, opts)
    lines = [Line(em.base, ln) for ln in guard.split("\n")]
    lines += [Line(em.base, c.replace("\r\n", "\n")) for c in nest.header_comments]
    lines += em.lines()
    text, prefix = finish_nest_text(src, nest, render("nest.c.j2", lines=lines))
    removed = directive_removal(tu, opts.directive)
    new = apply_edits(src.data, [Edit(nest.start, nest.end, text)] + removed)
    shift = sum(src.line_col(e.end)[0] - src.line_col(e.start)[0] for e in removed)
    first = nest.line - shift + prefix
    check_copies(tu, nest, new, body, facts, [(first + _index(lines, s.header), s) for s in em.sites],
                 (first, first + text.count("\n")))
    notes = [f"assumed: {a}" for a in opts.assumptions]
    if scalarize:
        kept = sorted({g.element for site in em.sites for g in site.scalars})
        notes.append(f"kept in locals during each run of loop '{target.iterator}': "
                     + (", ".join(kept[:12]) or "nothing") + (", ..." if len(kept) > 12 else ""))
    return JamOutcome(src.path, src.data, new, nest, plan, tuple(notes))


def _shift(a: Affine, offs: dict[str, int]) -> Affine:
    """``a`` with each iterator x replaced by x + offs[x]."""
    return a + Affine(const=sum(a.coeff(x) * k for x, k in offs.items()))


def _scalarizer(tu: TranslationUnit, nest: Nest, analysis, em: JamEmitter, renames: list[str]):
    """For one run of the innermost loop with the given copies: the elements to keep in locals.

    An element qualifies when its subscripts use only the loops outside the innermost one, one
    reference to it runs unconditionally in every iteration (so the load and the store touch an
    element the original touches whenever the loop runs), and the analysis proves that no other
    access of the run (any copy, any statement) can touch it."""
    src = tu.source
    target = em.target
    fixed = set(nest.iterators[: nest.iterators.index(target.iterator)])
    varying = (set(nest.iterators) | {lp.iterator for lp in nest.inner}) - fixed
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
                key = (a.array, tuple(_shift(sub, d) for sub in a.subscripts))
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
                    if analysis.may_touch(st, a, tuple(_shift(e, back) for e in element)):
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


def _index(lines: list[Line], line: Line) -> int:
    return next(k for k, x in enumerate(lines) if x is line)


def finish_nest_text(src, nest: Nest, text: str) -> tuple[str, int]:
    """The replacement text with what goes before the nest (a new line when code precedes it
    on its line, the macro guard) and the file's newlines; and how many lines come before the
    rendered nest."""
    base = src.indent_of(nest.start)
    prefix = 0
    line_start = src.line_starts[src.line_col(nest.start)[0] - 1]
    if src.text[line_start:nest.start].strip():
        text = "\n" + base + text
        prefix += 1
    mguard = _macro_guard(nest, src)
    if mguard:
        text = "\n".join(mguard.split("\n")[:1] + [base + g for g in mguard.split("\n")[1:]]) + "\n" + base + text
        prefix += mguard.count("\n") + 1
    if src.newline != "\n":
        text = text.replace("\n", src.newline)
    return text, prefix


def _body_node(tu: TranslationUnit, for_offset: int) -> c_ast.Node:
    for s in tu.loops():
        if s.token_index is not None and tu.tokens[s.token_index].start == for_offset:
            return s.node.stmt
    raise InternalError("the innermost loop of the nest has no syntax tree node", path=tu.source.path)


def _check_body(tu: TranslationUnit, nest: Nest, plan: JamPlan, body: c_ast.Node) -> list[str]:
    """Refuse bodies whose textual copies would not mean the substituted body; return the
    locals declared at the top of the body (renamed per copy)."""
    src = tu.source
    target = nest.loop(plan.loops[-1])
    unrolled = {it for it, _ in plan.factors}

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
    if isinstance(body, c_ast.Compound) and plan.copies > 1:
        for item in body.block_items or []:
            if isinstance(item, c_ast.Decl):
                if not item.name:
                    raise refuse("a declaration without a name (a struct or enum type) in the body would be "
                                 "declared once per copy", node=item)
                renames.append(item.name)
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
        fors = fors_in_order(ast.ext[-1].body)
    except Exception:  # noqa: BLE001 - fall back to the whole file
        pass
    if fors is None:
        try:
            ast = c_parser.CParser().parse(pre, "<rewritten>")
        except Exception as exc:
            raise InternalError(f"the rewritten nest does not parse ({exc}); this is a looptile bug, please report "
                                "it", path=src.path, line=nest.line, column=nest.col) from exc
        fors = [f for ext in ast.ext if isinstance(ext, c_ast.FuncDef) and ext.decl.name == nest.function
                for f in fors_in_order(ext.body)]
    by_line: dict[int, c_ast.For] = {}
    for f in fors:
        if f.coord is not None and f.coord.file == "<stdin>":
            by_line.setdefault(f.coord.line, f)
    gen = c_generator.CGenerator()
    for line, site in sites:
        node = by_line.get(line)
        if node is None:
            raise InternalError(f"the rewritten nest has no loop on line {line} where one was emitted; this is a "
                                "looptile bug", path=src.path, line=nest.line, column=nest.col)
        got = node.stmt
        got_items = list(got.block_items or []) if isinstance(got, c_ast.Compound) else [got]
        want = expected_items(body, site.copies, facts, site.scalars)
        if len(got_items) != len(want) or any(gen.visit(a) != gen.visit(b) for a, b in zip(got_items, want)):
            raise InternalError("a copy of the body does not parse to the substituted original; this is a looptile "
                                "bug, please report it with the input file", path=src.path, line=nest.line,
                                column=nest.col)
