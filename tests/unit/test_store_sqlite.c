/* The store: templates, API keys, the audit chain, schema versions and
 * concurrent appends, against SQLite (the default) or, when the environment
 * names one, a PostgreSQL database:
 *
 *   LIKENESS_TEST_STORE_URL=postgres://USER@HOST:PORT/DB test_store_sqlite
 *
 * (tests/ref/check_store_postgres.py starts a throwaway server and does so).
 * A variable of its own, not the service's LIKENESS_STORE_URL: the run makes
 * and drops schemas named lkt_<pid>_* in that database, so it must never
 * reach a production store by accident. The SQLite file's journal mode,
 * integrity and the chain's bytes are checked independently with Python's
 * sqlite3, hashlib and PyNaCl in tests/ref/check_audit_chain.py; the
 * PostgreSQL rows with psql and hashlib in tests/ref/check_store_postgres.py. */
#include <libpq-fe.h>
#include <math.h>
#include <pthread.h>
#include <sodium.h>
#include <sqlite3.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include "likeness/store.h"
#include "lk_test.h"

static char dir[] = "/tmp/lk_store_test_XXXXXX";
/* NULL: SQLite files in dir; else the PostgreSQL database to test in. */
static const char *pg_base;

/* A fresh, empty store called name: a file in dir, or a new PostgreSQL
 * schema selected through libpq's `options` parameter (search_path). */
static void store_url(char *out, size_t cap, const char *name)
{
    if (!pg_base) {
        snprintf(out, cap, "sqlite:%s/%s.db", dir, name);
        return;
    }
    snprintf(out, cap, "%s%coptions=-csearch_path%%3Dlkt_%ld_%s", pg_base,
             strchr(pg_base, '?') ? '&' : '?', (long)getpid(), name);
}

/* Runs SQL on the store behind the library's back; true on success. */
static bool exec_sql(const char *url, const char *sql)
{
    if (!pg_base) {
        sqlite3 *db;
        bool ok = sqlite3_open(url + strlen("sqlite:"), &db) == SQLITE_OK &&
                  sqlite3_exec(db, sql, NULL, NULL, NULL) == SQLITE_OK;
        sqlite3_close(db);
        return ok;
    }
    PGconn *c = PQconnectdb(url);
    bool ok = PQstatus(c) == CONNECTION_OK;
    if (ok) {
        PQclear(PQexec(c, "SET client_min_messages = warning")); /* no NOTICE chatter */
        PGresult *r = PQexec(c, sql);
        ok = PQresultStatus(r) == PGRES_COMMAND_OK || PQresultStatus(r) == PGRES_TUPLES_OK;
        if (!ok)
            fprintf(stderr, "note: %s: %s", sql, PQresultErrorMessage(r));
        PQclear(r);
    } else {
        fprintf(stderr, "note: %s", PQerrorMessage(c));
    }
    PQfinish(c);
    return ok;
}

static bool pg_schema(const char *name, bool create)
{
    char sql[256];
    int n = snprintf(sql, sizeof sql, "DROP SCHEMA IF EXISTS lkt_%ld_%s CASCADE",
                     (long)getpid(), name);
    if (create)
        snprintf(sql + n, sizeof sql - (size_t)n, "; CREATE SCHEMA lkt_%ld_%s", (long)getpid(),
                 name);
    return exec_sql(pg_base, sql);
}

/* Prepares an empty store called name. */
static bool fresh(const char *name)
{
    return pg_base ? pg_schema(name, true) : true;
}

static lk_template_meta meta(const char *id, const char *key, int64_t expires)
{
    lk_template_meta m;
    memset(&m, 0, sizeof m);
    snprintf(m.template_id, sizeof m.template_id, "%s", id);
    snprintf(m.subject_ref, sizeof m.subject_ref, "subject-%s", id);
    snprintf(m.key_id, sizeof m.key_id, "%s", key);
    snprintf(m.model_id, sizeof m.model_id, "0123456789abcdef0123456789abcdef");
    m.created_ms = 1000;
    m.expires_ms = expires;
    m.image_count = 3;
    return m;
}

