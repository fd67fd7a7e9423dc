"""Soundness fuzzing, the small fixed-seed batch (the large one is bench/fuzz.py).

tests/fuzzgen.py generates random affine loop nests in C (depth 2-4, rectangular and
triangular bounds, steps 1 and 2, up- and down-counting, 1-3 statements with affine
subscripts, scalar accumulators, block-local temporaries, sometimes an imperfect nest)
and a random ``looptile tile`` request for each (a tiled band of 1-3 loops with sizes
from {1, 2, 3, 4, 5, 8}, sometimes an --order of tile and point loops, sometimes
--remainder clamp, sometimes a plain permutation).  Every answer is judged from outside:

- outside check: the system C compiler runs original and rewrite (-O1 -ffp-contract=off,
  address and undefined-behaviour sanitizers) over 20 (n, m) pairs including 0, 1, 2, 3,
  5, 7, 8, 9 and 13; the outputs (an FNV-1a hash of the raw bytes of every array and
  scalar after each call) are compared bit for bit.  Any difference or sanitizer report
  is a mismatch, a soundness bug.
- outside check: the witness pair of a legality refusal is re-derived by tracing the
  original program (a copy whose statements log their instance and the elements they
  read and write), run at the witness parameters; the requested order is computed in
  Python from the request alone (tile index floor(dir * (x - origin) / (step * T))).
- "legal by construction" requests (no dependence in the nest at all, an identity
  permutation, or all tile sizes 1 in the default order, which keeps the original
  order): refusing them is a false refusal; the rate must stay under 5%.

A second batch (the same kind of nests, seed JAM_SEED) asks for ``looptile jam`` (factors
2-4 on one or two loops of the perfect band, sometimes the innermost) and ``looptile
unroll`` (the outermost loop) instead, tests/fuzzjam.py: the same outside checks, with the
jammed order of the witness check derived from the factors and bounds (whole strips with
the copies innermost, the last partial strip in the original order), independently of
looptile.  A plain unroll and a jam of the innermost loop alone are legal by construction.

Runs in well under two minutes on two cores: looptile runs in-process, one case after
the other (CliRunner is not thread safe); compiling and running happens in a thread pool
of two.
"""
from __future__ import annotations

import time
from concurrent.futures import ThreadPoolExecutor

import fuzzgen
import pytest
from conftest import run_cli

pytestmark = pytest.mark.cc

SEED = 2024
CASES = 60
JAM_SEED = 7
JAM_CASES = 40
MAX_UNCHECKED = 3  # witnesses the trace cannot confirm exactly (non-rectangular tile grids), at most


def _run_cli(args: list[str], cwd) -> fuzzgen.ToolRun:
    t0 = time.perf_counter()
    res = run_cli(*args, cwd=cwd)
    return fuzzgen.ToolRun(res.exit_code, res.stderr, time.perf_counter() - t0)


def _run_batch(root, seed: int, cases: int, kind: str, flat: bool = False) -> fuzzgen.Summary:
    t0 = time.perf_counter()
    with ThreadPoolExecutor(2) as pool:
        futures = []
        for i in range(cases):
            case = fuzzgen.generate(seed, i, kind)
            if flat:
                case = fuzzgen.flattened(case)
                if case is None:
                    continue
            work = root / f"case{i}"
            tool = fuzzgen.run_tool(case, work, _run_cli)  # this thread only: CliRunner is not thread safe
            futures.append(pool.submit(fuzzgen.verify, case, work, tool))
        results = [f.result() for f in futures]
    summary = fuzzgen.Summary(results, time.perf_counter() - t0)
    print("\n" + summary.report())
    return summary


@pytest.fixture(scope="module")
def batch(tmp_path_factory) -> fuzzgen.Summary:
    return _run_batch(tmp_path_factory.mktemp("fuzz"), SEED, CASES, "tile")


@pytest.fixture(scope="module")
def jam_batch(tmp_path_factory) -> fuzzgen.Summary:
    return _run_batch(tmp_path_factory.mktemp("fuzz-jam"), JAM_SEED, JAM_CASES, "jam")


def _failures(summary: fuzzgen.Summary, pred) -> str:
    return "\n\n".join(fuzzgen.describe_failure(r) for r in summary.results if pred(r))


