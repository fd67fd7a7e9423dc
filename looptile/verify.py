"""The verify job: build the harness for two versions of a kernel, run both on the same
inputs over a sweep of sizes, and compare every object bit for bit.

Status: 0 all equal; 1 a difference, a sanitizer report or a failure of the rewritten
version; 2 no harness could be built, or the original itself fails.
"""
from __future__ import annotations

import os
import struct
import tempfile
from dataclasses import dataclass, field

from . import deps, extract, reduction, toolchain
from .errors import LooptileError, UsageError
from .frontend import TranslationUnit
from .harness import KernelSpec, alias_pair, kernel_spec, render_harness
from .tolerance import compare_within, tolerant_objects

DEFAULT_SIZES = (0, 1, 2, 3, 5, 8, 13, 17)


@dataclass(frozen=True)
class VerifyOptions:
    params: tuple[dict[str, int], ...] = ()  # --params sets
    shapes: dict[str, str] = field(default_factory=dict)  # --shape A=n*m
    seed: int = 12345
    timeout: float = 30.0
    tile_sizes: tuple[int, ...] = ()
    reassociated: tuple[str, ...] = ()  # floating-point accumulations reordered (--reassociate)
    tolerance: float | None = None  # --tolerance; None: tolerance.default_tolerance of each element type
    # also call the kernel with two array arguments overlapping (the last two parameter sets):
    # both paths of a --check-overlap rewrite run
    overlap: bool = False


@dataclass(frozen=True)
class VerifyReport:
    status: int
    lines: tuple[str, ...]

    @property
    def verdict(self) -> str:
        return self.lines[-1] if self.lines else ""


def sweep(tile_sizes: tuple[int, ...]) -> list[int]:
    """Sizes that exercise remainders and edges: 0, 1, T-1, T, T+1 for each tile size, two odd sizes."""
    if not tile_sizes:
        return list(DEFAULT_SIZES)
    values = {0, 1}
    for t in tile_sizes:
        values |= {t - 1, t, t + 1}
    top = max(tile_sizes)
    values |= {2 * top + 3 if (2 * top + 3) % 2 else 2 * top + 5, 7 if top < 7 else top + 2 | 1}
    return sorted(v for v in values if v >= 0)


def _analyses(tu: TranslationUnit, function: str) -> list[deps.NestAnalysis]:
    """isl views of the function's analysable top-level nests (for array extents)."""
    func = next(f for f in tu.functions if f.name == function)
    out = []
    for site in (s for s in func.loops if s.parent is None):
        try:
            out.append(deps.NestAnalysis(extract.build_nest(tu, site), extents_only=True))
        except LooptileError:
            continue
    return out


def _extent(analyses: list[deps.NestAnalysis], name: str, values: dict[str, int], dim: int) -> int | None:
    """1 + the largest index of dimension ``dim`` of ``name`` that any nest touches (0 if none)."""
    best = None
    for a in analyses:
        if not any(x.key == name and not x.local for x in a.nest.arrays):
            continue
        try:
            ext = deps.access_extent(a, name, values)
        except deps.BoundsNotAffine:
            return None
        if ext is None:
            best = best or 0
            continue
        lo, hi = ext[dim]
        if lo < 0:
            return None
        best = max(best or 0, hi + 1)
    return best


def parameter_sets(spec: KernelSpec, analyses: list[deps.NestAnalysis],
                   opts: VerifyOptions) -> list[tuple[dict[str, int], list[int]]]:
    """(integer parameter values, first-dimension extents of undeclared-size arrays) for each run."""
    given = list(opts.params) or [{}]
    # Row lengths of flattened arrays (A[i*ld + j]): when not given, each run takes the shared size
    # (the tightest value for which the rows hold the loops' ranges), and the last size also runs
    # with one less (the in-row test fails: the original nest runs) and a few more.
    rows = {r for a in analyses for x in a.nest.arrays for r in x.rows} & set(spec.other_ints)
    rows = {r for r in rows if not all(r in g for g in given)}
    unknown = [n for n in spec.other_ints if not all(n in g for g in given) and n not in rows]
    if unknown:
        raise UsageError(f"give a value for the integer parameter(s) {', '.join(unknown)} with --params "
                         f"{unknown[0]}=VALUE (they are not loop bounds or array sizes)")
    runs = []
    for g in given:
        free = [n for n in spec.bound_params if n not in g]
        sizes = sweep(opts.tile_sizes) if free or rows else [None]
        cases = [(v, 0) for v in sizes] + ([(sizes[-1], -1), (sizes[-1], 3)] if rows and sizes[-1] else [])
        for v, extra in cases:
            values = dict(g)
            for n in free:
                values[n] = v
            for n in rows:
                values[n] = max((v or 0) + extra, 1)
            for n in spec.dim_params:
                if n in values:
                    continue
                need = 1
                for p in spec.arrays():
                    for d, expr in enumerate(p.dims):
                        if expr == n:
                            need = max(need, _extent(analyses, p.name, values, d) or 1)
                values[n] = need
            counts = []
            for p in spec.arrays():
                if all(p.dims) or p.name in opts.shapes:
                    continue
                first = _extent(analyses, p.name, values, 0)
                if first is None:
                    raise UsageError(f"give --shape for pointer parameter {p.name} (its size is not declared and "
                                     f"looptile cannot bound the elements the kernel touches), e.g. "
                                     f"--shape {p.name}=n*m")
                counts.append(first)
            runs.append((values, counts))
    return runs


