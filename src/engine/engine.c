#include "likeness/engine.h"

#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

struct lk_engine {
    lk_engine_config cfg;
    lk_cascade *cascade;
    lk_extractor *extractor;
    char feature_config[LK_FEATURE_CONFIG_MAX];
};

static double now_ms(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec * 1e3 + ts.tv_nsec * 1e-6;
}

void lk_engine_config_default(lk_engine_config *cfg)
{
    memset(cfg, 0, sizeof *cfg);
    const char *dir = getenv("LIKENESS_CASCADE_DIR");
    if (!dir || !*dir)
        dir = LIKENESS_CASCADE_DIR;
    snprintf(cfg->face_cascade, sizeof cfg->face_cascade,
             "%s/haarcascades/haarcascade_frontalface_alt.xml", dir);
    lk_find_params_default(&cfg->find);
    lk_align_params_default(&cfg->align);
    lk_quality_params_default(&cfg->quality);
    cfg->features = lk_feature_config_default();
    cfg->features.crop_width = cfg->align.crop_width;
    cfg->features.crop_height = cfg->align.crop_height;
    cfg->center_fallback = 0;
    /* Our choice, measured: searching below 1/10 of the short side quadruples
     * detection time on a 640x480 photo, and such faces fail the quality gate's
     * minimum size on any photo under 600 px anyway. */
    cfg->min_face_fraction = 0.1;
    /* LFW's 250x250 images are centred on the detected face, which spans
     * roughly the middle 40 % (measured on the detector's boxes over LFW by
     * the align module's fallback study; common practice to use the centre). */
    cfg->center_box[0] = 0.3;
    cfg->center_box[1] = 0.3;
    cfg->center_box[2] = 0.4;
    cfg->center_box[3] = 0.4;
}

lk_engine *lk_engine_new(const lk_engine_config *cfg, lk_error *err)
{
    lk_engine_config def;
    if (!cfg) {
        lk_engine_config_default(&def);
        cfg = &def;
    }
    if (cfg->features.crop_width != cfg->align.crop_width ||
        cfg->features.crop_height != cfg->align.crop_height) {
        lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                     "feature crop %dx%d differs from the alignment crop %dx%d",
                     cfg->features.crop_width, cfg->features.crop_height, cfg->align.crop_width,
                     cfg->align.crop_height);
        return NULL;
    }
    lk_engine *e = calloc(1, sizeof *e);
    if (!e) {
        lk_error_set(err, LK_ERR_NOMEM, "out of memory");
        return NULL;
    }
    e->cfg = *cfg;
    e->cascade = lk_cascade_load(cfg->face_cascade, err);
    if (!e->cascade)
        goto fail;
    e->extractor = lk_extractor_new(&cfg->features, err);
    if (!e->extractor)
        goto fail;
    if (lk_feature_config_to_string(&cfg->features, e->feature_config, sizeof e->feature_config,
                                    err) != LK_OK)
        goto fail;
    return e;
fail:
    lk_engine_free(e);
    return NULL;
}

void lk_engine_free(lk_engine *e)
{
    if (!e)
        return;
    lk_cascade_free(e->cascade);
    lk_extractor_free(e->extractor);
    free(e);
}

const lk_engine_config *lk_engine_get_config(const lk_engine *e) { return &e->cfg; }
size_t lk_engine_feature_dim(const lk_engine *e) { return lk_extractor_dim(e->extractor); }
const char *lk_engine_feature_config(const lk_engine *e) { return e->feature_config; }

