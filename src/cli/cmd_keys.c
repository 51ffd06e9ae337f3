/* likeness keys: the key file (init), key rotation (a new data key in the
 * store, or with --master a new key-file key, then re-sealing of every stored
 * template) and API keys (create, list, revoke). Key material is never
 * printed; an API-key token is printed once, when it is made. */
#include <errno.h>
#include <inttypes.h>
#include <pwd.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include <cjson/cJSON.h>
#include <sodium.h>

#include "cli.h"
#include "likeness/audit.h"
#include "likeness/crypto.h"
#include "likeness/store.h"
#include "svc.h"

static void usage_main(FILE *f)
{
    fprintf(f, "usage: likeness keys SUBCOMMAND [OPTIONS]\n\n"
               "  init         create the key file (template key, API-key hashing key, audit\n"
               "               signing seed); never overwrites one\n"
               "  rotate       make a new current data key in the store and re-seal every\n"
               "               stored template under it (--master: rotate the key file's key)\n"
               "  api-create   create an API key; prints its token once\n"
               "  api-list     list API keys as JSON Lines (never their hashes)\n"
               "  api-revoke   revoke an API key\n\n"
               "'likeness keys SUBCOMMAND --help' gives the options.\n");
}

static void usage_init(FILE *f)
{
    fprintf(f, "usage: likeness keys init [--config FILE | --key-file PATH]\n\n"
               "Creates the key file (docs/key-file.md) with mode 0600, refusing to overwrite\n"
               "an existing one. Prints its path and the new template key id as JSON; never\n"
               "key material. Back the file up: without it no stored template can be opened.\n\n"
               "options:\n" CLI_SVC_HELP "  -h, --help         this help\n");
}

static void usage_rotate(FILE *f)
{
    fprintf(f,
            "usage: likeness keys rotate [--config FILE | --store URL --key-file PATH]\n"
            "                            [--master] [--batch N]\n\n"
            "Makes a new random data key, stores it in the store wrapped under the key\n"
            "file's current key and makes it the store's current key (the key file is left\n"
            "as it is), then re-seals every stored template under it, in passes of up to N\n"
            "records, until none is left under another key. Every service replica sharing\n"
            "the store picks the new key up within 2 seconds, whatever copy of the key file\n"
            "it has; records that they write meanwhile under the old key are caught by a\n"
            "last pass. Each record is replaced only if no one changed it in between.\n"
            "Records that fail to open are counted, reported, audited as template_refused\n"
            "and left as they are. Progress goes to stderr; the counts are printed as JSON.\n"
            "One key_rotation audit record is appended.\n\n"
            "With --master, rotates the key file's own key instead: adds a new template key\n"
            "to the key file (older keys stay) and makes it current, wraps every data key of\n"
            "the store afresh under it, then re-seals as above (records still sealed under a\n"
            "key of the file move to the store's current data key, or to the new file key if\n"
            "the store has none). Afterwards give every replica the new key file: a replica\n"
            "whose copy lacks the new key keeps the data keys it has loaded but cannot load\n"
            "them again (e.g. after a restart). Once every replica has the new file, the old\n"
            "file key can be removed from it.\n\n"
            "Exit status: 0 when every record is under the current key, 1 if some failed.\n\n"
            "options:\n" CLI_SVC_HELP
            "  --master           rotate the key file's key (see above)\n"
            "  --batch N          records per store query (default 500)\n"
            "  -h, --help         this help\n");
}

static void usage_api_create(FILE *f)
{
    fprintf(f,
            "usage: likeness keys api-create --name NAME --scopes LIST\n"
            "                                [--config FILE | --store URL --key-file PATH]\n\n"
            "Creates an API key and prints its token on stdout, once: only its keyed hash\n"
            "is stored, so it cannot be shown again. Its id and scopes go to stderr.\n\n"
            "options:\n"
            "  --name NAME        a label for people (who or what uses the key)\n"
            "  --scopes LIST      comma-separated: verify, enrol, delete, audit\n" CLI_SVC_HELP
            "  -h, --help         this help\n");
}

