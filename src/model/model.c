/* The model: setters with their checks, getters, scoring, operating-point
 * lookup and the file format (docs/model-format.md). The loader builds the
 * model through the same setters, so a file that loads is a model that
 * validates and vice versa. */
#include "likeness/model.h"

#include <errno.h>
#include <fcntl.h>
#include <float.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <sys/stat.h>
#include <unistd.h>

#include <sodium.h>

#define LK_MODEL_ID_BYTES 16

struct lk_model {
    uint8_t id[LK_MODEL_ID_BYTES];
    char id_hex[2 * LK_MODEL_ID_BYTES + 1];
    char checksum_hex[65]; /* of the file loaded, "" if built in memory */

    char *config; /* NULL until set */
    size_t dim;

    bool has_proj;
    size_t proj_k, proj_d;
    double *proj_mean;   /* d */
    double *proj_matrix; /* k x d, row-major; already rounded to binary32 with F32 */
    lk_model_proj_norm proj_norm;
    lk_model_proj_encoding proj_enc; /* how W is written; kept without a projection */

    bool has_std;
    size_t std_n;
    double *std_mean, *std_scale;

    bool has_svm;
    size_t svm_n;
    double *svm_w, svm_b;

    bool has_platt;
    double platt_a, platt_b;

    lk_model_operating_point *ops;
    size_t n_ops;
    double default_fmr;

    bool has_provenance;
    char *prov_dataset, *prov_created, *prov_command, *prov_version;
    uint64_t prov_training, prov_calibration, prov_evaluation;
};

static void set_id(lk_model *m, const uint8_t id[LK_MODEL_ID_BYTES]);

lk_model *lk_model_new(void)
{
    /* libsodium's randombytes must follow sodium_init (libsodium docs,
     * "Usage"); sodium_init is idempotent and thread-safe. */
    if (sodium_init() < 0)
        return NULL;
    lk_model *m = calloc(1, sizeof *m);
    if (!m)
        return NULL;
    uint8_t id[LK_MODEL_ID_BYTES];
    randombytes_buf(id, sizeof id);
    set_id(m, id);
    /* binary32 by default: the default projection is ~7e6 values, and the
     * rounding it costs is documented (docs/model-format.md, PROJ). */
    m->proj_enc = LK_MODEL_F32;
    return m;
}

static void clear_provenance(lk_model *m)
{
    free(m->prov_dataset);
    free(m->prov_created);
    free(m->prov_command);
    free(m->prov_version);
    m->prov_dataset = m->prov_created = m->prov_command = m->prov_version = NULL;
    m->prov_training = m->prov_calibration = m->prov_evaluation = 0;
    m->has_provenance = false;
}

void lk_model_free(lk_model *m)
{
    if (!m)
        return;
    free(m->config);
    free(m->proj_mean);
    free(m->proj_matrix);
    free(m->std_mean);
    free(m->std_scale);
    free(m->svm_w);
    free(m->ops);
    clear_provenance(m);
    free(m);
}

static void set_id(lk_model *m, const uint8_t id[LK_MODEL_ID_BYTES])
{
    static const char hex[] = "0123456789abcdef";
    memcpy(m->id, id, LK_MODEL_ID_BYTES);
    for (size_t i = 0; i < LK_MODEL_ID_BYTES; i++) {
        m->id_hex[2 * i] = hex[id[i] >> 4];
        m->id_hex[2 * i + 1] = hex[id[i] & 15];
    }
    m->id_hex[2 * LK_MODEL_ID_BYTES] = '\0';
}

/* ---- checks shared with the loader ---- */

static bool utf8_valid(const char *s, size_t len)
{
    /* Well-formed UTF-8 per RFC 3629 section 4 / Unicode Table 3-7: no
     * overlong forms, no surrogates, nothing above U+10FFFF. NUL is refused
     * too because the strings are handed out as C strings. */
    const unsigned char *p = (const unsigned char *)s;
    size_t i = 0;
    while (i < len) {
        unsigned c = p[i];
        if (c == 0)
            return false;
        if (c < 0x80) {
            i++;
            continue;
        }
        size_t n;
        unsigned lo = 0x80, hi = 0xBF;
        if (c >= 0xC2 && c <= 0xDF) {
            n = 1;
        } else if (c >= 0xE0 && c <= 0xEF) {
            n = 2;
            if (c == 0xE0)
                lo = 0xA0;
            else if (c == 0xED)
                hi = 0x9F;
        } else if (c >= 0xF0 && c <= 0xF4) {
            n = 3;
            if (c == 0xF0)
                lo = 0x90;
            else if (c == 0xF4)
                hi = 0x8F;
        } else {
            return false;
        }
        if (len - i - 1 < n)
            return false;
        if (p[i + 1] < lo || p[i + 1] > hi)
            return false;
        for (size_t j = 2; j <= n; j++)
            if (p[i + j] < 0x80 || p[i + j] > 0xBF)
                return false;
        i += n + 1;
    }
    return true;
}

/* "YYYY-MM-DDTHH:MM:SSZ", the ISO 8601 extended UTC form (RFC 3339 5.6 profile). */
static bool iso8601_valid(const char *s, size_t len)
{
    static const char pat[] = "dddd-dd-ddTdd:dd:ddZ";
    if (len != sizeof pat - 1)
        return false;
    for (size_t i = 0; i < len; i++) {
        if (pat[i] == 'd') {
            if (s[i] < '0' || s[i] > '9')
                return false;
        } else if (s[i] != pat[i]) {
            return false;
        }
    }
#define NUM2(o) ((s[o] - '0') * 10 + (s[(o) + 1] - '0'))
    int mon = NUM2(5), day = NUM2(8), hour = NUM2(11), min = NUM2(14), sec = NUM2(17);
#undef NUM2
    /* sec 60 allows a leap second (RFC 3339 5.6). */
    return mon >= 1 && mon <= 12 && day >= 1 && day <= 31 && hour <= 23 && min <= 59 &&
           sec <= 60;
}

static lk_code check_finite(const double *v, size_t n, const char *what, lk_error *err)
{
    for (size_t i = 0; i < n; i++)
        if (!isfinite(v[i]))
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                "%s[%zu] is not a finite number (NaN or infinite)", what, i);
    return LK_OK;
}

/* Every value must survive the conversion to binary32 as a finite number.
 * Values above FLT_MAX that would still round down to it are refused too:
 * converting an out-of-range double to float is undefined in C17 6.3.1.5. */
static lk_code check_f32_range(const double *v, size_t n, const char *what, lk_error *err)
{
    for (size_t i = 0; i < n; i++)
        if (!(fabs(v[i]) <= FLT_MAX))
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                "%s[%zu] = %g does not fit a 32-bit float (|value| <= %g); "
                                "choose the f64 projection encoding for it", what, i, v[i],
                                (double)FLT_MAX);
    return LK_OK;
}

/* Round to nearest binary32 (C17 F.3: the conversion honours the current
 * rounding mode, round-to-nearest-even by default) and back, exactly. */
static void round_to_f32(double *v, size_t n)
{
    for (size_t i = 0; i < n; i++)
        v[i] = (double)(float)v[i];
}

static double *dup_doubles(const double *v, size_t n)
{
    double *c = malloc((n ? n : 1) * sizeof *c);
    if (c && n)
        memcpy(c, v, n * sizeof *c);
    return c;
}

static char *dup_string(const char *s, size_t len)
{
    char *c = malloc(len + 1);
    if (c) {
        memcpy(c, s, len);
        c[len] = '\0';
    }
    return c;
}

static lk_code check_dim(size_t n, const char *what, lk_error *err)
{
    if (n == 0 || n > LK_MODEL_MAX_DIM)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "%s is %zu; it must be between 1 and %u", what, n,
                            LK_MODEL_MAX_DIM);
    return LK_OK;
}

/* ---- setters ---- */

lk_code lk_model_set_features(lk_model *m, const char *config, size_t dim, lk_error *err)
{
    if (!m || !config)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "model and feature configuration are required");
    size_t len = strnlen(config, LK_MODEL_MAX_CONFIG + 1);
    if (len == 0 || len > LK_MODEL_MAX_CONFIG)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "feature configuration must be 1 to %u bytes long",
                            LK_MODEL_MAX_CONFIG);
    if (!utf8_valid(config, len))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "feature configuration is not valid UTF-8");
    lk_code c = check_dim(dim, "feature dimension", err);
    if (c)
        return c;
    char *copy = dup_string(config, len);
    if (!copy)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory copying the feature configuration");
    free(m->config);
    m->config = copy;
    m->dim = dim;
    return LK_OK;
}

