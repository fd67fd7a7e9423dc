"""Hostile inputs: looptile must reject them cleanly, or handle them correctly.

For every invalid input: the documented exit status (1 refused, 2 usage/read/
parse/write error; never 3), a first stderr line ``file:line:col: kind: ...``
with the exact place where the problem has one, no Python traceback, nothing
on stdout, no output file, the input unchanged (also with ``--in-place``) and
no ``.looptile-*`` temporary left behind.  Valid-but-extreme inputs may succeed
(exit 0); then the rewrite must compile and compute exactly what the original
computes, and every byte outside the nest must be unchanged.

The corpus is in ``tests/hostile/`` (kernels of the tidal-basin model and the
harbour-camera pipeline); inputs with unusual bytes or of unusual size are
generated into ``tmp_path`` at test time.
"""
from __future__ import annotations

import json
import os
import random
import re
import shutil
import subprocess
import time
from dataclasses import dataclass
from pathlib import Path

import pytest
from conftest import TESTS, build, cc_command, headline, run_cli, run_program

pytestmark = pytest.mark.cc

HOSTILE = TESTS / "hostile"

# The first line of any looptile message: the position is optional (usage and
# read errors without a place may be ``file: error: ...``).
LOOSE = re.compile(r"^(?P<path>.*?)(?::(?P<line>\d+)(?::(?P<col>\d+))?)?: (?P<kind>error|refused): (?P<msg>\S.*)$")


# ---------------------------------------------------------------- helpers

def no_traceback(result) -> None:
    assert result.exit_code != 3, f"internal error (exit 3):\n{result.stderr}"
    assert "Traceback" not in result.stderr, result.stderr
    assert b"Traceback" not in result.stdout_bytes, result.stdout_bytes[:2000]


def first_line(result):
    first = result.stderr.split("\n", 1)[0]
    m = LOOSE.match(first)
    assert m, f"first line of stderr is not 'file[:line[:col]]: error|refused: ...': {first!r}\n{result.stderr}"
    return m


def line_count(data: bytes) -> list[bytes]:
    """Lines as the C compiler counts them: CRLF, LF and a lone CR each end a line."""
    return re.split(rb"\r\n|\n|\r", data)


@dataclass(frozen=True)
class At:
    """An acceptable position of a message: LINE, and COL unless None.

    ``token`` (when given) must start at LINE:COL in the file: a check of the
    test data itself, so the expected positions cannot drift from the corpus."""
    line: int
    col: int | None = None
    token: str | None = None


@dataclass(frozen=True)
class Reject:
    source: str  # a file of tests/hostile, or "gen:NAME" (see GENERATED)
    args: tuple[str, ...]
    exit: int
    kind: str
    where: tuple[At, ...] = ()  # empty: the problem has no place in the file; any of these otherwise
    analyze: str | None = None  # "error": analyze exits 2 with the same headline; "reason": the nest's reason


def _random_bytes(n: int, seed: int) -> bytes:
    rng = random.Random(seed)
    data = bytearray(rng.getrandbits(8) for _ in range(n))
    for k in range(0, n, 97):  # plenty of NULs
        data[k] = 0
    return bytes(data)


def _lone_cr(text: str) -> bytes:
    """The first three line ends as lone CRs (old Mac style), the rest LF."""
    return text.encode().replace(b"\n", b"\r", 3)


GENERATED = {
    "binary.c": lambda: _random_bytes(4096, 20240611),
    "binary_with_c_tail.c": lambda: _random_bytes(600, 7) + (HOSTILE / "iterator_modified.c").read_bytes(),
    "empty.c": lambda: b"",
    "crlf_syntax_error.c": lambda: (HOSTILE / "syntax_error.c").read_bytes().replace(b"\n", b"\r\n"),
    "crlf_iterator_modified.c": lambda: (HOSTILE / "iterator_modified.c").read_bytes().replace(b"\n", b"\r\n"),
    "lone_cr_iterator_modified.c": lambda: _lone_cr((HOSTILE / "iterator_modified.c").read_text()),
    "latin1_syntax_error.c": lambda: (HOSTILE / "syntax_error.c").read_bytes().replace(
        b"h[i][j] * ) 0.5;", b"h[i][j] * ) 0.5; /* Sp\xfclung \xff\xfe */"),
}


def materialise(source: str, workdir: Path) -> Path:
    """The case's input file, as a copy in ``workdir`` (so --in-place can only touch the copy)."""
    workdir.mkdir(parents=True, exist_ok=True)
    if source.startswith("gen:"):
        name = source[4:]
        if name == "directory":
            path = workdir / "basin_dir.c"
            path.mkdir()
            return path
        if name == "missing":
            return workdir / "no_such_kernel.c"
        path = workdir / name
        path.write_bytes(GENERATED[name]())
        return path
    path = workdir / source
    shutil.copyfile(HOSTILE / source, path)
    return path


