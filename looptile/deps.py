"""Dependence analysis and legality with isl; the only module that imports islpy.

Memory-based dependences (flow, anti, output) between statement instances are
computed from iteration domains, access relations and the original 2d+1
schedule.  A transformation is legal when its schedule keeps every dependence:
``V = D ∩ (θ(x) ⪰ θ(y))`` must be empty for all parameter values.  Everything
returned is plain data (ints, strings, dataclasses).
"""
from __future__ import annotations

import itertools
import re
from dataclasses import dataclass

import islpy as isl

from .errors import UsageError
from .model import Access, Affine, Condition, Loop, Nest, Obligation, Reassociation, ScheduleDim, Statement

_ctx = isl.DEFAULT_CONTEXT


@dataclass(frozen=True)
class Dependence:
    kind: str  # "flow", "anti", "output"
    array: str  # C name
    source: str  # statement names
    sink: str
    distance: tuple[int, ...] | None  # over the perfect loops, when uniform (in the loops' own direction)
    direction: tuple[str, ...]  # "<", "=", ">", "<=", ">=", "*" per perfect loop


@dataclass(frozen=True)
class Instance:
    statement: str
    line: int
    values: tuple[tuple[str, int], ...]

    def render(self) -> str:
        return f"{self.statement}(" + ", ".join(f"{k}={v}" for k, v in self.values) + ")"


@dataclass(frozen=True)
class Witness:
    kind: str
    source: Instance  # runs first in the original order
    sink: Instance
    element: str
    source_writes: bool
    sink_writes: bool
    params: tuple[tuple[str, int], ...]


@dataclass(frozen=True)
class Legality:
    legal: bool
    witness: Witness | None = None
    reordered: tuple[str, ...] = ()  # C names of allowed accumulations whose updates the schedule reorders


def _isl_name(sym: str) -> str:
    if sym.startswith("$"):
        return "_q" + sym[1:]
    return "_" + sym


def _from_isl(name: str) -> str:
    if name.startswith("_q") and name[2:].isdigit():
        return "$" + name[2:]
    return name[1:] if name.startswith("_") else name


def _tuple_name(key: str) -> str:
    return "A_" + re.sub(r"[^A-Za-z0-9_]", "_", key)


