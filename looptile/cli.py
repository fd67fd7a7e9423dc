"""Command line: the one place where errors become messages and exit codes.

Exit status, the same for every command: 0 done; 1 refused (illegal or
unsupported) or a mismatch found; 2 usage, read, parse or write error;
3 internal error.
"""
from __future__ import annotations

import functools
import json
import os
import re
import shlex
import sys
import traceback
from dataclasses import replace

import click

from . import analyze as analyze_mod
from . import pipeline
from .errors import EXIT_INTERNAL, InputError, LooptileError, UsageError
from .flags import CompileFlags, from_compile_db, from_options
from .splice import unified_diff, write_atomic
from .transform.tile import TileRequest
from .verify import VerifyOptions, verify


def frontend_options(f):
    """The preprocessor flags, as a compiler takes them."""
    opts = [
        click.option("-I", "includes", multiple=True, metavar="DIR", help="Add DIR to the include path."),
        click.option("-isystem", "isystem", multiple=True, metavar="DIR",
                     help="Add DIR as a system include directory."),
        click.option("-D", "defines", multiple=True, metavar="NAME[=VAL]", help="Define a macro."),
        click.option("-U", "undefines", multiple=True, metavar="NAME", help="Undefine a macro."),
        click.option("-include", "include_files", multiple=True, metavar="FILE", help="Include FILE first."),
        click.option("-std", "std", metavar="STD", help="C standard, e.g. -std=c99 or -std=gnu89."),
        click.option("--compile-db", "compile_db", metavar="FILE|DIR",
                     help="Take the file's flags from a JSON compilation database (compile_commands.json)."),
        click.option("--assume-pure", "assume_pure", multiple=True, metavar="NAME",
                     help="Treat calls to NAME as free of side effects."),
        click.option("--assume", "assumptions", multiple=True, metavar="COND",
                     help="Assert a condition on parameters, e.g. 'n >= 1' (recorded in the guard, not checked)."),
        click.option("--assume-in-row", "assume_in_row", is_flag=True,
                     help="Assert that flattened subscripts (A[i*ld + j]) stay in their rows (0 <= j < ld) where "
                          "looptile cannot prove it; recorded in the guard instead of a run-time test."),
        click.option("--debug", is_flag=True, help="Show tracebacks of internal errors."),
    ]
    for o in reversed(opts):
        f = o(f)
    return f


def _flags(path: str, kw: dict) -> CompileFlags:
    flags = from_options(kw["includes"], kw["isystem"], kw["defines"], kw["undefines"], kw["include_files"],
                         kw["std"])
    if kw.get("compile_db"):
        flags = from_compile_db(kw["compile_db"], path).plus(flags)
    return flags


def reporting(f):
    """Turn LooptileError into its message and exit code; anything else is an internal error (3)."""
    @functools.wraps(f)
    def wrapper(*args, **kw):
        try:
            return f(*args, **kw)
        except LooptileError as exc:
            click.echo(exc.render(), err=True)
            sys.exit(exc.exit_code)
        except (click.exceptions.Exit, click.ClickException, SystemExit):
            raise
        except Exception as exc:  # noqa: BLE001 - the one place that catches everything
            if kw.get("debug"):
                traceback.print_exc()
            click.echo(f"looptile: internal error: {type(exc).__name__}: {exc}; please report it with the input "
                       "file (run with --debug for the traceback)", err=True)
            sys.exit(EXIT_INTERNAL)
    return wrapper


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(package_name="looptile")
def main() -> None:
    """Tile C loop nests, with the legality of every rewrite proven by dependence analysis."""


@main.command()
@click.argument("files", nargs=-1, required=True)
@click.option("--json", "as_json", is_flag=True, help="Print one JSON document keyed by file.")
@frontend_options
@reporting
def analyze(files: tuple[str, ...], as_json: bool, **kw) -> None:
    """List every loop nest with its loops, dependences and tileable bands."""
    doc: dict[str, dict] = {}
    texts = []
    status = 0
    for path in files:
        try:
            tu = pipeline.load(path, _flags(path, kw))
        except LooptileError as exc:
            status = 2
            doc[path] = {"nests": [], "error": exc.headline()}
            texts.append(exc.render())
            continue
        reports = [analyze_mod.report(tu, s, frozenset(kw["assume_pure"]), tuple(kw["assumptions"]),
                                      kw["assume_in_row"])
                   for s in analyze_mod.reported_sites(tu)]
        doc[path] = {"nests": [r.as_json() for r in reports], "error": None}
        texts.append(analyze_mod.text_table(path, reports))
    if as_json:
        click.echo(json.dumps(doc, indent=2))
    else:
        for t in texts:
            click.echo(t, err=t.startswith(tuple(files)) and ": error:" in t.split("\n")[0])
    sys.exit(status)


def _parse_sizes(spec: str | None) -> tuple[tuple[str | None, int], ...]:
    if not spec:
        return ()
    out = []
    for item in spec.split(","):
        item = item.strip()
        name, eq, value = item.partition("=")
        if not eq:
            name, value = None, item
        try:
            n = int(value)
        except ValueError:
            if value.strip() == "auto":
                raise UsageError("--sizes auto (sizes chosen by the cache model) is for tile, in one --sizes; here "
                                 "give the sizes (the guard comment of an auto-tiled nest records them)") from None
            raise UsageError(f"--sizes item '{item}' is not NAME=SIZE or SIZE with an integer size") from None
        out.append((name.strip() if name else None, n))
    return tuple(out)


