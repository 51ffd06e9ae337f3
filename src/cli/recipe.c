#include "recipe.h"

#include <math.h>
#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "cli.h"

void recipe_default(recipe *r)
{
    /* Tuned on LFW View 1 only (README, "Training and evaluation"): PCA
     * whitening to 200 components with a variance floor of 1e-4 of the
     * largest, L2 normalisation, within-class covariance normalisation
     * (Hatch et al. 2006) with regulariser 1e-3, L2 again, then a
     * squared-hinge linear SVM with C = 0.1 on 10,000 + 10,000 pairs. */
    r->pca_dim = 200;
    r->whiten = 1;
    r->whiten_floor = 1e-4;
    r->pca_max_images = 4000;
    r->l2 = 1;
    r->wccn_reg = 1e-3;
    r->pairs_per_class = 10000;
    r->C = 0.1;
    r->loss = LK_SVM_SQUARED_HINGE;
    r->seed = 20261202;
}

void recipe_describe(const recipe *r, char *buf, size_t size)
{
    snprintf(buf, size,
             "pca=%zu;whiten=%d;floor=%g;pca_images=%zu;l2=%d;wccn=%g;pairs_per_class=%zu;C=%g;"
             "loss=%s;seed=%llu",
             r->pca_dim, r->whiten, r->whiten_floor, r->pca_max_images, r->l2, r->wccn_reg,
             r->pairs_per_class, r->C,
             r->loss == LK_SVM_HINGE ? "hinge" : "squared_hinge", (unsigned long long)r->seed);
}

int recipe_rows_of_pairs(const featset *fs, const lk_pair *pairs, size_t n_pairs, size_t **rows,
                         size_t *n_rows)
{
    uint8_t *seen = calloc(fs->n + 1, 1);
    size_t *out = malloc((2 * n_pairs + 1) * sizeof *out);
    if (!seen || !out) {
        free(seen);
        free(out);
        return -1;
    }
    size_t n = 0;
    for (size_t i = 0; i < n_pairs; i++) {
        const char *p[2] = {pairs[i].path_a, pairs[i].path_b};
        for (int k = 0; k < 2; k++) {
            long r = featset_find(fs, p[k]);
            if (r >= 0 && fs->ok[r] && !seen[r]) {
                seen[r] = 1;
                out[n++] = (size_t)r;
            }
        }
    }
    free(seen);
    *rows = out;
    *n_rows = n;
    return 0;
}

typedef struct proj_job {
    const lk_model *m;
    const featset *fs;
    const uint8_t *need;
    double *z;
    size_t k, first, step;
    lk_code rc;
    lk_error err;
} proj_job;

/* Rows first, first + step, ...: the two threads share the work evenly. */
static void *proj_worker(void *arg)
{
    proj_job *j = arg;
    double *tmp = malloc((j->k + 1) * sizeof *tmp);
    if (!tmp) {
        j->rc = lk_error_set(&j->err, LK_ERR_NOMEM, "out of memory");
        return NULL;
    }
    for (size_t i = j->first; i < j->fs->n && j->rc == LK_OK; i += j->step) {
        if (!j->fs->ok[i] || !j->need[i])
            continue;
        j->rc = lk_model_project(j->m, j->fs->x + i * j->fs->dim, tmp, &j->err);
        for (size_t c = 0; c < j->k && j->rc == LK_OK; c++)
            j->z[i * j->k + c] = tmp[c];
    }
    free(tmp);
    return NULL;
}

/* Projects, through m, the images with features that the pairs use (k
 * values each; other rows are left unset): projecting is k*d work per image,
 * so only the needed ones are done. */