def snapshot(directory: Path) -> dict[str, bytes | None]:
    out = {}
    for p in sorted(directory.rglob("*")):
        out[str(p.relative_to(directory))] = p.read_bytes() if p.is_file() else None
    return out


def assert_position(m, src: Path, where: tuple[At, ...], stderr: str) -> None:
    line = int(m["line"]) if m["line"] else None
    col = int(m["col"]) if m["col"] else None
    data = src.read_bytes() if src.is_file() else b""
    lines = line_count(data)
    for at in where:  # the expected positions must point at what they claim to
        if at.token is not None:
            text = lines[at.line - 1].decode("latin-1")
            assert text[at.col - 1:].startswith(at.token), (at, text)
    if not where:
        # No place in the file: a position, if any, must still be a real one (1-based).
        if line is not None:
            assert 1 <= line <= max(1, len(lines)), stderr
        if col is not None:
            assert col >= 1, stderr
        return
    ok = any(line == at.line and (at.col is None or col == at.col) for at in where)
    assert ok, f"position {line}:{col} is not one of {[(a.line, a.col, a.token) for a in where]}:\n{stderr}"


# ---------------------------------------------------------------- the corpus of rejected inputs

S44 = ("--sizes", "4,4")

REJECTS: dict[str, Reject] = {
    # ---- read and parse errors (exit 2)
    "syntax-error": Reject("syntax_error.c", ("--nest", "settle_surface", *S44), 2, "error",
                           (At(6, 33, ")"),), analyze="error"),
    # The input ends inside the function: where the parser runs out of input (the
    # last line, as a compiler says) or at a brace that is never closed.
    "unbalanced-open-brace": Reject("unbalanced_open.c", ("--nest", "settle_surface", *S44), 2, "error",
                                    (At(8), At(3, 1, "{"), At(4, 33, "{"), At(5, 37, "{")), analyze="error"),
    "unbalanced-close-brace": Reject("unbalanced_close.c", ("--nest", "settle_surface", *S44), 2, "error",
                                     (At(8, 1, "}"),), analyze="error"),
    "error-directive": Reject("error_directive.c", ("--nest", "settle_surface", *S44), 2, "error",
                              (At(3, 1, "#error"), At(3, 2, "error")), analyze="error"),
    "missing-include": Reject("missing_include.c", ("--nest", "settle_surface", *S44), 2, "error",
                              (At(3, 1, "#include"), At(3, 10, '"nowhere.h"')), analyze="error"),
    "crlf-syntax-error": Reject("gen:crlf_syntax_error.c", ("--nest", "settle_surface", *S44), 2, "error",
                                (At(6, 33, ")"),), analyze="error"),
    "latin1-syntax-error": Reject("gen:latin1_syntax_error.c", ("--nest", "settle_surface", *S44), 2, "error",
                                  (At(6, 33, ")"),), analyze="error"),
    "binary": Reject("gen:binary.c", ("--nest", "settle_surface", *S44), 2, "error", analyze="error"),
    "binary-then-c": Reject("gen:binary_with_c_tail.c", ("--nest", "skip_columns", *S44), 2, "error",
                            analyze="error"),
    "directory": Reject("gen:directory", ("--nest", "settle_surface", *S44), 2, "error", analyze="error"),
    "missing-file": Reject("gen:missing", ("--nest", "settle_surface", *S44), 2, "error", analyze="error"),
    "empty-file": Reject("gen:empty.c", ("--nest", "settle_surface", *S44), 2, "error"),
    # ---- constructs outside the model (exit 1), refused at the construct
    "goto-into-nest": Reject("goto_into_nest.c", ("--nest", "flood_cells", *S44), 1, "refused",
                             (At(9, 1, "refill:"), At(6, 9, "goto")), analyze="reason"),
    "iterator-written-statement": Reject("iterator_modified.c", ("--nest", "skip_columns", *S44), 1, "refused",
                                         (At(7, 13, "j++"),), analyze="reason"),
    "iterator-written-in-expression": Reject("iterator_modified.c", ("--nest", "hidden_write", *S44), 1,
                                             "refused", (At(15, 31, "i += 0"),), analyze="reason"),
    "crlf-iterator-written": Reject("gen:crlf_iterator_modified.c", ("--nest", "skip_columns", *S44), 1,
                                    "refused", (At(7, 13, "j++"),), analyze="reason"),
    # A lone CR ends a line for the compiler too: the place is still line 7.
    "lone-cr-iterator-written": Reject("gen:lone_cr_iterator_modified.c", ("--nest", "skip_columns", *S44), 1,
                                       "refused", (At(7, 13, "j++"),), analyze="reason"),
    "bound-reads-array-written-in-nest": Reject(
        "bound_from_written_array.c", ("--nest", "chain_rows", *S44), 1, "refused",
        (At(7, 29, "len[i]"), At(8, 13, "len[i + 1]")), analyze="reason"),
    # Loop-invariant bound len[0], but the body writes len[i] (= len[0] at i == 0).
    "invariant-bound-written-in-nest": Reject(
        "bound_from_written_array.c", ("--nest", "shrink_rows", *S44), 1, "refused",
        (At(17, 29, "len[0]"), At(18, 13, "len[i]")), analyze="reason"),
    "for-macro-whole-nest": Reject("for_macro.c", ("--nest", "scan_frame", *S44), 1, "refused",
                                   (At(6, 5, "FOR(y, n)"),), analyze="reason"),
    "for-macro-inner-loop": Reject("for_macro.c", ("--nest", "scan_rows", *S44), 1, "refused",
                                   (At(14, 9, "FOR(x, m)"),), analyze="reason"),
    # A directive: its '#', its name, or the pragma's text. (The GCC loop hints of gain_between and
    # gain_inner in the same file are now kept with their loops: test_omp.py tiles and runs them.)
    "pragma-operator-in-body": Reject("pragma_in_nest.c", ("--nest", "gain_operator", *S44), 1, "refused",
                                      (At(24, 13, "_Pragma"), At(24, 21, '"GCC')), analyze="reason"),
    # ---- usage errors (exit 2)
    "selector-line-beyond-file": Reject("iterator_modified.c", ("--nest", "L999", *S44), 2, "error"),
    "selector-line-zero": Reject("iterator_modified.c", ("--nest", "L0", *S44), 2, "error"),
    "selector-line-without-loop": Reject("iterator_modified.c", ("--nest", "L2", *S44), 2, "error", (At(2),)),
    "selector-dead-loop-in-if0": Reject("if0_loops.c", ("--nest", "L9", *S44), 2, "error", (At(9),)),
    "selector-no-function": Reject("iterator_modified.c", ("--nest", "nofunc", *S44), 2, "error"),
    "selector-nest-index-too-big": Reject("iterator_modified.c", ("--nest", "skip_columns:9", *S44), 2, "error"),
    "selector-nest-index-zero": Reject("iterator_modified.c", ("--nest", "skip_columns:0", *S44), 2, "error"),
    "selector-empty": Reject("iterator_modified.c", ("--nest", "", *S44), 2, "error"),
    "sizes-zero": Reject("long_long.c", ("--nest", "smooth_records", "--sizes", "0,4"), 2, "error"),
    "sizes-negative": Reject("long_long.c", ("--nest", "smooth_records", "--sizes", "-4,4"), 2, "error"),
    "sizes-named-negative": Reject("long_long.c", ("--nest", "smooth_records", "--sizes", "j=-1"), 2, "error"),
    "sizes-named-zero": Reject("long_long.c", ("--nest", "smooth_records", "--sizes", "i=4,j=0"), 2, "error"),
    "sizes-names-unknown-loop": Reject("long_long.c", ("--nest", "smooth_records", "--sizes", "i=4,q=4"), 2,
                                       "error"),
    "sizes-names-a-parameter": Reject("long_long.c", ("--nest", "smooth_records", "--sizes", "n=4"), 2, "error"),
    "sizes-names-loop-below-band": Reject("imperfect_band.c", ("--nest", "settle_layers", "--sizes", "j=4"), 2,
                                          "error"),
    "sizes-names-loop-above-band": Reject("imperfect_band.c", ("--nest", "L6", "--sizes", "i=4,j=4"), 2, "error"),
    "sizes-names-loop-twice": Reject("long_long.c", ("--nest", "smooth_records", "--sizes", "i=4,i=8"), 2,
                                     "error"),
    "sizes-empty-item": Reject("long_long.c", ("--nest", "smooth_records", "--sizes", "4,,4"), 2, "error"),
    "order-tile-loop-twice": Reject("long_long.c", ("--nest", "smooth_records", *S44, "--order", "ii,ii,i,j"), 2,
                                    "error"),
    "order-point-loop-twice": Reject("long_long.c", ("--nest", "smooth_records", *S44, "--order", "ii,jj,i,i"),
                                     2, "error"),
    "order-two-spellings-of-one-loop": Reject(
        "long_long.c", ("--nest", "smooth_records", *S44, "--order", "ii,i.1,i,j"), 2, "error"),
    "order-permutation-twice": Reject("long_long.c", ("--nest", "smooth_records", "--order", "j,j"), 2, "error"),
}