class NestAnalysis:
    """isl view of one nest: domains, accesses, original schedule, dependences."""

    def __init__(self, nest: Nest, assumptions: tuple[str, ...] = (), assume_in_row: bool = False,
                 reassociation: Reassociation | None = None, extents_only: bool = False) -> None:
        """``extents_only``: a view for the elements the accesses touch (``access_extent``), for
        every parameter value: flattened subscripts are then not restricted to stay in their rows
        (their flat index is the same either way), and dependences must not be asked for."""
        self.nest = nest
        # Accumulations whose updates may run in a new order: only check() drops the dependences
        # between their updates (every other user of the dependences, e.g. a parallel loop, sees them).
        self.reassociation = reassociation or Reassociation()
        self._split: dict[tuple[str, str], tuple[isl.UnionMap, isl.UnionMap | None]] = {}
        self.loops: dict[str, Loop] = {lp.iterator: lp for lp in nest.perfect + nest.inner}
        self.params = [_isl_name(p.name) for p in nest.params]
        self.param_text = {_isl_name(p.name): p.text for p in nest.params}
        ctx_parts = [c for c in nest.context]
        for p in nest.params:  # a parameter holds a value of its C type
            if p.ctype.is_int and p.kind != "macro":
                lo, hi = _type_range(p.ctype.bits, p.ctype.signed)
                ctx_parts.append(f"{lo} <= {p.name} <= {hi}")
        # A macro whose value the body's subscripts used (guarded by #if in the output) has that
        # value in the bounds too.
        names = {p.name for p in nest.params}
        ctx_parts += [f"{name} = {value}" for name, value in nest.macros_used if name in names]
        self.context = self._context(ctx_parts)
        if assumptions:
            try:
                self.context = self.context.intersect(self._context(list(assumptions)))
            except isl.Error:
                raise UsageError(f"--assume {' '.join(repr(a) for a in assumptions)} is not a condition on the "
                                 "nest's parameters (write e.g. 'n >= 1' or 'n >= m and m >= 0')") from None
        self.in_row_failing: list[Obligation] = []  # in-row obligations not proven for every size
        self.in_row_never = False  # ... and they fail whenever the accesses run
        self.in_row_check: isl.Set | None = None  # the parameter condition to test at run time
        self.assume_in_row = assume_in_row
        if nest.in_row and not extents_only:
            self._in_row()
        self.tail_len = max((len(s.tail) for s in nest.statements), default=0)
        self.domains = {s.name: self._domain(s) for s in nest.statements}
        self.stmts = {s.name: s for s in nest.statements}
        self.original = self._schedule(None)
        self._deps: list[tuple[str, str, isl.UnionMap]] | None = None

    def _in_row(self) -> None:
        """Flattened subscripts: where their in-row obligations fail, the multi-dimensional reading
        is not exact. The analysis is then valid only for the parameters where they hold
        (``safe``), which become part of the context: proven when that is every parameter value
        for which the accesses run, else ``in_row_check`` (simplified against "the accesses
        run": outside that, nothing runs and any test result is harmless) is tested at run time,
        or asserted by the user (``assume_in_row``)."""
        bad = runs = None
        for o in self.nest.in_row:
            dom = self.chain_set("X", o.loops)
            v = dom.intersect(self.chain_set("X", o.loops, f"{self._r(o.expr)} < 0")).params()
            d = dom.params()
            runs = d if runs is None else runs.union(d)
            if not v.is_empty():
                self.in_row_failing.append(o)
                bad = v if bad is None else bad.union(v)
        if bad is None:
            return
        assert runs is not None
        ctx = self.context.align_params(bad.get_space())
        bad, runs = bad.align_params(ctx.get_space()), runs.align_params(ctx.get_space())
        safe = ctx.subtract(bad)
        if safe.intersect(runs).is_empty():
            self.in_row_never = True
        check = safe.gist(runs.intersect(ctx)).coalesce()
        if not _plain_condition(check):
            # Steps make the exact test need divisions (a parity), and the type ranges of the
            # parameters can give it huge coefficients: test a sufficient condition instead,
            # the polyhedral hull (a superset) of the violations computed over all integers,
            # within the hull of "runs". The rewrite then runs for fewer sizes, and it stays true
            # that wherever the test holds the parameters are in ``safe``, the analysis' context.
            kept = self.context
            self.context = isl.Set.universe(ctx.get_space())
            try:
                bad = runs = None
                for o in self.nest.in_row:
                    dom = self.chain_set("X", o.loops)
                    v = dom.intersect(self.chain_set("X", o.loops, f"{self._r(o.expr)} < 0")).params()
                    runs = dom.params() if runs is None else runs.union(dom.params())
                    bad = v if bad is None else bad.union(v)
            finally:
                self.context = kept
            assert bad is not None and runs is not None
            hull_runs = isl.Set.from_basic_set(runs.polyhedral_hull()).align_params(ctx.get_space())
            bad = isl.Set.from_basic_set(bad.polyhedral_hull()).align_params(ctx.get_space()).intersect(hull_runs)
            safe = ctx.subtract(bad)
            check = isl.Set.universe(ctx.get_space()).subtract(bad).gist(hull_runs).coalesce()
        self.in_row_check = check
        self.context = safe

    def in_row_conditions(self) -> list[list[tuple[Affine, bool]]]:
        """The run-time test of the in-row obligations: a disjunction (outer list) of
        conjunctions of ``a >= 0`` (False) / ``a == 0`` (True); [] when none is needed.
        Raises BoundsNotAffine when a part is not plain affine (a division)."""
        if self.in_row_check is None:
            return []
        bsets: list[isl.BasicSet] = []
        self.in_row_check.foreach_basic_set(bsets.append)
        out = []
        for b in bsets:
            if b.dim(isl.dim_type.div):
                raise BoundsNotAffine("the in-row condition needs a division")
            out.append(_constraint_affines(b))
        return out

    # -- construction helpers
    def _prefix(self) -> str:
        return "[" + ", ".join(self.params) + "] -> "

    def _set(self, body: str) -> isl.Set:
        return isl.Set(self._prefix() + body, context=_ctx)

    def _rename(self, text: str) -> str:
        """A C-like condition on parameters in isl syntax, every name in isl spelling."""
        keywords = ("and", "or", "not", "exists", "floor", "min", "max", "mod")

        def sub(m: re.Match) -> str:
            w = m.group(0)
            return w if w in keywords else _isl_name(w)

        text = text.replace("$", "_q")
        text = text.replace("&&", " and ").replace("||", " or ").replace("==", "=")
        return re.sub(r"(?<![_\w])[A-Za-z]\w*", sub, text)

    def _context(self, parts: list[str]) -> isl.Set:
        """Constraints on parameters: enclosing loops, unsigned types, user assumptions.

        They may name parameters the nest does not use (an enclosing loop's bound);
        isl aligns those when the context is intersected with the nest's sets."""
        if not parts:
            return self._set("{ : }")
        body = " and ".join(f"({self._rename(c)})" for c in parts)
        names = sorted(set(re.findall(r"(?<![_\w])_\w+", body)) | set(self.params))
        return isl.Set("[" + ", ".join(names) + "] -> { : " + body + " }", context=_ctx)

    def _r(self, a: Affine) -> str:
        return a.render(_isl_name)

    def loop_constraints(self, lp: Loop) -> str:
        x = _isl_name(lp.iterator)
        lo, lim = self._r(lp.start.value), self._r(lp.limit.value)
        parts = [f"{lo} <= {x}" if lp.direction > 0 else f"{x} <= {lo}", f"{x} {lp.op} {lim}"]
        if lp.ctype.is_unsigned:
            parts.append(f"{x} >= 0")
        if lp.step > 1:
            sign = "+" if lp.direction > 0 else "-"
            parts.append(f"exists (e_{x} : {x} = {lo} {sign} {lp.step}e_{x})")
        return " and ".join(parts)

    def chain_set(self, name: str, iterators: tuple[str, ...], extra: str = "") -> isl.Set:
        """The values the ``iterators`` take together in the nest (loops their bounds
        refer to are included and projected out)."""
        dims = list(iterators)
        k = 0
        while k < len(dims):
            lp = self.loops[dims[k]]
            for ref in sorted((lp.start.value.names() | lp.limit.value.names()) & set(self.loops)):
                if ref not in dims:
                    dims.append(ref)
            k += 1
        cons = " and ".join([self.loop_constraints(self.loops[i]) for i in dims] + ([extra] if extra else [])) \
            or "true"
        s = self._set(f"{{ {name}[{', '.join(_isl_name(i) for i in dims)}] : {cons} }}").intersect_params(self.context)
        if len(dims) > len(iterators):
            s = s.project_out(isl.dim_type.set, len(iterators), len(dims) - len(iterators))
        return s

    def _condition(self, c: Condition) -> str:
        if c.op in ("ge", "eq"):
            return f"{self._r(c.value)} {'>=' if c.op == 'ge' else '='} 0"
        if c.op == "not":
            return f"not ({self._condition(c.parts[0])})"
        return "(" + f" {c.op} ".join(f"({self._condition(p)})" for p in c.parts) + ")"

    def _domain(self, s: Statement) -> isl.Set:
        guards = " and ".join(self._condition(g) for g in s.guards)
        return self.chain_set(s.name, s.loops, guards)

    def _sched_dims(self, s: Statement, dims: list[ScheduleDim | None] | None) -> list[str]:
        out = []
        if dims is None:
            dims = [ScheduleDim(lp.iterator) for lp in self.nest.perfect]
        for d in dims:
            if d is None:  # a dimension that is 0 in this piece of the schedule
                out.append("0")
                continue
            lp = self.loops[d.iterator]
            x = _isl_name(d.iterator)
            if d.block is None:
                out.append(x if lp.direction > 0 else f"-{x}")
            else:
                o = self._r(d.origin) if d.origin is not None else self._r(lp.start.value)
                diff = f"({x} - ({o}))" if lp.direction > 0 else f"(({o}) - {x})"
                out.append(f"floor({diff}/{d.block})")
        for t in s.tail:
            if isinstance(t, int):
                out.append(str(t))
            else:
                out.append(_isl_name(t) if self.loops[t].direction > 0 else f"-{_isl_name(t)}")
        out += ["0"] * (self.tail_len - len(s.tail))
        return out

    def _schedule(self, dims: list[ScheduleDim] | None) -> isl.UnionMap:
        strips = sorted({d.when[:2] for d in dims or [] if d.when is not None})
        um = None
        for s in self.nest.statements:
            vars_ = ", ".join(_isl_name(i) for i in s.loops)
            # one piece per combination of whole / partial strips of the strip-mined loops
            for whole in itertools.product((True, False), repeat=len(strips)):
                state = dict(zip(strips, whole))
                cond = " and ".join(self._whole_strip(it, b) if w else f"not ({self._whole_strip(it, b)})"
                                    for (it, b), w in state.items())
                piece = [d if d.when is None or state[d.when[:2]] == d.when[2] else None for d in dims or []]
                out = self._sched_dims(s, None if dims is None else piece)
                m = isl.Map(self._prefix() + f"{{ {s.name}[{vars_}] -> [{', '.join(out)}] : {cond or 'true'} }}",
                            context=_ctx).intersect_domain(self.domains[s.name])
                um = isl.UnionMap.from_map(m) if um is None else um.union(isl.UnionMap.from_map(m))
        return um if um is not None else isl.UnionMap("{ }", context=_ctx)

    def _whole_strip(self, iterator: str, block: int) -> str:
        """The strip of ``block`` (iterations times step) that contains ``iterator``, counted
        from the loop's start, has all its iterations inside the loop's bounds."""
        lp = self.loops[iterator]
        x, lo, hi = _isl_name(iterator), self._r(lp.start.value), self._r(lp.limit.value)
        last = block - lp.step  # offset of the strip's last iteration
        if lp.direction > 0:
            return f"({lo}) + {block}*floor(({x} - ({lo}))/{block}) + {last} {'<=' if lp.inclusive else '<'} {hi}"
        return f"({lo}) - {block}*floor((({lo}) - {x})/{block}) - {last} {'>=' if lp.inclusive else '>'} {hi}"

    def _access(self, s: Statement, write: bool, array: str) -> isl.UnionMap | None:
        um = None
        vars_ = ", ".join(_isl_name(i) for i in s.loops)
        for a in s.accesses:
            if a.write != write or a.array != array:
                continue
            subs = ", ".join(self._r(x) for x in a.subscripts)
            m = isl.Map(self._prefix() + f"{{ {s.name}[{vars_}] -> {_tuple_name(a.array)}[{subs}] }}",
                        context=_ctx).intersect_domain(self.domains[s.name])
            um = isl.UnionMap.from_map(m) if um is None else um.union(isl.UnionMap.from_map(m))
        return um

    def _union(self, write: bool, array: str) -> isl.UnionMap | None:
        out = None
        for s in self.nest.statements:
            m = self._access(s, write, array)
            if m is not None:
                out = m if out is None else out.union(m)
        return out

    # -- dependences
    def dependence_relations(self) -> list[tuple[str, str, isl.UnionMap]]:
        """(kind, array key, relation source -> sink) for every array with a write."""
        if self._deps is not None:
            return self._deps
        before = self.original.lex_lt_union_map(self.original)
        out = []
        for arr in self.nest.arrays:
            w = self._union(True, arr.key)
            if w is None:
                continue
            r = self._union(False, arr.key)
            pairs = [("output", w, w)]
            if r is not None:
                pairs += [("flow", w, r), ("anti", r, w)]
            for kind, a, b in pairs:
                d = a.apply_range(b.reverse()).intersect(before)
                if not d.is_empty():
                    out.append((kind, arr.key, d))
        self._deps = out
        return out

    def dependences(self) -> list[Dependence]:
        out = []
        for kind, key, rel in self.dependence_relations():
            for m in _maps(rel):
                src, dst = m.get_tuple_name(isl.dim_type.in_), m.get_tuple_name(isl.dim_type.out)
                dist, dirs = self._distance(m)
                out.append(Dependence(kind, self.nest.array(key).name, src, dst, dist, dirs))
        return out

    def _distance(self, m: isl.Map) -> tuple[tuple[int, ...] | None, tuple[str, ...]]:
        delta = self._perfect_deltas(m)
        d = len(self.nest.perfect)
        dirs = tuple(self._dir_only(delta, k) for k in range(d))
        dist: list[int] = []
        for k, lp in enumerate(self.nest.perfect):
            vmin, vmax = delta.dim_min(k), delta.dim_max(k)
            if not (_is_const(vmin) and _is_const(vmax) and _pw_const(vmin) == _pw_const(vmax)):
                return None, dirs
            dist.append(lp.direction * _pw_const(vmin))
        return tuple(dist), dirs

    def _perfect_deltas(self, m: isl.Map) -> isl.Set:
        d = len(self.nest.perfect)
        n_in, n_out = m.dim(isl.dim_type.in_), m.dim(isl.dim_type.out)
        p = m.project_out(isl.dim_type.in_, d, n_in - d).project_out(isl.dim_type.out, d, n_out - d)
        p = p.set_tuple_name(isl.dim_type.in_, "P").set_tuple_name(isl.dim_type.out, "P")
        return p.deltas()

    def _dir_only(self, delta: isl.Set, k: int) -> str:
        d = len(self.nest.perfect)
        sign = self.nest.perfect[k].direction
        names = ", ".join(f"d{j}" for j in range(d))
        has = []
        for cond in (">", "=", "<"):
            probe = isl.Set(self._prefix() + f"{{ P[{names}] : {sign}*d{k} {cond} 0 }}", context=_ctx)
            has.append(not delta.intersect(probe).is_empty())
        return {(True, False, False): "<", (False, True, False): "=", (False, False, True): ">",
                (True, True, False): "<=", (False, True, True): ">="}.get(tuple(has), "*")

    # -- legality
    def check(self, dims: list[ScheduleDim]) -> Legality:
        """Is the schedule ``dims`` (then each statement's tail) legal? With a witness if not."""
        theta = self._schedule(dims)
        ge = theta.lex_ge_union_map(theta)
        reordered = set()
        for kind, key, rel in self.dependence_relations():
            rel, dropped = self._without_updates(kind, key, rel)
            v = rel.intersect(ge)
            if not v.is_empty():
                return Legality(False, self._witness(kind, key, v))
            if dropped is not None and not dropped.intersect(ge).is_empty():
                reordered.add(self.nest.array(key).name)
        return Legality(True, reordered=tuple(sorted(reordered)))

    def _without_updates(self, kind: str, key: str,
                         rel: isl.UnionMap) -> tuple[isl.UnionMap, isl.UnionMap | None]:
        """``rel`` without the pairs whose both ends are allowed updates of the accumulation into
        ``key``, and those pairs (None when there are none): a schedule that violates only them
        reorders the sum, which the user allowed (or which is exact: unsigned)."""
        allowed = self.reassociation.allowed_statements(key)
        if not allowed:
            return rel, None
        if (kind, key) not in self._split:
            kept, dropped = isl.UnionMap("{ }", context=_ctx), None
            for m in _maps(rel):
                one = isl.UnionMap.from_map(m)
                if {m.get_tuple_name(isl.dim_type.in_), m.get_tuple_name(isl.dim_type.out)} <= allowed:
                    dropped = one if dropped is None else dropped.union(one)
                else:
                    kept = kept.union(one)
            self._split[(kind, key)] = (kept, dropped)
        return self._split[(kind, key)]

    def carried(self, dims: list[ScheduleDim], k: int) -> tuple[str, Witness] | None:
        """Does dimension ``k`` of the (legal) schedule ``dims`` carry a dependence: a pair of
        dependent instances whose values agree on dimensions 0..k-1 and differ at k? None when
        it carries none (the loop at ``k`` may run its iterations in parallel, the loops outside
        it running in order); else (the array's C name, a witness pair)."""
        theta = self._schedule(dims)
        m = len(dims) + self.tail_len
        t = ", ".join(f"t{j}" for j in range(m))
        u = ", ".join(f"u{j}" for j in range(m))
        cons = [f"t{j} = u{j}" for j in range(k)] + [f"(t{k} < u{k} or t{k} > u{k})"]
        same = isl.UnionMap(self._prefix() + f"{{ [{t}] -> [{u}] : {' and '.join(cons)} }}", context=_ctx)
        pairs = theta.apply_range(same).apply_range(theta.reverse())
        for kind, key, rel in self.dependence_relations():
            v = rel.intersect(pairs)
            if not v.is_empty():
                return self.nest.array(key).name, self._witness(kind, key, v)
        return None

    def _witness(self, kind: str, key: str, v: isl.UnionMap) -> Witness:
        m = _maps(v)[0]
        src, dst = m.get_tuple_name(isl.dim_type.in_), m.get_tuple_name(isl.dim_type.out)
        s = m.wrap()
        npar = s.dim(isl.dim_type.param)
        names = [s.get_dim_name(isl.dim_type.param, k) for k in range(npar)]
        flat = s.move_dims(isl.dim_type.set, 0, isl.dim_type.param, 0, npar)
        point = None
        for lo in (0, -64):
            box = flat
            for k in range(npar):
                box = box.lower_bound_val(isl.dim_type.set, k, isl.Val(lo)) \
                    .upper_bound_val(isl.dim_type.set, k, isl.Val(64))
            if not box.is_empty():
                point = _pick_point(box)
                break
        if point is None:
            point = _pick_point(flat)
        if point is None:
            raise ValueError("isl found no point in a non-empty violation set")
        vals = [point.get_coordinate_val(isl.dim_type.set, k).to_python() for k in range(flat.dim(isl.dim_type.set))]
        params = tuple(zip(names, vals[:npar]))
        rest = vals[npar:]
        s_src, s_dst = self.stmts[src], self.stmts[dst]
        a = rest[: len(s_src.loops)]
        b = rest[len(s_src.loops):]
        inst_a = Instance(src, s_src.line, tuple(zip(s_src.loops, a)))
        inst_b = Instance(dst, s_dst.line, tuple(zip(s_dst.loops, b)))
        pvals = {_from_isl(n): v for n, v in params}
        elem = self._element(s_src, s_dst, key, dict(zip(s_src.loops, a)) | pvals,
                             dict(zip(s_dst.loops, b)) | pvals, kind)
        # The nest's own parameters in their order of first use, then any from the context.
        order = {n: k for k, n in enumerate(self.params)}
        ranked = sorted(params, key=lambda nv: (order.get(nv[0], len(order)), nv[0]))
        shown = tuple((self.param_text.get(n, _from_isl(n)), v) for n, v in ranked)
        return Witness(kind, inst_a, inst_b, elem, kind != "anti", kind != "flow", shown)

    def _element(self, src: Statement, dst: Statement, key: str, env_src: dict[str, int],
                 env_dst: dict[str, int], kind: str) -> str:
        """The element both instances touch: an access of the source (a write unless the
        dependence is anti) that equals an access of the sink (a read for flow)."""
        arr = self.nest.array(key)
        if arr.local:
            return arr.name
        src_write, dst_write = kind != "anti", kind != "flow"
        theirs = {tuple(_eval(x, env_dst) for x in acc.subscripts)
                  for acc in dst.accesses if acc.array == key and acc.write == dst_write}
        mine = [tuple(_eval(x, env_src) for x in acc.subscripts)
                for acc in src.accesses if acc.array == key and acc.write == src_write]
        idx = next((m for m in mine if m in theirs), mine[0] if mine else ())
        return arr.name + "".join(f"[{i}]" for i in idx)

    # -- other questions
    def may_touch(self, s: Statement, access: Access, element: tuple[Affine, ...]) -> bool:
        """Can an instance of ``s`` (in its domain) make ``access`` touch ``element`` (affine in
        the iterators of that instance and the parameters)?"""
        cons = " and ".join(f"{self._r(a)} = {self._r(e)}" for a, e in zip(access.subscripts, element)) or "true"
        vars_ = ", ".join(_isl_name(i) for i in s.loops)
        probe = isl.Set(self._prefix() + f"{{ {s.name}[{vars_}] : {cons} }}", context=_ctx)
        return not self.domains[s.name].intersect(probe).is_empty()

    def always_nonnegative(self, expr: Affine, loops: tuple[str, ...]) -> bool:
        """Is ``expr >= 0`` wherever the ``loops`` have values in the nest?"""
        return self.chain_set("X", loops, f"{self._r(expr)} < 0").is_empty()

    def failing_obligations(self) -> list[Obligation]:
        return [o for o in self.nest.obligations if not self.always_nonnegative(o.expr, o.loops)]

    def permutable(self, lo: int, hi: int) -> bool:
        """Are perfect loops lo..hi (inclusive) fully permutable (all distances >= 0 there)?"""
        d = len(self.nest.perfect)
        names = ", ".join(f"d{j}" for j in range(d))
        for _, _, rel in self.dependence_relations():
            for m in _maps(rel):
                delta = self._perfect_deltas(m)
                outer_eq = " and ".join(f"d{j} = 0" for j in range(lo)) or "true"
                for k in range(lo, hi + 1):
                    sign = self.nest.perfect[k].direction
                    probe = isl.Set(self._prefix() + f"{{ P[{names}] : {outer_eq} and {sign}*d{k} < 0 }}",
                                    context=_ctx)
                    if not delta.intersect(probe).is_empty():
                        return False
        return True


