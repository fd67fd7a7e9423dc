"""Legality verdicts on textbook dependence patterns.

Outside check: the worked examples of interchange and tiling legality from
direction vectors in the compiler literature (from memory): Allen & Kennedy,
"Optimizing Compilers for Modern Architectures" (2002), chapter 5: a loop
interchange is illegal exactly when a dependence has the direction vector
(<, >), i.e. the interchanged vector would be lexicographically negative;
Wolfe, "High Performance Compilers for Parallel Computing" (1996), tiling
chapter: tiling a band (strip-mining every loop and moving the tile loops
out) is legal for every tile size when the band is fully permutable, i.e.
every dependence distance has non-negative components in the band; a
reversed (down-counting) loop flips the sign of its distance component.

Second, independent of isl: every verdict is also checked by brute force.
For small parameter values the test enumerates all iterations in the
original order, finds every pair of accesses to the same element (at least
one a write) and checks that the new order keeps the pair's order.  The
accesses are written out by hand in Python for each snippet.

The snippets are small kernels of an invented coastal-ocean model.
"""
from __future__ import annotations

import itertools
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import pytest
from conftest import headline, run_cli

from looptile import extract, pipeline
from looptile.deps import NestAnalysis
from looptile.flags import CompileFlags
from looptile.model import ScheduleDim

pytestmark = pytest.mark.cc


def analysis_of(tmp_path: Path, text: str, sel: str, name: str = "kernel.c"):
    path = tmp_path / name
    path.write_text(text)
    tu = pipeline.load(str(path), CompileFlags())
    nest = extract.build_nest(tu, pipeline.select(tu, sel))
    return nest, NestAnalysis(nest)


def interchange() -> list[ScheduleDim]:
    return [ScheduleDim("j"), ScheduleDim("i")]


def original() -> list[ScheduleDim]:
    return [ScheduleDim("i"), ScheduleDim("j")]


def tiled(bi: int, bj: int) -> list[ScheduleDim]:
    # origin None: the tiles start at each loop's own start, as looptile emits them
    return [ScheduleDim("i", block=bi), ScheduleDim("j", block=bj), ScheduleDim("i"), ScheduleDim("j")]


# ---------------------------------------------------------------- brute force (no isl)

Elem = tuple
Instance = tuple


def brute_force_legal(domain: Callable[..., list[Instance]], accesses: Callable[..., list[tuple[Elem, bool]]],
                      key: Callable[..., tuple], params: list[tuple[int, ...]]) -> tuple[bool, object]:
    """True if ``key`` orders every conflicting pair of accesses as the original order does,
    for every parameter tuple in ``params``; else False and the first violated pair."""
    for par in params:
        order = domain(*par)
        by_elem: dict[Elem, list[tuple[int, bool]]] = {}
        for pos, x in enumerate(order):
            for elem, write in accesses(*x):
                by_elem.setdefault(elem, []).append((pos, write))
        for elem, acc in by_elem.items():
            for (p, wp), (q, wq) in itertools.combinations(acc, 2):
                if p == q or not (wp or wq):
                    continue
                if not key(par, order[p]) < key(par, order[q]):
                    return False, (par, order[p], order[q], elem)
    return True, None


SMALL = [(n, m) for n in range(0, 10) for m in range(0, 10)]


# ---------------------------------------------------------------- two-deep patterns