def test_the_checks_catch_injected_faults(batch, tmp_path):
    # The checks are not vacuous: a rewrite that changes one element, or that writes one
    # element past an array, is a mismatch; a legality message with the roles of source and
    # sink swapped, or naming another element, is a wrong witness.
    ok = next(r for r in batch.results if r.status == "ok")
    case = fuzzgen.generate(SEED, ok.index)
    arr = next(a for a in case.arrays if a.dims)
    head = "void kernel(int n, int m)\n{\n"
    faults = {"changed": f"    {arr.name}{'[4]' * arr.dims} += 1.0;\n",
              "overflow": f"    ((double *){arr.name})[sizeof {arr.name} / sizeof(double)] = 1.0;\n"}
    for name, line in faults.items():
        work = tmp_path / f"wrong-rewrite-{name}"
        work.mkdir()
        (work / "case.c").write_text(case.source)
        assert head in ok.files["out.c"]
        (work / "out.c").write_text(ok.files["out.c"].replace(head, head + line))
        got = fuzzgen.verify(case, work, fuzzgen.ToolRun(0, "", 0.0))
        assert got.status == "mismatch", (name, got.status, got.detail)

    refused = next(r for r in batch.results if r.status == "legality" and r.witness == "checked")
    case = fuzzgen.generate(SEED, refused.index)
    message = refused.detail.split("\nwitness check:")[0]
    head = fuzzgen.WITNESS.match(fuzzgen.HEAD.match(message.split("\n", 1)[0]).group("msg"))
    sink, src, elem = head.group("sink"), head.group("src"), head.group("elem")
    swapped = message.replace(sink, "@SINK@").replace(src, sink).replace("@SINK@", src)
    other = message.replace(f" {elem}, which", " Q[0], which")
    for text, want in ((message, "checked"), (swapped, "bad"), (other, "bad")):
        work = tmp_path / f"witness-{want}-{len(text)}"
        work.mkdir()
        (work / "case.c").write_text(case.source)
        got = fuzzgen.verify(case, work, fuzzgen.ToolRun(1, text, 0.0))
        assert (got.status, got.witness) == ("legality", want), (text, got.detail)


def test_generator_is_deterministic():
    a, b = fuzzgen.generate(SEED, 7), fuzzgen.generate(SEED, 7)
    assert a.source == b.source and a.request.args == b.request.args
    assert fuzzgen.generate(SEED, 8).source != a.source


def test_generated_requests_are_accepted(batch):
    # exit 2 is a request the generator built wrongly; a program that does not compile or
    # fails on its own is a generator bug too
    bad = [r.index for r in batch.results if r.status in ("usage", "generator")]
    assert bad == [], _failures(batch, lambda r: r.status in ("usage", "generator"))


def test_no_mismatch(batch):
    # outside check: the system C compiler runs original and rewrite; outputs compared bit for bit
    assert batch.count(lambda r: r.status == "ok") > 0
    mismatches = batch.count(lambda r: r.status == "mismatch")
    assert mismatches == 0, _failures(batch, lambda r: r.status == "mismatch")


def test_no_internal_error(batch):
    internal = batch.count(lambda r: r.status == "internal")
    assert internal == 0, _failures(batch, lambda r: r.status == "internal")


def test_legality_witnesses_are_real(batch):
    # outside check: the witness pair is re-derived by tracing the original program, and the
    # requested order is computed here, independently of looptile
    legality = [r for r in batch.results if r.status == "legality"]
    assert legality, "the batch should contain legality refusals"
    wrong = [r.index for r in legality if r.witness == "bad"]
    assert wrong == [], _failures(batch, lambda r: r.witness == "bad")
    assert all(r.witness in ("checked", "unchecked") for r in legality)
    unchecked = batch.count(lambda r: r.witness == "unchecked")
    assert unchecked <= MAX_UNCHECKED, _failures(batch, lambda r: r.witness == "unchecked")


def test_legal_by_construction_is_rarely_refused(batch):
    lbc = len(batch.lbc)
    assert lbc >= 10, "the batch should contain requests that are legal by construction"
    rate = batch.lbc_refusal_rate
    assert rate < 0.05, _failures(batch, lambda r: r.lbc and r.status in ("legality",
                                                                                           "unsupported"))


# ---------------------------------------------------------------- the jam and unroll batch

