/* The extractor: announced dimension (from the descriptors' definitions:
 * HOG blocks per Dalal & Triggs / skimage's layout, P*(P-1)+3 = 59 labels
 * for P=8 per Ojala et al. 2002), exactly that many values written,
 * determinism (also across threads), unit norm, the config text's round
 * trip and strictness, and lk_pair_vector's squared difference. The
 * descriptors themselves are checked against scikit-image in
 * test_features_hog_skimage.c, check_features_lbp.py and
 * check_features_filter.py. */
#include "likeness/features.h"
#include "likeness/image.h"
#include "lk_test.h"

#include <math.h>
#include <pthread.h>
#include <string.h>

static lk_image *make_crop(int w, int h)
{
    char path[1024];
    snprintf(path, sizeof path, "%s/datasets/lfw/lfw-deepfunneled/Aaron_Eckhart/Aaron_Eckhart_0001.jpg",
             lk_test_shared());
    lk_image *rgb = NULL, *crop = lk_image_new(w, h, 1, NULL);
    if (!crop)
        return NULL;
    if (lk_image_load(path, NULL, &rgb, NULL) == LK_OK && rgb->width >= w && rgb->height >= h) {
        lk_image *g = lk_image_to_gray(rgb, LK_LUMA_BT601, NULL);
        const int x0 = (g->width - w) / 2, y0 = (g->height - h) / 2;
        for (int y = 0; y < h; y++)
            memcpy(crop->data + (size_t)y * w, g->data + (size_t)(y + y0) * g->width + x0,
                   (size_t)w);
        lk_image_free(g);
        printf("crop from %s\n", path);
    } else {
        /* No data set: a textured synthetic crop still exercises the code. */
        unsigned s = 12345;
        for (size_t i = 0; i < (size_t)w * h; i++) {
            s = s * 1103515245u + 12345u;
            crop->data[i] = (uint8_t)((i % (size_t)w) * 2 + (s >> 24) % 40);
        }
        printf("synthetic crop (LFW absent)\n");
    }
    lk_image_free(rgb);
    return crop;
}

typedef struct {
    const lk_extractor *ex;
    const lk_image *crop;
    float *out;
    lk_code rc;
} job;

static void *run_job(void *arg)
{
    job *j = arg;
    for (int k = 0; k < 5; k++)
        j->rc = lk_extractor_run(j->ex, j->crop, j->out, NULL);
    return NULL;
}

static void check_config(const lk_feature_config *cfg, size_t expect_dim)
{
    lk_error err;
    lk_extractor *ex = lk_extractor_new(cfg, &err);
    CHECK(ex != NULL, "lk_extractor_new: %s", err.message);
    if (!ex)
        return;
    const size_t dim = lk_extractor_dim(ex);
    CHECK(dim == expect_dim, "dim %zu, expected %zu", dim, expect_dim);
    lk_image *crop = make_crop(cfg->crop_width, cfg->crop_height);
    const size_t guard = 16;
    float *a = malloc((dim + guard) * sizeof *a), *b = malloc((dim + guard) * sizeof *b);
    for (size_t i = 0; i < dim + guard; i++)
        a[i] = b[i] = NAN;
    CHECK(lk_extractor_run(ex, crop, a, &err) == LK_OK, "run: %s", err.message);
    int finite = 1, guard_ok = 1;
    double norm = 0;
    for (size_t i = 0; i < dim; i++) {
        finite &= isfinite(a[i]) != 0;
        norm += (double)a[i] * a[i];
    }
    for (size_t i = dim; i < dim + guard; i++)
        guard_ok &= isnan(a[i]) != 0;
    CHECK(finite, "non-finite values in the vector");
    CHECK(guard_ok, "wrote past the announced dimension");
    if (cfg->final_l2)
        CHECK(fabs(norm - 1.0) < 1e-5, "final L2 norm^2 %g", norm);

    /* Deterministic, on this thread and on two concurrent ones. */
    CHECK(lk_extractor_run(ex, crop, b, &err) == LK_OK, "run: %s", err.message);
    CHECK(memcmp(a, b, dim * sizeof *a) == 0, "two runs differ");
    job jobs[2];
    pthread_t th[2];
    for (int t = 0; t < 2; t++) {
        jobs[t] = (job){ex, crop, malloc(dim * sizeof(float)), LK_ERR_INTERNAL};
        pthread_create(&th[t], NULL, run_job, &jobs[t]);
    }
    for (int t = 0; t < 2; t++) {
        pthread_join(th[t], NULL);
        CHECK(jobs[t].rc == LK_OK && memcmp(jobs[t].out, a, dim * sizeof *a) == 0,
              "thread %d differs", t);
        free(jobs[t].out);
    }

    /* The workspace variant gives the same vector; a workspace belongs to
     * its extractor. */
    lk_extractor_workspace *ws = lk_extractor_workspace_new(ex, &err);
    CHECK(ws != NULL, "workspace: %s", err.message);
    if (ws) {
        memset(b, 0, dim * sizeof *b);
        CHECK(lk_extractor_run_ws(ex, ws, crop, b, &err) == LK_OK, "run_ws: %s", err.message);
        CHECK(lk_extractor_run_ws(ex, ws, crop, b, &err) == LK_OK, "run_ws: %s", err.message);
        CHECK(memcmp(a, b, dim * sizeof *a) == 0, "run_ws differs from run");
        lk_extractor *other = lk_extractor_new(cfg, NULL);
        CHECK(lk_extractor_run_ws(other, ws, crop, b, &err) == LK_ERR_INVALID_ARGUMENT,
              "a foreign workspace accepted");
        lk_extractor_free(other);
        lk_extractor_workspace_free(ws);
    }

    /* A crop of another size or with colour is refused. */
    lk_image *wrong = lk_image_new(cfg->crop_width + 1, cfg->crop_height, 1, NULL);
    CHECK(lk_extractor_run(ex, wrong, b, &err) == LK_ERR_INVALID_ARGUMENT, "wrong size accepted");
    lk_image_free(wrong);

    free(a);
    free(b);
    lk_image_free(crop);
    lk_extractor_free(ex);
}

