"""Directives in the source: parsing (good and malformed, exact positions), the OpenMP
semantics of ``tile sizes``, carrying a directive out, idempotency, refusals.

Outside references:
- the system C compiler: every rewrite a test produces is compiled and run against the
  original with the sanitizers and the outputs compared bit for bit
  (kernel_files.same_results);
- the OpenMP API specification for what ``#pragma omp tile sizes(...)`` means: version 5.1
  (November 2020), section 2.11.9.1 "tile Construct" (www.openmp.org/spec-html/5.1/openmpsu53.html;
  the sub-section number is from memory), the same text as version 5.2, section 9.1 "tile
  Construct" (www.openmp.org/spec-html/5.2/openmpse55.html); cited beside the checks that use it.
"""
from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import pytest
from conftest import build, run_cli
from kernel_files import BLEND_TIDE, FADE_GLARE, GATHER_WAKE, SWEEP_SHOAL, c_file, kernel, same_results

from looptile import batch, directives, pipeline
from looptile.directives import JamDirective, UnrollDirective
from looptile.flags import CompileFlags
from looptile.transform.tile import TileRequest

pytestmark = pytest.mark.cc

NEST = ("    for (int i = 0; i < n; i++)\n"
        "        for (int j = 0; j < m; j++)\n"
        "            b[i][j] = a[i][j];\n")


def directive_file(tmp_path: Path, pragmas: list[str], name: str = "cases.c") -> tuple[Path, list[int]]:
    """One function per pragma, each pragma right before the same nest; the pragmas' lines."""
    text = "#define TS 16\n#define WIDTH (n)\n"
    lines = []
    for k, p in enumerate(pragmas):
        text += f"void case{k}(int n, int m, double b[n][m], double a[n][m])\n{{\n"
        lines.append(text.count("\n") + 1)
        text += f"    {p}\n" + NEST + "}\n"
    path = tmp_path / name
    path.write_text(text)
    return path, lines


def found_in(path: Path) -> list[directives.Found]:
    return directives.find(pipeline.load(str(path), CompileFlags()))


# ---------------------------------------------------------------- parsing: good directives

GOOD = [
    ("#pragma looptile tile(i=32, j=32)",
     dict(tile=TileRequest((("i", 32), ("j", 32)), None, "split"), split_fallback=True)),
    ("#pragma looptile tile(j=8) order(i, jj, j) remainder(clamp)",
     dict(tile=TileRequest((("j", 8),), ("i", "jj", "j"), "clamp"), split_fallback=False)),
    ("#pragma looptile order(j, i)", dict(tile=TileRequest((), ("j", "i"), "split"))),
    ("#pragma looptile tile(i=0x10, j=TS), remainder(split)",
     dict(tile=TileRequest((("i", 16), ("j", 16)), None, "split"), split_fallback=False,
          size_macros=(("TS", 16),))),
    ("#pragma looptile order(jj, ii, j, i) tile(i=4, j=2)",
     dict(tile=TileRequest((("i", 4), ("j", 2)), ("jj", "ii", "j", "i"), "split"))),
    ("#pragma looptile jam(i=4)", dict(tile=None, jam=JamDirective((("i", 4),)))),
    ("#pragma looptile tile(i=8, j=8) jam(i=2) scalarize",
     dict(tile=TileRequest((("i", 8), ("j", 8)), None, "split"), jam=JamDirective((("i", 2),)), scalarize=True)),
    ("#pragma looptile tile(i=8, j=8) tile(i=4, j=2) order(ii, jj, i.2, j.2, i, j)",
     dict(tile=TileRequest((("i", 8), ("j", 8)), ("ii", "jj", "i.2", "j.2", "i", "j"), "split"),
          levels=((("i", 4), ("j", 2)),))),
    ("#pragma omp tile sizes(4, 3)", dict(tile=TileRequest(((None, 4), (None, 3)), None, "split"))),
    ("#  pragma   omp  tile  sizes ( TS , (2) )",
     dict(tile=TileRequest(((None, 16), (None, 2)), None, "split"), size_macros=(("TS", 16),))),
    ("#pragma omp unroll partial(4)", dict(tile=None, unroll=UnrollDirective(4))),
    ("#pragma omp unroll partial", dict(unroll=UnrollDirective(None))),
    ("#pragma omp unroll full", dict(unroll=UnrollDirective(None, full=True))),
    ("#pragma omp unroll", dict(unroll=UnrollDirective(None))),
    ("#pragma looptile tile(i=4, \\\n        j=2) /* level one */",
     dict(tile=TileRequest((("i", 4), ("j", 2)), None, "split"))),
]