static double *project_pairs(const lk_model *m, const featset *fs, const lk_pair *pairs,
                            size_t n_pairs, size_t *k_out, lk_error *err)
{
    size_t k = lk_model_pair_dim(m);
    double *z = malloc((fs->n * k + 1) * sizeof *z);
    double *tmp = malloc((k + 1) * sizeof *tmp);
    uint8_t *need = calloc(fs->n + 1, 1);
    if (!z || !tmp || !need) {
        free(z);
        free(tmp);
        free(need);
        lk_error_set(err, LK_ERR_NOMEM, "out of memory projecting %zu images", fs->n);
        return NULL;
    }
    for (size_t i = 0; i < n_pairs; i++) {
        long a = featset_find(fs, pairs[i].path_a), b = featset_find(fs, pairs[i].path_b);
        if (a >= 0)
            need[a] = 1;
        if (b >= 0)
            need[b] = 1;
    }
    free(tmp);
    proj_job jobs[2];
    pthread_t tid;
    for (int t = 0; t < 2; t++)
        jobs[t] = (proj_job){m, fs, need, z, k, (size_t)t, 2, LK_OK, {0}};
    int started = pthread_create(&tid, NULL, proj_worker, &jobs[1]) == 0;
    if (!started)
        jobs[0].step = 1;
    proj_worker(&jobs[0]);
    if (started)
        pthread_join(tid, NULL);
    free(need);
    for (int t = 0; t < 2; t++)
        if (jobs[t].rc != LK_OK) {
            if (err)
                *err = jobs[t].err;
            free(z);
            return NULL;
        }
    *k_out = k;
    return z;
}

/* Identity of an image: its folder's name (folder-per-identity data). */
static int identity_labels(const featset *fs, const size_t *rows, size_t n, int *labels)
{
    /* Rows are sorted by path, so one identity's images are adjacent. */
    int next = -1;
    const char *prev = NULL;
    size_t prev_len = 0;
    for (size_t i = 0; i < n; i++) {
        const char *p = fs->paths[rows[i]];
        const char *slash = strrchr(p, '/');
        size_t len = slash ? (size_t)(slash - p) : 0;
        if (!prev || len != prev_len || strncmp(p, prev, len) != 0)
            next++;
        prev = p;
        prev_len = len;
        labels[i] = next;
    }
    return next + 1;
}

static int cmp_size(const void *a, const void *b)
{
    size_t x = *(const size_t *)a, y = *(const size_t *)b;
    return (x > y) - (x < y);
}

typedef struct wproj_job {
    const featset *fs;
    const size_t *rows;
    size_t n;
    const double *mean, *w;
    size_t k, d;
    float *z;
    size_t first, step;
} wproj_job;

/* z_i = L2(w (x_i - mean)) for rows first, first + step, ... */
static void *wproj_worker(void *arg)
{
    const wproj_job *j = arg;
    const size_t k = j->k, d = j->d;
    double *tmp = malloc(d * sizeof *tmp);
    if (!tmp)
        return NULL; /* the caller's z stays as calloc'd: WCCN of zeros fails loudly */
    for (size_t i = j->first; i < j->n; i += j->step) {
        const float *x = j->fs->x + j->rows[i] * d;
        for (size_t c = 0; c < d; c++)
            tmp[c] = x[c] - j->mean[c];
        double nrm = 0;
        for (size_t a = 0; a < k; a++) {
            double acc = 0;
            const double *restrict wr = j->w + a * d;
            for (size_t c = 0; c < d; c++)
                acc += wr[c] * tmp[c];
            j->z[i * k + a] = (float)acc;
            nrm += acc * acc;
        }
        nrm = nrm > 0 ? 1.0 / sqrt(nrm) : 0;
        for (size_t a = 0; a < k; a++)
            j->z[i * k + a] = (float)(j->z[i * k + a] * nrm);
    }
    free(tmp);
    return NULL;
}

/* Within-class covariance normalisation in the L2-normalised whitened space,
 * folded into w: w <- S w with S = Sw^-1/2. Because L2(S L2(y)) = L2(S y),
 * one matrix and one final L2 normalisation reproduce the chain
 * whiten -> L2 -> WCCN -> L2 exactly. */
