"""Differential tests: the bundled samples, original against rewritten.

Outside check: the system C compiler, original vs rewritten, compiled with
-O1 -ffp-contract=off and the address and undefined-behaviour sanitizers,
run over the same problem sizes; the samples print a hash of the raw bytes
of their result, so equal output means bit-for-bit equal results.  Any
sanitizer report or non-zero exit is a failure.

Problem sizes are the samples' own size macros (their header comments list
them: "Sizes (override with -DNI=... etc.)").  To run many sizes without a
compile per size, each macro is defined as a value read from the
environment when the program starts (-DNI='looptile_test_size("NI")'); the
samples only use these macros to initialise their size variables in main.
A second test builds with literal -DNAME=VALUE for a few sizes as the
header comments suggest.  For every tiled loop with tile size T the trip
counts include 0, 1, T-1, T, T+1, 2T+1 and odd primes, so whole tiles,
partial tiles and empty loops all occur.
"""
from __future__ import annotations

import re
import shlex
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

import pytest
from conftest import SAMPLES, ProgramFailed, build, headline, run_cli, run_program

pytestmark = pytest.mark.cc

# ---------------------------------------------------------------- the samples
#
# For each legal sample: its kernel, and for each loop of the kernel the size
# macro that sets its trip count and the offset between the two (read from
# the kernels: basin_relax sweeps the interior 1 .. NX-2, camera_blur's
# output rows run to IH - KW).  "fixed" are macros that are no tiled loop's
# size; they take a rotating value.


def no_offset(env: dict[str, int]) -> int:
    return 0


@dataclass(frozen=True)
class Sample:
    file: str
    function: str
    # (iterator, macro, offset): trip count = macro value - offset(the run's other macros)
    loops: tuple[tuple[str, str, Callable[[dict[str, int]], int]], ...]
    fixed: tuple[tuple[str, tuple[int, ...]], ...] = ()

    @property
    def path(self) -> Path:
        return SAMPLES / self.file

    @property
    def iterators(self) -> tuple[str, ...]:
        return tuple(lp[0] for lp in self.loops)


SAMPLE_TABLE = {
    "tracer_mix": Sample("tracer_mix.c", "mix_tracers",
                         (("i", "NI", no_offset), ("j", "NJ", no_offset), ("k", "NK", no_offset))),
    "basin_relax": Sample("basin_relax.c", "relax_basin",
                          (("i", "NX", lambda env: 2), ("j", "NY", lambda env: 2))),
    "grid_turn": Sample("grid_turn.c", "turn_grid", (("i", "NX", no_offset), ("j", "NY", no_offset))),
    # y runs to IH - KW + 1, x to IW - KW + 1; the kernel loops u, v run to KW.
    "camera_blur": Sample("camera_blur.c", "blur_frame",
                          (("y", "IH", lambda env: env["KW"] - 1), ("x", "IW", lambda env: env["KW"] - 1)),
                          fixed=(("KW", (1, 3, 2, 5)),)),
    # j <= i: the j loop's trip count is set by NG too (through i).
    "gauge_cov": Sample("gauge_cov.c", "gauge_cov",
                        (("i", "NG", no_offset), ("j", "NG", no_offset), ("k", "NT", no_offset))),
}


def header_sizes(path: Path) -> dict[str, int]:
    """The size macros and defaults listed in a sample's header comment."""
    text = path.read_text()
    head = text[: text.index("*/")]
    sizes = head[head.index("Sizes"):]
    return {m.group(1): int(m.group(2)) for m in re.finditer(r"^\s*\*\s+([A-Z][A-Z0-9_]*)\s.*\(default (\d+)\)",
                                                              sizes, re.M)}


def suggested_args(path: Path) -> tuple[str, ...]:
    """The arguments after the file name of the header comment's "Suggested command", minus --diff."""
    text = path.read_text()
    m = re.search(r"Suggested command.*?:\s*\n\s*\*\s*(looptile tile \S+ .*)", text)
    assert m, f"{path.name} has no suggested command in its header"
    words = shlex.split(m.group(1))
    return tuple(w for w in words[3:] if w != "--diff")


