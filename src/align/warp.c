/* Similarity alignment on the eye centres and bilinear affine warping. */
#include <math.h>
#include <stddef.h>

#include "likeness/align.h"

void lk_align_params_default(lk_align_params *p)
{
    /* 96x112 crop, inter-eye distance 35.2 px, eyes 51.7 px from the top:
     * the geometry the feature recipe was tuned with on LFW View 1 (README).
     * It keeps brows and forehead and the face down to the mouth and most
     * of the chin (on adult faces the pupil-to-chin distance is about 1.8
     * inter-eye distances: Farkas, "Anthropometry of the Head and Face",
     * 1994, recalled from memory), trading the lowest chin for more
     * resolution on the eye and nose region. */
    p->crop_width = 96;
    p->crop_height = 112;
    p->left_eye = (lk_point){30.3, 51.7};
    p->right_eye = (lk_point){65.5, 51.7};
}

lk_code lk_align_transform(const lk_eyes *eyes, const lk_align_params *p, double m[6],
                           lk_error *err)
{
    lk_align_params def;
    if (!p) {
        lk_align_params_default(&def);
        p = &def;
    }
    if (!eyes || !m)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_align_transform: NULL argument");
    /* Complex-number form of a similarity: z' = a z + b with
     * a = (r' - l') / (r - l), b = l' - a l, so both eyes land exactly. */
    const double sx = eyes->right.x - eyes->left.x, sy = eyes->right.y - eyes->left.y;
    const double dx = p->right_eye.x - p->left_eye.x, dy = p->right_eye.y - p->left_eye.y;
    const double n = sx * sx + sy * sy;
    if (!(n > 1e-12) || !isfinite(n))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "the two eye centres coincide or are not finite: cannot align; "
                            "locate the eyes again or use lk_eyes_estimate");
    /* (dx + i dy) / (sx + i sy) */
    const double ar = (dx * sx + dy * sy) / n, ai = (dy * sx - dx * sy) / n;
    m[0] = ar;
    m[1] = -ai;
    m[3] = ai;
    m[4] = ar;
    m[2] = p->left_eye.x - (ar * eyes->left.x - ai * eyes->left.y);
    m[5] = p->left_eye.y - (ai * eyes->left.x + ar * eyes->left.y);
    return LK_OK;
}

lk_code lk_affine_invert(const double m[6], double inv[6], lk_error *err)
{
    const double det = m[0] * m[4] - m[1] * m[3];
    if (!(fabs(det) > 1e-12) || !isfinite(det))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "affine map is singular");
    inv[0] = m[4] / det;
    inv[1] = -m[1] / det;
    inv[3] = -m[3] / det;
    inv[4] = m[0] / det;
    inv[2] = -(inv[0] * m[2] + inv[1] * m[5]);
    inv[5] = -(inv[3] * m[2] + inv[4] * m[5]);
    return LK_OK;
}

static inline double clampd(double v, double lo, double hi)
{
    return v < lo ? lo : (v > hi ? hi : v);
}

lk_code lk_warp_affine(const lk_image *src, const double m[6], lk_image *dst, lk_error *err)
{
    if (!src || !dst || !m || !src->data || !dst->data)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_warp_affine: NULL argument");
    if (src->channels != 1 || dst->channels != 1)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "lk_warp_affine needs 1-channel images; convert with lk_image_to_gray");
    if (src->width < 1 || src->height < 1 || dst->width < 1 || dst->height < 1)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_warp_affine: empty image");
    double inv[6];
    lk_code rc = lk_affine_invert(m, inv, err);
    if (rc != LK_OK)
        return rc;
    const int w = src->width, h = src->height;
    const double xmax = w - 1, ymax = h - 1;
    const uint8_t *s = src->data;
    for (int y = 0; y < dst->height; y++) {
        uint8_t *row = dst->data + (size_t)y * (size_t)dst->width;
        for (int x = 0; x < dst->width; x++) {
            /* Clamping the sample point replicates the border: outside the
             * image the nearest edge value (or the bilinear blend along the
             * edge) is used, which is OpenCV's BORDER_REPLICATE. */
            const double sx = clampd(inv[0] * x + inv[1] * y + inv[2], 0.0, xmax);
            const double sy = clampd(inv[3] * x + inv[4] * y + inv[5], 0.0, ymax);
            int x0 = (int)sx, y0 = (int)sy;
            if (x0 > w - 2)
                x0 = w > 1 ? w - 2 : 0;
            if (y0 > h - 2)
                y0 = h > 1 ? h - 2 : 0;
            const double fx = sx - x0, fy = sy - y0;
            const int x1 = w > 1 ? x0 + 1 : x0, y1 = h > 1 ? y0 + 1 : y0;
            const uint8_t *r0 = s + (size_t)y0 * (size_t)w, *r1 = s + (size_t)y1 * (size_t)w;
            /* Bilinear interpolation on the unit square. */
            const double v = (1.0 - fy) * ((1.0 - fx) * r0[x0] + fx * r0[x1]) +
                             fy * ((1.0 - fx) * r1[x0] + fx * r1[x1]);
            row[x] = (uint8_t)(v + 0.5);
        }
    }
    return LK_OK;
}

lk_code lk_align_face(const lk_image *gray, const lk_eyes *eyes, const lk_align_params *p,
                      lk_image *crop_out, lk_error *err)
{
    lk_align_params def;
    if (!p) {
        lk_align_params_default(&def);
        p = &def;
    }
    if (!gray || !crop_out)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_align_face: NULL argument");
    if (crop_out->width != p->crop_width || crop_out->height != p->crop_height ||
        crop_out->channels != 1)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "crop_out is %dx%dx%d; allocate it as %dx%d with 1 channel",
                            crop_out->width, crop_out->height, crop_out->channels,
                            p->crop_width, p->crop_height);
    double m[6];
    lk_code rc = lk_align_transform(eyes, p, m, err);
    if (rc != LK_OK)
        return rc;
    return lk_warp_affine(gray, m, crop_out, err);
}
