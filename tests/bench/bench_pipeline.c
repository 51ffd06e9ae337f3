/* Per-stage timing of the face pipeline, single thread: decode, detection
 * (with eyes), alignment (with quality), features. Not a test: run it by
 * hand on a release build and read the table.
 *   bench_pipeline [LFW_DIR] [N_IMAGES]
 * Images: the first N_IMAGES identities' first image of LFW (sorted by name),
 * and a 1920x1080 JPEG composed here from one LFW photo (scaled x3 onto a
 * gray canvas), the size of a full-HD capture. */
#include <dirent.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <turbojpeg.h>

#include "likeness/engine.h"

static int cmp_d(const void *a, const void *b)
{
    double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

static double median(double *v, size_t n)
{
    qsort(v, n, sizeof *v, cmp_d);
    return n ? (n % 2 ? v[n / 2] : 0.5 * (v[n / 2 - 1] + v[n / 2])) : 0;
}

static int cmp_s(const void *a, const void *b)
{
    return strcmp(*(char *const *)a, *(char *const *)b);
}

static uint8_t *compose_hd(const lk_image *face, unsigned long *len)
{
    const int W = 1920, H = 1080, s = 3;
    uint8_t *px = malloc((size_t)W * H * 3);
    if (!px)
        return NULL;
    memset(px, 118, (size_t)W * H * 3);
    int ox = (W - face->width * s) / 2, oy = (H - face->height * s) / 2;
    for (int y = 0; y < face->height * s; y++)
        for (int x = 0; x < face->width * s; x++)
            for (int c = 0; c < 3; c++)
                px[((size_t)(oy + y) * W + ox + x) * 3 + c] =
                    face->data[((size_t)(y / s) * face->width + x / s) * 3 + c];
    tjhandle tj = tjInitCompress();
    uint8_t *jpeg = NULL;
    *len = 0;
    if (tjCompress2(tj, px, W, 0, H, TJPF_RGB, &jpeg, len, TJSAMP_420, 90, 0) != 0) {
        fprintf(stderr, "compose: %s\n", tjGetErrorStr2(tj));
        jpeg = NULL;
    }
    tjDestroy(tj);
    free(px);
    return jpeg;
}

static void run(const lk_engine *e, const char *label, uint8_t **bytes, size_t *lens, size_t n,
                int repeat, float *feat)
{
    size_t total = n * (size_t)repeat;
    double *st[LK_STAGE_COUNT + 1];
    for (int s = 0; s <= LK_STAGE_COUNT; s++)
        st[s] = calloc(total, sizeof(double));
    size_t m = 0, faces = 0;
    for (int r = 0; r < repeat; r++)
        for (size_t i = 0; i < n; i++) {
            lk_analysis a;
            lk_error err;
            if (lk_engine_analyse(e, bytes[i], lens[i], &a, feat, NULL, &err) != LK_OK)
                continue;
            double sum = 0;
            for (int s = 0; s < LK_STAGE_COUNT; s++) {
                st[s][m] = a.stage_ms[s];
                sum += a.stage_ms[s];
            }
            st[LK_STAGE_COUNT][m] = sum;
            faces += a.has_features;
            m++;
        }
    printf("%-28s %6zu %9.2f %9.2f %9.2f %9.2f %9.2f   (%zu of %zu with a face)\n", label, m,
           median(st[0], m), median(st[1], m), median(st[2], m), median(st[3], m),
           median(st[4], m), faces, m);
    for (int s = 0; s <= LK_STAGE_COUNT; s++)
        free(st[s]);
}

int main(int argc, char **argv)
{
    const char *shared = getenv("LIKENESS_SHARED");
    char root[4096];
    if (argc > 1)
        snprintf(root, sizeof root, "%s", argv[1]);
    else
        snprintf(root, sizeof root, "%s/datasets/lfw/lfw-deepfunneled", shared ? shared : "../shared");
    size_t want = argc > 2 ? strtoul(argv[2], NULL, 10) : 200;
    DIR *d = opendir(root);
    if (!d) {
        fprintf(stderr, "bench_pipeline: no LFW at %s; pass its path\n", root);
        return 77;
    }
    char **names = NULL;
    size_t nn = 0, cap = 0;
    struct dirent *de;
    while ((de = readdir(d))) {
        if (de->d_name[0] == '.')
            continue;
        if (nn == cap) {
            cap = cap ? cap * 2 : 1024;
            names = realloc(names, cap * sizeof *names);
        }
        names[nn++] = strdup(de->d_name);
    }
    closedir(d);
    qsort(names, nn, sizeof *names, cmp_s);
    if (want > nn)
        want = nn;
    uint8_t **bytes = calloc(want + 1, sizeof *bytes);
    size_t *lens = calloc(want + 1, sizeof *lens);
    lk_error err;
    size_t n = 0;
    for (size_t i = 0; i < want; i++) {
        char p[8300];
        snprintf(p, sizeof p, "%s/%s/%s_0001.jpg", root, names[i], names[i]);
        if (lk_read_file(p, 0, &bytes[n], &lens[n], &err) == LK_OK)
            n++;
    }
    lk_engine *e = lk_engine_new(NULL, &err);
    if (!e) {
        fprintf(stderr, "bench_pipeline: %s\n", err.message);
        return 1;
    }
    float *feat = malloc(lk_engine_feature_dim(e) * sizeof *feat);
    printf("median milliseconds per image, one thread\n");
    printf("%-28s %6s %9s %9s %9s %9s %9s\n", "input", "runs", "decode", "detect", "align",
           "features", "total");
    run(e, "LFW 250x250 JPEG", bytes, lens, n, 1, feat);

    lk_image *face = NULL;
    unsigned long hd_len = 0;
    uint8_t *hd = NULL;
    if (n && lk_image_decode(bytes[0], lens[0], NULL, &face, &err) == LK_OK)
        hd = compose_hd(face, &hd_len);
    if (hd) {
        size_t l = hd_len;
        run(e, "composed 1920x1080 JPEG", &hd, &l, 1, 20, feat);
        tjFree(hd);
    }
    lk_image_free(face);
    free(feat);
    lk_engine_free(e);
    for (size_t i = 0; i < n; i++)
        free(bytes[i]);
    for (size_t i = 0; i < nn; i++)
        free(names[i]);
    free(names);
    free(bytes);
    free(lens);
    return 0;
}