static void test_templates(lk_store *s)
{
    lk_error err;
    const uint8_t rec[5] = {1, 2, 3, 4, 5};
    char id[5][33];
    for (int i = 0; i < 5; i++)
        snprintf(id[i], sizeof id[i], "%032d", i + 1);
    lk_template_meta m0 = meta(id[0], "t1", 0);
    CHECK(lk_store_template_put(s, &m0, rec, sizeof rec, &err) == LK_OK, "put: %s", err.message);
    CHECK(lk_store_template_put(s, &m0, rec, sizeof rec, &err) == LK_ERR_INVALID_ARGUMENT,
          "duplicate id refused");
    lk_template_meta m1 = meta(id[1], "t1", 5000);
    lk_template_meta m2 = meta(id[2], "t0", 9000);
    lk_template_meta m3 = meta(id[3], "t0", 0);
    lk_template_meta m4 = meta(id[4], "t2", 0);
    CHECK(lk_store_template_put(s, &m1, rec, 3, &err) == LK_OK &&
              lk_store_template_put(s, &m2, rec, 4, &err) == LK_OK &&
              lk_store_template_put(s, &m3, rec, 5, &err) == LK_OK &&
              lk_store_template_put(s, &m4, rec, 5, &err) == LK_OK,
          "puts: %s", err.message);
    CHECK(lk_store_template_count(s) == 5, "count 5");

    lk_template_meta got;
    uint8_t *r = NULL;
    size_t len = 0;
    CHECK(lk_store_template_get(s, id[0], 2000, &got, &r, &len, &err) == LK_OK && len == 5 &&
              !memcmp(r, rec, 5) && !strcmp(got.subject_ref, "subject-" "00000000000000000000000000000001") &&
              !strcmp(got.key_id, "t1") && got.image_count == 3 && got.created_ms == 1000,
          "get returns what was put: %s", err.message);
    free(r);
    CHECK(lk_store_template_get(s, id[1], 4999, &got, NULL, NULL, &err) == LK_OK,
          "metadata only, not yet expired");
    CHECK(lk_store_template_get(s, id[1], 5000, &got, NULL, NULL, &err) == LK_ERR_NOT_FOUND,
          "expired at expires_ms");
    CHECK(lk_store_template_get(s, "ffffffffffffffffffffffffffffffff", 0, &got, NULL, NULL,
                                &err) == LK_ERR_NOT_FOUND,
          "absent template");

    uint64_t purged = 99;
    CHECK(lk_store_template_purge_expired(s, 6000, &purged, &err) == LK_OK && purged == 1,
          "purge removes the one expired template (%llu)", (unsigned long long)purged);
    CHECK(lk_store_template_count(s) == 4, "count 4 after purge");

    CHECK(lk_store_template_delete(s, id[4], &err) == LK_OK, "delete");
    CHECK(lk_store_template_delete(s, id[4], &err) == LK_ERR_NOT_FOUND, "delete twice");

    /* Key rotation listing, in pages of one: ids 1, 3, 4 remain; not under t2. */
    char ids[2][LK_TEMPLATE_ID_HEX + 1];
    size_t n = 0;
    CHECK(lk_store_template_ids_not_under_key(s, "t1", "", ids, 1, &n, &err) == LK_OK &&
              n == 1 && !strcmp(ids[0], id[2]),
          "first page: %zu %s", n, n ? ids[0] : "");
    CHECK(lk_store_template_ids_not_under_key(s, "t1", ids[0], ids, 2, &n, &err) == LK_OK &&
              n == 1 && !strcmp(ids[0], id[3]),
          "second page");
    CHECK(lk_store_template_ids_not_under_key(s, "t1", id[3], ids, 2, &n, &err) == LK_OK &&
              n == 0,
          "no third page");

    /* Compare-and-swap: succeeds once, then the old key id no longer matches. */
    const uint8_t rec2[3] = {9, 9, 9};
    bool replaced = false;
    CHECK(lk_store_template_rekey(s, id[2], "t0", "t1", rec2, 3, &replaced, &err) == LK_OK &&
              replaced,
          "rekey");
    CHECK(lk_store_template_rekey(s, id[2], "t0", "t1", rec2, 3, &replaced, &err) == LK_OK &&
              !replaced,
          "second rekey with a stale key id does nothing");
    CHECK(lk_store_template_rekey(s, id[4], "t2", "t1", rec2, 3, &replaced, &err) == LK_OK &&
              !replaced,
          "rekey of a deleted template does nothing");
    CHECK(lk_store_template_get(s, id[2], 0, &got, &r, &len, &err) == LK_OK && len == 3 &&
              !memcmp(r, rec2, 3) && !strcmp(got.key_id, "t1"),
          "re-keyed record stored");
    free(r);
}

typedef struct keys_seen {
    lk_store *s;
    char names[256];
    int nested_ok;
} keys_seen;

static bool collect_keys(const lk_apikey_meta *k, void *ctx)
{
    keys_seen *ks = ctx;
    strcat(ks->names, k->id);
    strcat(ks->names, ";");
    /* A callback may call back into the same store (recursive lock for
     * SQLite, a second pooled connection for PostgreSQL). */
    lk_apikey_meta again;
    if (lk_store_apikey_get(ks->s, k->id, &again, NULL) == LK_OK && !strcmp(again.id, k->id))
        ks->nested_ok++;
    return true;
}

