/* Counters and latency histograms in the Prometheus text exposition
 * format, version 0.0.4 (prometheus.io "Exposition formats"). */
#include <pthread.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "internal.h"

/* Latency buckets in seconds: the client libraries' default set
 * (common practice), which brackets the 20-100 ms of one verification. */
static const double buckets[] = {0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10};
#define NB (sizeof buckets / sizeof buckets[0])
/* Label sets kept: routes x methods x statuses actually seen stay far below
 * this; the cap only stops a client inventing statuses from growing memory. */
#define MAX_SERIES 256

typedef struct series {
    int route;
    char method[8];
    int status;
    uint64_t count;
} series;

struct srv_metrics {
    pthread_mutex_t mu;
    series s[MAX_SERIES];
    size_t n;
    uint64_t overflow;
    uint64_t hist[RT_COUNT][NB + 1];
    double hist_sum[RT_COUNT];
    uint64_t hist_count[RT_COUNT];
    uint64_t match, non_match, refused;
};

const char *srv_route_label(int route)
{
    static const char *const names[RT_COUNT] = {
        [RT_NONE] = "unmatched", [RT_HEALTHZ] = "/healthz", [RT_READYZ] = "/readyz",
        [RT_METRICS] = "/metrics", [RT_PROBLEM] = "/problems/{type}",
        [RT_VERIFY] = "/v1/verifications", [RT_TEMPLATES] = "/v1/templates",
        [RT_TEMPLATE] = "/v1/templates/{template_id}", [RT_MODEL] = "/v1/model",
        [RT_AUDIT] = "/v1/audit/records"};
    return route >= 0 && route < RT_COUNT ? names[route] : "unmatched";
}

srv_metrics *srv_metrics_new(void)
{
    srv_metrics *m = calloc(1, sizeof *m);
    if (m)
        pthread_mutex_init(&m->mu, NULL);
    return m;
}

void srv_metrics_free(srv_metrics *m)
{
    if (!m)
        return;
    pthread_mutex_destroy(&m->mu);
    free(m);
}

void srv_metrics_request(srv_metrics *m, int route, const char *method, int status, double seconds)
{
    if (route < 0 || route >= RT_COUNT)
        route = RT_NONE;
    /* Only the methods we serve get their own label, so a client inventing
     * methods cannot grow the series without bound. */
    if (strcmp(method, "GET") && strcmp(method, "POST") && strcmp(method, "DELETE") &&
        strcmp(method, "HEAD"))
        method = "OTHER";
    pthread_mutex_lock(&m->mu);
    size_t i;
    for (i = 0; i < m->n; i++)
        if (m->s[i].route == route && m->s[i].status == status && !strcmp(m->s[i].method, method))
            break;
    if (i == m->n && m->n < MAX_SERIES) {
        m->s[i].route = route;
        m->s[i].status = status;
        snprintf(m->s[i].method, sizeof m->s[i].method, "%s", method);
        m->n++;
    }
    if (i < m->n)
        m->s[i].count++;
    else
        m->overflow++;
    size_t b = 0;
    while (b < NB && seconds > buckets[b])
        b++;
    m->hist[route][b]++;
    m->hist_sum[route] += seconds;
    m->hist_count[route]++;
    pthread_mutex_unlock(&m->mu);
}

void srv_metrics_decision(srv_metrics *m, const char *decision)
{
    pthread_mutex_lock(&m->mu);
    if (!strcmp(decision, "match"))
        m->match++;
    else if (!strcmp(decision, "non_match"))
        m->non_match++;
    else
        m->refused++;
    pthread_mutex_unlock(&m->mu);
}

typedef struct text {
    char *buf;
    size_t len, cap;
} text;