def _pick_point(s: isl.Set) -> isl.Point | None:
    """The lexicographically smallest point of ``s`` (small, readable values), checked to lie in
    ``s``. isl's lexmin has returned an empty result for a non-empty set with division
    constraints built up by operations; the same set read back from its text works, and a plain
    sample point is the last resort."""
    tries = (lambda: s.lexmin().sample_point(),
             lambda: isl.Set(str(s), context=_ctx).lexmin().sample_point(),
             s.sample_point)
    for attempt in tries:
        try:
            point = attempt()
        except isl.Error:
            continue
        if not point.is_void() and isl.Set.from_point(point).is_subset(s):
            return point
    return None


def _plain_condition(s: isl.Set) -> bool:
    """No divisions and small coefficients: a test worth printing."""
    ok: list[bool] = []

    def one(b: isl.BasicSet) -> None:
        if b.dim(isl.dim_type.div):
            ok.append(False)
            return
        ok.extend(abs(c) <= 1024 for a, _ in _constraint_affines(b) for _, c in a.terms)
    s.foreach_basic_set(one)
    return all(ok)


def _maps(um: isl.UnionMap) -> list[isl.Map]:
    out: list[isl.Map] = []
    um.foreach_map(out.append)
    return out


def _is_const(pa: isl.PwAff) -> bool:
    pieces: list[bool] = []
    pa.foreach_piece(lambda _s, aff: pieces.append(aff.is_cst()))
    return len(pieces) == 1 and pieces[0]


