/* Hostile input: loop bodies that write their own iterators. */
void skip_columns(int n, int m, double h[n][m])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++) {
            h[i][j] = 0.5 * h[i][j];
            j++;
        }
}

void hidden_write(int n, int m, double h[n][m])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++) {
            double t = 0.5 * (i += 0);
            h[i][j] = t;
        }
}
