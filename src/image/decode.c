/* Format sniffing, the JPEG (TurboJPEG) and PNG (libpng) decoders, and EXIF
 * orientation (libexif).
 *
 * Policy, shared by both formats:
 * - The size limits are checked against the header before any pixel buffer
 *   is allocated: for JPEG the frame header as TurboJPEG reads it, for PNG the
 *   IHDR chunk read here by hand (with its CRC checked) before libpng starts.
 * - Damaged or truncated data is an error (LK_ERR_IMAGE_CORRUPT), never a
 *   partly grey picture: a comparison made on half an image would give a
 *   score that looks trustworthy and is not. For JPEG this means libjpeg
 *   *warnings* are errors too (TJFLAG_STOPONWARNING): libjpeg reports a
 *   premature end of data (JWRN_JPEG_EOF) and bad entropy-coded data
 *   (JWRN_HIT_MARKER, JWRN_MUST_RESYNC, ...) as warnings and then fills the
 *   rest of the image with grey. The price is that a few files with merely
 *   extraneous bytes between segments are refused as well; re-saving them
 *   with any editor fixes that.
 * - The output is always 8-bit RGB, upright per the EXIF Orientation tag
 *   (0x0112, EXIF 2.32 / TIFF 6.0), transformed as Pillow's
 *   ImageOps.exif_transpose does.
 * - PNG alpha is dropped, not composited: the stored colour samples are kept
 *   as they are, as Pillow's convert('RGB') and OpenCV's imread(IMREAD_COLOR)
 *   do. 16-bit samples keep their high byte (libpng png_set_strip_16, as
 *   Pillow's "RGB;16B" unpacker and OpenCV do). No gamma or ICC colour
 *   management is applied (neither library does by default). */
#include "likeness/image.h"

#include <libexif/exif-data.h>
#include <png.h>
#include <setjmp.h>
#include <stdlib.h>
#include <string.h>
#include <turbojpeg.h>
#include <zlib.h>

/* Ancillary PNG chunks and EXIF blocks larger than this are refused. A JPEG
 * APP1 segment holds at most 65,533 bytes (ITU-T T.81 B.1.1.4: 16-bit segment
 * length), so 1 MiB is generous for orientation metadata; libpng's own
 * default is 8,000,000 (pnglibconf.h PNG_USER_CHUNK_MALLOC_MAX). */
#define LK_PNG_CHUNK_MALLOC_MAX (1u << 20)
/* At most this many cached ancillary chunks (sPLT, text, unknown); libpng's
 * default is 1000 (pnglibconf.h PNG_USER_CHUNK_CACHE_MAX). Common practice:
 * a photo needs none of them. */
#define LK_PNG_CHUNK_CACHE_MAX 64

static lk_code check_limits(uint64_t w, uint64_t h, const lk_decode_limits *limits,
                            const char *fmt, lk_error *err)
{
    uint64_t max_pixels = limits && limits->max_pixels ? limits->max_pixels : LK_DEFAULT_MAX_PIXELS;
    uint64_t max_side =
        limits && limits->max_side > 0 ? (uint64_t)limits->max_side : LK_DEFAULT_MAX_SIDE;
    if (w == 0 || h == 0)
        return lk_error_set(err, LK_ERR_IMAGE_CORRUPT,
                            "the %s header declares %llux%llu pixels; the file is damaged: "
                            "send the original image",
                            fmt, (unsigned long long)w, (unsigned long long)h);
    if (w > max_side || h > max_side)
        return lk_error_set(err, LK_ERR_IMAGE_TOO_LARGE,
                            "the %s image is %llux%llu pixels; the longest side allowed is %llu "
                            "pixels: scale it down and send it again",
                            fmt, (unsigned long long)w, (unsigned long long)h,
                            (unsigned long long)max_side);
    if (w * h > max_pixels)
        return lk_error_set(err, LK_ERR_IMAGE_TOO_LARGE,
                            "the %s image is %llux%llu pixels (%.1f megapixels); the budget is "
                            "%.1f megapixels: scale it down and send it again",
                            fmt, (unsigned long long)w, (unsigned long long)h,
                            (double)(w * h) / 1e6, (double)max_pixels / 1e6);
    return LK_OK;
}

/* ------------------------------------------------------------------------ */
/* EXIF orientation */

