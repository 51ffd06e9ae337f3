/* likeness train / evaluate / lfw: learning and evaluation commands. */
#include <getopt.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include <cjson/cJSON.h>

#include "cli.h"
#include "featset.h"
#include "likeness/engine.h"
#include "likeness/learn.h"
#include "likeness/model.h"
#include "recipe.h"
#include "report.h"

const char *cli_default_model(void);

/* ---- shared helpers ---- */

static int parse_size(const char *s, size_t *out)
{
    char *end;
    unsigned long long v = strtoull(s, &end, 10);
    if (*end || s[0] == '-')
        return -1;
    *out = (size_t)v;
    return 0;
}

static int parse_double(const char *s, double *out)
{
    char *end;
    *out = strtod(s, &end);
    return *end || !isfinite(*out) ? -1 : 0;
}

/* The path list of every image of the pairs, for featset_build. */
static const char **pair_paths(const lk_pair *p, size_t n)
{
    const char **v = malloc((2 * n + 1) * sizeof *v);
    if (v)
        for (size_t i = 0; i < n; i++) {
            v[2 * i] = p[i].path_a;
            v[2 * i + 1] = p[i].path_b;
        }
    return v;
}

static void utc_now(char *buf, size_t size)
{
    time_t t = time(NULL);
    struct tm tm;
    gmtime_r(&t, &tm);
    strftime(buf, size, "%Y-%m-%dT%H:%M:%SZ", &tm);
}

static char *join_args(int argc, char **argv)
{
    size_t len = 16;
    for (int i = 0; i < argc; i++)
        len += strlen(argv[i]) + 1;
    char *s = malloc(len);
    if (!s)
        return NULL;
    strcpy(s, "likeness");
    for (int i = 0; i < argc; i++) {
        strcat(s, " ");
        strcat(s, argv[i]);
    }
    return s;
}

typedef struct measures {
    double auc, eer, eer_threshold, fnmr_1, fnmr_01, thr_1, thr_01;
    size_t n_genuine, n_impostor;
    double min_supported_fmr;
} measures;

static int compute_measures(const double *v, const int *y, size_t n, measures *m, lk_roc *roc,
                            lk_error *err)
{
    if (lk_roc_compute(v, y, n, roc, err) != LK_OK)
        return -1;
    m->auc = lk_roc_auc(roc);
    m->eer = lk_roc_eer(roc, &m->eer_threshold);
    lk_operating_point a = lk_roc_at_fmr(roc, 0.01), b = lk_roc_at_fmr(roc, 0.001);
    m->fnmr_1 = a.fnmr;
    m->thr_1 = a.threshold;
    m->fnmr_01 = b.fnmr;
    m->thr_01 = b.threshold;
    m->n_genuine = roc->n_genuine;
    m->n_impostor = roc->n_impostor;
    m->min_supported_fmr = lk_rule_of_30_min_rate(roc->n_impostor);
    return 0;
}

static void add_measures(cJSON *j, const measures *m)
{
    cJSON_AddNumberToObject(j, "auc", m->auc);
    cJSON_AddNumberToObject(j, "eer", m->eer);
    cJSON_AddNumberToObject(j, "fnmr_at_fmr_1e-2", m->fnmr_1);
    cJSON_AddNumberToObject(j, "fnmr_at_fmr_1e-3", m->fnmr_01);
    cJSON_AddNumberToObject(j, "genuine_comparisons", (double)m->n_genuine);
    cJSON_AddNumberToObject(j, "impostor_comparisons", (double)m->n_impostor);
    cJSON_AddNumberToObject(j, "smallest_supported_fmr", m->min_supported_fmr);
}

static int write_report(const char *path, const char *title, const char *subtitle,
                        const lk_roc *roc, const double *v, const int *y, size_t n,
                        double threshold, const report_summary_row *rows, size_t n_rows,
                        const char *notes)
{
    double *fmr = malloc((roc->count + 1) * sizeof *fmr);
    double *fnmr = malloc((roc->count + 1) * sizeof *fnmr);
    double *gen = malloc((n + 1) * sizeof *gen), *imp = malloc((n + 1) * sizeof *imp);
    int rc = -1;
    if (fmr && fnmr && gen && imp) {
        /* lk_roc lists thresholds ascending, so FMR descends; the plots want
         * FMR ascending. */
        for (size_t i = 0; i < roc->count; i++) {
            fmr[i] = roc->points[roc->count - 1 - i].fmr;
            fnmr[i] = roc->points[roc->count - 1 - i].fnmr;
        }
        size_t ng = 0, ni = 0;
        for (size_t i = 0; i < n; i++) {
            if (!isfinite(v[i]))
                continue;
            if (y[i])
                gen[ng++] = v[i];
            else
                imp[ni++] = v[i];
        }
        report_input in = {.title = title,
                           .subtitle = subtitle,
                           .curve = {fmr, fnmr, roc->count},
                           .genuine = gen,
                           .n_genuine = ng,
                           .impostor = imp,
                           .n_impostor = ni,
                           .threshold = threshold,
                           .rows = rows,
                           .n_rows = n_rows,
                           .notes_html = notes};
        FILE *f = fopen(path, "w");
        if (f) {
            rc = report_write_html(f, &in);
            if (fclose(f) != 0)
                rc = -1;
        }
    }
    if (rc != 0)
        cli_errorf("cannot write the report %s", path);
    free(fmr);
    free(fnmr);
    free(gen);
    free(imp);
    return rc;
}

