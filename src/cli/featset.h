/* Feature vectors of many images, computed on all cores with a progress
 * bar, and optionally cached in a file keyed by the feature configuration
 * and the list of paths. */
#ifndef LIKENESS_CLI_FEATSET_H
#define LIKENESS_CLI_FEATSET_H

#include <stddef.h>
#include <stdint.h>

#include "likeness/engine.h"
#include "likeness/learn.h"

typedef struct featset {
    size_t n, dim;
    char **paths;       /* sorted, unique */
    float *x;           /* n x dim, row-major */
    uint8_t *ok;        /* 1: features present (face found or central fallback) */
    uint8_t *fallback;  /* 1: no face was found; the central box was used */
    uint8_t *estimated; /* 1: eyes estimated from the box */
} featset;

/* Builds the set for the given paths (duplicates removed). threads 0 = all
 * cores. cache_path may be NULL. Images that fail to decode get ok = 0. */
int featset_build(const lk_engine *e, const char *const *paths, size_t n, int threads,
                  const char *cache_path, featset *out, lk_error *err);
/* featset_build over every image of a folder-per-identity data set (so that
 * commands reading the same folder share one feature cache). */
int featset_build_dataset(const lk_engine *e, const lk_dataset *ds, int threads,
                          const char *cache_path, featset *out, lk_error *err);
/* Row of a path, or -1. */
long featset_find(const featset *fs, const char *path);
void featset_free(featset *fs);

#endif
