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
    int min_neighbors;   /* groups with fewer raw windows are dropped (default 3) */
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

#ifdef __cplusplus
}
#endif
#endif
