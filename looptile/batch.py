"""The apply job: carry out the directives of many files, in parallel, one result value per file.

Per file: find the directives, carry out each one that is legal (the tile job, with the
directive's pragma replaced by the guard comment), leave each refused one and its nest
exactly as they were, and combine the rewrites, which are disjoint, into the new bytes.
Every rewrite is proven against the file as it is on disk.  The worker never raises: a
file that cannot be read or parsed, or a looptile bug, becomes a failed ``FileOutcome``
and the other files go on.  Nothing here writes a file; cli.py does.
"""
from __future__ import annotations

import os
import shlex
import traceback
from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor, as_completed
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass, fields, replace

from . import directives, pipeline
from .cachegeom import machine_levels
from .directives import Found
from .errors import InputError, InternalError, LooptileError, Refusal, UsageError
from .flags import CompileFlags, from_compile_db
from .frontend import LoopSite, TranslationUnit
from .splice import Edit, apply_edits
from .transform.tile import TileRequest
from .verify import VerifyOptions, verify

REPORT_VERSION = 1


@dataclass(frozen=True)
class ApplyOptions:
    flags: CompileFlags = CompileFlags()
    compile_db: str | None = None  # flags per file from compile_commands.json, before ``flags``
    assume_pure: frozenset[str] = frozenset()
    assumptions: tuple[str, ...] = ()
    check: VerifyOptions | None = None  # --verify: compile and run each rewrite first
    assume_in_row: bool = False  # --assume-in-row, for every directive
    cache: tuple = ()  # --cache: cachegeom.Levels for tile(i=auto) (default: the machine's)

    def flags_for(self, path: str) -> CompileFlags:
        return from_compile_db(self.compile_db, path).plus(self.flags) if self.compile_db else self.flags

    def command(self, path: str, p: directives.Pragma) -> str:
        """The ``made by:`` text of the guard comment."""
        parts = ["looptile", "apply", path]
        parts += ["--compile-db", self.compile_db] if self.compile_db else list(self.flags.args)
        parts += [a for name in sorted(self.assume_pure) for a in ("--assume-pure", name)]
        parts += [a for cond in self.assumptions for a in ("--assume", cond)]
        parts += ["--assume-in-row"] if self.assume_in_row else []
        return f"{' '.join(shlex.quote(x) for x in parts)} (directive at line {p.line}: {p.text})"


@dataclass(frozen=True)
class NestInfo:
    selector: str
    function: str
    line: int
    column: int


@dataclass(frozen=True)
class DirectiveOutcome:
    line: int
    column: int
    kind: str
    text: str
    status: str  # "carried_out", "refused", "error" or "inactive"
    nest: NestInfo | None = None
    rewrite: str | None = None  # what was done (the guard comment's first line)
    message: str | None = None  # headline: file:line:col: refused|error: ...
    rendered: str | None = None  # the message with the source line, caret and details
    details: tuple[str, ...] = ()
    notes: tuple[str, ...] = ()
    verify: tuple[str, ...] | None = None  # the compile-and-run check's lines (--verify)
    internal: bool = False


@dataclass(frozen=True)
class FileOutcome:
    path: str
    original: bytes
    new: bytes
    directives: tuple[DirectiveOutcome, ...] = ()
    error: str | None = None  # the file could not be processed: headline
    rendered_error: str | None = None
    internal: bool = False
    unread: bool = False  # the file could not even be read (nothing to copy)

    @property
    def status(self) -> str:
        if self.error is not None:
            return "failed"
        return "rewritten" if self.new != self.original else "unchanged"

    def count(self, status: str) -> int:
        return sum(d.status == status for d in self.directives)


# ---------------------------------------------------------------- files

