/* Drives the learn module for tests/ref/check_learn_*.py. Matrices travel
 * as a tiny binary format: int64 rows, int64 cols, then rows*cols float64,
 * all little-endian (numpy: np.array([r, c], '<i8').tobytes() +
 * a.astype('<f8').tobytes()).
 *
 *   svm   X y C loss(1|2) eps shrinking Xtest model_out dec_out
 *         model_out: 1 x (d+4): w..., b, objective, iterations, seconds
 *   platt f y out                       out: 1 x 2 (A, B)
 *   roc   scores genuine roc_out summary_out
 *         roc_out: k x 3 (threshold, FMR, FNMR); summary_out: 1 x 16, see below
 *   pca   X k whiten threads Xtest comp_out var_out mean_out proj_out
 *   rpca  the same arguments, randomized PCA
 *   wccn  Z labels reg out
 *   std   X Xtest params_out proj_out   params_out: 2 x d (mean, scale)
 *   pairs pairs_file lfw_root           prints "fold genuine path_a path_b"
 *                                       lines, or the error and exit 1 */
#include "likeness/learn.h"

#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

typedef struct mat {
    int64_t r, c;
    double *v;
} mat;

static int mat_read(const char *path, mat *m)
{
    FILE *f = fopen(path, "rb");
    if (!f) {
        fprintf(stderr, "cannot open %s\n", path);
        return 0;
    }
    int64_t hdr[2];
    int ok = fread(hdr, sizeof hdr[0], 2, f) == 2 && hdr[0] >= 0 && hdr[1] >= 0 &&
             hdr[0] < (1 << 24) && hdr[1] < (1 << 24);
    if (ok) {
        m->r = hdr[0];
        m->c = hdr[1];
        size_t n = (size_t)(m->r * m->c);
        m->v = malloc((n ? n : 1) * sizeof *m->v);
        ok = m->v && fread(m->v, sizeof *m->v, n, f) == n;
    }
    fclose(f);
    if (!ok)
        fprintf(stderr, "bad matrix file %s\n", path);
    return ok;
}

static int mat_write(const char *path, int64_t r, int64_t c, const double *v)
{
    FILE *f = fopen(path, "wb");
    if (!f)
        return 0;
    int64_t hdr[2] = {r, c};
    int ok = fwrite(hdr, sizeof hdr[0], 2, f) == 2 &&
             fwrite(v, sizeof *v, (size_t)(r * c), f) == (size_t)(r * c);
    return fclose(f) == 0 && ok;
}

static float *to_float(const mat *m)
{
    size_t n = (size_t)(m->r * m->c);
    float *x = malloc((n ? n : 1) * sizeof *x);
    for (size_t i = 0; x && i < n; i++)
        x[i] = (float)m->v[i];
    return x;
}

static int *to_labels(const mat *m)
{
    size_t n = (size_t)(m->r * m->c);
    int *y = malloc((n ? n : 1) * sizeof *y);
    for (size_t i = 0; y && i < n; i++)
        y[i] = m->v[i] > 0 ? 1 : -1;
    return y;
}

static double now(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + 1e-9 * (double)ts.tv_nsec;
}

static int cmd_svm(char **a)
{
    mat X, Y, T;
    if (!mat_read(a[0], &X) || !mat_read(a[1], &Y) || !mat_read(a[6], &T) || T.c != X.c)
        return 2;
    float *x = to_float(&X), *xt = to_float(&T);
    int *y = to_labels(&Y);
    lk_svm_params p;
    lk_svm_params_default(&p);
    p.C = atof(a[2]);
    p.loss = atoi(a[3]) == 2 ? LK_SVM_SQUARED_HINGE : LK_SVM_HINGE;
    p.eps = atof(a[4]);
    p.shrinking = atoi(a[5]);
    p.max_iter = 100000;
    lk_linear_model m;
    lk_error err;
    double t0 = now();
    lk_code rc = lk_svm_train(x, y, (size_t)X.r, (size_t)X.c, &p, &m, &err);
    double secs = now() - t0;
    if (rc != LK_OK) {
        fprintf(stderr, "svm: %s\n", err.message);
        return 1;
    }
    double *row = malloc(((size_t)X.c + 4) * sizeof *row);
    for (int64_t j = 0; j < X.c; j++)
        row[j] = m.w[j];
    row[X.c] = m.b;
    row[X.c + 1] = m.objective;
    row[X.c + 2] = m.iterations;
    row[X.c + 3] = secs;
    double *dec = malloc(((size_t)T.r + 1) * sizeof *dec);
    for (int64_t i = 0; i < T.r; i++)
        dec[i] = lk_linear_model_decision(&m, xt + i * T.c);
    int ok = mat_write(a[7], 1, X.c + 4, row) && mat_write(a[8], T.r, 1, dec);
    printf("svm: n=%lld d=%lld iterations=%d converged=%d seconds=%.3f\n", (long long)X.r,
           (long long)X.c, m.iterations, m.converged, secs);
    lk_linear_model_free(&m);
    free(row);
    free(dec);
    free(x);
    free(xt);
    free(y);
    free(X.v);
    free(Y.v);
    free(T.v);
    return ok ? 0 : 1;
}

