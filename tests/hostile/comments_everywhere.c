/* A comment between every token of the loop headers. */
#include <stdio.h>

static double h[40][40];

void settle_surface(int n, int m)
{
    /*a*/for/*b*/(/*c*/int/*d*/i/*e*/=/*f*/0/*g*/;/*h*/i/*i*/</*j*/n/*k*/;/*l*/i/*m*/++/*n*/)/*o*/
        // a line comment between the headers
        /*p*/for/*q*/(/*r*/int/*s*/j/*t*/=/*u*/0/*v*/;/*w*/j/*x*/</*y*/m/*z*/;/*A*/j/*B*/++/*C*/)/*D*/
            h[i][j] = 0.5 * h[i][j] + i - j;
}

int main(void)
{
    double s = 0;
    for (int i = 0; i < 40; i++)
        for (int j = 0; j < 40; j++)
            h[i][j] = (i * 7 + j * 3) % 11;
    settle_surface(31, 17);
    for (int i = 0; i < 40; i++)
        for (int j = 0; j < 40; j++)
            s += h[i][j] * (1 + (i + j) % 5);
    printf("%.17g\n", s);
    return 0;
}
