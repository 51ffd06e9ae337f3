/* Feature standardisation and principal component analysis, both learned on
 * training data only and then applied unchanged to any later sample.
 *
 * PCA: eigen-decomposition of the sample covariance (denominator n - 1,
 * as scikit-learn's PCA.explained_variance_), or, when there are fewer
 * samples than dimensions, of the n x n Gram matrix of the centred data,
 * whose eigenvectors v map to the covariance's by u = X^T v / sqrt(lambda)
 * (the "snapshot" method: L. Sirovich, "Turbulence and the dynamics of
 * coherent structures", Q. Appl. Math. 45, 1987; M. Turk, A. Pentland,
 * "Eigenfaces for recognition", J. Cognitive Neuroscience 3(1), 1991).
 * Whitening divides each projection by sqrt(variance), as scikit-learn does.
 *
 * The symmetric eigensolver is Householder tridiagonalisation followed by
 * the implicit QL method: R. S. Martin, C. Reinsch, J. H. Wilkinson,
 * "Householder's tridiagonalization of a symmetric matrix" (tred2) and
 * H. Bowdler, R. S. Martin, C. Reinsch, J. H. Wilkinson, "The QR and QL
 * algorithms for symmetric matrices" (tql2), Numer. Math. 11 (1968), as
 * published in EISPACK and in the public-domain JAMA package; see also
 * Press et al., Numerical Recipes 3rd ed., Sections 11.3-11.4. O(d^3). */
#include "likeness/learn.h"

#include <math.h>
#include <pthread.h>
#include <stdlib.h>
#include <string.h>

/* ------------------------------------------------------ standardisation */

void lk_standardizer_free(lk_standardizer *s)
{
    if (s) {
        free(s->mean);
        free(s->scale);
        s->mean = s->scale = NULL;
        s->dim = 0;
    }
}

lk_code lk_standardizer_fit(const float *x, size_t n, size_t d, lk_standardizer *out, lk_error *err)
{
    if (!x || !out || n == 0 || d == 0)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_standardizer_fit: need a non-empty matrix");
    memset(out, 0, sizeof *out);
    double *mean = calloc(d, sizeof *mean), *scale = calloc(d, sizeof *scale);
    if (!mean || !scale) {
        free(mean);
        free(scale);
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory fitting a standardizer (%zu features)", d);
    }
    for (size_t i = 0; i < n; i++)
        for (size_t j = 0; j < d; j++)
            mean[j] += x[i * d + j];
    for (size_t j = 0; j < d; j++)
        mean[j] /= (double)n;
    /* Two passes: the variance about the computed mean avoids the
     * cancellation of the one-pass sum-of-squares formula. */
    for (size_t i = 0; i < n; i++)
        for (size_t j = 0; j < d; j++) {
            const double t = x[i * d + j] - mean[j];
            scale[j] += t * t;
        }
    const double eps = 2.220446049250313e-16; /* 2^-52, IEEE 754 double */
    for (size_t j = 0; j < d; j++) {
        const double var = scale[j] / (double)n;
        if (!isfinite(var)) {
            free(mean);
            free(scale);
            return lk_error_set(err, LK_ERR_DATA, "feature %zu is not finite in the training data", j);
        }
        /* A feature whose variance is within the rounding error of the
         * two-pass algorithm, n eps var + (n |mean| eps)^2 (T. F. Chan,
         * G. H. Golub, R. J. LeVeque, "Algorithms for computing the sample
         * variance", American Statistician 37, 1983), is constant: scale 1,
         * the test and value scikit-learn's StandardScaler uses. */
        const double bound = (double)n * eps * var + pow((double)n * mean[j] * eps, 2);
        scale[j] = var <= bound ? 1.0 : sqrt(var);
    }
    out->dim = d;
    out->mean = mean;
    out->scale = scale;
    return LK_OK;
}

void lk_standardizer_apply(const lk_standardizer *s, float *x, size_t n)
{
    for (size_t i = 0; i < n; i++)
        for (size_t j = 0; j < s->dim; j++)
            x[i * s->dim + j] = (float)((x[i * s->dim + j] - s->mean[j]) / s->scale[j]);
}

/* ---------------------------------------------------- symmetric eigen */