def c_files(paths: list[str], exclude: str | None = None) -> list[str]:
    """The files named, and the ``.c`` files below the directories named (sorted, no duplicates).
    A path that does not exist is a usage error."""
    out: list[str] = []
    skip = os.path.realpath(exclude) if exclude else None
    for p in paths:
        if os.path.isdir(p):
            below = []
            for root, dirs, files in os.walk(p):
                dirs[:] = [d for d in dirs if not d.startswith(".") and os.path.realpath(os.path.join(root, d)) != skip]
                below += [os.path.join(root, f) for f in files if f.endswith(".c")]
            out += sorted(below)
        elif os.path.isfile(p):
            out.append(p)
        else:
            raise UsageError(f"{p}: no such file or directory")
    seen: set[str] = set()
    unique = []
    for f in out:
        key = os.path.realpath(f)
        if key not in seen:
            seen.add(key)
            unique.append(f)
    return unique


def common_base(paths: list[str]) -> str:
    """The directory that -o mirrors: the common parent of the directories named and of the
    directories holding the files named."""
    dirs = [os.path.abspath(p) if os.path.isdir(p) else os.path.dirname(os.path.abspath(p)) for p in paths]
    return os.path.commonpath(dirs)


def mirrored(base: str, outdir: str, path: str) -> str:
    return os.path.join(outdir, os.path.relpath(os.path.abspath(path), base))


# ---------------------------------------------------------------- one file

def process_file(path: str, opts: ApplyOptions) -> FileOutcome:
    """Carry out the directives of one file; never raises."""
    original = b""
    try:
        with open(path, "rb") as fh:
            original = fh.read()
        if not directives.mentions_directive(original.decode("latin-1")):
            return FileOutcome(path, original, original)  # nothing to do: no need to parse it
        try:
            flags = opts.flags_for(path)
        except LooptileError as exc:  # say which file: the message is about the database
            raise InputError(f"{exc.message} (compilation database {exc.path})", path=path) from None
        tu = pipeline.load(path, flags)
        original = tu.source.data
        found = directives.find(tu)
        results = [carry_out(tu, f, opts) for f in found]
        bug = next((r.outcome for r in results if r.outcome.internal), None)
        if bug is not None:  # a looptile bug in one rewrite: leave the whole file as it is
            return FileOutcome(path, original, original, error=bug.message, internal=True,
                               rendered_error=f"{bug.rendered}\n  (nothing in this file was changed)")
        outcomes, new = combine(tu, results)
        return FileOutcome(path, original, new, outcomes)
    except OSError as exc:
        msg = f"{path}: error: cannot read the file; {exc.strerror}"
        return FileOutcome(path, original, original, error=msg, rendered_error=msg, unread=True)
    except LooptileError as exc:
        if exc.path is None:
            exc.path = path
        return FileOutcome(path, original, original, error=exc.headline(), rendered_error=exc.render(),
                           internal=isinstance(exc, InternalError))
    except Exception as exc:  # noqa: BLE001 - a looptile bug must not stop the other files
        msg = (f"{path}: error: internal error: {type(exc).__name__}: {exc}; please report it with the input file "
               "(nothing in this file was changed)")
        return FileOutcome(path, original, original, error=msg, rendered_error=msg + "\n" + traceback.format_exc(),
                           internal=True)


@dataclass(frozen=True)
class _Result:
    outcome: DirectiveOutcome
    edit: Edit | None = None  # the rewrite, as one edit of the original bytes
    site: LoopSite | None = None  # the loop the directive applies to


def _outcome(f: Found, status: str, **kw) -> DirectiveOutcome:
    return DirectiveOutcome(f.pragma.line, f.pragma.column, f.pragma.kind, f.pragma.text, status, **kw)


def _failed(f: Found, exc: LooptileError, nest: NestInfo | None = None) -> _Result:
    status = "refused" if isinstance(exc, Refusal) else "error"
    if exc.line is not None and exc.line != f.pragma.line and exc.path is not None:
        # the position is the nest's or a construct's in it: say which directive this is about
        exc.details = [f"(this is why the directive at {exc.path}:{f.pragma.line}:{f.pragma.column} is not "
                       f"carried out: {f.pragma.text})"] + list(exc.details)
    return _Result(_outcome(f, status, nest=nest, message=exc.headline(), rendered=exc.render(),
                            details=tuple(exc.details), internal=isinstance(exc, InternalError)), site=f.site)


