"""The simulate job: the array-element accesses of a nest, before and after a rewrite, through
an ideal LRU cache hierarchy (the model is templates/cachesim.h, see looptile/cachesim.py).

The trace follows the code as it runs: each statement of the nest, in the original file and in
the rewritten one, is preceded by one ``lt_trace(&element, array, is_write)`` per array-element
access, in the order the analysis reads them (for a compound assignment the left-hand element
first, then the reads left to right, then the write), and a generated driver calls the kernel
once. So scalar replacement and the copies of unroll-and-jam change the trace exactly as they
change the code. The program is compiled for speed (-O2) and streams the trace into the model:
nothing is stored.

Layout (documented): row-major, element sizes from the C types; the traced arrays are placed
one after another from address 0, in the order of their first access in the original nest,
each base aligned to the largest line size of the hierarchy.
"""
from __future__ import annotations

import os
import shutil
import sys
import tempfile
from dataclasses import dataclass, field

from pycparser import c_ast, c_generator

from . import frontend, harness, pipeline, toolchain, verify
from .affine import column_on_line
from .cachegeom import Level
from .emit import _template_dir, render
from .errors import InternalError, LooptileError, UsageError
from .flags import CompileFlags
from .frontend import TranslationUnit
from .model import Nest
from .source import read_source, statement_end
from .splice import Edit, apply_edits
from .transform.tile import TileRequest

MODEL_NOTE = ("an ideal LRU cache hierarchy (write-back, write-allocate, levels not inclusive), not this machine's "
              "replacement policy or prefetchers")


@dataclass(frozen=True)
class SimulateOptions:
    levels: tuple[Level, ...]
    params: dict[str, int] = field(default_factory=dict)
    only: tuple[str, ...] = ()  # --only: trace these arrays alone
    progress: bool = False  # progress lines on stderr while the model runs


@dataclass(frozen=True)
class SimulateReport:
    arrays: tuple[str, ...]  # traced arrays, in layout order
    original: object  # cachesim.SimResult
    transformed: object | None
    nest: Nest
    notes: tuple[str, ...] = ()


# ---------------------------------------------------------------- instrumentation

class _Unsupported(Exception):
    pass


def _accesses(node: c_ast.Node, traced: dict[str, int], out: list[tuple[c_ast.ArrayRef, bool]]) -> None:
    """The traced array-element accesses of an expression, in the analysis' order."""
    def expr(n):
        if n is None:
            return
        if isinstance(n, c_ast.Assignment):
            if n.op != "=":
                lval(n.lvalue, False)
            expr(n.rvalue)
            lval(n.lvalue, True)
        elif isinstance(n, c_ast.UnaryOp):
            if n.op in ("++", "--", "p++", "p--"):
                lval(n.expr, False)
                lval(n.expr, True)
            elif n.op not in ("sizeof", "&"):
                expr(n.expr)
        elif isinstance(n, c_ast.BinaryOp):
            expr(n.left)
            if n.op in ("&&", "||") and _has_traced(n.right, traced):
                raise _Unsupported("an access on the right of && or || runs only sometimes")
            expr(n.right)
        elif isinstance(n, c_ast.TernaryOp):
            expr(n.cond)
            if _has_traced(n.iftrue, traced) or _has_traced(n.iffalse, traced):
                raise _Unsupported("an access in a branch of ?: runs only sometimes")
        elif isinstance(n, c_ast.Cast):
            expr(n.expr)
        elif isinstance(n, c_ast.ExprList):
            for e in n.exprs:
                expr(e)
        elif isinstance(n, c_ast.FuncCall):
            if n.args is not None:
                expr(n.args)
        elif isinstance(n, c_ast.ArrayRef):
            lval(n, False)

    def lval(n, write):
        if not isinstance(n, c_ast.ArrayRef):
            return
        base = n
        subs = []
        while isinstance(base, c_ast.ArrayRef):
            subs.insert(0, base.subscript)
            base = base.name
        for s in subs:
            expr(s)
        if isinstance(base, c_ast.ID) and base.name in traced:
            out.append((n, write))

    expr(node)


def _has_traced(node: c_ast.Node, traced: dict[str, int]) -> bool:
    found: list[tuple[c_ast.ArrayRef, bool]] = []
    try:
        _accesses(node, traced, found)
    except _Unsupported:
        return True
    return bool(found)