_AUTO = re.compile(r"(?:^|[=,])\s*auto\s*(?:,|$)")


def _param_bounds(kw: dict) -> dict[str, int]:
    """The largest value of each parameter over the --params sets: what bounds the trip counts."""
    bounds: dict[str, int] = {}
    for values in _verify_options(kw, ()).params:
        for name, v in values.items():
            bounds[name] = max(v, bounds.get(name, v))
    return bounds


def _auto_sizing(sizes: tuple[str, ...], cache: tuple[str, ...], explain: bool, kw: dict):
    """``--sizes auto`` (``i=auto,j=32``...) with --cache and --params: the AutoSizing, and why the
    fallback geometry is used (None when given or read); (None, None) without auto."""
    from .autosize import AutoSizing
    from .cachegeom import machine_levels, parse_level
    if not any(_AUTO.search(spec) for spec in sizes):
        if cache or explain:
            raise UsageError("--cache and --explain go with --sizes auto (sizes chosen by the cache model)")
        return None, None
    if len(sizes) > 1:
        raise UsageError("--sizes auto chooses every level of tiles (two with two cache levels); give one --sizes")
    items = []
    for item in sizes[0].split(","):
        name, eq, value = item.strip().partition("=")
        if not eq:
            name, value = "", name
        if value.strip() == "auto":
            items.append((name.strip() or None, None))
            continue
        try:
            items.append((name.strip() or None, int(value)))
        except ValueError:
            raise UsageError(f"--sizes item '{item.strip()}' is not NAME=SIZE, NAME=auto, SIZE or auto") from None
    why = None
    if cache:
        levels = sorted((parse_level(c, f"L{k + 1}") for k, c in enumerate(cache)), key=lambda lv: lv.size)
    else:
        levels, why = machine_levels()
    bounds = _param_bounds(kw)
    return AutoSizing(() if items == [(None, None)] else tuple(items), tuple(levels),
                      tuple(sorted(bounds.items()))), why


def _auto_words(auto) -> str:
    """What the guard's made-by command adds for --sizes auto: the geometry used and --params."""
    parts = [a for lv in auto.levels for a in ("--cache", lv.spec())]
    if auto.params:
        parts += ["--params", ",".join(f"{k}={v}" for k, v in auto.params)]
    return " " + " ".join(shlex.quote(p) for p in parts)


def _tile_request(sizes: tuple[str, ...], order: str | None, remainder: str | None, jam_spec: str | None,
                  scalarize: bool) -> TileRequest:
    """--sizes (repeatable: one per level, outermost first), --order, --remainder, --jam."""
    return TileRequest(_parse_sizes(sizes[0]) if sizes else (),
                       tuple(x.strip() for x in order.split(",")) if order else None, remainder or "split",
                       _parse_factors(jam_spec, "--jam") if jam_spec and jam_spec.strip() != "auto" else (),
                       scalarize,
                       tuple(_parse_sizes(x) for x in sizes[1:]))


def _register_tiling(jam_spec: str | None, registers: str | None, kw: dict):
    """``--jam auto`` with --registers and --params: the RegisterTiling (None without auto)."""
    from .regtile import RegisterTiling, machine_registers, parse_registers
    if not (jam_spec and jam_spec.strip() == "auto"):
        if registers:
            raise UsageError("--registers goes with --jam auto (the register tile chosen by its model)")
        return None
    bounds = _param_bounds(kw)
    regs = parse_registers(registers) if registers else machine_registers()
    return RegisterTiling(regs, tuple(sorted(bounds.items())))


def _all_sizes(req: TileRequest) -> tuple[int, ...]:
    """Every tile size and jam factor of a request (the sizes verify sweeps around)."""
    return tuple(s for _, s in req.sizes) + tuple(s for level in req.levels for _, s in level) + \
        tuple(u for _, u in req.jam)


def _command_text(path: str, nest: str, sizes: tuple[str, ...], order: str | None, remainder: str, kw: dict) -> str:
    parts = ["looptile", "tile", path, "--nest", nest]
    for spec in sizes:
        parts += ["--sizes", spec]
    if order:
        parts += ["--order", order]
    if remainder != "split":
        parts += ["--remainder", remainder]
    if kw.get("jam_spec"):
        parts += ["--jam", kw["jam_spec"]]
    if kw.get("scalarize"):
        parts.append("--scalarize")
    for name in kw.get("reassociate", ()):
        parts += ["--reassociate", name]
    if kw.get("parallel"):
        parts.append("--parallel")
    if kw.get("assume_in_row"):
        parts.append("--assume-in-row")
    if kw.get("check_overlap"):
        parts.append("--check-overlap")
    flags = _flags(path, kw) if not kw.get("compile_db") else None
    if kw.get("compile_db"):
        parts += ["--compile-db", kw["compile_db"]]
    elif flags and flags.args:
        parts += list(flags.args)
    return " ".join(shlex.quote(p) for p in parts)


def check_options(f):
    """How the harness of verify (and tile --verify) runs the kernel."""
    opts = [
        click.option("--params", "params", multiple=True, metavar="n=37,m=20",
                     help="One set of integer parameter values (repeatable); unset loop bounds sweep sizes."),
        click.option("--shape", "shapes", multiple=True, metavar="A=n*m",
                     help="Element count of a pointer parameter, as a C expression of the parameters."),
        click.option("--seed", type=int, default=12345, show_default=True, help="Seed of the input values."),
        click.option("--timeout", type=float, default=30.0, show_default=True, help="Seconds per run."),
    ]
    for o in reversed(opts):
        f = o(f)
    return f


