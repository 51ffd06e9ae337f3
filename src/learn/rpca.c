/* Randomized PCA by subspace iteration: Halko, Martinsson & Tropp, SIAM
 * Review 53(2):217-288, 2011. Algorithm 4.4 (randomized subspace iteration)
 * finds an orthonormal basis Q of the dominant range of the centred data Xc;
 * Algorithm 5.1 (direct SVD) takes the SVD of the small matrix B = Q^T Xc.
 * Here B B^T (l x l) is diagonalised by cyclic Jacobi (Golub & Van Loan,
 * Matrix Computations, 4th ed., section 8.5.3), and the right singular
 * vectors V = B^T U S^-1 are the principal axes. */
#include <math.h>
#include <pthread.h>
#include <stdlib.h>
#include <string.h>

#include "likeness/learn.h"

enum { ROW_BLOCK = 32 };

void lk_rpca_params_default(lk_rpca_params *p)
{
    p->n_components = 100;
    p->oversampling = 20;  /* Halko et al. section 4.2 suggest p = 5 or 10; more is cheap here */
    p->power_iterations = 2;
    p->whiten = 0;
    p->threads = 0;
    p->seed = 1;
}

/* ---- the two large products, blocked so each row of the d x l operand is
 * read once per block of ROW_BLOCK samples, not once per sample ---- */

typedef struct mm_job {
    const float *x;
    size_t n, d, l;
    const float *w; /* d x l (x_times) or n x l (xt_times) */
    float *out;     /* n x l (x_times) or d x l (xt_times) */
    size_t lo, hi;  /* rows of out this thread owns */
} mm_job;

/* out[i] = x[i] * W for rows i in [lo, hi). */
static void *x_times(void *arg)
{
    mm_job *j = arg;
    const size_t l = j->l, d = j->d;
    for (size_t i0 = j->lo; i0 < j->hi; i0 += ROW_BLOCK) {
        size_t i1 = i0 + ROW_BLOCK < j->hi ? i0 + ROW_BLOCK : j->hi;
        for (size_t i = i0; i < i1; i++)
            memset(j->out + i * l, 0, l * sizeof(float));
        for (size_t c = 0; c < d; c++) {
            const float *restrict wr = j->w + c * l;
            for (size_t i = i0; i < i1; i++) {
                const float a = j->x[i * d + c];
                float *restrict o = j->out + i * l;
                for (size_t t = 0; t < l; t++)
                    o[t] += a * wr[t];
            }
        }
    }
    return NULL;
}

/* out[c] = sum_i x[i][c] * Q[i] for feature rows c in [lo, hi). */
static void *xt_times(void *arg)
{
    mm_job *j = arg;
    const size_t l = j->l, d = j->d;
    for (size_t c = j->lo; c < j->hi; c++)
        memset(j->out + c * l, 0, l * sizeof(float));
    for (size_t i0 = 0; i0 < j->n; i0 += ROW_BLOCK) {
        size_t i1 = i0 + ROW_BLOCK < j->n ? i0 + ROW_BLOCK : j->n;
        for (size_t c = j->lo; c < j->hi; c++) {
            float *restrict o = j->out + c * l;
            for (size_t i = i0; i < i1; i++) {
                const float a = j->x[i * d + c];
                const float *restrict q = j->w + i * l;
                for (size_t t = 0; t < l; t++)
                    o[t] += a * q[t];
            }
        }
    }
    return NULL;
}

static void run2(void *(*fn)(void *), mm_job base, size_t rows, int threads)
{
    mm_job jobs[2] = {base, base};
    size_t half = threads > 1 ? rows / 2 : rows;
    jobs[0].lo = 0;
    jobs[0].hi = half;
    jobs[1].lo = half;
    jobs[1].hi = rows;
    pthread_t tid;
    int started = threads > 1 && pthread_create(&tid, NULL, fn, &jobs[1]) == 0;
    fn(&jobs[0]);
    if (started)
        pthread_join(tid, NULL);
    else if (half < rows)
        fn(&jobs[1]);
}

/* Xc W = X W - 1 (mu W): the centring is applied to the product, so X is
 * never copied. */
static void centred_x_times(const float *x, size_t n, size_t d, const double *mu, const float *w,
                            size_t l, float *out, double *tmp, int threads)
{
    mm_job b = {x, n, d, l, w, out, 0, 0};
    run2(x_times, b, n, threads);
    for (size_t t = 0; t < l; t++)
        tmp[t] = 0;
    for (size_t c = 0; c < d; c++)
        for (size_t t = 0; t < l; t++)
            tmp[t] += mu[c] * w[c * l + t];
    for (size_t i = 0; i < n; i++)
        for (size_t t = 0; t < l; t++)
            out[i * l + t] -= (float)tmp[t];
}

