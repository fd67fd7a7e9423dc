"""Register tiles from the vector registers (`tile --jam auto`, looptile/regtile.py): the register
file reader, the block arithmetic of the model on hand-worked examples, the nests that get no
register tile and why, tile sizes chosen around the block (`--sizes auto --jam auto`), tune's
analytic register candidate, and the usage errors.

Outside check of every rewrite: the system C compiler with -fsanitize=address,undefined, the
original and the register-tiled kernel compared bit for bit over the parameter sets verify sweeps
(tile --verify). The block arithmetic is worked by hand in the comments from the model's stated
rule (the analytical micro-kernel model of Low, Igual, Smith and Quintana-Orti, ACM TOMS 2016,
from memory, as looptile/regtile.py states it), not read back from the code.

The kernels belong to an invented tidal-basin model and its harbour cameras.
"""
from __future__ import annotations

import re
from pathlib import Path

import pytest
from conftest import run_cli

from looptile import pipeline, regtile, tune
from looptile.flags import CompileFlags
from looptile.regtile import Registers, machine_registers, parse_registers

KERNELS = """\
/* Coupling of basin cells: C += A * B. */
void couple(int n, double C[n][n], const double A[n][n], const double B[n][n])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            for (int k = 0; k < n; k++)
                C[i][j] += A[i][k] * B[k][j];
}

/* A harbour-camera frame smoothed by a q x q weight stencil. */
void smooth(int h, int w, int q, float out[h][w], const float img[h][w], const float wt[q][q])
{
    for (int y = 0; y < h - q + 1; y++)
        for (int x = 0; x < w - q + 1; x++)
            for (int u = 0; u < q; u++)
                for (int v = 0; v < q; v++)
                    out[y][x] += img[y + u][x + v] * wt[u][v];
}

/* The basin grid turned for the cross-shore solver. */
void turn(int n, double T[n][n], const double G[n][n])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            T[j][i] = G[i][j];
}

/* The same for a float camera frame. */
void turn_frame(int n, float T[n][n], const float G[n][n])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            T[j][i] = G[i][j];
}

/* One relaxation sweep of the basin surface. */
void relax(int n, int m, double b[n][m], const double a[n][m])
{
    for (int i = 1; i < n - 1; i++)
        for (int j = 1; j < m - 1; j++)
            b[i][j] = 0.25 * (a[i - 1][j] + a[i + 1][j] + a[i][j - 1] + a[i][j + 1]);
}

/* Drift of a basin row into the next: C[i][j] reads the row above, one column on. */
void drift(int n, double C[n][n], const double B[n])
{
    for (int i = 1; i < n; i++)
        for (int j = 0; j < n - 1; j++)
            for (int k = 0; k < n; k++)
                C[i][j] += C[i - 1][j + 1] * B[k];
}

/* Gauge covariance, lower triangle. */
void tri(int n, double S[n][n], const double X[n][n])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j <= i; j++)
            for (int k = 0; k < n; k++)
                S[i][j] += X[i][k] * X[j][k];
}
"""

GEOMETRY = ("--cache", "L1=32KiB/8/64", "--cache", "L2=1MiB/8/64")


@pytest.fixture(scope="module")
def kernels(tmp_path_factory) -> Path:
    p = tmp_path_factory.mktemp("regtile") / "basin_kernels.c"
    p.write_text(KERNELS)
    return p


def _tile(path: Path, nest: str, *args: str, out: Path | None = None):
    out = out or path.with_name(f"{nest}_out.c")
    r = run_cli("tile", path, "--nest", nest, *args, "-o", out)
    return r, (out.read_text() if out.exists() else "")


def _made_by(text: str) -> str:
    m = re.search(r"made by: (.*?) \*/", text, re.S)
    assert m, text
    return " ".join(m.group(1).split())


# ---------------------------------------------------------------- the register file

