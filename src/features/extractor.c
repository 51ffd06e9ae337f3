/* The feature extractor: an aligned gray crop to one float vector made of a
 * HOG part (Dalal & Triggs, CVPR 2005) and, per radius, LBP region
 * histograms (Ojala et al., TPAMI 2002; Ahonen et al., TPAMI 2006), either
 * optionally computed on the Tan & Triggs (TIP 2010) normalised image; plus
 * its configuration's canonical text and the pair vector. */
#include "likeness/features.h"

#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#define CONFIG_VERSION 1

struct lk_extractor {
    lk_feature_config cfg;
    size_t hog_dim;   /* 0 when HOG is off */
    size_t lbp_dim;   /* per radius; 0 when LBP is off */
    int lbp_labels;
    size_t dim;
};

lk_feature_config lk_feature_config_default(void)
{
    /* Tuned on LFW View 1 only (see README, "Training and evaluation"):
     * - 96x112 crop: the alignment module's canonical crop.
     * - HOG 9 orientations, 8-pixel cells, 2x2-cell blocks, L2-Hys: the
     *   values Dalal & Triggs 2005 found best (sections 6.2-6.4), computed
     *   on the Tan & Triggs 2010 normalised image (better on View 1 than on
     *   the raw crop).
     * - LBP with 8 points at radii 1, 2 and 3 on the raw crop, one histogram
     *   per 8x8-pixel cell (12x14 cells): multi-scale LBP as in Chan, Kittler
     *   & Messer (ICB 2007); Tan-Triggs before LBP lowered View 1 accuracy.
     * - Hellinger map of the LBP histograms and L2 normalisation: common
     *   practice for histogram features compared with linear models. */
    lk_feature_config c;
    memset(&c, 0, sizeof c);
    c.crop_width = 96;
    c.crop_height = 112;
    c.hog_on = 1;
    c.hog.orientations = 9;
    c.hog.cell = 8;
    c.hog.block = 2;
    c.hog.norm = LK_HOG_L2_HYS;
    c.hog.transform_sqrt = 0;
    c.hog_tan_triggs = 1;
    c.lbp_points = 8;
    c.lbp_n_radii = 3;
    c.lbp_radii[0] = 1.0;
    c.lbp_radii[1] = 2.0;
    c.lbp_radii[2] = 3.0;
    c.lbp_grid_x = 12;
    c.lbp_grid_y = 14;
    c.lbp_tan_triggs = 0;
    c.lbp_hist_sqrt = 1;
    c.part_l2 = 1;
    c.final_l2 = 1;
    return c;
}

static int is_bool(int v)
{
    return v == 0 || v == 1;
}

lk_code lk_feature_config_validate(const lk_feature_config *c, lk_error *err)
{
#define BAD(...) return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "feature config: " __VA_ARGS__)
    if (!c)
        BAD("no configuration given");
    if (c->crop_width < 8 || c->crop_height < 8 || c->crop_width > 4096 ||
        c->crop_height > 4096)
        BAD("crop %dx%d outside 8..4096 pixels per side", c->crop_width, c->crop_height);
    if (!is_bool(c->hog_on) || !is_bool(c->hog_tan_triggs) || !is_bool(c->lbp_tan_triggs) ||
        !is_bool(c->lbp_hist_sqrt) || !is_bool(c->part_l2) || !is_bool(c->final_l2) ||
        !is_bool(c->hog.transform_sqrt))
        BAD("on/off fields must be 0 or 1");
    if (c->hog_on) {
        if (lk_hog_size(c->crop_width, c->crop_height, &c->hog) == 0)
            BAD("HOG with %d orientations, %d-pixel cells, %d-cell blocks, norm %d does not fit "
                "a %dx%d crop",
                c->hog.orientations, c->hog.cell, c->hog.block, (int)c->hog.norm, c->crop_width,
                c->crop_height);
        if (c->hog_tan_triggs && c->hog.transform_sqrt)
            BAD("HOG on the Tan-Triggs image cannot use transform_sqrt (the image has negative "
                "values); turn one off");
    }
    if (c->lbp_points != 0) {
        if (c->lbp_points < 2 || c->lbp_points > LK_LBP_MAX_POINTS)
            BAD("LBP points %d outside 2..%d (0 turns LBP off)", c->lbp_points,
                LK_LBP_MAX_POINTS);
        if (c->lbp_n_radii < 1 || c->lbp_n_radii > LK_FEATURE_MAX_RADII)
            BAD("LBP needs 1..%d radii, got %d", LK_FEATURE_MAX_RADII, c->lbp_n_radii);
        const int side = c->crop_width < c->crop_height ? c->crop_width : c->crop_height;
        for (int i = 0; i < c->lbp_n_radii; i++)
            if (!(c->lbp_radii[i] > 0.0) || !(c->lbp_radii[i] <= side / 2.0))
                BAD("LBP radius %g outside (0, %g]", c->lbp_radii[i], side / 2.0);
        if (c->lbp_grid_x < 1 || c->lbp_grid_y < 1 || c->lbp_grid_x > c->crop_width ||
            c->lbp_grid_y > c->crop_height)
            BAD("LBP grid %dx%d does not fit a %dx%d crop", c->lbp_grid_x, c->lbp_grid_y,
                c->crop_width, c->crop_height);
    } else if (c->lbp_n_radii != 0) {
        BAD("LBP is off (points 0) but %d radii are set", c->lbp_n_radii);
    }
    if (!c->hog_on && c->lbp_points == 0)
        BAD("both HOG and LBP are off: the vector would be empty");
    return LK_OK;
#undef BAD
}

