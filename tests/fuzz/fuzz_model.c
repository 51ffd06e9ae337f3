/* libFuzzer target: lk_model_load_bytes (docs/model-format.md).
 *
 * Every input is loaded twice: as it is (magic, version, section framing,
 * checksum), and with its checksum made right, so that mutations reach the
 * section parsers instead of stopping at the BLAKE2b-256 check: the input is
 * cut at its first CSUM section header if the framing reaches one, and a
 * fresh CSUM section (tag, flags 1, length 32, digest) is appended.
 * A model that loads is scored once and serialised; the serialised bytes
 * must load again and serialise to the same bytes (the format's round trip).
 * Seeds: corpus/model (make_seeds.py). */
#include <math.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include <sodium.h>

#include "fuzz_common.h"
#include "likeness/model.h"

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size);

#define HEADER 12u     /* magic 8 + version 4 */
#define SEC_HEADER 16u /* tag 4 + flags 4 + length 8 */

static uint64_t le64(const uint8_t *p)
{
    uint64_t v = 0;
    for (int i = 7; i >= 0; i--)
        v = v << 8 | p[i];
    return v;
}

/* Offset of the first CSUM section header the framing reaches, else size. */
static size_t body_end(const uint8_t *b, size_t size)
{
    size_t pos = HEADER;
    while (size >= SEC_HEADER && pos <= size - SEC_HEADER) {
        if (memcmp(b + pos, "CSUM", 4) == 0)
            return pos;
        uint64_t len = le64(b + pos + 8);
        if (len > size - pos - SEC_HEADER)
            break;
        pos += SEC_HEADER + (size_t)len;
    }
    return size;
}

static void exercise(const lk_model *m)
{
    lk_error err;
    FUZZ_CHECK(strlen(lk_model_id(m)) == LK_MODEL_ID_HEX, "model id of %zu characters",
               strlen(lk_model_id(m)));
    FUZZ_CHECK(strlen(lk_model_checksum(m)) == 64, "checksum of %zu characters",
               strlen(lk_model_checksum(m)));
    size_t d = lk_model_feature_dim(m), np = lk_model_pair_dim(m);
    FUZZ_CHECK(d >= 1 && d <= LK_MODEL_MAX_DIM && np >= 1 && np <= LK_MODEL_MAX_DIM,
               "dimensions d %zu, pair %zu", d, np);
    char *json = lk_model_to_json(m);
    FUZZ_CHECK(json != NULL, "lk_model_to_json returned NULL");
    free(json);

    /* Score two fixed vectors: every loaded value is finite, so the result
     * is either finite or refused, never a crash. */
    float *a = malloc(d * sizeof *a), *b = malloc(d * sizeof *b);
    double *scratch = malloc((lk_model_scratch_size(m) + 1) * sizeof *scratch);
    FUZZ_CHECK(a && b && scratch, "out of memory");
    for (size_t i = 0; i < d; i++) {
        a[i] = (float)((i % 7) * 0.125);
        b[i] = (float)((i % 5) * 0.25);
    }
    double f = NAN, p = NAN;
    lk_code rc = lk_model_score(m, a, b, scratch, &f, &p, &err);
    if (rc == LK_OK)
        FUZZ_CHECK(isfinite(f) && p >= 0 && p <= 1, "score %g, probability %g", f, p);
    else
        fuzz_check_error(rc, &err);
    double threshold;
    rc = lk_model_threshold_for_fmr(m, lk_model_default_fmr(m), &threshold, &err);
    FUZZ_CHECK(rc == LK_OK, "the default FMR selects no operating point: %s", err.message);
    free(a);
    free(b);
    free(scratch);

    uint8_t *bytes = NULL, *again = NULL;
    size_t len = 0, len2 = 0;
    rc = lk_model_serialise(m, &bytes, &len, &err);
    FUZZ_CHECK(rc == LK_OK, "a loaded model does not serialise: %s", err.message);
    lk_model *m2 = lk_model_load_bytes(bytes, len, &err);
    FUZZ_CHECK(m2 != NULL, "a serialised model does not load: %s", err.message);
    FUZZ_CHECK(strcmp(lk_model_id(m), lk_model_id(m2)) == 0, "id changed on reload");
    rc = lk_model_serialise(m2, &again, &len2, &err);
    FUZZ_CHECK(rc == LK_OK, "a reloaded model does not serialise: %s", err.message);
    FUZZ_CHECK(len == len2 && memcmp(bytes, again, len) == 0,
               "save, load, save gives other bytes (%zu vs %zu)", len, len2);
    lk_model_free(m2);
    free(bytes);
    free(again);
}

static void load(const uint8_t *b, size_t n)
{
    lk_error err;
    lk_model *m = lk_model_load_bytes(b, n, &err);
    if (!m) {
        FUZZ_CHECK(err.code == LK_ERR_MODEL_FORMAT || err.code == LK_ERR_NOMEM,
                   "load failed with %s", lk_code_name(err.code));
        fuzz_check_error(err.code, &err);
        return;
    }
    exercise(m);
    lk_model_free(m);
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    load(data, size);
    if (size < HEADER)
        return 0;
    size_t body = body_end(data, size);
    uint8_t *fixed = malloc(body + SEC_HEADER + 32);
    FUZZ_CHECK(fixed != NULL, "out of memory");
    memcpy(fixed, data, body);
    static const uint8_t csum[SEC_HEADER] = {'C', 'S', 'U', 'M', 1, 0, 0, 0, 32, 0, 0, 0, 0, 0, 0, 0};
    memcpy(fixed + body, csum, sizeof csum);
    /* docs/model-format.md, "Checksum": BLAKE2b-256 of every byte before
     * the digest. */
    crypto_generichash(fixed + body + SEC_HEADER, 32, fixed, body + SEC_HEADER, NULL, 0);
    load(fixed, body + SEC_HEADER + 32);
    free(fixed);
    return 0;
}