/* tred2 (see the header comment): on entry V holds the symmetric matrix,
 * on exit the orthogonal transformation Q, TRANSPOSED (row i of V is
 * column i of Q); d the diagonal, e the sub-diagonal of the tridiagonal
 * form in e[1..n). The published algorithm walks down columns; addressing
 * element (r, c) at V[c * n + r] turns every O(n^3) loop into a walk along
 * contiguous memory, and a symmetric input reads the same either way. */
static void tred2(double *V, size_t n, double *d, double *e)
{
#define A(r, c) V[(c) * n + (r)]
    for (size_t j = 0; j < n; j++)
        d[j] = A(n - 1, j);
    for (size_t i = n - 1; i > 0; i--) {
        double scale = 0.0, h = 0.0;
        for (size_t k = 0; k < i; k++)
            scale += fabs(d[k]);
        if (scale == 0.0) {
            e[i] = d[i - 1];
            for (size_t j = 0; j < i; j++) {
                d[j] = A(i - 1, j);
                A(i, j) = 0.0;
                A(j, i) = 0.0;
            }
        } else {
            for (size_t k = 0; k < i; k++) {
                d[k] /= scale;
                h += d[k] * d[k];
            }
            double f = d[i - 1];
            double g = sqrt(h);
            if (f > 0)
                g = -g;
            e[i] = scale * g;
            h -= f * g;
            d[i - 1] = f - g;
            for (size_t j = 0; j < i; j++)
                e[j] = 0.0;
            for (size_t j = 0; j < i; j++) {
                f = d[j];
                A(j, i) = f;
                g = e[j] + A(j, j) * f;
                for (size_t k = j + 1; k <= i - 1; k++) {
                    g += A(k, j) * d[k];
                    e[k] += A(k, j) * f;
                }
                e[j] = g;
            }
            f = 0.0;
            for (size_t j = 0; j < i; j++) {
                e[j] /= h;
                f += e[j] * d[j];
            }
            const double hh = f / (h + h);
            for (size_t j = 0; j < i; j++)
                e[j] -= hh * d[j];
            for (size_t j = 0; j < i; j++) {
                f = d[j];
                g = e[j];
                for (size_t k = j; k <= i - 1; k++)
                    A(k, j) -= (f * e[k] + g * d[k]);
                d[j] = A(i - 1, j);
                A(i, j) = 0.0;
            }
        }
        d[i] = h;
    }
    /* Accumulate the transformations. */
    for (size_t i = 0; i + 1 < n; i++) {
        A(n - 1, i) = A(i, i);
        A(i, i) = 1.0;
        const double h = d[i + 1];
        if (h != 0.0) {
            for (size_t k = 0; k <= i; k++)
                d[k] = A(k, i + 1) / h;
            for (size_t j = 0; j <= i; j++) {
                double g = 0.0;
                for (size_t k = 0; k <= i; k++)
                    g += A(k, i + 1) * A(k, j);
                for (size_t k = 0; k <= i; k++)
                    A(k, j) -= g * d[k];
            }
        }
        for (size_t k = 0; k <= i; k++)
            A(k, i + 1) = 0.0;
    }
    for (size_t j = 0; j < n; j++) {
        d[j] = A(n - 1, j);
        A(n - 1, j) = 0.0;
    }
    A(n - 1, n - 1) = 1.0;
    e[0] = 0.0;
#undef A
}

/* Eigenvalues of the tridiagonal (d, e) by the implicit QL method: tql2
 * (see the header comment) without the eigenvector updates, i.e. EISPACK's
 * tql1, O(n^2). Returns 0 when an eigenvalue did not converge. */