def test_good_directives_parse_into_requests(tmp_path):
    path, lines = directive_file(tmp_path, [p for p, _ in GOOD] + ["#pragma omp parallel for"])
    found = found_in(path)
    # the last pragma is OpenMP but no loop transformation: not a directive for looptile
    assert [f.pragma.line for f in found] == lines[:-1]
    for f, (text, want) in zip(found, GOOD):
        assert f.problem is None, (text, f.problem and f.problem.render())
        assert f.site is not None and f.site.line == f.pragma.line + 1 + text.count("\n"), text
        for field, value in want.items():
            assert getattr(f.directive, field) == value, (text, field)
        assert f.pragma.column == 5
        assert f.pragma.text == " ".join(re.sub(r"\\\n", " ", text).split())


# ---------------------------------------------------------------- parsing: malformed directives

END = object()  # the position right after the last character of the directive
BAD = [
    ("#pragma looptile tile(i=32) frob(2)", "error", "frob", "unknown clause 'frob' in '#pragma looptile'"),
    ("#pragma looptile tile(i=0)", "error", "0)", "the tile size of 'i' must be at least 1, not 0"),
    ("#pragma looptile tile(i=-4)", "error", "-4", "the tile size of 'i' must be at least 1, not -4"),
    ("#pragma looptile tile(i=4) order(j, i) order(i, j)", "error", "order(i, j)",
     "duplicate clause 'order' (first at column 32)"),
    ("#pragma looptile tile(i=4, i=8)", "error", "i=8", "loop 'i' is named twice in 'tile(...)'"),
    ("#pragma looptile tile(i 4)", "error", "i 4", "'tile(...)' takes NAME=VALUE items"),
    ("#pragma looptile tile(i=4", "error", END, "missing ')' to close 'tile(' (opened at column 26)"),
    ("#pragma looptile remainder(fast) tile(i=4)", "error", "fast", "remainder(...) is split or clamp"),
    ("#pragma looptile", "error", END, "'#pragma looptile' needs at least one clause"),
    ("#pragma looptile scalarize(yes) tile(i=4)", "error", "scalarize", "'scalarize' takes no arguments"),
    ("#pragma looptile tile(i=2.5)", "error", "2.5", "the tile size of 'i' '2.5' is not an integer"),
    ("#pragma looptile tile jam(i=2)", "error", "tile jam", "'tile' needs a parenthesised list"),
    ("#pragma looptile remainder(clamp)", "error", "remainder",
     "remainder(...) chooses how partial tiles run; it needs a tile(...) clause"),
    ("#pragma looptile tile(i=4) scalarize", "error", "scalarize",
     "scalarize keeps elements in locals between the jammed copies; it needs jam(...)"),
    ("#pragma looptile order(j, i) jam(i=2)", "error", "jam", "jam(...) with order(...) jams inside tiles"),
    ("#pragma looptile tile(i=4); order(j, i)", "error", ";", "expected a clause name"),
    ("#pragma omp tile sizes(4) sizes(4)", "error", "sizes(4)@2", "at most one sizes(...) clause"),
    ("#pragma omp tile", "error", END, "'#pragma omp tile' needs a sizes(...) clause"),
    ("#pragma omp tile size(4)", "error", "size(", "unknown clause 'size' in '#pragma omp tile'"),
    ("#pragma omp unroll partial(0)", "error", "0)", "the unroll factor must be at least 1, not 0"),
    ("#pragma omp unroll full partial(2)", "error", "partial", "at most one of full and partial"),
    # refusals: well formed, but not something this version carries out as written
    ("#pragma omp tile sizes(n, 4)", "refused", "n,", "sizes(...) item 1 'n' is not an integer constant"),
    ("#pragma omp tile sizes(4, WIDTH)", "refused", "WIDTH", "'WIDTH' is a macro whose value '(n)' is not an "
     "integer constant"),
    ("#pragma omp tile sizes(2 * 8)", "refused", "2 * 8", "'2 * 8' is not an integer constant"),
    ("#pragma omp tile sizes(auto)", "refused", "auto", "sizes(...) item 1 'auto' is not an integer constant, and "
     "the OpenMP sizes clause takes positive integer constant expressions"),
    ("#pragma looptile jam(i=auto)", "refused", "auto", "'auto': only tile sizes are chosen by looptile"),
    ("#pragma omp interchange permutation(2, 1)", "refused", "#pragma", "'#pragma omp interchange' (OpenMP 6.0) "
     "is not read by this version"),
]