/* Shortest %g form that reads back to the same double, so the text
 * round-trips and 1.0 prints as "1". */
static void format_double(double v, char *buf, size_t size)
{
    for (int prec = 1; prec <= 17; prec++) {
        snprintf(buf, size, "%.*g", prec, v);
        if (strtod(buf, NULL) == v)
            return;
    }
}

static const char *const norm_names[] = {"L1", "L1-sqrt", "L2", "L2-Hys"}; /* skimage's names */

lk_code lk_feature_config_to_string(const lk_feature_config *c, char *buf, size_t size,
                                    lk_error *err)
{
    lk_code rc = lk_feature_config_validate(c, err);
    if (rc != LK_OK)
        return rc;
    if (!buf || size == 0)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "feature config: no output buffer (use LK_FEATURE_CONFIG_MAX bytes)");
    char radii[LK_FEATURE_MAX_RADII * 32] = "none";
    if (c->lbp_points) {
        size_t len = 0;
        for (int i = 0; i < c->lbp_n_radii; i++) {
            char one[32];
            format_double(c->lbp_radii[i], one, sizeof one);
            len += (size_t)snprintf(radii + len, sizeof radii - len, "%s%s", i ? "," : "", one);
        }
    }
    const int n = snprintf(buf, size,
                           "v=%d;crop=%dx%d;hog=%d;hog_orient=%d;hog_cell=%d;hog_block=%d;"
                           "hog_norm=%s;hog_sqrt=%d;hog_tt=%d;lbp_p=%d;lbp_r=%s;lbp_grid=%dx%d;"
                           "lbp_tt=%d;lbp_sqrt=%d;part_l2=%d;final_l2=%d",
                           CONFIG_VERSION, c->crop_width, c->crop_height, c->hog_on,
                           c->hog.orientations, c->hog.cell, c->hog.block,
                           norm_names[c->hog.norm], c->hog.transform_sqrt, c->hog_tan_triggs,
                           c->lbp_points, radii, c->lbp_grid_x, c->lbp_grid_y,
                           c->lbp_tan_triggs, c->lbp_hist_sqrt, c->part_l2, c->final_l2);
    if (n < 0 || (size_t)n >= size)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "feature config: the text needs %d bytes, the buffer has %zu; use "
                            "LK_FEATURE_CONFIG_MAX",
                            n + 1, size);
    return LK_OK;
}

/* Strict integer in [lo, hi]. */
static int parse_int(const char *s, size_t len, int lo, int hi, int *out)
{
    char tmp[32];
    if (len == 0 || len >= sizeof tmp)
        return 0;
    memcpy(tmp, s, len);
    tmp[len] = '\0';
    char *end;
    errno = 0;
    const long v = strtol(tmp, &end, 10);
    if (errno || *end || v < lo || v > hi || !(tmp[0] == '-' || (tmp[0] >= '0' && tmp[0] <= '9')))
        return 0;
    *out = (int)v;
    return 1;
}

/* "AxB" */
static int parse_pair(const char *s, size_t len, int *a, int *b)
{
    const char *x = memchr(s, 'x', len);
    return x && parse_int(s, (size_t)(x - s), 0, 1 << 20, a) &&
           parse_int(x + 1, len - (size_t)(x - s) - 1, 0, 1 << 20, b);
}