@pytest.mark.parametrize("name", sorted(SAMPLE_TABLE))
def test_sample_table_matches_header(name):
    """The macro names of the table are the ones the sample's header documents."""
    s = SAMPLE_TABLE[name]
    documented = set(header_sizes(s.path))
    used = {m for _, m, _ in s.loops} | {m for m, _ in s.fixed}
    assert used == documented, (s.file, used, documented)
    for _, macro, _ in s.loops:
        assert re.search(rf"^#define {macro} \d+$", s.path.read_text(), re.M), (s.file, macro)


# ---------------------------------------------------------------- the requests

def requests_for(name: str) -> list[tuple[str, tuple[str, ...]]]:
    """The requests tried on every legal sample (and a few more on the 3-deep one)."""
    s = SAMPLE_TABLE[name]
    its = s.iterators
    d = len(its)
    a, b = its[0], its[1]
    out = [
        ("suggested", suggested_args(s.path)),  # the header's command: default split remainder
        ("odd-split", ("--nest", s.function, "--sizes", ",".join(map(str, (3, 5, 7)[:d])), "--remainder", "split")),
        ("odd-clamp", ("--nest", s.function, "--sizes", ",".join(map(str, (5, 3, 7)[:d])), "--remainder", "clamp")),
        ("single-loop-7", ("--nest", s.function, "--sizes", f"{a}=7")),
        ("size-1", ("--nest", s.function, "--sizes", ",".join("1" * d))),
        # tile loops swapped, then the point loops swapped too; 'i.1' names the tile loop of i
        ("order-swapped", ("--nest", s.function, "--sizes", "4,3", "--remainder", "clamp",
                           "--order", f"{b}.1,{a}{a},{b},{a}")),
        ("interchange", ("--nest", s.function, "--order", f"{b},{a}")),
    ]
    if name == "tracer_mix":
        out += [
            ("order-ikj-tiled", ("--nest", s.function, "--sizes", "4,5,3", "--order", "ii,kk,jj,i,k,j")),
            ("band-jk-clamp", ("--nest", s.function, "--sizes", "j=3,k=5", "--remainder", "clamp",
                               "--order", "i,kk,jj,k,j")),
            ("single-inner-5", ("--nest", s.function, "--sizes", "j=5")),
        ]
    return out


ALL_REQUESTS = [(name, rid, args) for name in sorted(SAMPLE_TABLE) for rid, args in requests_for(name)]


def tile_sizes(sample: Sample, args: tuple[str, ...]) -> dict[str, int]:
    """Iterator -> tile size of a request (the test's own reading of --sizes)."""
    if "--sizes" not in args:
        return {}
    spec = args[args.index("--sizes") + 1]
    out = {}
    for k, item in enumerate(spec.split(",")):
        name, eq, value = item.partition("=")
        out[name if eq else sample.iterators[k]] = int(value if eq else name)
    return out


# ---------------------------------------------------------------- problem sizes

PRIMES = (13, 31)


def trip_list(tile: int | None) -> list[int]:
    if tile is None:
        base = [0, 1, 2, 7, 13, 5]
    else:
        base = [0, 1, tile - 1, tile, tile + 1, 2 * tile + 1, *PRIMES]
    seen: list[int] = []
    for v in base:
        if v >= 0 and v not in seen:
            seen.append(v)
    return seen


