"""The analyze job: every loop nest of a file with its loops, dependences and tileable bands."""
from __future__ import annotations

from dataclasses import dataclass, field

from . import ctest, extract
from .deps import BoundsNotAffine, NestAnalysis
from .errors import LooptileError
from .frontend import LoopSite, TranslationUnit
from .model import Nest


@dataclass(frozen=True)
class NestReport:
    selectors: tuple[str, ...]
    function: str
    line: int
    column: int
    depth: int  # loops in the perfectly nested part
    iterators: tuple[str, ...]
    loops: tuple[dict, ...]
    perfect: bool  # the whole nest is perfectly nested
    analysable: bool
    reason: str | None = None  # why not (file:line:col: refused: ...)
    dependences: tuple[dict, ...] = ()
    permutable_bands: tuple[tuple[str, ...], ...] = ()
    statements: int = 0
    assumptions: tuple[str, ...] = field(default=())

    def as_json(self) -> dict:
        return {
            "selectors": list(self.selectors), "function": self.function, "line": self.line,
            "column": self.column, "depth": self.depth, "iterators": list(self.iterators),
            "loops": list(self.loops), "perfect": self.perfect, "analysable": self.analysable,
            "reason": self.reason, "statements": self.statements,
            "dependences": list(self.dependences), "permutable_bands": [list(b) for b in self.permutable_bands],
            "assumptions": list(self.assumptions),
        }


def reported_sites(tu: TranslationUnit) -> list[LoopSite]:
    """Top-level nests, and nests inside another loop that are not part of its perfect chain."""
    out = []
    for s in tu.loops():
        if s.parent is None:
            out.append(s)
            continue
        body = s.parent.node.stmt
        chained = body is s.node or (getattr(body, "block_items", None) or [None]) == [s.node]
        if not chained:
            out.append(s)
    return out


def _selectors(s: LoopSite) -> tuple[str, ...]:
    sel = [f"L{s.line}"]
    if s.top_index is not None:
        if s.top_index == 1:
            sel.append(s.function)
        sel.append(f"{s.function}:{s.top_index}")
    return tuple(sel)


def _loop_json(nest: Nest) -> tuple[dict, ...]:
    out = []
    for lp in nest.perfect:
        out.append({"iterator": lp.iterator, "type": lp.ctype.spelling, "start": lp.start.text,
                    "condition": f"{lp.iterator} {lp.op} {lp.limit.text}", "step": lp.step,
                    "direction": "up" if lp.direction > 0 else "down", "line": lp.line, "column": lp.col})
    return tuple(out)


def _maximal_bands(a: NestAnalysis, its: tuple[str, ...]) -> tuple[tuple[str, ...], ...]:
    bands = []
    covered = -1
    for lo in range(len(its)):
        hi = lo
        while hi + 1 < len(its) and a.permutable(lo, hi + 1):
            hi += 1
        if hi > lo and hi > covered:
            bands.append(its[lo:hi + 1])
            covered = hi
    return tuple(bands)