def test_machine_registers_from_cpuinfo(tmp_path):
    info = tmp_path / "cpuinfo"
    info.write_text("processor\t: 0\nflags\t\t: fpu sse2 avx avx2 fma avx512f avx512vl\n")
    r = machine_registers(info, "x86_64")
    assert (r.count, r.vector_bytes) == (32, 64) and "avx512f" in r.source
    info.write_text("flags\t\t: fpu sse2 avx avx2 fma\n")
    r = machine_registers(info, "x86_64")
    assert (r.count, r.vector_bytes) == (16, 32) and "avx" in r.source
    info.write_text("flags\t\t: fpu sse sse2\n")
    r = machine_registers(info, "x86_64")
    assert (r.count, r.vector_bytes) == (16, 16)
    r = machine_registers(info, "aarch64")
    assert (r.count, r.vector_bytes) == (32, 16)
    r = machine_registers(tmp_path / "missing", "x86_64")  # unreadable: the stated fallback
    assert (r.count, r.vector_bytes) == regtile.FALLBACK and "give --registers" in r.source
    r = machine_registers(info, "riscv64")
    assert (r.count, r.vector_bytes) == regtile.FALLBACK and "riscv64" in r.source


def test_parse_registers():
    r = parse_registers("16x32")
    assert (r.count, r.vector_bytes, r.spec()) == (16, 32, "16x32")
    assert parse_registers(" 32 X 64 ").vector_bytes == 64
    for bad, words in (("16", "COUNTxBYTES"), ("16x24", "power of two"), ("2x32", "outside 4..256"),
                       ("x32", "COUNTxBYTES")):
        with pytest.raises(Exception, match=words):
            parse_registers(bad)


# ---------------------------------------------------------------- the block arithmetic

@pytest.mark.cc
@pytest.mark.parametrize("registers, sizes, jam", [
    # 64-byte registers hold N = 8 doubles. B[k][j] is one row shared by all rows of copies, so
    # both FMA units count: need = 8 x 2 x 4 = 64 elements; nr = 8 x ceil(sqrt(64) / 8) = 8,
    # mr = 64 / 8 = 8; registers 8 x 1 (accumulators) + 1 (B's row) + 1 = 10 <= 31.
    ("32x64", "i=64,j=64,k=64", "i=8,j=8"),
    # 32-byte registers: N = 4; need = 32; nr = 4 x ceil(5.66 / 4) = 8, mr = ceil(32 / 8) = 4;
    # registers 4 x 2 + 2 + 1 = 11 <= 15.
    ("16x32", "i=64,j=64,k=64", "i=4,j=8"),
    # 16-byte registers: N = 2; need = 16; nr = 2 x ceil(4 / 2) = 4, mr = 4; 4 x 2 + 2 + 1 = 11.
    ("16x16", "i=64,j=64,k=64", "i=4,j=4"),
    # Only 8 registers of 64 bytes: 8 x 8 needs 10 > 7, so mr shrinks to 5 (5 + 1 + 1 = 7).
    ("8x64", "i=40,j=64,k=64", "i=5,j=8"),
    # Given sizes of 12: the factors must divide them; nr = 8 does not, the largest divisor of
    # 12 below it that is a multiple of N = 4 is 4; mr = 4 divides 12.
    ("16x32", "i=12,j=12,k=12", "i=4,j=4"),
])
def test_accumulator_block(kernels, registers, sizes, jam):
    r, text = _tile(kernels, "couple", "--sizes", sizes, "--jam", "auto", "--registers", registers)
    assert r.exit_code == 0, r.stderr
    made = _made_by(text)
    assert f"--jam {jam} --scalarize" in made
    assert "-fno-tree-loop-vectorize" in made  # the build advice travels with the rewrite
    assert f"register tile: --jam {jam} --scalarize (accumulators)" in r.stderr


@pytest.mark.cc
def test_sliding_window_block(kernels):
    # out[y][x] stays during v; img[y + u][x + v] slides along v, so vectors are at most 32
    # bytes: N = 8 floats. Every row of copies loads its own img row: load-bound, one unit:
    # need = 8 x 1 x 4 = 32; nr = 8 x ceil(5.66 / 8) = 8; mr = 32 / 8 = 4.
    r, text = _tile(kernels, "smooth", "--sizes", "y=16,x=64,u=3", "--jam", "auto", "--registers", "32x64",
                    "--explain")
    assert r.exit_code == 0, r.stderr
    assert "--jam y=4,x=8 --scalarize" in _made_by(text)
    assert "slides along 'v'" in r.stderr and "load-bound" in r.stderr


