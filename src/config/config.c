/* The service's INI configuration: defaults, the file, then environment
 * overrides, then validation. Table-driven so the file, the environment and
 * the printed effective configuration name exactly the same keys. */
#include "likeness/config.h"

#include <ctype.h>
#include <errno.h>
#include <ini.h>
#include <limits.h>
#include <math.h>
#include <stdbool.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "likeness/store.h"

typedef enum { K_STR, K_INT, K_U64, K_I64, K_DBL, K_UINT, K_PATH } kind;

typedef struct key_def {
    const char *section;
    const char *name;
    kind type;
    size_t offset;
    size_t size; /* of the string buffer */
    double lo, hi; /* numeric range, inclusive */
} key_def;

#define STR(sec, nm, field, t) {sec, nm, t, offsetof(lk_config, field), sizeof(((lk_config *)0)->field), 0, 0}
#define NUM(sec, nm, field, t, lo, hi) {sec, nm, t, offsetof(lk_config, field), 0, lo, hi}

static const key_def keys[] = {
    STR("server", "listen", listen, K_STR),
    NUM("server", "port", port, K_INT, 1, 65535),
    STR("server", "cert_file", cert_file, K_PATH),
    STR("server", "key_file", key_file, K_PATH),
    STR("server", "client_ca_file", client_ca_file, K_PATH),
    STR("server", "tls_priorities", tls_priorities, K_STR),
    NUM("server", "workers", workers, K_INT, 0, 256),
    NUM("server", "queue_depth", queue_depth, K_INT, 1, 100000),
    NUM("server", "max_body_bytes", max_body_bytes, K_U64, 1024, 1073741824.0),
    NUM("server", "connection_timeout_s", connection_timeout_s, K_INT, 1, 3600),
    NUM("server", "per_ip_connection_limit", per_ip_connection_limit, K_INT, 0, 100000),
    NUM("server", "max_connections", max_connections, K_INT, 1, 100000),
    NUM("server", "drain_timeout_s", drain_timeout_s, K_INT, 0, 3600),
    STR("model", "file", model_file, K_PATH),
    NUM("model", "target_fmr", target_fmr, K_DBL, 0, 0.999999),
    STR("store", "url", store_url, K_STR),
    STR("keys", "file", key_file_path, K_PATH),
    NUM("limits", "rate_per_second", rate_per_second, K_DBL, 0.001, 1e9),
    NUM("limits", "burst", burst, K_DBL, 1, 1e9),
    NUM("templates", "default_ttl_s", default_ttl_s, K_I64, 0, 1e11),
    NUM("templates", "max_ttl_s", max_ttl_s, K_I64, 0, 1e11),
    NUM("templates", "purge_interval_s", purge_interval_s, K_INT, 1, 86400),
    NUM("audit", "checkpoint_interval", checkpoint_interval, K_UINT, 1, 1e9),
};
#define NKEYS (sizeof keys / sizeof keys[0])

void lk_config_default(lk_config *c)
{
    memset(c, 0, sizeof *c);
    snprintf(c->listen, sizeof c->listen, "127.0.0.1");
    c->port = 8443;
    snprintf(c->tls_priorities, sizeof c->tls_priorities, "%s", LK_CONFIG_TLS_PRIORITIES);
    c->queue_depth = 64;
    c->max_body_bytes = 16u << 20;
    c->connection_timeout_s = 30;
    c->per_ip_connection_limit = 32;
    c->max_connections = 512;
    c->drain_timeout_s = 30;
    snprintf(c->model_file, sizeof c->model_file, "%s", LIKENESS_DEFAULT_MODEL);
    c->rate_per_second = 20;
    c->burst = 40;
    c->purge_interval_s = 60;
    c->checkpoint_interval = 100;
}

typedef struct parse_ctx {
    lk_config *c;
    char dir[LK_CONFIG_PATH_MAX]; /* directory of the file, for relative paths */
    const char *origin;           /* "file X" or "environment variable Y" */
    lk_error *err;
    int failed;
} parse_ctx;

static int resolve_path(const parse_ctx *p, const char *value, char *out, size_t cap)
{
    int n;
    if (value[0] == '/' || value[0] == '\0' || p->dir[0] == '\0')
        n = snprintf(out, cap, "%s", value);
    else
        n = snprintf(out, cap, "%s/%s", p->dir, value);
    return n >= 0 && (size_t)n < cap;
}