static int cmd_platt(char **a)
{
    mat F, Y;
    if (!mat_read(a[0], &F) || !mat_read(a[1], &Y))
        return 2;
    int *y = to_labels(&Y);
    lk_platt p;
    lk_error err;
    lk_platt_params pp;
    lk_platt_params_default(&pp);
    if (lk_platt_fit(F.v, y, (size_t)(F.r * F.c), &pp, &p, &err) != LK_OK) {
        fprintf(stderr, "platt: %s\n", err.message);
        return 1;
    }
    double ab[2] = {p.A, p.B};
    int ok = mat_write(a[2], 1, 2, ab);
    free(y);
    free(F.v);
    free(Y.v);
    return ok ? 0 : 1;
}

static int cmd_roc(char **a)
{
    mat S, G;
    if (!mat_read(a[0], &S) || !mat_read(a[1], &G))
        return 2;
    size_t n = (size_t)(S.r * S.c);
    int *g = malloc(n * sizeof *g);
    for (size_t i = 0; i < n; i++)
        g[i] = G.v[i] > 0;
    lk_roc roc;
    lk_error err;
    if (lk_roc_compute(S.v, g, n, &roc, &err) != LK_OK) {
        fprintf(stderr, "roc: %s\n", err.message);
        return 1;
    }
    double *pts = malloc(roc.count * 3 * sizeof *pts);
    for (size_t k = 0; k < roc.count; k++) {
        pts[3 * k] = roc.points[k].threshold;
        pts[3 * k + 1] = roc.points[k].fmr;
        pts[3 * k + 2] = roc.points[k].fnmr;
    }
    double eer_t, best_t, best_acc;
    const double eer = lk_roc_eer(&roc, &eer_t);
    lk_operating_point o1 = lk_roc_at_fmr(&roc, 1e-2), o2 = lk_roc_at_fmr(&roc, 1e-3);
    if (lk_best_accuracy_threshold(S.v, g, n, &best_t, &best_acc, &err) != LK_OK) {
        fprintf(stderr, "roc: %s\n", err.message);
        return 1;
    }
    /* auc, eer, eer_threshold, thr@1e-2, fmr, fnmr, supported,
     * thr@1e-3, fmr, fnmr, supported, best_threshold, best_accuracy,
     * accuracy at best_threshold, fmr_ci_lo@1e-2, fmr_ci_hi@1e-2 */
    double sum[16] = {lk_roc_auc(&roc), eer, eer_t, o1.threshold, o1.fmr, o1.fnmr, o1.supported,
                      o2.threshold, o2.fmr, o2.fnmr, o2.supported, best_t, best_acc,
                      lk_accuracy_at(S.v, g, n, best_t), o1.fmr_ci[0], o1.fmr_ci[1]};
    int ok = mat_write(a[2], (int64_t)roc.count, 3, pts) && mat_write(a[3], 1, 16, sum);
    lk_roc_free(&roc);
    free(pts);
    free(g);
    free(S.v);
    free(G.v);
    return ok ? 0 : 1;
}

static int randomized;

static int cmd_pca(char **a)
{
    mat X, T;
    if (!mat_read(a[0], &X) || !mat_read(a[4], &T) || T.c != X.c)
        return 2;
    float *x = to_float(&X), *xt = to_float(&T);
    lk_pca_params pp = {(size_t)atoi(a[1]), atoi(a[2]), atoi(a[3])};
    lk_pca *pca;
    lk_error err;
    double t0 = now();
    lk_code rc;
    if (randomized) {
        lk_rpca_params rp;
        lk_rpca_params_default(&rp);
        rp.n_components = pp.n_components;
        rp.whiten = pp.whiten;
        rp.threads = pp.threads;
        rc = lk_pca_fit_randomized(x, (size_t)X.r, (size_t)X.c, &rp, &pca, &err);
    } else {
        rc = lk_pca_fit(x, (size_t)X.r, (size_t)X.c, &pp, &pca, &err);
    }
    if (rc != LK_OK) {
        fprintf(stderr, "pca: %s\n", err.message);
        return 1;
    }
    printf("pca: n=%lld d=%lld k=%zu seconds=%.3f\n", (long long)X.r, (long long)X.c, pp.n_components,
           now() - t0);
    const size_t k = lk_pca_output_dim(pca), d = lk_pca_input_dim(pca);
    float *pf = malloc(((size_t)T.r * k + 1) * sizeof *pf);
    double *pd = malloc(((size_t)T.r * k + 1) * sizeof *pd);
    lk_pca_project(pca, xt, (size_t)T.r, pf);
    for (size_t i = 0; i < (size_t)T.r * k; i++)
        pd[i] = pf[i];
    int ok = mat_write(a[5], (int64_t)k, (int64_t)d, lk_pca_components(pca)) &&
             mat_write(a[6], 1, (int64_t)k, lk_pca_variance(pca)) &&
             mat_write(a[7], 1, (int64_t)d, lk_pca_mean(pca)) && mat_write(a[8], T.r, (int64_t)k, pd);
    lk_pca_free(pca);
    free(pf);
    free(pd);
    free(x);
    free(xt);
    free(X.v);
    free(T.v);
    return ok ? 0 : 1;
}

