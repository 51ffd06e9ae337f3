/* Template records (docs/template-format.md): a header that binds the record
 * to its key id, template id, model id and feature configuration, then the
 * template's values sealed with XChaCha20-Poly1305 (IETF AEAD construction,
 * draft-irtf-cfrg-xchacha-03 section 2; libsodium's
 * crypto_aead_xchacha20poly1305_ietf_*), the whole header being the
 * associated data. Every input is treated as hostile: every length is
 * checked before a byte is read. */
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include <sodium.h>

#include "internal.h"

#define REC_MAGIC "LKTR"
#define REC_VERSION 1u
#define REC_NONCE_BYTES 24u /* crypto_aead_xchacha20poly1305_ietf_NPUBBYTES */
#define REC_TAG_BYTES 16u   /* crypto_aead_xchacha20poly1305_ietf_ABYTES */
/* magic 4, version 2, key id length 1, template id 32, model id 32,
 * configuration digest 32, dim 4, nonce 24; plus the key id itself */
#define REC_FIXED_BYTES (4u + 2u + 1u + 32u + 32u + 32u + 4u + REC_NONCE_BYTES)

_Static_assert(REC_NONCE_BYTES == crypto_aead_xchacha20poly1305_ietf_NPUBBYTES, "nonce size");
_Static_assert(REC_TAG_BYTES == crypto_aead_xchacha20poly1305_ietf_ABYTES, "tag size");
_Static_assert(LK_KEY_BYTES == crypto_aead_xchacha20poly1305_ietf_KEYBYTES, "key size");

typedef struct rec_header {
    size_t len;            /* header bytes (the associated data) */
    const char *key_id;
    size_t key_id_len;
    const char *template_id; /* 32 bytes, not terminated */
    const char *model_id;    /* 32 bytes */
    const uint8_t *digest;   /* 32 bytes */
    uint32_t dim;
    const uint8_t *nonce;
    const uint8_t *ct;     /* 8 dim + 16 bytes */
    size_t ct_len;
} rec_header;

static int lower_hex(const char *s, size_t n)
{
    for (size_t i = 0; i < n; i++)
        if (!((s[i] >= '0' && s[i] <= '9') || (s[i] >= 'a' && s[i] <= 'f')))
            return 0;
    return 1;
}

bool lk_template_id_valid(const char *s)
{
    return s && strlen(s) == LK_TEMPLATE_ID_HEX && lower_hex(s, LK_TEMPLATE_ID_HEX);
}

void lk_template_new_id(char id[LK_TEMPLATE_ID_HEX + 1])
{
    uint8_t r[LK_TEMPLATE_ID_HEX / 2];
    (void)lk__sodium_ready();
    randombytes_buf(r, sizeof r);
    sodium_bin2hex(id, LK_TEMPLATE_ID_HEX + 1, r, sizeof r);
}

static uint32_t get_u32le(const uint8_t *p)
{
    return (uint32_t)p[0] | (uint32_t)p[1] << 8 | (uint32_t)p[2] << 16 | (uint32_t)p[3] << 24;
}

