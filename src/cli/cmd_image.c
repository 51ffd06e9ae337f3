/* likeness detect / features / verify: the per-image commands. */
#include <getopt.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "cli.h"
#include "json_out.h"
#include "likeness/engine.h"

/* ---- overlay drawing (for --draw): plain pixel plotting on an RGB copy ---- */

static void put(lk_image *im, int x, int y, const uint8_t c[3])
{
    if (x < 0 || y < 0 || x >= im->width || y >= im->height)
        return;
    uint8_t *p = im->data + ((size_t)y * im->width + x) * 3;
    p[0] = c[0];
    p[1] = c[1];
    p[2] = c[2];
}

static void rect(lk_image *im, const lk_rect *r, int thick, const uint8_t c[3])
{
    for (int t = 0; t < thick; t++) {
        for (int x = r->x - t; x <= r->x + r->width + t; x++) {
            put(im, x, r->y - t, c);
            put(im, x, r->y + r->height + t, c);
        }
        for (int y = r->y - t; y <= r->y + r->height + t; y++) {
            put(im, r->x - t, y, c);
            put(im, r->x + r->width + t, y, c);
        }
    }
}

static void cross(lk_image *im, lk_point p, int size, const uint8_t c[3])
{
    int x = (int)lround(p.x), y = (int)lround(p.y);
    for (int d = -size; d <= size; d++)
        for (int t = -1; t <= 1; t++) {
            put(im, x + d, y + t, c);
            put(im, x + t, y + d, c);
        }
}

static lk_image *to_rgb(const lk_image *img)
{
    lk_image *o = lk_image_new(img->width, img->height, 3, NULL);
    if (!o)
        return NULL;
    size_t n = (size_t)img->width * img->height;
    for (size_t i = 0; i < n; i++)
        for (int k = 0; k < 3; k++)
            o->data[i * 3 + k] = img->channels == 3 ? img->data[i * 3 + k] : img->data[i];
    return o;
}

/* ---- likeness detect ---- */

static void detect_usage(FILE *f)
{
    fprintf(f,
            "usage: likeness detect [--draw OUT.png] [--cascade FILE] IMAGE...\n\n"
            "Finds the faces in each JPEG or PNG image, locates the eyes of the primary face\n"
            "(the largest), measures its quality and prints one JSON object per image:\n"
            "faces, primary face box, eyes, quality measures and reasons it is unusable\n"
            "(no_face, multiple_faces, face_too_small, too_blurry, badly_exposed, too_rotated).\n\n"
            "options:\n"
            "  --draw OUT.png    write an overlay of the (single) image: every face box in\n"
            "                    orange, the primary face in green, its eyes as crosses\n"
            "  --crop OUT.png    write the aligned face crop the features are computed on\n"
            "  --cascade FILE    frontal-face cascade XML (default: opencv-data's\n"
            "                    haarcascade_frontalface_alt.xml)\n"
            "  -h, --help        this help\n");
}

int cmd_detect(int argc, char **argv)
{
    static const struct option opts[] = {{"draw", required_argument, 0, 'd'},
                                         {"crop", required_argument, 0, 'c'},
                                         {"cascade", required_argument, 0, 'k'},
                                         {"help", no_argument, 0, 'h'},
                                         {0, 0, 0, 0}};
    const char *draw = NULL, *crop_path = NULL;
    lk_engine_config cfg;
    lk_engine_config_default(&cfg);
    int o;
    optind = 1;
    while ((o = getopt_long(argc, argv, "h", opts, NULL)) != -1) {
        switch (o) {
        case 'd': draw = optarg; break;
        case 'c': crop_path = optarg; break;
        case 'k': snprintf(cfg.face_cascade, sizeof cfg.face_cascade, "%s", optarg); break;
        case 'h': detect_usage(stdout); return CLI_OK;
        default: detect_usage(stderr); return CLI_USAGE;
        }
    }
    if (optind >= argc) {
        cli_errorf("detect needs at least one IMAGE; 'likeness detect --help' shows how");
        return CLI_USAGE;
    }
    if ((draw || crop_path) && argc - optind != 1) {
        cli_errorf("--draw and --crop take exactly one IMAGE");
        return CLI_USAGE;
    }
    lk_error err;
    lk_engine *e = lk_engine_new(&cfg, &err);
    if (!e) {
        cli_error(&err);
        return CLI_FAIL;
    }
    int status = CLI_OK;
    for (int i = optind; i < argc; i++) {
        lk_image *img = NULL, *crop = NULL;
        lk_analysis a;
        cJSON *j = cJSON_CreateObject();
        cJSON_AddStringToObject(j, "image", argv[i]);
        lk_code rc = lk_image_load(argv[i], &cfg.limits, &img, &err);
        if (rc == LK_OK)
            rc = lk_engine_analyse_image(e, img, &a, NULL, &crop, &err);
        if (rc != LK_OK) {
            cJSON *er = cJSON_AddObjectToObject(j, "error");
            cJSON_AddStringToObject(er, "type", lk_code_name(rc));
            cJSON_AddStringToObject(er, "detail", err.message);
            status = CLI_FAIL;
        } else {
            /* The engine's own boxes; those of a rotated search are in the
             * rotated frame, so only an upright search lists them. */
            const lk_rect *rects = a.find.faces;
            const int count = a.find.search_angle_deg == 0 ? a.find.listed : 0;
            cJSON *faces = cJSON_AddArrayToObject(j, "faces");
            for (int k = 0; k < count; k++) {
                cJSON *b = cJSON_CreateObject();
                cJSON_AddNumberToObject(b, "x", rects[k].x);
                cJSON_AddNumberToObject(b, "y", rects[k].y);
                cJSON_AddNumberToObject(b, "width", rects[k].width);
                cJSON_AddNumberToObject(b, "height", rects[k].height);
                cJSON_AddNumberToObject(b, "neighbors", rects[k].neighbors);
                cJSON_AddItemToArray(faces, b);
            }
            cJSON_AddItemToObject(j, "quality", lk_server_quality_json(&a));
            cJSON_AddItemToObject(j, "timings", lk_server_timings_json(&a));
            if (draw) {
                lk_image *ov = to_rgb(img);
                static const uint8_t orange[3] = {255, 140, 0}, green[3] = {0, 220, 60},
                                     cyan[3] = {0, 200, 255};
                int thick = 1 + img->width / 400;
                for (int k = 0; ov && k < count; k++)
                    rect(ov, &rects[k], thick, orange);
                if (ov && (a.find.face_count > 0 || a.center_fallback)) {
                    rect(ov, &a.find.primary, thick, green);
                    cross(ov, a.find.eyes.left, 2 + img->width / 200, cyan);
                    cross(ov, a.find.eyes.right, 2 + img->width / 200, cyan);
                }
                if (!ov || lk_image_save_png(ov, draw, &err) != LK_OK) {
                    cli_error(&err);
                    status = CLI_FAIL;
                }
                lk_image_free(ov);
            }
            if (crop_path) {
                if (!crop) {
                    cli_errorf("%s: no face, so no crop was written", argv[i]);
                    status = CLI_FAIL;
                } else if (lk_image_save_png(crop, crop_path, &err) != LK_OK) {
                    cli_error(&err);
                    status = CLI_FAIL;
                }
            }
        }
        json_print(j);
        lk_image_free(crop);
        lk_image_free(img);
    }
    lk_engine_free(e);
    return status;
}