static void test_apikeys(lk_store *s)
{
    lk_error err;
    unsigned sc = 0;
    CHECK(lk_scopes_parse("verify, audit", &sc, &err) == LK_OK &&
              sc == (LK_SCOPE_VERIFY | LK_SCOPE_AUDIT),
          "scopes parse");
    CHECK(lk_scopes_parse("verify,admin", &sc, &err) == LK_ERR_INVALID_ARGUMENT &&
              strstr(err.message, "admin"),
          "unknown scope named: %s", err.message);
    char buf[64];
    lk_scopes_format(LK_SCOPE_ALL, buf, sizeof buf);
    CHECK(!strcmp(buf, "verify,enrol,delete,audit"), "scopes format: %s", buf);
    lk_scopes_format(LK_SCOPE_ENROL | LK_SCOPE_DELETE, buf, 8);
    CHECK(!strcmp(buf, "enrol"), "format never cuts a name: %s", buf);

    lk_apikey_meta k;
    memset(&k, 0, sizeof k);
    snprintf(k.id, sizeof k.id, "00000000000000b2");
    snprintf(k.name, sizeof k.name, "second");
    k.scopes = LK_SCOPE_VERIFY | LK_SCOPE_ENROL;
    memset(k.hash, 0x42, 32);
    k.created_ms = 2000;
    CHECK(lk_store_apikey_put(s, &k, &err) == LK_OK, "apikey put: %s", err.message);
    CHECK(lk_store_apikey_put(s, &k, &err) == LK_ERR_INVALID_ARGUMENT, "apikey duplicate");
    snprintf(k.id, sizeof k.id, "00000000000000a1");
    snprintf(k.name, sizeof k.name, "first");
    k.created_ms = 1000;
    k.scopes = LK_SCOPE_ALL;
    CHECK(lk_store_apikey_put(s, &k, &err) == LK_OK, "apikey put 2");

    lk_apikey_meta g;
    CHECK(lk_store_apikey_get(s, "00000000000000b2", &g, &err) == LK_OK &&
              g.scopes == (LK_SCOPE_VERIFY | LK_SCOPE_ENROL) && !strcmp(g.name, "second") &&
              g.hash[31] == 0x42 && g.revoked_ms == 0,
          "apikey get");
    CHECK(lk_store_apikey_get(s, "nope", &g, &err) == LK_ERR_NOT_FOUND, "absent key");
    CHECK(lk_store_apikey_revoke(s, "00000000000000b2", 7777, &err) == LK_OK &&
              lk_store_apikey_revoke(s, "00000000000000b2", 8888, &err) == LK_OK &&
              lk_store_apikey_get(s, "00000000000000b2", &g, &err) == LK_OK &&
              g.revoked_ms == 7777,
          "revoked once, first time kept");
    CHECK(lk_store_apikey_revoke(s, "nope", 1, &err) == LK_ERR_NOT_FOUND, "revoke absent");
    keys_seen ks = {s, "", 0};
    CHECK(lk_store_apikey_list(s, collect_keys, &ks, &err) == LK_OK &&
              !strcmp(ks.names, "00000000000000a1;00000000000000b2;"),
          "list in creation order: %s", ks.names);
    CHECK(ks.nested_ok == 2, "store called from inside a list callback (%d)", ks.nested_ok);
}

static bool collect_seqs(const lk_audit_record *r, void *ctx)
{
    char *out = ctx;
    char b[24];
    snprintf(b, sizeof b, "%llu,", (unsigned long long)r->seq);
    strcat(out, b);
    return true;
}

static bool count_cp(const lk_audit_checkpoint *c, void *ctx)
{
    (void)c;
    (*(int *)ctx)++;
    return true;
}

static void fill(lk_audit_record *r, int i)
{
    lk_audit_record_init(r, LK_AUDIT_VERIFY);
    snprintf(r->caller, sizeof r->caller, "caller-%d", i % 4);
    snprintf(r->decision, sizeof r->decision, "%s", i % 3 ? "match" : "non_match");
    r->score = i % 5 ? 0.1 * i : NAN;
    r->threshold = 0.0; /* SQLite stores an integral REAL as an integer */
    r->status = 200;
}

typedef struct worker {
    lk_store *s;
    const lk_keyring *kr;
    int n;
    int failures;
} worker;

static void *append_worker(void *arg)
{
    worker *w = arg;
    for (int i = 0; i < w->n; i++) {
        lk_audit_record r;
        fill(&r, i);
        lk_error err;
        if (lk_store_audit_append(w->s, &r, w->kr, 7, &err) != LK_OK) {
            fprintf(stderr, "append: %s\n", err.message);
            w->failures++;
        }
    }
    return NULL;
}

