"""Small C files for the directive and apply tests: kernels of the invented tidal-basin model
and harbour-camera pipeline, each with a directive, plus a ``main`` that runs every kernel
over a sweep of sizes and prints a hash of the raw bytes of both arrays after each one.

Every kernel has the signature ``(int n, int m, double b[n][m], double a[n][m])``; the sizes
run over 0, 1, 2, 3, 4, 5, 7, 8, 9 and 13 (around the tile sizes and unroll factors the
tests use, which are at most 8), so whole tiles, partial tiles and empty loops all occur.
``same_results`` compiles the original and the rewritten file with the sanitizers
(conftest.compile_and_run) and compares their output: equal output means bit-for-bit
equal arrays after every kernel for every size.
"""
from __future__ import annotations

from pathlib import Path

from conftest import compile_and_run

PRELUDE = """#include <stdio.h>
#include <stdlib.h>
#include <stdint.h>

"""

MAIN = """
static uint64_t fnv1a(uint64_t h, const void *p, size_t len)
{
    const unsigned char *q = p;
    for (size_t k = 0; k < len; k++) {
        h ^= q[k];
        h *= UINT64_C(0x00000100000001b3);
    }
    return h;
}

int main(void)
{
    static const int sizes[] = {0, 1, 2, 3, 4, 5, 7, 8, 9, 13};
    uint64_t h = UINT64_C(0xcbf29ce484222325);
    for (int s = 0; s < 10; s++)
        for (int t = 0; t < 10; t += 3) {
            int n = sizes[s], m = sizes[(s + t) % 10];
            size_t cells = (size_t)n * (size_t)m + 1;
            double *a = malloc(cells * sizeof(double));
            double *b = malloc(cells * sizeof(double));
            if (a == NULL || b == NULL)
                return 1;
            for (size_t k = 0; k < cells; k++) {
                a[k] = (double)((k * 37u) % 101u) / 7.0;
                b[k] = (double)((k * 11u) % 13u) - 6.0;
            }
            if (n > 0 && m > 0) {
@CALLS@            }
            free(a);
            free(b);
        }
    printf("%016llx\\n", (unsigned long long)h);
    return 0;
}
"""

CALL = """                {name}(n, m, (double (*)[m])b, (double (*)[m])a);
                h = fnv1a(fnv1a(h, a, cells * sizeof(double)), b, cells * sizeof(double));
"""


def kernel(name: str, directive: str, loops: str, comment: str) -> str:
    """A kernel function: ``loops`` is the nest (4-space indented lines), ``directive`` the
    pragma line before it ("" for none)."""
    head = f"/* {name}: {comment} */\nstatic void {name}(int n, int m, double b[n][m], double a[n][m])\n{{\n"
    pragma = f"    {directive}\n" if directive else ""
    return head + pragma + loops + "}\n"


def c_file(kernels: list[tuple[str, str]], defines: str = "") -> str:
    """A whole file: (name, kernel text) pairs, then main calling each kernel in turn."""
    calls = "".join(CALL.format(name=name) for name, _ in kernels)
    return PRELUDE + defines + "\n".join(text for _, text in kernels) + MAIN.replace("@CALLS@", calls)


# The kernels. Loops as they appear in the file (inside the function body).
BLEND_TIDE = ("    for (int i = 0; i < n; i++)\n"
              "        for (int j = 0; j < m; j++)\n"
              "            b[i][j] = 0.5 * a[i][j] + 0.25 * (double)(i - j);\n")
RELAX_BASIN = ("    for (int i = 1; i < n - 1; i++)\n"
               "        for (int j = 1; j < m - 1; j++)\n"
               "            b[i][j] = 0.2 * (a[i][j] + a[i - 1][j] + a[i + 1][j] + a[i][j - 1] + a[i][j + 1]);\n")
# In place, distance (1, -1): tiling (i, j) would read values not yet written.
SWEEP_SHOAL = ("    for (int i = 1; i < n; i++)\n"
               "        for (int j = 0; j < m - 1; j++)\n"
               "            a[i][j] = 0.5 * (a[i - 1][j + 1] + a[i][j]);\n")
GATHER_WAKE = ("    for (int i = 0; i < n; i++)\n"
               "        for (int j = 0; j < m; j++)\n"
               "            for (int k = 0; k < n; k++)\n"
               "                b[i][j] += 0.125 * a[k][j] * (double)(i + 1);\n")
FADE_GLARE = ("    for (int i = 0; i < n; i++)\n"
              "        for (int j = 0; j < m; j++)\n"
              "            b[i][j] = b[i][j] * 0.75 + a[i][j];\n")


def same_results(original: Path, rewritten: Path, workdir: Path) -> str:
    """Compile and run both files (sanitizers on); their outputs must be equal. Returns it."""
    assert original.read_bytes() != rewritten.read_bytes(), f"{rewritten} was not rewritten"
    want = compile_and_run(original, workdir, name=f"orig_{original.stem}")
    got = compile_and_run(rewritten, workdir, name=f"new_{rewritten.stem}")
    assert want.strip() and got == want, f"{rewritten}: output {got!r}, original {want!r}"
    return got
