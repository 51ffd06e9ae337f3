/* Model file round trip and robustness: a built model saved and loaded keeps
 * every field bit for bit; scoring follows the formula written in
 * docs/model-format.md (computed here directly from that text, with the
 * mean kept in, in long double); every truncation and every single-byte
 * change of a file is refused with LK_ERR_MODEL_FORMAT and never crashes
 * (ASan/UBSan and valgrind watch for the crash part); crafted files with a
 * valid checksum exercise the field checks. The checksum itself is checked
 * against Python's hashlib in tests/ref/check_model_blake2b.py. */
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

static lk_model *build(size_t d, size_t k, bool proj, bool stdz, uint64_t seed)
{
    uint64_t s = seed;
    lk_error e;
    lk_model *m = lk_model_new();
    if (!m)
        return NULL;
    size_t n = proj ? k : d;
    double *mean = malloc(d * sizeof *mean), *w = malloc(k * d * sizeof *w);
    double *sm = malloc(n * sizeof *sm), *ss = malloc(n * sizeof *ss), *sv = malloc(n * sizeof *sv);
    for (size_t i = 0; i < d; i++)
        mean[i] = rng_unit(&s);
    for (size_t i = 0; i < k * d; i++)
        w[i] = rng_unit(&s) / sqrt((double)d);
    for (size_t i = 0; i < n; i++) {
        sm[i] = 0.5 + rng_unit(&s) * 0.1;
        ss[i] = 0.75 + 0.5 * rng_unit(&s);
        sv[i] = rng_unit(&s);
    }
    int bad = 0;
    bad |= lk_model_set_features(m, "crop=96x112;hog=cell8,bins9;lbp=u2", d, &e);
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

/* The formula of docs/model-format.md "Scoring", step by step, with the
 * projection mean applied to each vector as written (the library cancels it). */
static void direct_score(const lk_model *m, const float *a, const float *b, long double *f,
                         long double *p)
{
    size_t d = lk_model_feature_dim(m), k = d, n;
    const double *mu = NULL, *W = NULL, *sm = NULL, *ss = NULL, *w;
    bool proj = lk_model_projection(m, &k, NULL, &mu, &W);
    bool stdz = lk_model_standardisation(m, &n, &sm, &ss);
    double bias, A, B;
    lk_model_svm(m, &n, &w, &bias);
    lk_model_platt(m, &A, &B);
    long double acc = bias;
    for (size_t i = 0; i < k; i++) {
        long double ya = 0, yb = 0;
        if (proj) {
            for (size_t j = 0; j < d; j++) {
                ya += (long double)W[i * d + j] * ((long double)a[j] - mu[j]);
                yb += (long double)W[i * d + j] * ((long double)b[j] - mu[j]);
            }
        } else {
            ya = a[i];
            yb = b[i];
        }
        long double z = (ya - yb) * (ya - yb);
        if (stdz)
            z = (z - sm[i]) / ss[i];
        acc += w[i] * z;
    }
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
        direct_score(m, a, b, &df, &dp);
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

int main(void)
{
    if (sodium_init() < 0)
        LK_SKIP("libsodium could not initialise");
    static const struct { size_t d, k; bool proj, stdz; } cases[] = {
        {40, 12, true, true}, {40, 12, true, false}, {24, 0, false, true}, {24, 0, false, false}};
    for (size_t ci = 0; ci < sizeof cases / sizeof cases[0]; ci++) {
        lk_model *m = build(cases[ci].d, cases[ci].k ? cases[ci].k : 1, cases[ci].proj,
                            cases[ci].stdz, 1000 + ci);
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
            robustness(bytes, len);
            crafted(bytes, len);
            api_checks(m);
            threads(m);
        }
        lk_model_free(l);
        free(bytes);
        lk_model_free(m);
    }
    lk_model *empty = lk_model_new();
    lk_error e;
    CHECK(lk_model_save(empty, "/tmp/never-written.lkmodel", &e) == LK_ERR_INVALID_ARGUMENT,
          "incomplete model not saved");
    lk_model_free(empty);
    return lk_test_done();
}
