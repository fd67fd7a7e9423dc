"""Unroll-and-jam (``looptile jam``) and plain unrolling (``looptile unroll``), tested as a
demanding user of the tidal-basin ocean model and the harbour-camera pipeline would.

Outside references used here (each check names its own beside it):

- the system C compiler: the original and the rewritten file are compiled with
  -O1 -ffp-contract=off and the address and undefined-behaviour sanitizers (conftest.build)
  and run over the same problem sizes in one process each; every global array and the
  iterators' final values are hashed (FNV-1a over the raw bytes) after each kernel call, so
  equal output means bit-for-bit equal results.  The input data are not multiples of a power
  of two, so sums round and a changed order of additions shows (checked by hand-made wrong
  jams, which must fail).  The size list of a kernel covers every trip count
  from 0 to past 2u+1 for the largest factor u used on it (0, 1, u-1, u, u+1, 2u+1 and odd
  ones included), for each parameter, the other one rotating.
- brute force in Python: the instances of a small nest enumerated in the order the jammed
  code runs them, derived by hand from the shape of that code (whole strips with the copies
  innermost, the last partial strip in the original order), every pair of instances touching
  one element checked, over small sizes.
- tracing: the kernels of the legality section read and write through macros
  (``R``/``W``/``MARK``) that are plain array references for looptile and the normal build,
  and print every instance and element with -DTRACE; the original and the rewritten
  programs are traced to see which instance runs when.
- the literature, from memory: Allen & Kennedy, "Optimizing Compilers for Modern
  Architectures", the chapter on unroll-and-jam: jamming the loop of a dependence of
  distance (d, -1) by a factor u is legal exactly when u <= d, while interchanging the two
  loops is illegal for any d.
"""
from __future__ import annotations

import os
import re
import subprocess
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import fuzzjam
import pytest
from conftest import RUN_ENV, ProgramFailed, build, headline, run_cli
from pycparser import c_generator, c_parser

pytestmark = pytest.mark.cc

# ---------------------------------------------------------------- the programs

# No system headers: looptile parses the whole preprocessed file on every run, and the
# declarations of <stdio.h> and <stdlib.h> would cost more than the kernels.
PRELUDE = r"""/* looptile tests: kernels of a tidal-basin model and a harbour-camera pipeline. */
typedef __SIZE_TYPE__ size_t;
typedef __UINT64_TYPE__ uint64_t;
int printf(const char *format, ...);
int sscanf(const char *str, const char *format, ...);

#define EXT 64
static double eta[EXT][EXT];   /* surface elevation */
static double flux[EXT][EXT];  /* volume flux */
static double depth[EXT][EXT]; /* bathymetry */
static double frame[EXT][EXT]; /* a camera frame */
static long final_it[4];       /* iterator values after a nest */

#ifdef TRACE
static double *trace_at(const char *what, const char *array, double *p, int r, int c)
{
    printf("%s %s %d %d\n", what, array, r, c);
    return p;
}
#define MARK(r, c) printf("S %d %d\n", (r), (c))
#define MARK3(r, c, d) printf("S %d %d %d\n", (r), (c), (d))
#define W(a, r, c) (*trace_at("W", #a, &(a)[r][c], (r), (c)))
#define R(a, r, c) (*trace_at("R", #a, &(a)[r][c], (r), (c)))
#else
#define MARK(r, c) ((void)0)
#define MARK3(r, c, d) ((void)0)
#define W(a, r, c) (a)[r][c]
#define R(a, r, c) (a)[r][c]
#endif
"""

MAIN = r"""
static uint64_t mix(uint64_t h, const void *p, size_t len)
{
    const unsigned char *b = p;
    for (size_t q = 0; q < len; q++) {
        h ^= b[q];
        h *= 1099511628211ULL;
    }
    return h;
}

static void fill(void)
{
    for (int a = 0; a < EXT; a++)
        for (int b = 0; b < EXT; b++) {
            /* not multiples of a power of 2: sums round, so a changed order of additions shows */
            eta[a][b] = ((a * 37 + b * 11) % 61) * 0.1 - 3.0;
            flux[a][b] = ((a * 13 + b * 29) % 53) * 0.07 + 0.5;
            depth[a][b] = ((a * 7 + b * 3) % 17) * 0.3 - 1.0;
            frame[a][b] = ((a + 5 * b) % 23) * 0.37;
        }
    for (int a = 0; a < 4; a++)
        final_it[a] = -1000 - a;
}

static uint64_t mix_all(uint64_t h)
{
    h = mix(h, eta, sizeof eta);
    h = mix(h, flux, sizeof flux);
    h = mix(h, depth, sizeof depth);
    h = mix(h, frame, sizeof frame);
    return mix(h, final_it, sizeof final_it);
}

int main(int argc, char **argv)
{
    for (int q = 1; q < argc; q++) {
        int n, m;
        if (sscanf(argv[q], "%d,%d", &n, &m) != 2)
            return 2;
        fill();
        uint64_t h = 14695981039346656037ULL;
        RUN
        (void)h;
#ifndef TRACE
        printf("%d,%d %016llx\n", n, m, (unsigned long long)h);
#endif
    }
    return 0;
}
"""


@dataclass(frozen=True)
class Kernel:
    func: str
    text: str  # C text of the function (and what it needs above it)
    max_n: int = 13  # the size list covers n and m from 0 to these
    max_m: int = 13
    crlf_tabs: bool = False  # write the whole file with CRLF line ends and tab indentation

    def program(self) -> bytes:
        return Program((self,)).program()

    def sizes(self) -> list[str]:
        return Program((self,)).sizes()

    def line_of(self, needle: str) -> int:
        return Program((self,)).line_of(needle)


