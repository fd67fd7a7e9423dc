#!/usr/bin/env python3
"""Write a deterministic generated C file of loop kernels for the looptile benchmark.

The kernels are invented: stages of a coastal-ocean model (tides, surge,
salinity, bathymetry) and of a harbour-camera image pipeline (frames, glare,
wakes).  Every kernel is about 50 lines: a comment block, the function with a
few local declarations, and 1-3 loop nests.  Shapes mixed (int iterators,
affine subscripts, VLA parameters such as ``double a[n][m]``):

  matmul      matrix multiply, 3 loops (plus a clearing nest)
  stencil     out-of-place 5-point 2-D stencil (plus a copy-back nest)
  transpose   b[j][i] = a[i][j] (plus a scaled transpose)
  conv        2-D convolution with a 3x3 or 5x5 weight kernel, 4 loops
  tri         triangular update, j <= i
  down        down-counting loops (i--, j--)
  step2       loops with step 2
  refuse_call a call to a function the analysis cannot see   (refused)
  refuse_idx  a data-dependent subscript a[idx[i]]           (refused)
  refuse_sweep an in-place sweep with distance (1,-1)         (tiling refused)

Usage (from the repository root):
    python bench/gen_kernels.py                    # writes bench/generated.c
    python bench/gen_kernels.py --kernels 200 --out bench/generated.c

The output depends only on --kernels and --seed; it compiles with
``cc -std=c99 -c``.
"""
from __future__ import annotations

import argparse
import os
import random

LINES_PER_KERNEL = 50

OCEAN = ["tide", "surge", "salinity", "shoal", "estuary", "current", "eddy", "bathy", "swell", "ebb",
         "flood", "reef", "delta", "brine", "kelp", "fjord"]
CAMERA = ["frame", "glare", "wake", "quay", "mast", "buoy", "haze", "pier", "hull", "lamp", "dusk", "crane"]
VERBS = ["relax", "blend", "smooth", "scale", "merge", "spread", "update", "mix", "sharpen", "fold", "shift",
         "damp"]

FILLER = [
    "the grid is row-major; rows are the northward index, columns eastward",
    "values are in SI units unless the caller rescales them",
    "the caller owns every array; nothing here allocates",
    "boundaries are left untouched so the halo of the caller survives",
    "the arrays are assumed not to overlap (distinct allocations)",
    "sizes may be zero; every loop then runs no iteration",
    "this stage runs once per model time step",
    "weights were fitted offline on an invented harbour survey",
    "the camera delivers dark-level-corrected pixels",
    "floating-point order follows the loop order of the source",
    "the results feed the next stage unchanged",
    "keep this kernel free of calls so it stays analysable",
]

# The mix: a cycle of 20 kernels.
PATTERN = (["matmul"] * 3 + ["stencil"] * 3 + ["transpose"] * 3 + ["conv"] * 3 + ["tri"] * 2 + ["down"] * 2
           + ["step2"] * 2 + ["refuse_call", "refuse_idx"])
REFUSED_CYCLE = ["refuse_call", "refuse_idx", "refuse_sweep"]


def _header(name: str, area: str, desc: list[str], shape: str) -> list[str]:
    out = ["/*", f" * {name} -- {area}:"]
    out += [f" *   {d}".rstrip() for d in desc]
    out += [f" * Shape: {shape}.", " */"]
    return out


def k_matmul(name: str, rng: random.Random) -> tuple[list[str], str, str]:
    t = rng.choice(["double", "float"])
    alpha = rng.choice(["0.5", "1.25", "0.75", "2.0"])
    body = [
        f"void {name}(int n, int m, int p, {t} c[n][m], {t} a[n][p], {t} b[p][m])",
        "{",
        f"    const {t} alpha = {alpha};",
        "    int rows = n;",
        "    int cols = m;",
        "",
        "    /* clear the product */",
        "    for (int i = 0; i < rows; i++)",
        "        for (int j = 0; j < cols; j++)",
        "            c[i][j] = 0;",
        "",
        "    /* accumulate the coupling of every pair of cells */",
        "    for (int i = 0; i < n; i++) {",
        "        for (int j = 0; j < m; j++) {",
        "            for (int k = 0; k < p; k++) {",
        "                c[i][j] += alpha * a[i][k] * b[k][j];",
        "            }",
        "        }",
        "    }",
        "}",
    ]
    return body, "coupling matrix product c = alpha * a * b", "matrix multiply, 3 loops"