static lk_code parse_header(const uint8_t *rec, size_t len, rec_header *h, lk_error *err)
{
    if (!rec || len < 7)
        return lk_error_set(err, LK_ERR_TEMPLATE_INVALID,
                            "template record is %zu bytes, too short to be one", rec ? len : 0);
    if (memcmp(rec, REC_MAGIC, 4) != 0)
        return lk_error_set(err, LK_ERR_TEMPLATE_INVALID,
                            "not a template record (no LKTR magic)");
    unsigned version = (unsigned)rec[4] | (unsigned)rec[5] << 8;
    if (version != REC_VERSION)
        return lk_error_set(err, LK_ERR_TEMPLATE_INVALID,
                            "template record format version %u; this build reads version %u "
                            "(upgrade likeness, or enrol again)", version, REC_VERSION);
    size_t n = rec[6];
    h->len = REC_FIXED_BYTES + n;
    if (len < h->len)
        return lk_error_set(err, LK_ERR_TEMPLATE_INVALID, "template record truncated in its "
                            "header (%zu of at least %zu bytes)", len, h->len);
    h->key_id = (const char *)rec + 7;
    h->key_id_len = n;
    if (!lk__key_id_valid(h->key_id, n))
        return lk_error_set(err, LK_ERR_TEMPLATE_INVALID, "template record has a malformed "
                            "key id");
    size_t o = 7 + n;
    h->template_id = (const char *)rec + o;
    h->model_id = (const char *)rec + o + 32;
    if (!lower_hex(h->template_id, 32) || !lower_hex(h->model_id, 32))
        return lk_error_set(err, LK_ERR_TEMPLATE_INVALID, "template record has a malformed "
                            "template id or model id");
    h->digest = rec + o + 64;
    h->dim = get_u32le(rec + o + 96);
    h->nonce = rec + o + 100;
    if (h->dim == 0 || h->dim > LK_TEMPLATE_MAX_DIM)
        return lk_error_set(err, LK_ERR_TEMPLATE_INVALID, "template record dimension %u is "
                            "outside 1..%u", h->dim, LK_TEMPLATE_MAX_DIM);
    /* dim <= 65536 and the header < 200 bytes: no overflow. */
    size_t want = h->len + 8u * (size_t)h->dim + REC_TAG_BYTES;
    if (len != want)
        return lk_error_set(err, LK_ERR_TEMPLATE_INVALID, "template record is %zu bytes but its "
                            "header says %zu (truncated or damaged)", len, want);
    h->ct = rec + h->len;
    h->ct_len = len - h->len;
    return LK_OK;
}

static lk_code check_binding(const lk_template_binding *b, lk_error *err)
{
    if (!b || !lk_template_id_valid(b->template_id))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "template id must be %d lowercase "
                            "hexadecimal characters", LK_TEMPLATE_ID_HEX);
    if (strlen(b->model_id) != 32 || !lower_hex(b->model_id, 32))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "model id must be 32 lowercase "
                            "hexadecimal characters");
    if (!b->feature_config)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no feature configuration given");
    return LK_OK;
}

static void config_digest(const char *config, uint8_t out[32])
{
    /* Unkeyed BLAKE2b-256 (RFC 7693) of the configuration's bytes. */
    crypto_generichash(out, 32, (const unsigned char *)config, strlen(config), NULL, 0);
}

/* Builds a record sealed under (key_id, key) around plaintext pt (8 dim
 * bytes: the little-endian binary64 values). */
static lk_code seal_raw(const char *key_id, const uint8_t *key, const char *template_id,
                        const char *model_id, const uint8_t digest[32], uint32_t dim,
                        const uint8_t *pt, uint8_t **record, size_t *len, lk_error *err)
{
    size_t n = strlen(key_id);
    size_t hlen = REC_FIXED_BYTES + n;
    size_t total = hlen + 8u * (size_t)dim + REC_TAG_BYTES;
    uint8_t *r = malloc(total);
    if (!r)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory sealing a template");
    memcpy(r, REC_MAGIC, 4);
    r[4] = REC_VERSION & 0xff;
    r[5] = REC_VERSION >> 8;
    r[6] = (uint8_t)n;
    memcpy(r + 7, key_id, n);
    size_t o = 7 + n;
    memcpy(r + o, template_id, 32);
    memcpy(r + o + 32, model_id, 32);
    memcpy(r + o + 64, digest, 32);
    r[o + 96] = (uint8_t)dim;
    r[o + 97] = (uint8_t)(dim >> 8);
    r[o + 98] = (uint8_t)(dim >> 16);
    r[o + 99] = (uint8_t)(dim >> 24);
    /* A random 192-bit nonce: collisions are negligible even for a very
     * large number of records under one key (draft-irtf-cfrg-xchacha-03
     * section 1, the reason for the extended nonce). */
    randombytes_buf(r + o + 100, REC_NONCE_BYTES);
    unsigned long long clen = 0;
    crypto_aead_xchacha20poly1305_ietf_encrypt(r + hlen, &clen, pt, 8u * (size_t)dim, r, hlen,
                                               NULL, r + o + 100, key);
    if (clen != 8u * (size_t)dim + REC_TAG_BYTES) {
        free(r);
        return lk_error_set(err, LK_ERR_INTERNAL, "AEAD produced an unexpected length");
    }
    *record = r;
    *len = total;
    return LK_OK;
}