def size_runs(sample: Sample, tiles: dict[str, int]) -> list[dict[str, int]]:
    """Macro values for the runs: every trip-count list rotated against the others."""
    fixed_lists = {m: list(vals) for m, vals in sample.fixed}
    per_loop = []
    for it, macro, _ in sample.loops:
        per_loop.append((it, macro, trip_list(tiles.get(it))))
    length = max(len(v) for _, _, v in per_loop)
    runs = []
    for k in range(length):
        env: dict[str, int] = {}
        for m, vals in fixed_lists.items():
            env[m] = vals[k % len(vals)]
        for d, (it, macro, trips) in enumerate(per_loop):
            trip = trips[(k + d) % len(trips)]
            offset = next(off for i2, _, off in sample.loops if i2 == it)
            if macro in env:  # two loops share a macro (gauge_cov's i and j): the first one decides
                continue
            env[macro] = trip + offset(env)
        runs.append(env)
    # and problem size 0 proper (every macro 0, below the trip-count offsets)
    runs.append({m: 0 for m in {mm for _, mm, _ in sample.loops} | set(fixed_lists)})
    unique = []
    for r in runs:
        if r not in unique:
            unique.append(r)
    return unique


SIZE_HEADER = """#include <stdlib.h>
/* looptile tests: problem sizes come from the environment (see test_differential.py). */
static int looptile_test_size(const char *name)
{
    const char *v = getenv(name);
    if (v == NULL)
        abort();
    return atoi(v);
}
"""


def runtime_size_flags(sample: Sample, header: Path) -> list[str]:
    macros = [m for _, m, _ in sample.loops] + [m for m, _ in sample.fixed]
    flags = ["-include", str(header)]
    for m in dict.fromkeys(macros):
        flags.append(f'-D{m}=looptile_test_size("LOOPTILE_{m}")')
    return flags


def env_of(sizes: dict[str, int]) -> dict[str, str]:
    return {f"LOOPTILE_{k}": str(v) for k, v in sizes.items()}


# ---------------------------------------------------------------- where the nest is (independently of looptile)

def nest_span(data: bytes, function: str) -> tuple[int, int]:
    """Byte span of the kernel's nest: from the first 'for' of the function body to the
    last character before the closing brace of the function (the samples' kernels
    hold exactly one nest)."""
    text = data.decode("latin-1")
    m = re.search(rf"^static void {re.escape(function)}\(", text, re.M)
    assert m, function
    body = text.index("\n{", m.end()) + 2
    start = text.index("for", body)
    close = text.index("\n}", start)
    end = len(text[:close].rstrip())
    return start, end


# ---------------------------------------------------------------- the work, shared by the tests of a sample

@dataclass
class RequestResult:
    exit_code: int
    stderr: str
    original: bytes
    new: bytes | None
    runs: list[tuple[dict[str, int], str | None, str | None, str | None]] = field(default_factory=list)
    # (sizes, original output, rewritten output, failure)


_CACHE: dict[str, dict[str, RequestResult]] = {}


def _run_all(exe: Path, src: Path | None, flags: list[str], configs: list[dict[str, int]]):
    """Build ``src`` into ``exe`` (when given) and run it for every size config: [(output or None, failure or None)]."""
    if src is not None:
        build(src, exe, flags)
    out = []
    for sizes in configs:
        try:
            out.append((run_program(exe, env_of(sizes)), None))
        except ProgramFailed as exc:
            out.append((None, str(exc)))
    return out


def _compute(name: str, workdir: Path) -> dict[str, RequestResult]:
    sample = SAMPLE_TABLE[name]
    header = workdir / "looptile_test_sizes.h"
    header.write_text(SIZE_HEADER)
    flags = runtime_size_flags(sample, header)
    original = sample.path.read_bytes()
    reqs = requests_for(name)
    configs = {rid: size_runs(sample, tile_sizes(sample, args)) for rid, args in reqs}
    union: list[dict[str, int]] = []
    for cfgs in configs.values():
        union += [c for c in cfgs if c not in union]
    results: dict[str, RequestResult] = {}
    with ThreadPoolExecutor(max_workers=2) as pool:
        orig_job = pool.submit(_run_all, workdir / "original.exe", sample.path, flags, union)
        jobs = {}
        # The tiling runs through the command line in this thread (CliRunner is not
        # thread safe); building and running go to the pool as soon as a rewrite exists.
        for rid, args in reqs:
            out = workdir / f"{rid}.c"
            result = run_cli("tile", sample.path, *args, "-o", out)
            new = out.read_bytes() if out.exists() else None
            results[rid] = RequestResult(result.exit_code, result.stderr, original, new)
            if result.exit_code == 0 and new is not None:
                jobs[rid] = pool.submit(_run_all, workdir / f"{rid}.exe", out, flags, configs[rid])
        try:
            orig = dict(zip(map(_key, union), orig_job.result()))
        except ProgramFailed as exc:
            orig = {_key(c): (None, f"original does not build: {exc}") for c in union}
        for rid, fut in jobs.items():
            try:
                runs = fut.result()
            except ProgramFailed as exc:
                results[rid].runs = [({}, None, None, f"rewritten file does not build: {exc}")]
                continue
            for sizes, (b_out, b_err) in zip(configs[rid], runs):
                a_out, a_err = orig[_key(sizes)]
                why = f"original: {a_err}" if a_err else (f"rewritten: {b_err}" if b_err else None)
                results[rid].runs.append((sizes, a_out, b_out, why))
    return results


