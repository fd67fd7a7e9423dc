"""The verification harness: from a kernel's signature to a C main that runs it.

One harness serves every checking command: it includes the file to check (its own
``main`` renamed), allocates the array parameters on the heap (at least one byte),
fills every input from a seed, calls the kernel once and dumps every object the
kernel can touch.  Two builds of it, one per version, are compared by verify.py.
"""
from __future__ import annotations

from dataclasses import dataclass

from pycparser import c_ast, c_generator

from .ctype import CType, TypeTable
from .emit import render
from .errors import UsageError
from .frontend import TranslationUnit
from .scope import file_scope


@dataclass(frozen=True)
class ParamSpec:
    name: str
    kind: str  # "int", "float", "array"
    ctype: CType  # the scalar type, or the element type of an array
    dims: tuple[str | None, ...] = ()  # arrays: C expressions of the dimensions, None where not declared


@dataclass(frozen=True)
class GlobalSpec:
    name: str
    elem: CType
    ndims: int


@dataclass(frozen=True)
class KernelSpec:
    function: str
    params: tuple[ParamSpec, ...]
    returns: str | None
    globals: tuple[GlobalSpec, ...]
    bound_params: tuple[str, ...]  # integer parameters used in loop headers
    dim_params: tuple[str, ...]  # integer parameters used only in array dimensions
    other_ints: tuple[str, ...]  # integer parameters used otherwise (need --params)
    return_type: CType | None = None

    def arrays(self) -> tuple[ParamSpec, ...]:
        return tuple(p for p in self.params if p.kind == "array")


def _fill_kind(t: CType) -> int:
    return 2 if t.kind == "float" else (1 if t.signed else 0)


def _array_dims(node: c_ast.Node) -> tuple[tuple[str | None, ...], c_ast.Node]:
    gen = c_generator.CGenerator()
    dims: list[str | None] = []
    while isinstance(node, (c_ast.ArrayDecl, c_ast.PtrDecl)):
        if isinstance(node, c_ast.PtrDecl):
            if dims:
                break  # an array of pointers: not a plain array
            dims.append(None)
        else:
            dims.append(gen.visit(node.dim) if node.dim is not None else None)
        node = node.type
    return tuple(dims), node


def _ids(node: c_ast.Node | None) -> set[str]:
    out: set[str] = set()

    class V(c_ast.NodeVisitor):
        def visit_ID(self, n):
            out.add(n.name)

    if node is not None:
        V().visit(node)
    return out


def kernel_spec(tu: TranslationUnit, function: str) -> KernelSpec:
    """The harness-relevant facts of ``function``: parameters, returned type, globals it uses."""
    func = next((f for f in tu.functions if f.name == function), None)
    if func is None:
        names = ", ".join(f.name for f in tu.functions) or "none"
        raise UsageError(f"no function '{function}' is defined in this file (functions: {names})",
                         path=tu.source.path)
    types = tu.cache.setdefault("types", TypeTable(tu.ast))
    fdecl = func.node.decl.type
    params: list[ParamSpec] = []
    dim_ids: set[str] = set()
    for p in (fdecl.args.params if fdecl.args else []):
        if isinstance(p, c_ast.Typename) or not getattr(p, "name", None):
            continue  # (void)
        t = types.of(p.type)
        where = dict(path=tu.source.path, line=p.coord.line if p.coord else None)
        if t.is_int:
            params.append(ParamSpec(p.name, "int", t))
        elif t.kind == "float":
            params.append(ParamSpec(p.name, "float", t))
        elif t.kind in ("array", "pointer"):
            dims, base = _array_dims(p.type)
            elem = types.of(base)
            if elem.kind not in ("int", "float") or None in dims[1:]:
                raise UsageError(f"the parameter '{p.name}' is not an array or pointer of numbers; the harness "
                                 "cannot make an input for it", **where)
            dim_ids |= set().union(*(_ids(x.dim) for x in _walk_arrays(p.type)))
            params.append(ParamSpec(p.name, "array", elem, dims))
        else:
            raise UsageError(f"the parameter '{p.name}' has a type the harness cannot make (a struct or function)",
                             **where)
    header_ids: set[str] = set()

    class Headers(c_ast.NodeVisitor):
        def visit_For(self, n):
            for part in (n.init, n.cond, n.next):
                header_ids.update(_ids(part))
            self.visit(n.stmt)

    Headers().visit(func.node.body)
    ints = [p.name for p in params if p.kind == "int"]
    bound = tuple(n for n in ints if n in header_ids)
    dims_only = tuple(n for n in ints if n in dim_ids and n not in header_ids)
    others = tuple(n for n in ints if n not in bound and n not in dims_only)
    ret = func.node.decl.type.type
    returns = None
    rt = types.of(ret) if isinstance(ret, c_ast.TypeDecl) else None
    if rt is not None and rt.kind in ("int", "float"):
        returns = rt.spelling
    elif rt is None or rt.kind != "void":
        raise UsageError(f"function '{function}' returns a type the harness cannot compare", path=tu.source.path)
    return KernelSpec(function, tuple(params), returns, _globals_used(tu, types, func.node), bound, dims_only, others,
                      rt if returns else None)


