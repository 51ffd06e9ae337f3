/* The training recipe: PCA (optionally whitened) learned on training images,
 * squared-difference pair vectors in the projected space, a linear SVM,
 * Platt calibration and an operating-point table on held-out pairs. Shared
 * by `likeness train` and `likeness lfw` so both train exactly alike. */
#ifndef LIKENESS_CLI_RECIPE_H
#define LIKENESS_CLI_RECIPE_H

#include <stddef.h>

#include "featset.h"
#include "likeness/learn.h"
#include "likeness/model.h"

typedef struct recipe {
    size_t pca_dim;         /* 0: no projection */
    int whiten;             /* divide each component by sqrt(its variance) */
    double whiten_floor;    /* variance floor, relative to the largest, before whitening */
    size_t pca_max_images;  /* PCA is fitted on at most this many training images (seeded pick) */
    int l2;                 /* L2-normalise the projected vector (needs pca_dim > 0) */
    double wccn_reg;        /* within-class covariance normalisation; < 0 turns it off */
    size_t pairs_per_class; /* generated training pairs per class (0: only given pairs) */
    double C;
    lk_svm_loss loss;
    uint64_t seed;
} recipe;

void recipe_default(recipe *r);
/* "pca=...;whiten=...;..." for provenance. */
void recipe_describe(const recipe *r, char *buf, size_t size);

/* Fits the projection on feature rows pca_rows, then the SVM on the pairs
 * (labels from pair.genuine); sets features, projection and SVM of m.
 * Pairs whose images have no features are skipped. */
int recipe_fit(const recipe *r, const char *feature_config, const featset *fs,
               const size_t *pca_rows, size_t n_pca_rows, const lk_pair *pairs, size_t n_pairs,
               lk_model *m, size_t *pairs_used, lk_error *err);

/* SVM values of pairs with the projection and SVM of m; a pair with an image
 * without features gets -INFINITY (so a mated pair counts as an error). */
int recipe_score(const lk_model *m, const featset *fs, const lk_pair *pairs, size_t n_pairs,
                 double *values, int *labels, size_t *missing, lk_error *err);

/* Platt parameters from held-out values, operating points for the targets
 * 1e-1 .. 1e-5 (only supported rows beyond 1e-2 kept flagged), default FMR. */
int recipe_calibrate(lk_model *m, const double *values, const int *labels, size_t n,
                     double default_fmr, lk_error *err);

/* Feature rows of the images of the pairs (unique). *rows is malloc'd. */
int recipe_rows_of_pairs(const featset *fs, const lk_pair *pairs, size_t n_pairs, size_t **rows,
                         size_t *n_rows);

#endif