lk_code lk_model_set_projection(lk_model *m, size_t k, size_t d, const double *mean,
                                const double *matrix, lk_error *err)
{
    if (!m || !mean || !matrix)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "projection needs a mean and a matrix");
    lk_code c;
    if ((c = check_dim(k, "projection output dimension k", err)) ||
        (c = check_dim(d, "projection input dimension d", err)))
        return c;
    /* k, d <= 1e6 so k*d <= 1e12 fits size_t on 64-bit; refuse otherwise. */
    if (d > SIZE_MAX / sizeof(double) / k)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "projection %zu x %zu is too large", k, d);
    if ((c = check_finite(mean, d, "projection mean", err)) ||
        (c = check_finite(matrix, k * d, "projection matrix", err)))
        return c;
    if (m->proj_enc == LK_MODEL_F32 &&
        (c = check_f32_range(matrix, k * d, "projection matrix", err)))
        return c;
    double *mc = dup_doubles(mean, d), *wc = dup_doubles(matrix, k * d);
    if (!mc || !wc) {
        free(mc);
        free(wc);
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory copying a %zu x %zu projection", k, d);
    }
    if (m->proj_enc == LK_MODEL_F32)
        round_to_f32(wc, k * d);
    lk_model_proj_norm norm = m->proj_norm; /* replacing W keeps the normalisation */
    lk_model_clear_projection(m);
    m->proj_norm = norm;
    m->proj_mean = mc;
    m->proj_matrix = wc;
    m->proj_k = k;
    m->proj_d = d;
    m->has_proj = true;
    return LK_OK;
}

lk_code lk_model_clear_projection(lk_model *m)
{
    if (!m)
        return LK_ERR_INVALID_ARGUMENT;
    free(m->proj_mean);
    free(m->proj_matrix);
    m->proj_mean = m->proj_matrix = NULL;
    m->proj_k = m->proj_d = 0;
    m->has_proj = false;
    m->proj_norm = LK_PROJ_NORM_NONE;
    return LK_OK;
}

lk_code lk_model_set_projection_encoding(lk_model *m, lk_model_proj_encoding enc,
                                         lk_error *err)
{
    if (!m)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no model");
    if (enc != LK_MODEL_F64 && enc != LK_MODEL_F32)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "projection encoding %d is unknown (use f64 or f32)", (int)enc);
    if (enc == LK_MODEL_F32 && m->has_proj) {
        lk_code c = check_f32_range(m->proj_matrix, m->proj_k * m->proj_d, "projection matrix",
                                    err);
        if (c)
            return c;
        round_to_f32(m->proj_matrix, m->proj_k * m->proj_d);
    }
    m->proj_enc = enc;
    return LK_OK;
}

lk_model_proj_encoding lk_model_projection_encoding(const lk_model *m)
{
    return m ? m->proj_enc : LK_MODEL_F32;
}

lk_code lk_model_set_projection_norm(lk_model *m, lk_model_proj_norm mode, lk_error *err)
{
    if (!m)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no model");
    if (mode != LK_PROJ_NORM_NONE && mode != LK_PROJ_NORM_L2)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "projection normalisation mode %d is unknown (use none or L2)",
                            (int)mode);
    m->proj_norm = mode;
    return LK_OK;
}

lk_code lk_model_set_standardisation(lk_model *m, size_t n, const double *mean,
                                     const double *scale, lk_error *err)
{
    if (!m || !mean || !scale)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "standardisation needs a mean and a scale");
    lk_code c;
    if ((c = check_dim(n, "standardisation dimension", err)) ||
        (c = check_finite(mean, n, "standardisation mean", err)) ||
        (c = check_finite(scale, n, "standardisation scale", err)))
        return c;
    for (size_t i = 0; i < n; i++)
        if (!(scale[i] > 0))
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                "standardisation scale[%zu] is %g; every scale must be > 0", i,
                                scale[i]);
    double *mc = dup_doubles(mean, n), *sc = dup_doubles(scale, n);
    if (!mc || !sc) {
        free(mc);
        free(sc);
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory copying the standardisation");
    }
    lk_model_clear_standardisation(m);
    m->std_mean = mc;
    m->std_scale = sc;
    m->std_n = n;
    m->has_std = true;
    return LK_OK;
}

lk_code lk_model_clear_standardisation(lk_model *m)
{
    if (!m)
        return LK_ERR_INVALID_ARGUMENT;
    free(m->std_mean);
    free(m->std_scale);
    m->std_mean = m->std_scale = NULL;
    m->std_n = 0;
    m->has_std = false;
    return LK_OK;
}

lk_code lk_model_set_svm(lk_model *m, size_t n, const double *weights, double bias,
                         lk_error *err)
{
    if (!m || !weights)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "SVM needs weights");
    lk_code c;
    if ((c = check_dim(n, "SVM dimension", err)) ||
        (c = check_finite(weights, n, "SVM weights", err)) ||
        (c = check_finite(&bias, 1, "SVM bias", err)))
        return c;
    double *wc = dup_doubles(weights, n);
    if (!wc)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory copying the SVM weights");
    free(m->svm_w);
    m->svm_w = wc;
    m->svm_n = n;
    m->svm_b = bias;
    m->has_svm = true;
    return LK_OK;
}

lk_code lk_model_set_platt(lk_model *m, double a, double b, lk_error *err)
{
    if (!m)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no model");
    if (!isfinite(a) || !isfinite(b))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "Platt parameters must be finite");
    /* With A >= 0 the probability would fall (or stay flat) as the SVM value
     * rises: the calibration contradicts the classifier. */
    if (!(a < 0))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "Platt parameter A is %g; it must be < 0 so that the probability "
                            "rises with the SVM value (retrain the calibration)", a);
    m->platt_a = a;
    m->platt_b = b;
    m->has_platt = true;
    return LK_OK;
}

/* Lookup rule of lk_model_operating_point_for_fmr. The relative slack
 * absorbs decimal-to-binary rounding of a requested rate such as 1e-3. */
static const lk_model_operating_point *find_row(const lk_model_operating_point *rows, size_t n,
                                                double target)
{
    const lk_model_operating_point *best = NULL;
    for (size_t i = 0; i < n; i++)
        if (rows[i].target_fmr <= target * (1 + 1e-9))
            best = &rows[i];
    return best;
}

lk_code lk_model_set_operating_points(lk_model *m, const lk_model_operating_point *rows,
                                      size_t n, double default_target_fmr, lk_error *err)
{
    if (!m || !rows || n == 0 || n > LK_MODEL_MAX_OPERATING_POINTS)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "operating points: need 1 to %u rows",
                            LK_MODEL_MAX_OPERATING_POINTS);
    for (size_t i = 0; i < n; i++) {
        const lk_model_operating_point *r = &rows[i];
        if (!(r->target_fmr > 0 && r->target_fmr < 1))
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                "operating point %zu: target FMR %g is not in (0, 1)", i,
                                r->target_fmr);
        if (!(r->prob_threshold >= 0 && r->prob_threshold <= 1))
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                "operating point %zu: probability threshold %g is not in [0, 1]",
                                i, r->prob_threshold);
        if (!isfinite(r->svm_threshold))
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                "operating point %zu: SVM threshold is not finite", i);
        if (!(r->measured_fmr >= 0 && r->measured_fmr <= 1) ||
            !(r->measured_fnmr >= 0 && r->measured_fnmr <= 1))
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                "operating point %zu: measured FMR/FNMR must be in [0, 1]", i);
        if (i > 0) {
            const lk_model_operating_point *p = &rows[i - 1];
            if (!(r->target_fmr > p->target_fmr))
                return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                    "operating points must be sorted by strictly increasing "
                                    "target FMR (row %zu: %g after %g)", i, r->target_fmr,
                                    p->target_fmr);
            /* A looser FMR target can never need a stricter threshold. */
            if (r->prob_threshold > p->prob_threshold || r->svm_threshold > p->svm_threshold)
                return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                    "operating point %zu: thresholds must not increase as the "
                                    "target FMR increases", i);
        }
    }
    if (!(default_target_fmr > 0 && default_target_fmr < 1) ||
        !find_row(rows, n, default_target_fmr))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "default target FMR %g must be in (0, 1) and not below the "
                            "smallest row's target %g", default_target_fmr, rows[0].target_fmr);
    lk_model_operating_point *c = malloc(n * sizeof *c);
    if (!c)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory copying operating points");
    memcpy(c, rows, n * sizeof *c);
    free(m->ops);
    m->ops = c;
    m->n_ops = n;
    m->default_fmr = default_target_fmr;
    return LK_OK;
}

static lk_code check_string(const char *s, const char *what, bool allow_empty, lk_error *err)
{
    if (!s)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "provenance %s is missing", what);
    size_t len = strnlen(s, LK_MODEL_MAX_STRING + 1);
    if (len > LK_MODEL_MAX_STRING || (!allow_empty && len == 0))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "provenance %s must be %d to %u bytes long", what, allow_empty ? 0 : 1,
                            LK_MODEL_MAX_STRING);
    if (!utf8_valid(s, len))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "provenance %s is not valid UTF-8",
                            what);
    return LK_OK;
}