def _walk_arrays(node: c_ast.Node) -> list[c_ast.ArrayDecl]:
    out = []
    while isinstance(node, (c_ast.ArrayDecl, c_ast.PtrDecl)):
        if isinstance(node, c_ast.ArrayDecl) and node.dim is not None:
            out.append(node)
        node = node.type
    return out


def _globals_used(tu: TranslationUnit, types: TypeTable, func: c_ast.FuncDef) -> tuple[GlobalSpec, ...]:
    """File-scope numbers and arrays of numbers that the function's body names (not const)."""
    scope = file_scope(tu.ast, types, func, tu.cache)
    names = sorted(_ids(func.body))
    out = []
    for n in names:
        sym = scope.get(n)
        if sym is None or sym.kind != "global" or sym.system or "extern" in sym.storage:
            continue
        t = sym.ctype
        elem = t.elem if t.kind == "array" else t
        if elem is None or elem.kind not in ("int", "float") or t.const or elem.const:
            continue
        out.append(GlobalSpec(n, elem, t.ndims if t.kind == "array" else 0))
    return tuple(out)


def render_harness(spec: KernelSpec, include: str, shapes: dict[str, str], absolute: tuple[str, ...] = ()) -> str:
    """The harness C text.  argv: seed, then the integer parameters in order, then the
    first-dimension extents of the arrays whose size is neither declared nor in ``shapes``
    (name -> C expression of the element count, from --shape), in parameter order.

    ``absolute``: floating-point objects whose initial values are made non-negative (the
    build of verify that sums the absolute values of reassociated terms)."""
    scalars, floats, arrays, args = [], [], [], []
    k = 2
    for p in spec.params:
        if p.kind == "int":
            scalars.append({"decl": f"{p.ctype.spelling} {p.name}", "type": p.ctype.spelling, "arg": k,
                            "name": p.name})
            k += 1
    for p in spec.params:
        if p.kind == "float":
            floats.append({"decl": f"{p.ctype.spelling} {p.name}", "name": p.name, "absolute": p.name in absolute})
        elif p.kind == "array":
            if p.dims and p.dims[0] is not None and all(p.dims):
                count = " * ".join(f"looptile_extent({d})" for d in p.dims)
                dims = [f"(long long)({d})" for d in p.dims]
            elif p.name in shapes:
                count = f"looptile_extent({shapes[p.name]})"
                rest = " * ".join(f"looptile_extent({d})" for d in p.dims[1:]) or "1"
                dims = [f"(long long)({rest} ? looptile_n_{p.name} / ({rest}) : 0)"] + \
                    [f"(long long)({d})" for d in p.dims[1:]]
            else:  # the first dimension comes from argv (the extent the kernel touches)
                first = f"(size_t)strtoull(argv[{k}], 0, 10)"
                k += 1
                rest = " * ".join(f"looptile_extent({d})" for d in p.dims[1:]) or "1"
                count = f"{first} * {rest}"
                dims = [f"(long long){first}"] + [f"(long long)({d})" for d in p.dims[1:]]
            arrays.append({"name": p.name, "elem": p.ctype.spelling or "double", "count": count,
                           "kind": _fill_kind(p.ctype), "dims": dims,
                           "absolute": p.name in absolute and p.ctype.kind == "float"})
        args.append(f"looptile_a_{p.name}" if p.kind == "array" else p.name)
    globals_ = []
    for g in spec.globals:
        dims = [f"(long long)(sizeof {g.name}{'[0]' * d} / sizeof {g.name}{'[0]' * (d + 1)})"
                for d in range(g.ndims)] or ["1"]
        globals_.append({"name": g.name, "elem_size": f"sizeof {g.name}{'[0]' * g.ndims}",
                         "kind": _fill_kind(g.elem), "dims": dims, "elem": g.elem.spelling or "double",
                         "absolute": g.name in absolute and g.elem.kind == "float"})
    return render("harness.c.j2", kernel=spec.function, include=include, argc=k, scalars=scalars,
                  floats=floats, arrays=arrays, globals=globals_, returns=spec.returns,
                  call_args=", ".join(args), alias=alias_pair(spec)) + "\n"


def alias_pair(spec: KernelSpec) -> dict[str, str] | None:
    """The two array parameters that the harness makes overlap when LOOPTILE_OVERLAP is set in
    its environment (the first two with the same element type), to run the kernel once with
    overlapping arguments: the second then starts in the middle of the first's buffer."""
    arrays = [p for p in spec.params if p.kind == "array"]
    for k, a in enumerate(arrays):
        for b in arrays[k + 1:]:
            if (a.ctype.spelling or "double") == (b.ctype.spelling or "double"):
                return {"first": a.name, "second": b.name, "kind": str(_fill_kind(a.ctype))}
    return None
