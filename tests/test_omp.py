"""OpenMP pragmas on and in a nest, and ``tile --parallel``.

Outside references:
- the system C compiler: every rewrite is compiled with and without ``-fopenmp`` (with OpenMP:
  ``-Wall -Werror=unknown-pragmas``, so a pragma the compiler does not accept fails; without:
  the pragma is ignored and the build runs under ``-fsanitize=address,undefined``), run over a
  sweep of sizes (with ``OMP_NUM_THREADS=2`` for the OpenMP builds) and compared bit for bit
  with the original built the same ways (a hash of every byte of every array);
- the OpenMP API specification 5.2 (from memory) for the rules the placements follow:
  4.4.1 "Canonical Loop Nest Form" (the worksharing tile loop is ``ii += T``; the clamped simd
  point loop has one loop-invariant bound), 5.1.1 "Variables Referenced in a Construct"
  (iterators declared outside the construct are shared unless listed private), 10.4 "simd
  Construct" and 11.5 "Worksharing-Loop Construct" (which clauses stay valid).

Kernels are our own: the tidal-basin model and the harbour cameras.
"""
from __future__ import annotations

import os
import re
from pathlib import Path

import pytest
from conftest import build, cc_command, headline, run_cli

pytestmark = pytest.mark.cc

DRIVER = r"""
#include <stdio.h>
#include <stdlib.h>
#include <stdint.h>
#define W 104

%(kernel)s

static double A[W][W], B[W][W], C[W][W];

int main(int argc, char **argv)
{
    int n = atoi(argv[1]), m = atoi(argv[2]), r, q, k;
    size_t b;
    const unsigned char *bytes[3];
    uint32_t s = 2463534242u;
    uint64_t h = 1469598103934665603ULL;
    for (r = 0; r < W; r++)
        for (q = 0; q < W; q++) {
            s = s * 1664525u + 1013904223u; A[r][q] = (double)(s >> 8) / 16777216.0 - 0.5;
            s = s * 1664525u + 1013904223u; B[r][q] = (double)(s >> 8) / 16777216.0 - 0.5;
            s = s * 1664525u + 1013904223u; C[r][q] = (double)(s >> 8) / 16777216.0 - 0.5;
        }
    %(call)s;
    bytes[0] = (const unsigned char *)A; bytes[1] = (const unsigned char *)B; bytes[2] = (const unsigned char *)C;
    for (k = 0; k < 3; k++)
        for (b = 0; b < sizeof A; b++) { h ^= bytes[k][b]; h *= 1099511628211ULL; }
    printf("%%016llx\n", (unsigned long long)h);
    return 0;
}
"""

# n, m pairs: empty, one, around the tile sizes used (4, 8, 32) and odd primes; at most 100.
SIZES = [(0, 0), (1, 1), (2, 9), (7, 3), (31, 33), (32, 32), (33, 31), (64, 65), (97, 89), (100, 7)]
OMP_FLAGS = ("-O2", "-ffp-contract=off", "-fopenmp", "-Wall", "-Werror=unknown-pragmas")


def program(kernel: str, call: str) -> str:
    return DRIVER % {"kernel": kernel.strip("\n"), "call": call}


def runs(src: Path, work: Path, tag: str, std: str = "gnu11") -> dict[str, list[str]]:
    """Outputs over SIZES of the sanitized build without OpenMP and of the OpenMP build (2 threads)."""
    plain, omp = work / f"{tag}-plain.exe", work / f"{tag}-omp.exe"
    build(src, plain, (), std)
    build(src, omp, ("-fopenmp", "-Wall", "-Werror=unknown-pragmas"), std)
    out = {"plain": [], "omp": []}
    for n, m in SIZES:
        out["plain"].append(run_program_args(plain, n, m, {}))
        out["omp"].append(run_program_args(omp, n, m, {"OMP_NUM_THREADS": "2"}))
    return out


def run_program_args(exe: Path, n: int, m: int, env: dict[str, str]) -> str:
    import subprocess

    from conftest import RUN_ENV
    proc = subprocess.run([str(exe), str(n), str(m)], capture_output=True, text=True, timeout=60,
                          env={**os.environ, **RUN_ENV, **env})
    assert proc.returncode == 0 and "runtime error:" not in proc.stderr, (exe, n, m, proc.stderr[-2000:])
    return proc.stdout