static void usage_api_list(FILE *f)
{
    fprintf(f, "usage: likeness keys api-list [--config FILE | --store URL]\n\n"
               "One JSON object per line and API key, in creation order: id, name, scopes,\n"
               "created, revoked (RFC 3339 UTC times; revoked is null for an active key).\n\n"
               "options:\n" CLI_SVC_HELP "  -h, --help         this help\n");
}

static void usage_api_revoke(FILE *f)
{
    fprintf(f, "usage: likeness keys api-revoke [--config FILE | --store URL] ID\n\n"
               "Revokes the API key ID (16 hex characters, as api-list shows it): requests\n"
               "with it are refused from then on.\n\n"
               "options:\n" CLI_SVC_HELP "  -h, --help         this help\n");
}

static int64_t now_ms(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_REALTIME, &ts);
    return (int64_t)ts.tv_sec * 1000 + ts.tv_nsec / 1000000;
}

static void rfc3339(int64_t ms, char out[32])
{
    time_t t = (time_t)(ms / 1000);
    struct tm tm;
    gmtime_r(&t, &tm);
    size_t n = strftime(out, 32, "%Y-%m-%dT%H:%M:%S", &tm);
    snprintf(out + n, 32 - n, ".%03dZ", (int)(ms % 1000));
}

static void login_name(char *out, size_t cap)
{
    const char *n = getlogin();
    if (!n || !*n)
        n = getenv("LOGNAME");
    if (!n || !*n)
        n = getenv("USER");
    if (!n || !*n) {
        struct passwd *pw = getpwuid(geteuid());
        n = pw ? pw->pw_name : NULL;
    }
    if (n && *n)
        snprintf(out, cap, "cli:%s", n);
    else
        snprintf(out, cap, "cli:uid%ld", (long)geteuid());
}

static void print_json_line(cJSON *j)
{
    char *s = cJSON_PrintUnformatted(j);
    if (s)
        puts(s);
    free(s);
    cJSON_Delete(j);
}

/* Parses the options common to the subcommands: the service options,
 * --help, and the extra ones named in `extra` (each taking a value). Returns
 * -1 to go on, else an exit code. Positional arguments go to pos. */
typedef struct opts {
    cli_svc_opts svc;
    const char *name, *scopes, *batch;
    bool master;
    const char *pos[4];
    int npos;
} opts;

static int parse_opts(int argc, char **argv, opts *o, const char *extra,
                      void (*usage)(FILE *))
{
    memset(o, 0, sizeof *o);
    for (int i = 1; i < argc; i++) {
        int r = cli_svc_option(&o->svc, argc, argv, &i);
        if (r < 0)
            return CLI_USAGE;
        if (r > 0)
            continue;
        const char *a = argv[i];
        if (!strcmp(a, "-h") || !strcmp(a, "--help")) {
            usage(stdout);
            return CLI_OK;
        }
        if (!strcmp(a, "--master") && strstr(extra, "master")) {
            o->master = true;
            continue;
        }
        const char **slot = NULL;
        if (!strcmp(a, "--name") && strstr(extra, "name"))
            slot = &o->name;
        else if (!strcmp(a, "--scopes") && strstr(extra, "scopes"))
            slot = &o->scopes;
        else if (!strcmp(a, "--batch") && strstr(extra, "batch"))
            slot = &o->batch;
        if (slot) {
            if (i + 1 >= argc) {
                cli_errorf("%s needs a value", a);
                return CLI_USAGE;
            }
            *slot = argv[++i];
            continue;
        }
        if (a[0] == '-' && a[1]) {
            cli_errorf("unknown option '%s'", a);
            usage(stderr);
            return CLI_USAGE;
        }
        if (o->npos == 4) {
            cli_errorf("too many arguments");
            return CLI_USAGE;
        }
        o->pos[o->npos++] = a;
    }
    return -1;
}

