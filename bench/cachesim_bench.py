"""Speed and memory of the C cache model (templates/cachesim.h) behind ``looptile simulate``.

A benchmark, not a timed test: it prints figures and compares them with the target (at least
50 million simulated accesses per second); it never fails a build.

The program it builds walks a matrix-multiply-like address stream (the naive i, j, k order of
C[i][j] += A[i][k] * B[k][j] over doubles: read A, read B, read C, write C per step, three
line-aligned n x n arrays) and feeds every access to the model, L1=32KiB/8/64 +
L2=1MiB/8/64 + L3=32MiB/16/64 by default. The time is the whole run (address generation,
simulation, flush, report), so it is what an instrumented program pays; a build without the
model (the same loop summing the addresses) is timed too, to show the part the model takes.
Peak RSS comes from GNU time (/usr/bin/time -f %M): it must be the same for a
short and a ten times longer trace (memory depends on the geometry, never on the trace).

    /tmp/venv/bin/python bench/cachesim_bench.py                 # 200M accesses, median of 3 runs
    /tmp/venv/bin/python bench/cachesim_bench.py --accesses 50000000 --runs 1
    /tmp/venv/bin/python bench/cachesim_bench.py --walk column       # every access a new line
"""
from __future__ import annotations

import argparse
import json
import shlex
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from looptile.cachegeom import parse_level  # noqa: E402
from looptile.cachesim import c_init_call, header_path  # noqa: E402

TARGET = 50e6  # accesses per second (issue 6)
TIME = "/usr/bin/time"  # GNU time
# Repeated runs of one length differ by up to ~150 KiB of peak RSS here (measured: 5588-5728 KiB
# for both 2M and 200M accesses), so "the same" allows that spread.
RSS_SPREAD = 256

PROGRAM = r"""
#include <stdlib.h>
#include "cachesim.h"

#ifdef LT_NOSIM
static unsigned long long lt_sink;
#define ACCESS(addr, array, w) (lt_sink += (addr) + (unsigned)(array) + (unsigned)(w))
#else
#define ACCESS(addr, array, w) lt_sim_access((addr), (array), (w))
#endif

int main(int argc, char **argv)
{
    unsigned long long count = strtoull(argv[1], NULL, 10), done = 0;
    unsigned long long n = strtoull(argv[2], NULL, 10), i, j, k;
    unsigned long long a = 0, b, c;
    b = (n * n * 8 + 63) / 64 * 64;  /* arrays one after another, line-aligned */
    c = 2 * b;
INIT
#ifdef LT_COLUMN
    /* a column walk of one n x n array: every access a new line */
    for (j = 0; j < n && done < count; j++)
        for (i = 0; i < n && done < count; i++, done++)
            ACCESS(a + 8 * (i * n + j), 0, 0);
    (void)k; (void)b; (void)c;
#else
    for (i = 0; i < n && done < count; i++)
        for (j = 0; j < n && done < count; j++)
            for (k = 0; k < n && done < count; k++, done += 4) {
                ACCESS(a + 8 * (i * n + k), 0, 0);
                ACCESS(b + 8 * (k * n + j), 1, 0);
                ACCESS(c + 8 * (i * n + j), 2, 0);
                ACCESS(c + 8 * (i * n + j), 2, 1);
            }
#endif
#ifdef LT_NOSIM
    printf("%llu %llu\n", done, lt_sink);
#else
    lt_sim_finish();
    lt_sim_report(stdout);
#endif
    return 0;
}
"""


def build(workdir: Path, levels, cflags: list[str], nosim: bool, column: bool) -> Path:
    src = workdir / "cachesim_bench.c"
    src.write_text(PROGRAM.replace("INIT", c_init_call(levels, 3)))
    exe = workdir / ("bench_nosim" if nosim else "bench_sim")
    cmd = ["cc", "-std=c99", *cflags, f"-I{header_path().parent}", str(src), "-o", str(exe)]
    if nosim:
        cmd.insert(-2, "-DLT_NOSIM")
    if column:
        cmd.insert(-2, "-DLT_COLUMN")
    subprocess.run(cmd, check=True)
    return exe


