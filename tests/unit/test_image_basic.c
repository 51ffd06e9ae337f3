/* C-side checks of the image API: buffer bounds, grayscale formulas on
 * values worked out by hand from the standards, file reading errors, and the
 * decoder's error codes on inputs whose class the formats' specifications
 * fix. Pixel accuracy against Pillow / OpenCV / scikit-image is checked by
 * tests/ref/check_image_pillow.py. */
#include "likeness/image.h"
#include "lk_test.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

static void test_new_bounds(void)
{
    lk_error err;
    const int bad[][3] = {{0, 1, 3}, {1, 0, 3}, {-5, 4, 1}, {4, -1, 1}, {2, 2, 0}, {2, 2, 2},
                          {2, 2, 4}};
    for (size_t i = 0; i < sizeof bad / sizeof bad[0]; i++) {
        lk_error_clear(&err);
        lk_image *img = lk_image_new(bad[i][0], bad[i][1], bad[i][2], &err);
        CHECK(img == NULL && err.code == LK_ERR_INVALID_ARGUMENT, "shape %dx%dx%d accepted",
              bad[i][0], bad[i][1], bad[i][2]);
        lk_image_free(img);
    }
    /* Over LK_IMAGE_MAX_PIXELS: refused before any allocation is tried. */
    lk_error_clear(&err);
    lk_image *huge = lk_image_new(70000, 70000, 3, &err);
    CHECK(huge == NULL && err.code == LK_ERR_IMAGE_TOO_LARGE, "70000x70000 gave code %d",
          (int)err.code);
    lk_image *img = lk_image_new(3, 2, 3, &err);
    CHECK(img && img->width == 3 && img->height == 2 && img->channels == 3, "3x2x3 not made");
    if (img) {
        int zero = 1;
        for (int i = 0; i < 18; i++)
            zero &= img->data[i] == 0;
        CHECK(zero, "lk_image_new must zero-fill");
        img->data[17] = 7;
        lk_image *c = lk_image_clone(img, &err);
        CHECK(c && c != img && c->data != img->data && memcmp(c->data, img->data, 18) == 0,
              "clone differs");
        lk_image_free(c);
    }
    lk_image_free(img);
    lk_image_free(NULL);
}

/* err is optional everywhere. */
static void test_new_null_err(void)
{
    lk_image *img = lk_image_new(1, 1, 3, NULL);
    CHECK(img != NULL, "1x1 with NULL err failed");
    lk_image_free(img);
    CHECK(lk_image_new(0, 1, 3, NULL) == NULL, "0x1 with NULL err accepted");
}

static lk_image *one_row(const uint8_t *rgb, int n)
{
    lk_image *img = lk_image_new(n, 1, 3, NULL);
    if (img)
        memcpy(img->data, rgb, (size_t)n * 3);
    return img;
}