lk_code lk_model_set_provenance(lk_model *m, const lk_model_provenance *p, lk_error *err)
{
    if (!m || !p)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no provenance given");
    lk_code c;
    if ((c = check_string(p->dataset, "data set name", false, err)) ||
        (c = check_string(p->created_utc, "creation date", false, err)) ||
        (c = check_string(p->command_line, "command line", true, err)) ||
        (c = check_string(p->software_version, "software version", false, err)))
        return c;
    if (!iso8601_valid(p->created_utc, strlen(p->created_utc)))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "provenance creation date \"%.40s\" is not of the form "
                            "YYYY-MM-DDTHH:MM:SSZ (ISO 8601, UTC)", p->created_utc);
    char *ds = dup_string(p->dataset, strlen(p->dataset));
    char *cr = dup_string(p->created_utc, strlen(p->created_utc));
    char *cm = dup_string(p->command_line, strlen(p->command_line));
    char *sv = dup_string(p->software_version, strlen(p->software_version));
    if (!ds || !cr || !cm || !sv) {
        free(ds);
        free(cr);
        free(cm);
        free(sv);
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory copying provenance");
    }
    clear_provenance(m);
    m->prov_dataset = ds;
    m->prov_created = cr;
    m->prov_command = cm;
    m->prov_version = sv;
    m->prov_training = p->training_pairs;
    m->prov_calibration = p->calibration_pairs;
    m->prov_evaluation = p->evaluation_pairs;
    m->has_provenance = true;
    return LK_OK;
}

/* The parts scoring needs up to the pair vector. */
static lk_code validate_pair_part(const lk_model *m, lk_error *err)
{
    if (!m)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no model");
    if (!m->config)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "model has no feature configuration");
    if (m->has_proj && m->proj_d != m->dim)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "projection input dimension %zu differs from the feature "
                            "dimension %zu", m->proj_d, m->dim);
    if (m->proj_norm != LK_PROJ_NORM_NONE && !m->has_proj)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "projection normalisation is set but the model has no projection; "
                            "set a projection or turn the normalisation off");
    size_t n = lk_model_pair_dim(m);
    if (m->has_std && m->std_n != n)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "standardisation dimension %zu differs from the pair dimension %zu",
                            m->std_n, n);
    return LK_OK;
}

static lk_code validate_score_part(const lk_model *m, lk_error *err)
{
    lk_code c = validate_pair_part(m, err);
    if (c)
        return c;
    if (!m->has_svm)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "model has no SVM");
    if (m->svm_n != lk_model_pair_dim(m))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "SVM dimension %zu differs from the pair dimension %zu", m->svm_n,
                            lk_model_pair_dim(m));
    if (!m->has_platt)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "model has no Platt calibration");
    return LK_OK;
}

lk_code lk_model_validate(const lk_model *m, lk_error *err)
{
    lk_code c = validate_score_part(m, err);
    if (c)
        return c;
    if (!m->n_ops)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "model has no operating points");
    if (!m->has_provenance)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "model has no provenance");
    return LK_OK;
}

/* ---- getters ---- */

const char *lk_model_id(const lk_model *m) { return m ? m->id_hex : ""; }
const char *lk_model_checksum(const lk_model *m) { return m ? m->checksum_hex : ""; }
const char *lk_model_feature_config(const lk_model *m)
{
    return m && m->config ? m->config : "";
}
size_t lk_model_feature_dim(const lk_model *m) { return m ? m->dim : 0; }
size_t lk_model_pair_dim(const lk_model *m)
{
    if (!m)
        return 0;
    return m->has_proj ? m->proj_k : m->dim;
}

bool lk_model_projection(const lk_model *m, size_t *k, size_t *d, const double **mean,
                         const double **matrix)
{
    if (!m || !m->has_proj)
        return false;
    if (k)
        *k = m->proj_k;
    if (d)
        *d = m->proj_d;
    if (mean)
        *mean = m->proj_mean;
    if (matrix)
        *matrix = m->proj_matrix;
    return true;
}

lk_model_proj_norm lk_model_projection_norm(const lk_model *m)
{
    return m ? m->proj_norm : LK_PROJ_NORM_NONE;
}

bool lk_model_standardisation(const lk_model *m, size_t *n, const double **mean,
                              const double **scale)
{
    if (!m || !m->has_std)
        return false;
    if (n)
        *n = m->std_n;
    if (mean)
        *mean = m->std_mean;
    if (scale)
        *scale = m->std_scale;
    return true;
}

bool lk_model_svm(const lk_model *m, size_t *n, const double **weights, double *bias)
{
    if (!m || !m->has_svm)
        return false;
    if (n)
        *n = m->svm_n;
    if (weights)
        *weights = m->svm_w;
    if (bias)
        *bias = m->svm_b;
    return true;
}

bool lk_model_platt(const lk_model *m, double *a, double *b)
{
    if (!m || !m->has_platt)
        return false;
    if (a)
        *a = m->platt_a;
    if (b)
        *b = m->platt_b;
    return true;
}

const lk_model_operating_point *lk_model_operating_points(const lk_model *m, size_t *n)
{
    if (n)
        *n = m ? m->n_ops : 0;
    return m ? m->ops : NULL;
}

double lk_model_default_fmr(const lk_model *m) { return m ? m->default_fmr : 0; }

lk_model_provenance lk_model_get_provenance(const lk_model *m)
{
    lk_model_provenance p = {"", 0, 0, 0, "", "", ""};
    if (m && m->has_provenance) {
        p.dataset = m->prov_dataset;
        p.training_pairs = m->prov_training;
        p.calibration_pairs = m->prov_calibration;
        p.evaluation_pairs = m->prov_evaluation;
        p.created_utc = m->prov_created;
        p.command_line = m->prov_command;
        p.software_version = m->prov_version;
    }
    return p;
}

lk_code lk_model_check_features(const lk_model *m, const char *config, size_t dim,
                                lk_error *err)
{
    if (!m || !m->config)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "model has no feature configuration");
    if (!config || strcmp(config, m->config) != 0 || dim != m->dim)
        return lk_error_set(err, LK_ERR_MODEL_MISMATCH,
                            "features were made with configuration \"%.180s\" (dimension %zu) "
                            "but model %s expects \"%.180s\" (dimension %zu); extract features "
                            "with the model's configuration or use a matching model",
                            config ? config : "(none)", dim, m->id_hex, m->config, m->dim);
    return LK_OK;
}

/* ---- scoring ---- */

/* Room the pair vector needs before its output: the feature difference (d)
 * without normalisation, the first projected vector (k) with it. The
 * larger of the two whatever the mode, so that a scratch buffer sized
 * before the normalisation was switched stays large enough. */
static size_t pair_scratch(const lk_model *m)
{
    return m->has_proj && m->proj_k > m->dim ? m->proj_k : m->dim;
}

size_t lk_model_scratch_size(const lk_model *m)
{
    /* lk_model_score puts the pair vector after the pair vector's scratch. */
    return m ? pair_scratch(m) + lk_model_pair_dim(m) : 0;
}

/* y = W (x - mu), L2-normalised if the model says so; false if the
 * normalisation meets a non-finite y. */
static bool project_one(const lk_model *m, const float *feat, double *out)
{
    const size_t d = m->dim, k = m->proj_k;
    const double *mu = m->proj_mean;
    size_t i = 0;
    /* Four rows at a time: four independent sums keep the floating-point
     * adder busy where one sum waits on each addition (strict IEEE order
     * forbids reassociating a single sum), and x - mu is formed once per
     * four rows. Each row's sum still runs over j in order, term for term
     * as below, so the results are bit for bit those of the plain loop. */
    for (; i + 4 <= k; i += 4) {
        const double *r0 = m->proj_matrix + i * d, *r1 = r0 + d, *r2 = r1 + d, *r3 = r2 + d;
        double s0 = 0, s1 = 0, s2 = 0, s3 = 0;
        for (size_t j = 0; j < d; j++) {
            const double x = (double)feat[j] - mu[j];
            s0 += r0[j] * x;
            s1 += r1[j] * x;
            s2 += r2[j] * x;
            s3 += r3[j] * x;
        }
        out[i] = s0;
        out[i + 1] = s1;
        out[i + 2] = s2;
        out[i + 3] = s3;
    }
    for (; i < k; i++) {
        const double *row = m->proj_matrix + i * d;
        double s = 0;
        for (size_t j = 0; j < d; j++)
            s += row[j] * ((double)feat[j] - mu[j]);
        out[i] = s;
    }
    if (m->proj_norm != LK_PROJ_NORM_L2)
        return true;
    /* ||y|| computed as amax * sqrt(sum (y_i / amax)^2) so the sum of
     * squares can neither overflow nor underflow (the scaling of the
     * reference BLAS dnrm2; common practice). */
    double amax = 0;
    for (i = 0; i < k; i++) {
        if (!isfinite(out[i]))
            return false;
        double a = fabs(out[i]);
        if (a > amax)
            amax = a;
    }
    if (amax == 0)
        return true; /* x - mu in the null space of W: the zero vector stays zero */
    double ss = 0;
    for (i = 0; i < k; i++) {
        double t = out[i] / amax;
        ss += t * t;
    }
    double root = sqrt(ss); /* in [1, sqrt(k)] */
    for (i = 0; i < k; i++)
        out[i] = out[i] / amax / root;
    return true;
}