def expected_column(line_text: str, marker) -> int:
    if marker is END:
        return len(line_text.rstrip()) + 1
    text, _, nth = str(marker).partition("@")
    at = -1
    for _ in range(int(nth or 1)):
        at = line_text.index(text, at + 1)
    return at + 1


def test_malformed_directives_at_exact_positions(tmp_path):
    path, lines = directive_file(tmp_path, [p for p, *_ in BAD])
    found = found_in(path)
    assert [f.pragma.line for f in found] == lines
    source = path.read_text().split("\n")
    for f, (text, kind, marker, message), line in zip(found, BAD, lines):
        assert f.problem is not None, text
        col = expected_column(source[line - 1], marker)
        head = f.problem.headline()
        assert head.startswith(f"{path}:{line}:{col}: {kind}: ") and message in head, (text, head)
        assert f.problem.source_line == source[line - 1]  # the caret display shows the directive


def test_directive_placement_problems(tmp_path):
    src = tmp_path / "placement.c"
    src.write_text(
        "void place(int n, double *a)\n{\n"
        "    #pragma looptile tile(i=4)\n"       # 3: followed by a statement, not a for
        "    a[0] = 1.0;\n"
        "    #pragma omp unroll partial(2)\n"    # 5: stacked on the next one
        "    #pragma looptile tile(i=4)\n"       # 6: under the one above
        "    for (int i = 0; i < n; i++)\n"
        "        a[i] = 2.0;\n"
        "#if 0\n"
        "    #pragma looptile tile(i=8)\n"       # 10: in a branch the preprocessor drops
        "#endif\n"
        "    #pragma looptile tile(i=4)\n"       # 12: a preprocessor line between it and its loop
        "#define TWICE 2\n"
        "    for (int i = 0; i < n; i++)\n"
        "        a[i] = 3.0;\n"
        "}\n")
    found = found_in(src)
    assert [f.pragma.line for f in found] == [3, 5, 6, 10, 12]
    heads = {f.pragma.line: f.problem.headline() if f.problem else None for f in found}
    assert heads[3] == (f"{src}:3:5: error: a loop-transformation directive must come right before a for "
                        "statement, but 'a' follows it")
    assert heads[5].startswith(f"{src}:5:5: refused: this directive applies to the loops that the directive at "
                               "line 6 generates; combining directives on one nest is not supported yet")
    assert heads[6].startswith(f"{src}:6:5: refused: the directive at line 5 applies to the loops this one "
                               "generates")
    assert found[3].inactive and heads[10] is None
    assert heads[12].startswith(f"{src}:12:5: refused: the preprocessor line '#define TWICE 2' stands between "
                                "the directive and its loop")


# ---------------------------------------------------------------- carrying out, checked by running

def write(tmp_path: Path, name: str, kernels, defines: str = "") -> Path:
    path = tmp_path / name
    path.write_text(c_file(kernels, defines))
    return path


def test_directives_carried_out_run_bit_for_bit(tmp_path):
    src = write(tmp_path, "tide_mix.c", [
        ("blend_tide", kernel("blend_tide", "#pragma omp tile sizes(TS, 3)", BLEND_TIDE, "mix the tide levels")),
        ("fade_glare", kernel("fade_glare", "#pragma looptile tile(j=4) order(jj, i, j) remainder(clamp)",
                              FADE_GLARE, "fade the glare of the quay lamps")),
        ("gather_wake", kernel("gather_wake", "#pragma looptile tile(i=3, j=2, k=5)", GATHER_WAKE,
                               "gather the wake of each hull")),
        ("fade_twice", kernel("fade_twice", "#pragma looptile jam(i=2)", FADE_GLARE, "jammed by two")),
        ("blend_back", kernel("blend_back", "#pragma omp unroll partial(3)", BLEND_TIDE, "unrolled by three")),
        ("blend_levels", kernel("blend_levels", "#pragma looptile tile(i=8, j=4) tile(i=4, j=2)", BLEND_TIDE,
                                "two levels of tiles")),
    ], defines="#define TS 4\n")
    original = src.read_bytes()
    out = tmp_path / "out"
    r = run_cli("apply", src, "-o", out, "--jobs", "1")
    assert r.exit_code == 0, r.stderr
    new = (out / "tide_mix.c").read_bytes()
    assert src.read_bytes() == original  # -o leaves the input alone
    text = new.decode()
    assert not re.search(r"^\s*#\s*pragma", text, re.M)  # every directive replaced by its guard comment
    assert text.count("/* looptile:") == 6
    assert "made by: looptile apply " + str(src) + " (directive at line " in text
    line = original.decode().split("\n").index("    #pragma omp tile sizes(TS, 3)") + 1
    assert f"(directive at line {line}: #pragma omp tile sizes(TS, 3))" in text
    same_results(src, out / "tide_mix.c", tmp_path)