static void check_roundtrip(const lk_feature_config *cfg)
{
    char s1[LK_FEATURE_CONFIG_MAX], s2[LK_FEATURE_CONFIG_MAX];
    lk_error err;
    lk_feature_config back;
    CHECK(lk_feature_config_to_string(cfg, s1, sizeof s1, &err) == LK_OK, "%s", err.message);
    CHECK(lk_feature_config_parse(s1, &back, &err) == LK_OK, "parse '%s': %s", s1, err.message);
    CHECK(lk_feature_config_to_string(&back, s2, sizeof s2, &err) == LK_OK, "%s", err.message);
    CHECK(strcmp(s1, s2) == 0, "'%s' != '%s'", s1, s2);
    CHECK(back.crop_width == cfg->crop_width && back.crop_height == cfg->crop_height &&
              back.hog_on == cfg->hog_on && back.hog.orientations == cfg->hog.orientations &&
              back.hog.cell == cfg->hog.cell && back.hog.block == cfg->hog.block &&
              back.hog.norm == cfg->hog.norm &&
              back.hog.transform_sqrt == cfg->hog.transform_sqrt &&
              back.hog_tan_triggs == cfg->hog_tan_triggs && back.lbp_points == cfg->lbp_points &&
              back.lbp_n_radii == cfg->lbp_n_radii && back.lbp_grid_x == cfg->lbp_grid_x &&
              back.lbp_grid_y == cfg->lbp_grid_y && back.lbp_tan_triggs == cfg->lbp_tan_triggs &&
              back.lbp_hist_sqrt == cfg->lbp_hist_sqrt && back.part_l2 == cfg->part_l2 &&
              back.final_l2 == cfg->final_l2,
          "fields differ after the round trip of '%s'", s1);
    for (int i = 0; i < cfg->lbp_n_radii && i < back.lbp_n_radii; i++)
        CHECK(back.lbp_radii[i] == cfg->lbp_radii[i], "radius %d: %.17g vs %.17g", i,
              back.lbp_radii[i], cfg->lbp_radii[i]);
    printf("config: %s\n", s1);
}

static void check_parse_rejects(void)
{
    lk_feature_config d = lk_feature_config_default(), c;
    char s[LK_FEATURE_CONFIG_MAX], t[LK_FEATURE_CONFIG_MAX + 32];
    lk_error err;
    lk_feature_config_to_string(&d, s, sizeof s, NULL);
    /* Drop the last key. */
    snprintf(t, sizeof t, "%s", s);
    *strrchr(t, ';') = '\0';
    CHECK(lk_feature_config_parse(t, &c, &err) == LK_ERR_INVALID_ARGUMENT, "missing key accepted");
    snprintf(t, sizeof t, "%s;colour=1", s);
    CHECK(lk_feature_config_parse(t, &c, &err) == LK_ERR_INVALID_ARGUMENT, "unknown key accepted");
    snprintf(t, sizeof t, "%s;final_l2=1", s);
    CHECK(lk_feature_config_parse(t, &c, &err) == LK_ERR_INVALID_ARGUMENT, "duplicate accepted");
    snprintf(t, sizeof t, "v=2%s", s + 3);
    CHECK(lk_feature_config_parse(t, &c, &err) == LK_ERR_MODEL_MISMATCH, "version 2 accepted");
    snprintf(t, sizeof t, "%s", s);
    char *h = strstr(t, "hog_cell=8");
    CHECK(h != NULL, "default text lacks hog_cell=8: %s", s);
    if (h) {
        h[9] = 'x';
        CHECK(lk_feature_config_parse(t, &c, &err) == LK_ERR_INVALID_ARGUMENT, "bad value accepted");
    }
    CHECK(lk_feature_config_parse("", &c, &err) == LK_ERR_INVALID_ARGUMENT, "empty text accepted");
}