static int parse_radii(const char *s, size_t len, lk_feature_config *c)
{
    if (len == 4 && memcmp(s, "none", 4) == 0) {
        c->lbp_n_radii = 0;
        return 1;
    }
    int n = 0;
    while (len > 0) {
        const char *comma = memchr(s, ',', len);
        const size_t l = comma ? (size_t)(comma - s) : len;
        char tmp[40];
        if (n >= LK_FEATURE_MAX_RADII || l == 0 || l >= sizeof tmp)
            return 0;
        memcpy(tmp, s, l);
        tmp[l] = '\0';
        char *end;
        const double v = strtod(tmp, &end);
        if (*end || !isfinite(v))
            return 0;
        c->lbp_radii[n++] = v;
        if (!comma)
            break;
        s += l + 1;
        len -= l + 1;
        if (len == 0)
            return 0; /* trailing comma */
    }
    c->lbp_n_radii = n;
    return n > 0;
}

lk_code lk_feature_config_parse(const char *text, lk_feature_config *out, lk_error *err)
{
    if (!text || !out)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "feature config: no text to parse");
    enum { K_V, K_CROP, K_HOG, K_HOR, K_HCELL, K_HBLK, K_HNORM, K_HSQRT, K_HTT, K_LP, K_LR,
           K_LGRID, K_LTT, K_LSQRT, K_PL2, K_FL2, K_COUNT };
    static const char *const keys[K_COUNT] = {
        "v",       "crop",     "hog",  "hog_orient", "hog_cell", "hog_block", "hog_norm",
        "hog_sqrt", "hog_tt",  "lbp_p", "lbp_r",     "lbp_grid", "lbp_tt",    "lbp_sqrt",
        "part_l2", "final_l2"};
    int seen[K_COUNT] = {0};
    lk_feature_config c;
    memset(&c, 0, sizeof c);
    const char *p = text;
    while (*p) {
        const char *semi = strchr(p, ';');
        const size_t len = semi ? (size_t)(semi - p) : strlen(p);
        const char *eq = memchr(p, '=', len);
        if (!eq)
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                "feature config: item '%.*s' is not key=value", (int)len, p);
        const size_t klen = (size_t)(eq - p);
        const char *val = eq + 1;
        const size_t vlen = len - klen - 1;
        int k = 0;
        while (k < K_COUNT && !(strlen(keys[k]) == klen && memcmp(keys[k], p, klen) == 0))
            k++;
        if (k == K_COUNT)
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                "feature config: unknown key '%.*s'", (int)klen, p);
        if (seen[k]++)
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                "feature config: key '%s' appears twice", keys[k]);
        int ok = 1, v = 0;
        switch (k) {
        case K_V:
            if (!parse_int(val, vlen, 0, 1 << 20, &v) || v != CONFIG_VERSION)
                return lk_error_set(err, LK_ERR_MODEL_MISMATCH,
                                    "feature config: version '%.*s' is not the supported %d; "
                                    "this build cannot reproduce those features",
                                    (int)vlen, val, CONFIG_VERSION);
            break;
        case K_CROP: ok = parse_pair(val, vlen, &c.crop_width, &c.crop_height); break;
        case K_HOG: ok = parse_int(val, vlen, 0, 1, &c.hog_on); break;
        case K_HOR: ok = parse_int(val, vlen, 0, 1 << 20, &c.hog.orientations); break;
        case K_HCELL: ok = parse_int(val, vlen, 0, 1 << 20, &c.hog.cell); break;
        case K_HBLK: ok = parse_int(val, vlen, 0, 1 << 20, &c.hog.block); break;
        case K_HNORM:
            ok = 0;
            for (int i = 0; i < 4; i++)
                if (strlen(norm_names[i]) == vlen && memcmp(norm_names[i], val, vlen) == 0) {
                    c.hog.norm = (lk_hog_norm)i;
                    ok = 1;
                }
            break;
        case K_HSQRT: ok = parse_int(val, vlen, 0, 1, &c.hog.transform_sqrt); break;
        case K_HTT: ok = parse_int(val, vlen, 0, 1, &c.hog_tan_triggs); break;
        case K_LP: ok = parse_int(val, vlen, 0, LK_LBP_MAX_POINTS, &c.lbp_points); break;
        case K_LR: ok = parse_radii(val, vlen, &c); break;
        case K_LGRID: ok = parse_pair(val, vlen, &c.lbp_grid_x, &c.lbp_grid_y); break;
        case K_LTT: ok = parse_int(val, vlen, 0, 1, &c.lbp_tan_triggs); break;
        case K_LSQRT: ok = parse_int(val, vlen, 0, 1, &c.lbp_hist_sqrt); break;
        case K_PL2: ok = parse_int(val, vlen, 0, 1, &c.part_l2); break;
        case K_FL2: ok = parse_int(val, vlen, 0, 1, &c.final_l2); break;
        }
        if (!ok)
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                "feature config: bad value '%.*s' for key '%s'", (int)vlen, val,
                                keys[k]);
        p += len;
        if (*p == ';')
            p++;
    }
    for (int k = 0; k < K_COUNT; k++)
        if (!seen[k])
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                "feature config: key '%s' is missing; the text must list every "
                                "key (as lk_feature_config_to_string writes it)",
                                keys[k]);
    lk_code rc = lk_feature_config_validate(&c, err);
    if (rc != LK_OK)
        return rc;
    *out = c;
    return LK_OK;
}

