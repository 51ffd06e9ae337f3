/* lkt_features_lbp: LBP codes and region histograms of an 8-bit PGM (P5)
 * image, for tests/ref/check_features_lbp.py to compare with scikit-image.
 *
 *   lkt_features_lbp IN.pgm GRID_X GRID_Y OUT_PREFIX P,R[,tt] [P,R[,tt]...]
 *
 * The image is read as v/255 doubles (what the extractor feeds LBP); a spec
 * ending in ",tt" runs on its Tan-Triggs normalisation (paper defaults),
 * which is written as OUT_PREFIX.tt.f64 so the check can hand skimage the
 * very same doubles. For the k-th spec (from 0) writes OUT_PREFIX.k.codes.u8
 * (w*h labels) and OUT_PREFIX.k.hist.f64 (GRID_Y*GRID_X*(P*(P-1)+3)
 * values), raw, native (little-endian) byte order. */
#include "likeness/features.h"

#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "tools/pgm_io.h"

int main(int argc, char **argv)
{
    if (argc < 6) {
        fprintf(stderr, "usage: %s IN.pgm GRID_X GRID_Y OUT_PREFIX P,R[,tt]...\n", argv[0]);
        return 2;
    }
    int w, h;
    unsigned char *px = read_pgm(argv[1], &w, &h);
    if (!px) {
        fprintf(stderr, "cannot read 8-bit binary PGM %s\n", argv[1]);
        return 1;
    }
    const int gx = atoi(argv[2]), gy = atoi(argv[3]);
    const char *prefix = argv[4];
    const size_t n = (size_t)w * h;
    double *gray = malloc(n * sizeof *gray), *tt = malloc(n * sizeof *tt);
    uint8_t *codes = malloc(n);
    const size_t max_hist = (size_t)gx * gy * (size_t)lk_lbp_nri_uniform_labels(LK_LBP_MAX_POINTS);
    double *hist = malloc((max_hist ? max_hist : 1) * sizeof *hist);
    int rc = 1, have_tt = 0;
    lk_error err = {0};
    if (!gray || !tt || !codes || !hist || gx < 1 || gy < 1)
        goto out;
    for (size_t i = 0; i < n; i++)
        gray[i] = px[i] / 255.0;
    for (int a = 5; a < argc; a++) {
        int P = 0;
        double R = 0;
        char mode[8] = "";
        if (sscanf(argv[a], "%d,%lf,%7s", &P, &R, mode) < 2) {
            snprintf(err.message, sizeof err.message, "bad spec '%s' (want P,R or P,R,tt)",
                     argv[a]);
            goto out;
        }
        const int use_tt = strcmp(mode, "tt") == 0;
        if (use_tt && !have_tt) {
            const lk_tan_triggs_params tp = lk_tan_triggs_default();
            if (lk_tan_triggs(gray, w, h, &tp, tt, &err) != LK_OK)
                goto out;
            if (!write_file(prefix, ".tt.f64", tt, n * sizeof *tt)) {
                snprintf(err.message, sizeof err.message, "cannot write outputs at %s", prefix);
                goto out;
            }
            have_tt = 1;
        }
        const int labels = lk_lbp_nri_uniform_labels(P);
        if (lk_lbp_nri_uniform(use_tt ? tt : gray, w, h, P, R, codes, &err) != LK_OK ||
            lk_lbp_histograms(codes, w, h, labels, gx, gy, hist, &err) != LK_OK)
            goto out;
        char suffix[64];
        snprintf(suffix, sizeof suffix, ".%d.codes.u8", a - 5);
        int ok = write_file(prefix, suffix, codes, n);
        snprintf(suffix, sizeof suffix, ".%d.hist.f64", a - 5);
        ok = ok && write_file(prefix, suffix, hist, (size_t)gx * gy * labels * sizeof *hist);
        if (!ok) {
            snprintf(err.message, sizeof err.message, "cannot write outputs at %s", prefix);
            goto out;
        }
    }
    rc = 0;
out:
    if (rc)
        fprintf(stderr, "lkt_features_lbp: %s\n", err.message[0] ? err.message : "out of memory");
    free(px);
    free(gray);
    free(tt);
    free(codes);
    free(hist);
    return rc;
}
