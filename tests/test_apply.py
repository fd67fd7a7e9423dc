"""looptile apply over a directory: a mix of good, illegal, malformed and broken files.

Outside references: the system C compiler (every rewritten file is compiled and run against
its original with the sanitizers, outputs compared bit for bit: kernel_files.same_results),
and patch(1) / git apply for the --diff output.
"""
from __future__ import annotations

import json
import os
import shutil
import stat
import subprocess
from pathlib import Path

import pytest
from conftest import run_cli
from kernel_files import BLEND_TIDE, FADE_GLARE, GATHER_WAKE, RELAX_BASIN, SWEEP_SHOAL, c_file, kernel, same_results

from looptile import batch, pipeline
from looptile.verify import VerifyReport

pytestmark = pytest.mark.cc

GOOD = {  # path below the tree -> the kernels of the file
    "ocean/tide_smooth.c": [
        ("blend_tide", kernel("blend_tide", "#pragma omp tile sizes(4, 3)", BLEND_TIDE, "tide levels")),
        ("relax_basin", kernel("relax_basin", "#pragma looptile tile(i=5, j=2) remainder(clamp)", RELAX_BASIN,
                               "one relaxation sweep")),
    ],
    "ocean/deep/estuary_mix.c": [
        ("gather_wake", kernel("gather_wake", "#pragma looptile tile(j=3, k=2) order(jj, kk, i, j, k)", GATHER_WAKE,
                               "salinity gathered over the estuary")),
    ],
}
MIXED = {
    # one illegal directive (in-place sweep), one legal
    "ocean/shoal_sweep.c": [
        ("sweep_shoal", kernel("sweep_shoal", "#pragma omp tile sizes(4, 4)", SWEEP_SHOAL, "in-place sweep")),
        ("fade_glare", kernel("fade_glare", "#pragma looptile tile(i=4, j=4)", FADE_GLARE, "lamp glare")),
    ],
    # one malformed directive, one legal
    "camera/quay_lamps.c": [
        ("fade_glare", kernel("fade_glare", "#pragma looptile tile(i=4) blur(2)", FADE_GLARE, "quay lamps")),
        ("blend_tide", kernel("blend_tide", "#pragma omp tile sizes(2)", BLEND_TIDE, "quay frame")),
    ],
    # no directive at all: copied by -o, never parsed
    "camera/frame_plain.c": [("blend_tide", kernel("blend_tide", "", BLEND_TIDE, "no directive"))],
}
BROKEN = "camera/broken_frame.c"  # a directive in a file that does not parse


def make_tree(root: Path, files: dict) -> Path:
    tree = root / "tree"
    for rel, kernels in files.items():
        path = tree / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(c_file(kernels))
    if BROKEN.split("/")[0] in {rel.split("/")[0] for rel in files}:
        (tree / BROKEN).write_text("void frame(int n, double *a)\n{\n    #pragma omp tile sizes(4)\n"
                                   "    for (int i = 0; i < n; i++)\n        a[i] = 1.0\n}\n")
        (tree / "camera" / "notes.txt").write_text("not C\n")
    return tree


def snapshot(tree: Path) -> dict[str, bytes]:
    return {str(p.relative_to(tree)): p.read_bytes() for p in sorted(tree.rglob("*")) if p.is_file()}


def line_of(path: Path, text: str) -> int:
    return path.read_text().split("\n").index(text) + 1


@pytest.fixture(scope="module")
def mixed(tmp_path_factory):
    """The mixed tree, its -o output (two jobs) and the run's result, shared by the tests below."""
    root = tmp_path_factory.mktemp("apply")
    tree = make_tree(root, {**GOOD, **MIXED})
    before = snapshot(tree)
    report = root / "report.json"
    r = run_cli("apply", "tree", "-o", "out", "--jobs", "2", "--report", report, cwd=root)
    assert snapshot(tree) == before  # -o writes nothing into the input tree
    return root, tree, before, r, json.loads(report.read_text())


