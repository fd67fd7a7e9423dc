"""The tile job from file to new bytes: load, select, model, prove, emit, check, splice.

Library code: returns values, raises LooptileError subclasses, never exits.
"""
from __future__ import annotations

import re
from dataclasses import dataclass, field, replace

from pycparser import c_parser

from . import ctest, deps, extract, frontend, overlap, pragmas, reduction, toolchain
from .deps import Dependence, Legality, NestAnalysis, Witness
from .emit import (
    GUARD_MARK,
    EmitFacts,
    emit_nest,
    full_form,
    guard_comment,
    main_and_remainder,
    printed_expressions,
    split_point,
)
from .errors import InternalError, LooptileError, Refusal, UsageError
from .flags import CompileFlags
from .frontend import LoopSite, TranslationUnit
from .model import Affine, Nest, Reassociation
from .source import SourceFile, read_source
from .splice import Edit, apply_edits
from .transform.tile import TilePlan, TileRequest, plan_tiling


@dataclass(frozen=True)
class TileOptions:
    assumptions: tuple[str, ...] = ()  # --assume, recorded, not checked
    assume_pure: frozenset[str] = frozenset()
    force: bool = False
    command: str = ""  # the command line that produces the rewrite, for the guard comment
    split_fallback: bool = True  # default remainder style: fall back to clamp where split cannot be built
    # The offset of a directive (a pragma right before the nest) that this rewrite carries out:
    # its lines are removed and the guard comment takes its place.
    directive: int | None = None
    # --assume-in-row: flattened subscripts (A[i*ld + j]) stay in their rows; recorded, not tested
    assume_in_row: bool = False
    # --check-overlap: test at run time that the arrays reached through pointers do not overlap
    check_overlap: bool = False
    reassociate: tuple[str, ...] = ()  # --reassociate NAME: accumulations whose additions may be reordered
    parallel: bool = False  # --parallel: mark the outermost loop that carries no dependence (pragmas.py)
    autosize: object | None = None  # autosize.AutoSizing: sizes chosen by the cache model (--sizes auto)
    regtile: object | None = None  # regtile.RegisterTiling: the register tile chosen by its model (--jam auto)


@dataclass(frozen=True)
class TileOutcome:
    path: str
    original: bytes
    new: bytes
    nest: Nest
    plan: TilePlan
    notes: tuple[str, ...] = field(default=())
    reassociated: tuple[str, ...] = ()  # floating-point accumulations the rewrite reorders (verify's tolerance)
    explanation: tuple[str, ...] = ()  # how the cache model chose the sizes (--sizes auto)


def load(path: str, flags: CompileFlags) -> TranslationUnit:
    return frontend.load(read_source(path), flags)


# ---------------------------------------------------------------- selection

def select(tu: TranslationUnit, sel: str) -> LoopSite:
    """``L<line>``, ``FUNC`` or ``FUNC:K`` to the outermost loop of a nest."""
    path = tu.source.path
    m = re.fullmatch(r"L(\d+)", sel)
    names = [f.name for f in tu.functions]
    if m:  # always a line; a function named like L12 is selected as L12:1
        line = int(m.group(1))
        sites = sorted((s for s in tu.loops() if s.line == line), key=lambda s: s.token_index or 0)
        if not sites:
            raise UsageError(f"no for loop starts on line {line}; run 'looptile analyze {path}' to list the nests",
                             path=path, line=line if 1 <= line <= len(tu.source.line_starts) else None)
        first = sites[0]
        siblings = [s for s in sites[1:] if not inside(s, first)]
        if siblings:
            cols = ", ".join(f"{path}:{line}:{tu.source.line_col(tu.tokens[s.token_index].start)[1]}"
                             for s in [first] + siblings if s.token_index is not None)
            raise UsageError(f"two nests start on line {line} ({cols}); select one as FUNC:K", path=path, line=line)
        return first
    func, _, k = sel.partition(":")
    if func not in names:
        raise UsageError(f"no function '{func}' with a loop nest in this file (functions: "
                         f"{', '.join(names) or 'none'}); a selector is L<line>, FUNC or FUNC:K", path=path)
    if k and not k.isdigit():
        raise UsageError(f"in '{sel}', K must be a positive number")
    f = next(f for f in tu.functions if f.name == func)
    top = [s for s in f.loops if s.parent is None]
    idx = int(k) if k else 1
    if not 1 <= idx <= len(top):
        raise UsageError(f"function '{func}' has {len(top)} top-level loop nest(s); {sel} does not exist", path=path)
    return top[idx - 1]