def _pw_const(pa: isl.PwAff) -> int:
    out = []
    pa.foreach_piece(lambda _s, aff: out.append(aff.get_constant_val().to_python()))
    return out[0]


def _eval(a: Affine, env: dict[str, int]) -> int:
    return a.const + sum(c * env.get(n, 0) for n, c in a.terms)


class BoundsNotAffine(Exception):
    """isl gave a bound that is not one affine expression (several pieces or a division)."""


def _aff_to_affine(aff: isl.Aff, names: list[str]) -> Affine:
    if aff.dim(isl.dim_type.div) and any(
            not aff.get_coefficient_val(isl.dim_type.div, k).is_zero() for k in range(aff.dim(isl.dim_type.div))):
        raise BoundsNotAffine("division")
    terms = {}
    for k, n in enumerate(names):
        c = aff.get_coefficient_val(isl.dim_type.param, k)
        if not c.is_zero():
            if not c.is_int():
                raise BoundsNotAffine("rational")
            terms[_from_isl(n)] = c.to_python()
    const = aff.get_constant_val()
    if not const.is_int():
        raise BoundsNotAffine("rational")
    return Affine(tuple(sorted(terms.items())), const.to_python())


def _single_affine(pa: isl.PwAff) -> Affine:
    pieces: list[isl.Aff] = []
    pa.foreach_piece(lambda _s, aff: pieces.append(aff))
    if len(pieces) != 1:
        raise BoundsNotAffine("pieces")
    space = pa.get_space()
    names = [space.get_dim_name(isl.dim_type.param, k) for k in range(space.dim(isl.dim_type.param))]
    return _aff_to_affine(pieces[0], names)


