/* Kernels of the tune benchmark (bench/tune_bench.py), from the invented tidal-basin model and
 * harbour-camera pipeline. Each is a plain loop nest as one would first write it. */

/* Gauge covariance, lower triangle only: S[i][j] += sum_k X[i][k] * X[j][k] for j <= i
 * (a triangular update: the j loop runs up to i). */
void gauge_tri(int n, int p, double S[n][n], const double X[n][p])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j <= i; j++)
            for (int k = 0; k < p; k++)
                S[i][j] += X[i][k] * X[j][k];
}

/* Basin grid turned for the cross-shore solver: T = transpose(G), double. */
void grid_flip(int n, double T[n][n], const double G[n][n])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            T[j][i] = G[i][j];
}

/* Harbour-camera frame smoothed by a k x k weight stencil (valid region only). */
void frame_smooth(int h, int w, int k, float out[h][w], const float img[h][w], const float wt[k][k])
{
    for (int y = 0; y < h - k + 1; y++)
        for (int x = 0; x < w - k + 1; x++)
            for (int u = 0; u < k; u++)
                for (int v = 0; v < k; v++)
                    out[y][x] += img[y + u][x + v] * wt[u][v];
}

/* One Jacobi sweep of the basin surface: five-point average from a into b. */
void surface_sweep(int n, int m, double b[n][m], const double a[n][m])
{
    for (int i = 1; i < n - 1; i++)
        for (int j = 1; j < m - 1; j++)
            b[i][j] = 0.2 * (a[i][j] + a[i - 1][j] + a[i + 1][j] + a[i][j - 1] + a[i][j + 1]);
}