def inside(s: LoopSite, outer: LoopSite) -> bool:
    """Is loop ``s`` nested (at any depth) inside loop ``outer``?"""
    while s.parent is not None:
        s = s.parent
        if s is outer:
            return True
    return False


# ---------------------------------------------------------------- messages

def describe_witness(what: str, w: Witness, nest: Nest,
                     reassociation: Reassociation | None = None) -> tuple[str, list[str]]:
    verb_src = "writes" if w.source_writes else "reads"
    verb_dst = "writes" if w.sink_writes else "reads"
    head = (f"{what} would run {w.sink.render()} before {w.source.render()}, but {w.source.render()} {verb_src} "
            f"{w.element}, which {w.sink.render()} {verb_dst} ({w.kind} dependence)")
    details = []
    if w.params:
        details.append("for example with " + ", ".join(f"{k} = {v}" for k, v in w.params))
    lines = {w.source.statement: w.source.line, w.sink.statement: w.sink.line}
    for name, line in sorted(lines.items()):
        details.append(f"{name} is the statement at {nest.path}:{line}")
    arr = next((a for a in nest.arrays if a.name == w.element.split("[")[0]), None)
    consent = reduction.advice(reassociation, arr.name, w.source.statement, w.sink.statement) \
        if arr is not None and reassociation is not None else None
    if consent:
        details.append(consent)
    elif arr is not None and arr.ndims == 0 and not arr.local and arr.elem.kind == "float":
        details.append(f"'{arr.name}' is a floating-point accumulation: reordering it would change the rounding "
                       "of the result")
    return head, details


def summarize(deps: list[Dependence]) -> list[str]:
    groups: dict[tuple[str, str], list[str]] = {}
    for d in deps:
        parts = map(str, d.distance) if d.distance is not None else d.direction
        vec = "(" + ", ".join(parts) + ")"
        groups.setdefault((d.array, vec), [])
        if d.kind not in groups[(d.array, vec)]:
            groups[(d.array, vec)].append(d.kind)
    return [f"{arr} {'/'.join(kinds)} {vec}" for (arr, vec), kinds in groups.items()]


# ---------------------------------------------------------------- the tile job

def analyse(tu: TranslationUnit, site: LoopSite, assume_pure: frozenset[str],
            assumptions: tuple[str, ...], directive: int | None = None,
            assume_in_row: bool = False, reassociate: tuple[str, ...] = (),
            keep_pragmas: bool = False) -> tuple[Nest, NestAnalysis]:
    nest = extract.build_nest(tu, site, assume_pure, directive, keep_pragmas)
    analysis = NestAnalysis(nest, assumptions, assume_in_row,
                            reassociation=reduction.reassociation(tu, nest, reassociate))
    for o in analysis.failing_obligations():
        raise Refusal(f"{o.what} is computed in unsigned arithmetic and can wrap around, so C does not "
                      "compute what the analysis would assume; rewrite the bound or add --assume",
                      path=nest.path, line=o.line, column=o.col, source_line=tu.source.line_text(o.line))
    if analysis.in_row_never and not assume_in_row:
        o = analysis.in_row_failing[0]
        raise Refusal(f"cannot read the flattened subscript as rows: {o.what.replace(' stays in ', ' leaves ')} "
                      "whenever the nest runs",
                      path=nest.path, line=o.line, column=o.col, source_line=tu.source.line_text(o.line),
                      details=["the element would then be in the next row, so the two-dimensional reading that "
                               "the analysis needs is not exact; index the row with its own iterator range"])
    return nest, analysis