static int keys_init(int argc, char **argv)
{
    opts o;
    int r = parse_opts(argc, argv, &o, "", usage_init);
    if (r >= 0)
        return r;
    if (o.npos) {
        cli_errorf("init takes no arguments; 'likeness keys init --help' shows how");
        return CLI_USAGE;
    }
    char path[LK_CONFIG_PATH_MAX];
    if (o.svc.key_file && !o.svc.config) {
        snprintf(path, sizeof path, "%s", o.svc.key_file);
    } else {
        cli_svc s;
        if (cli_svc_open(&s, &o.svc, false, false) != CLI_OK)
            return CLI_FAIL;
        snprintf(path, sizeof path, "%s", s.cfg.key_file_path);
        cli_svc_close(&s);
    }
    lk_error err;
    if (lk_keyring_create(path, &err) != LK_OK) {
        cli_error(&err);
        return CLI_FAIL;
    }
    lk_keyring *kr = lk_keyring_load(path, &err);
    if (!kr) {
        cli_error(&err);
        return CLI_FAIL;
    }
    char id[LK_KEY_ID_MAX];
    lk_keyring_current_id(kr, id);
    lk_keyring_free(kr);
    cJSON *j = cJSON_CreateObject();
    cJSON_AddStringToObject(j, "key_file", path);
    cJSON_AddStringToObject(j, "key_id", id);
    print_json_line(j);
    fprintf(stderr, "likeness: created %s (mode 0600); back it up, without it no stored "
                    "template can be opened\n", path);
    return CLI_OK;
}

/* ---- rotate ---- */

typedef struct idset {
    char (*ids)[LK_TEMPLATE_ID_HEX + 1];
    size_t n, cap;
} idset;

static bool idset_has(const idset *s, const char *id)
{
    for (size_t i = 0; i < s->n; i++)
        if (!strcmp(s->ids[i], id))
            return true;
    return false;
}

static bool idset_add(idset *s, const char *id)
{
    if (s->n == s->cap) {
        size_t cap = s->cap ? 2 * s->cap : 16;
        void *p = realloc(s->ids, cap * sizeof *s->ids);
        if (!p)
            return false;
        s->ids = p;
        s->cap = cap;
    }
    memcpy(s->ids[s->n++], id, LK_TEMPLATE_ID_HEX + 1);
    return true;
}

static void audit_refused(lk_store *st, const lk_keyring *kr, unsigned interval,
                          const char *caller, const char *tid, lk_code code)
{
    lk_audit_record rec;
    lk_audit_record_init(&rec, LK_AUDIT_TEMPLATE_REFUSED);
    snprintf(rec.caller, sizeof rec.caller, "%s", caller);
    snprintf(rec.template_id, sizeof rec.template_id, "%s", tid);
    snprintf(rec.decision, sizeof rec.decision, "refused");
    snprintf(rec.reasons, sizeof rec.reasons, "%s", lk_code_name(code));
    lk_error err;
    if (lk_store_audit_append(st, &rec, kr, interval, &err) != LK_OK)
        cli_error(&err);
}

/* The data keys' ids and KEK ids, for re-wrapping. */
typedef struct kek_list {
    char (*ids)[2][LK_KEY_ID_MAX];
    size_t n, cap;
    bool nomem;
} kek_list;

static bool collect_kek(const lk_wrapped_key *k, void *ctx)
{
    kek_list *l = ctx;
    if (l->n == l->cap) {
        size_t cap = l->cap ? 2 * l->cap : 8;
        void *p = realloc(l->ids, cap * sizeof *l->ids);
        if (!p) {
            l->nomem = true;
            return false;
        }
        l->ids = p;
        l->cap = cap;
    }
    memcpy(l->ids[l->n][0], k->key_id, LK_KEY_ID_MAX);
    memcpy(l->ids[l->n][1], k->kek_id, LK_KEY_ID_MAX);
    l->n++;
    return true;
}

/* --master: wraps every data key not yet under the file's current key
 * afresh under it; *count gets how many were. */
