#!/usr/bin/env python3
"""Throughput of ``looptile apply`` over a generated tree of kernel files, --jobs 2 vs --jobs 1.

The tree is invented: the stages of a tidal-basin ocean model (tides, surge, salinity,
bathymetry) and of a harbour-camera image pipeline (frames, glare, wakes), one small
file per stage, each with two or three kernels and a directive before each kernel's nest.
The mix of directives, in a cycle over the files:

  omp tile      #pragma omp tile sizes(32, 32)                       (carried out)
  own tile      #pragma looptile tile(i=16, j=32) order(...) ...     (carried out)
  clamp         #pragma looptile tile(j=64) remainder(clamp)         (carried out)
  jam           #pragma looptile jam(i=2)                            (carried out)
  unroll        #pragma omp unroll partial(4)                        (carried out)
  sweep         an in-place sweep with distance (1, -1) under a tile (refused, with the witness)
  malformed     #pragma looptile tile(i=32) blur(3)                  (an error at the clause)

Each run is ``looptile apply TREE -o OUT --report R.json --jobs N`` as a separate process
(the time includes Python's start-up), timed with a monotonic clock; the runs alternate
between the job counts, and the median of the repetitions is reported with files per second
and the ratio.  The output depends only on --files and --seed.

Usage (from the repository root):
    python bench/apply_bench.py                      # 500 files, 3 repetitions of each job count
    python bench/apply_bench.py --files 100 --repeat 1
"""
from __future__ import annotations

import argparse
import json
import os
import random
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time

OCEAN = ["tide", "surge", "salinity", "shoal", "estuary", "current", "eddy", "bathy", "swell", "ebb", "reef"]
CAMERA = ["frame", "glare", "wake", "quay", "mast", "buoy", "haze", "pier", "hull", "lamp", "crane"]
VERBS = ["relax", "blend", "smooth", "scale", "merge", "spread", "update", "mix", "fold", "damp"]
KINDS = ["omp_tile", "own_tile", "clamp", "jam", "unroll", "omp_tile", "own_tile", "sweep", "clamp", "malformed"]


def nest(kind: str, rng: random.Random) -> tuple[str, list[str]]:
    """(directive, loop lines) of one kernel."""
    w = rng.choice(["0.25", "0.5", "0.125", "0.75"])
    plain = ["    for (int i = 0; i < n; i++)",
             "        for (int j = 0; j < m; j++)",
             f"            b[i][j] = {w} * a[i][j] + b[i][j];"]
    stencil = ["    for (int i = 1; i < n - 1; i++)",
               "        for (int j = 1; j < m - 1; j++)",
               f"            b[i][j] = {w} * (a[i - 1][j] + a[i + 1][j] + a[i][j - 1] + a[i][j + 1]);"]
    if kind == "omp_tile":
        return "#pragma omp tile sizes(32, 32)", rng.choice([plain, stencil])
    if kind == "own_tile":
        order = rng.choice(["ii, jj, i, j", "jj, ii, i, j"])
        return f"#pragma looptile tile(i=16, j=32) order({order})", stencil
    if kind == "clamp":
        return "#pragma looptile tile(j=64) remainder(clamp)", plain
    if kind == "jam":
        return "#pragma looptile jam(i=2)", plain
    if kind == "unroll":
        return "#pragma omp unroll partial(4)", plain
    if kind == "sweep":
        return "#pragma omp tile sizes(8, 8)", ["    for (int i = 1; i < n; i++)",
                                                "        for (int j = 0; j < m - 1; j++)",
                                                f"            a[i][j] = {w} * (a[i - 1][j + 1] + a[i][j]);"]
    return "#pragma looptile tile(i=32) blur(3)", plain


def kernel_file(index: int, rng: random.Random) -> tuple[str, str]:
    area = "ocean" if index % 2 == 0 else "camera"
    things = OCEAN if area == "ocean" else CAMERA
    stage = f"{rng.choice(VERBS)}_{things[index % len(things)]}"
    lines = [f"/* {stage}_{index:03d}.c -- {'tidal basin model' if area == 'ocean' else 'harbour camera'}: "
             f"stage {index} (generated for the apply benchmark). */", ""]
    for k in range(2 + index % 2):
        kind = KINDS[(index + 3 * k) % len(KINDS)]
        directive, loops = nest(kind, rng)
        lines += [f"/* kernel {k}: {kind.replace('_', ' ')} */",
                  f"void {stage}_{index:03d}_{k}(int n, int m, double b[n][m], double a[n][m])", "{",
                  f"    {directive}", *loops, "}", ""]
    sub = os.path.join(area, things[index % len(things)])
    return os.path.join(sub, f"{stage}_{index:03d}.c"), "\n".join(lines)


