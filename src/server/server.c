/* The HTTPS front: libmicrohttpd with its GnuTLS backend, one polling thread
 * reading requests, a bounded worker pool doing the work (handlers.c), the
 * connection suspended meanwhile. */
#include <ctype.h>
#include <errno.h>
#include <fcntl.h>
#include <gnutls/gnutls.h>
#include <gnutls/x509.h>
#include <microhttpd.h>
#include <poll.h>
#include <signal.h>
#include <stdatomic.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>
#include <unistd.h>
#include <stdarg.h>

#include "handlers.h"

void srv_log(const char *fmt, ...)
{
    char ts[32], line[1024];
    srv_rfc3339_ms(srv_unix_ms(), ts);
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(line, sizeof line, fmt, ap);
    va_end(ap);
    fprintf(stderr, "%s likenessd: %s\n", ts, line);
}

/* ---- routing ---- */

static int route_of(const char *url, char id[72])
{
    id[0] = '\0';
    if (!strcmp(url, "/healthz"))
        return RT_HEALTHZ;
    if (!strcmp(url, "/readyz"))
        return RT_READYZ;
    if (!strcmp(url, "/metrics"))
        return RT_METRICS;
    if (!strcmp(url, "/v1/verifications"))
        return RT_VERIFY;
    if (!strcmp(url, "/v1/templates"))
        return RT_TEMPLATES;
    if (!strcmp(url, "/v1/model"))
        return RT_MODEL;
    if (!strcmp(url, "/v1/audit/records"))
        return RT_AUDIT;
    if (!strncmp(url, "/v1/templates/", 14)) {
        snprintf(id, 72, "%s", url + 14);
        return RT_TEMPLATE;
    }
    if (!strncmp(url, "/problems/", 10)) {
        snprintf(id, 72, "%s", url + 10);
        return RT_PROBLEM;
    }
    return RT_NONE;
}

static const char *allowed_methods(int route)
{
    switch (route) {
    case RT_VERIFY: return "POST";
    case RT_TEMPLATES: return "POST";
    case RT_TEMPLATE: return "GET, DELETE";
    default: return "GET";
    }
}

static bool method_allowed(int route, const char *m)
{
    const char *a = allowed_methods(route);
    if (!strcmp(m, "HEAD") && strstr(a, "GET") && route != RT_TEMPLATE)
        return true;
    size_t n = strlen(m);
    for (const char *p = a; (p = strstr(p, m)); p += n)
        if ((p == a || p[-1] == ' ') && (p[n] == '\0' || p[n] == ','))
            return true;
    return false;
}

/* ---- responses ---- */

static enum MHD_Result send_reply(struct MHD_Connection *conn, srv_request *r)
{
    srv_reply *o = &r->out;
    struct MHD_Response *resp = MHD_create_response_from_buffer(
        o->len, o->body ? o->body : (void *)"", o->body ? MHD_RESPMEM_MUST_FREE : MHD_RESPMEM_PERSISTENT);
    if (!resp)
        return MHD_NO;
    o->body = NULL; /* now owned by the response */
    if (o->content_type[0])
        MHD_add_response_header(resp, MHD_HTTP_HEADER_CONTENT_TYPE, o->content_type);
    MHD_add_response_header(resp, "X-Request-Id", r->request_id);
    MHD_add_response_header(resp, "Cache-Control", "no-store");
    MHD_add_response_header(resp, "X-Content-Type-Options", "nosniff");
    /* One year, the common practice for HSTS max-age (RFC 6797 section 6.1.1). */
    MHD_add_response_header(resp, "Strict-Transport-Security", "max-age=31536000");
    for (int i = 0; i < o->n_headers; i++)
        MHD_add_response_header(resp, o->headers[i][0], o->headers[i][1]);
    if (o->close || atomic_load(&r->srv->draining))
        MHD_add_response_header(resp, MHD_HTTP_HEADER_CONNECTION, "close");
    r->status = o->status;
    enum MHD_Result ret = MHD_queue_response(conn, (unsigned)o->status, resp);
    MHD_destroy_response(resp);
    r->replied = true;
    return ret;
}

/* ---- authentication at header time ---- */

