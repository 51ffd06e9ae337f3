/* libFuzzer target: template records (docs/template-format.md) through
 * lk_template_record_key_id, lk_template_open and lk_template_reseal, with
 * the fixed key ring of fuzz_template.h written to a 0600 file at start-up
 * (docs/key-file.md), loaded, and removed again.
 *
 * Every input is tried as it is and, when its header names one of the ring's
 * keys, once more with the AEAD redone over its own header and "ciphertext"
 * (taken as plaintext), so that mutations of the header fields and of the
 * values reach the checks after decryption instead of stopping at the tag.
 * Checked: open and reseal agree with an independent decryption (libsodium
 * directly), reseal keeps the values and the binding and uses the current
 * key, and nothing not finite is ever accepted (docs/template-format.md,
 * "Opening", step 5, which re-sealing applies too). Seeds: corpus/template. */
#include <fcntl.h>
#include <math.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include <sodium.h>

#include "fuzz_common.h"
#include "fuzz_template.h"
#include "likeness/crypto.h"

int LLVMFuzzerInitialize(int *argc, char ***argv);
int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size);

#define FIXED_BYTES 131u /* header without the key id (docs/template-format.md, Layout) */
#define TAG_BYTES 16u

typedef struct fuzz_state {
    lk_keyring *ring;
    uint8_t old_key[32], cur_key[32];
} fuzz_state;

static fuzz_state *state; /* the fuzzer's entry points take no context */

int LLVMFuzzerInitialize(int *argc, char ***argv)
{
    (void)argc;
    (void)argv;
    static fuzz_state st;
    const char *tmp = getenv("TMPDIR");
    char dir[512];
    snprintf(dir, sizeof dir, "%s/lkfuzz-XXXXXX", tmp && *tmp ? tmp : "/tmp");
    FUZZ_CHECK(mkdtemp(dir) != NULL, "cannot create a temporary directory in %s", dir);
    char path[600];
    snprintf(path, sizeof path, "%s/keys", dir);
    int fd = open(path, O_WRONLY | O_CREAT | O_EXCL, 0600);
    FUZZ_CHECK(fd >= 0, "cannot create %s", path);
    const char text[] = FUZZ_KEY_FILE;
    FUZZ_CHECK(write(fd, text, sizeof text - 1) == (ssize_t)(sizeof text - 1), "write %s", path);
    close(fd);
    lk_error err;
    st.ring = lk_keyring_load(path, &err);
    unlink(path);
    rmdir(dir);
    FUZZ_CHECK(st.ring != NULL, "fixed key ring refused: %s", err.message);
    FUZZ_CHECK(sodium_init() >= 0, "libsodium cannot initialise");
    FUZZ_CHECK(sodium_hex2bin(st.old_key, 32, FUZZ_OLD_KEY_HEX, 64, NULL, NULL, NULL) == 0 &&
                   sodium_hex2bin(st.cur_key, 32, FUZZ_CUR_KEY_HEX, 64, NULL, NULL, NULL) == 0,
               "key hex");
    char cur[LK_KEY_ID_MAX];
    lk_keyring_current_id(st.ring, cur);
    FUZZ_CHECK(strcmp(cur, FUZZ_CUR_KEY_ID) == 0, "current key is %s", cur);
    state = &st;
    return 0;
}

/* The ring's key for the record's key id, or NULL. */
static const uint8_t *key_for(const uint8_t *rec, size_t len)
{
    if (len < 7)
        return NULL;
    size_t n = rec[6];
    if (len < 7 + n)
        return NULL;
    if (n == strlen(FUZZ_OLD_KEY_ID) && !memcmp(rec + 7, FUZZ_OLD_KEY_ID, n))
        return state->old_key;
    if (n == strlen(FUZZ_CUR_KEY_ID) && !memcmp(rec + 7, FUZZ_CUR_KEY_ID, n))
        return state->cur_key;
    return NULL;
}

/* Independent decryption: plaintext of len - header - 16 bytes, or NULL. */
static uint8_t *decrypt(const uint8_t *rec, size_t len, size_t *pt_len)
{
    const uint8_t *key = key_for(rec, len);
    if (!key)
        return NULL;
    size_t h = FIXED_BYTES + rec[6];
    if (len < h + TAG_BYTES)
        return NULL;
    uint8_t *pt = malloc(len - h - TAG_BYTES + 1);
    unsigned long long n = 0;
    FUZZ_CHECK(pt != NULL, "out of memory");
    if (crypto_aead_xchacha20poly1305_ietf_decrypt(pt, &n, NULL, rec + h, len - h, rec, h,
                                                   rec + h - 24, key) != 0) {
        free(pt);
        return NULL;
    }
    *pt_len = (size_t)n;
    return pt;
}

static double le_f64(const uint8_t *p)
{
    uint64_t u = 0;
    for (int k = 7; k >= 0; k--)
        u = u << 8 | p[k];
    double d;
    memcpy(&d, &u, 8);
    return d;
}