def test_mirror_and_messages(mixed):
    root, tree, before, r, _ = mixed
    assert r.exit_code == 1
    out = root / "out"
    # every .c file mirrored below the tree (the common parent), other files not copied
    assert sorted(snapshot(out)) == sorted(k for k in before if k.endswith(".c"))
    for rel in ("camera/frame_plain.c", BROKEN):
        assert (out / rel).read_bytes() == before[rel]
    shoal = tree / "ocean/shoal_sweep.c"
    sweep = line_of(shoal, SWEEP_SHOAL.split("\n")[0])
    quay = tree / "camera/quay_lamps.c"
    blur = line_of(quay, "    #pragma looptile tile(i=4) blur(2)")
    heads = [ln for ln in r.stderr.split("\n") if ": refused: " in ln or ": error: " in ln]
    assert heads[0].startswith(f"tree/{BROKEN}:6:1: error: cannot parse the preprocessed file")  # missing ";"
    assert heads[1] == (f"tree/camera/quay_lamps.c:{blur}:32: error: unknown clause 'blur' in '#pragma looptile' "
                        "(clauses: tile, jam, order, remainder, scalarize)")
    assert heads[2].startswith(f"tree/ocean/shoal_sweep.c:{sweep}:5: refused: tiling (i, j) would run ")
    assert len(heads) == 3
    table = r.stdout.split("\n")
    assert table[0].split() == ["file", "directives", "rewritten", "refused", "errors"]
    rows = {ln.split()[0]: ln.split()[1:] for ln in table[1:] if ln and not ln.startswith("total")}
    assert rows == {f"tree/{BROKEN}": ["-", "-", "-", "1"], "tree/camera/quay_lamps.c": ["2", "1", "0", "1"],
                    "tree/ocean/deep/estuary_mix.c": ["1", "1", "0", "0"],
                    "tree/ocean/shoal_sweep.c": ["2", "1", "1", "0"], "tree/ocean/tide_smooth.c": ["2", "2", "0", "0"]}
    assert "total: 6 file(s), 4 rewritten, 1 failed; 7 directive(s): 5 nest(s) rewritten, 1 refused, 1 error(s)" \
        in r.stdout


def test_refused_and_malformed_directives_stay_exactly(mixed):
    root, tree, before, _, _ = mixed
    shoal = (root / "out/ocean/shoal_sweep.c").read_text()
    assert "    #pragma omp tile sizes(4, 4)\n" + SWEEP_SHOAL in shoal
    quay = (root / "out/camera/quay_lamps.c").read_text()
    fade = kernel("fade_glare", "#pragma looptile tile(i=4) blur(2)", FADE_GLARE, "quay lamps")
    assert fade in quay and quay.startswith(before["camera/quay_lamps.c"].decode()[:before[
        "camera/quay_lamps.c"].decode().index("/* blend_tide")])


def test_rewritten_files_run_bit_for_bit(mixed, tmp_path):
    root, tree, before, _, _ = mixed
    for rel in ("ocean/tide_smooth.c", "ocean/deep/estuary_mix.c", "ocean/shoal_sweep.c", "camera/quay_lamps.c"):
        same_results(tree / rel, root / "out" / rel, tmp_path)