/* Orientation (1..8) from an EXIF block that starts with "Exif\0\0" (the JPEG
 * APP1 layout, EXIF 2.32 section 4.5.4). 1 when absent or out of range, as
 * Pillow's exif_transpose leaves such images alone; -1 when out of memory. */
static int exif_orientation(const uint8_t *exif, size_t len)
{
    if (len < 6 || len > LK_PNG_CHUNK_MALLOC_MAX + 6)
        return 1;
    ExifData *ed = exif_data_new();
    if (!ed)
        return -1;
    /* Read the tags as stored: FOLLOW_SPECIFICATION would add or "fix"
     * entries after loading. */
    exif_data_unset_option(ed, EXIF_DATA_OPTION_FOLLOW_SPECIFICATION);
    exif_data_load_data(ed, exif, (unsigned int)len);
    int orientation = 1;
    /* The tag lives in IFD0 (TIFF 6.0 section 8; Pillow reads it there). */
    ExifEntry *e = exif_content_get_entry(ed->ifd[EXIF_IFD_0], EXIF_TAG_ORIENTATION);
    if (e && e->format == EXIF_FORMAT_SHORT && e->components >= 1 && e->data && e->size >= 2) {
        ExifShort v = exif_get_short(e->data, exif_data_get_byte_order(ed));
        if (v >= 1 && v <= 8)
            orientation = v;
    }
    exif_data_unref(ed);
    return orientation;
}

/* Makes *img upright for an EXIF orientation. For output pixel (ox, oy) the
 * source is (sx, sy) below, W x H being the stored size; the cases match
 * Pillow's ImageOps.exif_transpose (2 FLIP_LEFT_RIGHT, 3 ROTATE_180,
 * 4 FLIP_TOP_BOTTOM, 5 TRANSPOSE, 6 ROTATE_270, 7 TRANSVERSE, 8 ROTATE_90)
 * and the row/column meanings of TIFF 6.0's Orientation field. */
static lk_code apply_orientation(lk_image **img, int orientation, lk_error *err)
{
    if (orientation <= 1 || orientation > 8)
        return LK_OK;
    const lk_image *src = *img;
    const int W = src->width, H = src->height, ch = src->channels;
    const int swap = orientation >= 5;
    lk_error local;
    lk_image *dst = lk_image_new(swap ? H : W, swap ? W : H, ch, &local);
    if (!dst)
        return lk_error_set(err, local.code, "%s", local.message);
    /* sx = ax + bx*ox + cx*oy, sy = ay + by*ox + cy*oy */
    long ax = 0, bx = 1, cx = 0, ay = 0, by = 0, cy = 1;
    switch (orientation) {
    case 2: ax = W - 1; bx = -1; break;
    case 3: ax = W - 1; bx = -1; ay = H - 1; cy = -1; break;
    case 4: ay = H - 1; cy = -1; break;
    case 5: bx = 0; cx = 1; by = 1; cy = 0; break;
    case 6: bx = 0; cx = 1; ay = H - 1; by = -1; cy = 0; break;
    case 7: ax = W - 1; bx = 0; cx = -1; ay = H - 1; by = -1; cy = 0; break;
    case 8: ax = W - 1; bx = 0; cx = -1; by = 1; cy = 0; break;
    default: break;
    }
    const ptrdiff_t step = ((ptrdiff_t)bx + (ptrdiff_t)by * W) * ch;
    uint8_t *d = dst->data;
    for (long oy = 0; oy < dst->height; oy++) {
        const long sx = ax + cx * oy, sy = ay + cy * oy;
        const uint8_t *s = src->data + ((ptrdiff_t)sy * W + sx) * ch;
        for (long ox = 0; ox < dst->width; ox++, s += step, d += ch)
            memcpy(d, s, (size_t)ch);
    }
    lk_image_free(*img);
    *img = dst;
    return LK_OK;
}

/* ------------------------------------------------------------------------ */
/* JPEG */

typedef struct jpeg_markers {
    const uint8_t *exif; /* APP1 payload starting with "Exif\0\0", or NULL */
    size_t exif_len;
    int sof;       /* the first SOFn marker code, 0 if none was seen */
    unsigned width, height; /* of that frame header; height 0: defined by a DNL marker */
    int precision; /* sample precision from that frame header */
} jpeg_markers;