/* Writes j to path, or prints it to standard output when path is NULL. */
static int write_json_file(const char *path, cJSON *j)
{
    if (!path) {
        char *s = cJSON_Print(j);
        if (s)
            puts(s);
        free(s);
        return s ? 0 : -1;
    }
    char *s = cJSON_Print(j);
    FILE *f = path ? fopen(path, "w") : NULL;
    int ok = s && f && fputs(s, f) >= 0 && fputc('\n', f) != EOF;
    if (f && fclose(f) != 0)
        ok = 0;
    if (!ok)
        cli_errorf("cannot write %s", path);
    free(s);
    return ok ? 0 : -1;
}

/* ---- likeness train ---- */

static void train_usage(FILE *f)
{
    recipe r;
    recipe_default(&r);
    fprintf(f,
            "usage: likeness train --data DIR -o MODEL [options]\n"
            "       likeness train --pairs FILE --calibration-pairs FILE --lfw-root DIR -o MODEL\n\n"
            "Trains a comparison model: extracts features of every image (all cores, with\n"
            "progress), learns a PCA projection on the training identities, a linear SVM on\n"
            "squared-difference pair vectors, Platt calibration and an operating-point table\n"
            "(FMR -> threshold) on held-out identities, and writes a model file.\n\n"
            "inputs:\n"
            "  --data DIR               folder-per-identity data set (DIR/NAME/*.jpg|png);\n"
            "                           identities are split into training and calibration\n"
            "  --pairs FILE             training pairs in the LFW pairs format, with\n"
            "  --calibration-pairs FILE held-out pairs (other identities) for calibration, and\n"
            "  --lfw-root DIR           the folder holding lfw-deepfunneled/\n"
            "options:\n"
            "  -o, --output MODEL       model file to write (required)\n"
            "  --pca N                  PCA components, 0 for none (default %zu)\n"
            "  --no-whiten              keep PCA components unwhitened\n"
            "  --pairs-per-class N      generated training pairs per class (default %zu)\n"
            "  --svm-c C                SVM regularisation constant (default %g)\n"
            "  --calibration-share F    share of identities held out for calibration (default 0.2)\n"
            "  --default-fmr F          the model's default operating point (default 0.001)\n"
            "  --seed N                 random seed of pair generation and the solver\n"
            "  --threads N              feature extraction threads (default: all cores)\n"
            "  --cache FILE             keep extracted features in FILE and reuse them\n"
            "  --center-fallback        when no face is found, use the central box (for data\n"
            "                           sets of centred faces such as LFW)\n"
            "  -h, --help               this help\n",
            r.pca_dim, r.pairs_per_class, r.C);
}

