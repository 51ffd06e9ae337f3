/* What the workers do: verifications, enrolments, template metadata and
 * erasure, the model description, audit records, readiness; and the RFC
 * 9457 problem documents every refusal is answered with. */
#include <cjson/cJSON.h>
#include <math.h>
#include <sodium.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "handlers.h"

/* ---- numbers ---- */

cJSON *lk_json_add_number(cJSON *obj, const char *name, double v)
{
    /* cJSON prints 15 significant digits when they read back as "close" to
     * the value, which can change the last bit; a score must print as the
     * same double the audit log holds. The shortest of %.15g..%.17g that
     * reads back exactly (17 always does: IEEE 754-2008 section 5.12.2). */
    if (!isfinite(v))
        return cJSON_AddNullToObject(obj, name);
    char buf[40];
    for (int digits = 15; digits <= 17; digits++) {
        snprintf(buf, sizeof buf, "%.*g", digits, v);
        if (strtod(buf, NULL) == v)
            break;
    }
    return cJSON_AddRawToObject(obj, name, buf);
}

/* ---- problem types (RFC 9457) ---- */

typedef struct problem_def {
    const char *slug;
    int status;
    const char *title;
    const char *help; /* served at /problems/<slug> */
} problem_def;

static const problem_def problems[] = {
    {"no-face", 422, "No face found",
     "No face was found in the image. Use a photo in which one face is seen from the front, "
     "well lit, filling at least a tenth of the picture's shorter side."},
    {"multiple-faces", 422, "More than one face",
     "The image shows more than one face, so it is not clear whom to compare. Crop the photo to "
     "the one person, or take a new photo with only that person in view."},
    {"face-too-small", 422, "Face too small",
     "The face is too small for a reliable comparison. Move the camera closer or crop the photo "
     "around the face."},
    {"poor-quality", 422, "Image quality too low",
     "The face was found but the image is too blurred, too dark or bright, or the head is tilted "
     "too far. The 'reasons' member names which; take a new photo."},
    {"unsupported-image", 422, "Unsupported image",
     "The image is not a JPEG or PNG, or a variant of them that is not supported. Send a baseline "
     "or progressive JPEG, or a PNG."},
    {"corrupt-image", 422, "Corrupt image",
     "The image data is truncated or damaged. Send the file again, unmodified."},
    {"image-too-large", 422, "Image too large",
     "The image's declared dimensions exceed the limit (40 megapixels, 16384 pixels a side). "
     "Scale it down before sending."},
    {"template-not-found", 404, "Template not found",
     "No template with this id exists: it was never enrolled, has expired, or was deleted."},
    {"template-unusable", 409, "Template unusable",
     "The stored template cannot be used: it failed its integrity check, was made with another "
     "model or feature configuration, or its key is not available. Enrol the subject again."},
    {"unauthorised", 401, "Authentication required",
     "Send 'Authorization: Bearer <API key>' with a key made by 'likeness keys api-create', or a "
     "client certificate mapped to scopes in the service's configuration."},
    {"forbidden", 403, "Scope missing",
     "The caller is authenticated but its key lacks the scope this operation needs "
     "('required_scope'). Ask the operator for a key with that scope."},
    {"rate-limited", 429, "Too many requests",
     "The caller has used up its request budget. Wait 'retry_after' seconds (the Retry-After "
     "header) before retrying."},
    {"payload-too-large", 413, "Request body too large",
     "The request body exceeds the service's limit ('limit_bytes'). Send smaller images."},
    {"malformed-request", 400, "Malformed request",
     "The request could not be understood: bad JSON, base64 or multipart, a missing or "
     "unexpected field ('field'), or a bad query parameter. The 'detail' member says which."},
    {"unsupported-media-type", 415, "Unsupported media type",
     "Send multipart/form-data or application/json."},
    {"not-found", 404, "No such resource", "There is no resource at this path."},
    {"method-not-allowed", 405, "Method not allowed",
     "This resource does not support the method; the Allow header lists the ones it does."},
    {"overloaded", 503, "Service overloaded",
     "Every worker is busy and the queue is full. Retry after 'retry_after' seconds."},
    {"not-ready", 503, "Service not ready",
     "The service cannot take work now (starting, stopping, or its store is unavailable). "
     "Retry shortly or on another replica."},
    {"internal-error", 500, "Internal error",
     "The service failed for a reason that is not the request's fault; the request id in the "
     "log says more. Retrying may help."},
};
#define NPROBLEMS (sizeof problems / sizeof problems[0])

static const problem_def *problem_find(const char *slug)
{
    for (size_t i = 0; i < NPROBLEMS; i++)
        if (!strcmp(problems[i].slug, slug))
            return &problems[i];
    return NULL;
}

void srv_add_header(srv_request *r, const char *name, const char *value)
{
    srv_reply *o = &r->out;
    if (o->n_headers == SRV_MAX_HEADERS)
        return;
    snprintf(o->headers[o->n_headers][0], sizeof o->headers[0][0], "%s", name);
    snprintf(o->headers[o->n_headers][1], sizeof o->headers[0][1], "%s", value);
    o->n_headers++;
}

void srv_reply_text(srv_request *r, int status, const char *content_type, char *body)
{
    free(r->out.body);
    r->out.status = status;
    snprintf(r->out.content_type, sizeof r->out.content_type, "%s", content_type);
    r->out.body = body;
    r->out.len = body ? strlen(body) : 0;
}

void srv_reply_json_text(srv_request *r, int status, const char *json)
{
    srv_reply_text(r, status, "application/json", strdup(json));
}

static void reply_json(srv_request *r, int status, cJSON *j, const char *ctype)
{
    char *s = cJSON_PrintUnformatted(j);
    cJSON_Delete(j);
    if (!s) {
        srv_reply_text(r, 500, "application/problem+json",
                       strdup("{\"type\":\"/problems/internal-error\",\"title\":\"Internal error\","
                              "\"status\":500,\"detail\":\"out of memory\"}"));
        return;
    }
    srv_reply_text(r, status, ctype, s);
}