def _nest_info(tu: TranslationUnit, f: Found) -> NestInfo | None:
    s = f.site
    if s is None or s.token_index is None:
        return None
    sel = f"{s.function}:{s.top_index}" if s.parent is None and s.top_index else f"L{s.line}"
    col = tu.source.line_col(tu.tokens[s.token_index].start)[1]
    return NestInfo(sel, s.function, s.line, col)


def carry_out(tu: TranslationUnit, f: Found, opts: ApplyOptions) -> _Result:
    """One directive: the rewrite as an edit, or why not."""
    if f.inactive:
        return _Result(_outcome(f, "inactive", notes=("this directive is in a conditional branch that the "
                                                      "preprocessor leaves out with these flags; not carried out",)))
    nest = _nest_info(tu, f)
    if f.problem is not None:
        return _failed(f, f.problem, nest)
    d, path = f.directive, tu.source.path
    assert d is not None and f.site is not None and nest is not None
    topts = pipeline.TileOptions(opts.assumptions, opts.assume_pure, False, opts.command(path, d.pragma),
                                 d.split_fallback, directive=d.pragma.offset, assume_in_row=opts.assume_in_row)
    try:
        if pipeline.select(tu, nest.selector) is not f.site:
            raise InternalError(f"selector {nest.selector} does not name the loop after the directive", path=path,
                                line=nest.line, column=nest.column)
        outcome = run_job(tu, nest.selector, d, topts, opts.cache)
        lines = None
        if opts.check is not None:
            lines = _verify(tu, outcome, d, opts.check)
        edit = rewrite_edit(tu, d, outcome)
    except UsageError as exc:
        return _failed(f, _as_directive_error(exc, f, tu), nest)
    except LooptileError as exc:
        if exc.path is None:
            exc.path = path
        exc.message = in_directive_words(exc.message, f.pragma.kind)
        return _failed(f, exc, nest)
    return _Result(_outcome(f, "carried_out", nest=nest, rewrite=outcome.plan.describe(), notes=outcome.notes,
                            verify=lines), edit, f.site)


def _copy_jobs():
    """The module with the jam and unroll jobs (``jam(tu, sel, JamRequest, opts, scalarize)``,
    ``unroll(tu, sel, factor, opts)``): the pipeline's when it has them, else the jam job's;
    None in a version without them."""
    if hasattr(pipeline, "jam") and hasattr(pipeline, "unroll"):
        return pipeline
    try:
        from . import jam_job
    except ImportError:
        return None
    return jam_job if hasattr(jam_job, "jam") and hasattr(jam_job, "unroll") else None


def _tile_takes(*names: str) -> bool:
    """Whether the tile job takes these requests (``TileRequest.jam``, ``.levels``...)."""
    return set(names) <= {f.name for f in fields(TileRequest)}


def run_job(tu: TranslationUnit, sel: str, d: directives.Directive, topts: pipeline.TileOptions,
            cache: tuple = ()):
    """The job a directive asks for; what this version cannot do is refused, never silently
    ignored."""
    p = d.pragma
    where = dict(path=tu.source.path, line=p.line, column=p.column, source_line=tu.source.line_text(p.line))
    unavailable = Refusal("not carried out: unroll-and-jam is not available in this version; the directive and "
                          "its nest are left as they are", **where)
    if d.tile is not None:  # tiling or a permutation, perhaps with unroll-and-jam inside the tiles
        req = d.tile
        if d.auto is not None:
            from .autosize import AutoSizing
            topts = replace(topts, autosize=AutoSizing(d.auto, tuple(cache or machine_levels()[0]),
                                                       named="tile(...)"))
        if d.jam_auto:
            from .regtile import RegisterTiling, machine_registers
            topts = replace(topts, regtile=RegisterTiling(machine_registers()))
        if d.levels:
            if not _tile_takes("levels"):
                line, col = tu.source.line_col(d.level_offset or p.offset)
                raise Refusal("not carried out: multi-level tiling is not supported yet: give one tile(...) clause "
                              "(this one is a second level)", path=tu.source.path, line=line, column=col,
                              source_line=tu.source.line_text(line))
            req = replace(req, levels=d.levels)
        if d.jam is not None or d.scalarize:
            if not _tile_takes("jam", "scalarize"):
                raise unavailable
            req = replace(req, jam=d.jam.factors if d.jam else (), scalarize=d.scalarize)
        return pipeline.tile(tu, sel, req, topts)
    jobs = _copy_jobs()
    if jobs is None:
        raise unavailable
    if d.jam is not None:
        from .transform.jam import JamRequest
        extra = {"scalarize": True} if d.scalarize else {}
        return jobs.jam(tu, sel, JamRequest(d.jam.factors), topts, **extra)
    assert d.unroll is not None
    if d.unroll.full:
        if not hasattr(jobs, "unroll_full"):
            raise Refusal("not carried out: full unrolling is not available in this version; write partial(N)",
                          **where)
        return jobs.unroll_full(tu, sel, topts)
    if d.unroll.factor is None:
        raise Refusal("not carried out: the directive leaves the unroll factor to the implementation, and "
                      "looptile needs one; write partial(N)", **where)
    return jobs.unroll(tu, sel, d.unroll.factor, topts)


