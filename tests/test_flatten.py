"""Flattened arrays (``A[i*ld + j]``), struct fields and file-scope arrays.

Outside references: the system C compiler runs the original kernels and each rewrite on the
same inputs (sizes where the rows hold the loops' ranges and sizes where they do not, so both
sides of the run-time test run) and the outputs are compared bit for bit under the address and
undefined-behaviour sanitizers; the exact comparisons printed for run-time tests are checked
against Python's integers by compiling them for edge values of every integer type.
"""
from __future__ import annotations

import itertools
import re

import pytest
from conftest import TESTS, compile_and_run, headline, run_cli

from looptile.ctest import at_most, condition, nonnegative
from looptile.ctype import CType
from looptile.model import Affine, Param

FLAT = TESTS / "flat"
KERNELS = FLAT / "basin_flat.c"
REFUSED = FLAT / "refused.c"

TYPES = {
    "int": CType("int", True, 32, 3, spelling="int"),
    "unsigned": CType("int", False, 32, 3, spelling="unsigned"),
    "long": CType("int", True, 64, 4, spelling="long"),
    "unsigned long": CType("int", False, 64, 4, spelling="unsigned long"),
}


def _edge_values(t: CType) -> list[int]:
    lo, hi = (-(2 ** (t.bits - 1)), 2 ** (t.bits - 1) - 1) if t.signed else (0, 2 ** t.bits - 1)
    return sorted(v for v in {lo, lo + 1, lo + 2, -3, -1, 0, 1, 2, 3, hi - 2, hi - 1, hi} if lo <= v <= hi)


def _literal(v: int, t: CType) -> str:
    if v == -(2 ** 63):
        return "(-9223372036854775807LL - 1)"
    return f"({v}LL)" if t.signed else f"({v}ULL)"


def test_printed_tests_are_exact_for_every_integer_type(cc, tmp_path):
    """x <= y + c and the other printed forms, for edge values of int, unsigned, long and
    unsigned long: the C expression must be true exactly when the integer condition holds, and
    never overflow (UBSan would stop the program)."""
    lines = ["#include <stdio.h>", "int main(void) {", "  int bad = 0;"]
    cases = 0
    for (nx, tx), (ny, ty) in itertools.product(TYPES.items(), repeat=2):
        for c in (-3, -1, 0, 1, 3):
            x, y = Param("x", "x", tx, "variable"), Param("y", "y", ty, "variable")
            forms = [(at_most(x, y, c), lambda a, b, c=c: a <= b + c)]
            # a single parameter against a constant, and a sum of two 32-bit parameters
            forms.append((nonnegative(Affine.of(c, x=1), {"x": x}), lambda a, b, c=c: a + c >= 0))
            if tx.bits == ty.bits == 32:
                forms.append((nonnegative(Affine.of(c, x=2, y=-3), {"x": x, "y": y}),
                              lambda a, b, c=c: 2 * a - 3 * b + c >= 0))
            for text, truth in forms:
                assert text is not None
                for a in _edge_values(tx):
                    for b in _edge_values(ty):
                        cases += 1
                        lines.append(f"  {{ {tx.spelling} x = ({tx.spelling}){_literal(a, tx)}; "
                                     f"{ty.spelling} y = ({ty.spelling}){_literal(b, ty)}; (void)x; (void)y; "
                                     f"if ((({text}) ? 1 : 0) != {int(truth(a, b))}) {{ bad++; "
                                     f"printf(\"%s | {nx} {a} {ny} {b}\\n\", \"{text}\"); }} }}")
    lines += ['  printf("bad=%d\\n", bad);', "  return 0;", "}"]
    src = tmp_path / "exact.c"
    src.write_text("\n".join(lines) + "\n")
    out = compile_and_run(src, tmp_path, extra=("-Wno-type-limits",))
    assert out.strip().splitlines()[-1] == "bad=0", out[-2000:]
    assert cases > 2000


def test_condition_joins_disjunctions_and_drops_trivial_parts():
    n = Param("n", "n", TYPES["int"], "variable")
    ld = Param("ld", "ld", TYPES["int"], "variable")
    ps = {"n": n, "ld": ld}
    assert condition([[(Affine.of(0, ld=1, n=-1), False)]], ps) == "n <= ld"
    both = condition([[(Affine.of(0, n=-1), False)], [(Affine.of(0, ld=1, n=-1), False)]], ps)
    assert both == "(n <= 0 || n <= ld)"
    assert condition([[(Affine.of(5), False)]], ps) == "1"
    # a coefficient of 2 on a 64-bit parameter cannot be printed without overflow: None
    wide = Param("m", "m", TYPES["unsigned long"], "variable")
    assert nonnegative(Affine.of(0, m=2, n=-1), {"m": wide, "n": n}) is None


