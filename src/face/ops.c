/* Image operations the cascade search is built on: integral images and the
 * two resizes (bilinear per search scale, pixel-area for shrinking inputs). */
#include "likeness/face.h"

#include <float.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>

lk_code lk_integral(const uint8_t *src, int w, int h, int src_stride, int32_t *sum,
                    uint32_t *sqsum, int32_t *tilted, int dst_stride, lk_error *err)
{
    if (!src || !sum || w <= 0 || h <= 0 || src_stride < w || dst_stride < w + 1)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "integral: bad image or table shape");
    const size_t ds = (size_t)dst_stride;
    /* Row 0 and column 0 are zero by definition (empty sums). Sums are carried
     * in uint32_t so that wrap-around on very large images stays defined; the
     * differences used by window sums are exact modulo 2^32. */
    for (int x = 0; x <= w; x++) {
        sum[x] = 0;
        if (sqsum)
            sqsum[x] = 0;
    }
    for (int y = 0; y < h; y++) {
        const uint8_t *s = src + (size_t)y * (size_t)src_stride;
        const int32_t *prev = sum + (size_t)y * ds;
        int32_t *cur = sum + (size_t)(y + 1) * ds;
        uint32_t row = 0;
        cur[0] = 0;
        for (int x = 0; x < w; x++) {
            row += s[x];
            cur[x + 1] = (int32_t)((uint32_t)prev[x + 1] + row);
        }
        if (sqsum) {
            const uint32_t *qprev = sqsum + (size_t)y * ds;
            uint32_t *qcur = sqsum + (size_t)(y + 1) * ds;
            uint32_t qrow = 0;
            qcur[0] = 0;
            for (int x = 0; x < w; x++) {
                qrow += (uint32_t)s[x] * s[x];
                qcur[x + 1] = qprev[x + 1] + qrow;
            }
        }
    }
    if (!tilted)
        return LK_OK;
    /* tilted(X,Y) = sum over rows y < Y of the row segment
     * [X-Y+y, X+Y-y-2] (inclusive, clipped to the image). With the row prefix
     * P(y, x) = sum of I(x', y) over x' < x (x clipped to [0, w]):
     *   tilted(X,Y) = sum_{y<Y} P(y, X+Y-y-1) - sum_{y<Y} P(y, X-Y+y).
     * The first sum depends on (X, Y) only through s = X+Y, the second only
     * through d = X-Y: both are accumulated row by row along the diagonals,
     * in O((w+h) h) time and O(w+h) memory, with no padding of the image. */
    const int ns = w + h + 1; /* s = X+Y in [0, w+h] */
    const int nd = w + h + 1; /* d = X-Y in [-h, w], stored at d + h */
    uint32_t *acc = calloc((size_t)(ns + nd), sizeof *acc);
    if (!acc)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory for a %dx%d tilted integral", w, h);
    uint32_t *U = acc, *V = acc + ns;
    for (int X = 0; X <= w; X++)
        tilted[X] = 0;
    for (int Y = 1; Y <= h; Y++) {
        /* Row y = Y-1 joins both sums. Its prefix P(y, x) is read from the
         * plain integral: sum(x, y+1) - sum(x, y). */
        const int y = Y - 1;
        const int32_t *r0 = sum + (size_t)y * ds, *r1 = sum + (size_t)(y + 1) * ds;
        for (int s = 0; s < ns; s++) {
            int x = s - 1 - y; /* X+Y-y-1 with X+Y = s */
            x = x < 0 ? 0 : (x > w ? w : x);
            U[s] += (uint32_t)r1[x] - (uint32_t)r0[x];
        }
        for (int di = 0; di < nd; di++) {
            int x = (di - h) + y; /* X-Y+y with X-Y = di-h */
            x = x < 0 ? 0 : (x > w ? w : x);
            V[di] += (uint32_t)r1[x] - (uint32_t)r0[x];
        }
        int32_t *t = tilted + (size_t)Y * ds;
        for (int X = 0; X <= w; X++)
            t[X] = (int32_t)(U[X + Y] - V[X - Y + h]);
    }
    free(acc);
    return LK_OK;
}

static uint8_t sat_u8(int v)
{
    return (uint8_t)(v < 0 ? 0 : (v > 255 ? 255 : v));
}