def _verify(tu: TranslationUnit, outcome, d: directives.Directive, check: VerifyOptions) -> tuple[str, ...]:
    sizes = tuple(s for _, s in d.tile.sizes) if d.tile is not None else ()
    sizes += tuple(s for level in d.levels for _, s in level)
    if d.auto is not None:  # the sizes the cache model chose
        sizes = tuple(outcome.plan.sizes) + tuple(s for level in outcome.plan.levels for _, s in level)
    sizes += tuple(u for _, u in d.jam.factors) if d.jam is not None else ()
    sizes += tuple(u for _, u in outcome.plan.jam) if d.jam_auto else ()  # the factors the register model chose
    sizes += (d.unroll.factor,) if d.unroll is not None and d.unroll.factor is not None else ()
    nest = outcome.nest
    where = dict(path=nest.path, line=nest.line, column=nest.col)
    try:
        report = verify(tu, outcome.new, nest.function, replace(check, tile_sizes=sizes))
    except LooptileError as exc:
        raise Refusal(f"--verify could not check this rewrite ({exc.message}), so it is not written", **where,
                      details=list(exc.details)) from None
    if report.status != 0:
        raise Refusal(f"--verify did not pass, so the rewrite is not written: {report.verdict}", **where,
                      details=list(report.lines[:-1][-8:]))
    return report.lines


_OPTION_NAMES = {"omp tile": (("--sizes", "sizes(...)"),),
                 "omp unroll": (("--factor", "partial(...)"),),
                 "looptile": (("--sizes", "tile(...)"), ("--order", "order(...)"), ("--factors", "jam(...)"),
                              ("--jam", "jam(...)"), ("--scalarize", "scalarize"),
                              ("--remainder split", "remainder(split)"), ("--remainder clamp", "remainder(clamp)"),
                              ("--remainder", "remainder(...)"))}


def in_directive_words(message: str, kind: str) -> str:
    """A message of the tile or jam job with its option names replaced by the directive's clauses."""
    for option, clause in _OPTION_NAMES.get(kind, ()):
        message = message.replace(option, clause)
    return message


def _as_directive_error(exc: UsageError, f: Found, tu: TranslationUnit) -> LooptileError:
    """A request the nest cannot take (a loop the nest does not have...) is an error of the
    directive: said in the directive's words, at the directive."""
    msg = in_directive_words(exc.message, f.pragma.kind)
    src = tu.source
    details = list(exc.details)
    if exc.line is not None and exc.line != f.pragma.line:
        details.insert(0, f"the nest is at {src.path}:{exc.line}:{exc.column or 1}")
    return UsageError(msg, path=src.path, line=f.pragma.line, column=f.pragma.column, details=details,
                      source_line=src.line_text(f.pragma.line))


