/* The model's public description as JSON (cJSON). Built from the public
 * getters only, so it can never leak a parameter the header does not hand
 * out; the weights, projection and standardisation are left out on purpose. */
#include "likeness/model.h"

#include <cjson/cJSON.h>

char *lk_model_to_json(const lk_model *m)
{
    if (!m)
        return NULL;
    cJSON *o = cJSON_CreateObject();
    if (!o)
        return NULL;
    bool ok = true;
    ok &= cJSON_AddStringToObject(o, "id", lk_model_id(m)) != NULL;
    ok &= cJSON_AddNumberToObject(o, "format_version", LK_MODEL_FORMAT_VERSION) != NULL;
    ok &= cJSON_AddStringToObject(o, "checksum_blake2b256", lk_model_checksum(m)) != NULL;
    cJSON *f = cJSON_AddObjectToObject(o, "features");
    ok &= f != NULL;
    if (f) {
        ok &= cJSON_AddStringToObject(f, "config", lk_model_feature_config(m)) != NULL;
        ok &= cJSON_AddNumberToObject(f, "dimension", (double)lk_model_feature_dim(m)) != NULL;
    }
    size_t k = 0;
    bool proj = lk_model_projection(m, &k, NULL, NULL, NULL);
    ok &= cJSON_AddBoolToObject(o, "projection", proj) != NULL;
    if (proj)
        ok &= cJSON_AddStringToObject(o, "projection_encoding",
                                      lk_model_projection_encoding(m) == LK_MODEL_F64
                                          ? "f64"
                                          : "f32") != NULL;
    ok &= cJSON_AddStringToObject(o, "projection_norm",
                                  lk_model_projection_norm(m) == LK_PROJ_NORM_L2 ? "l2"
                                                                                 : "none") != NULL;
    ok &= cJSON_AddBoolToObject(o, "standardisation",
                                lk_model_standardisation(m, NULL, NULL, NULL)) != NULL;
    ok &= cJSON_AddNumberToObject(o, "pair_dimension", (double)lk_model_pair_dim(m)) != NULL;
    double a, b;
    if (lk_model_platt(m, &a, &b)) {
        cJSON *p = cJSON_AddObjectToObject(o, "platt");
        ok &= p && cJSON_AddNumberToObject(p, "A", a) && cJSON_AddNumberToObject(p, "B", b);
    }
    size_t n;
    const lk_model_operating_point *rows = lk_model_operating_points(m, &n);
    cJSON *arr = cJSON_AddArrayToObject(o, "operating_points");
    ok &= arr != NULL;
    for (size_t i = 0; arr && i < n; i++) {
        cJSON *r = cJSON_CreateObject();
        if (!r || !cJSON_AddItemToArray(arr, r)) {
            cJSON_Delete(r);
            ok = false;
            break;
        }
        ok &= cJSON_AddNumberToObject(r, "target_fmr", rows[i].target_fmr) &&
              cJSON_AddNumberToObject(r, "probability_threshold", rows[i].prob_threshold) &&
              cJSON_AddNumberToObject(r, "svm_threshold", rows[i].svm_threshold) &&
              cJSON_AddNumberToObject(r, "measured_fmr", rows[i].measured_fmr) &&
              cJSON_AddNumberToObject(r, "measured_fnmr", rows[i].measured_fnmr) &&
              cJSON_AddNumberToObject(r, "impostor_comparisons",
                                      (double)rows[i].impostor_comparisons) &&
              cJSON_AddNumberToObject(r, "genuine_comparisons",
                                      (double)rows[i].genuine_comparisons) &&
              cJSON_AddBoolToObject(r, "supported", rows[i].supported);
    }
    ok &= cJSON_AddNumberToObject(o, "default_target_fmr", lk_model_default_fmr(m)) != NULL;
    lk_model_provenance pv = lk_model_get_provenance(m);
    cJSON *p = cJSON_AddObjectToObject(o, "provenance");
    ok &= p && cJSON_AddStringToObject(p, "dataset", pv.dataset) &&
          cJSON_AddNumberToObject(p, "training_pairs", (double)pv.training_pairs) &&
          cJSON_AddNumberToObject(p, "calibration_pairs", (double)pv.calibration_pairs) &&
          cJSON_AddNumberToObject(p, "evaluation_pairs", (double)pv.evaluation_pairs) &&
          cJSON_AddStringToObject(p, "created_utc", pv.created_utc) &&
          cJSON_AddStringToObject(p, "command_line", pv.command_line) &&
          cJSON_AddStringToObject(p, "software_version", pv.software_version);
    char *s = ok ? cJSON_PrintUnformatted(o) : NULL;
    cJSON_Delete(o);
    return s;
}
