"""looptile verify and tile --verify.

Outside check: the system C compiler builds the original and the rewritten kernel (sanitizers on,
contraction off) and both run on identical inputs; the comparison is bit for bit.  The hand-written
tilings in tests/data are the independent witnesses that the check catches real mistakes.
"""
from __future__ import annotations

import shutil

import pytest
from conftest import SAMPLES, TESTS, run_cli

from looptile import emit

pytestmark = pytest.mark.cc
DATA = TESTS / "data"


def verdict(stdout: bytes) -> str:
    return stdout.decode().strip().splitlines()[-1]


@pytest.mark.parametrize("sample,nest,sizes", [
    ("tracer_mix.c", "mix_tracers", "8,8,8"),
    ("basin_relax.c", "relax_basin", "8,8"),
    ("grid_turn.c", "turn_grid", "4,4"),
    ("camera_blur.c", "blur_frame", "4,4"),
    ("gauge_cov.c", "gauge_cov", "i=4,j=4"),
])
def test_verify_passes_on_every_legal_sample(sample, nest, sizes):
    r = run_cli("verify", SAMPLES / sample, "--nest", nest, "--sizes", sizes)
    assert r.exit_code == 0, r.stdout_bytes.decode() + r.stderr
    lines = r.stdout_bytes.decode().strip().splitlines()
    # 0, 1, T-1, T, T+1 and two odd sizes for T = 4 or 8: 7 parameter sets, each a line.
    assert len(lines) == 8 and all(ln.endswith(": pass") for ln in lines[:-1]), lines
    assert lines[0].split(":")[0].endswith("=0") and verdict(r.stdout_bytes).startswith("verdict: equal")


def test_verify_of_a_refused_rewrite_is_the_refusal():
    r = run_cli("verify", SAMPLES / "shoal_sweep.c", "--nest", "sweep_shoal", "--sizes", "8,8")
    assert r.exit_code == 1
    assert "refused:" in r.stderr.split("\n")[0] and "flow dependence" in r.stderr


def test_an_off_by_one_remainder_written_by_hand_is_caught():
    r = run_cli("verify", DATA / "tide_smooth.c", "--against", DATA / "tide_smooth_wrong.c", "--func", "tide_smooth")
    assert r.exit_code == 1, r.stderr
    out = r.stdout_bytes.decode()
    assert verdict(r.stdout_bytes).startswith("verdict: DIFFERENT")
    # n = m = 1: the single column j = 0 is skipped (m - 1 = 0), so out[0][0] keeps its input value.
    assert "n=1 m=1: FAIL: out[0][0] differs: original" in out, out


def test_a_remainder_running_past_the_array_is_a_sanitizer_failure():
    r = run_cli("verify", DATA / "tide_smooth.c", "--against", DATA / "tide_smooth_overrun.c",
                "--func", "tide_smooth", "--params", "n=5,m=5")
    assert r.exit_code == 1, r.stderr
    out = r.stdout_bytes.decode()
    assert "n=5 m=5: FAIL: the hand-rewritten version trips a sanitizer" in out and "AddressSanitizer" in out


def test_a_correct_hand_tiling_passes():
    r = run_cli("verify", DATA / "tide_smooth.c", "--against", DATA / "tide_smooth_right.c", "--func", "tide_smooth")
    assert r.exit_code == 0, r.stdout_bytes.decode() + r.stderr


def test_tile_verify_writes_nothing_when_the_check_fails(tmp_path, monkeypatch):
    src = tmp_path / "tracer_mix.c"
    shutil.copy(SAMPLES / "tracer_mix.c", src)
    real = emit.render

    def off_by_one(template, **values):  # a deliberate emission bug: clamped tiles one short
        text = real(template, **values)
        return text.replace("< 8;", "< 7;") if template == "point_loop_clamp.c.j2" else text

    monkeypatch.setattr(emit, "render", off_by_one)
    out = tmp_path / "out.c"
    r = run_cli("tile", src, "--nest", "mix_tracers", "--sizes", "8,8,8", "--verify", "-o", out)
    assert r.exit_code == 1, r.stderr
    assert "verdict: DIFFERENT" in r.stderr and not out.exists()
    monkeypatch.setattr(emit, "render", real)
    r = run_cli("tile", src, "--nest", "mix_tracers", "--sizes", "8,8,8", "--verify", "-o", out)
    assert r.exit_code == 0 and out.exists() and "verdict: equal" in r.stderr