def reassociate_options(f):
    """Reductions by consent: accumulations whose additions a rewrite may reorder."""
    opts = [
        click.option("--reassociate", "reassociate", multiple=True, metavar="NAME",
                     help="Allow reordering the additions into NAME (s += e, y[i] += e); for floating point the "
                          "results may differ in the last bits, for signed integers you assert that no partial "
                          "sum overflows (repeatable)."),
        click.option("--tolerance", "tolerance", type=float, default=None, metavar="REL",
                     help="With --verify/verify and --reassociate: allowed difference of a reassociated value, "
                          "relative to the sum of the absolute values of its terms (default: by type, see README)."),
    ]
    for o in reversed(opts):
        f = o(f)
    return f


def _verify_options(kw: dict, tile_sizes: tuple[int, ...], reassociated: tuple[str, ...] = ()) -> VerifyOptions:
    sets = [_param_set(spec) for spec in kw["params"]]
    shapes = {}
    for item in kw["shapes"]:
        name, eq, expr = item.partition("=")
        if not eq or not name.strip() or not expr.strip():
            raise UsageError(f"--shape '{item}' is not NAME=EXPRESSION (e.g. A=n*m)")
        shapes[name.strip()] = expr.strip()
    tol = kw.get("tolerance")
    if tol is not None and not 0 <= tol < 1:
        raise UsageError(f"--tolerance {tol} is not a relative bound between 0 and 1 (e.g. 1e-12)")
    return VerifyOptions(tuple(sets), shapes, kw["seed"], kw["timeout"], tile_sizes, reassociated, tol,
                         overlap=bool(kw.get("check_overlap")))


def _print_report(report) -> None:
    for line in report.lines:
        click.echo(line)


def _param_set(spec: str) -> dict[str, int]:
    """``n=64,m=48`` to values; a usage error names the item that is not NAME=INTEGER."""
    values: dict[str, int] = {}
    for item in spec.split(","):
        name, eq, value = item.strip().partition("=")
        try:
            values[name.strip()] = int(value, 0)
        except ValueError:
            raise UsageError(f"--params item '{item}' is not NAME=INTEGER") from None
        if not eq or not name.strip():
            raise UsageError(f"--params item '{item}' is not NAME=INTEGER")
    return values


def _parse_params(specs: tuple[str, ...]) -> dict[str, int]:
    """Repeated --params merged into one set of values."""
    values: dict[str, int] = {}
    for spec in specs:
        values.update(_param_set(spec))
    return values


@main.command(name="simulate")
@click.argument("file")
@click.option("--nest", "nest", required=True, metavar="SEL", help="L<line>, FUNC or FUNC:K.")
@click.option("--sizes", metavar="SPEC", multiple=True, help="Tile sizes of the transformed version, as for tile.")
@click.option("--order", metavar="LIST", help="Loop order, as for tile.")
@click.option("--remainder", type=click.Choice(["split", "clamp"]), default=None, help="As for tile.")
@click.option("--jam", "jam_spec", metavar="SPEC", help="As for tile.")
@click.option("--scalarize", is_flag=True, help="As for tile.")
@click.option("--params", "sim_params", multiple=True, metavar="n=64,m=...",
              help="Values of the kernel's integer parameters (all of them).")
@click.option("--cache", "caches", multiple=True, metavar="L1=48KiB/12/64",
              help="A cache level NAME=SIZE/WAYS/LINE, innermost first (repeatable; WAYS 0: fully associative). "
                   "Default: this machine's data caches.")
@click.option("--only", metavar="a,b", help="Trace only these arrays (the others stay in registers or bypass the "
                                            "cache).")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON document.")
@reassociate_options
@frontend_options
@reporting
def simulate_cmd(file: str, nest: str, sizes: tuple[str, ...], order: str | None, remainder: str | None,
                 jam_spec: str | None, scalarize: bool, sim_params: tuple[str, ...], caches: tuple[str, ...],
                 only: str | None, as_json: bool, **kw) -> None:
    """Count cache hits and misses of a nest before and after a rewrite (an ideal LRU model)."""
    from . import simulate as sim
    from .cachegeom import machine_levels, parse_level
    try:
        if caches:
            levels, note = [parse_level(c, f"L{k + 1}") for k, c in enumerate(caches)], None
        else:
            levels, note = machine_levels()
        # --sizes auto: sized by the cache model for the simulated geometry and --params
        auto = None
        if any(_AUTO.search(spec) for spec in sizes):
            auto, _ = _auto_sizing(sizes, caches, False, dict(kw, params=sim_params, shapes=(), seed=0, timeout=1.0))
        regtile = _register_tiling(jam_spec, None, dict(kw, params=sim_params, shapes=(), seed=0, timeout=1.0))
        req = _tile_request(() if auto else sizes, order, remainder, jam_spec, scalarize) \
            if (sizes or order or jam_spec) else None
        topts = pipeline.TileOptions(tuple(kw["assumptions"]), frozenset(kw["assume_pure"]), False,
                                     _command_text(file, nest, sizes, order, remainder or "split",
                                                   dict(kw, jam_spec=jam_spec, scalarize=scalarize)),
                                     split_fallback=remainder is None, reassociate=tuple(kw["reassociate"]),
                                     assume_in_row=kw["assume_in_row"], autosize=auto, regtile=regtile)
        params = _parse_params(sim_params)
        opts = sim.SimulateOptions(tuple(levels), params, tuple(x.strip() for x in only.split(",")) if only else (),
                                   progress=sys.stderr.isatty() and not as_json)
        tu = pipeline.load(file, _flags(file, kw))
        report = sim.simulate(tu, nest, req, topts, opts)
    except LooptileError as exc:
        if exc.path is None:
            exc.path = file
        raise
    for n in report.notes:
        click.echo(f"{file}: note: {n}", err=True)
    if as_json:
        click.echo(json.dumps(sim.as_json(report, tuple(levels), note), indent=2))
    else:
        click.echo(sim.as_text(report, tuple(levels), note, params))


