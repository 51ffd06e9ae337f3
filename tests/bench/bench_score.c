/* Time to score one pair with a model, single thread: projection of both
 * feature vectors, normalisation, squared difference, SVM, Platt.
 *   bench_score MODEL IMAGE_A IMAGE_B [REPEAT]
 * Not a test: run it by hand on a release build. */
#include <stdio.h>
#include <stdlib.h>
#include <time.h>

#include "likeness/engine.h"

static double now_ms(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec * 1e3 + ts.tv_nsec * 1e-6;
}

static int cmp_d(const void *a, const void *b)
{
    double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

int main(int argc, char **argv)
{
    if (argc < 4) {
        fprintf(stderr, "usage: bench_score MODEL IMAGE_A IMAGE_B [REPEAT]\n");
        return 2;
    }
    int repeat = argc > 4 ? atoi(argv[4]) : 200;
    if (repeat < 1)
        repeat = 1;
    lk_error err;
    lk_model *m = lk_model_load(argv[1], &err);
    lk_engine *e = m ? lk_engine_new(NULL, &err) : NULL;
    if (!e) {
        fprintf(stderr, "bench_score: %s\n", err.message);
        return 1;
    }
    size_t dim = lk_engine_feature_dim(e);
    float *f[2] = {malloc(dim * sizeof(float)), malloc(dim * sizeof(float))};
    for (int k = 0; k < 2; k++) {
        uint8_t *bytes;
        size_t len;
        lk_analysis a;
        if (lk_read_file(argv[2 + k], 0, &bytes, &len, &err) != LK_OK ||
            lk_engine_analyse(e, bytes, len, &a, f[k], NULL, &err) != LK_OK || !a.has_features) {
            fprintf(stderr, "bench_score: %s: no features (%s)\n", argv[2 + k], err.message);
            return 1;
        }
        free(bytes);
    }
    double *t = malloc((size_t)repeat * sizeof *t);
    lk_comparison c = {0};
    for (int i = 0; i < repeat; i++) {
        double t0 = now_ms();
        if (lk_engine_compare(e, m, f[0], f[1], 0, &c, &err) != LK_OK) {
            fprintf(stderr, "bench_score: %s\n", err.message);
            return 1;
        }
        t[i] = now_ms() - t0;
    }
    qsort(t, (size_t)repeat, sizeof *t, cmp_d);
    printf("scoring one pair (feature dimension %zu, pair dimension %zu): median %.3f ms, "
           "min %.3f ms over %d runs (score %.4f)\n", dim, lk_model_pair_dim(m),
           t[repeat / 2], t[0], repeat, c.score);
    free(t);
    free(f[0]);
    free(f[1]);
    lk_engine_free(e);
    lk_model_free(m);
    return 0;
}