@dataclass(frozen=True)
class Pattern:
    name: str
    body: str  # the statement, in C
    reads: Callable[[int, int], list[Elem]]  # elements read by iteration (i, j) of array a
    i_lo: int  # i runs i_lo .. n-1 - i_hi_gap
    j_range: str  # "up" (j = j_lo .. m-1 - j_hi_gap) or "down" (j = m-1-j_hi_gap .. j_lo)
    j_lo: int
    j_hi_gap: int
    distance: tuple[int, ...] | tuple[tuple[int, ...], ...]  # expected distance(s), loop-direction terms
    interchange_legal: bool
    permutable: bool  # the band is fully permutable: tiling is legal for every tile size
    i_hi_gap: int = 0

    @property
    def vectors(self) -> list[tuple[int, int]]:
        return [self.distance] if isinstance(self.distance[0], int) else list(self.distance)

    def tiling_legal(self, bi: int, bj: int) -> bool:
        """Tiles of bi x bj iterations keep a dependence (di, dj) with dj < 0 only when it always
        leaves the i-tile, di >= bi (a pair inside one i-tile that crosses a j-tile boundary would
        run backwards); non-negative vectors are always kept."""
        return all(dj >= 0 or di >= bi for di, dj in self.vectors)

    def c_source(self) -> str:
        if self.j_range == "up":
            jloop = f"for (int j = {self.j_lo}; j < m - {self.j_hi_gap}; j++)"
        else:
            jloop = f"for (int j = m - 1 - {self.j_hi_gap}; j >= {self.j_lo}; j--)"
        return f"""\
/* Coastal model kernel ({self.name}): in-place update of the sea-level field a. */
void update_level(int n, int m, double a[n][m], const double f[n][m])
{{
    for (int i = {self.i_lo}; i < n - {self.i_hi_gap}; i++)
        {jloop}
            {self.body}
}}
"""

    def domain(self, n: int, m: int) -> list[Instance]:
        js = range(self.j_lo, m - self.j_hi_gap)
        js = js if self.j_range == "up" else reversed(js)
        js = list(js)
        return [(i, j) for i in range(self.i_lo, n - self.i_hi_gap) for j in js]

    def accesses(self, i: int, j: int) -> list[tuple[Elem, bool]]:
        return [(e, False) for e in self.reads(i, j)] + [(("a", i, j), True)]

    def position(self, par, x) -> tuple[int, int]:
        """Iteration numbers of x in each loop's own order (0, 1, 2, ...)."""
        n, m = par
        i, j = x
        pj = j - self.j_lo if self.j_range == "up" else (m - 1 - self.j_hi_gap) - j
        return i - self.i_lo, pj


PATTERNS = [
    # Allen & Kennedy ch. 5 (from memory): the (<, >) vector, the standard example of an illegal interchange.
    Pattern("distance (1,-1)", "a[i][j] = a[i - 1][j + 1] + f[i][j];",
            lambda i, j: [("a", i - 1, j + 1)], 1, "up", 0, 1, (1, -1), False, False),
    Pattern("distance (1,0)", "a[i][j] = a[i - 1][j] + f[i][j];",
            lambda i, j: [("a", i - 1, j)], 1, "up", 0, 0, (1, 0), True, True),
    Pattern("distance (0,1)", "a[i][j] = a[i][j - 1] + f[i][j];",
            lambda i, j: [("a", i, j - 1)], 0, "up", 1, 0, (0, 1), True, True),
    Pattern("distance (1,1)", "a[i][j] = a[i - 1][j - 1] + f[i][j];",
            lambda i, j: [("a", i - 1, j - 1)], 1, "up", 1, 0, (1, 1), True, True),
    # (0,1) alone would allow both; with (1,-1) as well the band is not permutable.
    Pattern("distances (0,1) and (1,-1)", "a[i][j] = a[i][j - 1] + a[i - 1][j + 1];",
            lambda i, j: [("a", i, j - 1), ("a", i - 1, j + 1)], 1, "up", 1, 1, ((0, 1), (1, -1)), False, False),
    # the wavefront: (1,0) and (0,1), fully permutable (Wolfe, tiling chapter, from memory)
    Pattern("distances (1,0) and (0,1)", "a[i][j] = 0.5 * (a[i - 1][j] + a[i][j - 1]);",
            lambda i, j: [("a", i - 1, j), ("a", i, j - 1)], 1, "up", 1, 0, ((1, 0), (0, 1)), True, True),
    # a long vector: still (<, >), so still no interchange
    Pattern("distance (4,-1)", "a[i][j] = a[i - 4][j + 1] + f[i][j];",
            lambda i, j: [("a", i - 4, j + 1)], 4, "up", 0, 1, (4, -1), False, False),
    # an anti dependence (read now, overwritten later) with the same (<, >) shape
    Pattern("anti distance (1,-1)", "a[i][j] = a[i + 1][j - 1] + f[i][j];",
            lambda i, j: [("a", i + 1, j - 1)], 0, "up", 1, 0, (1, -1), False, False, i_hi_gap=1),
    # Reversal flips the sign (Allen & Kennedy, loop reversal, from memory): a[i-1][j-1] with j
    # counting down is (1, -1) in iteration order, so the interchange becomes illegal ...
    Pattern("down-counting j, a[i-1][j-1]", "a[i][j] = a[i - 1][j - 1] + f[i][j];",
            lambda i, j: [("a", i - 1, j - 1)], 1, "down", 1, 0, (1, -1), False, False),
    # ... and a[i-1][j+1] with j counting down is (1, 1): legal.
    Pattern("down-counting j, a[i-1][j+1]", "a[i][j] = a[i - 1][j + 1] + f[i][j];",
            lambda i, j: [("a", i - 1, j + 1)], 1, "down", 0, 1, (1, 1), True, True),
]