static lk_code rewrap_all(cli_svc *s, uint64_t *count, lk_error *err)
{
    *count = 0;
    char kek[LK_KEY_ID_MAX];
    lk_keyring_file_current_id(s->keys, kek);
    kek_list l = {0};
    lk_code c = lk_store_template_keys_list(s->store, collect_kek, &l, err);
    if (c == LK_OK && l.nomem)
        c = lk_error_set(err, LK_ERR_NOMEM, "out of memory listing the data keys");
    for (size_t i = 0; c == LK_OK && i < l.n; i++) {
        if (!strcmp(l.ids[i][1], kek))
            continue;
        uint8_t *w = NULL;
        size_t wlen = 0;
        char got[LK_KEY_ID_MAX];
        c = lk_keyring_rewrap_key(s->keys, l.ids[i][0], got, &w, &wlen, err);
        bool replaced = false;
        if (c == LK_OK)
            c = lk_store_template_keys_rewrap(s->store, l.ids[i][0], l.ids[i][1], got, w, wlen,
                                              &replaced, err);
        free(w);
        if (c == LK_OK && !replaced)
            c = lk_error_set(err, LK_ERR_BUSY, "data key %s was re-wrapped by someone else "
                             "meanwhile; run `likeness keys rotate --master` again",
                             l.ids[i][0]);
        if (c == LK_OK)
            (*count)++;
    }
    free(l.ids);
    /* Load the new wrappings: this also proves that they open. */
    if (c == LK_OK)
        c = lk_store_sync_keys(s->store, s->keys, err);
    return c;
}

/* How long a running service may go on sealing under the previous key: it
 * syncs the data keys at most every 2 seconds (src/server/handlers.c), plus
 * a request's own time. The rotation re-checks the store after this. */
#define PICKUP_MS 2500

