#!/usr/bin/env python3
"""Benchmark of looptile: load, per-nest analysis and tiling time, whole-file CLI time and memory.

Not a timed test: it prints figures (and writes bench/results.json) to compare
with the targets

  * median analysis time per nest (model + isl) under 50 ms;
  * the ~10,000-line generated file analysed by the CLI in under 10 s,
    with a peak resident set under 300 MB.

Usage, from the repository root (venv python: /tmp/venv/bin/python):

    python bench/gen_kernels.py          # writes bench/generated.c (deterministic)
    python bench/run_bench.py            # about 3 minutes on 2 idle cores
    python bench/run_bench.py --quick    # one repetition of everything, about 1 minute
    python bench/run_bench.py --profile  # then also cProfile the analysis of generated.c
                                         # (bench/profile_analyze.txt, about 40 s more)

Every measurement is repeated (--repeats, default 3; the full pipeline.tile
--full-repeats, default 2) and the median of the repetitions is kept: per
nest, the median over repetitions is one sample, and the tables give
median / p90 / max over the nests.  Each repetition works on a freshly loaded
translation unit, so the per-function caches of extract.py start cold, as in
one CLI run.

"tile full" is ``pipeline.tile`` as it is; it ends by preprocessing and parsing
the whole rewritten file again (``pipeline.check_parses``).  "tile core" is the
same call with ``check_parses`` replaced, at run time, by a stub.  Phases are
measured by wrapping looptile functions at run time (exclusive time, nothing
in looptile is edited): select (``pipeline.select``), model
(``extract.build_nest``), isl (``NestAnalysis`` methods and the public
functions of ``deps``), plan (``plan_tiling``), side (``_check_request_side``),
emit (``emit_facts``, ``emit_nest``, ``guard_text``, ``apply_edits``), reparse
(``check_parses``) and other (the rest of ``pipeline.tile``).  The same
wrappers split ``analyze.report`` into model / isl / other.

The generated file is tiled in full only on a sample (the deepest nest of the
first kernel of each kind, --per-kind): one call costs a re-parse of the
whole 10,000-line file.  Tile core runs on every nest.
"""
from __future__ import annotations

import argparse
import cProfile
import datetime
import functools
import glob
import inspect
import io
import json
import math
import os
import platform
import pstats
import re
import shutil
import statistics
import subprocess
import sys
import time
import traceback
from collections import Counter, defaultdict

from looptile import analyze, deps, extract, pipeline
from looptile.errors import InternalError, LooptileError, Refusal, UsageError
from looptile.flags import CompileFlags
from looptile.transform.tile import TileRequest

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
BENCH = os.path.join(ROOT, "bench")
GENERATED = os.path.join(BENCH, "generated.c")
REQ = TileRequest(sizes=((None, 32), (None, 32)))
OPTS = pipeline.TileOptions(command="bench")

TARGET_NEST_MS = 50.0
TARGET_FILE_S = 10.0
TARGET_RSS_MB = 300.0

pc = time.perf_counter


_T0 = time.perf_counter()


def log(msg: str) -> None:
    print(f"[{time.perf_counter() - _T0:6.1f} s] {msg}", file=sys.stderr, flush=True)


# ---------------------------------------------------------------- statistics

def p90(xs: list[float]) -> float:
    s = sorted(xs)
    return s[max(0, math.ceil(0.9 * len(s)) - 1)]


def summary(xs: list[float]) -> dict:
    """Seconds in, milliseconds out."""
    if not xs:
        return {"count": 0, "median_ms": None, "p90_ms": None, "max_ms": None, "total_s": 0.0}
    return {"count": len(xs), "median_ms": 1e3 * statistics.median(xs), "p90_ms": 1e3 * p90(xs),
            "max_ms": 1e3 * max(xs), "total_s": sum(xs)}


def per_item_median(runs: list[dict]) -> dict:
    """[{key: seconds}] over repetitions -> {key: median seconds}."""
    keys = runs[0].keys()
    return {k: statistics.median(r[k] for r in runs if k in r) for k in keys}


# ---------------------------------------------------------------- measurements