@pytest.mark.parametrize("pat", PATTERNS, ids=[p.name for p in PATTERNS])
def test_pattern_dependences(tmp_path, pat):
    nest, a = analysis_of(tmp_path, pat.c_source(), "update_level")
    deps = [d for d in a.dependences() if d.array == "a"]
    assert {d.kind for d in deps} == ({"anti"} if pat.name.startswith("anti") else {"flow"}), deps
    vectors = pat.vectors
    if len(vectors) == 1:
        assert {d.distance for d in deps} == {vectors[0]}, deps
    else:  # several vectors in one statement pair: not uniform, the directions summarise them
        assert {d.distance for d in deps} == {None}, deps
    signs = [{"<" if v[k] > 0 else ("=" if v[k] == 0 else ">") for v in vectors} for k in range(2)]
    union = {frozenset("<"): "<", frozenset("="): "=", frozenset(">"): ">", frozenset("<="): "<=",
             frozenset("=>"): ">="}
    want_dir = tuple(union.get(frozenset(s_), "*") for s_ in signs)
    for d in deps:
        assert d.direction == want_dir, d
    assert pat.permutable == all(x >= 0 for v in vectors for x in v)


@pytest.mark.parametrize("pat", PATTERNS, ids=[p.name for p in PATTERNS])
def test_pattern_interchange_verdict(tmp_path, pat):
    nest, a = analysis_of(tmp_path, pat.c_source(), "update_level")
    assert a.check(original()).legal
    verdict = a.check(interchange())
    # outside check: the textbook verdict for the direction vector (see the module docstring, from memory)
    assert verdict.legal == pat.interchange_legal, verdict
    if not verdict.legal:
        assert verdict.witness is not None and verdict.witness.element.startswith("a[")
    # independent: brute force over small n, m
    legal, example = brute_force_legal(pat.domain, pat.accesses,
                                       lambda par, x: tuple(reversed(pat.position(par, x))), SMALL)
    # outside check: brute-force enumeration of all instance pairs for small n, m (no isl)
    assert legal == pat.interchange_legal, example


TILE_SIZES = [(1, 3), (2, 2), (3, 2), (4, 4), (5, 3)]