def k_stencil(name: str, rng: random.Random) -> tuple[list[str], str, str]:
    t = rng.choice(["double", "float"])
    w = rng.choice(["0.25", "0.2", "0.125"])
    c = rng.choice(["0.0", "0.2", "0.5"])
    body = [
        f"void {name}(int n, int m, {t} out[n][m], {t} in[n][m])",
        "{",
        f"    const {t} w = {w};",
        f"    const {t} centre = {c};",
        "",
        "    /* one Jacobi-style smoothing pass, out of place */",
        "    for (int i = 1; i < n - 1; i++) {",
        "        for (int j = 1; j < m - 1; j++) {",
        "            out[i][j] = centre * in[i][j]",
        "                      + w * (in[i - 1][j] + in[i + 1][j] + in[i][j - 1] + in[i][j + 1]);",
        "        }",
        "    }",
        "",
        "    /* copy the interior back for the next pass */",
        "    for (int i = 1; i < n - 1; i++)",
        "        for (int j = 1; j < m - 1; j++)",
        "            in[i][j] = out[i][j];",
        "}",
    ]
    return body, "five-point smoothing of a field, then copy-back", "out-of-place 2-D stencil"


def k_transpose(name: str, rng: random.Random) -> tuple[list[str], str, str]:
    t = rng.choice(["double", "float"])
    s = rng.choice(["0.5", "2.0", "-1.0"])
    body = [
        f"void {name}(int n, int m, {t} b[m][n], {t} a[n][m], {t} d[m][n])",
        "{",
        f"    const {t} s = {s};",
        "",
        "    /* turn the grid: eastward rows become northward rows */",
        "    for (int i = 0; i < n; i++) {",
        "        for (int j = 0; j < m; j++) {",
        "            b[j][i] = a[i][j];",
        "        }",
        "    }",
        "",
        "    /* scaled copy of the turned grid */",
        "    for (int j = 0; j < m; j++)",
        "        for (int i = 0; i < n; i++)",
        "            d[j][i] = s * a[i][j];",
        "}",
    ]
    return body, "transpose of a field, plain and scaled", "transpose"


def k_conv(name: str, rng: random.Random) -> tuple[list[str], str, str]:
    t = rng.choice(["double", "float"])
    kw = rng.choice([3, 5])
    body = [
        f"void {name}(int h, int w, {t} out[h][w], {t} img[h][w], {t} wt[{kw}][{kw}])",
        "{",
        f"    const {t} background = 0;",
        f"    int oh = h - {kw} + 1;",
        f"    int ow = w - {kw} + 1;",
        "",
        "    /* start from the background level */",
        "    for (int y = 0; y < oh; y++)",
        "        for (int x = 0; x < ow; x++)",
        "            out[y][x] = background;",
        "",
        "    /* valid-region convolution with the weight kernel */",
        "    for (int y = 0; y < oh; y++) {",
        "        for (int x = 0; x < ow; x++) {",
        f"            for (int u = 0; u < {kw}; u++) {{",
        f"                for (int v = 0; v < {kw}; v++) {{",
        "                    out[y][x] += img[y + u][x + v] * wt[u][v];",
        "                }",
        "            }",
        "        }",
        "    }",
        "}",
    ]
    return body, f"{kw}x{kw} weighted blur of a camera frame", "2-D convolution, 4 loops"


def k_tri(name: str, rng: random.Random) -> tuple[list[str], str, str]:
    t = rng.choice(["double", "float"])
    body = [
        f"void {name}(int n, {t} l[n][n], {t} a[n][n], {t} d[n])",
        "{",
        f"    const {t} half = 0.5;",
        "",
        "    /* lower triangle of the symmetric part */",
        "    for (int i = 0; i < n; i++) {",
        "        for (int j = 0; j <= i; j++) {",
        "            l[i][j] = half * (a[i][j] + a[j][i]) + d[i] * d[j];",
        "        }",
        "    }",
        "}",
    ]
    return body, "lower triangle of a symmetric exchange matrix", "triangular update, j <= i"


def k_down(name: str, rng: random.Random) -> tuple[list[str], str, str]:
    t = rng.choice(["double", "float"])
    g = rng.choice(["0.9", "0.75", "1.1"])
    body = [
        f"void {name}(int n, int m, {t} b[n][m], {t} a[n][m])",
        "{",
        f"    const {t} gain = {g};",
        "    int last = n - 1;",
        "",
        "    /* walk the grid from the far corner back to the origin */",
        "    for (int i = last; i >= 0; i--) {",
        "        for (int j = m - 1; j >= 0; j--) {",
        "            b[i][j] = gain * a[i][j] + (1 - gain) * b[i][j];",
        "        }",
        "    }",
        "}",
    ]
    return body, "relaxation walked from the far corner", "down-counting loops"


