/* Times one call of mm() REPS times on deterministic inputs; prints the seconds of each call
 * and writes the result matrix of the last call to DUMP (raw doubles). */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

void mm(int n, double C[n][n], const double A[n][n], const double B[n][n]);

int main(int argc, char **argv)
{
    if (argc != 4) {
        fprintf(stderr, "usage: %s N REPS DUMP\n", argv[0]);
        return 2;
    }
    int n = atoi(argv[1]), reps = atoi(argv[2]);
    size_t count = (size_t)n * (size_t)n;
    double *a = malloc(count * sizeof *a), *b = malloc(count * sizeof *b), *c = malloc(count * sizeof *c);
    if (!a || !b || !c)
        return 3;
    for (size_t k = 0; k < count; k++) {
        a[k] = (double)((k * 7u + 3u) % 17u) / 8.0 - 1.0;
        b[k] = (double)((k * 11u + 5u) % 13u) / 4.0 - 1.5;
    }
    for (int r = 0; r < reps; r++) {
        memset(c, 0, count * sizeof *c);
        struct timespec t0, t1;
        clock_gettime(CLOCK_MONOTONIC, &t0);
        mm(n, (double (*)[n])c, (const double (*)[n])a, (const double (*)[n])b);
        clock_gettime(CLOCK_MONOTONIC, &t1);
        printf("%.6f\n", (double)(t1.tv_sec - t0.tv_sec) + 1e-9 * (double)(t1.tv_nsec - t0.tv_nsec));
    }
    FILE *f = fopen(argv[3], "wb");
    if (!f || fwrite(c, sizeof *c, count, f) != count)
        return 4;
    fclose(f);
    free(a);
    free(b);
    free(c);
    return 0;
}