@pytest.mark.parametrize("case", sorted(REJECTS))
def test_hostile_input_is_rejected_cleanly(tmp_path, case):
    spec = REJECTS[case]
    work = tmp_path / "work"
    src = materialise(spec.source, work)
    before = snapshot(work)
    outdir = tmp_path / "out"
    outdir.mkdir()
    out = outdir / "out.c"

    r = run_cli("tile", src, *spec.args, "-o", out)
    no_traceback(r)
    assert r.exit_code == spec.exit, (r.exit_code, r.stderr)
    assert r.stdout_bytes == b"", r.stdout_bytes[:300]
    assert os.listdir(outdir) == [], os.listdir(outdir)  # no output, no .looptile-* temporary
    assert snapshot(work) == before
    m = first_line(r)
    assert m["kind"] == spec.kind, r.stderr
    assert m["path"] == str(src), r.stderr
    if any(at.col is not None for at in spec.where):
        headline(r.stderr)  # a place in the file: the strict 'file:line:col: kind: msg' form
    assert_position(m, src, spec.where, r.stderr)

    # The same with --in-place: the input is neither replaced nor accompanied by a temporary.
    r2 = run_cli("tile", src, *spec.args, "--in-place")
    no_traceback(r2)
    assert r2.exit_code == spec.exit, (r2.exit_code, r2.stderr)
    assert r2.stdout_bytes == b""
    assert snapshot(work) == before
    assert r2.stderr.split("\n", 1)[0] == r.stderr.split("\n", 1)[0]

    if spec.analyze == "error":
        a = run_cli("analyze", "--json", src)
        no_traceback(a)
        assert a.exit_code == 2, a.stderr
        doc = json.loads(a.stdout)
        assert doc[str(src)]["nests"] == []
        assert doc[str(src)]["error"] == r.stderr.split("\n", 1)[0]
    elif spec.analyze == "reason":
        a = run_cli("analyze", "--json", src)
        no_traceback(a)
        assert a.exit_code == 0, a.stderr
        nests = json.loads(a.stdout)[str(src)]["nests"]
        func = spec.args[spec.args.index("--nest") + 1]
        nest = next(n for n in nests if func in n["selectors"])
        assert nest["analysable"] is False, nest
        assert nest["reason"] == r.stderr.split("\n", 1)[0]
    assert snapshot(work) == before


