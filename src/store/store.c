/* lk_store: URL dispatch to a backend (sqlite:PATH or a path: SQLite;
 * postgres:// or postgresql://: PostgreSQL), one lock per handle, and the pieces
 * that do not depend on the database (scopes, checkpoint signing, chain
 * verification). */
#include "backend.h"

#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

struct lk_store {
    const lk_store_backend *be;
    void *h;
    /* Recursive so that a list callback may call back into the same store
     * from the thread that holds the lock. */
    pthread_mutex_t mu;
};

int64_t lk_store_now_ms(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_REALTIME, &ts);
    return (int64_t)ts.tv_sec * 1000 + ts.tv_nsec / 1000000;
}

static bool has_prefix(const char *s, const char *p)
{
    return strncmp(s, p, strlen(p)) == 0;
}

lk_store *lk_store_open(const char *url, lk_error *err)
{
    if (!url || !*url) {
        lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                     "no store given: set [store] url in the configuration or pass --store "
                     "sqlite:PATH (or postgres://USER@HOST:PORT/DATABASE)");
        return NULL;
    }
    const lk_store_backend *be = &lk_store_sqlite_backend;
    const char *path = url;
    if (has_prefix(url, "postgres://") || has_prefix(url, "postgresql://"))
        be = &lk_store_postgres_backend; /* a libpq connection URI, passed whole */
    else if (has_prefix(url, "sqlite://"))
        path = url + strlen("sqlite://"); /* sqlite:///abs/path -> /abs/path */
    else if (has_prefix(url, "sqlite:"))
        path = url + strlen("sqlite:");
    else if (strstr(url, "://")) {
        lk_error_set(err, LK_ERR_STORE,
                     "unsupported store URL '%s': use sqlite:PATH, a plain file path or "
                     "postgres://USER@HOST:PORT/DATABASE",
                     url);
        return NULL;
    }
    if (!*path) {
        lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "store URL '%s' names no file", url);
        return NULL;
    }

    lk_store *s = calloc(1, sizeof *s);
    if (!s) {
        lk_error_set(err, LK_ERR_NOMEM, "out of memory opening the store");
        return NULL;
    }
    pthread_mutexattr_t a;
    pthread_mutexattr_init(&a);
    pthread_mutexattr_settype(&a, PTHREAD_MUTEX_RECURSIVE);
    int rc = pthread_mutex_init(&s->mu, &a);
    pthread_mutexattr_destroy(&a);
    if (rc != 0) {
        free(s);
        lk_error_set(err, LK_ERR_NOMEM, "cannot create the store's lock");
        return NULL;
    }
    s->be = be;
    s->h = be == &lk_store_postgres_backend ? lk_store_postgres_open(url, err)
                                            : lk_store_sqlite_open(path, err);
    if (!s->h) {
        pthread_mutex_destroy(&s->mu);
        free(s);
        return NULL;
    }
    return s;
}

void lk_store_close(lk_store *s)
{
    if (!s)
        return;
    s->be->close(s->h);
    pthread_mutex_destroy(&s->mu);
    free(s);
}

/* A backend that guards its own connections (PostgreSQL's pool) runs
 * requests of several threads at once; the others are serialised here. */
#define LOCKED(s, expr)                                                                   \
    do {                                                                                  \
        const bool lk_serial_ = !(s)->be->concurrent;                                     \
        if (lk_serial_)                                                                   \
            pthread_mutex_lock(&(s)->mu);                                                 \
        expr;                                                                             \
        if (lk_serial_)                                                                   \
            pthread_mutex_unlock(&(s)->mu);                                               \
    } while (0)

static lk_code no_store(lk_error *err)
{
    return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no store (NULL handle)");
}

int lk_store_schema_version(lk_store *s)
{
    int v = 0;
    if (s)
        LOCKED(s, v = s->be->schema_version(s->h));
    return v;
}