static int tql1(size_t n, double *d, double *e)
{
    for (size_t i = 1; i < n; i++)
        e[i - 1] = e[i];
    e[n - 1] = 0.0;
    double f = 0.0, tst1 = 0.0;
    const double eps = 2.220446049250313e-16; /* 2^-52, IEEE 754 double */
    for (size_t l = 0; l < n; l++) {
        tst1 = fmax(tst1, fabs(d[l]) + fabs(e[l]));
        size_t m = l;
        while (m < n - 1 && fabs(e[m]) > eps * tst1)
            m++;
        if (m > l) {
            int iter = 0;
            do {
                /* 60 sweeps: far above the 2-3 per eigenvalue the method
                 * needs in practice (common practice as a guard). */
                if (++iter > 60)
                    return 0;
                double g = d[l];
                double p = (d[l + 1] - g) / (2.0 * e[l]);
                double r = hypot(p, 1.0);
                if (p < 0)
                    r = -r;
                d[l] = e[l] / (p + r);
                d[l + 1] = e[l] * (p + r);
                const double dl1 = d[l + 1];
                double h = g - d[l];
                for (size_t i = l + 2; i < n; i++)
                    d[i] -= h;
                f += h;
                p = d[m];
                double c = 1.0, c2 = c, c3 = c;
                const double el1 = e[l + 1];
                double s = 0.0, s2 = 0.0;
                for (size_t ii = m; ii-- > l;) {
                    c3 = c2;
                    c2 = c;
                    s2 = s;
                    g = c * e[ii];
                    h = c * p;
                    r = hypot(p, e[ii]);
                    e[ii + 1] = s * r;
                    s = e[ii] / r;
                    c = p / r;
                    p = c * d[ii] - s * g;
                    d[ii + 1] = h + s * (c * g + s * d[ii]);
                }
                p = -s * s2 * c3 * el1 * e[l] / dl1;
                e[l] = s * p;
                d[l] = c * p;
            } while (fabs(e[l]) > eps * tst1);
        }
        d[l] += f;
        e[l] = 0.0;
    }
    return 1;
}

/* Solves (T - mu I) x = b in place for the tridiagonal T with diagonal
 * d[0..n) and off-diagonal e[1..n) (e[i] couples i-1 and i), by Gaussian
 * elimination with partial pivoting as LAPACK's dgtsv does (recalled from
 * memory). A zero pivot becomes `tiny`, as inverse iteration wants: the
 * system is meant to be nearly singular. w: 4n doubles of scratch. */
static void tri_solve(const double *d, const double *e, size_t n, double mu, double tiny, double *b,
                      double *w)
{
    double *D = w, *DL = w + n, *DU = w + 2 * n, *DU2 = w + 3 * n;
    for (size_t i = 0; i < n; i++) {
        D[i] = d[i] - mu;
        DL[i] = i + 1 < n ? e[i + 1] : 0.0;
        DU[i] = i + 1 < n ? e[i + 1] : 0.0;
        DU2[i] = 0.0;
    }
    for (size_t i = 0; i + 1 < n; i++) {
        if (fabs(D[i]) >= fabs(DL[i])) {
            if (D[i] == 0.0)
                D[i] = tiny;
            const double fact = DL[i] / D[i];
            D[i + 1] -= fact * DU[i];
            b[i + 1] -= fact * b[i];
        } else {
            const double fact = D[i] / DL[i];
            D[i] = DL[i];
            const double t = D[i + 1];
            D[i + 1] = DU[i] - fact * t;
            if (i + 2 < n) {
                DU2[i] = DU[i + 1];
                DU[i + 1] = -fact * DU2[i];
            }
            DU[i] = t;
            const double tb = b[i];
            b[i] = b[i + 1];
            b[i + 1] = tb - fact * b[i + 1];
        }
    }
    if (D[n - 1] == 0.0)
        D[n - 1] = tiny;
    b[n - 1] /= D[n - 1];
    if (n > 1)
        b[n - 2] = (b[n - 2] - DU[n - 2] * b[n - 1]) / D[n - 2];
    for (size_t i = n - 2; i-- > 0;)
        b[i] = (b[i] - DU[i] * b[i + 1] - DU2[i] * b[i + 2]) / D[i];
}

/* Top-k eigenpairs of the symmetric S (n x n, destroyed): vals[0..k)
 * descending, vecs (k x n) unit rows. Householder reduction (tred2), all
 * eigenvalues of the tridiagonal by implicit QL without vectors, then the
 * k wanted eigenvectors of the tridiagonal by inverse iteration (Wilkinson,
 * The Algebraic Eigenvalue Problem, 1965, Ch. 9; as LAPACK's dstein does,
 * each is re-orthogonalised against those already found, which keeps
 * clustered eigenvalues' vectors independent), mapped back through Q.
 * About 8/3 n^3 flops in all, against ~9 n^3 for QL with all vectors. */
