/* The SQLite backend (docs/store-schema.md). Every statement is a constant
 * string with bound parameters. Durability: WAL journal with
 * synchronous=FULL, so a transaction that committed is on disk
 * (https://www.sqlite.org/pragma.html#pragma_synchronous). */
#include "backend.h"

#include <errno.h>
#include <fcntl.h>
#include <inttypes.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include <sodium.h>
#include <sqlite3.h>

/* "LKNS" in the database header (PRAGMA application_id), so that a file of
 * another program is refused instead of migrated. */
#define APPLICATION_ID 0x4c4b4e53
/* How long a writer waits for another process's write lock: longer than any
 * one transaction here takes (a key rotation's batch), short enough that a
 * stuck writer surfaces as an error within a request's patience. */
#define BUSY_TIMEOUT_MS 10000
/* Appends retry a transaction that SQLite answered with SQLITE_BUSY despite
 * the busy timeout (e.g. a WAL snapshot that went stale); exponential
 * backoff with jitter, common practice for lock contention. */
#define BUSY_RETRIES 12

typedef struct sq {
    sqlite3 *db;
    int version;
    char path[1024];
} sq;

/* Migrations: migrations[v] takes a database from version v to v + 1.
 * Each runs in the same transaction as the version bump; never edit a
 * released step, append a new one. */
static const char *const migrations[] = {
    /* 0 -> 1 */
    "CREATE TABLE templates("
    "  template_id TEXT PRIMARY KEY NOT NULL,"
    "  subject_ref TEXT NOT NULL DEFAULT '',"
    "  key_id TEXT NOT NULL,"
    "  model_id TEXT NOT NULL,"
    "  created_ms INTEGER NOT NULL,"
    "  expires_ms INTEGER NOT NULL DEFAULT 0,"
    "  image_count INTEGER NOT NULL,"
    "  record BLOB NOT NULL);"
    "CREATE INDEX templates_expiry ON templates(expires_ms) WHERE expires_ms > 0;"
    "CREATE TABLE api_keys("
    "  id TEXT PRIMARY KEY NOT NULL,"
    "  name TEXT NOT NULL,"
    "  scopes TEXT NOT NULL,"
    "  hash BLOB NOT NULL CHECK (length(hash) = 32),"
    "  created_ms INTEGER NOT NULL,"
    "  revoked_ms INTEGER NOT NULL DEFAULT 0);"
    "CREATE TABLE audit_records("
    "  seq INTEGER PRIMARY KEY CHECK (seq > 0),"
    "  time_ms INTEGER NOT NULL,"
    "  operation INTEGER NOT NULL,"
    "  caller TEXT NOT NULL,"
    "  request_id TEXT NOT NULL,"
    "  template_id TEXT NOT NULL,"
    "  decision TEXT NOT NULL,"
    "  score REAL,"
    "  threshold REAL,"
    "  model_id TEXT NOT NULL,"
    "  reasons TEXT NOT NULL,"
    "  status INTEGER NOT NULL,"
    "  prev_hash BLOB NOT NULL CHECK (length(prev_hash) = 32),"
    "  hash BLOB NOT NULL CHECK (length(hash) = 32));"
    "CREATE TABLE audit_checkpoints("
    "  seq INTEGER PRIMARY KEY REFERENCES audit_records(seq),"
    "  hash BLOB NOT NULL CHECK (length(hash) = 32),"
    "  public_key BLOB NOT NULL CHECK (length(public_key) = 32),"
    "  signature BLOB NOT NULL CHECK (length(signature) = 64),"
    "  time_ms INTEGER NOT NULL);"
    "PRAGMA application_id = 1280003667;" /* APPLICATION_ID in decimal */
    "PRAGMA user_version = 1;",
    /* 1 -> 2: data keys, wrapped under a key of the key file. The partial
     * unique index lets at most one row be current. */
    "CREATE TABLE template_keys("
    "  key_id TEXT PRIMARY KEY NOT NULL,"
    "  kek_id TEXT NOT NULL,"
    "  wrapped BLOB NOT NULL CHECK (length(wrapped) > 0),"
    "  created_ms INTEGER NOT NULL,"
    "  is_current INTEGER NOT NULL DEFAULT 0 CHECK (is_current IN (0, 1)));"
    "CREATE UNIQUE INDEX template_keys_one_current ON template_keys(is_current)"
    "  WHERE is_current = 1;"
    "PRAGMA user_version = 2;",
};
_Static_assert(sizeof migrations / sizeof migrations[0] == LK_STORE_SCHEMA_VERSION,
               "one migration per schema version");
_Static_assert(APPLICATION_ID == 1280003667, "application_id literal in migration 1");

static lk_code db_error(const sq *s, lk_error *err, const char *what)
{
    int rc = sqlite3_errcode(s->db);
    lk_code code = (rc == SQLITE_BUSY || rc == SQLITE_LOCKED) ? LK_ERR_BUSY : LK_ERR_STORE;
    return lk_error_set(err, code, "store %s: %s: %s", s->path, what, sqlite3_errmsg(s->db));
}

static lk_code prepare(sq *s, const char *sql, sqlite3_stmt **st, lk_error *err)
{
    if (sqlite3_prepare_v2(s->db, sql, -1, st, NULL) != SQLITE_OK) {
        *st = NULL;
        return db_error(s, err, "cannot prepare a statement");
    }
    return LK_OK;
}

static lk_code exec(sq *s, const char *sql, lk_error *err, const char *what)
{
    if (sqlite3_exec(s->db, sql, NULL, NULL, NULL) != SQLITE_OK)
        return db_error(s, err, what);
    return LK_OK;
}

static void rollback(sq *s)
{
    if (!sqlite3_get_autocommit(s->db))
        sqlite3_exec(s->db, "ROLLBACK", NULL, NULL, NULL);
}

