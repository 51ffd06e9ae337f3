/* Format sniffing and the JPEG / PNG decoders.
 * TODO(image module owner): EXIF orientation (libexif) and header-only
 * limits for PNG are completed in the image module work. */
#include "likeness/image.h"

#include <png.h>
#include <setjmp.h>
#include <stdlib.h>
#include <string.h>
#include <turbojpeg.h>

static lk_code check_limits(int w, int h, const lk_decode_limits *limits, lk_error *err)
{
    uint64_t max_pixels = limits && limits->max_pixels ? limits->max_pixels : LK_DEFAULT_MAX_PIXELS;
    int max_side = limits && limits->max_side ? limits->max_side : LK_DEFAULT_MAX_SIDE;
    if (w <= 0 || h <= 0)
        return lk_error_set(err, LK_ERR_IMAGE_CORRUPT, "image header declares %dx%d pixels", w, h);
    if (w > max_side || h > max_side)
        return lk_error_set(err, LK_ERR_IMAGE_TOO_LARGE,
                            "image is %dx%d; the longest side allowed is %d pixels: scale it down",
                            w, h, max_side);
    if ((uint64_t)w * (uint64_t)h > max_pixels)
        return lk_error_set(err, LK_ERR_IMAGE_TOO_LARGE,
                            "image is %dx%d (%.1f megapixels); the budget is %.1f megapixels: "
                            "scale it down",
                            w, h, (double)w * h / 1e6, (double)max_pixels / 1e6);
    return LK_OK;
}

static lk_code decode_jpeg(const uint8_t *bytes, size_t len, const lk_decode_limits *limits,
                           lk_image **out, lk_error *err)
{
    tjhandle tj = tjInitDecompress();
    if (!tj)
        return lk_error_set(err, LK_ERR_NOMEM, "cannot start the JPEG decoder");
    int w, h, subsamp, colorspace;
    if (tjDecompressHeader3(tj, bytes, (unsigned long)len, &w, &h, &subsamp, &colorspace) != 0) {
        lk_error_set(err, LK_ERR_IMAGE_CORRUPT, "JPEG header is damaged: %s", tjGetErrorStr2(tj));
        tjDestroy(tj);
        return LK_ERR_IMAGE_CORRUPT;
    }
    lk_code c = check_limits(w, h, limits, err);
    if (c != LK_OK) {
        tjDestroy(tj);
        return c;
    }
    lk_image *img = lk_image_new(w, h, 3, err);
    if (!img) {
        tjDestroy(tj);
        return LK_ERR_NOMEM;
    }
    if (tjDecompress2(tj, bytes, (unsigned long)len, img->data, w, 0, h, TJPF_RGB,
                      TJFLAG_ACCURATEDCT) != 0) {
        /* Warnings (e.g. a few missing bytes at the end) still give pixels, but
         * a truncated photo must not be compared as if it were whole. */
        lk_error_set(err, LK_ERR_IMAGE_CORRUPT, "JPEG data is truncated or damaged: %s",
                     tjGetErrorStr2(tj));
        lk_image_free(img);
        tjDestroy(tj);
        return LK_ERR_IMAGE_CORRUPT;
    }
    tjDestroy(tj);
    *out = img;
    return LK_OK;
}

typedef struct png_src {
    const uint8_t *p;
    size_t len, pos;
} png_src;

static void png_read_mem(png_structp png, png_bytep dst, png_size_t n)
{
    png_src *s = png_get_io_ptr(png);
    if (n > s->len - s->pos)
        png_error(png, "truncated PNG data");
    memcpy(dst, s->p + s->pos, n);
    s->pos += n;
}

static void png_on_error(png_structp png, png_const_charp msg)
{
    lk_error *err = png_get_error_ptr(png);
    lk_error_set(err, LK_ERR_IMAGE_CORRUPT, "PNG data is truncated or damaged: %s", msg);
    png_longjmp(png, 1);
}

static void png_on_warning(png_structp png, png_const_charp msg)
{
    (void)png;
    (void)msg;
}

static lk_code decode_png(const uint8_t *bytes, size_t len, const lk_decode_limits *limits,
                          lk_image **out, lk_error *err)
{
    lk_error local;
    lk_error *e = err ? err : &local;
    png_structp png = png_create_read_struct(PNG_LIBPNG_VER_STRING, e, png_on_error, png_on_warning);
    if (!png)
        return lk_error_set(err, LK_ERR_NOMEM, "cannot start the PNG decoder");
    png_infop info = png_create_info_struct(png);
    lk_image *volatile img = NULL;
    png_bytep *volatile rows = NULL;
    volatile lk_code result = LK_ERR_IMAGE_CORRUPT;
    png_src src = {bytes, len, 0};
    if (!info) {
        png_destroy_read_struct(&png, NULL, NULL);
        return lk_error_set(err, LK_ERR_NOMEM, "cannot start the PNG decoder");
    }
    if (setjmp(png_jmpbuf(png))) {
        goto done;
    }
    png_set_read_fn(png, &src, png_read_mem);
    png_read_info(png, info);
    png_uint_32 w = png_get_image_width(png, info), h = png_get_image_height(png, info);
    if (w > (png_uint_32)INT32_MAX || h > (png_uint_32)INT32_MAX) {
        result = lk_error_set(err, LK_ERR_IMAGE_TOO_LARGE, "PNG declares %ux%u pixels", w, h);
        goto done;
    }
    if ((result = check_limits((int)w, (int)h, limits, err)) != LK_OK)
        goto done;
    result = LK_ERR_IMAGE_CORRUPT;
    /* Normalise every PNG flavour to 8-bit RGB: palette expanded, 16-bit
     * reduced, gray replicated, alpha dropped (photos have no meaningful alpha
     * for faces; composite-over-black is what dropping means). */
    png_set_expand(png);
    png_set_strip_16(png);
    png_set_strip_alpha(png);
    png_set_gray_to_rgb(png);
    png_set_interlace_handling(png);
    png_read_update_info(png, info);
    img = lk_image_new((int)w, (int)h, 3, err);
    if (!img) {
        result = LK_ERR_NOMEM;
        goto done;
    }
    rows = malloc(sizeof(png_bytep) * h);
    if (!rows) {
        result = lk_error_set(err, LK_ERR_NOMEM, "out of memory decoding PNG");
        goto done;
    }
    for (png_uint_32 y = 0; y < h; y++)
        rows[y] = img->data + (size_t)y * w * 3;
    png_read_image(png, rows);
    png_read_end(png, NULL);
    *out = img;
    img = NULL;
    result = LK_OK;
done:
    free(rows);
    lk_image_free(img);
    png_destroy_read_struct(&png, &info, NULL);
    return result;
}

lk_code lk_image_decode(const uint8_t *bytes, size_t len, const lk_decode_limits *limits,
                        lk_image **out, lk_error *err)
{
    *out = NULL;
    if (!bytes || len == 0)
        return lk_error_set(err, LK_ERR_IMAGE_CORRUPT, "the image is empty (0 bytes)");
    static const uint8_t png_magic[8] = {0x89, 'P', 'N', 'G', '\r', '\n', 0x1a, '\n'};
    if (len >= 3 && bytes[0] == 0xFF && bytes[1] == 0xD8 && bytes[2] == 0xFF)
        return decode_jpeg(bytes, len, limits, out, err);
    if (len >= 8 && memcmp(bytes, png_magic, 8) == 0)
        return decode_png(bytes, len, limits, out, err);
    return lk_error_set(err, LK_ERR_IMAGE_UNSUPPORTED,
                        "not a JPEG or PNG image (unrecognised first bytes); send a JPEG or PNG");
}