# ---------------------------------------------------------------- compile and run

# (function, tile arguments, what the guard comment must say, C test of the versioned output)
REQUESTS = [
    ("spread_rows", ("--sizes", "4,3"), "reads B as rows of ld, A as rows of ld", "if (m <= ld && n <= ld) {"),
    ("spread_rows", ("--sizes", "4,3", "--order", "jj,ii,i,j"), "stays in its row when", "if (m <= ld && n <= ld)"),
    ("settle", ("--sizes", "3,4", "--order", "jj,ii,i,j"), "A flow (1, 0)", "if (n <= ld) {"),
    ("layers", ("--sizes", "2,3,2", "--order", "kk,jj,ii,i,j,k"), "rows of q x r", None),
    ("shift_in_row", ("--sizes", "3,2", "--order", "jj,ii,j,i"), "stays in its row when",
     "if ((long long)m <= (long long)ld - 1"),
    ("mirror", ("--sizes", "4,4", "--order", "jj,ii,i,j"), "stays in its row: proven", None),
    ("two_ld", ("--sizes", "3,3", "--order", "jj,ii,i,j"), "A as rows of lda", "if (n <= ldb && m <= lda)"),
    ("spread_wide", ("--sizes", "4,4"), "rows of ld",
     "if (((long long)n < 0 || (unsigned long long)n <= (unsigned long long)ld)) {"),
    ("basin_depth", ("--sizes", "4,4", "--order", "jj,ii,i,j"), "g->depth as rows of g->nx", None),
    ("tide_step", ("--sizes", "4,4", "--order", "jj,ii,i,j"), "tide flow (1, 0)", None),
    ("from_first_row", ("--sizes", "4,4", "--order", "jj,ii,i,j"), "no dependences", "if (n <= ld) {"),
]


@pytest.fixture(scope="module")
def original_output(tmp_path_factory):
    work = tmp_path_factory.mktemp("flat-original")
    return compile_and_run(KERNELS, work, name="original")


@pytest.mark.parametrize("func,args,says,test", REQUESTS, ids=[f"{r[0]}-{k}" for k, r in enumerate(REQUESTS)])
def test_rewrite_runs_like_the_original(cc, tmp_path, original_output, func, args, says, test):
    out = tmp_path / "rewritten.c"
    r = run_cli("tile", KERNELS, "--nest", func, *args, "-o", out)
    assert r.exit_code == 0, r.stderr
    text = out.read_text()
    assert says in text
    if test is None:
        assert "the original nest runs" not in text
    else:
        assert test in text
        assert "stays in its row when" in text
    # Flat subscripts are kept as the source spells them.
    body = re.findall(r"\[[^\]]*\*[^\]]*\]", KERNELS.read_text().split(f"void {func}(")[1].split("\n}")[0])
    for sub in body:
        assert sub in text
    assert compile_and_run(out, tmp_path, name="rewritten") == original_output


def test_a_wrong_in_row_assertion_gives_a_different_result(cc, tmp_path, original_output):
    """The run-time test is what keeps the interchange correct when rows overlap (ld < n): with
    --assume-in-row asserted falsely, the same rewrite computes something else."""
    out = tmp_path / "asserted.c"
    r = run_cli("tile", KERNELS, "--nest", "settle", "--sizes", "3,4", "--order", "jj,ii,i,j", "--assume-in-row",
                "-o", out)
    assert r.exit_code == 0, r.stderr
    text = out.read_text()
    assert "asserted by the user with --assume-in-row" in text
    assert "if (n <= ld)" not in text
    assert "--assume-in-row" in text.split("made by:")[1].split("*/")[0]
    assert "assumed (--assume-in-row)" in r.stderr
    got = compile_and_run(out, tmp_path, name="asserted")
    differing = [a for a, b in zip(original_output.splitlines(), got.splitlines()) if a != b]
    assert differing and all(line.startswith("settle ") for line in differing)


def test_jam_needs_the_assertion_and_then_runs_like_the_original(cc, tmp_path, original_output):
    out = tmp_path / "jammed.c"
    r = run_cli("jam", KERNELS, "--nest", "spread_rows", "--factors", "i=2", "-o", out)
    assert r.exit_code == 1
    m = headline(r.stderr)
    assert m["kind"] == "refused" and "this job does not version the nest" in m["msg"]
    assert "m <= ld && n <= ld" in m["msg"] and "--assume-in-row" in r.stderr
    assert not out.exists()
    # spread_rows has no dependence, so the asserted rewrite is right for every ld
    r = run_cli("jam", KERNELS, "--nest", "spread_rows", "--factors", "i=2", "--assume-in-row", "-o", out)
    assert r.exit_code == 0, r.stderr
    assert compile_and_run(out, tmp_path, name="jammed") == original_output


