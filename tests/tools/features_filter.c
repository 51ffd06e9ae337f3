/* lkt_features_filter: the HOG and Gaussian blur of an 8-bit PGM (P5)
 * image, for tests/ref/check_features_filter.py to compare with
 * scikit-image's hog and scipy.ndimage.gaussian_filter.
 *
 *   lkt_features_filter blur IN.pgm SIGMA OUT.f64
 *   lkt_features_filter hog IN.pgm ORIENTATIONS CELL BLOCK NORM SQRT OUT.f64
 *
 * NORM is 0 L1, 1 L1-sqrt, 2 L2, 3 L2-Hys; SQRT 0 or 1. The image is read
 * as v/255 doubles; outputs are raw native (little-endian) float64. */
#include "likeness/features.h"

#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "tools/pgm_io.h"

int main(int argc, char **argv)
{
    const int blur = argc == 5 && strcmp(argv[1], "blur") == 0;
    const int hog = argc == 9 && strcmp(argv[1], "hog") == 0;
    if (!blur && !hog) {
        fprintf(stderr, "usage: %s blur IN.pgm SIGMA OUT.f64\n"
                        "       %s hog IN.pgm ORIENTATIONS CELL BLOCK NORM SQRT OUT.f64\n",
                argv[0], argv[0]);
        return 2;
    }
    int w, h;
    unsigned char *px = read_pgm(argv[2], &w, &h);
    if (!px) {
        fprintf(stderr, "cannot read 8-bit binary PGM %s\n", argv[2]);
        return 1;
    }
    const size_t n = (size_t)w * h;
    double *img = malloc(n * sizeof *img);
    double *out = NULL;
    size_t n_out = 0;
    lk_error err = {0};
    int rc = 1;
    if (!img)
        goto done;
    for (size_t i = 0; i < n; i++)
        img[i] = px[i] / 255.0;
    if (blur) {
        n_out = n;
        out = malloc(n * sizeof *out);
        if (!out || lk_gaussian_blur(img, w, h, strtod(argv[3], NULL), out, &err) != LK_OK)
            goto done;
    } else {
        const lk_hog_params p = {.orientations = atoi(argv[3]), .cell = atoi(argv[4]),
                                 .block = atoi(argv[5]), .norm = (lk_hog_norm)atoi(argv[6]),
                                 .transform_sqrt = atoi(argv[7])};
        n_out = lk_hog_size(w, h, &p);
        out = malloc((n_out ? n_out : 1) * sizeof *out);
        if (!out || lk_hog(img, w, h, &p, out, &err) != LK_OK)
            goto done;
    }
    const char *dst = argv[argc - 1];
    if (!write_file(dst, "", out, n_out * sizeof *out)) {
        snprintf(err.message, sizeof err.message, "cannot write %s", dst);
        goto done;
    }
    rc = 0;
done:
    if (rc)
        fprintf(stderr, "lkt_features_filter: %s\n", err.message[0] ? err.message : "out of memory");
    free(px);
    free(img);
    free(out);
    return rc;
}
