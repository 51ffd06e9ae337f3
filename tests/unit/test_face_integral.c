/* Integral images against their definitions, computed by brute force:
 *   sum(X,Y)    = sum of I(x,y) for x < X, y < Y        (Viola & Jones 2001, eq. 1)
 *   sqsum(X,Y)  = same over I(x,y)^2
 *   tilted(X,Y) = sum of I(x,y) for y < Y, |x-X+1| <= Y-1-y
 *                 (45-degree table of Lienhart & Maydt 2002, OpenCV's layout)
 * and the four-corner identity: the sum over any rectangle equals
 * sum(x+w,y+h) - sum(x+w,y) - sum(x,y+h) + sum(x,y) (Viola & Jones 2001). */
#include "likeness/face.h"
#include "lk_test.h"

#include <stdint.h>
#include <stdlib.h>

/* xorshift32 (Marsaglia 2003): a reproducible pixel source. */
static uint32_t rnd(uint32_t *s)
{
    *s ^= *s << 13;
    *s ^= *s >> 17;
    *s ^= *s << 5;
    return *s;
}

static void check_image(int w, int h, int stride, uint32_t seed, int all_white)
{
    uint8_t *img = malloc((size_t)stride * (size_t)h);
    const int ts = w + 3; /* a table stride wider than needed */
    int32_t *sum = malloc(sizeof(int32_t) * (size_t)ts * (size_t)(h + 1));
    uint32_t *sq = malloc(sizeof(uint32_t) * (size_t)ts * (size_t)(h + 1));
    int32_t *tl = malloc(sizeof(int32_t) * (size_t)ts * (size_t)(h + 1));
    if (!img || !sum || !sq || !tl) {
        CHECK(0, "out of memory");
        return;
    }
    for (int i = 0; i < stride * h; i++)
        img[i] = all_white ? 255 : (uint8_t)rnd(&seed);
    lk_error e = {0};
    CHECK(lk_integral(img, w, h, stride, sum, sq, tl, ts, &e) == LK_OK, "%s", e.message);
    int bad_sum = 0, bad_sq = 0, bad_t = 0;
    for (int Y = 0; Y <= h; Y++)
        for (int X = 0; X <= w; X++) {
            uint64_t s = 0, q = 0, t = 0;
            for (int y = 0; y < h; y++)
                for (int x = 0; x < w; x++) {
                    const uint32_t v = img[y * stride + x];
                    if (x < X && y < Y) {
                        s += v;
                        q += (uint64_t)v * v;
                    }
                    if (y < Y && abs(x - X + 1) <= Y - 1 - y)
                        t += v;
                }
            const size_t k = (size_t)Y * (size_t)ts + (size_t)X;
            bad_sum += (uint32_t)sum[k] != (uint32_t)s;
            bad_sq += sq[k] != (uint32_t)q;
            bad_t += (uint32_t)tl[k] != (uint32_t)t;
        }
    CHECK(bad_sum == 0, "%dx%d: %d sum entries differ from the definition", w, h, bad_sum);
    CHECK(bad_sq == 0, "%dx%d: %d sqsum entries differ from the definition", w, h, bad_sq);
    CHECK(bad_t == 0, "%dx%d: %d tilted entries differ from the definition", w, h, bad_t);

    /* Four-corner identity on every rectangle of a sample. */
    int bad_rect = 0;
    for (int n = 0; n < 500; n++) {
        const int x = (int)(rnd(&seed) % (uint32_t)w), y = (int)(rnd(&seed) % (uint32_t)h);
        const int rw = (int)(rnd(&seed) % (uint32_t)(w - x + 1));
        const int rh = (int)(rnd(&seed) % (uint32_t)(h - y + 1));
        uint32_t brute = 0;
        for (int yy = y; yy < y + rh; yy++)
            for (int xx = x; xx < x + rw; xx++)
                brute += img[yy * stride + xx];
#define S(X, Y) ((uint32_t)sum[(size_t)(Y) * (size_t)ts + (size_t)(X)])
        const uint32_t fast = S(x + rw, y + rh) - S(x + rw, y) - S(x, y + rh) + S(x, y);
#undef S
        bad_rect += fast != brute;
    }
    CHECK(bad_rect == 0, "%dx%d: %d rectangle sums differ", w, h, bad_rect);
    free(img);
    free(sum);
    free(sq);
    free(tl);
}

int main(void)
{
    check_image(1, 1, 1, 1u, 0);
    check_image(7, 3, 9, 2u, 0);
    check_image(3, 11, 3, 3u, 0);
    check_image(24, 20, 30, 4u, 0);
    check_image(13, 13, 13, 5u, 1); /* saturated: the largest values */

    lk_error e = {0};
    int32_t t[4];
    uint8_t px[1] = {0};
    CHECK(lk_integral(px, 1, 1, 1, t, NULL, NULL, 1, &e) == LK_ERR_INVALID_ARGUMENT,
          "a table stride below width+1 must be refused");
    return lk_test_done();
}