static void test_gray(void)
{
    /* ITU-R BT.601 luma Y = 0.299 R + 0.587 G + 0.114 B, rounded to nearest,
     * worked by hand: white 255; red 76.245 -> 76; green 149.685 -> 150;
     * blue 29.07 -> 29; (100,150,200) 29.9+88.05+22.8 = 140.75 -> 141;
     * (10,20,30) 2.99+11.74+3.42 = 18.15 -> 18. None of these lies near a
     * rounding boundary, so any faithful fixed-point form gives them. */
    const uint8_t rgb[] = {255, 255, 255, 255, 0, 0, 0, 255, 0, 0, 0, 255, 100, 150, 200, 10, 20, 30};
    const uint8_t want601[] = {255, 76, 150, 29, 141, 18};
    /* ITU-R BT.709 (scikit-image weights 0.2125, 0.7154, 0.0721): white 255;
     * red 54.1875 -> 54; green 182.427 -> 182; blue 18.3855 -> 18;
     * (100,150,200) 21.25+107.31+14.42 = 142.98 -> 143; (10,20,30)
     * 2.125+14.308+2.163 = 18.596 -> 19. */
    const uint8_t want709[] = {255, 54, 182, 18, 143, 19};
    lk_image *img = one_row(rgb, 6);
    lk_error err;
    lk_image *g = img ? lk_image_to_gray(img, LK_LUMA_BT601, &err) : NULL;
    CHECK(g && g->channels == 1 && g->width == 6, "BT.601 gray not made");
    for (int i = 0; g && i < 6; i++)
        CHECK(g->data[i] == want601[i], "BT.601 pixel %d: %d, expected %d", i, g->data[i],
              want601[i]);
    lk_image_free(g);
    g = img ? lk_image_to_gray(img, LK_LUMA_BT709, &err) : NULL;
    for (int i = 0; g && i < 6; i++)
        CHECK(g->data[i] == want709[i], "BT.709 pixel %d: %d, expected %d", i, g->data[i],
              want709[i]);
    lk_image_free(g);
    double f[6];
    if (img) {
        lk_image_gray_f64(img, LK_LUMA_BT709, f);
        CHECK(fabs(f[0] - 1.0) < 1e-15, "BT.709 white %.17g", f[0]);
        CHECK(fabs(f[1] - 0.2125) < 1e-15, "BT.709 red %.17g", f[1]);
        CHECK(fabs(f[2] - 0.7154) < 1e-15, "BT.709 green %.17g", f[2]);
        CHECK(fabs(f[3] - 0.0721) < 1e-15, "BT.709 blue %.17g", f[3]);
        lk_image_gray_f64(img, LK_LUMA_BT601, f);
        CHECK(fabs(f[1] - 0.299) < 1e-15 && fabs(f[2] - 0.587) < 1e-15 &&
                  fabs(f[3] - 0.114) < 1e-15,
              "BT.601 primaries %.17g %.17g %.17g", f[1], f[2], f[3]);
    }
    lk_image_free(img);
    /* Both weight sets sum to 1, so every gray level maps to itself. */
    uint8_t ramp[256 * 3];
    for (int v = 0; v < 256; v++)
        ramp[3 * v] = ramp[3 * v + 1] = ramp[3 * v + 2] = (uint8_t)v;
    img = one_row(ramp, 256);
    for (int l = 0; img && l < 2; l++) {
        g = lk_image_to_gray(img, l ? LK_LUMA_BT709 : LK_LUMA_BT601, &err);
        int same = g != NULL;
        for (int v = 0; g && v < 256; v++)
            same &= g->data[v] == v;
        CHECK(same, "gray ramp not preserved (luma %d)", l);
        lk_image_free(g);
    }
    lk_image_free(img);
}

static void test_read_file(void)
{
    lk_error err;
    uint8_t *bytes = NULL;
    size_t len = 0;
    lk_code c = lk_read_file("/nonexistent/likeness-test-file", 0, &bytes, &len, &err);
    CHECK(c == LK_ERR_IO && err.code == LK_ERR_IO && bytes == NULL, "missing file gave %d", (int)c);
    CHECK(strstr(err.message, "/nonexistent/likeness-test-file") != NULL, "message lacks path: %s",
          err.message);
    c = lk_read_file("/", 0, &bytes, &len, &err); /* a directory: read fails with EISDIR */
    CHECK(c == LK_ERR_IO && bytes == NULL, "directory gave %d", (int)c);

    char path[] = "/tmp/lk_test_image_XXXXXX";
    int fd = mkstemp(path);
    if (fd < 0)
        LK_SKIP("cannot create a temporary file in /tmp");
    enum { N = 100000 };
    uint8_t *data = malloc(N);
    if (!data)
        LK_SKIP("out of memory");
    for (int i = 0; i < N; i++)
        data[i] = (uint8_t)(i * 7 + 3);
    CHECK(write(fd, data, N) == N, "short write");
    close(fd);
    c = lk_read_file(path, N, &bytes, &len, &err);
    CHECK(c == LK_OK && len == N && bytes && memcmp(bytes, data, N) == 0,
          "exactly max_bytes must be read whole (code %d, len %zu)", (int)c, len);
    free(bytes);
    c = lk_read_file(path, 0, &bytes, &len, &err);
    CHECK(c == LK_OK && len == N, "default limit: code %d len %zu", (int)c, len);
    free(bytes);
    c = lk_read_file(path, N - 1, &bytes, &len, &err);
    CHECK(c == LK_ERR_IMAGE_TOO_LARGE && bytes == NULL, "N-1 limit gave %d", (int)c);
    c = lk_read_file(path, 10, &bytes, &len, &err);
    CHECK(c == LK_ERR_IMAGE_TOO_LARGE && bytes == NULL, "10-byte limit gave %d", (int)c);
    /* Not an image: lk_image_load reports it with the path prefixed. */
    lk_image *img = NULL;
    c = lk_image_load(path, NULL, &img, &err);
    CHECK(c == LK_ERR_IMAGE_UNSUPPORTED && img == NULL, "garbage file gave %d", (int)c);
    CHECK(strncmp(err.message, path, strlen(path)) == 0, "load message lacks path: %s",
          err.message);
    c = lk_image_load("/nonexistent/x.jpg", NULL, &img, &err);
    CHECK(c == LK_ERR_IO && img == NULL, "missing image gave %d", (int)c);
    /* Empty file. */
    FILE *f = fopen(path, "wb");
    if (f)
        fclose(f);
    c = lk_read_file(path, 0, &bytes, &len, &err);
    CHECK(c == LK_OK && len == 0, "empty file gave %d len %zu", (int)c, len);
    free(bytes);
    unlink(path);
    free(data);
}

