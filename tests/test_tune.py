"""looptile tune: tiny tuning runs (small sizes, few variants, small budgets)."""
from __future__ import annotations

import json
import shlex
import statistics

import pytest
from conftest import REPO, run_cli

from looptile import pipeline, tune, workload
from looptile.flags import CompileFlags

MATMUL = REPO / "bench" / "matmul_kernel.c"
KERNELS = REPO / "bench" / "tune_kernels.c"
SMALL = ["--runs", "2", "--max-grid", "2", "--candidates", "16,32", "--jam-candidates", "4x4", "--jobs", "2"]


def _tune_json(*args) -> dict:
    r = run_cli("tune", *args, "--json")
    assert r.exit_code == 0, r.stderr
    return json.loads(r.stdout)


@pytest.mark.cc
def test_json_schema_and_verified_winner():
    doc = _tune_json(MATMUL, "--nest", "mm", "--params", "n=64", "--budget", "40s", *SMALL)
    assert doc["original_seconds"] > 0
    best = doc["best"]
    for key in ("sizes", "levels", "jam", "scalarize", "seconds", "speedup"):
        assert key in best
    assert doc["metric"] == "GFLOP/s" and doc["flops"] == 2 * 64 ** 3
    assert doc["variants"][0]["label"] == "original"
    if doc["original_won"]:  # possible on a busy machine: then the schema says so
        assert best["sizes"] == {} and best["speedup"] == 1.0
    else:
        assert best["verified"] is True
        assert best["verify"][-1].startswith("verdict: equal")
        assert best["sizes"] == best["levels"][-1] and best["speedup"] > 1.0
        assert best["command"].startswith("looptile tile ")
    timed = [v for v in doc["variants"] if v["status"] == "timed"]
    assert len(timed) >= 3
    assert {v["origin"] for v in timed} >= {"original", "grid", "jam"}
    for v in timed:
        # the confirmation round alone when there was one (finalists and the original), else every run
        assert v["seconds"] == statistics.median(v["confirmed_times"] or v["times"])
        assert set(v["confirmed_times"]) <= set(v["times"])
        assert v["same_result"] is not None


@pytest.mark.cc
def test_printed_command_reproduces_the_winner():
    tu = pipeline.load(str(MATMUL), CompileFlags())
    opts = tune.TuneOptions({"n": 48}, ("i", "j", "k"), (16,), ((4, 4),), budget=30, runs=2, max_grid=1,
                            min_gain=0.0)
    commands = {}

    def command_of(cfg: tune.Config) -> str:
        parts = ["looptile", "tile", str(MATMUL), "--nest", "mm"]
        for spec in cfg.size_specs:
            parts += ["--sizes", spec]
        if cfg.jam_spec:
            parts += ["--jam", cfg.jam_spec]
        if cfg.scalarize:
            parts.append("--scalarize")
        commands[cfg] = " ".join(shlex.quote(p) for p in parts)
        return commands[cfg]

    result = tune.run(tu, "mm", opts, command_of)
    made = [v for v in result.variants if v.config.levels and v.new is not None]
    assert made
    for v in made[:3] + ([result.best] if result.best.config.levels else []):
        r = run_cli(*shlex.split(v.command)[1:])
        assert r.exit_code == 0, r.stderr
        assert r.stdout_bytes == v.new, v.command


@pytest.mark.cc
def test_original_wins_and_says_so():
    # A gain of 90% cannot come from tiling a copy that fits in the cache: the original stays.
    r = run_cli("tune", KERNELS, "--nest", "grid_flip", "--params", "n=40", "--budget", "20s", "--min-gain", "0.9",
                *SMALL)
    assert r.exit_code == 0, r.stderr
    assert "no variant beats the original by more than 90%" in r.stdout
    assert "keep the original" in r.stdout and "apply it with" not in r.stdout
    doc = _tune_json(KERNELS, "--nest", "grid_flip", "--params", "n=40", "--budget", "20s", "--min-gain", "0.9",
                     "--cflags-variant=-fno-tree-loop-vectorize", *SMALL)
    assert doc["original_won"] and doc["best"]["sizes"] == {} and doc["best"]["speedup"] == 1.0
    flagged = [v for v in doc["variants"] if v["cflags"][-1:] == ["-fno-tree-loop-vectorize"]]
    assert flagged and all(v["jam"] for v in flagged)  # only the jam variants get the extra build
    assert doc["metric"] == "GB/s" and doc["bytes"] == 2 * 40 * 40 * 8  # a copy: the footprint of T and G


@pytest.mark.cc
def test_budget_is_respected():
    doc = _tune_json(MATMUL, "--nest", "mm", "--params", "n=96", "--budget", "4s", "--runs", "3",
                     "--candidates", "8,16,24,32,48,64", "--max-grid", "40")
    assert doc["skipped"] > 0
    assert doc["elapsed_seconds"] - doc["verify_seconds"] <= 4.0 + 1.0
    assert any(v["status"] == "skipped (budget)" for v in doc["variants"])