def test_empty_file_analyzes_to_no_nests(tmp_path):
    src = materialise("gen:empty.c", tmp_path)
    r = run_cli("analyze", "--json", src)
    no_traceback(r)
    assert r.exit_code == 0, r.stderr
    assert json.loads(r.stdout) == {str(src): {"nests": [], "error": None}}


def test_analyze_reports_each_bad_file_and_still_analyzes_the_good_one(tmp_path):
    good = materialise("long_long.c", tmp_path)
    bad = [materialise(s, tmp_path) for s in ("gen:directory", "gen:binary.c", "gen:missing", "syntax_error.c")]
    r = run_cli("analyze", "--json", good, *bad)
    no_traceback(r)
    assert r.exit_code == 2, r.stderr
    doc = json.loads(r.stdout)
    assert doc[str(good)]["error"] is None
    assert [n["function"] for n in doc[str(good)]["nests"]] == ["smooth_records", "main", "main"]
    for p in bad:
        assert doc[str(p)]["nests"] == []
        assert doc[str(p)]["error"].startswith(f"{p}"), doc[str(p)]
        assert LOOSE.match(doc[str(p)]["error"])["kind"] == "error"


# ---------------------------------------------------------------- unwritable output

@pytest.mark.parametrize("where", ["parent-missing", "proc", "is-a-directory"])
def test_unwritable_output_exit_2_and_leaves_nothing(tmp_path, where):
    work = tmp_path / "work"
    src = materialise("long_long.c", work)
    (tmp_path / "existing_dir").mkdir()
    out = {"parent-missing": tmp_path / "no_such_dir" / "tiled.c",
           "proc": Path("/proc/nonexistent/tiled.c"),
           "is-a-directory": tmp_path / "existing_dir"}[where]
    before = snapshot(tmp_path)
    r = run_cli("tile", src, "--nest", "smooth_records", *S44, "-o", out)
    no_traceback(r)
    assert r.exit_code == 2, r.stderr
    assert r.stdout_bytes == b""
    m = first_line(r)
    assert (m["path"], m["kind"]) == (str(out), "error"), r.stderr
    assert snapshot(tmp_path) == before  # no .looptile-* temporary next to the target either


# ---------------------------------------------------------------- valid but hostile: must be right

def _compile_run(src: Path, workdir: Path, extra=(), name=None, timeout=20) -> str:
    exe = workdir / ((name or src.stem) + ".exe")
    build(src, exe, tuple(extra))
    try:
        return run_program(exe, timeout=timeout)
    except subprocess.TimeoutExpired:
        pytest.fail(f"{src.name} did not finish within {timeout} s (the original takes milliseconds)")