def time_load(path: str, repeats: int):
    """``repeats`` fresh translation units (each repetition of a later step gets its own, so the
    per-function caches of extract.py start cold, as in one CLI run) and their load times."""
    times, tus = [], []
    for _ in range(repeats):
        t = pc()
        tus.append(pipeline.load(path, CompileFlags()))
        times.append(pc() - t)
    return tus, times


def time_analyze(tus) -> tuple[dict, dict, Counter]:
    runs, phase_runs, outcome = [], [], Counter()
    for r, tu in enumerate(tus):
        run, prun = {}, defaultdict(dict)
        for s in analyze.reported_sites(tu):
            key = (s.line, s.token_index)
            PHASES.reset()
            t = pc()
            rep = analyze.report(tu, s)
            run[key] = pc() - t
            ph = dict(PHASES.acc)
            ph["other"] = max(0.0, run[key] - sum(ph.values()))
            for k, v in ph.items():
                prun[k][key] = v
            if r == 0:
                outcome["analysable" if rep.analysable else "not analysable"] += 1
        runs.append(run)
        phase_runs.append(prun)
    phases = {k: per_item_median([p[k] for p in phase_runs if k in p]) for k in phase_runs[0]}
    return per_item_median(runs), phases, outcome


class Phases:
    """Exclusive time per phase, by wrapping looptile functions at run time (the files are not changed).

    pipeline.tile is run as it is; the wrappers only charge the time spent in
    each wrapped function (minus the wrapped functions it calls) to a phase.
    """

    def __init__(self) -> None:
        self.stack: list[str] = []
        self.acc: dict[str, float] = defaultdict(float)
        self.t = 0.0
        self.captured: bytes | None = None
        self.originals: list = []
        self.skip_reparse = False

    def _enter(self, phase: str) -> None:
        now = pc()
        if self.stack:
            self.acc[self.stack[-1]] += now - self.t
        self.stack.append(phase)
        self.t = now

    def _exit(self) -> None:
        now = pc()
        self.acc[self.stack.pop()] += now - self.t
        self.t = now

    def wrap(self, phase: str, fn):
        @functools.wraps(fn)
        def timed(*a, **k):
            self._enter(phase)
            try:
                return fn(*a, **k)
            finally:
                self._exit()
        return timed

    def _patch(self, owner, name: str, phase: str) -> None:
        fn = owner.__dict__.get(name) if isinstance(owner, type) else getattr(owner, name, None)
        if fn is None or not callable(fn):
            return
        self.originals.append((owner, name, fn))
        setattr(owner, name, self.wrap(phase, fn))

    def install(self) -> None:
        self._patch(pipeline, "select", "select")
        self._patch(extract, "build_nest", "model")
        for name, obj in list(vars(deps).items()):
            if name.startswith("_") or not inspect.isfunction(obj) or obj.__module__ != deps.__name__:
                continue
            self._patch(deps, name, "isl")
        for name, obj in list(vars(deps.NestAnalysis).items()):
            if (name == "__init__" or not name.startswith("_")) and inspect.isfunction(obj):
                self._patch(deps.NestAnalysis, name, "isl")
        self._patch(pipeline, "plan_tiling", "plan")
        self._patch(pipeline, "_check_request_side", "side")
        for name in ("emit_facts", "emit_nest", "guard_text", "apply_edits"):
            self._patch(pipeline, name, "emit")
        original = pipeline.check_parses
        self.originals.append((pipeline, "check_parses", original))
        timed = self.wrap("reparse", original)

        def check_parses(*args):
            self.captured = args[-1]  # the rewritten bytes are the last argument
            if not self.skip_reparse:
                timed(*args)
        pipeline.check_parses = check_parses

    def uninstall(self) -> None:
        for owner, name, fn in reversed(self.originals):
            setattr(owner, name, fn)
        self.originals.clear()

    def reset(self) -> None:
        self.acc = defaultdict(float)
        self.stack.clear()
        self.captured = None


PHASES = Phases()
PHASE_ORDER = ["select", "model", "isl", "plan", "side", "emit", "reparse", "other"]


