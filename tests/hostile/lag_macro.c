/* A subscript macro whose value decides legality: with -DWIDE the sweep reads
 * the previous row's next column (tiling is illegal), without it only the
 * same row (tiling is legal, for LAG == 0 only). */
#include <stdio.h>

#ifdef WIDE
#define LAG 1
#else
#define LAG 0
#endif

static double h[40][40];

void lagged_sweep(int n, int m)
{
    for (int i = 1; i < n; i++)
        for (int j = 0; j < m; j++)
            h[i][j] = 0.5 * (h[i][j] + h[i - LAG][j + 1]);
}

int main(void)
{
    double s = 0;
    for (int i = 0; i < 40; i++)
        for (int j = 0; j < 40; j++)
            h[i][j] = (i * 7 + j * 3) % 11;
    lagged_sweep(23, 31);
    for (int i = 0; i < 40; i++)
        for (int j = 0; j < 40; j++)
            s += h[i][j] * (1 + (i + j) % 5);
    printf("%.17g\n", s);
    return 0;
}