/* Coefficients of the bit-exact bilinear resize (OpenCV's
 * interpolationLinear::getCoeffs in imgproc/src/resize.cpp): the source
 * position of output pixel d is scale * (d + 0.5) - 0.5 in double precision;
 * the weight of the right/lower neighbour is its fractional part rounded to
 * 8 fractional bits (half to even), the left/upper one gets 256 minus that.
 * Positions left of the first pixel or right of the last clamp to it. */
typedef struct lin_coeffs {
    int lo, hi; /* outputs [0, lo) clamp to the first pixel, [hi, n) to the last */
} lin_coeffs;

static lin_coeffs linear_coeffs(int src_n, int dst_n, int *ofs, uint16_t *w)
{
    const double scale = 1.0 / ((double)dst_n / src_n);
    lin_coeffs r = {0, dst_n};
    for (int d = 0; d < dst_n; d++) {
        const double f = scale * ((double)d + 0.5) - 0.5;
        const int i = (int)floor(f);
        ofs[d] = 0;
        w[2 * d] = 256;
        w[2 * d + 1] = 0;
        if (i >= 0 && src_n > 1) {
            if (i < src_n - 1) {
                const int w1 = (int)lrint((f - i) * 256.0);
                ofs[d] = i;
                w[2 * d + 1] = (uint16_t)w1;
                w[2 * d] = (uint16_t)(256 - w1);
            } else {
                ofs[d] = src_n - 1;
                if (d < r.hi)
                    r.hi = d;
            }
        } else if (d + 1 > r.lo) {
            r.lo = d + 1;
        }
    }
    return r;
}

/* One source row filtered horizontally into 8.8 fixed point. */
static void hline(const uint8_t *S, int sw, const int *xofs, const uint16_t *xw, lin_coeffs xr,
                  int dw, uint16_t *out)
{
    int d = 0;
    for (; d < xr.lo && d < dw; d++)
        out[d] = (uint16_t)(S[0] << 8);
    for (; d < xr.hi; d++) {
        const uint8_t *px = S + xofs[d];
        /* Both products fit 16 bits: the weights sum to 256. */
        out[d] = (uint16_t)(xw[2 * d] * px[0] + (sw > 1 ? xw[2 * d + 1] * px[1] : 0));
    }
    const uint16_t last = (uint16_t)(S[xofs[dw - 1]] << 8);
    for (; d < dw; d++)
        out[d] = last;
}

