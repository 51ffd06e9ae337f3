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
        CHECK(lk_store_schema_version(s) == 1, "schema version 1");
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
        test_concurrency(url, kr);
        test_tamper_sql(url, kr);
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
    lk_keyring_free(kr);

    if (pg_base) {
        const char *names[] = {"main", "newer", "other"};
        for (size_t i = 0; i < 3; i++)
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