/* The common members of a problem; callers add their extensions. */
static cJSON *problem_new(srv_request *r, const char *slug, const char *detail)
{
    const problem_def *p = problem_find(slug);
    if (!p)
        p = problem_find("internal-error");
    cJSON *j = cJSON_CreateObject();
    char type[96];
    snprintf(type, sizeof type, "/problems/%s", p->slug);
    cJSON_AddStringToObject(j, "type", type);
    cJSON_AddStringToObject(j, "title", p->title);
    cJSON_AddNumberToObject(j, "status", p->status);
    cJSON_AddStringToObject(j, "detail", detail ? detail : p->help);
    cJSON_AddStringToObject(j, "instance", r->path);
    cJSON_AddStringToObject(j, "request_id", r->request_id);
    return j;
}

static void problem_send(srv_request *r, cJSON *j)
{
    int status = (int)cJSON_GetNumberValue(cJSON_GetObjectItem(j, "status"));
    reply_json(r, status, j, "application/problem+json");
}

void srv_problem(srv_request *r, const char *slug, const char *detail)
{
    cJSON *j = problem_new(r, slug, detail);
    char v[32];
    if (!strcmp(slug, "unauthorised"))
        srv_add_header(r, "WWW-Authenticate", "Bearer realm=\"likeness\"");
    else if (!strcmp(slug, "rate-limited") || !strcmp(slug, "overloaded")) {
        int secs = !strcmp(slug, "overloaded") ? 1 : (int)ceil(r->retry_after);
        if (secs < 1)
            secs = 1;
        snprintf(v, sizeof v, "%d", secs);
        srv_add_header(r, "Retry-After", v);
        lk_json_add_number(j, "retry_after", secs);
    } else if (!strcmp(slug, "payload-too-large")) {
        lk_json_add_number(j, "limit_bytes", (double)r->srv->cfg.max_body_bytes);
    } else if (!strcmp(slug, "forbidden")) {
        unsigned need = 0;
        switch (r->route) {
        case RT_VERIFY: need = LK_SCOPE_VERIFY; break;
        case RT_TEMPLATES: need = LK_SCOPE_ENROL; break;
        case RT_TEMPLATE: need = strcmp(r->method, "DELETE") ? LK_SCOPE_ENROL : LK_SCOPE_DELETE; break;
        case RT_AUDIT: need = LK_SCOPE_AUDIT; break;
        }
        char sc[64] = "";
        lk_scopes_format(need, sc, sizeof sc);
        cJSON_AddStringToObject(j, "required_scope", sc);
    } else if (!strcmp(slug, "not-ready")) {
        srv_add_header(r, "Retry-After", "1");
    }
    problem_send(r, j);
}

void srv_problem_page(srv_request *r)
{
    const problem_def *p = problem_find(r->path_arg);
    if (!p) {
        srv_problem(r, "not-found", "no such problem type");
        return;
    }
    char *t = NULL;
    size_t n = strlen(p->title) + strlen(p->help) + 64;
    t = malloc(n);
    if (t)
        snprintf(t, n, "%s (HTTP %d)\n\n%s\n", p->title, p->status, p->help);
    srv_reply_text(r, 200, "text/plain; charset=utf-8", t);
}

/* A failure that is not the request's fault: logged with the request id
 * and the module's message (never request data), answered 500. */
static void internal_error(srv_request *r, const char *what, const lk_error *e)
{
    srv_log("%s: %s failed: %s", r->request_id, what, e ? e->message : "out of memory");
    srv_problem(r, "internal-error", NULL);
}

static void template_not_found(srv_request *r, const char *id)
{
    cJSON *j = problem_new(r, "template-not-found", NULL);
    cJSON_AddStringToObject(j, "template_id", id);
    problem_send(r, j);
}

static void problem_field(srv_request *r, const char *detail, const char *field)
{
    cJSON *j = problem_new(r, "malformed-request", detail);
    if (field && *field)
        cJSON_AddStringToObject(j, "field", field);
    problem_send(r, j);
}

/* ---- requests and worker state ---- */

srv_request *srv_request_new(lk_server *s, struct MHD_Connection *conn)
{
    srv_request *r = calloc(1, sizeof *r);
    if (!r)
        return NULL;
    r->srv = s;
    r->conn = conn;
    r->t0 = srv_now();
    lk_uuid_v4(r->request_id);
    return r;
}

void srv_request_free(srv_request *r)
{
    free(r->body);
    free(r->out.body);
    free(r);
}

struct srv_worker_state {
    float *feat;        /* one image's features */
    double *proj_probe; /* projected probe */
    double *proj_other; /* projected reference, or the template */
    double *acc;        /* enrolment sum */
    double *scratch;    /* model scratch */
    size_t k;
};

srv_worker_state *srv_worker_state_new(lk_server *s)
{
    srv_worker_state *w = calloc(1, sizeof *w);
    if (!w)
        return NULL;
    size_t d = lk_engine_feature_dim(s->engine);
    w->k = lk_model_pair_dim(s->model);
    w->feat = malloc(d * sizeof *w->feat);
    w->proj_probe = malloc(w->k * sizeof(double));
    w->proj_other = malloc(w->k * sizeof(double));
    w->acc = malloc(w->k * sizeof(double));
    w->scratch = malloc(lk_model_scratch_size(s->model) * sizeof(double));
    if (!w->feat || !w->proj_probe || !w->proj_other || !w->acc || !w->scratch) {
        srv_worker_state_free(w);
        return NULL;
    }
    return w;
}

void srv_worker_state_free(srv_worker_state *w)
{
    if (!w)
        return;
    free(w->feat);
    free(w->proj_probe);
    free(w->proj_other);
    free(w->acc);
    free(w->scratch);
    free(w);
}

/* ---- core objects ---- */

