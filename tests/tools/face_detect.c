/* lkt_face_detect: drives the face module for the Python checks.
 *
 *   lkt_face_detect CASCADE.xml IMAGE... [--scale F] [--neighbors N] [--min-size N]
 *                   [--max-size N] [--max-long-side N] [--repeat N] [--dump-gray OUT.png]
 *       one box per line "x y w h neighbors" (primary first); with several
 *       images, each image's boxes follow a line "== PATH". --repeat times
 *       the detection (best of N, on stderr). --max-long-side defaults to 0
 *       here (full resolution), unlike the library default.
 *   lkt_face_detect CASCADE.xml --window IMAGE...
 *       classifies each whole image as one window at the cascade's size
 *       (the image must be exactly that size): "accepted stages_passed".
 *   lkt_face_detect --resize IN.png W H OUT.png      bilinear, as the search does
 *   lkt_face_detect --resize-area IN.png W H OUT.png pixel-area shrink
 *   lkt_face_detect --integral IN.png OUT.bin       sum, sqsum, tilted as int32 LE
 *   lkt_face_detect --group IN.txt MIN_NEIGHBORS EPS  rects "x y w h" per line
 *   lkt_face_detect CASCADE.xml --info
 */
#include "likeness/face.h"
#include "likeness/image.h"

#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

static int die(const lk_error *e)
{
    fprintf(stderr, "error: %s: %s\n", lk_code_name(e->code), e->message);
    return 1;
}

static lk_image *load_gray(const char *path, lk_error *e)
{
    lk_image *rgb = NULL;
    if (lk_image_load(path, NULL, &rgb, e) != LK_OK)
        return NULL;
    lk_image *g = rgb->channels == 1 ? lk_image_clone(rgb, e) : lk_image_to_gray(rgb, LK_LUMA_BT601, e);
    lk_image_free(rgb);
    return g;
}

/* CPU time of this thread: on a shared machine wall time also counts the
 * time other processes held the core. */
static double now_ms(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_THREAD_CPUTIME_ID, &ts);
    return ts.tv_sec * 1e3 + ts.tv_nsec / 1e6;
}

static int cmd_resize(int argc, char **argv)
{
    lk_error e = {0};
    if (argc != 6) {
        fprintf(stderr, "usage: --resize IN W H OUT.png\n");
        return 2;
    }
    lk_image *g = load_gray(argv[2], &e);
    if (!g)
        return die(&e);
    lk_image *d = lk_image_new(atoi(argv[3]), atoi(argv[4]), 1, &e);
    const int area = strcmp(argv[1], "--resize-area") == 0;
    if (!d || (area ? lk_resize_area_u8(g, d, &e) : lk_resize_linear_u8(g, d, &e)) != LK_OK ||
        lk_image_save_png(d, argv[5], &e) != LK_OK)
        return die(&e);
    lk_image_free(g);
    lk_image_free(d);
    return 0;
}

static int cmd_integral(int argc, char **argv)
{
    lk_error e = {0};
    if (argc != 4) {
        fprintf(stderr, "usage: --integral IN OUT.bin\n");
        return 2;
    }
    lk_image *g = load_gray(argv[2], &e);
    if (!g)
        return die(&e);
    const int st = g->width + 1;
    const size_t cells = (size_t)st * (size_t)(g->height + 1);
    int32_t *sum = malloc(cells * 4), *tilted = malloc(cells * 4);
    uint32_t *sq = malloc(cells * 4);
    if (!sum || !tilted || !sq)
        return 1;
    if (lk_integral(g->data, g->width, g->height, g->width, sum, sq, tilted, st, &e) != LK_OK)
        return die(&e);
    FILE *f = fopen(argv[3], "wb");
    if (!f)
        return 1;
    fwrite(sum, 4, cells, f);
    fwrite(sq, 4, cells, f);
    fwrite(tilted, 4, cells, f);
    fclose(f);
    free(sum);
    free(sq);
    free(tilted);
    lk_image_free(g);
    return 0;
}

static int cmd_group(int argc, char **argv)
{
    lk_error e = {0};
    if (argc != 5) {
        fprintf(stderr, "usage: --group IN.txt MIN_NEIGHBORS EPS\n");
        return 2;
    }
    FILE *f = fopen(argv[2], "r");
    if (!f)
        return 1;
    int cap = 1024, n = 0;
    lk_rect *r = malloc(sizeof *r * (size_t)cap);
    lk_rect t = {0};
    while (r && fscanf(f, "%d %d %d %d", &t.x, &t.y, &t.width, &t.height) == 4) {
        if (n == cap) {
            cap *= 2;
            lk_rect *nr = realloc(r, sizeof *r * (size_t)cap);
            if (!nr)
                return 1;
            r = nr;
        }
        r[n++] = t;
    }
    fclose(f);
    if (!r || lk_group_rects(r, &n, atoi(argv[3]), atof(argv[4]), &e) != LK_OK)
        return die(&e);
    for (int i = 0; i < n; i++)
        printf("%d %d %d %d %d\n", r[i].x, r[i].y, r[i].width, r[i].height, r[i].neighbors);
    free(r);
    return 0;
}