def _key(sizes: dict[str, int]) -> tuple:
    return tuple(sorted(sizes.items()))


@pytest.fixture
def sample_results(tmp_path_factory):
    def get(name: str) -> dict[str, RequestResult]:
        if name not in _CACHE:
            _CACHE[name] = _compute(name, tmp_path_factory.mktemp(f"diff-{name}"))
        return _CACHE[name]
    return get


@pytest.mark.parametrize("name,rid,args", ALL_REQUESTS, ids=[f"{n}-{r}" for n, r, _ in ALL_REQUESTS])
def test_rewrite_runs_like_original(sample_results, name, rid, args):
    sample = SAMPLE_TABLE[name]
    res = sample_results(name)[rid]
    assert res.exit_code == 0, f"looptile tile {sample.file} {shlex.join(args)} exited {res.exit_code}:\n{res.stderr}"
    assert res.new is not None and res.new != res.original
    assert res.runs, "no runs"
    failures = [f"sizes {s}: {why}" for s, _, _, why in res.runs if why]
    assert not failures, "\n".join(failures)
    # outside check: the system C compiler, original vs rewritten, compared bit for bit
    mismatches = [f"sizes {s}: original {a!r} rewritten {b!r}" for s, a, b, _ in res.runs if a != b]
    assert not mismatches, "\n".join(mismatches)
    for _, a, _, _ in res.runs:
        assert re.fullmatch(rf"{name} [0-9a-f]{{16}}\n", a), a


@pytest.mark.parametrize("name,rid,args", ALL_REQUESTS, ids=[f"{n}-{r}" for n, r, _ in ALL_REQUESTS])
def test_rewrite_changes_only_the_nest(sample_results, name, rid, args):
    sample = SAMPLE_TABLE[name]
    res = sample_results(name)[rid]
    assert res.exit_code == 0, res.stderr
    start, end = nest_span(res.original, sample.function)
    new = res.new
    assert new[:start] == res.original[:start], "bytes before the nest changed"
    assert new.endswith(res.original[end:]), "bytes after the nest changed"
    region = new[start: len(new) - (len(res.original) - end)]
    assert region.startswith(b"/* looptile:"), region[:80]
    # the body statement is kept verbatim (the samples' bodies have no comments)
    body_last_line = res.original[:end].decode().rsplit("\n", 1)[-1].strip()
    assert body_last_line.encode() in region


def test_every_run_has_a_tiled_size_set():
    """The size lists really contain the remainder cases (0, 1, T-1, T, T+1) for every tiled loop."""
    s = SAMPLE_TABLE["tracer_mix"]
    runs = size_runs(s, {"i": 5, "j": 3, "k": 7})
    for macro, t in (("NI", 5), ("NJ", 3), ("NK", 7)):
        values = {r[macro] for r in runs}
        assert {0, 1, t - 1, t, t + 1, 13, 31} <= values, (macro, values)


# ---------------------------------------------------------------- literal -D sizes, as the headers suggest