@pytest.mark.cc
@pytest.mark.parametrize("nest, jam", [("turn", "i=4"), ("turn_frame", "i=8")])
def test_row_runs(kernels, nest, jam):
    # T[j][i] with j innermost: one element per row each iteration; jamming i by 32 bytes /
    # element size writes a 32-byte run of a row: 4 doubles, 8 floats.
    r, text = _tile(kernels, nest, "--sizes", "i=64,j=16", "--jam", "auto", "--registers", "32x64")
    assert r.exit_code == 0, r.stderr
    made = _made_by(text)
    assert f"--jam {jam}" in made and "--scalarize" not in made.split("(", 1)[1]
    assert "(row runs)" in r.stderr


@pytest.mark.cc
@pytest.mark.parametrize("nest, sizes, why", [
    ("relax", "i=32,j=32", "already walks the rows of what it writes"),
    ("tri", "i=32,j=32,k=32", "unroll-and-jam after tiling is for rectangular bands"),
])
def test_no_register_tile(kernels, nest, sizes, why):
    r, text = _tile(kernels, nest, "--sizes", sizes, "--jam", "auto", "--registers", "32x64")
    assert r.exit_code == 0, r.stderr
    assert f"no register tile: the {'innermost' if nest == 'relax' else 'bounds'}" in r.stderr and why in r.stderr
    assert "unrolled" not in text  # tiles only


@pytest.mark.cc
def test_trip_counts_bound_the_factors(kernels):
    # n = 6: no factor above 6; nr = 8 would pass the end of every row.
    r, text = _tile(kernels, "couple", "--sizes", "auto", "--jam", "auto", "--registers", "32x64",
                    "--params", "n=6", *GEOMETRY)
    assert r.exit_code == 0, r.stderr
    assert "--jam i=6,j=6 --scalarize" in _made_by(text)


@pytest.mark.cc
def test_an_illegal_block_falls_back(kernels):
    # Only i is tiled; the model's 8 x 8 block jams i inside j, which runs (i + 1, j - 1) before
    # (i, j): the flow dependence of distance (1, -1) forbids it. Jamming j alone keeps i outside
    # and is legal, so that is taken (and verified by compiling and running both versions).
    r, text = _tile(kernels, "drift", "--sizes", "i=16", "--jam", "auto", "--registers", "32x64", "--params",
                    "n=30", "--explain", "--verify")
    assert r.exit_code == 0, r.stderr
    assert "jam i=8,j=8: it would break a dependence" in r.stderr and "jam j=8 is legal: taken" in r.stderr
    assert "--jam j=8 --scalarize" in _made_by(text)
    assert "verdict: equal" in r.stderr
    # asked by hand, the same block is refused with its witness
    r = run_cli("tile", kernels, "--nest", "drift", "--sizes", "i=16", "--jam", "i=8,j=8")
    assert r.exit_code == 1 and "refused" in r.stderr


# ---------------------------------------------------------------- sizes around the block

@pytest.mark.cc
def test_sizes_auto_around_the_block(kernels):
    r, text = _tile(kernels, "couple", "--sizes", "auto", "--jam", "auto", "--registers", "32x64",
                    "--params", "n=1000", *GEOMETRY, "--explain")
    assert r.exit_code == 0, r.stderr
    made = _made_by(text)
    m = re.search(r"--sizes (\S+)(?: --sizes (\S+))?; register tile", made)
    assert m, made
    outer = dict(kv.split("=") for kv in m.group(1).split(","))
    inner = dict(kv.split("=") for kv in m.group(2).split(",")) if m.group(2) else {}
    # The L1 tiles of i and j are the 8 x 8 block itself, so no L1 tile loop of i or j is
    # emitted: the jammed point loops step through the L2 tiles by 8.
    assert "i" not in inner and "j" not in inner
    assert int(outer["i"]) % 8 == 0 and int(outer["j"]) % 8 == 0
    # the run of the reduction loop k is sized for L1 around the block: longer than the block
    k_l1 = int(inner.get("k", outer["k"]))
    assert k_l1 >= 32 and int(outer["k"]) % k_l1 == 0
    assert "L1 tiles around the register block i=8, j=8" in r.stderr


@pytest.mark.cc
def test_no_l1_tiles_shorter_than_a_line(kernels):
    # The transpose at n = 4096: the L1 conflict rule leaves j = 4 at L1, less than the 8
    # doubles of a line of G, so that level is not emitted for j.
    r, text = _tile(kernels, "turn", "--sizes", "auto", "--jam", "auto", "--registers", "32x64",
                    "--params", "n=4096", *GEOMETRY, "--explain")
    assert r.exit_code == 0, r.stderr
    assert "no L1 tiles of the innermost loop 'j'" in r.stderr
    assert "--jam i=4" in _made_by(text)