/* Xc^T Q = X^T Q - mu (1^T Q). */
static void centred_xt_times(const float *x, size_t n, size_t d, const double *mu, const float *q,
                             size_t l, float *out, double *tmp, int threads)
{
    mm_job b = {x, n, d, l, q, out, 0, 0};
    run2(xt_times, b, d, threads);
    for (size_t t = 0; t < l; t++)
        tmp[t] = 0;
    for (size_t i = 0; i < n; i++)
        for (size_t t = 0; t < l; t++)
            tmp[t] += q[i * l + t];
    for (size_t c = 0; c < d; c++)
        for (size_t t = 0; t < l; t++)
            out[c * l + t] -= (float)(mu[c] * tmp[t]);
}

/* Orthonormalises the l columns of A (m x l, row-major) in place by modified
 * Gram-Schmidt applied twice ("twice is enough": Giraud, Langou & Rozloznik,
 * Comput. Math. Appl. 2005), accumulating in double. Columns that vanish are
 * left zero. */
static void orthonormalise(float *a, size_t m, size_t l, double *col, double *prev)
{
    for (size_t t = 0; t < l; t++) {
        for (size_t i = 0; i < m; i++)
            col[i] = a[i * l + t];
        for (int pass = 0; pass < 2; pass++)
            for (size_t s = 0; s < t; s++) {
                double dot = 0;
                for (size_t i = 0; i < m; i++) {
                    prev[i] = a[i * l + s];
                    dot += prev[i] * col[i];
                }
                for (size_t i = 0; i < m; i++)
                    col[i] -= dot * prev[i];
            }
        double nrm = 0;
        for (size_t i = 0; i < m; i++)
            nrm += col[i] * col[i];
        nrm = sqrt(nrm);
        double inv = nrm > 1e-30 ? 1.0 / nrm : 0.0;
        for (size_t i = 0; i < m; i++)
            a[i * l + t] = (float)(col[i] * inv);
    }
}

/* Cyclic Jacobi: Golub & Van Loan, 4th ed., Algorithms 8.5.1 (symmetric
 * Schur) and 8.5.3. See learn.h. */
void lk_symmetric_eigen(double *a, double *v, size_t l)
{
    for (size_t i = 0; i < l; i++)
        for (size_t j = 0; j < l; j++)
            v[i * l + j] = i == j;
    for (int sweep = 0; sweep < 60; sweep++) {
        double off = 0, diag = 0;
        for (size_t i = 0; i < l; i++) {
            diag += a[i * l + i] * a[i * l + i];
            for (size_t j = i + 1; j < l; j++)
                off += a[i * l + j] * a[i * l + j];
        }
        if (off <= 1e-26 * diag)
            break;
        for (size_t p = 0; p < l; p++)
            for (size_t q = p + 1; q < l; q++) {
                double apq = a[p * l + q];
                if (fabs(apq) < 1e-300)
                    continue;
                double tau = (a[q * l + q] - a[p * l + p]) / (2 * apq);
                double t = (tau >= 0 ? 1.0 : -1.0) / (fabs(tau) + sqrt(1 + tau * tau));
                double c = 1 / sqrt(1 + t * t), s = t * c;
                for (size_t k = 0; k < l; k++) { /* A <- A J (columns p, q) */
                    double akp = a[k * l + p], akq = a[k * l + q];
                    a[k * l + p] = c * akp - s * akq;
                    a[k * l + q] = s * akp + c * akq;
                }
                for (size_t k = 0; k < l; k++) { /* A <- J^T A (rows p, q) */
                    double apk = a[p * l + k], aqk = a[q * l + k];
                    a[p * l + k] = c * apk - s * aqk;
                    a[q * l + k] = s * apk + c * aqk;
                }
                for (size_t k = 0; k < l; k++) {
                    double vkp = v[k * l + p], vkq = v[k * l + q];
                    v[k * l + p] = c * vkp - s * vkq;
                    v[k * l + q] = s * vkp + c * vkq;
                }
            }
    }
}

