/* Internals shared by the files of the crypto module (not installed). */
#ifndef LIKENESS_CRYPTO_INTERNAL_H
#define LIKENESS_CRYPTO_INTERNAL_H

#include <stddef.h>
#include <stdint.h>

#include "likeness/crypto.h"

#define LK_KEY_BYTES 32u

/* One generation of the key file's content. The secrets sit in one
 * sodium_malloc'd block (guard pages, mlock'd, read-only once filled):
 *   [0, 32)     API-key hashing key
 *   [32, 64)    audit signing seed
 *   [64, 128)   Ed25519 secret key derived from the seed (libsodium layout)
 *   [128, ...)  template keys, 32 bytes each, in file order */
typedef struct lk_keyset {
    size_t n;                    /* template keys */
    size_t current;              /* index of the current template key */
    char (*ids)[LK_KEY_ID_MAX];  /* n key ids (not secret) */
    uint8_t *secret;
    uint8_t audit_pk[32];
} lk_keyset;

#define KS_APIKEY_OFF 0u
#define KS_SEED_OFF 32u
#define KS_AUDIT_SK_OFF 64u
#define KS_TEMPLATE_OFF 128u

/* Takes the key ring's read lock and returns its key set; release with
 * lk__keyring_unlock. */
const lk_keyset *lk__keyring_acquire(const lk_keyring *kr);
void lk__keyring_release(const lk_keyring *kr);

/* The key with this id, or NULL. */
const uint8_t *lk__keyset_find(const lk_keyset *ks, const char *id, size_t id_len);

/* true if s[0..n) is a well-formed key id: 1 to LK_KEY_ID_MAX - 1 characters
 * from [a-z0-9_-] (docs/key-file.md). */
int lk__key_id_valid(const char *s, size_t n);

/* Calls sodium_init (idempotent, thread-safe); false only if libsodium
 * cannot initialise (no entropy source). */
int lk__sodium_ready(void);

#endif