/* Decrypts h's ciphertext with key into pt (8 dim bytes). */
static lk_code open_raw(const rec_header *h, const uint8_t *rec, const uint8_t *key, uint8_t *pt,
                        lk_error *err)
{
    unsigned long long plen = 0;
    if (crypto_aead_xchacha20poly1305_ietf_decrypt(pt, &plen, NULL, h->ct, h->ct_len, rec,
                                                   h->len, h->nonce, key) != 0 ||
        plen != 8u * (size_t)h->dim) {
        sodium_memzero(pt, 8u * (size_t)h->dim);
        return lk_error_set(err, LK_ERR_TEMPLATE_INVALID,
                            "template record failed authentication: it was altered, damaged "
                            "or belongs to another template");
    }
    return LK_OK;
}

static lk_code unknown_key(const rec_header *h, lk_error *err)
{
    return lk_error_set(err, LK_ERR_KEY, "template record is sealed with key id %.*s, which "
                        "neither the key file nor the data keys loaded from the store hold; "
                        "restore the key file (or the store) that has it",
                        (int)h->key_id_len, h->key_id);
}

lk_code lk_template_seal(const lk_keyring *kr, const lk_template_binding *b, const double *vec,
                         size_t dim, uint8_t **record, size_t *len,
                         char key_id_out[LK_KEY_ID_MAX], lk_error *err)
{
    if (!kr || !record || !len || !vec)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no key ring, template or output");
    *record = NULL;
    *len = 0;
    lk_code c = check_binding(b, err);
    if (c != LK_OK)
        return c;
    if (dim == 0 || dim > LK_TEMPLATE_MAX_DIM)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "template dimension %zu is outside "
                            "1..%u", dim, LK_TEMPLATE_MAX_DIM);
    uint8_t *pt = malloc(8 * dim);
    if (!pt)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory sealing a template");
    for (size_t i = 0; i < dim; i++) {
        if (!isfinite(vec[i])) {
            free(pt);
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "template value %zu is not "
                                "finite", i);
        }
        uint64_t u;
        memcpy(&u, &vec[i], 8);
        for (int k = 0; k < 8; k++)
            pt[8 * i + (size_t)k] = (uint8_t)(u >> (8 * k));
    }
    uint8_t digest[32];
    config_digest(b->feature_config, digest);
    const char *kid;
    const uint8_t *key;
    (void)lk__keyring_acquire(kr);
    lk__keyring_current_locked(kr, &kid, &key);
    c = seal_raw(kid, key, b->template_id, b->model_id, digest, (uint32_t)dim, pt, record, len,
                 err);
    if (c == LK_OK && key_id_out)
        memcpy(key_id_out, kid, LK_KEY_ID_MAX);
    lk__keyring_release(kr);
    sodium_memzero(pt, 8 * dim); /* biometric data: do not leave it in freed memory */
    free(pt);
    return c;
}

lk_code lk_template_open(const lk_keyring *kr, const lk_template_binding *b,
                         const uint8_t *record, size_t len, double *vec, size_t max_dim,
                         size_t *dim, lk_error *err)
{
    if (dim)
        *dim = 0;
    if (!kr || !vec || !dim)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no key ring or output");
    lk_code c = check_binding(b, err);
    if (c != LK_OK)
        return c;
    rec_header h = {0};
    if ((c = parse_header(record, len, &h, err)) != LK_OK)
        return c;
    if (memcmp(h.template_id, b->template_id, 32) != 0)
        return lk_error_set(err, LK_ERR_TEMPLATE_INVALID, "template record belongs to another "
                            "template id");
    /* Checked before decrypting, so the caller learns why and what to do;
     * the fields are authenticated by the AEAD below all the same. */
    if (memcmp(h.model_id, b->model_id, 32) != 0)
        return lk_error_set(err, LK_ERR_TEMPLATE_MISMATCH, "template was made with model %.32s, "
                            "not the loaded model %s; enrol the subject again",
                            h.model_id, b->model_id);
    uint8_t digest[32];
    config_digest(b->feature_config, digest);
    if (sodium_memcmp(digest, h.digest, 32) != 0)
        return lk_error_set(err, LK_ERR_TEMPLATE_MISMATCH, "template was made with another "
                            "feature configuration than the loaded model's; enrol the subject "
                            "again");
    if (h.dim > max_dim)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "template has %u values, more than "
                            "the %zu the caller has room for", h.dim, max_dim);
    (void)lk__keyring_acquire(kr);
    const uint8_t *key = lk__keyring_find_locked(kr, h.key_id, h.key_id_len);
    if (!key)
        c = unknown_key(&h, err);
    else
        c = open_raw(&h, record, key, (uint8_t *)vec, err);
    lk__keyring_release(kr);
    if (c != LK_OK)
        return c;
    /* Little-endian binary64 to host doubles, in place (each value is read
     * whole before it is written). */
    const uint8_t *p = (const uint8_t *)vec;
    for (size_t i = 0; i < h.dim; i++) {
        uint64_t u = 0;
        for (int k = 7; k >= 0; k--)
            u = u << 8 | p[8 * i + (size_t)k];
        memcpy(&vec[i], &u, 8);
        if (!isfinite(vec[i])) {
            sodium_memzero(vec, 8 * (size_t)h.dim);
            return lk_error_set(err, LK_ERR_TEMPLATE_INVALID, "template record holds a value "
                                "that is not finite");
        }
    }
    *dim = h.dim;
    return LK_OK;
}