static void try_record(const uint8_t *rec, size_t len)
{
    lk_error err;
    char kid[LK_KEY_ID_MAX];
    memset(kid, 'x', sizeof kid);
    lk_code krc = lk_template_record_key_id(rec, len, kid, &err);
    if (krc == LK_OK) {
        size_t n = strnlen(kid, sizeof kid);
        FUZZ_CHECK(n >= 1 && n < LK_KEY_ID_MAX && n == rec[6], "key id of %zu characters", n);
    } else {
        fuzz_check_error(krc, &err);
        FUZZ_CHECK(krc == LK_ERR_TEMPLATE_INVALID, "key id: %s", lk_code_name(krc));
    }

    size_t pt_len = 0;
    uint8_t *pt = decrypt(rec, len, &pt_len);

    lk_template_binding b;
    memcpy(b.template_id, FUZZ_TEMPLATE_ID, sizeof b.template_id);
    memcpy(b.model_id, FUZZ_MODEL_ID, sizeof b.model_id);
    b.feature_config = FUZZ_FEATURE_CONFIG;
    size_t max_dim = len / 8 + 1, dim = 99;
    double *vec = malloc(max_dim * sizeof *vec);
    FUZZ_CHECK(vec != NULL, "out of memory");
    lk_code rc = lk_template_open(state->ring, &b, rec, len, vec, max_dim, &dim, &err);
    if (rc == LK_OK) {
        FUZZ_CHECK(krc == LK_OK, "opened a record whose header lk_template_record_key_id refuses");
        FUZZ_CHECK(pt && pt_len == 8 * dim && dim >= 1 && dim <= LK_TEMPLATE_MAX_DIM,
                   "opened %zu values; independent decryption %s", dim, pt ? "agrees" : "fails");
        for (size_t i = 0; i < dim; i++) {
            FUZZ_CHECK(isfinite(vec[i]), "value %zu is not finite", i);
            FUZZ_CHECK(vec[i] == le_f64(pt + 8 * i), "value %zu differs", i);
        }
    } else {
        fuzz_check_error(rc, &err);
        FUZZ_CHECK(dim == 0, "*dim %zu after %s", dim, lk_code_name(rc));
    }
    free(vec);

    /* A caller with room for 2 values: refused or at most 2, never more. */
    double *small = malloc(2 * sizeof *small);
    FUZZ_CHECK(small != NULL, "out of memory");
    size_t sdim = 99;
    lk_code src = lk_template_open(state->ring, &b, rec, len, small, 2, &sdim, &err);
    FUZZ_CHECK(src != LK_OK || sdim <= 2, "%zu values into room for 2", sdim);
    free(small);

    uint8_t *out = NULL;
    size_t out_len = 0;
    char new_kid[LK_KEY_ID_MAX];
    rc = lk_template_reseal(state->ring, FUZZ_TEMPLATE_ID, rec, len, &out, &out_len, new_kid,
                            &err);
    if (rc == LK_OK) {
        FUZZ_CHECK(strcmp(new_kid, FUZZ_CUR_KEY_ID) == 0, "re-sealed under %s", new_kid);
        size_t n = rec[6];
        FUZZ_CHECK(out_len == len - n + strlen(FUZZ_CUR_KEY_ID), "re-sealed record of %zu bytes",
                   out_len);
        size_t o = 7 + n, o2 = 7 + strlen(FUZZ_CUR_KEY_ID);
        /* template id, model id, digest and dimension carried over */
        FUZZ_CHECK(memcmp(rec + o, out + o2, 100) == 0, "re-sealing changed the binding");
        size_t pt2_len = 0;
        uint8_t *pt2 = decrypt(out, out_len, &pt2_len);
        FUZZ_CHECK(pt2 != NULL, "the re-sealed record does not decrypt under the current key");
        FUZZ_CHECK(pt && pt_len == pt2_len && memcmp(pt, pt2, pt_len) == 0,
                   "re-sealing changed the values");
#ifndef LIKENESS_FUZZ_TOLERATE_RESEAL_NONFINITE /* only to fuzz past that known bug */
        for (size_t i = 0; i + 8 <= pt2_len; i += 8)
            FUZZ_CHECK(isfinite(le_f64(pt2 + i)),
                       "lk_template_reseal accepted a value that is not finite (value %zu); "
                       "docs/template-format.md step 5 refuses it",
                       i / 8);
#endif
        free(pt2);
        free(out);
    } else {
        fuzz_check_error(rc, &err);
        FUZZ_CHECK(out == NULL && out_len == 0, "output left after %s", lk_code_name(rc));
    }
    free(pt);
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    try_record(data, size);
    const uint8_t *key = key_for(data, size);
    if (!key)
        return 0;
    size_t h = FIXED_BYTES + data[6];
    if (size < h + TAG_BYTES)
        return 0;
    /* Redo the AEAD: header as associated data, the bytes after it (less
     * the tag) as plaintext, the header's own nonce. */
    uint8_t *fixed = malloc(size);
    FUZZ_CHECK(fixed != NULL, "out of memory");
    memcpy(fixed, data, h);
    unsigned long long clen = 0;
    crypto_aead_xchacha20poly1305_ietf_encrypt(fixed + h, &clen, data + h, size - h - TAG_BYTES,
                                               fixed, h, NULL, fixed + h - 24, key);
    FUZZ_CHECK(clen == size - h, "AEAD length");
    try_record(fixed, size);
    free(fixed);
    return 0;
}
