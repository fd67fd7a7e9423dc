"""What `looptile tune` finds on this machine, against the original and `tile --sizes auto`.

    python bench/tune_bench.py [--cases all|NAME,...] [--budget 600] [--runs 5] [--cflags "-O3 -march=native"]
                               [--jobs 2] [--blas] [--json OUT.json]

For each case: `looptile tune FILE --nest SEL --params ... --json` (the original is timed by tune
itself, with its driver), then `looptile tile FILE --nest SEL --sizes auto --params ...` and
`... --sizes auto --jam auto ...` timed with the same driver and flags (looptile.tune.time_source;
a register tile whose guard comment advises -fno-tree-loop-vectorize is built with it added, as
its user would), and, with --blas, numpy's matrix product
with one thread (OPENBLAS_NUM_THREADS=1 and friends set before numpy is imported) for the
multiplies. The table gives GFLOP/s or GB/s (as tune reports them: operations counted from the
statements, or the bytes of the arrays' footprint) and the ratios; the commands are printed.
The machine is small and shared: read the ratios of one run, measured one after the other.
"""
from __future__ import annotations

import argparse
import json
import os
import shlex
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
KERNELS = "bench/tune_kernels.c"

# name, file, nest, params, extra tune arguments
CASES = [
    ("matmul n=1000", "bench/matmul_kernel.c", "mm", "n=1000", []),
    ("matmul n=1007", "bench/matmul_kernel.c", "mm", "n=1007", []),
    ("triangular update n=1000", KERNELS, "gauge_tri", "n=1000,p=1000", []),
    ("transpose n=4096", KERNELS, "grid_flip", "n=4096", ["--candidates", "8,16,32,64,128"]),
    ("2-D convolution 2048^2, 9x9", KERNELS, "frame_smooth", "h=2048,w=2048,k=9", []),
    ("Jacobi sweep 3000^2", KERNELS, "surface_sweep", "n=3000,m=3000", []),
]


def looptile() -> list[str]:
    exe = Path(sys.executable).with_name("looptile")
    return [str(exe)] if exe.exists() else [sys.executable, "-m", "looptile.cli"]


def shown(args: list[str]) -> str:
    return " ".join(shlex.quote(a) for a in ["looptile", *args])


ADVISED = "-fno-tree-loop-vectorize"  # what the guard comment of an accumulator register tile advises for gcc


def auto_rate(file: str, nest: str, params: str, runs: int, cflags: list[str],
              jam: bool = False, advice: bool = True) -> tuple[float | None, str]:
    """Seconds of `tile --sizes auto [--jam auto]`'s output with tune's driver, and the command.
    With a register tile whose guard comment advises a flag, the output is built with it added
    (as its user would build it), and the command says so."""
    from looptile import pipeline, tune
    from looptile.flags import CompileFlags
    args = ["tile", file, "--nest", nest, "--sizes", "auto", *(["--jam", "auto"] if jam else []), "--params", params]
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp, "auto.c")
        p = subprocess.run(looptile() + args + ["-o", str(out)], cwd=REPO, capture_output=True, text=True)
        if p.returncode != 0:
            return None, shown(args) + f"  # failed: {p.stderr.strip()[:200]}"
        data = out.read_bytes()
        advised = [ADVISED] if advice and f"build with {ADVISED}".encode() in data else []
        tu = pipeline.load(str(REPO / file), CompileFlags())
        values = {k: int(v) for k, v in (x.split("=") for x in params.split(","))}
        opts = tune.TuneOptions(values, runs=runs, cflags=tuple(cflags + advised), budget=600)
        times = tune.time_source(tu, nest, data, opts)  # the nests here are named by function
    return statistics.median(times), shown(args) + (f"  # built with {ADVISED} added, as advised" if advised else "")


def advises(file: str, nest: str, params: str) -> bool:
    """Whether `tile --sizes auto --jam auto`'s guard comment advises the flag."""
    p = subprocess.run(looptile() + ["tile", file, "--nest", nest, "--sizes", "auto", "--jam", "auto", "--params",
                                     params], cwd=REPO, capture_output=True, text=True)
    return f"build with {ADVISED}" in p.stdout


def in_session(doc: dict, advised: bool) -> float | None:
    """Seconds of the `--sizes auto --jam auto` configuration as tune itself timed it in its run
    (the analytic variants: the register pick, with the advised flag when there is advice; the
    tiles alone when the model chose no register tile), so that it and tune's best are measured
    in one session, minutes apart at most."""
    timed = [v for v in doc["variants"] if v["origin"] == "analytic" and v["status"] == "timed"]
    reg = [v for v in timed if v["jam"] and (ADVISED in (v["cflags"] or "")) == advised]
    pool = reg or [v for v in timed if not v["jam"]]
    return min(v["seconds"] for v in pool) if pool else None