static void test_audit(lk_store *s, const lk_keyring *kr)
{
    lk_error err;
    uint8_t pk[32];
    lk_keyring_audit_public_key(kr, pk);
    CHECK(lk_store_audit_head(s) == 0, "empty chain");
    CHECK(lk_store_audit_checkpoint(s, kr, &err) == LK_OK, "checkpoint of empty chain: no-op");
    uint8_t prev[32] = {0};
    for (int i = 0; i < 25; i++) {
        lk_audit_record r;
        fill(&r, i);
        CHECK(lk_store_audit_append(s, &r, kr, 10, &err) == LK_OK && r.seq == (uint64_t)i + 1 &&
                  !memcmp(r.prev_hash, prev, 32),
              "append %d: %s", i, err.message);
        uint8_t h[32];
        lk_audit_chain_hash(&r, r.prev_hash, h);
        CHECK(!memcmp(h, r.hash, 32), "append %d: returned hash", i);
        memcpy(prev, r.hash, 32);
    }
    CHECK(lk_store_audit_head(s) == 25, "head 25");
    int ncp = 0;
    CHECK(lk_store_audit_checkpoints(s, count_cp, &ncp, &err) == LK_OK && ncp == 2,
          "checkpoints at 10 and 20 (%d)", ncp);
    CHECK(lk_store_audit_checkpoint(s, kr, &err) == LK_OK &&
              lk_store_audit_checkpoint(s, kr, &err) == LK_OK,
          "checkpoint now, twice");
    ncp = 0;
    lk_store_audit_checkpoints(s, count_cp, &ncp, &err);
    CHECK(ncp == 3, "one more checkpoint, at the head (%d)", ncp);

    char seqs[256] = "";
    CHECK(lk_store_audit_list(s, 5, 3, collect_seqs, seqs, &err) == LK_OK &&
              !strcmp(seqs, "6,7,8,"),
          "list after 5, limit 3: %s", seqs);
    seqs[0] = '\0';
    CHECK(lk_store_audit_list(s, 22, 0, collect_seqs, seqs, &err) == LK_OK &&
              !strcmp(seqs, "23,24,25,"),
          "list after 22, no limit: %s", seqs);

    lk_audit_report rep;
    CHECK(lk_store_audit_verify(s, pk, &rep, &err) == LK_OK && rep.ok && rep.records == 25 &&
              rep.checkpoints == 3,
          "stored chain verifies: %s", rep.reason);
    uint8_t other[32];
    memcpy(other, pk, 32);
    other[0] ^= 1;
    CHECK(lk_store_audit_verify(s, other, &rep, &err) == LK_OK && !rep.ok &&
              rep.first_bad_seq == 10,
          "another public key: first checkpoint refused (%llu)",
          (unsigned long long)rep.first_bad_seq);
}

static void test_tamper_sql(const char *url, const lk_keyring *kr)
{
    /* Edit record 12 behind the store's back. */
    CHECK(exec_sql(url, "UPDATE audit_records SET decision = 'non_match' WHERE seq = 12"),
          "tamper");
    lk_error err;
    lk_store *s = lk_store_open(url, &err);
    uint8_t pk[32];
    lk_keyring_audit_public_key(kr, pk);
    lk_audit_report rep;
    CHECK(s && lk_store_audit_verify(s, pk, &rep, &err) == LK_OK && !rep.ok &&
              rep.first_bad_seq == 12,
          "edited record 12 found: %s", rep.reason);
    lk_store_close(s);
}

static void test_versions(void)
{
    lk_error err;
    char u[700];
    CHECK(fresh("newer"), "fresh store");
    store_url(u, sizeof u, "newer");
    lk_store *s = lk_store_open(u, &err);
    CHECK(s && lk_store_schema_version(s) == LK_STORE_SCHEMA_VERSION, "fresh store migrated: %s",
          s ? "" : err.message);
    lk_store_close(s);
    s = lk_store_open(u, &err);
    CHECK(s && lk_store_schema_version(s) == LK_STORE_SCHEMA_VERSION, "reopened: %s",
          s ? "" : err.message);
    lk_store_close(s);
    CHECK(exec_sql(u, pg_base ? "UPDATE likeness_schema SET version = 99"
                              : "PRAGMA user_version = 99"),
          "set version 99");
    s = lk_store_open(u, &err);
    CHECK(!s && err.code == LK_ERR_STORE && strstr(err.message, "newer") &&
              strstr(err.message, "99"),
          "newer schema refused: %s", err.message);
    lk_store_close(s);

    CHECK(fresh("other"), "fresh store");
    store_url(u, sizeof u, "other");
    if (!pg_base) /* make the file exist first */
        exec_sql(u, "PRAGMA application_id = 42; CREATE TABLE t(x)");
    else
        exec_sql(u, "CREATE TABLE templates(x integer)");
    s = lk_store_open(u, &err);
    CHECK(!s && err.code == LK_ERR_STORE && strstr(err.message, "another program"),
          "another program's database refused: %s", err.message);
    lk_store_close(s);

    /* Nothing listens on port 1 of the loopback address: refused at once. */
    s = lk_store_open("postgres://likeness@127.0.0.1:1/likeness?connect_timeout=5", &err);
    CHECK(!s && err.code == LK_ERR_STORE && strstr(err.message, "unreachable") &&
              strstr(err.message, "127.0.0.1"),
          "PostgreSQL server down: %s", err.message);
    s = lk_store_open("postgresql://127.0.0.1:1/x?no_such_setting=1", &err);
    CHECK(!s && err.code == LK_ERR_STORE && strstr(err.message, "invalid PostgreSQL store URL"),
          "bad PostgreSQL URL: %s", err.message);
    s = lk_store_open("mysql://127.0.0.1/x", &err);
    CHECK(!s && err.code == LK_ERR_STORE && strstr(err.message, "unsupported"),
          "unknown scheme: %s", err.message);
    if (!pg_base) {
        char p[512];
        snprintf(p, sizeof p, "%s/nodir/x.db", dir);
        s = lk_store_open(p, &err);
        CHECK(!s && err.code == LK_ERR_STORE && strstr(err.message, "nodir"),
              "unopenable path named: %s", err.message);
    }
}

/* ---- template data keys ---- */