def _statements(body: c_ast.Node, first: int, last: int):
    """(node, kind) of the statements of the region: "stmt" (wrapped in braces), "decl"
    (prefixed) and "if" (its condition; wrapped)."""
    def walk(n):
        if n is None:
            return
        inside = n.coord is not None and first <= n.coord.line <= last
        if isinstance(n, c_ast.Compound):
            for item in n.block_items or []:
                walk(item)
        elif isinstance(n, c_ast.For):
            walk(n.stmt)
        elif isinstance(n, (c_ast.While, c_ast.DoWhile)):
            walk(n.stmt)
        elif isinstance(n, c_ast.If):
            if inside:
                yield_list.append((n, "if"))
            walk(n.iftrue)
            walk(n.iffalse)
        elif isinstance(n, c_ast.Decl):
            if inside and n.init is not None:
                yield_list.append((n, "decl"))
        elif isinstance(n, (c_ast.Assignment, c_ast.UnaryOp, c_ast.FuncCall, c_ast.ExprList, c_ast.BinaryOp,
                            c_ast.TernaryOp, c_ast.Cast, c_ast.ArrayRef)):
            if inside:
                yield_list.append((n, "stmt"))
    yield_list: list[tuple[c_ast.Node, str]] = []
    walk(body)
    return yield_list


def instrument(tu: TranslationUnit, function: str, first: int, last: int, traced: dict[str, int]) -> bytes:
    """The file of ``tu`` with trace calls before every statement on lines first..last of
    ``function`` that touches a traced array."""
    func = next(f for f in tu.functions if f.name == function)
    gen = c_generator.CGenerator()
    src = tu.source
    edits = []
    for node, kind in _statements(func.node.body, first, last):
        found: list[tuple[c_ast.ArrayRef, bool]] = []
        try:
            _accesses(node.cond if kind == "if" else node.init if kind == "decl" else node, traced, found)
        except _Unsupported as exc:
            raise UsageError(f"simulate cannot trace this statement: {exc.args[0]}", path=src.path,
                             line=node.coord.line) from None
        if not found:
            continue
        line = node.coord.line
        col = column_on_line(tu, line, node) or node.coord.column
        start = src.offset(line, col)
        calls = "".join(f"lt_trace(&({gen.visit(ref)}), {traced[_base(ref)]}, {int(w)}); " for ref, w in found)
        if kind == "decl":  # before the declaration's first token (its position is the name's)
            k = tu.code_index(start)
            while k > 0 and tu.tokens[k - 1].text not in (";", "{", "}"):
                k -= 1
            start = tu.tokens[k].start
            edits.append(Edit(start, start, calls))
            continue
        k = tu.code_index(start)
        end = statement_end(tu.tokens, k)
        if end < 0 or tu.tokens[k].start != start:
            raise InternalError(f"simulate cannot find the end of the statement at line {line}", path=src.path,
                                line=line)
        edits.append(Edit(start, start, "{ " + calls))
        edits.append(Edit(tu.tokens[end].end, tu.tokens[end].end, " }"))
    return apply_edits(src.data, edits)


def _base(ref: c_ast.ArrayRef) -> str:
    while isinstance(ref, c_ast.ArrayRef):
        ref = ref.name
    return ref.name


# ---------------------------------------------------------------- the job

def _load_bytes(data: bytes, like: str, flags: CompileFlags, tmp: str) -> TranslationUnit:
    """A translation unit of ``data`` as if it were the file ``like`` (its includes resolve from
    that file's directory)."""
    path = os.path.join(tmp, os.path.basename(like))
    with open(path, "wb") as fh:
        fh.write(data)
    extra = CompileFlags(args=(f"-I{os.path.dirname(os.path.abspath(like))}",))
    return frontend.load(read_source(path), flags.plus(extra))


def _traced(tu: TranslationUnit, nest: Nest, spec: harness.KernelSpec, only: tuple[str, ...]) -> list[str]:
    names = []
    for st in nest.statements:
        for acc in st.accesses:
            info = nest.array(acc.array)
            if not info.local and info.ndims > 0 and info.name not in names:
                names.append(info.name)
    if only:
        unknown = [n for n in only if n not in names]
        if unknown:
            raise UsageError(f"--only {','.join(only)}: the nest touches no array named {unknown[0]} (its arrays: "
                             f"{', '.join(names) or 'none'})", path=nest.path, line=nest.line)
        names = [n for n in names if n in only]
    known = {p.name for p in spec.arrays()} | {g.name for g in spec.globals}
    for n in names:
        if n not in known:
            raise UsageError(f"simulate cannot place '{n}' in memory (only array parameters and file-scope arrays "
                             "of the kernel); leave it out with --only", path=nest.path, line=nest.line)
    return names