static lk_code not_finite(lk_error *err)
{
    return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                        "the projected feature vector is not finite, so it cannot be "
                        "normalised: a feature vector holds NaN or infinite values");
}

lk_code lk_model_project(const lk_model *m, const float *feat, double *out, lk_error *err)
{
    lk_code c = validate_pair_part(m, err);
    if (c)
        return c;
    if (!feat || !out)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "projection needs input and output");
    const size_t d = m->dim;
    if (!m->has_proj) {
        for (size_t j = 0; j < d; j++)
            out[j] = feat[j];
        return LK_OK;
    }
    return project_one(m, feat, out) ? LK_OK : not_finite(err);
}

lk_code lk_model_pair_vector(const lk_model *m, const float *feat_a, const float *feat_b,
                             double *scratch, double *out, lk_error *err)
{
    lk_code c = validate_pair_part(m, err);
    if (c)
        return c;
    if (!feat_a || !feat_b || !scratch || !out)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "pair vector needs two feature "
                            "vectors, scratch and output");
    const size_t d = m->dim;
    if (m->has_proj && m->proj_norm == LK_PROJ_NORM_L2) {
        /* The normalisation is not linear, so the mean no longer cancels:
         * each vector is projected and normalised on its own. */
        double *ya = scratch;
        if (!project_one(m, feat_a, ya) || !project_one(m, feat_b, out))
            return not_finite(err);
        for (size_t i = 0; i < m->proj_k; i++) {
            double t = ya[i] - out[i];
            out[i] = t * t;
        }
    } else if (m->has_proj) {
        /* W(a - mu) - W(b - mu) = W(a - b): the mean cancels in exact
         * arithmetic, and projecting the difference once halves the work. */
        double *diff = scratch;
        for (size_t j = 0; j < d; j++)
            diff[j] = (double)feat_a[j] - (double)feat_b[j];
        for (size_t i = 0; i < m->proj_k; i++) {
            const double *row = m->proj_matrix + i * d;
            double s = 0;
            for (size_t j = 0; j < d; j++)
                s += row[j] * diff[j];
            out[i] = s * s;
        }
    } else {
        for (size_t j = 0; j < d; j++) {
            double t = (double)feat_a[j] - (double)feat_b[j];
            out[j] = t * t;
        }
    }
    if (m->has_std)
        for (size_t i = 0; i < m->std_n; i++)
            out[i] = (out[i] - m->std_mean[i]) / m->std_scale[i];
    return LK_OK;
}

double lk_model_probability(const lk_model *m, double f)
{
    if (!m || !m->has_platt)
        return NAN;
    /* Platt (1999): P = 1 / (1 + exp(A f + B)), evaluated in the form that
     * never overflows exp, as Lin, Lin & Weng (2007, "A note on Platt's
     * probabilistic outputs for support vector machines") recommend
     * (recalled from memory; see docs/model-format.md "Scoring"). */
    double t = m->platt_a * f + m->platt_b;
    if (t >= 0) {
        double e = exp(-t);
        return e / (1 + e);
    }
    return 1 / (1 + exp(t));
}

lk_code lk_model_score(const lk_model *m, const float *feat_a, const float *feat_b,
                       double *scratch, double *svm_value, double *probability, lk_error *err)
{
    lk_code c = validate_score_part(m, err);
    if (c)
        return c;
    if (!scratch)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "scoring needs scratch of "
                            "lk_model_scratch_size() doubles");
    double *z = scratch + pair_scratch(m);
    c = lk_model_pair_vector(m, feat_a, feat_b, scratch, z, err);
    if (c)
        return c;
    double f = m->svm_b;
    for (size_t i = 0; i < m->svm_n; i++)
        f += m->svm_w[i] * z[i];
    if (!isfinite(f))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "comparison score is not finite: a feature vector holds NaN or "
                            "infinite values");
    if (svm_value)
        *svm_value = f;
    if (probability)
        *probability = lk_model_probability(m, f);
    return LK_OK;
}

lk_code lk_model_score_projected(const lk_model *m, const double *ya, const double *yb,
                                 double *svm_value, double *probability, lk_error *err)
{
    lk_code c = validate_score_part(m, err);
    if (c)
        return c;
    if (!ya || !yb)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "scoring needs two projected vectors");
    /* The same arithmetic as lk_model_pair_vector and lk_model_score, term
     * by term, so an image scored against the projection of another image
     * gets exactly the score of the two images. */
    const size_t n = lk_model_pair_dim(m);
    double f = m->svm_b;
    for (size_t i = 0; i < n; i++) {
        double t = ya[i] - yb[i];
        double z = t * t;
        if (m->has_std)
            z = (z - m->std_mean[i]) / m->std_scale[i];
        f += m->svm_w[i] * z;
    }
    if (!isfinite(f))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "comparison score is not finite: a vector holds NaN or infinite values");
    if (svm_value)
        *svm_value = f;
    if (probability)
        *probability = lk_model_probability(m, f);
    return LK_OK;
}

lk_code lk_model_operating_point_for_fmr(const lk_model *m, double target_fmr,
                                         lk_model_operating_point *row, lk_error *err)
{
    if (!m || !m->n_ops)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "model has no operating points");
    if (!(target_fmr > 0 && target_fmr < 1))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "target FMR %g is not in (0, 1)", target_fmr);
    const lk_model_operating_point *r = find_row(m->ops, m->n_ops, target_fmr);
    if (!r)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "target FMR %g is below the smallest the model was measured at "
                            "(%g); choose a target FMR of at least %g or train with more "
                            "non-mated comparisons", target_fmr, m->ops[0].target_fmr,
                            m->ops[0].target_fmr);
    if (row)
        *row = *r;
    return LK_OK;
}

lk_code lk_model_threshold_for_fmr(const lk_model *m, double target_fmr, double *threshold,
                                   lk_error *err)
{
    lk_model_operating_point r = {0};
    lk_code c = lk_model_operating_point_for_fmr(m, target_fmr, &r, err);
    if (c)
        return c;
    if (threshold)
        *threshold = r.prob_threshold;
    return LK_OK;
}

/* ==== file format (docs/model-format.md) ==== */

/* Little-endian IEEE 754 binary64 is the file's float encoding; this code
 * moves doubles through their 64-bit pattern, so it needs that layout. */
_Static_assert(sizeof(double) == 8, "double must be IEEE 754 binary64");

static const uint8_t MAGIC[8] = {'L', 'K', 'M', 'O', 'D', 'E', 'L', 0};
#define HEADER_SIZE 12u         /* magic + u32 version */
#define SECTION_HEADER_SIZE 16u /* tag[4] + u32 flags + u64 length */
#define SECTION_REQUIRED 1u     /* flags bit 0: a reader that lacks the tag must refuse */
#define CHECKSUM_SIZE 32u       /* BLAKE2b-256, crypto_generichash_BYTES in libsodium */
#define OP_ROW_SIZE 60u         /* 5 f64 + 2 u64 + u32 */
#define MAX_FILE_BYTES ((size_t)1 << 30) /* refuse to read more than 1 GiB */

_Static_assert(CHECKSUM_SIZE == crypto_generichash_BYTES, "BLAKE2b-256 digest size");

/* ---- writer ---- */

typedef struct wbuf {
    uint8_t *p;
    size_t len, cap;
    bool fail;
} wbuf;

static void w_bytes(wbuf *w, const void *src, size_t n)
{
    if (w->fail)
        return;
    if (n > w->cap - w->len) {
        size_t cap = w->cap ? w->cap : 4096;
        while (n > cap - w->len) {
            if (cap > SIZE_MAX / 2) {
                w->fail = true;
                return;
            }
            cap *= 2;
        }
        uint8_t *np = realloc(w->p, cap);
        if (!np) {
            w->fail = true;
            return;
        }
        w->p = np;
        w->cap = cap;
    }
    memcpy(w->p + w->len, src, n);
    w->len += n;
}

