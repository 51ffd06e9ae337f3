/* Private: the server object, one request's state, and the handlers the
 * workers run (handlers.c). */
#ifndef LIKENESS_SERVER_HANDLERS_H
#define LIKENESS_SERVER_HANDLERS_H

#include <arpa/inet.h>
#include <netinet/in.h>
#include <pthread.h>
#include <stdarg.h>
#include <stdatomic.h>

#include "internal.h"
#include "likeness/config.h"
#include "likeness/crypto.h"
#include "likeness/engine.h"
#include "likeness/model.h"
#include "likeness/server.h"
#include "likeness/store.h"

struct MHD_Daemon;
struct MHD_Connection;

#define SRV_MAX_HEADERS 4

typedef struct srv_reply {
    int status;
    char content_type[64];
    char *body; /* malloc'd */
    size_t len;
    char headers[SRV_MAX_HEADERS][2][96];
    int n_headers;
    bool close;
} srv_reply;

/* Cached API-key rows: authentication happens on the polling thread for
 * every request, so it must not wait on the store. */
#define SRV_KEY_CACHE 256
typedef struct srv_key_cache {
    pthread_mutex_t mu;
    lk_apikey_meta rows[SRV_KEY_CACHE];
    double loaded_at[SRV_KEY_CACHE];
    size_t n;
} srv_key_cache;

struct lk_server {
    lk_config cfg;
    lk_engine *engine;
    lk_model *model;
    lk_keyring *keys;
    lk_store *store;
    double target_fmr, threshold;
    struct MHD_Daemon *daemon;
    srv_pool *pool;
    srv_metrics *metrics;
    srv_limiter *limiter;
    srv_key_cache kc;
    /* When the data keys were last synced from the store (srv_now()
     * seconds); replicas pick up another's key rotation through it. */
    pthread_mutex_t key_sync_mu;
    double key_sync_at;
    int stop_pipe[2];
    atomic_int inflight;
    atomic_bool draining;
    char *cert_pem, *key_pem, *ca_pem;
};

typedef struct srv_request {
    lk_server *srv;
    struct MHD_Connection *conn;
    int route;
    char method[16];
    char path[256];
    char path_arg[72];
    char request_id[72];
    char content_type[256];
    char q_after[32], q_limit[32];
    bool has_after, has_limit;
    /* caller */
    bool authenticated;
    char caller[256];
    char cert_subject[512];
    unsigned scopes;
    const char *auth_failure; /* reason code, NULL if none */
    const char *early;        /* problem slug decided at header time */
    double retry_after;
    bool too_large;
    /* body */
    uint8_t *body;
    size_t len, cap;
    /* answer */
    srv_reply out;
    atomic_bool done;
    bool replied;
    int status;
    double t0;
} srv_request;

typedef struct srv_worker_state srv_worker_state;
srv_worker_state *srv_worker_state_new(lk_server *s);
void srv_worker_state_free(srv_worker_state *w);

srv_request *srv_request_new(lk_server *s, struct MHD_Connection *conn);
void srv_request_free(srv_request *r);

lk_code srv_core_open(lk_server *s, lk_error *err);     /* model, engine, keys, store */
void srv_core_shutdown(lk_server *s);                   /* final audit checkpoint */
void srv_core_close(lk_server *s);
void srv_purge_expired(lk_server *s);
/* Checks a bearer token; sets r->authenticated/caller/scopes or r->auth_failure. */
void srv_auth_token(lk_server *s, const char *token, srv_request *r);
/* Runs on a worker: fills r->out. */
void srv_handle(lk_server *s, srv_request *r, srv_worker_state *w);

void srv_problem(srv_request *r, const char *slug, const char *detail);
void srv_problem_page(srv_request *r);
void srv_add_header(srv_request *r, const char *name, const char *value);
void srv_reply_json_text(srv_request *r, int status, const char *json);
/* Takes ownership of body (malloc'd). */
void srv_reply_text(srv_request *r, int status, const char *content_type, char *body);
void srv_log(const char *fmt, ...) __attribute__((format(printf, 1, 2)));

#endif
