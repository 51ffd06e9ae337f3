/* Face detection + primary face + eyes, with a search on rotated copies
 * when an upright frontal cascade finds nothing. Frontal cascades are
 * trained on upright faces and miss strongly rolled ones; M. Jones and
 * P. Viola, "Fast multi-view face detection", MERL TR2003-96, handle roll
 * with detectors for rotated faces (recalled from memory). Searching
 * rotated copies with the one upright cascade is the same idea at the
 * cost of more searches, paid only when the upright search fails. In
 * tests/ref/check_align_transform.py every LFW face rolled by 28-32
 * degrees was found this way. */
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "likeness/align.h"

#define LK_PI 3.14159265358979323846

void lk_find_params_default(lk_find_params *p)
{
    lk_detect_params_default(&p->detect);
    lk_eye_params_default(&p->eyes);
    /* 18 degrees: the copies cover rolls of about 18 +- 15 degrees, which
     * joins the upright search's range and reaches past 30. Own choice. */
    p->retry_angle_deg = 18.0;
}

/* Rotation by deg counter-clockwise on screen about (cx, cy): the matrix of
 * OpenCV's getRotationMatrix2D with scale 1 (source -> rotated copy). */
static void rotation(double deg, double cx, double cy, double m[6])
{
    const double a = cos(deg * LK_PI / 180.0), b = sin(deg * LK_PI / 180.0);
    m[0] = a;
    m[1] = b;
    m[2] = (1 - a) * cx - b * cy;
    m[3] = -b;
    m[4] = a;
    m[5] = b * cx + (1 - a) * cy;
}

static void fill(lk_face_find *out, const lk_rect *r, int count)
{
    out->face_count = count;
    out->primary = r[0];
    out->listed = count < LK_FIND_MAX_LISTED ? count : LK_FIND_MAX_LISTED;
    memcpy(out->faces, r, (size_t)out->listed * sizeof *r);
    out->second_width = 0;
    for (int i = 1; i < count; i++)
        if (r[i].width > out->second_width)
            out->second_width = r[i].width;
}

lk_code lk_face_find_eyes(const lk_cascade *face_cascade, const lk_image *gray,
                          const lk_find_params *p, lk_face_find *out, lk_error *err)
{
    lk_find_params def;
    if (!p) {
        lk_find_params_default(&def);
        p = &def;
    }
    if (!face_cascade || !gray || !out)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_face_find_eyes: NULL argument");
    if (gray->channels != 1)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "lk_face_find_eyes needs a gray image; convert with lk_image_to_gray");
    *out = (lk_face_find){0};
    lk_rect *rects = NULL;
    int count = 0;
    lk_code rc = lk_detect(face_cascade, gray, &p->detect, &rects, &count, err);
    if (rc != LK_OK)
        return rc;
    if (count > 0) {
        fill(out, rects, count);
        free(rects);
        return lk_eyes_locate(gray, &out->primary, &p->eyes, &out->eyes, err);
    }
    free(rects);
    rects = NULL;
    if (!(p->retry_angle_deg > 0))
        return LK_OK;

    lk_image *rot = lk_image_new(gray->width, gray->height, 1, err);
    if (!rot)
        return err ? err->code : LK_ERR_NOMEM;
    const double cx = (gray->width - 1) / 2.0, cy = (gray->height - 1) / 2.0;
    /* Both signs are searched; the copy whose primary face gathered more
     * raw windows wins (neighbors is the detector's confidence proxy). */
    int best_n = -1;
    double best_angle = 0;
    for (int k = 0; k < 2 && rc == LK_OK; k++) {
        const double ang = k == 0 ? p->retry_angle_deg : -p->retry_angle_deg;
        double m[6];
        rotation(ang, cx, cy, m);
        rc = lk_warp_affine(gray, m, rot, err);
        if (rc != LK_OK)
            break;
        rc = lk_detect(face_cascade, rot, &p->detect, &rects, &count, err);
        if (rc == LK_OK && count > 0 && rects[0].neighbors > best_n) {
            best_n = rects[0].neighbors;
            best_angle = ang;
            fill(out, rects, count);
        }
        free(rects);
        rects = NULL;
    }
    if (rc == LK_OK && best_n >= 0) {
        double m[6], inv[6];
        rotation(best_angle, cx, cy, m);
        rc = lk_warp_affine(gray, m, rot, err);
        if (rc == LK_OK)
            rc = lk_eyes_locate(rot, &out->primary, &p->eyes, &out->eyes, err);
        if (rc == LK_OK)
            rc = lk_affine_invert(m, inv, err);
        if (rc == LK_OK) {
            /* Eyes found in the rotated copy, mapped back to the original. */
            lk_point *e[2] = {&out->eyes.left, &out->eyes.right};
            for (int i = 0; i < 2; i++) {
                const double x = e[i]->x, y = e[i]->y;
                e[i]->x = inv[0] * x + inv[1] * y + inv[2];
                e[i]->y = inv[3] * x + inv[4] * y + inv[5];
            }
            out->search_angle_deg = best_angle;
        }
    }
    lk_image_free(rot);
    return rc;
}