/* SOF0..SOF15 except DHT (C4), JPG (C8) and DAC (CC): ITU-T T.81 Table B.1. */
static int is_sof(int code)
{
    return code >= 0xC0 && code <= 0xCF && code != 0xC4 && code != 0xC8 && code != 0xCC;
}

/* Walks the marker segments before the first scan (ITU-T T.81 B.1.1) to find
 * the EXIF block and the frame type. Stops quietly at anything malformed:
 * libjpeg reports the damage itself. */
static void jpeg_scan_markers(const uint8_t *b, size_t len, jpeg_markers *m)
{
    memset(m, 0, sizeof *m);
    size_t pos = 2; /* after SOI */
    while (pos < len && b[pos] == 0xFF) {
        while (pos < len && b[pos] == 0xFF) /* fill bytes, T.81 B.1.1.2 */
            pos++;
        if (pos >= len)
            return;
        const int code = b[pos++];
        if (code == 0x01 || (code >= 0xD0 && code <= 0xD8)) /* TEM, RSTn, SOI: no length */
            continue;
        if (code == 0xD9 || code == 0xDA || code == 0x00) /* EOI, SOS, stuffed zero */
            return;
        if (len - pos < 2)
            return;
        const size_t seglen = ((size_t)b[pos] << 8) | b[pos + 1];
        if (seglen < 2 || seglen > len - pos)
            return;
        const uint8_t *p = b + pos + 2;
        const size_t n = seglen - 2;
        if (code == 0xE1 && !m->exif && n >= 6 && memcmp(p, "Exif\0\0", 6) == 0) {
            m->exif = p;
            m->exif_len = n;
        } else if (is_sof(code) && !m->sof && n >= 1) {
            m->sof = code;
            m->precision = p[0];
            if (n >= 5) { /* P, Y, X (T.81 B.2.2, frame header) */
                m->height = ((unsigned)p[1] << 8) | p[2];
                m->width = ((unsigned)p[3] << 8) | p[4];
            }
        }
        pos += seglen;
    }
}

/* Inverted CMYK (Adobe's convention: 0 means full ink) to RGB exactly as
 * Pillow 9.4 does it: JpegImagePlugin always reads 4-component JPEGs with
 * rawmode "CMYK;I" (inverting the stored samples), then libImaging/Convert.c
 * cmyk2rgb computes R = clip(nk - MULDIV255(C, nk)) with nk = 255 - K and
 * MULDIV255(a, b) = ((t >> 8) + t) >> 8, t = a*b + 128. Nearly all CMYK JPEGs
 * come from Adobe applications, which store inverted samples (libjpeg's
 * usage.txt notes this too); Pillow assumes it for every such file, and so
 * do we, so both decoders agree on any CMYK input. */
static void cmyk_inverted_to_rgb(const uint8_t *cmyk, size_t npix, uint8_t *rgb)
{
    for (size_t i = 0; i < npix; i++, cmyk += 4, rgb += 3) {
        const unsigned nk = cmyk[3]; /* stored K is inverted: 255 - K */
        for (int c = 0; c < 3; c++) {
            const unsigned ink = 255u - cmyk[c];
            const unsigned t = ink * nk + 128u;
            const unsigned mul = ((t >> 8) + t) >> 8;
            rgb[c] = (uint8_t)(nk >= mul ? nk - mul : 0);
        }
    }
}

static lk_code tj_failure(tjhandle tj, const char *stage, lk_error *err)
{
    if (tjGetErrorCode(tj) == TJERR_WARNING)
        return lk_error_set(err, LK_ERR_IMAGE_CORRUPT,
                            "the JPEG data is truncated or damaged (%s: %s); the file is "
                            "incomplete or altered: send the original file again",
                            stage, tjGetErrorStr2(tj));
    return lk_error_set(err, LK_ERR_IMAGE_CORRUPT,
                        "the JPEG data is damaged (%s: %s): send the original file again", stage,
                        tjGetErrorStr2(tj));
}