static void client_identity(srv_request *r, struct MHD_Connection *conn)
{
    lk_server *s = r->srv;
    if (!s->cfg.client_ca_file[0])
        return;
    const union MHD_ConnectionInfo *ci =
        MHD_get_connection_info(conn, MHD_CONNECTION_INFO_GNUTLS_SESSION);
    if (!ci || !ci->tls_session)
        return;
    gnutls_session_t tls = (gnutls_session_t)ci->tls_session;
    unsigned int n = 0;
    const gnutls_datum_t *certs = gnutls_certificate_get_peers(tls, &n);
    if (!certs || n == 0)
        return;
    unsigned int status = 0;
    /* The chain must verify against the configured client CA bundle. */
    if (gnutls_certificate_verify_peers2(tls, &status) != GNUTLS_E_SUCCESS || status != 0) {
        snprintf(r->cert_subject, sizeof r->cert_subject, "(unverified client certificate)");
        return;
    }
    srv_der_subject(certs[0].data, certs[0].size, r->cert_subject, sizeof r->cert_subject);
}

static void authenticate(srv_request *r, struct MHD_Connection *conn)
{
    lk_server *s = r->srv;
    const char *auth = MHD_lookup_connection_value(conn, MHD_HEADER_KIND, MHD_HTTP_HEADER_AUTHORIZATION);
    client_identity(r, conn);
    if (auth) {
        if (strncasecmp(auth, "Bearer ", 7)) {
            r->auth_failure = "unsupported_scheme";
            return;
        }
        const char *token = auth + 7;
        while (*token == ' ')
            token++;
        srv_auth_token(s, token, r);
        return;
    }
    if (r->cert_subject[0]) {
        for (size_t i = 0; i < s->cfg.n_clients; i++)
            if (!strcmp(s->cfg.clients[i].subject, r->cert_subject)) {
                snprintf(r->caller, sizeof r->caller, "mtls:%.240s", r->cert_subject);
                r->scopes = s->cfg.clients[i].scopes;
                r->authenticated = true;
                return;
            }
        r->auth_failure = "unmapped_certificate";
        snprintf(r->caller, sizeof r->caller, "cert:%.200s", r->cert_subject);
        return;
    }
    r->auth_failure = "missing_credentials";
}

static unsigned scope_needed(int route, const char *method)
{
    switch (route) {
    case RT_VERIFY: return LK_SCOPE_VERIFY;
    case RT_TEMPLATES: return LK_SCOPE_ENROL;
    case RT_TEMPLATE: return strcmp(method, "DELETE") ? LK_SCOPE_ENROL : LK_SCOPE_DELETE;
    case RT_AUDIT: return LK_SCOPE_AUDIT;
    default: return 0; /* any authenticated caller */
    }
}

static bool valid_request_id(const char *v)
{
    size_t n = strlen(v);
    if (n < 1 || n > 64)
        return false;
    for (size_t i = 0; i < n; i++) {
        char c = v[i];
        if (!((c >= 'A' && c <= 'Z') || (c >= 'a' && c <= 'z') || (c >= '0' && c <= '9') ||
              c == '.' || c == '_' || c == '-'))
            return false;
    }
    return true;
}

static void on_completed(void *cls, struct MHD_Connection *conn, void **con_cls,
                         enum MHD_RequestTerminationCode toe)
{
    (void)conn;
    lk_server *s = cls;
    srv_request *r = *con_cls;
    if (!r)
        return;
    double dt = srv_now() - r->t0;
    int status = r->replied ? r->status : 0;
    srv_metrics_request(s->metrics, r->route, r->method, status, dt);
    /* Access log: never bodies, images or features. */
    srv_log("%s %s %s %d %.1fms caller=%s%s", r->request_id, r->method, srv_route_label(r->route),
          status, dt * 1e3, r->caller[0] ? r->caller : "-",
          toe == MHD_REQUEST_TERMINATED_COMPLETED_OK ? "" : " (connection ended early)");
    srv_request_free(r);
    *con_cls = NULL;
}

static void job_done(srv_request *r)
{
    /* Called on a worker thread: wake the connection; the access handler
     * then queues r->out. */
    lk_server *s = r->srv; /* r may be freed as soon as the connection resumes */
    atomic_store(&r->done, true);
    MHD_resume_connection(r->conn);
    atomic_fetch_sub(&s->inflight, 1);
}

static void run_job(void *job, void *state)
{
    srv_request *r = job;
    srv_handle(r->srv, r, state);
    job_done(r);
}