static lk_code set_key(parse_ctx *p, const key_def *k, const char *value)
{
    char *base = (char *)p->c;
    void *field = base + k->offset;
    /* libinih reads lines of at most 198 characters; the default priority
     * string is longer, so it has a short name. */
    if (!strcmp(k->name, "tls_priorities") && !strcmp(value, "default"))
        value = LK_CONFIG_TLS_PRIORITIES;
    /* ';' starts an inline comment in this format (libinih) wherever a blank
     * precedes it, so a value holding one would not survive being printed
     * and read again: refuse it. */
    if (strchr(value, ';'))
        return lk_error_set(p->err, LK_ERR_CONFIG,
                            "%s: [%s] %s may not contain ';' (it starts a comment)", p->origin,
                            k->section, k->name);
    if (k->type == K_STR || k->type == K_PATH) {
        int ok = k->type == K_PATH ? resolve_path(p, value, field, k->size)
                                   : snprintf(field, k->size, "%s", value) < (int)k->size;
        if (!ok)
            return lk_error_set(p->err, LK_ERR_CONFIG, "%s: [%s] %s is longer than %zu bytes",
                                p->origin, k->section, k->name, k->size - 1);
        return LK_OK;
    }
    char *end = NULL;
    errno = 0;
    double v = strtod(value, &end);
    while (end && isspace((unsigned char)*end))
        end++;
    if (errno || end == value || *end || !isfinite(v) || v < k->lo || v > k->hi ||
        (k->type != K_DBL && v != floor(v)))
        return lk_error_set(p->err, LK_ERR_CONFIG,
                            "%s: [%s] %s = '%s' is not %s between %g and %g", p->origin,
                            k->section, k->name, value,
                            k->type == K_DBL ? "a number" : "an integer", k->lo, k->hi);
    switch (k->type) {
    case K_INT: *(int *)field = (int)v; break;
    case K_UINT: *(unsigned *)field = (unsigned)v; break;
    case K_U64: *(uint64_t *)field = (uint64_t)v; break;
    case K_I64: *(int64_t *)field = (int64_t)v; break;
    default: *(double *)field = v; break;
    }
    return LK_OK;
}

static lk_config_client *client_for(lk_config *c, const char *name)
{
    for (size_t i = 0; i < c->n_clients; i++)
        if (!strcmp(c->clients[i].name, name))
            return &c->clients[i];
    if (c->n_clients == LK_CONFIG_MAX_CLIENTS)
        return NULL;
    lk_config_client *cl = &c->clients[c->n_clients++];
    memset(cl, 0, sizeof *cl);
    snprintf(cl->name, sizeof cl->name, "%s", name);
    return cl;
}

static int on_entry(void *user, const char *section, const char *name, const char *value)
{
    parse_ctx *p = user;
    if (p->failed)
        return 0;
    if (!strncmp(section, "client:", 7) && section[7]) {
        lk_config_client *cl = client_for(p->c, section + 7);
        if (!cl || strlen(section + 7) >= sizeof cl->name) {
            lk_error_set(p->err, LK_ERR_CONFIG, "%s: too many [client:...] sections (at most %d) "
                         "or a name over 127 bytes", p->origin, LK_CONFIG_MAX_CLIENTS);
            return p->failed = 1, 0;
        }
        if (strchr(value, ';') || strchr(section, ';')) {
            lk_error_set(p->err, LK_ERR_CONFIG, "%s: [%s] may not contain ';' (it starts a comment)",
                         p->origin, section);
            return p->failed = 1, 0;
        }
        if (!strcmp(name, "subject")) {
            if ((size_t)snprintf(cl->subject, sizeof cl->subject, "%s", value) >= sizeof cl->subject) {
                lk_error_set(p->err, LK_ERR_CONFIG, "%s: [%s] subject is too long", p->origin, section);
                return p->failed = 1, 0;
            }
            return 1;
        }
        if (!strcmp(name, "scopes")) {
            lk_error e;
            if (lk_scopes_parse(value, &cl->scopes, &e) != LK_OK) {
                lk_error_set(p->err, LK_ERR_CONFIG, "%s: [%s] scopes: %s", p->origin, section, e.message);
                return p->failed = 1, 0;
            }
            return 1;
        }
        lk_error_set(p->err, LK_ERR_CONFIG, "%s: [%s] has no key '%s' (subject, scopes)",
                     p->origin, section, name);
        return p->failed = 1, 0;
    }
    for (size_t i = 0; i < NKEYS; i++)
        if (!strcmp(keys[i].section, section) && !strcmp(keys[i].name, name)) {
            if (set_key(p, &keys[i], value) != LK_OK)
                return p->failed = 1, 0;
            return 1;
        }
    lk_error_set(p->err, LK_ERR_CONFIG,
                 "%s: unknown key '%s' in section [%s]; deploy/likenessd.ini.example lists them",
                 p->origin, name, section);
    return p->failed = 1, 0;
}