static lk_code decode_jpeg(const uint8_t *bytes, size_t len, const lk_decode_limits *limits,
                           lk_image **out, lk_error *err)
{
    jpeg_markers m;
    jpeg_scan_markers(bytes, len, &m);
    /* libjpeg-turbo 2.1 built for 8-bit samples decodes neither 12/16-bit
     * nor lossless (SOF3/7/11/15) nor hierarchical (SOF5-7, SOF13-15)
     * frames; say so instead of calling the file damaged. */
    if (m.sof && m.precision != 8)
        return lk_error_set(err, LK_ERR_IMAGE_UNSUPPORTED,
                            "this JPEG has %d-bit samples; only 8-bit JPEG is accepted: save "
                            "it as an ordinary 8-bit JPEG or as PNG",
                            m.precision);
    if (m.sof == 0xC3 || m.sof == 0xC5 || m.sof == 0xC6 || m.sof == 0xC7 || m.sof == 0xCB ||
        m.sof == 0xCD || m.sof == 0xCE || m.sof == 0xCF)
        return lk_error_set(err, LK_ERR_IMAGE_UNSUPPORTED,
                            "this is a lossless or hierarchical JPEG (marker 0xFF%02X), which "
                            "is not accepted: save it as a baseline or progressive JPEG or as PNG",
                            m.sof);

    /* The declared size is checked from the frame header first: TurboJPEG
     * refuses sides over 65500 as a damaged file, but such a file is too
     * large, not corrupt. */
    if (m.sof && m.width && m.height) {
        lk_code lc = check_limits(m.width, m.height, limits, "JPEG", err);
        if (lc != LK_OK)
            return lc;
    }
    tjhandle tj = tjInitDecompress();
    if (!tj)
        return lk_error_set(err, LK_ERR_NOMEM, "cannot start the JPEG decoder (out of memory)");
    /* A tables-only stream (or one cut before its frame header) passes
     * tjDecompressHeader3 in TurboJPEG 2.1 without setting the outputs; 0x0
     * then reads as damaged in check_limits. */
    int w = 0, h = 0, subsamp = -1, colorspace = -1;
    lk_image *img = NULL;
    uint8_t *cmyk = NULL;
    lk_code c;
    if (tjDecompressHeader3(tj, bytes, (unsigned long)len, &w, &h, &subsamp, &colorspace) != 0) {
        c = tj_failure(tj, "reading the header", err);
        goto done;
    }
    if ((c = check_limits((uint64_t)(w > 0 ? w : 0), (uint64_t)(h > 0 ? h : 0), limits, "JPEG",
                          err)) != LK_OK)
        goto done;
    lk_error local;
    img = lk_image_new(w, h, 3, &local);
    if (!img) {
        c = lk_error_set(err, local.code, "%s", local.message);
        goto done;
    }
    /* ACCURATEDCT: the islow integer IDCT, libjpeg's default and what Pillow
     * uses, so pixels match it. Fancy (triangular) upsampling stays on, also
     * libjpeg's default. STOPONWARNING: see the policy at the top.
     * LIMITSCANS: refuse progressive files with more than 500 scans, which
     * otherwise take quadratic time (libjpeg-turbo's turbojpeg.h). */
    const int flags = TJFLAG_ACCURATEDCT | TJFLAG_STOPONWARNING | TJFLAG_LIMITSCANS;
    if (colorspace == TJCS_CMYK || colorspace == TJCS_YCCK) {
        /* libjpeg converts no 4-component colour space to RGB: take CMYK
         * (libjpeg turns YCCK into CMYK) and convert as Pillow does. */
        const size_t npix = (size_t)w * (size_t)h;
        cmyk = malloc(npix * 4);
        if (!cmyk) {
            c = lk_error_set(err, LK_ERR_NOMEM, "out of memory decoding a %dx%d CMYK JPEG", w,
                             h);
            goto done;
        }
        if (tjDecompress2(tj, bytes, (unsigned long)len, cmyk, w, 0, h, TJPF_CMYK, flags) != 0) {
            c = tj_failure(tj, "decoding", err);
            goto done;
        }
        cmyk_inverted_to_rgb(cmyk, npix, img->data);
    } else if (tjDecompress2(tj, bytes, (unsigned long)len, img->data, w, 0, h, TJPF_RGB,
                             flags) != 0) {
        c = tj_failure(tj, "decoding", err);
        goto done;
    }
    if (m.exif) {
        const int o = exif_orientation(m.exif, m.exif_len);
        if (o < 0) {
            c = lk_error_set(err, LK_ERR_NOMEM, "out of memory reading the EXIF block");
            goto done;
        }
        if ((c = apply_orientation(&img, o, err)) != LK_OK)
            goto done;
    }
    *out = img;
    img = NULL;
    c = LK_OK;
done:
    free(cmyk);
    lk_image_free(img);
    tjDestroy(tj);
    return c;
}