typedef struct klist {
    lk_wrapped_key k[8];
    uint8_t w[8][LK_WRAPPED_KEY_BYTES];
    size_t n;
} klist;

static bool collect_wrapped(const lk_wrapped_key *k, void *ctx)
{
    klist *l = ctx;
    if (l->n == 8)
        return false;
    l->k[l->n] = *k;
    memcpy(l->w[l->n], k->wrapped, k->len < LK_WRAPPED_KEY_BYTES ? k->len : LK_WRAPPED_KEY_BYTES);
    l->k[l->n].wrapped = l->w[l->n];
    l->n++;
    return true;
}

static const lk_wrapped_key *find_key(const klist *l, const char *id)
{
    for (size_t i = 0; i < l->n; i++)
        if (!strcmp(l->k[i].key_id, id))
            return &l->k[i];
    return NULL;
}

static size_t n_current(const klist *l)
{
    size_t n = 0;
    for (size_t i = 0; i < l->n; i++)
        n += l->k[i].is_current;
    return n;
}

static void test_template_keys(const char *url, lk_keyring *kr)
{
    lk_error err;
    lk_store *s = lk_store_open(url, &err);
    CHECK(s != NULL, "open: %s", err.message);
    if (!s)
        return;
    klist l = {0};
    CHECK(lk_store_template_keys_list(s, collect_wrapped, &l, &err) == LK_OK && l.n == 0,
          "no data keys in a new store");
    char id[3][LK_KEY_ID_MAX], kek[3][LK_KEY_ID_MAX];
    uint8_t *w[3] = {NULL, NULL, NULL};
    size_t wl[3] = {0, 0, 0};
    for (int i = 0; i < 3; i++)
        CHECK(lk_keyring_wrap_new_key(kr, id[i], kek[i], &w[i], &wl[i], &err) == LK_OK,
              "wrap: %s", err.message);
    CHECK(lk_store_template_keys_add(s, id[0], kek[0], w[0], wl[0], true, &err) == LK_OK,
          "add current: %s", err.message);
    CHECK(lk_store_template_keys_add(s, id[1], kek[1], w[1], wl[1], false, &err) == LK_OK,
          "add: %s", err.message);
    l.n = 0;
    CHECK(lk_store_template_keys_list(s, collect_wrapped, &l, &err) == LK_OK && l.n == 2 &&
              n_current(&l) == 1 && find_key(&l, id[0]) && find_key(&l, id[0])->is_current,
          "two keys, the first current");
    CHECK(lk_store_template_keys_add(s, id[2], kek[2], w[2], wl[2], true, &err) == LK_OK,
          "add a new current: %s", err.message);
    l.n = 0;
    CHECK(lk_store_template_keys_list(s, collect_wrapped, &l, &err) == LK_OK && l.n == 3 &&
              n_current(&l) == 1 && find_key(&l, id[2])->is_current,
          "three keys, only the newest current");
    bool same = true;
    for (int i = 0; i < 3; i++) {
        const lk_wrapped_key *k = find_key(&l, id[i]);
        same = same && k && k->len == wl[i] && !memcmp(k->wrapped, w[i], wl[i]) &&
               !strcmp(k->kek_id, kek[i]) && k->created_ms > 1600000000000;
    }
    CHECK(same, "ids, KEK ids, wrapped bytes and creation times read back as written");
    CHECK(lk_store_template_keys_add(s, id[1], kek[1], w[1], wl[1], true, &err) ==
              LK_ERR_INVALID_ARGUMENT,
          "a key id added twice refused: %s", lk_code_name(err.code));
    l.n = 0;
    CHECK(lk_store_template_keys_list(s, collect_wrapped, &l, &err) == LK_OK && l.n == 3 &&
              find_key(&l, id[2])->is_current,
          "a refused add changes nothing (the current mark stays)");
    CHECK(!exec_sql(url, pg_base ? "UPDATE template_keys SET is_current = TRUE"
                                 : "UPDATE template_keys SET is_current = 1"),
          "the schema refuses a second current key");

    /* Sync: the ring seals under the store's current key. */
    CHECK(lk_store_sync_keys(s, kr, &err) == LK_OK, "sync: %s", err.message);
    char cur[LK_KEY_ID_MAX];
    lk_keyring_current_id(kr, cur);
    CHECK(!strcmp(cur, id[2]) && lk_keyring_has_key(kr, id[0]) && lk_keyring_has_key(kr, id[1]),
          "after sync the current key is %s (want %s)", cur, id[2]);

    /* Re-wrap is a compare-and-swap on the KEK id. */
    bool replaced = true;
    CHECK(lk_store_template_keys_rewrap(s, id[0], "tnot-the-kek", kek[0], w[1], wl[1], &replaced,
                                        &err) == LK_OK && !replaced,
          "re-wrap under a stale KEK id replaces nothing");
    uint8_t *rw = NULL;
    size_t rwl = 0;
    char rkek[LK_KEY_ID_MAX];
    CHECK(lk_keyring_rewrap_key(kr, id[0], rkek, &rw, &rwl, &err) == LK_OK &&
              lk_store_template_keys_rewrap(s, id[0], kek[0], rkek, rw, rwl, &replaced, &err) ==
                  LK_OK && replaced,
          "re-wrap: %s", err.message);
    CHECK(lk_store_sync_keys(s, kr, &err) == LK_OK, "sync after re-wrap: %s", err.message);

    /* An altered wrapping in the store: sync refused naming the key, the
     * ring keeps what it had. */
    char sql[256];
    snprintf(sql, sizeof sql,
             pg_base ? "UPDATE template_keys SET wrapped = set_byte(wrapped, 40, get_byte(wrapped, "
                       "40) # 1) WHERE key_id = '%s'"
                     : "UPDATE template_keys SET wrapped = substr(wrapped, 1, 40) || CASE WHEN "
                       "substr(wrapped, 41, 1) = x'00' THEN x'01' ELSE x'00' END || "
                       "substr(wrapped, 42) WHERE key_id = '%s'",
             id[1]);
    CHECK(exec_sql(url, sql), "alter a wrapped key");
    CHECK(lk_store_sync_keys(s, kr, &err) == LK_ERR_KEY && strstr(err.message, id[1]),
          "altered wrapped key refused: %s", err.message);
    lk_keyring_current_id(kr, cur);
    CHECK(!strcmp(cur, id[2]) && lk_keyring_has_key(kr, id[1]), "the ring keeps its keys");
    CHECK(lk_keyring_install(kr, NULL, 0, &err) == LK_OK, "uninstall");
    for (int i = 0; i < 3; i++)
        free(w[i]);
    free(rw);
    lk_store_close(s);
}

