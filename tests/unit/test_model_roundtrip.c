/* Model file round trip and robustness: a built model saved and loaded keeps
 * every field bit for bit; scoring follows the formula written in
 * docs/model-format.md (computed here directly from that text, with the
 * mean kept in, in long double); every truncation and every single-byte
 * change of a file is refused with LK_ERR_MODEL_FORMAT and never crashes
 * (ASan/UBSan and valgrind watch for the crash part); crafted files with a
 * valid checksum exercise the field checks, including the PRNM section
 * (L2 normalisation of the projected vector: modes, REQUIRED flag, PRNM
 * without PROJ, zero and overflowing projections, non-finite input) and the
 * PROJ encodings (f64 and the default f32: layout, sizes, rounding of W,
 * scores with the test's own rounded W, the documented error bound,
 * crafted encoding fields, the sweeps on both layouts). The checksum itself is checked against Python's hashlib in
 * tests/ref/check_model_blake2b.py. */
#include "likeness/model.h"
#include "lk_test.h"

#include <cjson/cJSON.h>
#include <dirent.h>
#include <math.h>
#include <pthread.h>
#include <sodium.h>
#include <stdint.h>
#include <string.h>
#include <unistd.h>

/* splitmix64 (Steele, Lea & Flood 2014) for reproducible parameters. */
static uint64_t rng_next(uint64_t *s)
{
    uint64_t z = (*s += 0x9e3779b97f4a7c15ULL);
    z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
    z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
    return z ^ (z >> 31);
}

static double rng_unit(uint64_t *s) /* uniform in [-1, 1) */
{
    return (double)(rng_next(s) >> 11) * 0x1.0p-52 - 1.0;
}

static const lk_model_operating_point ROWS[3] = {
    {1e-4, 0.97, 2.5, 0.8e-4, 0.31, 200000, 3000, true},
    {1e-3, 0.90, 1.5, 1.1e-3, 0.12, 200000, 3000, true},
    {1e-2, 0.60, 0.25, 0.95e-2, 0.05, 200000, 3000, true},
};

/* The projection build() sets for this seed, as given to the setter (before
 * any rounding); s is left where build() continues. */
static void gen_projection(size_t d, size_t k, uint64_t *s, double *mean, double *w)
{
    for (size_t i = 0; i < d; i++)
        mean[i] = rng_unit(s);
    for (size_t i = 0; i < k * d; i++)
        w[i] = rng_unit(s) / sqrt((double)d);
}

static lk_model *build_enc(size_t d, size_t k, bool proj, bool stdz, bool l2, uint64_t seed,
                           lk_model_proj_encoding enc)
{
    uint64_t s = seed;
    lk_error e;
    lk_model *m = lk_model_new();
    if (!m)
        return NULL;
    size_t n = proj ? k : d;
    double *mean = malloc(d * sizeof *mean), *w = malloc(k * d * sizeof *w);
    double *sm = malloc(n * sizeof *sm), *ss = malloc(n * sizeof *ss), *sv = malloc(n * sizeof *sv);
    gen_projection(d, k, &s, mean, w);
    for (size_t i = 0; i < n; i++) {
        sm[i] = 0.5 + rng_unit(&s) * 0.1;
        ss[i] = 0.75 + 0.5 * rng_unit(&s);
        sv[i] = rng_unit(&s);
    }
    int bad = 0;
    if (enc != LK_MODEL_F32) /* F32 is the default: leave it implicit there */
        bad |= lk_model_set_projection_encoding(m, enc, &e);
    bad |= lk_model_set_features(m, "crop=96x112;hog=cell8,bins9;lbp=u2", d, &e);
    if (l2) /* before the projection on purpose: the setters' order must not matter */
        bad |= lk_model_set_projection_norm(m, LK_PROJ_NORM_L2, &e);
    if (proj)
        bad |= lk_model_set_projection(m, k, d, mean, w, &e);
    if (stdz)
        bad |= lk_model_set_standardisation(m, n, sm, ss, &e);
    bad |= lk_model_set_svm(m, n, sv, -0.125 + rng_unit(&s), &e);
    bad |= lk_model_set_platt(m, -1.75, 0.3, &e);
    bad |= lk_model_set_operating_points(m, ROWS, 3, 1e-3, &e);
    lk_model_provenance p = {"pairs-set \xc3\xa9t\xc3\xa9", 6000, 1200, 3000, "2026-12-02T04:41:00Z",
                             "likeness train --data x", "0.1.0"};
    bad |= lk_model_set_provenance(m, &p, &e);
    free(mean);
    free(w);
    free(sm);
    free(ss);
    free(sv);
    if (bad) {
        fprintf(stderr, "building the model failed: %s\n", e.message);
        lk_model_free(m);
        return NULL;
    }
    return m;
}

static lk_model *build(size_t d, size_t k, bool proj, bool stdz, bool l2, uint64_t seed)
{
    return build_enc(d, k, proj, stdz, l2, seed, LK_MODEL_F32);
}

static bool same_doubles(const double *a, const double *b, size_t n)
{
    return (n == 0) || memcmp(a, b, n * sizeof *a) == 0;
}