def _constraint_affines(bset: isl.BasicSet) -> list[tuple[Affine, bool]]:
    out: list[tuple[Affine, bool]] = []
    space = bset.get_space()
    names = [space.get_dim_name(isl.dim_type.param, k) for k in range(space.dim(isl.dim_type.param))]

    def one(c: isl.Constraint) -> None:
        terms = {}
        for k, n in enumerate(names):
            v = c.get_coefficient_val(isl.dim_type.param, k)
            if not v.is_zero():
                terms[_from_isl(n)] = v.to_python()
        out.append((Affine(tuple(sorted(terms.items())), c.get_constant_val().to_python()), c.is_equality()))

    bset.foreach_constraint(one)
    return out


def _params_set(analysis: NestAnalysis, extra: list[str], body: str) -> isl.Set:
    names = analysis.params + [_isl_name(e) for e in extra]
    return isl.Set("[" + ", ".join(names) + "] -> " + body, context=_ctx)


def band_hull(analysis: NestAnalysis, iterator: str,
              kept: tuple[str, ...]) -> tuple[tuple[Affine, ...], tuple[Affine, ...]]:
    """The values of ``iterator`` over the nest, given the ``kept`` iterators (as values), as
    max(lowers) .. min(uppers): the end the loop starts from (the low end for a loop counting
    up) is one expression, the other a max/min.

    Raises BoundsNotAffine when the bounds are not of that form.
    """
    lo, hi, nonempty = _projected_bounds(analysis, iterator, kept)
    if analysis.loops[iterator].direction > 0:
        return (_single_affine(lo),), _as_extremum(hi, nonempty, "min")
    return _as_extremum(lo, nonempty, "max"), (_single_affine(hi),)


