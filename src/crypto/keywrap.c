/* Data keys (docs/key-file.md, "Data keys in the store"): template keys that
 * live in the store wrapped under a key of the key file, so that every
 * replica, each with its own copy of the file, shares them. Wrapping is
 * XChaCha20-Poly1305 in its IETF form (draft-irtf-cfrg-xchacha-03 section 2;
 * libsodium's crypto_aead_xchacha20poly1305_ietf_*) with a random nonce and
 * associated data that binds the wrapped key to its own id and its KEK's id.
 * Unwrapped keys exist only in sodium_malloc'd memory. */
#include <stdlib.h>
#include <string.h>

#include <sodium.h>

#include "internal.h"

#define WRAP_LABEL "likeness-key-wrap-v1"
#define WRAP_NONCE_BYTES 24u
#define WRAP_TAG_BYTES 16u
/* label, then each id behind a one-byte length */
#define WRAP_AD_MAX (sizeof WRAP_LABEL - 1 + 2 * LK_KEY_ID_MAX)

_Static_assert(LK_WRAPPED_KEY_BYTES == WRAP_NONCE_BYTES + LK_KEY_BYTES + WRAP_TAG_BYTES,
               "wrapped key layout");
_Static_assert(WRAP_NONCE_BYTES == crypto_aead_xchacha20poly1305_ietf_NPUBBYTES, "nonce size");
_Static_assert(WRAP_TAG_BYTES == crypto_aead_xchacha20poly1305_ietf_ABYTES, "tag size");

/* AD = "likeness-key-wrap-v1" || u8 len || key_id || u8 len || kek_id. The
 * lengths make the split between the two ids unambiguous. */
static size_t wrap_ad(const char *key_id, const char *kek_id, uint8_t ad[WRAP_AD_MAX])
{
    size_t o = sizeof WRAP_LABEL - 1, a = strlen(key_id), b = strlen(kek_id);
    memcpy(ad, WRAP_LABEL, o);
    ad[o++] = (uint8_t)a;
    memcpy(ad + o, key_id, a);
    o += a;
    ad[o++] = (uint8_t)b;
    memcpy(ad + o, kek_id, b);
    return o + b;
}

/* Wraps key under kek into a new malloc'd blob. */
static lk_code wrap(const char *key_id, const char *kek_id, const uint8_t *kek,
                    const uint8_t *key, uint8_t **wrapped, size_t *len, lk_error *err)
{
    uint8_t *w = malloc(LK_WRAPPED_KEY_BYTES);
    if (!w)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory wrapping a data key");
    uint8_t ad[WRAP_AD_MAX];
    size_t adlen = wrap_ad(key_id, kek_id, ad);
    /* A random 192-bit nonce: collisions are negligible (draft-irtf-cfrg-
     * xchacha-03 section 1). */
    randombytes_buf(w, WRAP_NONCE_BYTES);
    unsigned long long clen = 0;
    crypto_aead_xchacha20poly1305_ietf_encrypt(w + WRAP_NONCE_BYTES, &clen, key, LK_KEY_BYTES,
                                               ad, adlen, NULL, w, kek);
    if (clen != LK_KEY_BYTES + WRAP_TAG_BYTES) {
        free(w);
        return lk_error_set(err, LK_ERR_INTERNAL, "AEAD produced an unexpected length");
    }
    *wrapped = w;
    *len = LK_WRAPPED_KEY_BYTES;
    return LK_OK;
}

lk_code lk_keyring_wrap_new_key(const lk_keyring *kr, char key_id[LK_KEY_ID_MAX],
                                char kek_id[LK_KEY_ID_MAX], uint8_t **wrapped, size_t *len,
                                lk_error *err)
{
    if (!kr || !key_id || !kek_id || !wrapped || !len)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no key ring or output");
    *wrapped = NULL;
    *len = 0;
    if (!lk__sodium_ready())
        return lk_error_set(err, LK_ERR_INTERNAL, "libsodium failed to initialise");
    uint8_t *key = sodium_malloc(LK_KEY_BYTES);
    if (!key)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory for a data key (sodium_malloc)");
    randombytes_buf(key, LK_KEY_BYTES);
    const lk_keyset *ks = lk__keyring_acquire(kr);
    do {
        uint8_t r[8];
        randombytes_buf(r, sizeof r);
        key_id[0] = 'd';
        sodium_bin2hex(key_id + 1, LK_KEY_ID_MAX - 1, r, sizeof r);
    } while (lk__keyring_find_locked(kr, key_id, strlen(key_id)));
    memcpy(kek_id, ks->ids[ks->current], LK_KEY_ID_MAX);
    lk_code c = wrap(key_id, kek_id, ks->secret + KS_TEMPLATE_OFF + LK_KEY_BYTES * ks->current,
                     key, wrapped, len, err);
    lk__keyring_release(kr);
    sodium_free(key); /* wipes it */
    return c;
}

