"""Full unrolling (`unroll --full`, and `#pragma omp unroll full` through apply).

OpenMP API 5.1, section 2.11.9.2 (the unroll construct; section number from memory): with the
full clause the loop is completely unrolled, and its iteration count must be a compile-time
constant. Outside check for every rewrite: the system C compiler through `--verify` (both
versions sanitized, compared bit for bit). Kernels: an invented harbour-camera pipeline.
"""
from __future__ import annotations

from pathlib import Path

import pytest
from conftest import headline, run_cli

pytestmark = pytest.mark.cc

SRC = """\
/* Three-tap horizontal blur of one camera row. */
void blur_row(int n, double out[n], const double in[n + 2])
{
    for (int x = 0; x < n; x++) {
        double s = 0.0;
        for (int t = 0; t < 3; t++) /* the three taps */
            s += in[x + t] * 0.25;
        out[x] = s;
    }
}

/* Odd lens coefficients, counting down by two; the index is used after the loop. */
void lens(double w[8])
{
    int q;
    for (q = 7; q >= 1; q -= 2)
        w[q] = w[q] * 0.5 + q;
    w[0] = q;
}

/* A loop that never runs. */
void none(double w[4])
{
    for (int q = 4; q < 2; q++)
        w[q] = 0.0;
}
"""


@pytest.fixture
def src(tmp_path: Path) -> Path:
    p = tmp_path / "lens.c"
    p.write_text(SRC)
    return p


@pytest.mark.parametrize("sel,copies", [("L6", 3), ("lens", 4), ("none", 0)])
def test_full_unrolling_computes_the_same(src, tmp_path, sel, copies):
    out = tmp_path / "out.c"
    r = run_cli("unroll", src, "--nest", sel, "--full", "--verify", "-o", out)
    assert r.exit_code == 0, r.stderr
    # outside check: the system C compiler, both versions sanitized, compared bit for bit
    assert "verdict: equal" in r.stderr
    text = out.read_text()
    assert "fully: one copy of its body per iteration" in text
    region = text.split("made by:")[1].split("\n}")[0]
    assert "for (" not in region.split("*/", 1)[1] or sel == "L6"


def test_full_unrolling_text(src, tmp_path):
    out = tmp_path / "out.c"
    assert run_cli("unroll", src, "--nest", "lens", "--full", "-o", out).exit_code == 0
    text = out.read_text()
    assert "q = 7;\n        w[q] = w[q] * 0.5 + q;\n        w[q - 2] = w[q - 2] * 0.5 + (q - 2);" in text
    assert "q = -1;" in text  # the value the loop leaves in q: 7, 5, 3, 1, then -1


def test_full_unrolling_needs_a_constant_trip_count(src, tmp_path):
    out = tmp_path / "out.c"
    r = run_cli("unroll", src, "--nest", "blur_row", "--full", "-o", out)
    assert r.exit_code == 1 and not out.exists()
    m = headline(r.stderr)
    assert m.group("kind") == "refused" and m.group("line") == "4"
    assert "needs a constant trip count, and the bounds of 'x' use 'n'" in r.stderr


def test_omp_unroll_full_directive(tmp_path):
    p = tmp_path / "fade.c"
    p.write_text("void fade(double w[8])\n{\n    #pragma omp unroll full\n    for (int q = 0; q < 4; q++)\n"
                 "        w[q] *= 0.5;\n}\n")
    r = run_cli("apply", p, "--in-place", "--jobs", "1")
    assert r.exit_code == 0, r.stderr
    text = p.read_text()
    assert "\n    #pragma" not in text and "w[q + 3] *= 0.5;" in text
    r = run_cli("apply", p, "--in-place", "--jobs", "1")  # carried out once: nothing left to do
    assert r.exit_code == 0 and p.read_text() == text


def test_factor_or_full(src):
    r = run_cli("unroll", src, "--nest", "lens")
    assert r.exit_code == 2
    r = run_cli("unroll", src, "--nest", "lens", "--full", "--factor", "2")
    assert r.exit_code == 2
