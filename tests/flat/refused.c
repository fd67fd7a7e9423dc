#include <stddef.h>
struct basin { int nx, ny; double *depth; int last; };
struct basin *current(void);
void two_ways(int n, int ld, double *A) {
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            A[i*ld + j] = A[j*n + i];
}
void plain_and_flat(int n, int ld, double *A) {
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            A[i*ld + j] = A[j] + 1.0;
}
void product_rows(int n, int m, double *A) {
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            A[i*n*m + j] = 1.0;
}
void iter_product(int n, double *A) {
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            A[i*j] = 1.0;
}
void narrow(int n, unsigned ld, double *A) {
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            A[i*ld + j] = 1.0;
}
void never(int n, int ld, double *A) {
    for (int i = 0; i < n; i++)
        for (int j = ld; j < 2*ld; j++)
            A[i*ld + j] = 1.0;
}
void wide_stride(size_t n, size_t ld, double *A) {
    for (size_t i = 0; i < n; i++)
        for (size_t j = 0; j < n; j++)
            A[i*ld + 2*j] += A[i*ld + 2*j + ld];
}
void writes_bound(struct basin *g) {
    for (int i = 0; i < g->ny; i++)
        for (int j = 0; j < g->nx; j++)
            g->nx = i + j;
}
void last_value(struct basin *g) {
    for (int i = 0; i < g->ny; i++)
        for (int j = 0; j < g->nx; j++)
            g->last = i * 100 + j;
}
void through_call(int n) {
    for (int i = 0; i < n; i++)
        for (int j = 0; j < n; j++)
            current()->depth[i] = 1.0;
}
