"""Reductions by consent (--reassociate NAME): which accumulations may be reordered, the
refusals for everything that cannot be proven, and compile-and-run checks within the tolerance.

Sources named in the checks: the C standard (C11 6.2.5p9: unsigned arithmetic is modular;
6.5p5: signed overflow is undefined), the error bound of recursive summation (Higham,
"Accuracy and Stability of Numerical Algorithms", section 4.2, from memory), and the system C
compiler (original and rewritten built and run under the sanitizers)."""
from __future__ import annotations

import re
from fractions import Fraction
from pathlib import Path

import pytest
from conftest import build, headline, run_cli, run_program

from looptile import reduction
from looptile.flags import CompileFlags
from looptile.pipeline import load
from looptile.tolerance import DEFAULT_TERMS, default_tolerance

RAIN = """\
/* Tidal-basin model: rainfall per cell, in the basin's units (a third), summed. */
double rain_total(int n, int m, const double rain[n][m])
{
    double s = 0.0;
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            s = s + rain[i][j] / 3.0;
    return s;
}
"""

DIAGONAL = """\
/* Harbour cameras: brightness summed along the anti-diagonals of a frame, in lux (/ 7). */
void diagonal_light(int n, int m, const double frame[n][m], double band[n + m])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            band[i + j] += frame[i][j] / 7.0;
}
"""

COUNTS = """\
/* Harbour cameras: boats counted per frame, summed over the day (unsigned and signed). */
unsigned boats_seen(int n, int m, const unsigned marks[n][m])
{
    unsigned c = 0;
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            c += marks[i][j];
    return c;
}

int net_moorings(int n, int m, const int delta[n][m])
{
    int c = 0;
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            c += delta[i][j];
    return c;
}

int tenths(int n, int m, const double level[n][m])
{
    int c = 0;
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            c += level[i][j] * 10.0;
    return c;
}

unsigned short short_tally(int n, int m, const int marks[n][m])
{
    unsigned short c = 0;
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            c += marks[i][j];
    return c;
}
"""

REFUSED = """\
/* Tidal-basin model: shapes of accumulation that consent must not make legal. */
void running_level(int n, int m, const double a[n][m], double b[n][m], double s[1])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++) {
            s[0] += a[i][j];
            b[i][j] = s[0];
        }
}

void chained(int n, int m, const double a[n][m], double out[2])
{
    double s = 0.0, t = 0.0;
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++) {
            s += t;
            t += a[i][j];
        }
    out[0] = s;
    out[1] = t;
}

double product(int n, int m, const double a[n][m])
{
    double p = 1.0;
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            p *= a[i][j];
    return p;
}

void self_read(int n, int m, double y[n + m])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            y[i + j] += y[i + j + 1];
}
"""

TWO_UPDATES = """\
/* Tidal-basin model: inflow minus outflow of the basin, one statement each. */
double net_flow(int n, int m, const double in[n][m], const double out[n][m])
{
    double s = 0.0;
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++) {
            s += in[i][j] / 3.0;
            s -= out[i][j] / 5.0;
        }
    return s;
}
"""


def write(tmp_path: Path, name: str, text: str) -> Path:
    p = tmp_path / name
    p.write_text(text)
    return p


def guard_of(out: str) -> str:
    m = re.search(r"/\* looptile:.*?\*/", out, re.S)
    assert m, out
    return m.group(0)


# ---------------------------------------------------------------- consent and refusals

def test_float_accumulation_needs_consent_and_says_how(tmp_path):
    src = write(tmp_path, "rain.c", RAIN)
    r = run_cli("tile", src, "--nest", "rain_total", "--sizes", "4,4")
    assert r.exit_code == 1, r.stderr
    assert headline(r.stderr)["kind"] == "refused"
    assert "rounding" in r.stderr and "--reassociate s" in r.stderr, r.stderr
    r = run_cli("tile", src, "--nest", "rain_total", "--sizes", "4,4", "--reassociate", "s")
    assert r.exit_code == 0, r.stderr
    assert "may differ in the last bits" in guard_of(r.stdout)
    assert "--reassociate s" in guard_of(r.stdout)  # the recorded command reproduces the rewrite
    assert re.search(r"rain\.c:5:5: note: results of 's' may differ in the last bits", r.stderr), r.stderr


