/* likeness face detection: an evaluator of its own for the published
 * Viola-Jones boosted cascades (Haar-like features, Viola & Jones, CVPR 2001,
 * with Lienhart & Maydt's tilted features, ICIP 2002; and multi-block LBP
 * features, Liao et al., ICB 2007) in the XML format that Debian's
 * opencv-data package ships. Integral images, multi-scale sliding window,
 * grouping of overlapping windows, primary-face rule.
 *
 * A loaded lk_cascade is immutable: share one across threads; every call
 * allocates its own work buffers. */
#ifndef LIKENESS_FACE_H
#define LIKENESS_FACE_H

#include <stdint.h>

#include "likeness/error.h"
#include "likeness/image.h"

#ifdef __cplusplus
extern "C" {
#endif

typedef struct lk_cascade lk_cascade;

/* Loads a cascade XML file (OpenCV's "new" cascade format, Haar or LBP). */
lk_cascade *lk_cascade_load(const char *path, lk_error *err);
void lk_cascade_free(lk_cascade *c);
/* Training window size of the cascade (e.g. 20x20 or 24x24). */
void lk_cascade_window(const lk_cascade *c, int *width, int *height);

/* A detected box in the coordinates of the image passed in. */
typedef struct lk_rect {
    int x, y, width, height;
    int neighbors; /* raw windows merged into this box: a confidence proxy */
} lk_rect;

typedef struct lk_detect_params {
    double scale_factor; /* step between scales, > 1 (default 1.1) */
    int min_neighbors;   /* groups of min_neighbors raw windows or fewer are dropped, as in
                            OpenCV's groupRectangles (default 3; 0 = raw windows) */
    int min_size;        /* smallest box side searched, in input pixels (0 = cascade window) */
    int max_size;        /* largest box side searched, in input pixels (0 = no limit) */
    int max_long_side;   /* search on a copy downscaled so its long side is at most this
                            (default 640; 0 = never downscale); boxes are mapped back */
} lk_detect_params;

void lk_detect_params_default(lk_detect_params *p);

/* Detects objects in an 8-bit gray image. *rects is malloc'd (free() it),
 * *count may be 0. Boxes are ordered by the primary-face rule (see
 * lk_primary_rank): index 0 is the primary face. */
lk_code lk_detect(const lk_cascade *c, const lk_image *gray, const lk_detect_params *p,
                  lk_rect **rects, int *count, lk_error *err);

/* Same, restricted to a region of interest of gray (boxes in full-image
 * coordinates); used to search for eyes inside a face box. */
lk_code lk_detect_roi(const lk_cascade *c, const lk_image *gray, const lk_rect *roi,
                      const lk_detect_params *p, lk_rect **rects, int *count, lk_error *err);

/* Orders rects in place by the primary-face rule: larger area first; equal
 * areas by nearness of the box centre to the centre of an image of
 * image_width x image_height; then more neighbors; then top-left first. */
void lk_primary_rank(lk_rect *rects, int count, int image_width, int image_height);

/* ---- Building blocks, public so they can be checked on their own. ---- */

/* What a loaded cascade is made of. */
typedef enum lk_cascade_feature { LK_CASCADE_HAAR = 1, LK_CASCADE_LBP = 2 } lk_cascade_feature;
typedef struct lk_cascade_info {
    lk_cascade_feature feature_type;
    int window_width, window_height;
    int stages, weak_classifiers, features;
    int max_nodes_per_tree; /* 1: every weak classifier is a stump */
    int has_tilted;         /* some Haar feature uses the 45-degree integral */
} lk_cascade_info;
void lk_cascade_get_info(const lk_cascade *c, lk_cascade_info *info);

/* Runs the cascade on the single window whose top-left corner is (x, y) of
 * gray, at the cascade's own size (no scaling). *accepted is 1 if every stage
 * passed; *stages_passed counts the stages passed. A window that the Haar
 * variance gate rejects (flat window) counts as rejected with 0 stages. */
lk_code lk_cascade_classify_window(const lk_cascade *c, const lk_image *gray, int x, int y,
                                   int *accepted, int *stages_passed, lk_error *err);

/* Integral images of an 8-bit image (w x h, row stride src_stride) into
 * tables of (w+1) x (h+1) with row stride dst_stride (>= w+1):
 *   sum(X,Y)    = sum of I(x,y) over x < X, y < Y (Viola & Jones 2001, eq. 1),
 *   sqsum(X,Y)  = same over I(x,y)^2, kept modulo 2^32 (differences of four
 *                 entries are exact whenever the true window sum fits 32 bits),
 *   tilted(X,Y) = sum of I(x,y) over y < Y, |x - X + 1| <= Y - 1 - y (the
 *                 45-degree table of Lienhart & Maydt, ICIP 2002, in the layout
 *                 of OpenCV's integral()).
 * sqsum and tilted may be NULL. Fails only on bad arguments or, when tilted
 * is asked for, out of memory for its O(w+h) scratch. */
lk_code lk_integral(const uint8_t *src, int w, int h, int src_stride, int32_t *sum,
                    uint32_t *sqsum, int32_t *tilted, int dst_stride, lk_error *err);

/* Bilinear resize of an 8-bit gray image to dst->width x dst->height with the
 * bit-exact fixed-point arithmetic of OpenCV's resize(INTER_LINEAR_EXACT)
 * (8-bit weights), which OpenCV 4's cascade search uses at every scale; an
 * exact halving averages 2x2 blocks as OpenCV does. Both images 1-channel. */
lk_code lk_resize_linear_u8(const lk_image *src, lk_image *dst, lk_error *err);

/* Box-filter (pixel-area) downscale of an 8-bit gray image, for shrinking a
 * large input before the search; dst must be no larger than src. */
lk_code lk_resize_area_u8(const lk_image *src, lk_image *dst, lk_error *err);

/* The classic grouping of raw detections (OpenCV's groupRectangles): windows
 * are joined into classes by the similarity relation with eps (0.2 in the
 * detector), classes with <= min_neighbors members are dropped, each class is
 * averaged, then boxes lying inside a box with clearly more support are
 * dropped. Works in place on rects[0..*count); neighbors gets the class size.
 * min_neighbors <= 0 keeps the raw windows (neighbors = 1). */
lk_code lk_group_rects(lk_rect *rects, int *count, int min_neighbors, double eps,
                       lk_error *err);

#ifdef __cplusplus
}
#endif
#endif
