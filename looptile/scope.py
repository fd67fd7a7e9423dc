"""What is visible at a loop: declarations of the file scope, the function and its blocks."""
from __future__ import annotations

from collections import ChainMap
from collections.abc import Mapping
from dataclasses import dataclass

from pycparser import c_ast

from .ctype import CType, TypeTable


@dataclass(frozen=True)
class Symbol:
    name: str
    ctype: CType
    kind: str  # "param", "local", "global", "enum", "function"
    decl: c_ast.Node | None = None
    value: int | None = None  # enumerators
    system: bool = False  # declared in a system header
    storage: tuple[str, ...] = ()


def _is_system(coord) -> bool:
    f = getattr(coord, "file", "") or ""
    return f.startswith("/usr/") or "/include/" in f


class _Visible(c_ast.NodeVisitor):
    """Walks a function body keeping a scope stack; snapshots it at every for statement."""

    def __init__(self, types: TypeTable, base: Mapping[str, Symbol]) -> None:
        self.types = types
        self.base = base
        self.stack: list[dict[str, Symbol]] = [{}]
        self.at_for: dict[int, Mapping[str, Symbol]] = {}

    def _declare(self, d: c_ast.Decl) -> None:
        if d.name:
            self.stack[-1][d.name] = Symbol(d.name, self.types.of(d.type), "local", d,
                                            storage=tuple(d.storage or ()))

    def visit_Compound(self, node: c_ast.Compound) -> None:
        self.stack.append({})
        for item in node.block_items or []:
            self.visit(item)
        self.stack.pop()

    def visit_Decl(self, node: c_ast.Decl) -> None:
        self._declare(node)
        if node.init is not None:
            self.visit(node.init)

    def visit_For(self, node: c_ast.For) -> None:
        # The block scopes are small: copy them; the file scope is shared, not copied.
        self.at_for[id(node)] = ChainMap(*[dict(b) for b in reversed(self.stack)], self.base)
        self.stack.append({})
        if isinstance(node.init, c_ast.DeclList):
            for d in node.init.decls:
                self._declare(d)
        self.generic_visit_children(node)
        self.stack.pop()

    def generic_visit_children(self, node: c_ast.For) -> None:
        for part in (node.cond, node.next, node.stmt):
            if part is not None:
                self.visit(part)


class FileScope(Mapping):
    """Declarations at file scope before one external declaration: a view, not a copy.

    ``entries`` (name -> [(position, symbol)], in order) is shared by every function."""

    def __init__(self, entries: dict[str, list[tuple[int, Symbol]]], before: int) -> None:
        self.entries, self.before = entries, before

    def __getitem__(self, name: str) -> Symbol:
        for pos, sym in reversed(self.entries.get(name, ())):
            if pos < self.before:
                return sym
        raise KeyError(name)

    def __iter__(self):
        return (n for n in self.entries if n in self)

    def __len__(self) -> int:
        return sum(1 for _ in self)


def file_scope(ast: c_ast.FileAST, types: TypeTable, upto: c_ast.FuncDef,
               cache: dict | None = None) -> Mapping[str, Symbol]:
    """Globals, functions and enumerators declared before ``upto``."""
    shared = cache.get("file_symbols") if cache is not None else None
    if shared is None:
        entries: dict[str, list[tuple[int, Symbol]]] = {}
        positions: dict[int, int] = {}
        for k, (ext, name, sym) in enumerate(_file_symbols(ast, types)):
            positions.setdefault(id(ext), k)
            if sym is not None:
                entries.setdefault(name, []).append((k, sym))
        shared = (entries, positions)
        if cache is not None:
            cache["file_symbols"] = shared
    entries, positions = shared
    return FileScope(entries, positions.get(id(upto), 1 << 62))


def _file_symbols(ast: c_ast.FileAST, types: TypeTable) -> list[tuple[c_ast.Node, str, Symbol | None]]:
    """Every file-scope declaration in order, as (external declaration, name, symbol)."""
    out: list[tuple[c_ast.Node, str, Symbol | None]] = []
    for ext in ast.ext:
        decl = ext.decl if isinstance(ext, c_ast.FuncDef) else ext
        out.append((ext, "", None))
        if isinstance(decl, c_ast.Decl):
            enums: dict[str, Symbol] = {}
            _enumerators(decl.type, enums)
            out += [(ext, n, sym) for n, sym in enums.items()]
            if decl.name:
                kind = "function" if isinstance(decl.type, c_ast.FuncDecl) else "global"
                out.append((ext, decl.name, Symbol(decl.name, types.of(decl.type), kind, decl,
                                                   system=_is_system(decl.coord), storage=tuple(decl.storage or ()))))
    return out


def _enumerators(node: c_ast.Node, syms: dict[str, Symbol]) -> None:
    t = node
    while isinstance(t, (c_ast.TypeDecl, c_ast.PtrDecl, c_ast.ArrayDecl)):
        t = t.type
    if isinstance(t, c_ast.Enum) and t.values is not None:
        value = -1
        for e in t.values.enumerators:
            if isinstance(e.value, c_ast.Constant) and e.value.type == "int":
                value = int(e.value.value.rstrip("uUlL"), 0)
            elif e.value is not None:
                value = None  # computed enumerator: not treated as a constant
            elif value is not None:
                value += 1
            syms[e.name] = Symbol(e.name, CType("int", True, 32, 3, spelling="int"), "enum", e, value)


def visible_at_loops(ast: c_ast.FileAST, types: TypeTable, func: c_ast.FuncDef,
                     cache: dict | None = None) -> dict[int, Mapping[str, Symbol]]:
    """For every for statement of ``func`` (keyed by id of the node): the symbols in scope."""
    params: dict[str, Symbol] = {}
    fdecl = func.decl.type
    if isinstance(fdecl, c_ast.FuncDecl) and fdecl.args is not None:
        for p in fdecl.args.params:
            if isinstance(p, c_ast.Decl) and p.name:
                params[p.name] = Symbol(p.name, types.of(p.type), "param", p)
    v = _Visible(types, ChainMap(params, file_scope(ast, types, func, cache)))
    v.visit(func.body)
    return v.at_for