static void col_text(sqlite3_stmt *st, int i, char *out, size_t cap)
{
    const unsigned char *t = sqlite3_column_text(st, i);
    size_t n = t ? (size_t)sqlite3_column_bytes(st, i) : 0;
    if (n >= cap)
        n = cap - 1;
    if (n)
        memcpy(out, t, n);
    out[n] = '\0';
}

static void col_blob32(sqlite3_stmt *st, int i, uint8_t *out, size_t want)
{
    const void *b = sqlite3_column_blob(st, i);
    size_t n = b ? (size_t)sqlite3_column_bytes(st, i) : 0;
    memset(out, 0, want);
    memcpy(out, b, n < want ? n : want);
}

static int read_pragma_int(sq *s, const char *sql, int *v)
{
    sqlite3_stmt *st;
    int rc = sqlite3_prepare_v2(s->db, sql, -1, &st, NULL);
    if (rc != SQLITE_OK)
        return rc;
    rc = sqlite3_step(st);
    if (rc == SQLITE_ROW) {
        *v = sqlite3_column_int(st, 0);
        rc = SQLITE_OK;
    }
    sqlite3_finalize(st);
    return rc;
}

static void sq_close(void *h)
{
    sq *s = h;
    if (!s)
        return;
    sqlite3_close_v2(s->db);
    free(s);
}

static lk_code migrate(sq *s, lk_error *err)
{
    int v = 0, app = 0;
    if (read_pragma_int(s, "PRAGMA application_id", &app) != SQLITE_OK)
        return db_error(s, err, "cannot read the application id");
    if (app != 0 && app != APPLICATION_ID)
        return lk_error_set(err, LK_ERR_STORE,
                            "store %s: this SQLite file belongs to another program "
                            "(application_id %d); give the likeness store its own file",
                            s->path, app);
    lk_code rc = exec(s, "BEGIN IMMEDIATE", err, "cannot start the schema transaction");
    if (rc != LK_OK)
        return rc;
    if (read_pragma_int(s, "PRAGMA user_version", &v) != SQLITE_OK) {
        rc = db_error(s, err, "cannot read the schema version");
        rollback(s);
        return rc;
    }
    if (v > LK_STORE_SCHEMA_VERSION) {
        rollback(s);
        return lk_error_set(err, LK_ERR_STORE,
                            "store %s has schema version %d, newer than this program's %d: "
                            "upgrade likeness before opening it",
                            s->path, v, LK_STORE_SCHEMA_VERSION);
    }
    if (v < 0) {
        rollback(s);
        return lk_error_set(err, LK_ERR_STORE, "store %s: invalid schema version %d", s->path,
                            v);
    }
    for (; v < LK_STORE_SCHEMA_VERSION; v++) {
        if (sqlite3_exec(s->db, migrations[v], NULL, NULL, NULL) != SQLITE_OK) {
            char what[64];
            snprintf(what, sizeof what, "migration to schema version %d failed", v + 1);
            rc = db_error(s, err, what);
            rollback(s);
            return rc;
        }
    }
    rc = exec(s, "COMMIT", err, "cannot commit the schema");
    if (rc != LK_OK) {
        rollback(s);
        return rc;
    }
    s->version = v;
    return LK_OK;
}

void *lk_store_sqlite_open(const char *path, lk_error *err)
{
    sq *s = calloc(1, sizeof *s);
    if (!s) {
        lk_error_set(err, LK_ERR_NOMEM, "out of memory opening the store");
        return NULL;
    }
    snprintf(s->path, sizeof s->path, "%s", path);
    /* The file holds sealed templates and key hashes: create it readable by
     * its owner only; SQLite gives the -wal and -shm files the same mode. */
    if (strcmp(path, ":memory:") != 0) {
        int fd = open(path, O_WRONLY | O_CREAT | O_EXCL | O_CLOEXEC, 0600);
        if (fd >= 0)
            close(fd);
        else if (errno != EEXIST) {
            lk_error_set(err, LK_ERR_STORE, "store %s: cannot create the database file: %s",
                         path, strerror(errno));
            free(s);
            return NULL;
        }
    }
    int rc = sqlite3_open_v2(path, &s->db,
                             SQLITE_OPEN_READWRITE | SQLITE_OPEN_CREATE | SQLITE_OPEN_FULLMUTEX,
                             NULL);
    if (rc != SQLITE_OK) {
        lk_error_set(err, LK_ERR_STORE, "store %s: cannot open: %s", path,
                     s->db ? sqlite3_errmsg(s->db) : sqlite3_errstr(rc));
        sq_close(s);
        return NULL;
    }
    sqlite3_busy_timeout(s->db, BUSY_TIMEOUT_MS);
    lk_code c = exec(s,
                     "PRAGMA foreign_keys = ON;"
                     "PRAGMA secure_delete = ON;",
                     err, "cannot set the connection's options");
    if (c == LK_OK) {
        /* journal_mode answers with the mode now in force. */
        sqlite3_stmt *st;
        c = prepare(s, "PRAGMA journal_mode = WAL", &st, err);
        if (c == LK_OK) {
            int r = sqlite3_step(st);
            char mode[16] = "";
            if (r == SQLITE_ROW)
                col_text(st, 0, mode, sizeof mode);
            sqlite3_finalize(st);
            if (r != SQLITE_ROW)
                c = db_error(s, err, "cannot switch to the WAL journal");
            else if (strcmp(mode, "wal") != 0 && strcmp(path, ":memory:") != 0)
                c = lk_error_set(err, LK_ERR_STORE,
                                 "store %s: the file system does not support SQLite's WAL "
                                 "journal (journal mode is '%s'); put the store on a local "
                                 "disk",
                                 path, mode);
        }
    }
    if (c == LK_OK)
        c = exec(s, "PRAGMA synchronous = FULL;", err, "cannot set synchronous=FULL");
    if (c == LK_OK)
        c = migrate(s, err);
    if (c != LK_OK) {
        sq_close(s);
        return NULL;
    }
    return s;
}