lk_code srv_core_open(lk_server *s, lk_error *err)
{
    const lk_config *c = &s->cfg;
    pthread_mutex_init(&s->kc.mu, NULL);
    pthread_mutex_init(&s->key_sync_mu, NULL);
    s->model = lk_model_load(c->model_file, err);
    if (!s->model)
        return err ? err->code : LK_ERR_MODEL_FORMAT;
    lk_engine_config ec;
    lk_engine_config_default(&ec);
    s->engine = lk_engine_new(&ec, err);
    if (!s->engine)
        return err ? err->code : LK_ERR_INTERNAL;
    lk_code rc = lk_model_check_features(s->model, lk_engine_feature_config(s->engine),
                                         lk_engine_feature_dim(s->engine), err);
    if (rc)
        return rc;
    s->target_fmr = c->target_fmr > 0 ? c->target_fmr : lk_model_default_fmr(s->model);
    rc = lk_model_threshold_for_fmr(s->model, s->target_fmr, &s->threshold, err);
    if (rc)
        return rc;
    s->keys = lk_keyring_load(c->key_file_path, err);
    if (!s->keys)
        return err ? err->code : LK_ERR_KEY;
    s->store = lk_store_open(c->store_url, err);
    if (!s->store)
        return err ? err->code : LK_ERR_STORE;
    /* The data keys every replica shares (docs/key-file.md): without them
     * the templates sealed under them cannot be opened. */
    rc = lk_store_sync_keys(s->store, s->keys, err);
    if (rc)
        return rc;
    s->key_sync_at = srv_now();
    srv_log("model %s (target FMR %g, threshold %.6f), store schema v%d, %llu templates",
            lk_model_id(s->model), s->target_fmr, s->threshold, lk_store_schema_version(s->store),
            (unsigned long long)lk_store_template_count(s->store));
    return LK_OK;
}

void srv_core_shutdown(lk_server *s)
{
    lk_error e;
    if (s->store && s->keys && lk_store_audit_checkpoint(s->store, s->keys, &e) != LK_OK)
        srv_log("final audit checkpoint failed: %s", e.message);
}

void srv_core_close(lk_server *s)
{
    lk_store_close(s->store);
    lk_keyring_free(s->keys);
    lk_engine_free(s->engine);
    lk_model_free(s->model);
    s->store = NULL;
    s->keys = NULL;
    s->engine = NULL;
    s->model = NULL;
    pthread_mutex_destroy(&s->kc.mu);
    pthread_mutex_destroy(&s->key_sync_mu);
}

/* ---- audit ---- */

/* Appends one audit record, with a template change in the same
 * transaction when change is not NULL. On failure *e (if given) says why. */
static lk_code audit_change(lk_server *s, const srv_request *r, lk_audit_op op,
                            const char *template_id, const char *decision, double score,
                            double threshold, const char *reasons, int status,
                            const lk_store_change *change, lk_error *eout)
{
    lk_audit_record rec;
    lk_audit_record_init(&rec, op);
    snprintf(rec.caller, sizeof rec.caller, "%s", r->caller[0] ? r->caller : "anonymous");
    snprintf(rec.request_id, sizeof rec.request_id, "%s", r->request_id);
    snprintf(rec.template_id, sizeof rec.template_id, "%s", template_id ? template_id : "");
    snprintf(rec.decision, sizeof rec.decision, "%s", decision ? decision : "");
    rec.score = score;
    rec.threshold = threshold;
    if (op == LK_AUDIT_VERIFY || op == LK_AUDIT_ENROL)
        snprintf(rec.model_id, sizeof rec.model_id, "%s", lk_model_id(s->model));
    snprintf(rec.reasons, sizeof rec.reasons, "%s", reasons ? reasons : "");
    rec.status = status;
    lk_error e;
    lk_code rc = lk_store_audit_append_change(s->store, &rec, change, s->keys,
                                              s->cfg.checkpoint_interval, &e);
    if (rc && rc != LK_ERR_NOT_FOUND)
        srv_log("%s: audit append failed: %s", r->request_id, e.message);
    if (eout)
        *eout = e;
    return rc;
}

static lk_code audit(lk_server *s, const srv_request *r, lk_audit_op op, const char *template_id,
                     const char *decision, double score, double threshold, const char *reasons,
                     int status)
{
    return audit_change(s, r, op, template_id, decision, score, threshold, reasons, status, NULL,
                        NULL);
}

void srv_purge_expired(lk_server *s)
{
    uint64_t n = 0;
    lk_error e;
    if (lk_store_template_purge_expired(s->store, srv_unix_ms(), &n, &e)) {
        srv_log("purge of expired templates failed: %s", e.message);
        return;
    }
    if (n) {
        srv_request r;
        memset(&r, 0, sizeof r);
        snprintf(r.caller, sizeof r.caller, "service");
        char count[32];
        snprintf(count, sizeof count, "expired:%llu", (unsigned long long)n);
        audit(s, &r, LK_AUDIT_PURGE, "", "ok", NAN, NAN, count, 0);
        srv_log("purged %llu expired templates", (unsigned long long)n);
    }
}

/* ---- authentication ---- */

void srv_auth_token(lk_server *s, const char *token, srv_request *r)
{
    char id[LK_APIKEY_ID_HEX + 1];
    if (lk_apikey_parse(token, id, NULL) != LK_OK) {
        r->auth_failure = "malformed_token";
        return;
    }
    snprintf(r->caller, sizeof r->caller, "key:%s", id);
    lk_apikey_meta k;
    bool found = false;
    double now = srv_now();
    /* Rows are cached for 5 s: a revocation takes effect within that time
     * (documented in the README) without a store read per request. */
    pthread_mutex_lock(&s->kc.mu);
    for (size_t i = 0; i < s->kc.n; i++)
        if (!strcmp(s->kc.rows[i].id, id) && now - s->kc.loaded_at[i] < 5.0) {
            k = s->kc.rows[i];
            found = true;
            break;
        }
    pthread_mutex_unlock(&s->kc.mu);
    if (!found) {
        if (lk_store_apikey_get(s->store, id, &k, NULL) != LK_OK) {
            r->auth_failure = "unknown_key";
            return;
        }
        pthread_mutex_lock(&s->kc.mu);
        size_t slot = s->kc.n;
        for (size_t i = 0; i < s->kc.n; i++)
            if (!strcmp(s->kc.rows[i].id, id))
                slot = i;
        if (slot == SRV_KEY_CACHE)
            slot = (size_t)(randombytes_uniform(SRV_KEY_CACHE));
        else if (slot == s->kc.n)
            s->kc.n++;
        s->kc.rows[slot] = k;
        s->kc.loaded_at[slot] = now;
        pthread_mutex_unlock(&s->kc.mu);
    }
    uint8_t h[32];
    if (lk_apikey_hash(s->keys, token, h, NULL) != LK_OK || !lk_apikey_hash_equal(h, k.hash)) {
        r->auth_failure = "wrong_secret";
        return;
    }
    if (k.revoked_ms) {
        r->auth_failure = "revoked_key";
        return;
    }
    r->authenticated = true;
    r->scopes = k.scopes;
}