/* ------------------------------------------------------------------------ */
/* PNG */

static uint32_t be32(const uint8_t *p)
{
    return ((uint32_t)p[0] << 24) | ((uint32_t)p[1] << 16) | ((uint32_t)p[2] << 8) | p[3];
}

/* CRC-32 as the PNG specification defines it (ISO/IEC 15948, Annex D:
 * polynomial 0xEDB88320 reflected, initial and final XOR 0xFFFFFFFF); bitwise,
 * since it only ever covers the 17 bytes of IHDR here. */
static uint32_t png_crc32(const uint8_t *p, size_t n)
{
    uint32_t c = 0xFFFFFFFFu;
    for (size_t i = 0; i < n; i++) {
        c ^= p[i];
        for (int k = 0; k < 8; k++)
            c = (c >> 1) ^ (0xEDB88320u & (0u - (c & 1u)));
    }
    return c ^ 0xFFFFFFFFu;
}

typedef struct png_src {
    const uint8_t *p;
    size_t len, pos;
} png_src;

typedef struct png_ctx {
    lk_error *err;
    int failed; /* the read callback already set err */
} png_ctx;

static void png_read_mem(png_structp png, png_bytep dst, png_size_t n)
{
    png_src *s = png_get_io_ptr(png);
    if (n > s->len - s->pos) {
        png_ctx *ctx = png_get_error_ptr(png);
        lk_error_set(ctx->err, LK_ERR_IMAGE_CORRUPT,
                     "the PNG data is truncated (it ends after %zu bytes); the file is "
                     "incomplete: send the whole file again",
                     s->len);
        ctx->failed = 1;
        png_error(png, "truncated");
    }
    memcpy(dst, s->p + s->pos, n);
    s->pos += n;
}

static void png_on_error(png_structp png, png_const_charp msg)
{
    png_ctx *ctx = png_get_error_ptr(png);
    if (!ctx->failed)
        lk_error_set(ctx->err, LK_ERR_IMAGE_CORRUPT,
                     "the PNG data is damaged (%s): send the original file again", msg);
    ctx->failed = 1;
    png_longjmp(png, 1);
}

static void png_on_warning(png_structp png, png_const_charp msg)
{
    /* Warnings (e.g. a bad CRC in an ancillary chunk, which libpng then
     * discards) do not affect the pixels. One kind does matter: compressed
     * data beyond the image's scanlines, which libpng reports as a benign
     * error ("Too much image data", "Extra compressed data") and then keeps
     * inflating to the end of the IDAT chunks. The decompressed data of a
     * PNG is exactly its filtered scanlines (PNG specification, sections
     * 10.1 and 11.2.4), so the file is damaged; stopping at the first
     * surplus byte also keeps a small upload from costing a worker minutes
     * of inflating (a decompression bomb). */
    if (msg && (strstr(msg, "Too much image data") || strstr(msg, "xtra compressed data")))
        png_error(png, "compressed image data continues beyond the last row");
}

/* Reads IHDR from the raw bytes (PNG spec 11.2.2: the first chunk, 13 bytes
 * of data) so the size limits apply before libpng allocates anything. */
static lk_code png_check_header(const uint8_t *bytes, size_t len, const lk_decode_limits *limits,
                                lk_error *err)
{
    if (len < 8 + 8 + 13 + 4)
        return lk_error_set(err, LK_ERR_IMAGE_CORRUPT,
                            "the PNG data is truncated (%zu bytes, shorter than its header): "
                            "send the whole file again",
                            len);
    const uint8_t *chunk = bytes + 8;
    if (be32(chunk) != 13 || memcmp(chunk + 4, "IHDR", 4) != 0)
        return lk_error_set(err, LK_ERR_IMAGE_CORRUPT,
                            "the PNG header (IHDR) is missing or damaged: send the original "
                            "file again");
    if (png_crc32(chunk + 4, 17) != be32(chunk + 21))
        return lk_error_set(err, LK_ERR_IMAGE_CORRUPT,
                            "the PNG header (IHDR) fails its CRC check; the file is damaged: "
                            "send the original file again");
    const uint32_t w = be32(chunk + 8), h = be32(chunk + 12);
    if (w > 0x7FFFFFFFu || h > 0x7FFFFFFFu) /* PNG spec 11.2.2: at most 2^31 - 1 */
        return lk_error_set(err, LK_ERR_IMAGE_CORRUPT,
                            "the PNG header declares %ux%u pixels, beyond what PNG allows; the "
                            "file is damaged",
                            w, h);
    return check_limits(w, h, limits, "PNG", err);
}

