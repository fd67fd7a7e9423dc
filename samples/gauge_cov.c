/*
 * gauge_cov.c -- tidal basin model: tide-gauge covariance.
 *
 * NG tide gauges around the basin each record NT de-tided water-level
 * samples X[g][t].  The calibration step adds the lag-zero cross products
 * of every pair of gauges to a prior covariance S, filling only the lower
 * triangle (S is symmetric):
 *   for i < NG, for j <= i, for k < NT:  S[i][j] += X[i][k] * X[j][k]
 * The j loop has the triangular bound j <= i.  The strict upper triangle of
 * S keeps its prior values.
 *
 * Suggested command:
 *   looptile tile samples/gauge_cov.c --nest gauge_cov --sizes i=16,j=16 --diff
 *
 * Sizes (override with -DNG=... etc.; any value from 0 up works):
 *   NG  number of gauges               (default 71)
 *   NT  number of samples per gauge    (default 45)
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <math.h>
#include <stdint.h>

#ifndef NG
#define NG 71
#endif
#ifndef NT
#define NT 45
#endif

/* 64-bit FNV-1a parameters. */
#define FNV_OFFSET UINT64_C(0xcbf29ce484222325)
#define FNV_PRIME  UINT64_C(0x00000100000001b3)

/* Index of element (r, c) in a flat row-major array with ncol columns. */
#define AT(r, c, ncol) ((size_t)(r) * (size_t)(ncol) + (size_t)(c))

static uint64_t fnv1a(uint64_t h, const void *p, size_t len)
{
    const unsigned char *b = p;
    for (size_t i = 0; i < len; i++) {
        h ^= b[i];
        h *= FNV_PRIME;
    }
    return h;
}

/* Deterministic "gauge noise": 32-bit LCG mapped to roughly [-1, 1). */
static double gauge_noise(uint32_t *state)
{
    *state = *state * 22695477u + 1u;
    return ((int32_t)(*state >> 8 & 0xffffu) - 32768) / 32768.0;
}

/* The kernel: lower-triangular symmetric rank-NT update S += X X^T. */
static void gauge_cov(int n, int m, double S[n][n], const double X[n][m])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j <= i; j++)
            for (int k = 0; k < m; k++)
                S[i][j] += X[i][k] * X[j][k];
}

int main(void)
{
    const int n = NG, m = NT;
    double *s = malloc((size_t)n * (size_t)n * sizeof *s + 1);
    double *x = malloc((size_t)n * (size_t)m * sizeof *x + 1);
    if (!s || !x) {
        fprintf(stderr, "gauge_cov: out of memory\n");
        return 1;
    }

    uint32_t state = 7177u;
    /* Each gauge sees a tidal residual with its own phase and amplitude,
     * plus noise of varying size. */
    for (int g = 0; g < n; g++) {
        double amp = 0.25 + (g % 7) * 0.5;
        for (int t = 0; t < m; t++)
            x[AT(g, t, m)] = amp * sin(0.3 * t + 0.9 * g)
                             + ldexp(gauge_noise(&state), (t + g) % 5 - 3);
    }
    /* Prior covariance: diagonal loading plus small off-diagonal terms. */
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            s[AT(i, j, n)] = (i == j ? 2.0 : 0.0) + 0.001 * gauge_noise(&state);

    /* Enter the kernel only with positive sizes (C99 array bounds must be
     * positive); with an empty dimension it would not change S. */
    if (n > 0 && m > 0)
        gauge_cov(n, m, (double (*)[n])s, (const double (*)[m])x);

    uint64_t h = fnv1a(FNV_OFFSET, s, (size_t)n * (size_t)n * sizeof *s);
    printf("gauge_cov %016llx\n", (unsigned long long)h);

    free(s);
    free(x);
    return 0;
}
