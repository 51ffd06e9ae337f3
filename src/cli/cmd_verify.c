/* likeness verify: offline one-to-one comparison of a probe and a reference. */
#include <getopt.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "cli.h"
#include "json_out.h"
#include "likeness/engine.h"

const char *cli_default_model(void)
{
    const char *m = getenv("LIKENESS_MODEL");
    return m && *m ? m : LIKENESS_DEFAULT_MODEL;
}

static void verify_usage(FILE *f)
{
    fprintf(f,
            "usage: likeness verify [--model FILE] [--fmr RATE] PROBE REFERENCE\n\n"
            "Compares the face in PROBE (for example a live capture) with the face in\n"
            "REFERENCE (for example an ID photo) and prints the decision as JSON, with the\n"
            "same fields the service returns: decision (match or non_match), score (the\n"
            "calibrated probability of a mated pair), threshold, target_fmr, model_id,\n"
            "per-image quality with reasons, and timings.\n\n"
            "Exit status: 0 when a decision was made (match or not), 1 when an image is\n"
            "unusable or unreadable (the JSON says why), 2 for a usage error.\n\n"
            "options:\n"
            "  --model FILE   model file (default: $LIKENESS_MODEL, else %s)\n"
            "  --fmr RATE     target false match rate of the operating point, e.g. 0.001\n"
            "                 (default: the model's default operating point)\n"
            "  -h, --help     this help\n",
            LIKENESS_DEFAULT_MODEL);
}

int cmd_verify(int argc, char **argv)
{
    static const struct option opts[] = {{"model", required_argument, 0, 'm'},
                                         {"fmr", required_argument, 0, 'f'},
                                         {"help", no_argument, 0, 'h'},
                                         {0, 0, 0, 0}};
    const char *model_path = cli_default_model();
    double fmr = 0;
    int o;
    optind = 1;
    while ((o = getopt_long(argc, argv, "h", opts, NULL)) != -1) {
        switch (o) {
        case 'm': model_path = optarg; break;
        case 'f': {
            char *end;
            fmr = strtod(optarg, &end);
            if (*end || !(fmr > 0 && fmr < 1)) {
                cli_errorf("--fmr wants a rate between 0 and 1, such as 0.001; got '%s'", optarg);
                return CLI_USAGE;
            }
            break;
        }
        case 'h': verify_usage(stdout); return CLI_OK;
        default: verify_usage(stderr); return CLI_USAGE;
        }
    }
    if (argc - optind != 2) {
        cli_errorf("verify takes PROBE and REFERENCE images; 'likeness verify --help' shows how");
        return CLI_USAGE;
    }
    lk_error err;
    lk_model *model = lk_model_load(model_path, &err);
    if (!model) {
        cli_error(&err);
        return CLI_FAIL;
    }
    lk_engine *e = lk_engine_new(NULL, &err);
    if (!e) {
        cli_error(&err);
        lk_model_free(model);
        return CLI_FAIL;
    }
    if (lk_model_check_features(model, lk_engine_feature_config(e), lk_engine_feature_dim(e),
                                &err) != LK_OK) {
        cli_error(&err);
        lk_engine_free(e);
        lk_model_free(model);
        return CLI_FAIL;
    }
    size_t dim = lk_engine_feature_dim(e);
    float *feat[2] = {malloc(dim * sizeof(float)), malloc(dim * sizeof(float))};
    const char *role[2] = {"probe", "reference"};
    lk_analysis a[2];
    cJSON *j = cJSON_CreateObject();
    char id[37];
    lk_uuid_v4(id);
    cJSON_AddStringToObject(j, "decision_id", id);
    int status = CLI_OK;
    cJSON *quality = cJSON_CreateObject();
    for (int k = 0; k < 2 && status == CLI_OK; k++) {
        uint8_t *bytes = NULL;
        size_t len = 0;
        lk_code rc = feat[k] ? lk_read_file(argv[optind + k], 0, &bytes, &len, &err)
                             : lk_error_set(&err, LK_ERR_NOMEM, "out of memory");
        if (rc == LK_OK)
            rc = lk_engine_analyse(e, bytes, len, &a[k], feat[k], NULL, &err);
        free(bytes);
        if (rc != LK_OK) {
            cJSON *er = cJSON_AddObjectToObject(j, "error");
            cJSON_AddStringToObject(er, "type", lk_code_name(rc));
            cJSON_AddStringToObject(er, "image", role[k]);
            cJSON_AddStringToObject(er, "detail", err.message);
            status = CLI_FAIL;
            break;
        }
        cJSON_AddItemToObject(quality, role[k], lk_server_quality_json(&a[k]));
        if (!a[k].quality.usable || !a[k].has_features) {
            cJSON *er = cJSON_AddObjectToObject(j, "error");
            uint32_t first = a[k].quality.reasons & LK_QR_BLOCKING;
            first &= -first; /* lowest set bit: the first reason in code order */
            cJSON_AddStringToObject(er, "type", first ? lk_quality_reason_name(first) : "no_face");
            cJSON_AddStringToObject(er, "image", role[k]);
            cJSON_AddStringToObject(er, "detail",
                                    "the photo cannot be used for a comparison; see quality.reasons "
                                    "and take a new, frontal, well-lit photo of one face");
            status = CLI_FAIL;
        }
    }
    if (status == CLI_OK) {
        lk_comparison c;
        if (lk_engine_compare(e, model, feat[0], feat[1], fmr, &c, &err) != LK_OK) {
            cli_error(&err);
            status = CLI_FAIL;
        } else {
            cJSON_AddStringToObject(j, "decision", c.match ? "match" : "non_match");
            lk_json_add_number(j, "score", c.score);
            lk_json_add_number(j, "threshold", c.threshold);
            lk_json_add_number(j, "target_fmr", c.target_fmr);
        }
    }
    cJSON_AddStringToObject(j, "model_id", lk_model_id(model));
    cJSON_AddItemToObject(j, "quality", quality);
    if (status == CLI_OK) {
        cJSON *t = cJSON_AddObjectToObject(j, "timings");
        cJSON_AddItemToObject(t, "probe", lk_server_timings_json(&a[0]));
        cJSON_AddItemToObject(t, "reference", lk_server_timings_json(&a[1]));
    }
    json_print(j);
    free(feat[0]);
    free(feat[1]);
    lk_engine_free(e);
    lk_model_free(model);
    return status;
}