static int sq_schema_version(void *h)
{
    return ((sq *)h)->version;
}

static lk_code sq_ping(void *h, lk_error *err)
{
    sq *s = h;
    int v;
    if (read_pragma_int(s, "SELECT 1", &v) != SQLITE_OK)
        return db_error(s, err, "ping failed");
    return LK_OK;
}

static lk_code sq_integrity_check(void *h, lk_error *err)
{
    sq *s = h;
    sqlite3_stmt *st;
    lk_code rc = prepare(s, "PRAGMA integrity_check", &st, err);
    if (rc != LK_OK)
        return rc;
    int r = sqlite3_step(st);
    char first[400] = "";
    if (r == SQLITE_ROW)
        col_text(st, 0, first, sizeof first);
    sqlite3_finalize(st);
    if (r != SQLITE_ROW)
        return db_error(s, err, "integrity check failed to run");
    if (strcmp(first, "ok") != 0)
        return lk_error_set(err, LK_ERR_STORE,
                            "store %s: integrity check failed: %s; restore from a backup",
                            s->path, first);
    return LK_OK;
}

/* ---- templates ---- */

static lk_code sq_template_put(void *h, const lk_template_meta *m, const uint8_t *record,
                               size_t len, lk_error *err)
{
    sq *s = h;
    sqlite3_stmt *st;
    lk_code rc = prepare(s,
                         "INSERT INTO templates(template_id, subject_ref, key_id, model_id,"
                         " created_ms, expires_ms, image_count, record)"
                         " VALUES(?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8)",
                         &st, err);
    if (rc != LK_OK)
        return rc;
    sqlite3_bind_text(st, 1, m->template_id, -1, SQLITE_STATIC);
    sqlite3_bind_text(st, 2, m->subject_ref, -1, SQLITE_STATIC);
    sqlite3_bind_text(st, 3, m->key_id, -1, SQLITE_STATIC);
    sqlite3_bind_text(st, 4, m->model_id, -1, SQLITE_STATIC);
    sqlite3_bind_int64(st, 5, m->created_ms);
    sqlite3_bind_int64(st, 6, m->expires_ms);
    sqlite3_bind_int(st, 7, m->image_count);
    sqlite3_bind_blob64(st, 8, record, len, SQLITE_STATIC);
    int r = sqlite3_step(st);
    if (r == SQLITE_DONE)
        rc = LK_OK;
    else if ((sqlite3_extended_errcode(s->db) & 0xff) == SQLITE_CONSTRAINT)
        rc = lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "template %s already exists",
                          m->template_id);
    else
        rc = db_error(s, err, "cannot insert a template");
    sqlite3_finalize(st);
    return rc;
}

static lk_code sq_template_get(void *h, const char *id, int64_t now_ms, lk_template_meta *m,
                               uint8_t **record, size_t *len, lk_error *err)
{
    sq *s = h;
    sqlite3_stmt *st;
    lk_code rc = prepare(s,
                         "SELECT template_id, subject_ref, key_id, model_id, created_ms,"
                         " expires_ms, image_count, record FROM templates WHERE template_id = ?1",
                         &st, err);
    if (rc != LK_OK)
        return rc;
    sqlite3_bind_text(st, 1, id, -1, SQLITE_STATIC);
    int r = sqlite3_step(st);
    if (r == SQLITE_DONE) {
        rc = lk_error_set(err, LK_ERR_NOT_FOUND, "template %s does not exist", id);
    } else if (r != SQLITE_ROW) {
        rc = db_error(s, err, "cannot read a template");
    } else {
        lk_template_meta t;
        memset(&t, 0, sizeof t);
        col_text(st, 0, t.template_id, sizeof t.template_id);
        col_text(st, 1, t.subject_ref, sizeof t.subject_ref);
        col_text(st, 2, t.key_id, sizeof t.key_id);
        col_text(st, 3, t.model_id, sizeof t.model_id);
        t.created_ms = sqlite3_column_int64(st, 4);
        t.expires_ms = sqlite3_column_int64(st, 5);
        t.image_count = sqlite3_column_int(st, 6);
        if (t.expires_ms != 0 && t.expires_ms <= now_ms) {
            rc = lk_error_set(err, LK_ERR_NOT_FOUND, "template %s has expired", id);
        } else {
            rc = LK_OK;
            if (record) {
                const void *b = sqlite3_column_blob(st, 7);
                size_t n = (size_t)sqlite3_column_bytes(st, 7);
                uint8_t *copy = malloc(n ? n : 1);
                if (!copy) {
                    rc = lk_error_set(err, LK_ERR_NOMEM, "out of memory reading template %s",
                                      id);
                } else {
                    if (n)
                        memcpy(copy, b, n);
                    *record = copy;
                    *len = n;
                }
            }
            if (rc == LK_OK)
                *m = t;
        }
    }
    sqlite3_finalize(st);
    return rc;
}

static lk_code sq_template_delete(void *h, const char *id, lk_error *err)
{
    sq *s = h;
    sqlite3_stmt *st;
    lk_code rc = prepare(s, "DELETE FROM templates WHERE template_id = ?1", &st, err);
    if (rc != LK_OK)
        return rc;
    sqlite3_bind_text(st, 1, id, -1, SQLITE_STATIC);
    if (sqlite3_step(st) != SQLITE_DONE)
        rc = db_error(s, err, "cannot delete a template");
    else if (sqlite3_changes(s->db) == 0)
        rc = lk_error_set(err, LK_ERR_NOT_FOUND, "template %s does not exist", id);
    sqlite3_finalize(st);
    return rc;
}

