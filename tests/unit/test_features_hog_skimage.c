/* HOG against scikit-image's own expected outputs (shared/reference/hog,
 * from python3-skimage 0.19.3, skimage/data/astronaut_GRAY_hog_*.npy):
 * gray = BT.709 luma of astronaut.png in [0,1], 9 orientations, 8x8-pixel
 * cells, 3x3-cell blocks, L1 and L2-Hys, no square root. scikit-image's test
 * demands 7 decimals for float64; we demand max |diff| <= 1e-5. */
#include "likeness/features.h"
#include "likeness/image.h"
#include "lk_test.h"

#include <math.h>
#include <stdint.h>
#include <string.h>

/* Minimal reader for NumPy's .npy format version 1/2/3 (numpy.lib.format):
 * magic "\x93NUMPY", major, minor, little-endian header length (2 bytes for
 * v1, 4 for v2/3), an ASCII dict, then raw data. Accepts only '<f8',
 * C order. Returns a malloc'd array and its element count. */
static double *read_npy_f8(const char *path, size_t *count)
{
    FILE *f = fopen(path, "rb");
    if (!f)
        return NULL;
    unsigned char head[12];
    double *data = NULL;
    if (fread(head, 1, 10, f) != 10 || memcmp(head, "\x93NUMPY", 6) != 0)
        goto fail;
    size_t hlen;
    if (head[6] == 1) {
        hlen = head[8] | (size_t)head[9] << 8;
    } else {
        if (fread(head + 10, 1, 2, f) != 2)
            goto fail;
        hlen = head[8] | (size_t)head[9] << 8 | (size_t)head[10] << 16 | (size_t)head[11] << 24;
    }
    char *dict = calloc(hlen + 1, 1);
    if (!dict || fread(dict, 1, hlen, f) != hlen) {
        free(dict);
        goto fail;
    }
    const int ok = strstr(dict, "'descr': '<f8'") && strstr(dict, "'fortran_order': False");
    size_t n = 1;
    const char *shape = strstr(dict, "'shape': (");
    if (ok && shape) {
        const char *s = shape + strlen("'shape': (");
        while (*s && *s != ')') {
            char *end;
            const unsigned long d = strtoul(s, &end, 10);
            if (end == s)
                break;
            n *= d;
            s = end;
            while (*s == ',' || *s == ' ')
                s++;
        }
    }
    free(dict);
    if (!ok || !shape)
        goto fail;
    data = malloc(n * sizeof *data);
    if (!data || fread(data, sizeof *data, n, f) != n) /* the test host is little-endian */
        goto fail;
    fclose(f);
    *count = n;
    return data;
fail:
    free(data);
    fclose(f);
    return NULL;
}

static void check_norm(const double *gray, int w, int h, lk_hog_norm norm, const char *npy)
{
    size_t n_ref = 0;
    double *ref = read_npy_f8(npy, &n_ref);
    if (!ref)
        LK_SKIP("cannot read %s (shared reference data absent?)", npy);
    const lk_hog_params p = {.orientations = 9, .cell = 8, .block = 3, .norm = norm,
                             .transform_sqrt = 0};
    const size_t n = lk_hog_size(w, h, &p);
    CHECK(n == n_ref, "size %zu vs reference %zu", n, n_ref);
    double *out = malloc(n * sizeof *out);
    lk_error err;
    lk_code rc = lk_hog(gray, w, h, &p, out, &err);
    CHECK(rc == LK_OK, "lk_hog: %s", err.message);
    if (rc == LK_OK && n == n_ref) {
        double worst = 0.0;
        size_t at = 0;
        for (size_t i = 0; i < n; i++) {
            const double d = fabs(out[i] - ref[i]);
            if (d > worst) {
                worst = d;
                at = i;
            }
        }
        printf("%s: max |diff| %.3g at %zu\n", npy, worst, at);
        CHECK(worst <= 1e-5, "max |diff| %g at %zu (%g vs %g)", worst, at, out[at], ref[at]);
    }
    free(out);
    free(ref);
}

int main(void)
{
    char path[1024], l1[1024], hys[1024];
    snprintf(path, sizeof path, "%s/reference/hog/astronaut.png", lk_test_shared());
    snprintf(l1, sizeof l1, "%s/reference/hog/astronaut_GRAY_hog_L1.npy", lk_test_shared());
    snprintf(hys, sizeof hys, "%s/reference/hog/astronaut_GRAY_hog_L2-Hys.npy", lk_test_shared());
    lk_image *img = NULL;
    lk_error err;
    if (lk_image_load(path, NULL, &img, &err) != LK_OK)
        LK_SKIP("cannot load %s: %s", path, err.message);
    double *gray = malloc((size_t)img->width * img->height * sizeof *gray);
    lk_image_gray_f64(img, LK_LUMA_BT709, gray);
    check_norm(gray, img->width, img->height, LK_HOG_L1, l1);
    check_norm(gray, img->width, img->height, LK_HOG_L2_HYS, hys);

    /* Argument checks (the API's contract, not a computation). */
    const lk_hog_params bad = {.orientations = 0, .cell = 8, .block = 3, .norm = LK_HOG_L1};
    CHECK(lk_hog_size(img->width, img->height, &bad) == 0, "zero orientations accepted");
    const lk_hog_params big = {.orientations = 9, .cell = 8, .block = 3, .norm = LK_HOG_L1};
    CHECK(lk_hog_size(16, 16, &big) == 0, "a 16x16 image cannot hold a 24x24 block");
    CHECK(lk_hog(gray, 16, 16, &big, gray, &err) == LK_ERR_INVALID_ARGUMENT, "too small accepted");
    free(gray);
    lk_image_free(img);
    return lk_test_done();
}