lk_code lk_resize_linear_u8(const lk_image *src, lk_image *dst, lk_error *err)
{
    if (!src || !dst || src->channels != 1 || dst->channels != 1 || src->width <= 0 ||
        src->height <= 0 || dst->width <= 0 || dst->height <= 0)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "resize needs two 1-channel images of positive size");
    const int sw = src->width, sh = src->height, dw = dst->width, dh = dst->height;
    if (sw == dw && sh == dh) {
        memcpy(dst->data, src->data, (size_t)sw * (size_t)sh);
        return LK_OK;
    }
    /* An exact halving goes to OpenCV's fast area path, whose 8-bit kernel
     * averages each 2x2 block as (sum + 2) >> 2. */
    const double scale_x = (double)sw / dw, scale_y = (double)sh / dh;
    if (fabs(scale_x - 2.0) < DBL_EPSILON && fabs(scale_y - 2.0) < DBL_EPSILON) {
        for (int y = 0; y < dh; y++) {
            const uint8_t *a = src->data + (size_t)(2 * y) * (size_t)sw, *b = a + sw;
            uint8_t *d = dst->data + (size_t)y * (size_t)dw;
            for (int x = 0; x < dw; x++)
                d[x] = (uint8_t)((a[2 * x] + a[2 * x + 1] + b[2 * x] + b[2 * x + 1] + 2) >> 2);
        }
        return LK_OK;
    }
    int *xofs = malloc(sizeof(int) * (size_t)(dw + dh));
    uint16_t *wts = malloc(sizeof(uint16_t) * 2 * (size_t)(dw + dh));
    uint16_t *rows = malloc(sizeof(uint16_t) * 2 * (size_t)dw);
    if (!xofs || !wts || !rows) {
        free(xofs);
        free(wts);
        free(rows);
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory resizing to %dx%d", dw, dh);
    }
    int *yofs = xofs + dw;
    uint16_t *xw = wts, *yw = wts + 2 * (size_t)dw;
    const lin_coeffs xr = linear_coeffs(sw, dw, xofs, xw);
    const lin_coeffs yr = linear_coeffs(sh, dh, yofs, yw);
    uint16_t *h0 = rows, *h1 = rows + dw;
    int have0 = -1, have1 = -1;
    for (int dy = 0; dy < dh; dy++) {
        uint8_t *D = dst->data + (size_t)dy * (size_t)dw;
        if (dy < yr.lo || dy >= yr.hi) {
            /* Above the first / below the last source row: that row alone,
             * rounded from 8.8 fixed point (vlineSet). */
            const int r = dy < yr.lo ? 0 : sh - 1;
            hline(src->data + (size_t)r * (size_t)sw, sw, xofs, xw, xr, dw, h0);
            have0 = r;
            for (int x = 0; x < dw; x++)
                D[x] = sat_u8((h0[x] + 128) >> 8);
            continue;
        }
        const int r0 = yofs[dy], r1 = r0 + 1 < sh ? r0 + 1 : sh - 1;
        /* Consecutive output rows share source rows: reuse them. */
        if (have0 != r0) {
            if (have1 == r0) {
                uint16_t *t = h0;
                h0 = h1;
                h1 = t;
                have0 = r0;
                have1 = -1;
            } else {
                hline(src->data + (size_t)r0 * (size_t)sw, sw, xofs, xw, xr, dw, h0);
                have0 = r0;
            }
        }
        if (have1 != r1) {
            hline(src->data + (size_t)r1 * (size_t)sw, sw, xofs, xw, xr, dw, h1);
            have1 = r1;
        }
        const uint32_t b0 = yw[2 * dy], b1 = yw[2 * dy + 1];
        /* 8.8 x 0.8 -> 16 fractional bits, rounded half up (ufixedpoint32
         * to uint8 conversion). */
        for (int x = 0; x < dw; x++)
            D[x] = sat_u8((int)((h0[x] * b0 + h1[x] * b1 + 32768u) >> 16));
    }
    free(xofs);
    free(wts);
    free(rows);
    return LK_OK;
}

lk_code lk_resize_area_u8(const lk_image *src, lk_image *dst, lk_error *err)
{
    if (!src || !dst || src->channels != 1 || dst->channels != 1 || dst->width <= 0 ||
        dst->height <= 0 || dst->width > src->width || dst->height > src->height)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "area resize needs 1-channel images, the output no larger");
    const int sw = src->width, sh = src->height, dw = dst->width, dh = dst->height;
    /* Each output pixel is the mean of the input area it covers, partial
     * pixels weighted by their covered fraction (box-filter resampling). */
    const double fx = (double)sw / dw, fy = (double)sh / dh;
    float *hbuf = malloc(sizeof(float) * (size_t)dw * (size_t)sh);
    if (!hbuf)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory shrinking a %dx%d image", sw, sh);
    for (int y = 0; y < sh; y++) {
        const uint8_t *s = src->data + (size_t)y * (size_t)sw;
        float *o = hbuf + (size_t)y * (size_t)dw;
        for (int dx = 0; dx < dw; dx++) {
            double a = dx * fx, b = a + fx;
            int i0 = (int)a, i1 = (int)ceil(b);
            if (i1 > sw)
                i1 = sw;
            double acc = 0;
            for (int i = i0; i < i1; i++) {
                double lo = i < a ? a : i, hi = i + 1 > b ? b : i + 1;
                acc += (hi - lo) * s[i];
            }
            o[dx] = (float)(acc / fx);
        }
    }
    for (int dy = 0; dy < dh; dy++) {
        double a = dy * fy, b = a + fy;
        int j0 = (int)a, j1 = (int)ceil(b);
        if (j1 > sh)
            j1 = sh;
        uint8_t *d = dst->data + (size_t)dy * (size_t)dw;
        for (int dx = 0; dx < dw; dx++) {
            double acc = 0;
            for (int j = j0; j < j1; j++) {
                double lo = j < a ? a : j, hi = j + 1 > b ? b : j + 1;
                acc += (hi - lo) * hbuf[(size_t)j * (size_t)dw + (size_t)dx];
            }
            d[dx] = sat_u8((int)lrint(acc / fy));
        }
    }
    free(hbuf);
    return LK_OK;
}
