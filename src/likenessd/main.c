/* likenessd: the HTTPS face verification service. */
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "likeness/config.h"
#include "likeness/server.h"

/* The one server of the process, for the signal handler (which can take no
 * argument); it only writes a byte to the server's stop pipe. */
static lk_server *running;

static void on_signal(int sig)
{
    (void)sig;
    lk_server_stop(running);
}

static void usage(FILE *f)
{
    fprintf(f,
            "usage: likenessd [--config FILE] [--check-config]\n\n"
            "Serves one-to-one face verification over HTTPS (api-spec/openapi.yaml).\n\n"
            "  --config FILE    INI configuration (default: $LIKENESS_CONFIG); every key can be\n"
            "                   overridden by LIKENESS_<SECTION>_<KEY> in the environment;\n"
            "                   deploy/likenessd.ini.example documents them\n"
            "  --check-config   load and validate the configuration, the model, the key file,\n"
            "                   the store and the certificate, print the effective\n"
            "                   configuration, and exit (0 if all is well)\n"
            "  --version        print the version\n\n"
            "SIGTERM or SIGINT: stop accepting connections, finish the requests in flight\n"
            "(up to [server] drain_timeout_s), sign an audit checkpoint, exit.\n");
}

int main(int argc, char **argv)
{
    const char *config = getenv("LIKENESS_CONFIG");
    int check = 0;
    for (int i = 1; i < argc; i++) {
        if (!strcmp(argv[i], "--help") || !strcmp(argv[i], "-h")) {
            usage(stdout);
            return 0;
        } else if (!strcmp(argv[i], "--version")) {
            printf("likenessd %s\n", LIKENESS_VERSION);
            return 0;
        } else if (!strcmp(argv[i], "--check-config")) {
            check = 1;
        } else if (!strcmp(argv[i], "--config") && i + 1 < argc) {
            config = argv[++i];
        } else {
            fprintf(stderr, "likenessd: unknown option '%s'\n", argv[i]);
            usage(stderr);
            return 2;
        }
    }
    lk_config cfg;
    lk_error err;
    if (lk_config_load(&cfg, config, &err) != LK_OK) {
        fprintf(stderr, "likenessd: configuration: %s\n", err.message);
        return 1;
    }
    if (check) {
        char *ini = lk_config_to_ini(&cfg);
        if (ini) {
            fputs(ini, stdout);
            free(ini);
        }
    }
    /* Writes to a client that went away must not kill the service. */
    signal(SIGPIPE, SIG_IGN);
    lk_server *s = lk_server_new(&cfg, &err);
    if (!s) {
        fprintf(stderr, "likenessd: %s (%s)\n", err.message, lk_code_name(err.code));
        return 1;
    }
    if (check) {
        lk_server_free(s);
        fprintf(stderr, "likenessd: configuration OK\n");
        return 0;
    }
    if (lk_server_listen(s, &err) != LK_OK) {
        fprintf(stderr, "likenessd: %s (%s)\n", err.message, lk_code_name(err.code));
        lk_server_free(s);
        return 1;
    }
    running = s;
    struct sigaction sa;
    memset(&sa, 0, sizeof sa);
    sa.sa_handler = on_signal;
    sigemptyset(&sa.sa_mask);
    sigaction(SIGTERM, &sa, NULL);
    sigaction(SIGINT, &sa, NULL);
    lk_code rc = lk_server_run(s, &err);
    lk_server_free(s);
    return rc == LK_OK ? 0 : 1;
}