@pytest.mark.parametrize("name", sorted(SAMPLE_TABLE))
def test_suggested_rewrite_with_literal_size_macros(sample_results, tmp_path, name):
    """The header's suggested rewrite, built with literal -DNAME=VALUE sizes."""
    sample = SAMPLE_TABLE[name]
    res = sample_results(name)["suggested"]
    assert res.exit_code == 0, res.stderr
    out = tmp_path / "rewritten.c"
    out.write_bytes(res.new)
    t = max(tile_sizes(sample, suggested_args(sample.path)).values())
    macros = list(header_sizes(sample.path))
    # the defaults; all 0; and a mix of T+1 and T-1 (plus 2 for loops that skip the border)
    configs = [{}, {m: 0 for m in macros}, {m: (t + 3 if k % 2 == 0 else t + 1) for k, m in enumerate(macros)}]
    if name == "camera_blur":
        configs[2]["KW"] = 3

    def one(k_cfg):
        k, cfg = k_cfg
        flags = [f"-D{m}={v}" for m, v in cfg.items()]
        a_exe, b_exe = tmp_path / f"a{k}.exe", tmp_path / f"b{k}.exe"
        build(sample.path, a_exe, flags)
        build(out, b_exe, flags)
        return cfg, run_program(a_exe), run_program(b_exe)

    with ThreadPoolExecutor(max_workers=2) as pool:
        results = list(pool.map(one, enumerate(configs)))
    for cfg, a, b in results:
        # outside check: the system C compiler, original vs rewritten, compared bit for bit
        assert a == b, (cfg, a, b)


# ---------------------------------------------------------------- the samples that must be refused

def test_shoal_sweep_is_refused_with_the_flow_dependence(tmp_path):
    out = tmp_path / "out.c"
    result = run_cli("tile", SAMPLES / "shoal_sweep.c", "--nest", "sweep_shoal", "--sizes", "8,8", "-o", out)
    assert result.exit_code == 1, result.stderr
    assert not out.exists()
    assert result.stdout_bytes == b""
    h = headline(result.stderr)
    assert h["kind"] == "refused"
    assert "flow dependence" in h["msg"]
    assert h["path"].endswith("shoal_sweep.c")
    text = (SAMPLES / "shoal_sweep.c").read_text().split("\n")
    line = int(h["line"])
    assert text[line - 1].lstrip().startswith("for (int i = 1;"), text[line - 1]
    assert int(h["col"]) == text[line - 1].index("for") + 1


def test_harbour_hist_is_refused_for_its_data_dependent_subscript(tmp_path):
    out = tmp_path / "out.c"
    result = run_cli("tile", SAMPLES / "harbour_hist.c", "--nest", "count_levels", "--sizes", "16,16", "-o", out)
    assert result.exit_code == 1, result.stderr
    assert not out.exists()
    h = headline(result.stderr)
    assert h["kind"] == "refused"
    assert re.search(r"subscript.*not (an )?affine", h["msg"]), h["msg"]
    text = (SAMPLES / "harbour_hist.c").read_text().split("\n")
    line = int(h["line"])
    assert "hist[img[y][x]]++" in text[line - 1]
    # the caret is on the subscript img[y][x]
    assert int(h["col"]) == text[line - 1].index("img[y][x]") + 1


# ---------------------------------------------------------------- no new overflow near the type's limits

