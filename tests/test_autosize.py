"""Tile sizes from the cache geometry: the footprint model, the conflict rule, trip counts, the
CLI (`tile --sizes auto --explain`), the directive (`#pragma looptile tile(i=auto)`) and a
compile-and-run check.

Every test gives the geometry explicitly (`--cache`, or `Level`s), except the one of the
sysfs reader, which reads a fake sysfs tree. Outside check of the set mapping: a direct
enumeration of the tile's byte addresses written here (line = address // line size,
set = line mod sets: the textbook set-associative placement, common practice). Outside check
of the rewrite: the system C compiler with -fsanitize=address,undefined, the original and the
auto-tiled kernel compared bit for bit.

The kernels belong to an invented tidal-basin model and its harbour cameras.
"""
from __future__ import annotations

from pathlib import Path

import pytest
from conftest import compile_and_run, run_cli

from looptile import autosize, cachegeom, pipeline
from looptile.cachegeom import Level, machine_levels, parse_level
from looptile.flags import CompileFlags

pytestmark = pytest.mark.cc  # looptile runs the C preprocessor

KERNELS = """\
/* Coupling of basin cells: C += A * B. */
void couple(int n, double C[n][n], const double A[n][n], const double B[n][n])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            for (int k = 0; k < n; k++)
                C[i][j] += A[i][k] * B[k][j];
}

/* A camera frame turned on its side. */
void turn(int n, double B[n][n], const double A[n][n])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            B[j][i] = A[i][j];
}

/* Smoothing of the sea level: a five-point stencil, single precision. */
void smooth(int n, int m, float out[n][m], const float in[n][m])
{
    for (int i = 1; i < n - 1; i++)
        for (int j = 1; j < m - 1; j++)
            out[i][j] = in[i - 1][j] + in[i + 1][j] + in[i][j - 1] + in[i][j + 1];
}

/* The frame turned, stored flat with a row length ld. */
void turn_flat(int n, int ld, double *B, const double *A)
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            B[j * ld + i] = A[i * ld + j];
}

/* An in-place drift with the distance (1, -1): tiling (i, j) is illegal. */
void drift(int n, int m, double h[n][m])
{
    for (int i = 1; i < n; i++)
        for (int j = 0; j < m - 1; j++)
            h[i][j] = h[i - 1][j + 1] + 0.25;
}
"""

L1 = "L1=48KiB/12/64"  # 768 lines, 12 ways, 64 sets
L2 = "L2=2MiB/16/64"


@pytest.fixture
def kernels(tmp_path):
    p = tmp_path / "basin.c"
    p.write_text(KERNELS)
    return p


def nest_of(path: Path, func: str):
    tu = pipeline.load(str(path), CompileFlags())
    return pipeline.analyse(tu, pipeline.select(tu, func), frozenset(), ())


def lines_of(groups, n, line=64):
    steps = {x: 1 for x in n}
    return {g.spelled: autosize.footprint(g, n, steps, line) for g in groups}


# ---------------------------------------------------------------- the footprint model

def test_matmul_footprint_by_hand(kernels):
    nest, an = nest_of(kernels, "couple")
    groups, left = autosize.groups(nest, an, ("i", "j", "k"), (), {"n": 1000})
    assert left == []
    # Ti=32, Tj=16, Tk=8, doubles, 64-byte lines (8 doubles a line):
    #   C[i][j]: 32 rows x ceil(16*8/64) = 2 lines -> 64 lines
    #   A[i][k]: 32 rows x ceil(8*8/64) = 1 line  -> 32 lines
    #   B[k][j]:  8 rows x 2 lines               -> 16 lines
    assert lines_of(groups, {"i": 32, "j": 16, "k": 8}) == {"C[i][j]": 64, "A[i][k]": 32, "B[k][j]": 16}
    reuse = {g.spelled: g.reuse for g in groups}
    assert "reuses across k" in reuse["C[i][j]"]
    assert "reuses across j" in reuse["A[i][k]"]
    assert "reuses across i" in reuse["B[k][j]"]
    # Rows of n = 1000 doubles: 8000 bytes apart.
    assert {g.strides for g in groups} == {(8000, 8)}


def test_matmul_band_of_two_counts_the_inner_loop_whole(kernels):
    nest, an = nest_of(kernels, "couple")
    groups, _ = autosize.groups(nest, an, ("i", "j"), ("k",), {"n": 1000})
    # k runs its whole trip count (1000) inside a tile of (i, j) = (4, 8):
    #   A[i][k]: 4 rows x ceil(1000*8/64) = 125 lines -> 500; B[k][j]: 1000 rows x 1 line -> 1000;
    #   C[i][j]: 4 rows x 1 line -> 4
    assert lines_of(groups, {"i": 4, "j": 8, "k": 1000}) == {"C[i][j]": 4, "A[i][k]": 500, "B[k][j]": 1000}