static lk_code wccn_fold(const recipe *r, const featset *fs, const size_t *rows_in, size_t n,
                         const double *mean, double *w, size_t k, size_t d, lk_error *err)
{
    size_t *rows = malloc((n + 1) * sizeof *rows);
    int *labels = malloc((n + 1) * sizeof *labels);
    float *z = calloc(n * k + 1, sizeof *z);
    double *s = malloc(k * k * sizeof *s), *tmp = malloc(d * sizeof *tmp);
    double *nw = malloc(k * d * sizeof *nw);
    lk_code rc = LK_OK;
    if (!rows || !labels || !z || !s || !tmp || !nw) {
        rc = lk_error_set(err, LK_ERR_NOMEM, "out of memory for WCCN");
        goto done;
    }
    memcpy(rows, rows_in, n * sizeof *rows);
    qsort(rows, n, sizeof *rows, cmp_size);
    identity_labels(fs, rows, n, labels);
    fprintf(stderr, "train: WCCN on %zu images\n", n);
    {
        wproj_job jobs[2] = {{fs, rows, n, mean, w, k, d, z, 0, 2},
                             {fs, rows, n, mean, w, k, d, z, 1, 2}};
        pthread_t tid;
        int started = pthread_create(&tid, NULL, wproj_worker, &jobs[1]) == 0;
        if (!started)
            jobs[0].step = 1;
        wproj_worker(&jobs[0]);
        if (started)
            pthread_join(tid, NULL);
    }
    rc = lk_wccn_fit(z, labels, n, k, r->wccn_reg, s, err);
    if (rc != LK_OK)
        goto done;
    for (size_t a = 0; a < k; a++)
        for (size_t j = 0; j < d; j++) {
            double acc = 0;
            for (size_t b = 0; b < k; b++)
                acc += s[a * k + b] * w[b * d + j];
            nw[a * d + j] = acc;
        }
    memcpy(w, nw, k * d * sizeof *w);
done:
    free(rows);
    free(labels);
    free(z);
    free(s);
    free(tmp);
    free(nw);
    return rc;
}