static enum MHD_Result dispatch(lk_server *s, srv_request *r, struct MHD_Connection *conn)
{
    atomic_fetch_add(&s->inflight, 1);
    MHD_suspend_connection(conn);
    if (!srv_pool_submit(s->pool, r)) {
        MHD_resume_connection(conn);
        atomic_fetch_sub(&s->inflight, 1);
        srv_problem(r, "overloaded", "all workers are busy and the queue is full; retry shortly");
        return send_reply(conn, r);
    }
    return MHD_YES;
}

static enum MHD_Result on_request(void *cls, struct MHD_Connection *conn, const char *url,
                                  const char *method, const char *version,
                                  const char *upload_data, size_t *upload_size, void **con_cls)
{
    (void)version;
    lk_server *s = cls;
    srv_request *r = *con_cls;
    if (!r) {
        r = srv_request_new(s, conn);
        if (!r)
            return MHD_NO;
        *con_cls = r;
        snprintf(r->method, sizeof r->method, "%.15s", method);
        const char *rid = MHD_lookup_connection_value(conn, MHD_HEADER_KIND, "X-Request-Id");
        if (rid && valid_request_id(rid))
            snprintf(r->request_id, sizeof r->request_id, "%s", rid);
        r->route = route_of(url, r->path_arg);
        /* The path is echoed in problem documents (instance): keep it valid
         * UTF-8 and printable there. */
        snprintf(r->path, sizeof r->path, "%.255s", url);
        if (!lk_utf8_valid((const uint8_t *)r->path, strlen(r->path)))
            for (char *c = r->path; *c; c++)
                if ((unsigned char)*c >= 0x80)
                    *c = '?';
        for (char *c = r->path; *c; c++)
            if ((unsigned char)*c < 0x20 || *c == 0x7f)
                *c = '?';
        const char *ct = MHD_lookup_connection_value(conn, MHD_HEADER_KIND, MHD_HTTP_HEADER_CONTENT_TYPE);
        snprintf(r->content_type, sizeof r->content_type, "%s", ct ? ct : "");
        if (r->route == RT_AUDIT) {
            const char *a = MHD_lookup_connection_value(conn, MHD_GET_ARGUMENT_KIND, "after");
            const char *l = MHD_lookup_connection_value(conn, MHD_GET_ARGUMENT_KIND, "limit");
            r->has_after = a != NULL;
            r->has_limit = l != NULL;
            snprintf(r->q_after, sizeof r->q_after, "%s", a ? a : "");
            snprintf(r->q_limit, sizeof r->q_limit, "%s", l ? l : "");
        }
        if (r->route == RT_NONE) {
            r->early = "not-found";
        } else if (!method_allowed(r->route, method)) {
            r->early = "method-not-allowed";
        } else if (r->route == RT_VERIFY || r->route == RT_TEMPLATES || r->route == RT_TEMPLATE ||
                   r->route == RT_MODEL || r->route == RT_AUDIT) {
            const char *cl = MHD_lookup_connection_value(conn, MHD_HEADER_KIND,
                                                         MHD_HTTP_HEADER_CONTENT_LENGTH);
            if (cl && strtoull(cl, NULL, 10) > s->cfg.max_body_bytes) {
                /* Refuse before reading a byte of it; the connection closes. */
                r->too_large = true;
                srv_problem(r, "payload-too-large", NULL);
                r->out.close = true;
                return send_reply(conn, r);
            }
            authenticate(r, conn);
            if (r->authenticated) {
                unsigned need = scope_needed(r->route, method);
                double retry = 0;
                if (need && !(r->scopes & need))
                    r->early = "forbidden";
                else if (!srv_limiter_take(s->limiter, r->caller, srv_now(), &retry)) {
                    r->early = "rate-limited";
                    r->retry_after = retry;
                } else if (!strcmp(method, "POST") && r->route != RT_TEMPLATE &&
                           strncasecmp(r->content_type, "multipart/form-data", 19) &&
                           strncasecmp(r->content_type, "application/json", 16))
                    r->early = "unsupported-media-type";
            }
        }
        return MHD_YES;
    }
    if (r->replied) {
        *upload_size = 0;
        return MHD_YES;
    }
    if (atomic_load(&r->done))
        return send_reply(conn, r);
    if (*upload_size) {
        size_t n = *upload_size;
        *upload_size = 0;
        /* Bodies of requests that are refused anyway are read and dropped. */
        if (r->early || r->auth_failure || r->too_large)
            return MHD_YES;
        if (r->len + n > s->cfg.max_body_bytes) {
            r->too_large = true;
            free(r->body);
            r->body = NULL;
            r->len = r->cap = 0;
            return MHD_YES;
        }
        if (r->len + n > r->cap) {
            size_t cap = r->cap ? r->cap : 65536;
            while (cap < r->len + n)
                cap *= 2;
            if (cap > s->cfg.max_body_bytes)
                cap = s->cfg.max_body_bytes;
            uint8_t *nb = realloc(r->body, cap);
            if (!nb)
                return MHD_NO;
            r->body = nb;
            r->cap = cap;
        }
        memcpy(r->body + r->len, upload_data, n);
        r->len += n;
        return MHD_YES;
    }
    /* The whole request is in. */
    if (r->too_large) {
        srv_problem(r, "payload-too-large", NULL);
        return send_reply(conn, r);
    }
    if (r->early) {
        if (!strcmp(r->early, "method-not-allowed"))
            srv_add_header(r, MHD_HTTP_HEADER_ALLOW, allowed_methods(r->route));
        srv_problem(r, r->early, NULL);
        return send_reply(conn, r);
    }
    switch (r->route) {
    case RT_HEALTHZ:
        srv_reply_json_text(r, 200, "{\"status\":\"ok\"}");
        return send_reply(conn, r);
    case RT_METRICS: {
        char *m = srv_metrics_render(s->metrics, srv_pool_queued(s->pool), srv_pool_busy(s->pool),
                                     srv_pool_workers(s->pool), lk_store_template_count(s->store),
                                     atomic_load(&s->draining));
        if (!m)
            return MHD_NO;
        srv_reply_text(r, 200, "text/plain; version=0.0.4; charset=utf-8", m);
        return send_reply(conn, r);
    }
    case RT_PROBLEM:
        srv_problem_page(r);
        return send_reply(conn, r);
    default:
        break;
    }
    if (atomic_load(&s->draining)) {
        srv_problem(r, "not-ready", "the service is shutting down; retry on another replica");
        return send_reply(conn, r);
    }
    /* Readiness, authentication failures (audited), and all API work go
     * through the pool: they touch the store. */
    return dispatch(s, r, conn);
}