def k_step2(name: str, rng: random.Random) -> tuple[list[str], str, str]:
    t = rng.choice(["double", "float"])
    both = rng.random() < 0.5
    jstep = "j += 2" if both else "j++"
    body = [
        f"void {name}(int n, int m, {t} c[n][m], {t} f[n][m])",
        "{",
        f"    const {t} q = 0.25;",
        "",
        "    /* every second row (red-black style decimation) */",
        "    for (int i = 0; i < n; i += 2) {",
        f"        for (int j = 0; j < m; {jstep}) {{",
        "            c[i][j] = q * f[i][j];",
        "        }",
        "    }",
        "}",
    ]
    return body, "decimated copy of every second row", "step-2 loops"


def k_refuse_call(name: str, rng: random.Random) -> tuple[list[str], str, str]:
    t = "double"
    body = [
        f"void {name}(int n, int m, {t} out[n][m], {t} in[n][m])",
        "{",
        "    const double floor_level = 0.01;",
        "",
        "    /* the gain curve lives in another translation unit */",
        "    for (int i = 0; i < n; i++) {",
        "        for (int j = 0; j < m; j++) {",
        "            out[i][j] = harbour_gain(in[i][j]) + floor_level;",
        "        }",
        "    }",
        "}",
    ]
    return body, "gain curve applied through an external function", "refused: call to an unknown function"


def k_refuse_idx(name: str, rng: random.Random) -> tuple[list[str], str, str]:
    t = "double"
    body = [
        f"void {name}(int n, int m, {t} out[n][m], {t} in[n][m], int idx[n])",
        "{",
        "    const double w = 0.5;",
        "",
        "    /* gather rows through a permutation table */",
        "    for (int i = 0; i < n; i++) {",
        "        for (int j = 0; j < m; j++) {",
        "            out[i][j] = w * in[idx[i]][j];",
        "        }",
        "    }",
        "}",
    ]
    return body, "rows gathered through a permutation table", "refused: data-dependent subscript"


def k_refuse_sweep(name: str, rng: random.Random) -> tuple[list[str], str, str]:
    t = "double"
    body = [
        f"void {name}(int n, int m, {t} h[n][m])",
        "{",
        "    const double k = 0.5;",
        "",
        "    /* in-place sweep: each cell reads the one north-east of the previous row */",
        "    for (int i = 1; i < n; i++) {",
        "        for (int j = 0; j < m - 1; j++) {",
        "            h[i][j] = k * (h[i][j] + h[i - 1][j + 1]);",
        "        }",
        "    }",
        "}",
    ]
    return body, "in-place diagonal sweep of a height field", "refused: in-place sweep, distance (1,-1)"


KINDS = {
    "matmul": k_matmul, "stencil": k_stencil, "transpose": k_transpose, "conv": k_conv, "tri": k_tri,
    "down": k_down, "step2": k_step2, "refuse_call": k_refuse_call, "refuse_idx": k_refuse_idx,
    "refuse_sweep": k_refuse_sweep,
}

# The 2-D array (name, rows, cols) an extra clean-up nest may rewrite, per kind.
TARGET = {
    "matmul": ("c", "n", "m"), "stencil": ("out", "n", "m"), "transpose": ("d", "m", "n"),
    "conv": ("out", "h", "w"), "tri": ("l", "n", "n"), "down": ("b", "n", "m"), "step2": ("c", "n", "m"),
    "refuse_call": ("out", "n", "m"), "refuse_idx": ("out", "n", "m"), "refuse_sweep": ("h", "n", "m"),
}

EXTRA_LINES = 7


def _nests_in(body: list[str]) -> int:
    """Top-level nests: for statements at the function's first indentation level."""
    return sum(1 for ln in body if ln.startswith("    for "))


def _extra_nest(arr: str, rows: str, cols: str, k: int, rng: random.Random) -> list[str]:
    """A tileable element-wise pass over ``arr`` (no dependences between iterations)."""
    a, b = ("r", "q") if k % 2 else ("i", "j")
    if rng.random() < 0.5:
        factor = rng.choice(['0.5', '1.5', '3.0'])
        what, stmt = "rescale to model units", f"{arr}[{a}][{b}] = {arr}[{a}][{b}] * {factor};"
    else:
        offset = rng.choice(['0.01', '0.1', '1.0'])
        what, stmt = "add the calibration offset", f"{arr}[{a}][{b}] = {arr}[{a}][{b}] + {offset};"
    return [
        "",
        f"    /* clean-up pass {k}: {what} */",
        f"    for (int {a} = 0; {a} < {rows}; {a}++) {{",
        f"        for (int {b} = 0; {b} < {cols}; {b}++)",
        f"            {stmt}",
        "    }",
    ]