/* A store made by schema version 1 (the tables as version 1 created them,
 * written out here) is migrated to the current version on open, keeping its
 * rows. */
static void test_migration_v1(void)
{
    static const char *const v1_sqlite =
        "CREATE TABLE templates(template_id TEXT PRIMARY KEY NOT NULL, subject_ref TEXT NOT "
        "NULL DEFAULT '', key_id TEXT NOT NULL, model_id TEXT NOT NULL, created_ms INTEGER NOT "
        "NULL, expires_ms INTEGER NOT NULL DEFAULT 0, image_count INTEGER NOT NULL, record BLOB "
        "NOT NULL);"
        "CREATE INDEX templates_expiry ON templates(expires_ms) WHERE expires_ms > 0;"
        "CREATE TABLE api_keys(id TEXT PRIMARY KEY NOT NULL, name TEXT NOT NULL, scopes TEXT NOT "
        "NULL, hash BLOB NOT NULL CHECK (length(hash) = 32), created_ms INTEGER NOT NULL, "
        "revoked_ms INTEGER NOT NULL DEFAULT 0);"
        "CREATE TABLE audit_records(seq INTEGER PRIMARY KEY CHECK (seq > 0), time_ms INTEGER NOT "
        "NULL, operation INTEGER NOT NULL, caller TEXT NOT NULL, request_id TEXT NOT NULL, "
        "template_id TEXT NOT NULL, decision TEXT NOT NULL, score REAL, threshold REAL, model_id "
        "TEXT NOT NULL, reasons TEXT NOT NULL, status INTEGER NOT NULL, prev_hash BLOB NOT NULL "
        "CHECK (length(prev_hash) = 32), hash BLOB NOT NULL CHECK (length(hash) = 32));"
        "CREATE TABLE audit_checkpoints(seq INTEGER PRIMARY KEY REFERENCES audit_records(seq), "
        "hash BLOB NOT NULL CHECK (length(hash) = 32), public_key BLOB NOT NULL CHECK "
        "(length(public_key) = 32), signature BLOB NOT NULL CHECK (length(signature) = 64), "
        "time_ms INTEGER NOT NULL);"
        "PRAGMA application_id = 1280003667;"
        "PRAGMA user_version = 1;"
        "INSERT INTO templates VALUES('0123456789abcdef0123456789abcdef', 's', 'tk', "
        "'0123456789abcdef0123456789abcdef', 1, 0, 1, x'00');";
    static const char *const v1_pg =
        "CREATE TABLE likeness_schema(singleton BOOLEAN PRIMARY KEY DEFAULT TRUE CHECK "
        "(singleton), application TEXT NOT NULL, version INTEGER NOT NULL);"
        "INSERT INTO likeness_schema(application, version) VALUES ('likeness', 1);"
        "CREATE TABLE templates(template_id TEXT COLLATE \"C\" PRIMARY KEY NOT NULL, subject_ref "
        "TEXT NOT NULL DEFAULT '', key_id TEXT COLLATE \"C\" NOT NULL, model_id TEXT NOT NULL, "
        "created_ms BIGINT NOT NULL, expires_ms BIGINT NOT NULL DEFAULT 0, image_count INTEGER "
        "NOT NULL, record BYTEA NOT NULL);"
        "CREATE INDEX templates_expiry ON templates(expires_ms) WHERE expires_ms > 0;"
        "CREATE TABLE api_keys(id TEXT COLLATE \"C\" PRIMARY KEY NOT NULL, name TEXT NOT NULL, "
        "scopes TEXT NOT NULL, hash BYTEA NOT NULL CHECK (octet_length(hash) = 32), created_ms "
        "BIGINT NOT NULL, revoked_ms BIGINT NOT NULL DEFAULT 0, ord BIGINT GENERATED ALWAYS AS "
        "IDENTITY);"
        "CREATE TABLE audit_records(seq BIGINT PRIMARY KEY CHECK (seq > 0), time_ms BIGINT NOT "
        "NULL, operation INTEGER NOT NULL, caller TEXT NOT NULL, request_id TEXT NOT NULL, "
        "template_id TEXT NOT NULL, decision TEXT NOT NULL, score DOUBLE PRECISION NULL, "
        "threshold DOUBLE PRECISION NULL, model_id TEXT NOT NULL, reasons TEXT NOT NULL, status "
        "INTEGER NOT NULL, prev_hash BYTEA NOT NULL CHECK (octet_length(prev_hash) = 32), hash "
        "BYTEA NOT NULL CHECK (octet_length(hash) = 32));"
        "CREATE TABLE audit_checkpoints(seq BIGINT PRIMARY KEY REFERENCES audit_records(seq), "
        "hash BYTEA NOT NULL CHECK (octet_length(hash) = 32), public_key BYTEA NOT NULL CHECK "
        "(octet_length(public_key) = 32), signature BYTEA NOT NULL CHECK "
        "(octet_length(signature) = 64), time_ms BIGINT NOT NULL);"
        "INSERT INTO templates VALUES('0123456789abcdef0123456789abcdef', 's', 'tk', "
        "'0123456789abcdef0123456789abcdef', 1, 0, 1, '\\x00');";
    lk_error err;
    char u[700];
    CHECK(fresh("v1"), "fresh store");
    store_url(u, sizeof u, "v1");
    CHECK(exec_sql(u, pg_base ? v1_pg : v1_sqlite), "version 1 store written");
    lk_store *s = lk_store_open(u, &err);
    CHECK(s && lk_store_schema_version(s) == 2, "version 1 store migrated to 2: %s",
          s ? "" : err.message);
    klist l = {0};
    lk_template_meta m;
    CHECK(s && lk_store_template_keys_list(s, collect_wrapped, &l, &err) == LK_OK && l.n == 0,
          "template_keys exists and is empty: %s", err.message);
    CHECK(s && lk_store_template_get(s, "0123456789abcdef0123456789abcdef", 2, &m, NULL, NULL,
                                     &err) == LK_OK && !strcmp(m.key_id, "tk"),
          "the version 1 template survives the migration");
    CHECK(s && lk_store_template_keys_add(s, "d0", "tk", (const uint8_t *)"x", 1, true, &err) ==
              LK_OK, "the migrated store takes data keys: %s", err.message);
    CHECK(s && lk_store_integrity_check(s, &err) == LK_OK, "integrity: %s", err.message);
    lk_store_close(s);
    s = lk_store_open(u, &err);
    CHECK(s && lk_store_schema_version(s) == 2, "reopened at version 2");
    lk_store_close(s);
}