def test_jam_batch_has_both_commands_and_both_answers(jam_batch):
    verbs = {r.verb for r in jam_batch.results}
    assert verbs == {"jam", "unroll"}
    assert jam_batch.count(lambda r: r.status == "ok" and r.verb == "jam") >= 10
    assert jam_batch.count(lambda r: r.status == "ok" and r.verb == "unroll") >= 3
    assert jam_batch.count(lambda r: r.status == "legality") >= 3


def test_jam_no_mismatch_and_no_internal_error(jam_batch):
    # outside check: the system C compiler runs original and rewrite; outputs compared bit for bit
    bad = [r.index for r in jam_batch.results if r.status in ("mismatch", "internal", "usage", "generator")]
    assert bad == [], _failures(jam_batch, lambda r: r.status in ("mismatch", "internal", "usage", "generator"))


def test_jam_witnesses_are_real(jam_batch):
    # outside check: the witness pair is re-derived by tracing the original program, and the
    # jammed order is computed from the factors and bounds (tests/fuzzjam.py), not by looptile
    legality = [r for r in jam_batch.results if r.status == "legality"]
    assert legality and all(r.witness == "checked" for r in legality), \
        _failures(jam_batch, lambda r: r.status == "legality" and r.witness != "checked")


def test_jam_legal_by_construction_is_not_refused(jam_batch):
    lbc = jam_batch.lbc
    assert len(lbc) >= 10
    assert jam_batch.lbc_refusal_rate < 0.05, _failures(jam_batch, lambda r: r.lbc and r.status in (
        "legality", "unsupported"))


def test_jam_witness_check_rejects_wrong_witnesses(jam_batch, tmp_path):
    # The jam witness check is not vacuous: the message with source and sink swapped is wrong
    # (the original runs the source first), and so is a true witness checked against an order
    # in which the source runs first (the request replaced by a plain unroll, which keeps it).
    refused = next(r for r in jam_batch.results if r.status == "legality" and r.verb == "jam")
    case = fuzzgen.generate(JAM_SEED, refused.index, "jam")
    message = refused.detail.split("\nwitness check:")[0]
    head = fuzzgen.WITNESS.match(fuzzgen.HEAD.match(message.split("\n", 1)[0]).group("msg"))
    sink, src = head.group("sink"), head.group("src")
    swapped = message.replace(sink, "@SINK@").replace(src, sink).replace("@SINK@", src)
    kept = fuzzgen.generate(JAM_SEED, refused.index, "jam")
    perfect = kept.loops[: kept.perfect]
    kept.request = fuzzgen.Request("unroll", (perfect[0].it,), (2,), (), ("--factor", "2"), True,
                                   factors=((perfect[0].it, 2),))
    for c, text, want in ((case, message, "checked"), (case, swapped, "bad"), (kept, message, "bad")):
        work = tmp_path / f"witness-{want}-{len(text)}-{c.request.kind}"
        work.mkdir()
        (work / "case.c").write_text(c.source)
        got = fuzzgen.verify(c, work, fuzzgen.ToolRun(1, text, 0.0))
        assert (got.status, got.witness) == ("legality", want), (text, got.detail)


# Flattened arrays: the same random nests with their two-dimensional arrays as flat buffers
# A[(x)*ld + (y)] of a run-time row length, run with rows that hold the loops' ranges and rows
# that overlap (where the run-time in-row test must send the call to the original nest).
FLAT_SEED = 31
FLAT_CASES = 40


@pytest.fixture(scope="module")
def flat_batch(tmp_path_factory) -> fuzzgen.Summary:
    return _run_batch(tmp_path_factory.mktemp("fuzz-flat"), FLAT_SEED, FLAT_CASES, "tile", flat=True)


def test_flattened_cases_never_mismatch(flat_batch):
    # outside check: the system C compiler runs original and rewrite; outputs compared bit for bit
    bad = [r.index for r in flat_batch.results if r.status in ("mismatch", "internal", "usage", "generator")]
    assert bad == [], _failures(flat_batch, lambda r: r.index in bad)
    ok = [r for r in flat_batch.results if r.status == "ok"]
    assert len(ok) >= 5
    # most rewrites of flat buffers need the run-time test, and it is in the output
    assert sum("stays in its row when" in r.files["out.c"] for r in ok) >= 3
