/*
 * camera_blur.c -- harbour-camera image pipeline: blur stage.
 *
 * Each frame from the harbour-mouth camera (IH rows x IW columns of
 * dark-level-corrected float pixels) is blurred with a KW x KW weight
 * kernel before ship detection.  Valid region only: output pixel (y, x)
 * exists for y < IH - KW + 1, x < IW - KW + 1, and accumulates
 *   out[y][x] += img[y+u][x+v] * w[u][v]   for u, v < KW.
 * The output frame has the size of the input; pixels outside the valid
 * region keep their initial value (the background level).
 * Four nested loops: output row y, output column x, kernel row u, kernel
 * column v.
 *
 * Suggested command:
 *   looptile tile samples/camera_blur.c --nest blur_frame --sizes 16,16 --diff
 *
 * Sizes (override with -DIH=... etc.; any value from 0 up works):
 *   IH  frame height           (default 101)
 *   IW  frame width            (default 87)
 *   KW  blur kernel width      (default 5)
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <math.h>
#include <stdint.h>

#ifndef IH
#define IH 101
#endif
#ifndef IW
#define IW 87
#endif
#ifndef KW
#define KW 5
#endif

/* Background level written into the output frame before blurring. */
#define BACKGROUND 0.125f

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

/* Invented frame content: a horizon gradient, a bright buoy light and
 * LCG sensor noise; dark-level correction leaves some pixels negative. */
static float pixel_at(uint32_t *state, int y, int x)
{
    *state = *state * 747796405u + 2891336453u;
    float noise = (float)((int)(*state >> 20) - 2048) / 1024.0f;   /* [-2, 2) */
    float sky = (y < 40) ? 3.0f - 0.05f * (float)y : -0.5f;
    float dy = (float)(y - 25), dx = (float)(x - 60);
    float buoy = 50.0f * expf(-(dy * dy + dx * dx) / 8.0f);
    return sky + buoy + noise;
}

/* The kernel: valid-region 2-D convolution of img with w into out. */
static void blur_frame(int h, int wd, int k, float out[h][wd],
                       const float img[h][wd], const float w[k][k])
{
    for (int y = 0; y < h - k + 1; y++)
        for (int x = 0; x < wd - k + 1; x++)
            for (int u = 0; u < k; u++)
                for (int v = 0; v < k; v++)
                    out[y][x] += img[y + u][x + v] * w[u][v];
}

int main(void)
{
    const int h = IH, wd = IW, k = KW;
    const size_t frame_px = (size_t)h * (size_t)wd;
    float *img = malloc(frame_px * sizeof *img + 1);
    float *out = malloc(frame_px * sizeof *out + 1);
    float *w = malloc((size_t)k * (size_t)k * sizeof *w + 1);
    if (!img || !out || !w) {
        fprintf(stderr, "camera_blur: out of memory\n");
        return 1;
    }

    uint32_t state = 8086u;
    for (int y = 0; y < h; y++)
        for (int x = 0; x < wd; x++)
            img[(size_t)y * wd + x] = pixel_at(&state, y, x);
    for (size_t i = 0; i < frame_px; i++)
        out[i] = BACKGROUND;

    /* Gaussian-like weights, normalised to sum 1 (when there are any). */
    const float centre = 0.5f * (float)(k - 1);
    const float sigma = 0.4f * (float)k + 0.5f;
    float sum = 0.0f;
    for (int u = 0; u < k; u++)
        for (int v = 0; v < k; v++) {
            float du = (float)u - centre, dv = (float)v - centre;
            float wt = expf(-(du * du + dv * dv) / (2.0f * sigma * sigma));
            w[(size_t)u * k + v] = wt;
            sum += wt;
        }
    if (sum > 0.0f)
        for (int i = 0; i < k * k; i++)
            w[i] /= sum;

    /* Array bounds must be positive in C99; with an empty frame or an
     * empty kernel the blur would not change out. */
    if (h > 0 && wd > 0 && k > 0)
        blur_frame(h, wd, k, (float (*)[wd])out,
                   (const float (*)[wd])img, (const float (*)[k])w);

    uint64_t hash = fnv1a(FNV_OFFSET, out, frame_px * sizeof *out);
    printf("camera_blur %016llx\n", (unsigned long long)hash);

    free(img);
    free(out);
    free(w);
    return 0;
}