def _outside_nest_unchanged(original: bytes, new: bytes, first_for: bytes, nest_end: bytes) -> None:
    """Every byte before the line of the nest's first ``for`` and after the nest's last
    statement ``nest_end`` (unique in the file) is unchanged."""
    start = original.index(first_for) + first_for.index(b"for")
    start = max(original.rfind(b"\n", 0, start), original.rfind(b"\r", 0, start)) + 1
    end = original.index(nest_end) + len(nest_end)
    assert original.count(nest_end) == 1
    assert new[:start] == original[:start]
    tail = original[end:]
    assert new.endswith(tail), (new[-len(tail) - 200:], tail)
    assert len(new) >= start + len(tail)


def tile_ok(src: Path, out: Path, *args) -> bytes:
    r = run_cli("tile", src, *args, "-o", out)
    no_traceback(r)
    assert r.exit_code == 0, r.stderr
    assert r.stdout_bytes == b""
    return out.read_bytes()


VALID = {
    # file, selector, nest's first 'for' text, the nest's last statement text
    "if0-blocks": ("if0_loops.c", "settle_surface", b"#endif\n    for (int i = 0; i < n; i++)",
                   b"h[i][j] = 0.5 * h[i][j] + i - j;"),
    "long-long": ("long_long.c", "smooth_records", b"for (long long i", b"(rec[i][j] + rec[i - 1][j]);"),
    "comments-between-tokens": ("comments_everywhere.c", "settle_surface", b"/*a*/for",
                                b"h[i][j] = 0.5 * h[i][j] + i - j;"),
    "string-with-for-and-comment-end": ("string_for.c", "expose_frame", b"for (int y = 0; y < n",
                                        b"(float)(y - x);"),
}


@pytest.mark.parametrize("case", sorted(VALID))
def test_valid_hostile_nest_is_tiled_correctly(tmp_path, case, sizes="3,5"):
    name, sel, first_for, nest_end = VALID[case]
    src = materialise(name, tmp_path)
    original = src.read_bytes()
    new = tile_ok(src, tmp_path / "tiled.c", "--nest", sel, "--sizes", sizes)
    assert src.read_bytes() == original
    assert new != original and b"/* looptile: tiled" in new
    _outside_nest_unchanged(original, new, first_for, nest_end)
    assert _compile_run(tmp_path / "tiled.c", tmp_path) == _compile_run(src, tmp_path, name="orig")


def test_if0_blocks_are_kept_and_never_analysed(tmp_path):
    src = materialise("if0_loops.c", tmp_path)
    text = src.read_bytes()
    new = tile_ok(src, tmp_path / "tiled.c", "--nest", "settle_surface", "--sizes", "4,4")
    for block in re.findall(rb"#if 0\n.*?#endif\n", text, re.S):
        assert new.count(block) == 1, block
    r = run_cli("analyze", "--json", src)
    assert r.exit_code == 0, r.stderr
    lines = [n["line"] for n in json.loads(r.stdout)[str(src)]["nests"]]
    assert 9 not in lines and 17 not in lines and 13 in lines, lines


def test_comments_between_header_tokens_are_kept_once(tmp_path):
    src = materialise("comments_everywhere.c", tmp_path)
    text = src.read_text()
    new = tile_ok(src, tmp_path / "tiled.c", "--nest", "settle_surface", "--sizes", "4,4").decode()
    header_comments = re.findall(r"/\*[A-Za-z]\*/", text)
    assert len(header_comments) == 30
    for c in header_comments:
        assert new.count(c) == 1, (c, new)
    assert new.count("// a line comment between the headers") == 1


def test_string_literals_are_not_loops(tmp_path):
    src = materialise("string_for.c", tmp_path)
    r = run_cli("analyze", "--json", src)
    assert r.exit_code == 0, r.stderr
    nests = json.loads(r.stdout)[str(src)]["nests"]
    kernel = [n for n in nests if n["function"] == "expose_frame"]
    assert [(n["line"], n["column"], n["analysable"]) for n in kernel] == [(11, 5, True)]
    r = run_cli("tile", src, "--nest", "L4", *S44)  # the banner's "for (" is on line 4
    assert r.exit_code == 2 and first_line(r)["kind"] == "error", r.stderr


