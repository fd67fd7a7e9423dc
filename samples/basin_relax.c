/*
 * basin_relax.c -- tidal basin model: one relaxation sweep of the basin.
 *
 * The free-surface correction a (NX x NY grid) is smoothed by one
 * out-of-place 5-point relaxation sweep into b:
 *   b[i][j] = 0.2 * (a[i][j] + a[i-1][j] + a[i+1][j] + a[i][j-1] + a[i][j+1])
 * over the interior 1 <= i < NX-1, 1 <= j < NY-1.  The boundary ring of b
 * keeps the boundary values it was given (a copy of a).
 *
 * Suggested command:
 *   looptile tile samples/basin_relax.c --nest relax_basin --sizes 32,32 --diff
 *
 * Sizes (override with -DNX=... etc.; any value from 0 up works):
 *   NX  grid rows      (default 97)
 *   NY  grid columns   (default 83)
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <math.h>
#include <stdint.h>

#ifndef NX
#define NX 97
#endif
#ifndef NY
#define NY 83
#endif

/* Weight of each of the five stencil points. */
#define RELAX_W 0.2

/* 64-bit FNV-1a parameters. */
#define FNV_OFFSET UINT64_C(0xcbf29ce484222325)
#define FNV_PRIME  UINT64_C(0x00000100000001b3)

static uint64_t fnv1a(uint64_t h, const void *p, size_t len)
{
    const unsigned char *b = p;
    for (size_t i = 0; i < len; i++) {
        h ^= b[i];
        h *= FNV_PRIME;
    }
    return h;
}

/* Deterministic surface perturbation: LCG bits with a swell pattern. */
static double surface_seed(uint32_t *state, int i, int j)
{
    *state = *state * 1103515245u + 12345u;
    int r = (int)(*state >> 16 & 0x7fffu) - 16384;      /* -16384 .. 16383 */
    return 3.0 * cos(0.21 * i - 0.13 * j) + ldexp(r, -12 - (i + 2 * j) % 6);
}

/* The kernel: one Jacobi-style 5-point sweep from a into b. */
static void relax_basin(int n, int m, double b[n][m], const double a[n][m])
{
    for (int i = 1; i < n - 1; i++)
        for (int j = 1; j < m - 1; j++)
            b[i][j] = RELAX_W * (a[i][j] + a[i - 1][j] + a[i + 1][j]
                                 + a[i][j - 1] + a[i][j + 1]);
}

int main(void)
{
    const int n = NX, m = NY;
    const size_t bytes = (size_t)n * (size_t)m * sizeof(double);
    double *a = malloc(bytes + 1);
    double *b = malloc(bytes + 1);
    if (!a || !b) {
        fprintf(stderr, "basin_relax: out of memory\n");
        return 1;
    }

    uint32_t state = 424242u;
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            a[(size_t)i * m + j] = surface_seed(&state, i, j);
    memcpy(b, a, bytes);    /* boundary ring of b = boundary of a */

    /* Array bounds must be positive in C99; with an empty grid the sweep
     * has nothing to do anyway. */
    if (n > 0 && m > 0)
        relax_basin(n, m, (double (*)[m])b, (const double (*)[m])a);

    uint64_t h = fnv1a(FNV_OFFSET, b, bytes);
    printf("basin_relax %016llx\n", (unsigned long long)h);

    free(a);
    free(b);
    return 0;
}