int cmd_train(int argc, char **argv)
{
    static const struct option opts[] = {{"data", required_argument, 0, 'D'},
                                         {"pairs", required_argument, 0, 'P'},
                                         {"calibration-pairs", required_argument, 0, 'Q'},
                                         {"lfw-root", required_argument, 0, 'L'},
                                         {"output", required_argument, 0, 'o'},
                                         {"pca", required_argument, 0, 'k'},
                                         {"no-whiten", no_argument, 0, 'W'},
                                         {"pairs-per-class", required_argument, 0, 'n'},
                                         {"svm-c", required_argument, 0, 'C'},
                                         {"calibration-share", required_argument, 0, 's'},
                                         {"default-fmr", required_argument, 0, 'f'},
                                         {"seed", required_argument, 0, 'S'},
                                         {"threads", required_argument, 0, 't'},
                                         {"cache", required_argument, 0, 'c'},
                                         {"center-fallback", no_argument, 0, 'F'},
                                         {"help", no_argument, 0, 'h'},
                                         {0, 0, 0, 0}};
    const char *data = NULL, *pairs_file = NULL, *calib_file = NULL, *lfw_root = NULL;
    const char *out = NULL, *cache = NULL;
    double calib_share = 0.2, default_fmr = 0.001;
    size_t threads = 0, seed = 0;
    int center_fallback = 0, o;
    recipe r;
    recipe_default(&r);
    optind = 1;
    while ((o = getopt_long(argc, argv, "o:h", opts, NULL)) != -1) {
        int bad = 0;
        switch (o) {
        case 'D': data = optarg; break;
        case 'P': pairs_file = optarg; break;
        case 'Q': calib_file = optarg; break;
        case 'L': lfw_root = optarg; break;
        case 'o': out = optarg; break;
        case 'k': bad = parse_size(optarg, &r.pca_dim); break;
        case 'W': r.whiten = 0; break;
        case 'n': bad = parse_size(optarg, &r.pairs_per_class); break;
        case 'C': bad = parse_double(optarg, &r.C) || !(r.C > 0); break;
        case 's': bad = parse_double(optarg, &calib_share) || !(calib_share > 0 && calib_share < 1); break;
        case 'f': bad = parse_double(optarg, &default_fmr) || !(default_fmr > 0 && default_fmr < 1); break;
        case 'S': bad = parse_size(optarg, &seed); r.seed = seed; break;
        case 't': bad = parse_size(optarg, &threads); break;
        case 'c': cache = optarg; break;
        case 'F': center_fallback = 1; break;
        case 'h': train_usage(stdout); return CLI_OK;
        default: train_usage(stderr); return CLI_USAGE;
        }
        if (bad) {
            cli_errorf("invalid value '%s' for an option; 'likeness train --help' lists them", optarg);
            return CLI_USAGE;
        }
    }
    if (!out || (!data && !pairs_file) || (data && pairs_file) ||
        (pairs_file && (!calib_file || !lfw_root)) || optind != argc) {
        cli_errorf("train needs -o MODEL and either --data DIR or --pairs FILE "
                   "--calibration-pairs FILE --lfw-root DIR; 'likeness train --help' shows how");
        return CLI_USAGE;
    }
    lk_error err;
    lk_engine_config cfg;
    lk_engine_config_default(&cfg);
    cfg.center_fallback = center_fallback;
    lk_engine *e = lk_engine_new(&cfg, &err);
    if (!e) {
        cli_error(&err);
        return CLI_FAIL;
    }
    int status = CLI_FAIL;
    lk_dataset *ds = NULL;
    lk_pair_set *train = NULL, *calib = NULL;
    featset fs = {0};
    lk_model *m = NULL;
    double *v = NULL;
    int *y = NULL;
    const char **paths = NULL;
    size_t *rows = NULL, n_rows = 0;
    char *cmdline = join_args(argc, argv);
    if (data) {
        if (lk_dataset_scan(data, 1, &ds, &err) != LK_OK)
            goto done;
        lk_pairgen_params gp = {.seed = r.seed,
                                .calib_fraction = calib_share,
                                .train_pairs_per_class = r.pairs_per_class,
                                .calib_pairs_per_class = r.pairs_per_class / 2};
        if (lk_pairs_generate(ds->identities, ds->count, &gp, &train, &calib, &err) != LK_OK)
            goto done;
        fprintf(stderr, "train: %zu identities; %zu training and %zu calibration pairs\n",
                ds->count, train->count, calib->count);
    } else {
        if (lk_pairs_load_lfw(pairs_file, lfw_root, &train, &err) != LK_OK ||
            lk_pairs_load_lfw(calib_file, lfw_root, &calib, &err) != LK_OK)
            goto done;
    }
    if (train->count == 0 || calib->count == 0) {
        lk_error_set(&err, LK_ERR_DATA, "no training or calibration pairs: the data set needs "
                                        "identities with at least two images");
        goto done;
    }
    if (ds) {
        /* Every image of the data set, so that the feature cache is shared
         * with `likeness lfw` on the same folder. */
        if (featset_build_dataset(e, ds, (int)threads, cache, &fs, &err) != LK_OK)
            goto done;
    } else {
        size_t nt = train->count, nc = calib->count;
        paths = malloc((2 * (nt + nc) + 1) * sizeof *paths);
        if (!paths)
            goto nomem;
        for (size_t i = 0; i < nt; i++) {
            paths[2 * i] = train->pairs[i].path_a;
            paths[2 * i + 1] = train->pairs[i].path_b;
        }
        for (size_t i = 0; i < nc; i++) {
            paths[2 * (nt + i)] = calib->pairs[i].path_a;
            paths[2 * (nt + i) + 1] = calib->pairs[i].path_b;
        }
        if (featset_build(e, paths, 2 * (nt + nc), (int)threads, cache, &fs, &err) != LK_OK)
            goto done;
    }
    if (recipe_rows_of_pairs(&fs, train->pairs, train->count, &rows, &n_rows) != 0)
        goto nomem;
    m = lk_model_new();
    if (!m)
        goto nomem;
    size_t used = 0;
    if (recipe_fit(&r, lk_engine_feature_config(e), &fs, rows, n_rows, train->pairs,
                   train->count, m, &used, &err) != 0)
        goto done;
    v = malloc((calib->count + 1) * sizeof *v);
    y = malloc((calib->count + 1) * sizeof *y);
    if (!v || !y)
        goto nomem;
    size_t missing = 0;
    if (recipe_score(m, &fs, calib->pairs, calib->count, v, y, &missing, &err) != 0 ||
        recipe_calibrate(m, v, y, calib->count, default_fmr, &err) != 0)
        goto done;
    {
        char created[32], recipe_text[256], dataset[1024];
        utc_now(created, sizeof created);
        recipe_describe(&r, recipe_text, sizeof recipe_text);
        snprintf(dataset, sizeof dataset, "%s (recipe %s)", data ? data : pairs_file, recipe_text);
        lk_model_provenance pv = {.dataset = dataset,
                                  .training_pairs = used,
                                  .calibration_pairs = calib->count - missing,
                                  .evaluation_pairs = 0,
                                  .created_utc = created,
                                  .command_line = cmdline ? cmdline : "likeness train",
                                  .software_version = LIKENESS_VERSION};
        if (lk_model_set_provenance(m, &pv, &err) != LK_OK || lk_model_save(m, out, &err) != LK_OK)
            goto done;
    }
    {
        double a, b;
        lk_model_platt(m, &a, &b);
        fprintf(stderr, "train: wrote %s (model id %s; Platt A=%.4g B=%.4g)\n", out,
                lk_model_id(m), a, b);
        char *js = lk_model_to_json(m);
        if (js)
            puts(js);
        free(js);
    }
    status = CLI_OK;
    goto done;
nomem:
    lk_error_set(&err, LK_ERR_NOMEM, "out of memory");
done:
    if (status != CLI_OK)
        cli_error(&err);
    free(cmdline);
    free(paths);
    free(rows);
    free(v);
    free(y);
    lk_model_free(m);
    featset_free(&fs);
    lk_pair_set_free(train);
    lk_pair_set_free(calib);
    lk_dataset_free(ds);
    lk_engine_free(e);
    return status;
}