def test_kr_definition_is_tiled_or_refused_as_old_style(tmp_path):
    """A K&R definition declares its parameters after the parameter list; they are
    ordinary parameters.  Tiling is legal here; a refusal must at least name the
    old-style definition instead of claiming 'h' is unknown."""
    src = materialise("kr_definition.c", tmp_path)
    r = run_cli("tile", src, "--nest", "ebb_damp", *S44, "-o", tmp_path / "tiled.c")
    no_traceback(r)
    if r.exit_code == 1:
        m = first_line(r)
        assert m["kind"] == "refused"
        assert re.search(r"K&R|old-style|identifier list", m["msg"]), r.stderr
        return
    assert r.exit_code == 0, r.stderr
    assert _compile_run(tmp_path / "tiled.c", tmp_path) == _compile_run(src, tmp_path, name="orig")


def test_invariant_bound_written_in_nest_changes_the_result(tmp_path):
    """Why shrink_rows must be refused: its rewrite computes something else.
    (Only checked when looptile does produce a rewrite.)"""
    src = materialise("bound_from_written_array.c", tmp_path)
    r = run_cli("tile", src, "--nest", "shrink_rows", *S44, "-o", tmp_path / "tiled.c")
    no_traceback(r)
    if r.exit_code != 0:
        assert r.exit_code == 1, r.stderr
        return
    assert _compile_run(tmp_path / "tiled.c", tmp_path) == _compile_run(src, tmp_path, name="orig")


# ---------------------------------------------------------------- one macro, two -D settings

def test_macro_differing_under_D_tiles_consistently(tmp_path):
    src = materialise("wide_macro.c", tmp_path)
    wide = tile_ok(src, tmp_path / "wide.c", "--nest", "spread_swell", *S44, "-DWIDE")
    narrow = tile_ok(src, tmp_path / "narrow.c", "--nest", "spread_swell", *S44)
    # The macros stay symbolic: the two rewrites differ only in the recorded command.
    strip = lambda b: re.sub(rb"made by: [^\n]*", b"", b)  # noqa: E731
    assert strip(wide) == strip(narrow)
    assert b"SPAN(m)" in wide and b"GAIN * i" in wide
    for flags in ((), ("-DWIDE",)):
        want = _compile_run(src, tmp_path, flags, name="orig" + "".join(flags))
        for out in ("wide", "narrow"):
            assert _compile_run(tmp_path / f"{out}.c", tmp_path, flags, name=out + "".join(flags)) == want


def test_subscript_macro_legal_only_without_D(tmp_path):
    src = materialise("lag_macro.c", tmp_path)
    r = run_cli("tile", src, "--nest", "lagged_sweep", *S44, "-DWIDE", "-o", tmp_path / "wide.c")
    no_traceback(r)
    assert r.exit_code == 1, r.stderr
    assert not (tmp_path / "wide.c").exists()
    h = headline(r.stderr)
    assert (h["kind"], int(h["line"]), int(h["col"])) == ("refused", 16, 5), r.stderr
    assert "flow dependence" in h["msg"]

    new = tile_ok(src, tmp_path / "narrow.c", "--nest", "lagged_sweep", *S44)
    assert b"#if LAG != 0" in new
    assert _compile_run(tmp_path / "narrow.c", tmp_path) == _compile_run(src, tmp_path, name="orig")
    # The rewrite was proven for LAG == 0 only: a build with -DWIDE must stop.
    proc = subprocess.run(cc_command() + ["-DWIDE", "-fsyntax-only", str(tmp_path / "narrow.c")],
                          capture_output=True, text=True)
    assert proc.returncode != 0 and "#error" in proc.stderr, proc.stderr


# ---------------------------------------------------------------- unusual bytes

KERNEL = """\
/* harbour camera: exposure correction COMMENT */
#include <stdio.h>

static const char *label = "harbour cam STRING";
static float px[24][24];

void expose(int n, int m)
{
    for (int y = 1; y < n; y++)
        for (int x = 0; x < m; x++)
            px[y][x] = 0.5f * (px[y][x] + px[y - 1][x]); /* BODY */
}

int main(void)
{
    double s = 0;
    for (int y = 0; y < 24; y++)
        for (int x = 0; x < 24; x++)
            px[y][x] = (float)((y * 7 + x * 3) % 11);
    expose(23, 21);
    for (int y = 0; y < 24; y++)
        for (int x = 0; x < 24; x++)
            s += px[y][x] * (1 + (y + x) % 5);
    unsigned sum = 0;
    for (const char *q = label; *q; q++)
        sum += (unsigned char)*q;
    printf("%u %.9g\\n", sum, s);
    return 0;
}
"""


