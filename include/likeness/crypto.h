/* likeness crypto: the key file, template records sealed with
 * XChaCha20-Poly1305 (IETF AEAD, libsodium), API-key tokens stored as keyed
 * hashes, and the Ed25519 key that signs audit checkpoints.
 *
 * Formats: docs/key-file.md (the key file), docs/template-format.md (the
 * template record). Secret key material lives only in sodium_malloc'd memory
 * (guard pages, mlock'd, wiped on free) and never reaches logs.
 *
 * An lk_keyring is safe to use from many threads at once: lk_keyring_refresh
 * swaps in a re-read key set under an internal lock, and every other call
 * takes the same lock for reading. */
#ifndef LIKENESS_CRYPTO_H
#define LIKENESS_CRYPTO_H

#include <stdbool.h>
#include <stddef.h>
#include <stdint.h>

#include "likeness/error.h"

#ifdef __cplusplus
extern "C" {
#endif

#define LK_KEY_ID_MAX 32        /* bytes of a key id, with its NUL ("t" + 16 hex) */
#define LK_TEMPLATE_ID_HEX 32   /* characters of a template id: 128 random bits, lowercase hex */
#define LK_TEMPLATE_MAX_DIM 65536u

typedef struct lk_keyring lk_keyring;

/* Creates a new key file at path with O_EXCL and mode 0600: one template key
 * (current), the API-key hashing key and the audit signing seed, each 32
 * random bytes. LK_ERR_KEY if the file exists; LK_ERR_IO on write errors.
 * The file is fsync'd, then its directory. */
lk_code lk_keyring_create(const char *path, lk_error *err);

/* Reads a key file. Refused with LK_ERR_KEY (the message says to run
 * `chmod 600 PATH`) unless it is a regular file whose mode grants nothing to
 * group or others; LK_ERR_KEY for a malformed file (message names the line). */
lk_keyring *lk_keyring_load(const char *path, lk_error *err);
void lk_keyring_free(lk_keyring *kr);

/* Re-reads the file if its inode, size or mtime changed since the last read;
 * *changed (may be NULL) says whether it did. On error the old keys stay. */
lk_code lk_keyring_refresh(lk_keyring *kr, bool *changed, lk_error *err);

/* Adds a new random template key to the file at path and makes it current
 * (older keys stay, so records under them can still be opened until they are
 * re-encrypted). Rewrites the file atomically (temporary file, fsync, rename,
 * fsync directory) with mode 0600. new_id receives the new key id. */
lk_code lk_keyring_rotate_file(const char *path, char new_id[LK_KEY_ID_MAX], lk_error *err);

/* Copies the id of the current template key: the store's current data key
 * when one is installed (lk_keyring_install), else the file's current key. */
void lk_keyring_current_id(const lk_keyring *kr, char id[LK_KEY_ID_MAX]);
/* Copies the id of the key file's current template key (the key-encryption
 * key new data keys are wrapped under). */
void lk_keyring_file_current_id(const lk_keyring *kr, char id[LK_KEY_ID_MAX]);
/* Whether key_id is a template key of the file or an installed data key. */
bool lk_keyring_has_key(const lk_keyring *kr, const char *key_id);

/* ---- data keys (docs/key-file.md, "Data keys in the store") ----
 * Templates are sealed under data keys that every replica shares through
 * the store, kept there wrapped (XChaCha20-Poly1305) under a template key of
 * the key file, which then serves as key-encryption key (KEK). A wrapped
 * key is nonce (24) || encrypted key (32) || tag (16). */
#define LK_WRAPPED_KEY_BYTES 72u

typedef struct lk_wrapped_key {
    char key_id[LK_KEY_ID_MAX]; /* "d" + 16 hex */
    char kek_id[LK_KEY_ID_MAX]; /* the file's template key it is wrapped under */
    const uint8_t *wrapped;     /* LK_WRAPPED_KEY_BYTES */
    size_t len;
    int64_t created_ms;
    bool is_current;            /* the store's current sealing key (at most one) */
} lk_wrapped_key;

/* Makes a fresh random data key with a new id ("d" + 16 random hex, unlike
 * any id the ring holds) and wraps it under the file's current key, whose
 * id goes to kek_id. *wrapped is malloc'd (free()), *len is
 * LK_WRAPPED_KEY_BYTES. The key is not installed: add it to the store, then
 * install the store's list. */
lk_code lk_keyring_wrap_new_key(const lk_keyring *kr, char key_id[LK_KEY_ID_MAX],
                                char kek_id[LK_KEY_ID_MAX], uint8_t **wrapped, size_t *len,
                                lk_error *err);
/* Wraps the installed data key key_id afresh under the file's current key
 * (after a new file key was added, so that the old one can be retired).
 * LK_ERR_KEY if key_id is not an installed data key. */
lk_code lk_keyring_rewrap_key(const lk_keyring *kr, const char *key_id,
                              char kek_id[LK_KEY_ID_MAX], uint8_t **wrapped, size_t *len,
                              lk_error *err);
/* Unwraps keys[0..n) with the file's keys and installs them as the ring's
 * data keys, replacing those installed before; the one marked is_current (if
 * any) becomes the current sealing key, otherwise the file's current key is.
 * All or nothing: LK_ERR_KEY, naming the key id, for a key whose KEK the
 * file lacks, whose wrapping fails authentication, whose id is malformed or
 * repeated or a file key's; also when more than one is current. On error
 * the keys installed before stay. A list equal to the installed one costs
 * no decryption. lk_keyring_refresh keeps the installed keys. */
lk_code lk_keyring_install(lk_keyring *kr, const lk_wrapped_key *keys, size_t n, lk_error *err);

/* ---- template records (docs/template-format.md) ----
 * A template is a vector of doubles (the model's projected, normalised
 * feature vector) bound to one template id, one model id and one feature
 * configuration. The associated data of the AEAD covers the record header
 * (format version, key id, template id, model id, digest of the feature
 * configuration, dimension), so a record moved to another id, another key id
 * or another model fails to open. */
typedef struct lk_template_binding {
    char template_id[LK_TEMPLATE_ID_HEX + 1];
    char model_id[33];          /* lk_model_id(): 32 lowercase hex */
    const char *feature_config; /* canonical string, as in the model file */
} lk_template_binding;

/* Seals vec (dim values) under the current key with a fresh random 24-byte
 * nonce. *record is malloc'd (free with free()); *key_id_out (may be NULL)
 * receives the key id used. */
lk_code lk_template_seal(const lk_keyring *kr, const lk_template_binding *b,
                         const double *vec, size_t dim, uint8_t **record, size_t *len,
                         char key_id_out[LK_KEY_ID_MAX], lk_error *err);

/* Opens a record that must belong to b->template_id, b->model_id and
 * b->feature_config. vec receives up to max_dim values and *dim the count.
 * LK_ERR_TEMPLATE_INVALID: malformed, wrong template id, or authentication
 * failed (a flipped byte anywhere). LK_ERR_TEMPLATE_MISMATCH: made with
 * another model or feature configuration (message says to enrol again).
 * LK_ERR_KEY: its key id is not in the key ring. */
lk_code lk_template_open(const lk_keyring *kr, const lk_template_binding *b,
                         const uint8_t *record, size_t len, double *vec, size_t max_dim,
                         size_t *dim, lk_error *err);

/* The key id a record says it was sealed with (unauthenticated until
 * opened); LK_ERR_TEMPLATE_INVALID if the header is malformed. */
lk_code lk_template_record_key_id(const uint8_t *record, size_t len,
                                  char key_id[LK_KEY_ID_MAX], lk_error *err);

/* For key rotation without loading a model: opens a record of template_id
 * under whatever key id, model id and feature configuration digest its
 * header states (all authenticated by the AEAD) and seals the same values
 * under the current key with a fresh nonce, keeping that binding. *out is
 * malloc'd (free()); new_key_id (may be NULL) receives the key id used.
 * LK_ERR_TEMPLATE_INVALID: malformed, another template id, or
 * authentication failed; LK_ERR_KEY: its key id is not in the key ring. */
lk_code lk_template_reseal(const lk_keyring *kr, const char *template_id, const uint8_t *record,
                           size_t len, uint8_t **out, size_t *out_len,
                           char new_key_id[LK_KEY_ID_MAX], lk_error *err);

/* A fresh random template id (32 lowercase hex characters). */
void lk_template_new_id(char id[LK_TEMPLATE_ID_HEX + 1]);
/* true if s is exactly 32 lowercase hex characters. */
bool lk_template_id_valid(const char *s);

/* ---- API keys ----
 * A token is "lkk_" + 16 hex (the key id, not secret) + "_" + 43 base64url
 * characters (32 random bytes). Only the keyed BLAKE2b-256 hash of the whole
 * token (key: the key file's API-key hashing key) is stored. */
#define LK_APIKEY_TOKEN_MAX 96
#define LK_APIKEY_ID_HEX 16

lk_code lk_apikey_generate(const lk_keyring *kr, char token[LK_APIKEY_TOKEN_MAX],
                           char id[LK_APIKEY_ID_HEX + 1], uint8_t hash[32], lk_error *err);
/* Extracts the key id of a well-formed token; LK_ERR_INVALID_ARGUMENT otherwise. */
lk_code lk_apikey_parse(const char *token, char id[LK_APIKEY_ID_HEX + 1], lk_error *err);
lk_code lk_apikey_hash(const lk_keyring *kr, const char *token, uint8_t hash[32],
                       lk_error *err);
/* Constant-time comparison of two 32-byte hashes (sodium_memcmp). */
bool lk_apikey_hash_equal(const uint8_t a[32], const uint8_t b[32]);

/* ---- audit signing (Ed25519, RFC 8032) ---- */
void lk_keyring_audit_public_key(const lk_keyring *kr, uint8_t pk[32]);
lk_code lk_keyring_audit_sign(const lk_keyring *kr, const uint8_t *msg, size_t len,
                              uint8_t sig[64], lk_error *err);
bool lk_audit_signature_valid(const uint8_t pk[32], const uint8_t *msg, size_t len,
                              const uint8_t sig[64]);

/* Lowercase hex of n bytes into out (2n+1 bytes). */
void lk_hex_encode(const uint8_t *bytes, size_t n, char *out);

#ifdef __cplusplus
}
#endif
#endif
