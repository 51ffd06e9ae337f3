/* The service-side state that CLI commands (keys, audit) open: the
 * configuration, the store and the key ring, chosen by
 *   --config FILE      the service's INI file (default: $LIKENESS_CONFIG)
 *   --store URL        overrides [store] url
 *   --key-file PATH    overrides [keys] file                               */
#ifndef LIKENESS_CLI_SVC_H
#define LIKENESS_CLI_SVC_H

#include <stdbool.h>

#include "likeness/config.h"
#include "likeness/crypto.h"
#include "likeness/store.h"

typedef struct cli_svc_opts {
    const char *config;
    const char *store;
    const char *key_file;
} cli_svc_opts;

/* If argv[*i] is one of the three options, stores its value, advances *i past
 * it and returns 1; returns 0 if it is not one of them; -1 (message printed)
 * if its value is missing. */
int cli_svc_option(cli_svc_opts *o, int argc, char **argv, int *i);

/* The help text lines of the three options. */
#define CLI_SVC_HELP \
    "  --config FILE      the service's configuration (default: $LIKENESS_CONFIG)\n" \
    "  --store URL        the template store, overriding the configuration\n" \
    "  --key-file PATH    the key file, overriding the configuration\n"

typedef struct cli_svc {
    lk_config cfg;
    lk_store *store;   /* NULL unless asked for */
    lk_keyring *keys;  /* NULL unless asked for */
} cli_svc;

/* Loads the configuration and opens what is asked for; prints the error and
 * returns CLI_FAIL on failure (everything opened so far is closed). */
int cli_svc_open(cli_svc *s, const cli_svc_opts *o, bool need_store, bool need_keys);
void cli_svc_close(cli_svc *s);

#endif