static lk_code apply_environment(parse_ctx *p)
{
    char var[128], origin[160];
    for (size_t i = 0; i < NKEYS; i++) {
        int n = snprintf(var, sizeof var, "LIKENESS_%s_%s", keys[i].section, keys[i].name);
        for (int j = 0; j < n; j++)
            var[j] = (char)toupper((unsigned char)var[j]);
        const char *v = getenv(var);
        if (!v)
            continue;
        snprintf(origin, sizeof origin, "environment variable %s", var);
        p->origin = origin;
        char saved_dir[LK_CONFIG_PATH_MAX];
        memcpy(saved_dir, p->dir, sizeof saved_dir);
        p->dir[0] = '\0'; /* relative paths in the environment are relative to the cwd */
        lk_code rc = set_key(p, &keys[i], v);
        memcpy(p->dir, saved_dir, sizeof saved_dir);
        if (rc != LK_OK)
            return rc;
    }
    return LK_OK;
}

static lk_code validate(const lk_config *c, lk_error *err)
{
    if (!c->store_url[0])
        return lk_error_set(err, LK_ERR_CONFIG, "[store] url is required (e.g. sqlite:/var/lib/likeness/store.db or postgres://likeness@db.example:5432/likeness)");
    if (!c->key_file_path[0])
        return lk_error_set(err, LK_ERR_CONFIG, "[keys] file is required (create one with 'likeness keys init --key-file PATH')");
    if (c->burst < 1)
        return lk_error_set(err, LK_ERR_CONFIG, "[limits] burst must be at least 1");
    if (c->max_ttl_s && c->default_ttl_s > c->max_ttl_s)
        return lk_error_set(err, LK_ERR_CONFIG, "[templates] default_ttl_s exceeds max_ttl_s");
    for (size_t i = 0; i < c->n_clients; i++)
        if (!c->clients[i].subject[0] || !c->clients[i].scopes)
            return lk_error_set(err, LK_ERR_CONFIG, "[client:%s] needs both subject and scopes",
                                c->clients[i].name);
    if (c->n_clients && !c->client_ca_file[0])
        return lk_error_set(err, LK_ERR_CONFIG,
                            "[client:...] sections need [server] client_ca_file (mutual TLS)");
    return LK_OK;
}