static void check_equal(const lk_model *a, const lk_model *b, const char *what)
{
    CHECK(strcmp(lk_model_id(a), lk_model_id(b)) == 0, "%s: id", what);
    CHECK(strlen(lk_model_id(a)) == LK_MODEL_ID_HEX, "%s: id length", what);
    CHECK(strcmp(lk_model_feature_config(a), lk_model_feature_config(b)) == 0, "%s: config", what);
    CHECK(lk_model_feature_dim(a) == lk_model_feature_dim(b), "%s: dim", what);
    size_t ka = 0, da = 0, kb = 0, db = 0;
    const double *ma = NULL, *wa = NULL, *mb = NULL, *wb = NULL;
    bool pa = lk_model_projection(a, &ka, &da, &ma, &wa);
    bool pb = lk_model_projection(b, &kb, &db, &mb, &wb);
    CHECK(pa == pb && ka == kb && da == db, "%s: projection shape", what);
    CHECK(lk_model_projection_norm(a) == lk_model_projection_norm(b), "%s: projection norm", what);
    if (pa && pb && ka == kb && da == db)
        CHECK(same_doubles(ma, mb, da) && same_doubles(wa, wb, ka * da), "%s: projection", what);
    size_t na = 0, nb = 0;
    const double *sa = NULL, *sb = NULL;
    pa = lk_model_standardisation(a, &na, &ma, &sa);
    pb = lk_model_standardisation(b, &nb, &mb, &sb);
    CHECK(pa == pb && na == nb, "%s: standardisation shape", what);
    if (pa && pb && na == nb)
        CHECK(same_doubles(ma, mb, na) && same_doubles(sa, sb, na), "%s: standardisation", what);
    double ba = 0, bb = 1;
    CHECK(lk_model_svm(a, &na, &wa, &ba) && lk_model_svm(b, &nb, &wb, &bb) && na == nb, "%s: svm", what);
    CHECK(na == nb && same_doubles(wa, wb, na) && memcmp(&ba, &bb, sizeof ba) == 0, "%s: svm values", what);
    double aa, ab, b1, b2;
    CHECK(lk_model_platt(a, &aa, &b1) && lk_model_platt(b, &ab, &b2) && aa == ab && b1 == b2,
          "%s: platt", what);
    const lk_model_operating_point *ra = lk_model_operating_points(a, &na);
    const lk_model_operating_point *rb = lk_model_operating_points(b, &nb);
    CHECK(na == nb && na > 0, "%s: op count", what);
    for (size_t i = 0; i < na && i < nb; i++)
        CHECK(ra[i].target_fmr == rb[i].target_fmr && ra[i].prob_threshold == rb[i].prob_threshold &&
                  ra[i].svm_threshold == rb[i].svm_threshold &&
                  ra[i].measured_fmr == rb[i].measured_fmr &&
                  ra[i].measured_fnmr == rb[i].measured_fnmr &&
                  ra[i].impostor_comparisons == rb[i].impostor_comparisons &&
                  ra[i].genuine_comparisons == rb[i].genuine_comparisons &&
                  ra[i].supported == rb[i].supported,
              "%s: op row %zu", what, i);
    CHECK(lk_model_default_fmr(a) == lk_model_default_fmr(b), "%s: default fmr", what);
    lk_model_provenance x = lk_model_get_provenance(a), y = lk_model_get_provenance(b);
    CHECK(strcmp(x.dataset, y.dataset) == 0 && strcmp(x.created_utc, y.created_utc) == 0 &&
              strcmp(x.command_line, y.command_line) == 0 &&
              strcmp(x.software_version, y.software_version) == 0 &&
              x.training_pairs == y.training_pairs && x.calibration_pairs == y.calibration_pairs &&
              x.evaluation_pairs == y.evaluation_pairs,
          "%s: provenance", what);
}

/* y = W (x - mu) of docs/model-format.md "Scoring" in long double, then
 * y / ||y||_2 when PRNM says so (a zero y stays zero). W_own: a matrix
 * the test computed itself instead of the model's (NULL: the model's). */
static void direct_project(const lk_model *m, const double *W_own, const float *x, long double *y)
{
    size_t d = lk_model_feature_dim(m), k = d;
    const double *mu = NULL, *W = NULL;
    bool has = lk_model_projection(m, &k, NULL, &mu, &W);
    if (W_own)
        W = W_own;
    if (!has) {
        for (size_t j = 0; j < d; j++)
            y[j] = x[j];
        return;
    }
    long double amax = 0, ss = 0;
    for (size_t i = 0; i < k; i++) {
        long double t = 0;
        for (size_t j = 0; j < d; j++)
            t += (long double)W[i * d + j] * ((long double)x[j] - mu[j]);
        y[i] = t;
        amax = fabsl(t) > amax ? fabsl(t) : amax;
    }
    /* Divided by the largest |y_i| first: valgrind runs long double as
     * binary64, where the squares of the huge test vector would overflow. */
    for (size_t i = 0; i < k && amax > 0; i++)
        ss += (y[i] / amax) * (y[i] / amax);
    if (lk_model_projection_norm(m) == LK_PROJ_NORM_L2 && ss > 0)
        for (size_t i = 0; i < k; i++)
            y[i] /= amax * sqrtl(ss);
}

/* The formula of docs/model-format.md "Scoring", step by step, with the
 * projection mean applied to each vector as written (the library cancels it
 * when there is no normalisation). */
static void direct_score(const lk_model *m, const double *W_own, const float *a, const float *b,
                         long double *f, long double *p)
{
    size_t n;
    const double *sm = NULL, *ss = NULL, *w;
    bool stdz = lk_model_standardisation(m, &n, &sm, &ss);
    double bias, A, B;
    lk_model_svm(m, &n, &w, &bias);
    lk_model_platt(m, &A, &B);
    size_t k = lk_model_pair_dim(m), big = k > lk_model_feature_dim(m) ? k : lk_model_feature_dim(m);
    long double *ya = malloc(big * sizeof *ya), *yb = malloc(big * sizeof *yb);
    direct_project(m, W_own, a, ya);
    direct_project(m, W_own, b, yb);
    long double acc = bias;
    for (size_t i = 0; i < k; i++) {
        long double z = (ya[i] - yb[i]) * (ya[i] - yb[i]);
        if (stdz)
            z = (z - sm[i]) / ss[i];
        acc += w[i] * z;
    }
    free(ya);
    free(yb);
    *f = acc;
    *p = 1.0L / (1.0L + expl(A * acc + B));
}

static void reseal(uint8_t *b, size_t len)
{
    crypto_generichash(b + len - 32, 32, b, len - 32, NULL, 0);
}

static lk_code load_code(const uint8_t *b, size_t len, lk_error *e)
{
    lk_model *m = lk_model_load_bytes(b, len, e);
    lk_code c = m ? LK_OK : e->code;
    lk_model_free(m);
    return c;
}

static void put32(uint8_t *p, uint32_t v)
{
    for (int i = 0; i < 4; i++)
        p[i] = (uint8_t)(v >> (8 * i));
}

static void put64(uint8_t *p, uint64_t v)
{
    for (int i = 0; i < 8; i++)
        p[i] = (uint8_t)(v >> (8 * i));
}

/* Offset of the first section with this tag, walking the framing of the spec. */
static size_t find_section(const uint8_t *b, size_t len, const char *tag)
{
    size_t pos = 12;
    while (pos + 16 <= len) {
        uint64_t l = 0;
        for (int i = 7; i >= 0; i--)
            l = l << 8 | b[pos + 8 + i];
        if (memcmp(b + pos, tag, 4) == 0)
            return pos;
        pos += 16 + (size_t)l;
    }
    return 0;
}