lk_code lk_keyring_rewrap_key(const lk_keyring *kr, const char *key_id,
                              char kek_id[LK_KEY_ID_MAX], uint8_t **wrapped, size_t *len,
                              lk_error *err)
{
    if (!kr || !key_id || !kek_id || !wrapped || !len)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no key ring, key id or output");
    *wrapped = NULL;
    *len = 0;
    const lk_keyset *ks = lk__keyring_acquire(kr);
    const lk_dataset *ds = kr->ds;
    const uint8_t *key = NULL;
    for (size_t i = 0; ds && i < ds->n && !key; i++)
        if (!strcmp(ds->ids[i], key_id))
            key = ds->secret + LK_KEY_BYTES * i;
    lk_code c;
    if (!key) {
        c = lk_error_set(err, LK_ERR_KEY, "data key %.*s is not loaded from the store, so it "
                         "cannot be wrapped again", LK_KEY_ID_MAX - 1, key_id);
    } else {
        memcpy(kek_id, ks->ids[ks->current], LK_KEY_ID_MAX);
        c = wrap(key_id, kek_id, ks->secret + KS_TEMPLATE_OFF + LK_KEY_BYTES * ks->current, key,
                 wrapped, len, err);
    }
    lk__keyring_release(kr);
    return c;
}

void lk__dataset_free(lk_dataset *ds)
{
    if (!ds)
        return;
    sodium_free(ds->secret); /* wipes before unmapping */
    free(ds->ids);
    free(ds->kek_ids);
    free(ds);
}

/* BLAKE2b-256 (RFC 7693) of the listing: ids, wrapped bytes, the current
 * mark. Two listings with the same digest install the same keys. */
static void listing_digest(const lk_wrapped_key *keys, size_t n, uint8_t out[32])
{
    crypto_generichash_state st;
    crypto_generichash_init(&st, NULL, 0, 32);
    for (size_t i = 0; i < n; i++) {
        const lk_wrapped_key *k = &keys[i];
        uint8_t head[2 * LK_KEY_ID_MAX + 2];
        memset(head, 0, sizeof head);
        memcpy(head, k->key_id, strnlen(k->key_id, LK_KEY_ID_MAX));
        memcpy(head + LK_KEY_ID_MAX, k->kek_id, strnlen(k->kek_id, LK_KEY_ID_MAX));
        head[2 * LK_KEY_ID_MAX] = k->is_current ? 1 : 0;
        head[2 * LK_KEY_ID_MAX + 1] = (uint8_t)k->len;
        crypto_generichash_update(&st, head, sizeof head);
        crypto_generichash_update(&st, k->wrapped, k->len);
    }
    crypto_generichash_final(&st, out, 32);
}

static bool id_ok(const char *id)
{
    size_t n = strnlen(id, LK_KEY_ID_MAX);
    return n < LK_KEY_ID_MAX && lk__key_id_valid(id, n);
}

