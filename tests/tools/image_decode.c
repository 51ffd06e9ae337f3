/* lkt_image_decode: drives lk_image_decode for the Python checks.
 *
 *   lkt_image_decode [options] IN OUT
 *     (default)      OUT is a binary PPM (P6) of the decoded RGB image
 *     --gray601      OUT is a binary PGM (P5) of lk_image_to_gray(BT.601)
 *     --gray709-f64  OUT is "F64 <width> <height>\n" then width*height
 *                    little-endian doubles from lk_image_gray_f64(BT.709)
 *     --max-pixels N, --max-side N   decode limits (0 = default)
 *
 * On a decoding error prints "<code name>: <message>" to stderr and exits 2;
 * bad usage or an output error exits 1. */
#include "likeness/image.h"

#include <stdio.h>
#include <stdlib.h>
#include <string.h>

static int usage(void)
{
    fprintf(stderr, "usage: lkt_image_decode [--gray601|--gray709-f64] [--max-pixels N] "
                    "[--max-side N] IN OUT\n");
    return 1;
}

static int write_f64(FILE *f, const lk_image *img)
{
    const size_t n = (size_t)img->width * img->height;
    double *g = malloc(n * sizeof *g);
    if (!g)
        return -1;
    lk_image_gray_f64(img, LK_LUMA_BT709, g);
    fprintf(f, "F64 %d %d\n", img->width, img->height);
    /* x86-64 and aarch64 are little-endian, which the reader assumes. */
    const size_t w = fwrite(g, sizeof *g, n, f);
    free(g);
    return w == n ? 0 : -1;
}

int main(int argc, char **argv)
{
    enum { OUT_RGB, OUT_GRAY601, OUT_F64 } mode = OUT_RGB;
    lk_decode_limits limits = {0, 0};
    int i = 1;
    for (; i < argc && strncmp(argv[i], "--", 2) == 0; i++) {
        if (strcmp(argv[i], "--gray601") == 0)
            mode = OUT_GRAY601;
        else if (strcmp(argv[i], "--gray709-f64") == 0)
            mode = OUT_F64;
        else if (strcmp(argv[i], "--max-pixels") == 0 && i + 1 < argc)
            limits.max_pixels = strtoull(argv[++i], NULL, 10);
        else if (strcmp(argv[i], "--max-side") == 0 && i + 1 < argc)
            limits.max_side = atoi(argv[++i]);
        else
            return usage();
    }
    if (argc - i != 2)
        return usage();
    const char *in = argv[i], *outp = argv[i + 1];

    lk_error err;
    lk_error_clear(&err);
    lk_image *img = NULL;
    lk_code c = lk_image_load(in, &limits, &img, &err);
    if (c != LK_OK) {
        fprintf(stderr, "%s: %s\n", lk_code_name(c), err.message);
        return 2;
    }
    lk_image *out = img;
    if (mode == OUT_GRAY601) {
        out = lk_image_to_gray(img, LK_LUMA_BT601, &err);
        if (!out) {
            fprintf(stderr, "%s: %s\n", lk_code_name(err.code), err.message);
            lk_image_free(img);
            return 1;
        }
    }
    FILE *f = fopen(outp, "wb");
    int bad = !f;
    if (f) {
        if (mode == OUT_F64) {
            bad = write_f64(f, img) != 0;
        } else {
            /* Netpbm PPM/PGM: "P6"/"P5", width, height, maxval 255, raw bytes. */
            const size_t n = (size_t)out->width * out->height * out->channels;
            fprintf(f, "%s\n%d %d\n255\n", out->channels == 3 ? "P6" : "P5", out->width,
                    out->height);
            bad = fwrite(out->data, 1, n, f) != n;
        }
        bad |= fclose(f) != 0;
    }
    if (out != img)
        lk_image_free(out);
    lk_image_free(img);
    if (bad) {
        fprintf(stderr, "cannot write %s\n", outp);
        return 1;
    }
    return 0;
}