def run_tile(tu, sel: str, reparse: bool) -> tuple[float, dict, str, BaseException | None]:
    """pipeline.tile with (full) or without (core) its final re-parse check; seconds, phases, outcome."""
    PHASES.reset()
    PHASES.skip_reparse = not reparse
    t = pc()
    exc = None
    try:
        pipeline.tile(tu, sel, REQ, OPTS)
        what = "tiled"
    except Exception as e:  # noqa: BLE001 - counted; crashes are reported
        what, exc = classify(e), e
    total = pc() - t
    ph = dict(PHASES.acc)
    ph["other"] = max(0.0, total - sum(ph.values()))
    return total, ph, what, exc


def classify(exc: BaseException) -> str:
    if isinstance(exc, InternalError):
        return "INTERNAL ERROR"
    if isinstance(exc, Refusal):
        return "refused"
    if isinstance(exc, UsageError):
        return "usage error"
    if isinstance(exc, LooptileError):
        return type(exc).__name__
    return "CRASH " + type(exc).__name__


def time_tile(tus, pick, reparse: bool, problems: list) -> tuple[dict, dict, dict, Counter]:
    """Per site: median seconds, median seconds per phase, outcome; and the refusal reasons.

    One repetition per translation unit of ``tus``; ``pick`` chooses the sites of a unit."""
    runs, phase_runs, what_of, reasons = [], [], {}, Counter()
    step = "pipeline.tile" if reparse else "pipeline.tile without check_parses"
    for r, tu in enumerate(tus):
        run, prun = {}, defaultdict(dict)
        for s in pick(analyze.reported_sites(tu)):
            key = (s.line, s.token_index)
            total, ph, what, exc = run_tile(tu, f"L{s.line}", reparse)
            run[key] = total
            for k, v in ph.items():
                prun[k][key] = v
            if r == 0:
                what_of[key] = what
                if exc is not None:
                    reasons[_short(exc)] += 1
                    if not isinstance(exc, LooptileError) or isinstance(exc, InternalError):
                        problems.append({"where": f"{os.path.relpath(tu.source.path, ROOT)}:L{s.line} "
                                                  f"({s.function})", "step": step,
                                         "error": "".join(traceback.format_exception(exc))[-3000:]})
        runs.append(run)
        phase_runs.append(prun)
    phases = {k: per_item_median([p[k] for p in phase_runs if k in p]) for k in phase_runs[0]}
    return per_item_median(runs), phases, what_of, reasons


def _short(exc: BaseException) -> str:
    msg = exc.message if isinstance(exc, LooptileError) else str(exc)
    msg = re.sub(r"'[^']*'", "'X'", msg)
    msg = re.sub(r"\(([a-z_0-9]+)\)$", "(X)", msg)
    return f"{classify(exc)}: {msg[:100]}"


def tile_sample(sites, per_kind: int) -> list:
    """Generated file: per kernel kind (suffix of the function name), its deepest nests first."""
    by_kind = defaultdict(list)
    for s in sites:
        by_kind[s.function.rsplit("_", 1)[-1]].append(s)
    out = []
    for _kind, ss in sorted(by_kind.items()):
        funcs = []
        for s in ss:
            if s.function not in funcs:
                funcs.append(s.function)
        first = [s for s in ss if s.function == funcs[0]]
        depth = {id(s): _depth(s) for s in first}
        out += sorted(first, key=lambda s: (-depth[id(s)], s.line))[:per_kind]
    return sorted(out, key=lambda s: s.line)


def _depth(s) -> int:
    """Loops in the perfectly nested chain of ``s`` (the for statement alone as its body, or in {})."""
    d, node = 0, s.node
    while node is not None:
        d += 1
        body = node.stmt
        items = getattr(body, "block_items", None)
        node = body if type(body).__name__ == "For" else (
            items[0] if items and len(items) == 1 and type(items[0]).__name__ == "For" else None)
    return d


def looptile_exe() -> list[str]:
    exe = os.path.join(os.path.dirname(sys.executable), "looptile")
    if os.path.exists(exe):
        return [exe]
    found = shutil.which("looptile")
    return [found] if found else [sys.executable, "-m", "looptile.cli"]


