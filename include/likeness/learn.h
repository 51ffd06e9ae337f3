/* likeness learn module: comparison pairs, a linear two-class SVM, feature
 * standardisation and PCA, Platt calibration, and verification metrics.
 *
 * Vocabulary follows ISO/IEC 2382-37 and ISO/IEC 19795-1 (recalled from
 * memory): a mated comparison is between two samples of one identity, a
 * non-mated comparison between two identities; the code's "genuine" and
 * "impostor" names mean mated and non-mated. Higher comparison scores
 * mean "more likely the same identity". Matrices are dense, row-major. */
#ifndef LIKENESS_LEARN_H
#define LIKENESS_LEARN_H

#include <stddef.h>
#include <stdint.h>

#include "likeness/error.h"

#ifdef __cplusplus
extern "C" {
#endif

/* ------------------------------------------------------------------ PRNG */

/* xoshiro256** seeded through splitmix64 (Blackman & Vigna, "Scrambled
 * linear pseudorandom number generators", ACM TOMS 47(4), 2021). A plain
 * value: copy it to fork a stream. Same seed, same sequence, on every
 * platform. */
typedef struct lk_rng {
    uint64_t s[4];
} lk_rng;

void lk_rng_seed(lk_rng *rng, uint64_t seed);
uint64_t lk_rng_next(lk_rng *rng);
/* Uniform integer in [0, n) without modulo bias; n must be > 0. */
uint64_t lk_rng_below(lk_rng *rng, uint64_t n);
/* Uniform double in [0, 1) with 53 random bits. */
double lk_rng_uniform(lk_rng *rng);
/* Fisher-Yates shuffle of a[0..n). */
void lk_rng_shuffle(lk_rng *rng, size_t *a, size_t n);

/* ----------------------------------------------------------------- pairs */

typedef struct lk_pair {
    char *path_a;    /* image path of the first sample */
    char *path_b;    /* image path of the second sample */
    char *name_a;    /* identity of the first sample */
    char *name_b;    /* identity of the second sample (== name_a when genuine) */
    int index_a;     /* image number within its identity (LFW: 1-based) */
    int index_b;
    int fold;        /* 0-based fold (0 for single-split files) */
    int genuine;     /* 1: mated (same identity), 0: non-mated */
} lk_pair;

typedef struct lk_pair_set {
    lk_pair *pairs;
    size_t count;
    int n_folds;
} lk_pair_set;

/* Parses an LFW protocol file held in memory: either the View 1 form
 * (first line N, then N matched "name i j" lines and N mismatched
 * "name1 i name2 j" lines) or the View 2 form (first line "F N", then F
 * folds each of N matched then N mismatched lines). Image paths are built as
 * <lfw_root>/lfw-deepfunneled/<name>/<name>_<%04d>.jpg. `source` names the
 * text in error messages. Malformed input gives LK_ERR_DATA naming the line. */
lk_code lk_pairs_parse_lfw(const char *text, size_t len, const char *source,
                           const char *lfw_root, lk_pair_set **out, lk_error *err);
/* Reads and parses an LFW protocol file (pairsDevTrain.txt, pairs.txt...). */
lk_code lk_pairs_load_lfw(const char *pairs_path, const char *lfw_root,
                          lk_pair_set **out, lk_error *err);
void lk_pair_set_free(lk_pair_set *set);

/* One identity of a folder-per-identity data set; the caller owns it. */
typedef struct lk_identity {
    const char *name;
    const char *const *paths;
    size_t n_paths;
} lk_identity;

/* A scanned folder-per-identity data set (owned by the library). */
typedef struct lk_dataset {
    lk_identity *identities;
    size_t count;
} lk_dataset;

/* Lists <root>/<identity>/<image>.{jpg,jpeg,png} (case-insensitive
 * extensions), identities and images in byte order of their names, keeping
 * identities with at least min_images images. */
lk_code lk_dataset_scan(const char *root, size_t min_images, lk_dataset **out,
                        lk_error *err);
void lk_dataset_free(lk_dataset *ds);

typedef struct lk_pairgen_params {
    uint64_t seed;
    double calib_fraction;         /* share of identities held out for calibration, [0,1) */
    size_t train_pairs_per_class;  /* genuine pairs wanted (impostors: as many as genuine made) */
    size_t calib_pairs_per_class;
} lk_pairgen_params;

/* Splits identities (seeded shuffle) into a training part and a calibration
 * part that share no identity, then draws distinct genuine pairs and as many
 * distinct impostor pairs in each part. When a part has fewer possible
 * genuine pairs than asked, all of them are used. fold is 0 (train) or 1
 * (calibration). Either output pointer may be NULL when not wanted. */
lk_code lk_pairs_generate(const lk_identity *ids, size_t n_ids,
                          const lk_pairgen_params *params, lk_pair_set **train,
                          lk_pair_set **calib, lk_error *err);

/* ------------------------------------------------------------ linear SVM */

typedef enum lk_svm_loss {
    LK_SVM_HINGE = 1,         /* L1-loss: max(0, 1 - y f) */
    LK_SVM_SQUARED_HINGE = 2  /* L2-loss: max(0, 1 - y f)^2 */
} lk_svm_loss;

typedef struct lk_svm_params {
    lk_svm_loss loss;
    double C;          /* > 0 */
    double eps;        /* stop when max - min projected gradient <= eps (liblinear: 0.1) */
    double bias;       /* constant feature B appended to every x; 0 = no bias term */
    int max_iter;      /* outer passes over the data */
    int shrinking;     /* 1: liblinear's shrinking heuristic */
    uint64_t seed;     /* permutation order */
} lk_svm_params;

/* eps 0.1, C 1, hinge loss, bias 1, max_iter 1000, shrinking on, seed 1. */
void lk_svm_params_default(lk_svm_params *p);

/* f(x) = w.x + b. Plain data; free w with lk_linear_model_free. */
typedef struct lk_linear_model {
    size_t dim;
    double *w;
    double b;
    double objective;  /* primal objective, bias weight included (see lk_svm_train) */
    int iterations;    /* outer passes used */
    int converged;     /* 0 when max_iter was reached first */
} lk_linear_model;

/* Trains on x (n x d floats) with labels y[i] in {+1, -1}. Minimises
 *   0.5 (|w|^2 + w_B^2) + C sum_i loss(y_i (w.x_i + w_B B))
 * so the bias b = w_B B is regularised, exactly as liblinear does. */
lk_code lk_svm_train(const float *x, const int *y, size_t n, size_t d,
                     const lk_svm_params *params, lk_linear_model *out,
                     lk_error *err);
double lk_linear_model_decision(const lk_linear_model *m, const float *x);
void lk_linear_model_free(lk_linear_model *m);

/* ------------------------------------------------------ standardisation */

/* x' = (x - mean) / scale; scale is the population standard deviation,
 * 1 where a feature is constant (as scikit-learn's StandardScaler). */
typedef struct lk_standardizer {
    size_t dim;
    double *mean;
    double *scale;
} lk_standardizer;

lk_code lk_standardizer_fit(const float *x, size_t n, size_t d,
                            lk_standardizer *out, lk_error *err);
void lk_standardizer_apply(const lk_standardizer *s, float *x, size_t n);
void lk_standardizer_free(lk_standardizer *s);

/* ------------------------------------------------------------------- PCA */

typedef struct lk_pca lk_pca;

typedef struct lk_pca_params {
    size_t n_components;  /* <= min(n, d) */
    int whiten;           /* 1: divide each projection by sqrt(explained variance) */
    int threads;          /* for the covariance / Gram matrix: 1 or 2 (0 = 2) */
} lk_pca_params;

/* Fits on x (n x d, n >= 2). Eigen-decomposes the d x d covariance, or the
 * n x n Gram matrix of the centred data when n < d. */
lk_code lk_pca_fit(const float *x, size_t n, size_t d, const lk_pca_params *params,
                   lk_pca **out, lk_error *err);
/* Rebuilds a fitted PCA from its parts (e.g. read from a model file). */
lk_code lk_pca_from_parts(size_t d, size_t k, const double *mean,
                          const double *components, const double *variance,
                          int whiten, lk_pca **out, lk_error *err);
/* Randomized PCA for large n and d where only the top components are
 * wanted: randomized subspace iteration (Halko, Martinsson & Tropp, "Finding
 * structure with randomness", SIAM Review 53(2), 2011, Algorithms 4.4 and
 * 5.1). Costs about (2 + 2 q) * 2 n d l flops for l = k + oversampling,
 * against O(min(n,d)^3) for lk_pca_fit. Components match the exact ones to
 * within the accuracy the spectrum's decay allows (the paper's bounds);
 * power_iterations q = 2 is ample for image features. */
typedef struct lk_rpca_params {
    size_t n_components;
    size_t oversampling;  /* extra random directions (default 20) */
    int power_iterations; /* q (default 2) */
    int whiten;
    int threads;          /* 1 or 2 (0 = 2) */
    uint64_t seed;
} lk_rpca_params;

void lk_rpca_params_default(lk_rpca_params *p);
lk_code lk_pca_fit_randomized(const float *x, size_t n, size_t d, const lk_rpca_params *params,
                              lk_pca **out, lk_error *err);

/* Eigen-decomposition of the symmetric l x l matrix a (row-major, destroyed)
 * by cyclic Jacobi rotations: eigenvalues on a's diagonal (unsorted),
 * eigenvectors in the columns of v (l x l). For the small matrices of
 * randomized PCA and WCCN (l up to a few hundred). */
void lk_symmetric_eigen(double *a, double *v, size_t l);

/* Within-class covariance normalisation (WCCN; Hatch, Kajarekar & Stolcke,
 * "Within-class covariance normalization for SVM-based speaker
 * recognition", ICSLP 2006): from n vectors z (n x k) with class labels,
 * the within-class covariance Sw = (1/N) sum_c sum_{i in c} (z_i - m_c)(z_i - m_c)^T
 * over classes with at least two members (N their total), and out (k x k)
 * = Sw^(-1/2), its symmetric inverse square root, with reg * lambda_max added
 * to every eigenvalue so that rarely seen directions are not blown up.
 * Classes are any int labels. LK_ERR_DATA when no class has two members. */
lk_code lk_wccn_fit(const float *z, const int *labels, size_t n, size_t k, double reg,
                    double *out, lk_error *err);

/* out: n x k floats. */
void lk_pca_project(const lk_pca *pca, const float *x, size_t n, float *out);
size_t lk_pca_input_dim(const lk_pca *pca);
size_t lk_pca_output_dim(const lk_pca *pca);
int lk_pca_whitened(const lk_pca *pca);
const double *lk_pca_mean(const lk_pca *pca);          /* d */
const double *lk_pca_components(const lk_pca *pca);    /* k x d, unit rows */
const double *lk_pca_variance(const lk_pca *pca);      /* k, descending, denominator n-1 */
void lk_pca_free(lk_pca *pca);

/* ----------------------------------------------------- Platt calibration */

typedef struct lk_platt_params {
    int max_iter;     /* 100 */
    double min_step;  /* 1e-10 */
    double sigma;     /* 1e-12, added to the Hessian diagonal */
    double gtol;      /* stop when both gradient components are below it (1e-5) */
} lk_platt_params;

void lk_platt_params_default(lk_platt_params *p);

/* P(genuine | f) = 1 / (1 + exp(A f + B)). */
typedef struct lk_platt {
    double A;
    double B;
} lk_platt;

/* Fits A, B on decision values f[i] with labels y[i] (> 0 genuine, else
 * impostor); params may be NULL for the defaults. */
lk_code lk_platt_fit(const double *f, const int *y, size_t n,
                     const lk_platt_params *params, lk_platt *out, lk_error *err);
double lk_platt_probability(const lk_platt *p, double f);

/* --------------------------------------------------------------- metrics */

/* One ROC point per distinct score threshold t, accepting score >= t,
 * in decreasing t; the first point has t = +INFINITY (nothing accepted). */
typedef struct lk_roc_point {
    double threshold;
    double fmr;    /* impostor comparisons with score >= t / impostors */
    double fnmr;   /* genuine comparisons with score < t / genuines */
} lk_roc_point;

typedef struct lk_roc {
    lk_roc_point *points;
    size_t count;
    size_t n_genuine;
    size_t n_impostor;
} lk_roc;

/* scores[i] with genuine[i] != 0 for mated comparisons. Needs at least one
 * genuine and one impostor score; NaN scores are refused. */
lk_code lk_roc_compute(const double *scores, const int *genuine, size_t n,
                       lk_roc *out, lk_error *err);
void lk_roc_free(lk_roc *roc);
/* Area under TMR(FMR) by the trapezoid rule (ties give diagonal steps). */
double lk_roc_auc(const lk_roc *roc);
/* Equal error rate: see metrics.c for the interpolation. *threshold may be NULL. */
double lk_roc_eer(const lk_roc *roc, double *threshold);

typedef struct lk_operating_point {
    double target_fmr;
    double threshold;     /* smallest threshold with FMR <= target */
    double fmr;           /* measured at threshold */
    double fnmr;
    double fmr_ci[2];     /* Wilson 95 % interval of the FMR */
    double fnmr_ci[2];    /* Wilson 95 % interval of the FNMR */
    int supported;        /* 0: fewer than 30 / target impostor comparisons */
} lk_operating_point;

/* FNMR at a target FMR: the smallest threshold whose FMR <= target. */
lk_operating_point lk_roc_at_fmr(const lk_roc *roc, double target_fmr);
/* Fills out[i] for each of n targets. */
void lk_roc_operating_table(const lk_roc *roc, const double *targets, size_t n,
                            lk_operating_point *out);
/* Smallest FMR the number of impostor comparisons supports by the rule of 30. */
double lk_rule_of_30_min_rate(size_t n_trials);

/* Share of correct decisions (genuine accepted, impostor rejected) at t. */
double lk_accuracy_at(const double *scores, const int *genuine, size_t n, double t);
/* Threshold with the best accuracy on these (training) scores; midpoint
 * between neighbouring distinct scores. *accuracy may be NULL. */
lk_code lk_best_accuracy_threshold(const double *scores, const int *genuine, size_t n,
                                   double *threshold, double *accuracy, lk_error *err);

/* Mean and standard error of the mean (sample sd / sqrt(k)) of k values. */
void lk_mean_stderr(const double *v, size_t k, double *mean, double *stderr_out);
/* Wilson score interval (Wilson 1927) for `errors` out of `trials` at normal
 * quantile z (1.959964 for 95 %). */
void lk_wilson_interval(size_t errors, size_t trials, double z, double *lo, double *hi);

#ifdef __cplusplus
}
#endif
#endif