def test_array_accumulation_needs_consent(tmp_path):
    src = write(tmp_path, "diag.c", DIAGONAL)
    # band[i + j]: distance (1, -1) between updates of one element, so the interchange reorders them
    r = run_cli("tile", src, "--nest", "diagonal_light", "--order", "j,i")
    assert r.exit_code == 1 and "--reassociate band" in r.stderr, r.stderr
    r = run_cli("tile", src, "--nest", "diagonal_light", "--order", "j,i", "--reassociate", "band")
    assert r.exit_code == 0, r.stderr
    assert "results of band may differ in the last bits" in guard_of(r.stdout)


def test_unsigned_accumulation_needs_no_consent(tmp_path):
    # C11 6.2.5p9: unsigned arithmetic is modular, so every order gives the same result
    src = write(tmp_path, "counts.c", COUNTS)
    r = run_cli("tile", src, "--nest", "boats_seen", "--order", "j,i")
    assert r.exit_code == 0, r.stderr
    assert "modular" in guard_of(r.stdout) and "modular" in r.stderr


def test_signed_accumulation_needs_consent_recorded_as_an_assertion(tmp_path):
    # C11 6.5p5: a partial sum that overflows in the new order is undefined behaviour
    src = write(tmp_path, "counts.c", COUNTS)
    r = run_cli("tile", src, "--nest", "net_moorings", "--order", "j,i")
    assert r.exit_code == 1, r.stderr
    assert "overflow" in r.stderr and "--reassociate c" in r.stderr, r.stderr
    r = run_cli("tile", src, "--nest", "net_moorings", "--order", "j,i", "--reassociate", "c")
    assert r.exit_code == 0, r.stderr
    g = " ".join(guard_of(r.stdout).split())
    assert "no partial sum of the signed integer accumulation into c overflows" in g
    assert "asserted by the user" in g


def test_unsigned_short_adds_in_int_so_it_needs_consent(tmp_path):
    # common practice (C11 6.3.1.1 promotions): c + marks[i][j] is computed in int, which can overflow
    src = write(tmp_path, "counts.c", COUNTS)
    r = run_cli("tile", src, "--nest", "short_tally", "--order", "j,i")
    assert r.exit_code == 1 and "--reassociate c" in r.stderr, r.stderr


def test_integer_with_floating_term_is_not_a_reduction(tmp_path):
    src = write(tmp_path, "counts.c", COUNTS)
    r = run_cli("tile", src, "--nest", "tenths", "--order", "j,i", "--reassociate", "c")
    assert r.exit_code == 2, r.stderr
    h = headline(r.stderr)
    assert h["kind"] == "error" and "--reassociate c" in h["msg"] and "rounds to an integer" in h["msg"]


@pytest.mark.parametrize("func, name, why", [
    ("product", "p", "only sums"),
    ("self_read", "y", "other than by reading and writing the one element"),
    ("running_level", "q", "no statement of the nest adds to it"),
])
def test_consent_for_what_is_not_an_accumulation_is_a_usage_error(tmp_path, func, name, why):
    src = write(tmp_path, "refused.c", REFUSED)
    before = src.read_bytes()
    r = run_cli("tile", src, "--nest", func, "--order", "j,i", "--reassociate", name, "--in-place")
    assert r.exit_code == 2, r.stderr
    h = headline(r.stderr)
    assert h["kind"] == "error" and f"--reassociate {name}" in h["msg"] and why in h["msg"], r.stderr
    assert src.read_bytes() == before


@pytest.mark.parametrize("func, args, element", [
    # s[0] is read by b[i][j] = s[0] after every update: reordering would change what b sees
    ("running_level", ("--reassociate", "s"), "s[0]"),
    # s += t reads t, which is not an update of t: the dependences on t stay
    ("chained", ("--reassociate", "s", "--reassociate", "t"), "t"),
])
def test_consent_that_does_not_suffice_is_the_normal_refusal(tmp_path, func, args, element):
    src = write(tmp_path, "refused.c", REFUSED)
    before = src.read_bytes()
    r = run_cli("tile", src, "--nest", func, "--order", "j,i", *args, "--in-place")
    assert r.exit_code == 1, r.stderr
    h = headline(r.stderr)
    assert h["kind"] == "refused" and element in h["msg"], r.stderr
    assert "flow dependence" in h["msg"] or "anti dependence" in h["msg"], r.stderr
    assert src.read_bytes() == before