def _projected_bounds(analysis: NestAnalysis, iterator: str,
                      kept: tuple[str, ...]) -> tuple[isl.PwAff, isl.PwAff, isl.Set]:
    """Exact smallest and largest value of ``iterator`` over the perfect loops' domain,
    the ``kept`` iterators being given values and the other iterators projected out."""
    nest = analysis.nest
    its = nest.iterators
    others = [i for i in its if i != iterator and i not in kept]
    cons = " and ".join(analysis.loop_constraints(analysis.loops[i]) for i in its)
    s = _params_set(analysis, list(kept), f"{{ X[{', '.join(_isl_name(i) for i in [iterator] + others)}] : {cons} }}")
    s = s.intersect_params(_lift(analysis.context, s))
    if others:
        s = s.project_out(isl.dim_type.set, 1, len(others))
    nonempty = s.params()
    return s.dim_min(0).gist(nonempty), s.dim_max(0).gist(nonempty), nonempty


def scan_bounds(analysis: NestAnalysis, iterator: str,
                kept: tuple[str, ...]) -> tuple[tuple[Affine, ...], tuple[Affine, ...]]:
    """Bounds of a loop moved across loops it is not rectangular with:
    max(lowers) <= iterator <= min(uppers), given the ``kept`` iterators.

    Raises BoundsNotAffine when the exact bounds are not such a max / min."""
    lo, hi, nonempty = _projected_bounds(analysis, iterator, kept)
    return _as_extremum(lo, nonempty, "max"), _as_extremum(hi, nonempty, "min")