static int keys_rotate(int argc, char **argv)
{
    opts o;
    int r = parse_opts(argc, argv, &o, "batch master", usage_rotate);
    if (r >= 0)
        return r;
    if (o.npos) {
        cli_errorf("rotate takes no arguments; 'likeness keys rotate --help' shows how");
        return CLI_USAGE;
    }
    size_t batch = 500;
    if (o.batch) {
        char *end;
        errno = 0;
        unsigned long long b = strtoull(o.batch, &end, 10);
        if (errno || *end || o.batch[0] == '-' || b == 0 || b > 100000) {
            cli_errorf("--batch wants a count from 1 to 100000, not '%s'", o.batch);
            return CLI_USAGE;
        }
        batch = (size_t)b;
    }
    cli_svc s;
    if (cli_svc_open(&s, &o.svc, true, true) != CLI_OK)
        return CLI_FAIL;
    lk_error err;
    char new_id[LK_KEY_ID_MAX], old_id[LK_KEY_ID_MAX] = "", kek_id[LK_KEY_ID_MAX] = "";
    uint64_t rewrapped = 0;
    if (lk_store_sync_keys(s.store, s.keys, &err) != LK_OK) {
        cli_error(&err);
        cli_svc_close(&s);
        return CLI_FAIL;
    }
    lk_keyring_current_id(s.keys, old_id);
    if (o.master) {
        if (lk_keyring_rotate_file(s.cfg.key_file_path, new_id, &err) != LK_OK ||
            lk_keyring_refresh(s.keys, NULL, &err) != LK_OK) {
            cli_error(&err);
            cli_svc_close(&s);
            return CLI_FAIL;
        }
        fprintf(stderr, "likeness: key file %s: new current key %s\n", s.cfg.key_file_path,
                new_id);
        lk_code c = rewrap_all(&s, &rewrapped, &err);
        if (c != LK_OK) {
            cli_error(&err);
            cli_svc_close(&s);
            return CLI_FAIL;
        }
        fprintf(stderr, "likeness: %" PRIu64 " data key(s) wrapped again under %s\n", rewrapped,
                new_id);
        lk_keyring_file_current_id(s.keys, kek_id);
    } else {
        uint8_t *w = NULL;
        size_t wlen = 0;
        lk_code c = lk_keyring_wrap_new_key(s.keys, new_id, kek_id, &w, &wlen, &err);
        if (c == LK_OK)
            c = lk_store_template_keys_add(s.store, new_id, kek_id, w, wlen, true, &err);
        free(w);
        if (c == LK_OK)
            c = lk_store_sync_keys(s.store, s.keys, &err);
        if (c != LK_OK) {
            cli_error(&err);
            cli_svc_close(&s);
            return CLI_FAIL;
        }
        fprintf(stderr, "likeness: new data key %s (wrapped under %s of the key file) is "
                        "current in the store\n", new_id, kek_id);
    }
    int64_t t_current = now_ms();
    char cur[LK_KEY_ID_MAX];
    lk_keyring_current_id(s.keys, cur);
    if (!o.master && strcmp(cur, new_id) != 0) /* another rotation finished in between */
        fprintf(stderr, "likeness: another rotation made %s current meanwhile; re-sealing "
                        "under it\n", cur);
    char caller[LK_AUDIT_TEXT_MAX];
    login_name(caller, sizeof caller);

    char(*ids)[LK_TEMPLATE_ID_HEX + 1] = malloc(batch * sizeof *ids);
    idset failed = {0}, gone = {0};
    uint64_t resealed = 0, n_failed = 0, raced = 0;
    unsigned passes = 0;
    bool graced = false;
    int rc = CLI_OK;
    if (!ids) {
        cli_errorf("out of memory");
        rc = CLI_FAIL;
    }
    /* Passes until one re-seals nothing and loses no race: records written
     * meanwhile under an older key by a running service are then caught. */
    for (bool again = ids != NULL; again && rc == CLI_OK;) {
        again = false;
        passes++;
        uint64_t pass_done = 0, pass_raced = 0;
        char after[LK_TEMPLATE_ID_HEX + 1] = "";
        for (;;) {
            size_t n = 0;
            if (lk_store_template_ids_not_under_key(s.store, cur, after, ids, batch, &n, &err) !=
                LK_OK) {
                cli_error(&err);
                rc = CLI_FAIL;
                break;
            }
            for (size_t i = 0; i < n; i++) {
                const char *tid = ids[i];
                if (idset_has(&failed, tid) || idset_has(&gone, tid))
                    continue;
                lk_template_meta meta;
                uint8_t *rec = NULL, *out = NULL;
                size_t len = 0, olen = 0;
                lk_code c = lk_store_template_get(s.store, tid, now_ms(), &meta, &rec, &len, &err);
                if (c == LK_ERR_NOT_FOUND) { /* deleted meanwhile, or expired */
                    idset_add(&gone, tid);
                    continue;
                }
                if (c != LK_OK) {
                    cli_error(&err);
                    rc = CLI_FAIL;
                    break;
                }
                char nid[LK_KEY_ID_MAX];
                c = lk_template_reseal(s.keys, tid, rec, len, &out, &olen, nid, &err);
                free(rec);
                if (c != LK_OK) {
                    fprintf(stderr, "likeness: template %s: %s: %s; left as it is\n", tid,
                            lk_code_name(c), err.message);
                    n_failed++;
                    idset_add(&failed, tid);
                    audit_refused(s.store, s.keys, s.cfg.checkpoint_interval, caller, tid, c);
                    continue;
                }
                bool replaced = false;
                c = lk_store_template_rekey(s.store, tid, meta.key_id, nid, out, olen, &replaced,
                                            &err);
                free(out);
                if (c != LK_OK) {
                    cli_error(&err);
                    rc = CLI_FAIL;
                    break;
                }
                if (replaced) {
                    resealed++;
                    pass_done++;
                } else {
                    raced++; /* changed meanwhile: the next pass sees its new state */
                    pass_raced++;
                }
            }
            if (rc != CLI_OK || n < batch)
                break;
            memcpy(after, ids[n - 1], sizeof after);
        }
        fprintf(stderr, "likeness: pass %u: %" PRIu64 " re-sealed, %" PRIu64 " changed "
                        "meanwhile, %" PRIu64 " failed so far\n",
                passes, pass_done, pass_raced, n_failed);
        again = pass_done > 0 || pass_raced > 0;
        if (!again && !graced) {
            /* Replicas may still seal under the previous key until they
             * sync: wait that long, then look once more. */
            graced = true;
            int64_t wait = t_current + PICKUP_MS - now_ms();
            if (wait > 0) {
                struct timespec ts = {(time_t)(wait / 1000), (long)(wait % 1000) * 1000000L};
                nanosleep(&ts, NULL);
                again = true;
            }
        }
        if (again && passes >= 1000) {
            cli_errorf("records keep changing under the old key after %u passes; stopping "
                       "(run `likeness keys rotate` again later)", passes);
            rc = CLI_FAIL;
        }
    }
    free(ids);

    lk_audit_record rec;
    lk_audit_record_init(&rec, LK_AUDIT_KEY_ROTATION);
    snprintf(rec.caller, sizeof rec.caller, "%s", caller);
    snprintf(rec.decision, sizeof rec.decision, "ok");
    bool audited = lk_store_audit_append(s.store, &rec, s.keys, s.cfg.checkpoint_interval,
                                         &err) == LK_OK;
    if (!audited) {
        cli_error(&err);
        rc = CLI_FAIL;
    }
    cJSON *j = cJSON_CreateObject();
    cJSON_AddStringToObject(j, "previous_key_id", old_id);
    cJSON_AddStringToObject(j, "key_id", cur);
    cJSON_AddStringToObject(j, "kek_id", kek_id);
    if (o.master) {
        cJSON_AddStringToObject(j, "master_key_id", new_id);
        cJSON_AddNumberToObject(j, "rewrapped", (double)rewrapped);
    }
    cJSON_AddNumberToObject(j, "resealed", (double)resealed);
    cJSON_AddNumberToObject(j, "failed", (double)n_failed);
    cJSON_AddNumberToObject(j, "gone", (double)gone.n);
    cJSON_AddNumberToObject(j, "changed_meanwhile", (double)raced);
    cJSON_AddNumberToObject(j, "passes", passes);
    if (audited)
        cJSON_AddNumberToObject(j, "audit_seq", (double)rec.seq);
    if (failed.n) {
        cJSON *fa = cJSON_AddArrayToObject(j, "failed_template_ids");
        for (size_t i = 0; i < failed.n; i++)
            cJSON_AddItemToArray(fa, cJSON_CreateString(failed.ids[i]));
    }
    print_json_line(j);
    if (n_failed && rc == CLI_OK)
        rc = CLI_FAIL;
    free(failed.ids);
    free(gone.ids);
    cli_svc_close(&s);
    return rc;
}