lk_code lk_keyring_install(lk_keyring *kr, const lk_wrapped_key *keys, size_t n, lk_error *err)
{
    if (!kr || (n && !keys))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no key ring or keys");
    size_t currents = 0;
    for (size_t i = 0; i < n; i++) {
        const lk_wrapped_key *k = &keys[i];
        if (!id_ok(k->key_id) || !id_ok(k->kek_id))
            return lk_error_set(err, LK_ERR_KEY, "the store lists a data key with a malformed "
                                "key id or KEK id (ids are 1 to %d characters from a-z, 0-9, "
                                "'_' and '-')", LK_KEY_ID_MAX - 1);
        if (!k->wrapped || k->len != LK_WRAPPED_KEY_BYTES)
            return lk_error_set(err, LK_ERR_KEY, "data key %s in the store is %zu bytes, not a "
                                "wrapped key of %u bytes (damaged)", k->key_id, k->len,
                                LK_WRAPPED_KEY_BYTES);
        for (size_t j = 0; j < i; j++)
            if (!strcmp(keys[j].key_id, k->key_id))
                return lk_error_set(err, LK_ERR_KEY, "the store lists data key %s twice",
                                    k->key_id);
        currents += k->is_current;
    }
    if (currents > 1)
        return lk_error_set(err, LK_ERR_KEY, "the store marks %zu data keys current; exactly "
                            "one may be", currents);
    uint8_t digest[32];
    listing_digest(keys, n, digest);
    (void)lk__keyring_acquire(kr);
    bool same = kr->ds && !sodium_memcmp(kr->ds->digest, digest, 32);
    lk__keyring_release(kr);
    if (same)
        return LK_OK;

    lk_dataset *ds = calloc(1, sizeof *ds);
    if (ds) {
        ds->ids = calloc(n ? n : 1, sizeof *ds->ids);
        ds->kek_ids = calloc(n ? n : 1, sizeof *ds->kek_ids);
        ds->secret = sodium_malloc(LK_KEY_BYTES * (n ? n : 1));
    }
    if (!ds || !ds->ids || !ds->kek_ids || !ds->secret) {
        lk__dataset_free(ds);
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory for the data keys (sodium_malloc)");
    }
    ds->n = n;
    ds->current = -1;
    memcpy(ds->digest, digest, 32);
    lk_code c = LK_OK;
    const lk_keyset *ks = lk__keyring_acquire(kr);
    for (size_t i = 0; i < n && c == LK_OK; i++) {
        const lk_wrapped_key *k = &keys[i];
        if (lk__keyset_find(ks, k->key_id, strlen(k->key_id))) {
            c = lk_error_set(err, LK_ERR_KEY, "data key %s in the store has the id of a key "
                             "of the key file %s; one of them must be renamed", k->key_id,
                             kr->path);
            break;
        }
        const uint8_t *kek = lk__keyset_find(ks, k->kek_id, strlen(k->kek_id));
        if (!kek) {
            c = lk_error_set(err, LK_ERR_KEY, "data key %s in the store is wrapped under key "
                             "%s, which the key file %s does not hold; install the key file "
                             "that has it (after `likeness keys rotate --master` every replica "
                             "needs the new key file)", k->key_id, k->kek_id, kr->path);
            break;
        }
        uint8_t ad[WRAP_AD_MAX];
        size_t adlen = wrap_ad(k->key_id, k->kek_id, ad);
        unsigned long long plen = 0;
        if (crypto_aead_xchacha20poly1305_ietf_decrypt(
                ds->secret + LK_KEY_BYTES * i, &plen, NULL, k->wrapped + WRAP_NONCE_BYTES,
                LK_KEY_BYTES + WRAP_TAG_BYTES, ad, adlen, k->wrapped, kek) != 0 ||
            plen != LK_KEY_BYTES) {
            c = lk_error_set(err, LK_ERR_KEY, "data key %s in the store failed authentication "
                             "under key %s of the key file: it was altered or damaged, or "
                             "the key file is not the one it was wrapped with", k->key_id,
                             k->kek_id);
            break;
        }
        memcpy(ds->ids[i], k->key_id, LK_KEY_ID_MAX);
        memcpy(ds->kek_ids[i], k->kek_id, LK_KEY_ID_MAX);
        if (k->is_current)
            ds->current = (ptrdiff_t)i;
    }
    lk__keyring_release(kr);
    if (c != LK_OK) {
        lk__dataset_free(ds);
        return c;
    }
    sodium_mprotect_readonly(ds->secret);
    pthread_rwlock_wrlock(&kr->lock);
    lk_dataset *old = kr->ds;
    kr->ds = ds;
    pthread_rwlock_unlock(&kr->lock);
    lk__dataset_free(old);
    return LK_OK;
}