@main.command(name="verify")
@click.argument("file")
@click.option("--nest", "nest", metavar="SEL", help="Check looptile's rewrite of this nest (L<line>, FUNC, FUNC:K).")
@click.option("--sizes", metavar="SPEC", multiple=True, help="Tile sizes, as for tile (repeatable).")
@click.option("--order", metavar="LIST", help="Loop order, as for tile.")
@click.option("--remainder", type=click.Choice(["split", "clamp"]), default=None, help="As for tile.")
@click.option("--jam", "jam_spec", metavar="SPEC", help="As for tile.")
@click.option("--scalarize", is_flag=True, help="As for tile.")
@click.option("--against", metavar="OTHER.c", help="Check a version rewritten by hand against FILE.")
@click.option("--func", "func", metavar="NAME", help="With --against: the kernel function to compare.")
@click.option("--check-overlap", "check_overlap", is_flag=True,
              help="As for tile; also call the kernel with two array arguments overlapping.")
@reassociate_options
@check_options
@frontend_options
@reporting
def verify_cmd(file: str, nest: str | None, sizes: tuple[str, ...], order: str | None, remainder: str | None,
               jam_spec: str | None, scalarize: bool, against: str | None, func: str | None, **kw) -> None:
    """Compile and run the original and the rewritten kernel on the same inputs; compare bit for bit."""
    try:
        if bool(against) == bool(nest):
            raise UsageError("give either --nest SEL (check looptile's rewrite) or --against OTHER.c --func NAME")
        tu = pipeline.load(file, _flags(file, kw))
        if against:
            if not func:
                raise UsageError("--against needs --func NAME, the kernel function to compare")
            try:
                candidate = open(against, "rb").read()
            except OSError as exc:
                raise InputError(f"cannot read the file; {exc.strerror}", path=against) from exc
            report = verify(tu, candidate, func, _verify_options(kw, (), tuple(kw["reassociate"])),
                            candidate_name="hand-rewritten")
        else:
            if jam_spec and jam_spec.strip() == "auto":
                raise UsageError("--jam auto (the register tile chosen by its model) is for tile and simulate; here "
                                 "give the factors (the guard comment of the rewrite records them)")
            req = _tile_request(sizes, order, remainder, jam_spec, scalarize)
            opts = pipeline.TileOptions(tuple(kw["assumptions"]), frozenset(kw["assume_pure"]), False,
                                        _command_text(file, nest, sizes, order, remainder or "split",
                                                      dict(kw, jam_spec=jam_spec, scalarize=scalarize)),
                                        split_fallback=remainder is None, reassociate=tuple(kw["reassociate"]),
                                        assume_in_row=kw["assume_in_row"], check_overlap=kw["check_overlap"])
            outcome = pipeline.tile(tu, nest, req, opts)
            report = verify(tu, outcome.new, outcome.nest.function,
                            _verify_options(kw, _all_sizes(req), outcome.reassociated))
    except LooptileError as exc:
        if exc.path is None:
            exc.path = file
        raise
    _print_report(report)
    sys.exit(report.status)


@main.command()
@click.argument("file")
@click.option("--nest", "nest", required=True, metavar="SEL", help="L<line>, FUNC or FUNC:K.")
@click.option("--sizes", metavar="SPEC", multiple=True,
              help="Tile sizes: i=32,j=32 or 32,32 (outermost loops). Repeat for more levels, outermost first. "
                   "'auto' (or i=auto,j=32): chosen from the cache geometry.")
@click.option("--cache", "cache", multiple=True, metavar="L1=48KiB/12/64",
              help="With --sizes auto: a cache level SIZE/WAYS/LINE (repeatable; default: this machine's).")
@click.option("--explain", is_flag=True,
              help="With --sizes auto or --jam auto: print how the numbers were chosen (stderr).")
@click.option("--order", metavar="LIST", help="New loop order, e.g. ii,kk,jj,i,k,j (ii or i.1 = tile loop of i).")
@click.option("--remainder", type=click.Choice(["split", "clamp"]), default=None,
              help="split (default): fast path for whole tiles; clamp: min-style bounds only.")
@click.option("--diff", "as_diff", is_flag=True, help="Print a unified diff instead of the file.")
@click.option("-o", "--output", metavar="OUT", help="Write the result to OUT.")
@click.option("--in-place", is_flag=True, help="Replace FILE (atomically, mode kept).")
@click.option("--force", is_flag=True, help="Tile a nest that looptile already rewrote.")
@click.option("--verify", "check", is_flag=True,
              help="Compile and run both versions first (as the verify command); write nothing if they differ.")
