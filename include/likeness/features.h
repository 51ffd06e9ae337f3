/* likeness features: the descriptors a face crop is turned into before two of
 * them are compared.
 *
 *  - HOG, histograms of oriented gradients (N. Dalal, B. Triggs, "Histograms
 *    of Oriented Gradients for Human Detection", CVPR 2005), computed exactly
 *    as scikit-image 0.19's skimage.feature.hog computes it.
 *  - LBP, local binary patterns (T. Ojala, M. Pietikainen, T. Maenpaa,
 *    "Multiresolution Gray-Scale and Rotation Invariant Texture
 *    Classification with Local Binary Patterns", IEEE TPAMI 24(7), 2002),
 *    mapped to non-rotation-invariant uniform labels exactly as
 *    skimage.feature.local_binary_pattern(method='nri_uniform'), and pooled
 *    into per-region histograms (T. Ahonen, A. Hadid, M. Pietikainen, "Face
 *    Description with Local Binary Patterns: Application to Face
 *    Recognition", IEEE TPAMI 28(12), 2006).
 *  - Tan & Triggs photometric normalisation (X. Tan, B. Triggs, "Enhanced
 *    Local Texture Feature Sets for Face Recognition Under Difficult Lighting
 *    Conditions", IEEE TIP 19(6), 2010).
 *  - lk_extractor: a configured combination of the above that turns an
 *    aligned 8-bit gray crop into one float vector, and lk_pair_vector that
 *    turns two such vectors into the input of the comparison classifier.
 *
 * Images passed as `const double *img` are row-major, width w, height h,
 * stride w. */
#ifndef LIKENESS_FEATURES_H
#define LIKENESS_FEATURES_H

#include <stddef.h>
#include <stdint.h>

#include "likeness/error.h"
#include "likeness/image.h"

