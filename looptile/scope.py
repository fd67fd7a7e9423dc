"""What is visible at a loop: declarations of the file scope, the function and its blocks."""
from __future__ import annotations

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

    def __init__(self, types: TypeTable, base: dict[str, Symbol]) -> None:
        self.types = types
        self.stack: list[dict[str, Symbol]] = [dict(base)]
        self.at_for: dict[int, dict[str, Symbol]] = {}

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
        merged: dict[str, Symbol] = {}
        for s in self.stack:
            merged.update(s)
        self.at_for[id(node)] = merged
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


def file_scope(ast: c_ast.FileAST, types: TypeTable, upto: c_ast.FuncDef,
               cache: dict | None = None) -> dict[str, Symbol]:
    """Globals, functions and enumerators declared before ``upto``."""
    entries = cache.get("file_symbols") if cache is not None else None
    if entries is None:
        entries = _file_symbols(ast, types)
        if cache is not None:
            cache["file_symbols"] = entries
    syms: dict[str, Symbol] = {}
    for ext, name, sym in entries:
        if ext is upto:
            break
        if sym is not None:
            syms[name] = sym
    return syms


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
                     cache: dict | None = None) -> dict[int, dict[str, Symbol]]:
    """For every for statement of ``func`` (keyed by id of the node): the symbols in scope."""
    base = file_scope(ast, types, func, cache)
    fdecl = func.decl.type
    if isinstance(fdecl, c_ast.FuncDecl) and fdecl.args is not None:
        for p in fdecl.args.params:
            if isinstance(p, c_ast.Decl) and p.name:
                base[p.name] = Symbol(p.name, types.of(p.type), "param", p)
    v = _Visible(types, base)
    v.visit(func.body)
    return v.at_for