def tile_ok(tmp_path: Path, kernel: str, call: str, func: str, *args: str, std: str = "gnu11") -> str:
    """Tile ``func`` of a program holding ``kernel``; compare the rewrite with the original
    bit for bit (without OpenMP, sanitized; with OpenMP on 2 threads); the rewritten text."""
    src = tmp_path / "kernel.c"
    src.write_text(program(kernel, call))
    out = tmp_path / "tiled.c"
    std_args = ("-std", std) if std != "gnu11" else ()
    r = run_cli("tile", src, "--nest", func, *args, *std_args, "-o", out)
    assert r.exit_code == 0, r.stderr
    before = runs(src, tmp_path, "orig", std)
    after = runs(out, tmp_path, "tiled", std)
    assert before["plain"] == before["omp"], "the original's OpenMP build differs from its plain build"
    assert after == before
    assert len(set(before["plain"])) > 2, "the sizes do not change the result: the check could not fail"
    return out.read_text()


def refused(tmp_path: Path, kernel: str, func: str, *args: str, std: str = "gnu11"):
    """A refusal: exit 1, 'file:line:col: refused: ...', nothing written; the headline match."""
    src = tmp_path / "kernel.c"
    src.write_text(program(kernel, "(void)0"))
    before = src.read_bytes()
    out = tmp_path / "tiled.c"
    std_args = ("-std", std) if std != "gnu11" else ()
    r = run_cli("tile", src, "--nest", func, *args, *std_args, "-o", out)
    assert r.exit_code == 1, r.stderr
    assert not out.exists() and src.read_bytes() == before
    m = headline(r.stderr)
    assert m["kind"] == "refused"
    return m, src


def line_of(text: str, needle: str) -> int:
    return next(k for k, ln in enumerate(text.split("\n"), 1) if needle in ln)


# ---------------------------------------------------------------- kernels (tidal basin, harbour cameras)

SMOOTH = """
/* tidal basin: one smoothing sweep of the surface correction */
void smooth_basin(int n, int m, double b[][W], const double a[][W])
{
    int i, j;
    #pragma omp parallel for schedule(static) private(i, j)
    for (i = 1; i < n - 1; i++)
        #pragma omp simd
        for (j = 1; j < m - 1; j++)
            b[i][j] = 0.25 * (a[i-1][j] + a[i+1][j] + a[i][j-1] + a[i][j+1]);
}
"""
SMOOTH_CALL = "smooth_basin(n, m, B, (const double (*)[W])A)"


def test_parallel_for_moves_to_the_tile_loop_and_simd_stays_on_every_copy(tmp_path):
    text = tile_ok(tmp_path, SMOOTH, SMOOTH_CALL, "smooth_basin", "--sizes", "8,8")
    lines = text.split("\n")
    par = [k for k, ln in enumerate(lines) if "#pragma omp parallel for" in ln]
    # once on the tile loop, once on the original nest kept for sizes that could overflow
    assert len(par) == 2, text
    assert lines[par[0]].strip() == "#pragma omp parallel for schedule(static) private(i, j)"
    assert lines[par[0] + 1].strip().startswith("for (int ii = 1; ii < n - 1; ii += 8)")
    assert lines[par[1]].strip() == "#pragma omp parallel for schedule(static) private(i, j)"
    assert lines[par[1] + 1].strip() == "for (i = 1; i < n - 1; i++)"
    # simd: the whole-tile path, the clamped path (one loop-invariant bound) and the original copy
    simd = [k for k, ln in enumerate(lines) if ln.strip() == "#pragma omp simd"]
    assert [lines[k + 1].strip() for k in simd] == [
        "for (j = jj; j < jj + 8; j++)",
        "for (j = jj; j < (m - 1 - jj > 8 ? jj + 8 : m - 1); j++)",
        "for (j = 1; j < m - 1; j++)",
    ]
    assert "if (n <= 2147483641) {" in text  # the last ii + 8 <= n - 2 + 8 must not overflow
    assert "worksharing on loop ii: it carries no dependence (proven" in text