static void put_u32(uint8_t *b, uint32_t v)
{
    for (int i = 0; i < 4; i++)
        b[i] = (uint8_t)(v >> (8 * i));
}

static void put_u64(uint8_t *b, uint64_t v)
{
    for (int i = 0; i < 8; i++)
        b[i] = (uint8_t)(v >> (8 * i));
}

static void w_u32(wbuf *w, uint32_t v)
{
    uint8_t b[4];
    put_u32(b, v);
    w_bytes(w, b, 4);
}

static void w_u64(wbuf *w, uint64_t v)
{
    uint8_t b[8];
    put_u64(b, v);
    w_bytes(w, b, 8);
}

static void w_f64(wbuf *w, double v)
{
    uint64_t u;
    memcpy(&u, &v, 8);
    w_u64(w, u);
}

static void w_f64s(wbuf *w, const double *v, size_t n)
{
    for (size_t i = 0; i < n; i++)
        w_f64(w, v[i]);
}

/* The values were rounded to binary32 by the setter, so the conversion
 * here is exact. */
static void w_f32s(wbuf *w, const double *v, size_t n)
{
    for (size_t i = 0; i < n; i++) {
        float f = (float)v[i];
        uint32_t u;
        memcpy(&u, &f, 4);
        w_u32(w, u);
    }
}

static void w_str(wbuf *w, const char *s)
{
    size_t n = strlen(s);
    w_u32(w, (uint32_t)n);
    w_bytes(w, s, n);
}

/* Writes a section header with a zero length; returns where the length goes. */
static size_t w_begin(wbuf *w, const char tag[4])
{
    w_bytes(w, tag, 4);
    w_u32(w, SECTION_REQUIRED);
    size_t at = w->len;
    w_u64(w, 0);
    return at;
}

static void w_end(wbuf *w, size_t at)
{
    if (!w->fail)
        put_u64(w->p + at, (uint64_t)(w->len - at - 8));
}

lk_code lk_model_serialise(const lk_model *m, uint8_t **bytes, size_t *len, lk_error *err)
{
    if (!bytes || !len)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "serialise needs output pointers");
    *bytes = NULL;
    *len = 0;
    lk_error verr;
    if (lk_model_validate(m, &verr))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "cannot write an incomplete model: %s",
                            verr.message);
    wbuf w = {0};
    w_bytes(&w, MAGIC, sizeof MAGIC);
    w_u32(&w, LK_MODEL_FORMAT_VERSION);

    size_t at = w_begin(&w, "IDNT");
    w_bytes(&w, m->id, LK_MODEL_ID_BYTES);
    w_end(&w, at);

    at = w_begin(&w, "FEAT");
    w_u32(&w, (uint32_t)m->dim);
    w_str(&w, m->config);
    w_end(&w, at);

    if (m->has_proj) {
        at = w_begin(&w, "PROJ");
        w_u32(&w, (uint32_t)m->proj_k);
        w_u32(&w, (uint32_t)m->proj_d);
        w_u32(&w, (uint32_t)m->proj_enc);
        w_f64s(&w, m->proj_mean, m->proj_d);
        if (m->proj_enc == LK_MODEL_F32)
            w_f32s(&w, m->proj_matrix, m->proj_k * m->proj_d);
        else
            w_f64s(&w, m->proj_matrix, m->proj_k * m->proj_d);
        w_end(&w, at);
    }
    if (m->proj_norm != LK_PROJ_NORM_NONE) {
        at = w_begin(&w, "PRNM");
        w_u32(&w, (uint32_t)m->proj_norm);
        w_end(&w, at);
    }
    if (m->has_std) {
        at = w_begin(&w, "STDZ");
        w_u32(&w, (uint32_t)m->std_n);
        w_f64s(&w, m->std_mean, m->std_n);
        w_f64s(&w, m->std_scale, m->std_n);
        w_end(&w, at);
    }

    at = w_begin(&w, "SVML");
    w_u32(&w, (uint32_t)m->svm_n);
    w_f64(&w, m->svm_b);
    w_f64s(&w, m->svm_w, m->svm_n);
    w_end(&w, at);

    at = w_begin(&w, "PLAT");
    w_f64(&w, m->platt_a);
    w_f64(&w, m->platt_b);
    w_end(&w, at);

    at = w_begin(&w, "OPPT");
    w_u32(&w, (uint32_t)m->n_ops);
    w_f64(&w, m->default_fmr);
    for (size_t i = 0; i < m->n_ops; i++) {
        const lk_model_operating_point *r = &m->ops[i];
        w_f64(&w, r->target_fmr);
        w_f64(&w, r->prob_threshold);
        w_f64(&w, r->svm_threshold);
        w_f64(&w, r->measured_fmr);
        w_f64(&w, r->measured_fnmr);
        w_u64(&w, r->impostor_comparisons);
        w_u64(&w, r->genuine_comparisons);
        w_u32(&w, r->supported ? 1u : 0u);
    }
    w_end(&w, at);

    at = w_begin(&w, "PROV");
    w_str(&w, m->prov_dataset);
    w_u64(&w, m->prov_training);
    w_u64(&w, m->prov_calibration);
    w_u64(&w, m->prov_evaluation);
    w_str(&w, m->prov_created);
    w_str(&w, m->prov_command);
    w_str(&w, m->prov_version);
    w_end(&w, at);

    /* The digest covers every byte before it, the CSUM header included. */
    at = w_begin(&w, "CSUM");
    uint8_t zero[CHECKSUM_SIZE] = {0};
    w_bytes(&w, zero, CHECKSUM_SIZE);
    w_end(&w, at);
    if (w.fail) {
        free(w.p);
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory serialising the model");
    }
    size_t digest_at = w.len - CHECKSUM_SIZE;
    crypto_generichash(w.p + digest_at, CHECKSUM_SIZE, w.p, digest_at, NULL, 0);
    *bytes = w.p;
    *len = w.len;
    return LK_OK;
}

/* ---- reader ---- */

static uint32_t get_u32(const uint8_t *b)
{
    return (uint32_t)b[0] | (uint32_t)b[1] << 8 | (uint32_t)b[2] << 16 | (uint32_t)b[3] << 24;
}

static uint64_t get_u64(const uint8_t *b)
{
    return (uint64_t)get_u32(b) | (uint64_t)get_u32(b + 4) << 32;
}

static double get_f64(const uint8_t *b)
{
    uint64_t u = get_u64(b);
    double v;
    memcpy(&v, &u, 8);
    return v;
}

/* A printable copy of a 4-byte tag for messages. */
static void tag_text(const uint8_t *t, char out[5])
{
    for (int i = 0; i < 4; i++)
        out[i] = (t[i] >= 0x20 && t[i] < 0x7f) ? (char)t[i] : '?';
    out[4] = '\0';
}

/* Cursor over one section's payload; offsets are from the start of the file. */
typedef struct rd {
    const uint8_t *p;
    size_t pos, end;
    const char *sec;
} rd;

static lk_code rd_need(rd *r, size_t n, const char *field, lk_error *err)
{
    if (r->end - r->pos < n)
        return lk_error_set(err, LK_ERR_MODEL_FORMAT,
                            "model file: %s.%s at offset %zu needs %zu bytes but the section "
                            "has %zu left (corrupt file)", r->sec, field, r->pos, n,
                            r->end - r->pos);
    return LK_OK;
}

static lk_code rd_u32(rd *r, const char *field, uint32_t *v, lk_error *err)
{
    lk_code c = rd_need(r, 4, field, err);
    if (c)
        return c;
    *v = get_u32(r->p + r->pos);
    r->pos += 4;
    return LK_OK;
}

static lk_code rd_u64(rd *r, const char *field, uint64_t *v, lk_error *err)
{
    lk_code c = rd_need(r, 8, field, err);
    if (c)
        return c;
    *v = get_u64(r->p + r->pos);
    r->pos += 8;
    return LK_OK;
}

/* Reads n finite doubles (n*8 bytes already known to fit the section). */
static lk_code rd_f64s(rd *r, size_t n, const char *field, double *out, lk_error *err)
{
    if (n > (r->end - r->pos) / 8)
        return rd_need(r, SIZE_MAX, field, err);
    for (size_t i = 0; i < n; i++) {
        double v = get_f64(r->p + r->pos);
        if (!isfinite(v))
            return lk_error_set(err, LK_ERR_MODEL_FORMAT,
                                "model file: %s.%s[%zu] at offset %zu is not a finite number",
                                r->sec, field, i, r->pos);
        out[i] = v;
        r->pos += 8;
    }
    return LK_OK;
}