def _as_extremum(pa: isl.PwAff, where: isl.Set, how: str) -> tuple[Affine, ...]:
    affs: list[isl.Aff] = []
    pa.foreach_piece(lambda _s, aff: affs.append(aff))
    distinct: list[isl.Aff] = []
    for a in affs:
        if not any(a.plain_is_equal(b) for b in distinct):
            distinct.append(a)
    combined = None
    for a in distinct:
        p = isl.PwAff.from_aff(a)
        combined = p if combined is None else (combined.max(p) if how == "max" else combined.min(p))
    if combined is None or not pa.ne_set(combined).intersect(where).is_empty():
        raise BoundsNotAffine(f"the bound is not a {how} of affine expressions")
    space = pa.get_space()
    names = [space.get_dim_name(isl.dim_type.param, k) for k in range(space.dim(isl.dim_type.param))]
    return tuple(_aff_to_affine(a, names) for a in distinct)


def _lift(ctx_set: isl.Set, target: isl.Set) -> isl.Set:
    """The parameter context in the parameter space of ``target``."""
    return ctx_set.align_params(target.get_space()) if ctx_set.dim(isl.dim_type.param) else ctx_set


def full_tile_constraints(analysis: NestAnalysis, boxed: list[tuple[str, str, int]], kept: tuple[str, ...],
                          known: list[Affine]) -> list[tuple[Affine, bool]]:
    """Conditions on tile origins for the whole tile to lie in the domain.

    ``boxed``: (iterator, tile iterator name, span) of the point loops inside the test;
    ``kept``: iterators with a value at the test; ``known``: facts ``a >= 0`` that hold
    wherever the test is evaluated or are tested with it (they are left out of the answer;
    a fact that does not hold there would make the answer wrong).  Returns ``(a, is_equality)``
    meaning ``a >= 0`` (or ``a == 0``); raises BoundsNotAffine for a non-convex answer.
    """
    nest = analysis.nest
    band = [b for b, _, _ in boxed]
    # Loops inside the test that are not boxed keep their own headers: only the band's
    # and the outer loops' constraints decide whether the box is inside.
    its = [i for i in nest.iterators if i in band or i in kept]
    # A boxed loop whose bounds use a loop that runs inside the test (all its values, not some):
    # no whole-tile test without a universal quantifier; the caller falls back to clamp.
    for i in its:
        lp = analysis.loops[i]
        if (lp.start.value.names() | lp.limit.value.names()) & (set(nest.iterators) - set(its)):
            raise BoundsNotAffine("a tiled loop's bounds use a loop inside the tile")
    others: list[str] = []
    tiles = [t for _, t, _ in boxed]
    extra = list(kept) + tiles
    present = {_from_isl(p) for p in analysis.params} | set(extra)
    extra += sorted({n for k in known for n in k.names()} - present)
    cons = " and ".join(analysis.loop_constraints(analysis.loops[i]) for i in its)
    dims = band + others
    dom = _params_set(analysis, extra, f"{{ X[{', '.join(_isl_name(i) for i in dims)}] : {cons} }}")
    if others:
        dom = dom.project_out(isl.dim_type.set, len(band), len(others)).set_tuple_name("X")
    box_parts = []
    for it, t, span in boxed:
        lp = analysis.loops[it]
        x, tt = _isl_name(it), _isl_name(t)
        box_parts.append(f"{tt} <= {x} <= {tt} + {span - 1}" if lp.direction > 0
                         else f"{tt} - {span - 1} <= {x} <= {tt}")
    box = _params_set(analysis, extra, f"{{ X[{', '.join(_isl_name(i) for i in band)}] : {' and '.join(box_parts)} }}")
    full = box.subtract(dom).params().complement()
    facts = [f"{k.render(_isl_name)} >= 0" for k in known]
    known_s = _params_set(analysis, extra, "{ : " + (" and ".join(facts) or "true") + " }")
    full = full.gist(known_s.intersect(_lift(analysis.context, known_s)))
    full = full.coalesce()
    bsets: list[isl.BasicSet] = []
    full.foreach_basic_set(bsets.append)
    if len(bsets) != 1 or bsets[0].dim(isl.dim_type.div):
        raise BoundsNotAffine("the whole-tile test is not one conjunction")
    return _constraint_affines(bsets[0])


def _type_range(bits: int, signed: bool) -> tuple[int, int]:
    return (-(2 ** (bits - 1)), 2 ** (bits - 1) - 1) if signed else (0, 2 ** bits - 1)


