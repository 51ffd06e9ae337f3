/* One loaded cascade shared by several threads: concurrent lk_detect calls
 * on the same cascade must each give the result of a lone call (the cascade
 * is read-only; every call owns its work buffers). Input: the Solvay
 * photograph from ../shared (skipped when absent), cropped to keep the
 * sanitizer build quick. */
#include "likeness/face.h"
#include "likeness/image.h"
#include "lk_test.h"

#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

typedef struct job {
    const lk_cascade *c;
    const lk_image *g;
    lk_rect *r;
    int n;
    lk_code rc;
} job;

static void *run(void *arg)
{
    job *j = arg;
    lk_detect_params p;
    lk_detect_params_default(&p);
    p.max_long_side = 0;
    j->rc = lk_detect(j->c, j->g, &p, &j->r, &j->n, NULL);
    return NULL;
}

int main(void)
{
    char img_path[1024], cas_path[1024];
    const char *dir = getenv("LIKENESS_CASCADE_DIR");
    snprintf(img_path, sizeof img_path, "%s/reference/solvay-1927/1280px-Solvay_conference_1927.png",
             lk_test_shared());
    snprintf(cas_path, sizeof cas_path, "%s/haarcascades/haarcascade_frontalface_alt.xml",
             dir && *dir ? dir : LIKENESS_CASCADE_DIR);
    lk_error e = {0};
    lk_image *rgb = NULL;
    if (lk_image_load(img_path, NULL, &rgb, &e) != LK_OK)
        LK_SKIP("cannot load %s: %s", img_path, e.message);
    lk_cascade *c = lk_cascade_load(cas_path, &e);
    if (!c)
        LK_SKIP("cannot load %s: %s", cas_path, e.message);
    lk_image *full = lk_image_to_gray(rgb, LK_LUMA_BT601, &e);
    lk_image_free(rgb);
    if (!full) {
        CHECK(0, "gray conversion: %s", e.message);
        return lk_test_done();
    }
    /* The front rows of the photograph: a band of 400x200 with several faces. */
    lk_image *g = lk_image_new(400, 200, 1, &e);
    for (int y = 0; g && y < 200; y++)
        memcpy(g->data + (size_t)y * 400, full->data + (size_t)(420 + y) * (size_t)full->width + 400,
               400);
    lk_image_free(full);

    job solo = {c, g, NULL, 0, LK_OK};
    run(&solo);
    CHECK(solo.rc == LK_OK, "lone call failed");
    enum { T = 4 };
    job jobs[T];
    pthread_t th[T];
    for (int i = 0; i < T; i++) {
        jobs[i] = (job){c, g, NULL, 0, LK_OK};
        CHECK(pthread_create(&th[i], NULL, run, &jobs[i]) == 0, "pthread_create");
    }
    for (int i = 0; i < T; i++) {
        pthread_join(th[i], NULL);
        CHECK(jobs[i].rc == LK_OK && jobs[i].n == solo.n &&
                  (solo.n == 0 || memcmp(jobs[i].r, solo.r, sizeof *solo.r * (size_t)solo.n) == 0),
              "thread %d: %d boxes vs %d alone", i, jobs[i].n, solo.n);
        free(jobs[i].r);
    }
    fprintf(stderr, "%d boxes in each of %d concurrent calls\n", solo.n, T);
    free(solo.r);
    lk_image_free(g);
    lk_cascade_free(c);
    return lk_test_done();
}