def test_clamp_style_and_inclusive_bounds(tmp_path):
    kernel = """
/* harbour cameras: brighten a frame, inclusive bounds */
void brighten(int n, int m, double b[][W], const double a[][W])
{
    #pragma omp parallel for
    for (int y = 0; y <= n - 1; y++)
        #pragma omp simd safelen(8) aligned(b: 8)
        for (int x = 0; x <= m - 1; x++)
            b[y][x] = 1.5 * a[y][x] + 0.25;
}
"""
    text = tile_ok(tmp_path, kernel, "brighten(n, m, B, (const double (*)[W])A)", "brighten",
                   "--sizes", "4,8", "--remainder", "clamp")
    assert "#pragma omp parallel for\n" in text
    assert "for (int yy = 0; yy <= n - 1; yy += 4)" in text
    assert "#pragma omp simd safelen(8) aligned(b: 8)" in text
    assert "for (int x = xx; x <= (m - 1 - xx >= 8 ? xx + 7 : m - 1); x++)" in text


def test_c89_declares_iterators_outside_so_they_become_private(tmp_path):
    kernel = """
/* tidal basin: copy the surface, C89 declarations */
void copy_surface(int n, int m, double b[][W], const double a[][W])
{
    int i, j;
    for (i = 0; i < n; i++)
        for (j = 0; j < m; j++)
            b[i][j] = a[i][j] * 0.5;
}
"""
    text = tile_ok(tmp_path, kernel, "copy_surface(n, m, B, (const double (*)[W])A)", "copy_surface",
                   "--sizes", "8,4", "--parallel", std="gnu89")
    # 5.2, 5.1.1: ii is the associated loop's iterator (predetermined private); jj, i and j are
    # declared outside the construct (at the start of the block, C89) and would be shared
    assert "#pragma omp parallel for private(i, j, jj)" in text
    assert re.search(r"\{\n\s+int ii;\n\s+int jj;", text), text


def test_single_strip_mined_loop_parallel_uses_a_plain_tile_loop(tmp_path):
    kernel = """
/* harbour cameras: gain of one row of pixels */
void row_gain(int n, double *y, const double *x)
{
    #pragma omp parallel for
    for (int p = 0; p < n; p++)
        y[p] = 2.0 * x[p] + y[p];
}
"""
    text = tile_ok(tmp_path, kernel, "row_gain(n * m, &B[0][0], &A[0][0])", "row_gain", "--sizes", "16")
    assert "#pragma omp parallel for\n" in text and "for (int pp = 0; pp < n; pp += 16)" in text


def test_parallel_flag_marks_the_outermost_free_loop(tmp_path):
    kernel = """
/* tidal basin: mix tracers, C += A * B over the depth levels */
void mix_tracers(int n, int m, double c[][W], const double a[][W], const double b[][W])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            for (int k = 0; k < m; k++)
                c[i][j] += a[i][k] * b[k][j];
}
"""
    text = tile_ok(tmp_path, kernel, "mix_tracers(n, m, C, (const double (*)[W])A, (const double (*)[W])B)",
                   "mix_tracers", "--sizes", "8,8,8", "--order", "ii,jj,kk,i,k,j", "--parallel")
    lines = text.split("\n")
    k = line_of(text, "#pragma omp parallel for")
    assert lines[k].strip() == "for (int ii = 0; ii < n; ii += 8)"
    assert "made by: looptile tile" in text and "--parallel" in text


def test_parallel_flag_goes_inside_a_loop_that_carries_a_dependence(tmp_path):
    kernel = """
/* tidal basin: the flood wave runs down the rows */
void flood_rows(int n, int m, double a[][W])
{
    for (int i = 1; i < n; i++)
        for (int j = 0; j < m; j++)
            a[i][j] = 0.5 * (a[i-1][j] + a[i][j]);
}
"""
    text = tile_ok(tmp_path, kernel, "flood_rows(n, m, A)", "flood_rows", "--sizes", "8,8", "--parallel")
    lines = text.split("\n")
    k = line_of(text, "#pragma omp parallel for")
    assert lines[k - 2].strip().startswith("for (int ii = 1; ii < n; ii = ")  # sequential, its own form
    assert lines[k].strip() == "for (int jj = 0; jj < m; jj += 8)"


def test_collapse_is_kept_on_the_tile_loops(tmp_path):
    kernel = """
/* harbour cameras: difference of two frames */
void frame_diff(int n, int m, double c[][W], const double a[][W], const double b[][W])
{
    #pragma omp parallel for collapse(2) schedule(dynamic, 2)
    for (int y = 0; y < n; y++)
        for (int x = 0; x < m; x++)
            c[y][x] = a[y][x] - b[y][x];
}
"""
    text = tile_ok(tmp_path, kernel, "frame_diff(n, m, C, (const double (*)[W])A, (const double (*)[W])B)",
                   "frame_diff", "--sizes", "8,4")
    lines = text.split("\n")
    k = line_of(text, "#pragma omp parallel for collapse(2) schedule(dynamic, 2)")
    assert lines[k].strip() == "for (int yy = 0; yy < n; yy += 8)"
    assert lines[k + 1].strip() == "for (int xx = 0; xx < m; xx += 4)"
    assert "if (n <= 2147483640 && m <= 2147483644) {" in text


