/*
 * Invented coastal-ocean model: the loop shapes of its grid kernels, for the
 * differential tests (tests/test_differential.py tiles each kernel and runs
 * original and rewrite side by side).  main runs every kernel over a range
 * of sizes and prints a hash of the grid after each.
 */
#include <stdio.h>
#include <stdint.h>
#include <string.h>

#define MAXN 40
#define NROWS 23

static double a[MAXN + 2][MAXN + 2];
static double b[MAXN + 2][MAXN + 2];

static void inclusive_step3(int lo, int hi, int m)
{
    for (int i = lo; i <= hi; i += 3)
        for (int j = 0; j <= m; j++)
            a[i][j] = a[i][j] * 0.5 + (double)(i - j);
}

static void down_step2(int lo, int hi, int m)
{
    for (int i = hi; i > lo; i -= 2)
        for (int j = m; j >= 1; j--)
            a[i][j] = a[i][j + 1] + b[i][j];
}

static void not_equal(long n, long m)
{
    for (long i = 0; i != n; i++)
        for (long j = 1; j != m; ++j)
            a[i][j] = a[i][j - 1] * 0.75 + b[i][j];
}

static void unsigned_step(unsigned n, unsigned m)
{
    for (unsigned i = 1; i < n; i += 2)
        for (unsigned j = 0; j < m; j = j + 1)
            a[i][j] = a[i - 1][j] + 2.0 * b[i][j];
}

static void macro_bound(int m)
{
    for (int i = 1; i < NROWS; i++)
        for (int j = 0; j < m; j++)
            a[i][j] = a[i - 1][j] - b[i][j];
}

static void upper_triangle(int n)
{
    for (int i = 0; i < n; i++)
        for (int j = i; j < n; j++)
            a[i][j] = a[i][j] + b[j][i];
}

static void strict_lower(int n)
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < i; j++)
            a[i][j] = 0.5 * a[i][j] + b[i][j];
}

static void guarded(int n, int m)
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++) {
            if (b[i][j] > 0.3)
                a[i][j] = b[i][j];
            else
                a[i][j] = -b[i][j];
        }
}

static void imperfect(int n, int m)
{
    for (int i = 0; i < n; i++)
        for (int j = 0; j < m; j++) {
            double acc = 0.0;
            for (int k = 0; k < 3; k++)
                acc += b[i][j + k];
            a[i][j] = acc;
        }
}

static uint64_t digest(void)
{
    uint64_t h = UINT64_C(0xcbf29ce484222325);
    const unsigned char *p = (const unsigned char *)a;
    for (size_t k = 0; k < sizeof a; k++) {
        h ^= p[k];
        h *= UINT64_C(0x00000100000001b3);
    }
    return h;
}

static void reset(void)
{
    for (int i = 0; i < MAXN + 2; i++)
        for (int j = 0; j < MAXN + 2; j++) {
            a[i][j] = 0.01 * ((i * 7 + j * 13) % 17);
            b[i][j] = 0.02 * ((i * 5 + j * 3) % 19) - 0.1;
        }
}

int main(void)
{
    static const int sizes[] = {0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 11, 13, 17, 23, 31, 38};
    for (size_t s = 0; s < sizeof sizes / sizeof sizes[0]; s++) {
        int n = sizes[s], m = sizes[(s + 5) % (sizeof sizes / sizeof sizes[0])];
        reset();
        inclusive_step3(n / 3, n, m);
        printf("inclusive_step3 %d %d %016llx\n", n, m, (unsigned long long)digest());
        reset();
        down_step2(n / 4, n, m);
        printf("down_step2 %d %d %016llx\n", n, m, (unsigned long long)digest());
        reset();
        not_equal(n, m > 0 ? m : 1);
        printf("not_equal %d %d %016llx\n", n, m, (unsigned long long)digest());
        reset();
        unsigned_step((unsigned)n, (unsigned)m);
        printf("unsigned_step %d %d %016llx\n", n, m, (unsigned long long)digest());
        reset();
        macro_bound(m);
        printf("macro_bound %d %016llx\n", m, (unsigned long long)digest());
        reset();
        upper_triangle(n);
        printf("upper_triangle %d %016llx\n", n, (unsigned long long)digest());
        reset();
        strict_lower(n);
        printf("strict_lower %d %016llx\n", n, (unsigned long long)digest());
        reset();
        guarded(n, m);
        printf("guarded %d %d %016llx\n", n, m, (unsigned long long)digest());
        reset();
        imperfect(n, m);
        printf("imperfect %d %d %016llx\n", n, m, (unsigned long long)digest());
    }
    return 0;
}