lk_extractor *lk_extractor_new(const lk_feature_config *cfg, lk_error *err)
{
    if (lk_feature_config_validate(cfg, err) != LK_OK)
        return NULL;
    lk_extractor *ex = calloc(1, sizeof *ex);
    if (!ex) {
        lk_error_set(err, LK_ERR_NOMEM, "lk_extractor_new: out of memory");
        return NULL;
    }
    ex->cfg = *cfg;
    if (cfg->hog_on)
        ex->hog_dim = lk_hog_size(cfg->crop_width, cfg->crop_height, &cfg->hog);
    if (cfg->lbp_points) {
        ex->lbp_labels = lk_lbp_nri_uniform_labels(cfg->lbp_points);
        ex->lbp_dim = (size_t)cfg->lbp_grid_x * cfg->lbp_grid_y * ex->lbp_labels;
    }
    ex->dim = ex->hog_dim + (size_t)cfg->lbp_n_radii * ex->lbp_dim;
    return ex;
}

void lk_extractor_free(lk_extractor *ex)
{
    free(ex);
}

size_t lk_extractor_dim(const lk_extractor *ex)
{
    return ex ? ex->dim : 0;
}

const lk_feature_config *lk_extractor_config(const lk_extractor *ex)
{
    return ex ? &ex->cfg : NULL;
}

/* Writes v (length n) as floats into out, L2-normalised when asked. A zero
 * part (a perfectly flat crop) stays zero. */
static void emit_part(const double *v, size_t n, int l2, float *out)
{
    double scale = 1.0;
    if (l2) {
        double s = 0.0;
        for (size_t i = 0; i < n; i++)
            s += v[i] * v[i];
        if (s > 0.0)
            scale = 1.0 / sqrt(s);
    }
    for (size_t i = 0; i < n; i++)
        out[i] = (float)(v[i] * scale);
}

struct lk_extractor_workspace {
    const lk_extractor *owner; /* the extractor whose sizes it was made for */
    double *gray, *tt, *vals, *hog_scratch, *tt_scratch;
    uint8_t *codes;
    void *block;
};

lk_extractor_workspace *lk_extractor_workspace_new(const lk_extractor *ex, lk_error *err)
{
    if (!ex) {
        lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_extractor_workspace_new: no extractor");
        return NULL;
    }
    const lk_feature_config *c = &ex->cfg;
    const int w = c->crop_width, h = c->crop_height;
    const size_t n = (size_t)w * h;
    const int need_tt = (c->hog_on && c->hog_tan_triggs) || (c->lbp_points && c->lbp_tan_triggs);
    const size_t part = ex->hog_dim > ex->lbp_dim ? ex->hog_dim : ex->lbp_dim;
    const size_t n_hog = c->hog_on ? lk_hog_scratch_doubles(w, h, &c->hog) : 0;
    const size_t n_tt = need_tt ? lk_tan_triggs_scratch_doubles(w, h) : 0;
    const size_t doubles = n + (need_tt ? n : 0) + part + n_hog + n_tt;
    lk_extractor_workspace *ws = calloc(1, sizeof *ws);
    void *block = malloc(doubles * sizeof(double) + n);
    if (!ws || !block) {
        free(ws);
        free(block);
        lk_error_set(err, LK_ERR_NOMEM, "lk_extractor_workspace_new: out of memory");
        return NULL;
    }
    double *d = block;
    ws->owner = ex;
    ws->block = block;
    ws->gray = d;
    d += n;
    ws->tt = need_tt ? d : NULL;
    d += need_tt ? n : 0;
    ws->vals = d;
    d += part;
    ws->hog_scratch = d;
    d += n_hog;
    ws->tt_scratch = d;
    d += n_tt;
    ws->codes = (uint8_t *)d;
    return ws;
}

