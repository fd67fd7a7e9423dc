/* Tidal basin: smoothing of the surface elevation over a row window (the original). */
#include <stdio.h>

void tide_smooth(int n, int m, double out[n][m], const double in[n][m + 2])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            out[i][j] = 0.25 * in[i][j] + 0.5 * in[i][j + 1] + 0.25 * in[i][j + 2];
}

int main(void)
{
    static double in[4][7], out[4][5];
    for (int i = 0; i < 4; i++)
        for (int j = 0; j < 7; j++)
            in[i][j] = i - 0.5 * j;
    tide_smooth(4, 5, out, in);
    printf("%g\n", out[3][4]);
    return 0;
}