static lk_code sq_template_purge_expired(void *h, int64_t now_ms, uint64_t *count,
                                         lk_error *err)
{
    sq *s = h;
    sqlite3_stmt *st;
    lk_code rc = prepare(s, "DELETE FROM templates WHERE expires_ms > 0 AND expires_ms <= ?1",
                         &st, err);
    if (rc != LK_OK)
        return rc;
    sqlite3_bind_int64(st, 1, now_ms);
    if (sqlite3_step(st) != SQLITE_DONE)
        rc = db_error(s, err, "cannot purge expired templates");
    else
        *count = (uint64_t)sqlite3_changes64(s->db);
    sqlite3_finalize(st);
    return rc;
}

static uint64_t count_query(sq *s, const char *sql)
{
    sqlite3_stmt *st;
    if (sqlite3_prepare_v2(s->db, sql, -1, &st, NULL) != SQLITE_OK)
        return 0;
    uint64_t n = 0;
    if (sqlite3_step(st) == SQLITE_ROW)
        n = (uint64_t)sqlite3_column_int64(st, 0);
    sqlite3_finalize(st);
    return n;
}

static uint64_t sq_template_count(void *h)
{
    return count_query(h, "SELECT count(*) FROM templates");
}

static lk_code sq_template_ids_not_under_key(void *h, const char *key_id, const char *after,
                                             char (*ids)[LK_TEMPLATE_ID_HEX + 1], size_t max,
                                             size_t *n, lk_error *err)
{
    sq *s = h;
    sqlite3_stmt *st;
    lk_code rc = prepare(s,
                         "SELECT template_id FROM templates WHERE key_id <> ?1"
                         " AND template_id > ?2 ORDER BY template_id LIMIT ?3",
                         &st, err);
    if (rc != LK_OK)
        return rc;
    sqlite3_bind_text(st, 1, key_id, -1, SQLITE_STATIC);
    sqlite3_bind_text(st, 2, after, -1, SQLITE_STATIC);
    sqlite3_bind_int64(st, 3, (sqlite3_int64)max);
    int r;
    size_t k = 0;
    while ((r = sqlite3_step(st)) == SQLITE_ROW && k < max)
        col_text(st, 0, ids[k++], LK_TEMPLATE_ID_HEX + 1);
    if (r != SQLITE_ROW && r != SQLITE_DONE)
        rc = db_error(s, err, "cannot list templates");
    *n = k;
    sqlite3_finalize(st);
    return rc;
}

static lk_code sq_template_rekey(void *h, const char *id, const char *old_key_id,
                                 const char *new_key_id, const uint8_t *record, size_t len,
                                 bool *replaced, lk_error *err)
{
    sq *s = h;
    sqlite3_stmt *st;
    /* The key id condition makes this a compare-and-swap: a template deleted
     * or re-keyed since it was read is left alone. */
    lk_code rc = prepare(s,
                         "UPDATE templates SET record = ?1, key_id = ?2"
                         " WHERE template_id = ?3 AND key_id = ?4",
                         &st, err);
    if (rc != LK_OK)
        return rc;
    sqlite3_bind_blob64(st, 1, record, len, SQLITE_STATIC);
    sqlite3_bind_text(st, 2, new_key_id, -1, SQLITE_STATIC);
    sqlite3_bind_text(st, 3, id, -1, SQLITE_STATIC);
    sqlite3_bind_text(st, 4, old_key_id, -1, SQLITE_STATIC);
    if (sqlite3_step(st) != SQLITE_DONE)
        rc = db_error(s, err, "cannot re-key a template");
    else
        *replaced = sqlite3_changes(s->db) == 1;
    sqlite3_finalize(st);
    return rc;
}

/* ---- template data keys ---- */

static lk_code write_txn(sq *s, lk_code (*fn)(sq *, void *, lk_error *), void *arg,
                         lk_error *err);

typedef struct tkadd {
    const char *key_id, *kek_id;
    const uint8_t *wrapped;
    size_t len;
    bool make_current;
} tkadd;

static lk_code step_done(sq *s, sqlite3_stmt *st, lk_error *err, const char *what)
{
    lk_code rc = LK_OK;
    if (sqlite3_step(st) != SQLITE_DONE)
        rc = (sqlite3_extended_errcode(s->db) & 0xff) == SQLITE_CONSTRAINT
                 ? lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "store %s: %s: %s", s->path, what,
                                sqlite3_errmsg(s->db))
                 : db_error(s, err, what);
    sqlite3_finalize(st);
    return rc;
}

static lk_code tkadd_fn(sq *s, void *arg, lk_error *err)
{
    const tkadd *a = arg;
    sqlite3_stmt *st;
    lk_code rc;
    if (a->make_current) {
        rc = prepare(s, "UPDATE template_keys SET is_current = 0 WHERE is_current = 1", &st, err);
        if (rc != LK_OK || (rc = step_done(s, st, err, "cannot clear the current data key")))
            return rc;
    }
    rc = prepare(s,
                 "INSERT INTO template_keys(key_id, kek_id, wrapped, created_ms, is_current)"
                 " VALUES(?1, ?2, ?3, ?4, ?5)",
                 &st, err);
    if (rc != LK_OK)
        return rc;
    sqlite3_bind_text(st, 1, a->key_id, -1, SQLITE_STATIC);
    sqlite3_bind_text(st, 2, a->kek_id, -1, SQLITE_STATIC);
    sqlite3_bind_blob64(st, 3, a->wrapped, a->len, SQLITE_STATIC);
    sqlite3_bind_int64(st, 4, lk_store_now_ms());
    sqlite3_bind_int(st, 5, a->make_current ? 1 : 0);
    rc = step_done(s, st, err, "cannot insert a data key");
    if (rc == LK_ERR_INVALID_ARGUMENT)
        rc = lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "data key %s already exists", a->key_id);
    return rc;
}