KERNELS = """\
/* Harbour camera: gain with a window offset, a column sum into a global, and a pointer kernel. */
#include <stddef.h>

static float frame[6][9];
static double column_sum[9];

void offset_gain(int n, int off, double out[n], const double in[n + 8])
{
    for (int i = 0; i < n; i++)
        out[i] = 2.0 * in[i + off];
}

void sum_columns(int h, int w)
{
    for (int y = 0; y < h; y++)
        for (int x = 0; x < w; x++)
            column_sum[x] += frame[y][x];
}

int shift_copy(int n, double *restrict dst, const double *restrict src)
{
    for (int i = 0; i < n; i++)
        dst[i] = src[i + 1];
    return n;
}

int main(void) { return 0; }
"""


def test_integer_parameters_outside_bounds_need_params(tmp_path):
    src = tmp_path / "kernels.c"
    src.write_text(KERNELS)
    r = run_cli("verify", src, "--against", src, "--func", "offset_gain")
    assert r.exit_code == 2
    assert "--params off=VALUE" in r.stderr
    r = run_cli("verify", src, "--against", src, "--func", "offset_gain", "--params", "off=3,n=5")
    assert r.exit_code == 0, r.stdout_bytes.decode() + r.stderr


def test_globals_pointers_and_return_values_are_compared(tmp_path):
    src = tmp_path / "kernels.c"
    src.write_text(KERNELS)
    # frame is 6 x 9: the sizes must stay inside it (the default sweep would not).
    r = run_cli("verify", src, "--nest", "sum_columns", "--sizes", "2,4", "--params", "h=5,w=9", "--params", "h=6,w=3")
    assert r.exit_code == 0, r.stdout_bytes.decode() + r.stderr  # frame and column_sum are set up and compared
    wrong = tmp_path / "wrong.c"
    wrong.write_text(KERNELS.replace("column_sum[x] += frame[y][x];", "column_sum[x] += frame[y][x] * 1.5f;")
                     .replace("return n;", "return n + 1;"))
    r = run_cli("verify", src, "--against", wrong, "--func", "sum_columns", "--params", "h=2,w=3")
    assert r.exit_code == 1 and "column_sum[0] differs" in r.stdout_bytes.decode()
    # The size of src is not declared: the harness allocates what the kernel touches (n + 1 elements).
    r = run_cli("verify", src, "--against", wrong, "--func", "shift_copy")
    assert r.exit_code == 1 and "return differs: original 2, rewritten 3" in r.stdout_bytes.decode()
    r = run_cli("verify", src, "--against", src, "--func", "shift_copy")
    assert r.exit_code == 0, r.stdout_bytes.decode() + r.stderr


def test_an_original_that_fails_is_not_blamed_on_the_rewrite(tmp_path):
    src = tmp_path / "kernels.c"
    src.write_text(KERNELS)
    # in[n + 8] holds n + 8 elements; an offset of 9 reads past it in the original already.
    r = run_cli("verify", src, "--against", src, "--func", "offset_gain", "--params", "off=9,n=4")
    assert r.exit_code == 2
    assert "the original itself trips a sanitizer" in r.stdout_bytes.decode()


def test_verify_usage_errors(tmp_path):
    r = run_cli("verify", SAMPLES / "tracer_mix.c")
    assert r.exit_code == 2 and "either --nest" in r.stderr
    r = run_cli("verify", SAMPLES / "tracer_mix.c", "--against", SAMPLES / "tracer_mix.c")
    assert r.exit_code == 2 and "--func" in r.stderr
    r = run_cli("verify", SAMPLES / "tracer_mix.c", "--against", SAMPLES / "tracer_mix.c", "--func", "nope")
    assert r.exit_code == 2 and "no function 'nope'" in r.stderr
    r = run_cli("verify", SAMPLES / "tracer_mix.c", "--nest", "mix_tracers", "--sizes", "8", "--params", "n")
    assert r.exit_code == 2 and "NAME=INTEGER" in r.stderr
