/* Hostile input: the inner loop's '{' is never closed. */
void settle_surface(int n, int m, double h[n][m])
{
    for (int i = 0; i < n; i++) {
        for (int j = 0; j < m; j++) {
            h[i][j] = h[i][j] * 0.5;
    }
}