/* ---- images ---- */

cJSON *lk_server_quality_json(const lk_analysis *a)
{
    const lk_quality *q = &a->quality;
    cJSON *o = cJSON_CreateObject();
    cJSON_AddBoolToObject(o, "usable", q->usable);
    cJSON *reasons = cJSON_AddArrayToObject(o, "reasons");
    cJSON *notes = cJSON_AddArrayToObject(o, "notes");
    for (int i = 0; i < LK_QR_COUNT; i++) {
        uint32_t bit = 1u << i;
        if (!(q->reasons & bit))
            continue;
        cJSON_AddItemToArray((bit & LK_QR_BLOCKING) ? reasons : notes,
                             cJSON_CreateString(lk_quality_reason_name(bit)));
    }
    if (a->center_fallback)
        cJSON_AddItemToArray(notes, cJSON_CreateString("center_fallback"));
    lk_json_add_number(o, "face_count", q->face_count);
    if (a->find.face_count > 0 || a->center_fallback) {
        cJSON *box = cJSON_AddObjectToObject(o, "face");
        const lk_rect *b = &a->find.primary;
        lk_json_add_number(box, "x", b->x);
        lk_json_add_number(box, "y", b->y);
        lk_json_add_number(box, "width", b->width);
        lk_json_add_number(box, "height", b->height);
        if (a->find.search_angle_deg != 0)
            lk_json_add_number(box, "search_angle_deg", a->find.search_angle_deg);
        cJSON *eyes = cJSON_AddObjectToObject(o, "eyes");
        cJSON *l = cJSON_AddObjectToObject(eyes, "left");
        lk_json_add_number(l, "x", a->find.eyes.left.x);
        lk_json_add_number(l, "y", a->find.eyes.left.y);
        cJSON *rr = cJSON_AddObjectToObject(eyes, "right");
        lk_json_add_number(rr, "x", a->find.eyes.right.x);
        lk_json_add_number(rr, "y", a->find.eyes.right.y);
        cJSON_AddBoolToObject(eyes, "estimated", a->find.eyes.eyes_estimated);
        lk_json_add_number(o, "face_size", q->face_size);
        lk_json_add_number(o, "eye_distance", q->eye_distance);
        lk_json_add_number(o, "roll_deg", q->roll_deg);
        lk_json_add_number(o, "sharpness", q->sharpness);
        lk_json_add_number(o, "mean_gray", q->mean_gray);
        lk_json_add_number(o, "clipped_fraction", q->clipped);
    }
    lk_json_add_number(o, "image_width", a->width);
    lk_json_add_number(o, "image_height", a->height);
    return o;
}

cJSON *lk_server_timings_json(const lk_analysis *a)
{
    static const char *const names[LK_STAGE_COUNT] = {"decode_ms", "detect_ms", "align_ms",
                                                      "features_ms"};
    cJSON *o = cJSON_CreateObject();
    for (int i = 0; i < LK_STAGE_COUNT; i++)
        lk_json_add_number(o, names[i], a->stage_ms[i]);
    return o;
}

void lk_uuid_v4(char out[37])
{
    /* RFC 9562 section 5.4: 122 random bits, version 4, variant 10. */
    unsigned char b[16];
    randombytes_buf(b, sizeof b);
    b[6] = (unsigned char)((b[6] & 0x0f) | 0x40);
    b[8] = (unsigned char)((b[8] & 0x3f) | 0x80);
    snprintf(out, 37, "%02x%02x%02x%02x-%02x%02x-%02x%02x-%02x%02x-%02x%02x%02x%02x%02x%02x",
             b[0], b[1], b[2], b[3], b[4], b[5], b[6], b[7], b[8], b[9], b[10], b[11], b[12],
             b[13], b[14], b[15]);
}

/* The blocking reasons of an analysis as a comma list, and the problem slug
 * of the first (most basic) one. */
static const char *quality_problem(const lk_quality *q, char *reasons, size_t cap)
{
    reasons[0] = '\0';
    const char *slug = NULL;
    size_t len = 0;
    for (int i = 0; i < LK_QR_COUNT; i++) {
        uint32_t bit = 1u << i;
        if (!(q->reasons & bit) || !(bit & LK_QR_BLOCKING))
            continue;
        const char *name = lk_quality_reason_name(bit);
        int n = snprintf(reasons + len, cap - len, "%s%s", len ? "," : "", name);
        if (n > 0 && (size_t)n < cap - len)
            len += (size_t)n;
        if (!slug) {
            if (bit == LK_QR_NO_FACE)
                slug = "no-face";
            else if (bit == LK_QR_MULTIPLE_FACES)
                slug = "multiple-faces";
            else if (bit == LK_QR_FACE_TOO_SMALL)
                slug = "face-too-small";
            else
                slug = "poor-quality";
        }
    }
    return slug;
}

/* Analyses one image into w->feat. On refusal, fills the problem reply,
 * copies the reasons and returns false. */
