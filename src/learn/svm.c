/* Two-class linear SVM, L2-regularised, with hinge (L1) or squared hinge
 * (L2) loss, solved in the dual by coordinate descent:
 *   C.-J. Hsieh, K.-W. Chang, C.-J. Lin, S. S. Keerthi, S. Sundararajan,
 *   "A dual coordinate descent method for large-scale linear SVM",
 *   ICML 2008 (Algorithm 1 and the shrinking of Algorithm 2, Section 3.2),
 * in the form liblinear implements it (R.-E. Fan et al., "LIBLINEAR: A
 * library for large linear classification", JMLR 9, 2008; its function
 * solve_l2r_l1l2_svc): the bias is a constant feature B appended to every
 * x, so its weight is regularised like the others, and the stopping rule is
 * max - min of the projected gradient <= eps (liblinear's default eps 0.1). */
#include "likeness/learn.h"

#include <math.h>
#include <stdlib.h>
#include <string.h>

void lk_svm_params_default(lk_svm_params *p)
{
    p->loss = LK_SVM_HINGE;
    p->C = 1.0;
    p->eps = 0.1;        /* liblinear's default for the dual solvers */
    p->bias = 1.0;       /* liblinear's -B 1 */
    p->max_iter = 1000;  /* liblinear's default cap on outer iterations */
    p->shrinking = 1;
    p->seed = 1;
}

void lk_linear_model_free(lk_linear_model *m)
{
    if (m) {
        free(m->w);
        m->w = NULL;
        m->dim = 0;
    }
}

double lk_linear_model_decision(const lk_linear_model *m, const float *x)
{
    double s = m->b;
    for (size_t j = 0; j < m->dim; j++)
        s += m->w[j] * (double)x[j];
    return s;
}

static double dot_fd(const float *x, const double *w, size_t d)
{
    double s = 0;
    for (size_t j = 0; j < d; j++)
        s += (double)x[j] * w[j];
    return s;
}

