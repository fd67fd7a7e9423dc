/* A nest whose bound and body use macros defined differently under -DWIDE. */
#include <stdio.h>

#ifdef WIDE
#define SPAN(n) (2 * (n))
#define GAIN 3
#else
#define SPAN(n) (n)
#define GAIN 1
#endif

static double h[48][96];

void spread_swell(int n, int m)
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < SPAN(m); j++)
            h[i][j] = h[i][j] * 0.5 + GAIN * i + j;
}

int main(void)
{
    double s = 0;
    for (int i = 0; i < 48; i++)
        for (int j = 0; j < 96; j++)
            h[i][j] = (i * 7 + j * 3) % 11;
    spread_swell(13, 37);
    for (int i = 0; i < 48; i++)
        for (int j = 0; j < 96; j++)
            s += h[i][j] * (1 + (i + j) % 5);
    printf("%.17g\n", s);
    return 0;
}