static bool analyse(lk_server *s, srv_request *r, srv_worker_state *w, const uint8_t *img,
                    size_t len, const char *label, lk_analysis *a, cJSON **quality,
                    char *reasons, size_t rcap)
{
    lk_error e;
    *quality = NULL;
    reasons[0] = '\0';
    lk_code rc = lk_engine_analyse(s->engine, img, len, a, w->feat, NULL, &e);
    const char *slug = NULL;
    if (rc == LK_ERR_IMAGE_UNSUPPORTED)
        slug = "unsupported-image";
    else if (rc == LK_ERR_IMAGE_CORRUPT)
        slug = "corrupt-image";
    else if (rc == LK_ERR_IMAGE_TOO_LARGE)
        slug = "image-too-large";
    else if (rc) {
        snprintf(reasons, rcap, "%s", lk_code_name(rc));
        internal_error(r, "analysis", &e);
        return false;
    }
    if (slug) {
        snprintf(reasons, rcap, "%s", lk_code_name(rc));
        char detail[LK_ERROR_MESSAGE_MAX + 32];
        snprintf(detail, sizeof detail, "%s: %s", label, e.message);
        cJSON *j = problem_new(r, slug, detail);
        cJSON_AddStringToObject(j, "image", label);
        problem_send(r, j);
        return false;
    }
    *quality = lk_server_quality_json(a);
    if (!a->quality.usable || !a->has_features) {
        const char *qslug = quality_problem(&a->quality, reasons, rcap);
        if (!qslug)
            qslug = "no-face";
        char detail[600];
        snprintf(detail, sizeof detail, "%s: the image is not usable (%s)", label,
                 reasons[0] ? reasons : "no features");
        cJSON *j = problem_new(r, qslug, detail);
        cJSON_AddStringToObject(j, "image", label);
        cJSON *arr = cJSON_AddArrayToObject(j, "reasons");
        char copy[256];
        snprintf(copy, sizeof copy, "%s", reasons);
        for (char *tok = strtok(copy, ","); tok; tok = strtok(NULL, ","))
            cJSON_AddItemToArray(arr, cJSON_CreateString(tok));
        cJSON_AddItemToObject(j, "quality", *quality);
        *quality = NULL;
        problem_send(r, j);
        return false;
    }
    return true;
}

/* Seconds between syncs of the data keys from the store: another replica's
 * `likeness keys rotate` reaches this one within this time (common practice:
 * short enough for a rotation, cheap enough to do on the request path). */
#define KEY_SYNC_INTERVAL 2.0

/* Re-reads the key file if it changed and, at most every KEY_SYNC_INTERVAL
 * seconds or when forced, the store's data keys. One sync at a time: a
 * request that finds one running goes on with the keys in place, unless
 * forced, which waits for it and syncs again. */
static void sync_keys(lk_server *s, bool force)
{
    lk_keyring_refresh(s->keys, NULL, NULL);
    if (force) {
        pthread_mutex_lock(&s->key_sync_mu);
    } else {
        if (pthread_mutex_trylock(&s->key_sync_mu) != 0)
            return;
        if (srv_now() - s->key_sync_at < KEY_SYNC_INTERVAL) {
            pthread_mutex_unlock(&s->key_sync_mu);
            return;
        }
    }
    lk_error e;
    if (lk_store_sync_keys(s->store, s->keys, &e) != LK_OK)
        srv_log("data keys: sync from the store failed: %s; the keys already loaded stay in use",
                e.message);
    s->key_sync_at = srv_now();
    pthread_mutex_unlock(&s->key_sync_mu);
}

/* Opens a stored template into w->proj_other. On refusal fills the reply. */
static bool load_template(lk_server *s, srv_request *r, srv_worker_state *w, const char *id,
                          lk_template_meta *meta)
{
    lk_error e;
    uint8_t *rec = NULL;
    size_t len = 0;
    lk_code rc = lk_store_template_get(s->store, id, srv_unix_ms(), meta, &rec, &len, &e);
    if (rc == LK_ERR_NOT_FOUND) {
        template_not_found(r, id);
        return false;
    }
    if (rc) {
        internal_error(r, "store read", &e);
        return false;
    }
    sync_keys(s, false);
    lk_template_binding b;
    memset(&b, 0, sizeof b);
    snprintf(b.template_id, sizeof b.template_id, "%.32s", id);
    snprintf(b.model_id, sizeof b.model_id, "%s", lk_model_id(s->model));
    b.feature_config = lk_model_feature_config(s->model);
    size_t dim = 0;
    rc = lk_template_open(s->keys, &b, rec, len, w->proj_other, w->k, &dim, &e);
    if (rc == LK_ERR_KEY) {
        /* Another replica may have rotated a moment ago: fetch its new key. */
        sync_keys(s, true);
        rc = lk_template_open(s->keys, &b, rec, len, w->proj_other, w->k, &dim, &e);
    }
    free(rec);
    if (rc == LK_OK && dim != w->k)
        rc = lk_error_set(&e, LK_ERR_TEMPLATE_MISMATCH, "template has %zu values, model needs %zu",
                          dim, w->k);
    if (rc) {
        const char *why = rc == LK_ERR_TEMPLATE_MISMATCH ? "model_mismatch"
                          : rc == LK_ERR_KEY           ? "key_unavailable"
                                                       : "integrity";
        srv_log("%s: template %s refused: %s", r->request_id, id, e.message);
        audit(s, r, LK_AUDIT_TEMPLATE_REFUSED, id, "refused", NAN, NAN, why, 409);
        char detail[LK_ERROR_MESSAGE_MAX + 64];
        snprintf(detail, sizeof detail, "the stored template cannot be used (%s): %s", why, e.message);
        cJSON *j = problem_new(r, "template-unusable", detail);
        cJSON_AddStringToObject(j, "template_id", id);
        cJSON_AddStringToObject(j, "reason", why);
        problem_send(r, j);
        return false;
    }
    return true;
}

