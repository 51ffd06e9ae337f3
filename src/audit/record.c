/* Audit records: names, canonical encoding, chain hash, checkpoint message
 * and the JSON export form. The byte layouts are specified in
 * docs/audit-format.md; any change here is a new format version. */
#include "likeness/audit.h"

#include <inttypes.h>
#include <math.h>
#include <stdlib.h>
#include <stdio.h>
#include <string.h>
#include <time.h>

#include <cjson/cJSON.h>
#include <sodium.h>

static const char *const op_names[] = {
    [LK_AUDIT_VERIFY] = "verification",
    [LK_AUDIT_ENROL] = "enrolment",
    [LK_AUDIT_DELETE] = "deletion",
    [LK_AUDIT_KEY_ROTATION] = "key_rotation",
    [LK_AUDIT_AUTH_FAILURE] = "authentication_failure",
    [LK_AUDIT_TEMPLATE_REFUSED] = "template_refused",
    [LK_AUDIT_PURGE] = "purge",
};
#define OP_COUNT (sizeof op_names / sizeof op_names[0])

const char *lk_audit_operation_name(lk_audit_op op)
{
    if ((unsigned)op >= OP_COUNT || !op_names[op])
        return "unknown";
    return op_names[op];
}

lk_code lk_audit_operation_parse(const char *name, lk_audit_op *op, lk_error *err)
{
    for (unsigned i = 1; name && i < OP_COUNT; i++)
        if (op_names[i] && !strcmp(name, op_names[i])) {
            *op = (lk_audit_op)i;
            return LK_OK;
        }
    return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                        "unknown audit operation '%s' (known: verification, enrolment, "
                        "deletion, key_rotation, authentication_failure, template_refused, "
                        "purge)",
                        name ? name : "(null)");
}

void lk_audit_record_init(lk_audit_record *r, lk_audit_op op)
{
    memset(r, 0, sizeof *r);
    r->operation = op;
    r->score = NAN;
    r->threshold = NAN;
    struct timespec ts;
    clock_gettime(CLOCK_REALTIME, &ts);
    r->time_ms = (int64_t)ts.tv_sec * 1000 + ts.tv_nsec / 1000000;
}

/* ---- canonical encoding (docs/audit-format.md, section "Canonical encoding") ---- */

enum {
    TAG_SEQ = 0x01,
    TAG_TIME = 0x02,
    TAG_OPERATION = 0x03,
    TAG_CALLER = 0x04,
    TAG_REQUEST_ID = 0x05,
    TAG_TEMPLATE_ID = 0x06,
    TAG_DECISION = 0x07,
    TAG_SCORE = 0x08,
    TAG_THRESHOLD = 0x09,
    TAG_MODEL_ID = 0x0a,
    TAG_REASONS = 0x0b,
    TAG_STATUS = 0x0c,
};

typedef struct writer {
    uint8_t *out;
    size_t cap;
    size_t len; /* bytes needed so far, even past cap */
} writer;

static void put_bytes(writer *w, const void *p, size_t n)
{
    if (w->len < w->cap) {
        size_t room = w->cap - w->len;
        memcpy(w->out + w->len, p, n < room ? n : room);
    }
    w->len += n;
}

static void put_u64be(uint8_t b[8], uint64_t v)
{
    for (int i = 7; i >= 0; i--) {
        b[i] = (uint8_t)(v & 0xff);
        v >>= 8;
    }
}

static void put_field(writer *w, uint8_t tag, const void *p, uint32_t n)
{
    uint8_t h[5] = {tag, (uint8_t)(n >> 24), (uint8_t)(n >> 16), (uint8_t)(n >> 8), (uint8_t)n};
    put_bytes(w, h, sizeof h);
    put_bytes(w, p, n);
}

static void put_text(writer *w, uint8_t tag, const char *s)
{
    /* A field with no NUL in its buffer is read up to the buffer's end less
     * one byte, the longest text the struct can hold. */
    put_field(w, tag, s, (uint32_t)strnlen(s, LK_AUDIT_TEXT_MAX - 1));
}