/* ---- API keys ---- */

static int api_create(int argc, char **argv)
{
    opts o;
    int r = parse_opts(argc, argv, &o, "name scopes", usage_api_create);
    if (r >= 0)
        return r;
    if (o.npos || !o.name || !o.scopes) {
        cli_errorf("api-create needs --name NAME and --scopes LIST; 'likeness keys api-create "
                   "--help' shows how");
        return CLI_USAGE;
    }
    lk_error err;
    unsigned scopes = 0;
    if (lk_scopes_parse(o.scopes, &scopes, &err) != LK_OK) {
        cli_error(&err);
        return CLI_USAGE;
    }
    if (!*o.name || strlen(o.name) >= LK_AUDIT_TEXT_MAX) {
        cli_errorf("--name must be 1 to %d bytes", LK_AUDIT_TEXT_MAX - 1);
        return CLI_USAGE;
    }
    cli_svc s;
    if (cli_svc_open(&s, &o.svc, true, true) != CLI_OK)
        return CLI_FAIL;
    char token[LK_APIKEY_TOKEN_MAX];
    lk_apikey_meta k;
    memset(&k, 0, sizeof k);
    int rc = CLI_FAIL;
    if (lk_apikey_generate(s.keys, token, k.id, k.hash, &err) == LK_OK) {
        snprintf(k.name, sizeof k.name, "%s", o.name);
        k.scopes = scopes;
        k.created_ms = now_ms();
        if (lk_store_apikey_put(s.store, &k, &err) == LK_OK) {
            char list[128];
            lk_scopes_format(scopes, list, sizeof list);
            puts(token);
            fflush(stdout);
            fprintf(stderr, "likeness: API key %s (%s) created with scopes %s.\n"
                            "likeness: the token above is shown this once; store it now.\n",
                    k.id, k.name, list);
            rc = CLI_OK;
        }
    }
    if (rc != CLI_OK)
        cli_error(&err);
    sodium_memzero(token, sizeof token);
    cli_svc_close(&s);
    return rc;
}