/* ---- likeness evaluate ---- */

static void evaluate_usage(FILE *f)
{
    fprintf(f,
            "usage: likeness evaluate --pairs FILE --lfw-root DIR [--model FILE]\n"
            "                         [--json OUT.json] [--report OUT.html]\n\n"
            "Scores every pair of FILE (LFW pairs format) with the model and reports the\n"
            "ISO/IEC 19795-1 measures: ROC, AUC, EER, FNMR at FMR 1%% and 0.1%%, accuracy at\n"
            "the model's default operating point, and the smallest FMR the number of\n"
            "impostor comparisons supports (rule of 30). The HTML report shows ROC and DET\n"
            "curves and the score distributions.\n\n"
            "options:\n"
            "  --model FILE      model (default: $LIKENESS_MODEL, else %s)\n"
            "  --json FILE       write the measures as JSON (default: standard output)\n"
            "  --report FILE     write the self-contained HTML report\n"
            "  --scores FILE     write every pair's scores as CSV (path_a,path_b,mated,\n"
            "                    svm_value,score); unusable pairs have empty scores\n"
            "  --fmr F           operating point for the accuracy row (default: the model's)\n"
            "  --threads N       feature extraction threads (default: all cores)\n"
            "  --cache FILE      keep extracted features in FILE and reuse them\n"
            "  --center-fallback when no face is found, use the central box (LFW)\n"
            "  -h, --help        this help\n",
            LIKENESS_DEFAULT_MODEL);
}