/* IEEE 754 binary64, big-endian. Every NaN becomes the one quiet NaN
 * 0x7ff8000000000000 and -0.0 becomes +0.0, so values that compare equal (or
 * are all "not applicable") encode alike whatever produced them, and a
 * database that stores NaN as NULL and 0.0 as an integer still round-trips. */
static void put_double(writer *w, uint8_t tag, double v)
{
    uint64_t bits;
    if (isnan(v))
        bits = 0x7ff8000000000000ull;
    else if (v == 0.0)
        bits = 0;
    else
        memcpy(&bits, &v, sizeof bits);
    uint8_t b[8];
    put_u64be(b, bits);
    put_field(w, tag, b, 8);
}

size_t lk_audit_canonical(const lk_audit_record *r, uint8_t *out, size_t cap)
{
    writer w = {out, out ? cap : 0, 0};
    uint8_t version = (uint8_t)LK_AUDIT_FORMAT_VERSION;
    put_bytes(&w, &version, 1);
    uint8_t b[8];
    put_u64be(b, r->seq);
    put_field(&w, TAG_SEQ, b, 8);
    put_u64be(b, (uint64_t)r->time_ms); /* two's complement */
    put_field(&w, TAG_TIME, b, 8);
    uint8_t op = (uint8_t)r->operation;
    put_field(&w, TAG_OPERATION, &op, 1);
    put_text(&w, TAG_CALLER, r->caller);
    put_text(&w, TAG_REQUEST_ID, r->request_id);
    put_text(&w, TAG_TEMPLATE_ID, r->template_id);
    put_text(&w, TAG_DECISION, r->decision);
    put_double(&w, TAG_SCORE, r->score);
    put_double(&w, TAG_THRESHOLD, r->threshold);
    put_text(&w, TAG_MODEL_ID, r->model_id);
    put_text(&w, TAG_REASONS, r->reasons);
    uint32_t st = (uint32_t)r->status; /* two's complement */
    uint8_t s4[4] = {(uint8_t)(st >> 24), (uint8_t)(st >> 16), (uint8_t)(st >> 8), (uint8_t)st};
    put_field(&w, TAG_STATUS, s4, 4);
    return w.len;
}

/* Domain-separation prefixes; both are part of format version 1. */
static const char chain_prefix[] = "likeness-audit-v1";
static const char checkpoint_prefix[] = "likeness-audit-checkpoint-v1";

void lk_audit_chain_hash(const lk_audit_record *r, const uint8_t prev_hash[32], uint8_t hash[32])
{
    /* Six texts of at most 255 bytes plus fixed fields: under 2 KiB. */
    uint8_t buf[2048];
    size_t n = lk_audit_canonical(r, buf, sizeof buf);
    /* BLAKE2b with a 32-byte digest and no key (RFC 7693). */
    crypto_generichash_state st;
    crypto_generichash_init(&st, NULL, 0, 32);
    crypto_generichash_update(&st, (const uint8_t *)chain_prefix, sizeof chain_prefix - 1);
    crypto_generichash_update(&st, prev_hash, 32);
    crypto_generichash_update(&st, buf, n);
    crypto_generichash_final(&st, hash, 32);
}

void lk_audit_checkpoint_message(uint64_t seq, const uint8_t hash[32], uint8_t msg[68])
{
    _Static_assert(sizeof checkpoint_prefix - 1 == 28, "checkpoint message is 28 + 8 + 32 bytes");
    memcpy(msg, checkpoint_prefix, 28);
    put_u64be(msg + 28, seq);
    memcpy(msg + 36, hash, 32);
}

/* ---- JSON ---- */