static void handle_verify(lk_server *s, srv_request *r, srv_worker_state *w)
{
    lk_api_request q;
    lk_error e;
    double t0 = srv_now();
    if (lk_api_request_parse(LK_API_VERIFY, r->content_type, r->body, r->len, &q, &e)) {
        if (q.unsupported_media)
            srv_problem(r, "unsupported-media-type", e.message);
        else
            problem_field(r, e.message, q.field);
        lk_api_request_clear(&q);
        return;
    }
    double target = q.target_fmr > 0 ? q.target_fmr : s->target_fmr, threshold = s->threshold;
    if (q.target_fmr > 0 && lk_model_threshold_for_fmr(s->model, target, &threshold, &e)) {
        problem_field(r, e.message, "target_fmr");
        lk_api_request_clear(&q);
        return;
    }
    char reasons[256];
    lk_analysis ap, ar;
    cJSON *qp = NULL, *qr = NULL;
    lk_template_meta meta;
    const char *tid = q.template_id[0] ? q.template_id : NULL;
    int status = 0;
    if (!analyse(s, r, w, q.probe, q.probe_len, "probe", &ap, &qp, reasons, sizeof reasons))
        goto refused;
    if (lk_model_project(s->model, w->feat, w->proj_probe, &e)) {
        internal_error(r, "projection", &e);
        goto refused;
    }
    if (tid) {
        if (!load_template(s, r, w, tid, &meta)) {
            if (r->out.status == 404) {
                snprintf(reasons, sizeof reasons, "template_not_found");
                goto refused;
            }
            cJSON_Delete(qp);
            lk_api_request_clear(&q);
            return; /* audited as template_refused */
        }
    } else {
        if (!analyse(s, r, w, q.reference, q.reference_len, "reference", &ar, &qr, reasons,
                     sizeof reasons))
            goto refused;
        if (lk_model_project(s->model, w->feat, w->proj_other, &e)) {
            internal_error(r, "projection", &e);
            goto refused;
        }
    }
    double tc = srv_now(), svm, score;
    if (lk_model_score_projected(s->model, w->proj_probe, w->proj_other, &svm, &score, &e)) {
        internal_error(r, "scoring", &e);
        goto refused;
    }
    double compare_ms = (srv_now() - tc) * 1e3;
    const char *decision = score >= threshold ? "match" : "non_match";
    char decision_id[37];
    lk_uuid_v4(decision_id);
    /* No decision leaves the service unless it is in the audit chain. */
    if (audit(s, r, LK_AUDIT_VERIFY, tid ? tid : "", decision, score, threshold, "", 200)) {
        srv_problem(r, "internal-error", "the decision could not be recorded in the audit log");
        cJSON_Delete(qp);
        cJSON_Delete(qr);
        lk_api_request_clear(&q);
        return;
    }
    srv_metrics_decision(s->metrics, decision);
    cJSON *j = cJSON_CreateObject();
    cJSON_AddStringToObject(j, "decision_id", decision_id);
    cJSON_AddStringToObject(j, "decision", decision);
    lk_json_add_number(j, "score", score);
    lk_json_add_number(j, "threshold", threshold);
    lk_json_add_number(j, "target_fmr", target);
    cJSON_AddStringToObject(j, "model_id", lk_model_id(s->model));
    cJSON_AddStringToObject(j, "reference_type", tid ? "template" : "image");
    if (tid)
        cJSON_AddStringToObject(j, "template_id", tid);
    cJSON *quality = cJSON_AddObjectToObject(j, "quality");
    cJSON_AddItemToObject(quality, "probe", qp);
    if (qr)
        cJSON_AddItemToObject(quality, "reference", qr);
    cJSON *tm = cJSON_AddObjectToObject(j, "timings_ms");
    cJSON_AddItemToObject(tm, "probe", lk_server_timings_json(&ap));
    if (!tid)
        cJSON_AddItemToObject(tm, "reference", lk_server_timings_json(&ar));
    lk_json_add_number(tm, "compare", compare_ms);
    lk_json_add_number(tm, "total", (srv_now() - t0) * 1e3);
    reply_json(r, 200, j, "application/json");
    lk_api_request_clear(&q);
    return;
refused:
    status = r->out.status;
    srv_metrics_decision(s->metrics, "refused");
    if (audit(s, r, LK_AUDIT_VERIFY, tid ? tid : "", "refused", NAN, threshold, reasons, status))
        srv_problem(r, "internal-error", "the refusal could not be recorded in the audit log");
    cJSON_Delete(qp);
    cJSON_Delete(qr);
    lk_api_request_clear(&q);
}

static cJSON *template_json(const lk_template_meta *m, bool with_key)
{
    char ts[32];
    cJSON *j = cJSON_CreateObject();
    cJSON_AddStringToObject(j, "template_id", m->template_id);
    if (m->subject_ref[0])
        cJSON_AddStringToObject(j, "subject_ref", m->subject_ref);
    else
        cJSON_AddNullToObject(j, "subject_ref");
    lk_json_add_number(j, "image_count", m->image_count);
    cJSON_AddStringToObject(j, "model_id", m->model_id);
    srv_rfc3339_ms(m->created_ms, ts);
    cJSON_AddStringToObject(j, "created", ts);
    if (m->expires_ms) {
        srv_rfc3339_ms(m->expires_ms, ts);
        cJSON_AddStringToObject(j, "expires", ts);
    } else
        cJSON_AddNullToObject(j, "expires");
    if (with_key)
        cJSON_AddStringToObject(j, "key_id", m->key_id);
    return j;
}

