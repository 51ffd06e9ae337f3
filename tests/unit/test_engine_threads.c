/* The engine is shared read-only across threads: features computed by
 * several threads at once must equal, bit for bit, those computed by one
 * thread (the determinism the service relies on when it scales to cores).
 * Inputs: LFW images from ../shared (Huang et al., UMass TR 07-49, 2007). */
#include <dirent.h>
#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "likeness/engine.h"
#include "lk_test.h"

enum { N_IMAGES = 24, N_THREADS = 4 };

typedef struct shared {
    const lk_engine *e;
    uint8_t *bytes[N_IMAGES];
    size_t len[N_IMAGES];
    size_t dim;
    float *serial;   /* N_IMAGES x dim */
    float *parallel; /* N_THREADS x N_IMAGES x dim */
    int has[N_IMAGES];
    int fails;
} shared;

typedef struct targ {
    shared *s;
    int t;
} targ;

static void *run(void *p)
{
    targ *a = p;
    shared *s = a->s;
    /* Each thread walks the images in a different order, so different
     * images are in flight together. */
    for (int k = 0; k < N_IMAGES; k++) {
        int i = (k + a->t * 7) % N_IMAGES; /* a rotation: every image, once */
        lk_analysis an;
        lk_error err;
        float *out = s->parallel + ((size_t)a->t * N_IMAGES + i) * s->dim;
        if (lk_engine_analyse(s->e, s->bytes[i], s->len[i], &an, out, NULL, &err) != LK_OK)
            __atomic_add_fetch(&s->fails, 1, __ATOMIC_RELAXED);
    }
    return NULL;
}

int main(void)
{
    char root[4096];
    snprintf(root, sizeof root, "%s/datasets/lfw/lfw-deepfunneled", lk_test_shared());
    DIR *d = opendir(root);
    if (!d)
        LK_SKIP("LFW is not at %s (set LIKENESS_SHARED)", root);
    closedir(d);
    /* A fixed list of identities with several images (LFW people.txt). */
    static const char *const people[] = {"George_W_Bush", "Colin_Powell", "Tony_Blair",
                                         "Donald_Rumsfeld", "Gerhard_Schroeder", "Ariel_Sharon"};
    lk_error err;
    lk_engine *e = lk_engine_new(NULL, &err);
    if (!e) {
        fprintf(stderr, "engine: %s\n", err.message);
        return 1;
    }
    shared s = {.e = e, .dim = lk_engine_feature_dim(e)};
    for (int i = 0; i < N_IMAGES; i++) {
        char path[4200];
        const char *name = people[i % 6];
        snprintf(path, sizeof path, "%s/%s/%s_%04d.jpg", root, name, name, 1 + i / 6);
        if (lk_read_file(path, 0, &s.bytes[i], &s.len[i], &err) != LK_OK)
            LK_SKIP("cannot read %s: %s", path, err.message);
    }
    s.serial = calloc((size_t)N_IMAGES * s.dim, sizeof(float));
    s.parallel = calloc((size_t)N_THREADS * N_IMAGES * s.dim, sizeof(float));
    CHECK(s.serial && s.parallel, "allocation");
    int with_face = 0;
    for (int i = 0; i < N_IMAGES; i++) {
        lk_analysis an;
        CHECK(lk_engine_analyse(e, s.bytes[i], s.len[i], &an, s.serial + i * s.dim, NULL, &err) ==
                  LK_OK, "serial analysis %d: %s", i, err.message);
        s.has[i] = an.has_features;
        with_face += an.has_features;
    }
    /* LFW images each show a centred face; the detector should find nearly all. */
    CHECK(with_face >= N_IMAGES - 2, "faces found in %d of %d LFW images", with_face, N_IMAGES);
    pthread_t tid[N_THREADS];
    targ args[N_THREADS];
    for (int t = 0; t < N_THREADS; t++) {
        args[t] = (targ){&s, t};
        CHECK(pthread_create(&tid[t], NULL, run, &args[t]) == 0, "thread %d", t);
    }
    for (int t = 0; t < N_THREADS; t++)
        pthread_join(tid[t], NULL);
    CHECK(s.fails == 0, "%d parallel analyses failed", s.fails);
    int differ = 0;
    for (int t = 0; t < N_THREADS; t++)
        for (int i = 0; i < N_IMAGES; i++)
            if (s.has[i] && memcmp(s.serial + i * s.dim,
                                   s.parallel + ((size_t)t * N_IMAGES + i) * s.dim,
                                   s.dim * sizeof(float)) != 0)
                differ++;
    CHECK(differ == 0, "%d of %d parallel feature vectors differ from the serial ones", differ,
          N_THREADS * N_IMAGES);
    printf("%d images (%d with a face), %d threads, dimension %zu: %d vectors differ\n",
           N_IMAGES, with_face, N_THREADS, s.dim, differ);
    for (int i = 0; i < N_IMAGES; i++)
        free(s.bytes[i]);
    free(s.serial);
    free(s.parallel);
    lk_engine_free(e);
    return lk_test_done();
}