def time_cli(args: list[str], repeats: int) -> dict:
    """Wall time (perf_counter around the process) and peak RSS (GNU time -v) of a CLI run."""
    gnu_time = "/usr/bin/time" if os.path.exists("/usr/bin/time") else None
    walls, rss, codes = [], [], []
    for _ in range(repeats):
        argv = ([gnu_time, "-v"] if gnu_time else []) + looptile_exe() + args
        t = pc()
        proc = subprocess.run(argv, cwd=ROOT, capture_output=True, text=True)
        walls.append(pc() - t)
        codes.append(proc.returncode)
        m = re.search(r"Maximum resident set size \(kbytes\): (\d+)", proc.stderr)
        if m:
            rss.append(int(m.group(1)) / 1024.0)
    return {"command": "looptile " + " ".join(args), "wall_s": walls, "wall_median_s": statistics.median(walls),
            "wall_min_s": min(walls),
            "peak_rss_mb": rss, "peak_rss_max_mb": max(rss) if rss else None, "exit_codes": codes,
            "gnu_time": gnu_time}


# ---------------------------------------------------------------- one group of files

def bench_group(name: str, paths: list[str], repeats: int, full_repeats: int, per_kind: int | None,
                problems: list) -> dict:
    res = {"files": [os.path.relpath(p, ROOT) for p in paths], "load_s": {}, "lines": 0}
    analyze_t, core_t, full_t = {}, {}, {}
    analyze_ph, core_ph, full_ph = defaultdict(dict), defaultdict(dict), defaultdict(dict)
    outcomes = {"analyze": Counter(), "tile_core": Counter(), "tile_full": Counter()}
    reasons = Counter()
    tiled_keys: set = set()
    sites_n = 0
    for path in paths:
        rel = os.path.relpath(path, ROOT)
        log(f"[{name}] {rel}: load x{repeats}")
        with open(path, "rb") as f:
            res["lines"] += f.read().count(b"\n")
        tus, lt = time_load(path, repeats)
        sites = analyze.reported_sites(tus[0])
        sites_n += len(sites)
        log(f"[{name}] {rel}: analyze {len(sites)} nests x{repeats}")
        a, aph, oc = time_analyze(tus)
        outcomes["analyze"] += oc
        analyze_t.update({(rel,) + k: v for k, v in a.items()})
        for ph, d in aph.items():
            analyze_ph[ph].update({(rel,) + k: v for k, v in d.items()})
        log(f"[{name}] {rel}: load x{repeats} (fresh units for tiling)")
        tus, lt2 = time_load(path, repeats)
        res["load_s"][rel] = statistics.median(lt + lt2)
        log(f"[{name}] {rel}: tile core (no re-parse) {len(sites)} nests x{repeats}")
        core, phases, what_of, rs = time_tile(tus, lambda ss: ss, False, problems)
        reasons += rs
        outcomes["tile_core"] += Counter(what_of.values())
        tiled_keys.update((rel,) + k for k, w in what_of.items() if w == "tiled")
        core_t.update({(rel,) + k: v for k, v in core.items()})
        for ph, d in phases.items():
            core_ph[ph].update({(rel,) + k: v for k, v in d.items()})
        pick = (lambda ss: ss) if per_kind is None else (lambda ss: tile_sample(ss, per_kind))
        log(f"[{name}] {rel}: tile full {len(pick(sites))} nests x{full_repeats}")
        full_tus = [tus[k % len(tus)] for k in range(full_repeats)]
        full, phases, what_of, _ = time_tile(full_tus, pick, True, problems)
        del tus, full_tus
        outcomes["tile_full"] += Counter(what_of.values())
        full_t.update({(rel,) + k: v for k, v in full.items()})
        for ph, d in phases.items():
            full_ph[ph].update({(rel,) + k: v for k, v in d.items()})
    res["nests"] = sites_n
    res["load_total_s"] = sum(res["load_s"].values())
    res["analyze"] = summary(list(analyze_t.values()))
    res["analyze_phases"] = {ph: summary(list(d.values())) for ph, d in analyze_ph.items()}
    res["tile_core"] = summary([v for k, v in core_t.items() if k in tiled_keys])
    res["tile_core_all"] = summary(list(core_t.values()))
    res["tile_core_phases"] = {ph: summary([v for k, v in d.items() if k in tiled_keys]) for ph, d in core_ph.items()}
    res["tile_full"] = summary([v for k, v in full_t.items() if k in tiled_keys])
    res["tile_full_all"] = summary(list(full_t.values()))
    res["tile_full_phases"] = {ph: summary([v for k, v in d.items() if k in tiled_keys]) for ph, d in full_ph.items()}
    res["tile_full_sample"] = "all nests" if per_kind is None else \
        f"{len(full_t)} nests: the {per_kind} deepest nest(s) of the first kernel of each kind"
    res["tile_core_on_full_sample"] = summary([core_t[k] for k in full_t if k in core_t and k in tiled_keys])
    res["outcomes"] = {k: dict(v) for k, v in outcomes.items()}
    res["refusal_reasons"] = dict(reasons.most_common())
    res["analysis_in_process_s"] = res["load_total_s"] + res["analyze"]["total_s"]
    return res