def test_report_schema(mixed):
    root, tree, _, _, doc = mixed
    assert set(doc) == {"version", "files", "summary", "exit_status"}
    assert doc["version"] == 1 and doc["exit_status"] == 1
    assert doc["summary"] == {"files": 6, "rewritten": 4, "unchanged": 1, "failed": 1, "directives": 7,
                              "carried_out": 5, "refused": 1, "errors": 1, "inactive": 0}
    files = {f["path"]: f for f in doc["files"]}
    assert [f["path"] for f in doc["files"]] == sorted(files)  # in path order
    assert set(files) == {f"tree/{rel}" for rel in [*GOOD, *MIXED, BROKEN]}
    for f in doc["files"]:
        assert set(f) == {"path", "status", "error", "directives"}
        for d in f["directives"]:
            assert set(d) == {"line", "column", "kind", "directive", "outcome", "nest", "rewrite", "message",
                              "details", "notes", "verify"}
            assert d["outcome"] in ("carried_out", "refused", "error", "inactive")
            assert (d["rewrite"] is not None) == (d["outcome"] == "carried_out")
            assert (d["message"] is None) == (d["outcome"] == "carried_out")
            assert d["verify"] is None
    assert files[f"tree/{BROKEN}"]["status"] == "failed"
    assert files[f"tree/{BROKEN}"]["error"].startswith(f"tree/{BROKEN}:6:1: error: cannot parse")
    assert files[f"tree/{BROKEN}"]["directives"] == []
    assert files["tree/camera/frame_plain.c"] == {"path": "tree/camera/frame_plain.c", "status": "unchanged",
                                                  "error": None, "directives": []}
    tide = files["tree/ocean/tide_smooth.c"]
    assert tide["status"] == "rewritten"
    first, second = tide["directives"]
    line = line_of(tree / "ocean/tide_smooth.c", "    #pragma omp tile sizes(4, 3)")
    assert first == {"line": line, "column": 5, "kind": "omp tile", "directive": "#pragma omp tile sizes(4, 3)",
                     "outcome": "carried_out",
                     "nest": {"selector": "blend_tide:1", "function": "blend_tide", "line": line + 1, "column": 5},
                     "rewrite": "tiled (i, j) by (4, 3), order ii, jj, i, j, remainder split", "message": None,
                     "details": [], "notes": [], "verify": None}
    assert second["kind"] == "looptile" and second["rewrite"] == (
        "tiled (i, j) by (5, 2), order ii, jj, i, j, remainder clamp")
    shoal = files["tree/ocean/shoal_sweep.c"]["directives"]
    assert [d["outcome"] for d in shoal] == ["refused", "carried_out"]
    assert shoal[0]["message"].startswith(f"tree/ocean/shoal_sweep.c:{shoal[0]['line'] + 1}:5: refused: tiling")
    assert any(x.startswith("for example with") for x in shoal[0]["details"])
    quay = files["tree/camera/quay_lamps.c"]["directives"]
    assert [d["outcome"] for d in quay] == ["error", "carried_out"]
    assert quay[0]["nest"] is None  # malformed: not tied to a nest


def test_report_only_and_diff(tmp_path):
    tree = make_tree(tmp_path, MIXED)
    before = snapshot(tree)
    r = run_cli("apply", "tree", "--jobs", "1", cwd=tmp_path)
    assert r.exit_code == 1 and snapshot(tree) == before
    assert sorted(os.listdir(tmp_path)) == ["tree"]  # nothing written anywhere
    d = run_cli("apply", "tree", "--diff", "--jobs", "2", cwd=tmp_path)
    assert d.exit_code == 1 and snapshot(tree) == before
    patch_text = d.stdout_bytes
    assert patch_text.count(b"\n+++ b/tree/") == 2  # one patch for both rewritten files
    assert "total: " in d.stderr  # the table goes to stderr with --diff
    o = run_cli("apply", "tree", "-o", "out", "--jobs", "2", cwd=tmp_path)
    assert o.exit_code == 1
    tools = [t for t in (["patch", "-p1", "--quiet"], ["git", "apply"]) if shutil.which(t[0])]
    assert tools, "neither patch nor git is installed"
    for k, tool in enumerate(tools):
        copy = tmp_path / f"copy{k}"
        shutil.copytree(tree, copy / "tree")
        subprocess.run(tool, input=patch_text, cwd=copy, check=True, capture_output=True)
        assert snapshot(copy / "tree") == {**before, **{k2: v for k2, v in snapshot(tmp_path / "out").items()}}


def test_in_place_atomic_and_idempotent(tmp_path):
    tree = make_tree(tmp_path, MIXED)
    shoal = tree / "ocean/shoal_sweep.c"
    os.chmod(shoal, 0o640)
    before = snapshot(tree)
    r = run_cli("apply", "tree", "--in-place", "--jobs", "2", cwd=tmp_path)
    assert r.exit_code == 1
    once = snapshot(tree)
    assert sorted(once) == sorted(before)  # no temporary files left, nothing added
    changed = sorted(k for k in once if once[k] != before[k])
    assert changed == ["camera/quay_lamps.c", "ocean/shoal_sweep.c"]
    assert stat.S_IMODE(os.stat(shoal).st_mode) == 0o640
    r2 = run_cli("apply", "tree", "--in-place", "--jobs", "1", cwd=tmp_path)
    assert snapshot(tree) == once  # idempotent: carried-out directives are gone, refused ones stay refused
    assert r2.exit_code == 1 and "1 failed; 2 directive(s): 0 nest(s) rewritten, 1 refused, 1 error(s)" in r2.stdout
    orig = tmp_path / "orig"
    orig.mkdir()
    for rel in changed:
        (orig / Path(rel).name).write_bytes(before[rel])
        same_results(orig / Path(rel).name, tree / rel, tmp_path)