def test_two_statements_updating_one_sum_are_one_accumulation(tmp_path):
    src = write(tmp_path, "net.c", TWO_UPDATES)
    r = run_cli("tile", src, "--nest", "net_flow", "--order", "j,i")
    assert r.exit_code == 1, r.stderr
    r = run_cli("tile", src, "--nest", "net_flow", "--order", "j,i", "--reassociate", "s")
    assert r.exit_code == 0, r.stderr


def test_jam_and_unroll_take_the_consent(tmp_path):
    src = write(tmp_path, "rain.c", RAIN)
    r = run_cli("jam", src, "--nest", "rain_total", "--factors", "i=2")
    assert r.exit_code == 1 and "--reassociate s" in r.stderr, r.stderr
    r = run_cli("jam", src, "--nest", "rain_total", "--factors", "i=2", "--reassociate", "s")
    assert r.exit_code == 0 and "may differ in the last bits" in r.stderr, r.stderr
    # plain unrolling keeps the order: nothing is reassociated, nothing to say
    r = run_cli("unroll", src, "--nest", "L6", "--factor", "2", "--reassociate", "s")
    assert r.exit_code == 0, r.stderr
    assert "last bits" not in r.stderr and "last bits" not in guard_of(r.stdout)
    r = run_cli("unroll", src, "--nest", "L6", "--factor", "2", "--reassociate", "rain")
    assert r.exit_code == 2, r.stderr


# ---------------------------------------------------------------- verify within the tolerance

def test_default_tolerance_is_the_summation_bound():
    # Higham 4.2 (from memory): two orders of n terms differ by at most 2 gamma_n sum|x|, u = 2^-53
    u = 2.0 ** -53
    assert default_tolerance(8) == pytest.approx(2 * DEFAULT_TERMS * u / (1 - DEFAULT_TERMS * u))
    assert default_tolerance(4) == pytest.approx(2 * DEFAULT_TERMS * 2.0 ** -24, rel=1e-3)


@pytest.mark.cc
def test_verify_compares_reassociated_values_within_the_tolerance(tmp_path):
    src = write(tmp_path, "rain.c", RAIN)
    args = ("verify", src, "--nest", "rain_total", "--sizes", "4,4", "--reassociate", "s")
    r = run_cli(*args)
    assert r.exit_code == 0, r.stdout
    assert "within the default tolerance" in r.stdout and "(return)" in r.stdout
    # the rewrite does round differently: bit for bit (tolerance 0) it fails, so the bound is exercised
    r = run_cli(*args, "--tolerance", "0")
    assert r.exit_code == 1, r.stdout
    assert "return differs by more than the tolerance" in r.stdout


@pytest.mark.cc
def test_verify_array_accumulation_and_everything_else_bit_for_bit(tmp_path):
    src = write(tmp_path, "diag.c", DIAGONAL)
    r = run_cli("verify", src, "--nest", "diagonal_light", "--order", "j,i", "--reassociate", "band")
    assert r.exit_code == 0, r.stdout
    assert "reassociated values (band)" in r.stdout
    r = run_cli("verify", src, "--nest", "diagonal_light", "--order", "j,i", "--reassociate", "band",
                "--tolerance", "0")
    assert r.exit_code == 1 and "band[" in r.stdout, r.stdout


@pytest.mark.cc
def test_verify_catches_a_lost_term_despite_the_tolerance(tmp_path):
    src = write(tmp_path, "rain.c", RAIN)
    # a hand "reassociation" that skips the last column: a wrong program, not a rounding difference
    wrong = write(tmp_path, "wrong.c", RAIN.replace("j < m; j++", "j < m - 1; j++"))
    r = run_cli("verify", src, "--against", wrong, "--func", "rain_total", "--reassociate", "s")
    assert r.exit_code == 1, r.stdout
    assert "differs by more than the tolerance" in r.stdout
    # the same order as the original passes bit for bit, so the comparison is not vacuous
    same = write(tmp_path, "same.c", RAIN)
    r = run_cli("verify", src, "--against", same, "--func", "rain_total", "--reassociate", "s", "--tolerance", "0")
    assert r.exit_code == 0, r.stdout