# ---------------------------------------------------------------- output

def fmt(x, unit="ms") -> str:
    if x is None:
        return "-"
    return f"{x:.1f}" if unit == "ms" else f"{x:.2f}"


def markdown(results: dict) -> str:
    out = []
    m = results["machine"]
    out.append(f"Run {results['date']} on {m['cpu']} ({m['nproc']} cores), Python {m['python']}, "
               f"looptile {m['looptile_commit']}, {m['cc']}, islpy {m['islpy']}, pycparser {m['pycparser']}; "
               f"repeats {results['repeats']} (pipeline.tile: {results['full_repeats']}; median kept); "
               f"load average {results['loadavg_start']} at the start, {results['loadavg_end']} at the end.\n")
    out.append("Times per nest in ms as median / p90 / max (count of nests).\n")
    out.append("| figure | samples/*.c | bench/generated.c |")
    out.append("|---|---|---|")
    g = results["groups"]
    s, n = g.get("samples"), g.get("generated")

    def row(label, f):
        out.append(f"| {label} | {f(s) if s else '-'} | {f(n) if n else '-'} |")

    row("files / lines / reported nests", lambda r: f"{len(r['files'])} / {r['lines']} / {r['nests']}")
    row("load (preprocess + parse), s", lambda r: " + ".join(f"{v:.2f}" for v in r["load_s"].values())
        if len(r["load_s"]) <= 1 else f"{r['load_total_s']:.2f} total, "
        f"{statistics.median(r['load_s'].values()):.2f} median per file")
    def trio(q):
        return f"{fmt(q['median_ms'])} / {fmt(q['p90_ms'])} / {fmt(q['max_ms'])} ({q['count']})"

    def phase_rows(key, label):
        for p in PHASE_ORDER:
            if any(r and p in r[key] and r[key][p]["count"] for r in (s, n)):
                row(f"&nbsp;&nbsp;{label} phase '{p}'", lambda r, p=p: trio(r[key][p]) if p in r[key] else "-")

    row("analyze per nest (analyze.report), all nests", lambda r: trio(r["analyze"]))
    phase_rows("analyze_phases", "analyze")
    row("tile core per tiled nest (pipeline.tile without check_parses)", lambda r: trio(r["tile_core"]))
    phase_rows("tile_core_phases", "core")
    row("&nbsp;&nbsp;tile core, every attempt incl. refusals", lambda r: trio(r["tile_core_all"]))
    row("tile full per tiled nest (pipeline.tile)", lambda r: trio(r["tile_full"]))
    phase_rows("tile_full_phases", "full")
    row("&nbsp;&nbsp;tile full, every attempt incl. refusals", lambda r: trio(r["tile_full_all"]))
    row("&nbsp;&nbsp;tile core on the same tiled nests as tile full", lambda r: trio(r["tile_core_on_full_sample"]))
    row("in-process load + analyze all nests, s", lambda r: f"{r['analysis_in_process_s']:.2f}")
    row("tile full sample", lambda r: r["tile_full_sample"])
    row("analyze outcomes", lambda r: ", ".join(f"{k} {v}" for k, v in r["outcomes"]["analyze"].items()))
    row("tile core outcomes (all nests)", lambda r: ", ".join(
        f"{k} {v}" for k, v in r["outcomes"]["tile_core"].items() if not k.startswith(" ")))
    row("tile full outcomes (full sample)",
        lambda r: ", ".join(f"{k} {v}" for k, v in r["outcomes"]["tile_full"].items()))
    out.append("")
    out.append("| CLI run | wall time, s: median (min; all runs) | peak RSS, MB (max) | exit codes |")
    out.append("|---|---|---|---|")
    for c in results["cli"]:
        cmd = c["command"] if len(c["command"]) < 60 else c["command"][:40] + " ... (all samples)"
        out.append(f"| `{cmd}` | {c['wall_median_s']:.2f} ({c['wall_min_s']:.2f}; "
                   f"{', '.join(f'{w:.2f}' for w in c['wall_s'])})"
                   f" | {fmt(c['peak_rss_max_mb'])} | {', '.join(map(str, c['exit_codes']))} |")
    out.append("")
    out.append("Tile outcomes and reasons (tile core, all nests; names replaced by X):\n")
    for gname, r in g.items():
        out += [f"- {gname}: {v} x {k}" for k, v in r["refusal_reasons"].items()]
    out.append("")
    out.append("| target | measured | met |")
    out.append("|---|---|---|")
    for t in results["targets"]:
        out.append(f"| {t['target']} | {t['measured']} | {'yes' if t['met'] else 'NO'} |")
    return "\n".join(out)