/* Bytes of filtered scanlines a PNG's IDAT stream must inflate to: one
 * filter byte plus the packed samples per row, per Adam7 pass when
 * interlaced (PNG specification, sections 7.2 and 8.2). 0 for an unknown
 * colour type or bit depth (libpng then reports the file). */
static uint64_t png_scanline_bytes(uint32_t w, uint32_t h, int depth, int ctype, int interlace)
{
    int channels = ctype == 0 ? 1 : ctype == 2 ? 3 : ctype == 3 ? 1 : ctype == 4 ? 2
                 : ctype == 6 ? 4 : 0;
    if (!channels || !(depth == 1 || depth == 2 || depth == 4 || depth == 8 || depth == 16))
        return 0;
    const uint64_t bits = (uint64_t)channels * (uint64_t)depth;
    if (!interlace)
        return (uint64_t)h * (1 + ((uint64_t)w * bits + 7) / 8);
    static const int x0[7] = {0, 4, 0, 2, 0, 1, 0}, y0[7] = {0, 0, 4, 0, 2, 0, 1};
    static const int dx[7] = {8, 8, 4, 4, 2, 2, 1}, dy[7] = {8, 8, 8, 4, 4, 2, 2};
    uint64_t total = 0;
    for (int p = 0; p < 7; p++) {
        uint64_t pw = w > (uint32_t)x0[p] ? (w - (uint32_t)x0[p] + (uint32_t)dx[p] - 1) / (uint32_t)dx[p] : 0;
        uint64_t ph = h > (uint32_t)y0[p] ? (h - (uint32_t)y0[p] + (uint32_t)dy[p] - 1) / (uint32_t)dy[p] : 0;
        if (pw && ph)
            total += ph * (1 + (pw * bits + 7) / 8);
    }
    return total;
}

/* A decompression bomb check before libpng runs: libpng inflates every
 * IDAT byte to the end of the stream, however far beyond the image's
 * scanlines it goes, and only then complains. Here the stream is inflated
 * into a scratch buffer and refused at the first byte past the scanlines,
 * so a small upload cannot cost more inflating than its image is worth.
 * Other damage is left for libpng to report. */
static lk_code png_check_idat(const uint8_t *b, size_t len, lk_error *err)
{
    const uint32_t w = be32(b + 16), h = be32(b + 20);
    const uint64_t need = png_scanline_bytes(w, h, b[24], b[25], b[28]);
    if (!need)
        return LK_OK;
    z_stream z;
    memset(&z, 0, sizeof z);
    if (inflateInit(&z) != Z_OK)
        return lk_error_set(err, LK_ERR_NOMEM, "cannot start the PNG integrity check (out of memory)");
    uint8_t out[16384];
    uint64_t total = 0;
    int zr = Z_OK;
    lk_code rc = LK_OK;
    size_t pos = 8;
    while (rc == LK_OK && zr == Z_OK && len - pos >= 12) {
        const uint32_t n = be32(b + pos);
        if (n > len - pos - 12)
            break; /* truncated: libpng says so */
        const uint8_t *type = b + pos + 4;
        if (!memcmp(type, "IEND", 4))
            break;
        if (!memcmp(type, "IDAT", 4)) {
            z.next_in = (Bytef *)(b + pos + 8);
            z.avail_in = n;
            while (z.avail_in > 0 && zr == Z_OK) {
                z.next_out = out;
                z.avail_out = sizeof out;
                zr = inflate(&z, Z_NO_FLUSH);
                total += sizeof out - z.avail_out;
                if (total > need) {
                    rc = lk_error_set(err, LK_ERR_IMAGE_CORRUPT,
                                      "the PNG data is damaged: its compressed image data "
                                      "inflates to more than the %ux%u image's %llu bytes of "
                                      "rows; send the original file again",
                                      w, h, (unsigned long long)need);
                    break;
                }
                if (zr == Z_BUF_ERROR)
                    zr = Z_OK; /* needs the next IDAT chunk */
            }
        }
        pos += 12 + (size_t)n;
    }
    inflateEnd(&z);
    return rc;
}