def test_exit_statuses(tmp_path, monkeypatch):
    good = make_tree(tmp_path, GOOD)
    r = run_cli("apply", "tree", "--jobs", "2", cwd=tmp_path)
    assert r.exit_code == 0, r.stderr
    assert "0 refused, 0 error(s)" in r.stdout
    for args, message in [
        (["missing_dir"], "missing_dir: no such file or directory"),
        (["tree", "--diff", "--in-place"], "choose one of --diff, -o OUTDIR and --in-place"),
        (["tree", "-o", "tree"], "is the input directory itself"),
        (["tree", "--report", "no_such_dir/r.json"], "its directory does not exist or cannot be written"),
    ]:
        r = run_cli("apply", *args, cwd=tmp_path)
        assert r.exit_code == 2 and message in r.stderr, (args, r.stderr)
    assert run_cli("apply", "tree", "--jobs", "0", cwd=tmp_path).exit_code == 2
    before = snapshot(good)
    real_tile = pipeline.tile

    def buggy_tile(tu, sel, req, opts):  # a looptile bug in one file only
        if "estuary" in tu.source.path:
            raise RuntimeError("simulated bug")
        return real_tile(tu, sel, req, opts)

    monkeypatch.setattr(pipeline, "tile", buggy_tile)
    r = run_cli("apply", "tree", "--in-place", "--jobs", "1", cwd=tmp_path)
    assert r.exit_code == 3
    assert "tree/ocean/deep/estuary_mix.c: error: internal error: RuntimeError: simulated bug" in r.stderr
    after = snapshot(good)
    assert after["ocean/deep/estuary_mix.c"] == before["ocean/deep/estuary_mix.c"]  # the buggy file is untouched
    assert after["ocean/tide_smooth.c"] != before["ocean/tide_smooth.c"]  # the other file still processed


def test_verify_and_compile_db(tmp_path, monkeypatch):
    src = tmp_path / "surge.c"
    src.write_text(c_file([("blend_tide", kernel("blend_tide", "#pragma omp tile sizes(TS, 2)", BLEND_TIDE,
                                                 "surge levels"))]))
    db = tmp_path / "compile_commands.json"
    db.write_text(json.dumps([{"directory": str(tmp_path), "file": "surge.c",
                               "arguments": ["cc", "-DTS=3", "-c", "surge.c"]}]))
    other = tmp_path / "elsewhere.c"
    other.write_text(src.read_text())
    original = src.read_bytes()
    r = run_cli("apply", src, other, "--compile-db", db, "--verify", "-o", tmp_path / "out", "--jobs", "1")
    assert r.exit_code == 1
    assert f"{other}: error: the compilation database has no entry for {other}" in r.stderr
    new = (tmp_path / "out" / "surge.c").read_text()
    assert "tiled (i, j) by (3, 2)" in new and "--compile-db" in new
    assert "note: --verify: verdict: equal" in r.stderr
    same_results(src, tmp_path / "out" / "surge.c", tmp_path)
    # a failing compile-and-run check counts as a refusal and nothing is written
    monkeypatch.setattr(batch, "verify", lambda *a, **k: VerifyReport(1, (
        "n=3 m=3: FAIL: b[0][1] differs", "verdict: DIFFERENT: 1 of 1 parameter sets fail")))
    r = run_cli("apply", src, "--compile-db", db, "--verify", "--in-place", "--jobs", "1")
    assert r.exit_code == 1 and src.read_bytes() == original
    assert ": refused: --verify did not pass, so the rewrite is not written: verdict: DIFFERENT" in r.stderr
