/* likeness engine: image bytes -> faces, eyes, quality and reasons -> the
 * feature vector of the primary face; and comparison of two feature vectors
 * with a model. It composes the stage modules (image, face, align, features,
 * model) and owns nothing but their configuration.
 *
 * An lk_engine is immutable after lk_engine_new: the cascade and extractor
 * are loaded once and shared read-only, so one engine serves any number of
 * threads; every call allocates its own per-image buffers. */
#ifndef LIKENESS_ENGINE_H
#define LIKENESS_ENGINE_H

#include <stddef.h>
#include <stdint.h>

#include "likeness/align.h"
#include "likeness/error.h"
#include "likeness/face.h"
#include "likeness/features.h"
#include "likeness/image.h"
#include "likeness/model.h"

#ifdef __cplusplus
extern "C" {
#endif

#define LK_ENGINE_PATH_MAX 1024

typedef struct lk_engine_config {
    char face_cascade[LK_ENGINE_PATH_MAX]; /* Viola-Jones frontal-face cascade XML */
    lk_decode_limits limits;
    lk_find_params find;
    lk_align_params align;
    lk_quality_params quality;
    lk_feature_config features;
    /* When no face is found, analyse a fixed central box instead and flag it
     * (used only for benchmark protocols such as LFW, whose images are
     * centred on one face; never by the service). Fractions of the image. */
    int center_fallback;
    /* Faces smaller than this fraction of the image's short side are not
     * searched for (the detector's min_size is raised to it): a verification
     * photo shows one large face, and the search over small scales costs
     * most of the detection time. 0 disables. Default 1/10. */
    double min_face_fraction;
    double center_box[4]; /* x, y, width, height as fractions; default 0.3,0.3,0.4,0.4 */
} lk_engine_config;

/* Defaults: the frontal-face "alt" cascade from LIKENESS_CASCADE_DIR (or the
 * environment variable of that name), and each module's defaults. */
void lk_engine_config_default(lk_engine_config *cfg);

typedef struct lk_engine lk_engine;

lk_engine *lk_engine_new(const lk_engine_config *cfg, lk_error *err);
void lk_engine_free(lk_engine *e);
const lk_engine_config *lk_engine_get_config(const lk_engine *e);
size_t lk_engine_feature_dim(const lk_engine *e);
/* Canonical feature configuration string, as a model file stores it. */
const char *lk_engine_feature_config(const lk_engine *e);

enum { LK_STAGE_DECODE, LK_STAGE_DETECT, LK_STAGE_ALIGN, LK_STAGE_FEATURES, LK_STAGE_COUNT };

typedef struct lk_analysis {
    int width, height;      /* decoded, upright image size */
    lk_face_find find;      /* faces, primary box, eyes */
    lk_quality quality;     /* measures and reasons (LK_QR_* bits) */
    int center_fallback;
    /* Faces smaller than this fraction of the image's short side are not
     * searched for (the detector's min_size is raised to it): a verification
     * photo shows one large face, and the search over small scales costs
     * most of the detection time. 0 disables. Default 1/10. */
    double min_face_fraction;    /* 1: no face was found; the fixed central box was used */
    int has_features;       /* 1: features were written (a face, or the fallback, was there) */
    double stage_ms[LK_STAGE_COUNT];
} lk_analysis;

/* Decodes and analyses one image. Returns LK_OK whenever the image could be
 * decoded, even with no face: out->quality.reasons says what is wrong and
 * out->has_features whether features (lk_engine_feature_dim floats) were
 * written. Image errors (unsupported, corrupt, too large) are returned as
 * codes. crop_out, if not NULL, receives a copy of the aligned gray crop
 * (free with lk_image_free). */
lk_code lk_engine_analyse(const lk_engine *e, const uint8_t *bytes, size_t len,
                          lk_analysis *out, float *features, lk_image **crop_out,
                          lk_error *err);

/* Same, for an already decoded image (RGB or gray). */
lk_code lk_engine_analyse_image(const lk_engine *e, const lk_image *img, lk_analysis *out,
                                float *features, lk_image **crop_out, lk_error *err);

/* The result of comparing two feature vectors with a model. */
typedef struct lk_comparison {
    double svm_value;   /* raw decision value of the linear SVM */
    double score;       /* calibrated probability of a mated pair (Platt) */
    double threshold;   /* on score, from the model's operating point for target_fmr */
    double target_fmr;
    int match;          /* score >= threshold */
} lk_comparison;

/* Scores a pair. target_fmr <= 0 uses the model's default operating point.
 * Fails with LK_ERR_MODEL_MISMATCH if the model was trained on features of
 * another configuration than the engine's. */
lk_code lk_engine_compare(const lk_engine *e, const lk_model *m, const float *probe,
                          const float *reference, double target_fmr, lk_comparison *out,
                          lk_error *err);

#ifdef __cplusplus
}
#endif
#endif
