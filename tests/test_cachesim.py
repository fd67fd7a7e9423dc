"""The cache model of ``looptile simulate``: templates/cachesim.h and looptile/cachesim.py.

Outside references:
- pycachesim (the package from the registry, a general-purpose cache simulator; used here only as
  a test reference) for L1 hits and misses of load traces on LRU geometries, and for L2 of the
  same load traces.
- the system C compiler, which builds a small driver around the header (strict C99, warnings as
  errors, and once with the sanitizers).
- for the other levels, write-backs and memory bytes: hand-worked traces with their reasoning,
  and ``reference_run`` below, a straightforward re-reading of the policy in the module docstring
  of looptile/cachesim.py, written independently of both implementations.
"""
from __future__ import annotations

import json
import os
import random
import subprocess
from array import array
from pathlib import Path

import pytest
from conftest import cc_command, require_cc

from looptile.cachegeom import Level, parse_level
from looptile.cachesim import SimResult, c_init_call, check_levels, header_path, simulate_python
from looptile.errors import UsageError

pytestmark = pytest.mark.cc

# A driver around the header: `driver TRACE NARRAYS SIZE/WAYS/LINE...` reads a binary trace of
# (uint64 address, uint64 array | is_write << 32) records, streamed in blocks; `driver - N STREAM
# SIZE/WAYS/LINE...` generates STREAM reads of consecutive lines (for the progress line).
DRIVER = r"""
#include "cachesim.h"

int main(int argc, char **argv)
{
    unsigned long long size[8], buf[2 * 4096];
    unsigned ways[8], line[8];
    int k, nlevels = argc - 4, narrays = atoi(argv[2]);
    if (nlevels < 1 || nlevels > 8)
        return 3;
    for (k = 0; k < nlevels; k++)
        if (sscanf(argv[4 + k], "%llu/%u/%u", &size[k], &ways[k], &line[k]) != 3)
            return 3;
    lt_sim_init(nlevels, size, ways, line, narrays);
    if (strcmp(argv[1], "-") == 0) {
        unsigned long long i, n = strtoull(argv[3], NULL, 10);
        for (i = 0; i < n; i++)
            lt_sim_access((i * 64) & ((1ULL << 24) - 1), 0, 0);
    } else {
        size_t n, i;
        FILE *f = fopen(argv[1], "rb");
        if (!f)
            return 4;
        while ((n = fread(buf, 16, 4096, f)) > 0)
            for (i = 0; i < n; i++)
                lt_sim_access(buf[2 * i], (int)(buf[2 * i + 1] & 0xffffffffu), (int)(buf[2 * i + 1] >> 32));
        fclose(f);
    }
    lt_sim_finish();
    lt_sim_report(stdout);
    return 0;
}
"""

STRICT = ("-std=c99", "-pedantic", "-Wall", "-Wextra", "-Werror")


