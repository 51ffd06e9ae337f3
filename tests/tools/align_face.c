/* lkt_align_face: detection (our cascade evaluator, frontal-face cascade)
 * + eye location + alignment + quality for each image on the command line;
 * prints one JSON object per image and optionally writes the crops.
 *
 *   lkt_align_face [--cascade FILE] [--crop-dir DIR] [--no-retry] IMAGE[@x,y,w,h]...
 *
 * IMAGE@x,y,w,h skips detection and uses that face box (face_count 1).
 * Crops go to DIR/crop_<k>.png, k the image's index on the command line. */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "likeness/align.h"

static double now_us(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return ts.tv_sec * 1e6 + ts.tv_nsec / 1e3;
}

static int run_one(const lk_cascade *cas, const lk_find_params *fp, const char *arg, int k,
                   const char *crop_dir)
{
    char path[4096];
    lk_rect box = {0, 0, 0, 0, 0};
    int have_box = 0;
    snprintf(path, sizeof path, "%s", arg);
    char *at = strrchr(path, '@');
    if (at && sscanf(at + 1, "%d,%d,%d,%d", &box.x, &box.y, &box.width, &box.height) == 4) {
        *at = '\0';
        have_box = 1;
    }
    lk_error err;
    lk_image *rgb = NULL, *gray = NULL, *crop = NULL;
    int rc = 1;
    if (lk_image_load(path, NULL, &rgb, &err) != LK_OK) {
        fprintf(stderr, "%s: %s\n", path, err.message);
        return 1;
    }
    gray = lk_image_to_gray(rgb, LK_LUMA_BT601, &err);
    lk_align_params ap;
    lk_align_params_default(&ap);
    crop = lk_image_new(ap.crop_width, ap.crop_height, 1, &err);
    if (!gray || !crop) {
        fprintf(stderr, "%s: %s\n", path, err.message);
        goto done;
    }
    lk_face_find ff = {0};
    double t0 = now_us(), t_detect = 0, t_eyes = 0;
    if (have_box) {
        ff.face_count = 1;
        ff.primary = box;
        if (lk_eyes_locate(gray, &box, &fp->eyes, &ff.eyes, &err) != LK_OK) {
            fprintf(stderr, "%s: %s\n", path, err.message);
            goto done;
        }
        t_eyes = now_us() - t0;
    } else {
        if (lk_face_find_eyes(cas, gray, fp, &ff, &err) != LK_OK) {
            fprintf(stderr, "%s: %s\n", path, err.message);
            goto done;
        }
        t_detect = now_us() - t0;
    }
    double m[6] = {0};
    double t1 = now_us(), t_align = 0, t_quality = 0;
    lk_quality q;
    if (ff.face_count > 0) {
        if (lk_align_transform(&ff.eyes, &ap, m, &err) != LK_OK ||
            lk_align_face(gray, &ff.eyes, &ap, crop, &err) != LK_OK) {
            fprintf(stderr, "%s: %s\n", path, err.message);
            goto done;
        }
        t_align = now_us() - t1;
    }
    double t2 = now_us();
    if (lk_quality_assess(&ff, ff.face_count > 0 ? crop : NULL, NULL, &q, &err) != LK_OK) {
        fprintf(stderr, "%s: %s\n", path, err.message);
        goto done;
    }
    t_quality = now_us() - t2;
    if (crop_dir && ff.face_count > 0) {
        char out[4200];
        snprintf(out, sizeof out, "%s/crop_%d.png", crop_dir, k);
        if (lk_image_save_png(crop, out, &err) != LK_OK) {
            fprintf(stderr, "%s: %s\n", out, err.message);
            goto done;
        }
    }
    printf("{\"index\": %d, \"faces\": %d, \"box\": [%d, %d, %d, %d], \"second_width\": %d, "
           "\"angle\": %.1f, \"left\": [%.6f, %.6f], \"right\": [%.6f, %.6f], "
           "\"found\": %d, \"estimated\": %d, \"confidence\": %.4f, "
           "\"m\": [%.8f, %.8f, %.6f, %.8f, %.8f, %.6f], "
           "\"face_size\": %d, \"eye_distance\": %.3f, \"roll\": %.3f, \"sharpness\": %.6f, "
           "\"mean_gray\": %.3f, \"clipped\": %.5f, \"usable\": %d, \"reasons\": [",
           k, ff.face_count, ff.primary.x, ff.primary.y, ff.primary.width, ff.primary.height,
           ff.second_width, ff.search_angle_deg, ff.eyes.left.x, ff.eyes.left.y,
           ff.eyes.right.x, ff.eyes.right.y, ff.eyes.found, ff.eyes.eyes_estimated,
           ff.eyes.confidence, m[0], m[1], m[2], m[3], m[4], m[5], q.face_size,
           q.eye_distance, q.roll_deg, q.sharpness, q.mean_gray, q.clipped, q.usable);
    int first = 1;
    for (int b = 0; b < LK_QR_COUNT; b++)
        if (q.reasons & (1u << b)) {
            printf("%s\"%s\"", first ? "" : ", ", lk_quality_reason_name(1u << b));
            first = 0;
        }
    printf("], \"us\": {\"detect\": %.0f, \"eyes\": %.0f, \"align\": %.0f, \"quality\": %.0f}}\n",
           t_detect, t_eyes, t_align, t_quality);
    rc = 0;
done:
    lk_image_free(crop);
    lk_image_free(gray);
    lk_image_free(rgb);
    return rc;
}

int main(int argc, char **argv)
{
    const char *cascade = LIKENESS_CASCADE_DIR "/haarcascades/haarcascade_frontalface_alt.xml";
    const char *crop_dir = NULL;
    lk_find_params fp;
    lk_find_params_default(&fp);
    int i = 1;
    for (; i < argc && argv[i][0] == '-' && argv[i][1] == '-'; i++) {
        if (!strcmp(argv[i], "--cascade") && i + 1 < argc)
            cascade = argv[++i];
        else if (!strcmp(argv[i], "--crop-dir") && i + 1 < argc)
            crop_dir = argv[++i];
        else if (!strcmp(argv[i], "--no-retry"))
            fp.retry_angle_deg = 0;
        else {
            fprintf(stderr, "unknown option %s\n", argv[i]);
            return 2;
        }
    }
    if (i >= argc) {
        fprintf(stderr, "usage: %s [--cascade FILE] [--crop-dir DIR] [--no-retry] IMAGE[@x,y,w,h]...\n",
                argv[0]);
        return 2;
    }
    int need_cascade = 0;
    for (int j = i; j < argc; j++)
        if (!strchr(argv[j], '@'))
            need_cascade = 1;
    lk_cascade *cas = NULL;
    lk_error err;
    if (need_cascade) {
        cas = lk_cascade_load(cascade, &err);
        if (!cas) {
            fprintf(stderr, "%s: %s\n", cascade, err.message);
            return 1;
        }
    }
    int fails = 0;
    for (int j = i; j < argc; j++)
        fails += run_one(cas, &fp, argv[j], j - i, crop_dir);
    lk_cascade_free(cas);
    return fails ? 1 : 0;
}