@dataclass(frozen=True)
class Program:
    """A file with several kernels; main calls each one for every size and hashes every
    array after each call (a wrong result of one kernel cannot be hidden by the next)."""

    kernels: tuple[Kernel, ...]

    @property
    def max_n(self) -> int:
        return max(k.max_n for k in self.kernels)

    @property
    def max_m(self) -> int:
        return max(k.max_m for k in self.kernels)

    def program(self) -> bytes:
        calls = "\n        ".join(f"{k.func}(n, m);\n        h = mix_all(h);" for k in self.kernels)
        text = PRELUDE + "".join("\n" + k.text.strip("\n") + "\n" for k in self.kernels) + MAIN.replace("RUN", calls)
        if any(k.crlf_tabs for k in self.kernels):
            lines = []
            for ln in text.split("\n"):
                body = ln.lstrip(" ")
                lines.append("\t" * ((len(ln) - len(body)) // 4) + " " * ((len(ln) - len(body)) % 4) + body)
            text = "\r\n".join(lines)
        return text.encode()

    def sizes(self) -> list[str]:
        """(n, m) pairs: every n in 0..max_n and every m in 0..max_m, the other one rotating."""
        pairs = [(n, (3 * n + 2) % (self.max_m + 1)) for n in range(self.max_n + 1)]
        pairs += [((5 * m + 1) % (self.max_n + 1), m) for m in range(self.max_m + 1)]
        pairs += [(self.max_n, self.max_m), (0, self.max_m), (self.max_n, 0)]
        return [f"{n},{m}" for n, m in dict.fromkeys(pairs)]

    def line_of(self, needle: str) -> int:
        """The line of the file on which ``needle`` (unique) starts."""
        text = self.program().decode()
        assert text.count(needle) == 1, needle
        return text[: text.index(needle)].count("\n") + 1


KERNELS = {
    # matrix products of the basin's coupling terms
    "couple": Kernel("couple", """
static void couple(int n, int m)
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            for (int k = 0; k < n; k++)
                flux[i][j] += eta[i][k] * depth[k][j];
}
"""),
    # a staggered grid: every 2nd row, every 3rd column; row i + 2 depends on row i
    "stagger": Kernel("stagger", """
static void stagger(int n, int m)
{
    for (int i = 1; i < n; i += 2)
        for (int j = 0; j < m; j += 3)
            eta[i + 2][j] = eta[i][j] * 0.5 + depth[j][i];
}
""", max_n=21, max_m=27),
    # the ebb sweeps from the open boundary: down-counting loops, row i reads row i + 1
    "ebb": Kernel("ebb", """
static void ebb(int n, int m)
{
    for (int i = n - 1; i >= 0; i--)
        for (int j = m; j > 0; j -= 2)
            flux[i][j] = flux[i + 1][j] * 0.5 + eta[i][j - 1];
}
""", max_n=13, max_m=21),
    # inclusive bounds both ways
    "gauge": Kernel("gauge", """
static void gauge(int n, int m)
{
    for (int i = 1; i <= n; i++)
        for (int j = m; j >= 1; j--)
            depth[i][j] = depth[i - 1][j] * 0.5 + eta[j][i];
}
"""),
    # camera rows and columns as unsigned and size_t; the column sweep counts down
    "pixels": Kernel("pixels", """
static void pixels(int n, int m)
{
    unsigned rows = (unsigned)n;
    size_t cols = (size_t)m;
    for (unsigned y = 0; y < rows; y++)
        for (size_t x = cols; x > 0; x--)
            frame[y][x] = frame[y][x - 1] * 0.75 + eta[y][x];
}
"""),
    # long iterators, a step of 3 counting down
    "longsweep": Kernel("longsweep", """
static void longsweep(int n, int m)
{
    long ln = n, lm = m;
    for (long i = ln - 1; i >= 0; i -= 3)
        for (long j = 2; j <= lm; j++)
            eta[i][j] += flux[j][i] * 0.5;
}
""", max_n=30, max_m=13),
    # the shoal's upper triangle: j starts at the outer (not unrolled) i
    "shoal": Kernel("shoal", """
static void shoal(int n, int m)
{
    for (int i = 0; i < n; i++)
        for (int j = i; j < n; j++)
            for (int k = 0; k < m; k++)
                eta[i][j] += flux[i][k] * depth[k][j];
}
"""),
    # a sand spit: the columns of row i run to i (unroll copies the triangle's rows as they are)
    "spit": Kernel("spit", """
static void spit(int n, int m)
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j <= i; j++)
            eta[i][j] = eta[i][j] * 0.5 + flux[j][i] + (double)m;
}
"""),
    # three time steps around the nest; the nest's rows start at the time step
    "timesteps": Kernel("timesteps", """
static void timesteps(int n, int m)
{
    for (int t = 0; t < 3; t++) {
        eta[0][t] += 1.0;
        for (int i = t; i < n; i++)
            for (int j = 0; j < m; j++)
                flux[i][j] = flux[i][j] * 0.5 + eta[i + t][j];
    }
}
"""),
    # iterators declared before the nest, their final values used after it
    "settle": Kernel("settle", """
static void settle(int n, int m)
{
    int i, j = -5;
    for (i = 2; i < n; i += 2)
        for (j = 0; j <= m; j++)
            eta[i][j] = eta[i - 2][j] * 0.5 + flux[i][j];
    final_it[0] = i;
    final_it[1] = j;
}
""", max_n=21, max_m=13),
    # a mooring with exactly one row, and a gauge row with no columns at all
    "fixed_trips": Kernel("fixed_trips", """
static void fixed_trips(int n, int m)
{
    for (int i = 3; i < 4; i++)
        for (int j = 0; j < m; j++)
            eta[i][j] += flux[j][i];
    for (int i = 0; i < n; i++)
        for (int j = 7; j < 7; j++)
            eta[i][j] = 2.0;
}
"""),
    # a block-local temporary
    "gain": Kernel("gain", """
static void gain(int n, int m)
{
    for (int y = 0; y < n; y++)
        for (int x = 0; x < m; x++) {
            double t = frame[y][x] * 0.5;
            frame[y][x] = t * t + eta[x][y];
        }
}
"""),
    # two temporaries, one of them already named like a fresh name would be
    "gain2": Kernel("gain2", """
static void gain2(int n, int m)
{
    for (int y = 0; y < n; y++)
        for (int x = 0; x < m; x++) {
            double t = frame[y][x] * 0.5;
            double t_1 = t + eta[x][y];
            frame[y][x] = t * t_1;
        }
}
"""),
    # comments and an object-like macro in the body
    "lens": Kernel("lens", """
#define LENS_GAIN 0.75
static void lens(int n, int m)
{
    for (int y = 0; y < n; y++)
        for (int x = 0; x < m; x++) {
            /* harbour camera: the lens gain */
            frame[y][x] = frame[y][x] * LENS_GAIN; // per pixel
        }
}
"""),
    # fields named like the iterator (inside sizeof, the only place the model allows a member)
    "fields": Kernel("fields", """
struct mooring { int i; double w; };
static struct mooring moorings[EXT];
static struct mooring *first_mooring = moorings;
static void fields(int n, int m)
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            eta[i][j] = flux[i][j] * (double)sizeof(moorings[i].i) + (double)sizeof(first_mooring->i);
}
"""),
    # a function-like macro taking the iterators as arguments
    "cell": Kernel("cell", """
#define CELL(a, r, c) ((a)[(r)][(c)])
static void cell(int n, int m)
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            CELL(eta, i, j + 1) = CELL(eta, i, j) * 0.5 + CELL(depth, j, i);
}
"""),
    # an imperfect nest: the body of j holds a loop over k and statements around it
    "imperfect": Kernel("imperfect", """
static void imperfect(int n, int m)
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++) {
            double acc = 0.0;
            for (int k = 0; k < n; k++)
                acc += eta[i][k] * depth[k][j];
            flux[i][j] = acc;
        }
}
"""),
    # the lens kernel again, written with CRLF line ends and tabs
    "lens_crlf": Kernel("lens_crlf", """
#define LENS_GAIN 0.75
static void lens_crlf(int n, int m)
{
    for (int y = 0; y < n; y++)
        for (int x = 0; x < m; x++) {
            /* harbour camera: the lens gain */
            double t = frame[y][x] * LENS_GAIN;
            frame[y][x] = t + eta[x][y];
        }
}
""", crlf_tabs=True),
    # the legality examples: dependences of distance (4, -1) and (2, -1)
    "drift4": Kernel("drift4", """
static void drift4(int n, int m)
{
    for (int i = 4; i < n; i++)
        for (int j = 0; j < m; j++) {
            MARK(i, j);
            W(eta, i, j) = R(eta, i - 4, j + 1) * 0.5 + 1.0;
        }
}
""", max_n=16, max_m=9),
    "drift2": Kernel("drift2", """
static void drift2(int n, int m)
{
    for (int i = 2; i < n; i++)
        for (int j = 0; j < m; j++) {
            MARK(i, j);
            W(eta, i, j) = R(eta, i - 2, j + 1) * 0.5 + 1.0;
        }
}
""", max_n=14, max_m=9),
}


# Kernels share files (one build of the original per file); each rewrite changes one kernel.
FILES = {
    "basin": Program(tuple(KERNELS[k] for k in ("couple", "stagger", "ebb", "gauge", "longsweep", "shoal",
                                                "spit", "timesteps", "settle", "fixed_trips"))),
    "camera": Program(tuple(KERNELS[k] for k in ("pixels", "gain", "gain2", "lens", "fields", "cell", "imperfect"))),
    "camera_crlf": Program((KERNELS["lens_crlf"],)),
    "drift": Program((KERNELS["drift4"], KERNELS["drift2"])),
}
FILE_OF = {k.func: name for name, prog in FILES.items() for k in prog.kernels}


@dataclass(frozen=True)
class Rewrite:
    kernel: str
    args: tuple[str, ...]  # the command and its options, without FILE and -o

    @property
    def id(self) -> str:
        return self.kernel + "-" + "-".join(a.lstrip("-").replace("=", "").replace(",", "")
                                            for a in self.args if a not in ("--nest", "--factors", "--factor",
                                                                            "--sizes", "--jam"))


def jam(kernel: str, factors: str, nest: str | None = None) -> Rewrite:
    return Rewrite(kernel, ("jam", "--nest", nest or KERNELS[kernel].func, "--factors", factors))


def unroll(kernel: str, factor: int, nest: str | None = None) -> Rewrite:
    return Rewrite(kernel, ("unroll", "--nest", nest or KERNELS[kernel].func, "--factor", str(factor)))


TIME_NEST = f"L{FILES['basin'].line_of('for (int i = t;')}"
STAGGER_INNER = f"L{FILES['basin'].line_of('for (int j = 0; j < m; j += 3)')}"

REWRITES = [
    jam("couple", "i=4,j=2"), jam("couple", "i=2,j=2,k=2"), unroll("couple", 3),
    jam("stagger", "i=2,j=3"), jam("stagger", "i=4"), unroll("stagger", 2, STAGGER_INNER),
    jam("ebb", "i=3,j=4"),
    jam("gauge", "i=3,j=2"), jam("gauge", "j=4"),
    jam("pixels", "y=4,x=3"),
    jam("longsweep", "i=4,j=2"),
    jam("shoal", "j=2,k=3"), unroll("spit", 3),
    jam("timesteps", "i=2,j=2", TIME_NEST), unroll("timesteps", 3, TIME_NEST),
    jam("settle", "i=3,j=2"), unroll("settle", 4),
    jam("fixed_trips", "i=4,j=2", "fixed_trips:1"), jam("fixed_trips", "i=2,j=3", "fixed_trips:2"),
    jam("gain", "y=2,x=2"), jam("gain2", "y=2,x=2"), jam("lens", "y=2,x=2"), jam("fields", "i=2,j=2"),
    jam("cell", "i=2,j=2"), jam("imperfect", "i=2,j=2"), unroll("imperfect", 3),
    jam("lens_crlf", "y=2,x=2"),
    jam("drift4", "i=4"), jam("drift2", "i=2"),
    # the accumulator kept in locals; and tile + jam (the register tile inside cache tiles)
    Rewrite("couple", ("jam", "--nest", "couple", "--factors", "i=2,j=2", "--scalarize")),
    Rewrite("couple", ("tile", "--nest", "couple", "--sizes", "4,6", "--jam", "i=2,j=3", "--scalarize")),
]
REWRITE_IDS = [r.id for r in REWRITES]


# ---------------------------------------------------------------- running everything once

@dataclass
class Outcome:
    exit_code: int
    stderr: str
    original: bytes
    new: bytes | None
    runs: tuple[str, str] | None = None  # (original output, rewritten output)
    failure: str | None = None


def _build_and_run(src: Path, sizes: list[str], extra: tuple[str, ...] = ()) -> str:
    exe = src.with_suffix(".exe")
    build(src, exe, extra)
    return _run_sizes(exe, sizes)


def _run_sizes(exe: Path, sizes: list[str]) -> str:
    """stdout of ``exe`` run once with every "n,m" of ``sizes``; a sanitizer report fails."""
    proc = subprocess.run([str(exe), *sizes], capture_output=True, text=True, timeout=120,
                          env={**os.environ, **RUN_ENV})
    if proc.returncode != 0 or "runtime error:" in proc.stderr or "ERROR: AddressSanitizer" in proc.stderr:
        raise ProgramFailed(f"{exe} failed with exit {proc.returncode}:\n{proc.stderr[-3000:]}")
    return proc.stdout


@pytest.fixture(scope="module")
def outcomes(tmp_path_factory) -> dict[str, Outcome]:
    """Every rewrite of REWRITES: looptile in this thread (CliRunner is not thread safe), the
    builds and runs in a pool of two."""
    root = tmp_path_factory.mktemp("jam")
    originals = {}
    results: dict[str, Outcome] = {}
    with ThreadPoolExecutor(2) as pool:
        for name in sorted({FILE_OF[r.kernel] for r in REWRITES}):
            prog = FILES[name]
            src = root / f"{name}.c"
            src.write_bytes(prog.program())
            originals[name] = pool.submit(_build_and_run, src, prog.sizes())
        jobs = {}
        for r in REWRITES:
            k = FILES[FILE_OF[r.kernel]]
            src, out = root / f"{FILE_OF[r.kernel]}.c", root / f"{r.id}.out.c"
            res = run_cli(r.args[0], src, *r.args[1:], "-o", out)
            new = out.read_bytes() if out.exists() else None
            results[r.id] = Outcome(res.exit_code, res.stderr, k.program(), new)
            if res.exit_code == 0 and new is not None:
                jobs[r.id] = pool.submit(_build_and_run, out, k.sizes())
        for r in REWRITES:
            o = results[r.id]
            if r.id not in jobs:
                continue
            try:
                o.runs = (originals[FILE_OF[r.kernel]].result(), jobs[r.id].result())
            except ProgramFailed as exc:
                o.failure = str(exc)
    return results


def _region(o: Outcome) -> str:
    """The rewritten text between the first and the last byte that changed."""
    a, b = o.original.decode(), o.new.decode()
    start = next(k for k in range(min(len(a), len(b))) if a[k] != b[k])
    tail = 0
    while tail < min(len(a), len(b)) - start and a[-1 - tail] == b[-1 - tail]:
        tail += 1
    return b[start: len(b) - tail]


@pytest.mark.parametrize("rw", REWRITES, ids=REWRITE_IDS)
def test_rewrite_runs_like_the_original(outcomes, rw):
    o = outcomes[rw.id]
    assert o.exit_code == 0, f"looptile {' '.join(rw.args)}: exit {o.exit_code}\n{o.stderr}"
    assert o.new is not None and o.new != o.original
    assert o.failure is None, o.failure
    a, b = o.runs
    # outside check: the system C compiler (sanitized builds of both files), outputs compared bit for bit
    assert a == b
    assert len(a.splitlines()) == len(FILES[FILE_OF[rw.kernel]].sizes())


WRONG_JAMS = {
    # the whole-strip test off by one: the last strip runs past the bound
    "past-the-bound": ("i=4,j=2", lambda s: s.replace("n - i >= 4", "n - i >= 3", 1)),
    # the remainder of i loses its last row
    "short-remainder": ("i=4,j=2", lambda s: s.replace("for (; i < n; i++)", "for (; i < n - 1; i++)", 1)),
    # the two k copies of one (i, j) swapped: the additions into flux[i][j] in another order
    "swapped-copies": ("i=2,j=2,k=2", lambda s: re.sub(
        r"^( *flux\[i\]\[j\] \+= eta\[i\]\[k\] \* depth\[k\]\[j\];\n)( *flux\[i\]\[j\] \+= .*k \+ 1.*\n)",
        r"\2\1", s, count=1, flags=re.M)),
}


@pytest.mark.parametrize("variant", sorted(WRONG_JAMS))
def test_differential_check_catches_a_wrong_jam(outcomes, tmp_path, variant):
    """Hand-made wrong versions of looptile's own output must fail the comparison over the
    size lists used here (so the sizes and the input data have teeth)."""
    factors, mutate = WRONG_JAMS[variant]
    o = outcomes[jam("couple", factors).id]
    text = o.new.decode()
    wrong = mutate(text)
    assert wrong != text, "the mutation did not apply"
    src = tmp_path / "wrong.c"
    src.write_text(wrong)
    prog = FILES[FILE_OF["couple"]]
    try:
        got = _build_and_run(src, prog.sizes())
    except ProgramFailed:
        return  # a sanitizer report is caught too
    assert got != o.runs[0]


def test_size_lists_cover_the_trip_counts_around_the_factors():
    # n and m each take every value from 0 to 13 at least, so trip counts 0, 1, u-1, u, u+1 and
    # 2u+1 occur for every factor up to 4 on loops of step 1 starting at 0 or 1; the step-2 and
    # step-3 kernels have longer lists
    for k in FILES.values():
        pairs = [tuple(map(int, s.split(","))) for s in k.sizes()]
        assert {n for n, _ in pairs} == set(range(k.max_n + 1))
        assert {m for _, m in pairs} == set(range(k.max_m + 1))
    assert (KERNELS["stagger"].max_n - 1) // 2 >= 2 * 4 + 1  # rows 1, 3, ...: 9 rows for i by 4
    assert KERNELS["longsweep"].max_n // 3 >= 2 * 4 + 1


# ---------------------------------------------------------------- what the rewrites look like

def loose_match(expected: str, got: str) -> bool:
    """``got`` is the statement ``expected`` up to redundant parentheses (``a[i + 1]`` or
    ``a[(i + 1)]``, ``f(i + 1)`` or ``f((i + 1))``): both parsed by pycparser and printed
    back by its generator, which parenthesises by precedence only."""
    def norm(stmt: str) -> str:
        ast = c_parser.CParser().parse("void f(void) { " + stmt + " }")
        return c_generator.CGenerator().visit(ast)
    return norm(expected) == norm(got)


def innermost_blocks(region: str) -> list[list[str]]:
    """The lines (stripped) of every block without a block inside, in textual order."""
    out: list[list[str]] = []
    current: list[str] | None = None
    for ln in region.replace("\r\n", "\n").split("\n"):
        s = ln.strip()
        if s.endswith("{"):
            current = []
        elif s == "}":
            if current:
                out.append(current)
            current = None
        elif current is not None and s:
            current.append(s)
    return out


def _copies_in_first_main_body(region: str) -> list[str]:
    """The statements of the body of the first emitted loop whose body is a block of copies."""
    blocks = innermost_blocks(region)
    assert blocks, region
    return blocks[0]


def test_matrix_product_by_4_and_2_has_8_copies(outcomes):
    o = outcomes[jam("couple", "i=4,j=2").id]
    assert o.exit_code == 0, o.stderr
    region = _region(o)
    # the main loops step over whole strips and never past the bound; the remainders continue
    assert "for (i = 0; i < n && n - i >= 4; i += 4)" in region
    assert "for (j = 0; j < m && m - j >= 2; j += 2)" in region
    assert "for (; i < n; i++)" in region and "for (; j < m; j++)" in region
    copies = _copies_in_first_main_body(region)
    want = []
    for a in range(4):
        for b in range(2):
            ii = f"i + {a}" if a else "i"
            jj = f"j + {b}" if b else "j"
            want.append(f"flux[{ii}][{jj}] += eta[{ii}][k] * depth[k][{jj}];")
    assert len(copies) == len(want)
    # outermost loop's offset first, as the jammed schedule says
    assert all(loose_match(w, c) for w, c in zip(want, copies)), copies


def test_innermost_loop_named_too_is_unrolled_in_place(outcomes):
    o = outcomes[jam("couple", "i=2,j=2,k=2").id]
    assert o.exit_code == 0, o.stderr
    region = _region(o)
    assert "for (k = 0; k < n && n - k >= 2; k += 2)" in region
    copies = _copies_in_first_main_body(region)
    assert len(copies) == 8
    # for one (i, j) the two k copies stay next to each other: the accumulation order of flux is kept
    assert copies[0] == "flux[i][j] += eta[i][k] * depth[k][j];"
    assert loose_match("flux[i][j] += eta[i][k + 1] * depth[k + 1][j];", copies[1]), copies


def test_iterator_declared_before_the_nest_is_not_redeclared(outcomes):
    o = outcomes[jam("settle", "i=3,j=2").id]
    assert o.exit_code == 0, o.stderr
    region = _region(o)
    assert not re.search(r"\bint [ij];", region), region
    assert "for (i = 2; i < n && n - i >= 5; i += 6)" in region
    # the final values are hashed by the program: the differential test compares them


def test_block_local_temporary_gets_a_name_per_copy(outcomes):
    o = outcomes[jam("gain", "y=2,x=2").id]
    assert o.exit_code == 0, o.stderr
    copies = _copies_in_first_main_body(_region(o))
    assert len(copies) == 8
    decls = [re.fullmatch(r"double (\w+) = frame\[(.*)\]\[(.*)\] \* 0\.5;", c) for c in copies[0::2]]
    assert all(decls), copies
    names = [d.group(1) for d in decls]
    # copy 0 keeps the name; the others get new ones (README: t_1, t_2, ... unless a name is taken:
    # the camera file also declares a t_1), none of them a name the file already uses
    assert names[0] == "t" and len(set(names)) == 4
    taken = set(re.findall(r"[A-Za-z_]\w*", o.original.decode()))
    assert all(re.fullmatch(r"t_\d+(_\d+)?", x) and x not in taken for x in names[1:]), names
    # each copy uses its own temporary, at its own element
    for (y, x), d, use in zip([("y", "x"), ("y", "x + 1"), ("y + 1", "x"), ("y + 1", "x + 1")], names, copies[1::2]):
        assert loose_match(f"frame[{y}][{x}] = {d} * {d} + eta[{x}][{y}];", use), (d, use)


def test_fresh_names_avoid_names_the_file_already_uses(outcomes):
    o = outcomes[jam("gain2", "y=2,x=2").id]
    assert o.exit_code == 0, o.stderr
    region = _region(o)
    for body in innermost_blocks(region):
        names = [re.match(r"double (\w+) = ", s).group(1) for s in body if s.startswith("double ")]
        assert len(names) == len(set(names)), names  # no name declared twice in one block
        # copy 0 keeps the original names; the others use none of them
        assert names[:2] == ["t", "t_1"]
        assert not {"t", "t_1"} & set(names[2:]), names
    # the compiler would refuse a redeclaration; the differential test builds and runs it


def test_comments_and_macros_are_kept_in_every_copy(outcomes):
    o = outcomes[jam("lens", "y=2,x=2").id]
    assert o.exit_code == 0, o.stderr
    region = _region(o)
    # copies: 4 (whole strips of both), 2 + 2 (one of them partial), 1 (both partial)
    assert region.count("/* harbour camera: the lens gain */") == 9
    assert region.count("* LENS_GAIN; // per pixel") == 9
    assert "0.75" not in region  # the macro is not expanded


def test_fields_named_like_the_iterator_are_not_substituted(outcomes):
    o = outcomes[jam("fields", "i=2,j=2").id]
    assert o.exit_code == 0, o.stderr
    region = _region(o)
    assert "sizeof(moorings[i + 1].i)" in region
    assert region.count("sizeof(first_mooring->i)") == 9
    assert not re.search(r"(\.|->)\s*\(?i \+", region), region


def test_function_like_macro_takes_the_shifted_iterator(outcomes):
    o = outcomes[jam("cell", "i=2,j=2").id]
    assert o.exit_code == 0, o.stderr
    copies = _copies_in_first_main_body(_region(o))
    # the macro's arguments are the shifted iterators, the macro is not expanded
    assert loose_match("CELL(eta, i + 1, (j + 1) + 1) = CELL(eta, i + 1, j + 1) * 0.5 + CELL(depth, j + 1, i + 1);",
                       copies[3]), copies[3]


def test_imperfect_body_is_copied_with_its_inner_loop(outcomes):
    o = outcomes[jam("imperfect", "i=2,j=2").id]
    assert o.exit_code == 0, o.stderr
    region = _region(o)
    assert region.count("for (int k = 0; k < n; k++)") == 4 + 2 + 2 + 1
    copies = _copies_in_first_main_body(region)
    assert loose_match("acc_3 += eta[i + 1][k] * depth[k][j + 1];", copies[-2]), copies


def test_unroll_copies_the_whole_body_with_inner_loops(outcomes):
    o = outcomes[unroll("couple", 3).id]
    assert o.exit_code == 0, o.stderr
    region = _region(o)
    # three copies of the j loop (and its k loop) in the main loop, one in the remainder
    assert region.count("for (int j = 0; j < m; j++)") == 4
    assert region.count("for (int k = 0; k < n; k++)") == 4
    assert "for (i = 0; i < n && n - i >= 3; i += 3)" in region
    assert region.index("flux[i][j] +=") < region.index("flux[i + 1][j] +=") < region.index("flux[i + 2][j] +=")


def test_crlf_and_tabs_are_kept(outcomes):
    o = outcomes[jam("lens_crlf", "y=2,x=2").id]
    assert o.exit_code == 0, o.stderr
    assert o.new.count(b"\n") == o.new.count(b"\r\n")
    region = _region(o)
    lines = [ln for ln in region.split("\r\n") if ln.strip()]
    assert len(lines) > 20
    assert all(not ln.startswith(" ") for ln in lines), [ln for ln in lines if ln.startswith(" ")]
    assert re.search(r"\r\n\t\t\t\tdouble t_3 = frame\[\(?y \+ 1\)?\]\[\(?x \+ 1\)?\] \* LENS_GAIN;\r\n", region)


# ---------------------------------------------------------------- near the limits of the iterator types

EXTREME = r"""
typedef __SIZE_TYPE__ size_t;
typedef __UINT64_TYPE__ uint64_t;
int printf(const char *format, ...);
static unsigned char seen[64][64];

/* tide-gauge counters near the ends of their types: a few iterations just below INT_MAX,
 * above INT_MIN, below SIZE_MAX, and long ones at both ends with steps of 2 and 3 */
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

static void mark_long(long lo, long hi, long lo2, long hi2)
{
    for (long i = hi; i > lo; i -= 2)
        for (long j = lo2; j <= hi2; j += 3)
            seen[i - lo][j - lo2] += (unsigned char)(1 + ((i ^ j) & 3));
}

int main(void)
{
    for (int w = 0; w <= 9; w++) {
        mark_top(__INT_MAX__ - w, __INT_MAX__, __INT_MAX__ - w - 1, __INT_MAX__ - 1);
        mark_bottom(-__INT_MAX__ + w, -__INT_MAX__, -__INT_MAX__ + w, -__INT_MAX__ - 1);
        mark_unsigned(__SIZE_MAX__ - w, __SIZE_MAX__, __SIZE_MAX__ - 2 * w, __SIZE_MAX__);
        mark_top(-w, w, -__INT_MAX__ - 1, -__INT_MAX__ - 1 + w);
        mark_long(-__LONG_MAX__ - 1, -__LONG_MAX__ - 1 + 2 * w, __LONG_MAX__ - 3 * w - 3, __LONG_MAX__ - 3);
        mark_long(__LONG_MAX__ - 2 * w - 1, __LONG_MAX__, -__LONG_MAX__ - 1, -__LONG_MAX__ - 1 + 3 * w);
        uint64_t h = 14695981039346656037ULL;
        for (int a = 0; a < 64; a++)
            for (int b = 0; b < 64; b++) {
                h ^= seen[a][b];
                h *= 1099511628211ULL;
            }
        printf("%d %016llx\n", w, (unsigned long long)h);
    }
    return 0;
}
"""


def test_no_new_overflow_near_the_type_limits(tmp_path):
    """The main loops test the distance to the bound (in an unsigned type where it could
    overflow) and never step past the last iteration; UBSan reports any signed overflow."""
    src = tmp_path / "extreme.c"
    src.write_text(EXTREME)
    requests = [("mark_top", "i=4,j=3"), ("mark_bottom", "i=3,j=4"), ("mark_unsigned", "i=4,j=2"),
                ("mark_long", "i=3,j=4")]
    with ThreadPoolExecutor(2) as pool:
        original = pool.submit(_build_and_run, src, [])
        jobs = []
        for func, factors in requests:
            out = tmp_path / f"{func}.c"
            r = run_cli("jam", src, "--nest", func, "--factors", factors, "-o", out)
            assert r.exit_code == 0, (func, r.stderr)
            jobs.append((func, pool.submit(_build_and_run, out, [])))
        want = original.result()
        assert len(want.splitlines()) == 10
        for func, job in jobs:
            # outside check: the system C compiler with UBSan, original vs rewritten, bit for bit
            assert job.result() == want, func


# ---------------------------------------------------------------- refusals of the body

REFUSED_BODIES = {
    "shadow": ("""
static void shadow(int n, int m)
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++) {
            int i = j + 1;
            eta[i][j] = 1.0;
        }
}
""", "i=2", ("int i = j + 1;", "eta[i][j] = 1.0;"),
        r"the local 'i' declared in the body shadows the unrolled iterator 'i'|"
        r"'i' is a variable declared inside the nest", ("i = j + 1;", "i][j] = 1.0;")),
    "macro_uses_iterator": ("""
#define AT(c) eta[i][c]
static void macro_uses_iterator(int n, int m)
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            AT(j) = flux[i][j] * 0.5;
}
""", "i=2,j=2", ("AT(j) = flux",), r"the macro 'AT' uses 'i' in its definition", ("AT(j)",)),
    "triangle_under_unrolled": ("""
static void triangle_under_unrolled(int n, int m)
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j <= i; j++)
            eta[i][j] = flux[j][i] + (double)m;
}
""", "i=2", ("for (int j = 0; j <= i; j++)",), r"the bounds of loop 'j' depend on 'i', which is unrolled",
        ("for (int j",)),
}


@pytest.mark.parametrize("name", sorted(REFUSED_BODIES))
def test_body_that_cannot_be_copied_is_refused(tmp_path, name):
    text, factors, needles, message, at = REFUSED_BODIES[name]
    k = Kernel(name, text)
    src = tmp_path / f"{name}.c"
    src.write_bytes(k.program())
    out = tmp_path / "out.c"
    r = run_cli("jam", src, "--nest", name, "--factors", factors, "-o", out)
    assert r.exit_code == 1, r.stderr
    assert not out.exists()
    h = headline(r.stderr)
    assert h["kind"] == "refused" and h["path"] == str(src)
    assert re.search(message, h["msg"]), h["msg"]
    # the position is the construct's: the local (its declaration or its use), the macro's name,
    # the inner loop
    line, col = int(h["line"]), int(h["col"])
    assert line in [k.line_of(x) for x in needles], (line, r.stderr)
    text_line = k.program().decode().split("\n")[line - 1]
    assert text_line[col - 1:].startswith(at), (text_line, col)


# ---------------------------------------------------------------- legality: the textbook examples

def drift_order(lo: int, n: int, m: int, u: int):
    """Instances (i, j) of ``for (i = lo; i < n; i++) for (j = 0; j < m; j++)`` jammed by u,
    in the order the emitted code runs them (derived by hand from its shape: whole strips
    with the copies innermost, then the last partial strip in the original order)."""
    i = lo
    while i < n and n - i >= u:
        for j in range(m):
            for a in range(u):
                yield (i + a, j)
        i += u
    while i < n:
        for j in range(m):
            yield (i, j)
        i += 1


def interchanged_order(lo: int, n: int, m: int):
    for j in range(m):
        for i in range(lo, n):
            yield (i, j)


def brute_force_legal(order_of, d: int, sizes) -> bool:
    """Brute force: every pair of instances of ``eta[i][j] = eta[i - d][j + 1]`` that touch
    the same element (one of them writing it) keeps its original order."""
    for n, m in sizes:
        original = list(drift_order(d, n, m, 1))
        new = list(order_of(n, m))
        assert sorted(new) == sorted(original)  # the same instances, each once
        when = {x: t for t, x in enumerate(new)}
        touched: dict[tuple[int, int], list[tuple[tuple[int, int], bool]]] = {}
        for i, j in original:  # in the original order
            touched.setdefault((i, j), []).append(((i, j), True))
            touched.setdefault((i - d, j + 1), []).append(((i, j), False))
        for accesses in touched.values():
            for k, (x, wx) in enumerate(accesses):
                for y, wy in accesses[k + 1:]:
                    if (wx or wy) and x != y and when[x] > when[y]:
                        return False
    return True


SMALL = [(n, m) for n in range(0, 15) for m in range(0, 4)]


@pytest.mark.parametrize("d", [4, 2])
def test_jam_verdicts_match_brute_force_and_the_literature(tmp_path, d):
    k = KERNELS[f"drift{d}"]
    src = tmp_path / "drift.c"
    src.write_bytes(k.program())
    for u in range(2, 7):
        r = run_cli("jam", src, "--nest", k.func, "--factors", f"i={u}", "-o", tmp_path / f"u{u}.c")
        # outside check: brute force over small sizes, in the jammed order derived by hand
        legal = brute_force_legal(lambda n, m, u=u: drift_order(d, n, m, u), d, SMALL)
        # outside check: the literature (Allen & Kennedy, from memory): legal exactly when u <= d
        assert legal == (u <= d), (d, u)
        assert r.exit_code == (0 if legal else 1), (d, u, r.stderr)
        assert (tmp_path / f"u{u}.c").exists() == legal
        if not legal:
            assert headline(r.stderr)["kind"] == "refused"
            assert "flow dependence" in r.stderr.split("\n")[0]
    # interchanging i and j is illegal for both (brute force and the literature agree)
    assert not brute_force_legal(lambda n, m: interchanged_order(d, n, m), d, SMALL)
    r = run_cli("tile", src, "--nest", k.func, "--order", "j,i", "-o", tmp_path / "swapped.c")
    assert r.exit_code == 1, r.stderr
    assert not (tmp_path / "swapped.c").exists()


def test_brute_force_has_teeth():
    # the brute force finds the violation of a wrong order (the jammed order of factor d + 1,
    # and the plain reverse) and accepts the original order
    assert brute_force_legal(lambda n, m: drift_order(4, n, m, 1), 4, SMALL)
    assert not brute_force_legal(lambda n, m: drift_order(4, n, m, 5), 4, SMALL)
    assert not brute_force_legal(lambda n, m: reversed(list(drift_order(4, n, m, 1))), 4, SMALL)


# ---------------------------------------------------------------- legality: the witness, by tracing

WITNESS = re.compile(r"would run S(?P<k>\d+)\(i=(?P<ti>-?\d+), j=(?P<tj>-?\d+)\) before "
                     r"S(?P=k)\(i=(?P<si>-?\d+), j=(?P<sj>-?\d+)\), but S(?P=k)\(i=(?P=si), j=(?P=sj)\) writes "
                     r"eta\[(?P<e0>-?\d+)\]\[(?P<e1>-?\d+)\], which S(?P=k)\(i=(?P=ti), j=(?P=tj)\) reads "
                     r"\(flow dependence\)")


def parse_trace(text: str) -> list[tuple[tuple[int, ...], set, set]]:
    """[(instance, elements read, elements written)] in the order they ran."""
    out: list[tuple[tuple[int, ...], set, set]] = []
    for line in text.splitlines():
        parts = line.split()
        if parts[0] == "S":
            out.append((tuple(map(int, parts[1:])), set(), set()))
        else:
            out[-1][1 if parts[0] == "R" else 2].add((parts[1], int(parts[2]), int(parts[3])))
    return out


def _free_twin(k: Kernel) -> Kernel:
    """The same loops writing another array: no dependence, so looptile jams it by any
    factor; its trace shows the order the refused rewrite would have run."""
    return Kernel(k.func, k.text.replace("W(eta, i, j)", "W(flux, i, j)"), k.max_n, k.max_m)


@pytest.mark.parametrize("d,u", [(4, 5), (2, 4)])
def test_refusal_witness_is_real_by_tracing(tmp_path, d, u):
    k = KERNELS[f"drift{d}"]
    src = tmp_path / "drift.c"
    src.write_bytes(k.program())
    r = run_cli("jam", src, "--nest", k.func, "--factors", f"i={u}", "-o", tmp_path / "never.c")
    assert r.exit_code == 1, r.stderr
    w = WITNESS.search(r.stderr.split("\n")[0])
    assert w, r.stderr
    sink, source = (int(w["ti"]), int(w["tj"])), (int(w["si"]), int(w["sj"]))
    elem = ("eta", int(w["e0"]), int(w["e1"]))
    params = dict(re.findall(r"(\w+) = (-?\d+)", re.search(r"for example with (.*)", r.stderr).group(1)))
    size = f"{params['n']},{params.get('m', 0)}"
    # outside check: tracing the original at the witness sizes
    build(src, tmp_path / "trace.exe", ("-DTRACE",))
    trace = parse_trace(_run_sizes(tmp_path / "trace.exe", [size]))
    pos = {inst: t for t, (inst, _, _) in enumerate(trace)}
    assert source in pos and sink in pos, (source, sink, size)
    assert elem in trace[pos[source]][2], "the source does not write the element"
    assert elem in trace[pos[sink]][1], "the sink does not read the element"
    assert pos[source] < pos[sink], "the original does not run the source first"
    # outside check: tracing the jammed program (of the same loops without the dependence)
    twin = tmp_path / "twin.c"
    twin.write_bytes(_free_twin(k).program())
    r2 = run_cli("jam", twin, "--nest", k.func, "--factors", f"i={u}", "-o", tmp_path / "twin_jam.c")
    assert r2.exit_code == 0, r2.stderr
    build(tmp_path / "twin_jam.c", tmp_path / "twin_jam.exe", ("-DTRACE",))
    jammed = [inst for inst, _, _ in parse_trace(_run_sizes(tmp_path / "twin_jam.exe", [size]))]
    assert jammed.index(sink) < jammed.index(source), "the jammed program runs the source first"
    # and the hand-derived order agrees with the traced one
    n, m = map(int, size.split(","))
    assert jammed == list(drift_order(d, n, m, u))


SHAPES = Kernel("shapes", """
static void shapes(int n, int m)
{
    for (int i = n; i >= 1; i -= 2)
        for (int j = 0; j <= m; j++)
            for (int k = 1; k < 4; k++) {
                MARK3(i, j, k);
                W(flux, i, j) = R(eta, i, j) * 0.5;
            }
}
static void shapes_tri(int n, int m)
{
    for (int i = 0; i < n; i++)
        for (int j = m; j > i; j--)
            for (int k = i; k <= n; k += 2) {
                MARK3(i, j, k);
                W(flux, i, j) = R(eta, i, j) * 0.5;
            }
}
""")
SHAPE_LOOPS = {
    # (it, init, op, bound, step), as the fuzzer's order key reads them
    "shapes": [("i", "n", ">=", "1", -2), ("j", "0", "<=", "m", 1), ("k", "1", "<", "4", 1)],
    "shapes_tri": [("i", "0", "<", "n", 1), ("j", "m", ">", "i", -1), ("k", "i", "<=", "n", 2)],
}


@dataclass(frozen=True)
class _Loop:
    it: str
    init: str
    op: str
    bound: str
    step: int


@pytest.mark.parametrize("func,factors", [("shapes", "i=3,j=2"), ("shapes", "j=2,k=2"),
                                          ("shapes_tri", "j=2,k=3"), ("shapes_tri", "j=3")])
def test_fuzzers_jammed_order_is_the_order_the_code_runs(tmp_path, func, factors):
    # the fuzzer's oracle (tests/fuzzjam.py, derived by hand from the shape of the code) against
    # the traced order of looptile's real output, on down-counting, step-2, inclusive and
    # triangular loops
    src = tmp_path / "shapes.c"
    k = Kernel(func, SHAPES.text)
    src.write_bytes(k.program())
    out = tmp_path / "jam.c"
    r = run_cli("jam", src, "--nest", func, "--factors", factors, "-o", out)
    assert r.exit_code == 0, r.stderr
    build(out, tmp_path / "jam.exe", ("-DTRACE",))
    build(src, tmp_path / "orig.exe", ("-DTRACE",))
    loops = [_Loop(*x) for x in SHAPE_LOOPS[func]]
    fac = {name: int(v) for name, v in (x.split("=") for x in factors.split(","))}
    reordered = False
    for n, m in [(0, 3), (1, 1), (5, 4), (8, 7), (11, 9)]:
        got = [inst for inst, _, _ in parse_trace(_run_sizes(tmp_path / "jam.exe", [f"{n},{m}"]))]
        original = [inst for inst, _, _ in parse_trace(_run_sizes(tmp_path / "orig.exe", [f"{n},{m}"]))]
        assert sorted(got) == sorted(original)
        keyed = sorted(range(len(original)), key=lambda t: fuzzjam.jam_order_key(
            loops, "jam", fac, dict(zip("ijk", original[t])), {"n": n, "m": m}, t))
        # outside check: tracing the rewritten program
        assert [original[t] for t in keyed] == got, (n, m)
        reordered |= got != original
    assert reordered  # the check has teeth: the jammed order is not the original one


# ---------------------------------------------------------------- usage errors and failures write nothing

USAGE = [
    (("jam", "--factors", "i=1"), r"the factor of 'i' must be at least 2, not 1"),
    (("jam", "--factors", "i=0"), r"the factor of 'i' must be at least 2, not 0"),
    (("jam", "--factors", "q=2"), r"--factors names loop 'q', which is not one of the perfectly nested loops"),
    (("jam", "--factors", "i=2,i=3"), r"--factors names loop 'i' twice"),
    (("jam", "--factors", "i=16,j=17"), r"the factors make 272 copies of the body; at most 256 are allowed"),
    (("jam", "--factors", "i=two"), r"--factors item 'i=two' is not LOOP=FACTOR"),
    (("unroll", "--factor", "1"), r"the unroll factor must be at least 2, not 1"),
    (("unroll", "--factor", "x"), r"--factor must be an integer, not 'x'"),
    (("unroll", "--factor", "300"), r"the factors make 300 copies"),
]


@pytest.mark.parametrize("args,message", USAGE, ids=[" ".join(a) for a, _ in USAGE])
def test_usage_errors_exit_2_and_write_nothing(tmp_path, args, message):
    k = KERNELS["couple"]
    src = tmp_path / "couple.c"
    src.write_bytes(k.program())
    out = tmp_path / "out.c"
    r = run_cli(args[0], src, "--nest", "couple", *args[1:], "-o", out)
    assert r.exit_code == 2, r.stderr
    assert not out.exists()
    assert r.stdout_bytes == b""
    first = r.stderr.split("\n")[0]
    # an error about the request names the file (and the nest's position when it is about the nest)
    m = re.match(rf"^{re.escape(str(src))}(:(\d+):(\d+))?: error: (.*)$", first)
    assert m, first
    assert re.search(message, m.group(4)), first
    if m.group(1):
        assert int(m.group(2)) == k.line_of("for (int i = 0; i < n; i++)")
    r = run_cli(args[0], src, "--nest", "couple", *args[1:], "--in-place")
    assert r.exit_code == 2
    assert src.read_bytes() == k.program()


def test_unknown_nest_is_a_usage_error(tmp_path):
    src = tmp_path / "couple.c"
    src.write_bytes(KERNELS["couple"].program())
    r = run_cli("jam", src, "--nest", "no_such_kernel", "--factors", "i=2", "-o", tmp_path / "out.c")
    assert r.exit_code == 2
    assert "no function 'no_such_kernel'" in r.stderr
    assert not (tmp_path / "out.c").exists()


def test_refusal_exits_1_and_writes_nothing(tmp_path):
    k = KERNELS["drift2"]
    src = tmp_path / "drift2.c"
    src.write_bytes(k.program())
    out = tmp_path / "out.c"
    r = run_cli("jam", src, "--nest", "drift2", "--factors", "i=4", "-o", out)
    assert r.exit_code == 1
    assert not out.exists()
    h = headline(r.stderr)
    assert (h["kind"], int(h["line"])) == ("refused", k.line_of("for (int i = 2; i < n; i++)"))
    r = run_cli("jam", src, "--nest", "drift2", "--factors", "i=4", "--in-place")
    assert r.exit_code == 1
    assert src.read_bytes() == k.program()
    r = run_cli("jam", src, "--nest", "drift2", "--factors", "i=4", "--diff")
    assert r.exit_code == 1 and r.stdout_bytes == b""


def test_verify_option_checks_the_jam_before_writing(tmp_path):
    src = tmp_path / "couple.c"
    src.write_bytes(KERNELS["couple"].program())
    out = tmp_path / "out.c"
    r = run_cli("jam", src, "--nest", "couple", "--factors", "i=4,j=2", "--verify", "-o", out)
    assert r.exit_code == 0, r.stderr
    assert out.exists()
    assert re.search(r"^verdict: equal: \d+ parameter sets compared bit for bit", r.stderr, re.M), r.stderr


def test_in_place_and_diff_deliver_the_same_rewrite(tmp_path):
    k = KERNELS["couple"]
    src = tmp_path / "couple.c"
    src.write_bytes(k.program())
    r = run_cli("jam", src, "--nest", "couple", "--factors", "i=2,j=2", "-o", tmp_path / "out.c")
    assert r.exit_code == 0, r.stderr
    d = run_cli("jam", src, "--nest", "couple", "--factors", "i=2,j=2", "--diff")
    assert d.exit_code == 0
    # outside check: the system patch tool applies the diff to a copy and gets the -o output
    copy = tmp_path / "patched" / "couple.c"
    copy.parent.mkdir()
    copy.write_bytes(k.program())
    p = subprocess.run(["patch", "-s", "-p1", "-d", str(copy.parent), "-i", "-"], input=d.stdout_bytes,
                       capture_output=True)
    if p.returncode == 127:
        pytest.skip("no patch tool")
    i = run_cli("jam", src, "--nest", "couple", "--factors", "i=2,j=2", "--in-place")
    assert i.exit_code == 0
    assert src.read_bytes() == (tmp_path / "out.c").read_bytes() != k.program()
    if p.returncode == 0:
        assert copy.read_bytes() == src.read_bytes()


# ---------------------------------------------------------------- bugs found while writing these tests
#
# Each of these gave a wrong program or an internal error with the code of this session's
# start (reported with these reproducers); the fixes landed in the working tree while the
# tests were written, so they are plain regression tests now.

def _differential(tmp_path: Path, k: Kernel, args: tuple[str, ...]) -> tuple[int, str, str | None]:
    """(exit status, stderr, None or why the rewrite is wrong)."""
    src = tmp_path / f"{k.func}.c"
    src.write_bytes(k.program())
    out = tmp_path / "out.c"
    r = run_cli(args[0], src, *args[1:], "-o", out)
    if r.exit_code != 0:
        assert not out.exists()
        return r.exit_code, r.stderr, None
    try:
        # outside check: the system C compiler, both builds sanitized, outputs compared bit for bit
        a = _build_and_run(src, k.sizes())
        b = _build_and_run(out, k.sizes())
    except ProgramFailed as exc:
        return 0, r.stderr, str(exc)
    return 0, r.stderr, None if a == b else "outputs differ"


SHADOW_OUTER = Kernel("shadow_outer", """
static void shadow_outer(int n, int m)
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            for (int k = 0; k < m; k++) {
                int j = 0;
                eta[j][k] = eta[j][k] * 0.5 + i;
            }
}
""")


def test_local_shadowing_an_outer_iterator_is_not_taken_for_it(tmp_path):
    # was: the subscripts eta[j][k] analysed with the iterator j: jammed, a wrong program
    code, err, wrong = _differential(tmp_path, SHADOW_OUTER, ("jam", "--nest", "shadow_outer", "--factors", "i=2"))
    assert code in (0, 1), err
    assert wrong is None, wrong
    if code == 1:
        assert headline(err)["kind"] == "refused"


def test_local_shadowing_an_iterator_in_a_tiled_nest(tmp_path):
    # the same cause in tile: was a wrong interchange
    k = Kernel("shadow_tile", """
static void shadow_tile(int n, int m)
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++) {
            int i = 0;
            eta[i][0] = eta[i][0] * 0.5 + j;
        }
}
""")
    code, err, wrong = _differential(tmp_path, k, ("tile", "--nest", "shadow_tile", "--order", "j,i"))
    assert code in (0, 1), err
    assert wrong is None, wrong


def test_local_shadowing_a_parameter_is_not_taken_for_it(tmp_path):
    # was: eta[i + n] analysed with the parameter n (no dependence): jammed, a wrong program
    k = Kernel("shadow_param", """
static void shadow_param(int n, int m)
{
    for (int i = 0; i < n; i++)
        for (int j = 1; j < m; j++) {
            int n = 1;
            frame[i][j] = eta[i][j];
            eta[i + n][j - 1] = frame[i][j] * 0.5 + 1.0;
        }
}
""")
    code, err, wrong = _differential(tmp_path, k, ("jam", "--nest", "shadow_param", "--factors", "i=2"))
    assert code in (0, 1), err
    assert wrong is None, wrong


def test_name_used_before_its_local_declaration(tmp_path):
    # was: the global t used before the local t was renamed t_1 too: a rewrite that does not compile
    k = Kernel("used_before", """
static double t = 3.0;
static void used_before(int n, int m)
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++) {
            frame[i][j] = t * 2.0;
            double t = eta[i][j];
            flux[i][j] = t;
        }
}
""")
    code, err, wrong = _differential(tmp_path, k, ("jam", "--nest", "used_before", "--factors", "i=2"))
    assert code in (0, 1), err
    assert wrong is None, wrong
    if code == 1:
        h = headline(err)
        assert h["kind"] == "refused" and "'t'" in h["msg"]
        assert int(h["line"]) == k.line_of("frame[i][j] = t * 2.0;")


def test_iterator_argument_of_an_unparenthesised_macro(tmp_path):
    # was: TWICE(i + 1) expands to i + 1 * 2; the copy check caught it: internal error, exit 3
    k = Kernel("twice", """
#define TWICE(x) x * 2
static void twice(int n, int m)
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            eta[i][j] = flux[i][j] * TWICE(i);
}
""")
    code, err, wrong = _differential(tmp_path, k, ("jam", "--nest", "twice", "--factors", "i=2"))
    assert code in (0, 1), err  # copies as TWICE((i + 1)), or a refusal with the reason
    assert wrong is None, wrong


def test_fresh_name_that_is_a_macro(tmp_path):
    # was: the copy of w named w_1, a macro of the file: the rewrite did not parse, exit 3
    k = Kernel("macro_name", """
#define w_1 42 /* a setting of the camera driver, unused here */
static void macro_name(int n, int m)
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++) {
            double w = eta[i][j] * 0.5;
            flux[i][j] = w + 1.0;
        }
}
""")
    code, err, wrong = _differential(tmp_path, k, ("jam", "--nest", "macro_name", "--factors", "i=2"))
    assert code == 0, err  # another name (w_2, w_1_2, ...) is fine
    assert wrong is None, wrong
