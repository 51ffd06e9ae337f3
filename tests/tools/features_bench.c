/* lkt_features_bench: time of lk_extractor_run with the default config.
 *
 *   lkt_features_bench [IMAGE [ITERATIONS]]
 *
 * Uses the central crop (default crop size) of IMAGE's gray version, or a
 * synthetic texture without one. Prints the mean milliseconds per crop.
 * A measurement only: nothing here asserts a time. */
#include "likeness/features.h"
#include "likeness/image.h"

#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

/* CPU time of this process: on a shared machine wall time mostly measures
 * the other jobs. */
static double now_s(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_PROCESS_CPUTIME_ID, &ts);
    return (double)ts.tv_sec + ts.tv_nsec * 1e-9;
}

int main(int argc, char **argv)
{
    const lk_feature_config cfg = lk_feature_config_default();
    const int iters = argc > 2 ? atoi(argv[2]) : 500;
    lk_error err;
    lk_extractor *ex = lk_extractor_new(&cfg, &err);
    lk_image *crop = lk_image_new(cfg.crop_width, cfg.crop_height, 1, &err);
    if (!ex || !crop || iters <= 0) {
        fprintf(stderr, "lkt_features_bench: %s\n", err.message);
        return 1;
    }
    lk_image *rgb = NULL;
    if (argc > 1 && lk_image_load(argv[1], NULL, &rgb, &err) == LK_OK &&
        rgb->width >= cfg.crop_width && rgb->height >= cfg.crop_height) {
        lk_image *g = lk_image_to_gray(rgb, LK_LUMA_BT601, &err);
        const int x0 = (g->width - cfg.crop_width) / 2, y0 = (g->height - cfg.crop_height) / 2;
        for (int y = 0; y < cfg.crop_height; y++)
            memcpy(crop->data + (size_t)y * cfg.crop_width,
                   g->data + (size_t)(y + y0) * g->width + x0, (size_t)cfg.crop_width);
        lk_image_free(g);
    } else {
        unsigned s = 1;
        for (size_t i = 0; i < (size_t)cfg.crop_width * cfg.crop_height; i++) {
            s = s * 1103515245u + 12345u;
            crop->data[i] = (uint8_t)(s >> 24);
        }
    }
    lk_image_free(rgb);
    const size_t dim = lk_extractor_dim(ex);
    float *out = malloc(dim * sizeof *out);
    lk_extractor_workspace *ws = lk_extractor_workspace_new(ex, &err);
    if (!out || !ws) {
        fprintf(stderr, "lkt_features_bench: out of memory\n");
        return 1;
    }
    lk_extractor_run(ex, crop, out, NULL); /* warm-up */
    for (int mode = 0; mode < 2; mode++) {
        const double t0 = now_s();
        for (int i = 0; i < iters; i++) {
            const lk_code rc = mode ? lk_extractor_run_ws(ex, ws, crop, out, &err)
                                    : lk_extractor_run(ex, crop, out, &err);
            if (rc != LK_OK) {
                fprintf(stderr, "lkt_features_bench: %s\n", err.message);
                return 1;
            }
        }
        const double t = now_s() - t0;
        printf("%s: dim %zu, %.3f ms CPU time per %dx%d crop (mean of %d)\n",
               mode ? "lk_extractor_run_ws" : "lk_extractor_run", dim, 1e3 * t / iters,
               cfg.crop_width, cfg.crop_height, iters);
    }
    lk_extractor_workspace_free(ws);
    free(out);
    lk_image_free(crop);
    lk_extractor_free(ex);
    return 0;
}