static void crafted(const uint8_t *good, size_t len)
{
    uint8_t *b = malloc(len + 64);
    lk_error e;

    /* Newer version: the message says to upgrade. */
    memcpy(b, good, len);
    put32(b + 8, 2);
    reseal(b, len);
    CHECK(load_code(b, len, &e) == LK_ERR_MODEL_FORMAT && strstr(e.message, "upgrade"),
          "version 2: %s", e.message);

    /* A NaN SVM weight with a valid checksum: named field and offset. */
    memcpy(b, good, len);
    size_t svm = find_section(b, len, "SVML");
    CHECK(svm > 0, "SVML found");
    size_t at = svm + 16 + 4 + 8 + 8; /* weights[1] */
    uint64_t nan_bits = 0x7ff8000000000000ULL;
    put64(b + at, nan_bits);
    reseal(b, len);
    char want[64];
    snprintf(want, sizeof want, "offset %zu", at);
    CHECK(load_code(b, len, &e) == LK_ERR_MODEL_FORMAT && strstr(e.message, "SVML.weights[1]") &&
              strstr(e.message, want),
          "NaN weight: %s", e.message);

    /* SVM dimension claims far more than the section holds: refused before allocating. */
    memcpy(b, good, len);
    put32(b + svm + 16, 1000000);
    reseal(b, len);
    CHECK(load_code(b, len, &e) == LK_ERR_MODEL_FORMAT, "huge n: %s", e.message);

    /* Projection claiming k = d = 1e6 (8 TB): no overflow, no allocation. */
    memcpy(b, good, len);
    size_t pj = find_section(b, len, "PROJ");
    CHECK(pj > 0, "PROJ found");
    put32(b + pj + 16, 1000000);
    put32(b + pj + 20, 1000000);
    reseal(b, len);
    CHECK(load_code(b, len, &e) == LK_ERR_MODEL_FORMAT, "huge k*d: %s", e.message);
    put32(b + pj + 16, 1000001);
    reseal(b, len);
    CHECK(load_code(b, len, &e) == LK_ERR_MODEL_FORMAT && strstr(e.message, "PROJ.k"),
          "k over the limit: %s", e.message);

    /* Operating points out of order. */
    memcpy(b, good, len);
    size_t op = find_section(b, len, "OPPT");
    uint8_t row0[60];
    memcpy(row0, b + op + 16 + 12, 60);
    memmove(b + op + 16 + 12, b + op + 16 + 12 + 60, 60);
    memcpy(b + op + 16 + 12 + 60, row0, 60);
    reseal(b, len);
    CHECK(load_code(b, len, &e) == LK_ERR_MODEL_FORMAT && strstr(e.message, "sorted"),
          "unsorted rows: %s", e.message);

    /* Invalid UTF-8 in the data set name. */
    memcpy(b, good, len);
    size_t pv = find_section(b, len, "PROV");
    b[pv + 16 + 4 + 10] = 0xC3; /* 'pairs-set ' then 0xC3 0xA9: make it 0xC3 0xC3 */
    b[pv + 16 + 4 + 11] = 0xC3;
    reseal(b, len);
    CHECK(load_code(b, len, &e) == LK_ERR_MODEL_FORMAT && strstr(e.message, "UTF-8"),
          "bad UTF-8: %s", e.message);

    /* Duplicate section: PLAT renamed to PROV (PROV twice, PLAT missing). */
    memcpy(b, good, len);
    size_t pl = find_section(b, len, "PLAT");
    memcpy(b + pl, "PROV", 4);
    reseal(b, len);
    CHECK(load_code(b, len, &e) == LK_ERR_MODEL_FORMAT, "renamed section: %s", e.message);

    /* Unknown sections inserted before CSUM: optional is skipped, required
     * means a newer writer. */
    size_t cs = len - 48;
    for (uint32_t flags = 0; flags <= 1; flags++) {
        memcpy(b, good, cs);
        memcpy(b + cs, "XTRA", 4);
        put32(b + cs + 4, flags);
        put64(b + cs + 8, 8);
        memset(b + cs + 16, 0xAB, 8);
        memcpy(b + cs + 24, good + cs, 48);
        reseal(b, len + 24);
        lk_code c = load_code(b, len + 24, &e);
        if (flags == 0)
            CHECK(c == LK_OK, "optional unknown section skipped: %s", e.message);
        else
            CHECK(c == LK_ERR_MODEL_FORMAT && strstr(e.message, "XTRA") && strstr(e.message, "upgrade"),
                  "required unknown section: %s", e.message);
    }
    free(b);
}

static void robustness(const uint8_t *good, size_t len)
{
    uint8_t *b = malloc(len + 48);
    lk_error e;
    int bad_trunc = 0, bad_flip = 0, resealed_ok = 0, resealed_bad = 0, bad_resealed_trunc = 0;
    /* Truncation at every offset. */
    for (size_t l = 0; l < len; l++) {
        if (load_code(good, l, &e) != LK_ERR_MODEL_FORMAT)
            bad_trunc++;
    }
    /* Truncation at every offset after the header, then a fresh valid CSUM
     * section appended: the field checks alone must refuse it. */
    size_t cs = len - 48;
    for (size_t l = 12; l < cs; l++) {
        memcpy(b, good, l);
        memcpy(b + l, good + cs, 16);
        reseal(b, l + 48);
        lk_code c = load_code(b, l + 48, &e);
        if (c != LK_ERR_MODEL_FORMAT)
            bad_resealed_trunc++;
    }
    /* Every single-byte change, three ways each. */
    static const uint8_t masks[3] = {0x01, 0x80, 0xFF};
    for (size_t i = 0; i < len; i++) {
        for (int k = 0; k < 3; k++) {
            memcpy(b, good, len);
            b[i] ^= masks[k];
            if (load_code(b, len, &e) != LK_ERR_MODEL_FORMAT)
                bad_flip++;
            /* The same change with the checksum redone: anything may
             * happen but a crash or another error code. */
            if (i < len - 32) {
                reseal(b, len);
                lk_code c = load_code(b, len, &e);
                if (c == LK_OK)
                    resealed_ok++;
                else if (c != LK_ERR_MODEL_FORMAT)
                    resealed_bad++;
            }
        }
    }
    CHECK(bad_trunc == 0, "%d truncations not refused", bad_trunc);
    CHECK(bad_resealed_trunc == 0, "%d resealed truncations not refused", bad_resealed_trunc);
    CHECK(bad_flip == 0, "%d byte changes not detected", bad_flip);
    CHECK(resealed_bad == 0, "%d resealed changes gave a code other than model_format", resealed_bad);
    printf("file %zu bytes: %zu truncations and %zu resealed truncations refused; %zu byte changes "
           "detected; with checksum redone %d of %zu changes still load (value bytes)\n",
           len, len, cs - 12, 3 * len, resealed_ok, 3 * (len - 32));
    free(b);
}

