"""The tune job: time variants of a nest on this machine and pick the fastest proven one.

Every variant is made by the tile job in memory (so it is a proven rewrite); the original is
a candidate too. Each variant is compiled with the timing driver (a thread pool running
``cc``), then all are timed one after the other (serially: two runs never share the
machine). Two rounds: first the original, the analytic pick and its neighbours and a grid
of tile sizes; then the register model's pick (``tile --sizes auto --jam auto``: its tiles
and register tile) and unroll-and-jam (with and without scalar replacement) on the fastest
tiles of the first round. The fastest variants are then timed again, interleaved with the
original, and judged on those runs alone (the first round's fastest are also its luckiest;
fresh interleaved runs remove that selection bias): one wins only if it beats the original by
``min_gain`` there, overall and in each of the round's two passes, and by more than the
original's own medians moved during the run (the noise); the winner is checked with verify at
small sizes before it is reported.

Library code: returns values, raises LooptileError subclasses, never exits.
"""
from __future__ import annotations

import itertools
import os
import statistics
import tempfile
import time
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field, replace

from . import pipeline, toolchain, verify, workload
from .cachegeom import machine_levels
from .emit import render
from .errors import LooptileError, UsageError
from .frontend import TranslationUnit
from .harness import KernelSpec, kernel_spec
from .model import Nest
from .transform.tile import TileRequest

DEFAULT_CANDIDATES = (16, 32, 64, 128, 256)
JAM_DEFAULTS = {1: ((2,), (4,), (8,)), 2: ((4, 4), (4, 8), (6, 8), (8, 4))}


@dataclass(frozen=True)
class Config:
    """One variant: levels of tile sizes (outermost first; none: the original), jam, scalarize."""
    levels: tuple[tuple[tuple[str, int], ...], ...] = ()
    jam: tuple[tuple[str, int], ...] = ()
    scalarize: bool = False
    origin: str = "original"  # original, analytic, neighbour, grid, jam
    extra_cflags: tuple[str, ...] = ()  # built with these flags after the common ones (--cflags-variant)

    @property
    def sizes(self) -> dict[str, int]:
        return dict(self.levels[-1]) if self.levels else {}

    @property
    def size_specs(self) -> tuple[str, ...]:
        return tuple(",".join(f"{it}={s}" for it, s in lv) for lv in self.levels)

    @property
    def jam_spec(self) -> str | None:
        return ",".join(f"{it}={u}" for it, u in self.jam) or None

    def label(self) -> str:
        if not self.levels:
            return "original"
        text = "tile " + " / ".join(self.size_specs)
        if self.jam:
            text += f" jam {self.jam_spec}" + (" scalarize" if self.scalarize else "")
        if self.extra_cflags:
            text += f" [{' '.join(self.extra_cflags)}]"
        return text

    @property
    def key(self) -> tuple:
        return self.levels, self.jam, self.scalarize, self.extra_cflags

    def request(self, order: tuple[str, ...] | None) -> TileRequest:
        return TileRequest(self.levels[0], order, "split", self.jam, self.scalarize, self.levels[1:])


@dataclass
class Variant:
    config: Config
    command: str | None = None
    new: bytes | None = None
    reassociated: tuple[str, ...] = ()
    exe: str | None = None
    status: str = "pending"  # timed, refused, build failed, failed, skipped (budget)
    times: list[float] = field(default_factory=list)
    result_hash: str | None = None
    note: str = ""
    confirmed: list[float] = field(default_factory=list)  # the times of the confirmation round alone
    passes: list[list[float]] = field(default_factory=list)  # the same, per pass of the round
    # The original only: how far its own medians (first round, each confirmation pass) lie apart,
    # (largest / smallest - 1): the noise of this machine during the run.
    spread: float = 0.0

    @property
    def seconds(self) -> float | None:
        """The median of the confirmation round when there was one (the first round's fastest
        variants are also its luckiest: judging them on fresh, interleaved runs removes that
        selection bias), else of every run."""
        runs = self.confirmed or self.times
        return statistics.median(runs) if runs else None