/* ---- likeness features ---- */

static void features_usage(FILE *f)
{
    fprintf(f,
            "usage: likeness features [-o OUT.f32] IMAGE\n\n"
            "Computes the feature vector of the primary face of IMAGE. Prints JSON with the\n"
            "feature configuration, the dimension and the quality; with -o, writes the\n"
            "vector as raw little-endian float32 values (dimension x 4 bytes).\n\n"
            "options:\n"
            "  -o, --output FILE  where to write the vector\n"
            "  --text             print the vector as text, one value per line, instead of JSON\n"
            "  -h, --help         this help\n");
}

int cmd_features(int argc, char **argv)
{
    static const struct option opts[] = {{"output", required_argument, 0, 'o'},
                                         {"text", no_argument, 0, 't'},
                                         {"help", no_argument, 0, 'h'},
                                         {0, 0, 0, 0}};
    const char *out = NULL;
    int text = 0, o;
    optind = 1;
    while ((o = getopt_long(argc, argv, "o:h", opts, NULL)) != -1) {
        switch (o) {
        case 'o': out = optarg; break;
        case 't': text = 1; break;
        case 'h': features_usage(stdout); return CLI_OK;
        default: features_usage(stderr); return CLI_USAGE;
        }
    }
    if (argc - optind != 1) {
        cli_errorf("features takes exactly one IMAGE; 'likeness features --help' shows how");
        return CLI_USAGE;
    }
    lk_error err;
    lk_engine *e = lk_engine_new(NULL, &err);
    if (!e) {
        cli_error(&err);
        return CLI_FAIL;
    }
    size_t dim = lk_engine_feature_dim(e);
    float *v = malloc(dim * sizeof *v);
    uint8_t *bytes = NULL;
    size_t len = 0;
    lk_analysis a;
    int status = CLI_FAIL;
    lk_code rc = v ? lk_read_file(argv[optind], 0, &bytes, &len, &err)
                   : lk_error_set(&err, LK_ERR_NOMEM, "out of memory");
    if (rc == LK_OK)
        rc = lk_engine_analyse(e, bytes, len, &a, v, NULL, &err);
    if (rc != LK_OK) {
        cli_error(&err);
    } else if (!a.has_features) {
        cli_errorf("%s: no face found, so there are no features", argv[optind]);
    } else {
        status = CLI_OK;
        if (out) {
            FILE *f = fopen(out, "wb");
            if (!f || fwrite(v, sizeof *v, dim, f) != dim) {
                cli_errorf("cannot write %s", out);
                status = CLI_FAIL;
            }
            if (f && fclose(f) != 0)
                status = CLI_FAIL;
        }
        if (text) {
            for (size_t i = 0; i < dim; i++)
                printf("%.9g\n", v[i]);
        } else {
            cJSON *j = cJSON_CreateObject();
            cJSON_AddStringToObject(j, "image", argv[optind]);
            cJSON_AddStringToObject(j, "feature_config", lk_engine_feature_config(e));
            cJSON_AddNumberToObject(j, "dimension", (double)dim);
            if (out)
                cJSON_AddStringToObject(j, "output", out);
            cJSON_AddItemToObject(j, "quality", lk_server_quality_json(&a));
            json_print(j);
        }
    }
    free(bytes);
    free(v);
    lk_engine_free(e);
    return status;
}