/* Reads n finite binary32 values into doubles (exact conversion). */
static lk_code rd_f32s(rd *r, size_t n, const char *field, double *out, lk_error *err)
{
    if (n > (r->end - r->pos) / 4)
        return rd_need(r, SIZE_MAX, field, err);
    for (size_t i = 0; i < n; i++) {
        uint32_t u = get_u32(r->p + r->pos);
        float v;
        memcpy(&v, &u, 4);
        if (!isfinite(v))
            return lk_error_set(err, LK_ERR_MODEL_FORMAT,
                                "model file: %s.%s[%zu] at offset %zu is not a finite number",
                                r->sec, field, i, r->pos);
        out[i] = (double)v;
        r->pos += 4;
    }
    return LK_OK;
}

static lk_code rd_f64(rd *r, const char *field, double *v, lk_error *err)
{
    return rd_f64s(r, 1, field, v, err);
}

static lk_code rd_dim(rd *r, const char *field, size_t *v, lk_error *err)
{
    size_t at = r->pos;
    uint32_t u;
    lk_code c = rd_u32(r, field, &u, err);
    if (c)
        return c;
    if (u == 0 || u > LK_MODEL_MAX_DIM)
        return lk_error_set(err, LK_ERR_MODEL_FORMAT,
                            "model file: %s.%s at offset %zu is %u; it must be between 1 and %u",
                            r->sec, field, at, u, LK_MODEL_MAX_DIM);
    *v = u;
    return LK_OK;
}

/* u32 byte length + UTF-8 bytes; returns a malloc'd C string. */
static lk_code rd_str(rd *r, const char *field, uint32_t max, bool allow_empty, char **out,
                      lk_error *err)
{
    size_t at = r->pos;
    uint32_t n;
    lk_code c = rd_u32(r, field, &n, err);
    if (c)
        return c;
    if (n > max || (!allow_empty && n == 0))
        return lk_error_set(err, LK_ERR_MODEL_FORMAT,
                            "model file: %s.%s at offset %zu has length %u; it must be %d to %u",
                            r->sec, field, at, n, allow_empty ? 0 : 1, max);
    if ((c = rd_need(r, n, field, err)))
        return c;
    const char *s = (const char *)r->p + r->pos;
    if (!utf8_valid(s, n))
        return lk_error_set(err, LK_ERR_MODEL_FORMAT,
                            "model file: %s.%s at offset %zu is not valid UTF-8 (or holds NUL)",
                            r->sec, field, r->pos);
    *out = dup_string(s, n);
    if (!*out)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory reading the model");
    r->pos += n;
    return LK_OK;
}

/* Checks a section's length against what its counts say it holds, before
 * anything is allocated, so allocations never exceed the file's size. */
static lk_code rd_expect(const rd *r, uint64_t payload, size_t start, lk_error *err)
{
    uint64_t have = r->end - start;
    if (payload != have)
        return lk_error_set(err, LK_ERR_MODEL_FORMAT,
                            "model file: section %s at offset %zu has length %llu but its counts "
                            "call for %llu bytes (corrupt file)", r->sec,
                            start - SECTION_HEADER_SIZE, (unsigned long long)have,
                            (unsigned long long)payload);
    return LK_OK;
}

/* Turns a setter's complaint about a loaded value into a format error. */
static lk_code setter_failed(const rd *r, size_t sec_at, const lk_error *e, lk_error *err)
{
    if (e->code == LK_ERR_NOMEM)
        return lk_error_set(err, LK_ERR_NOMEM, "%s", e->message);
    return lk_error_set(err, LK_ERR_MODEL_FORMAT, "model file: section %s at offset %zu: %s",
                        r->sec, sec_at, e->message);
}

static lk_code parse_feat(lk_model *m, rd *r, lk_error *err)
{
    size_t dim;
    char *config = NULL;
    lk_code c;
    if ((c = rd_dim(r, "dimension", &dim, err)) ||
        (c = rd_str(r, "config", LK_MODEL_MAX_CONFIG, false, &config, err)))
        return c;
    m->config = config;
    m->dim = dim;
    return LK_OK;
}

static lk_code parse_proj(lk_model *m, rd *r, size_t sec_at, lk_error *err)
{
    size_t start = r->pos, k, d, enc_at;
    uint32_t enc;
    lk_code c;
    if ((c = rd_dim(r, "k", &k, err)) || (c = rd_dim(r, "d", &d, err)))
        return c;
    enc_at = r->pos;
    if ((c = rd_u32(r, "encoding", &enc, err)))
        return c;
    /* 0 is never written (corrupt); above 2 a newer writer's encoding. */
    if (enc == 0)
        return lk_error_set(err, LK_ERR_MODEL_FORMAT,
                            "model file: PROJ.encoding at offset %zu is 0, which no writer "
                            "produces (corrupt file)", enc_at);
    if (enc != LK_MODEL_F64 && enc != LK_MODEL_F32)
        return lk_error_set(err, LK_ERR_MODEL_FORMAT,
                            "model file: PROJ.encoding at offset %zu is %u, which this version "
                            "does not know; the file was written by a newer likeness, please "
                            "upgrade", enc_at, enc);
    /* k, d <= 1e6, so 12 + 8d + 8kd <= 8.00001e12: no overflow in 64 bits. */
    const uint64_t elem = enc == LK_MODEL_F32 ? 4 : 8;
    if ((c = rd_expect(r, 12 + 8 * (uint64_t)d + elem * (uint64_t)k * d, start, err)))
        return c;
    double *mean = malloc(d * sizeof *mean), *w = malloc(k * d * sizeof *w);
    if (!mean || !w) {
        c = lk_error_set(err, LK_ERR_NOMEM, "out of memory reading a %zu x %zu projection", k, d);
    } else if (!(c = rd_f64s(r, d, "mean", mean, err)) &&
               !(c = enc == LK_MODEL_F32 ? rd_f32s(r, k * d, "matrix", w, err)
                                         : rd_f64s(r, k * d, "matrix", w, err))) {
        lk_error e;
        /* Values read from binary32 are exact in binary32: the setter's
         * rounding leaves them unchanged, so a reload saves the same bytes. */
        if (lk_model_set_projection_encoding(m, (lk_model_proj_encoding)enc, &e) ||
            lk_model_set_projection(m, k, d, mean, w, &e))
            c = setter_failed(r, sec_at, &e, err);
    }
    free(mean);
    free(w);
    return c;
}

static lk_code parse_prnm(lk_model *m, rd *r, size_t sec_at, lk_error *err)
{
    size_t start = r->pos;
    uint32_t mode;
    lk_code c;
    if ((c = rd_expect(r, 4, start, err)) || (c = rd_u32(r, "mode", &mode, err)))
        return c;
    /* The writer leaves the section out for "none", so mode 0 has one
     * spelling only; modes above 1 come from a newer writer. */
    if (mode == LK_PROJ_NORM_NONE)
        return lk_error_set(err, LK_ERR_MODEL_FORMAT,
                            "model file: PRNM.mode at offset %zu is 0 (none), which is written "
                            "by leaving the section out (corrupt file)", start);
    if (mode != LK_PROJ_NORM_L2)
        return lk_error_set(err, LK_ERR_MODEL_FORMAT,
                            "model file: PRNM.mode at offset %zu is %u, unknown to this likeness "
                            LIKENESS_VERSION ": the model was written by a newer likeness; "
                            "upgrade likeness to load it", start, (unsigned)mode);
    lk_error e;
    if (lk_model_set_projection_norm(m, (lk_model_proj_norm)mode, &e))
        return setter_failed(r, sec_at, &e, err);
    return LK_OK;
}

static lk_code parse_stdz(lk_model *m, rd *r, size_t sec_at, lk_error *err)
{
    size_t start = r->pos, n;
    lk_code c;
    if ((c = rd_dim(r, "n", &n, err)) || (c = rd_expect(r, 4 + 16 * (uint64_t)n, start, err)))
        return c;
    double *mean = malloc(n * sizeof *mean), *scale = malloc(n * sizeof *scale);
    if (!mean || !scale) {
        c = lk_error_set(err, LK_ERR_NOMEM, "out of memory reading the standardisation");
    } else if (!(c = rd_f64s(r, n, "mean", mean, err)) &&
               !(c = rd_f64s(r, n, "scale", scale, err))) {
        lk_error e;
        if (lk_model_set_standardisation(m, n, mean, scale, &e))
            c = setter_failed(r, sec_at, &e, err);
    }
    free(mean);
    free(scale);
    return c;
}