/* ---- lifecycle ---- */

static void *make_state(void *arg)
{
    return srv_worker_state_new(arg);
}

static void free_state(void *st)
{
    srv_worker_state_free(st);
}

/* Percent-decoding of the path and query (RFC 3986 section 2.1), except
 * that %00 stays as it is: a decoded NUL would end the C string early, and
 * "/v1/templates/<id>%00../x" would then name <id>. Kept encoded, it makes
 * the path match nothing. */
static size_t unescape(void *cls, struct MHD_Connection *conn, char *s)
{
    (void)cls;
    (void)conn;
    char *out = s;
    const char *in = s;
    while (*in) {
        if (in[0] == '%' && isxdigit((unsigned char)in[1]) && isxdigit((unsigned char)in[2])) {
            char hex[3] = {in[1], in[2], 0};
            int v = (int)strtol(hex, NULL, 16);
            if (v != 0) {
                *out++ = (char)v;
                in += 3;
                continue;
            }
        }
        *out++ = *in++;
    }
    *out = '\0';
    return (size_t)(out - s);
}

static void mhd_log(void *cls, const char *fmt, va_list ap)
{
    (void)cls;
    char line[512];
    vsnprintf(line, sizeof line, fmt, ap);
    size_t n = strlen(line);
    while (n && (line[n - 1] == '\n' || line[n - 1] == '\r'))
        line[--n] = '\0';
    srv_log("http: %s", line);
}