def overflow_guard(analysis: NestAnalysis, tile_of: dict[str, str],
                   exprs: list[tuple[Affine, int, bool]]) -> list[tuple[str, str, int]]:
    """Parameter bounds under which no printed expression overflows its C type.

    ``exprs``: (partial sum as C evaluates it, bits, signed).  Variables are the nest's
    iterators and the tile iterators (``tile_of``: tile name -> iterator); each is taken
    anywhere in its loop's range (a safe over-approximation).  Returns [] when every
    expression is safe for all parameter values of their types, else bounds
    ``(param, "<=" or ">=", value)`` to test before running the rewrite.  Raises
    BoundsNotAffine when the safe parameters are not a box.
    """
    nest = analysis.nest
    if not exprs:
        return []
    names = list(nest.iterators) + list(tile_of)
    its = nest.iterators
    cons = " and ".join(analysis.loop_constraints(analysis.loops[i]) for i in its)
    dom = analysis._set(f"{{ X[{', '.join(_isl_name(i) for i in its)}] : {cons} }}")
    ranges = None
    for v in names:
        it = tile_of.get(v, v)
        k = its.index(it)
        proj = dom.project_out(isl.dim_type.set, k + 1, len(its) - k - 1).project_out(isl.dim_type.set, 0, k)
        proj = proj.reset_tuple_id()
        ranges = proj if ranges is None else ranges.flat_product(proj)
    assert ranges is not None
    ranges = ranges.reset_tuple_id()
    var_names = [_isl_name(v) for v in names]
    box_parts = []
    for p in nest.params:
        lo, hi = _type_range(p.ctype.bits if p.ctype.is_int else 32, p.ctype.signed if p.ctype.is_int else True)
        box_parts.append(f"{lo} <= {_isl_name(p.name)} <= {hi}")
    box = analysis._set("{ : " + (" and ".join(box_parts) or "true") + " }")
    bad = None
    for expr, bits, signed in exprs:
        lo, hi = _type_range(bits, signed)
        e = expr.render(_isl_name)
        probe = analysis._set(f"{{ [{', '.join(var_names)}] : {e} > {hi} or {e} < {lo} }}")
        hit = ranges.intersect(probe).params().intersect(box)
        bad = hit if bad is None else bad.union(hit)
    if bad is None or bad.is_empty():
        return []
    safe = box.subtract(bad).coalesce().gist(box)
    bsets: list[isl.BasicSet] = []
    safe.foreach_basic_set(bsets.append)
    if len(bsets) != 1:
        raise BoundsNotAffine("the parameter values for which the rewrite cannot overflow are not a box")
    out = []
    for a, eq in _constraint_affines(bsets[0]):
        if len(a.terms) != 1 or eq:
            raise BoundsNotAffine("the parameter values for which the rewrite cannot overflow are not a box")
        (name, c), = a.terms
        # c*name + k >= 0
        if c > 0:
            out.append((name, ">=", -(a.const // c)))
        else:
            out.append((name, "<=", a.const // (-c)))
    return out


def _touched(analysis: NestAnalysis, array: str) -> isl.Set | None:
    """The elements of ``array`` that some access of the nest touches (None: no access)."""
    um = None
    for write in (False, True):
        m = analysis._union(write, array)
        if m is not None:
            um = m if um is None else um.union(m)
    if um is None:
        return None
    sets: list[isl.Set] = []
    um.range().foreach_set(sets.append)
    return sets[0] if sets else None


def touched_box(analysis: NestAnalysis, array: str) -> list[tuple[Affine, Affine]]:
    """Per dimension of ``array``, one affine lower and one affine upper bound (in the
    parameters) of the indices the nest touches; BoundsNotAffine when isl's bounds are not single
    affine expressions (several pieces, divisions)."""
    s = _touched(analysis, array)
    if s is None:
        raise BoundsNotAffine("the nest does not touch the array")
    s = s.intersect_params(_lift(analysis.context, s))
    out = []
    for k in range(s.dim(isl.dim_type.set)):
        out.append((_single_affine(s.dim_min(k)), _single_affine(s.dim_max(k))))
    return out


def access_extent(analysis: NestAnalysis, array: str, values: dict[str, int]) -> list[tuple[int, int]] | None:
    """Smallest and largest index of each dimension of ``array`` that the nest touches when the
    parameters have ``values`` (C names; parameters without a value range over all their values).
    None when the nest does not touch the array for these values."""
    s = _touched(analysis, array)
    if s is None:
        return None
    for k in range(s.dim(isl.dim_type.param) - 1, -1, -1):
        name = _from_isl(s.get_dim_name(isl.dim_type.param, k))
        if name in values:
            s = s.fix_val(isl.dim_type.param, k, isl.Val(values[name]))
    s = s.project_out(isl.dim_type.param, 0, s.dim(isl.dim_type.param))
    if s.is_empty():
        return None
    info = analysis.nest.array(array)
    if info.rows:  # a flattened array: the range of the flat index, as the C code computes it
        if any(r not in values for r in info.rows):
            raise BoundsNotAffine("the extent of a flattened array needs its row lengths")
        strides = [1]
        for r in reversed(info.rows):
            strides.insert(0, strides[0] * values[r])
        dims = [f"x{k}" for k in range(len(strides))]
        flat = " + ".join(f"{st}*{x}" for st, x in zip(strides, dims))
        s = s.reset_tuple_id().apply(isl.Map(f"{{ [{', '.join(dims)}] -> [{flat}] }}", context=_ctx))
    out = []
    for k in range(s.dim(isl.dim_type.set)):
        lo, hi = s.dim_min(k), s.dim_max(k)
        if not (_is_const(lo) and _is_const(hi)):
            raise BoundsNotAffine("the extent of an array is unbounded")
        out.append((_pw_const(lo), _pw_const(hi)))
    return out
