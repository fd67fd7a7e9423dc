/* Flattened buffers of a tidal-basin model (invented kernels for the tests). */
#include <stddef.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

struct basin {
    int nx, ny;
    double *depth;
    double flux[24][24];
    int last;
};

double tide[40][40];

/* transposed copy between two row-major buffers of row length ld */
void spread_rows(int n, int m, int ld, double *A, const double *B) {
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            A[i*ld + j] = 0.5 * B[j*ld + i] + A[i*ld + j];
}

/* each row takes the one above it: a flow dependence (1, 0) */
void settle(int n, int ld, double *A) {
    for (int i = 1; i < n; i++)
        for (int j = 0; j < n; j++)
            A[i*ld + j] += 0.25 * A[(i - 1)*ld + j];
}

/* three dimensions flattened twice; the bounds are the row lengths: proven */
void layers(int p, int q, int r, double *V) {
    for (int i = 0; i < p; i++)
        for (int j = 0; j < q; j++)
            for (int k = 0; k < r; k++)
                V[(i*q + j)*r + k] = 0.5 * V[(i*q + j)*r + k] + (double)(i - j + k);
}

/* the written element is one to the right: needs m + 1 <= ld */
void shift_in_row(int n, int m, int ld, double *A, const double *B) {
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            A[i*ld + j + 1] = B[i*ld + j] - 1.0;
}

/* a row walked backwards */
void mirror(int n, int ld, double *A, const double *B) {
    for (int i = 0; i < n; i++)
        for (int j = 0; j < ld; j++)
            A[i*ld + ld - 1 - j] = B[i*ld + j];
}

/* two buffers with their own leading dimensions */
void two_ld(int n, int m, int lda, int ldb, double *A, const double *B) {
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            A[i*lda + j] += 3.0 * B[j*ldb + i];
}

/* row lengths in size_t, bound in int */
void spread_wide(int n, size_t ld, double *A, const double *B) {
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            A[i*ld + j] = B[j*ld + i] + 2.0;
}

/* struct fields: a flat buffer whose row length is a field, and an embedded array */
void basin_depth(struct basin *g) {
    for (int i = 0; i < g->ny; i++)
        for (int j = 0; j < g->nx; j++)
            g->depth[i*g->nx + j] = 0.25 * g->flux[i][j] + g->depth[i*g->nx + j];
}

/* every row from the first one (an affine subscript read as row 0) */
void from_first_row(int n, int ld, double *A) {
    for (int i = 1; i < n; i++)
        for (int j = 0; j < n; j++)
            A[i*ld + j] = A[j] + 1.0;
}

/* a file-scope array */
void tide_step(int n) {
    for (int i = 1; i < n; i++)
        for (int j = 0; j < n; j++)
            tide[i][j] += 0.5 * tide[i - 1][j];
}

static double value(unsigned k) {
    return (double)((k * 2654435761u) % 1000u) / 8.0 - 60.0;
}

static void fill(double *p, size_t count, unsigned seed) {
    for (size_t k = 0; k < count; k++)
        p[k] = value((unsigned)k + seed * 7919u);
}

static void dump(const char *tag, const double *p, size_t count) {
    unsigned long long h = 1469598103934665603ULL;
    for (size_t k = 0; k < count; k++) {
        unsigned long long bits;
        memcpy(&bits, &p[k], sizeof bits);
        h = (h ^ bits) * 1099511628211ULL;
    }
    printf("%s %016llx\n", tag, h);
}

int main(void) {
    static const int sizes[] = {0, 1, 3, 4, 5, 7, 9, 13};
    static const int extra[] = {-2, -1, 0, 1, 3};
    for (unsigned s = 0; s < sizeof sizes / sizeof sizes[0]; s++) {
        for (unsigned e = 0; e < sizeof extra / sizeof extra[0]; e++) {
            int n = sizes[s], m = sizes[(s + 3) % 8], ld = (n > m ? n : m) + extra[e];
            if (ld < 1)
                ld = 1;
            size_t count = (size_t)(n + m + 2) * (size_t)(ld + m + 2) * 6 + 64;
            double *A = malloc(count * sizeof *A), *B = malloc(count * sizeof *B);
            char tag[64];
            snprintf(tag, sizeof tag, "n=%d m=%d ld=%d", n, m, ld);
            fill(A, count, 1); fill(B, count, 2);
            spread_rows(n, m, ld, A, B); dump("spread_rows", A, count);
            fill(A, count, 3);
            settle(n, ld, A); dump("settle", A, count);
            fill(A, count, 4);
            layers(n, m, (int)e + 1, A); dump("layers", A, count);
            fill(A, count, 5);
            shift_in_row(n, m, ld, A, B); dump("shift_in_row", A, count);
            fill(A, count, 6);
            mirror(n, ld, A, B); dump("mirror", A, count);
            fill(A, count, 7);
            two_ld(n, m, ld, ld + extra[(e + 1) % 5], A, B); dump("two_ld", A, count);
            fill(A, count, 8);
            spread_wide(n, (size_t)ld, A, B); dump("spread_wide", A, count);
            fill(A, count, 12);
            from_first_row(n, ld, A); dump("from_first_row", A, count);
            printf("%s\n", tag);
            free(A); free(B);
        }
        {
            struct basin g;
            int n = sizes[s] < 24 ? sizes[s] : 23;
            g.nx = n; g.ny = (n * 2) % 24; g.last = 0;
            g.depth = malloc((size_t)(g.nx * g.ny + 1) * sizeof *g.depth);
            fill(g.depth, (size_t)(g.nx * g.ny + 1), 9);
            fill(&g.flux[0][0], 24 * 24, 10);
            basin_depth(&g); dump("basin_depth", g.depth, (size_t)(g.nx * g.ny + 1));
            free(g.depth);
            fill(&tide[0][0], 40 * 40, 11);
            tide_step(sizes[s] * 3 < 40 ? sizes[s] * 3 : 39); dump("tide_step", &tide[0][0], 40 * 40);
        }
    }
    return 0;
}