@dataclass(frozen=True)
class Dumped:
    name: str
    size: int
    dims: tuple[int, ...]
    data: bytes


def parse_dump(out: bytes) -> list[Dumped]:
    objs, pos = [], 0
    while pos < len(out):
        nl = out.index(b"\n", pos)
        fields = out[pos:nl].decode("latin-1").split()
        name, size, count, rank = fields[0], int(fields[1]), int(fields[2]), int(fields[3])
        dims = tuple(int(x) for x in fields[4:4 + rank])
        start = nl + 1
        objs.append(Dumped(name, size, dims, out[start:start + size * count]))
        pos = start + size * count + 1
    return objs


def _value(raw: bytes, kind: str) -> str:
    if kind == "float" and len(raw) in (4, 8):
        v = struct.unpack("<f" if len(raw) == 4 else "<d", raw)[0]
        return f"{v!r} (0x{raw[::-1].hex()})"
    signed = kind != "uint"
    return str(int.from_bytes(raw, "little", signed=signed))


def _indices(flat: int, dims: tuple[int, ...]) -> str:
    idx = []
    for d in reversed(dims[1:]):
        idx.append(flat % d if d else 0)
        flat = flat // d if d else 0
    idx.append(flat)
    return "".join(f"[{i}]" for i in reversed(idx))