lk_code lk_template_record_key_id(const uint8_t *record, size_t len, char key_id[LK_KEY_ID_MAX],
                                  lk_error *err)
{
    rec_header h = {0};
    lk_code c = parse_header(record, len, &h, err);
    if (c != LK_OK)
        return c;
    memcpy(key_id, h.key_id, h.key_id_len);
    key_id[h.key_id_len] = '\0';
    return LK_OK;
}

lk_code lk_template_reseal(const lk_keyring *kr, const char *template_id, const uint8_t *record,
                           size_t len, uint8_t **out, size_t *out_len,
                           char new_key_id[LK_KEY_ID_MAX], lk_error *err)
{
    if (!kr || !out || !out_len)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no key ring or output");
    *out = NULL;
    *out_len = 0;
    if (!lk_template_id_valid(template_id))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "template id must be %d lowercase "
                            "hexadecimal characters", LK_TEMPLATE_ID_HEX);
    rec_header h = {0};
    lk_code c = parse_header(record, len, &h, err);
    if (c != LK_OK)
        return c;
    if (memcmp(h.template_id, template_id, 32) != 0)
        return lk_error_set(err, LK_ERR_TEMPLATE_INVALID, "template record belongs to another "
                            "template id");
    size_t ptlen = 8u * (size_t)h.dim;
    uint8_t *pt = malloc(ptlen);
    if (!pt)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory re-sealing a template");
    char mid[33];
    memcpy(mid, h.model_id, 32);
    mid[32] = '\0';
    (void)lk__keyring_acquire(kr);
    const uint8_t *key = lk__keyring_find_locked(kr, h.key_id, h.key_id_len);
    if (!key)
        c = unknown_key(&h, err);
    else
        c = open_raw(&h, record, key, pt, err);
    /* The same step 5 as lk_template_open (docs/template-format.md): a record
     * holding a value that is not finite is refused, not carried forward. */
    for (size_t i = 0; c == LK_OK && i < h.dim; i++) {
        uint64_t u = 0;
        for (int k = 7; k >= 0; k--)
            u = u << 8 | pt[8 * i + (size_t)k];
        double v;
        memcpy(&v, &u, 8);
        if (!isfinite(v))
            c = lk_error_set(err, LK_ERR_TEMPLATE_INVALID,
                             "template record holds a value that is not finite");
    }
    /* The model id and digest are authentic now: carry them over unchanged. */
    if (c == LK_OK) {
        const char *kid;
        const uint8_t *ckey;
        lk__keyring_current_locked(kr, &kid, &ckey);
        c = seal_raw(kid, ckey, template_id, mid, h.digest, h.dim, pt, out, out_len, err);
        if (c == LK_OK && new_key_id)
            memcpy(new_key_id, kid, LK_KEY_ID_MAX);
    }
    lk__keyring_release(kr);
    sodium_memzero(pt, ptlen);
    free(pt);
    return c;
}