def targets(results: dict) -> list[dict]:
    out = []
    for gname, r in results["groups"].items():
        med = r["analyze"]["median_ms"]
        if med is not None:
            out.append({"target": f"analyze median per nest < {TARGET_NEST_MS:.0f} ms ({gname})",
                        "measured": f"{med:.1f} ms", "met": med < TARGET_NEST_MS})
        med = r["tile_core"]["median_ms"]
        if med is not None:
            out.append({"target": f"tile core (model + isl + emit) median per tiled nest < {TARGET_NEST_MS:.0f} ms "
                                  f"({gname})", "measured": f"{med:.1f} ms", "met": med < TARGET_NEST_MS})
        med = r["tile_full"]["median_ms"]
        if med is not None:
            out.append({"target": f"tile full (with re-parse check) median per tiled nest < {TARGET_NEST_MS:.0f} ms "
                                  f"({gname}; informative)", "measured": f"{med:.1f} ms",
                        "met": med < TARGET_NEST_MS})
    for c in results["cli"]:
        if "generated" not in c["command"]:
            continue
        out.append({"target": f"`{c['command']}` wall < {TARGET_FILE_S:.0f} s",
                    "measured": f"{c['wall_median_s']:.2f} s", "met": c["wall_median_s"] < TARGET_FILE_S})
        if c["peak_rss_max_mb"] is not None:
            out.append({"target": f"`{c['command']}` peak RSS < {TARGET_RSS_MB:.0f} MB",
                        "measured": f"{c['peak_rss_max_mb']:.0f} MB", "met": c["peak_rss_max_mb"] < TARGET_RSS_MB})
    return out


def machine() -> dict:
    cpu = platform.processor() or "?"
    try:
        with open("/proc/cpuinfo") as f:
            for line in f:
                if line.startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    cc = subprocess.run(["cc", "--version"], capture_output=True, text=True).stdout.splitlines()
    import islpy
    import pycparser

    import looptile
    pkg = os.path.dirname(os.path.dirname(os.path.abspath(looptile.__file__)))
    if os.path.samefile(pkg, ROOT):
        head = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT, capture_output=True, text=True)
        dirty = subprocess.run(["git", "status", "--porcelain", "--", "looptile"], cwd=ROOT, capture_output=True,
                               text=True)
        commit = (head.stdout.strip() or "?") + (" + uncommitted changes" if dirty.stdout.strip() else "")
    else:  # a copy, e.g. git archive COMMIT looptile templates | tar -x -C DIR, run with PYTHONPATH=DIR
        try:
            with open(os.path.join(pkg, "COMMIT")) as f:
                commit = f.read().strip() + f" (copy in {pkg})"
        except OSError:
            commit = f"? (copy in {pkg})"
    return {"nproc": os.cpu_count(), "python": platform.python_version(), "cpu": cpu, "looptile_commit": commit,
            "cc": cc[0] if cc else "?", "islpy": getattr(islpy, "__version__", "?"),
            "pycparser": getattr(pycparser, "__version__", "?"), "platform": platform.platform()}