def blas(n: int, reps: int) -> float | None:
    for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ[var] = "1"
    try:
        import numpy as np
    except ImportError:
        return None
    a = np.random.default_rng(1).standard_normal((n, n))
    b = np.random.default_rng(2).standard_normal((n, n))
    a @ b
    times = []
    for _ in range(reps):
        t0 = time.perf_counter()
        a @ b
        times.append(time.perf_counter() - t0)
    return 2.0 * n ** 3 / statistics.median(times) * 1e-9


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--cases", default="all")
    ap.add_argument("--budget", default="600")
    ap.add_argument("--runs", type=int, default=5)
    ap.add_argument("--cflags", default="-O3 -march=native")
    ap.add_argument("--jobs", default="2")
    ap.add_argument("--cflags-variant", default="-fno-tree-loop-vectorize",
                    help="passed to tune: jam variants are also built with these flags added ('' for none)")
    ap.add_argument("--blas", action="store_true")
    ap.add_argument("--json", dest="json_out")
    args = ap.parse_args(argv)
    cflags = shlex.split(args.cflags)
    cases = [c for c in CASES if args.cases == "all" or any(w in c[0] for w in args.cases.split(","))]
    print(f"# {time.strftime('%Y-%m-%d %H:%M')}, load {os.getloadavg()[0]:.2f}; CFLAGS {args.cflags}; "
          f"budget {args.budget} s per tune run; runs {args.runs}")
    rows, docs = [], {}
    for name, file, nest, params, extra in cases:
        cmd = ["tune", file, "--nest", nest, "--params", params, "--budget", f"{args.budget}s", "--runs",
               str(args.runs), "--jobs", args.jobs, "--cflags", args.cflags, *extra]
        if args.cflags_variant:
            cmd += [f"--cflags-variant={args.cflags_variant}"]
        print("$ " + shown(cmd), flush=True)
        p = subprocess.run(looptile() + cmd + ["--json"], cwd=REPO, capture_output=True, text=True)
        if p.returncode != 0:
            print(f"  tune failed (exit {p.returncode}): {p.stderr.strip()[:400]}")
            continue
        doc = json.loads(p.stdout)
        docs[name] = doc
        orig, best = doc["original_seconds"], doc["best"]
        amount = doc["flops"] or doc["bytes"]
        unit = doc["metric"]
        auto_s, auto_cmd = auto_rate(file, nest, params, args.runs, cflags)
        reg_s, reg_cmd = auto_rate(file, nest, params, args.runs, cflags, jam=True)
        plain_s, _ = auto_rate(file, nest, params, args.runs, cflags, jam=True, advice=False)
        if reg_s and plain_s:
            print(f"  --sizes auto --jam auto without the advised flag: {plain_s:.4f} s "
                  f"({plain_s / reg_s:.2f}x the time with it)", flush=True)
        tiles = [v["seconds"] for v in doc["variants"] if v["status"] == "timed" and v["levels"] and not v["jam"]]
        tile_s = min(tiles) if tiles else None
        print("$ " + auto_cmd, flush=True)
        print("$ " + reg_cmd, flush=True)

        def rate(sec: float | None, amount: int | None = amount) -> str:
            return f"{amount / sec * 1e-9:.2f}" if sec and amount else "-"
        b = blas(int(params.split(",")[0].split("=")[1]), 3) if args.blas and nest == "mm" else None
        rows.append((name, unit, rate(orig), rate(auto_s), f"{orig / auto_s:.1f}" if auto_s else "-",
                     rate(tile_s), f"{tile_s / auto_s:.2f}" if tile_s and auto_s else "-",
                     rate(best["seconds"]), f"{orig / best['seconds']:.1f}",
                     f"{best['seconds'] / auto_s:.2f}" if auto_s else "-",
                     rate(reg_s), f"{best['seconds'] / reg_s:.2f}" if reg_s else "-",
                     f"{best['seconds'] / sess:.2f}" if (sess := in_session(doc, advises(file, nest, params)))
                     else "-",
                     f"{b:.2f}" if b else "-",
                     f"{amount / best['seconds'] * 1e-9 / b:.2f}" if b and amount else "-",
                     "original" if doc["original_won"] else best["label"].replace("|", "/"),
                     f"{len(doc['variants'])} ({doc['skipped']} skipped), {doc['elapsed_seconds']:.0f} s"))
        print(f"  best: {best['label']} ({'original won' if doc['original_won'] else best['command']})", flush=True)
    print()
    print("| case | unit | original | --sizes auto | auto x orig | tune's fastest tiles (no jam) | auto / those "
          "| tune best | best x orig | auto / best | --sizes auto --jam auto | that / best "
          "| that / best, both in tune's run | BLAS 1 thread | best x BLAS | tune's choice | variants, tune time |")
    print("|" + "---|" * 17)
    for r in rows:
        print("| " + " | ".join(r) + " |")
    if args.json_out:
        Path(args.json_out).write_text(json.dumps(docs, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