@click.option("--jam", "jam_spec", metavar="SPEC",
              help="Then unroll-and-jam loops inside the tiles, e.g. i=4,j=4 (register tiles); 'auto': chosen "
                   "from the vector registers.")
@click.option("--registers", metavar="COUNTxBYTES",
              help="With --jam auto: the vector registers to size for, e.g. 16x32 (default: this machine's).")
@click.option("--scalarize", is_flag=True,
              help="With --jam: keep elements the innermost loop keeps touching in locals.")
@click.option("--check-overlap", "check_overlap", is_flag=True,
              help="Test at run time that the arrays reached through pointers without restrict do not overlap; "
                   "the original nest runs when they do.")
@click.option("--parallel", is_flag=True,
              help="Mark the outermost loop outside the tiles that provably carries no dependence with "
                   "'#pragma omp parallel for'.")
@reassociate_options
@check_options
@frontend_options
@reporting
def tile(file: str, nest: str, sizes: tuple[str, ...], cache: tuple[str, ...], explain: bool, order: str | None,
         remainder: str, as_diff: bool, output: str | None, in_place: bool, force: bool, check: bool,
         jam_spec: str | None, registers: str | None, scalarize: bool, parallel: bool, check_overlap: bool,
         **kw) -> None:
    """Strip-mine a band of loops and move the tile loops outward, if the analysis proves it legal."""
    try:
        if sum([as_diff, bool(output), in_place]) > 1:
            raise UsageError("choose one of --diff, -o OUT and --in-place")
        regtile = _register_tiling(jam_spec, registers, kw)
        auto, fallback = _auto_sizing(sizes, cache, explain and not regtile, kw)
        req = _tile_request(() if auto else sizes, order, remainder, jam_spec, scalarize)
        command = _command_text(file, nest, sizes, order, remainder or "split",
                                dict(kw, jam_spec=jam_spec, scalarize=scalarize, parallel=parallel,
                                     check_overlap=check_overlap))
        opts = pipeline.TileOptions(tuple(kw["assumptions"]), frozenset(kw["assume_pure"]), force,
                                    command + (_auto_words(auto) if auto else ""),
                                    split_fallback=remainder is None, reassociate=tuple(kw["reassociate"]),
                                    parallel=parallel, assume_in_row=kw["assume_in_row"],
                                    check_overlap=check_overlap, autosize=auto, regtile=regtile)
        tu = pipeline.load(file, _flags(file, kw))
        outcome = pipeline.tile(tu, nest, req, opts)
        swept = _all_sizes(req) if not (auto or regtile) else \
            _all_sizes(replace(req, sizes=tuple(zip(outcome.plan.band, outcome.plan.sizes)),
                               levels=outcome.plan.levels, jam=outcome.plan.jam))
        report = verify(tu, outcome.new, outcome.nest.function,
                        _verify_options(dict(kw, check_overlap=check_overlap), swept,
                                        outcome.reassociated)) if check else None
    except LooptileError as exc:
        if exc.path is None:  # a usage error about this file's request: say which file
            exc.path = file
        raise
    where = f"{file}:{outcome.nest.line}:{outcome.nest.col}"
    if fallback:
        click.echo(f"{where}: note: {fallback}", err=True)
    if explain:
        click.echo(f"{where}: note: " + ("tile sizes chosen by the cache model" if auto else "")
                   + (" and " if auto and regtile else "") + ("the register tile chosen by its model" if regtile
                                                             else "") + ":", err=True)
        for line in outcome.explanation:
            click.echo(f"  {line}", err=True)
    _deliver(file, outcome, report, as_diff, output, in_place)


def _deliver(file: str, outcome, report, as_diff: bool, output: str | None, in_place: bool) -> None:
    """The --verify report (stop if it failed), notes to stderr, then the result as a diff, to OUT,
    in place, or to stdout."""
    if report is not None:
        for line in report.lines:
            click.echo(line, err=True)
        if report.status != 0:
            sys.exit(report.status)
    for note in outcome.notes:
        click.echo(f"{file}:{outcome.nest.line}:{outcome.nest.col}: note: {note}", err=True)
    if as_diff:
        rel = os.path.relpath(file) if not os.path.relpath(file).startswith("..") else file
        # The file's own bytes (latin-1 view), not re-encoded: the patch must match the file.
        sys.stdout.flush()
        sys.stdout.buffer.write(unified_diff(rel, outcome.original, outcome.new).encode("latin-1"))
        sys.stdout.flush()
    elif output:
        write_atomic(output, outcome.new, mode_from=file)
    elif in_place:
        if outcome.new != outcome.original:
            write_atomic(file, outcome.new)
    else:
        sys.stdout.flush()
        sys.stdout.buffer.write(outcome.new)
        sys.stdout.flush()


def _parse_factors(spec: str, option: str = "--factors") -> tuple[tuple[str, int], ...]:
    out = []
    for item in spec.split(","):
        name, eq, value = item.strip().partition("=")
        try:
            n = int(value)
        except ValueError:
            n = None
        if not eq or not name.strip() or n is None:
            raise UsageError(f"{option} item '{item.strip()}' is not LOOP=FACTOR (e.g. i=4)")
        out.append((name.strip(), n))
    return tuple(out)