static lk_code sym_eigen_top(double *S, size_t n, size_t k, double *vals, double *vecs, lk_error *err)
{
    double *d = malloc(n * sizeof *d), *e = malloc(n * sizeof *e);
    double *d0 = malloc(n * sizeof *d0), *e0 = malloc(n * sizeof *e0);
    double *y = malloc(k * n * sizeof *y), *w = malloc(4 * n * sizeof *w);
    lk_code rc = LK_OK;
    if (!d || !e || !d0 || !e0 || !y || !w) {
        rc = lk_error_set(err, LK_ERR_NOMEM, "out of memory for a %zu x %zu eigen-decomposition", n, n);
        goto done;
    }
    tred2(S, n, d, e); /* leaves Q^T in S: row i is column i of Q */
    memcpy(d0, d, n * sizeof *d);
    memcpy(e0, e, n * sizeof *e);
    if (!tql1(n, d, e)) {
        rc = lk_error_set(err, LK_ERR_INTERNAL, "eigen-decomposition did not converge; the data may "
                          "hold non-finite values");
        goto done;
    }
    /* Descending partial selection of the k largest eigenvalues. */
    for (size_t i = 0; i < k; i++) {
        size_t best = i;
        for (size_t j = i + 1; j < n; j++)
            if (d[j] > d[best])
                best = j;
        const double t = d[i];
        d[i] = d[best];
        d[best] = t;
        vals[i] = d[i];
    }
    double norm = 0.0; /* infinity norm of T */
    for (size_t i = 0; i < n; i++)
        norm = fmax(norm, fabs(d0[i]) + fabs(e0[i]) + (i + 1 < n ? fabs(e0[i + 1]) : 0.0));
    const double eps = 2.220446049250313e-16;
    const double tiny = norm > 0 ? eps * norm : eps;
    lk_rng rng;
    lk_rng_seed(&rng, 0x9ca); /* fixed: results must not vary between runs */
    for (size_t c = 0; c < k; c++) {
        double *x = y + c * n;
        double mu = vals[c];
        /* dstein's separation of (near-)equal eigenvalues, so the solves for
         * a cluster start from different shifts. */
        if (c > 0 && fabs(mu - vals[c - 1]) < 10.0 * eps * fabs(mu))
            mu = vals[c - 1] - 10.0 * eps * fabs(mu);
        for (size_t i = 0; i < n; i++)
            x[i] = 2.0 * lk_rng_uniform(&rng) - 1.0;
        /* Convergence per step is |lambda - mu| / gap ~ eps / gap: three
         * steps are ample except for true clusters, which the
         * re-orthogonalisation resolves (common practice, cf. dstein's 5). */
        for (int it = 0; it < 5; it++) {
            tri_solve(d0, e0, n, mu, tiny, x, w);
            for (size_t p = 0; p < c; p++) {
                const double *q = y + p * n;
                double s = 0.0;
                for (size_t i = 0; i < n; i++)
                    s += q[i] * x[i];
                for (size_t i = 0; i < n; i++)
                    x[i] -= s * q[i];
            }
            double nn = 0.0;
            for (size_t i = 0; i < n; i++)
                nn += x[i] * x[i];
            nn = sqrt(nn);
            if (!(nn > 0) || !isfinite(nn)) {
                rc = lk_error_set(err, LK_ERR_INTERNAL, "inverse iteration failed for eigenvalue %zu", c);
                goto done;
            }
            for (size_t i = 0; i < n; i++)
                x[i] /= nn;
        }
        /* v = Q x = sum_i x_i (row i of S). */
        double *v = vecs + c * n;
        memset(v, 0, n * sizeof *v);
        for (size_t i = 0; i < n; i++) {
            const double xi = x[i];
            const double *qi = S + i * n;
            for (size_t j = 0; j < n; j++)
                v[j] += xi * qi[j];
        }
    }
done:
    free(d);
    free(e);
    free(d0);
    free(e0);
    free(y);
    free(w);
    return rc;
}

/* ----------------------------------------------------------- Gram matrix */

typedef struct gram_job {
    const double *M;
    size_t m, len;
    double *G;
    size_t first, step;
} gram_job;