def test_transpose_footprint_and_stream(kernels):
    nest, an = nest_of(kernels, "turn")
    groups, _ = autosize.groups(nest, an, ("i", "j"), (), {"n": 4096})
    by = {g.spelled: g for g in groups}
    # A[i][j] with j innermost: each line used by consecutive j only (a stream).
    assert by["A[i][j]"].reuse == ""
    # B[j][i]: its rows are walked by i, an outer loop of the tile (spatial reuse across i).
    assert "walked by i" in by["B[j][i]"].reuse
    # Ti=16, Tj=4: B is 4 rows x ceil(16*8/64) = 2 lines = 8 lines; A is 16 rows x 1 line = 16.
    assert lines_of(groups, {"i": 16, "j": 4}) == {"A[i][j]": 16, "B[j][i]": 8}


def test_stencil_group_spread(kernels):
    nest, an = nest_of(kernels, "smooth")
    groups, _ = autosize.groups(nest, an, ("i", "j"), (), {"n": 100, "m": 200})
    by = {g.spelled: g for g in groups}
    ins = by["in[i - 1][j]"]
    assert ins.accesses == 4 and ins.spread == (2, 2)  # offsets -1..+1 in both dimensions
    assert "4 accesses a constant apart" in ins.reuse
    # Ti=8, Tj=16, floats (16 a line): in spans (8+2) rows x (16+2) = 18 floats = ceil(72/64) = 2 lines
    #   -> 20 lines; out: 8 rows x 1 line -> 8 lines.
    assert lines_of(groups, {"i": 8, "j": 16}) == {"in[i - 1][j]": 20, "out[i][j]": 8}
    # Row length: the touched extent of dimension 1 (m = 200 floats): 800 bytes.
    assert ins.strides == (800, 4)


def test_flattened_arrays_read_as_rows(kernels):
    nest, an = nest_of(kernels, "turn_flat")
    groups, _ = autosize.groups(nest, an, ("i", "j"), (), {"n": 1000, "ld": 1024})
    by = {g.spelled.split("[")[0]: g for g in groups}
    # The model's rows: B[j][i] over rows of ld = 1024 doubles (8192 bytes), as the 2-D case.
    assert by["B"].strides == (8192, 8) and by["A"].strides == (8192, 8)
    assert lines_of(groups, {"i": 16, "j": 4})["B[j][i]"] == 8
    # Without ld the row length is unknown: no conflict test for it.
    groups, _ = autosize.groups(nest, an, ("i", "j"), (), {"n": 1000})
    assert all(g.strides is None for g in groups)


# ---------------------------------------------------------------- sets and conflicts