def report(tu: TranslationUnit, site: LoopSite, assume_pure: frozenset[str] = frozenset(),
           assumptions: tuple[str, ...] = (), assume_in_row: bool = False) -> NestReport:
    src = tu.source
    line, col = site.line, 1
    if site.token_index is not None:
        line, col = src.line_col(tu.tokens[site.token_index].start)
    base = dict(selectors=_selectors(site), function=site.function, line=line, column=col)
    try:
        nest = extract.build_nest(tu, site, assume_pure, keep_pragmas=True)  # placed (or refused) per request
        a = NestAnalysis(nest, assumptions, assume_in_row)
        failing = a.failing_obligations()
        if failing:
            o = failing[0]
            reason = f"{src.path}:{o.line}:{o.col}: refused: {o.what} can wrap around in unsigned arithmetic"
            return NestReport(**base, depth=len(nest.perfect), iterators=nest.iterators, loops=_loop_json(nest),
                              perfect=not nest.inner and len(nest.statements) <= 1, analysable=False, reason=reason)
        if a.in_row_never and not assume_in_row:
            o = a.in_row_failing[0]
            reason = (f"{src.path}:{o.line}:{o.col}: refused: {o.what.replace(' stays in ', ' leaves ')} whenever "
                      "the nest runs")
            return NestReport(**base, depth=len(nest.perfect), iterators=nest.iterators, loops=_loop_json(nest),
                              perfect=not nest.inner and len(nest.statements) <= 1, analysable=False, reason=reason)
        deps = tuple({"kind": d.kind, "array": d.array, "source": d.source, "sink": d.sink,
                      "distance": list(d.distance) if d.distance is not None else None,
                      "direction": list(d.direction)} for d in a.dependences())
        perfect = not nest.inner
        return NestReport(**base, depth=len(nest.perfect), iterators=nest.iterators, loops=_loop_json(nest),
                          perfect=perfect, analysable=True, dependences=deps,
                          permutable_bands=_maximal_bands(a, nest.iterators), statements=len(nest.statements),
                          assumptions=_assumptions(nest) + _in_row(nest, a))
    except LooptileError as exc:
        depth, node = 0, site.node
        while node is not None:
            depth += 1
            node = extract.single_for(node.stmt)
        return NestReport(**base, depth=depth, iterators=(), loops=(), perfect=False, analysable=False,
                          reason=exc.headline())


def _in_row(nest: Nest, a: NestAnalysis) -> tuple[str, ...]:
    """What the dependences above assume about flattened subscripts (A[i*ld + j])."""
    flat = [x for x in nest.arrays if x.rows]
    if not flat:
        return ()
    shapes = ", ".join(f"{x.name} as rows of {' x '.join(x.rows)}" for x in flat)
    if not a.in_row_failing:
        return (f"reads {shapes}; each flattened subscript stays in its row (proven)",)
    if a.assume_in_row:
        return (f"reads {shapes}; each flattened subscript stays in its row (asserted with --assume-in-row)",)
    try:
        test = ctest.condition(a.in_row_conditions(), {p.name: p for p in nest.params})
    except BoundsNotAffine:
        test = None
    when = f"when {test} (tile tests it at run time)" if test else "(not proven; tile needs --assume-in-row)"
    return (f"reads {shapes}; each flattened subscript stays in its row {when}",)


def _assumptions(nest: Nest) -> tuple[str, ...]:
    shared = [a.name for a in nest.arrays if not a.local and a.ndims > 0]
    return (f"the arrays {', '.join(shared)} do not overlap",) if len(shared) > 1 else ()


def text_table(path: str, reports: list[NestReport]) -> str:
    rows = [("NEST", "LINE", "DEPTH", "LOOPS", "PERFECT", "ANALYSABLE", "DEPENDENCES", "TILEABLE BANDS")]
    for r in reports:
        deps = sorted({f"{d['array']}:{d['kind']}" + (
            "(" + ",".join(map(str, d["distance"])) + ")" if d["distance"] is not None
            else "(" + ",".join(d["direction"]) + ")") for d in r.dependences})
        rows.append((
            " ".join(r.selectors), str(r.line), str(r.depth), ",".join(r.iterators) or "-",
            "yes" if r.perfect else "no", "yes" if r.analysable else "no",
            " ".join(deps) if r.analysable else "-",
            " ".join("(" + ",".join(b) + ")" for b in r.permutable_bands) or "-",
        ))
    widths = [max(len(row[k]) for row in rows) for k in range(len(rows[0]))]
    lines = [f"{path}:"]
    for row in rows:
        lines.append("  " + "  ".join(c.ljust(w) for c, w in zip(row, widths)).rstrip())
    notes = list(dict.fromkeys(r.reason for r in reports if r.reason))  # a nest inside another repeats it
    if notes:
        lines.append("  not analysable:")
        lines += ["    " + n for n in notes]
    if any(r.assumptions for r in reports):
        lines.append("  the analysis assumes that distinct arrays do not overlap")
    for r in reports:
        lines += [f"  {r.selectors[0]}: {a}" for a in r.assumptions if "flattened" in a]
    return "\n".join(lines)