static void scoring(const lk_model *m, uint64_t seed)
{
    size_t d = lk_model_feature_dim(m);
    float *a = malloc(d * sizeof *a), *b = malloc(d * sizeof *b);
    double *scratch = malloc(lk_model_scratch_size(m) * sizeof *scratch);
    uint64_t s = seed;
    double worst_f = 0, worst_p = 0;
    for (int t = 0; t < 200; t++) {
        for (size_t j = 0; j < d; j++) {
            a[j] = (float)rng_unit(&s);
            b[j] = (t % 4 == 0) ? a[j] + (float)(0.05 * rng_unit(&s)) : (float)rng_unit(&s);
        }
        double f, p;
        lk_error e;
        lk_code c = lk_model_score(m, a, b, scratch, &f, &p, &e);
        CHECK(c == LK_OK, "score: %s", e.message);
        long double df, dp;
        direct_score(m, NULL, a, b, &df, &dp);
        double ef = fabs((double)(f - df)) / (1 + fabs((double)df));
        double ep = fabs((double)(p - dp));
        if (ef > worst_f)
            worst_f = ef;
        if (ep > worst_p)
            worst_p = ep;
        CHECK(p >= 0 && p <= 1, "probability in [0, 1]");
        CHECK(fabs(lk_model_probability(m, f) - p) == 0, "probability function agrees");
    }
    /* Rounding only: the library projects a - b, the formula a - mu and b - mu. */
    CHECK(worst_f < 1e-12 && worst_p < 1e-12, "score vs formula: f %.3g p %.3g", worst_f, worst_p);
    printf("d=%zu pair=%zu: largest relative SVM-value difference %.3g, probability %.3g\n", d,
           lk_model_pair_dim(m), worst_f, worst_p);
    /* Extreme SVM values: no overflow (Lin, Lin & Weng 2007). */
    double hi = lk_model_probability(m, 1e308), lo = lk_model_probability(m, -1e308);
    CHECK(hi == 1.0 && lo == 0.0, "extremes %g %g", hi, lo);
    a[0] = NAN;
    lk_error e;
    CHECK(lk_model_score(m, a, b, scratch, NULL, NULL, &e) == LK_ERR_INVALID_ARGUMENT,
          "NaN feature refused");
    free(a);
    free(b);
    free(scratch);
}

/* Many threads scoring with one read-only model, each with its own scratch,
 * must give exactly the serial results. */
#define T_PAIRS 64
#define T_THREADS 4
typedef struct tjob {
    const lk_model *m;
    const float *a, *b;
    double out[T_PAIRS];
    int fails;
} tjob;

static void *tscore(void *arg)
{
    tjob *j = arg;
    size_t d = lk_model_feature_dim(j->m);
    double *scratch = malloc(lk_model_scratch_size(j->m) * sizeof *scratch);
    for (int rep = 0; rep < 20; rep++)
        for (int i = 0; i < T_PAIRS; i++)
            if (lk_model_score(j->m, j->a + i * d, j->b + i * d, scratch, NULL, &j->out[i], NULL))
                j->fails++;
    free(scratch);
    return NULL;
}

static void threads(const lk_model *m)
{
    size_t d = lk_model_feature_dim(m);
    float *a = malloc(T_PAIRS * d * sizeof *a), *b = malloc(T_PAIRS * d * sizeof *b);
    uint64_t s = 99;
    for (size_t i = 0; i < T_PAIRS * d; i++) {
        a[i] = (float)rng_unit(&s);
        b[i] = (float)rng_unit(&s);
    }
    tjob serial = {m, a, b, {0}, 0}, jobs[T_THREADS];
    tscore(&serial);
    pthread_t th[T_THREADS];
    for (int t = 0; t < T_THREADS; t++) {
        jobs[t] = serial;
        memset(jobs[t].out, 0, sizeof jobs[t].out);
        CHECK(pthread_create(&th[t], NULL, tscore, &jobs[t]) == 0, "thread start");
    }
    for (int t = 0; t < T_THREADS; t++) {
        pthread_join(th[t], NULL);
        CHECK(jobs[t].fails == 0 && memcmp(jobs[t].out, serial.out, sizeof serial.out) == 0,
              "thread %d results equal the serial ones", t);
    }
    free(a);
    free(b);
}

static void api_checks(lk_model *m)
{
    lk_error e;
    double t;
    lk_model_operating_point r;
    CHECK(lk_model_threshold_for_fmr(m, 1e-3, &t, &e) == LK_OK && t == 0.90, "exact row");
    CHECK(lk_model_threshold_for_fmr(m, 5e-3, &t, &e) == LK_OK && t == 0.90, "between rows: lower");
    CHECK(lk_model_operating_point_for_fmr(m, 0.5, &r, &e) == LK_OK && r.target_fmr == 1e-2,
          "above all rows: largest");
    CHECK(lk_model_threshold_for_fmr(m, 1e-5, &t, &e) == LK_ERR_INVALID_ARGUMENT, "below all rows");
    CHECK(lk_model_check_features(m, lk_model_feature_config(m), lk_model_feature_dim(m), &e) == LK_OK,
          "same features");
    CHECK(lk_model_check_features(m, "crop=80x80;hog=cell8", lk_model_feature_dim(m), &e) ==
                  LK_ERR_MODEL_MISMATCH &&
              strstr(e.message, "crop=80x80;hog=cell8") && strstr(e.message, lk_model_feature_config(m)),
          "mismatch names both: %s", e.message);
    CHECK(lk_model_check_features(m, lk_model_feature_config(m), lk_model_feature_dim(m) + 1, &e) ==
              LK_ERR_MODEL_MISMATCH,
          "dimension mismatch");
    CHECK(lk_model_set_platt(m, 0.5, 0, &e) == LK_ERR_INVALID_ARGUMENT, "A > 0 refused");
    CHECK(lk_model_set_platt(m, NAN, 0, &e) == LK_ERR_INVALID_ARGUMENT, "NaN A refused");
    lk_model_operating_point rows[2] = {ROWS[1], ROWS[0]};
    CHECK(lk_model_set_operating_points(m, rows, 2, 1e-3, &e) == LK_ERR_INVALID_ARGUMENT, "unsorted");
    CHECK(lk_model_set_operating_points(m, ROWS, 3, 1e-5, &e) == LK_ERR_INVALID_ARGUMENT,
          "default below rows");
    lk_model_provenance p = {"x", 1, 1, 1, "2026-13-01T00:00:00Z", "", "1"};
    CHECK(lk_model_set_provenance(m, &p, &e) == LK_ERR_INVALID_ARGUMENT, "bad month");
    p.created_utc = "2026-12-01 00:00:00";
    CHECK(lk_model_set_provenance(m, &p, &e) == LK_ERR_INVALID_ARGUMENT, "not ISO 8601");
    p.created_utc = "2026-12-01T00:00:00Z";
    p.dataset = "\xed\xa0\x80"; /* a UTF-16 surrogate, invalid in UTF-8 (RFC 3629) */
    CHECK(lk_model_set_provenance(m, &p, &e) == LK_ERR_INVALID_ARGUMENT, "surrogate refused");
    double one = 1, zero = 0;
    CHECK(lk_model_set_standardisation(m, 1, &one, &zero, &e) == LK_ERR_INVALID_ARGUMENT,
          "zero scale refused");

    char *js = lk_model_to_json(m);
    CHECK(js != NULL, "json");
    cJSON *o = js ? cJSON_Parse(js) : NULL;
    CHECK(o != NULL, "json parses");
    if (o) {
        const cJSON *id = cJSON_GetObjectItemCaseSensitive(o, "id");
        CHECK(cJSON_IsString(id) && strcmp(id->valuestring, lk_model_id(m)) == 0, "json id");
        const cJSON *ops = cJSON_GetObjectItemCaseSensitive(o, "operating_points");
        CHECK(cJSON_GetArraySize(ops) == 3, "json rows");
        const cJSON *r1 = cJSON_GetArrayItem(ops, 1);
        const cJSON *thr = cJSON_GetObjectItemCaseSensitive(r1, "probability_threshold");
        CHECK(cJSON_IsNumber(thr) && thr->valuedouble == 0.90, "json threshold");
        const cJSON *f = cJSON_GetObjectItemCaseSensitive(o, "features");
        CHECK(cJSON_IsObject(f) &&
                  strcmp(cJSON_GetObjectItemCaseSensitive(f, "config")->valuestring,
                         lk_model_feature_config(m)) == 0,
              "json config");
        const cJSON *pv = cJSON_GetObjectItemCaseSensitive(o, "provenance");
        CHECK(cJSON_GetObjectItemCaseSensitive(pv, "evaluation_pairs")->valuedouble == 3000,
              "json provenance");
        CHECK(strstr(js, "weights") == NULL && strstr(js, "matrix") == NULL, "json has no weights");
        cJSON_Delete(o);
    }
    free(js);
}