static bool list_one(const lk_apikey_meta *k, void *ctx)
{
    (void)ctx;
    cJSON *j = cJSON_CreateObject();
    cJSON_AddStringToObject(j, "id", k->id);
    cJSON_AddStringToObject(j, "name", k->name);
    cJSON *sc = cJSON_AddArrayToObject(j, "scopes");
    static const struct {
        unsigned bit;
        const char *name;
    } names[] = {{LK_SCOPE_VERIFY, "verify"}, {LK_SCOPE_ENROL, "enrol"},
                 {LK_SCOPE_DELETE, "delete"}, {LK_SCOPE_AUDIT, "audit"}};
    for (size_t i = 0; i < sizeof names / sizeof names[0]; i++)
        if (k->scopes & names[i].bit)
            cJSON_AddItemToArray(sc, cJSON_CreateString(names[i].name));
    char t[32];
    rfc3339(k->created_ms, t);
    cJSON_AddStringToObject(j, "created", t);
    if (k->revoked_ms) {
        rfc3339(k->revoked_ms, t);
        cJSON_AddStringToObject(j, "revoked", t);
    } else {
        cJSON_AddNullToObject(j, "revoked");
    }
    print_json_line(j);
    return true;
}

static int api_list(int argc, char **argv)
{
    opts o;
    int r = parse_opts(argc, argv, &o, "", usage_api_list);
    if (r >= 0)
        return r;
    if (o.npos) {
        cli_errorf("api-list takes no arguments");
        return CLI_USAGE;
    }
    cli_svc s;
    if (cli_svc_open(&s, &o.svc, true, false) != CLI_OK)
        return CLI_FAIL;
    lk_error err;
    int rc = CLI_OK;
    if (lk_store_apikey_list(s.store, list_one, NULL, &err) != LK_OK) {
        cli_error(&err);
        rc = CLI_FAIL;
    }
    cli_svc_close(&s);
    return rc;
}

static int api_revoke(int argc, char **argv)
{
    opts o;
    int r = parse_opts(argc, argv, &o, "", usage_api_revoke);
    if (r >= 0)
        return r;
    if (o.npos != 1) {
        cli_errorf("api-revoke takes one API key id; 'likeness keys api-revoke --help' shows how");
        return CLI_USAGE;
    }
    const char *id = o.pos[0];
    cli_svc s;
    if (cli_svc_open(&s, &o.svc, true, false) != CLI_OK)
        return CLI_FAIL;
    lk_error err;
    int64_t t = now_ms();
    int rc = CLI_OK;
    if (lk_store_apikey_revoke(s.store, id, t, &err) != LK_OK) {
        cli_error(&err);
        rc = CLI_FAIL;
    } else {
        char ts[32];
        rfc3339(t, ts);
        cJSON *j = cJSON_CreateObject();
        cJSON_AddStringToObject(j, "id", id);
        cJSON_AddStringToObject(j, "revoked", ts);
        print_json_line(j);
    }
    cli_svc_close(&s);
    return rc;
}

int cmd_keys(int argc, char **argv)
{
    static const struct {
        const char *name;
        int (*run)(int, char **);
    } subs[] = {{"init", keys_init},         {"rotate", keys_rotate},
                {"api-create", api_create},  {"api-list", api_list},
                {"api-revoke", api_revoke}};
    if (argc < 2) {
        usage_main(stderr);
        return CLI_USAGE;
    }
    if (!strcmp(argv[1], "-h") || !strcmp(argv[1], "--help")) {
        usage_main(stdout);
        return CLI_OK;
    }
    for (size_t i = 0; i < sizeof subs / sizeof subs[0]; i++)
        if (!strcmp(argv[1], subs[i].name))
            return subs[i].run(argc - 1, argv + 1);
    cli_errorf("unknown subcommand 'keys %s'; 'likeness keys --help' lists them", argv[1]);
    return CLI_USAGE;
}
