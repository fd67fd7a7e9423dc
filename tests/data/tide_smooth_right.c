/* Tidal basin: the same smoothing, tiled by hand correctly. */
#include <stdio.h>

void tide_smooth(int n, int m, double out[n][m], const double in[n][m + 2])
{
    for (int ii = 0; ii < n; ii += 4)
        for (int jj = 0; jj < m; jj += 4)
            for (int i = ii; i < n && i < ii + 4; i++)
                for (int j = jj; j < m && j < jj + 4; j++)
                    out[i][j] = 0.25 * in[i][j] + 0.5 * in[i][j + 1] + 0.25 * in[i][j + 2];
}

int main(void)
{
    return 0;
}