static void test_decode_classes(void)
{
    lk_error err;
    lk_image *img = (lk_image *)&err; /* must be reset to NULL on error */
    CHECK(lk_image_decode(NULL, 0, NULL, &img, &err) == LK_ERR_IMAGE_CORRUPT && img == NULL,
          "empty input");
    CHECK(lk_image_decode((const uint8_t *)"x", 1, NULL, NULL, &err) == LK_ERR_INVALID_ARGUMENT,
          "NULL out");
    /* Magic numbers: JPEG SOI FFD8 (ITU-T T.81 B.2.1), PNG signature (PNG
     * spec 5.2), GIF "GIF89a" (GIF89a spec section 17). */
    const uint8_t soi_only[] = {0xFF, 0xD8};
    CHECK(lk_image_decode(soi_only, 2, NULL, &img, &err) == LK_ERR_IMAGE_CORRUPT, "SOI only: %s",
          err.message);
    const uint8_t png_sig[] = {0x89, 'P', 'N', 'G', '\r', '\n', 0x1a, '\n'};
    CHECK(lk_image_decode(png_sig, 8, NULL, &img, &err) == LK_ERR_IMAGE_CORRUPT,
          "PNG signature only: %s", err.message);
    CHECK(lk_image_decode(png_sig, 5, NULL, &img, &err) == LK_ERR_IMAGE_CORRUPT,
          "PNG signature cut: %s", err.message);
    const uint8_t gif[] = "GIF89a\x01\x00\x01\x00\x00\x00\x00";
    CHECK(lk_image_decode(gif, sizeof gif - 1, NULL, &img, &err) == LK_ERR_IMAGE_UNSUPPORTED,
          "GIF: %s", err.message);
    CHECK(strstr(err.message, "GIF") != NULL, "GIF message should name the format: %s",
          err.message);
    CHECK(img == NULL, "out must stay NULL on error");
}

/* lk_image_save_png then lk_image_decode: PNG is lossless (PNG spec 1), so
 * the pixels must come back unchanged, gray replicated into RGB. */
static void test_png_roundtrip(void)
{
    char path[] = "/tmp/lk_test_png_XXXXXX";
    int fd = mkstemp(path);
    if (fd < 0)
        LK_SKIP("cannot create a temporary file in /tmp");
    close(fd);
    lk_error err;
    for (int ch = 1; ch <= 3; ch += 2) {
        lk_image *img = lk_image_new(5, 3, ch, &err);
        if (!img)
            continue;
        for (int i = 0; i < 5 * 3 * ch; i++)
            img->data[i] = (uint8_t)(i * 37 + 11);
        lk_image *back = NULL;
        CHECK(lk_image_save_png(img, path, &err) == LK_OK, "save: %s", err.message);
        CHECK(lk_image_load(path, NULL, &back, &err) == LK_OK, "load: %s", err.message);
        int same = back && back->width == 5 && back->height == 3 && back->channels == 3;
        for (int p = 0; same && p < 15; p++)
            for (int k = 0; k < 3; k++)
                same &= back->data[3 * p + k] == img->data[ch == 3 ? 3 * p + k : p];
        CHECK(same, "PNG round trip changed pixels (channels %d)", ch);
        lk_image_free(back);
        lk_image_free(img);
    }
    unlink(path);
}

int main(void)
{
    test_new_bounds();
    test_new_null_err();
    test_gray();
    test_read_file();
    test_decode_classes();
    test_png_roundtrip();
    return lk_test_done();
}