def _kernel_bytes(variant: str) -> bytes:
    data = KERNEL.encode()
    fill = {"COMMENT": b"", "STRING": b"", "BODY": b"-"}
    if variant == "latin1":
        fill = {"COMMENT": b"Sch\xe4rfe \xff\xfe\x80", "STRING": b"K\xfcste \xe9\xff", "BODY": b"\xb5s \xa7"}
    elif variant == "utf8-and-invalid":
        fill = {"COMMENT": "Schärfe 港".encode(), "STRING": "Küste".encode() + b"\xc3(", "BODY": b"\xed\xa0\x80"}
    elif variant in ("nul-in-comment", "nul-everywhere-in-comments"):
        fill = {"COMMENT": b"a\x00b", "STRING": b"", "BODY": b"\x00" if variant != "nul-in-comment" else b"-"}
    for key, value in fill.items():
        data = data.replace(key.encode(), value)
    if variant == "crlf":
        data = data.replace(b"\n", b"\r\n")
    elif variant == "mixed-crlf-lf":
        lines = data.split(b"\n")
        data = b"".join(line + (b"\r\n" if k % 2 else b"\n") for k, line in enumerate(lines[:-1]))
    elif variant == "lone-cr":
        data = data.replace(b"\n", b"\r", 4)  # the comment, the include, the blank line, the label
    elif variant == "no-final-newline":
        data = data.rstrip(b"\n")
    return data


BYTE_VARIANTS = ["latin1", "utf8-and-invalid", "nul-in-comment", "nul-everywhere-in-comments", "crlf",
                 "mixed-crlf-lf", "lone-cr", "no-final-newline"]


@pytest.mark.parametrize("variant", BYTE_VARIANTS)
def test_unusual_bytes_are_kept_and_the_nest_is_tiled(tmp_path, variant):
    src = tmp_path / "expose.c"
    original = _kernel_bytes(variant)
    src.write_bytes(original)
    r = run_cli("analyze", "--json", src)
    no_traceback(r)
    assert r.exit_code == 0, r.stderr
    nests = json.loads(r.stdout)[str(src)]["nests"]
    kernel = next(n for n in nests if n["function"] == "expose")
    assert (kernel["line"], kernel["column"], kernel["analysable"]) == (9, 5, True), kernel
    new = tile_ok(src, tmp_path / "tiled.c", "--nest", "expose", *S44)
    assert src.read_bytes() == original
    _outside_nest_unchanged(original, new, b"for (int y = 1", b"px[y - 1][x]);")
    for special in (b"\x00", b"\xff", b"\xc3(", b"\xed\xa0\x80", b"\r"):
        assert new.count(special) >= original.count(special), special
    assert _compile_run(tmp_path / "tiled.c", tmp_path) == _compile_run(src, tmp_path, name="orig")


# ---------------------------------------------------------------- extreme sizes

SIZE_T_KERNEL = """\
/* tide gauge: scale a record indexed by size_t */
#include <stdio.h>
#include <stddef.h>

static double rec[40];

void scale_record(size_t n)
{
    for (size_t i = 0; i < n; i++)
        rec[i] = 0.5 * rec[i] + (double)i;
}

int main(void)
{
    double s = 0;
    for (int k = 0; k < 40; k++)
        rec[k] = k % 7;
    scale_record(37);
    for (int k = 0; k < 40; k++)
        s += rec[k] * (k + 1);
    printf("%.17g\\n", s);
    return 0;
}
"""

HUGE = {
    # int iterators (expose)
    "int-max": ("expose", "2147483647,2147483647"),
    "long-max-on-int": ("expose", "9223372036854775807,4"),
    "above-2^63-on-int": ("expose", "9223372036854775809,9223372036854775809"),
    "2^64-on-int": ("expose", "18446744073709551616,18446744073709551616"),
    "2^64+3-on-int": ("expose", "4,18446744073709551619"),
    "1e20-on-int": ("expose", "100000000000000000000,4"),
    # a size_t iterator: sizes up to 2^64 - 1 fit its type
    "above-2^63-on-size_t": ("scale_record", "9223372036854775809"),
    "2^64-1-on-size_t": ("scale_record", "18446744073709551615"),
    "2^64-on-size_t": ("scale_record", "18446744073709551616"),
}


@pytest.mark.parametrize("case", sorted(HUGE))
def test_huge_tile_sizes_are_rejected_or_correct(tmp_path, case):
    """Either a usage error, or C that is valid (every constant has a type) and
    computes what the original computes."""
    func, sizes = HUGE[case]
    src = tmp_path / f"{func}.c"
    src.write_bytes(_kernel_bytes("plain") if func == "expose" else SIZE_T_KERNEL.encode())
    out = tmp_path / "tiled.c"
    r = run_cli("tile", src, "--nest", func, "--sizes", sizes, "-o", out)
    no_traceback(r)
    if r.exit_code == 2:
        assert first_line(r)["kind"] == "error", r.stderr
        assert not out.exists()
        return
    assert r.exit_code == 0, r.stderr
    proc = subprocess.run(cc_command() + ["-std=gnu11", "-fsyntax-only", str(out)], capture_output=True, text=True)
    assert proc.returncode == 0 and "integer constant" not in proc.stderr, proc.stderr
    assert _compile_run(out, tmp_path, timeout=5) == _compile_run(src, tmp_path, name="orig")