/* Rows first, first+step, ...: interleaving balances the triangle's work. */
static void *gram_rows(void *arg)
{
    const gram_job *j = arg;
    for (size_t a = j->first; a < j->m; a += j->step) {
        const double *ra = j->M + a * j->len;
        for (size_t b = a; b < j->m; b++) {
            const double *rb = j->M + b * j->len;
            double s = 0.0;
            for (size_t k = 0; k < j->len; k++)
                s += ra[k] * rb[k];
            j->G[a * j->m + b] = s;
        }
    }
    return NULL;
}

/* G = M M^T for M (m x len): the covariance when M holds centred features in
 * rows, the Gram matrix when it holds centred samples. */
static void gram(const double *M, size_t m, size_t len, double *G, int threads)
{
    gram_job jobs[2];
    pthread_t tid;
    const int nt = threads == 1 ? 1 : 2;
    for (int t = 0; t < nt; t++)
        jobs[t] = (gram_job){M, m, len, G, (size_t)t, (size_t)nt};
    int started = nt == 2 && pthread_create(&tid, NULL, gram_rows, &jobs[1]) == 0;
    gram_rows(&jobs[0]);
    if (started)
        pthread_join(tid, NULL);
    else if (nt == 2)
        gram_rows(&jobs[1]); /* no thread to be had: do its share here */
    for (size_t a = 0; a < m; a++)
        for (size_t b = 0; b < a; b++)
            G[a * m + b] = G[b * m + a];
}

/* ------------------------------------------------------------------ PCA */

struct lk_pca {
    size_t d, k;
    int whiten;
    double *mean;       /* d */
    double *components; /* k x d */
    double *variance;   /* k */
};

void lk_pca_free(lk_pca *p)
{
    if (p) {
        free(p->mean);
        free(p->components);
        free(p->variance);
        free(p);
    }
}

static lk_pca *pca_alloc(size_t d, size_t k)
{
    lk_pca *p = calloc(1, sizeof *p);
    if (!p)
        return NULL;
    p->d = d;
    p->k = k;
    p->mean = malloc(d * sizeof *p->mean);
    p->components = malloc(k * d * sizeof *p->components);
    p->variance = malloc(k * sizeof *p->variance);
    if (!p->mean || !p->components || !p->variance) {
        lk_pca_free(p);
        return NULL;
    }
    return p;
}

/* Makes the largest-magnitude entry of each component positive, so the
 * result does not depend on the eigensolver's arbitrary sign. */
static void fix_sign(double *v, size_t d)
{
    size_t best = 0;
    for (size_t j = 1; j < d; j++)
        if (fabs(v[j]) > fabs(v[best]))
            best = j;
    if (v[best] < 0)
        for (size_t j = 0; j < d; j++)
            v[j] = -v[j];
}