static lk_code parse_svml(lk_model *m, rd *r, size_t sec_at, lk_error *err)
{
    size_t start = r->pos, n;
    double bias;
    lk_code c;
    if ((c = rd_dim(r, "n", &n, err)) || (c = rd_expect(r, 12 + 8 * (uint64_t)n, start, err)) ||
        (c = rd_f64(r, "bias", &bias, err)))
        return c;
    double *w = malloc(n * sizeof *w);
    if (!w) {
        c = lk_error_set(err, LK_ERR_NOMEM, "out of memory reading the SVM");
    } else if (!(c = rd_f64s(r, n, "weights", w, err))) {
        lk_error e;
        if (lk_model_set_svm(m, n, w, bias, &e))
            c = setter_failed(r, sec_at, &e, err);
    }
    free(w);
    return c;
}

static lk_code parse_plat(lk_model *m, rd *r, size_t sec_at, lk_error *err)
{
    double a, b;
    lk_code c;
    if ((c = rd_expect(r, 16, r->pos, err)) || (c = rd_f64(r, "A", &a, err)) ||
        (c = rd_f64(r, "B", &b, err)))
        return c;
    lk_error e;
    if (lk_model_set_platt(m, a, b, &e))
        return setter_failed(r, sec_at, &e, err);
    return LK_OK;
}

static lk_code parse_oppt(lk_model *m, rd *r, size_t sec_at, lk_error *err)
{
    size_t start = r->pos;
    uint32_t n;
    double def;
    lk_code c;
    if ((c = rd_u32(r, "count", &n, err)))
        return c;
    if (n == 0 || n > LK_MODEL_MAX_OPERATING_POINTS)
        return lk_error_set(err, LK_ERR_MODEL_FORMAT,
                            "model file: OPPT.count at offset %zu is %u; it must be 1 to %u",
                            start, n, LK_MODEL_MAX_OPERATING_POINTS);
    if ((c = rd_expect(r, 12 + (uint64_t)OP_ROW_SIZE * n, start, err)) ||
        (c = rd_f64(r, "default_target_fmr", &def, err)))
        return c;
    lk_model_operating_point *rows = calloc(n, sizeof *rows);
    if (!rows)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory reading operating points");
    for (uint32_t i = 0; i < n && !c; i++) {
        lk_model_operating_point *o = &rows[i];
        double v[5] = {0};
        uint32_t flags;
        if ((c = rd_f64s(r, 5, "row", v, err)) ||
            (c = rd_u64(r, "impostor_comparisons", &o->impostor_comparisons, err)) ||
            (c = rd_u64(r, "genuine_comparisons", &o->genuine_comparisons, err)))
            break;
        size_t flags_at = r->pos;
        if ((c = rd_u32(r, "flags", &flags, err)))
            break;
        if (flags & ~1u)
            c = lk_error_set(err, LK_ERR_MODEL_FORMAT,
                             "model file: OPPT row %u flags at offset %zu has unknown bits 0x%x",
                             i, flags_at, flags);
        o->target_fmr = v[0];
        o->prob_threshold = v[1];
        o->svm_threshold = v[2];
        o->measured_fmr = v[3];
        o->measured_fnmr = v[4];
        o->supported = flags & 1u;
    }
    if (!c) {
        lk_error e;
        if (lk_model_set_operating_points(m, rows, n, def, &e))
            c = setter_failed(r, sec_at, &e, err);
    }
    free(rows);
    return c;
}

static lk_code parse_prov(lk_model *m, rd *r, size_t sec_at, lk_error *err)
{
    lk_model_provenance p = {0};
    char *ds = NULL, *cr = NULL, *cm = NULL, *sv = NULL;
    lk_code c;
    if (!(c = rd_str(r, "dataset", LK_MODEL_MAX_STRING, false, &ds, err)) &&
        !(c = rd_u64(r, "training_pairs", &p.training_pairs, err)) &&
        !(c = rd_u64(r, "calibration_pairs", &p.calibration_pairs, err)) &&
        !(c = rd_u64(r, "evaluation_pairs", &p.evaluation_pairs, err)) &&
        !(c = rd_str(r, "created_utc", LK_MODEL_MAX_STRING, false, &cr, err)) &&
        !(c = rd_str(r, "command_line", LK_MODEL_MAX_STRING, true, &cm, err)) &&
        !(c = rd_str(r, "software_version", LK_MODEL_MAX_STRING, false, &sv, err))) {
        p.dataset = ds;
        p.created_utc = cr;
        p.command_line = cm;
        p.software_version = sv;
        lk_error e;
        if (lk_model_set_provenance(m, &p, &e))
            c = setter_failed(r, sec_at, &e, err);
    }
    free(ds);
    free(cr);
    free(cm);
    free(sv);
    return c;
}

static const char *const KNOWN_TAGS[] = {"IDNT", "FEAT", "PROJ", "STDZ", "SVML",
                                         "PLAT", "OPPT", "PROV", "PRNM"};
#define N_KNOWN (sizeof KNOWN_TAGS / sizeof KNOWN_TAGS[0])

/* Everything but the checksum, which lk_model_load_bytes has verified. */
static lk_code parse_sections(lk_model *m, const uint8_t *b, size_t csum_at, lk_error *err)
{
    bool seen[N_KNOWN] = {false};
    size_t pos = HEADER_SIZE;
    while (pos < csum_at) {
        char tag[5];
        tag_text(b + pos, tag);
        uint32_t flags = get_u32(b + pos + 4);
        size_t len = (size_t)get_u64(b + pos + 8); /* bounded by the first pass */
        size_t sec_at = pos;
        if (flags & ~SECTION_REQUIRED)
            return lk_error_set(err, LK_ERR_MODEL_FORMAT,
                                "model file: section %s at offset %zu has unknown flag bits 0x%x "
                                "(corrupt file)", tag, pos, (unsigned)flags);
        size_t kind = N_KNOWN;
        for (size_t i = 0; i < N_KNOWN; i++)
            if (memcmp(b + pos, KNOWN_TAGS[i], 4) == 0)
                kind = i;
        rd r = {b, pos + SECTION_HEADER_SIZE, pos + SECTION_HEADER_SIZE + len, KNOWN_TAGS[0]};
        pos = r.end;
        if (kind == N_KNOWN) {
            /* A later format revision may add sections; an optional one is
             * skipped, a required one means this reader is too old. */
            if (flags & SECTION_REQUIRED)
                return lk_error_set(err, LK_ERR_MODEL_FORMAT,
                                    "model file: section %s at offset %zu is required but unknown "
                                    "to this likeness " LIKENESS_VERSION
                                    ": the model was written by a newer likeness; upgrade likeness "
                                    "to load it", tag, sec_at);
            continue;
        }
        r.sec = KNOWN_TAGS[kind];
        if (seen[kind])
            return lk_error_set(err, LK_ERR_MODEL_FORMAT,
                                "model file: section %s at offset %zu appears twice", tag, sec_at);
        seen[kind] = true;
        lk_code c = LK_OK;
        switch (kind) {
        case 0: {
            uint8_t id[LK_MODEL_ID_BYTES];
            if (!(c = rd_expect(&r, LK_MODEL_ID_BYTES, r.pos, err))) {
                memcpy(id, b + r.pos, LK_MODEL_ID_BYTES);
                r.pos += LK_MODEL_ID_BYTES;
                set_id(m, id);
            }
            break;
        }
        case 1: c = parse_feat(m, &r, err); break;
        case 2: c = parse_proj(m, &r, sec_at, err); break;
        case 3: c = parse_stdz(m, &r, sec_at, err); break;
        case 4: c = parse_svml(m, &r, sec_at, err); break;
        case 5: c = parse_plat(m, &r, sec_at, err); break;
        case 6: c = parse_oppt(m, &r, sec_at, err); break;
        case 7: c = parse_prov(m, &r, sec_at, err); break;
        case 8: c = parse_prnm(m, &r, sec_at, err); break;
        }
        if (c)
            return c;
        if (r.pos != r.end)
            return lk_error_set(err, LK_ERR_MODEL_FORMAT,
                                "model file: section %s at offset %zu has %zu bytes left over "
                                "after its last field (corrupt file)", tag, sec_at,
                                r.end - r.pos);
    }
    static const size_t required[] = {0, 1, 4, 5, 6, 7};
    for (size_t i = 0; i < sizeof required / sizeof required[0]; i++)
        if (!seen[required[i]])
            return lk_error_set(err, LK_ERR_MODEL_FORMAT,
                                "model file: required section %s is missing",
                                KNOWN_TAGS[required[i]]);
    lk_error e;
    if (lk_model_validate(m, &e))
        return lk_error_set(err, LK_ERR_MODEL_FORMAT, "model file: %s", e.message);
    return LK_OK;
}