lk_server *lk_server_new(const lk_config *cfg, lk_error *err)
{
    lk_server *s = calloc(1, sizeof *s);
    if (!s) {
        lk_error_set(err, LK_ERR_NOMEM, "out of memory");
        return NULL;
    }
    s->cfg = *cfg;
    s->stop_pipe[0] = s->stop_pipe[1] = -1;
    if (pipe(s->stop_pipe) || fcntl(s->stop_pipe[1], F_SETFL, O_NONBLOCK)) {
        lk_error_set(err, LK_ERR_INTERNAL, "pipe: %s", strerror(errno));
        goto fail;
    }
    if (srv_core_open(s, err) != LK_OK)
        goto fail;
    /* TLS material, checked with OpenSSL before the listener starts. */
    if (!cfg->cert_file[0] || !cfg->key_file[0]) {
        lk_error_set(err, LK_ERR_CONFIG, "[server] cert_file and key_file are required (HTTPS only); "
                     "certs-example/make-dev-certs.sh makes development ones");
        goto fail;
    }
    if (srv_read_file(cfg->cert_file, 1 << 20, &s->cert_pem, NULL, err) ||
        srv_read_file(cfg->key_file, 1 << 20, &s->key_pem, NULL, err))
        goto fail;
    if (cfg->client_ca_file[0] && srv_read_file(cfg->client_ca_file, 4 << 20, &s->ca_pem, NULL, err))
        goto fail;
    char fp[96] = "", subject[512] = "";
    double days = 0;
    if (srv_check_certificate(s->cert_pem, s->key_pem, fp, subject, sizeof subject, &days, err))
        goto fail;
    srv_log("certificate %s, SHA-256 fingerprint %s, expires in %.0f days", subject, fp, days);
    if (days < 30)
        srv_log("WARNING: the certificate expires in %.1f days; renew it", days);

    int workers = cfg->workers > 0 ? cfg->workers : (int)sysconf(_SC_NPROCESSORS_ONLN);
    if (workers < 1)
        workers = 1;
    s->metrics = srv_metrics_new();
    s->limiter = srv_limiter_new(cfg->rate_per_second, cfg->burst);
    if (!s->metrics || !s->limiter) {
        lk_error_set(err, LK_ERR_NOMEM, "out of memory");
        goto fail;
    }
    s->pool = srv_pool_new(workers, cfg->queue_depth, run_job, make_state, free_state, s, err);
    if (!s->pool)
        goto fail;

    return s;
fail:
    lk_server_free(s);
    return NULL;
}

lk_code lk_server_listen(lk_server *s, lk_error *err)
{
    const lk_config *cfg = &s->cfg;
    int workers = srv_pool_workers(s->pool);
    struct sockaddr_in addr4;
    struct sockaddr_in6 addr6;
    struct sockaddr *sa;
    memset(&addr4, 0, sizeof addr4);
    memset(&addr6, 0, sizeof addr6);
    unsigned flags = MHD_USE_TLS | MHD_USE_INTERNAL_POLLING_THREAD | MHD_ALLOW_SUSPEND_RESUME |
                     MHD_USE_ERROR_LOG | MHD_USE_AUTO;
    if (inet_pton(AF_INET, cfg->listen, &addr4.sin_addr) == 1) {
        addr4.sin_family = AF_INET;
        addr4.sin_port = htons((uint16_t)cfg->port);
        sa = (struct sockaddr *)&addr4;
    } else if (inet_pton(AF_INET6, cfg->listen, &addr6.sin6_addr) == 1) {
        addr6.sin6_family = AF_INET6;
        addr6.sin6_port = htons((uint16_t)cfg->port);
        sa = (struct sockaddr *)&addr6;
        flags |= MHD_USE_IPv6;
    } else {
        lk_error_set(err, LK_ERR_CONFIG, "[server] listen = %s is not an IPv4 or IPv6 address",
                     cfg->listen);
        return err ? err->code : LK_ERR_CONFIG;
    }
    struct MHD_OptionItem opts[16];
    int n = 0;
    /* The logger first, so no message goes to libmicrohttpd's own stderr logger. */
    opts[n++] = (struct MHD_OptionItem){MHD_OPTION_EXTERNAL_LOGGER, (intptr_t)mhd_log, s};
    opts[n++] = (struct MHD_OptionItem){MHD_OPTION_HTTPS_MEM_CERT, 0, s->cert_pem};
    opts[n++] = (struct MHD_OptionItem){MHD_OPTION_HTTPS_MEM_KEY, 0, s->key_pem};
    opts[n++] = (struct MHD_OptionItem){MHD_OPTION_HTTPS_PRIORITIES, 0, s->cfg.tls_priorities};
    if (s->ca_pem)
        opts[n++] = (struct MHD_OptionItem){MHD_OPTION_HTTPS_MEM_TRUST, 0, s->ca_pem};
    opts[n++] = (struct MHD_OptionItem){MHD_OPTION_SOCK_ADDR, 0, sa};
    opts[n++] = (struct MHD_OptionItem){MHD_OPTION_CONNECTION_TIMEOUT,
                                        (intptr_t)cfg->connection_timeout_s, NULL};
    opts[n++] = (struct MHD_OptionItem){MHD_OPTION_PER_IP_CONNECTION_LIMIT,
                                        (intptr_t)cfg->per_ip_connection_limit, NULL};
    opts[n++] = (struct MHD_OptionItem){MHD_OPTION_CONNECTION_LIMIT,
                                        (intptr_t)cfg->max_connections, NULL};
    opts[n++] = (struct MHD_OptionItem){MHD_OPTION_NOTIFY_COMPLETED, (intptr_t)on_completed, s};
    opts[n++] = (struct MHD_OptionItem){MHD_OPTION_UNESCAPE_CALLBACK, (intptr_t)unescape, NULL};
    opts[n++] = (struct MHD_OptionItem){MHD_OPTION_END, 0, NULL};
    s->daemon = MHD_start_daemon(flags, (uint16_t)cfg->port, NULL, NULL, on_request, s,
                                 MHD_OPTION_ARRAY, opts, MHD_OPTION_END);
    if (!s->daemon) {
        lk_error_set(err, LK_ERR_CONFIG,
                     "cannot listen on %s:%d over TLS (port in use, no permission, or a TLS "
                     "priority string GnuTLS rejects: %s)", cfg->listen, cfg->port,
                     cfg->tls_priorities);
        return err ? err->code : LK_ERR_CONFIG;
    }
    srv_log("listening on https://%s%s%s:%d/ with %d workers, queue %d, TLS priorities %s%s",
          sa->sa_family == AF_INET6 ? "[" : "", cfg->listen, sa->sa_family == AF_INET6 ? "]" : "",
          cfg->port, workers, cfg->queue_depth, cfg->tls_priorities,
          s->ca_pem ? ", client certificates requested" : "");
    return LK_OK;
}