lk_code lk_pca_fit(const float *x, size_t n, size_t d, const lk_pca_params *params, lk_pca **out,
                   lk_error *err)
{
    if (!x || !params || !out)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_pca_fit: NULL argument");
    *out = NULL;
    const size_t k = params->n_components;
    const size_t r = n < d ? n : d;
    if (n < 2 || d == 0 || k == 0 || k > r)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "PCA needs n >= 2 samples and 1 <= components "
                            "<= min(n, d); got n=%zu, d=%zu, components=%zu", n, d, k);
    const int gram_path = n < d;
    const size_t m = gram_path ? n : d;
    lk_pca *p = pca_alloc(d, k);
    double *C = NULL, *M = NULL, *vals = NULL, *vecs = NULL;
    lk_code rc = LK_OK;
    if (!p || !(M = malloc(n * d * sizeof *M)) || !(C = malloc(m * m * sizeof *C)) ||
        !(vals = malloc(k * sizeof *vals)) || !(vecs = malloc(k * m * sizeof *vecs))) {
        rc = lk_error_set(err, LK_ERR_NOMEM, "out of memory fitting PCA on %zu x %zu", n, d);
        goto done;
    }
    p->whiten = params->whiten != 0;
    memset(p->mean, 0, d * sizeof *p->mean);
    for (size_t i = 0; i < n; i++)
        for (size_t j = 0; j < d; j++)
            p->mean[j] += x[i * d + j];
    for (size_t j = 0; j < d; j++) {
        p->mean[j] /= (double)n;
        if (!isfinite(p->mean[j])) {
            rc = lk_error_set(err, LK_ERR_DATA, "feature %zu is not finite in the PCA training data", j);
            goto done;
        }
    }
    /* Centred data: features in rows (d x n) for the covariance, samples in
     * rows (n x d) for the Gram matrix, so either product runs over
     * contiguous memory. */
    for (size_t i = 0; i < n; i++)
        for (size_t j = 0; j < d; j++) {
            const double v = x[i * d + j] - p->mean[j];
            if (gram_path)
                M[i * d + j] = v;
            else
                M[j * n + i] = v;
        }
    gram(M, m, gram_path ? d : n, C, params->threads);
    rc = sym_eigen_top(C, m, k, vals, vecs, err);
    if (rc != LK_OK)
        goto done;
    for (size_t c = 0; c < k; c++) {
        const double lambda = vals[c];
        double *u = p->components + c * d;
        /* Below 1e-12 of the largest eigenvalue a direction is rounding
         * noise (common practice as a rank cut-off). */
        const int degenerate = !(lambda > vals[0] * 1e-12) || !(lambda > 0);
        if (degenerate && (gram_path || p->whiten)) {
            rc = lk_error_set(err, LK_ERR_DATA, "the PCA training data has only %zu directions of "
                              "non-zero variance; ask for fewer components than %zu", c, k);
            goto done;
        }
        if (gram_path) {
            const double *v = vecs + c * m;
            for (size_t j = 0; j < d; j++)
                u[j] = 0.0;
            for (size_t i = 0; i < n; i++) {
                const double vi = v[i];
                const double *row = M + i * d;
                for (size_t j = 0; j < d; j++)
                    u[j] += vi * row[j];
            }
            double norm = 0.0;
            for (size_t j = 0; j < d; j++)
                norm += u[j] * u[j];
            norm = sqrt(norm); /* = sqrt(lambda) in exact arithmetic */
            for (size_t j = 0; j < d; j++)
                u[j] /= norm;
        } else {
            memcpy(u, vecs + c * m, d * sizeof *u);
        }
        fix_sign(u, d);
        p->variance[c] = (lambda > 0 ? lambda : 0.0) / (double)(n - 1);
    }
done:
    free(M);
    free(C);
    free(vals);
    free(vecs);
    if (rc != LK_OK) {
        lk_pca_free(p);
        return rc;
    }
    *out = p;
    return LK_OK;
}

lk_code lk_pca_from_parts(size_t d, size_t k, const double *mean, const double *components,
                          const double *variance, int whiten, lk_pca **out, lk_error *err)
{
    if (!mean || !components || !variance || !out || d == 0 || k == 0 || k > d)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_pca_from_parts: need 1 <= k <= d and "
                            "all arrays");
    *out = NULL;
    for (size_t c = 0; c < k; c++)
        if (!isfinite(variance[c]) || variance[c] < 0 || (whiten && variance[c] == 0))
            return lk_error_set(err, LK_ERR_MODEL_FORMAT, "PCA variance %zu is %g: the model is corrupt",
                                c, variance[c]);
    lk_pca *p = pca_alloc(d, k);
    if (!p)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory for a %zu x %zu PCA", k, d);
    memcpy(p->mean, mean, d * sizeof *mean);
    memcpy(p->components, components, k * d * sizeof *components);
    memcpy(p->variance, variance, k * sizeof *variance);
    p->whiten = whiten != 0;
    *out = p;
    return LK_OK;
}

void lk_pca_project(const lk_pca *p, const float *x, size_t n, float *out)
{
    for (size_t i = 0; i < n; i++) {
        const float *xi = x + i * p->d;
        for (size_t c = 0; c < p->k; c++) {
            const double *u = p->components + c * p->d;
            double s = 0.0;
            for (size_t j = 0; j < p->d; j++)
                s += ((double)xi[j] - p->mean[j]) * u[j];
            if (p->whiten)
                s /= sqrt(p->variance[c]);
            out[i * p->k + c] = (float)s;
        }
    }
}

size_t lk_pca_input_dim(const lk_pca *p) { return p->d; }
size_t lk_pca_output_dim(const lk_pca *p) { return p->k; }
int lk_pca_whitened(const lk_pca *p) { return p->whiten; }
const double *lk_pca_mean(const lk_pca *p) { return p->mean; }
const double *lk_pca_components(const lk_pca *p) { return p->components; }
const double *lk_pca_variance(const lk_pca *p) { return p->variance; }
