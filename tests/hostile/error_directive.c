/* Hostile input: the file stops its own build. */
#ifndef BASIN_CELLS
#error "define BASIN_CELLS for the tidal basin grid"
#endif
void settle_surface(int n, int m, double h[n][m])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            h[i][j] = h[i][j] * 0.5;
}