lk_code lk_config_load(lk_config *c, const char *path, lk_error *err)
{
    lk_config_default(c);
    parse_ctx p = {.c = c, .err = err};
    char origin[LK_CONFIG_PATH_MAX + 16];
    if (path && *path) {
        if (strlen(path) >= sizeof c->source)
            return lk_error_set(err, LK_ERR_CONFIG, "configuration path too long");
        snprintf(c->source, sizeof c->source, "%s", path);
        const char *slash = strrchr(path, '/');
        if (slash)
            snprintf(p.dir, sizeof p.dir, "%.*s", (int)(slash - path), path);
        if (slash == path)
            snprintf(p.dir, sizeof p.dir, "/");
        snprintf(origin, sizeof origin, "%s", path);
        p.origin = origin;
        FILE *f = fopen(path, "r");
        if (!f)
            return lk_error_set(err, LK_ERR_CONFIG, "cannot read configuration %s: %s", path,
                                strerror(errno));
        /* libinih (as Debian builds it, INI_MAX_LINE 200 bytes with the
         * newline and the NUL) splits longer lines and would misread them:
         * refuse them plainly. It also reads an indented line as the
         * continuation of the previous key, replacing its value and keeping
         * a ';' comment in it; refuse those too (indented comments and blank
         * lines are fine). */
        int ch, col = 0, lineno = 1;
        bool indented = false;
        while ((ch = getc(f)) != EOF) {
            if (ch == '\n') {
                lineno++;
                col = 0;
                indented = false;
                continue;
            }
            if (++col > 198) {
                fclose(f);
                return lk_error_set(err, LK_ERR_CONFIG, "%s: line %d is longer than 198 characters",
                                    path, lineno);
            }
            if (col == 1 && (ch == ' ' || ch == '\t'))
                indented = true;
            else if (indented && ch != ' ' && ch != '\t' && ch != '\r') {
                if (ch != ';' && ch != '#') {
                    fclose(f);
                    return lk_error_set(err, LK_ERR_CONFIG,
                                        "%s: line %d is indented, which would continue the "
                                        "previous value; write each key = value on one line "
                                        "starting at the margin", path, lineno);
                }
                indented = false;
            }
        }
        rewind(f);
        int line = ini_parse_file(f, on_entry, &p);
        fclose(f);
        if (p.failed) {
            /* Prefix the line number inih reports for the failing entry. */
            if (err && line > 0) {
                char msg[LK_ERROR_MESSAGE_MAX];
                snprintf(msg, sizeof msg, "%s", err->message);
                lk_error_set(err, LK_ERR_CONFIG, "line %d: %s", line, msg);
            }
            return LK_ERR_CONFIG;
        }
        if (line != 0)
            return lk_error_set(err, LK_ERR_CONFIG, "%s: line %d is not 'key = value' or '[section]'",
                                path, line);
    }
    lk_code rc = apply_environment(&p);
    if (rc != LK_OK)
        return rc;
    return validate(c, err);
}

static void append(char **buf, size_t *len, size_t *cap, const char *fmt, ...)
    __attribute__((format(printf, 4, 5)));

#include <stdarg.h>
static void append(char **buf, size_t *len, size_t *cap, const char *fmt, ...)
{
    if (!*buf)
        return;
    for (;;) {
        va_list ap;
        va_start(ap, fmt);
        int n = vsnprintf(*buf + *len, *cap - *len, fmt, ap);
        va_end(ap);
        if (n < 0)
            return;
        if ((size_t)n < *cap - *len) {
            *len += (size_t)n;
            return;
        }
        char *nb = realloc(*buf, *cap * 2 + (size_t)n);
        if (!nb) {
            free(*buf);
            *buf = NULL;
            return;
        }
        *buf = nb;
        *cap = *cap * 2 + (size_t)n;
    }
}

char *lk_config_to_ini(const lk_config *c)
{
    size_t len = 0, cap = 4096;
    char *buf = malloc(cap);
    if (!buf)
        return NULL;
    buf[0] = '\0';
    append(&buf, &len, &cap, "# effective configuration%s%s\n", c->source[0] ? " from " : "",
           c->source);
    const char *section = "";
    const char *base = (const char *)c;
    for (size_t i = 0; i < NKEYS; i++) {
        const key_def *k = &keys[i];
        if (strcmp(section, k->section)) {
            append(&buf, &len, &cap, "%s[%s]\n", i ? "\n" : "", k->section);
            section = k->section;
        }
        const void *f = base + k->offset;
        switch (k->type) {
        case K_STR:
        case K_PATH:
            if (!strcmp(k->name, "tls_priorities") && !strcmp(f, LK_CONFIG_TLS_PRIORITIES))
                f = "default";
            append(&buf, &len, &cap, "%s = %s\n", k->name, (const char *)f);
            break;
        case K_INT: append(&buf, &len, &cap, "%s = %d\n", k->name, *(const int *)f); break;
        case K_UINT: append(&buf, &len, &cap, "%s = %u\n", k->name, *(const unsigned *)f); break;
        case K_U64:
            append(&buf, &len, &cap, "%s = %llu\n", k->name, (unsigned long long)*(const uint64_t *)f);
            break;
        case K_I64:
            append(&buf, &len, &cap, "%s = %lld\n", k->name, (long long)*(const int64_t *)f);
            break;
        case K_DBL: append(&buf, &len, &cap, "%s = %.17g\n", k->name, *(const double *)f); break;
        }
    }
    for (size_t i = 0; i < c->n_clients; i++) {
        char scopes[64];
        lk_scopes_format(c->clients[i].scopes, scopes, sizeof scopes);
        append(&buf, &len, &cap, "\n[client:%s]\nsubject = %s\nscopes = %s\n", c->clients[i].name,
               c->clients[i].subject, scopes);
    }
    return buf;
}
