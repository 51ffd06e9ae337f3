/* likeness model: everything needed to turn two feature vectors into a
 * calibrated comparison score and a decision, and its versioned file format
 * (byte layout in docs/model-format.md).
 *
 * Scoring (docs/model-format.md, "Scoring"):
 *   y = W (x - mu)                  optional projection, W is k x d
 *   y = y / ||y||_2                 optional, only with the projection
 *   p_i = (y_a,i - y_b,i)^2         pair vector (k, or d without projection)
 *   z_i = (p_i - m_i) / s_i         optional standardisation
 *   f = w . z + b                   linear SVM decision value
 *   P(match) = 1 / (1 + exp(A f + B))   Platt (1999) sigmoid
 *
 * lk_model is opaque; it is built with lk_model_new and the setters (which
 * copy their arguments) or read with lk_model_load / lk_model_load_bytes. A
 * loaded or fully set model is read-only for scoring, so any number of
 * threads may score with it at once, each with its own scratch buffer. */
#ifndef LIKENESS_MODEL_H
#define LIKENESS_MODEL_H

#include <stdbool.h>
#include <stddef.h>
#include <stdint.h>

#include "likeness/error.h"

#ifdef __cplusplus
extern "C" {
#endif

#define LK_MODEL_FORMAT_VERSION 1u
#define LK_MODEL_MAX_DIM 1000000u         /* d and k */
#define LK_MODEL_MAX_CONFIG 4096u         /* bytes of the feature configuration string */
#define LK_MODEL_MAX_STRING 65536u        /* bytes of each provenance string */
#define LK_MODEL_MAX_OPERATING_POINTS 1024u
#define LK_MODEL_ID_HEX 32                /* characters of lk_model_id() */

typedef struct lk_model lk_model;

/* One row of the operating-point table, measured on the evaluation pairs.
 * The decision is "match" when probability >= prob_threshold (equivalently
 * svm_value >= svm_threshold, since the Platt sigmoid is increasing in f). */
typedef struct lk_model_operating_point {
    double target_fmr;     /* in (0, 1); rows strictly increasing in it */
    double prob_threshold; /* threshold on the calibrated probability, in [0, 1] */
    double svm_threshold;  /* the same threshold on the raw SVM value */
    double measured_fmr;   /* in [0, 1] */
    double measured_fnmr;  /* in [0, 1] */
    uint64_t impostor_comparisons;
    uint64_t genuine_comparisons;
    bool supported; /* enough errors behind the figure (rule of 30, Doddington et al. 2000) */
} lk_model_operating_point;

/* Provenance strings are UTF-8; created_utc is "YYYY-MM-DDTHH:MM:SSZ". */
typedef struct lk_model_provenance {
    const char *dataset;
    uint64_t training_pairs;
    uint64_t calibration_pairs;
    uint64_t evaluation_pairs;
    const char *created_utc;
    const char *command_line;
    const char *software_version;
} lk_model_provenance;

/* A new empty model with a fresh random 128-bit id; NULL if out of memory
 * or libsodium cannot initialise its random source. */
lk_model *lk_model_new(void);
void lk_model_free(lk_model *m);

/* Setters copy their arguments and check them (finite, in range, bounded);
 * errors are LK_ERR_INVALID_ARGUMENT or LK_ERR_NOMEM. Dimensions across
 * setters are checked together by lk_model_validate / lk_model_save. */
lk_code lk_model_set_features(lk_model *m, const char *config, size_t dim, lk_error *err);
/* How the projection matrix W is stored in the file (docs/model-format.md,
 * section PROJ, field encoding; the enum values are the field's codes). */
typedef enum lk_model_proj_encoding {
    LK_MODEL_F64 = 1, /* IEEE binary64: exact */
    LK_MODEL_F32 = 2  /* IEEE binary32 (the default): half the size, W rounded
                         to nearest, relative error <= 2^-24 per element */
} lk_model_proj_encoding;

/* mean: d values; matrix: k x d, row-major. With the F32 encoding (the
 * default) the matrix is rounded to binary32 as it is copied, so the model
 * scores in memory exactly as it will after a save and load, and the getter
 * returns the rounded values; every |W_ij| must then be <= FLT_MAX. The mean
 * is always kept in binary64. */
lk_code lk_model_set_projection(lk_model *m, size_t k, size_t d, const double *mean,
                                const double *matrix, lk_error *err);
lk_code lk_model_clear_projection(lk_model *m);
/* Chooses the encoding of W; may be called before or after
 * lk_model_set_projection. Switching to F32 rounds a projection already set
 * (refused with LK_ERR_INVALID_ARGUMENT, model unchanged, if some |W_ij| >
 * FLT_MAX); switching to F64 keeps the values as they are, so to keep a
 * matrix at full binary64 precision choose F64 before setting it.
 * LK_ERR_INVALID_ARGUMENT for an unknown encoding. Kept by
 * lk_model_clear_projection. */
lk_code lk_model_set_projection_encoding(lk_model *m, lk_model_proj_encoding enc,
                                         lk_error *err);
/* LK_MODEL_F32 for a new model (or m NULL); a loaded model reports the
 * encoding of its file's PROJ section (F32 if it has none). */
lk_model_proj_encoding lk_model_projection_encoding(const lk_model *m);

/* What happens to the projected vector y = W (x - mu) before the pair
 * vector is formed (docs/model-format.md, section PRNM). */
typedef enum lk_model_proj_norm {
    LK_PROJ_NORM_NONE = 0, /* y as projected (no PRNM section in the file) */
    LK_PROJ_NORM_L2 = 1    /* y / ||y||_2; a zero y stays zero */
} lk_model_proj_norm;

/* Sets the normalisation of the projected vector. LK_PROJ_NORM_L2 needs a
 * projection (checked by lk_model_validate / lk_model_save, so the setters
 * may be called in any order); lk_model_clear_projection also resets it to
 * LK_PROJ_NORM_NONE. LK_ERR_INVALID_ARGUMENT for an unknown mode. */
lk_code lk_model_set_projection_norm(lk_model *m, lk_model_proj_norm mode, lk_error *err);
/* mean, scale: n values each, scale > 0. */
lk_code lk_model_set_standardisation(lk_model *m, size_t n, const double *mean,
                                     const double *scale, lk_error *err);
lk_code lk_model_clear_standardisation(lk_model *m);
lk_code lk_model_set_svm(lk_model *m, size_t n, const double *weights, double bias,
                         lk_error *err);
/* A < 0 is required so that the probability increases with the SVM value. */
lk_code lk_model_set_platt(lk_model *m, double a, double b, lk_error *err);
/* rows sorted by strictly increasing target_fmr, thresholds non-increasing;
 * default_target_fmr must select a row by lk_model_threshold_for_fmr's rule. */
lk_code lk_model_set_operating_points(lk_model *m, const lk_model_operating_point *rows,
                                      size_t n, double default_target_fmr, lk_error *err);
lk_code lk_model_set_provenance(lk_model *m, const lk_model_provenance *p, lk_error *err);

/* Checks that every part is present and the dimensions agree (the loader's
 * checks); LK_ERR_INVALID_ARGUMENT naming the problem otherwise. */
lk_code lk_model_validate(const lk_model *m, lk_error *err);

/* Writes a validated model to a temporary file in the same directory, fsyncs
 * it, renames it over path and fsyncs the directory, so a crash leaves either
 * the old file or the complete new one. */
lk_code lk_model_save(const lk_model *m, const char *path, lk_error *err);
/* The file's bytes in a malloc'd buffer (free with free()). */
lk_code lk_model_serialise(const lk_model *m, uint8_t **bytes, size_t *len, lk_error *err);

/* NULL on failure, with err set: LK_ERR_IO (cannot read), LK_ERR_MODEL_FORMAT
 * (truncated, corrupt, newer version; the message names field and offset),
 * LK_ERR_NOMEM. */
lk_model *lk_model_load(const char *path, lk_error *err);
lk_model *lk_model_load_bytes(const uint8_t *bytes, size_t len, lk_error *err);

/* Getters. Pointers stay valid until the model is changed or freed. */
const char *lk_model_id(const lk_model *m); /* 32 lowercase hex characters */
const char *lk_model_feature_config(const lk_model *m); /* "" if unset */
size_t lk_model_feature_dim(const lk_model *m);
/* Dimension of the pair vector: k with projection, else d. */
size_t lk_model_pair_dim(const lk_model *m);
/* false if the model has no projection (outputs untouched). */
bool lk_model_projection(const lk_model *m, size_t *k, size_t *d, const double **mean,
                         const double **matrix);
/* LK_PROJ_NORM_NONE if unset (or m is NULL). */
lk_model_proj_norm lk_model_projection_norm(const lk_model *m);
bool lk_model_standardisation(const lk_model *m, size_t *n, const double **mean,
                              const double **scale);
bool lk_model_svm(const lk_model *m, size_t *n, const double **weights, double *bias);
bool lk_model_platt(const lk_model *m, double *a, double *b);
const lk_model_operating_point *lk_model_operating_points(const lk_model *m, size_t *n);
double lk_model_default_fmr(const lk_model *m); /* 0 if unset */
/* Fields are "" / 0 if unset. */
lk_model_provenance lk_model_get_provenance(const lk_model *m);

/* LK_ERR_MODEL_MISMATCH (message names both configurations) unless the
 * features were made with exactly the model's configuration and dimension. */
lk_code lk_model_check_features(const lk_model *m, const char *config, size_t dim,
                                lk_error *err);

/* Number of doubles of scratch that lk_model_pair_vector / lk_model_score need. */
size_t lk_model_scratch_size(const lk_model *m);

/* Projects one feature vector: out gets k values (d without projection),
 * L2-normalised if the model says so. With normalisation, a feature vector
 * whose projection is not finite (NaN or infinite features) is refused with
 * LK_ERR_INVALID_ARGUMENT. */
lk_code lk_model_project(const lk_model *m, const float *feat, double *out, lk_error *err);

/* The (standardised) pair vector z of two feature vectors of dimension d;
 * out gets lk_model_pair_dim() values; scratch holds lk_model_scratch_size()
 * doubles. Needs the features (and projection / standardisation, if any)
 * set, not the SVM. Errors as lk_model_project. */
lk_code lk_model_pair_vector(const lk_model *m, const float *feat_a, const float *feat_b,
                             double *scratch, double *out, lk_error *err);

/* SVM value f and calibrated probability of two feature vectors. Read-only
 * on the model (thread-safe); scratch holds lk_model_scratch_size() doubles.
 * LK_ERR_INVALID_ARGUMENT if the model is incomplete or a result is not
 * finite (non-finite features). Either output pointer may be NULL. */
lk_code lk_model_score(const lk_model *m, const float *feat_a, const float *feat_b,
                       double *scratch, double *svm_value, double *probability, lk_error *err);

/* Scores two vectors already projected with lk_model_project (k values
 * each, or d without a projection), e.g. a stored template and a probe.
 * For a model with L2 projection normalisation (or none) this equals
 * lk_model_score on the original feature vectors, bit for bit. */
lk_code lk_model_score_projected(const lk_model *m, const double *ya, const double *yb,
                                 double *svm_value, double *probability, lk_error *err);

/* Platt sigmoid of an SVM value, computed without overflow. */
double lk_model_probability(const lk_model *m, double svm_value);

/* The operating point for a target FMR: the row with the largest target FMR
 * not above the requested one (never a looser threshold than asked for).
 * LK_ERR_INVALID_ARGUMENT if every row's target is above the request. */
lk_code lk_model_operating_point_for_fmr(const lk_model *m, double target_fmr,
                                         lk_model_operating_point *row, lk_error *err);
/* The same row's threshold on the calibrated probability. */
lk_code lk_model_threshold_for_fmr(const lk_model *m, double target_fmr, double *threshold,
                                   lk_error *err);

/* Public description as a malloc'd JSON string (free with free()): id,
 * checksum, feature configuration and dimension, projection, projection_norm
 * ("none" or "l2"), projection_encoding ("f32" or "f64"; only with a projection),
 * standardisation, pair dimension, Platt
 * parameters, operating points, default FMR, provenance. Never the weights,
 * projection or standardisation. NULL if out of memory. */
char *lk_model_to_json(const lk_model *m);

/* Hex BLAKE2b-256 (64 characters) stored in the file the model was loaded
 * from; "" for a model built in memory. */
const char *lk_model_checksum(const lk_model *m);

#ifdef __cplusplus
}
#endif
#endif