def in_row_checks(tu: TranslationUnit, nest: Nest, analysis: NestAnalysis, opts: TileOptions,
                  versioning: bool = True) -> list[str]:
    """The run-time test under which the flattened subscripts stay in their rows ([] when it is
    proven, or asserted with --assume-in-row), as one C condition; a refusal when it is needed
    but cannot be printed exactly, or when the job cannot version (``versioning`` False)."""
    if not analysis.in_row_failing or opts.assume_in_row:
        return []
    o = analysis.in_row_failing[0]
    where = dict(path=nest.path, line=o.line, column=o.col, source_line=tu.source.line_text(o.line))
    try:
        text = ctest.condition(analysis.in_row_conditions(), {p.name: p for p in nest.params})
    except deps.BoundsNotAffine:
        text = None
    if text is None or not versioning:
        why = ("the run-time test it needs cannot be printed exactly in C" if text is None else
               f"this job does not version the nest (tile does), and the test it needs is {text}")
        raise Refusal(f"cannot prove that {o.what} for every size; {why}", **where,
                      details=["if it holds for every call, say so with --assume-in-row (recorded in the guard "
                               "comment); --assume COND also works for a condition on the parameters"])
    return [text]


def in_row_notes(nest: Nest, analysis: NestAnalysis, opts: TileOptions, checks: list[str]) -> list[str]:
    """What the guard comment says about the flattened arrays."""
    flat = [a for a in nest.arrays if a.rows]
    if not flat:
        return []
    shapes = ", ".join(f"{a.name} as rows of {' x '.join(a.rows)}" for a in flat)
    if not analysis.in_row_failing:
        return [f"reads {shapes} (each flattened subscript stays in its row: proven)"]
    if opts.assume_in_row:
        return [f"reads {shapes}, and each flattened subscript stays in its row (asserted by the user with "
                "--assume-in-row)"]
    return [f"reads {shapes}; each flattened subscript stays in its row when {' && '.join(checks)} (checked: "
            "otherwise the original nest runs)"]


def _check_not_rewritten(tu: TranslationUnit, site: LoopSite, opts: TileOptions) -> None:
    """A nest right after looptile's guard comment was rewritten before: not again unless --force."""
    if opts.force or site.token_index is None:
        return
    src = tu.source
    start = tu.tokens[site.token_index].start
    before = src.text[:start].rstrip()
    if before.endswith("*/"):
        opening = before.rfind("/*")
        if opening >= 0 and GUARD_MARK.match(before[opening:]):
            line, col = src.line_col(start)
            raise Refusal("this nest already carries a looptile guard comment (it was rewritten before); "
                          "rewrite the original nest, or pass --force", path=src.path, line=line,
                          column=col, source_line=src.line_text(line))


def _check_request_side(tu: TranslationUnit, nest: Nest, plan: TilePlan, opts: TileOptions) -> None:
    src = tu.source
    for it in nest.outer_declared:
        off = extract.live_after(tu, nest, it)
        if off is not None:
            line, col = src.line_col(off)
            raise Refusal(f"the value of '{it}' after the nest is used here, and the rewrite leaves '{it}' with a "
                          f"different final value; declare '{it}' in its for statement or assign it before use",
                          path=nest.path, line=line, column=col, source_line=src.line_text(line))
    if nest.macros_used and src.text[src.line_starts[nest.line - 1]: nest.start].strip():
        raise Refusal("the nest needs a preprocessor guard for the macros its subscripts use, but it does not "
                      "start its own line", path=nest.path, line=nest.line, column=nest.col)


def _from_analysis(analysis: NestAnalysis, compute):
    """A bounds callback for the planner; bounds isl cannot give as affine expressions become
    ValueError, which the planner turns into a refusal."""
    def call(iterator: str, kept: tuple[str, ...]):
        try:
            return compute(analysis, iterator, kept)
        except deps.BoundsNotAffine as exc:
            raise ValueError(str(exc)) from None
    return call


class SplitImpossible(Exception):
    """The whole-tile test of the split style is not one conjunction of affine conditions."""


