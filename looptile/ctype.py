"""C types as looptile needs them: integer kinds, floating types, arrays, pointers.

Resolves typedefs of the translation unit (``size_t`` -> ``unsigned long``) and
implements the usual arithmetic conversions for integer expressions (LP64).
"""
from __future__ import annotations

from dataclasses import dataclass

from pycparser import c_ast


@dataclass(frozen=True)
class CType:
    kind: str  # "int", "float", "array", "pointer", "struct", "void", "func", "other"
    signed: bool = True
    bits: int = 32  # integers and floats
    rank: int = 0  # integer conversion rank: char 1, short 2, int 3, long 4, long long 5
    elem: CType | None = None  # arrays and pointers
    ndims: int = 0  # array dimensions (pointer counts as one)
    volatile: bool = False
    const: bool = False
    restrict: bool = False
    spelling: str = ""  # the type as written (for declarations of new iterators)
    tag: str = ""  # structs and unions: the key of their member list in the TypeTable

    @property
    def is_int(self) -> bool:
        return self.kind == "int"

    @property
    def is_unsigned(self) -> bool:
        return self.kind == "int" and not self.signed

    def scalar_elem(self) -> CType:
        t = self
        while t.kind in ("array", "pointer") and t.elem is not None:
            t = t.elem
        return t


_INT_RANKS = {"char": (1, 8), "short": (2, 16), "int": (3, 32), "long": (4, 64), "_Bool": (0, 8)}
INT = CType("int", True, 32, 3, spelling="int")


def _int_type(names: list[str], spelling: str) -> CType | None:
    words = [n for n in names if n not in ("signed", "unsigned")]
    signed = "unsigned" not in names
    if not words:
        words = ["int"]
    if words.count("long") == 2:
        return CType("int", signed, 64, 5, spelling=spelling)
    if "long" in words and "double" not in words:
        return CType("int", signed, 64, 4, spelling=spelling)
    if "short" in words:
        return CType("int", signed, 16, 2, spelling=spelling)
    if "char" in words:
        return CType("int", signed, 8, 1, spelling=spelling)
    if "_Bool" in words:
        return CType("int", False, 8, 0, spelling=spelling)
    if words == ["int"]:
        return CType("int", signed, 32, 3, spelling=spelling)
    return None


class TypeTable:
    """Typedef names of a translation unit and conversion of declarations to CType."""

    def __init__(self, ast: c_ast.FileAST) -> None:
        self.typedefs: dict[str, c_ast.Node] = {}
        self.records: dict[str, list[c_ast.Decl]] = {}  # struct/union key -> member declarations
        for ext in ast.ext:
            if isinstance(ext, c_ast.Typedef):
                self.typedefs[ext.name] = ext.type

        class Records(c_ast.NodeVisitor):
            def visit_Struct(v, n):  # noqa: N805 - the table is `self`
                self._record(n)
                v.generic_visit(n)

            def visit_Union(v, n):  # noqa: N805
                self._record(n)
                v.generic_visit(n)

        Records().visit(ast)

    @staticmethod
    def _key(node: c_ast.Node) -> str:
        kind = "union" if isinstance(node, c_ast.Union) else "struct"
        return f"{kind} {node.name}" if node.name else f"{kind} @{id(node)}"

    def _record(self, node: c_ast.Node) -> None:
        if node.decls is not None:
            self.records[self._key(node)] = list(node.decls)

    def member(self, t: CType, name: str) -> CType | None:
        """The type of member ``name`` of the struct or union type ``t`` (None if unknown)."""
        for d in self.records.get(t.tag, []):
            if d.name == name:
                return self.of(d.type)
            if d.name is None and isinstance(d.type, c_ast.TypeDecl):  # anonymous struct/union member
                inner = self.of(d.type)
                found = self.member(inner, name) if inner.kind == "struct" else None
                if found is not None:
                    return found
        return None

    def of(self, node: c_ast.Node, spelling: str | None = None) -> CType:
        """CType of a declarator (Decl.type, Typename.type)."""
        quals: list[str] = getattr(node, "quals", None) or []
        if isinstance(node, c_ast.TypeDecl):
            base = self._base(node.type, spelling)
            return _with_quals(base, node.quals or [])
        if isinstance(node, c_ast.ArrayDecl):
            elem = self.of(node.type)
            nd = elem.ndims + 1 if elem.kind == "array" else 1
            inner = elem.elem if elem.kind == "array" else elem
            return CType("array", elem=inner, ndims=nd, restrict="restrict" in (node.dim_quals or []))
        if isinstance(node, c_ast.PtrDecl):
            elem = self.of(node.type)
            return CType("pointer", elem=elem, ndims=1, bits=64, volatile="volatile" in quals,
                         const="const" in quals, restrict="restrict" in quals)
        if isinstance(node, c_ast.FuncDecl):
            return CType("func")
        return CType("other")

    def _base(self, node: c_ast.Node, spelling: str | None) -> CType:
        if isinstance(node, c_ast.IdentifierType):
            names = list(node.names)
            text = spelling or " ".join(names)
            if len(names) == 1 and names[0] in self.typedefs:
                t = self.of(self.typedefs[names[0]])
                return _respell(t, text)
            if any(n in ("float", "double") for n in names):
                bits = 32 if "float" in names else (128 if "long" in names else 64)
                return CType("float", bits=bits, spelling=text)
            if names == ["void"]:
                return CType("void", spelling=text)
            it = _int_type(names, text)
            return it if it is not None else CType("other", spelling=text)
        if isinstance(node, (c_ast.Struct, c_ast.Union)):
            if node.decls is not None:
                self._record(node)
            return CType("struct", spelling="struct", tag=self._key(node))
        if isinstance(node, c_ast.Enum):
            return CType("int", True, 32, 3, spelling="int")
        return CType("other")