/* Inserts a PRNM section (flags, mode) before CSUM and reseals; returns the new length. */
static size_t with_prnm(const uint8_t *good, size_t len, uint8_t *b, uint32_t flags, uint32_t mode)
{
    size_t cs = len - 48;
    memcpy(b, good, cs);
    memcpy(b + cs, "PRNM", 4);
    put32(b + cs + 4, flags);
    put64(b + cs + 8, 4);
    put32(b + cs + 16, mode);
    memcpy(b + cs + 20, good + cs, 48);
    reseal(b, len + 20);
    return len + 20;
}

/* The PRNM section and the normalisation step (docs/model-format.md).
 * good_l2: a file written with the normalisation on; good_proj: one with a
 * projection and no normalisation; good_raw: one without a projection. */
static void prnm_checks(const uint8_t *good_l2, size_t len_l2, const uint8_t *good_proj,
                        size_t len_proj, const uint8_t *good_raw, size_t len_raw)
{
    lk_error e;
    size_t big = len_l2 > len_proj ? len_l2 : len_proj;
    big = big > len_raw ? big : len_raw;
    uint8_t *b = malloc(big + 64);

    /* As written: REQUIRED set, length 4, mode 1. */
    size_t at = find_section(good_l2, len_l2, "PRNM");
    CHECK(at > 0 && good_l2[at + 4] == 1 && good_l2[at + 8] == 4 && good_l2[at + 16] == 1 &&
              good_l2[at + 17] == 0 && good_l2[at + 18] == 0 && good_l2[at + 19] == 0,
          "PRNM written REQUIRED with length 4 and mode 1");
    CHECK(find_section(good_proj, len_proj, "PRNM") == 0, "no PRNM without normalisation");

    /* Mode 0 is spelled by leaving the section out; mode 2 is from a newer writer. */
    memcpy(b, good_l2, len_l2);
    put32(b + at + 16, 0);
    reseal(b, len_l2);
    CHECK(load_code(b, len_l2, &e) == LK_ERR_MODEL_FORMAT && strstr(e.message, "PRNM.mode"),
          "mode 0 refused: %s", e.message);
    put32(b + at + 16, 2);
    reseal(b, len_l2);
    CHECK(load_code(b, len_l2, &e) == LK_ERR_MODEL_FORMAT && strstr(e.message, "upgrade"),
          "mode 2 refused: %s", e.message);
    /* Removing the section by renaming it to an unknown REQUIRED tag: refused. */
    memcpy(b, good_l2, len_l2);
    memcpy(b + at, "PRNX", 4);
    reseal(b, len_l2);
    CHECK(load_code(b, len_l2, &e) == LK_ERR_MODEL_FORMAT && strstr(e.message, "upgrade"),
          "unknown required tag refused: %s", e.message);

    /* PRNM without PROJ: refused. */
    size_t l = with_prnm(good_raw, len_raw, b, 1, 1);
    CHECK(load_code(b, l, &e) == LK_ERR_MODEL_FORMAT && strstr(e.message, "no projection"),
          "PRNM without PROJ refused: %s", e.message);
    /* PRNM (either flag value) added after PROJ to a plain projection model:
     * loads with the normalisation on and scores by the formula. */
    for (uint32_t flags = 0; flags <= 1; flags++) {
        l = with_prnm(good_proj, len_proj, b, flags, 1);
        lk_model *m = lk_model_load_bytes(b, l, &e);
        CHECK(m != NULL && lk_model_projection_norm(m) == LK_PROJ_NORM_L2,
              "PRNM after PROJ, flags %u: %s", (unsigned)flags, m ? "" : e.message);
        if (m)
            scoring(m, 555);
        lk_model_free(m);
    }
    free(b);
}

/* A zero projected vector stays zero; a huge one is normalised without
 * overflow; a non-finite one is refused. Values are exact in float and
 * double so that x = mu gives y = 0 exactly. */
