/* Within-class covariance normalisation: Hatch, Kajarekar & Stolcke, ICSLP
 * 2006. The inverse square root is the symmetric one, V diag(l^-1/2) V^T,
 * so the transform whitens the within-class scatter without rotating the
 * space more than it must. */
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "likeness/learn.h"


typedef struct by_label {
    size_t i;
    int label;
} by_label;

static int cmp_by_label(const void *a, const void *b)
{
    const by_label *x = a, *y = b;
    if (x->label != y->label)
        return x->label < y->label ? -1 : 1;
    return x->i < y->i ? -1 : x->i > y->i;
}

lk_code lk_wccn_fit(const float *z, const int *labels, size_t n, size_t k, double reg,
                    double *out, lk_error *err)
{
    if (!z || !labels || !out || k == 0)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_wccn_fit: bad argument");
    if (!(reg >= 0) || !isfinite(reg))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "WCCN regularisation must be >= 0");
    by_label *ord = malloc((n + 1) * sizeof *ord);
    double *sw = calloc(k * k, sizeof *sw), *mean = malloc(k * sizeof *mean);
    double *v = malloc(k * k * sizeof *v), *dev = malloc(k * sizeof *dev);
    lk_code rc = LK_OK;
    if (!ord || !sw || !mean || !v || !dev) {
        rc = lk_error_set(err, LK_ERR_NOMEM, "out of memory for WCCN of dimension %zu", k);
        goto done;
    }
    for (size_t i = 0; i < n; i++)
        ord[i] = (by_label){i, labels[i]};
    qsort(ord, n, sizeof *ord, cmp_by_label);
    size_t used = 0;
    for (size_t a = 0; a < n;) {
        size_t b = a;
        while (b < n && ord[b].label == ord[a].label)
            b++;
        size_t m = b - a;
        if (m >= 2) {
            memset(mean, 0, k * sizeof *mean);
            for (size_t t = a; t < b; t++)
                for (size_t j = 0; j < k; j++)
                    mean[j] += z[ord[t].i * k + j];
            for (size_t j = 0; j < k; j++)
                mean[j] /= (double)m;
            for (size_t t = a; t < b; t++) {
                for (size_t j = 0; j < k; j++)
                    dev[j] = z[ord[t].i * k + j] - mean[j];
                for (size_t p = 0; p < k; p++)
                    for (size_t q = p; q < k; q++)
                        sw[p * k + q] += dev[p] * dev[q];
            }
            used += m;
        }
        a = b;
    }
    if (used == 0) {
        rc = lk_error_set(err, LK_ERR_DATA,
                          "WCCN needs identities with at least two images; none has");
        goto done;
    }
    for (size_t p = 0; p < k; p++)
        for (size_t q = p; q < k; q++) {
            sw[p * k + q] /= (double)used;
            sw[q * k + p] = sw[p * k + q];
        }
    lk_symmetric_eigen(sw, v, k);
    double lmax = 0;
    for (size_t j = 0; j < k; j++)
        if (sw[j * k + j] > lmax)
            lmax = sw[j * k + j];
    /* out = V diag((lambda + reg lambda_max)^-1/2) V^T */
    for (size_t j = 0; j < k; j++) {
        double l = sw[j * k + j];
        if (l < 0)
            l = 0; /* rounding can leave a tiny negative eigenvalue */
        dev[j] = 1.0 / sqrt(l + reg * lmax + 1e-300);
    }
    for (size_t p = 0; p < k; p++)
        for (size_t q = 0; q < k; q++) {
            double s = 0;
            for (size_t j = 0; j < k; j++)
                s += v[p * k + j] * dev[j] * v[q * k + j];
            out[p * k + q] = s;
        }
done:
    free(ord);
    free(sw);
    free(mean);
    free(v);
    free(dev);
    return rc;
}
