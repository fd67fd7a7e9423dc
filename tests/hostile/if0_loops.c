/* Loops inside #if 0 blocks: not code, never selected, kept byte for byte. */
#include <stdio.h>

static double h[32][32];

void settle_surface(int n, int m)
{
#if 0
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            h[i][j] = 2.0 * h[i][j] + ;   /* not even valid C */
#endif
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++)
            h[i][j] = 0.5 * h[i][j] + i - j;
#if 0
    for (int k = 0; k < n; k++) {
#endif
}

int main(void)
{
    double s = 0;
    for (int i = 0; i < 32; i++)
        for (int j = 0; j < 32; j++)
            h[i][j] = (i * 5 + j) % 7;
    settle_surface(19, 23);
    for (int i = 0; i < 32; i++)
        for (int j = 0; j < 32; j++)
            s += h[i][j] * (1 + (i + j) % 5);
    printf("%.17g\n", s);
    return 0;
}
