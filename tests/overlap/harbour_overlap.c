/* Harbour-camera frames in buffers that callers may pass overlapping (invented kernels). */
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

/* each row blends the row above of both frames */
void blend_rows(int n, int m, int ld, double *out, const double *in) {
    for (int i = 1; i < n; i++)
        for (int j = 0; j < m; j++)
            out[i * ld + j] = 0.5 * (in[(i - 1) * ld + j] + out[(i - 1) * ld + j]);
}

/* a transposed accumulate between two square frames (variably modified parameters) */
void turn_add(int n, double dst[n][n], double src[n][n]) {
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            dst[i][j] += src[j][i];
}

/* restrict says the frames are distinct: no run-time test */
void turn_copy(int n, double dst[restrict n][n], const double src[restrict n][n]) {
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            dst[i][j] = src[j][i];
}

static void fill(double *p, size_t count, unsigned seed) {
    for (size_t k = 0; k < count; k++)
        p[k] = (double)(((unsigned)k * 2654435761u + seed * 97u) % 1000u) / 16.0 - 30.0;
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
    static const int sizes[] = {0, 1, 2, 5, 8, 9, 13};
    for (unsigned s = 0; s < sizeof sizes / sizeof sizes[0]; s++) {
        int n = sizes[s], m = sizes[(s + 2) % 7], ld = (m > n ? m : n) + 1;
        size_t frame = (size_t)(n + 1) * (size_t)ld + 1;
        size_t count = 3 * frame + 8;
        double *buf = malloc(count * sizeof *buf);
        /* offsets of the second frame: the same frame, overlapping by a row or less, disjoint */
        size_t offsets[] = {0, 1, (size_t)ld, frame / 2, frame + 3};
        for (unsigned o = 0; o < sizeof offsets / sizeof offsets[0]; o++) {
            char tag[64];
            snprintf(tag, sizeof tag, "blend n=%d m=%d off=%zu", n, m, offsets[o]);
            fill(buf, count, s + o);
            blend_rows(n, m, ld, buf, buf + offsets[o]);
            dump(tag, buf, count);
            snprintf(tag, sizeof tag, "turn n=%d off=%zu", n, offsets[o]);
            fill(buf, count, s + o + 50);
            turn_add(n, (double (*)[n])buf, (double (*)[n])(buf + offsets[o]));
            dump(tag, buf, count);
        }
        fill(buf, count, s + 99);
        turn_copy(n, (double (*)[n])buf, (const double (*)[n])(buf + (size_t)n * (size_t)n));
        dump("copy", buf, count);
        free(buf);
    }
    return 0;
}