lk_code lk_store_ping(lk_store *s, lk_error *err)
{
    if (!s)
        return no_store(err);
    lk_code rc;
    LOCKED(s, rc = s->be->ping(s->h, err));
    return rc;
}

lk_code lk_store_integrity_check(lk_store *s, lk_error *err)
{
    if (!s)
        return no_store(err);
    lk_code rc;
    LOCKED(s, rc = s->be->integrity_check(s->h, err));
    return rc;
}

/* ---- templates ---- */

lk_code lk_store_template_put(lk_store *s, const lk_template_meta *meta, const uint8_t *record,
                              size_t len, lk_error *err)
{
    if (!s)
        return no_store(err);
    if (!meta || !record || len == 0 || !meta->template_id[0])
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "a template needs an id and a non-empty record");
    lk_code rc;
    LOCKED(s, rc = s->be->template_put(s->h, meta, record, len, err));
    return rc;
}

lk_code lk_store_template_get(lk_store *s, const char *template_id, int64_t now_ms,
                              lk_template_meta *meta, uint8_t **record, size_t *len,
                              lk_error *err)
{
    if (!s)
        return no_store(err);
    if (!template_id || !meta || (record && !len))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "template_get: missing argument");
    lk_code rc;
    LOCKED(s, rc = s->be->template_get(s->h, template_id, now_ms, meta, record, len, err));
    return rc;
}

lk_code lk_store_template_delete(lk_store *s, const char *template_id, lk_error *err)
{
    if (!s)
        return no_store(err);
    if (!template_id)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "template_delete: no id");
    lk_code rc;
    LOCKED(s, rc = s->be->template_delete(s->h, template_id, err));
    return rc;
}

lk_code lk_store_template_purge_expired(lk_store *s, int64_t now_ms, uint64_t *count,
                                        lk_error *err)
{
    if (!s)
        return no_store(err);
    uint64_t c = 0;
    lk_code rc;
    LOCKED(s, rc = s->be->template_purge_expired(s->h, now_ms, &c, err));
    if (count)
        *count = c;
    return rc;
}

uint64_t lk_store_template_count(lk_store *s)
{
    uint64_t n = 0;
    if (s)
        LOCKED(s, n = s->be->template_count(s->h));
    return n;
}

lk_code lk_store_template_ids_not_under_key(lk_store *s, const char *key_id, const char *after,
                                            char (*ids)[LK_TEMPLATE_ID_HEX + 1], size_t max,
                                            size_t *n, lk_error *err)
{
    if (!s)
        return no_store(err);
    if (!key_id || !n || (max && !ids))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "template_ids_not_under_key: missing argument");
    *n = 0;
    if (max == 0)
        return LK_OK;
    lk_code rc;
    LOCKED(s, rc = s->be->template_ids_not_under_key(s->h, key_id, after ? after : "", ids, max,
                                                     n, err));
    return rc;
}

lk_code lk_store_template_rekey(lk_store *s, const char *template_id, const char *old_key_id,
                                const char *new_key_id, const uint8_t *record, size_t len,
                                bool *replaced, lk_error *err)
{
    if (!s)
        return no_store(err);
    bool dummy;
    if (!replaced)
        replaced = &dummy;
    *replaced = false;
    if (!template_id || !old_key_id || !new_key_id || !record || len == 0)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "template_rekey: missing argument");
    lk_code rc;
    LOCKED(s, rc = s->be->template_rekey(s->h, template_id, old_key_id, new_key_id, record, len,
                                         replaced, err));
    return rc;
}

/* ---- template data keys ---- */

static bool key_id_ok(const char *id)
{
    size_t n = id ? strnlen(id, LK_KEY_ID_MAX) : 0;
    if (n == 0 || n >= LK_KEY_ID_MAX)
        return false;
    for (size_t i = 0; i < n; i++)
        if (!((id[i] >= 'a' && id[i] <= 'z') || (id[i] >= '0' && id[i] <= '9') || id[i] == '_' ||
              id[i] == '-'))
            return false;
    return true;
}

