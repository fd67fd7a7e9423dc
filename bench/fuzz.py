"""Soundness fuzzing of looptile, the large batch.

    python bench/fuzz.py --cases 5000 [--seed S] [--jobs 2] [--start K] [--time-limit SEC]
                         [--keep DIR] [--subprocess] [--kind tile|jam|all]

Generates random affine loop nests with a random ``looptile tile`` request each
(tests/fuzzgen.py; with --kind jam, ``looptile jam`` and ``looptile unroll`` requests
instead, tests/fuzzjam.py; with --kind all, a mix), runs looptile and checks every answer
from outside:

- rewritten (exit 0): the system C compiler builds original and rewrite with
  -O1 -ffp-contract=off and the address/undefined sanitizers; the outputs (a hash of
  the raw bytes of every array after each of 20 (n, m) pairs) must be identical;
- refused for legality (exit 1 with a witness): the witness pair is re-derived by
  tracing the original program at the witness parameters and the requested order (for
  jam and unroll, the jammed order derived from the factors and bounds) is computed
  independently of looptile;
- other refusals are counted by reason; exit 2 is a generator bug, exit 3 a looptile bug.

Prints the counts (tried, transformed, refused for legality / unsupported, mismatches,
internal errors, unchecked and wrong witnesses, refusal rate on requests that are legal
by construction, time per case).  Every failing case is kept in --keep DIR (case.c,
out.c, the request and what happened in README.txt).  Exit status 1 when anything failed.

Each worker process runs looptile in-process (click's CliRunner, one process per worker,
so it is never shared between threads); --subprocess runs the installed command instead.
"""
from __future__ import annotations

import argparse
import multiprocessing
import shutil
import sys
import tempfile
import time
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))

import fuzzgen  # noqa: E402

_OPTS: dict = {}


def _init(opts: dict) -> None:
    _OPTS.update(opts)
    if not opts["subprocess"]:
        import looptile.cli  # noqa: F401 - import once per worker


def _one(index: int) -> fuzzgen.Result:
    seed = _OPTS["seed"]
    work = Path(tempfile.mkdtemp(prefix=f"case{index}-", dir=_OPTS["tmp"]))
    try:
        try:
            case = fuzzgen.generate(seed, index, _OPTS["kind"])
            if _OPTS.get("flat"):
                case = fuzzgen.flattened(case)
                if case is None:
                    return fuzzgen.Result(index, "skipped", False, "", detail="no two-dimensional array to flatten")
        except Exception as exc:  # noqa: BLE001 - a generator bug, reported as such
            return fuzzgen.Result(index, "generator", False, "", detail=f"generate() failed: {exc!r}")
        runner = fuzzgen.run_looptile_subprocess if _OPTS["subprocess"] else fuzzgen.run_looptile_inprocess
        tool = fuzzgen.run_tool(case, work, runner)
        res = fuzzgen.verify(case, work, tool)
        if res.failed or res.witness == "unchecked":
            tag = res.status + ("-" + res.witness if res.witness else "")
            keep = Path(_OPTS["keep"]) / f"seed{seed}-case{index}-{tag}"
            keep.mkdir(parents=True, exist_ok=True)
            for name, text in res.files.items():
                (keep / name).write_text(text, encoding="latin-1")
            (keep / "README.txt").write_text(fuzzgen.describe_failure(res).split("\ncase.c:\n")[0] + "\n")
        res.files = {}
        return res
    finally:
        shutil.rmtree(work, ignore_errors=True)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--cases", type=int, default=5000)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--start", type=int, default=0, help="first case index")
    ap.add_argument("--time-limit", type=float, default=None,
                    help="stop starting new cases after this many seconds (the report says how many ran)")
    ap.add_argument("--keep", default=None, help="directory for failing cases (default: a new temp dir)")
    ap.add_argument("--subprocess", action="store_true", help="run looptile as a command, not in-process")
    ap.add_argument("--flat", action="store_true",
                    help="flatten the two-dimensional arrays: A[(x)*ld + (y)] with a run-time row length")
    ap.add_argument("--kind", choices=fuzzgen.KINDS, default="tile",
                    help="the requests: tile (default), jam (jam and unroll), or all (a mix); the nests are the same")
    args = ap.parse_args(argv)
    problem = fuzzgen.cc_problem()
    if problem:
        print(f"cannot fuzz: {problem}", file=sys.stderr)
        return 2
    keep = args.keep or tempfile.mkdtemp(prefix=f"looptile-fuzz-seed{args.seed}-")
    tmp = tempfile.mkdtemp(prefix="looptile-fuzz-work-")
    opts = {"seed": args.seed, "keep": keep, "tmp": tmp, "subprocess": args.subprocess, "kind": args.kind,
            "flat": args.flat}
    results: list[fuzzgen.Result] = []
    t0 = time.perf_counter()
    stopped = False
    ctx = multiprocessing.get_context("fork" if sys.platform != "win32" else "spawn")
    with ProcessPoolExecutor(args.jobs, mp_context=ctx, initializer=_init, initargs=(opts,)) as pool:
        pending: set = set()
        nxt = args.start
        end = args.start + args.cases
        while pending or nxt < end:
            # keep a small window of cases in flight, so that --time-limit stops promptly
            while nxt < end and len(pending) < 2 * args.jobs:
                if args.time_limit is not None and time.perf_counter() - t0 > args.time_limit:
                    stopped = True
                    end = nxt
                    break
                pending.add(pool.submit(_one, nxt))
                nxt += 1
            if not pending:
                break
            done, pending = wait(pending, return_when=FIRST_COMPLETED)
            for fut in done:
                res = fut.result()
                results.append(res)
                if res.failed:
                    print(f"case {res.index}: {res.status}"
                          f"{' (witness ' + res.witness + ')' if res.witness else ''}: "
                          f"looptile {res.verb} case.c --nest kernel {res.request}\n    "
                          + res.detail.strip().replace("\n", "\n    ")[:1500], flush=True)
                if len(results) % 100 == 0:
                    el = time.perf_counter() - t0
                    print(f"... {len(results)} cases, {el:.0f} s, {el / len(results):.2f} s/case", flush=True)
    wall = time.perf_counter() - t0
    shutil.rmtree(tmp, ignore_errors=True)
    results.sort(key=lambda r: r.index)
    summary = fuzzgen.Summary(results, wall)
    print()
    print(f"seed {args.seed}, kind {args.kind}, cases {args.start}..{args.start + len(results) - 1}, jobs {args.jobs}"
          + (f" (stopped by --time-limit {args.time_limit:.0f} s after {len(results)} of {args.cases})"
             if stopped else ""))
    print(summary.report())
    failed = [r for r in results if r.failed]
    print(f"failing and unchecked cases kept in {keep}")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
