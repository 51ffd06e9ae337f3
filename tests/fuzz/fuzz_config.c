/* libFuzzer target: lk_config_load (INI through libinih) on the input
 * written to a temporary file, then lk_config_to_ini. The effective
 * configuration it prints (`likenessd --check-config`) must load again and
 * print the same text (when its lines fit the loader's 198-character limit). LIKENESS_* environment variables are removed at
 * start-up so that overrides of the fuzzing machine do not mix in.
 * Seeds: corpus/config. */
#include <stdint.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "fuzz_common.h"
#include "likeness/config.h"

int LLVMFuzzerInitialize(int *argc, char ***argv);
int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size);

extern char **environ;

typedef struct fuzz_state {
    char dir[512];
    char path[600];
    lk_config cfg, again;
} fuzz_state;

static fuzz_state *state; /* the fuzzer's entry points take no context */

static void cleanup(void)
{
    unlink(state->path);
    rmdir(state->dir);
}

int LLVMFuzzerInitialize(int *argc, char ***argv)
{
    (void)argc;
    (void)argv;
    static fuzz_state st;
    for (;;) { /* unsetenv changes environ: start over after each removal */
        char name[256] = "";
        for (char **e = environ; *e; e++)
            if (!strncmp(*e, "LIKENESS_", 9)) {
                const char *eq = strchr(*e, '=');
                size_t n = eq ? (size_t)(eq - *e) : strlen(*e);
                if (n < sizeof name) {
                    memcpy(name, *e, n);
                    name[n] = '\0';
                    break;
                }
            }
        if (!name[0])
            break;
        unsetenv(name);
    }
    const char *tmp = getenv("TMPDIR");
    snprintf(st.dir, sizeof st.dir, "%s/lkfuzz-XXXXXX", tmp && *tmp ? tmp : "/tmp");
    FUZZ_CHECK(mkdtemp(st.dir) != NULL, "cannot create a temporary directory in %s", st.dir);
    snprintf(st.path, sizeof st.path, "%s/likenessd.ini", st.dir);
    state = &st;
    atexit(cleanup);
    return 0;
}

static void put(const void *p, size_t n)
{
    FILE *f = fopen(state->path, "wb");
    FUZZ_CHECK(f && fwrite(p, 1, n, f) == n && fclose(f) == 0, "cannot write %s", state->path);
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    put(data, size);
    lk_error err;
    lk_code rc = lk_config_load(&state->cfg, state->path, &err);
    if (rc != LK_OK) {
        fuzz_check_error(rc, &err);
        FUZZ_CHECK(rc == LK_ERR_CONFIG, "load failed with %s", lk_code_name(rc));
        return 0;
    }
    const lk_config *c = &state->cfg;
    FUZZ_CHECK(c->port >= 1 && c->port <= 65535, "port %d", c->port);
    FUZZ_CHECK(c->n_clients <= LK_CONFIG_MAX_CLIENTS, "%zu clients", c->n_clients);
    FUZZ_CHECK(c->store_url[0] && c->key_file_path[0], "required settings missing");
    char *ini = lk_config_to_ini(c);
    FUZZ_CHECK(ini != NULL, "lk_config_to_ini returned NULL");

    /* lk_config_load refuses lines over 198 characters (libinih's line
     * limit) while lk_config_to_ini prints resolved paths and environment
     * values whole, so a printed line may be longer than a loadable one
     * (regressions/config/printed-line-too-long): reload only text whose
     * lines all fit. */
    size_t col = 0, longest = 0;
    for (const char *q = ini; *q; q++) {
        col = *q == '\n' ? 0 : col + 1;
        longest = col > longest ? col : longest;
    }
    if (longest > 198) {
        free(ini);
        return 0;
    }
    put(ini, strlen(ini));
    rc = lk_config_load(&state->again, state->path, &err);
    FUZZ_CHECK(rc == LK_OK, "the printed configuration does not load again: %s\n--- input\n%.*s\n"
               "--- printed\n%s", err.message, (int)size, (const char *)data, ini);
    char *ini2 = lk_config_to_ini(&state->again);
    FUZZ_CHECK(ini2 != NULL, "lk_config_to_ini returned NULL");
    FUZZ_CHECK(strcmp(ini, ini2) == 0, "printed configuration changes on reload:\n%s\n---\n%s",
               ini, ini2);
    free(ini2);
    free(ini);
    return 0;
}