/* RFC 3339 UTC with milliseconds: 2026-12-02T10:00:00.123Z. */
static void format_time(int64_t ms, char out[64])
{
    int64_t secs = ms / 1000, rem = ms % 1000;
    if (rem < 0) { /* floor division for instants before 1970 */
        rem += 1000;
        secs -= 1;
    }
    time_t t = (time_t)secs;
    struct tm tm;
    if (!gmtime_r(&t, &tm)) {
        snprintf(out, 64, "invalid");
        return;
    }
    snprintf(out, 64, "%04d-%02d-%02dT%02d:%02d:%02d.%03dZ", tm.tm_year + 1900, tm.tm_mon + 1,
             tm.tm_mday, tm.tm_hour, tm.tm_min, tm.tm_sec, (int)rem);
}

static cJSON *json_text(const char *s)
{
    char buf[LK_AUDIT_TEXT_MAX];
    size_t n = strnlen(s, LK_AUDIT_TEXT_MAX - 1);
    memcpy(buf, s, n);
    buf[n] = '\0';
    return cJSON_CreateString(buf);
}

/* JSON has no NaN or infinity: both are null ("not applicable"). Otherwise
 * the shortest %g text that reads back to the same binary64 (cJSON's own
 * printing accepts a near miss, which would change the value). */
static cJSON *json_number(double v)
{
    if (!isfinite(v))
        return cJSON_CreateNull();
    char buf[40];
    for (int prec = 1; prec <= 17; prec++) {
        snprintf(buf, sizeof buf, "%.*g", prec, v);
        if (strtod(buf, NULL) == v)
            break;
    }
    return cJSON_CreateRaw(buf);
}

/* Exact decimal, also above 2^53 where a double would round. */
static cJSON *json_u64(uint64_t v)
{
    char buf[24];
    snprintf(buf, sizeof buf, "%" PRIu64, v);
    return cJSON_CreateRaw(buf);
}

static bool add(cJSON *o, const char *name, cJSON *item)
{
    if (!item)
        return false;
    cJSON_AddItemToObject(o, name, item);
    return true;
}

char *lk_audit_record_to_json(const lk_audit_record *r)
{
    cJSON *o = cJSON_CreateObject();
    if (!o)
        return NULL;
    char tbuf[64], prev[65], hash[65];
    format_time(r->time_ms, tbuf);
    lk_hex_encode(r->prev_hash, 32, prev);
    lk_hex_encode(r->hash, 32, hash);

    cJSON *reasons = cJSON_CreateArray();
    bool ok = reasons != NULL;
    if (ok) {
        /* Split on commas, keeping empty items, so the array reproduces the field. */
        size_t n = strnlen(r->reasons, LK_AUDIT_TEXT_MAX - 1);
        size_t start = 0;
        for (size_t i = 0; ok && n > 0 && i <= n; i++) {
            if (i == n || r->reasons[i] == ',') {
                char item[LK_AUDIT_TEXT_MAX];
                memcpy(item, r->reasons + start, i - start);
                item[i - start] = '\0';
                cJSON *s = cJSON_CreateString(item);
                ok = s != NULL;
                if (ok)
                    cJSON_AddItemToArray(reasons, s);
                start = i + 1;
            }
        }
    }
    ok = ok && add(o, "seq", json_u64(r->seq)) &&
         add(o, "time", cJSON_CreateString(tbuf)) &&
         add(o, "operation", cJSON_CreateString(lk_audit_operation_name(r->operation))) &&
         add(o, "caller", json_text(r->caller)) &&
         add(o, "request_id", json_text(r->request_id)) &&
         add(o, "template_id", json_text(r->template_id)) &&
         add(o, "decision", json_text(r->decision)) && add(o, "score", json_number(r->score)) &&
         add(o, "threshold", json_number(r->threshold)) &&
         add(o, "model_id", json_text(r->model_id)) && add(o, "reasons", reasons);
    if (!ok && reasons && !cJSON_IsArray(cJSON_GetObjectItemCaseSensitive(o, "reasons")))
        cJSON_Delete(reasons);
    ok = ok && add(o, "status", cJSON_CreateNumber(r->status)) &&
         add(o, "prev_hash", cJSON_CreateString(prev)) && add(o, "hash", cJSON_CreateString(hash));
    char *s = ok ? cJSON_PrintUnformatted(o) : NULL;
    cJSON_Delete(o);
    return s;
}