static void zero_and_huge(void)
{
    static const double mu[3] = {0.5, -0.25, 2.0};
    double W[2 * 3] = {1, 2, -1, 0.5, 0, 3};
    lk_error e;
    lk_model *m = build(3, 2, true, false, true, 4242);
    CHECK(m && lk_model_set_projection(m, 2, 3, mu, W, &e) == LK_OK, "small model: %s", e.message);
    if (!m)
        return;
    double *scratch = malloc(lk_model_scratch_size(m) * sizeof *scratch);
    double y[2] = {-1, -1}, f, p;
    const float at_mean[3] = {0.5f, -0.25f, 2.0f}, other[3] = {1.5f, 0.75f, -1.0f};
    CHECK(lk_model_project(m, at_mean, y, &e) == LK_OK && y[0] == 0 && y[1] == 0,
          "x = mu projects to the zero vector (%g %g)", y[0], y[1]);
    CHECK(lk_model_project(m, other, y, &e) == LK_OK &&
              fabs(hypot(y[0], y[1]) - 1) < 1e-15,
          "unit norm after normalisation: %.17g", hypot(y[0], y[1]));
    /* other - mu = (1, 1, -3): y = (1 + 2 + 3, 0.5 - 9) = (6, -8.5), norm
     * sqrt(36 + 72.25) by hand from the formula. */
    CHECK(fabs(y[0] - 6 / sqrt(108.25)) < 1e-15 && fabs(y[1] + 8.5 / sqrt(108.25)) < 1e-15,
          "normalised values (%.17g, %.17g)", y[0], y[1]);
    long double df, dp;
    CHECK(lk_model_score(m, at_mean, other, scratch, &f, &p, &e) == LK_OK, "score with zero y: %s",
          e.message);
    direct_score(m, NULL, at_mean, other, &df, &dp);
    CHECK(fabs((double)(f - df)) < 1e-12 * (1 + fabs((double)df)), "zero y scores by the formula");
    /* |y| about 1e218: sum of squares would overflow binary64. */
    for (size_t i = 0; i < 6; i++)
        W[i] *= 1e180;
    /* Beyond binary32's range (IEEE 754: largest finite 2^128 - 2^104):
     * refused with the default encoding, accepted with f64. */
    CHECK(lk_model_set_projection(m, 2, 3, mu, W, &e) == LK_ERR_INVALID_ARGUMENT &&
              strstr(e.message, "f64"),
          "huge W refused for f32: %s", e.message);
    CHECK(lk_model_set_projection_encoding(m, LK_MODEL_F64, &e) == LK_OK, "f64: %s", e.message);
    CHECK(lk_model_set_projection(m, 2, 3, mu, W, &e) == LK_OK, "huge W: %s", e.message);
    CHECK(lk_model_set_projection_encoding(m, LK_MODEL_F32, &e) == LK_ERR_INVALID_ARGUMENT &&
              lk_model_projection_encoding(m) == LK_MODEL_F64,
          "switch to f32 refused with huge W, encoding unchanged: %s", e.message);
    const float huge[3] = {1e38f, 1e37f, -1e38f};
    CHECK(lk_model_project(m, huge, y, &e) == LK_OK && isfinite(y[0]) && isfinite(y[1]) &&
              fabs(hypot(y[0], y[1]) - 1) < 1e-15,
          "huge y normalised without overflow (%g %g)", y[0], y[1]);
    CHECK(lk_model_score(m, huge, other, scratch, &f, &p, &e) == LK_OK, "huge score: %s", e.message);
    direct_score(m, NULL, huge, other, &df, &dp);
    CHECK(fabs((double)(f - df)) < 1e-12 * (1 + fabs((double)df)), "huge y scores by the formula");
    const float bad[3] = {NAN, 0, 0};
    CHECK(lk_model_project(m, bad, y, &e) == LK_ERR_INVALID_ARGUMENT, "NaN refused by project");
    CHECK(lk_model_pair_vector(m, bad, other, scratch, y, &e) == LK_ERR_INVALID_ARGUMENT,
          "NaN refused by pair vector");
    /* API: unknown mode, normalisation without projection, clear resets it. */
    CHECK(lk_model_set_projection_norm(m, (lk_model_proj_norm)7, &e) == LK_ERR_INVALID_ARGUMENT,
          "unknown mode refused");
    CHECK(lk_model_projection_norm(m) == LK_PROJ_NORM_L2, "mode unchanged by a refused call");
    char *js = lk_model_to_json(m);
    CHECK(js && strstr(js, "\"projection_norm\":\"l2\""), "json projection_norm l2");
    free(js);
    lk_model_clear_projection(m);
    CHECK(lk_model_projection_norm(m) == LK_PROJ_NORM_NONE, "clear_projection resets the norm");
    CHECK(lk_model_set_projection_norm(m, LK_PROJ_NORM_L2, &e) == LK_OK, "set again");
    uint8_t *bytes = NULL;
    size_t len = 0;
    CHECK(lk_model_validate(m, &e) == LK_ERR_INVALID_ARGUMENT && strstr(e.message, "no projection"),
          "L2 without projection invalid: %s", e.message);
    CHECK(lk_model_serialise(m, &bytes, &len, &e) == LK_ERR_INVALID_ARGUMENT,
          "L2 without projection not written");
    free(bytes);
    /* (The SVM still has k = 2 weights for d = 3, so only the complaint changes.) */
    CHECK(lk_model_set_projection_norm(m, LK_PROJ_NORM_NONE, &e) == LK_OK &&
              lk_model_validate(m, &e) != LK_OK && !strstr(e.message, "normalisation") &&
              strstr(e.message, "SVM dimension"),
          "none without projection: only the dimension complaint left: %s", e.message);
    js = lk_model_to_json(m);
    CHECK(js && strstr(js, "\"projection_norm\":\"none\""), "json projection_norm none");
    free(js);
    free(scratch);
    lk_model_free(m);
}

/* Reads a little-endian binary32 from the file bytes (IEEE 754 layout). */
static float get_f32(const uint8_t *p)
{
    uint32_t u = (uint32_t)p[0] | (uint32_t)p[1] << 8 | (uint32_t)p[2] << 16 | (uint32_t)p[3] << 24;
    float f;
    memcpy(&f, &u, 4);
    return f;
}

/* The two encodings of PROJ (docs/model-format.md, PROJ): layout and size of
 * each, the rounding of W to binary32 (IEEE 754 round to nearest, done here
 * by the C cast), scores of the rounded model by the formula with the test's
 * own rounded W, the documented bound on y = W (x - mu), and crafted
 * encoding fields. */