def _driver(spec: harness.KernelSpec, values: dict[str, int], counts: list[int], traced: list[str],
            include: str, levels: tuple[Level, ...]) -> str:
    scalars, arrays, args = [], [], []
    pointer_counts = iter(counts)
    for p in spec.params:
        if p.kind == "int":
            scalars.append({"decl": f"{p.ctype.spelling} {p.name}", "value": f"({p.ctype.spelling}){values[p.name]}"})
            args.append(p.name)
        elif p.kind == "float":
            scalars.append({"decl": f"{p.ctype.spelling} {p.name}", "value": "1"})
            args.append(p.name)
        else:
            if p.dims and all(p.dims):
                count = " * ".join(f"(size_t)({d})" for d in p.dims)
            else:
                rest = " * ".join(f"(size_t)({d})" for d in p.dims[1:]) or "1"
                count = f"(size_t){next(pointer_counts)} * {rest}"
            arrays.append({"name": p.name, "elem": p.ctype.spelling or "double", "count": count})
            args.append(f"(void *)looptile_a_{p.name}")
    by_name = {a["name"]: a for a in arrays}
    entries = []
    for k, name in enumerate(traced):
        if name in by_name:
            a = by_name[name]
            entries.append({"id": k, "base": f"looptile_a_{name}",
                            "bytes": f"({a['count']}) * sizeof(*looptile_a_{name})"})
        else:
            entries.append({"id": k, "base": f"&{name}", "bytes": f"sizeof {name}"})
    return render("simulate.c.j2", kernel=spec.function, include=include, narrays=max(len(traced), 1),
                  scalars=scalars, arrays=arrays, traced=entries, call_args=", ".join(args),
                  sizes=[str(lv.size) for lv in levels], ways=[str(lv.ways) for lv in levels],
                  lines=[str(lv.line) for lv in levels], align=max(lv.line for lv in levels))


def _run_version(data: bytes, tu: TranslationUnit, nest: Nest, first: int, last: int, traced: list[str],
                 spec, values, counts, opts: SimulateOptions, tmp: str, label: str):
    from .cachesim import SimResult
    work = os.path.join(tmp, label)
    os.makedirs(work)
    vtu = _load_bytes(data, tu.source.path, tu.flags, work)
    ids = {n: k for k, n in enumerate(traced)}
    instrumented = instrument(vtu, nest.function, first, last, ids)
    kernel = os.path.join(work, "kernel.c")
    with open(kernel, "wb") as fh:
        fh.write(instrumented)
    shutil.copy(os.path.join(_template_dir(), "cachesim.h"), os.path.join(work, "cachesim.h"))
    driver = os.path.join(work, "driver.c")
    with open(driver, "w", encoding="latin-1") as fh:
        fh.write(_driver(spec, values, counts, traced, kernel, opts.levels))
    include_dir = os.path.dirname(os.path.abspath(tu.source.path))
    b = toolchain.build_fast(driver, os.path.join(work, "sim"), tu.flags, include_dir)
    if not b.ok:
        raise InternalError(f"the simulation program for the {label} nest does not compile: "
                            + " | ".join(ln for ln in b.messages.splitlines() if "error" in ln)[:600],
                            path=nest.path, line=nest.line)
    env = {"LOOPTILE_PROGRESS": "1"} if opts.progress else {}
    if opts.progress:
        print(f"looptile simulate: running the {label} nest", file=sys.stderr)
    r = toolchain.run(b.exe, [], None, env, stderr_to_terminal=opts.progress)
    if r.returncode != 0:
        raise InternalError(f"the simulation program for the {label} nest failed (exit {r.returncode}): "
                            f"{r.stderr[-400:]}", path=nest.path, line=nest.line)
    return SimResult.from_json(r.stdout.decode("latin-1"), list(opts.levels), traced)


