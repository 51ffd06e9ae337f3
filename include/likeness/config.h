/* likeness config: the service's INI file (libinih) with environment
 * overrides. Every key is documented in deploy/likenessd.ini.example.
 *
 * An environment variable LIKENESS_<SECTION>_<KEY> (upper case, e.g.
 * LIKENESS_SERVER_PORT) overrides the file's value; `likenessd
 * --check-config` loads, validates and prints the effective configuration
 * (secrets never printed). Relative paths in the file are resolved against
 * the file's directory. */
#ifndef LIKENESS_CONFIG_H
#define LIKENESS_CONFIG_H

#include <stddef.h>
#include <stdint.h>

#include "likeness/error.h"

#ifdef __cplusplus
extern "C" {
#endif

#define LK_CONFIG_PATH_MAX 1024
#define LK_CONFIG_MAX_CLIENTS 64

/* An mTLS identity mapped to scopes: [client:NAME] subject = ..., scopes = ... */
typedef struct lk_config_client {
    char name[128];
    char subject[512];   /* RFC 4514 string of the certificate subject, as OpenSSL prints it */
    unsigned scopes;     /* LK_SCOPE_* bits (likeness/store.h) */
} lk_config_client;

typedef struct lk_config {
    char source[LK_CONFIG_PATH_MAX];   /* the file read, "" if none */
    /* [server] */
    char listen[64];                   /* address to bind; default 127.0.0.1 */
    int port;                          /* default 8443 */
    char cert_file[LK_CONFIG_PATH_MAX];
    char key_file[LK_CONFIG_PATH_MAX];
    char client_ca_file[LK_CONFIG_PATH_MAX]; /* "" disables mutual TLS */
    char tls_priorities[512];          /* GnuTLS priority string; default LK_CONFIG_TLS_PRIORITIES */
    int workers;                       /* 0: number of online cores */
    int queue_depth;                   /* jobs waiting for a worker before 503; default 64 */
    uint64_t max_body_bytes;           /* default 16 MiB */
    int connection_timeout_s;          /* idle connection timeout; default 30 */
    int per_ip_connection_limit;       /* default 32 */
    int max_connections;               /* default 512 */
    int drain_timeout_s;               /* SIGTERM: wait this long for in-flight work; default 30 */
    /* [model] */
    char model_file[LK_CONFIG_PATH_MAX];
    double target_fmr;                 /* 0: the model's default operating point */
    /* [store] */
    char store_url[LK_CONFIG_PATH_MAX];
    /* [keys] */
    char key_file_path[LK_CONFIG_PATH_MAX]; /* master key file (mode 0600) */
    /* [limits] token bucket per caller */
    double rate_per_second;            /* default 20 */
    double burst;                      /* default 40 */
    /* [templates] */
    int64_t default_ttl_s;             /* 0: templates do not expire unless asked */
    int64_t max_ttl_s;                 /* 0: no cap */
    int purge_interval_s;              /* default 60 */
    /* [audit] */
    unsigned checkpoint_interval;      /* default 100 */
    /* [client:NAME] sections */
    lk_config_client clients[LK_CONFIG_MAX_CLIENTS];
    size_t n_clients;
} lk_config;

/* GnuTLS priority string used when none is configured: TLS 1.3 and 1.2 only,
 * AEAD ciphers with forward secrecy only (docs in deploy/likenessd.ini.example). */
#define LK_CONFIG_TLS_PRIORITIES \
    "SECURE256:+SECURE128:-VERS-ALL:+VERS-TLS1.3:+VERS-TLS1.2:-CIPHER-ALL:+AES-256-GCM:" \
    "+CHACHA20-POLY1305:+AES-128-GCM:-MAC-ALL:+AEAD:-KX-ALL:+ECDHE-ECDSA:+ECDHE-RSA:" \
    "-SIGN-ALL:+SIGN-ALL:%SERVER_PRECEDENCE"

void lk_config_default(lk_config *c);
/* Reads path (NULL: defaults only), then applies environment overrides, then
 * validates. LK_ERR_CONFIG naming file, line and key for an unknown key, a
 * bad value or a missing required setting. */
lk_code lk_config_load(lk_config *c, const char *path, lk_error *err);
/* The effective configuration as INI text (malloc'd; free()). */
char *lk_config_to_ini(const lk_config *c);

#ifdef __cplusplus
}
#endif
#endif