void lk_extractor_workspace_free(lk_extractor_workspace *ws)
{
    if (ws) {
        free(ws->block);
        free(ws);
    }
}

lk_code lk_extractor_run(const lk_extractor *ex, const lk_image *crop, float *out,
                         lk_error *err)
{
    lk_extractor_workspace *ws = lk_extractor_workspace_new(ex, err);
    if (!ws)
        return err ? err->code : LK_ERR_NOMEM;
    const lk_code rc = lk_extractor_run_ws(ex, ws, crop, out, err);
    lk_extractor_workspace_free(ws);
    return rc;
}

lk_code lk_extractor_run_ws(const lk_extractor *ex, lk_extractor_workspace *ws,
                            const lk_image *crop, float *out, lk_error *err)
{
    if (!ex || !ws || !crop || !crop->data || !out)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "lk_extractor_run: extractor, workspace, crop and output are "
                            "required");
    if (ws->owner != ex)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "lk_extractor_run_ws: the workspace was made for another extractor");
    const lk_feature_config *c = &ex->cfg;
    if (crop->channels != 1 || crop->width != c->crop_width || crop->height != c->crop_height)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "lk_extractor_run: expected an 8-bit gray %dx%d crop, got %dx%d with "
                            "%d channels; align the face to the configured crop first",
                            c->crop_width, c->crop_height, crop->width, crop->height,
                            crop->channels);
    const int w = c->crop_width, h = c->crop_height;
    const size_t n = (size_t)w * h;
    double *gray = ws->gray, *tt = ws->tt, *vals = ws->vals;

    /* img_as_float on 8-bit input: v / 255 (skimage.util.dtype). */
    for (size_t i = 0; i < n; i++)
        gray[i] = crop->data[i] / 255.0;
    lk_code rc = LK_OK;
    if (tt) {
        const lk_tan_triggs_params tp = lk_tan_triggs_default();
        rc = lk_tan_triggs_with_scratch(gray, w, h, &tp, ws->tt_scratch, tt, err);
    }
    size_t at = 0;
    if (rc == LK_OK && c->hog_on) {
        rc = lk_hog_with_scratch(c->hog_tan_triggs ? tt : gray, w, h, &c->hog, ws->hog_scratch,
                                 vals, err);
        if (rc == LK_OK) {
            emit_part(vals, ex->hog_dim, c->part_l2, out + at);
            at += ex->hog_dim;
        }
    }
    for (int r = 0; rc == LK_OK && r < (c->lbp_points ? c->lbp_n_radii : 0); r++) {
        rc = lk_lbp_nri_uniform(c->lbp_tan_triggs ? tt : gray, w, h, c->lbp_points,
                                c->lbp_radii[r], ws->codes, err);
        if (rc == LK_OK)
            rc = lk_lbp_histograms(ws->codes, w, h, ex->lbp_labels, c->lbp_grid_x,
                                   c->lbp_grid_y, vals, err);
        if (rc == LK_OK) {
            /* Hellinger map: sqrt of a unit-sum histogram makes the dot
             * product the Bhattacharyya coefficient (common practice for
             * histogram features with linear models). */
            if (c->lbp_hist_sqrt)
                for (size_t i = 0; i < ex->lbp_dim; i++)
                    vals[i] = sqrt(vals[i]);
            emit_part(vals, ex->lbp_dim, c->part_l2, out + at);
            at += ex->lbp_dim;
        }
    }
    if (rc != LK_OK)
        return rc;
    if (at != ex->dim)
        return lk_error_set(err, LK_ERR_INTERNAL, "lk_extractor_run: wrote %zu of %zu values",
                            at, ex->dim);
    if (c->final_l2) {
        double s = 0.0;
        for (size_t i = 0; i < at; i++)
            s += (double)out[i] * out[i];
        if (s > 0.0) {
            const double inv = 1.0 / sqrt(s);
            for (size_t i = 0; i < at; i++)
                out[i] = (float)(out[i] * inv);
        }
    }
    return LK_OK;
}

void lk_pair_vector(const float *a, const float *b, size_t dim, float *out)
{
    for (size_t i = 0; i < dim; i++) {
        const float d = a[i] - b[i];
        out[i] = d * d;
    }
}
