/* align module: warp, transform, Laplacian variance, quality reasons and the
 * eye locator on synthetic images whose answers follow from formulas. */
#include <math.h>
#include <stdint.h>
#include <string.h>

#include "likeness/align.h"
#include "lk_test.h"

#define PI 3.14159265358979323846

static uint32_t lcg(uint32_t *s)
{
    /* Numerical Recipes' LCG constants (Press et al., 2nd ed., sec. 7.1). */
    *s = *s * 1664525u + 1013904223u;
    return *s >> 8;
}

/* Bilinear value at (x, y) by the textbook formula on the four pixels
 * around it: f = (1-a)(1-b) f00 + a(1-b) f10 + (1-a) b f01 + a b f11. */
static double bilinear_ref(const lk_image *im, double x, double y)
{
    int x0 = (int)floor(x), y0 = (int)floor(y);
    if (x0 >= im->width - 1) x0 = im->width - 2;
    if (y0 >= im->height - 1) y0 = im->height - 2;
    const double a = x - x0, b = y - y0;
    const uint8_t *d = im->data;
    const int w = im->width;
    return (1 - a) * (1 - b) * d[y0 * w + x0] + a * (1 - b) * d[y0 * w + x0 + 1] +
           (1 - a) * b * d[(y0 + 1) * w + x0] + a * b * d[(y0 + 1) * w + x0 + 1];
}

static void test_warp(void)
{
    lk_error err;
    lk_image *src = lk_image_new(37, 29, 1, &err), *dst = lk_image_new(41, 33, 1, &err);
    CHECK(src && dst, "alloc");
    if (!src || !dst)
        return;
    /* A similarity given by its parameters: rotation t, scale s, shift. */
    const double t = 17.0 * PI / 180.0, s = 1.3, tx = 4.5, ty = -3.25;
    const double m[6] = {s * cos(t), -s * sin(t), tx, s * sin(t), s * cos(t), ty};
    /* The inverse of a similarity, analytically: rotate by -t, scale 1/s. */
    const double c = cos(t) / s, sn = sin(t) / s;

    uint32_t seed = 12345;
    for (int i = 0; i < 37 * 29; i++)
        src->data[i] = (uint8_t)(lcg(&seed) & 255);
    CHECK(lk_warp_affine(src, m, dst, &err) == LK_OK, "%s", err.message);
    double maxd = 0;
    int inside = 0;
    for (int y = 0; y < dst->height; y++)
        for (int x = 0; x < dst->width; x++) {
            const double u = x - tx, v = y - ty;
            const double sx = c * u + sn * v, sy = -sn * u + c * v;
            if (sx < 0 || sy < 0 || sx > 36 || sy > 28)
                continue;
            inside++;
            const double d = fabs(dst->data[y * dst->width + x] - bilinear_ref(src, sx, sy));
            if (d > maxd) maxd = d;
        }
    /* Output is the bilinear value rounded to nearest: within 0.5. */
    CHECK(inside > 300, "too few inside samples: %d", inside);
    CHECK(maxd <= 0.5 + 1e-9, "bilinear mismatch %.4f", maxd);

    /* A plane a + b x + c y is reproduced exactly by bilinear interpolation,
     * and with replicated borders every sample is the plane at the clamped
     * point: checks the border rule everywhere, outside the image too. */
    for (int y = 0; y < 29; y++)
        for (int x = 0; x < 37; x++)
            src->data[y * 37 + x] = (uint8_t)(10 + 3 * x + 2 * y);
    CHECK(lk_warp_affine(src, m, dst, &err) == LK_OK, "%s", err.message);
    maxd = 0;
    for (int y = 0; y < dst->height; y++)
        for (int x = 0; x < dst->width; x++) {
            const double u = x - tx, v = y - ty;
            double sx = c * u + sn * v, sy = -sn * u + c * v;
            sx = sx < 0 ? 0 : (sx > 36 ? 36 : sx);
            sy = sy < 0 ? 0 : (sy > 28 ? 28 : sy);
            const double d = fabs(dst->data[y * dst->width + x] - (10 + 3 * sx + 2 * sy));
            if (d > maxd) maxd = d;
        }
    CHECK(maxd <= 0.5 + 1e-9, "plane mismatch %.4f", maxd);

    /* Identity leaves the image unchanged. */
    const double id[6] = {1, 0, 0, 0, 1, 0};
    lk_image *same = lk_image_new(37, 29, 1, &err);
    CHECK(same && lk_warp_affine(src, id, same, &err) == LK_OK, "identity warp");
    if (same)
        CHECK(memcmp(same->data, src->data, 37 * 29) == 0, "identity changed pixels");
    lk_image_free(same);

    lk_image *rgb = lk_image_new(8, 8, 3, &err);
    CHECK(lk_warp_affine(rgb, id, dst, &err) == LK_ERR_INVALID_ARGUMENT, "3 channels accepted");
    const double sing[6] = {1, 2, 0, 2, 4, 0};
    CHECK(lk_warp_affine(src, sing, dst, &err) == LK_ERR_INVALID_ARGUMENT, "singular accepted");
    lk_image_free(rgb);
    lk_image_free(src);
    lk_image_free(dst);
}

