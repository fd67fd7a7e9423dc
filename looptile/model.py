"""The loop-nest model: plain, frozen data that every later stage reads.

Symbols in ``Affine`` expressions are model names: loop iterators by their C
name, parameters by ``Param.name`` (which is the C spelling for variables and
macros, and ``$k`` for an opaque loop-invariant expression).
"""
from __future__ import annotations

from dataclasses import dataclass, field

from .ctype import CType


@dataclass(frozen=True)
class Affine:
    terms: tuple[tuple[str, int], ...] = ()  # (symbol, coefficient), sorted, no zero coefficients
    const: int = 0

    @staticmethod
    def of(const: int = 0, **terms: int) -> Affine:
        return Affine(tuple(sorted((k, v) for k, v in terms.items() if v)), const)

    @staticmethod
    def symbol(name: str) -> Affine:
        return Affine(((name, 1),), 0)

    def coeff(self, name: str) -> int:
        return dict(self.terms).get(name, 0)

    def names(self) -> set[str]:
        return {n for n, _ in self.terms}

    def __add__(self, other: Affine) -> Affine:
        d = dict(self.terms)
        for n, c in other.terms:
            d[n] = d.get(n, 0) + c
        return Affine(tuple(sorted((n, c) for n, c in d.items() if c)), self.const + other.const)

    def scale(self, k: int) -> Affine:
        if k == 0:
            return Affine()
        return Affine(tuple((n, c * k) for n, c in self.terms), self.const * k)

    def __sub__(self, other: Affine) -> Affine:
        return self + other.scale(-1)

    def is_constant(self) -> bool:
        return not self.terms

    def render(self, name=lambda s: s) -> str:
        """Text such as ``2*i + n - 1`` (also valid isl syntax with isl names)."""
        parts: list[str] = []
        for n, c in self.terms:
            mag = abs(c)
            term = name(n) if mag == 1 else f"{mag}*{name(n)}"
            parts.append(("- " if c < 0 else "+ ") + term)
        if self.const or not parts:
            parts.append(("- " if self.const < 0 else "+ ") + str(abs(self.const)))
        text = " ".join(parts)
        return text[2:] if text.startswith("+ ") else "-" + text[2:]


@dataclass(frozen=True)
class Param:
    name: str  # model symbol
    text: str  # C spelling
    ctype: CType
    kind: str  # "variable", "macro", "opaque", "outer-iterator"


@dataclass(frozen=True)
class Bound:
    value: Affine  # what the analysis uses
    text: str  # original spelling, for emission
    start: int = 0  # byte offsets of the spelling in the original file
    end: int = 0


@dataclass(frozen=True)
class Loop:
    iterator: str
    ctype: CType
    declared_in_for: bool
    start: Bound  # initial value
    limit: Bound  # the value compared with the iterator
    op: str  # "<", "<=", ">", ">=" with the iterator on the left
    step: int  # > 0
    direction: int  # +1 counts up, -1 counts down
    line: int
    col: int
    for_offset: int  # the 'for' keyword
    header_end: int  # just after ')'
    body_start: int
    body_end: int

    @property
    def inclusive(self) -> bool:
        return self.op in ("<=", ">=")


@dataclass(frozen=True)
class Access:
    array: str  # ArrayInfo.key
    subscripts: tuple[Affine, ...]
    write: bool
    at: tuple[int, int] | None = None  # line and column of the array's name, as the parser saw it


@dataclass(frozen=True)
class Condition:
    """An affine condition of an ``if``: ``a >= 0`` (op "ge"), ``a == 0`` ("eq"), or "and",
    "or", "not" of parts. Integer semantics; isl reads it as written."""
    op: str
    value: Affine | None = None
    parts: tuple[Condition, ...] = ()


@dataclass(frozen=True)
class Statement:
    name: str  # S1, S2, ... in textual order
    line: int
    col: int
    loops: tuple[str, ...]  # iterators of the enclosing loops of the nest, outermost first
    tail: tuple[int | str, ...]  # schedule after the perfect loops: positions (int) and iterators (str)
    accesses: tuple[Access, ...]
    # Affine conditions of the enclosing ifs, all of which hold. An if whose condition is not
    # affine is not recorded: the statement is taken to run.
    guards: tuple[Condition, ...] = ()