@pytest.mark.parametrize("pat", PATTERNS, ids=[p.name for p in PATTERNS])
def test_pattern_tiling_verdict(tmp_path, pat):
    nest, a = analysis_of(tmp_path, pat.c_source(), "update_level")
    for bi, bj in TILE_SIZES:
        want = pat.tiling_legal(bi, bj)
        if pat.permutable:
            assert want
        verdict = a.check(tiled(bi, bj))
        # outside check: fully permutable => legal (Wolfe, from memory); else the rule above
        assert verdict.legal == want, (bi, bj, verdict)

        def key(par, x, bi=bi, bj=bj):
            pi, pj = pat.position(par, x)
            return (pi // bi, pj // bj, pi, pj)
        legal, example = brute_force_legal(pat.domain, pat.accesses, key, SMALL)
        # outside check: brute-force enumeration of all instance pairs for small n, m (no isl)
        assert legal == want, (bi, bj, example)


def test_long_vector_tiling_depends_on_the_tile_size(tmp_path):
    """(4,-1): tiles of at most 4 rows never hold both ends of a dependence, so they are legal;
    5 rows and more are not (brute force agrees)."""
    pat = next(p for p in PATTERNS if p.name == "distance (4,-1)")
    nest, a = analysis_of(tmp_path, pat.c_source(), "update_level")
    for bi in (1, 2, 3, 4, 5, 8):
        want = bi <= 4
        assert a.check(tiled(bi, 3)).legal == want, bi

        def key(par, x, bi=bi):
            pi, pj = pat.position(par, x)
            return (pi // bi, pj // 3, pi, pj)
        legal, example = brute_force_legal(pat.domain, pat.accesses, key, [(n, m) for n in range(0, 16)
                                                                           for m in range(0, 9)])
        # outside check: brute-force enumeration of all instance pairs (no isl)
        assert legal == want, (bi, example)


def test_refusal_of_illegal_interchange_through_the_cli(tmp_path):
    pat = next(p for p in PATTERNS if p.name == "down-counting j, a[i-1][j-1]")
    src = tmp_path / "down.c"
    src.write_text(pat.c_source())
    r = run_cli("tile", src, "--nest", "update_level", "--order", "j,i")
    assert r.exit_code == 1, r.stderr
    h = headline(r.stderr)
    assert h["kind"] == "refused" and "would run S1(" in h["msg"]
    r = run_cli("tile", src, "--nest", "update_level", "--sizes", "4,4")
    assert r.exit_code == 1, r.stderr
    # the up-counting version is accepted
    up = next(p for p in PATTERNS if p.name == "distance (1,1)")
    src2 = tmp_path / "up.c"
    src2.write_text(up.c_source())
    for args in (("--order", "j,i"), ("--sizes", "4,4")):
        r = run_cli("tile", src2, "--nest", "update_level", *args)
        assert r.exit_code == 0, r.stderr


# ---------------------------------------------------------------- a floating-point reduction into a scalar

REDUCTION = """\
/* Coastal model: total water volume of the basin, summed row by row. */
double basin_volume(int n, int m, const double depth[n][m])
{
    double s = 0.0;
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            s += depth[i][j];
    return s;
}
"""


def test_scalar_reduction_forbids_reordering(tmp_path):
    nest, a = analysis_of(tmp_path, REDUCTION, "basin_volume")
    assert a.check(original()).legal
    # common practice: floating-point addition is not associative, so a sum must keep its order
    assert not a.check(interchange()).legal
    assert not a.check(tiled(4, 4)).legal
    # brute force: s is written by every iteration, so every reordering breaks a pair
    legal, _ = brute_force_legal(lambda n, m: [(i, j) for i in range(n) for j in range(m)],
                                 lambda i, j: [(("s",), False), (("s",), True)],
                                 lambda par, x: (x[1], x[0]), [(2, 2)])
    assert not legal


@pytest.mark.parametrize("args", [("--order", "j,i"), ("--sizes", "4,4")])
def test_scalar_reduction_refusal_mentions_rounding(tmp_path, args):
    src = tmp_path / "volume.c"
    src.write_text(REDUCTION)
    r = run_cli("tile", src, "--nest", "basin_volume", *args)
    assert r.exit_code == 1, r.stderr
    assert headline(r.stderr)["kind"] == "refused"
    assert "rounding" in r.stderr, r.stderr
    assert "'s'" in r.stderr or " s " in r.stderr


# ---------------------------------------------------------------- the triangular update of an elimination

ELIMINATION = """\
/* Coastal model: in-place elimination of the vertical diffusion matrix (no pivoting). */
void eliminate(int n, double a[n][n])
{
    for (int k = 0; k < n; k++) {
        for (int i = k + 1; i < n; i++)
            a[i][k] = a[i][k] / a[k][k];
        for (int i = k + 1; i < n; i++)
            for (int j = k + 1; j < n; j++)
                a[i][j] = a[i][j] - a[i][k] * a[k][j];
    }
}
"""

UPDATE3 = """\
/* Coastal model: the trailing updates of the elimination as one triangular nest. */
void update_all(int n, double a[n][n])
{
    for (int k = 0; k < n; k++)
        for (int i = k + 1; i < n; i++)
            for (int j = k + 1; j < n; j++)
                a[i][j] = a[i][j] - a[i][k] * a[k][j];
}
"""


def test_elimination_update_inside_k_loop_is_tileable(tmp_path):
    line = next(k for k, t in enumerate(ELIMINATION.split("\n"), 1) if "for (int j" in t) - 1
    nest, a = analysis_of(tmp_path, ELIMINATION, f"L{line}")
    assert nest.iterators == ("i", "j")
    assert [d for d in a.dependences() if d.array == "a"] == []  # k is fixed inside: no carried dependence
    assert a.check(interchange()).legal
    for bi, bj in TILE_SIZES:
        assert a.check(tiled(bi, bj)).legal

    # brute force over n and the fixed k (interchange; tiling keeps the same pairs, none)
    for n in range(0, 8):
        for k in range(0, n):
            legal, ex = brute_force_legal(
                lambda n_, k_: [(i, j) for i in range(k_ + 1, n_) for j in range(k_ + 1, n_)],
                lambda i, j, k=k: [(("a", i, j), False), (("a", i, k), False), (("a", k, j), False),
                                   (("a", i, j), True)],
                lambda par, x: (x[1], x[0]), [(n, k)])
            # outside check: brute-force enumeration of all instance pairs (no isl)
            assert legal, ex


def _update3_accesses(k, i, j):
    return [(("a", i, j), False), (("a", i, k), False), (("a", k, j), False), (("a", i, j), True)]


def _update3_domain(n):
    return [(k, i, j) for k in range(n) for i in range(k + 1, n) for j in range(k + 1, n)]


@pytest.mark.parametrize("perm", list(itertools.permutations("kij")), ids=lambda p: "".join(p))
def test_three_deep_update_is_fully_permutable(tmp_path, perm):
    """All distances of the update a[i][j] -= a[i][k] * a[k][j] are componentwise >= 0, so every
    loop order keeps them (Wolfe: a fully permutable band, from memory) -- brute force agrees."""
    nest, a = analysis_of(tmp_path, UPDATE3, "update_all")
    assert nest.iterators == ("k", "i", "j")
    for d in a.dependences():
        assert all(x in ("<", "=", "<=") for x in d.direction), d
    assert a.check([ScheduleDim(x) for x in perm]).legal
    index = {"k": 0, "i": 1, "j": 2}
    legal, ex = brute_force_legal(lambda n: _update3_domain(n), _update3_accesses,
                                  lambda par, x: tuple(x[index[c]] for c in perm), [(n,) for n in range(0, 7)])
    # outside check: brute-force enumeration of all instance pairs for n < 7 (no isl)
    assert legal, ex


# ---------------------------------------------------------------- guarded statements

# Conditions of an `if` around the update a[i][j] = a[i - 1][j + 1] + f[i][j] (the (<, >) vector
# of Allen & Kennedy ch. 5 when it runs everywhere). Whether the interchange stays illegal depends
# on which instances the condition lets run, so a model that ignored or misread the condition
# would either refuse a legal rewrite or name a witness that never runs. Each entry: C condition,
# the same condition in Python.
GUARDS = [
    ("i != j", lambda i, j, n, m: i != j),
    ("i == j", lambda i, j, n, m: i == j),
    ("!(i < j)", lambda i, j, n, m: not i < j),
    ("i < 3 || j > m - 3", lambda i, j, n, m: i < 3 or j > m - 3),
    ("i > 1 && j != 2", lambda i, j, n, m: i > 1 and j != 2),
    ("!(i != j && i + j != 6)", lambda i, j, n, m: not (i != j and i + j != 6)),
    ("(i - j == 2 || j - i == 2) && i != 4", lambda i, j, n, m: (i - j == 2 or j - i == 2) and i != 4),
]


@pytest.mark.parametrize("branch", ["then", "else"])
@pytest.mark.parametrize("cond,py", GUARDS, ids=[g[0] for g in GUARDS])
def test_guarded_update_verdict_and_witness(tmp_path, cond, py, branch):
    update = "a[i][j] = a[i - 1][j + 1] + f[i][j];"
    body = (f"if ({cond})\n                {update}" if branch == "then"
            else f"if ({cond})\n                f[i][j] = 0.0;\n            else\n                {update}")
    text = f"""\
void patch_level(int n, int m, double a[n][m], double f[n][m])
{{
    for (int i = 1; i < n; i++)
        for (int j = 0; j < m - 1; j++) {{
            {body}
        }}
}}
"""
    nest, a = analysis_of(tmp_path, text, "patch_level")

    def runs(i, j, n, m):
        return py(i, j, n, m) == (branch == "then")

    def accesses_for(n, m):
        def acc(i, j):
            if runs(i, j, n, m):
                return [(("a", i - 1, j + 1), False), (("f", i, j), False), (("a", i, j), True)]
            return [(("f", i, j), True)]
        return acc

    pars = [(n, m) for n in range(0, 9) for m in range(0, 9)]
    want = all(brute_force_legal(lambda n, m: [(i, j) for i in range(1, n) for j in range(0, m - 1)],
                                 accesses_for(n, m), lambda par, x: (x[1], x[0]), [(n, m)])[0]
               for n, m in pars)
    verdict = a.check(interchange())
    # outside check: brute-force enumeration of all instance pairs for n, m < 9 (no isl)
    assert verdict.legal == want, verdict
    if not verdict.legal:
        w = verdict.witness
        params = dict(w.params)
        for inst in (w.source, w.sink):
            v = dict(inst.values)
            if inst.statement == "S2" if branch == "then" else inst.statement == "S3":
                # the witnessed instance of the guarded update must really run
                assert runs(v["i"], v["j"], params["n"], params["m"]), (cond, branch, w)