def _with_quals(t: CType, quals: list[str]) -> CType:
    return CType(t.kind, t.signed, t.bits, t.rank, t.elem, t.ndims, t.volatile or "volatile" in quals,
                 t.const or "const" in quals, t.restrict, t.spelling, t.tag)


def _respell(t: CType, spelling: str) -> CType:
    return CType(t.kind, t.signed, t.bits, t.rank, t.elem, t.ndims, t.volatile, t.const, t.restrict, spelling, t.tag)


def promote(t: CType) -> CType:
    if t.kind == "int" and t.rank < 3:
        return INT
    return t


def common_int_type(a: CType, b: CType) -> CType:
    """The usual arithmetic conversions for two integer types (LP64)."""
    a, b = promote(a), promote(b)
    if a.signed == b.signed:
        return a if a.rank >= b.rank else b
    u, s = (a, b) if not a.signed else (b, a)
    if u.rank >= s.rank:
        return u
    if s.bits > u.bits:
        return s
    return CType("int", False, s.bits, s.rank, spelling="unsigned " + (s.spelling or "long"))


def literal_type(text: str) -> CType:
    """Type of an integer constant (C11 6.4.4.1, LP64), from its suffix and value."""
    t = text.lower()
    suffix = ""
    while t and t[-1] in "ul":
        suffix = t[-1] + suffix
        t = t[:-1]
    value = int(t, 0) if not (len(t) > 1 and t[0] == "0" and t[1].isdigit()) else int(t, 8)
    unsigned = "u" in suffix
    longs = suffix.count("l")
    decimal = not t.startswith("0") or t == "0"
    if longs == 0 and not unsigned and value < 2**31:
        return INT
    if longs == 0 and unsigned and value < 2**32:
        return CType("int", False, 32, 3, spelling="unsigned int")
    if longs == 0 and not unsigned and not decimal and value < 2**32:
        return CType("int", False, 32, 3, spelling="unsigned int")
    if not unsigned and value < 2**63:
        return CType("int", True, 64, 4 if longs < 2 else 5, spelling="long")
    return CType("int", False, 64, 4 if longs < 2 else 5, spelling="unsigned long")


def literal_value(text: str) -> int:
    t = text.lower().rstrip("ul")
    if len(t) > 1 and t[0] == "0" and t[1].isdigit():
        return int(t, 8)
    return int(t, 0)