def rewrite_edit(tu: TranslationUnit, d: directives.Directive, outcome) -> Edit:
    """The rewrite of one directive as one edit of the original bytes: from the directive's
    line to the end of the nest (everything else of ``outcome.new`` is the original)."""
    old, new = tu.source.data, outcome.new
    removal = pipeline.directive_removal(tu, d.pragma.offset)
    start = min([outcome.nest.start] + [e.start for e in removal])
    end = outcome.nest.end
    tail = len(old) - end
    if new[:start] != old[:start] or new[len(new) - tail:] != old[end:]:
        raise InternalError("the rewrite changed the file outside the directive and its nest; this is a looptile "
                            "bug, please report it", path=tu.source.path, line=d.pragma.line)
    return Edit(start, end, new[start:len(new) - tail].decode("latin-1"))


def combine(tu: TranslationUnit, results: list[_Result]) -> tuple[tuple[DirectiveOutcome, ...], bytes]:
    """The outcomes, and the original bytes with every carried-out rewrite; a rewrite that
    would overlap another one (nested nests) is left for a second run."""
    accepted: list[_Result] = []
    out: list[DirectiveOutcome] = []
    for r in results:
        if r.edit is not None:
            clash = next((a for a in accepted if a.edit and r.edit.start < a.edit.end and a.edit.start < r.edit.end),
                         None)
            if clash is not None:
                o = r.outcome
                msg = (f"{tu.source.path}:{o.line}:{o.column}: refused: the nest of this directive overlaps the one of "
                       f"the directive at line {clash.outcome.line}, which is carried out in this run; run apply "
                       "again to carry out this one")
                r = _Result(replace(o, status="refused", rewrite=None, message=msg, rendered=msg, verify=None))
            else:
                accepted.append(r)
        out.append(r.outcome)
    out = [_note_inner(o, r.site, accepted) for o, r in zip(out, results)]
    new = apply_edits(tu.source.data, [a.edit for a in accepted if a.edit is not None])
    return tuple(out), new


def _note_inner(o: DirectiveOutcome, site: LoopSite | None, accepted: list[_Result]) -> DirectiveOutcome:
    """A refused directive whose nest holds a directive carried out in this run: say so (a second
    run would meet the generated loops, which looptile does not analyse)."""
    if o.status != "refused" or site is None:
        return o
    inner = [a.outcome.line for a in accepted if a.site is not None and pipeline.inside(a.site, site)]
    if not inner:
        return o
    note = (f"the directive at line {inner[0]} inside this nest is carried out in this run, and looptile does not "
            "analyse the loops it generates, so this one stays refused; to transform both, give one directive on "
            "this nest that names their loops")
    return replace(o, details=o.details + (note,), rendered=(o.rendered or "") + "\n  " + note)


# ---------------------------------------------------------------- many files

def default_jobs() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def run(files: list[str], opts: ApplyOptions, jobs: int,
        on_done: Callable[[FileOutcome], None] | None = None) -> list[FileOutcome]:
    """Every file's outcome, in the order of ``files``: inline for one job, else a process pool."""
    done: dict[str, FileOutcome] = {}

    def finish(o: FileOutcome) -> None:
        done[o.path] = o
        if on_done is not None:
            on_done(o)

    if jobs <= 1 or len(files) <= 1:
        for f in files:
            finish(process_file(f, opts))
        return [done[f] for f in files]
    crashed: list[str] = []
    with ProcessPoolExecutor(max_workers=min(jobs, len(files))) as pool:
        futures = {pool.submit(process_file, f, opts): f for f in files}
        for fut in as_completed(futures):
            try:
                finish(fut.result())
            except BrokenProcessPool:
                crashed.append(futures[fut])
    for f in crashed:  # a worker process died: run each of those files alone, in a fresh process
        finish(_isolated(f, opts))
    return [done[f] for f in files]


def _isolated(path: str, opts: ApplyOptions) -> FileOutcome:
    try:
        with ProcessPoolExecutor(max_workers=1) as pool:
            return pool.submit(process_file, path, opts).result()
    except BrokenProcessPool:
        msg = (f"{path}: error: internal error: the process working on this file died; please report it with the "
               "input file (nothing in this file was changed)")
        try:
            with open(path, "rb") as fh:
                data = fh.read()
        except OSError:
            data = b""
        return FileOutcome(path, data, data, error=msg, rendered_error=msg, internal=True)