static void handle_enrol(lk_server *s, srv_request *r, srv_worker_state *w)
{
    lk_api_request q;
    lk_error e;
    if (lk_api_request_parse(LK_API_ENROL, r->content_type, r->body, r->len, &q, &e)) {
        if (q.unsupported_media)
            srv_problem(r, "unsupported-media-type", e.message);
        else
            problem_field(r, e.message, q.field);
        lk_api_request_clear(&q);
        return;
    }
    int64_t ttl = q.ttl_seconds ? q.ttl_seconds : s->cfg.default_ttl_s;
    if (s->cfg.max_ttl_s && ttl > s->cfg.max_ttl_s) {
        char msg[128];
        snprintf(msg, sizeof msg, "ttl_seconds exceeds this service's maximum of %lld",
                 (long long)s->cfg.max_ttl_s);
        problem_field(r, msg, "ttl_seconds");
        lk_api_request_clear(&q);
        return;
    }
    if (s->cfg.max_ttl_s && !ttl)
        ttl = s->cfg.max_ttl_s;
    char reasons[256] = "";
    cJSON *qualities = cJSON_CreateArray();
    for (size_t i = 0; i < w->k; i++)
        w->acc[i] = 0;
    for (size_t i = 0; i < q.n_images; i++) {
        char label[32];
        snprintf(label, sizeof label, "image[%zu]", i);
        lk_analysis a;
        cJSON *qi;
        if (!analyse(s, r, w, q.images[i], q.image_len[i], label, &a, &qi, reasons, sizeof reasons))
            goto refused;
        cJSON_AddItemToArray(qualities, qi);
        if (lk_model_project(s->model, w->feat, w->proj_other, &e)) {
            internal_error(r, "projection", &e);
            goto refused;
        }
        for (size_t k = 0; k < w->k; k++)
            w->acc[k] += w->proj_other[k];
    }
    /* The template is the mean of the images' projected vectors, brought
     * back to unit length when the model normalises (the mean of unit
     * vectors is shorter); the common template-averaging practice. */
    for (size_t k = 0; k < w->k; k++)
        w->acc[k] /= (double)q.n_images;
    if (lk_model_projection_norm(s->model) == LK_PROJ_NORM_L2) {
        double ss = 0;
        for (size_t k = 0; k < w->k; k++)
            ss += w->acc[k] * w->acc[k];
        if (ss > 0)
            for (size_t k = 0; k < w->k; k++)
                w->acc[k] /= sqrt(ss);
    }
    lk_template_meta meta;
    memset(&meta, 0, sizeof meta);
    lk_template_new_id(meta.template_id);
    snprintf(meta.subject_ref, sizeof meta.subject_ref, "%s", q.subject_ref);
    snprintf(meta.model_id, sizeof meta.model_id, "%s", lk_model_id(s->model));
    meta.created_ms = srv_unix_ms();
    meta.expires_ms = ttl ? meta.created_ms + ttl * 1000 : 0;
    meta.image_count = (int)q.n_images;
    lk_template_binding b;
    memset(&b, 0, sizeof b);
    snprintf(b.template_id, sizeof b.template_id, "%s", meta.template_id);
    snprintf(b.model_id, sizeof b.model_id, "%s", meta.model_id);
    b.feature_config = lk_model_feature_config(s->model);
    uint8_t *rec = NULL;
    size_t len = 0;
    sync_keys(s, false);
    if (lk_template_seal(s->keys, &b, w->acc, w->k, &rec, &len, meta.key_id, &e)) {
        internal_error(r, "sealing", &e);
        snprintf(reasons, sizeof reasons, "%s", lk_code_name(e.code));
        goto refused;
    }
    /* The template and its audit record commit together: a crash leaves
     * both or neither, and nothing is acknowledged that is not audited. */
    lk_store_change change = {.kind = LK_CHANGE_PUT, .meta = &meta, .record = rec, .len = len};
    lk_code arc = audit_change(s, r, LK_AUDIT_ENROL, meta.template_id, "ok", NAN, NAN, "", 201,
                               &change, &e);
    free(rec);
    if (arc) {
        srv_problem(r, "internal-error", "the enrolment could not be stored and audited");
        snprintf(reasons, sizeof reasons, "%s", lk_code_name(arc));
        goto refused;
    }
    cJSON *j = template_json(&meta, false);
    cJSON_AddItemToObject(j, "quality", qualities);
    char loc[64];
    snprintf(loc, sizeof loc, "/v1/templates/%s", meta.template_id);
    srv_add_header(r, "Location", loc);
    reply_json(r, 201, j, "application/json");
    lk_api_request_clear(&q);
    return;
refused:
    audit(s, r, LK_AUDIT_ENROL, "", "refused", NAN, NAN, reasons, r->out.status);
    cJSON_Delete(qualities);
    lk_api_request_clear(&q);
}

static void handle_template(lk_server *s, srv_request *r)
{
    const char *id = r->path_arg;
    if (!lk_template_id_valid(id)) {
        srv_problem(r, "template-not-found",
                    "template ids are 32 lowercase hexadecimal characters; this is not one");
        return;
    }
    lk_error e;
    lk_template_meta meta;
    if (!strcmp(r->method, "DELETE")) {
        /* The erasure and its audit record commit together. */
        lk_store_change change = {.kind = LK_CHANGE_DELETE, .template_id = id};
        lk_code rc = audit_change(s, r, LK_AUDIT_DELETE, id, "ok", NAN, NAN, "", 204, &change, &e);
        if (rc == LK_ERR_NOT_FOUND) {
            template_not_found(r, id);
            return;
        }
        if (rc) {
            internal_error(r, "erasure", &e);
            return;
        }
        srv_reply_text(r, 204, "", NULL);
        return;
    }
    lk_code rc = lk_store_template_get(s->store, id, srv_unix_ms(), &meta, NULL, NULL, &e);
    if (rc == LK_ERR_NOT_FOUND) {
        template_not_found(r, id);
        return;
    }
    if (rc) {
        internal_error(r, "store read", &e);
        return;
    }
    reply_json(r, 200, template_json(&meta, true), "application/json");
}