@dataclass(frozen=True)
class TuneOptions:
    params: dict[str, int]
    band: tuple[str, ...] | None = None
    candidates: tuple[int, ...] = DEFAULT_CANDIDATES
    jam_candidates: tuple[tuple[int, ...], ...] | None = None  # None: JAM_DEFAULTS by jammable loops
    budget: float = 120.0  # seconds of wall time for the whole job
    jobs: int = 2
    runs: int = 5  # timed calls per variant (after one warm-up), fewer when a call is slow
    order: tuple[str, ...] | None = None
    cflags: tuple[str, ...] = toolchain.DEFAULT_TUNE_CFLAGS
    max_grid: int = 12  # tile-size combinations of the grid
    top: int = 2  # fastest tiles of round 1 that round 2 jams
    min_gain: float = 0.05  # a variant must be this much faster than the original to win
    tile: pipeline.TileOptions = pipeline.TileOptions()
    shapes: dict[str, str] = field(default_factory=dict)
    verify_timeout: float = 60.0
    cflags_variants: tuple[tuple[str, ...], ...] = ()  # round 2 also builds each jam variant with these added


@dataclass
class TuneResult:
    path: str
    selector: str
    function: str
    band: tuple[str, ...]
    work: workload.Workload
    variants: list[Variant]
    original: Variant
    best: Variant
    verified: verify.VerifyReport | None
    notes: list[str]
    elapsed: float
    budget: float
    skipped: int
    cflags: tuple[str, ...]
    min_gain: float
    verify_seconds: float = 0.0


class Clock:
    """The budget: seconds left, minus what verifying the winner needs at the end."""

    def __init__(self, budget: float) -> None:
        self.start = time.monotonic()
        self.budget = budget
        self.reserve = min(20.0, 0.2 * budget)
        self.verifying = 0.0  # seconds spent verifying

    def left(self) -> float:
        return self.budget - self.reserve - (time.monotonic() - self.start)

    def elapsed(self) -> float:
        return time.monotonic() - self.start


# ---------------------------------------------------------------- candidates

def default_band(nest: Nest, analysis) -> tuple[str, ...]:
    """The longest fully permutable band of the perfect loops from the outermost (at least one loop)."""
    its = nest.iterators
    for hi in range(len(its) - 1, 0, -1):
        if analysis.permutable(0, hi):
            return its[: hi + 1]
    return its[:1]


def trip_counts(nest: Nest, band: tuple[str, ...], values: dict[str, int]) -> dict[str, int | None]:
    """Trip count of each band loop at these parameter values (None: it depends on outer iterators)."""
    out: dict[str, int | None] = {}
    for it in band:
        try:
            out[it] = workload.iterations([nest.loop(it)], values)
        except workload._Unknown:
            out[it] = None
    return out


def grid(band: tuple[str, ...], cands: dict[str, list[int]], limit: int) -> list[tuple[tuple[str, int], ...]]:
    """Up to ``limit`` combinations of candidate sizes, the most even ones (smallest max/min) first."""
    combos = itertools.product(*(cands[it] for it in band))
    ranked = sorted(combos, key=lambda c: (max(c) / min(c), -min(c)))
    picked = ranked[:limit]
    return [tuple(zip(band, c)) for c in sorted(picked)]


def analytic(nest: Nest, analysis, band: tuple[str, ...], params: dict[str, int],
             notes: list[str]) -> Config | None:
    """The pick of looptile.autosize for this machine's caches, when that module is there."""
    try:
        from . import autosize
    except ImportError:
        notes.append("the analytic pick is skipped: looptile.autosize is not available")
        return None
    levels, why = machine_levels()
    if why:
        notes.append(why)
    try:
        choice = autosize.choose(nest, analysis, band, levels, params)
    except LooptileError as exc:
        notes.append(f"no analytic pick: {exc.headline() if hasattr(exc, 'headline') else exc}")
        return None
    lv = tuple(tuple((it, int(s)) for it, s in level.items()) for level in choice.levels) or \
        (tuple((it, int(s)) for it, s in choice.sizes.items()),)
    return Config(lv, origin="analytic")


def analytic_register(tu: TranslationUnit, sel: str, band: tuple[str, ...], opts: TuneOptions,
                      notes: list[str]) -> Config | None:
    """The pick of the cache and register models together (``tile --sizes auto --jam auto``): its
    tiles, register tile and scalarization, when the register model finds a tile."""
    from . import autosize, regtile
    levels, _ = machine_levels()
    auto = autosize.AutoSizing(tuple((x, None) for x in band), tuple(levels), tuple(sorted(opts.params.items())))
    regs = regtile.RegisterTiling(regtile.machine_registers(), tuple(sorted(opts.params.items())))
    try:
        req = pipeline.chosen_request(tu, sel, TileRequest(order=opts.order),
                                      replace(opts.tile, autosize=auto, regtile=regs))
    except LooptileError as exc:
        notes.append(f"no analytic register tile: {exc.headline() if hasattr(exc, 'headline') else exc}")
        return None
    if not req.jam:
        return None
    return Config((tuple(req.sizes),) + tuple(req.levels), tuple(req.jam), req.scalarize, "analytic")