lk_code lk_store_template_keys_add(lk_store *s, const char *key_id, const char *kek_id,
                                   const uint8_t *wrapped, size_t len, bool make_current,
                                   lk_error *err)
{
    if (!s)
        return no_store(err);
    if (!key_id_ok(key_id) || !key_id_ok(kek_id) || !wrapped || len == 0 || len > 4096)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "template_keys_add: a data key needs well-formed key and KEK ids "
                            "and its wrapped bytes");
    lk_code rc;
    LOCKED(s, rc = s->be->template_keys_add(s->h, key_id, kek_id, wrapped, len, make_current,
                                            err));
    return rc;
}

lk_code lk_store_template_keys_list(lk_store *s, bool (*fn)(const lk_wrapped_key *k, void *ctx),
                                    void *ctx, lk_error *err)
{
    if (!s)
        return no_store(err);
    if (!fn)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "template_keys_list: no callback");
    lk_code rc;
    LOCKED(s, rc = s->be->template_keys_list(s->h, fn, ctx, err));
    return rc;
}

lk_code lk_store_template_keys_rewrap(lk_store *s, const char *key_id, const char *old_kek_id,
                                      const char *new_kek_id, const uint8_t *wrapped,
                                      size_t len, bool *replaced, lk_error *err)
{
    if (!s)
        return no_store(err);
    bool dummy;
    if (!replaced)
        replaced = &dummy;
    *replaced = false;
    if (!key_id || !old_kek_id || !key_id_ok(new_kek_id) || !wrapped || len == 0 || len > 4096)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "template_keys_rewrap: missing argument");
    lk_code rc;
    LOCKED(s, rc = s->be->template_keys_rewrap(s->h, key_id, old_kek_id, new_kek_id, wrapped,
                                               len, replaced, err));
    return rc;
}

/* The listed keys, copied out of the backend's rows. */
typedef struct key_list {
    lk_wrapped_key *k;
    uint8_t *blobs; /* LK_WRAPPED_KEY_BYTES per key; other lengths are kept as 0 bytes */
    size_t n, cap;
    bool nomem;
} key_list;

static bool collect_key(const lk_wrapped_key *k, void *ctx)
{
    key_list *l = ctx;
    if (l->n == l->cap) {
        size_t cap = l->cap ? 2 * l->cap : 8;
        lk_wrapped_key *nk = realloc(l->k, cap * sizeof *nk);
        if (nk)
            l->k = nk;
        uint8_t *nb = nk ? realloc(l->blobs, cap * LK_WRAPPED_KEY_BYTES) : NULL;
        if (!nk || !nb) {
            l->nomem = true;
            return false;
        }
        l->blobs = nb;
        l->cap = cap;
    }
    lk_wrapped_key *d = &l->k[l->n++];
    *d = *k;
    /* A blob of another length is handed on with its length and no bytes
     * worth reading: lk_keyring_install refuses it by its length. */
    if (k->len == LK_WRAPPED_KEY_BYTES)
        memcpy(l->blobs + (l->n - 1) * LK_WRAPPED_KEY_BYTES, k->wrapped, LK_WRAPPED_KEY_BYTES);
    return true;
}

lk_code lk_store_sync_keys(lk_store *s, lk_keyring *kr, lk_error *err)
{
    if (!s)
        return no_store(err);
    if (!kr)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "sync_keys: no key ring");
    key_list l = {0};
    lk_code rc = lk_store_template_keys_list(s, collect_key, &l, err);
    if (rc == LK_OK && l.nomem)
        rc = lk_error_set(err, LK_ERR_NOMEM, "out of memory reading the store's data keys");
    if (rc == LK_OK) {
        /* The pointers are set only now: the blob array may have moved. */
        for (size_t i = 0; i < l.n; i++)
            l.k[i].wrapped = l.blobs + i * LK_WRAPPED_KEY_BYTES;
        rc = lk_keyring_install(kr, l.k, l.n, err);
    }
    free(l.k);
    free(l.blobs);
    return rc;
}

