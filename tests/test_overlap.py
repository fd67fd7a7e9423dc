"""``--check-overlap``: the rewrite runs only when the arrays reached through pointers do not
overlap.

Outside reference: the system C compiler runs the original and the rewritten kernels, called
with the second frame at several offsets inside the first (the same frame, overlapping by a
few elements or a row, disjoint), under the address and undefined-behaviour sanitizers; the
outputs must be equal bit for bit. The same rewrite without the check computes something else
for the overlapping calls, which shows that the test is what keeps it correct.
"""
from __future__ import annotations

import re

import pytest
from conftest import TESTS, compile_and_run, run_cli

KERNELS = TESTS / "overlap" / "harbour_overlap.c"


@pytest.fixture(scope="module")
def original_output(tmp_path_factory):
    return compile_and_run(KERNELS, tmp_path_factory.mktemp("overlap-original"), name="original")


@pytest.mark.parametrize("func", ["blend_rows", "turn_add"])
def test_checked_rewrite_runs_like_the_original_for_overlapping_calls(cc, tmp_path, original_output, func):
    out = tmp_path / "checked.c"
    r = run_cli("tile", KERNELS, "--nest", func, "--sizes", "4,4", "--order", "jj,ii,i,j", "--check-overlap",
                "-o", out)
    assert r.exit_code == 0, r.stderr
    text = out.read_text()
    assert "(uintptr_t)" in text and "} else {" in text
    assert "checked at run time for" in text and "--check-overlap" in text.split("made by:")[1]
    assert "do not overlap (tested at run time)" in r.stderr
    # no pointer is formed from the bounds: every address is integer arithmetic on the base
    cond = next(line for line in text.splitlines() if "(uintptr_t)" in line)
    assert not re.search(r"(?<!&)&(?!&)", cond)
    assert compile_and_run(out, tmp_path, name="checked") == original_output


@pytest.mark.parametrize("func", ["blend_rows", "turn_add"])
def test_without_the_check_overlapping_calls_differ(cc, tmp_path, original_output, func):
    out = tmp_path / "unchecked.c"
    r = run_cli("tile", KERNELS, "--nest", func, "--sizes", "4,4", "--order", "jj,ii,i,j", "-o", out)
    assert r.exit_code == 0, r.stderr
    got = compile_and_run(out, tmp_path, name="unchecked")
    differing = [a for a, b in zip(original_output.splitlines(), got.splitlines()) if a != b]
    assert differing
    # only this kernel's calls differ, and never the disjoint ones (offset frame + 3, the last of each size)
    tag = "blend" if func == "blend_rows" else "turn"
    assert all(line.startswith(tag) for line in differing)
    lines = original_output.splitlines()
    # each size ends with the disjoint offset: the two lines before "copy"
    disjoint = {lines[k - d] for k in range(len(lines)) if lines[k].startswith("copy") for d in (1, 2)
                if lines[k - d].startswith(tag)}
    assert disjoint and not disjoint & set(differing)


def test_restrict_arrays_need_no_test(cc, tmp_path):
    out = tmp_path / "restrict.c"
    r = run_cli("tile", KERNELS, "--nest", "turn_copy", "--sizes", "4,4", "--check-overlap", "-o", out)
    assert r.exit_code == 0, r.stderr
    assert "no run-time test is needed" in r.stderr
    assert "uintptr_t" not in out.read_text().split("void turn_copy")[1].split("static void fill")[0]


def test_verify_calls_the_kernel_with_overlapping_arguments(cc, tmp_path):
    r = run_cli("verify", KERNELS, "--nest", "blend_rows", "--sizes", "4,4", "--order", "jj,ii,i,j",
                "--check-overlap")
    assert r.exit_code == 0, r.stdout + r.stderr
    assert "(in inside out): pass" in r.stdout
    assert "with overlapping arguments" in r.stdout.splitlines()[-1]
    # the same rewrite without the check fails the overlapping call
    out = tmp_path / "unchecked.c"
    assert run_cli("tile", KERNELS, "--nest", "blend_rows", "--sizes", "4,4", "--order", "jj,ii,i,j",
                   "-o", out).exit_code == 0
    r = run_cli("verify", KERNELS, "--against", out, "--func", "blend_rows", "--check-overlap")
    assert r.exit_code == 1, r.stdout
    failing = [ln for ln in r.stdout.splitlines() if "FAIL" in ln]
    assert failing and all("(in inside out)" in ln for ln in failing)


def test_a_file_without_uintptr_t_is_told_to_include_stdint(cc, tmp_path):
    src = tmp_path / "plain.c"
    src.write_text("void k(int n, double *a, double *b) {\n"
                   "    for (int i = 0; i < n; i++)\n"
                   "        for (int j = 0; j < n; j++)\n"
                   "            a[i] += b[j];\n"
                   "}\n")
    out = tmp_path / "out.c"
    r = run_cli("tile", src, "--nest", "k", "--sizes", "4,4", "--check-overlap", "-o", out)
    assert r.exit_code == 2
    assert "include <stdint.h>" in r.stderr
    assert not out.exists()