def kernel(k: int, kind: str, rng: random.Random) -> tuple[str, list[str]]:
    area_word = rng.choice(OCEAN if kind not in ("conv", "refuse_call") else CAMERA)
    name = f"k{k:03d}_{area_word}_{rng.choice(VERBS)}_{kind.replace('refuse_', 'r')}"
    body, what, shape = KINDS[kind](name, rng)
    area = "harbour-camera pipeline" if area_word in CAMERA else "coastal-ocean model"
    fixed = 5 + 1  # /*, name line, what line, Shape line, */ ; blank line after the function
    extra = 0
    while _nests_in(body) < 3 and LINES_PER_KERNEL - fixed - len(body) - 1 >= EXTRA_LINES + 2:
        extra += 1
        body = body[:-1] + _extra_nest(*TARGET[kind], extra, rng) + body[-1:]
    fill = max(0, LINES_PER_KERNEL - fixed - len(body))
    desc = [what + "."]
    params = body[0][body[0].index("(") + 1: body[0].rindex(")")].split(", ")
    nests = [ln.strip().strip("/* ").rstrip("*/ ") for ln in body if ln.startswith("    /* ")]
    docs = ["Parameters:"] + [f"  {p.split()[-1].split('[')[0]:<4} {p}" for p in params]
    docs += ["Steps:"] + [f"  {i + 1}. {n}" for i, n in enumerate(nests)]
    desc += docs[: fill]
    desc += rng.sample(FILLER, k=max(0, min(len(FILLER), fill + 1 - len(desc))))
    while len(desc) - 1 < fill:  # more padding than the filler list: blank comment lines
        desc.append("")
    return name, _header(name, area, desc, shape) + body + [""]


def generate(kernels: int, seed: int) -> str:
    rng = random.Random(seed)
    lines = [
        "/*",
        " * generated.c -- generated by bench/gen_kernels.py for the looptile benchmark.",
        f" * {kernels} invented kernels of a coastal-ocean model and a harbour-camera",
        " * image pipeline.  Do not edit: regenerate with",
        f" *   python bench/gen_kernels.py --kernels {kernels} --seed {seed}",
        " */",
        "#include <stdio.h>",
        "#include <stdlib.h>",
        "#include <math.h>",
        "#include <string.h>",
        "#include <stdint.h>",
        "",
        "/* Defined elsewhere: the camera gain curve. */",
        "double harbour_gain(double x);",
        "",
    ]
    refused_k = 0
    for k in range(kernels):
        kind = PATTERN[k % len(PATTERN)]
        if kind.startswith("refuse"):
            kind = REFUSED_CYCLE[refused_k % len(REFUSED_CYCLE)]
            refused_k += 1
        lines += kernel(k, kind, rng)[1]
    lines += [
        "int main(void)",
        "{",
        "    enum { N = 8 };",
        "    double (*a)[N] = malloc(sizeof(double[N][N]));",
        "    double (*b)[N] = malloc(sizeof(double[N][N]));",
        "    double (*c)[N] = malloc(sizeof(double[N][N]));",
        "    if (!a || !b || !c)",
        "        return 1;",
        "    memset(a, 0, sizeof(double[N][N]));",
        "    memset(b, 0, sizeof(double[N][N]));",
        "    a[1][1] = sqrt(2.0);",
        "    b[1][1] = (double)INT32_C(3);",
        "    /* the kernels are only compiled here; the driver of the model calls them */",
        '    printf("generated kernels: %d\\n", ' + str(kernels) + ");",
        '    printf("c[1][1] = %g\\n", c[1][1] = a[1][1] * b[1][1]);',
        "    free(a);",
        "    free(b);",
        "    free(c);",
        "    return 0;",
        "}",
    ]
    return "\n".join(lines) + "\n"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--kernels", type=int, default=200)
    ap.add_argument("--seed", type=int, default=2024)
    ap.add_argument("--out", default=os.path.join(os.path.dirname(os.path.abspath(__file__)), "generated.c"))
    args = ap.parse_args()
    text = generate(args.kernels, args.seed)
    with open(args.out, "w", encoding="ascii", newline="\n") as f:
        f.write(text)
    print(f"wrote {args.out}: {args.kernels} kernels, {text.count(chr(10))} lines")


if __name__ == "__main__":
    main()