static void handle_model(lk_server *s, srv_request *r)
{
    const lk_model *m = s->model;
    cJSON *j = cJSON_CreateObject();
    cJSON_AddStringToObject(j, "model_id", lk_model_id(m));
    cJSON_AddStringToObject(j, "checksum", lk_model_checksum(m));
    cJSON_AddStringToObject(j, "feature_config", lk_model_feature_config(m));
    lk_json_add_number(j, "feature_dim", (double)lk_model_feature_dim(m));
    lk_json_add_number(j, "default_target_fmr", lk_model_default_fmr(m));
    lk_json_add_number(j, "target_fmr", s->target_fmr);
    lk_json_add_number(j, "threshold", s->threshold);
    cJSON *ops = cJSON_AddArrayToObject(j, "operating_points");
    size_t n = 0;
    const lk_model_operating_point *op = lk_model_operating_points(m, &n);
    for (size_t i = 0; i < n; i++) {
        cJSON *o = cJSON_CreateObject();
        lk_json_add_number(o, "target_fmr", op[i].target_fmr);
        lk_json_add_number(o, "threshold", op[i].prob_threshold);
        lk_json_add_number(o, "measured_fmr", op[i].measured_fmr);
        lk_json_add_number(o, "measured_fnmr", op[i].measured_fnmr);
        lk_json_add_number(o, "impostor_comparisons", (double)op[i].impostor_comparisons);
        lk_json_add_number(o, "genuine_comparisons", (double)op[i].genuine_comparisons);
        cJSON_AddBoolToObject(o, "supported", op[i].supported);
        cJSON_AddItemToArray(ops, o);
    }
    lk_model_provenance p = lk_model_get_provenance(m);
    cJSON *pj = cJSON_AddObjectToObject(j, "provenance");
    cJSON_AddStringToObject(pj, "dataset", p.dataset ? p.dataset : "");
    lk_json_add_number(pj, "training_pairs", (double)p.training_pairs);
    lk_json_add_number(pj, "calibration_pairs", (double)p.calibration_pairs);
    lk_json_add_number(pj, "evaluation_pairs", (double)p.evaluation_pairs);
    cJSON_AddStringToObject(pj, "created_utc", p.created_utc ? p.created_utc : "");
    cJSON_AddStringToObject(pj, "software_version", p.software_version ? p.software_version : "");
    reply_json(r, 200, j, "application/json");
}

typedef struct audit_page {
    char *buf;
    size_t len, cap;
    uint64_t last;
    bool oom;
} audit_page;

static bool page_add(const lk_audit_record *rec, void *ctx)
{
    audit_page *p = ctx;
    char *s = lk_audit_record_to_json(rec);
    if (!s) {
        p->oom = true;
        return false;
    }
    size_t n = strlen(s);
    if (p->len + n + 2 > p->cap) {
        size_t cap = (p->cap + n + 2) * 2;
        char *nb = realloc(p->buf, cap);
        if (!nb) {
            free(s);
            p->oom = true;
            return false;
        }
        p->buf = nb;
        p->cap = cap;
    }
    if (p->len)
        p->buf[p->len++] = ',';
    memcpy(p->buf + p->len, s, n);
    p->len += n;
    p->buf[p->len] = '\0';
    p->last = rec->seq;
    free(s);
    return true;
}

static bool parse_u64(const char *s, uint64_t *out)
{
    if (!*s || strlen(s) > 19)
        return false;
    uint64_t v = 0;
    for (; *s; s++) {
        if (*s < '0' || *s > '9')
            return false;
        v = v * 10 + (uint64_t)(*s - '0');
    }
    *out = v;
    return true;
}

static void handle_audit(lk_server *s, srv_request *r)
{
    uint64_t after = 0, limit = 100;
    if (r->has_after && !parse_u64(r->q_after, &after)) {
        problem_field(r, "'after' must be a non-negative integer (a sequence number)", "after");
        return;
    }
    if (r->has_limit && (!parse_u64(r->q_limit, &limit) || limit < 1 || limit > 1000)) {
        problem_field(r, "'limit' must be an integer from 1 to 1000", "limit");
        return;
    }
    audit_page p = {malloc(4096), 0, 4096, after, false};
    if (!p.buf) {
        internal_error(r, "audit page", NULL);
        return;
    }
    p.buf[0] = '\0';
    lk_error e;
    if (lk_store_audit_list(s->store, after, limit, page_add, &p, &e) || p.oom) {
        free(p.buf);
        internal_error(r, "audit listing", p.oom ? NULL : &e);
        return;
    }
    uint64_t head = lk_store_audit_head(s->store);
    size_t cap = p.len + 128;
    char *out = malloc(cap);
    if (out)
        snprintf(out, cap, "{\"records\":[%s],\"head\":%llu,\"next_after\":%llu}", p.buf,
                 (unsigned long long)head, (unsigned long long)p.last);
    free(p.buf);
    srv_reply_text(r, 200, "application/json", out);
}

static void handle_ready(lk_server *s, srv_request *r)
{
    lk_error e;
    if (atomic_load(&s->draining)) {
        srv_problem(r, "not-ready", "the service is shutting down");
        return;
    }
    if (lk_store_ping(s->store, &e)) {
        srv_log("readiness: store unavailable: %s", e.message);
        srv_problem(r, "not-ready", "the template store is unavailable");
        return;
    }
    cJSON *j = cJSON_CreateObject();
    cJSON_AddStringToObject(j, "status", "ready");
    cJSON_AddStringToObject(j, "model_id", lk_model_id(s->model));
    cJSON_AddStringToObject(j, "store", "ok");
    reply_json(r, 200, j, "application/json");
}

void srv_handle(lk_server *s, srv_request *r, srv_worker_state *w)
{
    if (r->route == RT_READYZ) {
        handle_ready(s, r);
        return;
    }
    if (!r->authenticated) {
        const char *why = r->auth_failure ? r->auth_failure : "missing_credentials";
        audit(s, r, LK_AUDIT_AUTH_FAILURE, "", "refused", NAN, NAN, why, 401);
        srv_problem(r, "unauthorised", NULL);
        return;
    }
    switch (r->route) {
    case RT_VERIFY: handle_verify(s, r, w); break;
    case RT_TEMPLATES: handle_enrol(s, r, w); break;
    case RT_TEMPLATE: handle_template(s, r); break;
    case RT_MODEL: handle_model(s, r); break;
    case RT_AUDIT: handle_audit(s, r); break;
    default: srv_problem(r, "not-found", NULL); break;
    }
}