def test_down_counting_and_triangular_bands(tmp_path):
    kernel = """
/* tidal basin: gauge covariance of the lower triangle, rows from the bottom */
void gauge_cov(int n, int m, double s[][W], const double x[][W])
{
    for (int i = n - 1; i >= 0; i--)
        for (int j = 0; j <= i; j++)
            for (int k = 0; k < m; k++)
                s[i][j] += x[i][k] * x[j][k];
}
"""
    text = tile_ok(tmp_path, kernel, "gauge_cov(n, m, C, (const double (*)[W])A)", "gauge_cov",
                   "--sizes", "8,8", "--parallel")
    k = line_of(text, "#pragma omp parallel for")
    assert text.split("\n")[k].strip() == "for (int ii = n - 1; ii >= 0; ii -= 8)"


def test_loop_hints_in_the_body_stay_in_place(tmp_path):
    kernel = """
/* harbour cameras: two colour channels per pixel, kept in a local pair */
void channels(int n, int m, double b[][W], const double a[][W])
{
    #pragma omp parallel for
    for (int y = 0; y < n; y++)
        for (int x = 0; x < m; x++) {
            double t[2];
            #pragma omp simd
            for (int c = 0; c < 2; c++)
                t[c] = a[y][x] * (c + 1);
            b[y][x] = t[0] - 0.25 * t[1];
        }
}
"""
    text = tile_ok(tmp_path, kernel, "channels(n, m, B, (const double (*)[W])A)", "channels", "--sizes", "8,8")
    assert text.count("#pragma omp simd\n") == 3  # fast path, clamped path, original copy
    assert text.count("#pragma omp parallel for\n") == 2


def test_gcc_hints_between_headers_and_in_the_body_are_kept(tmp_path):
    kernel = """
/* harbour cameras: gain with GCC loop hints */
void gain(int n, int m, double b[][W])
{
    for (int y = 0; y < n; y++)
#pragma GCC ivdep
        for (int x = 0; x < m; x++) {
            b[y][x] = 0.5 * b[y][x];
#pragma GCC unroll 4
            for (int c = 0; c < 4; c++)
                b[y][x] = 2.0 * b[y][x] + c;
        }
}
"""
    text = tile_ok(tmp_path, kernel, "gain(n, m, B)", "gain", "--sizes", "3,5", "--parallel")
    assert text.count("#pragma GCC ivdep") == 3 and text.count("#pragma GCC unroll 4") == 3, text


# ---------------------------------------------------------------- refusals, with the reason

WRONG_PARALLEL = """
/* tidal basin: the flood wave, with a wrong worksharing pragma */
void flood_rows(int n, int m, double a[][W])
{
    #pragma omp parallel for
    for (int i = 1; i < n; i++)
        for (int j = 0; j < m; j++)
            a[i][j] = 0.5 * (a[i-1][j] + a[i][j]);
}
"""


def test_parallel_for_on_a_loop_that_carries_a_dependence_is_refused(tmp_path):
    m, src = refused(tmp_path, WRONG_PARALLEL, "flood_rows", "--sizes", "8,8")
    text = src.read_text()
    assert (int(m["line"]), int(m["col"])) == (line_of(text, "#pragma omp parallel for"), 5)
    assert "carries a dependence" in m["msg"] and "'a'" in m["msg"] and "flow dependence" in m["msg"]


def test_parallel_flag_without_a_free_loop_is_refused(tmp_path):
    kernel = """
/* tidal basin: running sum along one gauge record */
void running_sum(int n, double *a)
{
    for (int i = 1; i < n; i++)
        a[i] = a[i] + a[i-1];
}
"""
    m, src = refused(tmp_path, kernel, "running_sum", "--sizes", "16", "--parallel")
    assert m["msg"].startswith("--parallel: no loop of the rewrite provably carries no dependence")
    assert "'a'" in m["msg"]
    assert int(m["line"]) == line_of(src.read_text(), "for (int i = 1")


