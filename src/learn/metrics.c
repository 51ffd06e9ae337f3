/* Verification performance metrics, with the definitions of ISO/IEC
 * 19795-1:2021 (biometric performance testing and reporting):
 *   FMR(t)  = share of impostor comparisons with score >= t,
 *   FNMR(t) = share of genuine comparisons with score < t.
 * The ROC holds one point per distinct score, as scikit-learn's roc_curve
 * with drop_intermediate=False does, so tied scores move FMR and FNMR
 * together and the trapezoid area counts a tie as half a correct ordering
 * (the Mann-Whitney statistic; J. A. Hanley, B. J. McNeil, Radiology 143,
 * 1982). */
#include "likeness/learn.h"

#include <math.h>
#include <stdlib.h>
#include <string.h>

typedef struct scored {
    double s;
    int g;
} scored;

static int by_score_desc(const void *a, const void *b)
{
    const double x = ((const scored *)a)->s, y = ((const scored *)b)->s;
    return (x < y) - (x > y);
}

void lk_roc_free(lk_roc *roc)
{
    if (roc) {
        free(roc->points);
        roc->points = NULL;
        roc->count = 0;
    }
}

lk_code lk_roc_compute(const double *scores, const int *genuine, size_t n, lk_roc *out, lk_error *err)
{
    if (!scores || !genuine || !out)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_roc_compute: NULL argument");
    memset(out, 0, sizeof *out);
    size_t ng = 0;
    for (size_t i = 0; i < n; i++) {
        if (isnan(scores[i]))
            return lk_error_set(err, LK_ERR_DATA, "comparison score %zu is NaN", i);
        ng += genuine[i] != 0;
    }
    const size_t ni = n - ng;
    if (ng == 0 || ni == 0)
        return lk_error_set(err, LK_ERR_DATA, "a ROC needs genuine and impostor comparisons; got %zu "
                            "genuine and %zu impostor", ng, ni);
    scored *v = malloc(n * sizeof *v);
    lk_roc_point *pts = malloc((n + 1) * sizeof *pts);
    if (!v || !pts) {
        free(v);
        free(pts);
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory for a ROC of %zu scores", n);
    }
    for (size_t i = 0; i < n; i++)
        v[i] = (scored){scores[i], genuine[i] != 0};
    qsort(v, n, sizeof *v, by_score_desc);
    size_t k = 0, tp = 0, fp = 0;
    pts[k++] = (lk_roc_point){INFINITY, 0.0, 1.0};
    for (size_t i = 0; i < n;) {
        const double s = v[i].s;
        while (i < n && v[i].s == s) {
            tp += (size_t)v[i].g;
            fp += (size_t)!v[i].g;
            i++;
        }
        pts[k++] = (lk_roc_point){s, (double)fp / (double)ni, 1.0 - (double)tp / (double)ng};
    }
    free(v);
    out->points = pts;
    out->count = k;
    out->n_genuine = ng;
    out->n_impostor = ni;
    return LK_OK;
}

double lk_roc_auc(const lk_roc *roc)
{
    /* Trapezoids summed in counts, (dFP)(TP_k + TP_k-1) / (2 N_imp N_gen):
     * the terms are integers, so the sum is exact below 2^53 and the only
     * rounding is the final division. */
    const double ng = (double)roc->n_genuine, ni = (double)roc->n_impostor;
    double a = 0.0, fp_prev = 0.0, tp_prev = 0.0;
    for (size_t k = 1; k < roc->count; k++) {
        const double fp = (double)llround(roc->points[k].fmr * ni);
        const double tp = (double)llround((1.0 - roc->points[k].fnmr) * ng);
        a += (fp - fp_prev) * (tp + tp_prev);
        fp_prev = fp;
        tp_prev = tp;
    }
    return a / (2.0 * ni * ng);
}

/* EER: going down the thresholds, FMR rises and FNMR falls. Take the first
 * ROC point k where FNMR <= FMR; between it and point k-1 the achievable
 * (FMR, FNMR) pairs lie on a straight segment (randomising between the two
 * thresholds), and the EER is where that segment meets FMR = FNMR:
 *   with D = FNMR - FMR, t = D[k-1] / (D[k-1] - D[k]),
 *   EER = FMR[k-1] + t (FMR[k] - FMR[k-1]).
 * Any point on the segment between two ROC points is reached by choosing
 * at random between their thresholds (T. Fawcett, "An introduction to ROC
 * analysis", Pattern Recognition Letters 27, 2006; recalled from memory).
 * The reported threshold is point k's, the highest at which FMR >= FNMR. */
double lk_roc_eer(const lk_roc *roc, double *threshold)
{
    for (size_t k = 1; k < roc->count; k++) {
        const lk_roc_point *p = &roc->points[k - 1], *q = &roc->points[k];
        const double dq = q->fnmr - q->fmr;
        if (dq <= 0) {
            const double dp = p->fnmr - p->fmr;
            const double t = dp / (dp - dq);
            if (threshold)
                *threshold = q->threshold;
            return p->fmr + t * (q->fmr - p->fmr);
        }
    }
    /* Unreachable for a well-formed ROC: its last point has FNMR 0, FMR 1. */
    if (threshold)
        *threshold = NAN;
    return NAN;
}