def _copy_command(kind: str, file: str, nest: str, spec: str, kw: dict) -> str:
    parts = ["looptile", kind, file, "--nest", nest] + (
        ["--full"] if spec == "full" else ["--factors" if kind == "jam" else "--factor", spec])
    if kw.get("scalarize"):
        parts.append("--scalarize")
    for name in kw.get("reassociate", ()):
        parts += ["--reassociate", name]
    if kw.get("assume_in_row"):
        parts.append("--assume-in-row")
    if kw.get("compile_db"):
        parts += ["--compile-db", kw["compile_db"]]
    else:
        parts += list(_flags(file, kw).args)
    return " ".join(shlex.quote(p) for p in parts)


def output_options(f):
    opts = [
        click.option("--diff", "as_diff", is_flag=True, help="Print a unified diff instead of the file."),
        click.option("-o", "--output", metavar="OUT", help="Write the result to OUT."),
        click.option("--in-place", is_flag=True, help="Replace FILE (atomically, mode kept)."),
        click.option("--force", is_flag=True, help="Rewrite a nest that looptile already rewrote."),
        click.option("--verify", "check", is_flag=True,
                     help="Compile and run both versions first (as the verify command); write nothing if they "
                          "differ."),
    ]
    for o in reversed(opts):
        f = o(f)
    return f


def _copy_job(kind: str, file: str, nest: str, spec: str, as_diff: bool, output: str | None, in_place: bool,
              force: bool, check: bool, kw: dict, scalarize: bool = False) -> None:
    from . import jam_job
    try:
        if sum([as_diff, bool(output), in_place]) > 1:
            raise UsageError("choose one of --diff, -o OUT and --in-place")
        opts = pipeline.TileOptions(tuple(kw["assumptions"]), frozenset(kw["assume_pure"]), force,
                                    _copy_command(kind, file, nest, spec, kw), reassociate=tuple(kw["reassociate"]),
                                    assume_in_row=kw["assume_in_row"])
        if kind == "jam":
            factors = _parse_factors(spec)
            sizes = tuple(u for _, u in factors)
        elif spec == "full":
            sizes = ()
        else:
            try:
                sizes = (int(spec),)
            except ValueError:
                raise UsageError(f"--factor must be an integer, not '{spec}'") from None
        tu = pipeline.load(file, _flags(file, kw))
        if kind == "jam":
            outcome = jam_job.jam(tu, nest, jam_job.JamRequest(factors), opts, scalarize)
        elif spec == "full":
            outcome = jam_job.unroll_full(tu, nest, opts)
        else:
            outcome = jam_job.unroll(tu, nest, sizes[0], opts)
        report = verify(tu, outcome.new, outcome.nest.function,
                        _verify_options(kw, sizes, outcome.reassociated)) if check else None
    except LooptileError as exc:
        if exc.path is None:
            exc.path = file
        raise
    _deliver(file, outcome, report, as_diff, output, in_place)


@main.command()
@click.argument("file")
@click.option("--nest", "nest", required=True, metavar="SEL", help="L<line>, FUNC or FUNC:K.")
@click.option("--factors", "factors", required=True, metavar="SPEC",
              help="Unroll factors of outer loops, e.g. i=4 or i=4,j=2; the copies are jammed into the "
                   "innermost loop's body.")
@click.option("--scalarize", is_flag=True,
              help="Keep elements that the innermost loop keeps touching (C[i][j] over k) in locals, where proven "
                   "safe.")
@output_options
@reassociate_options
@check_options
@frontend_options
@reporting
def jam(file: str, nest: str, factors: str, scalarize: bool, as_diff: bool, output: str | None, in_place: bool,
        force: bool, check: bool, **kw) -> None:
    """Unroll-and-jam (register tiling), if the analysis proves it legal."""
    _copy_job("jam", file, nest, factors, as_diff, output, in_place, force, check, kw, scalarize)


@main.command()
@click.argument("file")
@click.option("--nest", "nest", required=True, metavar="SEL", help="L<line>, FUNC or FUNC:K: the loop to unroll.")
@click.option("--factor", "factor", metavar="N", help="How many copies of the body per iteration.")
@click.option("--full", is_flag=True, help="Unroll completely (the trip count must be a constant): no loop is left.")
@output_options
@reassociate_options
@check_options
@frontend_options
@reporting
def unroll(file: str, nest: str, factor: str | None, full: bool, as_diff: bool, output: str | None, in_place: bool,
           force: bool, check: bool, **kw) -> None:
    """Plain unrolling of one loop (its body, inner loops included, copied N times, with a remainder loop)."""
    if full == (factor is not None):
        raise click.UsageError("give either --factor N or --full")
    _copy_job("unroll", file, nest, "full" if full else factor, as_diff, output, in_place, force, check, kw)


@main.command(name="apply")
@click.argument("paths", nargs=-1, required=True)
@click.option("--diff", "as_diff", is_flag=True, help="Print one unified diff for every file changed.")
@click.option("-o", "--output", "outdir", metavar="OUTDIR",
              help="Write every file to OUTDIR, mirroring the tree below the common parent of the PATHs.")
@click.option("--in-place", is_flag=True, help="Rewrite the changed files (atomically, mode kept).")
@click.option("--jobs", "-j", "jobs", type=click.IntRange(min=1), default=None,
              help="Files processed in parallel (default: the number of cores).")
