/* Hostile input: loop bounds read from an array that the nest writes. */
#include <stdio.h>

void chain_rows(int n, int len[16], double h[16][16])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < len[i]; j++)
            len[i + 1] = j;
}

/* The bound len[0] does not depend on the iterators, but the body writes
 * len[i], which is len[0] when i == 0: the trip count changes while the
 * first row runs. */
void shrink_rows(int n, int len[16], double h[16][16])
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < len[0]; j++)
            len[i] = j;
}

int main(void)
{
    static double h[16][16];
    int len[16];
    for (int k = 0; k < 16; k++)
        len[k] = 6;
    shrink_rows(8, len, h);
    for (int k = 0; k < 16; k++)
        printf("%d ", len[k]);
    printf("\n");
    return 0;
}