/* ---- API keys ---- */

static const struct {
    const char *name;
    unsigned bit;
} scope_names[] = {
    {"verify", LK_SCOPE_VERIFY},
    {"enrol", LK_SCOPE_ENROL},
    {"delete", LK_SCOPE_DELETE},
    {"audit", LK_SCOPE_AUDIT},
};
#define N_SCOPES (sizeof scope_names / sizeof scope_names[0])

lk_code lk_scopes_parse(const char *list, unsigned *scopes, lk_error *err)
{
    if (!scopes)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "scopes_parse: no output");
    unsigned bits = 0;
    const char *p = list ? list : "";
    while (*p) {
        while (*p == ' ' || *p == '\t')
            p++;
        const char *e = p;
        while (*e && *e != ',')
            e++;
        const char *t = e; /* trim trailing blanks */
        while (t > p && (t[-1] == ' ' || t[-1] == '\t'))
            t--;
        size_t n = (size_t)(t - p);
        if (n > 0) {
            size_t i;
            for (i = 0; i < N_SCOPES; i++)
                if (strlen(scope_names[i].name) == n && !strncmp(p, scope_names[i].name, n))
                    break;
            if (i == N_SCOPES)
                return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                    "unknown scope '%.*s' (known: verify, enrol, delete, audit)",
                                    (int)(n > 64 ? 64 : n), p);
            bits |= scope_names[i].bit;
        }
        p = *e ? e + 1 : e;
    }
    *scopes = bits;
    return LK_OK;
}

void lk_scopes_format(unsigned scopes, char *out, size_t cap)
{
    if (!out || cap == 0)
        return;
    out[0] = '\0';
    size_t len = 0;
    for (size_t i = 0; i < N_SCOPES; i++) {
        if (!(scopes & scope_names[i].bit))
            continue;
        int w = snprintf(out + len, cap - len, "%s%s", len ? "," : "", scope_names[i].name);
        if (w < 0 || (size_t)w >= cap - len) {
            out[len] = '\0'; /* never a cut-off name */
            return;
        }
        len += (size_t)w;
    }
}

lk_code lk_store_apikey_put(lk_store *s, const lk_apikey_meta *k, lk_error *err)
{
    if (!s)
        return no_store(err);
    if (!k || !k->id[0])
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "an API key needs an id");
    lk_code rc;
    LOCKED(s, rc = s->be->apikey_put(s->h, k, err));
    return rc;
}

lk_code lk_store_apikey_get(lk_store *s, const char *id, lk_apikey_meta *k, lk_error *err)
{
    if (!s)
        return no_store(err);
    if (!id || !k)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "apikey_get: missing argument");
    lk_code rc;
    LOCKED(s, rc = s->be->apikey_get(s->h, id, k, err));
    return rc;
}

lk_code lk_store_apikey_revoke(lk_store *s, const char *id, int64_t now_ms, lk_error *err)
{
    if (!s)
        return no_store(err);
    if (!id)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "apikey_revoke: no id");
    lk_code rc;
    LOCKED(s, rc = s->be->apikey_revoke(s->h, id, now_ms, err));
    return rc;
}

lk_code lk_store_apikey_list(lk_store *s, bool (*fn)(const lk_apikey_meta *k, void *ctx),
                             void *ctx, lk_error *err)
{
    if (!s)
        return no_store(err);
    if (!fn)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "apikey_list: no callback");
    lk_code rc;
    LOCKED(s, rc = s->be->apikey_list(s->h, fn, ctx, err));
    return rc;
}

/* ---- audit ---- */