def _loop_facts(nest: Nest, plan: TilePlan, kept: tuple[str, ...]) -> list[Affine]:
    """``a >= 0`` facts that the emitted loop headers guarantee inside the loops outside the
    whole-tile test: tile iterators within their loops' ranges, and the values of the
    point and untouched loops there."""
    facts: list[Affine] = []
    for s in plan.slots:
        lp = nest.loop(s.iterator)
        x = Affine.symbol(s.name)
        if s.kind == "tile":
            if s.hull is not None:
                facts += [x - lo for lo in s.hull[0]] + [hi - x for hi in s.hull[1]]
                continue
            if (lp.start.value.names() | lp.limit.value.names()) & set(nest.iterators):
                continue
        elif s.iterator not in kept:
            continue
        elif s.scan is not None:
            facts += [x - lo for lo in s.scan[0]] + [hi - x for hi in s.scan[1]]
            continue
        excl = Affine(const=0 if lp.inclusive else 1)
        if lp.direction > 0:
            facts += [x - lp.start.value, lp.limit.value - x - excl]
        else:
            facts += [lp.start.value - x, x - lp.limit.value - excl]
    return facts


def emit_facts(nest: Nest, analysis: NestAnalysis, plan: TilePlan, c89: bool) -> EmitFacts:
    """Facts the emitted code relies on, established with isl."""
    wide = set()
    for s in plan.slots:
        if s.kind != "tile":
            continue
        lp = nest.loop(s.iterator)
        if lp.ctype.is_unsigned:
            continue
        if s.hull is not None:  # the distance is taken from the hull's low end, given the defined iterators
            # (a max of lowers going down: non-negative when one of them is)
            lows, loops = s.hull[0], s.defined
        else:
            lows = (lp.start.value if lp.direction > 0 else lp.limit.value,)
            loops = tuple(x for x in nest.iterators[: nest.iterators.index(s.iterator)])
        if not any(analysis.always_nonnegative(low, loops) for low in lows):
            wide.add(s.iterator)
    extra: tuple = ()
    sp = split_point(nest, plan)
    tested = plan.remainder == "split" and not main_and_remainder(plan)  # a whole-tile test is emitted
    if tested and any(s.scan is not None and set(s.defined) - set(sp.kept) for s in sp.boxed):
        # A point loop inside the test whose range depends on a loop that also runs inside it:
        # a constant-trip fast path would ignore that dependence.
        raise SplitImpossible("a point loop's range depends on a loop inside the tile")
    if tested and len(sp.rect) < len(sp.boxed):
        known = []
        tiles = {s.iterator: s.name for s in plan.slots if s.kind == "tile"}
        for s in sp.boxed:
            if s.iterator in sp.rect:
                lp = nest.loop(s.iterator)
                tt = Affine.symbol(tiles[s.iterator])
                dist = lp.limit.value - tt if lp.direction > 0 else tt - lp.limit.value
                known.append(dist - Affine(const=full_form(lp, s.size or 1)))
        known += _loop_facts(nest, plan, sp.kept)
        boxed = [(s.iterator, tiles[s.iterator], nest.loop(s.iterator).step * (s.size or 1)) for s in sp.boxed]
        try:
            extra = tuple(deps.full_tile_constraints(analysis, boxed, sp.kept, known))
        except deps.BoundsNotAffine as exc:
            raise SplitImpossible(str(exc)) from None
    return EmitFacts(frozenset(wide), c89, extra)


def _overflow_bounds(nest: Nest, analysis: NestAnalysis, plan: TilePlan, facts: EmitFacts,
                     extra: tuple = ()) -> list[str]:
    """C conditions (``n <= 2147483631``) under which the printed expressions (and ``extra``
    ones) cannot overflow."""
    tiles = {s.name: s.iterator for s in plan.slots if s.kind == "tile"}
    try:
        bounds = deps.overflow_guard(analysis, tiles, printed_expressions(nest, plan, facts) + list(extra))
    except deps.BoundsNotAffine as exc:
        raise Refusal(f"cannot bound the values the rewritten loop bounds compute ({exc}), so the rewrite could "
                      "overflow for some sizes", path=nest.path, line=nest.line, column=nest.col) from None
    spell = {p.name: p for p in nest.params}
    out = []
    for name, op, value in bounds:
        p = spell[name]
        if p.kind == "opaque" or p.kind == "macro":
            raise Refusal(f"the rewrite needs {p.text} {op} {value} to be safe from overflow, which looptile does "
                          "not check for this kind of bound", path=nest.path, line=nest.line, column=nest.col)
        suffix = "" if -2**31 <= value < 2**31 else ("L" if -2**63 <= value < 2**63 else "UL")
        out.append(f"{p.text} {op} {value}{suffix}")
    return out