int cmd_evaluate(int argc, char **argv)
{
    static const struct option opts[] = {{"pairs", required_argument, 0, 'P'},
                                         {"lfw-root", required_argument, 0, 'L'},
                                         {"model", required_argument, 0, 'm'},
                                         {"json", required_argument, 0, 'j'},
                                         {"report", required_argument, 0, 'r'},
                                         {"scores", required_argument, 0, 's'},
                                         {"fmr", required_argument, 0, 'f'},
                                         {"threads", required_argument, 0, 't'},
                                         {"cache", required_argument, 0, 'c'},
                                         {"center-fallback", no_argument, 0, 'F'},
                                         {"help", no_argument, 0, 'h'},
                                         {0, 0, 0, 0}};
    const char *scores_path = NULL;
    const char *pairs_file = NULL, *root = NULL, *model_path = cli_default_model();
    const char *json_path = NULL, *report_path = NULL, *cache = NULL;
    double fmr = 0;
    size_t threads = 0;
    int center_fallback = 0, o;
    optind = 1;
    while ((o = getopt_long(argc, argv, "h", opts, NULL)) != -1) {
        int bad = 0;
        switch (o) {
        case 'P': pairs_file = optarg; break;
        case 'L': root = optarg; break;
        case 'm': model_path = optarg; break;
        case 'j': json_path = optarg; break;
        case 'r': report_path = optarg; break;
        case 's': scores_path = optarg; break;
        case 'f': bad = parse_double(optarg, &fmr) || !(fmr > 0 && fmr < 1); break;
        case 't': bad = parse_size(optarg, &threads); break;
        case 'c': cache = optarg; break;
        case 'F': center_fallback = 1; break;
        case 'h': evaluate_usage(stdout); return CLI_OK;
        default: evaluate_usage(stderr); return CLI_USAGE;
        }
        if (bad) {
            cli_errorf("invalid value '%s'; 'likeness evaluate --help' lists the options", optarg);
            return CLI_USAGE;
        }
    }
    if (!pairs_file || !root || optind != argc) {
        cli_errorf("evaluate needs --pairs FILE and --lfw-root DIR; 'likeness evaluate --help'");
        return CLI_USAGE;
    }
    lk_error err;
    int status = CLI_FAIL;
    lk_model *m = lk_model_load(model_path, &err);
    lk_engine *e = NULL;
    lk_pair_set *ps = NULL;
    featset fs = {0};
    const char **paths = NULL;
    double *v = NULL;
    int *y = NULL;
    lk_roc roc = {0};
    cJSON *j = NULL;
    if (!m)
        goto done;
    lk_engine_config cfg;
    lk_engine_config_default(&cfg);
    cfg.center_fallback = center_fallback;
    if (!(e = lk_engine_new(&cfg, &err)) ||
        lk_model_check_features(m, lk_engine_feature_config(e), lk_engine_feature_dim(e), &err) !=
            LK_OK ||
        lk_pairs_load_lfw(pairs_file, root, &ps, &err) != LK_OK)
        goto done;
    if (!(paths = pair_paths(ps->pairs, ps->count)) ||
        !(v = malloc((ps->count + 1) * sizeof *v)) || !(y = malloc((ps->count + 1) * sizeof *y))) {
        lk_error_set(&err, LK_ERR_NOMEM, "out of memory");
        goto done;
    }
    if (featset_build(e, paths, 2 * ps->count, (int)threads, cache, &fs, &err) != LK_OK)
        goto done;
    size_t missing = 0;
    if (recipe_score(m, &fs, ps->pairs, ps->count, v, y, &missing, &err) != 0)
        goto done;
    measures me;
    if (compute_measures(v, y, ps->count, &me, &roc, &err) != 0)
        goto done;
    if (scores_path) {
        FILE *f = fopen(scores_path, "w");
        int ok = f != NULL && fputs("path_a,path_b,mated,svm_value,score\n", f) >= 0;
        for (size_t i = 0; ok && i < ps->count; i++) {
            const lk_pair *pp = &ps->pairs[i];
            if (isfinite(v[i]))
                ok = fprintf(f, "%s,%s,%d,%.17g,%.17g\n", pp->path_a, pp->path_b, y[i], v[i],
                             lk_model_probability(m, v[i])) > 0;
            else
                ok = fprintf(f, "%s,%s,%d,,\n", pp->path_a, pp->path_b, y[i]) > 0;
        }
        if (f && fclose(f) != 0)
            ok = 0;
        if (!ok) {
            lk_error_set(&err, LK_ERR_IO, "cannot write %s", scores_path);
            goto done;
        }
    }
    if (!(fmr > 0))
        fmr = lk_model_default_fmr(m);
    lk_model_operating_point op;
    if (lk_model_operating_point_for_fmr(m, fmr, &op, &err) != LK_OK)
        goto done;
    double acc = lk_accuracy_at(v, y, ps->count, op.svm_threshold);
    j = cJSON_CreateObject();
    cJSON_AddStringToObject(j, "model_id", lk_model_id(m));
    cJSON_AddStringToObject(j, "pairs", pairs_file);
    cJSON_AddNumberToObject(j, "pairs_scored", (double)(ps->count - missing));
    cJSON_AddNumberToObject(j, "pairs_without_features", (double)missing);
    add_measures(j, &me);
    cJSON_AddNumberToObject(j, "target_fmr", op.target_fmr);
    cJSON_AddNumberToObject(j, "threshold", op.prob_threshold);
    cJSON_AddNumberToObject(j, "accuracy_at_threshold", acc);
    if (write_json_file(json_path, j) != 0)
        goto done_quiet;
    if (report_path) {
        report_summary_row rows[8] = {{"pairs scored", ""}, {"AUC", ""}, {"EER", ""}, {"FNMR at FMR 1%", ""},
                                      {"FNMR at FMR 0.1%", ""}, {"accuracy at the operating point", ""},
                                      {"smallest FMR supported (rule of 30)", ""}, {"model", ""}};
        snprintf(rows[0].value, sizeof rows[0].value, "%zu (%zu mated, %zu non-mated)",
                 ps->count - missing, me.n_genuine, me.n_impostor);
        snprintf(rows[1].value, sizeof rows[1].value, "%.4f", me.auc);
        snprintf(rows[2].value, sizeof rows[2].value, "%.2f %%", 100 * me.eer);
        snprintf(rows[3].value, sizeof rows[3].value, "%.2f %%", 100 * me.fnmr_1);
        snprintf(rows[4].value, sizeof rows[4].value, "%.2f %%", 100 * me.fnmr_01);
        snprintf(rows[5].value, sizeof rows[5].value, "%.2f %% (target FMR %g)", 100 * acc, fmr);
        snprintf(rows[6].value, sizeof rows[6].value, "%.2g", me.min_supported_fmr);
        snprintf(rows[7].value, sizeof rows[7].value, "%s", lk_model_id(m));
        char sub[1200];
        snprintf(sub, sizeof sub, "pairs: %s", pairs_file);
        if (write_report(report_path, "likeness evaluation report", sub, &roc, v, y, ps->count,
                         op.svm_threshold, rows, 8, NULL) != 0)
            goto done_quiet;
        fprintf(stderr, "evaluate: wrote %s\n", report_path);
    }
    status = CLI_OK;
    goto done_quiet;
done:
    cli_error(&err);
done_quiet:
    cJSON_Delete(j);
    lk_roc_free(&roc);
    free(v);
    free(y);
    free(paths);
    featset_free(&fs);
    lk_pair_set_free(ps);
    lk_engine_free(e);
    lk_model_free(m);
    return status;
}

/* ---- likeness lfw: the LFW View 2 ten-fold protocol ---- */

static void lfw_usage(FILE *f)
{
    recipe r;
    recipe_default(&r);
    fprintf(f,
            "usage: likeness lfw --lfw-root DIR [--json OUT.json] [--report OUT.html] [options]\n\n"
            "Runs the LFW View 2 protocol end to end (Huang et al., UMass TR 07-49, 2007):\n"
            "for each of the 10 folds of pairs.txt, trains the recipe on the other nine folds\n"
            "only (their pairs plus pairs generated from their identities: the 'unrestricted,\n"
            "no outside data' setting), picks the accuracy threshold on those training folds,\n"
            "and tests on the held-out fold. Prints the mean accuracy with its standard\n"
            "error, and EER and AUC of the pooled test scores.\n\n"
            "options:\n"
            "  --lfw-root DIR       folder with pairs.txt and lfw-deepfunneled/ (required)\n"
            "  --pairs FILE         protocol file (default DIR/pairs.txt)\n"
            "  --json FILE          write the results as JSON (default: standard output)\n"
            "  --report FILE        write an HTML report (ROC/DET curves, score histograms)\n"
            "  --folds N            run only the first N folds (default 10)\n"
            "  --pca N              PCA components (default %zu)\n"
            "  --no-whiten          keep PCA components unwhitened\n"
            "  --pairs-per-class N  generated training pairs per class (default %zu)\n"
            "  --svm-c C            SVM constant (default %g)\n"
            "  --threads N          feature extraction threads (default: all cores)\n"
            "  --cache FILE         keep extracted features in FILE and reuse them\n"
            "  --view1              the development protocol instead: train on\n"
            "                       pairsDevTrain.txt (and pairs generated from its\n"
            "                       identities), test on pairsDevTest.txt; tune with this,\n"
            "                       and run View 2 once per recipe\n"
            "  -h, --help           this help\n",
            r.pca_dim, r.pairs_per_class, r.C);
}

