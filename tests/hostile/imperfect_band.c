/* An imperfect nest: only 'i' is perfectly nested at the top, only (j, k) below. */
void settle_layers(int n, int m, double h[n][m], double s[n])
{
    for (int i = 0; i < n; i++) {
        s[i] = 0.0;
        for (int j = 0; j < m; j++)
            for (int k = 0; k < m; k++)
                h[i][j] += s[i] * k;
    }
}
