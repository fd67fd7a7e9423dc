"""Several levels of tiles (repeatable --sizes) and unroll-and-jam inside tiles (tile --jam).

Outside check for every rewrite: the system C compiler through `--verify` (both versions built
with -O1 -ffp-contract=off and the address and undefined-behaviour sanitizers, run over sizes
around every tile size and factor -- 0, 1, T-1, T, T+1 and odd sizes -- and compared bit for
bit). Legality verdicts are compared with the textbook rule for tiling (Wolfe, "High
Performance Compilers for Parallel Computing", tiling chapter, from memory: tiling is legal for
every size when all distances are componentwise non-negative) and with a brute-force
enumeration of the emitted order written here in Python.

The kernels belong to an invented tidal-basin model.
"""
from __future__ import annotations

import itertools
import re
from pathlib import Path

import pytest
from conftest import headline, run_cli

pytestmark = pytest.mark.cc

KERNELS = """\
#include <stddef.h>

/* Coupling of basin cells: C += A * B. */
void couple(int n, int m, int p, double C[n][m], const double A[n][p], const double B[p][m])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            for (int k = 0; k < p; k++)
                C[i][j] += A[i][k] * B[k][j];
}

/* Sweep of the sea level with a (1, 0) and a (0, 1) dependence (a wavefront). */
void settle(int n, int m, double h[n][m])
{
    for (int i = 1; i < n; i++)
        for (int j = 1; j < m; j++)
            h[i][j] = 0.5 * (h[i - 1][j] + h[i][j - 1]);
}

/* An in-place update with the distance (1, -1). */
void drift(int n, int m, double h[n][m])
{
    for (int i = 1; i < n; i++)
        for (int j = 0; j < m - 1; j++)
            h[i][j] = h[i - 1][j + 1] + 0.25;
}

/* Down-counting and stepped loops. */
void ebb(int n, int m, double out[n][m], const double in[n][m])
{
    for (int i = n - 1; i >= 0; i--)
        for (size_t j = 0; j < (size_t)m; j += 2)
            out[i][j] = in[i][j] * 2.0 + 1.0;
}
"""


@pytest.fixture
def kernels(tmp_path: Path) -> Path:
    path = tmp_path / "basin.c"
    path.write_text(KERNELS)
    return path


def verified(path: Path, tmp_path: Path, *args: str) -> str:
    out = tmp_path / "out.c"
    r = run_cli("tile", path, *args, "--verify", "-o", out)
    assert r.exit_code == 0, r.stderr
    # outside check: the system C compiler, both versions sanitized, compared bit for bit
    assert "verdict: equal" in r.stderr, r.stderr
    return out.read_text()


@pytest.mark.parametrize("args", [
    ("--nest", "couple", "--sizes", "8,8,8", "--sizes", "4,2,4"),
    ("--nest", "couple", "--sizes", "i=12,j=8,k=8", "--sizes", "i=4,k=2", "--order", "ii,kk,jj,i.2,k.2,j,i,k"),
    ("--nest", "couple", "--sizes", "8,8,8", "--sizes", "4,4,4", "--sizes", "2,2,2", "--remainder", "clamp"),
    ("--nest", "settle", "--sizes", "6,6", "--sizes", "3,2"),
    ("--nest", "ebb", "--sizes", "8,4", "--sizes", "2,2"),
], ids=["couple-2-levels", "couple-partial-level", "couple-3-levels-clamp", "settle-wavefront", "ebb-down-step"])
def test_multilevel_rewrites_compute_the_same(kernels, tmp_path, args):
    text = verified(kernels, tmp_path, *args)
    assert "ii" in text and "iii" in text


def test_multilevel_loop_shapes(kernels, tmp_path):
    text = verified(kernels, tmp_path, "--nest", "couple", "--sizes", "8,8,8", "--sizes", "4,4,4")
    # the level-2 tile loop starts at the level-1 tile and stops at its end or the bound
    assert "for (int iii = ii; iii < n && iii - ii < 8; iii = (n - iii > 4) ? iii + 4 : n)" in text
    # the point loops of whole tiles run over the innermost tiles
    assert "for (int i = iii; i < iii + 4; i++)" in text
    order = re.findall(r"for \(int (\w+) =", text.split("/* looptile")[1])
    assert order[:6] == ["ii", "jj", "kk", "iii", "jjj", "kkk"]