/* View 1 as a one-fold protocol: pairsDevTest.txt is fold 0 (the test
 * fold), pairsDevTrain.txt fold 1 (training). The two files share no
 * identity (LFW README). */
static lk_code load_view1(const char *root, lk_pair_set **out, lk_error *err)
{
    char a[4096], b[4096];
    snprintf(a, sizeof a, "%s/pairsDevTrain.txt", root);
    snprintf(b, sizeof b, "%s/pairsDevTest.txt", root);
    lk_pair_set *tr = NULL, *te = NULL;
    lk_code rc = lk_pairs_load_lfw(a, root, &tr, err);
    if (rc == LK_OK)
        rc = lk_pairs_load_lfw(b, root, &te, err);
    lk_pair_set *m = rc == LK_OK ? calloc(1, sizeof *m) : NULL;
    if (rc == LK_OK && m)
        m->pairs = malloc((tr->count + te->count + 1) * sizeof *m->pairs);
    if (rc == LK_OK && (!m || !m->pairs)) {
        free(m);
        m = NULL;
        rc = lk_error_set(err, LK_ERR_NOMEM, "out of memory");
    }
    if (rc == LK_OK) {
        for (size_t i = 0; i < te->count; i++) {
            m->pairs[m->count] = te->pairs[i];
            m->pairs[m->count++].fold = 0;
        }
        for (size_t i = 0; i < tr->count; i++) {
            m->pairs[m->count] = tr->pairs[i];
            m->pairs[m->count++].fold = 1;
        }
        m->n_folds = 2;
        /* The strings now belong to m. */
        tr->count = te->count = 0;
        *out = m;
    }
    lk_pair_set_free(tr);
    lk_pair_set_free(te);
    return rc;
}

static int name_in(const char *const *names, size_t n, const char *name)
{
    for (size_t i = 0; i < n; i++)
        if (!strcmp(names[i], name))
            return 1;
    return 0;
}

