/* likeness server: the HTTPS service behind likenessd.
 *
 * libmicrohttpd (GnuTLS backend) accepts connections and reads requests on
 * one polling thread; every request that needs a decision, the store or the
 * key ring is handed to a bounded worker pool (a full queue answers 503 with
 * Retry-After), its connection suspended until a worker has the answer.
 * The API is described in api-spec/openapi.yaml; errors are RFC 9457
 * problem documents.
 *
 * The request parsers are public so that tests and fuzz targets can drive
 * them without a network. */
#ifndef LIKENESS_SERVER_H
#define LIKENESS_SERVER_H

#include <stdbool.h>
#include <stddef.h>
#include <stdint.h>

#include <cjson/cJSON.h>

#include "likeness/config.h"
#include "likeness/engine.h"
#include "likeness/error.h"

#ifdef __cplusplus
extern "C" {
#endif

typedef struct lk_server lk_server;

/* Loads the model, key ring and store, checks the certificate (OpenSSL: key
 * matches, valid now, warning within 30 days of expiry, SHA-256 fingerprint
 * logged) and starts the workers; does not listen yet. */
lk_server *lk_server_new(const lk_config *cfg, lk_error *err);
/* Binds the configured address and starts accepting TLS connections. */
lk_code lk_server_listen(lk_server *s, lk_error *err);
/* Serves until lk_server_stop; then stops accepting, lets in-flight requests
 * finish (up to drain_timeout_s), signs an audit checkpoint and returns. */
lk_code lk_server_run(lk_server *s, lk_error *err);
/* Async-signal-safe: asks lk_server_run to drain and return. */
void lk_server_stop(lk_server *s);
void lk_server_free(lk_server *s);

/* The JSON of one image's analysis, as verifications and enrolments return
 * it (and `likeness verify` prints): usable, reasons, notes, face, eyes,
 * measures; and the per-stage timings. */
cJSON *lk_server_quality_json(const lk_analysis *a);
cJSON *lk_server_timings_json(const lk_analysis *a);
/* Adds a number that prints as the shortest decimal reading back to exactly
 * v (null if v is not finite). */
cJSON *lk_json_add_number(cJSON *obj, const char *name, double v);
/* A random RFC 9562 version 4 UUID (libsodium's CSPRNG). */
void lk_uuid_v4(char out[37]);

/* ---- request parsing (pure functions over a buffer) ---- */

#define LK_MULTIPART_MAX_PARTS 32

typedef struct lk_part {
    char name[64];          /* form field name */
    bool has_filename;
    char content_type[128]; /* "" if absent */
    const uint8_t *data;    /* points into the body */
    size_t len;
} lk_part;

/* Extracts the boundary parameter of a multipart/form-data Content-Type
 * (RFC 7578, RFC 2046 section 5.1.1: 1 to 70 characters, maybe quoted). */
lk_code lk_multipart_boundary(const char *content_type, char boundary[72], lk_error *err);
/* Splits a multipart/form-data body into parts (at most max). The body must
 * end with the close delimiter. LK_ERR_INVALID_ARGUMENT with a message naming
 * what is wrong for any malformation. */
lk_code lk_multipart_parse(const uint8_t *body, size_t len, const char *boundary, lk_part *parts,
                           size_t max, size_t *n, lk_error *err);

/* true if the n bytes are well-formed UTF-8 (RFC 3629: no overlongs, no
 * surrogates, nothing above U+10FFFF). */
bool lk_utf8_valid(const uint8_t *s, size_t n);

/* Standard base64 (RFC 4648 section 4), padding required, no whitespace.
 * *out is malloc'd. LK_ERR_INVALID_ARGUMENT for anything else. */
lk_code lk_base64_decode(const char *in, size_t len, uint8_t **out, size_t *out_len,
                         lk_error *err);

/* What a verification or enrolment request carries, whichever encoding it
 * came in. Image pointers point into the body (multipart) or into buffers
 * owned by the request (JSON, decoded); free with lk_api_request_clear. */
#define LK_API_MAX_IMAGES 10
typedef enum { LK_API_VERIFY = 1, LK_API_ENROL = 2 } lk_api_kind;
typedef struct lk_api_request {
    const uint8_t *probe;
    size_t probe_len;
    const uint8_t *reference;
    size_t reference_len;
    char template_id[64]; /* "" if absent */
    double target_fmr;    /* 0 if absent */
    const uint8_t *images[LK_API_MAX_IMAGES];
    size_t image_len[LK_API_MAX_IMAGES];
    size_t n_images;
    char subject_ref[256];
    bool has_subject_ref;
    int64_t ttl_seconds;  /* 0 if absent */
    /* owned buffers (decoded base64) */
    uint8_t *owned[LK_API_MAX_IMAGES + 2];
    size_t n_owned;
    char field[32];       /* on error: the field at fault, if one */
    bool unsupported_media; /* on error: the Content-Type is neither form nor JSON */
} lk_api_request;

/* Parses a request body of the given Content-Type (multipart/form-data or
 * application/json) for a verification or an enrolment. On error returns
 * LK_ERR_INVALID_ARGUMENT with a message for the caller (and
 * req->unsupported_media set if the Content-Type was the problem). */
lk_code lk_api_request_parse(lk_api_kind kind, const char *content_type, const uint8_t *body,
                             size_t len, lk_api_request *req, lk_error *err);
void lk_api_request_clear(lk_api_request *req);

#ifdef __cplusplus
}
#endif
#endif
