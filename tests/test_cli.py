"""The command line: every exit status, message format, and what is (not) written.

Exit status: 0 done; 1 refused; 2 usage, read, parse or write error; 3 internal.
Messages: ``file:line:col: error|refused: ...`` on the first line, then the
source line with a caret under the column, then indented details.
"""
from __future__ import annotations

import json
import os
import re
import shutil
import stat
import subprocess
from pathlib import Path

import pytest
from conftest import FIXTURES, SAMPLES, build, headline, run_cli, run_program

pytestmark = pytest.mark.cc


def write(path: Path, text: str) -> Path:
    path.write_text(text)
    return path


def assert_nothing_written(result, out: Path | None = None):
    assert result.stdout_bytes == b"", result.stdout_bytes[:200]
    if out is not None:
        assert not out.exists()


def caret_column(stderr: str) -> int:
    """The 1-based column the caret of a message points at (second and third lines)."""
    lines = stderr.split("\n")
    src, caret = lines[1], lines[2]
    assert caret.rstrip().endswith("^"), stderr
    assert src.startswith("    ") and caret.startswith("    "), stderr
    return len(caret.rstrip()) - 4  # the caret line is the source's indentation then '^'


def refusal_at(stderr: str, path: Path, line_text: str, needle: str, lines: list[str]) -> None:
    """The headline is PATH:LINE:COL: refused: with LINE:COL the first byte of ``needle`` on the
    line containing ``line_text``; the caret is under the same column."""
    h = headline(stderr)
    assert h["kind"] == "refused", stderr
    assert h["path"] == str(path), stderr
    line = next(k for k, t in enumerate(lines, 1) if line_text in t)
    col = lines[line - 1].index(needle) + 1
    assert (int(h["line"]), int(h["col"])) == (line, col), (stderr, line, col)
    assert stderr.split("\n")[1] == "    " + lines[line - 1]
    assert caret_column(stderr) == col, stderr


# ---------------------------------------------------------------- exit 0

def test_tile_prints_whole_file_equal_to_output_file(tmp_path):
    src = tmp_path / "grid_turn.c"
    shutil.copy(SAMPLES / "grid_turn.c", src)
    out = tmp_path / "out.c"
    r1 = run_cli("tile", src, "--nest", "turn_grid", "--sizes", "16,16")
    r2 = run_cli("tile", src, "--nest", "turn_grid", "--sizes", "16,16", "-o", out)
    assert r1.exit_code == 0 and r2.exit_code == 0, (r1.stderr, r2.stderr)
    assert r2.stdout_bytes == b""
    assert r1.stdout_bytes == out.read_bytes()
    assert src.read_bytes() == (SAMPLES / "grid_turn.c").read_bytes()
    assert r1.stderr == ""


def _git_repo(tmp_path: Path, files: dict[str, Path]) -> Path:
    repo = tmp_path / "repo"
    repo.mkdir()
    for name, source in files.items():
        (repo / name).parent.mkdir(parents=True, exist_ok=True)
        shutil.copy(source, repo / name)
    subprocess.run(["git", "init", "-q", "."], cwd=repo, check=True)
    return repo


DIFF_CASES = [
    ("basin_relax.c", SAMPLES / "basin_relax.c", ["--nest", "relax_basin", "--sizes", "32,32"]),
    ("kernels/tracer_mix.c", SAMPLES / "tracer_mix.c", ["--nest", "mix_tracers", "--sizes", "4,5,3",
                                                        "--order", "ii,kk,jj,i,k,j"]),
    ("crlf.c", FIXTURES / "crlf" / "input.c", ["--nest", "accumulate_hours", "--sizes", "4,5"]),
    ("tabs.c", FIXTURES / "tabs" / "input.c", ["--nest", "tone_map", "--sizes", "3,7"]),
    ("latin1.c", FIXTURES / "latin1_comment" / "input.c", ["--nest", "scale_exposure", "--sizes", "5,5"]),
]