EXTREME = r"""
#include <limits.h>
#include <stdint.h>
#include <stdio.h>
#include <stddef.h>

static unsigned char seen[64][64];

/* Tide-gauge counters near the end of the range of their type: the loops run
 * a few iterations just below INT_MAX / above INT_MIN / below SIZE_MAX. */
static void mark_top(int lo, int hi, int lo2, int hi2)
{
    for (int i = lo; i < hi; i++)
        for (int j = lo2; j <= hi2; j++)
            seen[i - lo][j - lo2] += (unsigned char)(1 + ((i ^ j) & 3));
}

static void mark_bottom(int hi, int lo, int hi2, int lo2)
{
    for (int i = hi; i >= lo; i--)
        for (int j = hi2; j > lo2; j--)
            seen[hi - i][hi2 - j] += (unsigned char)(1 + ((i ^ j) & 3));
}

static void mark_unsigned(size_t lo, size_t hi, size_t lo2, size_t hi2)
{
    for (size_t i = lo; i < hi; i++)
        for (size_t j = lo2; j < hi2; j++)
            seen[i - lo][j - lo2] += (unsigned char)(1 + ((i ^ j) & 3));
}

static uint64_t digest(void)
{
    uint64_t h = UINT64_C(0xcbf29ce484222325);
    for (int a = 0; a < 64; a++)
        for (int b = 0; b < 64; b++) {
            h ^= seen[a][b];
            h *= UINT64_C(0x00000100000001b3);
        }
    return h;
}

int main(void)
{
    for (int w = 0; w <= 9; w++) {
        mark_top(INT_MAX - w, INT_MAX, INT_MAX - w - 1, INT_MAX - 1);
        mark_bottom(INT_MIN + w + 1, INT_MIN + 1, INT_MIN + w + 1, INT_MIN);
        mark_unsigned(SIZE_MAX - w, SIZE_MAX, SIZE_MAX - 2 * w, SIZE_MAX);
        mark_top(-w, w, INT_MIN, INT_MIN + w);
        printf("%d %016llx\n", w, (unsigned long long)digest());
    }
    return 0;
}
"""


@pytest.mark.parametrize("function", ["mark_top", "mark_bottom", "mark_unsigned"])
@pytest.mark.parametrize("request_args", [("--sizes", "4,4"), ("--sizes", "3,5", "--remainder", "clamp"),
                                          ("--sizes", "i=4")], ids=["split", "clamp", "single"])
def test_no_new_overflow_near_type_limits(tmp_path, function, request_args):
    """The rewritten loops must not overflow where the original does not (UBSan reports
    signed overflow; an unsigned wrap shows as different output or a hang)."""
    src = tmp_path / "extreme.c"
    src.write_text(EXTREME)
    out = tmp_path / "rewritten.c"
    result = run_cli("tile", src, "--nest", function, *request_args, "-o", out)
    assert result.exit_code == 0, result.stderr
    with ThreadPoolExecutor(max_workers=2) as pool:
        fa = pool.submit(lambda: (build(src, tmp_path / "a.exe"), run_program(tmp_path / "a.exe", timeout=60))[1])
        fb = pool.submit(lambda: (build(out, tmp_path / "b.exe"), run_program(tmp_path / "b.exe", timeout=60))[1])
        a, b = fa.result(), fb.result()
    # outside check: the system C compiler with UBSan (signed overflow), original vs rewritten
    assert a == b
    assert len(a.splitlines()) == 10


# ---------------------------------------------------------------- the harness itself catches wrong rewrites

WRONG_TILINGS = {
    # the classic slip: no remainder, the last partial tile of rows is dropped
    "drops-partial-tile": """for (int ii = 0; ii + 4 <= n; ii += 4)
        for (int i = ii; i < ii + 4; i++)
            for (int j = 0; j < m; j++)
                T[j][i] = G[i][j];""",
    # no clamp: the last tile runs past the bound
    "runs-past-bound": """for (int ii = 0; ii < n; ii += 4)
        for (int i = ii; i < ii + 4; i++)
            for (int j = 0; j < m; j++)
                T[j][i] = G[i][j];""",
}


