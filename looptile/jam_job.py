"""The jam and unroll jobs from file to new bytes: load, select, model, prove, copy the body,
emit, parse again and compare every copy, splice.

Library code: returns values, raises LooptileError subclasses, never exits.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace

from . import reduction
from .copies import body_node, check_body, check_copies, scalarizer, wide_distances
from .emit import Line, literal, render
from .emit_jam import CopySite, JamEmitter, JamFacts, SiteLine, fresh_names, plain_forms, reindent, site_lines
from .errors import Refusal
from .frontend import TranslationUnit
from .model import Nest
from .pipeline import (
    TileOptions,
    _check_not_rewritten,
    _macro_guard,
    analyse,
    describe_witness,
    directive_removal,
    guard_text,
    in_row_checks,
    select,
)
from .splice import Edit, apply_edits
from .transform.jam import MAX_COPIES, JamPlan, JamRequest, plan_jam, plan_unroll  # noqa: F401 - JamRequest re-exported


@dataclass(frozen=True)
class JamOutcome:
    path: str
    original: bytes
    new: bytes
    nest: Nest
    plan: JamPlan
    notes: tuple[str, ...] = field(default=())
    reassociated: tuple[str, ...] = ()  # floating-point accumulations the rewrite reorders (verify's tolerance)


def jam(tu: TranslationUnit, sel: str, req: JamRequest, opts: TileOptions, scalarize: bool = False) -> JamOutcome:
    """Unroll-and-jam: each loop of ``req`` unrolled by its factor, the copies jammed into the
    body of the innermost perfectly nested loop; with ``scalarize``, elements that one run of
    that loop keeps touching are kept in locals."""
    return _job(tu, sel, opts, lambda nest: plan_jam(nest, req), scalarize)


def unroll(tu: TranslationUnit, sel: str, factor: int, opts: TileOptions) -> JamOutcome:
    """Plain unrolling of the selected loop (its whole body copied ``factor`` times)."""
    return _job(tu, sel, opts, lambda nest: plan_unroll(nest, factor))


def unroll_full(tu: TranslationUnit, sel: str, opts: TileOptions) -> JamOutcome:
    """Full unrolling of the selected loop, whose trip count must be a constant: one copy of
    its body per iteration, in order, and no loop (OpenMP's ``unroll full``)."""
    src = tu.source
    nest, _analysis = _analysed(tu, sel, opts)
    lp = nest.perfect[0]
    where = dict(path=nest.path, line=lp.line, column=lp.col, source_line=src.line_text(lp.line))
    names = sorted(lp.start.value.names() | lp.limit.value.names())
    if names:
        raise Refusal(f"full unrolling needs a constant trip count, and the bounds of '{lp.iterator}' use "
                      f"{', '.join(repr(n) for n in names)}; unroll it partially instead", **where)
    values = _iteration_values(lp)
    if len(values) > MAX_COPIES:
        raise Refusal(f"loop '{lp.iterator}' runs more than {MAX_COPIES} times; full unrolling would make too many "
                      "copies of its body (unroll it partially instead)", **where)
    plan = JamPlan((lp.iterator,), ((lp.iterator, max(len(values), 1)),), "unroll-full", ())
    body = body_node(tu, lp.for_offset)
    renames = check_body(tu, nest, lp, {lp.iterator}, len(values), body)
    facts = JamFacts(frozenset(), tu.flags.c89, tuple(renames),
                     fresh_names(renames, len(values), tu.identifiers) if renames else ())
    em = JamEmitter(src, lp, [], facts, body, src.indent_of(nest.start))
    unit, base = src.indent_unit, em.base
    start = lp.start.text
    first = f"{lp.ctype.spelling} {lp.iterator} = {start};" if lp.declared_in_for else f"{lp.iterator} = {start};"
    copies = tuple(((lp.iterator, v - values[0]),) for v in values)
    site_ = CopySite(copies, block=True, skip_front=1, skip_back=0 if lp.declared_in_for else 1)
    lines = [Line(base, ln) for ln in guard_text(nest, plan, _analysis, opts).split("\n")]
    lines += [Line(base, c.replace("\r\n", "\n")) for c in nest.header_comments]
    lines.append(SiteLine(base, "{", site_))
    lines.append(Line(base + unit, first))
    for n, offs in enumerate(copies):
        lines += reindent(em.copy_text(offs, n), base + unit, em.lead())
    if not lp.declared_in_for:  # the value the loop leaves in its iterator
        lines.append(Line(base + unit, f"{lp.iterator} = {literal(_next_value(lp, values), lp)};"))
    lines.append(Line(base, "}"))
    text, prefix = finish_nest_text(src, nest, render("nest.c.j2", lines=lines))
    removed = directive_removal(tu, opts.directive)
    new = apply_edits(src.data, [Edit(nest.start, nest.end, text)] + removed)
    shift = sum(src.line_col(e.end)[0] - src.line_col(e.start)[0] for e in removed)
    top = nest.line - shift + prefix
    if copies:
        check_copies(tu, nest, new, body, facts, [(top + k, s) for k, s in site_lines(lines)],
                     (top, top + text.count("\n")))
    return JamOutcome(src.path, src.data, new, nest, plan, tuple(f"assumed: {a}" for a in opts.assumptions))


def _iteration_values(lp) -> list[int]:
    """The values a loop with constant bounds gives its iterator (at most MAX_COPIES + 1)."""
    out: list[int] = []
    v, limit = lp.start.value.const, lp.limit.value.const
    while len(out) <= MAX_COPIES and _runs(lp, v, limit):
        out.append(v)
        v += lp.step * lp.direction
    return out


def _runs(lp, v: int, limit: int) -> bool:
    return {"<": v < limit, "<=": v <= limit, ">": v > limit, ">=": v >= limit}[lp.op]


def _next_value(lp, values: list[int]) -> int:
    return values[-1] + lp.step * lp.direction if values else lp.start.value.const


def _analysed(tu: TranslationUnit, sel: str, opts: TileOptions):
    """The selected nest and its analysis, with the checks every job of this module needs (these
    jobs do not version a nest, so flattened subscripts need the in-row proof or the assertion)."""
    site = select(tu, sel)
    _check_not_rewritten(tu, site, opts)
    nest, analysis = analyse(tu, site, opts.assume_pure, opts.assumptions, opts.directive,
                             reassociate=opts.reassociate, assume_in_row=opts.assume_in_row)
    in_row_checks(tu, nest, analysis, opts, versioning=False)
    return nest, analysis


def _job(tu: TranslationUnit, sel: str, opts: TileOptions, make_plan, scalarize: bool = False) -> JamOutcome:
    src = tu.source
    nest, analysis = _analysed(tu, sel, opts)
    plan: JamPlan = make_plan(nest)
    if scalarize:
        plan = replace(plan, scalarize=True)
    legality = analysis.check(list(plan.schedule))
    if not legality.legal:
        assert legality.witness is not None
        what = "unrolling " + " and ".join(f"'{it}' by {u}" for it, u in plan.factors) + \
            (" and jamming the copies" if plan.kind == "jam" else "")
        head, details = describe_witness(what, legality.witness, nest, analysis.reassociation)
        raise Refusal(head, path=nest.path, line=nest.line, column=nest.col,
                      source_line=src.line_text(nest.line), details=details)
    if nest.macros_used and src.text[src.line_starts[nest.line - 1]: nest.start].strip():
        raise Refusal("the nest needs a preprocessor guard for the macros its subscripts use, but it does not "
                      "start its own line", path=nest.path, line=nest.line, column=nest.col)
    target = nest.loop(plan.loops[-1])
    body = body_node(tu, target.for_offset)
    renames = check_body(tu, nest, target, {it for it, _ in plan.factors}, plan.copies, body)
    facts = JamFacts(wide_distances(nest, analysis, [it for it, _ in plan.factors]), tu.flags.c89, tuple(renames),
                     fresh_names(renames, plan.copies, tu.identifiers) if renames else ())
    em = JamEmitter(src, target, plain_forms(src, nest, plan, facts), facts, body, src.indent_of(nest.start))
    if scalarize:
        if plan.factor(target.iterator) > 1:
            raise Refusal("--scalarize keeps elements in locals over the runs of the innermost loop "
                          f"'{target.iterator}', which is itself unrolled here; leave it out of --factors",
                          path=nest.path, line=target.line, column=target.col)
        em.scalarize = scalarizer(tu, nest, analysis, em, renames, target.iterator)
    guard = guard_text(nest, plan, analysis, opts, reordered=legality.reordered)
    lines = [Line(em.base, ln) for ln in guard.split("\n")]
    lines += [Line(em.base, c.replace("\r\n", "\n")) for c in nest.header_comments]
    lines += em.lines()
    text, prefix = finish_nest_text(src, nest, render("nest.c.j2", lines=lines))
    removed = directive_removal(tu, opts.directive)
    new = apply_edits(src.data, [Edit(nest.start, nest.end, text)] + removed)
    shift = sum(src.line_col(e.end)[0] - src.line_col(e.start)[0] for e in removed)
    first = nest.line - shift + prefix
    check_copies(tu, nest, new, body, facts, [(first + k, site) for k, site in site_lines(lines)],
                 (first, first + text.count("\n")))
    notes = [f"assumed: {a}" for a in opts.assumptions] + reduction.notes(analysis.reassociation, legality.reordered)
    if scalarize:
        kept = sorted({g.element for site in em.sites for g in site.scalars})
        notes.append(f"kept in locals during each run of loop '{target.iterator}': "
                     + (", ".join(kept[:12]) or "nothing") + (", ..." if len(kept) > 12 else ""))
    return JamOutcome(src.path, src.data, new, nest, plan, tuple(notes),
                      reduction.floating(analysis.reassociation, legality.reordered))


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