def simulate(tu: TranslationUnit, sel: str, req: TileRequest | None, topts: pipeline.TileOptions,
             opts: SimulateOptions) -> SimulateReport:
    """Simulate the nest ``sel`` as written and, with ``req``, as looptile rewrites it."""
    notes: list[str] = []
    if req is not None:
        outcome = pipeline.tile(tu, sel, req, topts)
        nest = outcome.nest
        notes += list(outcome.notes)
    else:
        site = pipeline.select(tu, sel)
        nest, _ = pipeline.analyse(tu, site, topts.assume_pure, topts.assumptions)
        outcome = None
    spec = harness.kernel_spec(tu, nest.function)
    ints = [p.name for p in spec.params if p.kind == "int"]
    missing = [n for n in ints if n not in opts.params]
    if missing:
        raise UsageError(f"give the size of every integer parameter of '{nest.function}' with --params, e.g. "
                         f"--params {','.join(f'{n}=64' for n in missing)}")
    runs = verify.parameter_sets(spec, verify._analyses(tu, nest.function),
                                 verify.VerifyOptions(params=(dict(opts.params),)))
    values, counts = runs[0]
    traced = _traced(tu, nest, spec, opts.only)
    src = tu.source
    first, last = nest.line, src.line_col(nest.end)[0]
    with tempfile.TemporaryDirectory(prefix="looptile-simulate-") as tmp:
        try:
            original = _run_version(src.data, tu, nest, first, last, traced, spec, values, counts, opts, tmp,
                                    "original")
            transformed = None
            if outcome is not None:
                delta = outcome.new.count(b"\n") - src.data.count(b"\n")
                transformed = _run_version(outcome.new, tu, nest, first, last + delta, traced, spec, values, counts,
                                           opts, tmp, "transformed")
        except LooptileError as exc:
            if exc.path and exc.path.startswith(tmp):
                exc.path = src.path
            raise
    return SimulateReport(tuple(traced), original, transformed, nest, tuple(notes))


# ---------------------------------------------------------------- output

def as_json(report: SimulateReport, levels: tuple[Level, ...], geometry_note: str | None) -> dict:
    return {
        "original": report.original.to_json(),
        "transformed": report.transformed.to_json() if report.transformed is not None else None,
        "arrays": list(report.arrays),
        "geometry": [lv.spec() for lv in levels],
        "geometry_source": geometry_note or "given",
        "model": MODEL_NOTE,
    }


def _row(d: dict | None) -> list[str]:
    if d is None:
        return ["", "", "", ""]
    acc = d["accesses"]
    ratio = f"{d['misses'] / acc:.4f}" if acc else "-"
    return [str(acc), str(d["hits"]), str(d["misses"]), ratio]


def as_text(report: SimulateReport, levels: tuple[Level, ...], geometry_note: str | None,
            params: dict[str, int]) -> str:
    doc = as_json(report, levels, geometry_note)
    orig, new = doc["original"], doc["transformed"]
    head = ["level", "array", "accesses", "hits", "misses", "miss ratio"]
    if new is not None:
        head += ["accesses", "hits", "misses", "miss ratio"]
    rows = [head]
    for k, lv in enumerate(orig["levels"]):
        nl = new["levels"][k] if new is not None else None
        rows.append([lv["name"], "(all)"] + _row(lv) + (_row(nl) if new is not None else []))
        for name in report.arrays:
            rows.append(["", name] + _row(lv["arrays"].get(name)) +
                        (_row(nl["arrays"].get(name)) if new is not None else []))
    widths = [max(len(r[c]) for r in rows) for c in range(len(head))]
    lines = [f"{report.nest.path}:{report.nest.line}: nest of {report.nest.function}, "
             + ", ".join(f"{k}={v}" for k, v in params.items()),
             "model: " + MODEL_NOTE,
             "geometry: " + ", ".join(doc["geometry"]) + (f" ({geometry_note})" if geometry_note else ""),
             "layout: row-major; arrays " + ", ".join(report.arrays) + " one after another, line-aligned", ""]
    if new is not None:
        left = sum(widths[:2]) + 2 * 2
        span = sum(widths[2:6]) + 3 * 2
        lines.append(" " * left + "original".ljust(span) + "  transformed")
    for r in rows:
        lines.append("  ".join(c.rjust(w) if i >= 2 else c.ljust(w) for i, (c, w) in enumerate(zip(r, widths)))
                     .rstrip())
    for label, d in (("original", orig), ("transformed", new)):
        if d is None:
            continue
        wb = ", ".join(f"{lv['name']} {lv.get('writebacks', 0)}" for lv in d["levels"])
        lines.append(f"write-backs of dirty lines (not demand accesses), {label}: {wb}")
    for label, d in (("original", orig), ("transformed", new)):
        if d is None:
            continue
        m = d["memory_bytes"]
        lines.append(f"memory traffic, {label}: {m['read']} bytes read + {m['write']} bytes written back = "
                     f"{m['total']} bytes")
    if new is not None and orig["memory_bytes"]["total"]:
        lines.append(f"transformed / original memory traffic: "
                     f"{new['memory_bytes']['total'] / orig['memory_bytes']['total']:.3f}")
    return "\n".join(lines)