lk_code lk_engine_analyse_image(const lk_engine *e, const lk_image *img, lk_analysis *out,
                                float *features, lk_image **crop_out, lk_error *err)
{
    double t0 = now_ms();
    memset(out, 0, sizeof *out);
    out->width = img->width;
    out->height = img->height;
    if (crop_out)
        *crop_out = NULL;

    lk_image *gray = lk_image_to_gray(img, LK_LUMA_BT601, err);
    if (!gray)
        return err ? err->code : LK_ERR_NOMEM;
    lk_image *crop = NULL;
    lk_find_params find = e->cfg.find;
    int short_side = img->width < img->height ? img->width : img->height;
    int floor_px = (int)(e->cfg.min_face_fraction * short_side);
    if (floor_px > find.detect.min_size)
        find.detect.min_size = floor_px;
    lk_code rc = lk_face_find_eyes(e->cascade, gray, &find, &out->find, err);
    double t1 = now_ms();
    out->stage_ms[LK_STAGE_DETECT] = t1 - t0;
    if (rc != LK_OK)
        goto done;

    if (out->find.face_count == 0 && e->cfg.center_fallback) {
        const double *b = e->cfg.center_box;
        lk_rect box = {(int)(b[0] * img->width), (int)(b[1] * img->height),
                       (int)(b[2] * img->width), (int)(b[3] * img->height), 0};
        out->find.primary = box;
        out->center_fallback = 1;
        rc = lk_eyes_locate(gray, &box, &e->cfg.find.eyes, &out->find.eyes, err);
        if (rc != LK_OK)
            goto done;
    }

    if (out->find.face_count > 0 || out->center_fallback) {
        crop = lk_image_new(e->cfg.align.crop_width, e->cfg.align.crop_height, 1, err);
        if (!crop) {
            rc = err ? err->code : LK_ERR_NOMEM;
            goto done;
        }
        rc = lk_align_face(gray, &out->find.eyes, &e->cfg.align, crop, err);
        if (rc != LK_OK)
            goto done;
    }
    /* The quality stage reports no_face itself when face_count is 0, so the
     * fallback never hides that the detector found nothing. */
    rc = lk_quality_assess(&out->find, crop, &e->cfg.quality, &out->quality, err);
    double t2 = now_ms();
    out->stage_ms[LK_STAGE_ALIGN] = t2 - t1;
    if (rc != LK_OK)
        goto done;
    if (crop && features) {
        rc = lk_extractor_run(e->extractor, crop, features, err);
        if (rc != LK_OK)
            goto done;
        out->has_features = 1;
    }
    out->stage_ms[LK_STAGE_FEATURES] = now_ms() - t2;
    if (crop_out) {
        *crop_out = crop;
        crop = NULL;
    }
done:
    lk_image_free(crop);
    lk_image_free(gray);
    return rc;
}

lk_code lk_engine_analyse(const lk_engine *e, const uint8_t *bytes, size_t len,
                          lk_analysis *out, float *features, lk_image **crop_out,
                          lk_error *err)
{
    memset(out, 0, sizeof *out);
    double t0 = now_ms();
    lk_image *img = NULL;
    lk_code rc = lk_image_decode(bytes, len, &e->cfg.limits, &img, err);
    if (rc != LK_OK)
        return rc;
    double decode_ms = now_ms() - t0;
    rc = lk_engine_analyse_image(e, img, out, features, crop_out, err);
    out->stage_ms[LK_STAGE_DECODE] = decode_ms;
    lk_image_free(img);
    return rc;
}

lk_code lk_engine_compare(const lk_engine *e, const lk_model *m, const float *probe,
                          const float *reference, double target_fmr, lk_comparison *out,
                          lk_error *err)
{
    lk_code rc = lk_model_check_features(m, e->feature_config, lk_engine_feature_dim(e), err);
    if (rc != LK_OK)
        return rc;
    if (!(target_fmr > 0))
        target_fmr = lk_model_default_fmr(m);
    lk_model_operating_point row;
    rc = lk_model_operating_point_for_fmr(m, target_fmr, &row, err);
    if (rc != LK_OK)
        return rc;
    size_t n = lk_model_scratch_size(m);
    double *scratch = malloc((n ? n : 1) * sizeof *scratch);
    if (!scratch)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory scoring a pair");
    rc = lk_model_score(m, probe, reference, scratch, &out->svm_value, &out->score, err);
    free(scratch);
    if (rc != LK_OK)
        return rc;
    out->threshold = row.prob_threshold;
    out->target_fmr = target_fmr;
    out->match = out->score >= out->threshold;
    return LK_OK;
}