#ifdef __cplusplus
extern "C" {
#endif

/* ---- HOG ---------------------------------------------------------------- */

typedef enum lk_hog_norm {
    LK_HOG_L1 = 0,  /* v / (|v|_1 + eps) */
    LK_HOG_L1_SQRT, /* sqrt(v / (|v|_1 + eps)) */
    LK_HOG_L2,      /* v / sqrt(|v|_2^2 + eps^2) */
    LK_HOG_L2_HYS   /* L2, clip at 0.2, L2 again */
} lk_hog_norm;

typedef struct lk_hog_params {
    int orientations;   /* unsigned orientation bins over [0,180) degrees, >= 1 */
    int cell;           /* cell side in pixels, >= 1 */
    int block;          /* block side in cells, >= 1 */
    lk_hog_norm norm;   /* block normalisation */
    int transform_sqrt; /* nonzero: sqrt of the image first (needs img >= 0) */
} lk_hog_params;

/* Number of values lk_hog writes, or 0 when the image is too small for one
 * block or the parameters are invalid. Layout (skimage's ravel order):
 * [block_row][block_col][cell_row_in_block][cell_col_in_block][orientation]. */
size_t lk_hog_size(int w, int h, const lk_hog_params *params);

/* out must hold lk_hog_size(w,h,params) doubles. Allocates its scratch once
 * per call. Errors: LK_ERR_INVALID_ARGUMENT, LK_ERR_NOMEM. */
lk_code lk_hog(const double *img, int w, int h, const lk_hog_params *params, double *out,
               lk_error *err);

/* The same with caller-provided scratch of lk_hog_scratch_doubles(w,h,params)
 * doubles (0 when the parameters do not fit), for callers that reuse it. */
size_t lk_hog_scratch_doubles(int w, int h, const lk_hog_params *params);
lk_code lk_hog_with_scratch(const double *img, int w, int h, const lk_hog_params *params,
                            double *scratch, double *out, lk_error *err);

/* ---- LBP ---------------------------------------------------------------- */

#define LK_LBP_MAX_POINTS 16 /* keeps every label below 256 */

/* Number of 'nri_uniform' labels for P sampling points: P*(P-1)+3. */
int lk_lbp_nri_uniform_labels(int points);

/* Writes one label per pixel into codes[w*h]: 0 = all neighbours below the
 * centre, P*(P-1)+1 = all at or above, P*(P-1)+2 = non-uniform, others the
 * uniform patterns by number of ones and rotation. Neighbours outside the
 * image read 0. points in [2, LK_LBP_MAX_POINTS], radius > 0. */
lk_code lk_lbp_nri_uniform(const double *img, int w, int h, int points, double radius,
                           uint8_t *codes, lk_error *err);

/* Splits the w x h code image into grid_x x grid_y regions (region i spans
 * columns [i*w/grid_x, (i+1)*w/grid_x), integer division; rows likewise) and
 * writes one histogram of n_labels bins per region, regions in row-major
 * order, each divided by its pixel count so it sums to 1.
 * out holds grid_x*grid_y*n_labels doubles. Codes >= n_labels are an error. */
lk_code lk_lbp_histograms(const uint8_t *codes, int w, int h, int n_labels, int grid_x,
                          int grid_y, double *out, lk_error *err);

/* ---- Photometric normalisation ------------------------------------------ */

typedef struct lk_tan_triggs_params {
    double gamma;  /* power-law exponent, > 0 */
    double sigma0; /* inner Gaussian of the difference of Gaussians (pixels) */
    double sigma1; /* outer Gaussian, > sigma0 */
    double alpha;  /* exponent of the robust contrast equalisation, > 0 */
    double tau;    /* threshold of the robust contrast equalisation, > 0 */
} lk_tan_triggs_params;

/* The paper's values: gamma 0.2, sigma0 1, sigma1 2, alpha 0.1, tau 10. */
lk_tan_triggs_params lk_tan_triggs_default(void);

/* Gaussian blur equal to scipy.ndimage.gaussian_filter(img, sigma) with its
 * defaults (mode='reflect', truncate=4.0). in and out may not alias. */
lk_code lk_gaussian_blur(const double *img, int w, int h, double sigma, double *out,
                         lk_error *err);

/* Gamma, difference of Gaussians, two-stage contrast equalisation and
 * tau*tanh(x/tau) compression; img must be >= 0 (e.g. gray in [0,1]).
 * Every output value lies in [-tau, tau]. out may alias img. */
lk_code lk_tan_triggs(const double *img, int w, int h, const lk_tan_triggs_params *params,
                      double *out, lk_error *err);

/* The same with caller-provided scratch of lk_tan_triggs_scratch_doubles(w,h)
 * doubles. */
size_t lk_tan_triggs_scratch_doubles(int w, int h);
lk_code lk_tan_triggs_with_scratch(const double *img, int w, int h,
                                   const lk_tan_triggs_params *params, double *scratch,
                                   double *out, lk_error *err);

/* ---- Extractor ------------------------------------------------------------ */

#define LK_FEATURE_MAX_RADII 4
#define LK_FEATURE_CONFIG_MAX 512 /* bytes of the canonical string, with NUL */

typedef struct lk_feature_config {
    int crop_width, crop_height; /* the aligned crop the extractor accepts */

    int hog_on;
    lk_hog_params hog;
    int hog_tan_triggs; /* HOG on the Tan-Triggs image (needs transform_sqrt off) */

    int lbp_points;                         /* 0 turns LBP off */
    int lbp_n_radii;                        /* 1..LK_FEATURE_MAX_RADII when on */
    double lbp_radii[LK_FEATURE_MAX_RADII]; /* one histogram set per radius */
    int lbp_grid_x, lbp_grid_y;             /* regions across and down */
    int lbp_tan_triggs;                     /* LBP on the Tan-Triggs image */

    int lbp_hist_sqrt; /* square root of every (unit-sum) LBP region histogram
                        * value: the Hellinger map; HOG has LK_HOG_L1_SQRT */
    int part_l2;       /* L2-normalise the HOG part and each LBP radius separately */
    int final_l2;      /* L2-normalise the whole vector last */
} lk_feature_config;

lk_feature_config lk_feature_config_default(void);

/* Checks a config; LK_ERR_INVALID_ARGUMENT with the offending field named. */
lk_code lk_feature_config_validate(const lk_feature_config *cfg, lk_error *err);

/* Canonical text "v=1;crop=96x112;hog=1;..." (every field, fixed order), the
 * string a model file stores and compares. buf of LK_FEATURE_CONFIG_MAX
 * bytes always suffices. */
lk_code lk_feature_config_to_string(const lk_feature_config *cfg, char *buf, size_t size,
                                    lk_error *err);

/* Parses the canonical text; every key must be present exactly once and no
 * other key may appear. Errors: LK_ERR_MODEL_MISMATCH for an unknown version,
 * LK_ERR_INVALID_ARGUMENT otherwise. */
lk_code lk_feature_config_parse(const char *text, lk_feature_config *cfg, lk_error *err);

typedef struct lk_extractor lk_extractor;

lk_extractor *lk_extractor_new(const lk_feature_config *cfg, lk_error *err);
void lk_extractor_free(lk_extractor *ex);
size_t lk_extractor_dim(const lk_extractor *ex);
const lk_feature_config *lk_extractor_config(const lk_extractor *ex);

/* crop: 8-bit gray (channels 1), exactly crop_width x crop_height.
 * out: lk_extractor_dim floats. Thread-safe: the extractor is read-only and
 * each call allocates its own scratch once.
 *
 * The crop is read as v/255 doubles (the "gray" image); the Tan-Triggs image,
 * when a part asks for it, uses lk_tan_triggs_default(). Vector layout:
 *   [HOG, lk_hog layout]                        (part_l2: L2 over the part)
 *   [LBP radius 0: region (row-major) x label]  (lbp_hist_sqrt, then part_l2)
 *   [LBP radius 1 ...] ...
 * then final_l2 over the whole vector. */
lk_code lk_extractor_run(const lk_extractor *ex, const lk_image *crop, float *out,
                         lk_error *err);

/* Scratch for lk_extractor_run_ws, made for one extractor and used by one
 * thread at a time; saves the per-call allocation in batch loops. */
typedef struct lk_extractor_workspace lk_extractor_workspace;
lk_extractor_workspace *lk_extractor_workspace_new(const lk_extractor *ex, lk_error *err);
void lk_extractor_workspace_free(lk_extractor_workspace *ws);
lk_code lk_extractor_run_ws(const lk_extractor *ex, lk_extractor_workspace *ws,
                            const lk_image *crop, float *out, lk_error *err);

/* out[i] = (a[i] - b[i])^2, the element-wise input of the pair classifier.
 * out may alias a or b. */
void lk_pair_vector(const float *a, const float *b, size_t dim, float *out);

#ifdef __cplusplus
}
#endif
#endif