# ---------------------------------------------------------------- compile and run

@pytest.mark.cc
@pytest.mark.parametrize("nest, params", [
    ("couple", "n=20"), ("smooth", "h=20,w=21,q=3"), ("turn", "n=19"), ("turn_frame", "n=18"),
])
def test_register_tiles_compute_the_same(kernels, nest, params):
    """tile --verify: the system compiler builds both versions with ASan/UBSan and compares them
    bit for bit over the parameter sets verify sweeps (sizes below, at and above the tiles and
    the factors, so the remainder loops run)."""
    r, text = _tile(kernels, nest, "--sizes", "auto", "--jam", "auto", "--registers", "32x64", "--params", params,
                    *GEOMETRY, "--verify")
    assert r.exit_code == 0, r.stderr
    assert "verdict: equal" in r.stderr
    assert "unrolled" in text


# ---------------------------------------------------------------- tune and the CLI

@pytest.mark.cc
def test_tune_times_the_register_pick(kernels, monkeypatch):
    monkeypatch.setattr(regtile, "machine_registers", lambda: Registers(32, 64, "test"))
    tu = pipeline.load(str(kernels), CompileFlags())
    notes: list[str] = []
    cfg = tune.analytic_register(tu, "couple", ("i", "j", "k"), tune.TuneOptions({"n": 64}), notes)
    assert cfg is not None and cfg.jam == (("i", 8), ("j", 8)) and cfg.scalarize
    assert all(dict(cfg.levels[0])[x] % 8 == 0 for x in ("i", "j"))  # the outermost tiles hold whole blocks
    assert tune.analytic_register(tu, "relax", ("i", "j"), tune.TuneOptions({"n": 64, "m": 64}), notes) is None


@pytest.mark.cc
def test_usage_errors(kernels):
    r = run_cli("tile", kernels, "--nest", "couple", "--sizes", "8,8,8", "--registers", "16x32")
    assert r.exit_code == 2 and "--registers goes with --jam auto" in r.stderr
    r = run_cli("tile", kernels, "--nest", "couple", "--sizes", "8,8,8", "--jam", "auto", "--registers", "16")
    assert r.exit_code == 2 and "COUNTxBYTES" in r.stderr
    r = run_cli("tile", kernels, "--nest", "couple", "--order", "j,i,k", "--jam", "auto")
    assert r.exit_code == 2 and "--jam auto needs tiles" in r.stderr
    r = run_cli("verify", kernels, "--nest", "couple", "--sizes", "8,8,8", "--jam", "auto")
    assert r.exit_code == 2 and "--jam auto" in r.stderr and "is for tile and simulate" in r.stderr


@pytest.mark.cc
def test_directive_jam_auto(tmp_path, monkeypatch):
    monkeypatch.setattr(regtile, "machine_registers", lambda: Registers(16, 32, "test"))
    src = tmp_path / "basin_dir.c"
    src.write_text(
        "void couple(int n, double C[n][n], const double A[n][n], const double B[n][n])\n{\n"
        "#pragma looptile tile(i=32, j=32, k=32) jam(auto)\n"
        "    for (int i = 0; i < n; i++)\n        for (int j = 0; j < n; j++)\n"
        "            for (int k = 0; k < n; k++)\n                C[i][j] += A[i][k] * B[k][j];\n}\n"
        "void lone(int n, double C[n][n])\n{\n#pragma looptile jam(auto)\n"
        "    for (int i = 0; i < n; i++)\n        for (int j = 0; j < n; j++)\n            C[i][j] += 1.0;\n}\n")
    out = tmp_path / "out"
    r = run_cli("apply", src, "-o", out, "--verify")
    assert r.exit_code == 1, r.stderr  # the second directive is an error
    text = (out / "basin_dir.c").read_text()
    # 16 registers of 32 bytes: the 4 x 8 block worked out in test_accumulator_block
    assert "--jam i=4,j=8 --scalarize" in _made_by(text) and "jam(auto)" in _made_by(text)
    assert "verdict: equal" in r.stderr
    assert re.search(r"basin_dir\.c:11:18: error: jam\(auto\) chooses a register tile inside tiles", r.stderr)
    assert "#pragma looptile jam(auto)" in text  # left as it was