# ---------------------------------------------------------------- the summary

def messages(o: FileOutcome) -> list[str]:
    """What to tell the user about one file: errors and refusals in full, notes on one line."""
    if o.rendered_error is not None:
        return [o.rendered_error]
    out: list[str] = []
    for d in o.directives:
        if d.status in ("refused", "error") and d.rendered:
            out.append(d.rendered)
            continue
        at = f"{o.path}:{d.nest.line}:{d.nest.column}" if d.nest else f"{o.path}:{d.line}:{d.column}"
        if d.status == "inactive":
            at = f"{o.path}:{d.line}:{d.column}"
        out += [f"{at}: note: {n}" for n in d.notes]
        if d.verify:
            out.append(f"{at}: note: --verify: {d.verify[-1]}")
    return out

@dataclass
class Totals:
    files: int = 0
    rewritten: int = 0
    unchanged: int = 0
    failed: int = 0
    directives: int = 0
    carried_out: int = 0
    refused: int = 0
    errors: int = 0
    inactive: int = 0
    internal: bool = False


def totals(outcomes: list[FileOutcome]) -> Totals:
    t = Totals(files=len(outcomes))
    for o in outcomes:
        setattr(t, o.status, getattr(t, o.status) + 1)
        t.directives += len(o.directives)
        t.carried_out += o.count("carried_out")
        t.refused += o.count("refused")
        t.errors += o.count("error")
        t.inactive += o.count("inactive")
        t.internal |= o.internal or any(d.internal for d in o.directives)
    return t


def exit_status(t: Totals) -> int:
    """3 a looptile bug somewhere; 1 anything refused or failed; 0 every directive carried out."""
    if t.internal:
        return 3
    return 1 if t.refused or t.errors or t.failed else 0


def summary_table(outcomes: list[FileOutcome]) -> str:
    rows = [("file", "directives", "rewritten", "refused", "errors")]
    for o in outcomes:
        if not o.directives and o.error is None:
            continue
        if o.error is not None:
            rows.append((o.path, "-", "-", "-", "1"))
        else:
            rows.append((o.path, str(len(o.directives)), str(o.count("carried_out")), str(o.count("refused")),
                         str(o.count("error"))))
    t = totals(outcomes)
    width = max(len(r[0]) for r in rows)
    lines = [f"{r[0]:<{width}}  " + "  ".join(f"{c:>{len(h)}}" for c, h in zip(r[1:], rows[0][1:]))
             for r in rows] if len(rows) > 1 else []
    lines.append(f"total: {t.files} file(s), {t.rewritten} rewritten, {t.failed} failed; {t.directives} "
                 f"directive(s): {t.carried_out} nest(s) rewritten, {t.refused} refused, {t.errors} error(s)"
                 + (f", {t.inactive} in inactive branches" if t.inactive else ""))
    return "\n".join(lines)


def report_json(outcomes: list[FileOutcome]) -> dict:
    """The --report document (schema in the README)."""
    t = totals(outcomes)
    files = []
    for o in outcomes:
        files.append({
            "path": o.path,
            "status": o.status,
            "error": o.error,
            "directives": [{
                "line": d.line, "column": d.column, "kind": d.kind, "directive": d.text,
                "outcome": d.status,
                "nest": None if d.nest is None else {"selector": d.nest.selector, "function": d.nest.function,
                                                     "line": d.nest.line, "column": d.nest.column},
                "rewrite": d.rewrite, "message": d.message, "details": list(d.details), "notes": list(d.notes),
                "verify": None if d.verify is None else list(d.verify),
            } for d in o.directives],
        })
    summary = {k: getattr(t, k) for k in ("files", "rewritten", "unchanged", "failed", "directives", "carried_out",
                                          "refused", "errors", "inactive")}
    return {"version": REPORT_VERSION, "files": files, "summary": summary, "exit_status": exit_status(t)}
