"""Time one rewrite of a kernel with tune's driver: the quick experiment behind the register-tile
figures in bench/RESULTS.md (shapes of register tiles, flags, tile sizes).

    python bench/time_rewrite.py FILE FUNC PARAMS CFLAGS [-- TILE-ARGS...]

    python bench/time_rewrite.py bench/matmul_kernel.c mm n=1000 "-O3 -march=native"       # the original
    python bench/time_rewrite.py bench/matmul_kernel.c mm n=1000 "-O3 -march=native -fno-tree-loop-vectorize" \
        -- --sizes i=192,j=128,k=128 --jam i=6,j=8 --scalarize

With TILE-ARGS, `looptile tile FILE --nest FUNC TILE-ARGS` makes the rewrite; it is built with
CFLAGS and timed by looptile.tune.time_source (one warm-up call, then the median of 5 calls on
the same inputs). Prints the median seconds and, for a multiply (2 n^3 operations), GFLOP/s.
One run on a shared machine: compare figures taken minutes apart, not across days.
"""
from __future__ import annotations

import shlex
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from looptile import pipeline, tune  # noqa: E402
from looptile.flags import CompileFlags  # noqa: E402


def main(argv: list[str]) -> int:
    if len(argv) < 4:
        print(__doc__)
        return 2
    file, func, params, cflags = argv[:4]
    rest = argv[5:] if len(argv) > 4 and argv[4] == "--" else argv[4:]
    values = {k: int(v) for k, v in (x.split("=") for x in params.split(","))}
    tu = pipeline.load(file, CompileFlags())
    exe = Path(sys.executable).with_name("looptile")
    with tempfile.TemporaryDirectory() as tmp:
        data = Path(file).read_bytes()
        if rest:
            out = Path(tmp, "rewrite.c")
            cmd = [str(exe) if exe.exists() else "looptile", "tile", file, "--nest", func, *rest, "-o", str(out)]
            p = subprocess.run(cmd, capture_output=True, text=True)
            if p.returncode:
                print(p.stderr, file=sys.stderr)
                return 1
            data = out.read_bytes()
        opts = tune.TuneOptions(values, runs=5, cflags=tuple(shlex.split(cflags)), budget=600)
        sec = statistics.median(tune.time_source(tu, func, data, opts))
    flops = f"  {2.0 * values['n'] ** 3 / sec * 1e-9:.2f} GFLOP/s" if func == "mm" else ""
    print(f"{sec:.4f} s{flops}  [{cflags}] {' '.join(rest) or '(original)'}")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