lk_model *lk_model_load_bytes(const uint8_t *b, size_t len, lk_error *err)
{
    if (!b && len) {
        lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no model bytes");
        return NULL;
    }
    if (len < sizeof MAGIC || memcmp(b, MAGIC, sizeof MAGIC) != 0) {
        lk_error_set(err, LK_ERR_MODEL_FORMAT,
                     "model file: magic at offset 0 is not \"LKMODEL\\0\"%s: this is not a "
                     "likeness model file", len < sizeof MAGIC ? " (file too short)" : "");
        return NULL;
    }
    if (len < HEADER_SIZE) {
        lk_error_set(err, LK_ERR_MODEL_FORMAT,
                     "model file: truncated at offset %zu, inside the version field", len);
        return NULL;
    }
    uint32_t version = get_u32(b + 8);
    if (version > LK_MODEL_FORMAT_VERSION) {
        lk_error_set(err, LK_ERR_MODEL_FORMAT,
                     "model file: format version %u (offset 8) is newer than the version %u "
                     "this likeness " LIKENESS_VERSION " reads; upgrade likeness to load it",
                     version, LK_MODEL_FORMAT_VERSION);
        return NULL;
    }
    if (version != LK_MODEL_FORMAT_VERSION) {
        lk_error_set(err, LK_ERR_MODEL_FORMAT,
                     "model file: format version %u at offset 8 is not valid (corrupt file)",
                     version);
        return NULL;
    }
    /* First pass: section framing only, to find and verify the checksum
     * before any field is believed, so damage is reported as damage. */
    size_t pos = HEADER_SIZE, csum_at = 0;
    for (;;) {
        if (len - pos < SECTION_HEADER_SIZE) {
            lk_error_set(err, LK_ERR_MODEL_FORMAT,
                         "model file: truncated: a section header at offset %zu needs %u bytes, "
                         "%zu remain (no checksum section reached)", pos, SECTION_HEADER_SIZE,
                         len - pos);
            return NULL;
        }
        char tag[5];
        tag_text(b + pos, tag);
        uint64_t slen = get_u64(b + pos + 8);
        size_t left = len - pos - SECTION_HEADER_SIZE;
        if (slen > left) {
            lk_error_set(err, LK_ERR_MODEL_FORMAT,
                         "model file: section %s at offset %zu has length %llu but only %zu "
                         "bytes remain (truncated or corrupt file)", tag, pos,
                         (unsigned long long)slen, left);
            return NULL;
        }
        if (memcmp(b + pos, "CSUM", 4) == 0) {
            if (slen != CHECKSUM_SIZE || left != CHECKSUM_SIZE) {
                lk_error_set(err, LK_ERR_MODEL_FORMAT,
                             "model file: checksum section at offset %zu must be %u bytes long "
                             "and end the file (length %llu, %zu bytes follow its header)", pos,
                             CHECKSUM_SIZE, (unsigned long long)slen, left);
                return NULL;
            }
            csum_at = pos;
            break;
        }
        pos += SECTION_HEADER_SIZE + (size_t)slen;
    }
    uint8_t digest[CHECKSUM_SIZE];
    size_t digest_at = csum_at + SECTION_HEADER_SIZE;
    crypto_generichash(digest, sizeof digest, b, digest_at, NULL, 0);
    if (memcmp(digest, b + digest_at, CHECKSUM_SIZE) != 0) {
        lk_error_set(err, LK_ERR_MODEL_FORMAT,
                     "model file: checksum at offset %zu does not match the BLAKE2b-256 of "
                     "bytes 0..%zu: the file is corrupt; copy it again or retrain", digest_at,
                     digest_at);
        return NULL;
    }
    lk_model *m = calloc(1, sizeof *m);
    if (!m) {
        lk_error_set(err, LK_ERR_NOMEM, "out of memory loading the model");
        return NULL;
    }
    if (get_u32(b + csum_at + 4) & ~SECTION_REQUIRED) {
        lk_error_set(err, LK_ERR_MODEL_FORMAT,
                     "model file: section CSUM at offset %zu has unknown flag bits", csum_at);
        lk_model_free(m);
        return NULL;
    }
    if (parse_sections(m, b, csum_at, err)) {
        lk_model_free(m);
        return NULL;
    }
    static const char hex[] = "0123456789abcdef";
    for (size_t i = 0; i < CHECKSUM_SIZE; i++) {
        m->checksum_hex[2 * i] = hex[b[digest_at + i] >> 4];
        m->checksum_hex[2 * i + 1] = hex[b[digest_at + i] & 15];
    }
    m->checksum_hex[2 * CHECKSUM_SIZE] = '\0';
    return m;
}

/* ---- files ---- */

lk_model *lk_model_load(const char *path, lk_error *err)
{
    if (!path) {
        lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no model path");
        return NULL;
    }
    int fd = open(path, O_RDONLY | O_CLOEXEC);
    if (fd < 0) {
        lk_error_set(err, LK_ERR_IO, "cannot open model file %s: %s", path, strerror(errno));
        return NULL;
    }
    struct stat st;
    if (fstat(fd, &st) != 0 || !S_ISREG(st.st_mode)) {
        lk_error_set(err, LK_ERR_IO, "model path %s is not a readable regular file", path);
        close(fd);
        return NULL;
    }
    if ((uint64_t)st.st_size > MAX_FILE_BYTES) {
        lk_error_set(err, LK_ERR_MODEL_FORMAT,
                     "model file %s is %lld bytes, over the %zu-byte limit", path,
                     (long long)st.st_size, MAX_FILE_BYTES);
        close(fd);
        return NULL;
    }
    size_t size = (size_t)st.st_size;
    uint8_t *buf = malloc(size ? size : 1);
    if (!buf) {
        lk_error_set(err, LK_ERR_NOMEM, "out of memory reading model file %s", path);
        close(fd);
        return NULL;
    }
    size_t got = 0;
    errno = 0;
    while (got < size) {
        ssize_t n = read(fd, buf + got, size - got);
        if (n < 0 && errno == EINTR)
            continue;
        if (n <= 0)
            break;
        got += (size_t)n;
    }
    int read_errno = errno;
    close(fd);
    if (got != size) {
        lk_error_set(err, LK_ERR_IO, "cannot read model file %s: %s", path,
                     got < size ? (read_errno ? strerror(read_errno) : "file shrank") : "");
        free(buf);
        return NULL;
    }
    lk_model *m = lk_model_load_bytes(buf, size, err);
    free(buf);
    return m;
}

static lk_code write_all(int fd, const uint8_t *p, size_t n)
{
    while (n > 0) {
        ssize_t w = write(fd, p, n);
        if (w < 0 && errno == EINTR)
            continue;
        if (w <= 0)
            return LK_ERR_IO;
        p += w;
        n -= (size_t)w;
    }
    return LK_OK;
}

lk_code lk_model_save(const lk_model *m, const char *path, lk_error *err)
{
    if (!path || !*path)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no model path");
    uint8_t *bytes;
    size_t len;
    lk_code c = lk_model_serialise(m, &bytes, &len, err);
    if (c)
        return c;
    size_t plen = strlen(path);
    static const char suffix[] = ".tmp-XXXXXX";
    char *tmp = malloc(plen + sizeof suffix);
    if (!tmp) {
        free(bytes);
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory saving the model");
    }
    memcpy(tmp, path, plen);
    memcpy(tmp + plen, suffix, sizeof suffix);
    /* Same directory as the target so rename(2) is atomic (POSIX rename). */
    int fd = mkstemp(tmp);
    if (fd < 0) {
        c = lk_error_set(err, LK_ERR_IO, "cannot create a temporary file next to %s: %s", path,
                         strerror(errno));
        goto out;
    }
    /* Models hold no secrets; mkstemp's 0600 would hide them from the service user. */
    if (fchmod(fd, 0644) != 0 || write_all(fd, bytes, len) != LK_OK || fsync(fd) != 0) {
        c = lk_error_set(err, LK_ERR_IO, "cannot write %s: %s", tmp, strerror(errno));
        close(fd);
        unlink(tmp);
        goto out;
    }
    if (close(fd) != 0) {
        c = lk_error_set(err, LK_ERR_IO, "cannot write %s: %s", tmp, strerror(errno));
        unlink(tmp);
        goto out;
    }
    if (rename(tmp, path) != 0) {
        c = lk_error_set(err, LK_ERR_IO, "cannot rename %s to %s: %s", tmp, path,
                         strerror(errno));
        unlink(tmp);
        goto out;
    }
    /* fsync the directory so the rename itself survives a crash (fsync(2)). */
    const char *slash = strrchr(path, '/');
    if (slash) {
        size_t dlen = slash == path ? 1 : (size_t)(slash - path);
        memcpy(tmp, path, dlen);
        tmp[dlen] = '\0';
    } else {
        strcpy(tmp, ".");
    }
    int dfd = open(tmp, O_RDONLY | O_DIRECTORY | O_CLOEXEC);
    if (dfd >= 0) {
        fsync(dfd);
        close(dfd);
    }
out:
    free(tmp);
    free(bytes);
    return c;
}
