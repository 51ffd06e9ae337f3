/* likeness align: eye centres inside a face box, a similarity transform that
 * puts the two eye centres at fixed places of a canonical gray crop, and
 * per-face quality measures with stable reason codes.
 *
 * Coordinates: pixel centres sit at integer coordinates (x to the right,
 * y down), as in OpenCV's warpAffine, so pixel (0,0) covers [-0.5,0.5]^2.
 * "Left"/"right" eye always mean IMAGE-left (smaller x) and IMAGE-right,
 * i.e. the subject's right and left eye on an upright frontal face.
 *
 * Everything here is reentrant: no globals, every call allocates its own
 * work buffers (once per call, never per pixel). */
#ifndef LIKENESS_ALIGN_H
#define LIKENESS_ALIGN_H

#include <stdint.h>

#include "likeness/error.h"
#include "likeness/face.h"
#include "likeness/image.h"

#ifdef __cplusplus
extern "C" {
#endif

/* ---------------------------------------------------------------- eyes -- */

typedef struct lk_point {
    double x, y;
} lk_point;

typedef struct lk_eyes {
    lk_point left;      /* image-left eye centre (subject's right eye) */
    lk_point right;     /* image-right eye centre (subject's left eye) */
    int found;          /* 1: both centres located and the pair passed the geometric check */
    int eyes_estimated; /* 1: the centres are the fixed-proportion prediction from the face box */
    double confidence;  /* in [0,1]: 0 when estimated; else how sharply the locator peaked
                           (see lk_eyes_locate) */
} lk_eyes;

typedef struct lk_eye_params {
    /* Search regions, as fractions of the face box (x from the box's left
     * edge over its width, y from its top over its height). Each region is
     * centred on the expected eye position below. */
    double region_width;  /* default 0.26 */
    double region_height; /* default 0.20 */
    /* Expected (fallback) eye centres relative to the face box. */
    double expect_left_x, expect_left_y;   /* default 0.307, 0.393 */
    double expect_right_x, expect_right_y; /* default 0.672, 0.385 */
    int work_width; /* each region is resampled to this width before the gradient search (default 30) */
    /* Geometric check of a located pair, relative to the box width: */
    double min_distance; /* default 0.22 */
    double max_distance; /* default 0.55 */
    double max_roll_deg; /* |angle of the eye line| (default 25) */
} lk_eye_params;

void lk_eye_params_default(lk_eye_params *p);

/* Locates both eye centres inside face (a box in gray's coordinates) with
 * the means-of-gradients locator of Timm & Barth (VISAPP 2011), each in its
 * own search region around the expected position. The pair is accepted
 * (found = 1) when its distance lies in [min_distance, max_distance] times
 * the box width and its eye line is within max_roll_deg of horizontal;
 * confidence is then the smaller over the two eyes of 1 - mean/max of the
 * locator's objective over its region. Otherwise (a region without strong
 * gradients, or the check fails) both centres fall back to the expected
 * positions (lk_eyes_estimate) with eyes_estimated = 1, found = 0.
 * Returns LK_OK in both cases; errors only for bad arguments or memory.
 * gray: 8-bit, 1 channel. p may be NULL for the defaults. */
lk_code lk_eyes_locate(const lk_image *gray, const lk_rect *face, const lk_eye_params *p,
                       lk_eyes *out, lk_error *err);

/* The fallback alone: eye centres predicted from the face box. */
void lk_eyes_estimate(const lk_rect *face, const lk_eye_params *p, lk_eyes *out);

/* ----------------------------------------------------------- alignment -- */

typedef struct lk_align_params {
    int crop_width;  /* default 96 */
    int crop_height; /* default 112 */
    lk_point left_eye;  /* where the image-left eye lands (default 30.3, 51.7) */
    lk_point right_eye; /* where the image-right eye lands (default 65.5, 51.7) */
} lk_align_params;

void lk_align_params_default(lk_align_params *p);

/* The 2x3 similarity m mapping source (image) coordinates to crop
 * coordinates: x' = m[0] x + m[1] y + m[2], y' = m[3] x + m[4] y + m[5]
 * (row-major, the layout of cv2.warpAffine's matrix). Fails if the two eye
 * centres coincide. */
lk_code lk_align_transform(const lk_eyes *eyes, const lk_align_params *p, double m[6],
                           lk_error *err);

/* Inverse of a 2x3 affine map (fails if singular). */
lk_code lk_affine_invert(const double m[6], double inv[6], lk_error *err);

/* Warps src (1 channel) into dst (preallocated, 1 channel): every dst
 * pixel is inverse-mapped through m (src -> dst) and sampled with bilinear
 * interpolation, rounded to nearest; outside src the border is replicated
 * (clamped coordinates, as OpenCV's BORDER_REPLICATE). */
lk_code lk_warp_affine(const lk_image *src, const double m[6], lk_image *dst, lk_error *err);

/* lk_align_transform + lk_warp_affine. crop_out must be preallocated with
 * p's crop size and 1 channel. p may be NULL for the defaults. */
lk_code lk_align_face(const lk_image *gray, const lk_eyes *eyes, const lk_align_params *p,
                      lk_image *crop_out, lk_error *err);

/* ------------------------------------------------ detection + eyes ------ */

#define LK_FIND_MAX_LISTED 32

typedef struct lk_face_find {
    int face_count;          /* faces found (at the search angle that found any) */
    int listed;              /* boxes in faces[]: min(face_count, LK_FIND_MAX_LISTED) */
    lk_rect faces[LK_FIND_MAX_LISTED]; /* the first boxes in primary-rule order, in the
                                          frame searched (faces[0] == primary) */
    lk_rect primary;         /* primary face box, in the frame searched (see search_angle_deg) */
    int second_width;        /* width of the largest other face, 0 if none */
    double search_angle_deg; /* 0, or the angle the image was rotated by (about its centre,
                                counter-clockwise on screen) before a face was found */
    lk_eyes eyes;            /* primary face's eyes, in the ORIGINAL image's coordinates */
} lk_face_find;

typedef struct lk_find_params {
    lk_detect_params detect;
    lk_eye_params eyes;
    /* When the upright search finds nothing, search again on copies rotated
     * by +retry_angle_deg and -retry_angle_deg (0 = no retry; default 18). */
    double retry_angle_deg;
} lk_find_params;

void lk_find_params_default(lk_find_params *p);

/* Detects faces with face_cascade, picks the primary one (index 0 of
 * lk_detect), locates its eyes. face_count 0 is not an error (LK_OK). */
lk_code lk_face_find_eyes(const lk_cascade *face_cascade, const lk_image *gray,
                          const lk_find_params *p, lk_face_find *out, lk_error *err);

/* ------------------------------------------------------------- quality -- */

/* Stable reason bits; names from lk_quality_reason_name. Append only. */
typedef enum lk_quality_reason {
    LK_QR_NO_FACE = 1u << 0,        /* "no_face" */
    LK_QR_MULTIPLE_FACES = 1u << 1, /* "multiple_faces" */
    LK_QR_FACE_TOO_SMALL = 1u << 2, /* "face_too_small" */
    LK_QR_TOO_BLURRY = 1u << 3,     /* "too_blurry" */
    LK_QR_BADLY_EXPOSED = 1u << 4,  /* "badly_exposed" */
    LK_QR_TOO_ROTATED = 1u << 5,    /* "too_rotated" */
    LK_QR_EYES_ESTIMATED = 1u << 6  /* "eyes_estimated": a note, never blocking */
} lk_quality_reason;

#define LK_QR_COUNT 7
/* The reasons that make a face unusable; the others are notes. */
#define LK_QR_BLOCKING (LK_QR_NO_FACE | LK_QR_MULTIPLE_FACES | LK_QR_FACE_TOO_SMALL | \
                        LK_QR_TOO_BLURRY | LK_QR_BADLY_EXPOSED | LK_QR_TOO_ROTATED)