def guard_text(nest: Nest, plan: TilePlan, analysis: NestAnalysis, opts: TileOptions,
               checked: list[str] | None = None, rows_checked: list[str] | None = None,
               reordered: tuple[str, ...] = (), placed: tuple[str, ...] = (),
               overlap: tuple[tuple[str, str], ...] = ()) -> str:
    deps = summarize(analysis.dependences())
    constrained = []
    if deps:
        constrained.append("dependences kept: " + "; ".join(deps[:6]) + ("; ..." if len(deps) > 6 else ""))
    else:
        constrained.append("no dependences between iterations")
    constrained += list(placed)
    shared = [a.name for a in nest.arrays if not a.local and a.ndims > 0]
    assumes = []
    if overlap:
        tested = "; ".join(f"{x} and {y}" for x, y in overlap)
        assumes.append(f"the arrays {', '.join(shared)} do not overlap (checked at run time for {tested}, comparing "
                       "their address ranges as uintptr_t: otherwise the original nest runs)")
    elif len(shared) > 1:
        assumes.append(f"the arrays {', '.join(shared)} do not overlap")
    elif shared:
        assumes.append(f"no other name aliases {shared[0]}")
    opaque = [p.text for p in nest.params if p.kind == "opaque" and re.search(r"->|\.|\*|\[", p.text)]
    if opaque:
        assumes.append(f"the nest does not change {', '.join(opaque)}")
    assumes += [f"{a} (asserted by the user)" for a in opts.assumptions]
    assumes += reduction.guard_phrases(analysis.reassociation, reordered)
    assumes += in_row_notes(nest, analysis, opts, rows_checked or [])
    if checked:
        assumes.append(f"{' && '.join(checked)}, so that no bound overflows (checked: otherwise the original "
                       "nest runs)")
    assumes += [f"{name} == {value} (checked by #if)" for name, value in nest.macros_used]
    return guard_comment(plan.describe(), constrained, "; ".join(assumes) or "nothing", opts.command)


def _macro_guard(nest: Nest, src: SourceFile) -> str:
    lines = []
    for name, value in nest.macros_used:
        lines += [f"#if {name} != {value}",
                  f'#error "looptile rewrote this nest for {name} == {value}; re-run looptile for this value"',
                  "#endif"]
    return "\n".join(lines)