/* wccn Z labels reg out: Z (n x k), labels (1 x n, integral values). */
static int cmd_wccn(char **a)
{
    mat Z, Lb;
    if (!mat_read(a[0], &Z) || !mat_read(a[1], &Lb) || Lb.r * Lb.c != Z.r)
        return 2;
    float *z = to_float(&Z);
    int *lab = malloc(((size_t)Z.r + 1) * sizeof *lab);
    double *out = malloc(((size_t)(Z.c * Z.c) + 1) * sizeof *out);
    for (int64_t i = 0; i < Z.r; i++)
        lab[i] = (int)Lb.v[i];
    lk_error err;
    int ok = lk_wccn_fit(z, lab, (size_t)Z.r, (size_t)Z.c, atof(a[2]), out, &err) == LK_OK;
    if (!ok)
        fprintf(stderr, "wccn: %s\n", err.message);
    ok = ok && mat_write(a[3], Z.c, Z.c, out);
    free(z);
    free(lab);
    free(out);
    free(Z.v);
    free(Lb.v);
    return ok ? 0 : 1;
}

/* Same arguments as pca, with lk_pca_fit_randomized. */
static int cmd_rpca(char **a)
{
    randomized = 1;
    return cmd_pca(a);
}

static int cmd_std(char **a)
{
    mat X, T;
    if (!mat_read(a[0], &X) || !mat_read(a[1], &T) || T.c != X.c)
        return 2;
    float *x = to_float(&X), *xt = to_float(&T);
    lk_standardizer s;
    lk_error err;
    if (lk_standardizer_fit(x, (size_t)X.r, (size_t)X.c, &s, &err) != LK_OK) {
        fprintf(stderr, "std: %s\n", err.message);
        return 1;
    }
    lk_standardizer_apply(&s, xt, (size_t)T.r);
    double *prm = malloc(2 * s.dim * sizeof *prm);
    memcpy(prm, s.mean, s.dim * sizeof *prm);
    memcpy(prm + s.dim, s.scale, s.dim * sizeof *prm);
    for (size_t i = 0; i < (size_t)(T.r * T.c); i++)
        T.v[i] = xt[i];
    int ok = mat_write(a[2], 2, (int64_t)s.dim, prm) && mat_write(a[3], T.r, T.c, T.v);
    lk_standardizer_free(&s);
    free(prm);
    free(x);
    free(xt);
    free(X.v);
    free(T.v);
    return ok ? 0 : 1;
}

static int cmd_pairs(char **a)
{
    lk_pair_set *set;
    lk_error err;
    if (lk_pairs_load_lfw(a[0], a[1], &set, &err) != LK_OK) {
        printf("error %s: %s\n", lk_code_name(err.code), err.message);
        return 1;
    }
    for (size_t i = 0; i < set->count; i++)
        printf("%d %d %s %s\n", set->pairs[i].fold, set->pairs[i].genuine, set->pairs[i].path_a,
               set->pairs[i].path_b);
    lk_pair_set_free(set);
    return 0;
}

int main(int argc, char **argv)
{
    static const struct {
        const char *name;
        int nargs;
        int (*fn)(char **);
    } cmds[] = {{"svm", 9, cmd_svm}, {"platt", 3, cmd_platt}, {"roc", 4, cmd_roc},
                {"pca", 9, cmd_pca}, {"rpca", 9, cmd_rpca}, {"wccn", 4, cmd_wccn}, {"std", 4, cmd_std}, {"pairs", 2, cmd_pairs}};
    for (size_t i = 0; argc >= 2 && i < sizeof cmds / sizeof cmds[0]; i++)
        if (strcmp(argv[1], cmds[i].name) == 0) {
            if (argc - 2 != cmds[i].nargs) {
                fprintf(stderr, "%s needs %d arguments (see the source's header)\n", cmds[i].name,
                        cmds[i].nargs);
                return 2;
            }
            return cmds[i].fn(argv + 2);
        }
    fprintf(stderr, "usage: lkt_learn_ref svm|platt|roc|pca|rpca|wccn|std|pairs ... (see the source's header)\n");
    return 2;
}
