#include "featset.h"

#include <pthread.h>
#include <sodium.h>
#include <stdatomic.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include "cli.h"

static int cmp_str(const void *a, const void *b)
{
    return strcmp(*(char *const *)a, *(char *const *)b);
}

long featset_find(const featset *fs, const char *path)
{
    char *const *hit = bsearch(&path, fs->paths, fs->n, sizeof *fs->paths, cmp_str);
    return hit ? (long)(hit - fs->paths) : -1;
}

void featset_free(featset *fs)
{
    if (!fs)
        return;
    for (size_t i = 0; i < fs->n; i++)
        free(fs->paths[i]);
    free(fs->paths);
    free(fs->x);
    free(fs->ok);
    free(fs->fallback);
    free(fs->estimated);
    memset(fs, 0, sizeof *fs);
}

typedef struct job {
    const lk_engine *e;
    featset *fs;
    atomic_size_t next;
    atomic_size_t done;
} job;

static void *worker(void *arg)
{
    job *j = arg;
    for (;;) {
        size_t i = atomic_fetch_add(&j->next, 1);
        if (i >= j->fs->n)
            break;
        uint8_t *bytes = NULL;
        size_t len = 0;
        lk_analysis a;
        lk_error err;
        float *row = j->fs->x + i * j->fs->dim;
        if (lk_read_file(j->fs->paths[i], 0, &bytes, &len, &err) == LK_OK &&
            lk_engine_analyse(j->e, bytes, len, &a, row, NULL, &err) == LK_OK && a.has_features) {
            j->fs->ok[i] = 1;
            j->fs->fallback[i] = (uint8_t)a.center_fallback;
            j->fs->estimated[i] = (uint8_t)a.find.eyes.eyes_estimated;
        }
        free(bytes);
        atomic_fetch_add(&j->done, 1);
    }
    return NULL;
}

/* Cache key: BLAKE2b-256 over the feature and engine configuration and every path. */
static void cache_key(const lk_engine *e, const featset *fs, unsigned char key[32])
{
    crypto_generichash_state st;
    crypto_generichash_init(&st, NULL, 0, 32);
    const char *cfg = lk_engine_feature_config(e);
    crypto_generichash_update(&st, (const unsigned char *)cfg, strlen(cfg) + 1);
    /* Detection, alignment and quality settings change features too; the
     * configuration struct is zero-filled before it is set, so its bytes
     * (padding included) are a faithful key. */
    const lk_engine_config *ec = lk_engine_get_config(e);
    crypto_generichash_update(&st, (const unsigned char *)ec, sizeof *ec);
    for (size_t i = 0; i < fs->n; i++)
        crypto_generichash_update(&st, (const unsigned char *)fs->paths[i],
                                  strlen(fs->paths[i]) + 1);
    crypto_generichash_final(&st, key, 32);
}

static const char cache_magic[8] = "LKFCACH1";

static int cache_read(const char *path, const unsigned char key[32], featset *fs)
{
    FILE *f = fopen(path, "rb");
    if (!f)
        return 0;
    char magic[8];
    unsigned char k[32];
    uint64_t n, dim;
    int ok = fread(magic, 8, 1, f) == 1 && memcmp(magic, cache_magic, 8) == 0 &&
             fread(k, 32, 1, f) == 1 && memcmp(k, key, 32) == 0 && fread(&n, 8, 1, f) == 1 &&
             fread(&dim, 8, 1, f) == 1 && n == fs->n && dim == fs->dim &&
             fread(fs->ok, 1, fs->n, f) == fs->n && fread(fs->fallback, 1, fs->n, f) == fs->n &&
             fread(fs->estimated, 1, fs->n, f) == fs->n &&
             fread(fs->x, sizeof(float) * fs->dim, fs->n, f) == fs->n;
    fclose(f);
    return ok;
}