def neighbours(pick: Config) -> list[Config]:
    """The analytic pick with one innermost size doubled or halved."""
    out = []
    inner = pick.levels[-1]
    for k, (it, s) in enumerate(inner):
        for t in (s * 2, s // 2):
            if t >= 2:
                lv = inner[:k] + ((it, t),) + inner[k + 1:]
                out.append(Config(pick.levels[:-1] + (lv,), origin="neighbour"))
    return out


def jammable(band: tuple[str, ...], nest: Nest, order: tuple[str, ...] | None) -> tuple[str, ...]:
    """Band loops that can be unrolled and jammed: the point loops except the innermost loop."""
    innermost = nest.iterators[-1]
    if order:
        innermost = order[-1]
    return tuple(it for it in band if it != innermost)


def jam_configs(base: Config, loops: tuple[str, ...], factors: tuple[tuple[int, ...], ...],
                flag_sets: tuple[tuple[str, ...], ...] = ()) -> list[Config]:
    """``base`` with each set of jam factors (on the outermost jammable loops), with and without
    scalar replacement; a jammed loop's innermost tile size is rounded up to a multiple of its factor."""
    out = []
    for fs in factors:
        fs = fs[: len(loops)]
        if not fs or all(f == 1 for f in fs):
            continue
        jam = tuple((it, f) for it, f in zip(loops, fs) if f > 1)
        inner = dict(base.levels[-1])
        if any(it not in inner for it, _ in jam):
            continue
        for it, f in jam:
            inner[it] = -(-inner[it] // f) * f
        outer = dict(base.levels[-2]) if len(base.levels) > 1 else {}
        if any(it in outer and outer[it] % inner[it] for it, _ in jam):
            continue  # the rounded size no longer divides the level outside
        lv = base.levels[:-1] + (tuple(inner.items()),)
        for extra in ((),) + tuple(flag_sets):
            for sc in (False, True):
                out.append(Config(lv, jam, sc, "jam", tuple(extra)))
    return out


# ---------------------------------------------------------------- the driver

def _driver_context(spec: KernelSpec, include: str, shapes: dict[str, str]) -> dict:
    """What tune_driver.c.j2 needs: as harness.render_harness, with the arrays the kernel may
    write marked (restored before every call) and argv starting at 3."""
    scalars, floats, arrays, args = [], [], [], []
    k = 3
    for p in spec.params:
        if p.kind == "int":
            scalars.append({"decl": f"{p.ctype.spelling} {p.name}", "type": p.ctype.spelling, "arg": k})
            k += 1
    for p in spec.params:
        if p.kind == "float":
            floats.append({"decl": f"{p.ctype.spelling} {p.name}", "name": p.name})
        elif p.kind == "array":
            if p.dims and all(p.dims):
                count = " * ".join(f"looptile_extent({d})" for d in p.dims)
            elif p.name in shapes:
                count = f"looptile_extent({shapes[p.name]})"
            else:
                rest = " * ".join(f"looptile_extent({d})" for d in p.dims[1:]) or "1"
                count = f"(size_t)strtoull(argv[{k}], 0, 10) * {rest}"
                k += 1
            arrays.append({"name": p.name, "elem": p.ctype.spelling or "double", "count": count,
                           "kind": 2 if p.ctype.kind == "float" else (1 if p.ctype.signed else 0),
                           "written": not p.ctype.const})
        args.append(f"(void *)looptile_a_{p.name}" if p.kind == "array" else p.name)
    globals_ = [{"name": g.name, "elem_size": f"sizeof {g.name}{'[0]' * g.ndims}",
                 "kind": 2 if g.elem.kind == "float" else (1 if g.elem.signed else 0)} for g in spec.globals]
    return dict(kernel=spec.function, include=include, argc=k, scalars=scalars, floats=floats, arrays=arrays,
                globals=globals_, returns=spec.returns, call_args=", ".join(args))


def driver_args(tu: TranslationUnit, spec: KernelSpec, params: dict[str, int],
                shapes: dict[str, str]) -> list[str]:
    """argv after RUNS and MAX_SECONDS: the integer parameters, then undeclared arrays' extents."""
    missing = [n for n in spec.bound_params + spec.other_ints if n not in params]
    if missing:
        raise UsageError(f"give the value of {', '.join(missing)} with --params (e.g. --params {missing[0]}=1000): "
                         "tune times the kernel at those sizes")
    runs = verify.parameter_sets(spec, verify._analyses(tu, spec.function),
                                 verify.VerifyOptions(params=(dict(params),), shapes=shapes))
    values, counts = runs[0]
    ints = [p.name for p in spec.params if p.kind == "int"]
    return [str(values[n]) for n in ints] + [str(c) for c in counts]


# ---------------------------------------------------------------- build and time

def _make(tu: TranslationUnit, sel: str, cfg: Config, opts: TuneOptions,
          command_of: Callable[[Config], str]) -> Variant:
    v = Variant(cfg)
    if not cfg.levels:
        v.new = tu.source.data
        return v
    v.command = command_of(cfg)
    try:
        out = pipeline.tile(tu, sel, cfg.request(opts.order), replace(opts.tile, command=v.command))
    except LooptileError as exc:
        v.status, v.note = "refused", exc.headline() if hasattr(exc, "headline") else str(exc)
        return v
    v.new, v.reassociated = out.new, out.reassociated
    return v


def _build(v: Variant, k: int, tmp: str, spec: KernelSpec, tu: TranslationUnit, opts: TuneOptions,
           clock: Clock) -> None:
    if v.new is None or clock.left() <= 0:
        if v.new is not None:
            v.status = "skipped (budget)"
        return
    src = os.path.join(tmp, f"v{k}.c")
    with open(src, "wb") as fh:
        fh.write(v.new)
    drv = os.path.join(tmp, f"driver{k}.c")
    with open(drv, "w", encoding="latin-1") as fh:
        fh.write(render("tune_driver.c.j2", **_driver_context(spec, src, opts.shapes)) + "\n")
    b = toolchain.build_timed([drv, os.path.join(tmp, "timer.c")], os.path.join(tmp, f"v{k}"), tu.flags,
                              os.path.dirname(os.path.abspath(tu.source.path)),
                              list(opts.cflags) + list(v.config.extra_cflags), clock.left())
    if b.ok:
        v.exe, v.status = b.exe, "built"
    else:
        err = [ln for ln in b.messages.splitlines() if "error" in ln][:1] or b.messages.splitlines()[:1]
        v.status, v.note = "build failed", (err[0] if err else "the compiler failed")


def _time(v: Variant, args: list[str], opts: TuneOptions, clock: Clock, cap: float) -> None:
    left = clock.left()
    if v.exe is None:
        return
    if left <= 0:
        v.status = "skipped (budget)"
        return
    r = toolchain.run(v.exe, [str(opts.runs), f"{min(cap, left):.3f}"] + args, left)
    if r.returncode != 0:
        v.status = "failed"
        v.note = "stopped by the budget" if r.returncode is None else f"the driver exits with status {r.returncode}"
        return
    for line in r.stdout.decode("latin-1").splitlines():
        if line.startswith("hash "):
            v.result_hash = line.split()[1]
        elif line.strip():
            v.times.append(float(line))
    v.status = "timed" if v.times else "failed"


def _round(tu, sel, configs: list[Config], variants: list[Variant], tmp: str, spec: KernelSpec, args: list[str],
           opts: TuneOptions, clock: Clock, command_of, progress: Callable[[str], None],
           until: float) -> list[Variant]:
    """Make, build (in parallel, while the next ones are made) and then time the new configs; no new
    variant is made once ``until`` of the budget is spent (the rest is for building and timing)."""
    seen = {x.config.key for x in variants}
    todo = []
    with ThreadPoolExecutor(max_workers=max(1, opts.jobs)) as pool:
        futures = []
        for cfg in configs:
            if cfg.key in seen:
                continue
            seen.add(cfg.key)
            v = Variant(cfg, status="skipped (budget)")
            if clock.left() > 0 and clock.elapsed() < until * clock.budget:
                v = _make(tu, sel, cfg, opts, command_of)
                progress(f"made {cfg.label()}")
            if v.new is not None and v.status == "pending":
                futures.append(pool.submit(_build, v, len(variants) + len(todo), tmp, spec, tu, opts, clock))
            todo.append(v)
        for f in futures:
            f.result()
    cap = max(1.0, 0.04 * clock.budget)
    for v in todo:
        _time(v, args, opts, clock, cap)
        progress(f"timed {v.config.label()}")
    variants += todo
    return todo


def _confirm(orig: Variant, finalists: list[Variant], args: list[str], opts: TuneOptions, clock: Clock,
             cap: float) -> None:
    """Time the original and the finalists again, interleaved, twice each (as far as the budget
    goes); each is then judged on these runs alone (``Variant.confirmed``), all taken in one
    stretch of the noisy machine, when every one of them got some."""
    start = {id(v): len(v.times) for v in [orig] + finalists}
    passes: dict[int, list[list[float]]] = {id(v): [] for v in [orig] + finalists}
    for _ in range(2):
        for v in [orig] + finalists:
            need = min(cap, (opts.runs + 1) * (v.seconds or 0)) + (v.seconds or 0)
            before = len(v.times)
            if clock.left() > need:
                _time(v, args, opts, clock, cap)
            passes[id(v)].append(v.times[before:])
    fresh = {id(v): v.times[start[id(v)]:] for v in [orig] + finalists}
    if all(fresh.values()):
        for v in [orig] + finalists:
            v.confirmed = fresh[id(v)]
            v.passes = list(passes[id(v)])
    meds = [statistics.median(t) for t in [orig.times[:start[id(orig)]]] + passes[id(orig)] if t]
    orig.spread = max(meds) / min(meds) - 1 if meds else 0.0


def run(tu: TranslationUnit, sel: str, opts: TuneOptions, command_of: Callable[[Config], str],
        progress: Callable[[str], None] = lambda msg: None) -> TuneResult:
    """Tune the nest ``sel`` of ``tu`` (see the module docstring)."""
    clock = Clock(opts.budget)
    notes: list[str] = []
    site = pipeline.select(tu, sel)
    nest, analysis = pipeline.analyse(tu, site, opts.tile.assume_pure, opts.tile.assumptions,
                                      assume_in_row=opts.tile.assume_in_row, reassociate=opts.tile.reassociate)
    band = opts.band or default_band(nest, analysis)
    unknown = [it for it in band if it not in nest.iterators]
    if unknown:
        raise UsageError(f"--band names '{unknown[0]}', which is not a perfectly nested loop of this nest "
                         f"(loops: {', '.join(nest.iterators)})")
    spec = kernel_spec(tu, nest.function)
    args = driver_args(tu, spec, opts.params, opts.shapes)
    work = workload.of_nest(tu, nest, analysis, opts.params)
    values = workload.param_values(tu, nest, opts.params)
    trips = trip_counts(nest, band, values)
    cands = {it: [c for c in sorted(set(opts.candidates)) if trips[it] is None or c < trips[it]] or
             [min(opts.candidates)] for it in band}
    configs = [Config()]
    pick = analytic(nest, analysis, band, opts.params, notes)
    if pick is not None:
        configs += [pick] + neighbours(pick)
    configs += [Config((lv,), origin="grid") for lv in grid(band, cands, opts.max_grid)]
    variants: list[Variant] = []
    with tempfile.TemporaryDirectory(prefix="looptile-tune-") as tmp:
        with open(os.path.join(tmp, "timer.c"), "w") as fh:
            fh.write(render("tune_timer.c.j2") + "\n")
        # The original first, alone: it is built and timed before anything else competes for the machine.
        _round(tu, sel, configs[:1], variants, tmp, spec, args, opts, clock, command_of, progress, 1.0)
        _round(tu, sel, configs[1:], variants, tmp, spec, args, opts, clock, command_of, progress, 0.4)
        loops = jammable(band, nest, opts.order)
        factors = opts.jam_candidates or JAM_DEFAULTS.get(min(len(loops), 2), ())
        timed = sorted((v for v in variants if v.status == "timed" and v.config.levels), key=lambda v: v.seconds)
        bases = [v.config for v in timed[: opts.top]]
        if pick is not None and pick not in bases:
            bases.append(pick)
        if pick is not None and len(pick.levels) > 1:  # its outer tiles alone hold register tiles too
            bases.append(Config(pick.levels[:1], origin="analytic"))
        reg = analytic_register(tu, sel, band, opts, notes)
        second = [replace(reg, extra_cflags=tuple(f)) for f in ((),) + tuple(opts.cflags_variants)] if reg else []
        if loops and factors:
            second += [c for b in bases for c in jam_configs(b, loops, factors, opts.cflags_variants)
                       if c not in second]
        if second:
            _round(tu, sel, second, variants, tmp, spec, args, opts, clock, command_of, progress, 0.7)
        orig = variants[0]
        if orig.status != "timed":
            raise UsageError(f"the original could not be timed ({orig.status}: {orig.note})", path=tu.source.path)
        best, verified = _pick(tu, nest, variants, orig, args, opts, clock, notes)
    skipped = sum(v.status == "skipped (budget)" for v in variants)
    return TuneResult(tu.source.path, sel, nest.function, band, work, variants, orig, best, verified, notes,
                      clock.elapsed(), opts.budget, skipped, opts.cflags, opts.min_gain, clock.verifying)


def time_source(tu: TranslationUnit, function: str, data: bytes, opts: TuneOptions) -> list[float]:
    """Times of ``opts.runs`` calls of ``function`` in the file contents ``data`` (which must keep
    the signature of the function in ``tu``), with tune's driver and flags: for benchmarks that
    time a rewrite made elsewhere (``tile --sizes auto``) the same way as tune's variants."""
    spec = kernel_spec(tu, function)
    args = driver_args(tu, spec, opts.params, opts.shapes)
    clock = Clock(opts.budget)
    with tempfile.TemporaryDirectory(prefix="looptile-tune-") as tmp:
        with open(os.path.join(tmp, "timer.c"), "w") as fh:
            fh.write(render("tune_timer.c.j2") + "\n")
        v = Variant(Config(), new=data)
        _build(v, 0, tmp, spec, tu, opts, clock)
        if v.exe is None:
            raise UsageError(f"the file does not build with the timing driver: {v.note}", path=tu.source.path)
        _time(v, args, opts, clock, max(1.0, 0.04 * clock.budget))
    return v.times


def _pick(tu: TranslationUnit, nest: Nest, variants: list[Variant], orig: Variant, args: list[str],
          opts: TuneOptions, clock: Clock, notes: list[str]) -> tuple[Variant, verify.VerifyReport | None]:
    """The fastest variant that beats the original by min_gain after the confirmation, verified."""
    def beats(v: Variant, margin: float | None = None) -> bool:
        """By the margin; after the confirmation, in each of its passes that both were timed in
        (a gain that shows in one stretch of the machine only is not taken), and by more than the
        original's own times moved during the run (a gain within the noise is not taken)."""
        gain = opts.min_gain if margin is None else margin
        if v.seconds >= orig.seconds * (1 - gain):
            return False
        both = [(a, b) for a, b in zip(v.passes, orig.passes) if a and b]
        return all(statistics.median(a) < statistics.median(b) * (1 - gain) for a, b in both)

    ranked = sorted((v for v in variants if v.status == "timed" and v is not orig), key=lambda v: v.seconds)
    finalists = [v for v in ranked[:3] if beats(v)]
    if not finalists:
        return orig, None
    _confirm(orig, finalists, args, opts, clock, max(1.0, 0.04 * clock.budget))
    clock.reserve = 0  # from here on the budget's reserve is for the check of the winner
    spec = kernel_spec(tu, nest.function)
    given = {n: opts.params[n] for n in spec.other_ints if n in opts.params}
    margin = max(opts.min_gain, orig.spread)
    for cand in sorted(finalists, key=lambda v: v.seconds):
        if not beats(cand):
            notes.append(f"{cand.config.label()} was faster at first but not when timed again with the original")
            continue
        if not beats(cand, margin):
            notes.append(f"{cand.config.label()} ran {1 - cand.seconds / orig.seconds:.0%} faster when timed again, "
                         f"but the original's own times moved by {orig.spread:.0%} during this run: a gain within "
                         "the noise is not taken")
            continue
        sizes = tuple(s for lv in cand.config.levels for _, s in lv) + tuple(u for _, u in cand.config.jam)
        t0 = time.monotonic()
        report = verify.verify(tu, cand.new, nest.function,
                               verify.VerifyOptions((given,) if given else (), opts.shapes, timeout=opts.verify_timeout,
                                                    tile_sizes=sizes, reassociated=cand.reassociated))
        clock.verifying += time.monotonic() - t0
        if report.status == 0:
            return cand, report
        notes.append(f"{cand.config.label()} did not pass verify ({report.verdict}); it is not chosen")
    return orig, None
