"""``looptile simulate``: the nest's array-element accesses, before and after a rewrite, through
an ideal LRU cache.

Outside references: the textbook-style worked example of strip-mining for reuse (common
practice; the exact LRU figures are recomputed here by a plain list-based LRU written in the
test), and, for the trace order, an independent Python enumeration of the accesses that the C
semantics of each statement gives (left-hand element of a compound assignment first, then the
reads left to right, then the write) fed through the same plain LRU.
"""
from __future__ import annotations

import json

import pytest
from conftest import run_cli

from looptile.cachegeom import machine_levels


def plain_lru(trace, entries: int) -> int:
    """Hits of a fully associative LRU holding ``entries`` lines (the most recent at the end)."""
    cache: list = []
    hits = 0
    for line in trace:
        if line in cache:
            hits += 1
            cache.remove(line)
        elif len(cache) == entries:
            cache.pop(0)
        cache.append(line)
    return hits


OUTER = """\
void outer_product(double out[4][4], const double a[4], const double b[4]) {
    for (int i = 0; i < 4; i++)
        for (int j = 0; j < 4; j++)
            out[i][j] = a[i] * b[j];
}
"""


def _sim(tmp_path, source: str, *args) -> dict:
    src = tmp_path / "k.c"
    src.write_text(source)
    r = run_cli("simulate", src, *args, "--json")
    assert r.exit_code == 0, r.stderr
    return json.loads(r.stdout)


def _l1(doc: dict, version: str) -> dict:
    return doc[version]["levels"][0]


@pytest.mark.parametrize("entries,transformed_hits", [(3, 14), (4, 20)])
def test_worked_example_of_strip_mining_for_reuse(cc, tmp_path, entries, transformed_hits):
    # a[i] then b[j] in each iteration, one double per line, a fully associative LRU of 3 or 4 lines.
    # Original order: 12 hits of 32 (6/16); j strip-mined by 2 with the strip loop outward:
    # 14 of 32 with 3 entries, 20 of 32 (10/16) with 4 (exact LRU; 10/16 is sometimes quoted for
    # 3 entries, which exact LRU does not give).
    doc = _sim(tmp_path, OUTER, "--nest", "outer_product", "--sizes", "j=2", "--order", "jj,i,j",
               "--only", "a,b", "--cache", f"L1={8 * entries}/0/8")
    orig, new = _l1(doc, "original"), _l1(doc, "transformed")
    assert (orig["accesses"], orig["hits"]) == (32, 12)
    assert (new["accesses"], new["hits"]) == (32, transformed_hits)
    # the same figures from a plain LRU over the sequence the two loop orders give
    seq = [x for i in range(4) for j in range(4) for x in (("a", i), ("b", j))]
    strips = [x for jj in (0, 2) for i in range(4) for j in (jj, jj + 1) for x in (("a", i), ("b", j))]
    assert plain_lru(seq, entries) == 12 and plain_lru(strips, entries) == transformed_hits
    assert orig["arrays"]["a"]["accesses"] == orig["arrays"]["b"]["accesses"] == 16
    assert "out" not in orig["arrays"]


MATVEC = """\
void gauge_mix(int n, double y[n], const double A[n][n], const double x[n]) {
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            y[i] += A[i][j] * x[j];
}
"""


def test_trace_follows_the_statement_order(cc, tmp_path):
    # y[i] += A[i][j] * x[j]: y[i] read, A[i][j], x[j], y[i] written, per iteration. With lines of
    # one element and a 2-entry LRU the order matters: y[i]'s write hits only if at most one other
    # line came between (it never does here: A and x come between), A and x never repeat soon.
    n = 5
    doc = _sim(tmp_path, MATVEC, "--nest", "gauge_mix", "--params", f"n={n}", "--cache", "L1=16/0/8")
    orig = _l1(doc, "original")
    # layout: arrays in order of first access (y, A, x), one after another: line = (array, index)
    trace = []
    for i in range(n):
        for j in range(n):
            trace += [("y", i), ("A", i, j), ("x", j), ("y", i)]
    assert orig["accesses"] == len(trace) == 4 * n * n
    assert orig["hits"] == plain_lru(trace, 2)
    assert orig["arrays"]["y"]["accesses"] == 2 * n * n
    assert doc["transformed"] is None