enum { THREADS = 12, PER_THREAD = 20 };

static void test_concurrency(const char *url, const lk_keyring *kr)
{
    lk_error err;
    lk_store *a = lk_store_open(url, &err);
    lk_store *b = lk_store_open(url, &err);
    CHECK(a && b, "two handles: %s", err.message);
    if (!a || !b) {
        lk_store_close(a);
        lk_store_close(b);
        return;
    }
    uint64_t before = lk_store_audit_head(a);
    /* Nine threads on one handle (more than PostgreSQL's pool of eight
     * connections, so some wait for one), three on the other. */
    worker w[THREADS];
    pthread_t t[THREADS];
    for (int i = 0; i < THREADS; i++) {
        w[i] = (worker){i < 9 ? a : b, kr, PER_THREAD, 0};
        pthread_create(&t[i], NULL, append_worker, &w[i]);
    }
    int failures = 0;
    for (int i = 0; i < THREADS; i++) {
        pthread_join(t[i], NULL);
        failures += w[i].failures;
    }
    const uint64_t total = THREADS * PER_THREAD;
    CHECK(failures == 0, "no failed appends");
    CHECK(lk_store_audit_head(b) == before + total, "head %llu",
          (unsigned long long)lk_store_audit_head(b));
    uint8_t pk[32];
    lk_keyring_audit_public_key(kr, pk);
    lk_audit_report rep;
    CHECK(lk_store_audit_verify(a, pk, &rep, &err) == LK_OK && rep.ok &&
              rep.records == before + total,
          "chain valid after concurrent appends: %s", rep.reason);
    CHECK(lk_store_integrity_check(b, &err) == LK_OK && lk_store_ping(a, &err) == LK_OK,
          "integrity check, ping: %s", err.message);
    lk_store_close(a);
    lk_store_close(b);
}