def enumerated_load(g, n, level: Level) -> int:
    """The largest number of the group's tile lines in one set, by listing every element's address."""
    ext = [sum(abs(c) * (n[x] - 1) for x, c in dim) + 1 + sp for dim, sp in zip(g.coeffs, g.spread)]
    lines = set()

    def walk(d, addr):
        if d == len(ext):
            lines.add(addr // level.line)
            return
        for k in range(ext[d]):
            walk(d + 1, addr + k * g.strides[d])
    walk(0, 0)
    count: dict[int, int] = {}
    for ln in lines:
        count[ln % level.sets] = count.get(ln % level.sets, 0) + 1
    return max(count.values())


@pytest.mark.parametrize("n, sizes", [(1000, (32, 32)), (1024, (32, 32)), (1007, (24, 40)), (1024, (12, 512)),
                                      (1000, (7, 13))])
def test_set_load_matches_an_enumeration(kernels, n, sizes):
    nest, an = nest_of(kernels, "couple")
    groups, _ = autosize.groups(nest, an, ("i", "j", "k"), (), {"n": n})
    c = next(g for g in groups if g.spelled == "C[i][j]")
    level = parse_level(L1)
    tile = {"i": sizes[0], "j": sizes[1], "k": 1}
    assert autosize.set_load(c, tile, {"i": 1, "j": 1, "k": 1}, level) == enumerated_load(c, tile, level)


def test_rows_a_multiple_of_sets_times_line_apart_fall_in_one_set(kernels):
    nest, an = nest_of(kernels, "couple")
    groups, _ = autosize.groups(nest, an, ("i", "j", "k"), (), {"n": 1024})
    c = next(g for g in groups if g.spelled == "C[i][j]")
    # n = 1024 doubles: rows 8192 bytes = 2 x (64 sets x 64 bytes) apart, so every row starts in set 0;
    # a 32x32 tile's rows are 4 lines wide: sets 0..3 get all 32 rows.
    assert autosize.set_load(c, {"i": 32, "j": 32, "k": 1}, {"i": 1, "j": 1, "k": 1}, parse_level(L1)) == 32


def test_conflicting_naive_size_is_avoided(kernels):
    nest, an = nest_of(kernels, "couple")
    level = parse_level(L1)
    plain = autosize.choose(nest, an, ("i", "j", "k"), [level], {"n": 1000})
    # 3 x 32 x 32 doubles = 3 x 128 lines = 384 = half of 768: the classic cube, no conflict at n = 1000.
    assert plain.sizes == {"i": 32, "j": 32, "k": 32}
    aliased = autosize.choose(nest, an, ("i", "j", "k"), [level], {"n": 1024})
    assert aliased.sizes != plain.sizes
    assert any("rejected i=32, j=32, k=32 in L1: self-interference" in e and "multiple of sets x line = 4096"
               in e for e in aliased.explanation)
    groups, _ = autosize.groups(nest, an, ("i", "j", "k"), (), {"n": 1024})
    steps = {"i": 1, "j": 1, "k": 1}
    held = sum(autosize.set_load(g, aliased.sizes, steps, level) for g in groups)
    assert held <= level.assoc  # wherever the three arrays start, no set overflows
    fp = sum(autosize.footprint(g, aliased.sizes, steps, level.line) for g in groups)
    assert fp <= autosize.FRACTION * level.lines


def test_trip_counts_bound_the_sizes(kernels):
    nest, an = nest_of(kernels, "couple")
    small = autosize.choose(nest, an, ("i", "j", "k"), [parse_level(L1), parse_level(L2)], {"n": 20})
    # n = 20: the whole problem is 3 x 20 rows x ceil(160/64) = 3 lines = 180 lines <= 384: one tile,
    # no tile larger than the loop, and no second level (nothing larger than the loop is a multiple).
    assert small.sizes == {"i": 20, "j": 20, "k": 20}
    assert small.levels == [{"i": 20, "j": 20, "k": 20}]
    nest, an = nest_of(kernels, "smooth")
    c = autosize.choose(nest, an, ("i", "j"), [parse_level("L1=64KiB/0/64")], {"n": 6, "m": 5000})
    assert c.sizes["i"] <= 4  # i runs 1..4
    assert autosize.trip_counts(nest, {"n": 6, "m": 5000}) == {"i": 4, "j": 4998}


def test_two_levels_nest_and_fit_each_level(kernels):
    nest, an = nest_of(kernels, "couple")
    l1, l2 = parse_level(L1), parse_level(L2)
    c = autosize.choose(nest, an, ("i", "j", "k"), [l1, l2], {"n": 1000})
    outer, inner = c.levels
    assert set(outer) == {"i", "j", "k"}
    for x in outer:
        assert outer[x] % c.sizes[x] == 0 and outer[x] <= 1000
        assert inner.get(x, outer[x]) == c.sizes[x]
    groups, _ = autosize.groups(nest, an, ("i", "j", "k"), (), {"n": 1000})
    steps = {"i": 1, "j": 1, "k": 1}
    assert sum(autosize.footprint(g, outer, steps, 64) for g in groups) <= autosize.FRACTION * l2.lines
    assert sum(autosize.footprint(g, c.sizes, steps, 64) for g in groups) <= autosize.FRACTION * l1.lines
    # Deterministic.
    assert autosize.choose(nest, an, ("i", "j", "k"), [l1, l2], {"n": 1000}) == c


def test_contiguous_loop_gets_line_multiples(kernels):
    nest, an = nest_of(kernels, "turn")
    c = autosize.choose(nest, an, ("i", "j"), [parse_level("L1=32KiB/8/64")], {"n": 1000})
    # both loops walk a contiguous dimension (A's j, B's i): multiples of 8 doubles, or powers of two below
    for x in ("i", "j"):
        assert c.sizes[x] % 8 == 0 or c.sizes[x] in (1, 2, 4)


# ---------------------------------------------------------------- the geometry

def fake_sysfs(root: Path, entries) -> Path:
    for k, (level, kind, size, ways, line) in enumerate(entries):
        d = root / f"index{k}"
        d.mkdir(parents=True)
        for name, value in (("level", level), ("type", kind), ("size", size), ("ways_of_associativity", ways),
                            ("coherency_line_size", line)):
            (d / name).write_text(f"{value}\n")
    return root


def test_machine_levels_from_a_fake_sysfs(tmp_path):
    root = fake_sysfs(tmp_path / "cache", [(1, "Data", "48K", 12, 64), (1, "Instruction", "32K", 8, 64),
                                           (2, "Unified", "2048K", 16, 64)])
    levels, why = machine_levels(root)
    assert why is None
    assert [lv.spec() for lv in levels] == ["L1=48KiB/12/64", "L2=2MiB/16/64"]
    levels, why = machine_levels(tmp_path / "nothing")
    assert [lv.spec() for lv in levels] == list(cachegeom.FALLBACK) and "could not be read" in why


def test_cli_default_geometry_is_the_machines(kernels, tmp_path, monkeypatch):
    root = fake_sysfs(tmp_path / "cache", [(1, "Data", "32K", 8, 64)])
    real = cachegeom.machine_levels
    monkeypatch.setattr(cachegeom, "machine_levels", lambda: real(root))
    r = run_cli("tile", kernels, "--nest", "couple", "--sizes", "auto", "--params", "n=1000")
    assert r.exit_code == 0, r.stderr
    assert "--cache L1=32KiB/8/64" in r.stdout
    monkeypatch.setattr(cachegeom, "machine_levels", lambda: real(tmp_path / "nothing"))
    r = run_cli("tile", kernels, "--nest", "couple", "--sizes", "auto", "--params", "n=1000")
    assert r.exit_code == 0, r.stderr
    assert "note: the cache geometry could not be read" in r.stderr
    assert "--cache L1=32KiB/8/64 --cache L2=1MiB/16/64" in r.stdout  # the fallback, recorded


# ---------------------------------------------------------------- command line

def test_cli_sizes_auto_explain(kernels):
    r = run_cli("tile", kernels, "--nest", "couple", "--sizes", "auto", "--cache", L1, "--params", "n=1000",
                "--explain")
    assert r.exit_code == 0, r.stderr
    assert f"{kernels}:4:5: note: tile sizes chosen by the cache model:" in r.stderr
    assert "  band (i, j, k): the longest run of outermost loops that is fully permutable" in r.stderr
    assert ("C[i][j] reuses across k; its rows are walked by j, outside the innermost loop: footprint 32x32 "
            "8-byte elements = 128 lines = 8 KiB") in r.stderr
    assert "total 384 lines = 24 KiB of L1 (48 KiB, 12-way, 64 sets, 64-byte lines); fraction 0.5" in r.stderr
    out = r.stdout
    assert "tiled (i, j, k) by (32, 32, 32)" in out
    assert ("made by: looptile tile " + str(kernels) + " --nest couple --sizes auto --cache L1=48KiB/12/64 "
            "--params n=1000 (sizes chosen by the cache model for L1=48KiB/12/64: --sizes i=32,j=32,k=32)") in out
    # Without --explain, no reasoning on stderr.
    r = run_cli("tile", kernels, "--nest", "couple", "--sizes", "auto", "--cache", L1, "--params", "n=1000")
    assert r.exit_code == 0 and "footprint" not in r.stderr


def test_cli_mixed_and_two_levels(kernels):
    r = run_cli("tile", kernels, "--nest", "couple", "--sizes", "i=auto,j=auto,k=16", "--cache", L1, "--cache", L2,
                "--params", "n=1000")
    assert r.exit_code == 0, r.stderr
    head = next(line for line in r.stdout.splitlines() if "looptile: tiled" in line)
    assert ", 16), then (" in head  # k = 16 kept at the outer level, and an inner level for i, j
    assert "k=16 as given" not in r.stderr  # the reasoning only with --explain


@pytest.mark.parametrize("args, message", [
    (("--sizes", "8", "--cache", L1), "--cache and --explain go with --sizes auto"),
    (("--sizes", "8", "--explain"), "--cache and --explain go with --sizes auto"),
    (("--sizes", "auto", "--sizes", "8"), "--sizes auto chooses every level of tiles"),
    (("--sizes", "auto", "--cache", "L1=48KiB/5/64"), "768 lines cannot be split into sets of 5 ways"),
    (("--sizes", "i=auto,q=auto", "--cache", L1), "--sizes names loop 'q'"),
    (("--sizes", "i=auto,k=auto", "--cache", L1), "must be consecutive loops"),
    (("--sizes", "i=auto,j=fast", "--cache", L1), "is not NAME=SIZE, NAME=auto, SIZE or auto"),
])
def test_cli_usage_errors(kernels, args, message):
    r = run_cli("tile", kernels, "--nest", "couple", *args)
    assert r.exit_code == 2, r.stderr
    assert message in r.stderr


def test_auto_never_bypasses_the_legality_test(kernels):
    # Named loops: the model sizes them, the legality test refuses with the witness.
    r = run_cli("tile", kernels, "--nest", "drift", "--sizes", "i=auto,j=auto", "--cache", L1)
    assert r.exit_code == 1
    assert "refused: tiling (i, j) would run" in r.stderr
    # A bare auto takes the fully permutable outer loops only: here i alone (legal, said with --explain).
    r = run_cli("tile", kernels, "--nest", "drift", "--sizes", "auto", "--cache", L1, "--explain")
    assert r.exit_code == 0, r.stderr
    assert "band (i): the outermost loop alone" in r.stderr


def test_verify_names_the_sizes_instead_of_auto(kernels):
    r = run_cli("verify", kernels, "--nest", "couple", "--sizes", "auto")
    assert r.exit_code == 2 and "--sizes auto (sizes chosen by the cache model) is for tile" in r.stderr


# ---------------------------------------------------------------- directives

DIRECTIVES = """\
void turn(int n, double B[n][n], const double A[n][n])
{
#pragma looptile tile(i=auto, j=auto)
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            B[j][i] = A[i][j];
}

void turn_omp(int n, double B[n][n], const double A[n][n])
{
#pragma omp tile sizes(auto, 8)
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            B[j][i] = A[i][j];
}
"""


def test_directive_auto_carried_out_and_omp_auto_refused(tmp_path):
    p = tmp_path / "frames.c"
    p.write_text(DIRECTIVES)
    r = run_cli("apply", p, "--diff", "--cache", "L1=32KiB/8/64")
    assert r.exit_code == 1  # the OpenMP directive is refused
    assert "#pragma looptile tile(i=auto, j=auto)) (sizes chosen by the cache model for L1=32KiB/8/64: " \
           "--sizes i=" in r.stdout
    assert f"{p}:11:24: refused: sizes(...) item 1 'auto' is not an integer constant, and the OpenMP sizes " \
           "clause takes positive integer constant expressions" in r.stderr
    assert "1 nest(s) rewritten, 1 refused" in r.stderr  # the summary goes to stderr with --diff


def test_directive_auto_with_two_tile_clauses_is_an_error(tmp_path):
    p = tmp_path / "frames.c"
    p.write_text(DIRECTIVES.replace("tile(i=auto, j=auto)", "tile(i=64, j=64) tile(i=auto, j=8)"))
    r = run_cli("apply", p, "--cache", L1)
    assert r.exit_code == 1
    assert f"{p}:3:42: error: 'auto' chooses every level of tiles" in r.stderr


# ---------------------------------------------------------------- compile and run

DRIVER = """
#include <stdio.h>
#include <string.h>

int main(void)
{
    enum { N = 130 };
    static double C[N][N], A[N][N], B[N][N];
    unsigned long s = 12345;
    for (int i = 0; i < N; i++)
        for (int j = 0; j < N; j++) {
            s = s * 6364136223846793005UL + 1442695040888963407UL;
            A[i][j] = (double)(s >> 11) / 9007199254740992.0 - 0.5;
            s = s * 6364136223846793005UL + 1442695040888963407UL;
            B[i][j] = (double)(s >> 11) / 9007199254740992.0 - 0.5;
            C[i][j] = (double)(i - j) / 7.0;
        }
    couple(N, C, A, B);
    for (int i = 0; i < N; i++)
        for (int j = 0; j < N; j++) {
            unsigned long long bits;
            memcpy(&bits, &C[i][j], sizeof bits);
            printf("%016llx\\n", bits);
        }
    return 0;
}
"""


def test_auto_tiled_matmul_runs_bit_for_bit(tmp_path, cc):
    src = tmp_path / "couple.c"
    src.write_text(KERNELS.split("/* A camera")[0] + DRIVER)
    out = tmp_path / "couple_tiled.c"
    # Small caches, so that 130 is several tiles with partial ones at both levels.
    r = run_cli("tile", src, "--nest", "couple", "--sizes", "auto", "--cache", "L1=4KiB/4/64",
                "--cache", "L2=32KiB/8/64", "--params", "n=130", "-o", out)
    assert r.exit_code == 0, r.stderr
    text = out.read_text()
    assert ", then (" in text  # two levels of tiles
    sizes = [int(x) for x in text.split("by (")[1].split(")")[0].split(", ")]
    assert any(130 % s for s in sizes)  # partial tiles run too
    want = compile_and_run(src, tmp_path, name="original")
    got = compile_and_run(out, tmp_path, name="tiled")
    assert got == want and len(want.splitlines()) == 130 * 130
