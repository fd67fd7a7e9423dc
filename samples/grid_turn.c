/*
 * grid_turn.c -- tidal basin model: grid reorientation.
 *
 * The basin bathymetry G is stored along-shore major (NX rows of NY
 * cross-shore points).  The cross-shore solver wants it the other way
 * round, so the grid is turned (transposed) into T:
 *   T[j][i] = G[i][j]   for i < NX, j < NY.
 * Stored as float, as the bathymetry file is single precision.
 *
 * Suggested command:
 *   looptile tile samples/grid_turn.c --nest turn_grid --sizes 16,16 --diff
 *
 * Sizes (override with -DNX=... etc.; any value from 0 up works):
 *   NX  along-shore points   (default 75)
 *   NY  cross-shore points   (default 59)
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <math.h>
#include <stdint.h>

#ifndef NX
#define NX 75
#endif
#ifndef NY
#define NY 59
#endif

/* Deepest point of the invented basin, metres. */
#define MAX_DEPTH 38.5f

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

/* Invented bathymetry: a sloping shelf with a dredged channel and some
 * LCG roughness; negative values are tidal flats above chart datum. */
static float depth_at(uint32_t *state, int i, int j)
{
    *state = *state * 1664525u + 1013904223u;
    float rough = (float)((int)(*state >> 22) - 512) / 256.0f;  /* [-2, 2) */
    float shelf = MAX_DEPTH * (float)j / 60.0f - 4.0f;
    float channel = 9.0f * expf(-0.02f * (float)((i - 30) * (i - 30)));
    return shelf + channel + rough;
}

/* The kernel: T = transpose(G). */
static void turn_grid(int n, int m, float T[m][n], const float G[n][m])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            T[j][i] = G[i][j];
}

int main(void)
{
    const int n = NX, m = NY;
    const size_t bytes = (size_t)n * (size_t)m * sizeof(float);
    float *g = malloc(bytes + 1);
    float *t = malloc(bytes + 1);
    if (!g || !t) {
        fprintf(stderr, "grid_turn: out of memory\n");
        return 1;
    }

    uint32_t state = 1953u;
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            g[(size_t)i * m + j] = depth_at(&state, i, j);
    memset(t, 0, bytes);

    /* Array bounds must be positive in C99; an empty grid has nothing to
     * turn. */
    if (n > 0 && m > 0)
        turn_grid(n, m, (float (*)[n])t, (const float (*)[m])g);

    uint64_t h = fnv1a(FNV_OFFSET, t, bytes);
    printf("grid_turn %016llx\n", (unsigned long long)h);

    free(g);
    free(t);
    return 0;
}