static void check_pair_vector(void)
{
    /* (a-b)^2 element-wise, by definition; values exact in binary. */
    const float a[4] = {1.0f, 2.0f, -3.0f, 0.5f}, b[4] = {4.0f, 2.0f, 1.0f, -0.25f};
    const float expect[4] = {9.0f, 0.0f, 16.0f, 0.5625f};
    float out[4];
    lk_pair_vector(a, b, 4, out);
    for (int i = 0; i < 4; i++)
        CHECK(out[i] == expect[i], "pair[%d] = %g, expected %g", i, out[i], expect[i]);
    lk_pair_vector(b, a, 4, out);
    for (int i = 0; i < 4; i++)
        CHECK(out[i] == expect[i], "not symmetric at %d", i);
    float inplace[4] = {1.0f, 2.0f, -3.0f, 0.5f};
    lk_pair_vector(inplace, b, 4, inplace);
    CHECK(memcmp(inplace, expect, sizeof expect) == 0, "aliasing output and input fails");
}

/* HOG blocks of skimage's layout: (w/c - b + 1)(h/c - b + 1) b^2 orientations. */
static size_t hog_dim(const lk_feature_config *c)
{
    if (!c->hog_on)
        return 0;
    return (size_t)(c->crop_width / c->hog.cell - c->hog.block + 1) *
           (size_t)(c->crop_height / c->hog.cell - c->hog.block + 1) *
           (size_t)(c->hog.block * c->hog.block * c->hog.orientations);
}

int main(void)
{
    lk_feature_config d = lk_feature_config_default();
    /* The dimension from the formulas (HOG: Dalal & Triggs 2005 blocks;
     * LBP: P(P-1)+3 labels per region, Ojala et al. 2002), for whatever the
     * default configuration is. */
    const size_t lbp_labels = (size_t)(d.lbp_points * (d.lbp_points - 1) + 3);
    const size_t lbp_dim = (size_t)d.lbp_n_radii * (size_t)(d.lbp_grid_x * d.lbp_grid_y) * lbp_labels;
    check_config(&d, hog_dim(&d) + lbp_dim);
    check_roundtrip(&d);

    lk_feature_config c = d;
    c.crop_width = 80;
    c.crop_height = 96;
    c.hog.norm = LK_HOG_L1_SQRT;
    c.hog.transform_sqrt = 0;
    c.hog_tan_triggs = 1;
    c.hog.block = 3;
    c.lbp_points = 16;
    c.lbp_n_radii = 3;
    c.lbp_radii[0] = 1.5;
    c.lbp_radii[1] = 2.0;
    c.lbp_radii[2] = 3.1;
    c.lbp_grid_x = 5;
    c.lbp_grid_y = 6;
    c.lbp_tan_triggs = 0;
    c.lbp_hist_sqrt = 0;
    c.part_l2 = 0;
    c.final_l2 = 0;
    check_config(&c, hog_dim(&c) + 3u * 30u * (16u * 15u + 3u));
    check_roundtrip(&c);

    lk_feature_config h = d;
    h.lbp_points = 0;
    h.lbp_n_radii = 0;
    check_config(&h, hog_dim(&h));
    check_roundtrip(&h);

    lk_feature_config l = d;
    l.hog_on = 0;
    check_config(&l, lbp_dim);
    check_roundtrip(&l);

    lk_feature_config bad = d;
    bad.hog_tan_triggs = 1; /* with transform_sqrt on: refused */
    bad.hog.transform_sqrt = 1;
    lk_error err;
    CHECK(lk_extractor_new(&bad, &err) == NULL && err.code == LK_ERR_INVALID_ARGUMENT,
          "sqrt of a signed image accepted");
    bad = d;
    bad.hog_on = 0;
    bad.lbp_points = 0;
    bad.lbp_n_radii = 0;
    CHECK(lk_extractor_new(&bad, &err) == NULL, "an empty vector accepted");

    check_parse_rejects();
    check_pair_vector();
    return lk_test_done();
}
