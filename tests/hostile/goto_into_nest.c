/* Hostile input: a goto from outside jumps to a label inside the nest. */
void flood_cells(int n, int m, double h[n][m], int wet)
{
    int i = 0, j = 0;
    if (wet)
        goto refill;
    for (i = 0; i < n; i++)
        for (j = 0; j < m; j++) {
refill:
            h[i][j] = 0.5 * h[i][j];
        }
}
