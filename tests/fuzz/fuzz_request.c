/* libFuzzer target: lk_api_request_parse for verification and enrolment
 * bodies, JSON or multipart/form-data, then lk_api_request_clear.
 * Input: byte 0 chooses the kind (bit 0: 0 verification, 1 enrolment) and
 * the Content-Type (bits 1-3, table below; the last entry takes the
 * Content-Type from the input up to the first LF); the rest is the body.
 * Multipart seeds use the boundary "lkfuzz". Seeds: corpus/request;
 * dictionaries json.dict, multipart.dict. */
#include <stdint.h>
#include <string.h>
#include <strings.h>

#include "fuzz_common.h"
#include "likeness/server.h"

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size);

static const char *const content_types[] = {
    "application/json",
    "multipart/form-data; boundary=lkfuzz",
    "application/json; charset=utf-8",
    "multipart/form-data; boundary=\"lkfuzz\"",
    "APPLICATION/JSON",
    "Multipart/Form-Data;boundary=lkfuzz",
    "text/plain",
    NULL, /* from the input */
};

static bool inside(const uint8_t *p, size_t n, const uint8_t *base, size_t len)
{
    return p >= base && p <= base + len && n <= (size_t)(base + len - p);
}

static bool owned(const lk_api_request *q, const uint8_t *p, size_t n)
{
    /* Decoded base64 buffers: their sizes are not recorded, so only check
     * that p is one of them; ASan checks the length on the read below. */
    for (size_t i = 0; i < q->n_owned; i++)
        if (p == q->owned[i])
            return true;
    (void)n;
    return false;
}

static void touch(const uint8_t *p, size_t n)
{
    /* Read every byte the request hands out, so ASan checks the lengths. */
    volatile uint8_t acc = 0;
    for (size_t i = 0; i < n; i++)
        acc ^= p[i];
    (void)acc;
}

static void check_image(const lk_api_request *q, const uint8_t *p, size_t n, const uint8_t *body,
                        size_t len, const char *what)
{
    FUZZ_CHECK(p && n > 0, "%s: empty image accepted", what);
    FUZZ_CHECK(inside(p, n, body, len) || owned(q, p, n), "%s points outside body and buffers",
               what);
    touch(p, n);
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    if (size < 1)
        return 0;
    const lk_api_kind kind = (data[0] & 1) ? LK_API_ENROL : LK_API_VERIFY;
    const char *ct = content_types[(data[0] >> 1) & 7];
    const uint8_t *body = data + 1;
    size_t len = size - 1;
    char line[256];
    if (!ct) {
        const uint8_t *lf = memchr(body, '\n', len < 256 ? len : 256);
        if (!lf)
            return 0;
        size_t n = (size_t)(lf - body);
        memcpy(line, body, n);
        line[n] = '\0';
        ct = line;
        len -= n + 1;
        body = lf + 1;
    }

    lk_api_request q;
    memset(&q, 0xa5, sizeof q); /* the parser must initialise everything */
    lk_error err;
    lk_code rc = lk_api_request_parse(kind, ct, body, len, &q, &err);
    FUZZ_CHECK(memchr(q.field, '\0', sizeof q.field), "field not terminated");
    FUZZ_CHECK(q.n_owned <= LK_API_MAX_IMAGES + 2, "%zu owned buffers", q.n_owned);
    if (rc != LK_OK) {
        fuzz_check_error(rc, &err);
        FUZZ_CHECK(rc == LK_ERR_INVALID_ARGUMENT || rc == LK_ERR_NOMEM,
                   "parse failed with %s", lk_code_name(rc));
        lk_api_request_clear(&q);
        return 0;
    }
    FUZZ_CHECK(!q.unsupported_media, "success with unsupported_media set");
    if (!strncasecmp(ct, "application/json", 16)) {
        /* RFC 8259 section 2: only whitespace (space, tab, LF, CR) may follow
         * the value, which for an accepted request is an object. */
        size_t end = len;
        while (end && memchr(" \t\r\n", body[end - 1], 4))
            end--;
        FUZZ_CHECK(end && body[end - 1] == '}',
                   "JSON body accepted with byte 0x%02x after its value (RFC 8259: whitespace only)",
                   end ? body[end - 1] : 0);
    }
    FUZZ_CHECK(memchr(q.template_id, '\0', sizeof q.template_id), "template_id not terminated");
    FUZZ_CHECK(memchr(q.subject_ref, '\0', sizeof q.subject_ref), "subject_ref not terminated");
    FUZZ_CHECK(q.target_fmr == 0 || (q.target_fmr > 0 && q.target_fmr < 1), "target_fmr %g",
               q.target_fmr);
    FUZZ_CHECK(q.ttl_seconds >= 0, "ttl_seconds %lld", (long long)q.ttl_seconds);
    if (kind == LK_API_VERIFY) {
        check_image(&q, q.probe, q.probe_len, body, len, "probe");
        FUZZ_CHECK(!q.reference != !q.template_id[0], "need exactly one of reference/template_id");
        if (q.reference)
            check_image(&q, q.reference, q.reference_len, body, len, "reference");
        else
            FUZZ_CHECK(strlen(q.template_id) == 32, "template_id of %zu characters",
                       strlen(q.template_id));
        FUZZ_CHECK(q.n_images == 0, "verification with enrolment images");
    } else {
        FUZZ_CHECK(q.n_images >= 1 && q.n_images <= LK_API_MAX_IMAGES, "%zu images", q.n_images);
        for (size_t i = 0; i < q.n_images; i++)
            check_image(&q, q.images[i], q.image_len[i], body, len, "image");
        FUZZ_CHECK(!q.probe && !q.reference, "enrolment with verification images");
        if (q.has_subject_ref)
            FUZZ_CHECK(strlen(q.subject_ref) < sizeof q.subject_ref, "subject_ref overflow");
    }
    lk_api_request_clear(&q);
    return 0;
}