/* A template change and its audit record commit together or not at all. */
static void test_audited_changes(const char *url, const lk_keyring *kr)
{
    lk_error err;
    lk_store *s = lk_store_open(url, &err);
    CHECK(s != NULL, "open for audited changes: %s", err.message);
    if (!s)
        return;
    uint64_t head = lk_store_audit_head(s);
    uint64_t count = lk_store_template_count(s);
    const uint8_t rec[4] = {9, 8, 7, 6};
    char id[33];
    snprintf(id, sizeof id, "%032d", 4242);
    lk_template_meta m = meta(id, "t1", 0);
    lk_audit_record r;
    fill(&r, 1);
    lk_store_change put = {.kind = LK_CHANGE_PUT, .meta = &m, .record = rec, .len = sizeof rec};
    CHECK(lk_store_audit_append_change(s, &r, &put, kr, 0, &err) == LK_OK &&
              r.seq == head + 1 && lk_store_template_count(s) == count + 1,
          "PUT with its record: both stored (%s)", err.message);
    fill(&r, 2);
    CHECK(lk_store_audit_append_change(s, &r, &put, kr, 0, &err) == LK_ERR_INVALID_ARGUMENT &&
              lk_store_audit_head(s) == head + 1,
          "PUT of an existing id: refused, no record appended");
    lk_store_change del = {.kind = LK_CHANGE_DELETE, .template_id = id};
    fill(&r, 3);
    CHECK(lk_store_audit_append_change(s, &r, &del, kr, 0, &err) == LK_OK &&
              lk_store_audit_head(s) == head + 2 && lk_store_template_count(s) == count,
          "DELETE with its record: both done (%s)", err.message);
    fill(&r, 4);
    CHECK(lk_store_audit_append_change(s, &r, &del, kr, 0, &err) == LK_ERR_NOT_FOUND &&
              lk_store_audit_head(s) == head + 2,
          "DELETE of an absent template: not found, no record appended");
    lk_store_close(s);
}

int main(void)
{
    if (sodium_init() < 0)
        LK_SKIP("libsodium failed to initialise");
    if (!mkdtemp(dir))
        LK_SKIP("cannot create a temporary directory");
    const char *env = getenv("LIKENESS_TEST_STORE_URL");
    if (env && *env) {
        if (strncmp(env, "postgres://", 11) != 0 && strncmp(env, "postgresql://", 13) != 0) {
            fprintf(stderr, "LIKENESS_TEST_STORE_URL must be a postgres:// URL (got %s)\n", env);
            return 1;
        }
        pg_base = env;
        printf("testing the PostgreSQL store in %s (schemas lkt_%ld_*)\n", env, (long)getpid());
    }
    lk_error err;
    char keyp[512], url[700];
    snprintf(keyp, sizeof keyp, "%s/keys", dir);
    CHECK(lk_keyring_create(keyp, &err) == LK_OK, "key file: %s", err.message);
    lk_keyring *kr = lk_keyring_load(keyp, &err);
    CHECK(kr != NULL, "load keys: %s", err.message);
    if (!kr)
        return lk_test_done();

    CHECK(fresh("main"), "fresh store");
    store_url(url, sizeof url, "main");
    lk_store *s = lk_store_open(url, &err);
    CHECK(s != NULL, "open: %s", err.message);
    if (s) {
        if (!pg_base) {
            struct stat st;
            const char *file = url + strlen("sqlite:");
            CHECK(stat(file, &st) == 0 && (st.st_mode & 077) == 0,
                  "database file mode 0600 (%o)", st.st_mode & 0777);
        }
        CHECK(lk_store_schema_version(s) == 2 && LK_STORE_SCHEMA_VERSION == 2,
              "schema version 2");
        CHECK(lk_store_integrity_check(s, &err) == LK_OK, "integrity check: %s", err.message);
        test_templates(s);
        test_apikeys(s);
        test_audit(s, kr);
        lk_store_close(s);
        /* Reopening an existing store migrates nothing and keeps the data. */
        s = lk_store_open(url, &err);
        CHECK(s && lk_store_template_count(s) == 3 && lk_store_audit_head(s) == 25,
              "reopened: %s", err.message);
        lk_store_close(s);
        test_audited_changes(url, kr);
        test_concurrency(url, kr);
        test_tamper_sql(url, kr);
        test_template_keys(url, kr);
        if (pg_base) {
            /* A store whose table was dropped fails the integrity check. */
            CHECK(exec_sql(url, "DROP TABLE api_keys"), "drop a table");
            s = lk_store_open(url, &err);
            CHECK(s && lk_store_integrity_check(s, &err) == LK_ERR_STORE &&
                      strstr(err.message, "api_keys"),
                  "missing table found: %s", err.message);
            lk_store_close(s);
        }
    }
    test_versions();
    test_migration_v1();
    lk_keyring_free(kr);

    if (pg_base) {
        const char *names[] = {"main", "newer", "other", "v1"};
        for (size_t i = 0; i < 4; i++)
            if (!pg_schema(names[i], false))
                fprintf(stderr, "note: could not drop schema lkt_%ld_%s\n", (long)getpid(),
                        names[i]);
    }
    char cmd[600];
    snprintf(cmd, sizeof cmd, "rm -rf '%s'", dir);
    if (system(cmd) != 0)
        fprintf(stderr, "note: could not remove %s\n", dir);
    return lk_test_done();
}
