/* Platt scaling: P(genuine | f) = 1 / (1 + exp(A f + B)).
 *
 * J. Platt, "Probabilistic outputs for support vector machines and
 * comparisons to regularized likelihood methods", in Advances in Large
 * Margin Classifiers, MIT Press, 2000 (model and target priors), fitted
 * with the improved algorithm of H.-T. Lin, C.-J. Lin, R. C. Weng, "A note
 * on Platt's probabilistic outputs for support vector machines", Machine
 * Learning 68, 2007 (Algorithm 1: Newton's method with backtracking line
 * search, overflow-safe evaluation of log(1 + exp(.)); constants
 * maxiter 100, minstep 1e-10, sigma 1e-12, stopping |g| < 1e-5, and the
 * Armijo factor 1e-4 are theirs). */
#include "likeness/learn.h"

#include <math.h>

void lk_platt_params_default(lk_platt_params *p)
{
    p->max_iter = 100;
    p->min_step = 1e-10;
    p->sigma = 1e-12;
    p->gtol = 1e-5;
}

double lk_platt_probability(const lk_platt *p, double f)
{
    const double fApB = f * p->A + p->B;
    /* Either branch keeps exp's argument <= 0 (Lin et al. 2007, Sec. 3). */
    if (fApB >= 0)
        return exp(-fApB) / (1.0 + exp(-fApB));
    return 1.0 / (1.0 + exp(fApB));
}

/* Negative log-likelihood with targets t (Lin et al. 2007, eq. 5), written
 * so that exp never overflows. */
static double objective(const double *f, const int *y, size_t n, double hi, double lo, double A,
                        double B)
{
    double v = 0.0;
    for (size_t i = 0; i < n; i++) {
        const double t = y[i] > 0 ? hi : lo;
        const double fApB = f[i] * A + B;
        if (fApB >= 0)
            v += t * fApB + log1p(exp(-fApB));
        else
            v += (t - 1.0) * fApB + log1p(exp(fApB));
    }
    return v;
}

lk_code lk_platt_fit(const double *f, const int *y, size_t n, const lk_platt_params *params,
                     lk_platt *out, lk_error *err)
{
    if (!f || !y || !out)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_platt_fit: NULL argument");
    lk_platt_params def;
    if (!params) {
        lk_platt_params_default(&def);
        params = &def;
    }
    double prior1 = 0, prior0 = 0;
    for (size_t i = 0; i < n; i++) {
        if (!isfinite(f[i]))
            return lk_error_set(err, LK_ERR_DATA, "decision value %zu is not finite", i);
        if (y[i] > 0)
            prior1 += 1;
        else
            prior0 += 1;
    }
    if (prior1 == 0 || prior0 == 0)
        return lk_error_set(err, LK_ERR_DATA, "calibration needs genuine and impostor scores; got %.0f "
                            "genuine and %.0f impostor", prior1, prior0);
    /* Platt 2000, Sec. 2.2: targets from a uniform prior on the labels, so
     * the fit does not overshoot to probabilities of exactly 0 or 1. */
    const double hi = (prior1 + 1.0) / (prior1 + 2.0);
    const double lo = 1.0 / (prior0 + 2.0);
    double A = 0.0, B = log((prior0 + 1.0) / (prior1 + 1.0));
    double fval = objective(f, y, n, hi, lo, A, B);
    for (int it = 0; it < params->max_iter; it++) {
        double h11 = params->sigma, h22 = params->sigma, h21 = 0.0, g1 = 0.0, g2 = 0.0;
        for (size_t i = 0; i < n; i++) {
            const double fApB = f[i] * A + B;
            double p, q;
            if (fApB >= 0) {
                p = exp(-fApB) / (1.0 + exp(-fApB));
                q = 1.0 / (1.0 + exp(-fApB));
            } else {
                p = 1.0 / (1.0 + exp(fApB));
                q = exp(fApB) / (1.0 + exp(fApB));
            }
            const double d2 = p * q;
            h11 += f[i] * f[i] * d2;
            h22 += d2;
            h21 += f[i] * d2;
            const double d1 = (y[i] > 0 ? hi : lo) - p;
            g1 += f[i] * d1;
            g2 += d1;
        }
        if (fabs(g1) < params->gtol && fabs(g2) < params->gtol)
            break;
        const double det = h11 * h22 - h21 * h21;
        const double dA = -(h22 * g1 - h21 * g2) / det;
        const double dB = -(-h21 * g1 + h11 * g2) / det;
        const double gd = g1 * dA + g2 * dB;
        double step = 1.0;
        while (step >= params->min_step) {
            const double nA = A + step * dA, nB = B + step * dB;
            const double nf = objective(f, y, n, hi, lo, nA, nB);
            if (nf < fval + 1e-4 * step * gd) {
                A = nA;
                B = nB;
                fval = nf;
                break;
            }
            step /= 2.0;
        }
        /* Line search failure means no further decrease is representable:
         * the current point is as good as the arithmetic allows. */
        if (step < params->min_step)
            break;
    }
    out->A = A;
    out->B = B;
    return LK_OK;
}