static void encodings(void)
{
    enum { D = 40, K = 12 };
    const uint64_t seed = 5150;
    lk_error e;
    lk_model *m64 = build_enc(D, K, true, true, false, seed, LK_MODEL_F64);
    lk_model *m32 = build_enc(D, K, true, true, false, seed, LK_MODEL_F32);
    CHECK(m64 && m32, "build f64 and f32 models");
    if (!m64 || !m32) {
        lk_model_free(m64);
        lk_model_free(m32);
        return;
    }
    double *mu = malloc(D * sizeof *mu), *W = malloc(K * D * sizeof *W);
    double *W32 = malloc(K * D * sizeof *W32);
    uint64_t s = seed;
    gen_projection(D, K, &s, mu, W);
    int not_rounded = 0, exact_in_f32 = 0;
    double worst_rel = 0;
    for (size_t i = 0; i < K * D; i++) {
        W32[i] = (double)(float)W[i];
        exact_in_f32 += W32[i] == W[i];
        double rel = fabs(W32[i] - W[i]) / fabs(W[i]);
        worst_rel = rel > worst_rel ? rel : worst_rel;
    }
    /* IEEE 754 round to nearest: relative error <= 2^-24 (unit roundoff). */
    CHECK(worst_rel <= 0x1p-24, "element rounding %.3g <= 2^-24", worst_rel);
    CHECK(exact_in_f32 < K * D / 10, "test W mostly not exact in f32 (%d)", exact_in_f32);
    CHECK(lk_model_projection_encoding(m64) == LK_MODEL_F64 &&
              lk_model_projection_encoding(m32) == LK_MODEL_F32, "encodings reported");
    const double *g64 = NULL, *g32 = NULL, *gm = NULL;
    lk_model_projection(m64, NULL, NULL, NULL, &g64);
    lk_model_projection(m32, NULL, NULL, &gm, &g32);
    CHECK(same_doubles(g64, W, K * D), "f64 keeps W exactly");
    for (size_t i = 0; i < K * D; i++)
        not_rounded += g32[i] != W32[i];
    CHECK(not_rounded == 0, "f32 getter returns W rounded to binary32 (%d differ)", not_rounded);
    CHECK(same_doubles(gm, mu, D), "mean kept in binary64");

    uint8_t *b64 = NULL, *b32 = NULL;
    size_t l64 = 0, l32 = 0;
    CHECK(lk_model_serialise(m64, &b64, &l64, &e) == LK_OK, "serialise f64: %s", e.message);
    CHECK(lk_model_serialise(m32, &b32, &l32, &e) == LK_OK, "serialise f32: %s", e.message);
    if (!b64 || !b32)
        goto out;
    /* Layout of docs/model-format.md PROJ: k, d, encoding, mean f64[d], matrix. */
    size_t p64 = find_section(b64, l64, "PROJ"), p32 = find_section(b32, l32, "PROJ");
    CHECK(p64 && p32, "PROJ in both");
    uint64_t sl64 = 0, sl32 = 0;
    for (int i = 7; i >= 0; i--) {
        sl64 = sl64 << 8 | b64[p64 + 8 + i];
        sl32 = sl32 << 8 | b32[p32 + 8 + i];
    }
    CHECK(sl64 == 12 + 8 * D + 8 * K * D && sl32 == 12 + 8 * D + 4 * K * D,
          "PROJ lengths %llu %llu", (unsigned long long)sl64, (unsigned long long)sl32);
    CHECK(l64 - l32 == 4 * K * D, "f32 file smaller by 4kd bytes (%zu vs %zu)", l32, l64);
    CHECK(b64[p64 + 24] == 1 && b32[p32 + 24] == 2 && !b32[p32 + 25] && !b32[p32 + 26] &&
              !b32[p32 + 27], "encoding field 1 / 2");
    int bad_bytes = 0;
    for (size_t i = 0; i < K * D; i++)
        bad_bytes += get_f32(b32 + p32 + 28 + 8 * D + 4 * i) != (float)W[i];
    CHECK(bad_bytes == 0, "f32 matrix bytes are W rounded (%d differ)", bad_bytes);

    lk_model *l64m = lk_model_load_bytes(b64, l64, &e);
    CHECK(l64m != NULL, "load f64: %s", e.message);
    lk_model *l32m = lk_model_load_bytes(b32, l32, &e);
    CHECK(l32m != NULL, "load f32: %s", e.message);
    if (l64m && l32m) {
        check_equal(m64, l64m, "f64 file");
        check_equal(m32, l32m, "f32 file");
        CHECK(lk_model_projection_encoding(l64m) == LK_MODEL_F64 &&
                  lk_model_projection_encoding(l32m) == LK_MODEL_F32, "loaded encodings");
        uint8_t *again = NULL;
        size_t la = 0;
        CHECK(lk_model_serialise(l64m, &again, &la, &e) == LK_OK && la == l64 &&
                  memcmp(again, b64, la) == 0, "f64: save -> load -> save identical");
        free(again);
        char *js = lk_model_to_json(l64m);
        CHECK(js && strstr(js, "\"projection_encoding\":\"f64\""), "json f64");
        free(js);
        js = lk_model_to_json(l32m);
        CHECK(js && strstr(js, "\"projection_encoding\":\"f32\""), "json f32");
        free(js);

        /* Scores of the loaded f32 model against the formula with the
         * test's own rounded W; y of both against the documented bound
         * |y32_i - y64_i| <= 2^-24 sum_j |W_ij| |x_j - mu_j| (plus the
         * binary64 rounding of the two sums, 2 d 2^-53 of the same sum,
         * Higham 2002 "Accuracy and Stability of Numerical Algorithms"
         * eq. 3.5, recalled from memory). */
        double *scratch = malloc(lk_model_scratch_size(l32m) * sizeof *scratch);
        float a[D], bb[D];
        double y64[K], y32[K], worst_f = 0, worst_ratio = 0, worst_df = 0;
        uint64_t r = 99;
        int bound_bad = 0;
        for (int t = 0; t < 200; t++) {
            for (size_t j = 0; j < D; j++) {
                a[j] = (float)rng_unit(&r);
                bb[j] = (t % 4 == 0) ? a[j] + (float)(0.05 * rng_unit(&r)) : (float)rng_unit(&r);
            }
            double f32v, f64v, p;
            CHECK(lk_model_score(l32m, a, bb, scratch, &f32v, &p, &e) == LK_OK &&
                      lk_model_score(l64m, a, bb, scratch, &f64v, NULL, &e) == LK_OK,
                  "score: %s", e.message);
            long double df, dp;
            direct_score(l32m, W32, a, bb, &df, &dp);
            double ef = fabs((double)(f32v - df)) / (1 + fabs((double)df));
            worst_f = ef > worst_f ? ef : worst_f;
            double dd = fabs(f32v - f64v) / (1 + fabs(f64v));
            worst_df = dd > worst_df ? dd : worst_df;
            CHECK(lk_model_project(l32m, a, y32, &e) == LK_OK &&
                      lk_model_project(l64m, a, y64, &e) == LK_OK, "project: %s", e.message);
            for (size_t i = 0; i < K; i++) {
                double absum = 0;
                for (size_t j = 0; j < D; j++)
                    absum += fabs(W[i * D + j]) * fabs((double)a[j] - mu[j]);
                double bound = (0x1p-24 + 2.0 * D * 0x1p-53) * absum;
                double diff = fabs(y32[i] - y64[i]);
                bound_bad += diff > bound;
                double ratio = diff / (0x1p-24 * absum);
                worst_ratio = ratio > worst_ratio ? ratio : worst_ratio;
            }
        }
        CHECK(worst_f < 1e-12, "f32 model score vs formula with rounded W: %.3g", worst_f);
        CHECK(bound_bad == 0, "%d projected values outside the documented f32 bound", bound_bad);
        printf("f32 vs f64 PROJ (d=%d k=%d): files %zu / %zu bytes; element rounding <= %.3g; "
               "|dy| reaches %.3f of the bound; relative SVM-value change %.3g; f32 model vs "
               "formula %.3g\n", D, K, l32, l64, worst_rel, worst_ratio, worst_df, worst_f);
        free(scratch);

        /* f32 file -> F64 -> save: the rounded values written exactly as
         * f64, which loads to the same matrix. */
        CHECK(lk_model_set_projection_encoding(l32m, LK_MODEL_F64, &e) == LK_OK, "to f64");
        uint8_t *wide = NULL;
        size_t lw = 0;
        CHECK(lk_model_serialise(l32m, &wide, &lw, &e) == LK_OK && lw == l64, "widened size");
        lk_model *wm = wide ? lk_model_load_bytes(wide, lw, &e) : NULL;
        CHECK(wm && lk_model_projection_encoding(wm) == LK_MODEL_F64, "widened loads");
        if (wm)
            check_equal(m32, wm, "widened");
        lk_model_free(wm);
        free(wide);
        /* f64 model -> F32: rounded in place, then the f32 bytes. */
        CHECK(lk_model_set_projection_encoding(l64m, LK_MODEL_F32, &e) == LK_OK, "to f32");
        lk_model_projection(l64m, NULL, NULL, NULL, &g64);
        CHECK(same_doubles(g64, W32, K * D), "switching to f32 rounds W");
        CHECK(lk_model_set_projection_encoding(l64m, (lk_model_proj_encoding)3, &e) ==
                  LK_ERR_INVALID_ARGUMENT, "unknown encoding refused");
    }
    lk_model_free(l64m);
    lk_model_free(l32m);

    /* Crafted PROJ.encoding values, checksum redone. */
    uint8_t *c = malloc(l64 > l32 ? l64 : l32);
    memcpy(c, b32, l32);
    put32(c + p32 + 24, 0);
    reseal(c, l32);
    CHECK(load_code(c, l32, &e) == LK_ERR_MODEL_FORMAT && strstr(e.message, "PROJ.encoding") &&
              strstr(e.message, "corrupt"), "encoding 0: %s", e.message);
    put32(c + p32 + 24, 3);
    reseal(c, l32);
    CHECK(load_code(c, l32, &e) == LK_ERR_MODEL_FORMAT && strstr(e.message, "upgrade"),
          "encoding 3: %s", e.message);
    put32(c + p32 + 24, 1); /* f64 claimed, f32-sized payload */
    reseal(c, l32);
    CHECK(load_code(c, l32, &e) == LK_ERR_MODEL_FORMAT && strstr(e.message, "PROJ"),
          "f64 with f32 length: %s", e.message);
    memcpy(c, b64, l64);
    put32(c + p64 + 24, 2); /* f32 claimed, f64-sized payload */
    reseal(c, l64);
    CHECK(load_code(c, l64, &e) == LK_ERR_MODEL_FORMAT && strstr(e.message, "PROJ"),
          "f32 with f64 length: %s", e.message);
    /* Non-finite binary32 values (IEEE 754: exponent all ones). */
    static const uint32_t nonfinite[2] = {0x7fc00000u, 0xff800000u};
    for (int i = 0; i < 2; i++) {
        memcpy(c, b32, l32);
        size_t at = p32 + 28 + 8 * D + 4; /* matrix[1] */
        put32(c + at, nonfinite[i]);
        reseal(c, l32);
        char want[64];
        snprintf(want, sizeof want, "offset %zu", at);
        CHECK(load_code(c, l32, &e) == LK_ERR_MODEL_FORMAT && strstr(e.message, "PROJ.matrix[1]") &&
                  strstr(e.message, want), "non-finite f32 %08x: %s", nonfinite[i], e.message);
    }
    free(c);
    /* The robustness sweeps on the f64 layout too (the f32 one is swept in main). */
    robustness(b64, l64);
out:
    free(b64);
    free(b32);
    free(mu);
    free(W);
    free(W32);
    lk_model_free(m64);
    lk_model_free(m32);
}

