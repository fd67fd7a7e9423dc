/*
 * shoal_sweep.c -- tidal basin model: shoal smoothing sweep (NOT tileable).
 *
 * Sediment height h over the shoal (NX rows x NY columns) is smoothed in
 * place, row by row, along the diagonal of the prevailing flood current:
 * each point is averaged with its up-current neighbour one row back and
 * one column ahead, which this same sweep has already updated:
 *   for i in 1..NX-1, for j in 0..NY-2:
 *     h[i][j] = 0.5 * (h[i][j] + h[i-1][j+1])
 *
 * looptile must REFUSE to tile this nest: the value at (i, j) needs the new
 * value at (i-1, j+1), a dependence of distance (1, -1).  Tiling (i, j),
 * or interchanging i and j, would run (i, j) before (i-1, j+1) for some
 * points and so read the old value.
 *
 * Suggested command (looptile is expected to refuse it):
 *   looptile tile samples/shoal_sweep.c --nest sweep_shoal --sizes 8,8 --diff
 *
 * Sizes (override with -DNX=... etc.; any value from 0 up works):
 *   NX  rows      (default 61)
 *   NY  columns   (default 79)
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <math.h>
#include <stdint.h>

#ifndef NX
#define NX 61
#endif
#ifndef NY
#define NY 79
#endif

/* Weight given to the up-current neighbour. */
#define SHOAL_MIX 0.5

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

/* Invented survey: sand ridges across the shoal plus LCG survey scatter
 * of varying size; heights are relative to mean sea level. */
static double survey_height(uint32_t *state, int i, int j)
{
    *state = *state * 1664525u + 1013904223u;
    int r = (int)(*state >> 21) - 1024;             /* -1024 .. 1023 */
    double ridge = 1.5 * sin(0.35 * (i + j)) - 0.02 * j;
    return ridge + ldexp(r, -10 + (i * 7 + j) % 4);
}

/* The kernel: in-place diagonal sweep, dependence distance (1, -1). */
static void sweep_shoal(int n, int m, double h[n][m])
{
    for (int i = 1; i < n; i++)
        for (int j = 0; j < m - 1; j++)
            h[i][j] = SHOAL_MIX * (h[i][j] + h[i - 1][j + 1]);
}

int main(void)
{
    const int n = NX, m = NY;
    const size_t bytes = (size_t)n * (size_t)m * sizeof(double);
    double *h = malloc(bytes + 1);
    if (!h) {
        fprintf(stderr, "shoal_sweep: out of memory\n");
        return 1;
    }

    uint32_t state = 31337u;
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            h[(size_t)i * m + j] = survey_height(&state, i, j);

    /* Array bounds must be positive in C99; an empty shoal has nothing
     * to smooth. */
    if (n > 0 && m > 0)
        sweep_shoal(n, m, (double (*)[m])h);

    uint64_t hash = fnv1a(FNV_OFFSET, h, bytes);
    printf("shoal_sweep %016llx\n", (unsigned long long)hash);

    free(h);
    return 0;
}
