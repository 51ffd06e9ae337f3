/* Image buffers, file reading, grayscale conversion. Decoding lives in
 * decode.c, PNG writing in encode.c. */
#include "likeness/image.h"

#include <errno.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

lk_image *lk_image_new(int width, int height, int channels, lk_error *err)
{
    if (width <= 0 || height <= 0 || (channels != 1 && channels != 3)) {
        lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "invalid image shape %dx%dx%d", width, height,
                     channels);
        return NULL;
    }
    if ((uint64_t)width * (uint64_t)height > LK_IMAGE_MAX_PIXELS) {
        lk_error_set(err, LK_ERR_IMAGE_TOO_LARGE,
                     "an image of %dx%d pixels is beyond what this library handles "
                     "(%llu pixels at most): scale it down",
                     width, height, (unsigned long long)LK_IMAGE_MAX_PIXELS);
        return NULL;
    }
    lk_image *img = calloc(1, sizeof *img);
    size_t n = (size_t)width * (size_t)height * (size_t)channels;
    if (img)
        img->data = calloc(n, 1);
    if (!img || !img->data) {
        free(img);
        lk_error_set(err, LK_ERR_NOMEM, "out of memory for a %dx%d image", width, height);
        return NULL;
    }
    img->width = width;
    img->height = height;
    img->channels = channels;
    return img;
}

void lk_image_free(lk_image *img)
{
    if (img) {
        free(img->data);
        free(img);
    }
}

lk_image *lk_image_clone(const lk_image *img, lk_error *err)
{
    lk_image *c = lk_image_new(img->width, img->height, img->channels, err);
    if (c)
        memcpy(c->data, img->data, (size_t)img->width * img->height * img->channels);
    return c;
}

lk_code lk_read_file(const char *path, size_t max_bytes, uint8_t **bytes, size_t *len,
                     lk_error *err)
{
    if (!path || !bytes || !len)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_read_file: NULL argument");
    if (max_bytes == 0)
        max_bytes = (size_t)256 << 20;
    if (max_bytes > SIZE_MAX / 4) /* keeps max_bytes + 1 and cap * 2 from wrapping */
        max_bytes = SIZE_MAX / 4;
    *bytes = NULL;
    *len = 0;
    FILE *f = fopen(path, "rb");
    if (!f)
        return lk_error_set(err, LK_ERR_IO, "cannot open %s: %s", path, strerror(errno));
    /* One byte beyond max_bytes tells "exactly max_bytes" from "larger". */
    size_t cap = max_bytes < ((size_t)1 << 16) ? max_bytes + 1 : (size_t)1 << 16, n = 0;
    uint8_t *buf = malloc(cap);
    if (!buf) {
        fclose(f);
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory reading %s", path);
    }
    for (;;) {
        if (n == cap) {
            if (n > max_bytes) {
                free(buf);
                fclose(f);
                return lk_error_set(err, LK_ERR_IMAGE_TOO_LARGE,
                                    "%s is larger than %zu bytes: send a smaller file", path,
                                    max_bytes);
            }
            size_t ncap = cap * 2 > max_bytes + 1 ? max_bytes + 1 : cap * 2;
            uint8_t *nb = realloc(buf, ncap);
            if (!nb) {
                free(buf);
                fclose(f);
                return lk_error_set(err, LK_ERR_NOMEM, "out of memory reading %s", path);
            }
            buf = nb;
            cap = ncap;
        }
        size_t r = fread(buf + n, 1, cap - n, f);
        n += r;
        if (r == 0) {
            if (ferror(f)) {
                int e = errno;
                free(buf);
                fclose(f);
                return lk_error_set(err, LK_ERR_IO, "cannot read %s: %s", path, strerror(e));
            }
            break;
        }
    }
    fclose(f);
    if (n > max_bytes) {
        free(buf);
        return lk_error_set(err, LK_ERR_IMAGE_TOO_LARGE,
                            "%s is larger than %zu bytes: send a smaller file", path, max_bytes);
    }
    *bytes = buf;
    *len = n;
    return LK_OK;
}

lk_code lk_image_load(const char *path, const lk_decode_limits *limits, lk_image **out,
                      lk_error *err)
{
    uint8_t *bytes;
    size_t len;
    lk_code c = lk_read_file(path, 0, &bytes, &len, err);
    if (c != LK_OK)
        return c;
    c = lk_image_decode(bytes, len, limits, out, err);
    if (c != LK_OK && err) {
        /* Prefix the file name so a batch user knows which file failed. */
        char msg[LK_ERROR_MESSAGE_MAX];
        snprintf(msg, sizeof msg, "%s", err->message);
        lk_error_set(err, c, "%s: %s", path, msg);
    }
    free(bytes);
    return c;
}

lk_image *lk_image_to_gray(const lk_image *img, lk_luma luma, lk_error *err)
{
    lk_image *g = lk_image_new(img->width, img->height, 1, err);
    if (!g)
        return NULL;
    size_t n = (size_t)img->width * img->height;
    if (img->channels == 1) {
        memcpy(g->data, img->data, n);
        return g;
    }
    const uint8_t *s = img->data;
    if (luma == LK_LUMA_BT601) {
        /* OpenCV's cvtColor(RGB2GRAY) for 8-bit data: BT.601 weights
         * 0.299/0.587/0.114 in 15-bit fixed point (9798, 19235, 3735, which
         * sum to 2^15) rounded by adding 2^14 (OpenCV 4.x imgproc
         * color_rgb.simd.hpp, RGB2Gray<uchar>; values recalled from memory and
         * confirmed pixel for pixel against cv2 4.6 by
         * tests/ref/check_image_pillow.py). The 14-bit set (4899, 9617, 1868)
         * OpenCV uses for YCrCb gives different results for about 0.3% of
         * random colours. */
        for (size_t i = 0; i < n; i++, s += 3)
            g->data[i] =
                (uint8_t)((s[0] * 9798u + s[1] * 19235u + s[2] * 3735u + 16384u) >> 15);
    } else {
        /* ITU-R BT.709 weights as scikit-image's rgb2gray uses them, rounded
         * to the nearest level (rgb2gray itself returns floats: see
         * lk_image_gray_f64). */
        for (size_t i = 0; i < n; i++, s += 3) {
            double v = 0.2125 * s[0] + 0.7154 * s[1] + 0.0721 * s[2];
            g->data[i] = (uint8_t)(v + 0.5);
        }
    }
    return g;
}

void lk_image_gray_f64(const lk_image *img, lk_luma luma, double *out)
{
    size_t n = (size_t)img->width * img->height;
    const uint8_t *s = img->data;
    if (img->channels == 1) {
        for (size_t i = 0; i < n; i++)
            out[i] = s[i] / 255.0;
        return;
    }
    double wr = 0.299, wg = 0.587, wb = 0.114; /* ITU-R BT.601 */
    if (luma == LK_LUMA_BT709) {
        /* ITU-R BT.709 weights as scikit-image's rgb2gray uses them. */
        wr = 0.2125;
        wg = 0.7154;
        wb = 0.0721;
    }
    for (size_t i = 0; i < n; i++, s += 3)
        out[i] = wr * (s[0] / 255.0) + wg * (s[1] / 255.0) + wb * (s[2] / 255.0);
}