static lk_code sq_template_keys_add(void *h, const char *key_id, const char *kek_id,
                                    const uint8_t *wrapped, size_t len, bool make_current,
                                    lk_error *err)
{
    tkadd a = {key_id, kek_id, wrapped, len, make_current};
    return write_txn(h, tkadd_fn, &a, err);
}

static lk_code sq_template_keys_list(void *h, bool (*fn)(const lk_wrapped_key *k, void *ctx),
                                     void *ctx, lk_error *err)
{
    sq *s = h;
    sqlite3_stmt *st;
    lk_code rc = prepare(s,
                         "SELECT key_id, kek_id, wrapped, created_ms, is_current"
                         " FROM template_keys ORDER BY created_ms, key_id",
                         &st, err);
    if (rc != LK_OK)
        return rc;
    int r;
    while ((r = sqlite3_step(st)) == SQLITE_ROW) {
        lk_wrapped_key k;
        memset(&k, 0, sizeof k);
        col_text(st, 0, k.key_id, sizeof k.key_id);
        col_text(st, 1, k.kek_id, sizeof k.kek_id);
        k.wrapped = sqlite3_column_blob(st, 2);
        k.len = (size_t)sqlite3_column_bytes(st, 2);
        k.created_ms = sqlite3_column_int64(st, 3);
        k.is_current = sqlite3_column_int(st, 4) != 0;
        if (!fn(&k, ctx)) {
            r = SQLITE_DONE;
            break;
        }
    }
    if (r != SQLITE_DONE)
        rc = db_error(s, err, "cannot list the data keys");
    sqlite3_finalize(st);
    return rc;
}

static lk_code sq_template_keys_rewrap(void *h, const char *key_id, const char *old_kek_id,
                                       const char *new_kek_id, const uint8_t *wrapped,
                                       size_t len, bool *replaced, lk_error *err)
{
    sq *s = h;
    sqlite3_stmt *st;
    /* The KEK condition makes this a compare-and-swap. */
    lk_code rc = prepare(s,
                         "UPDATE template_keys SET kek_id = ?1, wrapped = ?2"
                         " WHERE key_id = ?3 AND kek_id = ?4",
                         &st, err);
    if (rc != LK_OK)
        return rc;
    sqlite3_bind_text(st, 1, new_kek_id, -1, SQLITE_STATIC);
    sqlite3_bind_blob64(st, 2, wrapped, len, SQLITE_STATIC);
    sqlite3_bind_text(st, 3, key_id, -1, SQLITE_STATIC);
    sqlite3_bind_text(st, 4, old_kek_id, -1, SQLITE_STATIC);
    if (sqlite3_step(st) != SQLITE_DONE)
        rc = db_error(s, err, "cannot re-wrap a data key");
    else
        *replaced = sqlite3_changes(s->db) == 1;
    sqlite3_finalize(st);
    return rc;
}

/* ---- API keys ---- */

static lk_code sq_apikey_put(void *h, const lk_apikey_meta *k, lk_error *err)
{
    sq *s = h;
    char scopes[64];
    lk_scopes_format(k->scopes, scopes, sizeof scopes);
    sqlite3_stmt *st;
    lk_code rc = prepare(s,
                         "INSERT INTO api_keys(id, name, scopes, hash, created_ms, revoked_ms)"
                         " VALUES(?1, ?2, ?3, ?4, ?5, ?6)",
                         &st, err);
    if (rc != LK_OK)
        return rc;
    sqlite3_bind_text(st, 1, k->id, -1, SQLITE_STATIC);
    sqlite3_bind_text(st, 2, k->name, -1, SQLITE_STATIC);
    sqlite3_bind_text(st, 3, scopes, -1, SQLITE_STATIC);
    sqlite3_bind_blob(st, 4, k->hash, 32, SQLITE_STATIC);
    sqlite3_bind_int64(st, 5, k->created_ms);
    sqlite3_bind_int64(st, 6, k->revoked_ms);
    int r = sqlite3_step(st);
    if (r == SQLITE_DONE)
        rc = LK_OK;
    else if ((sqlite3_extended_errcode(s->db) & 0xff) == SQLITE_CONSTRAINT)
        rc = lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "API key %s already exists", k->id);
    else
        rc = db_error(s, err, "cannot insert an API key");
    sqlite3_finalize(st);
    return rc;
}

static void row_apikey(sqlite3_stmt *st, lk_apikey_meta *k)
{
    memset(k, 0, sizeof *k);
    col_text(st, 0, k->id, sizeof k->id);
    col_text(st, 1, k->name, sizeof k->name);
    char scopes[64];
    col_text(st, 2, scopes, sizeof scopes);
    unsigned bits = 0;
    /* Only names this code wrote; an unknown one grants nothing. */
    if (lk_scopes_parse(scopes, &bits, NULL) != LK_OK)
        bits = 0;
    k->scopes = bits;
    col_blob32(st, 3, k->hash, 32);
    k->created_ms = sqlite3_column_int64(st, 4);
    k->revoked_ms = sqlite3_column_int64(st, 5);
}

static lk_code sq_apikey_get(void *h, const char *id, lk_apikey_meta *k, lk_error *err)
{
    sq *s = h;
    sqlite3_stmt *st;
    lk_code rc = prepare(s,
                         "SELECT id, name, scopes, hash, created_ms, revoked_ms FROM api_keys"
                         " WHERE id = ?1",
                         &st, err);
    if (rc != LK_OK)
        return rc;
    sqlite3_bind_text(st, 1, id, -1, SQLITE_STATIC);
    int r = sqlite3_step(st);
    if (r == SQLITE_ROW)
        row_apikey(st, k);
    else if (r == SQLITE_DONE)
        rc = lk_error_set(err, LK_ERR_NOT_FOUND, "API key %s does not exist", id);
    else
        rc = db_error(s, err, "cannot read an API key");
    sqlite3_finalize(st);
    return rc;
}