void lk_server_stop(lk_server *s)
{
    /* Only async-signal-safe calls here. */
    if (s && s->stop_pipe[1] >= 0) {
        char c = 1;
        ssize_t w = write(s->stop_pipe[1], &c, 1);
        (void)w;
    }
}

lk_code lk_server_run(lk_server *s, lk_error *err)
{
    (void)err;
    double last_purge = srv_now();
    for (;;) {
        struct pollfd pfd = {.fd = s->stop_pipe[0], .events = POLLIN};
        int rc = poll(&pfd, 1, 1000);
        if (rc > 0)
            break;
        if (srv_now() - last_purge >= s->cfg.purge_interval_s) {
            last_purge = srv_now();
            srv_purge_expired(s);
        }
    }
    srv_log("stopping: no new connections; draining %d requests in flight",
          atomic_load(&s->inflight));
    atomic_store(&s->draining, true);
    MHD_socket ls = MHD_quiesce_daemon(s->daemon);
    if (ls != MHD_INVALID_SOCKET)
        close(ls);
    double t0 = srv_now();
    while (atomic_load(&s->inflight) > 0 && srv_now() - t0 < s->cfg.drain_timeout_s) {
        struct timespec ts = {0, 20 * 1000000};
        nanosleep(&ts, NULL);
    }
    if (atomic_load(&s->inflight) > 0)
        srv_log("drain timeout: %d requests still in flight", atomic_load(&s->inflight));
    else {
        /* Let the polling thread send the last answers. */
        struct timespec ts = {0, 200 * 1000000};
        nanosleep(&ts, NULL);
    }
    MHD_stop_daemon(s->daemon);
    s->daemon = NULL;
    srv_pool_free(s->pool);
    s->pool = NULL;
    srv_core_shutdown(s);
    srv_log("stopped");
    return LK_OK;
}

void lk_server_free(lk_server *s)
{
    if (!s)
        return;
    if (s->daemon)
        MHD_stop_daemon(s->daemon);
    srv_pool_free(s->pool);
    srv_core_close(s);
    srv_metrics_free(s->metrics);
    srv_limiter_free(s->limiter);
    free(s->cert_pem);
    if (s->key_pem) {
        /* The TLS private key: wipe before freeing. */
        volatile char *p = s->key_pem;
        while (*p)
            *p++ = 0;
        free(s->key_pem);
    }
    free(s->ca_pem);
    if (s->stop_pipe[0] >= 0)
        close(s->stop_pipe[0]);
    if (s->stop_pipe[1] >= 0)
        close(s->stop_pipe[1]);
    free(s);
}