def run(exe: Path, count: int, n: int) -> tuple[float, int, str]:
    """(seconds, peak RSS in KiB, stdout) of one run, under GNU time (``%M``: the child's own
    maximum resident set; the rusage of a child forked from Python would include the forked
    interpreter's pages before the exec)."""
    with tempfile.NamedTemporaryFile(suffix=".rss") as rss:
        t0 = time.perf_counter()
        proc = subprocess.run([TIME, "-f", "%M", "-o", rss.name, str(exe), str(count), str(n)],
                              capture_output=True, text=True)
        dt = time.perf_counter() - t0
        if proc.returncode:
            raise SystemExit(f"{exe} exited with {proc.returncode}: {proc.stderr}")
        return dt, int(Path(rss.name).read_text().split()[-1]), proc.stdout


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--accesses", type=int, default=200_000_000)
    ap.add_argument("--runs", type=int, default=3)
    ap.add_argument("--cache", action="append", default=None,
                    help="a level NAME=SIZE/WAYS/LINE (repeat; default L1=32KiB/8/64 L2=1MiB/8/64 L3=32MiB/16/64)")
    ap.add_argument("--cflags", default="-O2")
    ap.add_argument("--walk", choices=("matmul", "column"), default="matmul",
                    help="matmul: the naive i, j, k product (default); column: a column walk of one large "
                         "array, every access a new line (the model's worst case)")
    args = ap.parse_args(argv)
    levels = [parse_level(s) for s in (args.cache or ["L1=32KiB/8/64", "L2=1MiB/8/64", "L3=32MiB/16/64"])]
    cflags = shlex.split(args.cflags)
    column = args.walk == "column"
    n = 1
    while (n * n if column else 4 * n ** 3) < args.accesses:
        n += 1
    with tempfile.TemporaryDirectory(prefix="looptile-cachesim-bench-") as tmp:
        sim = build(Path(tmp), levels, cflags, nosim=False, column=column)
        nosim = build(Path(tmp), levels, cflags, nosim=True, column=column)
        times, rss, report = [], [], ""
        for _ in range(args.runs):
            dt, kib, report = run(sim, args.accesses, n)
            times.append(dt)
            rss.append(kib)
        base = statistics.median(run(nosim, args.accesses, n)[0] for _ in range(args.runs))
        short_rss = max(run(sim, args.accesses // 10, n)[1] for _ in range(args.runs))
    doc = json.loads(report)
    total = doc["levels"][0]["accesses"]
    assert total == args.accesses, (total, args.accesses)
    med = statistics.median(times)
    rate = total / med
    print(f"walk: {args.walk}; geometry: {' + '.join(lv.spec() for lv in levels)}; cc {' '.join(cflags)}; "
          f"n = {n} ({1 if column else 3} array(s) of {n * n * 8 / 2 ** 20:.2f} MiB)")
    print(f"simulated accesses: {total:,}; runs: {', '.join(f'{t:.2f} s' for t in times)}; median {med:.2f} s")
    print(f"speed: {rate / 1e6:.1f} M accesses/s (target {TARGET / 1e6:.0f} M/s: "
          f"{'met' if rate >= TARGET else 'NOT met'}); the address loop alone: {base:.2f} s")
    for lv, d in zip(levels, doc["levels"]):
        print(f"  {lv.name}: accesses {d['accesses']:,}, misses {d['misses']:,} "
              f"({d['misses'] / max(1, d['accesses']):.4f}), write-backs {d['writebacks']:,}")
    print(f"  memory: read {doc['memory']['read_bytes']:,} B, write {doc['memory']['write_bytes']:,} B")
    print(f"peak RSS: {args.accesses // 10:,} accesses {short_rss} KiB, {args.accesses:,} accesses {max(rss)} KiB "
          f"({'the same' if abs(max(rss) - short_rss) <= RSS_SPREAD else 'DIFFERENT'} within {RSS_SPREAD} KiB)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