static lk_code sq_apikey_revoke(void *h, const char *id, int64_t now_ms, lk_error *err)
{
    sq *s = h;
    sqlite3_stmt *st;
    /* A key revoked twice keeps its first revocation time. */
    lk_code rc = prepare(s,
                         "UPDATE api_keys SET revoked_ms = CASE WHEN revoked_ms = 0 THEN ?1"
                         " ELSE revoked_ms END WHERE id = ?2",
                         &st, err);
    if (rc != LK_OK)
        return rc;
    sqlite3_bind_int64(st, 1, now_ms > 0 ? now_ms : 1);
    sqlite3_bind_text(st, 2, id, -1, SQLITE_STATIC);
    if (sqlite3_step(st) != SQLITE_DONE)
        rc = db_error(s, err, "cannot revoke an API key");
    else if (sqlite3_changes(s->db) == 0)
        rc = lk_error_set(err, LK_ERR_NOT_FOUND, "API key %s does not exist", id);
    sqlite3_finalize(st);
    return rc;
}

static lk_code sq_apikey_list(void *h, bool (*fn)(const lk_apikey_meta *k, void *ctx),
                              void *ctx, lk_error *err)
{
    sq *s = h;
    sqlite3_stmt *st;
    lk_code rc = prepare(s,
                         "SELECT id, name, scopes, hash, created_ms, revoked_ms FROM api_keys"
                         " ORDER BY created_ms, rowid",
                         &st, err);
    if (rc != LK_OK)
        return rc;
    int r;
    while ((r = sqlite3_step(st)) == SQLITE_ROW) {
        lk_apikey_meta k;
        row_apikey(st, &k);
        if (!fn(&k, ctx)) {
            r = SQLITE_DONE;
            break;
        }
    }
    if (r != SQLITE_DONE)
        rc = db_error(s, err, "cannot list API keys");
    sqlite3_finalize(st);
    return rc;
}

/* ---- audit ---- */

#define RECORD_COLUMNS                                                                    \
    "seq, time_ms, operation, caller, request_id, template_id, decision, score,"           \
    " threshold, model_id, reasons, status, prev_hash, hash"

static void row_record(sqlite3_stmt *st, lk_audit_record *r)
{
    memset(r, 0, sizeof *r);
    r->seq = (uint64_t)sqlite3_column_int64(st, 0);
    r->time_ms = sqlite3_column_int64(st, 1);
    r->operation = (lk_audit_op)sqlite3_column_int(st, 2);
    col_text(st, 3, r->caller, sizeof r->caller);
    col_text(st, 4, r->request_id, sizeof r->request_id);
    col_text(st, 5, r->template_id, sizeof r->template_id);
    col_text(st, 6, r->decision, sizeof r->decision);
    /* SQLite stores NaN as NULL (https://www.sqlite.org/floatingpoint.html). */
    r->score = sqlite3_column_type(st, 7) == SQLITE_NULL ? NAN : sqlite3_column_double(st, 7);
    r->threshold =
        sqlite3_column_type(st, 8) == SQLITE_NULL ? NAN : sqlite3_column_double(st, 8);
    col_text(st, 9, r->model_id, sizeof r->model_id);
    col_text(st, 10, r->reasons, sizeof r->reasons);
    r->status = sqlite3_column_int(st, 11);
    col_blob32(st, 12, r->prev_hash, 32);
    col_blob32(st, 13, r->hash, 32);
}

static void row_checkpoint(sqlite3_stmt *st, lk_audit_checkpoint *c)
{
    memset(c, 0, sizeof *c);
    c->seq = (uint64_t)sqlite3_column_int64(st, 0);
    col_blob32(st, 1, c->hash, 32);
    col_blob32(st, 2, c->public_key, 32);
    col_blob32(st, 3, c->signature, 64);
    c->time_ms = sqlite3_column_int64(st, 4);
}

static void bind_text_field(sqlite3_stmt *st, int i, const char *s)
{
    sqlite3_bind_text(st, i, s, (int)strnlen(s, LK_AUDIT_TEXT_MAX - 1), SQLITE_STATIC);
}

static void bind_real_or_null(sqlite3_stmt *st, int i, double v)
{
    if (isnan(v))
        sqlite3_bind_null(st, i);
    else
        sqlite3_bind_double(st, i, v);
}

/* Last record's seq and hash inside the current transaction; seq 0 and a zero
 * hash (the chain's hash_0) for an empty chain. */
static lk_code read_head(sq *s, uint64_t *seq, uint8_t hash[32], lk_error *err)
{
    sqlite3_stmt *st;
    lk_code rc = prepare(s, "SELECT seq, hash FROM audit_records ORDER BY seq DESC LIMIT 1",
                         &st, err);
    if (rc != LK_OK)
        return rc;
    int r = sqlite3_step(st);
    *seq = 0;
    memset(hash, 0, 32);
    if (r == SQLITE_ROW) {
        *seq = (uint64_t)sqlite3_column_int64(st, 0);
        col_blob32(st, 1, hash, 32);
    } else if (r != SQLITE_DONE) {
        rc = db_error(s, err, "cannot read the audit head");
    }
    sqlite3_finalize(st);
    return rc;
}

