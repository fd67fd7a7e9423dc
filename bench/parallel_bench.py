"""Speedup of ``tile --parallel`` with 2 threads on the samples where it applies.

    python bench/parallel_bench.py [--reps 5] [--cflags "-O3 -march=native"]

For each sample, looptile tiles the nest with the sample's suggested sizes and ``--parallel``
(the command is printed); the system C compiler builds the original and the rewrite with
``-fopenmp -ffp-contract=off`` at larger sizes (``-D``, below); the rewrite's binary runs with
OMP_NUM_THREADS=1 and OMP_NUM_THREADS=2, interleaved, ``--reps`` times each. The table gives
the median wall time of the whole program (initialisation included: the same for both
thread counts) and the ratio 1 thread / 2 threads of one run. Every run's output (the
sample's checksum of its arrays) must equal the original's, else the row says FAIL.

The machine is small (2 cores) and shared: read the ratio measured in one run, not the
absolute figures.
"""
from __future__ import annotations

import argparse
import os
import shlex
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
SAMPLES = HERE.parent / "samples"

# sample, nest, looptile arguments, -D sizes for timing (kernel work dominates initialisation)
CASES = [
    ("basin_relax.c", "relax_basin", ["--sizes", "32,32"], ["-DNX=2500", "-DNY=2500"]),
    ("grid_turn.c", "turn_grid", ["--sizes", "16,16"], ["-DNX=3000", "-DNY=3000"]),
    ("tracer_mix.c", "mix_tracers", ["--sizes", "32,32,32"], ["-DNI=800", "-DNJ=800", "-DNK=800"]),
    ("gauge_cov.c", "gauge_cov", ["--sizes", "i=16,j=16"], ["-DNG=1000", "-DNT=1000"]),
    ("camera_blur.c", "blur_frame", ["--sizes", "16,16"], ["-DIH=1500", "-DIW=1500", "-DKW=9"]),
]


def looptile(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "looptile.cli", *args], capture_output=True, text=True)


def build(cc: list[str], src: Path, exe: Path, cflags: list[str], defines: list[str]) -> None:
    argv = cc + [*cflags, "-fopenmp", "-ffp-contract=off", *defines, str(src), "-o", str(exe), "-lm"]
    proc = subprocess.run(argv, capture_output=True, text=True)
    if proc.returncode != 0:
        raise SystemExit(f"compilation failed: {shlex.join(argv)}\n{proc.stderr}")


def timed(exe: Path, threads: int) -> tuple[float, str]:
    env = {**os.environ, "OMP_NUM_THREADS": str(threads)}
    t0 = time.perf_counter()
    proc = subprocess.run([str(exe)], capture_output=True, text=True, env=env)
    dt = time.perf_counter() - t0
    if proc.returncode != 0:
        raise SystemExit(f"{exe} failed: {proc.stderr[-500:]}")
    return dt, proc.stdout


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--reps", type=int, default=5)
    ap.add_argument("--cflags", default="-O3 -march=native")
    args = ap.parse_args()
    cc = shlex.split(os.environ.get("CC", "cc"))
    cflags = shlex.split(args.cflags)
    rows = [("sample", "loop marked", "1 thread (s)", "2 threads (s)", "speedup", "result")]
    with tempfile.TemporaryDirectory(prefix="looptile-par-") as tmp:
        work = Path(tmp)
        for name, nest, tile_args, defines in CASES:
            src = SAMPLES / name
            out = work / name
            cmd = ["tile", str(src), "--nest", nest, *tile_args, "--parallel", "-o", str(out)]
            print("looptile " + shlex.join(cmd), file=sys.stderr)
            r = looptile(*cmd)
            if r.returncode != 0:
                rows.append((name, "refused", "-", "-", "-", r.stderr.split("\n")[0][:60]))
                continue
            lines = out.read_text().split("\n")
            k = next(j for j, ln in enumerate(lines) if "#pragma omp parallel for" in ln)
            loop = lines[k + 1].strip().split(";")[0].replace("for (", "")
            orig_exe, new_exe = work / (name + ".orig"), work / (name + ".par")
            build(cc, src, orig_exe, cflags, defines)
            build(cc, out, new_exe, cflags, defines)
            _, expected = timed(orig_exe, 1)
            one, two, ok = [], [], True
            for _ in range(args.reps):
                for threads, acc in ((1, one), (2, two)):
                    dt, got = timed(new_exe, threads)
                    acc.append(dt)
                    ok = ok and got == expected
            m1, m2 = statistics.median(one), statistics.median(two)
            rows.append((name, loop, f"{m1:.3f}", f"{m2:.3f}", f"{m1 / m2:.2f}", "same" if ok else "FAIL"))
    widths = [max(len(r[c]) for r in rows) for c in range(len(rows[0]))]
    for r in rows:
        print("  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip())
    return 0 if all(r[5] in ("same", "result") or r[1] == "refused" for r in rows) else 1


if __name__ == "__main__":
    sys.exit(main())