def compare(a: list[Dumped], b: list[Dumped], kinds: dict[str, str]) -> str | None:
    """None when equal, else the first difference with its indices and both values."""
    for x, y in zip(a, b):
        if x.data == y.data:
            continue
        for k in range(0, min(len(x.data), len(y.data)), x.size):
            if x.data[k:k + x.size] != y.data[k:k + y.size]:
                where = x.name if x.name == "return" else x.name + _indices(k // x.size, x.dims or (1,))
                kind = kinds.get(x.name, "float")
                return (f"{where} differs: original {_value(x.data[k:k + x.size], kind)}, "
                        f"rewritten {_value(y.data[k:k + y.size], kind)}")
        return f"{x.name} differs in size"
    if len(a) != len(b):
        return "the versions dumped different objects"
    return None


def _kinds(spec: KernelSpec) -> dict[str, str]:
    def kind(t) -> str:
        return "float" if t.kind == "float" else ("int" if t.signed else "uint")
    out = {p.name: kind(p.ctype) for p in spec.params if p.kind == "array"}
    out |= {g.name: kind(g.elem) for g in spec.globals}
    if spec.return_type is not None:
        out["return"] = kind(spec.return_type)
    return out


def verify(tu: TranslationUnit, candidate: bytes, function: str, opts: VerifyOptions,
           candidate_name: str = "rewritten") -> VerifyReport:  # noqa: C901 - one linear job
    """Compare the kernel ``function`` of ``tu``'s file with its version in ``candidate``."""
    spec = kernel_spec(tu, function)
    runs = parameter_sets(spec, _analyses(tu, function), opts)
    src = tu.source
    include_dir = os.path.dirname(os.path.abspath(src.path))
    with tempfile.TemporaryDirectory(prefix="looptile-verify-") as tmp:
        exes = {}
        builds = [("original", src.data), (candidate_name, candidate)]
        if opts.reassociated:  # a third build: the sums of the absolute values of the terms
            try:
                builds.append(("bound", reduction.bound_source(tu, function, opts.reassociated)))
            except reduction.BoundUnavailable as exc:
                return VerifyReport(2, (f"cannot compute the tolerance of the reassociated values: {exc}",
                                        "verdict: no check was made"))
        for label, data in builds:
            path = os.path.join(tmp, f"{label}.c")
            with open(path, "wb") as fh:
                fh.write(data)
            harness = os.path.join(tmp, f"harness_{label}.c")
            absolute = opts.reassociated if label == "bound" else ()
            with open(harness, "w", encoding="latin-1") as fh:
                fh.write(render_harness(spec, path, opts.shapes, absolute))
            b = toolchain.build(harness, os.path.join(tmp, label), tu.flags, include_dir)
            if not b.ok:
                detail = [ln for ln in b.messages.splitlines() if "error" in ln][:5] or b.messages.splitlines()[:5]
                if label in ("original", "bound"):
                    return VerifyReport(2, tuple(["cannot build the harness for the original:"] + detail +
                                                 ["verdict: no check was made"]))
                return VerifyReport(1, tuple([f"the {label} version does not compile:"] + detail +
                                             ["verdict: FAIL (the rewritten version does not compile)"]))
            exes[label] = b.exe
        report = _run_all(spec, runs, exes, candidate_name, opts)
    # Sanitizer messages name the temporary copies: show the user's names instead.
    shown = {os.path.join(tmp, "original.c"): src.path, os.path.join(tmp, f"{candidate_name}.c"): candidate_name}
    lines = []
    for line in report.lines:
        for temp, name in shown.items():
            line = line.replace(temp, name)
        lines.append(line)
    return VerifyReport(report.status, tuple(lines))


def _run_all(spec: KernelSpec, runs, exes: dict[str, str], candidate_name: str,
             opts: VerifyOptions) -> VerifyReport:
    lines: list[str] = []
    kinds = _kinds(spec)
    tolerant = tolerant_objects(spec, opts.reassociated)
    ints = [p.name for p in spec.params if p.kind == "int"]
    failed = 0
    cases = [(values, counts, None) for values, counts in runs]
    pair = alias_pair(spec)
    if opts.overlap and pair is not None:
        cases += [(values, counts, {"LOOPTILE_OVERLAP": "1"}) for values, counts in runs[-2:]]
    for values, counts, env in cases:
        label = " ".join(f"{n}={values[n]}" for n in ints) or "(no integer parameters)"
        if env:
            label += f" ({pair['second']} inside {pair['first']})"
        args = [str(opts.seed)] + [str(values[n]) for n in ints] + [str(c) for c in counts]
        ref = toolchain.run(exes["original"], args, opts.timeout, env)
        problem = _run_problem(ref)
        if problem:
            lines += [f"{label}: the original itself {problem}; the rewrite is not blamed",
                      "verdict: no check was made (fix the original or the sizes: --params, --shape)"]
            return VerifyReport(2, tuple(lines))
        new = toolchain.run(exes[candidate_name], args, opts.timeout, env)
        problem = _run_problem(new)
        if problem:
            lines.append(f"{label}: FAIL: the {candidate_name} version {problem}")
            failed += 1
            continue
        if opts.reassociated:
            bound = toolchain.run(exes["bound"], args, opts.timeout, env)
            problem = _run_problem(bound)
            if problem:
                lines += [f"{label}: the build that sums the absolute values of the terms {problem}",
                          "verdict: no check was made (the tolerance of the reassociated values is unknown)"]
                return VerifyReport(2, tuple(lines))
            diff = compare_within(parse_dump(ref.stdout), parse_dump(new.stdout), parse_dump(bound.stdout), kinds,
                                  tolerant, opts.tolerance)
        else:
            diff = compare(parse_dump(ref.stdout), parse_dump(new.stdout), kinds)
        if diff:
            lines.append(f"{label}: FAIL: {diff}")
            failed += 1
        else:
            lines.append(f"{label}: pass")
    if failed:
        lines.append(f"verdict: DIFFERENT: {failed} of {len(cases)} parameter sets fail")
        return VerifyReport(1, tuple(lines))
    within = ""
    if opts.reassociated:
        bound = f"{opts.tolerance:g}" if opts.tolerance is not None else "the default tolerance of its type"
        what = "the reassociated values" if tolerant == set(opts.reassociated) else \
            "the floating-point outputs, which the reassociated local values may reach"
        within = (f", except {what} ({', '.join(sorted(tolerant)) or 'none'}), compared within "
                  f"{bound} times the sum of the absolute values of their terms")
    overlapping = f" ({len(cases) - len(runs)} with overlapping arguments)" if len(cases) > len(runs) else ""
    lines.append(f"verdict: equal: {len(cases)} parameter sets{overlapping} compared bit for bit{within} "
                 "(built with -O1 -ffp-contract=off and the address and undefined-behaviour sanitizers)")
    return VerifyReport(0, tuple(lines))


def _run_problem(r: toolchain.Run) -> str | None:
    if r.returncode is None:
        return "timed out"
    report = r.sanitizer_report
    if report:
        return f"trips a sanitizer: {report}"
    if r.returncode != 0:
        return f"exits with status {r.returncode}"
    return None