@dataclass(frozen=True)
class ArrayInfo:
    key: str  # unique model name (isl tuple name)
    name: str  # C spelling
    elem: CType
    ndims: int
    local: bool = False  # declared inside the nest (private to the enclosing iterations)
    restrict: bool = False
    # A flattened array (``A[i*ld + j]`` read as ``A[i][j]``): the C spellings of the lengths of
    # dimensions 1.. (the model's ``ndims`` counts the recovered dimensions).
    rows: tuple[str, ...] = ()
    pointer: bool = False  # reached through a pointer (a pointer variable or field, an array parameter)


@dataclass(frozen=True)
class Obligation:
    """``expr >= 0`` must hold on the domain of ``loops`` for the C value to equal the model's."""

    expr: Affine
    loops: tuple[str, ...]
    line: int
    col: int
    what: str


@dataclass(frozen=True)
class Nest:
    path: str
    function: str
    line: int
    col: int
    start: int  # byte span of the whole nest statement
    end: int
    perfect: tuple[Loop, ...]  # the perfectly nested loops, outermost first
    inner: tuple[Loop, ...]  # loops of the imperfect part (inside the innermost perfect body)
    statements: tuple[Statement, ...]
    params: tuple[Param, ...]
    arrays: tuple[ArrayInfo, ...]
    context: tuple[str, ...] = ()  # isl constraints on parameters known from enclosing loops
    obligations: tuple[Obligation, ...] = ()
    # Flattened subscripts stay in their rows (``j >= 0``, ``ld - 1 - j >= 0``): what makes the
    # multi-dimensional reading exact; proven, tested at run time, or asserted by the user.
    in_row: tuple[Obligation, ...] = ()
    header_comments: tuple[str, ...] = ()  # comments between the perfect loops' headers
    outer_declared: tuple[str, ...] = ()  # iterators declared before their for statement
    macros_used: tuple[tuple[str, str], ...] = ()  # integer macros whose value the proof used
    notes: tuple[str, ...] = field(default=())

    def loop(self, iterator: str) -> Loop:
        for lp in self.perfect + self.inner:
            if lp.iterator == iterator:
                return lp
        raise KeyError(iterator)

    @property
    def iterators(self) -> tuple[str, ...]:
        return tuple(lp.iterator for lp in self.perfect)

    def array(self, key: str) -> ArrayInfo:
        for a in self.arrays:
            if a.key == key:
                return a
        raise KeyError(key)


@dataclass(frozen=True)
class ScheduleDim:
    """One dimension of a schedule over the perfect loops.

    value = floor(direction * (x - origin) / block) when ``block`` is set (a tile
    loop), else direction * x (a point loop or an untouched loop).

    ``when`` = (loop, block, whole) makes the value depend on the strip of ``loop`` (strips
    of ``block`` iterations times step from the loop's start, as unroll-and-jam emits them):
    the value above when the strip is whole (``whole`` True) or partial (False), else 0.
    """

    iterator: str
    block: int | None = None  # iterations times step of one tile
    origin: Affine | None = None
    when: tuple[str, int, bool] | None = None


@dataclass(frozen=True)
class Accumulation:
    """Statements of a nest that accumulate into one object with + or - (``s += e``, ``y[i] -= e``,
    ``s = s + e``, ``s = e + s``, ``s++``), each reading and writing only that element of it."""

    key: str  # ArrayInfo.key
    name: str  # C name
    kind: str  # "float", "signed" (signed integer arithmetic) or "unsigned" (modular arithmetic)
    statements: tuple[str, ...]
    allowed: bool  # consented with --reassociate, or unsigned: the order of these updates may change


@dataclass(frozen=True)
class Reassociation:
    """The accumulations of a nest (see looptile/reduction.py). The legality test drops the
    dependences between two allowed updates of the same object, and only those."""

    accumulations: tuple[Accumulation, ...] = ()

    def allowed_statements(self, key: str) -> frozenset[str]:
        return frozenset(s for a in self.accumulations if a.key == key and a.allowed for s in a.statements)

    def of_statements(self, name: str, first: str, second: str) -> Accumulation | None:
        """The accumulation into C name ``name`` that both statements update, if any."""
        both = [a for a in self.accumulations if a.name == name and {first, second} <= set(a.statements)]
        return both[0] if both else None