lk_code lk_svm_train(const float *x, const int *y, size_t n, size_t d, const lk_svm_params *params,
                     lk_linear_model *out, lk_error *err)
{
    if (!x || !y || !out || !params)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_svm_train: NULL argument");
    memset(out, 0, sizeof *out);
    if (n == 0 || d == 0)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_svm_train: empty training set (%zu x %zu)",
                            n, d);
    if (!(params->C > 0) || !isfinite(params->C) || !(params->eps > 0) || params->max_iter <= 0 ||
        !(params->bias >= 0) || !isfinite(params->bias) ||
        (params->loss != LK_SVM_HINGE && params->loss != LK_SVM_SQUARED_HINGE))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "lk_svm_train: need C > 0, eps > 0, max_iter > 0, bias >= 0 and a known loss");
    size_t n_pos = 0;
    for (size_t i = 0; i < n; i++) {
        if (y[i] != 1 && y[i] != -1)
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "label %zu is %d; labels must be +1 or -1",
                                i, y[i]);
        n_pos += y[i] == 1;
    }
    if (n_pos == 0 || n_pos == n)
        return lk_error_set(err, LK_ERR_DATA, "training needs both classes; got %zu positive of %zu",
                            n_pos, n);
    for (size_t k = 0; k < n * d; k++)
        if (!isfinite(x[k]))
            return lk_error_set(err, LK_ERR_DATA, "training feature %zu of sample %zu is not finite",
                                k % d, k / d);

    const double B = params->bias;
    const double C = params->C;
    /* Hsieh et al. 2008, Table 1: L1-loss has U = C, D_ii = 0; L2-loss has
     * U = infinity, D_ii = 1/(2C). */
    const double diag = params->loss == LK_SVM_HINGE ? 0.0 : 0.5 / C;
    const double U = params->loss == LK_SVM_HINGE ? C : INFINITY;

    double *w = calloc(d + 1, sizeof *w);
    double *alpha = calloc(n, sizeof *alpha);
    double *QD = malloc(n * sizeof *QD);
    size_t *index = malloc(n * sizeof *index);
    if (!w || !alpha || !QD || !index) {
        free(w);
        free(alpha);
        free(QD);
        free(index);
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory training on %zu x %zu", n, d);
    }
    for (size_t i = 0; i < n; i++) {
        const float *xi = x + i * d;
        double q = diag + B * B;
        for (size_t j = 0; j < d; j++)
            q += (double)xi[j] * xi[j];
        QD[i] = q;
        index[i] = i;
    }

    lk_rng rng;
    lk_rng_seed(&rng, params->seed);
    size_t active = n;
    /* liblinear starts the shrinking bounds at +-infinity. */
    double PGmax_old = INFINITY, PGmin_old = -INFINITY;
    int iter = 0, converged = 0;
    while (iter < params->max_iter) {
        double PGmax_new = -INFINITY, PGmin_new = INFINITY;
        /* Random order each pass (Hsieh et al. 2008, Section 3.1). */
        lk_rng_shuffle(&rng, index, active);
        size_t s = 0;
        while (s < active) {
            const size_t i = index[s];
            const double yi = (double)y[i];
            const float *xi = x + i * d;
            const double G = yi * (dot_fd(xi, w, d) + w[d] * B) - 1.0 + diag * alpha[i];
            double PG = 0.0;
            if (alpha[i] == 0.0) {
                if (params->shrinking && G > PGmax_old) {
                    /* Shrink: this variable is likely to stay at its bound. */
                    active--;
                    index[s] = index[active];
                    index[active] = i;
                    continue;
                }
                if (G < 0)
                    PG = G;
            } else if (alpha[i] == U) {
                if (params->shrinking && G < PGmin_old) {
                    active--;
                    index[s] = index[active];
                    index[active] = i;
                    continue;
                }
                if (G > 0)
                    PG = G;
            } else {
                PG = G;
            }
            if (PG > PGmax_new)
                PGmax_new = PG;
            if (PG < PGmin_new)
                PGmin_new = PG;
            /* 1e-12: liblinear's test for "gradient is zero", avoiding
             * updates that change nothing. */
            if (fabs(PG) > 1e-12) {
                const double old = alpha[i];
                double a;
                if (QD[i] > 0) {
                    a = old - G / QD[i];
                } else {
                    a = G < 0 ? U : 0.0; /* x = 0 and no bias: the loss term alone decides */
                }
                a = a < 0 ? 0 : (a > U ? U : a);
                alpha[i] = a;
                const double dd = (a - old) * yi;
                for (size_t j = 0; j < d; j++)
                    w[j] += dd * (double)xi[j];
                w[d] += dd * B;
            }
            s++;
        }
        iter++;
        if (PGmax_new - PGmin_new <= params->eps) {
            if (active == n) {
                converged = 1;
                break;
            }
            /* Converged on the shrunk problem: check again on all variables. */
            active = n;
            PGmax_old = INFINITY;
            PGmin_old = -INFINITY;
            continue;
        }
        PGmax_old = PGmax_new;
        PGmin_old = PGmin_new;
        if (PGmax_old <= 0)
            PGmax_old = INFINITY;
        if (PGmin_old >= 0)
            PGmin_old = -INFINITY;
    }

    /* Primal objective (Hsieh et al. 2008, eq. 1) with the bias weight
     * included in the regulariser, as liblinear optimises it. */
    double reg = 0.0;
    for (size_t j = 0; j <= d; j++)
        reg += w[j] * w[j];
    double loss = 0.0;
    for (size_t i = 0; i < n; i++) {
        const double m = 1.0 - (double)y[i] * (dot_fd(x + i * d, w, d) + w[d] * B);
        if (m > 0)
            loss += params->loss == LK_SVM_HINGE ? m : m * m;
    }
    out->dim = d;
    out->w = w;
    out->b = w[d] * B;
    out->objective = 0.5 * reg + C * loss;
    out->iterations = iter;
    out->converged = converged;
    free(alpha);
    free(QD);
    free(index);
    return LK_OK;
}