static void test_transform(void)
{
    lk_error err;
    lk_align_params p;
    lk_align_params_default(&p);
    /* Fixed crop geometry for this check, independent of the defaults. */
    p.left_eye = (lk_point){32.0, 44.0};
    p.right_eye = (lk_point){64.0, 44.0};
    lk_eyes e = {.left = {100.0, 120.0}, .right = {140.0, 150.0}, .found = 1};
    double m[6], inv[6];
    CHECK(lk_align_transform(&e, &p, m, &err) == LK_OK, "%s", err.message);
    /* Both eyes land exactly where the parameters put them. */
    const double lx = m[0] * 100 + m[1] * 120 + m[2], ly = m[3] * 100 + m[4] * 120 + m[5];
    const double rx = m[0] * 140 + m[1] * 150 + m[2], ry = m[3] * 140 + m[4] * 150 + m[5];
    CHECK(fabs(lx - p.left_eye.x) < 1e-9 && fabs(ly - p.left_eye.y) < 1e-9, "left %g %g", lx, ly);
    CHECK(fabs(rx - p.right_eye.x) < 1e-9 && fabs(ry - p.right_eye.y) < 1e-9, "right %g %g", rx, ry);
    /* Similarity: scale = 32 / 50 (eye distance 50 = 3-4-5 triangle), and
     * rotation = -atan2(30, 40) to level the eye line. */
    CHECK(fabs(m[0] - m[4]) < 1e-12 && fabs(m[1] + m[3]) < 1e-12, "not a similarity");
    CHECK(fabs(hypot(m[0], m[3]) - 32.0 / 50.0) < 1e-12, "scale %g", hypot(m[0], m[3]));
    CHECK(fabs(atan2(m[3], m[0]) + atan2(30, 40)) < 1e-12, "angle %g", atan2(m[3], m[0]));
    CHECK(lk_affine_invert(m, inv, &err) == LK_OK, "%s", err.message);
    const double bx = inv[0] * lx + inv[1] * ly + inv[2], by = inv[3] * lx + inv[4] * ly + inv[5];
    CHECK(fabs(bx - 100) < 1e-9 && fabs(by - 120) < 1e-9, "inverse %g %g", bx, by);
    lk_eyes same = {.left = {5, 5}, .right = {5, 5}};
    CHECK(lk_align_transform(&same, &p, m, &err) == LK_ERR_INVALID_ARGUMENT, "coincident eyes");
    lk_image *small = lk_image_new(10, 10, 1, &err), *img = lk_image_new(50, 50, 1, &err);
    CHECK(lk_align_face(img, &e, &p, small, &err) == LK_ERR_INVALID_ARGUMENT, "wrong crop size");
    lk_image_free(small);
    lk_image_free(img);
}

static void test_laplacian(void)
{
    lk_error err;
    lk_image *im = lk_image_new(64, 64, 1, &err);
    CHECK(im != NULL, "alloc");
    if (!im)
        return;
    /* 1-pixel checkerboard of 0/255: each interior response is
     * 4 * (+-255) = +-1020 with as many of each sign over the 62x62
     * interior, so the variance is 1020^2 = 1040400 exactly. */
    for (int y = 0; y < 64; y++)
        for (int x = 0; x < 64; x++)
            im->data[y * 64 + x] = ((x + y) & 1) ? 255 : 0;
    CHECK(fabs(lk_laplacian_variance(im) - 1040400.0) < 1e-6, "1px %f", lk_laplacian_variance(im));
    /* 2x2-pixel blocks: every pixel has one like and one unlike neighbour
     * per axis: +-2*255 = +-510, balanced signs: variance 260100. */
    for (int y = 0; y < 64; y++)
        for (int x = 0; x < 64; x++)
            im->data[y * 64 + x] = (((x >> 1) + (y >> 1)) & 1) ? 255 : 0;
    CHECK(fabs(lk_laplacian_variance(im) - 260100.0) < 1e-6, "2px %f", lk_laplacian_variance(im));
    /* A ramp has zero second derivative. */
    for (int y = 0; y < 64; y++)
        for (int x = 0; x < 64; x++)
            im->data[y * 64 + x] = (uint8_t)(2 * x + y);
    CHECK(fabs(lk_laplacian_variance(im)) < 1e-9, "ramp %f", lk_laplacian_variance(im));
    lk_image_free(im);
}