static lk_code insert_checkpoint(sq *s, const lk_audit_checkpoint *c, lk_error *err)
{
    sqlite3_stmt *st;
    lk_code rc = prepare(s,
                         "INSERT INTO audit_checkpoints(seq, hash, public_key, signature, time_ms)"
                         " VALUES(?1, ?2, ?3, ?4, ?5)",
                         &st, err);
    if (rc != LK_OK)
        return rc;
    sqlite3_bind_int64(st, 1, (sqlite3_int64)c->seq);
    sqlite3_bind_blob(st, 2, c->hash, 32, SQLITE_STATIC);
    sqlite3_bind_blob(st, 3, c->public_key, 32, SQLITE_STATIC);
    sqlite3_bind_blob(st, 4, c->signature, 64, SQLITE_STATIC);
    sqlite3_bind_int64(st, 5, c->time_ms);
    if (sqlite3_step(st) != SQLITE_DONE)
        rc = db_error(s, err, "cannot insert an audit checkpoint");
    sqlite3_finalize(st);
    return rc;
}

static lk_code append_once(sq *s, lk_audit_record *r, const lk_keyring *kr, unsigned interval,
                           lk_error *err)
{
    uint64_t last;
    uint8_t prev[32];
    lk_code rc = read_head(s, &last, prev, err);
    if (rc != LK_OK)
        return rc;
    r->seq = last + 1;
    memcpy(r->prev_hash, prev, 32);
    lk_audit_chain_hash(r, prev, r->hash);

    sqlite3_stmt *st;
    rc = prepare(s,
                 "INSERT INTO audit_records(" RECORD_COLUMNS ")"
                 " VALUES(?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14)",
                 &st, err);
    if (rc != LK_OK)
        return rc;
    sqlite3_bind_int64(st, 1, (sqlite3_int64)r->seq);
    sqlite3_bind_int64(st, 2, r->time_ms);
    sqlite3_bind_int(st, 3, (int)r->operation);
    bind_text_field(st, 4, r->caller);
    bind_text_field(st, 5, r->request_id);
    bind_text_field(st, 6, r->template_id);
    bind_text_field(st, 7, r->decision);
    bind_real_or_null(st, 8, r->score);
    bind_real_or_null(st, 9, r->threshold);
    bind_text_field(st, 10, r->model_id);
    bind_text_field(st, 11, r->reasons);
    sqlite3_bind_int(st, 12, r->status);
    sqlite3_bind_blob(st, 13, r->prev_hash, 32, SQLITE_STATIC);
    sqlite3_bind_blob(st, 14, r->hash, 32, SQLITE_STATIC);
    if (sqlite3_step(st) != SQLITE_DONE)
        rc = db_error(s, err, "cannot append an audit record");
    sqlite3_finalize(st);
    if (rc != LK_OK)
        return rc;

    if (kr && interval > 0 && r->seq % interval == 0) {
        lk_audit_checkpoint c;
        rc = lk_store_sign_checkpoint(kr, r->seq, r->hash, &c, err);
        if (rc == LK_OK)
            rc = insert_checkpoint(s, &c, err);
    }
    return rc;
}

static lk_code checkpoint_once(sq *s, const lk_keyring *kr, lk_error *err)
{
    uint64_t head;
    uint8_t hash[32];
    lk_code rc = read_head(s, &head, hash, err);
    if (rc != LK_OK || head == 0)
        return rc;
    sqlite3_stmt *st;
    rc = prepare(s, "SELECT 1 FROM audit_checkpoints WHERE seq = ?1", &st, err);
    if (rc != LK_OK)
        return rc;
    sqlite3_bind_int64(st, 1, (sqlite3_int64)head);
    int r = sqlite3_step(st);
    sqlite3_finalize(st);
    if (r == SQLITE_ROW)
        return LK_OK;
    if (r != SQLITE_DONE)
        return db_error(s, err, "cannot read the audit checkpoints");
    lk_audit_checkpoint c;
    rc = lk_store_sign_checkpoint(kr, head, hash, &c, err);
    if (rc == LK_OK)
        rc = insert_checkpoint(s, &c, err);
    return rc;
}

typedef lk_code (*write_fn)(sq *s, void *arg, lk_error *err);

/* Runs fn in a write transaction, retrying on SQLITE_BUSY: several processes
 * (the service, the command-line tool) append to one chain. BEGIN IMMEDIATE
 * takes the write lock before the head is read, so two writers cannot both
 * extend the same head. */
static lk_code write_txn(sq *s, write_fn fn, void *arg, lk_error *err)
{
    lk_code rc = LK_ERR_BUSY;
    for (int attempt = 0; attempt <= BUSY_RETRIES; attempt++) {
        if (attempt > 0) {
            /* 2, 4, 8, ... ms, capped at 256 ms, plus up to as much again at random. */
            uint32_t base = 1u << (attempt < 8 ? attempt : 8);
            uint32_t ms = base + randombytes_uniform(base + 1);
            struct timespec ts = {(time_t)(ms / 1000), (long)(ms % 1000) * 1000000L};
            nanosleep(&ts, NULL);
        }
        rc = exec(s, "BEGIN IMMEDIATE", err, "cannot start a write transaction");
        if (rc == LK_OK) {
            rc = fn(s, arg, err);
            if (rc == LK_OK)
                rc = exec(s, "COMMIT", err, "cannot commit");
        }
        if (rc == LK_OK)
            return LK_OK;
        rollback(s);
        if (rc != LK_ERR_BUSY)
            return rc;
    }
    return rc;
}

typedef struct append_args {
    lk_audit_record *r;
    const lk_store_change *change;
    const lk_keyring *kr;
    unsigned interval;
} append_args;

static lk_code append_fn(sq *s, void *arg, lk_error *err)
{
    append_args *a = arg;
    lk_code rc = LK_OK;
    /* Inside the write transaction: the change and the record commit together. */
    if (a->change && a->change->kind == LK_CHANGE_PUT)
        rc = sq_template_put(s, a->change->meta, a->change->record, a->change->len, err);
    else if (a->change && a->change->kind == LK_CHANGE_DELETE)
        rc = sq_template_delete(s, a->change->template_id, err);
    if (rc != LK_OK)
        return rc;
    return append_once(s, a->r, a->kr, a->interval, err);
}