typedef struct lk_quality_params {
    int min_face_size;          /* box width in px (default 60) */
    double min_eye_distance;    /* inter-eye distance in px (default 24) */
    double max_roll_deg;        /* |roll| (default 30) */
    double min_sharpness;       /* variance of the Laplacian on the crop (default 30) */
    double min_mean, max_mean;  /* mean gray level of the crop (default 40, 200) */
    double max_clipped;         /* fraction of crop pixels <= 5 or >= 250 (default 0.30) */
    double multiple_face_ratio; /* another face at least this times the primary's width
                                   makes multiple_faces (default 0.5) */
} lk_quality_params;

void lk_quality_params_default(lk_quality_params *p);

typedef struct lk_quality {
    int face_count;
    int face_size;       /* primary box width, px */
    double eye_distance; /* px, in the original image */
    double roll_deg;     /* angle of the eye line from image-left to image-right eye,
                            degrees, positive when the right eye is lower (y down) */
    double sharpness;    /* variance of the 4-neighbour Laplacian over the crop's interior */
    double mean_gray;    /* mean of the crop */
    double clipped;      /* fraction of crop pixels <= 5 or >= 250 */
    uint32_t reasons;    /* OR of lk_quality_reason bits */
    int usable;          /* (reasons & LK_QR_BLOCKING) == 0 */
} lk_quality;

/* Fills out from a detection result and the aligned crop (crop may be NULL
 * only when find->face_count is 0). p may be NULL for the defaults. */
lk_code lk_quality_assess(const lk_face_find *find, const lk_image *crop,
                          const lk_quality_params *p, lk_quality *out, lk_error *err);

/* Variance of the 4-neighbour Laplacian [0 1 0; 1 -4 1; 0 1 0] over the
 * pixels that have all four neighbours (Pech-Pacheco et al., ICPR 2000). */
double lk_laplacian_variance(const lk_image *gray);

/* Stable snake_case name of ONE reason bit, e.g. "too_blurry"; NULL if the
 * argument is not exactly one known bit. */
const char *lk_quality_reason_name(uint32_t bit);

#ifdef __cplusplus
}
#endif
#endif
