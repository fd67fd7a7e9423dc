/* Hostile input: loops produced by a function-like macro. */
#define FOR(i, n) for (int i = 0; i < (n); i++)

void scan_frame(int n, int m, float px[n][m])
{
    FOR(y, n)
        FOR(x, m)
            px[y][x] = 0.5f * px[y][x];
}

void scan_rows(int n, int m, float px[n][m])
{
    for (int y = 0; y < n; y++)
        FOR(x, m)
            px[y][x] = 0.25f * px[y][x];
}