SIMD_J = """
/* harbour cameras: transpose a tile of the frame */
void turn_frame(int n, int m, double t[][W], const double g[][W])
{
    for (int i = 0; i < n; i++)
        #pragma omp simd
        for (int j = 0; j < m; j++)
            t[j][i] = g[i][j];
}
"""


@pytest.mark.parametrize("args,words", [
    (("--sizes", "8,8", "--order", "jj,ii,j,i"), "innermost"),
    (("--order", "j,i"), "innermost"),
    (("--sizes", "8,8", "--jam", "i=2"), "unroll-and-jam"),
])
def test_simd_that_would_move_to_another_loop_is_refused(tmp_path, args, words):
    m, src = refused(tmp_path, SIMD_J, "turn_frame", *args)
    assert (int(m["line"]), int(m["col"])) == (line_of(src.read_text(), "#pragma omp simd"), 9)
    assert words in m["msg"]


def _on_outer(pragma: str) -> str:
    return f"""
/* harbour cameras: scale a frame */
void scale(int n, int m, double b[][W], const double a[][W])
{{
    double s = 0.0;
    {pragma}
    for (int y = 0; y < n; y++)
        for (int x = 0; x < m; x++)
            b[y][x] = 3.0 * a[y][x] + s;
}}
"""


@pytest.mark.parametrize("pragma,args,words", [
    ("#pragma omp parallel for reduction(+: s)", (), "clause 'reduction'"),
    ("#pragma omp parallel for lastprivate(s)", (), "clause 'lastprivate'"),
    ("#pragma omp parallel for ordered", (), "clause 'ordered'"),
    ("#pragma omp parallel for frobnicate(3)", (), "clause 'frobnicate'"),
    ("#pragma omp parallel for collapse(2)", ("--sizes", "8", "--order", "yy,y,x"), "point loop"),
    ("#pragma omp parallel for collapse(n)", (), "not an integer constant"),
    ("#pragma omp parallel for simd", (), "not one looptile knows"),
    ("#pragma omp critical", (), "not one looptile knows"),
    ("#pragma omp parallel for\n    #pragma GCC ivdep", (), "follows another pragma"),
])
def test_worksharing_clauses_that_cannot_stay_valid_are_refused(tmp_path, pragma, args, words):
    m, src = refused(tmp_path, _on_outer(pragma), "scale", *(args or ("--sizes", "8,8")))
    text = src.read_text()
    last = pragma.split("\n")[-1].strip()
    assert (int(m["line"]), int(m["col"])) == (line_of(text, last), 5), m.group(0)
    assert words in m["msg"], m.group(0)


@pytest.mark.parametrize("pragma,words", [
    ("#pragma omp simd reduction(+: s)", "clause 'reduction'"),
    ("#pragma omp simd lastprivate(s)", "clause 'lastprivate'"),
    ("#pragma omp simd linear(s)", "linear"),
    ("#pragma omp simd collapse(2)", "clause 'collapse'"),
])
def test_simd_clauses_that_cannot_stay_valid_are_refused(tmp_path, pragma, words):
    kernel = f"""
/* tidal basin: damp the surface */
void damp(int n, int m, double b[][W])
{{
    double s = 0.0;
    for (int i = 0; i < n; i++)
        {pragma}
        for (int j = 0; j < m; j++)
            b[i][j] = 0.5 * b[i][j];
}}
"""
    m, src = refused(tmp_path, kernel, "damp", "--sizes", "8,8")
    assert (int(m["line"]), int(m["col"])) == (line_of(src.read_text(), pragma), 9)
    assert words in m["msg"]


def test_pragmas_that_are_not_loop_hints_inside_the_nest_are_refused(tmp_path):
    kernel = """
/* tidal basin: count wet cells */
void wet_cells(int n, int m, double b[][W])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++) {
            #pragma omp critical
            b[i][j] = b[i][j] + 1.0;
        }
}
"""
    m, src = refused(tmp_path, kernel, "wet_cells", "--sizes", "8,8")
    assert (int(m["line"]), int(m["col"])) == (line_of(src.read_text(), "#pragma omp critical"), 13)
    assert "not a loop hint" in m["msg"]