def _build(tmp: Path, name: str, flags: tuple[str, ...]) -> Path:
    require_cc()
    src = tmp / "driver.c"
    src.write_text(DRIVER)
    exe = tmp / name
    argv = cc_command() + [*STRICT, *flags, f"-I{header_path().parent}", str(src), "-o", str(exe)]
    proc = subprocess.run(argv, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, f"{' '.join(argv)}\n{proc.stderr}"
    return exe


@pytest.fixture(scope="module")
def driver(tmp_path_factory) -> Path:
    return _build(tmp_path_factory.mktemp("cachesim"), "driver", ("-O2",))


@pytest.fixture(scope="module")
def driver_san(tmp_path_factory) -> Path:
    return _build(tmp_path_factory.mktemp("cachesim_san"), "driver_san",
                  ("-O1", "-g", "-fsanitize=address,undefined", "-fno-sanitize-recover=undefined"))


def geometry(levels: list[Level]) -> list[str]:
    return [f"{lv.size}/{lv.ways}/{lv.line}" for lv in levels]


def run_c(exe: Path, levels: list[Level], trace, names: list[str], tmp: Path) -> SimResult:
    recs = array("Q")
    for addr, arr, w in trace:
        recs.append(addr)
        recs.append(arr | (int(bool(w)) << 32))
    path = tmp / "trace.bin"
    with open(path, "wb") as f:
        recs.tofile(f)
    proc = subprocess.run([str(exe), str(path), str(len(names)), "0", *geometry(levels)], capture_output=True,
                          text=True, timeout=60, env={**os.environ, "ASAN_OPTIONS": "detect_leaks=0"})
    assert proc.returncode == 0 and "runtime error" not in proc.stderr, proc.stderr
    return SimResult.from_json(proc.stdout, levels, names)


def L(spec: str) -> Level:
    return parse_level(spec)


# ---------------------------------------------------------------- traces (our own scenarios)

BASES = (0, 1 << 20, 2 << 20)  # three line-aligned arrays, 1 MiB apart


def strided(n: int, stride: int, span: int, writes_every: int = 0):
    """A sweep over a tide-gauge record: every `stride` bytes, wrapping at `span`."""
    for i in range(n):
        yield BASES[0] + (i * stride) % span, 0, bool(writes_every) and i % writes_every == 0


def scattered(n: int, span: int, seed: int, write_share: float = 0.0, narrays: int = 1):
    """Harbour-camera pixels looked up at random (8-byte elements, seeded)."""
    rnd = random.Random(seed)
    for _ in range(n):
        a = rnd.randrange(narrays)
        yield BASES[a] + rnd.randrange(0, span, 8), a, rnd.random() < write_share


def blocked_product(n: int, t: int, with_writes: bool = True):
    """Tidal-basin coupling C += A * B (doubles, n x n), walked in t x t x t blocks:
    reads A[i][k], B[k][j], C[i][j], then writes C[i][j]."""
    for ii in range(0, n, t):
        for kk in range(0, n, t):
            for jj in range(0, n, t):
                for i in range(ii, min(ii + t, n)):
                    for k in range(kk, min(kk + t, n)):
                        for j in range(jj, min(jj + t, n)):
                            yield BASES[0] + 8 * (i * n + k), 0, False
                            yield BASES[1] + 8 * (k * n + j), 1, False
                            yield BASES[2] + 8 * (i * n + j), 2, False
                            if with_writes:
                                yield BASES[2] + 8 * (i * n + j), 2, True


def load_traces():
    return {
        "strided8": list(strided(6000, 8, 40 * 1024)),
        "strided72": list(strided(6000, 72, 48 * 1024)),
        "strided4096": list(strided(4000, 4096, 1 << 20)),
        "random": list(scattered(8000, 24 * 1024, seed=7)),
        "blocked": [r for r in blocked_product(20, 8, with_writes=False)],
    }


# ---------------------------------------------------------------- (a) pycachesim, load traces

L1_GEOMETRIES = [
    "L1=2KiB/1/64",     # direct-mapped, 32 sets
    "L1=4KiB/2/64",     # 2-way
    "L1=8KiB/4/32",     # 4-way, 32-byte lines
    "L1=32KiB/8/64",    # 8-way, a common L1d (from memory)
    "L1=2KiB/0/64",     # fully associative, ways 0 (32 lines: the hash + list path)
    "L1=1KiB/16/64",    # fully associative, ways = lines (16: the small-array path)
]


def pycachesim_run(levels: list[Level], trace):
    """pycachesim's counters for the same hierarchy (LRU, write-back, write-allocate)."""
    cachesim = pytest.importorskip("cachesim")
    mem = cachesim.MainMemory()
    caches = []
    below = None
    for lv in reversed(levels):  # pycachesim is built from the last level up
        c = cachesim.Cache(lv.name, lv.sets, lv.assoc, lv.line, "LRU", write_back=True, write_allocate=True,
                           load_from=below, store_to=below)
        if below is None:
            mem.load_to(c)
            mem.store_from(c)
        caches.insert(0, c)
        below = c
    sim = cachesim.CacheSimulator(caches[0], mem)
    for addr, _, w in trace:
        if w:
            sim.store(addr, length=8)
        else:
            sim.load(addr, length=8)
    sim.force_write_back()
    return [c.stats() for c in caches]


@pytest.mark.parametrize("spec", L1_GEOMETRIES)
def test_l1_matches_pycachesim_on_load_traces(spec, driver, tmp_path):
    # pycachesim (registry package) gives the L1 reference: for loads only, its HIT_count and
    # MISS_count are exactly the L1 demand hits and misses of an LRU set-associative cache.
    levels = [L(spec), L("L2=64KiB/8/64")]
    for name, trace in load_traces().items():
        ours = run_c(driver, levels, trace, ["x", "y", "z"], tmp_path)
        ref = pycachesim_run(levels, trace)
        assert (ours.levels[0].hits, ours.levels[0].misses) == (ref[0]["HIT_count"], ref[0]["MISS_count"]), name
        # The same reference for L2: with loads only, L2 sees exactly L1's misses in both models.
        assert (ours.levels[1].hits, ours.levels[1].misses) == (ref[1]["HIT_count"], ref[1]["MISS_count"]), name
        assert ours.levels[0].accesses == len(trace)
        assert ours.levels[0].writebacks == 0 and ours.write_bytes == 0


def test_pycachesim_reference_sees_misses(driver, tmp_path):
    # Guard against a vacuous comparison: the traces above do produce hits and misses in every
    # L1 geometry, and the geometries disagree with each other.
    per_geometry = []
    for spec in L1_GEOMETRIES:
        levels = [L(spec)]
        r = run_c(driver, levels, load_traces()["random"], ["x"], tmp_path)
        assert r.levels[0].hits > 0 and r.levels[0].misses > 0, spec
        per_geometry.append(r.levels[0].misses)
    assert len(set(per_geometry)) > 3


@pytest.mark.parametrize("spec", ["L1=2KiB/1/64", "L1=512/1/32"])
def test_direct_mapped_l1_misses_and_writebacks_match_pycachesim_with_stores(spec, driver, tmp_path):
    # With stores, pycachesim counts HIT only for loads, but every L1 miss (a load, or a store's
    # write-allocate) in MISS_count, and every dirty line it writes out of L1 (evictions and
    # force_write_back) in EVICT_count. Its store hits do not refresh the LRU order (seen on a
    # 2-way trace: store 128 hits, a later miss still evicts line 128), where our LRU counts
    # every access; so only direct-mapped caches, where the order plays no part, are comparable.
    levels = [L(spec), L("L2=64KiB/8/64")]
    for trace in (list(scattered(6000, 12 * 1024, seed=3, write_share=0.3)), list(blocked_product(16, 8))):
        ours = run_c(driver, levels, trace, ["x", "y", "z"], tmp_path)
        ref = pycachesim_run(levels, trace)
        assert ours.levels[0].misses == ref[0]["MISS_count"]
        assert ours.levels[0].writebacks == ref[0]["EVICT_count"] > 0


# ---------------------------------------------------------------- (b) an independent reference

def reference_run(levels: list[Level], trace, narrays: int):
    """The policy read directly off its description, with plain lists.

    Each level is a dict set -> list of line numbers, least recently used first (a Python list
    per set, the textbook LRU stack), and a separate Python set of its dirty lines. Returns
    (per level: accesses, hits, misses, writebacks, per-array (accesses, misses)), read bytes,
    write bytes.
    """
    state = [{} for _ in levels]
    dirty = [set() for _ in levels]
    acc = [[0] * narrays for _ in levels]
    mis = [[0] * narrays for _ in levels]
    wb = [0] * len(levels)
    mem = {"read": 0, "write": 0}

    def stack(k, ln):
        return state[k].setdefault(ln % levels[k].sets, [])

    def write_back(k, byte_addr, nbytes):
        # The dirty line goes down until a level holds it (there: dirty, most recently used);
        # it is never allocated on the way; past the last level it is memory traffic.
        while k < len(levels):
            ln = byte_addr // levels[k].line
            st = stack(k, ln)
            if ln in st:
                st.remove(ln)
                st.append(ln)
                dirty[k].add(ln)
                return
            k += 1
        mem["write"] += nbytes

    for addr, a, w in trace:
        for k, lv in enumerate(levels):
            ln = addr // lv.line
            st = stack(k, ln)
            acc[k][a] += 1
            if ln in st:  # hit: most recently used; a write dirties L1 only
                st.remove(ln)
                st.append(ln)
                if w and k == 0:
                    dirty[k].add(ln)
                break
            mis[k][a] += 1
            if len(st) == lv.assoc:  # full set: the least recently used line leaves
                old = st.pop(0)
                if old in dirty[k]:
                    dirty[k].discard(old)
                    wb[k] += 1
                    write_back(k + 1, old * lv.line, lv.line)
            st.append(ln)
            if w and k == 0:
                dirty[k].add(ln)
        else:  # missed everywhere: one last-level line from memory
            mem["read"] += levels[-1].line
    for k, lv in enumerate(levels):  # the final flush, L1 first
        for ln in sorted(dirty[k]):
            wb[k] += 1
            write_back(k + 1, ln * lv.line, lv.line)
        dirty[k].clear()
    per_level = [(sum(acc[k]), sum(acc[k]) - sum(mis[k]), sum(mis[k]), wb[k],
                  [(acc[k][a], mis[k][a]) for a in range(narrays)]) for k in range(len(levels))]
    return per_level, mem["read"], mem["write"]


def summary(r: SimResult):
    per_level = [(lv.accesses, lv.hits, lv.misses, lv.writebacks, [(a.accesses, a.misses) for a in lv.arrays])
                 for lv in r.levels]
    return per_level, r.read_bytes, r.write_bytes


def test_hand_worked_writebacks_and_memory(driver, tmp_path):
    # L1: 2 lines, fully associative; L2: 4 lines, direct-mapped (line n in set n % 4).
    levels = [L("L1=128/0/64"), L("L2=256/1/64")]
    trace = [
        (0, 0, True),     # L1 miss (line 0, dirty), L2 miss (set 0): memory read 64
        (64, 1, False),   # L1 miss (line 1), L2 miss (set 1): read 64
        (128, 0, False),  # L1 miss; LRU line 0 is dirty: L1 write-back into L2, which holds it (now
                          # dirty there); then L2 miss for line 2 (set 2): read 64
        (0, 0, False),    # L1 miss (line 1 leaves L1, clean, silently); L2 hit on line 0
        (256, 1, False),  # line 4: L1 miss (line 2 leaves); L2 set 0 holds dirty line 0: L2
                          # write-back to memory (64 bytes), then L2 miss: read 64
        (264, 1, True),   # line 4 again: L1 hit, now dirty in L1
    ]
    # Flush: L1's dirty line 4 goes to L2 (held: dirty there) -> L1 write-backs 2; then L2's
    # dirty line 4 goes to memory -> L2 write-backs 2, memory writes 128 bytes.
    expect = ([(6, 1, 5, 2, [(3, 3), (3, 2)]), (5, 1, 4, 2, [(3, 2), (2, 2)])], 4 * 64, 2 * 64)
    assert summary(run_c(driver, levels, trace, ["depth", "flow"], tmp_path)) == expect
    assert summary(simulate_python(levels, trace, ["depth", "flow"])) == expect
    assert reference_run(levels, trace, 2) == expect


def test_hand_worked_writeback_passes_a_level_and_no_inclusion(driver, tmp_path):
    # L1: 2 lines, fully associative; L2: one line.
    levels = [L("L1=128/0/64"), L("L2=64/1/64")]
    trace = [
        (0, 0, True),     # L1 miss (line 0 dirty); L2 miss: read 64
        (64, 0, False),   # L1 miss; L2 miss, line 0 leaves L2 (clean there); read 64
        (128, 0, False),  # L1 miss; L1's dirty line 0 is not in L2: the write-back passes it,
                          # not allocated, to memory (64 bytes); L2 miss (line 1 leaves L2): read 64
        (64, 0, False),   # line 1 left L2 but is still in L1 (not inclusive): L1 hit
    ]
    expect = ([(4, 1, 3, 1, [(4, 3)]), (3, 0, 3, 0, [(3, 3)])], 3 * 64, 64)
    assert summary(run_c(driver, levels, trace, ["tide"], tmp_path)) == expect
    assert summary(simulate_python(levels, trace, ["tide"])) == expect
    assert reference_run(levels, trace, 1) == expect


HIERARCHIES = [
    ["L1=1KiB/2/64", "L2=4KiB/4/64"],
    ["L1=512/1/32", "L2=2KiB/2/64", "L3=8KiB/8/128"],   # line sizes growing towards memory
    ["L1=1920/5/64", "L2=3072/24/64"],                   # 6 sets (not a power of two); 24-way (hash + lists)
    ["L1=2KiB/0/64", "L2=1KiB/4/64", "L3=16KiB/0/64"],   # L2 smaller than L1: no inclusion
]


def phases(n: int, seed: int):
    """Stretches of 1500 scattered lookups (mostly misses) and 1500 lookups of a few lines
    (hits), alternating: the C model queues and prefetches in the first kind of stretch and runs
    accesses at once in the second (it decides per 1024 accesses), so this crosses both switches."""
    rnd = random.Random(seed)
    for i in range(n):
        if (i // 1500) % 2 == 0:
            a = rnd.randrange(3)
            yield BASES[a] + rnd.randrange(0, 64 * 1024, 8), a, rnd.random() < 0.3
        else:
            yield BASES[1] + 8 * rnd.randrange(16), 1, rnd.random() < 0.5


def mixed_traces():
    return {
        "phases": list(phases(7600, seed=13)),
        "random": list(scattered(6000, 16 * 1024, seed=11, write_share=0.35, narrays=3)),
        "blocked": list(blocked_product(14, 6)),
        "strided": list(strided(5000, 40, 20 * 1024, writes_every=3)),
    }


@pytest.mark.parametrize("specs", HIERARCHIES, ids=lambda s: "+".join(s))
def test_all_levels_match_independent_reference(specs, driver, tmp_path):
    levels = [L(s) for s in specs]
    for name, trace in mixed_traces().items():
        ours = summary(run_c(driver, levels, trace, ["a", "b", "c"], tmp_path))
        assert ours == reference_run(levels, trace, 3), name
        assert ours[2] > 0, name  # dirty lines did reach memory


# ---------------------------------------------------------------- (c) C and Python agree

@pytest.mark.parametrize("specs", HIERARCHIES, ids=lambda s: "+".join(s))
def test_c_and_python_agree(specs, driver, tmp_path):
    levels = [L(s) for s in specs]
    names = ["depth", "flow", "gauge"]
    for name, trace in mixed_traces().items():
        c = run_c(driver, levels, trace, names, tmp_path)
        py = simulate_python(levels, iter(trace), names)
        assert c == py, name
        assert c.to_json() == py.to_json()


def test_sanitized_build_agrees(driver_san, tmp_path):
    # Address and undefined-behaviour sanitizers over both lookup structures and a flush.
    levels = [L("L1=1KiB/0/64"), L("L2=4KiB/8/64"), L("L3=8KiB/32/64")]
    trace = list(scattered(20000, 64 * 1024, seed=5, write_share=0.4, narrays=3))
    names = ["a", "b", "c"]
    assert run_c(driver_san, levels, trace, names, tmp_path) == simulate_python(levels, trace, names)


# ---------------------------------------------------------------- the C model's own code paths
# The reference in these tests is the Python twin, looptile/cachesim.py (simulate_python), which
# keeps every set as an OrderedDict of Python-int line numbers: no tag width, no set padding, no
# SIMD. They cover what the header does differently from it: sets of 4, 8 or 16 words with
# padding words, ranks packed into the tag words, the plain C99 build and the switch from
# 32-bit words to the hash + list structure when an address's tag no longer fits.

@pytest.fixture(scope="module")
def driver_portable(tmp_path_factory) -> Path:
    # LT_SIM_PORTABLE: no compiler builtins, no SSE2 (the loops a compiler without them runs)
    return _build(tmp_path_factory.mktemp("cachesim_portable"), "driver_portable", ("-O2", "-DLT_SIM_PORTABLE"))


SMALL_SETS = [
    ["L1=768/3/64", "L2=6KiB/12/64"],                      # 3 ways in 4 words; 12 ways in 16
    ["L1=1792/7/64", "L2=3328/13/64", "L3=12KiB/16/64"],   # 7 in 8; 13 in 16; 16 ways, 12 sets
    ["L1=576/9/64", "L2=1920/15/64", "L3=5KiB/5/128"],     # one set of 9 ways (fully associative); 15 in 16; 5 in 8
]


@pytest.mark.parametrize("specs", SMALL_SETS, ids=lambda s: "+".join(s))
def test_padded_small_sets_match_python(specs, driver, driver_portable, tmp_path):
    levels = [L(s) for s in specs]
    names = ["depth", "flow", "gauge"]
    for name, trace in mixed_traces().items():
        py = simulate_python(levels, iter(trace), names)
        assert run_c(driver, levels, trace, names, tmp_path) == py, name
        assert run_c(driver_portable, levels, trace, names, tmp_path) == py, name
        assert py.levels[-1].misses > 0 and py.write_bytes > 0, name


@pytest.mark.parametrize("specs", HIERARCHIES, ids=lambda s: "+".join(s))
def test_portable_build_matches_python(specs, driver_portable, tmp_path):
    levels = [L(s) for s in specs]
    names = ["depth", "flow", "gauge"]
    for name, trace in mixed_traces().items():
        py = simulate_python(levels, iter(trace), names)
        assert run_c(driver_portable, levels, trace, names, tmp_path) == py, name


# Far addresses. The header's 32-bit words hold a tag (line / sets) below 2^27 - 1 (tag bits
# all ones: a free way). At the first level of the geometries below a tag unit is sets * line
# bytes (8 sets of 64 bytes; 6 sets of 64; 16 sets of 32), so the edge bases give L1 tags
# 2^27 - 2 (the last that fits), 2^27 - 1 (a free way's), 2^27 and 2^27 + 3 (cut to 27 bits:
# 0 and 3, the tags of near lines); FAR, 2^40 and 2^62 up in steps of 2^36 (multiples of
# 2^27 units), gives tags that cut to 27 bits are one tag.
FAR = [(1 << 40) + k * (1 << 36) for k in range(4)] + [(1 << 62) + k * (1 << 36) for k in range(4)]


def edges(level: Level) -> list[int]:
    return [((1 << 27) + d) * level.sets * level.line for d in (-2, -1, 0, 3)]


def near_then_far(n: int, seed: int, far: list[int], unit: int):
    """Harbour-camera frames near address 0 first (arrays 0 and 1: sets filled, dirty lines, a
    settled LRU order), then the same frames mixed with frames at the far bases (array 2):
    far[:4] (the edges) in the second third, all of them in the last third, so that a model
    that took too large a tag for a 27-bit one would run a third of the trace on it. A far
    frame lies in the first `unit` bytes from its base: one L1 tag, one line in every set."""
    rnd = random.Random(seed)
    for i in range(n):
        if i < n // 3 or rnd.random() < 0.5:
            a = rnd.randrange(2)
            yield BASES[a] + rnd.randrange(0, 12 * 1024, 8), a, rnd.random() < 0.35
        else:
            base = rnd.choice(far[:4] if i < 2 * n // 3 else far)
            yield base + rnd.randrange(0, unit, 8), 2, rnd.random() < 0.35


@pytest.mark.parametrize("specs", [["L1=1KiB/2/64", "L2=4KiB/4/64"],
                                   ["L1=1920/5/64", "L2=3072/24/64"],
                                   ["L1=512/1/32", "L2=2KiB/2/64", "L3=8KiB/8/128"]], ids=lambda s: "+".join(s))
def test_far_addresses_match_python(specs, driver, driver_portable, driver_san, tmp_path):
    # The first address whose tag does not fit turns every small-set level into hash + lists,
    # with the lines, LRU order and dirty bits the near stretch left there; the rest of the
    # trace then hits and evicts those lines and the far ones.
    levels = [L(s) for s in specs]
    names = ["near0", "near1", "far"]
    n = 9000
    unit = levels[0].sets * levels[0].line
    far = edges(levels[0]) + FAR
    trace = list(near_then_far(n, 17, far, unit))
    py = simulate_python(levels, iter(trace), names)
    for exe in (driver, driver_portable, driver_san):
        assert run_c(exe, levels, trace, names, tmp_path) == py, exe.name
    assert summary(py) == reference_run(levels, trace, 3)
    # Not vacuous: the near arrays hit again after the switch (their lines came through it),
    # far lines hit, dirty lines reach memory, and a model that cut tags to 27 bits (the far
    # bases cut to their 27-bit tags: the edges to near addresses, FAR to two bases) would
    # count otherwise.
    head = simulate_python(levels, iter(trace[:n // 3]), names)
    assert all(py.levels[0].arrays[a].hits > head.levels[0].arrays[a].hits for a in (0, 1))
    assert py.levels[0].arrays[2].hits > 0 and py.write_bytes > 0
    cut = [b % ((1 << 27) * unit) for b in far[:4]] + [FAR[0]] * 4 + [FAR[4]] * 4
    aliased = simulate_python(levels, near_then_far(n, 17, cut, unit), names)
    assert summary(aliased) != summary(py)
    # A line whose tag is a free way's (2^27 - 1) as the very first access: a miss into free
    # ways, then a hit.
    first = [(far[1], 0, False), (far[1], 0, True), (far[1] + unit, 0, False)]
    assert run_c(driver, levels, first, names, tmp_path) == simulate_python(levels, first, names)
    assert simulate_python(levels, first, names).levels[0].hits == 1


def long_stretches(seed: int):
    """Two stretches of 70,000 scattered lookups over 8 MiB (a third of them writes) around
    5,000 lookups of a few lines: in a miss-heavy stretch the header cycles through 64 windows
    of 1024 accesses, the first four queued, the next four not, then the faster way (timed),
    so each stretch switches the queue on and off more than once."""
    rnd = random.Random(seed)
    for part in range(3):
        for _ in range(5000 if part == 1 else 70000):
            if part == 1:
                yield BASES[1] + 8 * rnd.randrange(32), 1, rnd.random() < 0.5
            else:
                a = rnd.randrange(3)
                yield BASES[a] + rnd.randrange(0, 8 << 20, 8), a, rnd.random() < 0.3


@pytest.mark.parametrize("specs", [["L1=1KiB/2/64", "L2=16KiB/4/64", "L3=4MiB/16/64"],   # L3: 256 KiB of words
                                   ["L1=2KiB/4/64", "L2=2MiB/32/64"]],                    # L2: 256 KiB of buckets
                         ids=lambda s: "+".join(s))
def test_long_miss_heavy_stretches_match_python(specs, driver, tmp_path):
    # The queue and the prefetches of the levels with at least 256 KiB of state, switched on
    # and off while accesses wait in the queue: every access is simulated once, in order.
    levels = [L(s) for s in specs]
    names = ["depth", "flow", "gauge"]
    trace = list(long_stretches(seed=23))
    py = simulate_python(levels, iter(trace), names)
    assert run_c(driver, levels, trace, names, tmp_path) == py
    assert py.levels[0].misses > 100000 and py.levels[-1].hits > 0 and py.write_bytes > 0


# ---------------------------------------------------------------- results, geometry, progress

def test_json_documents(driver, tmp_path):
    levels = [L("L1=1KiB/2/64"), L("L2=4KiB/4/64")]
    trace = list(scattered(3000, 8 * 1024, seed=2, write_share=0.5, narrays=2))
    r = run_c(driver, levels, trace, ["depth", "flow"], tmp_path)
    doc = r.to_json()
    json.dumps(doc)  # serialisable
    assert [lv["name"] for lv in doc["levels"]] == ["L1", "L2"]
    l1 = doc["levels"][0]
    assert l1["accesses"] == 3000 == l1["hits"] + l1["misses"]
    assert l1["miss_ratio"] == pytest.approx(l1["misses"] / 3000)
    assert set(l1["arrays"]) == {"depth", "flow"}
    assert sum(a["accesses"] for a in l1["arrays"].values()) == 3000
    # L2's demand accesses are exactly L1's misses; memory reads are L2's misses in lines.
    assert doc["levels"][1]["accesses"] == l1["misses"]
    assert doc["memory_bytes"]["read"] == doc["levels"][1]["misses"] * 64
    assert doc["memory_bytes"]["total"] == doc["memory_bytes"]["read"] + doc["memory_bytes"]["write"] > 0
    empty = simulate_python(levels, [], ["depth"]).to_json()
    assert empty["levels"][0]["miss_ratio"] is None and empty["memory_bytes"]["total"] == 0


def test_geometry_errors(driver, tmp_path):
    with pytest.raises(UsageError, match="must not decrease"):
        check_levels([L("L1=1KiB/2/128"), L("L2=4KiB/4/64")])
    with pytest.raises(UsageError, match="must not decrease"):
        simulate_python([L("L1=1KiB/2/128"), L("L2=4KiB/4/64")], [])
    proc = subprocess.run([str(driver), "-", "1", "10", "1024/2/128", "4096/4/64"], capture_output=True, text=True)
    assert proc.returncode == 2 and "must not decrease" in proc.stderr
    with pytest.raises(ValueError, match="array 2"):
        simulate_python([L("L1=1KiB/2/64")], [(0, 2, False)], ["a", "b"])


def test_c_init_call_compiles_and_runs(tmp_path):
    cc = require_cc()
    levels = [L("L1=32KiB/8/64"), L("L2=1MiB/16/64"), L("L3=32MiB/0/64")]
    src = tmp_path / "init.c"
    src.write_text('#include "cachesim.h"\nint main(void)\n{\n' + c_init_call(levels, 2)
                   + "    lt_sim_access(0, 1, 1);\n    lt_sim_finish();\n    lt_sim_report(stdout);\n"
                   "    return 0;\n}\n")
    exe = tmp_path / "init"
    subprocess.run(cc + [*STRICT, f"-I{header_path().parent}", str(src), "-o", str(exe)], check=True)
    r = SimResult.from_json(subprocess.run([str(exe)], capture_output=True, text=True).stdout, levels, ["a", "b"])
    assert [(lv.misses, lv.writebacks) for lv in r.levels] == [(1, 1), (1, 1), (1, 1)]
    assert r.levels[0].arrays[1].misses == 1 and r.levels[0].arrays[0].accesses == 0
    assert (r.read_bytes, r.write_bytes) == (64, 64)


def test_progress_line(driver):
    n = (1 << 26) + 5  # one progress step
    geo = ["32768/8/64"]
    quiet = subprocess.run([str(driver), "-", "1", str(n), *geo], capture_output=True, text=True, timeout=60,
                           env={k: v for k, v in os.environ.items() if k != "LOOPTILE_PROGRESS"})
    assert quiet.returncode == 0 and quiet.stderr == ""
    shown = subprocess.run([str(driver), "-", "1", str(n), *geo], capture_output=True, timeout=60,
                           env={**os.environ, "LOOPTILE_PROGRESS": "1"})  # bytes: text mode would turn \r into \n
    assert shown.returncode == 0 and shown.stderr == b"\r  simulated 67 million accesses\n"
    assert json.loads(shown.stdout)["levels"][0]["accesses"] == n