def tile(tu: TranslationUnit, sel: str, req: TileRequest, opts: TileOptions) -> TileOutcome:
    src = tu.source
    site = select(tu, sel)
    _check_not_rewritten(tu, site, opts)
    nest, analysis = analyse(tu, site, opts.assume_pure, opts.assumptions, opts.directive, opts.assume_in_row,
                             opts.reassociate, keep_pragmas=True)
    req, plan, opts, explanation, reg_notes = _chosen_plan(tu, nest, analysis, req, opts)
    rows_checked = in_row_checks(tu, nest, analysis, opts)
    ov = overlap.overlap_check(tu, nest, analysis) if opts.check_overlap else None
    overlap_checked = [ov.condition] if ov is not None else []
    if req.jam or req.scalarize:
        if not plan.band:
            raise UsageError("--jam needs tiles (--sizes); to unroll and jam without tiling, use the jam command")
        if not req.jam:
            raise UsageError("--scalarize needs --jam (the elements are kept in locals between the jammed copies)")
        from .transform.jam import plan_tile_jam
        plan = replace(plan_tile_jam(nest, plan, req.jam), scalarize=req.scalarize)
    _check_request_side(tu, nest, plan, opts)
    legality: Legality = analysis.check(list(plan.schedule))
    if not legality.legal:
        assert legality.witness is not None
        what = (f"tiling ({', '.join(plan.band)})" if plan.band else
                f"permuting ({', '.join(nest.iterators)}) to ({', '.join(s.name for s in plan.slots)})")
        head, details = describe_witness(what, legality.witness, nest, analysis.reassociation)
        raise Refusal(head, path=nest.path, line=nest.line, column=nest.col,
                      source_line=src.line_text(nest.line), details=details)
    notes: list[str] = list(reg_notes)
    placement = pragmas.place(tu, nest, analysis, plan, pragmas.collect(tu, nest, opts.directive), opts.parallel,
                              tu.flags.c89)
    if main_and_remainder(plan) and any(placement.parallel_at(k) for k, s in enumerate(plan.slots)
                                        if s.kind == "tile"):
        plan = replace(plan, remainder="clamp")  # the main loop's test is not OpenMP's canonical form
        notes.append("the worksharing tile loop is a plain loop over all tiles, so the remainder style is clamp")
    notes += placement.notes
    try:
        facts = emit_facts(nest, analysis, plan, tu.flags.c89)
    except SplitImpossible:
        if not opts.split_fallback:
            raise Refusal("--remainder split needs a whole-tile test, and for this band it is not one conjunction "
                          "of affine conditions; use --remainder clamp", path=nest.path, line=nest.line,
                          column=nest.col) from None
        plan = replace(plan, remainder="clamp")
        facts = emit_facts(nest, analysis, plan, tu.flags.c89)
        notes.append("the whole-tile test of this band is not one conjunction of affine conditions, so the "
                     "remainder style is clamp")
    guard_bounds = _overflow_bounds(nest, analysis, plan, facts, tuple(placement.overflow_terms(nest, plan)))
    guard_bounds += [c for c in placement.overflow_checks(nest, plan) if c not in guard_bounds]
    jam = _jam_context(tu, nest, analysis, plan) if plan.jam else None
    text = emit_nest(src, nest, plan, facts, guard_text(nest, plan, analysis, opts, guard_bounds, rows_checked,
                                                           legality.reordered, placement.guard_lines(plan),
                                                           ov.pairs if ov is not None else ()),
                     rows_checked + overlap_checked + guard_bounds, jam, placement)
    guard = _macro_guard(nest, src)
    if guard:
        text = "\n".join(guard.split("\n")[:1] + [src.indent_of(nest.start) + g for g in guard.split("\n")[1:]]) \
            + "\n" + src.indent_of(nest.start) + text
        text = text.replace("\n", src.newline) if src.newline != "\n" else text
    removed = directive_removal(tu, opts.directive) + [e for off in placement.removed
                                                        for e in directive_removal(tu, off)]
    new = apply_edits(src.data, [Edit(nest.start, nest.end, text)] + removed)
    shift = sum(src.line_col(e.end)[0] - src.line_col(e.start)[0] for e in removed)
    check_parses(tu, nest, text, new, shift)
    if jam is not None:
        from .copies import check_copies
        first = nest.line - shift + (guard.count("\n") + 1 if guard else 0)
        check_copies(tu, nest, new, jam.body, jam.facts, [(first + k, site) for k, site in jam.sites],
                     (nest.line - shift, nest.line - shift + text.count("\n")))
        if plan.scalarize:
            kept = sorted({g.element for _, site in jam.sites for g in site.scalars})
            notes.append(f"kept in locals during each run of loop '{plan.slots[-1].iterator}': "
                         + (", ".join(kept[:12]) or "nothing") + (", ..." if len(kept) > 12 else ""))
    notes += [f"assumed: {a}" for a in opts.assumptions]
    notes += reduction.notes(analysis.reassociation, legality.reordered)
    notes += [f"the rewrite runs only when {c} (no bound can overflow then); the original nest runs otherwise"
              for c in guard_bounds]
    notes += [f"the rewrite runs only when {c} (the flattened subscripts stay in their rows then); the original "
              "nest runs otherwise" for c in rows_checked]
    if ov is not None:
        pairs = "; ".join(f"{x} and {y}" for x, y in ov.pairs)
        notes.append(f"the rewrite runs only when the address ranges of {pairs} do not overlap (tested at run "
                     "time); the original nest runs otherwise")
    elif opts.check_overlap:
        notes.append("--check-overlap: no two arrays of this nest can overlap (restrict, or distinct objects), so "
                     "no run-time test is needed")
    if opts.assume_in_row and analysis.in_row_failing:
        notes.append("assumed (--assume-in-row): " + "; ".join(sorted({o.what for o in analysis.in_row_failing})))
    return TileOutcome(src.path, src.data, new, nest, plan, tuple(notes),
                       reduction.floating(analysis.reassociation, legality.reordered), explanation)