double lk_rule_of_30_min_rate(size_t n_trials)
{
    /* "Rule of 30": at least 30 errors are needed for 90 % confidence that
     * the true rate is within +-30 % of the measured one (G. R. Doddington,
     * M. A. Przybocki, A. F. Martin, D. A. Reynolds, "The NIST speaker
     * recognition evaluation", Speech Communication 31, 2000; common
     * practice in biometric testing), so n trials support rates >= 30 / n. */
    return n_trials ? 30.0 / (double)n_trials : INFINITY;
}

void lk_wilson_interval(size_t errors, size_t trials, double z, double *lo, double *hi)
{
    if (trials == 0) {
        *lo = 0.0;
        *hi = 1.0;
        return;
    }
    /* E. B. Wilson, "Probable inference, the law of succession, and
     * statistical inference", J. American Statistical Association 22, 1927:
     *   (p + z^2/2n +- z sqrt(p(1-p)/n + z^2/4n^2)) / (1 + z^2/n). */
    const double nn = (double)trials, p = (double)errors / nn, z2 = z * z;
    const double centre = (p + z2 / (2 * nn)) / (1 + z2 / nn);
    const double half = z * sqrt(p * (1 - p) / nn + z2 / (4 * nn * nn)) / (1 + z2 / nn);
    *lo = fmax(0.0, centre - half);
    *hi = fmin(1.0, centre + half);
}

/* 1.959964: the 97.5 % quantile of the standard normal, for 95 % intervals. */
#define Z95 1.959963984540054

lk_operating_point lk_roc_at_fmr(const lk_roc *roc, double target_fmr)
{
    /* The ROC's FMR never decreases along the list, so the last point with
     * FMR <= target has the smallest such threshold (the most genuine
     * comparisons accepted without exceeding the target). Point 0 (t = +inf,
     * FMR 0) always qualifies. */
    size_t best = 0;
    for (size_t k = 0; k < roc->count; k++)
        if (roc->points[k].fmr <= target_fmr)
            best = k;
    const lk_roc_point *p = &roc->points[best];
    lk_operating_point op;
    op.target_fmr = target_fmr;
    op.threshold = p->threshold;
    op.fmr = p->fmr;
    op.fnmr = p->fnmr;
    const size_t fm = (size_t)llround(p->fmr * (double)roc->n_impostor);
    const size_t fnm = (size_t)llround(p->fnmr * (double)roc->n_genuine);
    lk_wilson_interval(fm, roc->n_impostor, Z95, &op.fmr_ci[0], &op.fmr_ci[1]);
    lk_wilson_interval(fnm, roc->n_genuine, Z95, &op.fnmr_ci[0], &op.fnmr_ci[1]);
    op.supported = target_fmr >= lk_rule_of_30_min_rate(roc->n_impostor);
    return op;
}

void lk_roc_operating_table(const lk_roc *roc, const double *targets, size_t n, lk_operating_point *out)
{
    for (size_t i = 0; i < n; i++)
        out[i] = lk_roc_at_fmr(roc, targets[i]);
}

double lk_accuracy_at(const double *scores, const int *genuine, size_t n, double t)
{
    if (n == 0)
        return NAN;
    size_t ok = 0;
    for (size_t i = 0; i < n; i++)
        ok += genuine[i] ? scores[i] >= t : scores[i] < t;
    return (double)ok / (double)n;
}

lk_code lk_best_accuracy_threshold(const double *scores, const int *genuine, size_t n,
                                   double *threshold, double *accuracy, lk_error *err)
{
    if (!scores || !genuine || !threshold)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_best_accuracy_threshold: NULL argument");
    lk_roc roc;
    lk_code rc = lk_roc_compute(scores, genuine, n, &roc, err);
    if (rc != LK_OK)
        return rc;
    const double ng = (double)roc.n_genuine, ni = (double)roc.n_impostor;
    size_t best = 0;
    double best_correct = -1.0;
    for (size_t k = 0; k < roc.count; k++) {
        /* correct = accepted genuine + rejected impostor, counted exactly. */
        const double correct = llround((1.0 - roc.points[k].fnmr) * ng) +
                               llround((1.0 - roc.points[k].fmr) * ni);
        if (correct > best_correct) { /* strict: ties keep the higher threshold */
            best_correct = correct;
            best = k;
        }
    }
    /* Midway to the next lower distinct score (common practice), so the
     * training decisions are unchanged and unseen scores in the gap are
     * split evenly. */
    double t;
    if (best == 0)
        t = nextafter(roc.points[1].threshold, INFINITY);
    else if (best + 1 < roc.count) {
        const double a = roc.points[best].threshold, b = roc.points[best + 1].threshold;
        t = a + (b - a) * 0.5;
        if (!(t > b) || !(t <= a))
            t = a;
    } else
        t = roc.points[best].threshold;
    *threshold = t;
    if (accuracy)
        *accuracy = best_correct / (ng + ni);
    lk_roc_free(&roc);
    return LK_OK;
}

void lk_mean_stderr(const double *v, size_t k, double *mean, double *stderr_out)
{
    double m = 0.0;
    for (size_t i = 0; i < k; i++)
        m += v[i];
    m = k ? m / (double)k : NAN;
    double ss = 0.0;
    for (size_t i = 0; i < k; i++)
        ss += (v[i] - m) * (v[i] - m);
    if (mean)
        *mean = m;
    /* Sample standard deviation (denominator k - 1) over sqrt(k), the
     * standard error the LFW protocol asks for over its 10 folds (Huang et
     * al. 2007, TR 07-49; recalled from memory). 0 when k < 2. */
    if (stderr_out)
        *stderr_out = k >= 2 ? sqrt(ss / (double)(k - 1)) / sqrt((double)k) : 0.0;
}
