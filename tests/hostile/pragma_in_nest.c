/* Hostile input: pragmas inside harbour-camera nests. */
void gain_between(int n, int m, float px[n][m])
{
    for (int y = 0; y < n; y++)
#pragma GCC ivdep
        for (int x = 0; x < m; x++)
            px[y][x] = 2.0f * px[y][x];
}

void gain_inner(int n, int m, float px[n][m])
{
    for (int y = 0; y < n; y++)
        for (int x = 0; x < m; x++) {
#pragma GCC unroll 4
            for (int c = 0; c < 4; c++)
                px[y][x] = 2.0f * px[y][x];
        }
}

void gain_operator(int n, int m, float px[n][m])
{
    for (int y = 0; y < n; y++)
        for (int x = 0; x < m; x++) {
            _Pragma("GCC diagnostic push")
            px[y][x] = 2.0f * px[y][x];
        }
}