def test_simd_on_a_middle_loop_is_refused(tmp_path):
    kernel = """
/* tidal basin: three-level damping */
void damp3(int n, int m, double b[][W])
{
    for (int i = 0; i < n; i++)
        #pragma omp simd
        for (int j = 0; j < m; j++)
            for (int k = 0; k < 2; k++)
                b[i][j] = 0.5 * b[i][j] + k;
}
"""
    m, src = refused(tmp_path, kernel, "damp3", "--sizes", "8,8")
    assert int(m["line"]) == line_of(src.read_text(), "#pragma omp simd")
    assert "has loops inside it" in m["msg"]


def test_jam_command_still_refuses_a_pragma_on_the_nest(tmp_path):
    src = tmp_path / "kernel.c"
    src.write_text(program(SMOOTH, "(void)0"))
    r = run_cli("jam", src, "--nest", "smooth_basin", "--factors", "i=2")
    assert r.exit_code == 1, r.stderr
    m = headline(r.stderr)
    # the first pragma it meets (the simd pragma between the headers): refused, never detached
    assert src.read_text().split("\n")[int(m["line"]) - 1].strip().startswith("#pragma omp")


def test_parallel_output_compiles_warning_free_with_openmp(tmp_path):
    """gcc -fopenmp -Wall -Werror: the pragmas and headers we print are accepted as written."""
    src = tmp_path / "kernel.c"
    src.write_text(program(SMOOTH, SMOOTH_CALL))
    out = tmp_path / "tiled.c"
    assert run_cli("tile", src, "--nest", "smooth_basin", "--sizes", "8,8", "-o", out).exit_code == 0
    import subprocess
    proc = subprocess.run(cc_command() + ["-std=gnu11", "-fopenmp", "-Wall", "-Werror", "-c", str(out), "-o",
                                          str(tmp_path / "t.o")], capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr


def test_hostile_gcc_hints_are_now_kept_with_their_loops(tmp_path):
    """tests/hostile/pragma_in_nest.c: gain_between (ivdep between the headers) and gain_inner
    (unroll in the body) were refused; they are tiled now, each hint on every copy of its loop."""
    from conftest import TESTS
    src = tmp_path / "pragma_in_nest.c"
    src.write_bytes((TESTS / "hostile" / "pragma_in_nest.c").read_bytes())
    main = r"""
#include <stdio.h>
#include <stdlib.h>
#include "%s"
int main(int argc, char **argv)
{
    int n = atoi(argv[1]), m = atoi(argv[2]);
    float (*px)[m] = malloc(sizeof(float) * n * m);
    float *flat = (float *)px;
    for (int k = 0; k < n * m; k++) flat[k] = (float)(k %% 13) - 6.0f;
    gain_between(n, m, px);
    gain_inner(n, m, px);
    for (int k = 0; k < n * m; k++) printf("%%a\n", flat[k]);
    free(px);
    return 0;
}
"""
    tiled = tmp_path / "tiled.c"
    text = src.read_bytes()
    for func, hint in (("gain_between", b"#pragma GCC ivdep"), ("gain_inner", b"#pragma GCC unroll 4")):
        r = run_cli("tile", tiled if tiled.exists() else src, "--nest", func, "--sizes", "4,4", "-o", tiled)
        assert r.exit_code == 0, r.stderr
        assert tiled.read_bytes().count(hint) == 2  # the whole-tile and the clamped copy
    assert src.read_bytes() == text
    outs = []
    for name, inc in (("orig", src), ("tiled", tiled)):
        drv = tmp_path / f"{name}_main.c"
        drv.write_text(main % inc.name)
        exe = tmp_path / f"{name}.exe"
        build(drv, exe, ("-I", str(tmp_path)))
        outs.append([run_program_args(exe, n, m, {}) for n, m in ((1, 1), (3, 5), (4, 4), (9, 7))])
    assert outs[0] == outs[1]


def test_bound_of_several_variables_gets_its_own_overflow_test(tmp_path):
    kernel = """
/* harbour cameras: blur the upper half of a frame pair */
void upper_half(int n, int m, double b[][W], const double a[][W])
{
    for (int y = 0; y < (n + m) / 2; y++)
        for (int x = 0; x < m; x++)
            b[y][x] = 0.5 * a[y][x] + 0.5 * a[y][m - 1 - x];
}
"""
    text = tile_ok(tmp_path, kernel, "upper_half(n, m, B, (const double (*)[W])A)", "upper_half",
                   "--sizes", "8,8", "--parallel")
    assert "if (((n + m) / 2) <= 2147483640) {" in text  # the bound as written, evaluated as the original does
    assert "for (int yy = 0; yy < (n + m) / 2; yy += 8)" in text
