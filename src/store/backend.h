/* The interface every store backend implements. store.c owns the lk_store
 * (URL dispatch, the per-handle lock) and calls one of these; a backend sees
 * only its own handle and, unless it is `concurrent`, never locks. Adding a
 * database means one more lk_store_backend and one more URL scheme in
 * store.c. */
#ifndef LIKENESS_STORE_BACKEND_H
#define LIKENESS_STORE_BACKEND_H

#include "likeness/store.h"

typedef bool (*lk_store_record_fn)(const lk_audit_record *r, void *ctx);
typedef bool (*lk_store_checkpoint_fn)(const lk_audit_checkpoint *c, void *ctx);

typedef struct lk_store_backend {
    const char *name;
    /* true: the backend is safe to call from several threads at once (it
     * guards its own connections) and store.c takes no handle lock. */
    bool concurrent;
    void (*close)(void *h);
    int (*schema_version)(void *h);
    lk_code (*ping)(void *h, lk_error *err);
    lk_code (*integrity_check)(void *h, lk_error *err);

    lk_code (*template_put)(void *h, const lk_template_meta *meta, const uint8_t *record,
                            size_t len, lk_error *err);
    lk_code (*template_get)(void *h, const char *template_id, int64_t now_ms,
                            lk_template_meta *meta, uint8_t **record, size_t *len, lk_error *err);
    lk_code (*template_delete)(void *h, const char *template_id, lk_error *err);
    lk_code (*template_purge_expired)(void *h, int64_t now_ms, uint64_t *count, lk_error *err);
    uint64_t (*template_count)(void *h);
    lk_code (*template_ids_not_under_key)(void *h, const char *key_id, const char *after,
                                          char (*ids)[LK_TEMPLATE_ID_HEX + 1], size_t max,
                                          size_t *n, lk_error *err);
    lk_code (*template_rekey)(void *h, const char *template_id, const char *old_key_id,
                              const char *new_key_id, const uint8_t *record, size_t len,
                              bool *replaced, lk_error *err);

    lk_code (*template_keys_add)(void *h, const char *key_id, const char *kek_id,
                                 const uint8_t *wrapped, size_t len, bool make_current,
                                 lk_error *err);
    lk_code (*template_keys_list)(void *h, bool (*fn)(const lk_wrapped_key *k, void *ctx),
                                  void *ctx, lk_error *err);
    lk_code (*template_keys_rewrap)(void *h, const char *key_id, const char *old_kek_id,
                                    const char *new_kek_id, const uint8_t *wrapped, size_t len,
                                    bool *replaced, lk_error *err);

    lk_code (*apikey_put)(void *h, const lk_apikey_meta *k, lk_error *err);
    lk_code (*apikey_get)(void *h, const char *id, lk_apikey_meta *k, lk_error *err);
    lk_code (*apikey_revoke)(void *h, const char *id, int64_t now_ms, lk_error *err);
    lk_code (*apikey_list)(void *h, bool (*fn)(const lk_apikey_meta *k, void *ctx), void *ctx,
                           lk_error *err);

    /* change may be NULL; otherwise applied in the append's transaction. */
    lk_code (*audit_append)(void *h, lk_audit_record *r, const lk_store_change *change,
                            const lk_keyring *kr, unsigned checkpoint_interval, lk_error *err);
    lk_code (*audit_checkpoint)(void *h, const lk_keyring *kr, lk_error *err);
    lk_code (*audit_list)(void *h, uint64_t after, uint64_t limit, lk_store_record_fn fn,
                          void *ctx, lk_error *err);
    lk_code (*audit_checkpoints)(void *h, lk_store_checkpoint_fn fn, void *ctx, lk_error *err);
    uint64_t (*audit_head)(void *h);
    /* All records, then all checkpoints, from one consistent snapshot (a
     * concurrent append must not make a checkpoint name an unread record). */
    lk_code (*audit_scan)(void *h, lk_store_record_fn rfn, lk_store_checkpoint_fn cfn,
                          void *ctx, lk_error *err);
} lk_store_backend;

/* SQLite: path is a file name (already stripped of "sqlite:"). */
extern const lk_store_backend lk_store_sqlite_backend;
void *lk_store_sqlite_open(const char *path, lk_error *err);

/* PostgreSQL: url is a libpq connection URI (postgres:// or postgresql://). */
extern const lk_store_backend lk_store_postgres_backend;
void *lk_store_postgres_open(const char *url, lk_error *err);

/* Shared by backends: signs the checkpoint of (seq, hash) into *c. */
lk_code lk_store_sign_checkpoint(const lk_keyring *kr, uint64_t seq, const uint8_t hash[32],
                                 lk_audit_checkpoint *c, lk_error *err);
int64_t lk_store_now_ms(void);

#endif