def _tiling_keeps_order(n: int, m: int, sizes: list[tuple[int, int]], dist: tuple[int, int]) -> bool:
    """Brute force (no isl): for h[i][j] = f(h[i - di][j - dj]) on 1 <= i < n, 0 <= j < m - 1
    (for dj < 0), is every source still run before its sink when both loops are tiled at
    every level of ``sizes`` (nested grids from the loops' starts), the levels outermost first?"""
    di, dj = dist
    lo_i, lo_j = 1, (1 if dj > 0 else 0)
    hi_j = m - 1 if dj < 0 else m

    def key(i: int, j: int) -> tuple[int, ...]:
        return tuple(x for ti, tj in sizes for x in ((i - lo_i) // ti, (j - lo_j) // tj)) + (i, j)

    for i, j in itertools.product(range(lo_i, n), range(lo_j, hi_j)):
        si, sj = i - di, j - dj
        if lo_i <= si < n and lo_j <= sj < hi_j and not key(si, sj) < key(i, j):
            return False
    return True


@pytest.mark.parametrize("func,dist,legal", [("settle", (1, 0), True), ("drift", (1, -1), False)])
def test_multilevel_legality(kernels, tmp_path, func, dist, legal):
    sizes = [(4, 4), (2, 2)]
    want = all(_tiling_keeps_order(n, m, sizes, dist) for n in range(1, 12) for m in range(1, 12))
    # outside check: brute-force enumeration (above) and the textbook rule (module docstring)
    assert want == legal == all(x >= 0 for x in dist)
    out = tmp_path / "out.c"
    r = run_cli("tile", kernels, "--nest", func, "--sizes", "4,4", "--sizes", "2,2", "-o", out)
    if legal:
        assert r.exit_code == 0, r.stderr
    else:
        assert r.exit_code == 1 and not out.exists()
        assert headline(r.stderr).group("kind") == "refused"
        assert "would run" in r.stderr and "flow dependence" in r.stderr


@pytest.mark.parametrize("args,message", [
    (("--sizes", "8,8", "--sizes", "3,8"), "does not divide its size 8"),
    (("--sizes", "i=8", "--sizes", "j=4"), "which the first --sizes does not tile"),
    (("--sizes", "8,8", "--sizes", "4,4", "--order", "iii,ii,jj,jjj,i,j"), "outside the level-1 tile loop 'ii'"),
    (("--sizes", "8,8", "--sizes", "4,4", "--order", "ii,jj,iii,i,j"), "missing: jjj"),
    (("--sizes", "8,8", "--sizes", "0,4"), "at least 1"),
])
def test_multilevel_usage_errors(kernels, tmp_path, args, message):
    out = tmp_path / "out.c"
    r = run_cli("tile", kernels, "--nest", "couple", *args, "-o", out)
    assert r.exit_code == 2, r.stderr
    assert message in r.stderr
    assert not out.exists()


@pytest.mark.parametrize("args", [
    ("--nest", "couple", "--sizes", "8,8,8", "--jam", "i=2,j=4", "--scalarize"),
    ("--nest", "couple", "--sizes", "8,8,8", "--order", "jj,kk,ii,i,j,k", "--jam", "i=4,j=2", "--scalarize",
     "--remainder", "clamp"),
    ("--nest", "couple", "--sizes", "8,8,8", "--sizes", "4,4,4", "--jam", "i=2,j=2"),
    ("--nest", "settle", "--sizes", "4,4", "--jam", "i=2"),
    ("--nest", "ebb", "--sizes", "4,4", "--jam", "i=2,j=2"),
], ids=["couple-scalarize", "couple-order-clamp", "couple-two-levels", "settle", "ebb-down-step"])
def test_tile_and_jam_rewrites_compute_the_same(kernels, tmp_path, args):
    text = verified(kernels, tmp_path, *args)
    assert "then unrolled" in text


def test_tile_and_jam_keeps_accumulators_in_locals(kernels, tmp_path):
    text = verified(kernels, tmp_path, "--nest", "couple", "--sizes", "8,8,8", "--jam", "i=2,j=2", "--scalarize")
    assert "double C_0 = C[i][j];" in text and "C[i + 1][j + 1] = C_3;" in text
    # in partial tiles the loads and stores happen only when the innermost loop runs
    assert "if (kk < p) {" in text


def test_tile_and_jam_is_refused_where_jamming_breaks_a_dependence(kernels, tmp_path):
    # drift has the distance (1, -1): tiling j alone keeps it (the i loop stays outside), but
    # jamming i by 2 into j would run (i+1, j) before (i, j+1), which writes what it reads.
    out = tmp_path / "out.c"
    r = run_cli("tile", kernels, "--nest", "drift", "--sizes", "j=4", "--jam", "i=2", "-o", out)
    assert r.exit_code == 2, r.stderr  # i runs outside the tiles: not a loop inside them
    assert "does not run inside the tiles" in r.stderr
    r = run_cli("tile", kernels, "--nest", "drift", "--sizes", "4,4", "--order", "ii,jj,i,j", "--jam", "i=2",
                "-o", out)
    assert r.exit_code == 1 and not out.exists(), r.stderr  # the (1, -1) dependence forbids the tiling already
    assert "flow dependence" in r.stderr


def test_tile_jam_factor_must_divide_the_tile(kernels, tmp_path):
    r = run_cli("tile", kernels, "--nest", "couple", "--sizes", "8,8,8", "--jam", "i=3", "-o", tmp_path / "o.c")
    assert r.exit_code == 2 and "not a multiple of its jam factor 3" in r.stderr