@pytest.mark.parametrize("variant", sorted(WRONG_TILINGS))
def test_harness_detects_a_wrong_tiling(tmp_path, variant):
    """A hand-made wrong tiling of grid_turn spliced in place of the nest must fail the
    differential comparison over the sizes the tests use (so the size lists have teeth)."""
    sample = SAMPLE_TABLE["grid_turn"]
    data = sample.path.read_bytes()
    start, end = nest_span(data, sample.function)
    wrong = tmp_path / "wrong.c"
    wrong.write_bytes(data[:start] + WRONG_TILINGS[variant].encode() + data[end:])
    header = tmp_path / "sizes.h"
    header.write_text(SIZE_HEADER)
    flags = runtime_size_flags(sample, header)
    configs = size_runs(sample, {"i": 4, "j": 4})
    with ThreadPoolExecutor(max_workers=2) as pool:
        fa = pool.submit(_run_all, tmp_path / "a.exe", sample.path, flags, configs)
        fb = pool.submit(_run_all, tmp_path / "b.exe", wrong, flags, configs)
        a, b = fa.result(), fb.result()
    assert all(err is None for _, err in a)
    bad = [cfg for cfg, (oa, _), (ob, eb) in zip(configs, a, b) if eb is not None or oa != ob]
    assert bad, "the wrong tiling went unnoticed"
    # ... and it is caught exactly where rows remain after whole tiles
    assert all(cfg["NX"] % 4 != 0 for cfg in bad), bad


# ---------------------------------------------------------------- more loop shapes (tests/data/loop_shapes.c)

SHAPES = Path(__file__).resolve().parent / "data" / "loop_shapes.c"
SHAPE_REQUESTS = [
    ("inclusive_step3", ("--sizes", "3,2")), ("inclusive_step3", ("--sizes", "2,5", "--remainder", "clamp")),
    ("down_step2", ("--sizes", "3,2")), ("down_step2", ("--sizes", "2,3", "--order", "jj,ii,j,i")),
    ("not_equal", ("--sizes", "3,2")),
    ("unsigned_step", ("--sizes", "j=4", "--remainder", "clamp")),
    ("macro_bound", ("--sizes", "3,2")),
    ("upper_triangle", ("--sizes", "3,2")), ("upper_triangle", ("--sizes", "2,5", "--remainder", "clamp")),
    ("strict_lower", ("--sizes", "2,3", "--order", "jj,ii,j,i")),
    ("guarded", ("--order", "j,i")),
    ("imperfect", ("--sizes", "j=4")),
]
_SHAPES_CACHE: dict = {}


def _shape_results(workdir: Path) -> dict:
    if _SHAPES_CACHE:
        return _SHAPES_CACHE
    with ThreadPoolExecutor(max_workers=2) as pool:
        orig = pool.submit(_run_all, workdir / "original.exe", SHAPES, [], [{}])
        jobs = {}
        for k, (fn, args) in enumerate(SHAPE_REQUESTS):
            out = workdir / f"shape{k}.c"
            r = run_cli("tile", SHAPES, "--nest", fn, *args, "-o", out)
            _SHAPES_CACHE[k] = [r.exit_code, r.stderr, None]
            if r.exit_code == 0:
                jobs[k] = pool.submit(_run_all, workdir / f"shape{k}.exe", out, [], [{}])
        (a, a_err), = orig.result()
        for k, fut in jobs.items():
            try:
                (b, b_err), = fut.result()
            except ProgramFailed as exc:
                b, b_err = None, str(exc)
            _SHAPES_CACHE[k][2] = (a, a_err, b, b_err)
    return _SHAPES_CACHE


@pytest.mark.parametrize("k", range(len(SHAPE_REQUESTS)),
                         ids=[f"{fn}-{'_'.join(a).lstrip('-')}" for fn, a in SHAPE_REQUESTS])
def test_loop_shapes_run_like_original(tmp_path_factory, k):
    fn, args = SHAPE_REQUESTS[k]
    res = _shape_results(tmp_path_factory.mktemp("shapes"))
    code, stderr, runs = res[k]
    assert code == 0, f"looptile tile loop_shapes.c --nest {fn} {' '.join(args)}: exit {code}\n{stderr}"
    a, a_err, b, b_err = runs
    assert a_err is None, a_err
    assert b_err is None, b_err
    # outside check: the system C compiler, original vs rewritten, compared bit for bit
    assert a == b
    assert len(a.splitlines()) == 16 * 9