def profile_generated(out_path: str) -> str:
    """cProfile of load + report of every nest of generated.c; top functions by cumulative time."""
    prof = cProfile.Profile()
    prof.enable()
    tu = pipeline.load(GENERATED, CompileFlags())
    for s in analyze.reported_sites(tu):
        analyze.report(tu, s)
    prof.disable()
    buf = io.StringIO()
    st = pstats.Stats(prof, stream=buf)
    st.sort_stats("cumulative").print_stats(40)
    st.sort_stats("tottime").print_stats(25)
    with open(out_path, "w") as f:
        f.write(buf.getvalue())
    return out_path


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--repeats", type=int, default=3, help="repetitions of each measurement (median kept)")
    ap.add_argument("--full-repeats", type=int, default=None,
                    help="repetitions of the full pipeline.tile (default: 2, or 1 with --quick)")
    ap.add_argument("--per-kind", type=int, default=1,
                    help="generated.c: nests per kernel kind timed with the full pipeline.tile")
    ap.add_argument("--cli-repeats", type=int, default=None, help="CLI runs (default: --repeats)")
    ap.add_argument("--quick", action="store_true", help="one repetition of everything")
    ap.add_argument("--skip-samples", action="store_true")
    ap.add_argument("--skip-generated", action="store_true")
    ap.add_argument("--profile", action="store_true", help="also write bench/profile_analyze.txt (cProfile)")
    ap.add_argument("--json", default=os.path.join(BENCH, "results.json"))
    args = ap.parse_args()
    if args.quick:
        args.repeats = 1
    full_repeats = args.full_repeats or min(2, args.repeats)
    cli_repeats = args.cli_repeats or args.repeats

    if not os.path.exists(GENERATED) and not args.skip_generated:
        log("bench/generated.c is missing; generating it")
        subprocess.run([sys.executable, os.path.join(BENCH, "gen_kernels.py")], check=True)

    started = pc()
    problems: list = []
    PHASES.install()
    results = {"date": datetime.datetime.now().astimezone().isoformat(timespec="seconds"), "machine": machine(),
               "repeats": args.repeats, "full_repeats": full_repeats, "groups": {}, "cli": [],
               "loadavg_start": " ".join(f"{x:.1f}" for x in os.getloadavg())}
    samples = sorted(glob.glob(os.path.join(ROOT, "samples", "*.c")))
    if not args.skip_samples:
        results["groups"]["samples"] = bench_group("samples", samples, args.repeats, full_repeats, None, problems)
    if not args.skip_generated:
        results["groups"]["generated"] = bench_group("generated", [GENERATED], args.repeats, full_repeats,
                                                     args.per_kind, problems)
    if not args.skip_samples:
        log(f"[cli] looptile analyze samples/*.c x{cli_repeats}")
        results["cli"].append(time_cli(["analyze"] + [os.path.relpath(p, ROOT) for p in samples], cli_repeats))
    if not args.skip_generated:
        log(f"[cli] looptile analyze bench/generated.c x{cli_repeats}")
        results["cli"].append(time_cli(["analyze", "bench/generated.c"], cli_repeats))
    results["loadavg_end"] = " ".join(f"{x:.1f}" for x in os.getloadavg())
    results["targets"] = targets(results)
    results["problems"] = problems
    results["bench_wall_s"] = pc() - started
    PHASES.uninstall()
    if args.profile and not args.skip_generated:
        log("[profile] cProfile of load + analyze of bench/generated.c")
        results["profile"] = os.path.relpath(profile_generated(os.path.join(BENCH, "profile_analyze.txt")), ROOT)

    with open(args.json, "w") as f:
        json.dump(results, f, indent=2, default=str)
    print(markdown(results))
    print(f"\nbench wall time {results['bench_wall_s']:.0f} s; figures in {os.path.relpath(args.json, ROOT)}")
    if problems:
        print(f"\n{len(problems)} problem(s) in looptile (internal errors or crashes):")
        for p in problems:
            print(f"--- {p['where']} ({p['step']})\n{p['error']}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
