/* Drives the model module for tests/ref/check_model_blake2b.py:
 *   lkt_model_dump make <out> <seed> <d> <k> <stdz> [l2 [enc]]   random model (k = 0: no
 *       projection; l2 = 1: L2 normalisation of the projected vector; enc = f32 (the
 *       library's default) or f64: the projection encoding)
 *   lkt_model_dump json <model>                       lk_model_to_json
 *   lkt_model_dump score <model> <pairs.f32>          one "svm probability" line per pair;
 *       the file holds float32 little-endian vectors a0 b0 a1 b1 ... of dimension d
 *   lkt_model_dump project <model> <vecs.f32>        lk_model_project, one line per vector
 * Errors go to stderr as "<code name>: <message>", exit status 2. */
#include "likeness/model.h"

#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

static int fail(const lk_error *e)
{
    fprintf(stderr, "%s: %s\n", lk_code_name(e->code), e->message);
    return 2;
}

/* splitmix64 (Steele, Lea & Flood 2014). */
static double rnd(uint64_t *s)
{
    uint64_t z = (*s += 0x9e3779b97f4a7c15ULL);
    z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
    z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
    z ^= z >> 31;
    return (double)(z >> 11) * 0x1.0p-52 - 1.0;
}

static int make(const char *out, uint64_t seed, size_t d, size_t k, int stdz, int l2,
                const char *enc)
{
    lk_error e;
    lk_model *m = lk_model_new();
    if (!m)
        return 2;
    if (enc && strcmp(enc, "f64") && strcmp(enc, "f32")) {
        fprintf(stderr, "invalid_argument: encoding %s is neither f32 nor f64\n", enc);
        lk_model_free(m);
        return 2;
    }
    size_t n = k ? k : d;
    double *mean = malloc(d * sizeof *mean), *w = malloc((k ? k : 1) * d * sizeof *w);
    double *sm = malloc(n * sizeof *sm), *ss = malloc(n * sizeof *ss), *sv = malloc(n * sizeof *sv);
    for (size_t i = 0; i < d; i++)
        mean[i] = 0.3 * rnd(&seed);
    for (size_t i = 0; i < k * d; i++)
        w[i] = rnd(&seed) / sqrt((double)d);
    for (size_t i = 0; i < n; i++) {
        sm[i] = 0.4 + 0.1 * rnd(&seed);
        ss[i] = 0.75 + 0.5 * rnd(&seed);
        sv[i] = -fabs(rnd(&seed)) / sqrt((double)n); /* far apart = impostor */
    }
    if (l2) /* unit vectors: pair values about 4/k, so rescale to keep scores spread */
        for (size_t i = 0; i < n; i++) {
            sm[i] /= (double)n;
            ss[i] /= (double)n;
            if (!stdz)
                sv[i] *= (double)n;
        }
    const lk_model_operating_point rows[2] = {
        {1e-3, 0.8, 0.9, 1e-3, 0.2, 100000, 2000, true},
        {1e-2, 0.5, 0.1, 1.2e-2, 0.08, 100000, 2000, false},
    };
    lk_model_provenance p = {"synthetic \xe2\x9c\x93", 1000, 200, 500, "2026-12-02T05:00:00Z",
                             "lkt_model_dump make", "0.1.0"};
    lk_code c = lk_model_set_features(m, "crop=96x112;hog=cell8,bins9", d, &e);
    if (!c && enc && strcmp(enc, "f64") == 0)
        c = lk_model_set_projection_encoding(m, LK_MODEL_F64, &e);
    if (!c && k)
        c = lk_model_set_projection(m, k, d, mean, w, &e);
    if (!c && l2)
        c = lk_model_set_projection_norm(m, LK_PROJ_NORM_L2, &e);
    if (!c && stdz)
        c = lk_model_set_standardisation(m, n, sm, ss, &e);
    if (!c)
        c = lk_model_set_svm(m, n, sv, 1.5 + rnd(&seed), &e);
    if (!c)
        c = lk_model_set_platt(m, -2.0 + 0.5 * rnd(&seed), 0.25 * rnd(&seed), &e);
    if (!c)
        c = lk_model_set_operating_points(m, rows, 2, 1e-3, &e);
    if (!c)
        c = lk_model_set_provenance(m, &p, &e);
    if (!c)
        c = lk_model_save(m, out, &e);
    free(mean);
    free(w);
    free(sm);
    free(ss);
    free(sv);
    lk_model_free(m);
    return c ? fail(&e) : 0;
}