static void put(text *t, const char *fmt, ...) __attribute__((format(printf, 2, 3)));
static void put(text *t, const char *fmt, ...)
{
    if (!t->buf)
        return;
    for (;;) {
        va_list ap;
        va_start(ap, fmt);
        int n = vsnprintf(t->buf + t->len, t->cap - t->len, fmt, ap);
        va_end(ap);
        if (n < 0)
            return;
        if ((size_t)n < t->cap - t->len) {
            t->len += (size_t)n;
            return;
        }
        size_t ncap = t->cap * 2 + (size_t)n;
        char *nb = realloc(t->buf, ncap);
        if (!nb) {
            free(t->buf);
            t->buf = NULL;
            return;
        }
        t->buf = nb;
        t->cap = ncap;
    }
}

char *srv_metrics_render(srv_metrics *m, int queued, int busy, int workers, uint64_t templates,
                         int draining)
{
    text t = {malloc(8192), 0, 8192};
    if (!t.buf)
        return NULL;
    t.buf[0] = '\0';
    pthread_mutex_lock(&m->mu);
    put(&t, "# HELP likeness_http_requests_total HTTP requests answered, by route, method and status.\n"
            "# TYPE likeness_http_requests_total counter\n");
    for (size_t i = 0; i < m->n; i++)
        put(&t, "likeness_http_requests_total{route=\"%s\",method=\"%s\",status=\"%d\"} %llu\n",
            srv_route_label(m->s[i].route), m->s[i].method, m->s[i].status,
            (unsigned long long)m->s[i].count);
    put(&t, "# HELP likeness_http_requests_unlabelled_total Requests beyond the label budget.\n"
            "# TYPE likeness_http_requests_unlabelled_total counter\n"
            "likeness_http_requests_unlabelled_total %llu\n", (unsigned long long)m->overflow);
    put(&t, "# HELP likeness_http_request_duration_seconds Time from first byte to answer, by route.\n"
            "# TYPE likeness_http_request_duration_seconds histogram\n");
    for (int r = 0; r < RT_COUNT; r++) {
        if (!m->hist_count[r])
            continue;
        uint64_t cum = 0;
        for (size_t b = 0; b < NB; b++) {
            cum += m->hist[r][b];
            put(&t, "likeness_http_request_duration_seconds_bucket{route=\"%s\",le=\"%g\"} %llu\n",
                srv_route_label(r), buckets[b], (unsigned long long)cum);
        }
        cum += m->hist[r][NB];
        put(&t, "likeness_http_request_duration_seconds_bucket{route=\"%s\",le=\"+Inf\"} %llu\n"
                "likeness_http_request_duration_seconds_sum{route=\"%s\"} %.6f\n"
                "likeness_http_request_duration_seconds_count{route=\"%s\"} %llu\n",
            srv_route_label(r), (unsigned long long)cum, srv_route_label(r), m->hist_sum[r],
            srv_route_label(r), (unsigned long long)m->hist_count[r]);
    }
    put(&t, "# HELP likeness_decisions_total Verification outcomes.\n"
            "# TYPE likeness_decisions_total counter\n"
            "likeness_decisions_total{decision=\"match\"} %llu\n"
            "likeness_decisions_total{decision=\"non_match\"} %llu\n"
            "likeness_decisions_total{decision=\"refused\"} %llu\n",
        (unsigned long long)m->match, (unsigned long long)m->non_match,
        (unsigned long long)m->refused);
    pthread_mutex_unlock(&m->mu);
    put(&t, "# HELP likeness_queue_depth Jobs waiting for a worker.\n"
            "# TYPE likeness_queue_depth gauge\nlikeness_queue_depth %d\n"
            "# HELP likeness_jobs_running Jobs being worked on.\n"
            "# TYPE likeness_jobs_running gauge\nlikeness_jobs_running %d\n"
            "# HELP likeness_workers Worker threads.\n"
            "# TYPE likeness_workers gauge\nlikeness_workers %d\n"
            "# HELP likeness_templates Enrolled templates in the store.\n"
            "# TYPE likeness_templates gauge\nlikeness_templates %llu\n"
            "# HELP likeness_draining 1 while the service drains before stopping.\n"
            "# TYPE likeness_draining gauge\nlikeness_draining %d\n",
        queued, busy, workers, (unsigned long long)templates, draining);
    return t.buf;
}
