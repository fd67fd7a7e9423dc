"""The ``jam`` and ``unroll`` requests of the soundness fuzzer (tests/fuzzgen.py builds the nests).

Two things live here, both independent of looptile's code:

- ``gen_copy_request``: a random ``looptile jam`` request (factors 2-4 on one or two loops of
  the perfect band other than the innermost, sometimes the innermost too or alone) or a
  ``looptile unroll`` request (the outermost loop, factor 2-4).
- ``jam_order_key``: where an instance runs in the rewritten program, derived by hand from
  the shape of the code that unroll-and-jam produces (common practice, and the shape the
  README describes; from memory of the usual textbook presentation, Allen & Kennedy,
  "Optimizing Compilers for Modern Architectures", the chapter on unroll-and-jam):

      for (i = lo; i < hi && hi - i >= (u-1)*step + 1; i += u*step)   // whole strips of i
          for j ...                                                   // the inner loops
              body(i), body(i + step), ..., body(i + (u-1)*step)      // the copies, innermost
      for (; i < hi; i += step)                                       // the last, partial strip
          for j ...                                                   //   in the original order
              body(i)

  Every unrolled loop (outermost first) contributes, at its own level, its strip number and,
  in a partial strip only, its position in the strip; after the last covered loop come the
  positions of the loops whose strip is whole (the copies, outermost loop's offset first).
  A plain unroll covers only the outermost loop: its copies (the whole body, inner loops
  included) come before the inner loops' iterators, which keep their order.
"""
from __future__ import annotations

import random

FACTORS = (2, 3, 4)


def gen_copy_request(rng: random.Random, perfect) -> tuple[str, tuple[tuple[str, int], ...], tuple[str, ...]]:
    """(kind, factors outermost first, command-line arguments after --nest kernel) for the
    perfect loops ``perfect`` (objects with ``it`` and ``uses``, outermost first).

    looptile refuses, by design, to jam a loop whose iterator an inner loop's bounds use (a
    triangular inner loop); such loops are chosen only now and then, to exercise that refusal."""
    its = [lp.it for lp in perfect]
    if rng.random() < 0.22:
        u = rng.choice(FACTORS)
        return "unroll", ((its[0], u),), ("--factor", str(u))
    outer, inner = its[:-1], its[-1]
    free = [it for it in outer if not bound_user(perfect, it)]
    if rng.random() < 0.1:
        pool = outer
    else:
        pool = free if free else (outer if rng.random() < 0.3 else [])
    chosen: list[str] = []
    if pool and rng.random() < 0.85:
        chosen = rng.sample(pool, min(len(pool), rng.choice((1, 1, 2))))
    if not chosen or rng.random() < 0.25:
        chosen.append(inner)
    factors = tuple((it, rng.choice(FACTORS)) for it in its if it in chosen)
    spec = ",".join(f"{it}={u}" for it, u in factors)
    return "jam", factors, ("--factors", spec)


def bound_user(perfect, it: str) -> str | None:
    """A perfect loop whose bounds use ``it`` (jamming ``it`` is then refused by design)."""
    return next((lp.it for lp in perfect if it in lp.uses), None)


def _value(expr: str, env: dict[str, int]) -> int:
    return eval(expr, {"__builtins__": {}}, env)  # noqa: S307 - the generator's own C text, affine in ints


def jam_order_key(loops, kind: str, factors: dict[str, int], vals: dict[str, int], params: dict[str, int],
                  pos: int) -> tuple:
    """The position of one instance in the rewritten program, as a sortable tuple.

    ``loops``: the perfect loops (objects with ``it``, ``init``, ``op``, ``bound``, ``step``),
    outermost first; ``vals``: the instance's values of them; ``pos``: its position in the
    original order (it breaks ties: the statements of one iteration keep their order).  The
    bounds of an unrolled loop may use parameters and outer loops that are not unrolled.
    """
    covered = loops if kind == "jam" else loops[:1]
    env = {**params, **vals}
    key: list[int] = []
    copies: list[int] = []
    for lp in covered:
        x = vals[lp.it]
        u = factors.get(lp.it, 1)
        if u == 1:
            key.append(x if lp.step > 0 else -x)
            continue
        first = _value(lp.init, env)
        index, rem = divmod(x - first, lp.step)
        assert rem == 0 and index >= 0, (lp.it, x, first)
        strip, at = divmod(index, u)
        last = first + lp.step * (strip * u + u - 1)  # the strip's last iteration
        whole = _value(f"({last}) {lp.op} ({lp.bound})", env)
        key += [strip, 0 if whole else at]
        copies.append(at if whole else 0)
    key += copies
    for lp in loops[len(covered):]:
        key.append(vals[lp.it] if lp.step > 0 else -vals[lp.it])
    return tuple(key) + (pos,)
