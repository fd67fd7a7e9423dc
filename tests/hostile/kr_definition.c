/* Hostile input: a K&R (old-style) definition of a tidal basin kernel.
 * The parameter types come from the declaration list, not the prototype. */
#include <stdio.h>

void ebb_damp(n, m, h)
int n, m;
double h[40][40];
{
    int i, j;
    for (i = 0; i < n; i++)
        for (j = 0; j < m; j++)
            h[i][j] = 0.5 * h[i][j] + i - 2 * j;
}

int main(void)
{
    static double h[40][40];
    double s = 0;
    for (int i = 0; i < 40; i++)
        for (int j = 0; j < 40; j++)
            h[i][j] = (i * 7 + j * 3) % 11;
    ebb_damp(29, 31, h);
    for (int i = 0; i < 40; i++)
        for (int j = 0; j < 40; j++)
            s += h[i][j] * (1 + (i + j) % 5);
    printf("%.17g\n", s);
    return 0;
}
