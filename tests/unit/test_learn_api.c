/* The learn module's contracts: refusals with the right error code, the
 * Wilson interval against published values, the rule of 30, PCA rebuilt
 * from its parts projecting as the fitted one, and an SVM on separable data
 * separating it. Numerical agreement with scikit-learn is checked by
 * tests/ref/check_learn_*.py. */
#include "likeness/learn.h"
#include "lk_test.h"

#include <math.h>
#include <string.h>

static void test_wilson(void)
{
    /* R. G. Newcombe, "Two-sided confidence intervals for the single
     * proportion: comparison of seven methods", Statistics in Medicine 17,
     * 1998, Table II, method 3 (Wilson score), 4 decimals (recalled from
     * memory; scipy's proportion_ci(method='wilson') gives the same). */
    static const struct {
        size_t x, n;
        double lo, hi;
    } t[] = {{81, 263, 0.2553, 0.3662}, {15, 148, 0.0624, 0.1605}, {0, 20, 0.0, 0.1611},
             {1, 29, 0.0061, 0.1718}};
    for (size_t i = 0; i < sizeof t / sizeof t[0]; i++) {
        double lo, hi;
        lk_wilson_interval(t[i].x, t[i].n, 1.959963984540054, &lo, &hi);
        CHECK(fabs(lo - t[i].lo) < 5e-5 && fabs(hi - t[i].hi) < 5e-5, "%zu/%zu: [%.4f, %.4f]", t[i].x,
              t[i].n, lo, hi);
    }
    /* Doddington et al. 2000: 30 errors needed, so 3000 trials support 1 %. */
    CHECK(fabs(lk_rule_of_30_min_rate(3000) - 0.01) < 1e-15, "rule of 30");
    double m, se;
    const double v[4] = {0.8, 0.9, 0.7, 0.6};
    lk_mean_stderr(v, 4, &m, &se);
    /* mean 0.75, sample sd sqrt(0.05/3), se = sd / 2 (definition). */
    CHECK(fabs(m - 0.75) < 1e-15 && fabs(se - sqrt(0.05 / 3) / 2) < 1e-15, "mean %g se %g", m, se);
}

static void test_refusals(void)
{
    lk_error err;
    float x[4] = {1, 2, 3, 4};
    int y[2] = {1, 1};
    lk_svm_params p;
    lk_svm_params_default(&p);
    lk_linear_model m;
    CHECK(lk_svm_train(x, y, 2, 2, &p, &m, &err) == LK_ERR_DATA, "one class refused: %s", err.message);
    y[1] = 0;
    CHECK(lk_svm_train(x, y, 2, 2, &p, &m, &err) == LK_ERR_INVALID_ARGUMENT, "label 0 refused");
    y[1] = -1;
    p.C = 0;
    CHECK(lk_svm_train(x, y, 2, 2, &p, &m, &err) == LK_ERR_INVALID_ARGUMENT, "C = 0 refused");
    lk_svm_params_default(&p);
    x[1] = NAN;
    CHECK(lk_svm_train(x, y, 2, 2, &p, &m, &err) == LK_ERR_DATA, "NaN feature refused");
    x[1] = 2;

    double f[3] = {1, 2, 3};
    int g[3] = {1, 1, 1};
    lk_platt pl;
    CHECK(lk_platt_fit(f, g, 3, NULL, &pl, &err) == LK_ERR_DATA, "Platt with one class refused");
    lk_roc roc;
    CHECK(lk_roc_compute(f, g, 3, &roc, &err) == LK_ERR_DATA, "ROC with one class refused");
    g[2] = 0;
    f[0] = NAN;
    CHECK(lk_roc_compute(f, g, 3, &roc, &err) == LK_ERR_DATA, "NaN score refused");

    lk_pca *pca;
    lk_pca_params pp = {3, 0, 1};
    CHECK(lk_pca_fit(x, 2, 2, &pp, &pca, &err) == LK_ERR_INVALID_ARGUMENT, "too many components");
    const double mean[2] = {0, 0}, comp[2] = {1, 0}, var[1] = {0};
    CHECK(lk_pca_from_parts(2, 1, mean, comp, var, 1, &pca, &err) == LK_ERR_MODEL_FORMAT,
          "whitening with zero variance refused");
}

static void test_pca_parts(void)
{
    /* A fitted PCA and one rebuilt from its accessors project alike. */
    enum { N = 40, D = 6, K = 3 };
    float x[N * D], a[N * K], b[N * K];
    lk_rng r;
    lk_rng_seed(&r, 5);
    for (int i = 0; i < N * D; i++)
        x[i] = (float)(lk_rng_uniform(&r) * (1 + i % D));
    lk_pca_params pp = {K, 1, 2};
    lk_pca *p, *q;
    lk_error err;
    CHECK(lk_pca_fit(x, N, D, &pp, &p, &err) == LK_OK, "fit: %s", err.message);
    if (!p)
        return;
    CHECK(lk_pca_from_parts(lk_pca_input_dim(p), lk_pca_output_dim(p), lk_pca_mean(p),
                            lk_pca_components(p), lk_pca_variance(p), lk_pca_whitened(p), &q,
                            &err) == LK_OK,
          "from parts: %s", err.message);
    lk_pca_project(p, x, N, a);
    lk_pca_project(q, x, N, b);
    CHECK(memcmp(a, b, sizeof a) == 0, "same projections");
    /* Whitened training projections have unit sample variance (definition). */
    for (int c = 0; c < K; c++) {
        double s = 0;
        for (int i = 0; i < N; i++)
            s += (double)a[i * K + c] * a[i * K + c];
        CHECK(fabs(s / (N - 1) - 1.0) < 1e-5, "component %d variance %g", c, s / (N - 1));
    }
    lk_pca_free(p);
    lk_pca_free(q);
}

static void test_svm_separable(void)
{
    /* Two clouds split by x0 + x1 = 0 with a margin: every training sample
     * must end on its side (a separating hyperplane exists, and with a
     * large C the hinge-loss optimum has zero training error). */
    enum { N = 200 };
    float x[N * 2];
    int y[N];
    lk_rng r;
    lk_rng_seed(&r, 9);
    for (int i = 0; i < N; i++) {
        y[i] = i % 2 ? 1 : -1;
        const double u = lk_rng_uniform(&r) * 4 - 2, v = 1 + lk_rng_uniform(&r) * 2;
        x[2 * i] = (float)(u + y[i] * v);
        x[2 * i + 1] = (float)(-u + y[i] * v);
    }
    for (int loss = 1; loss <= 2; loss++) {
        lk_svm_params p;
        lk_svm_params_default(&p);
        p.loss = (lk_svm_loss)loss;
        p.C = 100;
        p.eps = 1e-4;
        p.max_iter = 100000;
        lk_linear_model m;
        lk_error err;
        CHECK(lk_svm_train(x, y, N, 2, &p, &m, &err) == LK_OK, "train: %s", err.message);
        int wrong = 0;
        for (int i = 0; i < N; i++)
            wrong += (lk_linear_model_decision(&m, x + 2 * i) > 0) != (y[i] > 0);
        CHECK(wrong == 0 && m.converged, "loss %d: %d training errors, converged %d", loss, wrong,
              m.converged);
        lk_linear_model_free(&m);
    }
}

int main(void)
{
    test_wilson();
    test_refusals();
    test_pca_parts();
    test_svm_separable();
    return lk_test_done();
}