MATMUL = """\
void tracer_mul(int n, double C[n][n], const double A[n][n], const double B[n][n]) {
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            for (int k = 0; k < n; k++)
                C[i][j] += A[i][k] * B[k][j];
}
"""


def test_scalar_replacement_removes_accesses_from_the_trace(cc, tmp_path):
    n = 12
    doc = _sim(tmp_path, MATMUL, "--nest", "tracer_mul", "--params", f"n={n}", "--sizes", "4,4,4", "--jam",
               "i=2,j=2", "--scalarize", "--cache", "L1=1KiB/2/64", "--cache", "L2=8KiB/4/64")
    orig, new = _l1(doc, "original"), _l1(doc, "transformed")
    # original: C[i][j] read and written in every one of the n^3 iterations, A and B read once
    assert orig["arrays"]["C"]["accesses"] == 2 * n ** 3
    assert orig["arrays"]["A"]["accesses"] == orig["arrays"]["B"]["accesses"] == n ** 3
    # kept in locals during each run of k: C touched twice per run of k (load, store) per element
    assert new["arrays"]["C"]["accesses"] == 2 * n * n * (n // 4)
    assert new["arrays"]["A"]["accesses"] == n ** 3 and new["arrays"]["B"]["accesses"] == n ** 3
    assert [lv["name"] for lv in doc["original"]["levels"]] == ["L1", "L2"]
    # L2 sees only what L1 missed (demand accesses)
    assert doc["original"]["levels"][1]["accesses"] == orig["misses"]


def test_text_output_says_what_the_model_is(cc, tmp_path):
    src = tmp_path / "k.c"
    src.write_text(OUTER)
    r = run_cli("simulate", src, "--nest", "outer_product", "--sizes", "j=2", "--order", "jj,i,j",
                "--cache", "L1=1KiB/4/64")
    assert r.exit_code == 0, r.stderr
    assert "ideal LRU" in r.stdout and "not this machine's replacement policy or prefetchers" in r.stdout
    assert "original" in r.stdout and "transformed" in r.stdout and "memory traffic" in r.stdout


def test_usage_errors(cc, tmp_path):
    src = tmp_path / "k.c"
    src.write_text(MATVEC)
    r = run_cli("simulate", src, "--nest", "gauge_mix", "--cache", "L1=1KiB/4/64")
    assert r.exit_code == 2 and "--params n=64" in r.stderr
    r = run_cli("simulate", src, "--nest", "gauge_mix", "--params", "n=4", "--only", "z", "--cache", "L1=1KiB/4/64")
    assert r.exit_code == 2 and "no array named z" in r.stderr
    r = run_cli("simulate", src, "--nest", "gauge_mix", "--params", "n=4", "--cache", "L1=1KiB/3/64")
    assert r.exit_code == 2 and "cannot be split into sets of 3 ways" in r.stderr


def test_machine_geometry_falls_back_and_says_so(tmp_path):
    levels, note = machine_levels(tmp_path / "no-such-dir")
    assert note and "could not be read" in note and [lv.name for lv in levels] == ["L1", "L2"]
    fake = tmp_path / "cache"
    for k, (level, kind, size, ways) in enumerate([(1, "Data", "48K", 12), (1, "Instruction", "32K", 8),
                                                    (2, "Unified", "2048K", 16)]):
        d = fake / f"index{k}"
        d.mkdir(parents=True)
        for name, value in (("level", level), ("type", kind), ("size", size), ("ways_of_associativity", ways),
                            ("coherency_line_size", 64)):
            (d / name).write_text(f"{value}\n")
    levels, note = machine_levels(fake)
    assert note is None
    assert [lv.spec() for lv in levels] == ["L1=48KiB/12/64", "L2=2MiB/16/64"]


def test_sizes_auto_is_sized_for_the_simulated_geometry(cc, tmp_path):
    # The cache model picks the tiles for the --cache given here; the simulation of the same geometry
    # must then show fewer L1 misses than the original order (C, A and B rows of 48 doubles do not
    # fit a 2 KiB cache together).
    doc = _sim(tmp_path, MATMUL, "--nest", "tracer_mul", "--params", "n=48", "--sizes", "auto",
               "--cache", "L1=2KiB/4/64")
    orig, new = _l1(doc, "original"), _l1(doc, "transformed")
    assert new["accesses"] == orig["accesses"] == 4 * 48 ** 3
    assert new["misses"] < orig["misses"] / 2
