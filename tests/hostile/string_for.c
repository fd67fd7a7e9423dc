/* String literals that look like a loop and like the end of a comment. */
#include <stdio.h>

static const char *banner = "harbour cam: for (int k = 0; k < 9; k++) */ not a comment";

static float px[24][24];

void expose_frame(int n, int m)
{
    const char *tag = "for (";
    for (int y = 0; y < n; y++)
        for (int x = 0; x < m; x++)
            px[y][x] = 0.75f * px[y][x] + (float)(y - x); /* "for (" */
    (void)tag;
}

int main(void)
{
    double s = 0;
    for (int y = 0; y < 24; y++)
        for (int x = 0; x < 24; x++)
            px[y][x] = (float)((y * 7 + x * 3) % 11);
    expose_frame(21, 19);
    for (int y = 0; y < 24; y++)
        for (int x = 0; x < 24; x++)
            s += px[y][x] * (1 + (y + x) % 5);
    printf("%s\n%.9g\n", banner, s);
    return 0;
}