def make_tree(root: str, files: int, seed: int) -> None:
    rng = random.Random(seed)
    for index in range(files):
        rel, text = kernel_file(index, rng)
        path = os.path.join(root, rel)
        os.makedirs(os.path.dirname(path), exist_ok=True)
        with open(path, "w") as fh:
            fh.write(text)


def _cpu() -> float:
    r = resource.getrusage(resource.RUSAGE_CHILDREN)
    return r.ru_utime + r.ru_stime


def run_apply(looptile: list[str], tree: str, jobs: int, work: str) -> tuple[float, float, float, dict]:
    """Wall seconds, CPU seconds (the run and every process it waited for: workers, cc), the
    1-minute load average at the end, and the report's summary."""
    out = os.path.join(work, f"out{jobs}")
    report = os.path.join(work, f"report{jobs}.json")
    shutil.rmtree(out, ignore_errors=True)
    cpu = _cpu()
    start = time.perf_counter()
    proc = subprocess.run(looptile + ["apply", tree, "-o", out, "--report", report, "--jobs", str(jobs)],
                          capture_output=True, text=True)
    seconds = time.perf_counter() - start
    cpu = _cpu() - cpu
    if proc.returncode not in (0, 1):
        sys.exit(f"looptile apply failed with exit status {proc.returncode}:\n{proc.stderr[-2000:]}")
    with open(report) as fh:
        return seconds, cpu, os.getloadavg()[0], json.load(fh)["summary"]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--files", type=int, default=500)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--seed", type=int, default=2026)
    ap.add_argument("--looptile", default=None, help="the looptile command (default: this Python's looptile.cli)")
    args = ap.parse_args()
    looptile = args.looptile.split() if args.looptile else [sys.executable, "-m", "looptile.cli"]
    with tempfile.TemporaryDirectory(prefix="looptile-apply-bench-") as work:
        tree = os.path.join(work, "tree")
        make_tree(tree, args.files, args.seed)
        times: dict[int, list[float]] = {1: [], 2: []}
        cpus: dict[int, list[float]] = {1: [], 2: []}
        summaries = {}
        print(f"load average before: {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores", flush=True)
        for rep in range(args.repeat):
            for jobs in (1, 2) if rep % 2 == 0 else (2, 1):
                seconds, cpu, load, summary = run_apply(looptile, tree, jobs, work)
                times[jobs].append(seconds)
                cpus[jobs].append(cpu)
                summaries[jobs] = summary
                print(f"run {rep + 1} --jobs {jobs}: {seconds:.1f} s wall, {cpu:.1f} s CPU "
                      f"(load average {load:.2f})", flush=True)
        if summaries[1] != summaries[2]:
            sys.exit(f"the job counts disagree: {summaries[1]} vs {summaries[2]}")
    med = {j: statistics.median(t) for j, t in times.items()}
    s = summaries[1]
    print(f"\n{args.files} files, {s['directives']} directives: {s['carried_out']} carried out, "
          f"{s['refused']} refused, {s['errors']} errors, {s['failed']} files failed")
    print(f"{'jobs':>4}  {'median s':>9}  {'runs s':>20}  {'files/s':>8}  {'CPU s':>6}  {'CPU/wall':>8}")
    for j in (1, 2):
        runs = ", ".join(f"{t:.1f}" for t in times[j])
        cpu = statistics.median(cpus[j])
        print(f"{j:>4}  {med[j]:>9.1f}  {runs:>20}  {args.files / med[j]:>8.2f}  {cpu:>6.1f}  {cpu / med[j]:>8.2f}")
    ratio = med[1] / med[2]
    print(f"speed-up --jobs 2 / --jobs 1: {ratio:.2f}x (target >= 1.7x: {'met' if ratio >= 1.7 else 'missed'})")


if __name__ == "__main__":
    main()