int main(int argc, char **argv)
{
    if (argc >= 2 && (strcmp(argv[1], "--resize") == 0 || strcmp(argv[1], "--resize-area") == 0))
        return cmd_resize(argc, argv);
    if (argc >= 2 && strcmp(argv[1], "--integral") == 0)
        return cmd_integral(argc, argv);
    if (argc >= 2 && strcmp(argv[1], "--group") == 0)
        return cmd_group(argc, argv);
    if (argc < 3) {
        fprintf(stderr, "usage: lkt_face_detect CASCADE.xml IMAGE... [options] (see source)\n");
        return 2;
    }
    lk_error e = {0};
    lk_cascade *c = lk_cascade_load(argv[1], &e);
    if (!c)
        return die(&e);
    lk_detect_params p;
    lk_detect_params_default(&p);
    p.max_long_side = 0;
    int window = 0, repeat = 0, info = 0;
    const char *dump = NULL;
    const char **images = calloc((size_t)argc, sizeof *images);
    int nimg = 0;
    for (int i = 2; i < argc; i++) {
        const char *a = argv[i];
        const int more = i + 1 < argc;
        if (strcmp(a, "--scale") == 0 && more)
            p.scale_factor = atof(argv[++i]);
        else if (strcmp(a, "--neighbors") == 0 && more)
            p.min_neighbors = atoi(argv[++i]);
        else if (strcmp(a, "--min-size") == 0 && more)
            p.min_size = atoi(argv[++i]);
        else if (strcmp(a, "--max-size") == 0 && more)
            p.max_size = atoi(argv[++i]);
        else if (strcmp(a, "--max-long-side") == 0 && more)
            p.max_long_side = atoi(argv[++i]);
        else if (strcmp(a, "--repeat") == 0 && more)
            repeat = atoi(argv[++i]);
        else if (strcmp(a, "--dump-gray") == 0 && more)
            dump = argv[++i];
        else if (strcmp(a, "--window") == 0)
            window = 1;
        else if (strcmp(a, "--info") == 0)
            info = 1;
        else if (a[0] == '-' && a[1] == '-') {
            fprintf(stderr, "unknown option %s\n", a);
            return 2;
        } else
            images[nimg++] = a;
    }
    if (info) {
        lk_cascade_info ci;
        lk_cascade_get_info(c, &ci);
        printf("type %s window %dx%d stages %d weak %d features %d max_nodes %d tilted %d\n",
               ci.feature_type == LK_CASCADE_HAAR ? "haar" : "lbp", ci.window_width,
               ci.window_height, ci.stages, ci.weak_classifiers, ci.features,
               ci.max_nodes_per_tree, ci.has_tilted);
    }
    int status = 0;
    for (int k = 0; k < nimg; k++) {
        lk_image *g = load_gray(images[k], &e);
        if (!g) {
            status = die(&e);
            break;
        }
        if (dump && lk_image_save_png(g, dump, &e) != LK_OK) {
            status = die(&e);
            lk_image_free(g);
            break;
        }
        if (nimg > 1)
            printf("== %s\n", images[k]);
        if (window) {
            int acc = 0, passed = 0;
            if (lk_cascade_classify_window(c, g, 0, 0, &acc, &passed, &e) != LK_OK) {
                status = die(&e);
                lk_image_free(g);
                break;
            }
            printf("%d %d\n", acc, passed);
            lk_image_free(g);
            continue;
        }
        lk_rect *r = NULL;
        int n = 0;
        double best = 1e30;
        for (int it = 0; it < (repeat > 0 ? repeat : 1); it++) {
            free(r);
            r = NULL;
            const double t0 = now_ms();
            if (lk_detect(c, g, &p, &r, &n, &e) != LK_OK) {
                status = die(&e);
                break;
            }
            const double dt = now_ms() - t0;
            best = dt < best ? dt : best;
        }
        if (status) {
            lk_image_free(g);
            break;
        }
        if (repeat > 0)
            fprintf(stderr, "%s: %dx%d, %d boxes, best of %d: %.2f ms CPU\n", images[k], g->width,
                    g->height, n, repeat, best);
        for (int i = 0; i < n; i++)
            printf("%d %d %d %d %d\n", r[i].x, r[i].y, r[i].width, r[i].height, r[i].neighbors);
        free(r);
        lk_image_free(g);
    }
    free(images);
    lk_cascade_free(c);
    return status;
}