def headers(text: str) -> list[str]:
    """The iterators of the for headers, in text order."""
    return re.findall(r"for \((?:int )?(\w+) =", text)


def spec_tile_order(loops: list[list[int]], sizes: list[int]) -> list[tuple[int, ...]]:
    """The execution order that OpenMP 5.1, section 2.11.9.1 (tile Construct) defines, computed
    from its text: with the logical iteration numbers (i_1..i_n) of the associated loops, tile
    T(a_1..a_n) holds the iterations with s_k*a_k <= i_k < s_k*a_k + s_k; "the floor loops
    iterate over all tiles ... in lexicographic order with respect to their indices
    (a_1,...,a_n) and the tile loops iterate over the iterations in T in the lexicographic
    order of the corresponding iteration vectors".  (The specification also lets an
    implementation reorder iterations of partial tiles; looptile never does, so the order is
    exactly this one for every tile.)"""
    import itertools
    points = list(itertools.product(*[range(len(v)) for v in loops]))
    points.sort(key=lambda p: tuple(p[k] // sizes[k] for k in range(len(sizes))) + p)
    return [tuple(loops[k][p[k]] for k in range(len(p))) for p in points]


def test_omp_tile_sizes_follows_the_specification(tmp_path, cc):
    # OpenMP 5.1 section 2.11.9.1 (5.2 section 9.1): "The tile construct controls the outer n
    # loops of the associated loop nest, where n is the number of items in size-list"; of the
    # 2n generated loops "f1,...,fn are the floor loops and t1,...,tn are the tile loops", the
    # floor loops outermost. Here n = 2 of 3 loops: floor loops of i and j, then the tile
    # loops of i and j, then k, each group in the original order.
    loops = ("    for (int i = 1; i < n; i += 2)\n"      # a step: sizes count logical iterations
             "        for (int j = 0; j < m; j++)\n"
             "            for (int k = 0; k < 2; k++)\n"
             "                b[i][j] += a[i][j] * (double)(k + 1);\n")
    src = tmp_path / "floor_order.c"
    src.write_text(kernel("spread_surge", "#pragma omp tile sizes(3, 2)", loops, "spread the surge"))
    r = run_cli("apply", src, "--in-place", "--jobs", "1")
    assert r.exit_code == 0, r.stderr
    text = src.read_text()
    assert headers(text)[:5] == ["ii", "jj", "i", "j", "k"]
    assert re.search(r"ii = \(.*\) \? ii \+ 6 : ", text)  # 3 iterations of a step-2 loop per tile
    assert re.search(r"jj = \(.*\) \? jj \+ 2 : ", text)
    # Run the generated loops with the body replaced by a trace of (i, j, k), and compare the
    # visiting order with the order computed from the specification's definition.
    body = "b[i][j] += a[i][j] * (double)(k + 1);"
    assert text.count(body) == 2  # split style: whole tiles and partial tiles
    traced = tmp_path / "traced.c"
    traced.write_text("#include <stdio.h>\n" + text.replace(body, "trace_point(i, j, k);")
                      .replace("static void spread_surge", "static void trace_point(int i, int j, int k)\n"
                               "{\n    printf(\"%d %d %d\\n\", i, j, k);\n}\n\nstatic void spread_surge")
                      + "int main(void)\n{\n    static double a[12][5], b[12][5];\n"
                      "    spread_surge(12, 5, b, a);\n    return 0;\n}\n")
    exe = tmp_path / "traced.exe"
    build(traced, exe)
    got = [tuple(map(int, ln.split())) for ln in subprocess.run([str(exe)], capture_output=True, text=True,
                                                                 check=True).stdout.split("\n") if ln]
    want = spec_tile_order([list(range(1, 12, 2)), list(range(5)), [0, 1]], [3, 2])
    assert got == want
    assert sorted(got) == sorted(want) and len(got) == 6 * 5 * 2


def test_idempotent_and_guard_in_place_of_the_directive(tmp_path):
    src = write(tmp_path, "basin.c", [
        ("blend_tide", kernel("blend_tide", "#pragma looptile tile(i=4, j=4)", BLEND_TIDE, "tide levels"))])
    before = src.read_text().split("\n")
    line = before.index("    #pragma looptile tile(i=4, j=4)") + 1
    r = run_cli("apply", src, "--in-place", "--jobs", "1")
    assert r.exit_code == 0, r.stderr
    once = src.read_bytes()
    after = once.decode().split("\n")
    assert after[:line - 1] == before[:line - 1]  # everything before the directive is untouched
    assert after[line - 1] == "    /* looptile: tiled (i, j) by (4, 4), order ii, jj, i, j, remainder split."
    assert f"made by: looptile apply {src} (directive at line {line}: #pragma looptile tile(i=4, j=4)) */" \
        in once.decode()
    r2 = run_cli("apply", src, "--in-place", "--jobs", "1")
    assert r2.exit_code == 0 and src.read_bytes() == once
    assert "0 directive(s)" in r2.stdout
    shutil.copy(src, tmp_path / "basin_once.c")
    (tmp_path / "basin_orig.c").write_text("\n".join(before))
    same_results(tmp_path / "basin_orig.c", tmp_path / "basin_once.c", tmp_path)


def test_directive_on_an_illegal_nest_is_refused_with_the_witness(tmp_path):
    src = write(tmp_path, "shoal.c", [
        ("sweep_shoal", kernel("sweep_shoal", "#pragma omp tile sizes(4, 4)", SWEEP_SHOAL, "in-place sweep")),
        ("blend_tide", kernel("blend_tide", "#pragma omp tile sizes(4, 4)", BLEND_TIDE, "tide levels"))])
    original = src.read_bytes()
    nest_line = original.decode().split("\n").index(SWEEP_SHOAL.split("\n")[0]) + 1
    r = run_cli("apply", src, "--in-place", "--jobs", "1")
    assert r.exit_code == 1
    first = r.stderr.split("\n")[0]
    assert first.startswith(f"{src}:{nest_line}:5: refused: tiling (i, j) would run ")
    assert "(flow dependence)" in first or "(anti dependence)" in first
    assert "for example with" in r.stderr and f"S1 is the statement at {src}:{nest_line + 2}" in r.stderr
    new = src.read_text()
    # the refused directive and its nest are exactly as they were; the legal one is carried out
    refused_part = "    #pragma omp tile sizes(4, 4)\n" + SWEEP_SHOAL
    assert refused_part in new and new.count("\n    #pragma omp tile") == 1
    assert new.count("/* looptile:") == 1
    assert new[:new.index("static void blend_tide")] == original.decode()[:original.decode().index(
        "static void blend_tide")]
    same_results_dir = tmp_path / "run"
    same_results_dir.mkdir()
    (same_results_dir / "shoal_orig.c").write_bytes(original)
    same_results(same_results_dir / "shoal_orig.c", src, same_results_dir)


def test_non_constant_size_refused_and_file_untouched(tmp_path):
    src = write(tmp_path, "surge.c", [
        ("blend_tide", kernel("blend_tide", "#pragma omp tile sizes(m, 8)", BLEND_TIDE, "width as a size"))])
    original = src.read_bytes()
    line = original.decode().split("\n").index("    #pragma omp tile sizes(m, 8)") + 1
    r = run_cli("apply", src, "--in-place", "--jobs", "1")
    assert r.exit_code == 1
    assert r.stderr.startswith(f"{src}:{line}:28: refused: sizes(...) item 1 'm' is not an integer constant")
    assert src.read_bytes() == original


def test_unrolling_and_jamming_directives(tmp_path, monkeypatch):
    src = write(tmp_path, "lamp.c", [
        ("gather_wake", kernel("gather_wake", "#pragma looptile tile(i=4, j=4) jam(i=2) scalarize", GATHER_WAKE,
                               "register tiles inside cache tiles")),
        ("gather_jam", kernel("gather_jam", "#pragma looptile jam(i=2, j=2) scalarize", GATHER_WAKE, "jammed")),
        ("fade_glare", kernel("fade_glare", "#pragma omp unroll partial(3)", FADE_GLARE, "unrolled by three")),
        ("fade_full", kernel("fade_full", "#pragma omp unroll full", FADE_GLARE, "fully unrolled")),
        ("fade_some", kernel("fade_some", "#pragma omp unroll", FADE_GLARE, "factor left open"))])
    original = src.read_bytes()
    lines = [n + 1 for n, t in enumerate(original.decode().split("\n")) if t.startswith("    #pragma")]
    out = tmp_path / "out"
    r = run_cli("apply", src, "-o", out, "--jobs", "1")
    assert r.exit_code == 1
    heads = [ln for ln in r.stderr.split("\n") if ": refused: " in ln or ": error: " in ln]
    assert heads == [
        # full unrolling needs a constant trip count (refused at the loop, whose bound is the reason)
        f"{src}:{lines[3] + 1}:5: refused: full unrolling needs a constant trip count, and the bounds of 'i' use "
        "'n'; unroll it partially instead",
        f"{src}:{lines[4]}:5: refused: not carried out: the directive leaves the unroll factor to the "
        "implementation, and looptile needs one; write partial(N)"]
    text = (out / "lamp.c").read_text()
    assert "tiled (i, j) by (4, 4)" in text and "unrolled i by 3, with a remainder loop" in text
    assert "3 nest(s) rewritten, 2 refused" in r.stdout
    same_results(src, out / "lamp.c", tmp_path)
    # A version without the jam job (or without jam inside tiles) refuses those honestly, writes nothing.
    monkeypatch.setattr(batch, "_copy_jobs", lambda: None)
    monkeypatch.setattr(batch, "_tile_takes", lambda *names: False)
    r = run_cli("apply", src, "--in-place", "--jobs", "1")
    assert r.exit_code == 1 and src.read_bytes() == original
    unavailable = "refused: not carried out: unroll-and-jam is not available in this version"
    for line in lines[:3]:
        assert f"{src}:{line}:5: {unavailable}" in r.stderr
    levels = write(tmp_path, "levels.c", [("blend_tide", kernel("blend_tide", "#pragma looptile tile(i=8) "
                                                                "tile(i=4)", BLEND_TIDE, "two levels"))])
    before = levels.read_bytes()
    line = before.decode().split("\n").index("    #pragma looptile tile(i=8) tile(i=4)") + 1
    r = run_cli("apply", levels, "--in-place", "--jobs", "1")
    assert r.exit_code == 1 and levels.read_bytes() == before
    assert r.stderr.startswith(f"{levels}:{line}:32: refused: not carried out: multi-level tiling is not supported "
                               "yet")


def test_directive_around_another_directive(tmp_path):
    loops = ("    for (int k = 0; k < 3; k++) {\n"
             "        #pragma omp tile sizes(4, 4)\n"
             "        for (int i = 0; i < n; i++)\n"
             "            for (int j = 0; j < m; j++)\n"
             "                b[i][j] += a[i][j] * (double)k;\n"
             "    }\n")
    src = write(tmp_path, "ebb.c", [("layer_ebb", kernel("layer_ebb", "#pragma omp tile sizes(2)", loops,
                                                          "three layers of the ebb"))])
    original = src.read_bytes()
    outer = original.decode().split("\n").index("    #pragma omp tile sizes(2)") + 1
    r = run_cli("apply", src, "--in-place", "--jobs", "1")
    assert r.exit_code == 1
    assert r.stderr.startswith(f"{src}:{outer + 2}:9: refused: '#pragma omp tile sizes(4, 4)' inside the nest")
    assert f"(this is why the directive at {src}:{outer}:5 is not carried out: #pragma omp tile sizes(2))" \
        in r.stderr
    assert (f"the directive at line {outer + 2} inside this nest is carried out in this run, and looptile does not "
            "analyse the loops it generates, so this one stays refused" in r.stderr)
    once = src.read_bytes()
    assert once.count(b"/* looptile:") == 1 and b"    #pragma omp tile sizes(2)\n" in once
    r2 = run_cli("apply", src, "--in-place", "--jobs", "1")  # the outer one meets the generated loops
    assert r2.exit_code == 1 and src.read_bytes() == once
    tile_loop = next(n + 1 for n, t in enumerate(once.decode().split("\n")) if "for (int ii = 0;" in t)
    assert r2.stderr.startswith(f"{src}:{tile_loop}:34: refused: the step of loop 'ii' is not ++")
    (tmp_path / "ebb_orig.c").write_bytes(original)
    same_results(tmp_path / "ebb_orig.c", src, tmp_path)