static void test_reasons(void)
{
    /* The names are a stable interface (JSON output): align.h lists them. */
    static const char *names[LK_QR_COUNT] = {"no_face", "multiple_faces", "face_too_small",
                                             "too_blurry", "badly_exposed", "too_rotated",
                                             "eyes_estimated"};
    static const uint32_t bits[LK_QR_COUNT] = {LK_QR_NO_FACE, LK_QR_MULTIPLE_FACES,
                                               LK_QR_FACE_TOO_SMALL, LK_QR_TOO_BLURRY,
                                               LK_QR_BADLY_EXPOSED, LK_QR_TOO_ROTATED,
                                               LK_QR_EYES_ESTIMATED};
    for (int i = 0; i < LK_QR_COUNT; i++) {
        CHECK(bits[i] == (1u << i), "bit of %s moved", names[i]);
        const char *n = lk_quality_reason_name(1u << i);
        CHECK(n && !strcmp(n, names[i]), "name of bit %d: %s", i, n ? n : "(null)");
    }
    CHECK(lk_quality_reason_name(0) == NULL, "0 has a name");
    CHECK(lk_quality_reason_name(3) == NULL, "two bits have a name");
    CHECK(lk_quality_reason_name(1u << LK_QR_COUNT) == NULL, "unknown bit has a name");
    CHECK((LK_QR_BLOCKING & LK_QR_EYES_ESTIMATED) == 0, "eyes_estimated must not block");
}

static void test_quality(void)
{
    lk_error err;
    lk_quality q;
    lk_quality_params qp;
    lk_quality_params_default(&qp);
    lk_face_find none = {0};
    CHECK(lk_quality_assess(&none, NULL, &qp, &q, &err) == LK_OK, "%s", err.message);
    CHECK(q.reasons == LK_QR_NO_FACE && !q.usable, "no face: %u", q.reasons);

    lk_image *crop = lk_image_new(96, 112, 1, &err);
    if (!crop)
        return;
    /* Checkerboard of 60/190: mean 125, no clipped pixel, Laplacian
     * variance (4*130)^2 = 270400: sharp and well exposed. */
    for (int y = 0; y < 112; y++)
        for (int x = 0; x < 96; x++)
            crop->data[y * 96 + x] = ((x + y) & 1) ? 190 : 60;
    lk_face_find f = {.face_count = 1, .primary = {50, 50, 120, 120, 5},
                      .eyes = {.left = {90, 100}, .right = {130, 100}, .found = 1}};
    CHECK(lk_quality_assess(&f, crop, &qp, &q, &err) == LK_OK, "%s", err.message);
    CHECK(q.reasons == 0 && q.usable, "clean face flagged: %u", q.reasons);
    CHECK(fabs(q.mean_gray - 125.0) < 1e-9 && q.clipped == 0.0, "exposure %f %f", q.mean_gray,
          q.clipped);
    CHECK(fabs(q.sharpness - 270400.0) < 1e-6, "sharpness %f", q.sharpness);
    CHECK(fabs(q.eye_distance - 40.0) < 1e-9 && fabs(q.roll_deg) < 1e-9, "geometry");

    /* Eye line at 45 degrees (right eye lower: positive roll), second face
     * of 0.6 times the primary's width, estimated eyes. */
    lk_face_find g = f;
    g.eyes.right = (lk_point){130, 140};
    g.eyes.eyes_estimated = 1;
    g.face_count = 2;
    g.second_width = 72;
    CHECK(lk_quality_assess(&g, crop, &qp, &q, &err) == LK_OK, "%s", err.message);
    CHECK(fabs(q.roll_deg - 45.0) < 1e-9, "roll %f", q.roll_deg);
    CHECK(q.reasons == (LK_QR_TOO_ROTATED | LK_QR_MULTIPLE_FACES | LK_QR_EYES_ESTIMATED),
          "reasons %u", q.reasons);
    g.second_width = 59; /* below half of 120 */
    g.eyes.right = (lk_point){130, 100};
    g.eyes.eyes_estimated = 0;
    CHECK(lk_quality_assess(&g, crop, &qp, &q, &err) == LK_OK && q.reasons == 0,
          "small bystander flagged: %u", q.reasons);

    /* Flat, dark, small. */
    memset(crop->data, 3, 96 * 112);
    lk_face_find s = f;
    s.primary.width = 40;
    CHECK(lk_quality_assess(&s, crop, &qp, &q, &err) == LK_OK, "%s", err.message);
    CHECK(q.reasons == (LK_QR_TOO_BLURRY | LK_QR_BADLY_EXPOSED | LK_QR_FACE_TOO_SMALL),
          "reasons %u", q.reasons);
    CHECK(q.clipped == 1.0 && q.sharpness == 0.0, "flat dark %f %f", q.clipped, q.sharpness);
    lk_image_free(crop);
}