lk_code lk_store_sign_checkpoint(const lk_keyring *kr, uint64_t seq, const uint8_t hash[32],
                                 lk_audit_checkpoint *c, lk_error *err)
{
    memset(c, 0, sizeof *c);
    c->seq = seq;
    memcpy(c->hash, hash, 32);
    c->time_ms = lk_store_now_ms();
    lk_keyring_audit_public_key(kr, c->public_key);
    uint8_t msg[68];
    lk_audit_checkpoint_message(seq, hash, msg);
    return lk_keyring_audit_sign(kr, msg, sizeof msg, c->signature, err);
}

lk_code lk_store_audit_append_change(lk_store *s, lk_audit_record *r,
                                     const lk_store_change *change, const lk_keyring *kr,
                                     unsigned checkpoint_interval, lk_error *err)
{
    if (!s)
        return no_store(err);
    if (!r)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "audit_append: no record");
    if (change && change->kind == LK_CHANGE_PUT && (!change->meta || !change->record))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "audit_append: PUT without a template");
    if (change && change->kind == LK_CHANGE_DELETE && !change->template_id)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "audit_append: DELETE without an id");
    if (change && change->kind == LK_CHANGE_NONE)
        change = NULL;
    lk_code rc;
    LOCKED(s, rc = s->be->audit_append(s->h, r, change, kr, checkpoint_interval, err));
    return rc;
}

lk_code lk_store_audit_append(lk_store *s, lk_audit_record *r, const lk_keyring *kr,
                              unsigned checkpoint_interval, lk_error *err)
{
    return lk_store_audit_append_change(s, r, NULL, kr, checkpoint_interval, err);
}

lk_code lk_store_audit_checkpoint(lk_store *s, const lk_keyring *kr, lk_error *err)
{
    if (!s)
        return no_store(err);
    if (!kr)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "audit_checkpoint: a key ring is needed to sign");
    lk_code rc;
    LOCKED(s, rc = s->be->audit_checkpoint(s->h, kr, err));
    return rc;
}

lk_code lk_store_audit_list(lk_store *s, uint64_t after, uint64_t limit,
                            bool (*fn)(const lk_audit_record *r, void *ctx), void *ctx,
                            lk_error *err)
{
    if (!s)
        return no_store(err);
    if (!fn)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "audit_list: no callback");
    lk_code rc;
    LOCKED(s, rc = s->be->audit_list(s->h, after, limit, fn, ctx, err));
    return rc;
}

lk_code lk_store_audit_checkpoints(lk_store *s,
                                   bool (*fn)(const lk_audit_checkpoint *c, void *ctx),
                                   void *ctx, lk_error *err)
{
    if (!s)
        return no_store(err);
    if (!fn)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "audit_checkpoints: no callback");
    lk_code rc;
    LOCKED(s, rc = s->be->audit_checkpoints(s->h, fn, ctx, err));
    return rc;
}

uint64_t lk_store_audit_head(lk_store *s)
{
    uint64_t n = 0;
    if (s)
        LOCKED(s, n = s->be->audit_head(s->h));
    return n;
}

static bool feed_record(const lk_audit_record *r, void *ctx)
{
    return lk_audit_verifier_add_record(ctx, r);
}

static bool feed_checkpoint(const lk_audit_checkpoint *c, void *ctx)
{
    return lk_audit_verifier_add_checkpoint(ctx, c);
}

lk_code lk_store_audit_verify(lk_store *s, const uint8_t public_key[32], lk_audit_report *report,
                              lk_error *err)
{
    if (!s)
        return no_store(err);
    if (!public_key || !report)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "audit_verify: missing argument");
    lk_audit_verifier *v = lk_audit_verifier_new(public_key);
    if (!v)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory verifying the audit chain");
    lk_code rc;
    LOCKED(s, rc = s->be->audit_scan(s->h, feed_record, feed_checkpoint, v, err));
    if (rc == LK_OK)
        lk_audit_verifier_finish(v, report);
    lk_audit_verifier_free(v);
    return rc;
}