static lk_code decode_png(const uint8_t *bytes, size_t len, const lk_decode_limits *limits,
                          lk_image **out, lk_error *err)
{
    lk_code hc = png_check_header(bytes, len, limits, err);
    if (hc == LK_OK)
        hc = png_check_idat(bytes, len, err);
    if (hc != LK_OK)
        return hc;
    const int max_side = limits && limits->max_side > 0 ? limits->max_side : LK_DEFAULT_MAX_SIDE;

    lk_error local;
    png_ctx ctx = {err ? err : &local, 0};
    png_structp png =
        png_create_read_struct(PNG_LIBPNG_VER_STRING, &ctx, png_on_error, png_on_warning);
    if (!png)
        return lk_error_set(err, LK_ERR_NOMEM, "cannot start the PNG decoder (out of memory)");
    png_infop info = png_create_info_struct(png);
    if (!info) {
        png_destroy_read_struct(&png, NULL, NULL);
        return lk_error_set(err, LK_ERR_NOMEM, "cannot start the PNG decoder (out of memory)");
    }
    lk_image *volatile img = NULL;
    png_bytep *volatile rows = NULL;
    volatile lk_code result = LK_ERR_IMAGE_CORRUPT;
    png_src src = {bytes, len, 0};
    if (setjmp(png_jmpbuf(png))) {
        result = LK_ERR_IMAGE_CORRUPT;
        goto done;
    }
    png_set_read_fn(png, &src, png_read_mem);
    /* Decompression-bomb guards beside the IHDR check above: libpng itself
     * refuses larger sides, caps every ancillary chunk allocation (zTXt,
     * iCCP, eXIf decompress or copy into memory) and the number of cached
     * chunks (libpng-manual.txt, "Setting limits"). */
    png_set_user_limits(png, (png_uint_32)max_side, (png_uint_32)max_side);
    png_set_chunk_malloc_max(png, LK_PNG_CHUNK_MALLOC_MAX);
    png_set_chunk_cache_max(png, LK_PNG_CHUNK_CACHE_MAX);
    /* Skip the compressed text, ICC profile and palette-suggestion chunks
     * entirely: nothing here uses them and they are the usual bomb carriers.
     * Treating known chunks as unknown and never keeping them is documented
     * in png.h (png_set_keep_unknown_chunks). */
    static const png_byte skipped[] = "iCCP\0iTXt\0tEXt\0zTXt\0sPLT\0";
    png_set_keep_unknown_chunks(png, PNG_HANDLE_CHUNK_NEVER, skipped, 5);
    png_read_info(png, info);
    const png_uint_32 w = png_get_image_width(png, info), h = png_get_image_height(png, info);
    /* Every flavour to 8-bit RGB: palette and low bit depths expanded, tRNS
     * turned into alpha and then, like all alpha, dropped; 16-bit keeps the
     * high byte; gray replicated. */
    png_set_expand(png);
    png_set_strip_16(png);
    png_set_strip_alpha(png);
    png_set_gray_to_rgb(png);
    (void)png_set_interlace_handling(png);
    png_read_update_info(png, info);
    if (png_get_rowbytes(png, info) != (size_t)w * 3) {
        result = lk_error_set(err, LK_ERR_INTERNAL,
                              "the PNG decoder produced an unexpected row layout; please report "
                              "this file");
        goto done;
    }
    img = lk_image_new((int)w, (int)h, 3, &local);
    if (!img) {
        result = lk_error_set(err, local.code, "%s", local.message);
        goto done;
    }
    rows = malloc(sizeof(png_bytep) * h);
    if (!rows) {
        result = lk_error_set(err, LK_ERR_NOMEM, "out of memory decoding a %ux%u PNG", w, h);
        goto done;
    }
    for (png_uint_32 y = 0; y < h; y++)
        rows[y] = img->data + (size_t)y * w * 3;
    png_read_image(png, rows);
    /* Reading to IEND (into info, so a late eXIf is seen) makes a file cut
     * after its pixel data an error too. */
    png_read_end(png, info);
    png_uint_32 exif_len = 0;
    png_bytep exif = NULL;
    if (png_get_eXIf_1(png, info, &exif_len, &exif) != 0 && exif && exif_len > 0 &&
        exif_len <= LK_PNG_CHUNK_MALLOC_MAX) {
        /* eXIf holds the TIFF structure without the "Exif\0\0" prefix that
         * libexif expects (PNG 1.5 extensions, eXIf). */
        uint8_t *buf = malloc((size_t)exif_len + 6);
        if (!buf) {
            result = lk_error_set(err, LK_ERR_NOMEM, "out of memory reading the EXIF block");
            goto done;
        }
        memcpy(buf, "Exif\0\0", 6);
        memcpy(buf + 6, exif, exif_len);
        const int o = exif_orientation(buf, (size_t)exif_len + 6);
        free(buf);
        if (o < 0) {
            result = lk_error_set(err, LK_ERR_NOMEM, "out of memory reading the EXIF block");
            goto done;
        }
        lk_image *tmp = img;
        lk_code oc = apply_orientation(&tmp, o, err);
        img = tmp;
        if (oc != LK_OK) {
            result = oc;
            goto done;
        }
    }
    *out = img;
    img = NULL;
    result = LK_OK;
done:
    free(rows);
    lk_image_free(img);
    png_destroy_read_struct(&png, &info, NULL);
    return result;
}

