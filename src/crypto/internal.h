/* Internals shared by the files of the crypto module (not installed). */
#ifndef LIKENESS_CRYPTO_INTERNAL_H
#define LIKENESS_CRYPTO_INTERNAL_H

#include <pthread.h>
#include <stddef.h>
#include <stdint.h>
#include <sys/types.h>
#include <time.h>

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

/* The data keys installed from the store (lk_keyring_install), unwrapped.
 * Kept apart from the file's key set so that re-reading the file leaves
 * them in place. */
typedef struct lk_dataset {
    size_t n;
    ptrdiff_t current;              /* index of the store's current key; -1: none */
    char (*ids)[LK_KEY_ID_MAX];
    char (*kek_ids)[LK_KEY_ID_MAX];
    uint8_t *secret;                /* n keys of 32 bytes, sodium_malloc'd, read-only */
    uint8_t digest[32];             /* of the listing it was made from (unchanged: no work) */
} lk_dataset;

struct lk_keyring {
    pthread_rwlock_t lock; /* readers: every key use; writer: the swaps of ks and ds */
    char *path;
    lk_keyset *ks;
    lk_dataset *ds;        /* NULL until data keys are installed */
    /* identity of the file last read, for lk_keyring_refresh */
    dev_t dev;
    ino_t ino;
    off_t size;
    struct timespec mtim;
};

void lk__dataset_free(lk_dataset *ds);

/* With the read lock held: the template key (file or data key) with this
 * id, or NULL; and the current sealing key: the store's current data key if
 * one is installed, else the file's current key. */
const uint8_t *lk__keyring_find_locked(const lk_keyring *kr, const char *id, size_t id_len);
void lk__keyring_current_locked(const lk_keyring *kr, const char **id, const uint8_t **key);

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
