/* likeness image input: JPEG (libjpeg-turbo TurboJPEG API) and PNG (libpng)
 * decoding with EXIF orientation applied, a pixel budget checked from the
 * header before any pixel is decoded, and grayscale conversion.
 *
 * lk_image is a plain pixel buffer (like VLFeat's arrays): 8-bit samples,
 * row-major, interleaved, stride = width * channels, channels 1 (gray) or
 * 3 (RGB). Create with lk_image_new, release with lk_image_free. */
#ifndef LIKENESS_IMAGE_H
#define LIKENESS_IMAGE_H

#include <stddef.h>
#include <stdint.h>

#include "likeness/error.h"

#ifdef __cplusplus
extern "C" {
#endif

typedef struct lk_image {
    int width;
    int height;
    int channels; /* 1 or 3 */
    uint8_t *data;
} lk_image;

typedef struct lk_decode_limits {
    uint64_t max_pixels; /* width*height budget; 0 means the default */
    int max_side;        /* longest allowed side; 0 means the default */
} lk_decode_limits;

#define LK_DEFAULT_MAX_PIXELS 40000000ULL /* 40 megapixels */
#define LK_DEFAULT_MAX_SIDE 16384
/* lk_image_new refuses more pixels than this whatever the limits say (keeps
 * every size computation far from overflow and allocator limits). */
#define LK_IMAGE_MAX_PIXELS (1ULL << 32)

/* Returns a zero-filled image, or NULL with err set: LK_ERR_INVALID_ARGUMENT
 * for a side <= 0 or channels other than 1 or 3, LK_ERR_IMAGE_TOO_LARGE over
 * LK_IMAGE_MAX_PIXELS, LK_ERR_NOMEM. */
lk_image *lk_image_new(int width, int height, int channels, lk_error *err);
void lk_image_free(lk_image *img);
lk_image *lk_image_clone(const lk_image *img, lk_error *err);

/* Decodes JPEG or PNG bytes (sniffed by magic number) into 8-bit RGB, with the
 * EXIF orientation applied so the result is upright (as Pillow's
 * ImageOps.exif_transpose). limits may be NULL for the defaults; they are
 * checked against the header before any pixel is decoded.
 * JPEG: baseline and progressive; gray, YCbCr, RGB, CMYK and YCCK
 * (4-component files are read as Adobe-inverted CMYK and converted as Pillow
 * does). PNG: every colour type and bit depth, interlaced or not; alpha and
 * tRNS are dropped (not composited), 16-bit samples keep their high byte.
 * Errors: LK_ERR_IMAGE_UNSUPPORTED (not JPEG/PNG, or a 12-bit, lossless or
 * hierarchical JPEG), LK_ERR_IMAGE_CORRUPT (truncated or damaged; a libjpeg
 * warning counts as damage), LK_ERR_IMAGE_TOO_LARGE, LK_ERR_NOMEM,
 * LK_ERR_INVALID_ARGUMENT (out is NULL). *out is NULL on error. */
lk_code lk_image_decode(const uint8_t *bytes, size_t len, const lk_decode_limits *limits,
                        lk_image **out, lk_error *err);

/* Reads a whole file (at most max_bytes; 0 = 256 MiB) into a malloc'd buffer
 * the caller frees. Errors: LK_ERR_IO (cannot open or read),
 * LK_ERR_IMAGE_TOO_LARGE (more than max_bytes), LK_ERR_NOMEM. */
lk_code lk_read_file(const char *path, size_t max_bytes, uint8_t **bytes, size_t *len,
                     lk_error *err);

/* lk_read_file + lk_image_decode. */
lk_code lk_image_load(const char *path, const lk_decode_limits *limits, lk_image **out,
                      lk_error *err);

/* Luma weights for grayscale conversion. */
typedef enum lk_luma {
    LK_LUMA_BT601, /* ITU-R BT.601: 0.299 R + 0.587 G + 0.114 B (what JPEG/JFIF and OpenCV use) */
    LK_LUMA_BT709  /* ITU-R BT.709: 0.2125 R + 0.7154 G + 0.0721 B (scikit-image's rgb2gray) */
} lk_luma;

/* 8-bit grayscale copy. BT.601 rounds exactly as OpenCV's cvtColor(RGB2GRAY)
 * does (15-bit fixed point), so detection sees the same pixels OpenCV would. */
lk_image *lk_image_to_gray(const lk_image *img, lk_luma luma, lk_error *err);

/* Grayscale as doubles in [0,1] into out[width*height] (caller-allocated);
 * BT.709 here reproduces skimage.color.rgb2gray on 8-bit input. */
void lk_image_gray_f64(const lk_image *img, lk_luma luma, double *out);

/* Writes an 8-bit gray or RGB image as PNG (for overlays and debugging). */
lk_code lk_image_save_png(const lk_image *img, const char *path, lk_error *err);

#ifdef __cplusplus
}
#endif
#endif
