/* Private pieces of the server module, shared between its files. */
#ifndef LIKENESS_SERVER_INTERNAL_H
#define LIKENESS_SERVER_INTERNAL_H

#include <stdbool.h>
#include <stddef.h>
#include <stdint.h>

#include "likeness/error.h"

/* ---- worker pool (pool.c): fixed threads, bounded FIFO queue ---- */
typedef struct srv_pool srv_pool;
typedef void (*srv_job_fn)(void *job, void *worker_state);
/* make_state/free_state build each worker's private scratch (may be NULL). */
srv_pool *srv_pool_new(int workers, int depth, srv_job_fn run, void *(*make_state)(void *arg),
                       void (*free_state)(void *state), void *arg, lk_error *err);
/* false when the queue is full (the caller answers 503). */
bool srv_pool_submit(srv_pool *p, void *job);
int srv_pool_queued(srv_pool *p);  /* jobs waiting */
int srv_pool_busy(srv_pool *p);    /* jobs running */
int srv_pool_workers(const srv_pool *p);
/* Finishes queued jobs, then joins the threads. */
void srv_pool_free(srv_pool *p);

/* ---- metrics (metrics.c): Prometheus text exposition format 0.0.4 ---- */
enum srv_route {
    RT_NONE = 0, RT_HEALTHZ, RT_READYZ, RT_METRICS, RT_PROBLEM, RT_VERIFY, RT_TEMPLATES,
    RT_TEMPLATE, RT_MODEL, RT_AUDIT, RT_COUNT
};
const char *srv_route_label(int route);
typedef struct srv_metrics srv_metrics;
srv_metrics *srv_metrics_new(void);
void srv_metrics_free(srv_metrics *m);
void srv_metrics_request(srv_metrics *m, int route, const char *method, int status, double seconds);
void srv_metrics_decision(srv_metrics *m, const char *decision);
/* malloc'd text; gauges are passed in. */
char *srv_metrics_render(srv_metrics *m, int queued, int busy, int workers, uint64_t templates,
                         int draining);

/* ---- token buckets per caller (limiter.c) ---- */
typedef struct srv_limiter srv_limiter;
srv_limiter *srv_limiter_new(double rate, double burst);
void srv_limiter_free(srv_limiter *l);
/* Takes one token for caller at time now (seconds); false with the seconds
 * until a token is available when the bucket is empty. */
bool srv_limiter_take(srv_limiter *l, const char *caller, double now, double *retry_after);

/* ---- TLS material (tls.c) ---- */
/* Reads a whole file into a NUL-terminated malloc'd buffer. */
lk_code srv_read_file(const char *path, size_t max, char **out, size_t *len, lk_error *err);
/* OpenSSL checks of the certificate and key (PEM text): the key matches,
 * the certificate is valid now; fills its SHA-256 fingerprint (95 chars
 * "AA:BB:..."), subject and days to expiry. */
lk_code srv_check_certificate(const char *cert_pem, const char *key_pem, char fingerprint[96],
                              char *subject, size_t subject_cap, double *days_left,
                              lk_error *err);
/* RFC 2253/4514 subject of a DER certificate, as OpenSSL prints it. */
bool srv_der_subject(const uint8_t *der, size_t len, char *out, size_t cap);

double srv_now(void);           /* CLOCK_MONOTONIC seconds */
int64_t srv_unix_ms(void);      /* CLOCK_REALTIME milliseconds */
void srv_rfc3339_ms(int64_t ms, char out[32]);

#endif
