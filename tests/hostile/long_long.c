/* A nest over long long iterators and bounds (tide gauge records). */
#include <stdio.h>

static double rec[40][40];

void smooth_records(long long n, long long m)
{
    for (long long i = 1; i < n; i++)
        for (long long j = 0; j < m; j++)
            rec[i][j] = 0.5 * (rec[i][j] + rec[i - 1][j]);
}

int main(void)
{
    double s = 0;
    for (int i = 0; i < 40; i++)
        for (int j = 0; j < 40; j++)
            rec[i][j] = (i * 3 + j * 11) % 13;
    smooth_records(37LL, 29LL);
    for (int i = 0; i < 40; i++)
        for (int j = 0; j < 40; j++)
            s += rec[i][j] * (1 + (i + j) % 5);
    printf("%.17g\n", s);
    return 0;
}