static int score(const char *model, const char *pairs)
{
    lk_error e;
    lk_model *m = lk_model_load(model, &e);
    if (!m)
        return fail(&e);
    size_t d = lk_model_feature_dim(m);
    FILE *f = fopen(pairs, "rb");
    if (!f) {
        perror(pairs);
        lk_model_free(m);
        return 2;
    }
    float *a = malloc(d * sizeof *a), *b = malloc(d * sizeof *b);
    double *scratch = malloc(lk_model_scratch_size(m) * sizeof *scratch);
    int rc = 0;
    /* The check runs on little-endian machines, where float32 LE is the
     * in-memory layout. */
    while (fread(a, sizeof *a, d, f) == d) {
        if (fread(b, sizeof *b, d, f) != d) {
            fprintf(stderr, "odd number of vectors in %s\n", pairs);
            rc = 2;
            break;
        }
        double s, p;
        if (lk_model_score(m, a, b, scratch, &s, &p, &e)) {
            rc = fail(&e);
            break;
        }
        printf("%.17g %.17g\n", s, p);
    }
    fclose(f);
    free(a);
    free(b);
    free(scratch);
    lk_model_free(m);
    return rc;
}

static int project(const char *model, const char *vecs)
{
    lk_error e;
    lk_model *m = lk_model_load(model, &e);
    if (!m)
        return fail(&e);
    size_t d = lk_model_feature_dim(m), k = lk_model_pair_dim(m);
    FILE *f = fopen(vecs, "rb");
    if (!f) {
        perror(vecs);
        lk_model_free(m);
        return 2;
    }
    float *x = malloc(d * sizeof *x);
    double *y = malloc(k * sizeof *y);
    int rc = 0;
    while (fread(x, sizeof *x, d, f) == d) {
        if (lk_model_project(m, x, y, &e)) {
            rc = fail(&e);
            break;
        }
        for (size_t i = 0; i < k; i++)
            printf("%.17g%c", y[i], i + 1 < k ? ' ' : '\n');
    }
    fclose(f);
    free(x);
    free(y);
    lk_model_free(m);
    return rc;
}

int main(int argc, char **argv)
{
    if (argc >= 7 && argc <= 9 && strcmp(argv[1], "make") == 0)
        return make(argv[2], strtoull(argv[3], NULL, 10), strtoul(argv[4], NULL, 10),
                    strtoul(argv[5], NULL, 10), atoi(argv[6]), argc >= 8 ? atoi(argv[7]) : 0,
                    argc == 9 ? argv[8] : NULL);
    if (argc == 4 && strcmp(argv[1], "project") == 0)
        return project(argv[2], argv[3]);
    if (argc == 3 && strcmp(argv[1], "json") == 0) {
        lk_error e;
        lk_model *m = lk_model_load(argv[2], &e);
        if (!m)
            return fail(&e);
        char *s = lk_model_to_json(m);
        lk_model_free(m);
        if (!s)
            return 2;
        puts(s);
        free(s);
        return 0;
    }
    if (argc == 4 && strcmp(argv[1], "score") == 0)
        return score(argv[2], argv[3]);
    fprintf(stderr, "usage: %s make <out> <seed> <d> <k> <stdz> [l2 [f32|f64]] | json <model> | score "
                    "<model> <pairs.f32> | project <model> <vecs.f32>\n", argv[0]);
    return 2;
}