def test_verify_runs_both_sides_of_the_row_test(cc):
    r = run_cli("verify", KERNELS, "--nest", "settle", "--sizes", "3,4", "--order", "jj,ii,i,j")
    assert r.exit_code == 0, r.stdout + r.stderr
    runs = [ln for ln in r.stdout.splitlines() if ln.startswith("n=")]
    pairs = [tuple(int(v) for v in re.findall(r"=(\d+)", ln)) for ln in runs]
    assert any(ld < n for n, ld in pairs) and any(ld >= n > 1 for n, ld in pairs)
    assert "equal" in r.stdout.splitlines()[-1]


# ---------------------------------------------------------------- refusals

REFUSALS = [
    ("two_ways", 7, 13, "the two linearisations cannot be compared"),
    ("product_rows", 17, 15, "the row length is itself a product"),
    ("iter_product", 22, 15, "not a row-major flattened access"),
    ("narrow", 27, 15, "computed in unsigned, where a product that wraps around can be a valid index"),
    ("never", 32, 13, "leaves its row of ld elements whenever the nest runs"),
    ("wide_stride", 37, 13, "the run-time test it needs cannot be printed exactly"),
    ("writes_bound", 42, 13, "the nest writes elements of 'g->nx', which a loop bound reads"),
    ("last_value", 45, 5, "writes g->last, which S1(i=1, j=0) writes (output dependence)"),
    ("through_call", 52, 13, "reached through an expression, not from a named variable"),
]


@pytest.mark.parametrize("func,line,col,says", REFUSALS, ids=[r[0] for r in REFUSALS])
def test_refused_with_the_reason(cc, tmp_path, func, line, col, says):
    out = tmp_path / "out.c"
    r = run_cli("tile", REFUSED, "--nest", func, "--sizes", "4,4", "--order", "jj,ii,i,j", "-o", out)
    assert r.exit_code == 1, r.stderr
    m = headline(r.stderr)
    assert (m["kind"], int(m["line"]), int(m["col"])) == ("refused", line, col), r.stderr
    assert says in m["msg"]
    assert not out.exists()


def test_wide_stride_with_the_assertion_is_written_and_records_it(cc, tmp_path):
    out = tmp_path / "out.c"
    r = run_cli("tile", REFUSED, "--nest", "wide_stride", "--sizes", "4,4", "--assume-in-row", "-o", out)
    assert r.exit_code == 0, r.stderr
    assert "each flattened subscript stays in its row (asserted by the user" in out.read_text()


def test_analyze_lists_flattened_and_struct_nests(cc):
    r = run_cli("analyze", KERNELS, "--json")
    assert r.exit_code == 0, r.stderr
    import json
    doc = json.loads(r.stdout)
    nests = next(iter(doc.values()))["nests"] if isinstance(doc, dict) else doc
    analysable = {n["function"] for n in nests if n.get("analysable")}
    assert {"spread_rows", "settle", "layers", "shift_in_row", "mirror", "two_ld", "spread_wide", "basin_depth",
            "tide_step"} <= analysable


def test_apply_versions_a_flattened_nest_and_passes_the_assertion_on(cc, tmp_path):
    src = tmp_path / "k.c"
    src.write_text("void settle(int n, int ld, double *A) {\n"
                   "#pragma looptile tile(i=4, j=4) order(jj, ii, i, j)\n"
                   "    for (int i = 1; i < n; i++)\n"
                   "        for (int j = 0; j < n; j++)\n"
                   "            A[i*ld + j] += 0.25 * A[(i - 1)*ld + j];\n"
                   "}\n")
    out = tmp_path / "out"
    r = run_cli("apply", src, "-o", out)
    assert r.exit_code == 0, r.stderr
    text = (out / "k.c").read_text()
    assert "if (n <= ld) {" in text and not any(ln.startswith("#pragma") for ln in text.splitlines())
    r = run_cli("apply", src, "--assume-in-row", "-o", tmp_path / "out2")
    assert r.exit_code == 0, r.stderr
    text = (tmp_path / "out2" / "k.c").read_text()
    assert "if (n <= ld)" not in text and "asserted by the user with --assume-in-row" in text
    assert "looptile apply" in text and "--assume-in-row" in text.split("made by:")[1]
