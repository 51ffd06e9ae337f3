#include "svc.h"

#include <stdlib.h>
#include <string.h>

#include "cli.h"

int cli_svc_option(cli_svc_opts *o, int argc, char **argv, int *i)
{
    const char **slot = NULL;
    if (!strcmp(argv[*i], "--config"))
        slot = &o->config;
    else if (!strcmp(argv[*i], "--store"))
        slot = &o->store;
    else if (!strcmp(argv[*i], "--key-file"))
        slot = &o->key_file;
    else
        return 0;
    if (*i + 1 >= argc) {
        cli_errorf("%s needs a value", argv[*i]);
        return -1;
    }
    *slot = argv[++*i];
    return 1;
}

int cli_svc_open(cli_svc *s, const cli_svc_opts *o, bool need_store, bool need_keys)
{
    memset(s, 0, sizeof *s);
    lk_error err;
    const char *path = o->config ? o->config : getenv("LIKENESS_CONFIG");
    /* Without a file, --store and --key-file alone are enough: validation
     * needs both, so fill them before loading. */
    if (!path || !*path) {
        if (o->store)
            setenv("LIKENESS_STORE_URL", o->store, 1);
        if (o->key_file)
            setenv("LIKENESS_KEYS_FILE", o->key_file, 1);
        if (!getenv("LIKENESS_STORE_URL") && !need_store)
            setenv("LIKENESS_STORE_URL", "-", 1);
        if (!getenv("LIKENESS_KEYS_FILE") && !need_keys)
            setenv("LIKENESS_KEYS_FILE", "-", 1);
    }
    if (lk_config_load(&s->cfg, path, &err) != LK_OK) {
        cli_error(&err);
        if (!path || !*path)
            cli_errorf("give --config FILE (or set LIKENESS_CONFIG), or --store URL and --key-file PATH");
        return CLI_FAIL;
    }
    if (o->store)
        snprintf(s->cfg.store_url, sizeof s->cfg.store_url, "%s", o->store);
    if (o->key_file)
        snprintf(s->cfg.key_file_path, sizeof s->cfg.key_file_path, "%s", o->key_file);
    if (need_keys) {
        s->keys = lk_keyring_load(s->cfg.key_file_path, &err);
        if (!s->keys) {
            cli_error(&err);
            return CLI_FAIL;
        }
    }
    if (need_store) {
        s->store = lk_store_open(s->cfg.store_url, &err);
        if (!s->store) {
            cli_error(&err);
            cli_svc_close(s);
            return CLI_FAIL;
        }
    }
    return CLI_OK;
}

void cli_svc_close(cli_svc *s)
{
    lk_store_close(s->store);
    lk_keyring_free(s->keys);
    s->store = NULL;
    s->keys = NULL;
}