@click.option("--report", "report_path", metavar="FILE.json", help="Write the outcome of every directive as JSON.")
@click.option("--verify", "check", is_flag=True,
              help="Compile and run each rewrite against the original first (as verify); a difference refuses it.")
@click.option("--cache", "cache", multiple=True, metavar="L1=48KiB/12/64",
              help="For tile(i=auto) directives: a cache level SIZE/WAYS/LINE (repeatable; default: this machine's).")
@check_options
@frontend_options
@reporting
def apply_cmd(paths: tuple[str, ...], as_diff: bool, outdir: str | None, in_place: bool, jobs: int | None,
              report_path: str | None, check: bool, cache: tuple[str, ...], **kw) -> None:
    """Carry out the loop-transformation directives (#pragma omp tile/unroll, #pragma looptile) in
    the files and directories given (recursively, .c files); refused ones are left as they are."""
    from . import batch
    from .cachegeom import parse_level
    if sum([as_diff, bool(outdir), in_place]) > 1:
        raise UsageError("choose one of --diff, -o OUTDIR and --in-place")
    base = batch.common_base(list(paths))
    if outdir and os.path.realpath(outdir) == base:
        raise UsageError(f"-o {outdir} is the input directory itself; use --in-place to rewrite the files there")
    if report_path and not os.access(os.path.dirname(os.path.abspath(report_path)), os.W_OK):
        raise UsageError(f"--report {report_path}: its directory does not exist or cannot be written")
    files = batch.c_files(list(paths), exclude=outdir)
    opts = batch.ApplyOptions(from_options(kw["includes"], kw["isystem"], kw["defines"], kw["undefines"],
                                           kw["include_files"], kw["std"]), kw.get("compile_db"),
                              frozenset(kw["assume_pure"]), tuple(kw["assumptions"]),
                              _verify_options(kw, ()) if check else None, kw["assume_in_row"],
                              tuple(sorted((parse_level(c, f"L{k + 1}") for k, c in enumerate(cache)),
                                           key=lambda lv: lv.size)))
    if sys.stderr.isatty() and len(files) >= 8:
        with click.progressbar(length=len(files), label="looptile apply", file=sys.stderr) as bar:
            outcomes = batch.run(files, opts, jobs or batch.default_jobs(), lambda o: bar.update(1))
    else:
        outcomes = batch.run(files, opts, jobs or batch.default_jobs())
    for o in outcomes:
        for line in batch.messages(o):
            click.echo(line, err=True)
    if as_diff:
        sys.stdout.flush()
        for o in outcomes:
            if o.status == "rewritten":
                rel = os.path.relpath(o.path) if not os.path.relpath(o.path).startswith("..") else o.path
                sys.stdout.buffer.write(unified_diff(rel, o.original, o.new).encode("latin-1"))
        sys.stdout.flush()
    for o in outcomes:
        if outdir and not o.unread:
            target = batch.mirrored(base, outdir, o.path)
            os.makedirs(os.path.dirname(target), exist_ok=True)
            write_atomic(target, o.new, mode_from=o.path)
        elif in_place and o.status == "rewritten":
            write_atomic(o.path, o.new)
    if report_path:
        write_atomic(report_path, (json.dumps(batch.report_json(outcomes), indent=2) + "\n").encode())
    click.echo(batch.summary_table(outcomes), err=as_diff)
    sys.exit(batch.exit_status(batch.totals(outcomes)))


def _int_list(spec: str, option: str) -> tuple[int, ...]:
    try:
        out = tuple(int(x) for x in spec.split(",") if x.strip())
    except ValueError:
        raise UsageError(f"{option} '{spec}' is not a list of integers (e.g. 16,32,64)") from None
    if not out or min(out) < 1:
        raise UsageError(f"{option} '{spec}' needs at least one size, each at least 1")
    return out


def _jam_list(spec: str) -> tuple[tuple[int, ...], ...]:
    """--jam-candidates 2,4 (one jammed loop) or 4x4,6x8 (factors of the outermost jammable loops)."""
    try:
        out = tuple(tuple(int(f) for f in item.strip().split("x")) for item in spec.split(",") if item.strip())
    except ValueError:
        raise UsageError(f"--jam-candidates '{spec}' is not a list of factors such as 2,4 or 4x4,6x8") from None
    if not out or any(f < 1 for fs in out for f in fs):
        raise UsageError(f"--jam-candidates '{spec}' needs factors of at least 1")
    return out


def _seconds(spec: str) -> float:
    text = spec.strip().lower()
    scale = 60.0 if text.endswith("m") else 1.0
    try:
        value = float(text.rstrip("sm")) * scale
    except ValueError:
        value = -1.0
    if value <= 0:
        raise UsageError(f"--budget '{spec}' is not a duration such as 120s, 90 or 5m")
    return value


@main.command(name="tune")
@click.argument("file")
@click.option("--nest", "nest", required=True, metavar="SEL", help="L<line>, FUNC or FUNC:K.")
@click.option("--params", "params", multiple=True, required=True, metavar="n=1000",
              help="Values of the kernel's integer parameters for the timing runs (repeatable, merged).")
@click.option("--band", metavar="LIST", help="Loops to tile, e.g. i,j,k (default: the longest permutable band).")
@click.option("--candidates", metavar="SIZES", help="Tile sizes of the grid (default 16,32,64,128,256; sizes "
              "not below a loop's trip count are dropped).")
@click.option("--jam-candidates", "jam_candidates", metavar="LIST",
              help="Unroll-and-jam factors: 2,4 (one loop) or 4x4,6x8 (the outermost jammable loops).")