static void cache_write(const char *path, const unsigned char key[32], const featset *fs)
{
    char tmp[4096];
    snprintf(tmp, sizeof tmp, "%s.tmp", path);
    FILE *f = fopen(tmp, "wb");
    if (!f) {
        cli_errorf("warning: cannot write the feature cache %s", tmp);
        return;
    }
    uint64_t n = fs->n, dim = fs->dim;
    int ok = fwrite(cache_magic, 8, 1, f) == 1 && fwrite(key, 32, 1, f) == 1 &&
             fwrite(&n, 8, 1, f) == 1 && fwrite(&dim, 8, 1, f) == 1 &&
             fwrite(fs->ok, 1, fs->n, f) == fs->n && fwrite(fs->fallback, 1, fs->n, f) == fs->n &&
             fwrite(fs->estimated, 1, fs->n, f) == fs->n &&
             fwrite(fs->x, sizeof(float) * fs->dim, fs->n, f) == fs->n;
    ok = (fclose(f) == 0) && ok;
    if (!ok || rename(tmp, path) != 0) {
        cli_errorf("warning: cannot write the feature cache %s", path);
        remove(tmp);
    }
}

int featset_build(const lk_engine *e, const char *const *paths, size_t n, int threads,
                  const char *cache_path, featset *out, lk_error *err)
{
    memset(out, 0, sizeof *out);
    out->dim = lk_engine_feature_dim(e);
    out->paths = malloc((n ? n : 1) * sizeof *out->paths);
    if (!out->paths)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory");
    for (size_t i = 0; i < n; i++) {
        out->paths[i] = strdup(paths[i]);
        if (!out->paths[i]) {
            out->n = i;
            featset_free(out);
            return lk_error_set(err, LK_ERR_NOMEM, "out of memory");
        }
    }
    qsort(out->paths, n, sizeof *out->paths, cmp_str);
    size_t u = 0;
    for (size_t i = 0; i < n; i++) {
        if (u > 0 && strcmp(out->paths[u - 1], out->paths[i]) == 0)
            free(out->paths[i]);
        else
            out->paths[u++] = out->paths[i];
    }
    out->n = u;
    out->x = calloc(u * out->dim + 1, sizeof *out->x);
    out->ok = calloc(u + 1, 1);
    out->fallback = calloc(u + 1, 1);
    out->estimated = calloc(u + 1, 1);
    if (!out->x || !out->ok || !out->fallback || !out->estimated) {
        featset_free(out);
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory for %zu feature vectors", u);
    }
    unsigned char key[32];
    if (cache_path) {
        if (sodium_init() < 0)
            return lk_error_set(err, LK_ERR_INTERNAL, "libsodium cannot start");
        cache_key(e, out, key);
        if (cache_read(cache_path, key, out)) {
            fprintf(stderr, "features: %zu images read from the cache %s\n", u, cache_path);
            return LK_OK;
        }
    }
    if (threads <= 0) {
        long c = sysconf(_SC_NPROCESSORS_ONLN);
        threads = c > 0 ? (int)c : 1;
    }
    if (threads > 64)
        threads = 64;
    job j = {.e = e, .fs = out};
    atomic_init(&j.next, 0);
    atomic_init(&j.done, 0);
    pthread_t tid[64];
    int started = 0;
    for (int t = 0; t < threads; t++)
        if (pthread_create(&tid[t], NULL, worker, &j) == 0)
            started++;
    if (started == 0)
        worker(&j);
    cli_progress p;
    cli_progress_start(&p, "extracting features", u);
    while (atomic_load(&j.done) < u) {
        cli_progress_update(&p, atomic_load(&j.done));
        nanosleep(&(struct timespec){0, 200000000}, NULL);
    }
    for (int t = 0; t < started; t++)
        pthread_join(tid[t], NULL);
    cli_progress_update(&p, u);
    cli_progress_end(&p);
    size_t bad = 0, fb = 0;
    for (size_t i = 0; i < u; i++) {
        bad += !out->ok[i];
        fb += out->fallback[i];
    }
    fprintf(stderr, "features: %zu images, %zu without features, %zu with the central "
                    "fallback box\n", u, bad, fb);
    if (cache_path)
        cache_write(cache_path, key, out);
    return LK_OK;
}

int featset_build_dataset(const lk_engine *e, const lk_dataset *ds, int threads,
                          const char *cache_path, featset *out, lk_error *err)
{
    size_t total = 0;
    for (size_t i = 0; i < ds->count; i++)
        total += ds->identities[i].n_paths;
    const char **paths = malloc((total + 1) * sizeof *paths);
    if (!paths)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory");
    size_t n = 0;
    for (size_t i = 0; i < ds->count; i++)
        for (size_t k = 0; k < ds->identities[i].n_paths; k++)
            paths[n++] = ds->identities[i].paths[k];
    int rc = featset_build(e, paths, n, threads, cache_path, out, err);
    free(paths);
    return rc;
}
