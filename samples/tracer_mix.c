/*
 * tracer_mix.c -- tidal basin model: tracer mixing step.
 *
 * Each grid cell of the basin carries NJ dissolved tracers (salt, silt,
 * nitrate, ...).  The mixing step projects the cells onto NK vertical mixing
 * modes and back:  C[i][j] += A[i][k] * B[k][j]  where
 *   C  (NI cells x NJ tracers)  tracer concentrations, updated in place,
 *   A  (NI cells x NK modes)    mode amplitudes of each cell,
 *   B  (NK modes x NJ tracers)  tracer response of each mode.
 * The kernel is a plain triple loop nest in the order i, j, k.
 *
 * Suggested command:
 *   looptile tile samples/tracer_mix.c --nest mix_tracers --sizes 32,32,32 --diff
 *
 * Sizes (override with -DNI=... etc.; any value from 0 up works):
 *   NI  number of cells      (default 67)
 *   NJ  number of tracers    (default 53)
 *   NK  number of modes      (default 45)
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <math.h>
#include <stdint.h>

#ifndef NI
#define NI 67
#endif
#ifndef NJ
#define NJ 53
#endif
#ifndef NK
#define NK 45
#endif

/* 64-bit FNV-1a parameters. */
#define FNV_OFFSET UINT64_C(0xcbf29ce484222325)
#define FNV_PRIME  UINT64_C(0x00000100000001b3)

/* Fold len raw bytes at p into the running FNV-1a hash h. */
static uint64_t fnv1a(uint64_t h, const void *p, size_t len)
{
    const unsigned char *b = p;
    for (size_t i = 0; i < len; i++) {
        h ^= b[i];
        h *= FNV_PRIME;
    }
    return h;
}

/* Small deterministic generator: 32-bit LCG, mapped to a value with mixed
 * sign and a magnitude between about 2^-5 and 2^3. */
static double next_value(uint32_t *state)
{
    *state = *state * 1664525u + 1013904223u;
    int mant = (int)(*state >> 20) - 2048;      /* -2048 .. 2047 */
    int expo = (int)(*state >> 17 & 7u) - 4;    /* -4 .. 3 */
    return ldexp(mant / 2048.0, expo);
}

/* The kernel: C += A * B. */
static void mix_tracers(int n, int m, int p, double C[n][m],
                        const double A[n][p], const double B[p][m])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            for (int k = 0; k < p; k++)
                C[i][j] += A[i][k] * B[k][j];
}

int main(void)
{
    const int n = NI, m = NJ, p = NK;
    /* Flat buffers of at least one byte each, so every size (0 included) is
     * a valid allocation. */
    double *c = malloc((size_t)n * (size_t)m * sizeof *c + 1);
    double *a = malloc((size_t)n * (size_t)p * sizeof *a + 1);
    double *b = malloc((size_t)p * (size_t)m * sizeof *b + 1);
    if (!c || !a || !b) {
        fprintf(stderr, "tracer_mix: out of memory\n");
        return 1;
    }

    uint32_t state = 20240611u;
    for (int i = 0; i < n; i++)
        for (int k = 0; k < p; k++)
            a[(size_t)i * p + k] = next_value(&state);
    for (int k = 0; k < p; k++)
        for (int j = 0; j < m; j++)
            b[(size_t)k * m + j] = next_value(&state);
    /* Background concentrations: a smooth field plus a little noise. */
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            c[(size_t)i * m + j] = sin(0.1 * i) * cos(0.07 * j) + 0.01 * next_value(&state);

    /* C99 wants every evaluated array bound to be positive, so the kernel
     * is entered only when all sizes are; otherwise it would do nothing. */
    if (n > 0 && m > 0 && p > 0)
        mix_tracers(n, m, p, (double (*)[m])c,
                    (const double (*)[p])a, (const double (*)[m])b);

    uint64_t h = fnv1a(FNV_OFFSET, c, (size_t)n * (size_t)m * sizeof *c);
    printf("tracer_mix %016llx\n", (unsigned long long)h);

    free(c);
    free(a);
    free(b);
    return 0;
}