def chosen_request(tu: TranslationUnit, sel: str, req: TileRequest, opts: TileOptions) -> TileRequest:
    """The request with the numbers ``--sizes auto`` and ``--jam auto`` choose, without making
    the rewrite (tune's analytic candidates)."""
    nest, analysis = analyse(tu, select(tu, sel), opts.assume_pure, opts.assumptions, opts.directive,
                             opts.assume_in_row, opts.reassociate, keep_pragmas=True)
    return _chosen_plan(tu, nest, analysis, req, opts)[0]


def _chosen_plan(tu: TranslationUnit, nest: Nest, analysis: NestAnalysis, req: TileRequest, opts: TileOptions):
    """The request and plan with the numbers the models choose (``--sizes auto``: tile sizes from
    the cache model; ``--jam auto``: the register tile, chosen first when both are asked, so that
    the sizes are multiples of its factors), the options with the guard's made-by words, the
    explanation, and notes. Numbers before the legality test: it runs on them as on any others."""
    from . import autosize, regtile
    from .transform.jam import plan_tile_jam

    def planned(r: TileRequest) -> TilePlan:
        return plan_tiling(nest, r, tu.identifiers, _from_analysis(analysis, deps.band_hull),
                           _from_analysis(analysis, deps.scan_bounds))

    sized: list[str] = []  # the cache model's explanation
    regs: list[str] = []  # the register model's
    words: list[str] = []
    notes: list[str] = []
    base = req
    if opts.autosize is not None:
        req, choice, said = autosize.resolve(nest, analysis, base, opts.autosize, dict(req.jam))
        sized, words = list(choice.explanation), [said]
    plan = planned(req)
    if opts.regtile is not None:
        last = max((k for k, s in enumerate(plan.slots) if s.kind == "tile"), default=None)
        if last is None:
            raise UsageError("--jam auto needs tiles (--sizes); to unroll and jam without tiling, use the jam "
                             "command", path=nest.path, line=nest.line, column=nest.col)
        inside = tuple(s.iterator for s in plan.slots[last + 1:])
        given = None if opts.autosize is not None else {x: plan.size_of(x) for x in plan.band if plan.size_of(x)}
        rc = regtile.choose(nest, inside, opts.regtile, given, req.scalarize)
        # The block, or the vector loop's factor alone, or none: the first that is legal with the
        # sizes it gets (a chosen number never turns a legal tiling into a refusal).
        tried = [rc.factors] + ([rc.factors[-1:]] if len(rc.factors) > 1 else [])
        said_why = list(rc.explanation)
        for k, factors in enumerate(tried):
            r2, p2, s2, w2 = req, plan, sized, words
            if opts.autosize is not None:  # sizes again, knowing the register tile
                block = dict(factors)
                r2, choice, said = autosize.resolve(nest, analysis, base, opts.autosize, None, block)
                s2, w2 = list(choice.explanation), [said]
                p2 = planned(r2)
            spec = ",".join(f"{x}={u}" for x, u in factors)
            try:
                legal = analysis.check(list(plan_tile_jam(nest, p2, factors).schedule)).legal
                why = "it would break a dependence"
            except LooptileError as exc:
                legal, why = False, exc.headline() if hasattr(exc, "headline") else str(exc)
            if legal:
                req, plan, sized, words = r2, p2, s2, w2
                if k:
                    said_why.append(f"jam {spec} is legal: taken")
                rc = replace(rc, factors=factors, explanation=tuple(said_why))
                break
            said_why.append(f"jam {spec}: {why}")
        else:
            if rc.factors:
                rc = replace(rc, factors=(), kind="none", scalarize=False, advice="",
                             explanation=tuple(said_why + ["no register tile: none of these is legal here"]))
        regs = list(rc.explanation)
        req = replace(req, jam=rc.factors, scalarize=(req.scalarize or rc.scalarize) and bool(rc.factors))
        if rc.factors:
            words.append(f"register tile chosen for {opts.regtile.registers.count} vector registers of "
                         f"{opts.regtile.registers.vector_bytes} bytes: --jam {rc.spec()}"
                         + (" --scalarize" if req.scalarize else "") + (f"; {rc.advice}" if rc.advice else ""))
            notes.append(f"register tile: --jam {rc.spec()}" + (" --scalarize" if req.scalarize else "")
                         + f" ({rc.kind})" + (f"; {rc.advice}" if rc.advice else ""))
        else:
            notes.append(rc.explanation[-1])
    explanation = regs + sized
    if words:
        opts = replace(opts, command=f"{opts.command} ({'; '.join(words)})")
    return req, plan, opts, tuple(explanation), tuple(notes)