int cmd_lfw(int argc, char **argv)
{
    static const struct option opts[] = {{"lfw-root", required_argument, 0, 'L'},
                                         {"pairs", required_argument, 0, 'P'},
                                         {"json", required_argument, 0, 'j'},
                                         {"report", required_argument, 0, 'r'},
                                         {"folds", required_argument, 0, 'k'},
                                         {"pca", required_argument, 0, 'p'},
                                         {"no-whiten", no_argument, 0, 'W'},
                                         {"pairs-per-class", required_argument, 0, 'n'},
                                         {"svm-c", required_argument, 0, 'C'},
                                         {"threads", required_argument, 0, 't'},
                                         {"cache", required_argument, 0, 'c'},
                                         {"view1", no_argument, 0, 'V'},
                                         {"help", no_argument, 0, 'h'},
                                         {0, 0, 0, 0}};
    int view1 = 0;
    const char *root = NULL, *pairs_file = NULL, *json_path = NULL, *report_path = NULL;
    const char *cache = NULL;
    size_t folds = 10, threads = 0;
    recipe r;
    recipe_default(&r);
    int o;
    optind = 1;
    while ((o = getopt_long(argc, argv, "h", opts, NULL)) != -1) {
        int bad = 0;
        switch (o) {
        case 'L': root = optarg; break;
        case 'P': pairs_file = optarg; break;
        case 'j': json_path = optarg; break;
        case 'r': report_path = optarg; break;
        case 'k': bad = parse_size(optarg, &folds) || folds < 1 || folds > 10; break;
        case 'p': bad = parse_size(optarg, &r.pca_dim); break;
        case 'W': r.whiten = 0; break;
        case 'n': bad = parse_size(optarg, &r.pairs_per_class); break;
        case 'C': bad = parse_double(optarg, &r.C) || !(r.C > 0); break;
        case 't': bad = parse_size(optarg, &threads); break;
        case 'c': cache = optarg; break;
        case 'V': view1 = 1; break;
        case 'h': lfw_usage(stdout); return CLI_OK;
        default: lfw_usage(stderr); return CLI_USAGE;
        }
        if (bad) {
            cli_errorf("invalid value '%s'; 'likeness lfw --help' lists the options", optarg);
            return CLI_USAGE;
        }
    }
    if (!root || optind != argc) {
        cli_errorf("lfw needs --lfw-root DIR (the folder with pairs.txt and lfw-deepfunneled/)");
        return CLI_USAGE;
    }
    char pbuf[4096], dbuf[4096];
    if (!pairs_file) {
        snprintf(pbuf, sizeof pbuf, "%s/pairs.txt", root);
        pairs_file = pbuf;
    }
    snprintf(dbuf, sizeof dbuf, "%s/lfw-deepfunneled", root);

    lk_error err;
    int status = CLI_FAIL;
    lk_engine_config cfg;
    lk_engine_config_default(&cfg);
    cfg.center_fallback = 1; /* LFW images are centred on one face; every pair needs a score */
    lk_engine *e = lk_engine_new(&cfg, &err);
    lk_pair_set *ps = NULL;
    lk_dataset *ds = NULL;
    featset fs = {0};
    const char **paths = NULL;
    double *test_v = NULL;
    int *test_y = NULL;
    double acc[10] = {0}, eer_fold[10] = {0};
    lk_roc roc = {0};
    cJSON *j = NULL;
    if (view1)
        folds = 1;
    if (!e ||
        (view1 ? load_view1(root, &ps, &err) : lk_pairs_load_lfw(pairs_file, root, &ps, &err)) !=
            LK_OK ||
        lk_dataset_scan(dbuf, 1, &ds, &err) != LK_OK)
        goto fail;
    if (!view1 && ps->n_folds < 10) {
        lk_error_set(&err, LK_ERR_DATA, "%s has %d folds; View 2 needs 10", pairs_file, ps->n_folds);
        goto fail;
    }
    if (featset_build_dataset(e, ds, (int)threads, cache, &fs, &err) != LK_OK)
        goto fail;
    test_v = malloc((ps->count + 1) * sizeof *test_v);
    test_y = malloc((ps->count + 1) * sizeof *test_y);
    if (!test_v || !test_y)
        goto nomem;
    size_t n_test = 0;
    cJSON *fold_json = cJSON_CreateArray();
    for (size_t f = 0; f < folds; f++) {
        double t0 = cli_now();
        /* Identities of the training folds (names in their pairs). */
        size_t cap = 2 * ps->count, n_names = 0;
        const char **names = malloc((cap + 1) * sizeof *names);
        lk_pair *tr = malloc((ps->count + 1) * sizeof *tr);
        lk_pair *te = malloc((ps->count + 1) * sizeof *te);
        lk_identity *ids = malloc((ds->count + 1) * sizeof *ids);
        size_t n_tr = 0, n_te = 0, n_ids = 0;
        lk_pair_set *gen = NULL;
        lk_model *m = lk_model_new();
        lk_pair *all_tr = NULL;
        size_t *rows = NULL, n_rows = 0;
        double *v = NULL;
        int *y = NULL;
        int ok = names && tr && te && ids && m;
        for (size_t i = 0; ok && i < ps->count; i++) {
            const lk_pair *p = &ps->pairs[i];
            if ((size_t)p->fold == f) {
                te[n_te++] = *p;
                continue;
            }
            tr[n_tr++] = *p;
            if (!name_in(names, n_names, p->name_a))
                names[n_names++] = p->name_a;
            if (!name_in(names, n_names, p->name_b))
                names[n_names++] = p->name_b;
        }
        for (size_t i = 0; ok && i < ds->count; i++)
            if (name_in(names, n_names, ds->identities[i].name))
                ids[n_ids++] = ds->identities[i];
        lk_pairgen_params gp = {.seed = r.seed + f,
                                .calib_fraction = 0,
                                .train_pairs_per_class = r.pairs_per_class,
                                .calib_pairs_per_class = 0};
        if (ok && r.pairs_per_class > 0 &&
            lk_pairs_generate(ids, n_ids, &gp, &gen, NULL, &err) != LK_OK)
            ok = 0;
        size_t n_gen = gen ? gen->count : 0;
        all_tr = ok ? malloc((n_tr + n_gen + 1) * sizeof *all_tr) : NULL;
        if (ok && !all_tr)
            ok = 0;
        if (ok) {
            memcpy(all_tr, tr, n_tr * sizeof *tr);
            if (n_gen)
                memcpy(all_tr + n_tr, gen->pairs, n_gen * sizeof *all_tr);
        }
        /* PCA rows: every image of the training identities. */
        if (ok) {
            rows = malloc((fs.n + 1) * sizeof *rows);
            ok = rows != NULL;
            for (size_t i = 0; ok && i < n_ids; i++)
                for (size_t k = 0; k < ids[i].n_paths; k++) {
                    long rr = featset_find(&fs, ids[i].paths[k]);
                    if (rr >= 0 && fs.ok[rr])
                        rows[n_rows++] = (size_t)rr;
                }
        }
        fprintf(stderr, "lfw: fold %zu: %zu training identities, %zu protocol + %zu generated "
                        "training pairs, %zu test pairs\n", f + 1, n_ids, n_tr, n_gen, n_te);
        size_t used = 0, miss = 0;
        if (ok && recipe_fit(&r, lk_engine_feature_config(e), &fs, rows, n_rows, all_tr,
                             n_tr + n_gen, m, &used, &err) != 0)
            ok = 0;
        /* Threshold: best accuracy on the training folds' protocol pairs.
         * Training and test pairs are scored in one call, so each image is
         * projected once. */
        double thr = 0, tr_acc = 0;
        const double *tv = NULL;
        const int *ty = NULL;
        if (ok) {
            lk_pair *both = malloc((n_tr + n_te + 1) * sizeof *both);
            v = malloc((n_tr + n_te + 1) * sizeof *v);
            y = malloc((n_tr + n_te + 1) * sizeof *y);
            ok = both && v && y;
            if (ok) {
                memcpy(both, tr, n_tr * sizeof *tr);
                memcpy(both + n_tr, te, n_te * sizeof *te);
                ok = recipe_score(m, &fs, both, n_tr + n_te, v, y, NULL, &err) == 0 &&
                     lk_best_accuracy_threshold(v, y, n_tr, &thr, &tr_acc, &err) == LK_OK;
            }
            free(both);
            tv = v + n_tr;
            ty = y + n_tr;
            for (size_t i = 0; ok && i < n_te; i++)
                miss += !isfinite(tv[i]);
        }
        if (ok) {
            acc[f] = lk_accuracy_at(tv, ty, n_te, thr);
            lk_roc fr = {0};
            if (lk_roc_compute(tv, ty, n_te, &fr, &err) == LK_OK) {
                eer_fold[f] = lk_roc_eer(&fr, NULL);
                lk_roc_free(&fr);
            }
            memcpy(test_v + n_test, tv, n_te * sizeof *tv);
            memcpy(test_y + n_test, ty, n_te * sizeof *ty);
            n_test += n_te;
            fprintf(stderr, "lfw: fold %zu: accuracy %.2f %% (training folds %.2f %%), EER "
                            "%.2f %%, %.0f s\n", f + 1, 100 * acc[f], 100 * tr_acc,
                    100 * eer_fold[f], cli_now() - t0);
            cJSON *fj = cJSON_CreateObject();
            cJSON_AddNumberToObject(fj, "fold", (double)(f + 1));
            cJSON_AddNumberToObject(fj, "accuracy", acc[f]);
            cJSON_AddNumberToObject(fj, "eer", eer_fold[f]);
            cJSON_AddNumberToObject(fj, "training_pairs", (double)used);
            cJSON_AddNumberToObject(fj, "test_pairs_without_features", (double)miss);
            cJSON_AddItemToArray(fold_json, fj);
        }
        free(names);
        free(tr);
        free(te);
        free(ids);
        free(all_tr);
        free(rows);
        free(v);
        free(y);
        lk_pair_set_free(gen);
        lk_model_free(m);
        if (!ok) {
            cJSON_Delete(fold_json);
            goto fail;
        }
    }
    {
        double mean, se;
        lk_mean_stderr(acc, folds, &mean, &se);
        measures me;
        if (compute_measures(test_v, test_y, n_test, &me, &roc, &err) != 0) {
            cJSON_Delete(fold_json);
            goto fail;
        }
        double eer_mean, eer_se;
        lk_mean_stderr(eer_fold, folds, &eer_mean, &eer_se);
        char recipe_text[256];
        recipe_describe(&r, recipe_text, sizeof recipe_text);
        j = cJSON_CreateObject();
        cJSON_AddStringToObject(j, "protocol", view1 ? "LFW View 1 (development): DevTrain -> DevTest"
                                                      : "LFW View 2, unrestricted, no outside data");
        cJSON_AddStringToObject(j, "recipe", recipe_text);
        cJSON_AddStringToObject(j, "feature_config", lk_engine_feature_config(e));
        cJSON_AddNumberToObject(j, "folds", (double)folds);
        cJSON_AddNumberToObject(j, "mean_accuracy", mean);
        cJSON_AddNumberToObject(j, "standard_error", se);
        cJSON_AddNumberToObject(j, "mean_fold_eer", eer_mean);
        cJSON *pooled = cJSON_AddObjectToObject(j, "pooled_test_scores");
        add_measures(pooled, &me);
        cJSON_AddItemToObject(j, "per_fold", fold_json);
        fprintf(stderr, "lfw: View %d mean accuracy %.2f %% +- %.2f (standard error), mean EER "
                        "%.2f %%\n", view1 ? 1 : 2, 100 * mean, 100 * se, 100 * eer_mean);
        if (write_json_file(json_path, j) != 0)
            goto quiet;
        if (report_path) {
            report_summary_row rows[6] = {{"mean accuracy (10 folds)", ""}, {"mean EER per fold", ""},
                                          {"pooled AUC", ""}, {"pooled FNMR at FMR 1%", ""},
                                          {"recipe", ""}, {"features", ""}};
            snprintf(rows[0].value, sizeof rows[0].value, "%.2f %% +- %.2f (standard error)",
                     100 * mean, 100 * se);
            snprintf(rows[1].value, sizeof rows[1].value, "%.2f %%", 100 * eer_mean);
            snprintf(rows[2].value, sizeof rows[2].value, "%.4f", me.auc);
            snprintf(rows[3].value, sizeof rows[3].value, "%.2f %%", 100 * me.fnmr_1);
            snprintf(rows[4].value, sizeof rows[4].value, "%.120s", recipe_text);
            snprintf(rows[5].value, sizeof rows[5].value, "%.120s", lk_engine_feature_config(e));
            if (write_report(report_path, "likeness: LFW View 2 (10 folds)",
                             "Curves pool the test scores of the ten fold models.", &roc, test_v,
                             test_y, n_test, NAN, rows, 6,
                             "<p class='muted'>Labeled Faces in the Wild: G. B. Huang, M. Ramesh, "
                             "T. Berg, E. Learned-Miller, UMass Amherst TR 07-49, 2007.</p>") != 0)
                goto quiet;
        }
    }
    status = CLI_OK;
    goto quiet;
nomem:
    lk_error_set(&err, LK_ERR_NOMEM, "out of memory");
fail:
    cli_error(&err);
quiet:
    cJSON_Delete(j);
    lk_roc_free(&roc);
    free(test_v);
    free(test_y);
    free(paths);
    featset_free(&fs);
    lk_dataset_free(ds);
    lk_pair_set_free(ps);
    lk_engine_free(e);
    return status;
}