/* Two dark discs (pupils of radius 4 inside irises of radius 9) on a
 * bright face: the means-of-gradients objective peaks at a disc's centre
 * (Timm & Barth, VISAPP 2011, sec. 2: every boundary gradient points away
 * from it). */
static void test_eyes(void)
{
    lk_error err;
    lk_image *im = lk_image_new(250, 250, 1, &err);
    if (!im)
        return;
    lk_rect face = {70, 60, 110, 110, 10};
    lk_eyes est;
    lk_eyes_estimate(&face, NULL, &est);
    const double cx[2] = {est.left.x + 3.3, est.right.x - 2.6};
    const double cy[2] = {est.left.y + 2.2, est.right.y - 1.7};
    for (int y = 0; y < 250; y++)
        for (int x = 0; x < 250; x++) {
            double v = 200;
            for (int k = 0; k < 2; k++) {
                const double r = hypot(x - cx[k], y - cy[k]);
                if (r < 4) v = 20;
                else if (r < 9 && v > 110) v = 110;
            }
            im->data[y * 250 + x] = (uint8_t)v;
        }
    lk_eyes e;
    CHECK(lk_eyes_locate(im, &face, NULL, &e, &err) == LK_OK, "%s", err.message);
    CHECK(e.found && !e.eyes_estimated, "synthetic eyes not found");
    CHECK(hypot(e.left.x - cx[0], e.left.y - cy[0]) < 1.0, "left (%.2f,%.2f) vs (%.2f,%.2f)",
          e.left.x, e.left.y, cx[0], cy[0]);
    CHECK(hypot(e.right.x - cx[1], e.right.y - cy[1]) < 1.0, "right (%.2f,%.2f) vs (%.2f,%.2f)",
          e.right.x, e.right.y, cx[1], cy[1]);

    /* The same discs on an eye line rolled by 12 degrees about the box
     * centre (the levelled pass of lk_eyes_locate): the centres follow. */
    {
        const double bcx = face.x - 0.5 + face.width / 2.0, bcy = face.y - 0.5 + face.height / 2.0;
        const double ca = cos(12.0 * PI / 180.0), sa = sin(12.0 * PI / 180.0);
        double rx[2], ry[2];
        for (int k = 0; k < 2; k++) {
            rx[k] = bcx + ca * (cx[k] - bcx) - sa * (cy[k] - bcy);
            ry[k] = bcy + sa * (cx[k] - bcx) + ca * (cy[k] - bcy);
        }
        for (int y = 0; y < 250; y++)
            for (int x = 0; x < 250; x++) {
                double v = 200;
                for (int k = 0; k < 2; k++) {
                    const double r = hypot(x - rx[k], y - ry[k]);
                    if (r < 4) v = 20;
                    else if (r < 9 && v > 110) v = 110;
                }
                im->data[y * 250 + x] = (uint8_t)v;
            }
        CHECK(lk_eyes_locate(im, &face, NULL, &e, &err) == LK_OK, "%s", err.message);
        CHECK(e.found, "rolled synthetic eyes not found");
        CHECK(hypot(e.left.x - rx[0], e.left.y - ry[0]) < 1.0 &&
                  hypot(e.right.x - rx[1], e.right.y - ry[1]) < 1.0,
              "rolled: (%.2f,%.2f) (%.2f,%.2f) vs (%.2f,%.2f) (%.2f,%.2f)", e.left.x, e.left.y,
              e.right.x, e.right.y, rx[0], ry[0], rx[1], ry[1]);
    }

    /* A flat box has no gradients: the fallback, flagged. */
    memset(im->data, 128, 250 * 250);
    CHECK(lk_eyes_locate(im, &face, NULL, &e, &err) == LK_OK, "%s", err.message);
    CHECK(!e.found && e.eyes_estimated && e.left.x == est.left.x && e.right.y == est.right.y,
          "flat image not estimated");
    lk_image_free(im);
}

int main(void)
{
    test_warp();
    test_transform();
    test_laplacian();
    test_reasons();
    test_quality();
    test_eyes();
    return lk_test_done();
}
