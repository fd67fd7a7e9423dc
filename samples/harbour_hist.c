/*
 * harbour_hist.c -- harbour-camera image pipeline: brightness histogram
 * (NOT tileable by looptile).
 *
 * Before exposure control, the pipeline counts how many pixels of an
 * 8-bit grey frame (IH rows x IW columns) fall on each of the 256 grey
 * levels:
 *   hist[img[y][x]]++   for y < IH, x < IW
 * The counts are added to the running histogram of the current minute.
 *
 * looptile must REFUSE to tile this nest: the subscript of the write,
 * img[y][x], is data-dependent (not an affine function of y and x), so the
 * tool cannot tell which iterations touch the same element of hist.
 *
 * Suggested command (looptile is expected to refuse it):
 *   looptile tile samples/harbour_hist.c --nest count_levels --sizes 16,16 --diff
 *
 * Sizes (override with -DIH=... etc.; any value from 0 up works):
 *   IH  frame height   (default 93)
 *   IW  frame width    (default 77)
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <math.h>
#include <stdint.h>

#ifndef IH
#define IH 93
#endif
#ifndef IW
#define IW 77
#endif

/* One bin per grey level of an 8-bit pixel (fixed, not a size knob). */
#define NLEVELS 256

/* 64-bit FNV-1a parameters. */
#define FNV_OFFSET UINT64_C(0xcbf29ce484222325)
#define FNV_PRIME  UINT64_C(0x00000100000001b3)

static uint64_t fnv1a(uint64_t h, const void *p, size_t len)
{
    const unsigned char *b = p;
    for (size_t i = 0; i < len; i++) {
        h ^= b[i];
        h *= FNV_PRIME;
    }
    return h;
}

/* Invented grey frame: dark water, a brighter sky band, a saturated light
 * on the pier and LCG sensor noise, clamped to 0..255. */
static unsigned char grey_at(uint32_t *state, int y, int x)
{
    *state = *state * 1103515245u + 12345u;
    int noise = (int)(*state >> 16 & 0x3fu) - 32;           /* -32 .. 31 */
    double base = (y < 30) ? 180.0 - 2.0 * y : 40.0 + 20.0 * sin(0.2 * x);
    if ((y - 50) * (y - 50) + (x - 20) * (x - 20) < 16)
        base = 300.0;                                       /* saturates */
    int v = (int)lround(base) + noise;
    if (v < 0)
        v = 0;
    if (v > 255)
        v = 255;
    return (unsigned char)v;
}

/* The kernel: add the grey-level counts of img to hist. */
static void count_levels(int h, int w, unsigned int hist[NLEVELS],
                         const unsigned char img[h][w])
{
    for (int y = 0; y < h; y++)
        for (int x = 0; x < w; x++)
            hist[img[y][x]]++;
}

int main(void)
{
    const int h = IH, w = IW;
    unsigned char *img = malloc((size_t)h * (size_t)w + 1);
    unsigned int *hist = malloc(NLEVELS * sizeof *hist);
    if (!img || !hist) {
        fprintf(stderr, "harbour_hist: out of memory\n");
        return 1;
    }

    uint32_t state = 90210u;
    for (int y = 0; y < h; y++)
        for (int x = 0; x < w; x++)
            img[(size_t)y * w + x] = grey_at(&state, y, x);
    /* Running histogram of the minute so far: a few earlier counts. */
    for (int b = 0; b < NLEVELS; b++)
        hist[b] = (unsigned int)(b % 13 == 0 ? b / 13 : 0);

    /* Array bounds must be positive in C99; an empty frame adds nothing. */
    if (h > 0 && w > 0)
        count_levels(h, w, hist, (const unsigned char (*)[w])img);

    uint64_t hash = fnv1a(FNV_OFFSET, hist, NLEVELS * sizeof *hist);
    printf("harbour_hist %016llx\n", (unsigned long long)hash);

    free(img);
    free(hist);
    return 0;
}