static lk_code sq_audit_append(void *h, lk_audit_record *r, const lk_store_change *change,
                               const lk_keyring *kr, unsigned interval, lk_error *err)
{
    lk_audit_record saved = *r;
    append_args a = {r, change, kr, interval};
    lk_code rc = write_txn(h, append_fn, &a, err);
    if (rc != LK_OK) {
        /* Nothing was appended: do not hand back a seq or hash that is not stored. */
        *r = saved;
    }
    return rc;
}

static lk_code checkpoint_fn(sq *s, void *arg, lk_error *err)
{
    return checkpoint_once(s, arg, err);
}

static lk_code sq_audit_checkpoint(void *h, const lk_keyring *kr, lk_error *err)
{
    return write_txn(h, checkpoint_fn, (void *)kr, err);
}

static lk_code list_records(sq *s, uint64_t after, uint64_t limit, lk_store_record_fn fn,
                            void *ctx, bool *stopped, lk_error *err)
{
    sqlite3_stmt *st;
    lk_code rc = prepare(s,
                         "SELECT " RECORD_COLUMNS " FROM audit_records WHERE seq > ?1"
                         " ORDER BY seq LIMIT ?2",
                         &st, err);
    if (rc != LK_OK)
        return rc;
    sqlite3_bind_int64(st, 1, after > INT64_MAX ? INT64_MAX : (sqlite3_int64)after);
    /* A negative LIMIT means no limit (https://www.sqlite.org/lang_select.html#limitoffset). */
    sqlite3_bind_int64(st, 2, limit == 0 || limit > INT64_MAX ? -1 : (sqlite3_int64)limit);
    int r;
    *stopped = false;
    while ((r = sqlite3_step(st)) == SQLITE_ROW) {
        lk_audit_record rec;
        row_record(st, &rec);
        if (!fn(&rec, ctx)) {
            *stopped = true;
            r = SQLITE_DONE;
            break;
        }
    }
    if (r != SQLITE_DONE)
        rc = db_error(s, err, "cannot read the audit records");
    sqlite3_finalize(st);
    return rc;
}

static lk_code list_checkpoints(sq *s, lk_store_checkpoint_fn fn, void *ctx, lk_error *err)
{
    sqlite3_stmt *st;
    lk_code rc = prepare(s,
                         "SELECT seq, hash, public_key, signature, time_ms"
                         " FROM audit_checkpoints ORDER BY seq",
                         &st, err);
    if (rc != LK_OK)
        return rc;
    int r;
    while ((r = sqlite3_step(st)) == SQLITE_ROW) {
        lk_audit_checkpoint c;
        row_checkpoint(st, &c);
        if (!fn(&c, ctx)) {
            r = SQLITE_DONE;
            break;
        }
    }
    if (r != SQLITE_DONE)
        rc = db_error(s, err, "cannot read the audit checkpoints");
    sqlite3_finalize(st);
    return rc;
}

static lk_code sq_audit_list(void *h, uint64_t after, uint64_t limit, lk_store_record_fn fn,
                             void *ctx, lk_error *err)
{
    bool stopped;
    return list_records(h, after, limit, fn, ctx, &stopped, err);
}

static lk_code sq_audit_checkpoints(void *h, lk_store_checkpoint_fn fn, void *ctx,
                                    lk_error *err)
{
    return list_checkpoints(h, fn, ctx, err);
}

static uint64_t sq_audit_head(void *h)
{
    return count_query(h, "SELECT coalesce(max(seq), 0) FROM audit_records");
}

static lk_code sq_audit_scan(void *h, lk_store_record_fn rfn, lk_store_checkpoint_fn cfn,
                             void *ctx, lk_error *err)
{
    sq *s = h;
    /* One read transaction: in WAL mode it sees one snapshot throughout. */
    lk_code rc = exec(s, "BEGIN", err, "cannot start a read transaction");
    if (rc != LK_OK)
        return rc;
    bool stopped = false;
    rc = list_records(s, 0, 0, rfn, ctx, &stopped, err);
    if (rc == LK_OK && !stopped)
        rc = list_checkpoints(s, cfn, ctx, err);
    if (rc == LK_OK)
        rc = exec(s, "COMMIT", err, "cannot end the read transaction");
    if (rc != LK_OK)
        rollback(s);
    return rc;
}

const lk_store_backend lk_store_sqlite_backend = {
    .name = "sqlite",
    .close = sq_close,
    .schema_version = sq_schema_version,
    .ping = sq_ping,
    .integrity_check = sq_integrity_check,
    .template_put = sq_template_put,
    .template_get = sq_template_get,
    .template_delete = sq_template_delete,
    .template_purge_expired = sq_template_purge_expired,
    .template_count = sq_template_count,
    .template_ids_not_under_key = sq_template_ids_not_under_key,
    .template_rekey = sq_template_rekey,
    .template_keys_add = sq_template_keys_add,
    .template_keys_list = sq_template_keys_list,
    .template_keys_rewrap = sq_template_keys_rewrap,
    .apikey_put = sq_apikey_put,
    .apikey_get = sq_apikey_get,
    .apikey_revoke = sq_apikey_revoke,
    .apikey_list = sq_apikey_list,
    .audit_append = sq_audit_append,
    .audit_checkpoint = sq_audit_checkpoint,
    .audit_list = sq_audit_list,
    .audit_checkpoints = sq_audit_checkpoints,
    .audit_head = sq_audit_head,
    .audit_scan = sq_audit_scan,
};