lk_code lk_pca_fit_randomized(const float *x, size_t n, size_t d, const lk_rpca_params *params,
                              lk_pca **out, lk_error *err)
{
    if (!x || !params || !out)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_pca_fit_randomized: NULL argument");
    *out = NULL;
    const size_t k = params->n_components;
    size_t l = k + params->oversampling;
    size_t r = n - 1 < d ? n - 1 : d;
    if (n < 2 || k == 0 || k > r)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "randomized PCA needs 1 <= components <= min(n-1, d); got n=%zu, "
                            "d=%zu, components=%zu", n, d, k);
    if (l > r)
        l = r;
    const int threads = params->threads == 1 ? 1 : 2;
    double *mu = calloc(d, sizeof *mu), *tmp = malloc(l * sizeof *tmp);
    size_t big = n > d ? n : d;
    double *col = malloc(big * sizeof *col), *prev = malloc(big * sizeof *prev);
    float *omega = malloc(d * l * sizeof *omega), *y = malloc(n * l * sizeof *y);
    double *g = malloc(l * l * sizeof *g), *u = malloc(l * l * sizeof *u);
    double *comp = malloc(k * d * sizeof *comp), *var = malloc(k * sizeof *var);
    size_t *order = malloc(l * sizeof *order);
    lk_code rc = LK_OK;
    if (!mu || !tmp || !col || !prev || !omega || !y || !g || !u || !comp || !var || !order) {
        rc = lk_error_set(err, LK_ERR_NOMEM, "out of memory for randomized PCA of %zu x %zu", n, d);
        goto done;
    }
    for (size_t i = 0; i < n; i++)
        for (size_t c = 0; c < d; c++)
            mu[c] += x[i * d + c];
    for (size_t c = 0; c < d; c++) {
        mu[c] /= (double)n;
        if (!isfinite(mu[c])) {
            rc = lk_error_set(err, LK_ERR_DATA, "feature %zu is not finite in the PCA data", c);
            goto done;
        }
    }
    /* Gaussian test matrix by Box-Muller (Box & Muller, Ann. Math. Stat. 1958). */
    lk_rng rng;
    lk_rng_seed(&rng, params->seed);
    for (size_t i = 0; i < d * l; i += 2) {
        double u1 = lk_rng_uniform(&rng), u2 = lk_rng_uniform(&rng);
        double rad = sqrt(-2 * log(u1 > 0 ? u1 : 1e-300));
        omega[i] = (float)(rad * cos(2 * 3.14159265358979323846 * u2));
        if (i + 1 < d * l)
            omega[i + 1] = (float)(rad * sin(2 * 3.14159265358979323846 * u2));
    }
    /* omega (d x l) is reused as Z = Xc^T Q below. */
    centred_x_times(x, n, d, mu, omega, l, y, tmp, threads);
    orthonormalise(y, n, l, col, prev);
    for (int it = 0; it < params->power_iterations; it++) {
        centred_xt_times(x, n, d, mu, y, l, omega, tmp, threads);
        orthonormalise(omega, d, l, col, prev);
        centred_x_times(x, n, d, mu, omega, l, y, tmp, threads);
        orthonormalise(y, n, l, col, prev);
    }
    /* B^T = Xc^T Q (d x l); G = B B^T = (B^T)^T B^T. */
    centred_xt_times(x, n, d, mu, y, l, omega, tmp, threads);
    for (size_t a = 0; a < l; a++)
        for (size_t b = a; b < l; b++) {
            double s = 0;
            for (size_t c = 0; c < d; c++)
                s += (double)omega[c * l + a] * omega[c * l + b];
            g[a * l + b] = g[b * l + a] = s;
        }
    lk_symmetric_eigen(g, u, l);
    /* Eigenvalues (squared singular values) in descending order. */
    for (size_t a = 0; a < l; a++)
        order[a] = a;
    for (size_t a = 1; a < l; a++) {
        size_t key = order[a], b = a;
        while (b > 0 && g[order[b - 1] * l + order[b - 1]] < g[key * l + key]) {
            order[b] = order[b - 1];
            b--;
        }
        order[b] = key;
    }
    for (size_t t = 0; t < k; t++) {
        size_t e = order[t];
        double s2 = g[e * l + e];
        double s = s2 > 0 ? sqrt(s2) : 0;
        var[t] = s2 / (double)(n - 1);
        /* v = B^T u / s: a principal axis, unit length by construction. */
        double nrm = 0;
        for (size_t c = 0; c < d; c++) {
            double acc = 0;
            for (size_t a = 0; a < l; a++)
                acc += (double)omega[c * l + a] * u[a * l + e];
            comp[t * d + c] = s > 0 ? acc / s : 0;
            nrm += comp[t * d + c] * comp[t * d + c];
        }
        /* Sign convention: the largest-magnitude coordinate positive, as the
         * exact fit does, so both give the same axes. */
        size_t best = 0;
        for (size_t c = 1; c < d; c++)
            if (fabs(comp[t * d + c]) > fabs(comp[t * d + best]))
                best = c;
        double sg = comp[t * d + best] < 0 ? -1.0 : 1.0;
        double inv = nrm > 0 ? sg / sqrt(nrm) : 0;
        for (size_t c = 0; c < d; c++)
            comp[t * d + c] *= inv;
    }
    rc = lk_pca_from_parts(d, k, mu, comp, var, params->whiten, out, err);
done:
    free(mu);
    free(tmp);
    free(col);
    free(prev);
    free(omega);
    free(y);
    free(g);
    free(u);
    free(comp);
    free(var);
    free(order);
    return rc;
}