@click.option("--budget", default="120s", show_default=True, metavar="TIME",
              help="Wall time for the whole job (generating, compiling, timing, verifying the winner).")
@click.option("--jobs", "-j", "jobs", type=click.IntRange(min=1), default=None,
              help="Compiler runs in parallel (default: the number of cores); timing is always serial.")
@click.option("--plot", "plot_path", metavar="FILE.png", help="Write a PNG (needs matplotlib: looptile[plot]).")
@click.option("--json", "as_json", is_flag=True, help="Print the results as one JSON document.")
@click.option("--runs", type=click.IntRange(min=1), default=5, show_default=True,
              help="Timed calls per variant after a warm-up (fewer when calls are slow); the median is kept.")
@click.option("--order", metavar="LIST", help="Loop order of every variant, as for tile.")
@click.option("--cflags", metavar="FLAGS", help="Compiler flags of the timing builds (default: $CFLAGS, else "
              "-O3 -march=native).")
@click.option("--cflags-variant", "cflags_variants", multiple=True, metavar="FLAGS",
              help="Also build each unroll-and-jam variant with FLAGS added (repeatable), e.g. "
                   "-fno-tree-loop-vectorize.")
@click.option("--min-gain", "min_gain", type=click.FloatRange(0, 0.9), default=0.05, show_default=True,
              help="How much faster than the original a variant must be to be chosen (0.05: 5%).")
@click.option("--max-grid", "max_grid", type=click.IntRange(min=1), default=12, show_default=True,
              help="Tile-size combinations in the grid.")
@click.option("--shape", "shapes", multiple=True, metavar="A=n*m",
              help="Element count of a pointer parameter, as a C expression of the parameters.")
@click.option("--reassociate", "reassociate", multiple=True, metavar="NAME",
              help="As for tile: allow reordering the additions into NAME.")
@frontend_options
@reporting
def tune_cmd(file: str, nest: str, params: tuple[str, ...], band: str | None, candidates: str | None,
             jam_candidates: str | None, budget: str, jobs: int | None, plot_path: str | None, as_json: bool,
             runs: int, order: str | None, cflags: str | None, cflags_variants: tuple[str, ...], min_gain: float,
             max_grid: int, **kw) -> None:
    """Time tiled variants of a nest on this machine and report the fastest (verified) one."""
    from . import toolchain, tune, tune_report
    try:
        values = _verify_options(dict(kw, params=params, shapes=kw["shapes"], seed=0, timeout=1.0), ()).params
        merged = {k: v for d in values for k, v in d.items()}
        shapes = _verify_options(dict(kw, params=(), seed=0, timeout=1.0), ()).shapes
        if plot_path:
            try:
                import matplotlib  # noqa: F401
            except ImportError:
                raise UsageError("--plot needs matplotlib: pip install 'looptile[plot]' (or pip install "
                                 "matplotlib)") from None
        order_t = tuple(x.strip() for x in order.split(",")) if order else None
        base = pipeline.TileOptions(tuple(kw["assumptions"]), frozenset(kw["assume_pure"]), False, "",
                                    reassociate=tuple(kw["reassociate"]), assume_in_row=kw["assume_in_row"])
        opts = tune.TuneOptions(
            merged, tuple(x.strip() for x in band.split(",")) if band else None,
            _int_list(candidates, "--candidates") if candidates else tune.DEFAULT_CANDIDATES,
            _jam_list(jam_candidates) if jam_candidates else None, _seconds(budget),
            jobs or os.cpu_count() or 1, runs, order_t,
            tuple(shlex.split(cflags)) if cflags is not None else tuple(toolchain.tune_cflags()),
            max_grid, min_gain=min_gain, tile=base, shapes=shapes,
            cflags_variants=tuple(tuple(shlex.split(f)) for f in cflags_variants if f.strip()))

        def command_of(cfg) -> str:
            return _command_text(file, nest, cfg.size_specs, order, "split",
                                 dict(kw, jam_spec=cfg.jam_spec, scalarize=cfg.scalarize))

        tu = pipeline.load(file, _flags(file, kw))
        if sys.stderr.isatty() and not kw.get("debug"):
            with click.progressbar(length=int(opts.budget), label="looptile tune", file=sys.stderr,
                                   show_percent=False, show_pos=False) as bar:
                start = [0.0]

                def progress(msg: str) -> None:
                    import time as _time
                    now = _time.monotonic()
                    start[0] = start[0] or now
                    bar.update(max(0, min(int(now - start[0]), bar.length) - bar.pos))
                    bar.label = f"looptile tune: {msg[:40]:40}"
                result = tune.run(tu, nest, opts, command_of, progress)
        else:
            result = tune.run(tu, nest, opts, command_of)
        drawn = tune_report.plot(result, plot_path) if plot_path else None
    except LooptileError as exc:
        if exc.path is None:
            exc.path = file
        raise
    if as_json:
        doc = tune_report.as_json(result)
        doc["plot"] = {"path": plot_path, "kind": drawn} if plot_path else None
        click.echo(json.dumps(doc, indent=2))
    else:
        for line in tune_report.table(result) + [""] + tune_report.summary(result):
            click.echo(line)
        if plot_path:
            click.echo(f"plot: {plot_path} ({drawn})")


if __name__ == "__main__":  # pragma: no cover
    main()