@pytest.mark.cc
def test_tile_verify_with_reassociation(tmp_path):
    src = write(tmp_path, "net.c", TWO_UPDATES)
    r = run_cli("tile", src, "--nest", "net_flow", "--sizes", "3,5", "--reassociate", "s", "--verify")
    assert r.exit_code == 0, r.stderr
    assert "verdict: equal" in r.stderr and "within" in r.stderr


def test_bound_source_adds_absolute_values(tmp_path):
    text = """\
double accumulate(int n, const double a[n], double y[2])
{
    double s = -1.5, t;
    t = -2.0;
    for (int i = 0; i < n; i++) {
        s -= a[i];
        s = s + a[i] * 2.0;
        t = a[i] + t;
        y[0] += a[i];
        s++;
        s--;
    }
    return s + t;
}
"""
    src = write(tmp_path, "acc.c", text)
    tu = load(str(src), CompileFlags())
    out = reduction.bound_source(tu, "accumulate", ("s", "t", "y")).decode("latin-1")
    body = out.split("#line 1\n", 1)[1]
    assert "double s = looptile_abs(-1.5), t;" in body
    assert "t = looptile_abs(-2.0);" in body
    assert "s += looptile_abs(a[i]);" in body
    assert "s = s + looptile_abs(a[i] * 2.0);" in body
    assert "t = looptile_abs(a[i]) + t;" in body
    assert "y[0] += looptile_abs(a[i]);" in body
    assert body.count("s++;") == 2 and "s--" not in body
    assert "return s + t;" in body


# ---------------------------------------------------------------- outside reference: cc, by hand

DRIVER = """
#include <stdio.h>
#include <math.h>
int main(void)
{
    enum { N = 23, M = 19 };
    static double frame[N][M], band[N + M];
    unsigned long long x = 7;
    for (int i = 0; i < N; i++)
        for (int j = 0; j < M; j++) {
            x = x * 6364136223846793005ULL + 1442695040888963407ULL;
            frame[i][j] = ((double)(x >> 11) / 9007199254740992.0 - 0.5) * ldexp(1.0, (int)(x % 9) - 4);
        }
    diagonal_light(N, M, frame, band);
    for (int k = 0; k < N + M; k++)
        printf("%a %a\\n", band[k], 0.0);
    for (int i = 0; i < N; i++)
        for (int j = 0; j < M; j++)
            printf("%a %a\\n", 0.0, fabs(frame[i][j] / 7.0));
    return 0;
}
"""


@pytest.mark.cc
def test_reassociated_rewrite_runs_within_the_bound_under_the_sanitizers(tmp_path, cc):
    """Independent of looptile's harness: the original and the tiled diagonal sums built with the
    system compiler under -fsanitize=address,undefined, the bound sum|terms| computed here."""
    src = write(tmp_path, "diag.c", DIAGONAL)
    r = run_cli("tile", src, "--nest", "diagonal_light", "--sizes", "4,4", "--order", "jj,ii,j,i",
                "--reassociate", "band")
    assert r.exit_code == 0, r.stderr
    outs = []
    for label, text in (("orig", DIAGONAL), ("new", r.stdout)):
        prog = write(tmp_path, f"{label}.c", text + DRIVER)
        build(prog, tmp_path / f"{label}.exe", ["-ffp-contract=off"])
        outs.append(run_program(tmp_path / f"{label}.exe").split("\n"))
    n, m = 23, 19
    orig = [float.fromhex(ln.split()[0]) for ln in outs[0][: n + m]]
    new = [float.fromhex(ln.split()[0]) for ln in outs[1][: n + m]]
    terms = [float.fromhex(ln.split()[1]) for ln in outs[0][n + m: n + m + n * m]]
    bound = [Fraction(0)] * (n + m)
    for i in range(n):
        for j in range(m):
            bound[i + j] += Fraction(terms[i * m + j])
    differ = 0
    for k in range(n + m):
        # at most min(n, m) terms per element: Higham 4.2 (from memory), two orders: 2 gamma_{n-1}
        gamma = Fraction(2 * min(n, m)) * Fraction(2.0 ** -53)
        assert abs(Fraction(orig[k]) - Fraction(new[k])) <= gamma * bound[k], k
        differ += orig[k] != new[k]
    assert differ > 0  # the tiled order does round differently: the check is not vacuous