@pytest.mark.skipif(shutil.which("git") is None or shutil.which("patch") is None, reason="needs git and GNU patch")
@pytest.mark.parametrize("name,source,args", DIFF_CASES, ids=[c[0] for c in DIFF_CASES])
def test_diff_applies_with_git_apply_and_patch(tmp_path, name, source, args):
    repo = _git_repo(tmp_path, {name: source})
    out = tmp_path / "expected.c"
    r_diff = run_cli("tile", name, *args, "--diff", cwd=repo)
    r_out = run_cli("tile", name, *args, "-o", out, cwd=repo)
    assert r_diff.exit_code == 0, r_diff.stderr
    assert r_out.exit_code == 0, r_out.stderr
    diff = r_diff.stdout_bytes
    assert diff.startswith(f"--- a/{name}\n+++ b/{name}\n".encode()), diff[:100]
    assert (repo / name).read_bytes() == source.read_bytes(), "--diff changed the file"
    patch_file = tmp_path / "change.diff"
    patch_file.write_bytes(diff)
    # outside check: git apply accepts the diff and yields the -o output
    proc = subprocess.run(["git", "apply", "--whitespace=nowarn", str(patch_file)], cwd=repo,
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    assert (repo / name).read_bytes() == out.read_bytes()
    # outside check: GNU patch -p1 accepts the diff and yields the -o output
    shutil.copy(source, repo / name)
    proc = subprocess.run(["patch", "-p1", "--quiet", "-i", str(patch_file)], cwd=repo, capture_output=True,
                          text=True)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert (repo / name).read_bytes() == out.read_bytes()


def test_in_place_keeps_mode_and_leaves_no_temp_files(tmp_path):
    src = tmp_path / "basin_relax.c"
    shutil.copy(SAMPLES / "basin_relax.c", src)
    os.chmod(src, 0o640)
    expected = run_cli("tile", src, "--nest", "relax_basin", "--sizes", "8,8")
    assert expected.exit_code == 0, expected.stderr
    r = run_cli("tile", src, "--nest", "relax_basin", "--sizes", "8,8", "--in-place")
    assert r.exit_code == 0, r.stderr
    assert r.stdout_bytes == b""
    assert src.read_bytes() == expected.stdout_bytes
    assert stat.S_IMODE(os.stat(src).st_mode) == 0o640
    assert sorted(os.listdir(tmp_path)) == ["basin_relax.c"]


def test_analyze_exit_0_text(tmp_path):
    r = run_cli("analyze", SAMPLES / "tracer_mix.c")
    assert r.exit_code == 0, r.stderr
    assert str(SAMPLES / "tracer_mix.c") in r.stdout
    assert "mix_tracers" in r.stdout


def _nest(doc: dict, path: Path, function: str) -> dict:
    nests = [n for n in doc[str(path)]["nests"] if n["function"] == function]
    assert nests, doc[str(path)]
    return nests[0]


def test_analyze_json_documents(tmp_path):
    files = [SAMPLES / "grid_turn.c", SAMPLES / "tracer_mix.c", SAMPLES / "shoal_sweep.c"]
    r = run_cli("analyze", "--json", *files)
    assert r.exit_code == 0, r.stderr
    doc = json.loads(r.stdout)
    assert set(doc) == {str(f) for f in files}
    for f in files:
        assert doc[str(f)]["error"] is None

    turn = _nest(doc, files[0], "turn_grid")
    assert turn["selectors"][:2] == [f"L{turn['line']}", "turn_grid"]
    text = files[0].read_text().split("\n")
    assert text[turn["line"] - 1].lstrip().startswith("for (int i = 0; i < n; i++)")
    assert turn["column"] == text[turn["line"] - 1].index("for") + 1
    assert turn["depth"] == 2 and len(turn["loops"]) == 2
    assert [lp["iterator"] for lp in turn["loops"]] == ["i", "j"]
    assert turn["loops"][1] | {"line": 0} == {"iterator": "j", "type": "int", "start": "0", "condition": "j < m",
                                                "step": 1, "direction": "up", "line": 0,
                                                "column": text[turn["line"]].index("for") + 1}
    assert turn["dependences"] == []
    assert turn["analysable"] is True and turn["perfect"] is True and turn["reason"] is None
    assert turn["permutable_bands"] == [["i", "j"]]

    mm = _nest(doc, files[1], "mix_tracers")
    assert mm["depth"] == 3
    on_c = [d for d in mm["dependences"] if d["array"] == "C"]
    assert {d["kind"] for d in on_c} == {"flow", "anti", "output"}
    for d in on_c:
        # every pair on C[i][j] is in the same (i, j), a later k
        assert d["direction"] == ["=", "=", "<"], d
    assert all(d["array"] == "C" for d in mm["dependences"])  # A and B are only read
    assert mm["permutable_bands"] == [["i", "j", "k"]]

    shoal = _nest(doc, files[2], "sweep_shoal")
    flows = [d for d in shoal["dependences"] if d["kind"] == "flow"]
    assert len(flows) == 1 and flows[0]["array"] == "h"
    assert flows[0]["distance"] == [1, -1]
    assert flows[0]["direction"] == ["<", ">"]
    assert shoal["permutable_bands"] == []


# ---------------------------------------------------------------- exit 1: refusals

def test_illegal_tiling_has_a_checkable_witness(tmp_path):
    src = SAMPLES / "shoal_sweep.c"
    out = tmp_path / "out.c"
    r = run_cli("tile", src, "--nest", "sweep_shoal", "--sizes", "8,8", "-o", out)
    assert r.exit_code == 1, r.stderr
    assert_nothing_written(r, out)
    h = headline(r.stderr)
    assert h["kind"] == "refused"
    m = re.search(r"would run S1\(i=(-?\d+), j=(-?\d+)\) before S1\(i=(-?\d+), j=(-?\d+)\), but "
                  r"S1\(i=\3, j=\4\) writes h\[(-?\d+)\]\[(-?\d+)\], which S1\(i=\1, j=\2\) reads \(flow dependence\)",
                  h["msg"])
    assert m, h["msg"]
    si, sj, wi, wj, ei, ej = map(int, m.groups())  # sink (runs too early), source (writes), element
    # The witness is a real dependence: the source writes h[wi][wj]; the sink reads h[si-1][sj+1].
    assert (ei, ej) == (wi, wj) == (si - 1, sj + 1)
    # ... the source runs first in the original order ...
    assert (wi, wj) < (si, sj)
    # ... and 8x8 tiles from the loops' starts (i from 1, j from 0) run the sink first.
    def tiled(i, j):
        return ((i - 1) // 8, j // 8, i, j)
    assert tiled(si, sj) < tiled(wi, wj)
    ex = re.search(r"for example with n = (\d+), m = (\d+)", r.stderr)
    assert ex, r.stderr
    n, mm = map(int, ex.groups())
    for i, j in ((si, sj), (wi, wj)):
        assert 1 <= i < n and 0 <= j < mm - 1


CONSTRUCTS = {
    "break": ("""\
/* Harbour camera: stop at the first saturated pixel of each row (early exit). */
void clip_rows(int h, int w, float img[h][w])
{
    for (int y = 0; y < h; y++)
        for (int x = 0; x < w; x++) {
            if (img[y][x] > 255.0f)
                break;
            img[y][x] = img[y][x] * 0.5f;
        }
}
""", "break;", "break"),
    "unknown-call": ("""\
double tide_phase(double t);

void predict(int n, int m, double lvl[n][m])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            lvl[i][j] = 0.5 * tide_phase(lvl[i][j]);
}
""", "tide_phase(lvl", "tide_phase"),
    "pointer-dereference": ("""\
void scale(int n, int m, double a[n][m], const double *gain)
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            a[i][j] = a[i][j] * *gain;
}
""", "*gain;", "*gain"),
    "non-affine-subscript": ("""\
void gather(int n, int m, double a[n][m], const double b[n][m], const int row[n])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            a[i][j] = b[row[i]][j] + 1.0;
}
""", "b[row[i]]", "row[i]"),
    "non-affine-product": ("""\
void spread(int n, int m, double a[n][m], const double b[])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            a[i][j] = b[i * j];
}
""", "b[i * j]", "i * j"),
    # a macro earlier on the line must not shift the column (columns are of the original file)
    "non-affine-after-macro": ("""\
#define SPREAD_WEIGHT 0.25
void spread(int n, int m, double a[n][m], const double b[])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            a[i][j] = SPREAD_WEIGHT * b[i * j];
}
""", "b[i * j]", "i * j"),
    # an iterator declared before its loop whose final value is read after the nest
    "iterator-used-after": ("""\
int clear_frame(int h, int w, float img[h][w])
{
    int y, x;
    for (y = 0; y < h; y++)
        for (x = 0; x < w; x++)
            img[y][x] = 0.0f;
    return y + x;
}
""", "return y + x;", "y + x"),
    "tab-indented-deref": ("""\
void scale(int n, int m, double a[n][m], const double *gain)
{
\tfor (int i = 0; i < n; i++)
\t\tfor (int j = 0; j < m; j++)
\t\t\ta[i][j] = a[i][j] * gain[0] + *gain;
}
""", "+ *gain", "*gain"),
}


@pytest.mark.parametrize("case", sorted(CONSTRUCTS))
def test_unsupported_construct_is_refused_at_its_position(tmp_path, case):
    text, line_text, needle = CONSTRUCTS[case]
    src = write(tmp_path / f"{case}.c", text)
    out = tmp_path / "out.c"
    r = run_cli("tile", src, "--nest", "L" + str(next(k for k, t in enumerate(text.split("\n"), 1) if "for (" in t)),
                "--sizes", "4,4", "-o", out)
    assert r.exit_code == 1, r.stderr
    assert_nothing_written(r, out)
    refusal_at(r.stderr, src, line_text, needle, text.split("\n"))
    assert src.read_text() == text


def test_gnuc_branch_in_own_code_is_refused(tmp_path):
    text = """\
/* The mixing weight depends on the compiler: the analysis must not pick a branch
 * the real build would not take. */
#ifdef __GNUC__
#define MIX_LAYERS 8
#else
#define MIX_LAYERS 4
#endif

static double mix[8][32];

void stir(int n)
{
    for (int k = 0; k < MIX_LAYERS; k++)
        for (int j = 0; j < n; j++)
            mix[k][j] = 0.5 * mix[k][j];
}
"""
    src = write(tmp_path / "stir.c", text)
    out = tmp_path / "out.c"
    r = run_cli("tile", src, "--nest", "stir", "--sizes", "4,4", "-o", out)
    assert r.exit_code == 1, r.stderr
    assert_nothing_written(r, out)
    h = headline(r.stderr)
    assert h["kind"] == "refused" and h["path"] == str(src)
    assert "__GNUC__" in h["msg"]


def test_already_rewritten_nest_needs_force(tmp_path):
    src = tmp_path / "grid_turn.c"
    shutil.copy(SAMPLES / "grid_turn.c", src)
    once = tmp_path / "once.c"
    assert run_cli("tile", src, "--nest", "turn_grid", "--order", "j,i", "-o", once).exit_code == 0
    again = tmp_path / "again.c"
    r = run_cli("tile", once, "--nest", "turn_grid", "--order", "i,j", "-o", again)
    assert r.exit_code == 1, r.stderr
    assert_nothing_written(r, again)
    assert "guard comment" in headline(r.stderr)["msg"]
    r = run_cli("tile", once, "--nest", "turn_grid", "--order", "i,j", "--force", "-o", again)
    assert r.exit_code == 0, r.stderr
    assert again.read_bytes().count(b"/* looptile:") == 2


# ---------------------------------------------------------------- exit 2: usage, read, parse, write

USAGE_CASES = {
    "unknown-function": ["--nest", "no_such_kernel", "--sizes", "4,4"],
    "no-loop-on-line": ["--nest", "L3", "--sizes", "4,4"],
    "line-beyond-file": ["--nest", "L9999", "--sizes", "4,4"],
    "second-nest-missing": ["--nest", "turn_grid:2", "--sizes", "4,4"],
    "sizes-not-a-number": ["--nest", "turn_grid", "--sizes", "4,x"],
    "sizes-zero": ["--nest", "turn_grid", "--sizes", "0,4"],
    "sizes-too-many": ["--nest", "turn_grid", "--sizes", "4,4,4"],
    "sizes-unknown-loop": ["--nest", "turn_grid", "--sizes", "q=4"],
    "order-unknown-loop": ["--nest", "turn_grid", "--sizes", "4,4", "--order", "ii,jj,i,q"],
    "order-point-outside-tile": ["--nest", "turn_grid", "--sizes", "4,4", "--order", "i,ii,jj,j"],
    "order-missing-loop": ["--nest", "turn_grid", "--sizes", "4,4", "--order", "ii,jj,i"],
    "nothing-requested": ["--nest", "turn_grid"],
    "two-outputs": ["--nest", "turn_grid", "--sizes", "4,4", "--diff", "--in-place"],
}


USAGE_RUNS = [(case, "-o") for case in sorted(USAGE_CASES) if case != "two-outputs"] + \
    [(case, "--in-place") for case in ("unknown-function", "sizes-not-a-number", "order-point-outside-tile",
                                       "two-outputs")]


@pytest.mark.parametrize("case,mode", USAGE_RUNS)
def test_usage_errors_exit_2_and_write_nothing(tmp_path, case, mode):
    args = USAGE_CASES[case]
    src = tmp_path / "grid_turn.c"
    shutil.copy(SAMPLES / "grid_turn.c", src)
    out = tmp_path / "out.c"
    extra = ["-o", str(out)] if mode == "-o" else ([] if "--in-place" in args else ["--in-place"])
    r = run_cli("tile", src, *args, *extra)
    assert r.exit_code == 2, (r.exit_code, r.stderr)
    assert_nothing_written(r, out)
    assert src.read_bytes() == (SAMPLES / "grid_turn.c").read_bytes()
    assert sorted(os.listdir(tmp_path)) == ["grid_turn.c"]
    first = r.stderr.split("\n")[0]
    assert re.match(rf"^({re.escape(str(src))}(:\d+(:\d+)?)?: )?error: \S", first), r.stderr


def test_selector_errors_name_the_file(tmp_path):
    src = tmp_path / "grid_turn.c"
    shutil.copy(SAMPLES / "grid_turn.c", src)
    for sel in ("no_such_kernel", "L3", "turn_grid:2"):
        r = run_cli("tile", src, "--nest", sel, "--sizes", "4,4")
        assert r.exit_code == 2
        assert r.stderr.startswith(f"{src}:") and ": error: " in r.stderr.split("\n")[0], r.stderr
    r = run_cli("tile", src, "--nest", "L3", "--sizes", "4,4")
    assert r.stderr.startswith(f"{src}:3: error: "), r.stderr


def test_missing_file_exit_2(tmp_path):
    missing = tmp_path / "no_such_file.c"
    out = tmp_path / "out.c"
    r = run_cli("tile", missing, "--nest", "f", "--sizes", "4", "-o", out)
    assert r.exit_code == 2
    assert_nothing_written(r, out)
    assert r.stderr.startswith(f"{missing}: error: "), r.stderr
    r = run_cli("analyze", missing)
    assert r.exit_code == 2
    r = run_cli("analyze", "--json", missing, SAMPLES / "grid_turn.c")
    assert r.exit_code == 2
    doc = json.loads(r.stdout)
    assert doc[str(missing)]["error"].startswith(f"{missing}: error: ")
    assert doc[str(missing)]["nests"] == []
    assert doc[str(SAMPLES / "grid_turn.c")]["error"] is None


def test_syntax_error_exit_2_with_position(tmp_path):
    text = """\
void settle(int n, double a[n][n])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            a[i][j] = a[i][j] * 0.5
}
"""
    src = write(tmp_path / "settle.c", text)
    out = tmp_path / "out.c"
    r = run_cli("tile", src, "--nest", "settle", "--sizes", "4,4", "-o", out)
    assert r.exit_code == 2, r.stderr
    assert_nothing_written(r, out)
    h = headline(r.stderr)
    assert h["kind"] == "error" and h["path"] == str(src)
    # the parser notices the missing ';' at the end of line 5 or at the '}' of line 6
    assert int(h["line"]) in (5, 6), r.stderr
    assert src.read_text() == text


def test_write_error_exit_2(tmp_path):
    src = tmp_path / "grid_turn.c"
    shutil.copy(SAMPLES / "grid_turn.c", src)
    r = run_cli("tile", src, "--nest", "turn_grid", "--sizes", "4,4", "-o", tmp_path / "no_dir" / "out.c")
    assert r.exit_code == 2, r.stderr
    assert "error:" in r.stderr.split("\n")[0]
    assert sorted(os.listdir(tmp_path)) == ["grid_turn.c"]


@pytest.mark.parametrize("mode", ["-o", "--in-place", "stdout"])
def test_refusal_writes_nothing(tmp_path, mode):
    src = tmp_path / "shoal_sweep.c"
    shutil.copy(SAMPLES / "shoal_sweep.c", src)
    os.chmod(src, 0o640)
    out = tmp_path / "out.c"
    extra = {"-o": ["-o", str(out)], "--in-place": ["--in-place"], "stdout": []}[mode]
    r = run_cli("tile", src, "--nest", "sweep_shoal", "--sizes", "8,8", *extra)
    assert r.exit_code == 1
    assert_nothing_written(r, out)
    assert src.read_bytes() == (SAMPLES / "shoal_sweep.c").read_bytes()
    assert stat.S_IMODE(os.stat(src).st_mode) == 0o640
    assert sorted(os.listdir(tmp_path)) == ["shoal_sweep.c"]


# ---------------------------------------------------------------- compilation database

SPEED_C = """\
/* Tidal basin model: current speed squared on the grid (NX from the build). */
#include <stdio.h>
#include <stdint.h>
#include "basin_grid.h"

static double speed[NX][NY];
static double u[NX][NY], v[NX][NY];

static void current_speed(void)
{
    for (int i = 0; i < NX; i++)
        for (int j = 0; j < NY; j++)
            speed[i][j] = u[i][j] * u[i][j] + v[i][j] * v[i][j];
}

int main(void)
{
    uint64_t h = UINT64_C(0xcbf29ce484222325);
    for (int i = 0; i < NX; i++)
        for (int j = 0; j < NY; j++) {
            u[i][j] = 0.01 * ((i * 7 + j * 3) % 19) - 0.09;
            v[i][j] = 0.02 * ((i + 5 * j) % 11) - 0.1;
        }
    current_speed();
    const unsigned char *b = (const unsigned char *)speed;
    for (size_t k = 0; k < sizeof speed; k++) {
        h ^= b[k];
        h *= UINT64_C(0x00000100000001b3);
    }
    printf("%d %d %016llx\\n", NX, NY, (unsigned long long)h);
    return 0;
}
"""

BASIN_GRID_H = """\
/* Project header: cross-shore points of the invented tidal basin grid. */
#define NY 27
"""


def _compile_db_project(tmp_path: Path) -> Path:
    proj = tmp_path / "proj"
    (proj / "include").mkdir(parents=True)
    (proj / "src").mkdir()
    (proj / "include" / "basin_grid.h").write_text(BASIN_GRID_H)
    (proj / "src" / "speed.c").write_text(SPEED_C)
    build_dir = proj / "build"
    build_dir.mkdir()
    (build_dir / "compile_commands.json").write_text(json.dumps([
        {"directory": str(proj), "file": "src/other.c", "arguments": ["cc", "-c", "-DNX=3", "src/other.c"]},
        {"directory": str(proj), "file": "src/speed.c",
         "command": "cc -c -O2 -DNX=40 -Iinclude -o build/speed.o src/speed.c"},
    ]))
    return proj


@pytest.mark.parametrize("db_form", ["file", "dir"])
def test_compile_db_supplies_macro_and_include_dir(tmp_path, db_form):
    proj = _compile_db_project(tmp_path)
    src = proj / "src" / "speed.c"
    db = proj / "build" / ("compile_commands.json" if db_form == "file" else "")
    out = tmp_path / "speed_tiled.c"
    # without the database the project header is not found
    r = run_cli("tile", src, "--nest", "current_speed", "--sizes", "16,16", "-o", out)
    assert r.exit_code == 2, r.stderr
    assert not out.exists()
    r = run_cli("tile", src, "--nest", "current_speed", "--sizes", "16,16", "--compile-db", str(db), "-o", out)
    assert r.exit_code == 0, r.stderr
    assert b"/* looptile:" in out.read_bytes()
    # outside check: the system C compiler with the database's flags, original vs rewritten
    flags = ["-DNX=40", f"-I{proj / 'include'}"]
    build(src, tmp_path / "a.exe", flags)
    build(out, tmp_path / "b.exe", flags)
    a, b = run_program(tmp_path / "a.exe"), run_program(tmp_path / "b.exe")
    assert a == b and a.startswith("40 27 ")


def test_compile_db_without_entry_exit_2(tmp_path):
    proj = _compile_db_project(tmp_path)
    lone = proj / "src" / "lone.c"
    shutil.copy(SAMPLES / "grid_turn.c", lone)
    out = tmp_path / "out.c"
    r = run_cli("tile", lone, "--nest", "turn_grid", "--sizes", "4,4", "--compile-db",
                proj / "build" / "compile_commands.json", "-o", out)
    assert r.exit_code == 2, r.stderr
    assert_nothing_written(r, out)
    assert "no entry" in r.stderr.split("\n")[0]


def test_compile_db_not_json_exit_2(tmp_path):
    bad = write(tmp_path / "compile_commands.json", "{ not json")
    r = run_cli("tile", SAMPLES / "grid_turn.c", "--nest", "turn_grid", "--sizes", "4,4", "--compile-db", bad)
    assert r.exit_code == 2, r.stderr
    assert_nothing_written(r)


# ---------------------------------------------------------------- nests inside other loops

def test_inner_loop_selected_by_line_when_outer_bound_has_its_own_parameter(tmp_path, cc):
    """The x loop alone, inside the y loop whose bound h the x nest does not use."""
    text = """\
/* Harbour camera: per-row dark-level subtraction, rows from the frame height h. */
#include <stdio.h>

static float img[9][13];

static void subtract_rows(int h, int w, float dark)
{
    for (int y = 0; y < h; y++)
        for (int x = 0; x < w; x++)
            img[y][x] -= dark * (float)(x + 1);
}

int main(void)
{
    for (int y = 0; y < 9; y++)
        for (int x = 0; x < 13; x++)
            img[y][x] = (float)(y * 13 + x);
    subtract_rows(9, 13, 0.5f);
    subtract_rows(4, 7, 0.25f);
    for (int y = 0; y < 9; y++)
        for (int x = 0; x < 13; x++)
            printf("%g\\n", img[y][x]);
    return 0;
}
"""
    src = write(tmp_path / "rows.c", text)
    out = tmp_path / "rows_tiled.c"
    r = run_cli("tile", src, "--nest", "L9", "--sizes", "x=4", "-o", out)
    assert r.exit_code == 0, r.stderr
    build(src, tmp_path / "a.exe")
    build(out, tmp_path / "b.exe")
    # outside check: the system C compiler, original vs rewritten
    assert run_program(tmp_path / "a.exe") == run_program(tmp_path / "b.exe")


# ---------------------------------------------------------------- text that the guard comment embeds

@pytest.mark.parametrize("how", ["path", "define"])
def test_guard_comment_is_not_closed_by_the_command_text(tmp_path, how):
    """The guard comment quotes the command line; a '*/' in it (a directory name, a -D value)
    must not end the comment early."""
    d = tmp_path / ("odd*" if how == "path" else "plain")
    d.mkdir()
    src = d / "grid_turn.c"
    shutil.copy(SAMPLES / "grid_turn.c", src)
    out = tmp_path / "out.c"
    extra = ["-D", "GAUGE_NOTE=1*/"] if how == "define" else []
    r = run_cli("tile", src, "--nest", "turn_grid", "--sizes", "4,4", *extra, "-o", out)
    assert r.exit_code == 0, r.stderr
    # outside check: the system C compiler builds the rewritten file and it runs like the original
    build(src, tmp_path / "a.exe")
    build(out, tmp_path / "b.exe")
    assert run_program(tmp_path / "a.exe") == run_program(tmp_path / "b.exe")


def test_assume_is_recorded_and_a_malformed_one_is_a_usage_error(tmp_path):
    src = tmp_path / "grid_turn.c"
    shutil.copy(SAMPLES / "grid_turn.c", src)
    r = run_cli("tile", src, "--nest", "turn_grid", "--sizes", "4,4", "--assume", "n >= 1")
    assert r.exit_code == 0, r.stderr
    assert b"n >= 1 (asserted by the user)" in r.stdout_bytes
    out = tmp_path / "out.c"
    r = run_cli("tile", src, "--nest", "turn_grid", "--sizes", "4,4", "--assume", "n >=", "-o", out)
    assert r.exit_code == 2, r.stderr
    assert_nothing_written(r, out)
    assert "error:" in r.stderr.split("\n")[0]


MACRO_GRID = """\
/* Harbour camera: a frame stored flat, NCOLS pixels a row (a build-time constant). */
#include <stdio.h>
#ifndef NCOLS
#define NCOLS 6
#endif

static double frame[8 * 16];

static void fill_frame(int n)
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < NCOLS; j++)
            frame[i * NCOLS + j] = i + 0.5 * j;
}

int main(void)
{
    fill_frame(8);
    for (int k = 0; k < 8 * NCOLS; k++)
        printf("%g\\n", frame[k]);
    return 0;
}
"""


def test_macro_in_bound_and_subscript(tmp_path):
    """NCOLS is the same value in the bound and in the subscript: rows do not overlap, so the
    tiling is legal; the rewrite pins the value with a #if guard, so a build with another
    value stops."""
    src = write(tmp_path / "frame.c", MACRO_GRID)
    out = tmp_path / "frame_tiled.c"
    r = run_cli("tile", src, "--nest", "fill_frame", "--sizes", "3,4", "-o", out)
    assert r.exit_code == 0, r.stderr
    build(src, tmp_path / "a.exe")
    build(out, tmp_path / "b.exe")
    # outside check: the system C compiler, original vs rewritten
    assert run_program(tmp_path / "a.exe") == run_program(tmp_path / "b.exe")
    # outside check: the compiler stops a build of the rewrite with another NCOLS (#error)
    build(src, tmp_path / "a9.exe", ["-DNCOLS=9"])
    with pytest.raises(AssertionError, match="looptile rewrote this nest"):
        build(out, tmp_path / "b9.exe", ["-DNCOLS=9"])


SIBLINGS = """\
/* Tidal basin: two resets on one line, and a function whose name looks like a line selector. */
void reset(int n, double a[n], double b[n]) {
    for (int i = 0; i < n; i++) a[i] = 0; for (int j = 0; j < n; j++) b[j] = 1;
}
void L2(int n, double a[n]) {
    for (int i = 0; i < n; i++) a[i] = 0;
}
"""


def test_two_sibling_nests_on_one_line_are_a_usage_error_listing_both(tmp_path):
    src = write(tmp_path / "siblings.c", SIBLINGS)
    r = run_cli("tile", src, "--nest", "L3", "--sizes", "4")
    assert r.exit_code == 2, r.stderr
    first = r.stderr.split("\n")[0]
    assert f"{src}:3:5" in first and f"{src}:3:43" in first, first


def test_a_function_named_like_a_line_selector_is_selected_as_func_k(tmp_path):
    src = write(tmp_path / "siblings.c", SIBLINGS)
    r = run_cli("tile", src, "--nest", "L2:1", "--sizes", "4")
    assert r.exit_code == 0, r.stderr
    out = r.stdout_bytes.decode()
    assert out.count("looptile: tiled (i) by (4)") == 1
    assert out.index("looptile: tiled") > out.index("void L2(")  # the nest of L2, not of line 2
    r = run_cli("tile", src, "--nest", "L2", "--sizes", "4")  # line 2 has no for loop
    assert r.exit_code == 2, r.stderr