/* ------------------------------------------------------------------------ */

/* Names a few formats we do not decode, so the message can say what the
 * file is. Magic numbers: GIF87a/89a, BMP "BM", TIFF "II*\0"/"MM\0*",
 * RIFF....WEBP, ISO BMFF "ftyp" (HEIF/AVIF). */
static const char *sniff_other(const uint8_t *b, size_t len)
{
    if (len >= 6 && (memcmp(b, "GIF87a", 6) == 0 || memcmp(b, "GIF89a", 6) == 0))
        return "a GIF image";
    if (len >= 12 && memcmp(b, "RIFF", 4) == 0 && memcmp(b + 8, "WEBP", 4) == 0)
        return "a WebP image";
    if (len >= 12 && memcmp(b + 4, "ftyp", 4) == 0)
        return "a HEIF/AVIF (ISO media) file";
    if (len >= 4 && (memcmp(b, "II*\0", 4) == 0 || memcmp(b, "MM\0*", 4) == 0))
        return "a TIFF image";
    if (len >= 2 && b[0] == 'B' && b[1] == 'M')
        return "a BMP image";
    return NULL;
}

lk_code lk_image_decode(const uint8_t *bytes, size_t len, const lk_decode_limits *limits,
                        lk_image **out, lk_error *err)
{
    if (!out)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_image_decode: out is NULL");
    *out = NULL;
    if (!bytes || len == 0)
        return lk_error_set(err, LK_ERR_IMAGE_CORRUPT,
                            "the image is empty (0 bytes): send the file again");
    static const uint8_t png_magic[8] = {0x89, 'P', 'N', 'G', '\r', '\n', 0x1a, '\n'};
    /* SOI then a marker (ITU-T T.81 B.2.1); two bytes of SOI alone are a
     * truncated JPEG, reported as such by the decoder. */
    if (len >= 2 && bytes[0] == 0xFF && bytes[1] == 0xD8 && (len == 2 || bytes[2] == 0xFF))
        return decode_jpeg(bytes, len, limits, out, err);
    if (len >= 8 && memcmp(bytes, png_magic, 8) == 0)
        return decode_png(bytes, len, limits, out, err);
    if (len < 8 && len >= 4 && memcmp(bytes, png_magic, len) == 0)
        return lk_error_set(err, LK_ERR_IMAGE_CORRUPT,
                            "the PNG data is truncated (%zu bytes): send the whole file again",
                            len);
    const char *what = sniff_other(bytes, len);
    if (what)
        return lk_error_set(err, LK_ERR_IMAGE_UNSUPPORTED,
                            "this is %s; only JPEG and PNG are accepted: convert it to JPEG or "
                            "PNG and send it again",
                            what);
    return lk_error_set(err, LK_ERR_IMAGE_UNSUPPORTED,
                        "not a JPEG or PNG image (unrecognised first bytes): send a JPEG or PNG");
}