# ---------------------------------------------------------------- size and depth

def _deep_nest(depth: int) -> str:
    its = [f"i{k}" for k in range(depth)]
    dims = "".join("[3]" for _ in its)
    lines = ["#include <stdio.h>", f"static double h{dims};", "", "void deep_swell(int n)", "{"]
    for k, it in enumerate(its):  # triangular: each loop starts at the one outside it
        lo = "0" if k == 0 else its[k - 1]
        lines.append("    " * (k + 1) + f"for (int {it} = {lo}; {it} < n; {it}++)")
    lhs = "h" + "".join(f"[{it} + 1]" for it in its)
    rhs = "h" + "".join(f"[{it}]" for it in its)
    lines.append("    " * (depth + 1) + f"{lhs} += 0.5 * {rhs} + {its[-1]};")
    lines += ["}", "", "int main(void)", "{", "    double *p = (double *)h;",
              "    for (int n = 0; n <= 2; n++) {",
              "        for (long k = 0; k < (long)(sizeof h / sizeof *p); k++)",
              "            p[k] = (double)(k % 7);",
              "        deep_swell(n);",
              "        double s = 0;",
              "        for (long k = 0; k < (long)(sizeof h / sizeof *p); k++)",
              "            s += p[k] * (double)(1 + k % 5);",
              '        printf("%d %.17g\\n", n, s);',
              "    }", "    return 0;", "}", ""]
    return "\n".join(lines)


def test_depth_12_nest_is_tiled_or_refused_in_bounded_time(tmp_path):
    src = tmp_path / "deep.c"
    src.write_text(_deep_nest(12))
    out = tmp_path / "tiled.c"
    t0 = time.monotonic()
    r = run_cli("tile", src, "--nest", "deep_swell", "--sizes", ",".join(["2"] * 12), "-o", out)
    elapsed = time.monotonic() - t0
    no_traceback(r)
    assert elapsed < 60, elapsed
    assert r.exit_code in (0, 1), r.stderr
    if r.exit_code == 1:
        assert headline(r.stderr)["kind"] == "refused"
        assert not out.exists()
        return
    assert _compile_run(out, tmp_path) == _compile_run(src, tmp_path, name="orig")
    t0 = time.monotonic()
    a = run_cli("analyze", "--json", src)
    assert time.monotonic() - t0 < 60
    assert a.exit_code == 0, a.stderr
    nest = json.loads(a.stdout)[str(src)]["nests"][0]
    assert nest["depth"] == 12 and nest["analysable"] is True


def _many_kernels(target_bytes: int) -> tuple[str, int]:
    parts = ["/* generated: many small tidal-basin kernels */\n"]
    size, k = len(parts[0]), 0
    while size < target_bytes:
        s = (f"void basin_{k}(int n, int m, double h[n][m], const double g[n][m])\n{{\n"
             f"    for (int i = 1; i < n; i++)\n        for (int j = 0; j < m; j++)\n"
             f"            h[i][j] = {k % 7 + 1}.0 * g[i][j] + h[i - 1][j];\n}}\n\n")
        parts.append(s)
        size += len(s)
        k += 1
    return "".join(parts), k


def _analyze_many(tmp_path: Path, target_bytes: int, limit_s: float) -> None:
    text, count = _many_kernels(target_bytes)
    src = tmp_path / "many_kernels.c"
    src.write_text(text)
    t0 = time.monotonic()
    r = run_cli("analyze", "--json", src)
    elapsed = time.monotonic() - t0
    no_traceback(r)
    assert r.exit_code == 0, r.stderr
    nests = json.loads(r.stdout)[str(src)]["nests"]
    assert len(nests) == count
    assert all(n["analysable"] and n["permutable_bands"] for n in nests)
    assert nests[-1]["selectors"][1] == f"basin_{count - 1}"
    assert elapsed < limit_s, f"analyze of {len(text)} bytes ({count} nests) took {elapsed:.1f} s"


def test_many_kernels_file_is_analysed(tmp_path):
    # ~60 KB (about 300 nests) in the suite; the 1 MB and 5 MB runs are opt-in (below).
    _analyze_many(tmp_path, 60_000, 60)


@pytest.mark.skipif(not os.environ.get("LOOPTILE_HOSTILE_BIG"),
                    reason="analyze of 1 MB and 5 MB inputs takes minutes; set LOOPTILE_HOSTILE_BIG=1 to run it")
@pytest.mark.parametrize("megabytes", [1, 5])
def test_megabyte_files_are_analysed_in_bounded_time(tmp_path, megabytes):
    _analyze_many(tmp_path, megabytes * 1_000_000, 120)