int recipe_fit(const recipe *r, const char *feature_config, const featset *fs,
               const size_t *pca_rows, size_t n_pca_rows, const lk_pair *pairs, size_t n_pairs,
               lk_model *m, size_t *pairs_used, lk_error *err)
{
    const size_t d = fs->dim;
    if (lk_model_set_features(m, feature_config, d, err) != LK_OK)
        return -1;
    lk_model_clear_projection(m);
    lk_model_clear_standardisation(m);
    if (r->pca_dim > 0) {
        size_t n = n_pca_rows;
        size_t *pick = malloc((n + 1) * sizeof *pick);
        if (!pick) {
            lk_error_set(err, LK_ERR_NOMEM, "out of memory");
            return -1;
        }
        memcpy(pick, pca_rows, n * sizeof *pick);
        if (r->pca_max_images > 0 && n > r->pca_max_images) {
            /* A seeded random subset: the leading components of a few
             * thousand faces are stable, and the fit's cost grows with n. */
            lk_rng rng;
            lk_rng_seed(&rng, r->seed ^ 0x9E3779B97F4A7C15ULL);
            lk_rng_shuffle(&rng, pick, n);
            n = r->pca_max_images;
        }
        float *x = malloc((n * d + 1) * sizeof *x);
        if (!x) {
            free(pick);
            lk_error_set(err, LK_ERR_NOMEM, "out of memory for %zu training images", n);
            return -1;
        }
        for (size_t i = 0; i < n; i++)
            memcpy(x + i * d, fs->x + pick[i] * d, d * sizeof *x);
        free(pick);
        size_t k = r->pca_dim;
        if (k > n - 1)
            k = n - 1;
        if (k > d)
            k = d;
        lk_pca *pca = NULL;
        fprintf(stderr, "train: PCA of %zu images x %zu features to %zu components\n", n, d, k);
        double t0 = cli_now();
        lk_code rc;
        if ((n < d ? n : d) > 2000) {
            /* The exact fit is cubic in min(n, d); beyond a few thousand the
             * randomized fit (Halko et al. 2011) is the only practical one. */
            lk_rpca_params rp;
            lk_rpca_params_default(&rp);
            rp.n_components = k;
            rp.seed = r->seed;
            rc = lk_pca_fit_randomized(x, n, d, &rp, &pca, err);
        } else {
            lk_pca_params pp = {.n_components = k, .whiten = 0, .threads = 0};
            rc = lk_pca_fit(x, n, d, &pp, &pca, err);
        }
        free(x);
        if (rc != LK_OK)
            return -1;
        fprintf(stderr, "train: PCA done in %.1f s\n", cli_now() - t0);
        const double *comp = lk_pca_components(pca), *var = lk_pca_variance(pca);
        double *w = malloc(k * d * sizeof *w);
        if (!w) {
            lk_pca_free(pca);
            lk_error_set(err, LK_ERR_NOMEM, "out of memory");
            return -1;
        }
        /* Whitening (dividing each component by the square root of its
         * variance) gives every retained direction equal weight before the
         * squared difference; a floor keeps near-null directions from
         * exploding (common practice). */
        double floor_v = r->whiten_floor * (var[0] > 0 ? var[0] : 1);
        for (size_t i = 0; i < k; i++) {
            double s = r->whiten ? 1.0 / sqrt(var[i] > floor_v ? var[i] : floor_v) : 1.0;
            for (size_t j = 0; j < d; j++)
                w[i * d + j] = comp[i * d + j] * s;
        }
        if (r->l2 && r->wccn_reg >= 0) {
            rc = wccn_fold(r, fs, pca_rows, n_pca_rows, lk_pca_mean(pca), w, k, d, err);
            if (rc != LK_OK) {
                free(w);
                lk_pca_free(pca);
                return -1;
            }
        }
        rc = lk_model_set_projection(m, k, d, lk_pca_mean(pca), w, err);
        if (rc == LK_OK && r->l2)
            rc = lk_model_set_projection_norm(m, LK_PROJ_NORM_L2, err);
        free(w);
        lk_pca_free(pca);
        if (rc != LK_OK)
            return -1;
    }
    size_t k;
    double *z = project_pairs(m, fs, pairs, n_pairs, &k, err);
    if (!z)
        return -1;
    float *px = malloc((n_pairs * k + 1) * sizeof *px);
    int *y = malloc((n_pairs + 1) * sizeof *y);
    if (!px || !y) {
        free(z);
        free(px);
        free(y);
        lk_error_set(err, LK_ERR_NOMEM, "out of memory for %zu pair vectors", n_pairs);
        return -1;
    }
    size_t np = 0;
    for (size_t i = 0; i < n_pairs; i++) {
        long a = featset_find(fs, pairs[i].path_a), b = featset_find(fs, pairs[i].path_b);
        if (a < 0 || b < 0 || !fs->ok[a] || !fs->ok[b])
            continue;
        for (size_t c = 0; c < k; c++) {
            double t = z[(size_t)a * k + c] - z[(size_t)b * k + c];
            px[np * k + c] = (float)(t * t);
        }
        y[np++] = pairs[i].genuine ? 1 : -1;
    }
    free(z);
    lk_svm_params sp;
    lk_svm_params_default(&sp);
    sp.C = r->C;
    sp.loss = r->loss;
    sp.seed = r->seed;
    lk_linear_model lm = {0};
    fprintf(stderr, "train: linear SVM on %zu pairs x %zu dimensions (C=%g)\n", np, k, r->C);
    double t0 = cli_now();
    lk_code rc = lk_svm_train(px, y, np, k, &sp, &lm, err);
    free(px);
    free(y);
    if (rc != LK_OK)
        return -1;
    fprintf(stderr, "train: SVM done in %.1f s, %d passes%s\n", cli_now() - t0, lm.iterations,
            lm.converged ? "" : " (stopped at the pass limit)");
    rc = lk_model_set_svm(m, k, lm.w, lm.b, err);
    lk_linear_model_free(&lm);
    if (pairs_used)
        *pairs_used = np;
    return rc == LK_OK ? 0 : -1;
}