def directive_removal(tu: TranslationUnit, directive: int | None) -> list[Edit]:
    """The edit that removes a carried-out directive: its whole line(s) when nothing else is on
    them, else the pragma text alone."""
    if directive is None:
        return []
    src = tu.source
    tok = next(t for t in tu.all_between(directive, directive + 1) if t.start == directive)
    line, _ = src.line_col(tok.start)
    line_start = src.line_starts[line - 1]
    end = tok.end
    rest = src.text[end:]
    m = re.match(r"[ \t]*(\r\n|\n|\r)", rest)
    if m and not src.text[line_start:tok.start].strip():
        return [Edit(line_start, end + m.end(), "")]
    return [Edit(tok.start, end, "")]


def _jam_context(tu: TranslationUnit, nest: Nest, analysis: NestAnalysis, plan: TilePlan):
    """The copied body and what its copies need, for unroll-and-jam inside the tiles."""
    from .copies import body_node, check_body, scalarizer, wide_distances
    from .emit_jam import JamContext, JamEmitter, JamFacts, fresh_names
    target = nest.perfect[-1]
    body = body_node(tu, target.for_offset)
    copies = 1
    for _, u in plan.jam:
        copies *= u
    renames = check_body(tu, nest, target, {it for it, _ in plan.jam}, copies, body)
    facts = JamFacts(wide_distances(nest, analysis, [it for it, _ in plan.jam]), tu.flags.c89, tuple(renames),
                     fresh_names(renames, copies, tu.identifiers) if renames else ())
    ctx = JamContext(body, target, facts)
    if plan.scalarize:
        innermost = plan.slots[-1].iterator
        if dict(plan.jam).get(innermost, 1) > 1:
            raise Refusal(f"--scalarize keeps elements in locals over the runs of the innermost loop '{innermost}', "
                          "which is itself unrolled here; leave it out of --jam", path=nest.path, line=nest.line,
                          column=nest.col)
        ctx.scalarize = scalarizer(tu, nest, analysis, JamEmitter(tu.source, target, [], facts, body, ""), renames,
                                   innermost)
    return ctx


def check_parses(tu: TranslationUnit, nest: Nest, text: str, new: bytes, lines_removed_before: int = 0) -> None:
    """Preprocess the rewritten file and parse the rewritten region again; a failure is a
    looptile bug (an internal error), never a broken file.

    The region (its preprocessed lines) is parsed inside a dummy function, with the file's
    typedef names declared, which is much cheaper than parsing every header again; when that
    does not parse (say, the nest shares a line with other code), the whole file is parsed."""
    src = tu.source
    pre = toolchain.preprocess_text(new, src.path, tu.flags)
    first = nest.line - lines_removed_before
    last = first + text.count("\n")
    region = [t for ln, t in frontend.main_file_lines(pre, "<stdin>") if first <= ln <= last]
    typedefs = tu.cache["types"].typedefs if "types" in tu.cache else {}
    prelude = "".join(f"typedef int {name};\n" for name in sorted(typedefs))
    try:
        c_parser.CParser().parse(prelude + "void looptile_region_check(void) {\n" + "\n".join(region) + "\n}\n",
                                 "<region>")
        return
    except Exception:  # noqa: BLE001 - fall back to the exact, slower check
        pass
    try:
        c_parser.CParser().parse(pre, "<rewritten>")
    except Exception as exc:
        raise InternalError(f"the rewritten nest does not parse ({exc}); this is a looptile bug, please report it",
                            path=src.path, line=nest.line, column=nest.col) from exc