@pytest.mark.cc
def test_plot_writes_a_png(tmp_path):
    pytest.importorskip("matplotlib", reason="matplotlib is the optional 'plot' extra (pip install looptile[plot])")
    out = tmp_path / "tune.png"
    r = run_cli("tune", KERNELS, "--nest", "surface_sweep", "--params", "n=40,m=40", "--budget", "20s",
                "--plot", out, *SMALL)
    assert r.exit_code == 0, r.stderr
    assert "(heat map)" in r.stdout  # two tiled loops
    data = out.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 2000


def test_usage_errors():
    r = run_cli("tune", MATMUL, "--nest", "mm", "--params", "m=3")
    assert r.exit_code == 2 and "give the value of n with --params" in r.stderr
    r = run_cli("tune", MATMUL, "--nest", "mm", "--params", "n=8", "--budget", "soon")
    assert r.exit_code == 2 and "--budget 'soon'" in r.stderr
    r = run_cli("tune", MATMUL, "--nest", "mm", "--params", "n=8", "--band", "q")
    assert r.exit_code == 2 and "--band names 'q'" in r.stderr


def test_operation_counts():
    tu = pipeline.load(str(KERNELS), CompileFlags())
    for sel, params, flops in [("gauge_tri", {"n": 10, "p": 7}, 2 * 7 * 55),  # j <= i: 55 (i, j) pairs
                               ("frame_smooth", {"h": 12, "w": 10, "k": 3}, 2 * 10 * 8 * 9),
                               ("surface_sweep", {"n": 6, "m": 5}, 5 * 4 * 3)]:
        nest, analysis = pipeline.analyse(tu, pipeline.select(tu, sel), frozenset(), ())
        w = workload.of_nest(tu, nest, analysis, params)
        assert w.flops == flops, sel


def test_finalists_are_judged_on_the_confirmation_runs(monkeypatch):
    """The first round's fastest variant is also its luckiest (its median is the minimum of many
    noisy medians): after the interleaved confirmation, the original and the finalists are judged
    on those fresh runs alone, so a lucky first round cannot make a winner."""
    fresh = {"original": 1.00, "lucky": 0.99}

    def fake_time(v, args, opts, clock, cap):
        v.times.append(fresh[v.config.origin])

    monkeypatch.setattr(tune, "_time", fake_time)
    orig = tune.Variant(tune.Config(), times=[1.0, 1.0, 1.0])
    lucky = tune.Variant(tune.Config(((("i", 8),),), origin="lucky"), times=[0.50, 0.52, 0.51])
    assert lucky.seconds < orig.seconds * 0.95  # a finalist after round one
    tune._confirm(orig, [lucky], [], tune.TuneOptions({}), tune.Clock(1000.0), 1.0)
    assert lucky.confirmed == [0.99, 0.99] and orig.confirmed == [1.0, 1.0]
    assert lucky.seconds == 0.99 and orig.seconds == 1.0  # no longer 5% faster: the original stays
    assert lucky.passes == [[0.99], [0.99]] and orig.passes == [[1.0], [1.0]]
    # Without fresh runs for everyone (the budget ran out), nobody is judged on them.
    monkeypatch.setattr(tune, "_time", lambda v, *a: v.times.append(0.2) if v.config.origin == "lucky" else None)
    orig2 = tune.Variant(tune.Config(), times=[1.0])
    lucky2 = tune.Variant(tune.Config(((("i", 8),),), origin="lucky"), times=[0.5])
    tune._confirm(orig2, [lucky2], [], tune.TuneOptions({}), tune.Clock(1000.0), 1.0)
    assert orig2.confirmed == [] and lucky2.confirmed == []


@pytest.mark.cc
def test_a_gain_within_the_noise_is_not_taken(monkeypatch):
    """The original's own medians moved by 20% between the first round and the two passes of the
    confirmation: a finalist 8% faster (more than the 5% margin) is within that noise and the
    original stays, with a note that says why."""
    fresh = {"original": iter([1.00, 1.20]), "grid": iter([0.92, 1.10])}
    monkeypatch.setattr(tune, "_time", lambda v, *a: v.times.append(next(fresh[v.config.origin])))
    orig = tune.Variant(tune.Config(), times=[1.0], status="timed")
    cand = tune.Variant(tune.Config(((("i", 8),),), origin="grid"), times=[0.5], status="timed")
    notes: list[str] = []
    tu = pipeline.load(str(MATMUL), CompileFlags())
    nest = pipeline.analyse(tu, pipeline.select(tu, "mm"), frozenset(), ())[0]
    best, report = tune._pick(tu, nest, [orig, cand], orig, [], tune.TuneOptions({}), tune.Clock(1000.0), notes)
    assert best is orig and report is None
    assert abs(orig.spread - 0.2) < 1e-9
    assert any("within the noise" in n and "moved by 20%" in n for n in notes)
