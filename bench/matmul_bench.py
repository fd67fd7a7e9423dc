"""Speed of looptile's output on a dense matrix multiply, against the naive loop and a BLAS.

    python bench/matmul_bench.py [--sizes 1000,1007] [--reps 3] [--cflags "-O3 -march=native"]
                                 [--configs all|quick] [--blas]

For each configuration, looptile rewrites bench/matmul_kernel.c (the command is printed),
the system C compiler builds it with a small driver (bench/matmul_driver.c) and the driver
times one call of the kernel, ``--reps`` times; the table gives the median GFLOP/s
(2 n^3 flops per call) and the ratio to the naive loop. Every rewrite's result matrix is
compared with the naive loop's, bit for bit (the rewrites keep the order of the additions
into each C[i][j]; with the same compiler flags the results are identical), and a
difference is printed as a failure.

``--blas``: numpy's matrix product with one thread (OPENBLAS_NUM_THREADS=1 and friends are
set before numpy is imported) as the reference ceiling; numpy must be installed
(``pip install numpy``); without it the column says so.

The machine is small (2 cores) and shared: run it when nothing else runs, and read the
ratios measured in one run rather than absolute figures.
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
KERNEL = HERE / "matmul_kernel.c"
DRIVER = HERE / "matmul_driver.c"

# (label, looptile arguments after FILE --nest mm); None: the original loop.
CONFIGS = [
    ("naive i-j-k", None),
    ("interchange i-k-j", ["tile", "--order", "i,k,j"]),
    ("tile 64 (ii,kk,jj,i,k,j)", ["tile", "--sizes", "64,64,64", "--order", "ii,kk,jj,i,k,j"]),
    ("jam i=4,j=4 +scalarize (no tiles)", ["jam", "--factors", "i=4,j=4", "--scalarize"]),
    ("tile i=64,j=256,k=256 + jam 4x8 + scalarize",
     ["tile", "--sizes", "i=64,j=256,k=256", "--order", "jj,kk,ii,i,j,k", "--jam", "i=4,j=8", "--scalarize"]),
    ("tile i=96,j=128,k=256 + jam 6x8 + scalarize",
     ["tile", "--sizes", "i=96,j=128,k=256", "--order", "jj,kk,ii,i,j,k", "--jam", "i=6,j=8", "--scalarize"]),
    ("tile i=96,j=128,k=256 + jam 6x8, no scalarize",
     ["tile", "--sizes", "i=96,j=128,k=256", "--order", "jj,kk,ii,i,j,k", "--jam", "i=6,j=8"]),
    ("tile i=192,j=128,k=256 + jam 6x8 + scalarize",
     ["tile", "--sizes", "i=192,j=128,k=256", "--order", "jj,kk,ii,i,j,k", "--jam", "i=6,j=8", "--scalarize"]),
]
QUICK = {"naive i-j-k", "tile 64 (ii,kk,jj,i,k,j)", "tile i=96,j=128,k=256 + jam 6x8 + scalarize"}


def looptile_cmd() -> list[str]:
    exe = Path(sys.executable).with_name("looptile")
    return [str(exe)] if exe.exists() else [sys.executable, "-m", "looptile.cli"]


def build(src: Path, out: Path, cflags: list[str]) -> None:
    cc = os.environ.get("CC", "cc")
    subprocess.run([cc, *cflags, str(DRIVER), str(src), "-o", str(out)], check=True)


def run(binary: Path, n: int, reps: int, dump: Path) -> list[float]:
    out = subprocess.run([str(binary), str(n), str(reps), str(dump)], check=True, capture_output=True, text=True)
    return [float(x) for x in out.stdout.split()]


def blas_gflops(n: int, reps: int) -> str:
    for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ[var] = "1"
    try:
        import numpy as np
    except ImportError:
        return "numpy not installed"
    a = np.random.default_rng(1).standard_normal((n, n))
    b = np.random.default_rng(2).standard_normal((n, n))
    times = []
    for _ in range(reps):
        t0 = time.perf_counter()
        a @ b
        times.append(time.perf_counter() - t0)
    return f"{2.0 * n ** 3 / statistics.median(times) * 1e-9:.2f}"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--sizes", default="1000,1007")
    ap.add_argument("--reps", type=int, default=3)
    ap.add_argument("--cflags", default="-O3 -march=native")
    ap.add_argument("--configs", choices=["all", "quick"], default="all")
    ap.add_argument("--blas", action="store_true")
    args = ap.parse_args(argv)
    cflags = shlex.split(args.cflags)
    sizes = [int(x) for x in args.sizes.split(",")]
    print(f"# flags: {args.cflags}; reps {args.reps}; sizes {sizes}; cc: "
          + subprocess.run([os.environ.get("CC", "cc"), "--version"], capture_output=True, text=True)
          .stdout.splitlines()[0])
    work = Path(tempfile.mkdtemp(prefix="looptile-mm-"))
    failed = False
    rows = []
    for label, cmd in CONFIGS:
        if args.configs == "quick" and label not in QUICK:
            continue
        src = work / f"k{len(rows)}.c"
        if cmd is None:
            src.write_bytes(KERNEL.read_bytes())
        else:
            full = looptile_cmd() + [cmd[0], str(KERNEL), "--nest", "mm", *cmd[1:], "-o", str(src)]
            print("$ " + " ".join(shlex.quote(x) for x in ["looptile", cmd[0], "bench/matmul_kernel.c", "--nest",
                                                            "mm", *cmd[1:]]))
            p = subprocess.run(full, capture_output=True, text=True)
            if p.returncode != 0:
                print(f"  looptile refused or failed (exit {p.returncode}): {p.stderr.strip()[:300]}")
                failed = True
                continue
        binary = work / f"k{len(rows)}"
        build(src, binary, cflags)
        rows.append((label, binary))
    results: dict[tuple[str, int], float] = {}
    for n in sizes:
        ref = work / f"naive-{n}.bin"
        for label, binary in rows:
            dump = ref if label == rows[0][0] else work / f"out-{n}.bin"
            times = run(binary, n, args.reps, dump)
            results[(label, n)] = 2.0 * n ** 3 / statistics.median(times) * 1e-9
            if dump != ref and dump.read_bytes() != ref.read_bytes():
                print(f"  FAILURE: {label} at n={n} computes a different C than the naive loop")
                failed = True
    head = "| configuration | " + " | ".join(f"n={n} GFLOP/s | x naive" for n in sizes) + " |"
    print()
    print(head)
    print("|---|" + "---|---|" * len(sizes))
    for label, _ in rows:
        cells = []
        for n in sizes:
            g = results[(label, n)]
            cells += [f"{g:.2f}", f"{g / results[(rows[0][0], n)]:.1f}"]
        print(f"| {label} | " + " | ".join(cells) + " |")
    if args.blas:
        cells = []
        for n in sizes:
            g = blas_gflops(n, args.reps)
            cells += [g, f"{float(g) / results[(rows[0][0], n)]:.1f}" if g[0].isdigit() else ""]
        print("| numpy BLAS, 1 thread | " + " | ".join(cells) + " |")
        for label, _ in rows[1:]:
            ratios = [f"n={n} {results[(label, n)] / float(c):.2f}x BLAS"
                      for n, c in zip(sizes, cells[::2]) if c[0].isdigit()]
            print(f"# {label}: " + ", ".join(ratios))
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