int recipe_score(const lk_model *m, const featset *fs, const lk_pair *pairs, size_t n_pairs,
                 double *values, int *labels, size_t *missing, lk_error *err)
{
    if (lk_model_standardisation(m, NULL, NULL, NULL)) {
        /* Not a model this recipe makes: score pair by pair with the full
         * formula of docs/model-format.md. */
        double *scratch = malloc((lk_model_scratch_size(m) + 1) * sizeof *scratch);
        if (!scratch) {
            lk_error_set(err, LK_ERR_NOMEM, "out of memory");
            return -1;
        }
        size_t miss = 0;
        for (size_t i = 0; i < n_pairs; i++) {
            long ia = featset_find(fs, pairs[i].path_a), ib = featset_find(fs, pairs[i].path_b);
            labels[i] = pairs[i].genuine ? 1 : 0;
            values[i] = -INFINITY;
            if (ia < 0 || ib < 0 || !fs->ok[ia] || !fs->ok[ib] ||
                lk_model_score(m, fs->x + (size_t)ia * fs->dim, fs->x + (size_t)ib * fs->dim,
                               scratch, &values[i], NULL, err) != LK_OK) {
                values[i] = -INFINITY;
                miss++;
            }
        }
        free(scratch);
        if (missing)
            *missing = miss;
        return 0;
    }
    size_t k;
    double *z = project_pairs(m, fs, pairs, n_pairs, &k, err);
    if (!z)
        return -1;
    size_t nw;
    const double *w;
    double b;
    lk_model_svm(m, &nw, &w, &b);
    size_t miss = 0;
    for (size_t i = 0; i < n_pairs; i++) {
        long ia = featset_find(fs, pairs[i].path_a), ib = featset_find(fs, pairs[i].path_b);
        labels[i] = pairs[i].genuine ? 1 : 0;
        if (ia < 0 || ib < 0 || !fs->ok[ia] || !fs->ok[ib]) {
            values[i] = -INFINITY;
            miss++;
            continue;
        }
        /* f = b + sum_i w_i (y_a,i - y_b,i)^2: the model's scoring formula
         * without standardisation (docs/model-format.md). */
        const double *za = z + (size_t)ia * k, *zb = z + (size_t)ib * k;
        double f = b;
        for (size_t j = 0; j < k; j++) {
            double t = za[j] - zb[j];
            f += w[j] * t * t;
        }
        values[i] = f;
    }
    free(z);
    if (missing)
        *missing = miss;
    return 0;
}

int recipe_calibrate(lk_model *m, const double *values, const int *labels, size_t n,
                     double default_fmr, lk_error *err)
{
    /* Platt on finite values only: a pair without features carries no score. */
    double *f = malloc((n + 1) * sizeof *f);
    int *y = malloc((n + 1) * sizeof *y);
    if (!f || !y) {
        free(f);
        free(y);
        lk_error_set(err, LK_ERR_NOMEM, "out of memory");
        return -1;
    }
    size_t nf = 0;
    for (size_t i = 0; i < n; i++)
        if (isfinite(values[i])) {
            f[nf] = values[i];
            y[nf++] = labels[i];
        }
    lk_platt_params pp;
    lk_platt_params_default(&pp);
    lk_platt pl;
    if (lk_platt_fit(f, y, nf, &pp, &pl, err) != LK_OK ||
        lk_model_set_platt(m, pl.A, pl.B, err) != LK_OK) {
        free(f);
        free(y);
        return -1;
    }
    lk_roc roc = {0};
    if (lk_roc_compute(f, y, nf, &roc, err) != LK_OK) {
        free(f);
        free(y);
        return -1;
    }
    static const double targets[] = {1e-5, 1e-4, 1e-3, 1e-2, 1e-1};
    enum { NT = sizeof targets / sizeof targets[0] };
    lk_operating_point op[NT];
    lk_roc_operating_table(&roc, targets, NT, op);
    lk_model_operating_point rows[NT];
    for (size_t i = 0; i < NT; i++) {
        double t = isfinite(op[i].threshold) ? op[i].threshold : 1e300;
        rows[i] = (lk_model_operating_point){
            .target_fmr = targets[i],
            .svm_threshold = t,
            .prob_threshold = lk_platt_probability(&pl, t),
            .measured_fmr = op[i].fmr,
            .measured_fnmr = op[i].fnmr,
            .impostor_comparisons = roc.n_impostor,
            .genuine_comparisons = roc.n_genuine,
            .supported = op[i].supported != 0,
        };
    }
    lk_roc_free(&roc);
    free(f);
    free(y);
    return lk_model_set_operating_points(m, rows, NT, default_fmr, err) == LK_OK ? 0 : -1;
}