int main(void)
{
    if (sodium_init() < 0)
        LK_SKIP("libsodium could not initialise");
    /* Case 0 (normalisation on) gets the robustness sweeps; case 4 has k > d
     * so the normalisation's scratch (k) is larger than the difference's (d). */
    static const struct { size_t d, k; bool proj, stdz, l2; } cases[] = {
        {40, 12, true, true, true},   {40, 12, true, true, false}, {24, 0, false, true, false},
        {24, 0, false, false, false}, {10, 16, true, true, true},  {40, 12, true, false, true}};
    uint8_t *kept[3] = {NULL, NULL, NULL};
    size_t kept_len[3] = {0, 0, 0};
    for (size_t ci = 0; ci < sizeof cases / sizeof cases[0]; ci++) {
        lk_model *m = build(cases[ci].d, cases[ci].k ? cases[ci].k : 1, cases[ci].proj,
                            cases[ci].stdz, cases[ci].l2, 1000 + ci);
        CHECK(m != NULL, "build case %zu", ci);
        if (!m)
            continue;
        lk_error e;
        CHECK(lk_model_validate(m, &e) == LK_OK, "valid: %s", e.message);
        uint8_t *bytes = NULL;
        size_t len = 0;
        CHECK(lk_model_serialise(m, &bytes, &len, &e) == LK_OK, "serialise: %s", e.message);
        lk_model *l = lk_model_load_bytes(bytes, len, &e);
        CHECK(l != NULL, "load bytes: %s", e.message);
        if (l) {
            check_equal(m, l, "bytes");
            uint8_t *again = NULL;
            size_t len2 = 0;
            CHECK(lk_model_serialise(l, &again, &len2, &e) == LK_OK && len2 == len &&
                      memcmp(again, bytes, len) == 0,
                  "re-serialised bytes identical");
            free(again);
            CHECK(strlen(lk_model_checksum(l)) == 64, "checksum hex");
            scoring(l, 77 + ci);
        }
        if (ci == 1)
            robustness(bytes, len); /* the same sweeps without PRNM */
        if (ci <= 2) {
            kept[ci] = bytes;
            kept_len[ci] = len;
            bytes = NULL;
        }
        if (ci == 0) {
            char dir[] = "/tmp/lk_model_test_XXXXXX";
            CHECK(mkdtemp(dir) != NULL, "mkdtemp");
            char path[128];
            snprintf(path, sizeof path, "%s/m.lkmodel", dir);
            CHECK(lk_model_save(m, path, &e) == LK_OK, "save: %s", e.message);
            CHECK(lk_model_save(m, path, &e) == LK_OK, "save over: %s", e.message);
            lk_model *f = lk_model_load(path, &e);
            CHECK(f != NULL, "load file: %s", e.message);
            if (f) {
                check_equal(m, f, "file");
                lk_model_free(f);
            }
            int entries = 0;
            DIR *dh = opendir(dir);
            for (struct dirent *de; dh && (de = readdir(dh));)
                if (de->d_name[0] != '.')
                    entries++;
            if (dh)
                closedir(dh);
            CHECK(entries == 1, "no temporary file left (%d entries)", entries);
            unlink(path);
            rmdir(dir);
            CHECK(lk_model_load(path, &e) == NULL && e.code == LK_ERR_IO, "missing file: io");
            robustness(kept[0], kept_len[0]);
            crafted(kept[0], kept_len[0]);
            api_checks(m);
            threads(m);
        }
        lk_model_free(l);
        free(bytes);
        lk_model_free(m);
    }
    if (kept[0] && kept[1] && kept[2])
        prnm_checks(kept[0], kept_len[0], kept[1], kept_len[1], kept[2], kept_len[2]);
    for (int i = 0; i < 3; i++)
        free(kept[i]);
    zero_and_huge();
    encodings();
    lk_model *empty = lk_model_new();
    lk_error e;
    CHECK(lk_model_save(empty, "/tmp/never-written.lkmodel", &e) == LK_ERR_INVALID_ARGUMENT,
          "incomplete model not saved");
    lk_model_free(empty);
    return lk_test_done();
}
