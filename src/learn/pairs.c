/* Comparison pairs: the LFW protocol files and a seeded generator for any
 * folder-per-identity data set.
 *
 * LFW file layout: G. B. Huang, M. Ramesh, T. Berg, E. Learned-Miller,
 * "Labeled Faces in the Wild", UMass Amherst TR 07-49, 2007, and the README
 * that ships with the data (View 1: pairsDevTrain.txt / pairsDevTest.txt,
 * first line N then N matched and N mismatched lines; View 2: pairs.txt,
 * first line "10 300" then 10 folds of 300 matched then 300 mismatched). */
#include "likeness/learn.h"

#include <ctype.h>
#include <dirent.h>
#include <errno.h>
#include <limits.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>

#define MAX_TOKENS 5
#define MAX_IMAGE_NUMBER 9999 /* the %04d file naming of LFW */

static char *dup_str(const char *s)
{
    size_t n = strlen(s) + 1;
    char *d = malloc(n);
    if (d)
        memcpy(d, s, n);
    return d;
}

static char *fmt_path(const char *root, const char *name, int index)
{
    int n = snprintf(NULL, 0, "%s/lfw-deepfunneled/%s/%s_%04d.jpg", root, name, name, index);
    if (n < 0)
        return NULL;
    char *p = malloc((size_t)n + 1);
    if (p)
        snprintf(p, (size_t)n + 1, "%s/lfw-deepfunneled/%s/%s_%04d.jpg", root, name, name, index);
    return p;
}

void lk_pair_set_free(lk_pair_set *set)
{
    if (!set)
        return;
    for (size_t i = 0; i < set->count; i++) {
        free(set->pairs[i].path_a);
        free(set->pairs[i].path_b);
        free(set->pairs[i].name_a);
        free(set->pairs[i].name_b);
    }
    free(set->pairs);
    free(set);
}

/* A cursor over the text that hands out one line at a time, split into
 * whitespace-separated tokens written into a scratch buffer. */
typedef struct line_reader {
    const char *p, *end;
    size_t line_no;
    char buf[1024];
    char *tok[MAX_TOKENS];
    int ntok;
    int too_long;
} line_reader;

/* Returns 0 at end of text. Skips nothing: blank lines come back with
 * ntok == 0 so errors can name them. */
static int next_line(line_reader *r)
{
    if (r->p >= r->end)
        return 0;
    const char *s = r->p;
    const char *e = memchr(s, '\n', (size_t)(r->end - s));
    if (!e)
        e = r->end;
    r->p = e < r->end ? e + 1 : r->end;
    r->line_no++;
    size_t len = (size_t)(e - s);
    r->too_long = len >= sizeof r->buf;
    if (r->too_long)
        len = sizeof r->buf - 1;
    memcpy(r->buf, s, len);
    r->buf[len] = '\0';
    r->ntok = 0;
    char *q = r->buf;
    for (;;) {
        while (*q && isspace((unsigned char)*q))
            q++;
        if (!*q)
            break;
        if (r->ntok == MAX_TOKENS) {
            r->ntok++; /* more than we accept: reported by the caller */
            break;
        }
        r->tok[r->ntok++] = q;
        while (*q && !isspace((unsigned char)*q))
            q++;
        if (*q)
            *q++ = '\0';
    }
    return 1;
}

static int parse_int(const char *s, long lo, long hi, long *v)
{
    if (!*s)
        return 0;
    for (const char *c = s; *c; c++)
        if (!isdigit((unsigned char)*c))
            return 0;
    errno = 0;
    long x = strtol(s, NULL, 10);
    if (errno || x < lo || x > hi)
        return 0;
    *v = x;
    return 1;
}

/* An identity name becomes a path component: refuse anything that could
 * step outside the data folder. */
static int valid_name(const char *s)
{
    if (!*s || strcmp(s, ".") == 0 || strcmp(s, "..") == 0)
        return 0;
    for (const char *c = s; *c; c++)
        if (*c == '/' || *c == '\\' || (unsigned char)*c < 0x20)
            return 0;
    return 1;
}

static lk_code fill_pair(lk_pair *pr, const char *root, const char *na, int ia,
                         const char *nb, int ib, int fold, int genuine)
{
    pr->name_a = dup_str(na);
    pr->name_b = dup_str(nb);
    pr->path_a = fmt_path(root, na, ia);
    pr->path_b = fmt_path(root, nb, ib);
    pr->index_a = ia;
    pr->index_b = ib;
    pr->fold = fold;
    pr->genuine = genuine;
    if (!pr->name_a || !pr->name_b || !pr->path_a || !pr->path_b)
        return LK_ERR_NOMEM;
    return LK_OK;
}

lk_code lk_pairs_parse_lfw(const char *text, size_t len, const char *source,
                           const char *lfw_root, lk_pair_set **out, lk_error *err)
{
    if (!text || !lfw_root || !out)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_pairs_parse_lfw: NULL argument");
    *out = NULL;
    if (!source)
        source = "pairs file";
    line_reader *r = calloc(1, sizeof *r);
    if (!r)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory reading %s", source);
    r->p = text;
    r->end = text + len;

    lk_code rc = LK_OK;
    lk_pair_set *set = NULL;
    long folds = 1, per = 0;
    if (!next_line(r) || r->too_long || (r->ntok != 1 && r->ntok != 2)) {
        rc = lk_error_set(err, LK_ERR_DATA,
                          "%s line 1: expected a header \"N\" (View 1) or \"FOLDS N\" (View 2); "
                          "check that this is an LFW pairs file", source);
        goto done;
    }
    /* 100000 bounds the allocation below; LFW's files hold at most 6000 pairs. */
    if (r->ntok == 1) {
        if (!parse_int(r->tok[0], 1, 100000, &per)) {
            rc = lk_error_set(err, LK_ERR_DATA, "%s line 1: pair count \"%s\" is not a number "
                              "between 1 and 100000", source, r->tok[0]);
            goto done;
        }
    } else if (!parse_int(r->tok[0], 1, 1000, &folds) || !parse_int(r->tok[1], 1, 100000, &per)) {
        rc = lk_error_set(err, LK_ERR_DATA, "%s line 1: header \"%s %s\" must be two positive "
                          "numbers (folds, pairs per class per fold)", source, r->tok[0], r->tok[1]);
        goto done;
    }
    if ((unsigned long)folds * (unsigned long)per > 100000UL) {
        rc = lk_error_set(err, LK_ERR_DATA, "%s line 1: %ld folds of %ld pairs is more than "
                          "this reader accepts (100000 per class)", source, folds, per);
        goto done;
    }
    set = calloc(1, sizeof *set);
    if (!set) {
        rc = lk_error_set(err, LK_ERR_NOMEM, "out of memory reading %s", source);
        goto done;
    }
    set->n_folds = (int)folds;
    size_t total = (size_t)folds * (size_t)per * 2;
    set->pairs = calloc(total, sizeof *set->pairs);
    if (!set->pairs) {
        rc = lk_error_set(err, LK_ERR_NOMEM, "out of memory for %zu pairs of %s", total, source);
        goto done;
    }
    for (long f = 0; f < folds; f++) {
        for (int genuine = 1; genuine >= 0; genuine--) {
            for (long k = 0; k < per; k++) {
                const int want = genuine ? 3 : 4;
                if (!next_line(r)) {
                    rc = lk_error_set(err, LK_ERR_DATA,
                                      "%s ends after line %zu: fold %ld needs %ld %s pairs and has %ld; "
                                      "the file is truncated", source, r->line_no, f + 1, per,
                                      genuine ? "matched" : "mismatched", k);
                    goto done;
                }
                if (r->too_long || r->ntok != want) {
                    rc = lk_error_set(err, LK_ERR_DATA,
                                      "%s line %zu: expected a %s pair \"%s\" (%d fields), found %d "
                                      "fields", source, r->line_no, genuine ? "matched" : "mismatched",
                                      genuine ? "name i j" : "name1 i name2 j", want,
                                      r->too_long ? -1 : r->ntok);
                    goto done;
                }
                const char *na = r->tok[0];
                const char *nb = genuine ? r->tok[0] : r->tok[2];
                const char *sa = r->tok[1];
                const char *sb = genuine ? r->tok[2] : r->tok[3];
                long ia, ib;
                if (!valid_name(na) || !valid_name(nb)) {
                    rc = lk_error_set(err, LK_ERR_DATA, "%s line %zu: identity name is empty or "
                                      "contains a path separator", source, r->line_no);
                    goto done;
                }
                if (!parse_int(sa, 1, MAX_IMAGE_NUMBER, &ia) || !parse_int(sb, 1, MAX_IMAGE_NUMBER, &ib)) {
                    rc = lk_error_set(err, LK_ERR_DATA, "%s line %zu: image numbers \"%s\", \"%s\" "
                                      "must be integers from 1 to %d", source, r->line_no, sa, sb,
                                      MAX_IMAGE_NUMBER);
                    goto done;
                }
                if (!genuine && strcmp(na, nb) == 0) {
                    rc = lk_error_set(err, LK_ERR_DATA, "%s line %zu: a mismatched pair names the "
                                      "same identity twice (%s)", source, r->line_no, na);
                    goto done;
                }
                lk_pair *pr = &set->pairs[set->count++];
                if (fill_pair(pr, lfw_root, na, (int)ia, nb, (int)ib, (int)f, genuine) != LK_OK) {
                    rc = lk_error_set(err, LK_ERR_NOMEM, "out of memory reading %s", source);
                    goto done;
                }
            }
        }
    }
    while (next_line(r)) {
        if (r->ntok != 0) {
            rc = lk_error_set(err, LK_ERR_DATA, "%s line %zu: unexpected content after the %zu pairs "
                              "the header announced", source, r->line_no, total);
            goto done;
        }
    }
done:
    free(r);
    if (rc != LK_OK) {
        lk_pair_set_free(set);
        return rc;
    }
    *out = set;
    return LK_OK;
}

static lk_code read_file(const char *path, char **buf, size_t *len, lk_error *err)
{
    FILE *f = fopen(path, "rb");
    if (!f)
        return lk_error_set(err, LK_ERR_IO, "cannot open %s: %s; check the data set path", path,
                            strerror(errno));
    size_t cap = 1 << 16, n = 0;
    char *b = malloc(cap);
    while (b) {
        size_t got = fread(b + n, 1, cap - n, f);
        n += got;
        if (n < cap)
            break;
        if (cap > ((size_t)64 << 20)) { /* a pairs file is tens of kB */
            free(b);
            fclose(f);
            return lk_error_set(err, LK_ERR_DATA, "%s is larger than 64 MiB: not a pairs file", path);
        }
        char *nb = realloc(b, cap * 2);
        if (!nb) {
            free(b);
            b = NULL;
            break;
        }
        b = nb;
        cap *= 2;
    }
    int bad = ferror(f);
    fclose(f);
    if (!b)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory reading %s", path);
    if (bad) {
        free(b);
        return lk_error_set(err, LK_ERR_IO, "error reading %s", path);
    }
    *buf = b;
    *len = n;
    return LK_OK;
}

lk_code lk_pairs_load_lfw(const char *pairs_path, const char *lfw_root, lk_pair_set **out,
                          lk_error *err)
{
    if (!pairs_path || !lfw_root || !out)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_pairs_load_lfw: NULL argument");
    char *buf = NULL;
    size_t len = 0;
    lk_code rc = read_file(pairs_path, &buf, &len, err);
    if (rc != LK_OK)
        return rc;
    rc = lk_pairs_parse_lfw(buf, len, pairs_path, lfw_root, out, err);
    free(buf);
    return rc;
}

/* ------------------------------------------------------- data set scan */

static int cmp_str(const void *a, const void *b)
{
    return strcmp(*(char *const *)a, *(char *const *)b);
}

static int has_image_ext(const char *name)
{
    const char *dot = strrchr(name, '.');
    if (!dot)
        return 0;
    static const char *const exts[] = {".jpg", ".jpeg", ".png"};
    for (size_t i = 0; i < sizeof exts / sizeof exts[0]; i++) {
        const char *e = exts[i];
        const char *d = dot;
        while (*e && *d && tolower((unsigned char)*d) == *e) {
            e++;
            d++;
        }
        if (!*e && !*d)
            return 1;
    }
    return 0;
}

static char *join(const char *a, const char *b)
{
    size_t la = strlen(a), lb = strlen(b);
    char *p = malloc(la + lb + 2);
    if (p) {
        memcpy(p, a, la);
        p[la] = '/';
        memcpy(p + la + 1, b, lb + 1);
    }
    return p;
}

static void free_names(char **v, size_t n)
{
    for (size_t i = 0; i < n; i++)
        free(v[i]);
    free(v);
}

/* Names of the entries of dir (no dot-files), sorted; *n set. */
static lk_code list_dir(const char *dir, char ***names, size_t *n, lk_error *err)
{
    DIR *d = opendir(dir);
    if (!d)
        return lk_error_set(err, LK_ERR_IO, "cannot open folder %s: %s", dir, strerror(errno));
    size_t cap = 64, cnt = 0;
    char **v = malloc(cap * sizeof *v);
    int oom = !v;
    struct dirent *e;
    while (!oom && (e = readdir(d)) != NULL) {
        if (e->d_name[0] == '.')
            continue;
        if (cnt == cap) {
            char **nv = realloc(v, cap * 2 * sizeof *v);
            if (!nv) {
                oom = 1;
                break;
            }
            v = nv;
            cap *= 2;
        }
        if (!(v[cnt] = dup_str(e->d_name))) {
            oom = 1;
            break;
        }
        cnt++;
    }
    closedir(d);
    if (oom) {
        if (v)
            free_names(v, cnt);
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory listing %s", dir);
    }
    qsort(v, cnt, sizeof *v, cmp_str);
    *names = v;
    *n = cnt;
    return LK_OK;
}


void lk_dataset_free(lk_dataset *ds)
{
    if (!ds)
        return;
    for (size_t i = 0; i < ds->count; i++) {
        char **paths = (char **)ds->identities[i].paths;
        for (size_t k = 0; k < ds->identities[i].n_paths; k++)
            free(paths[k]);
        free(paths);
        free((char *)ds->identities[i].name);
    }
    free(ds->identities);
    free(ds);
}

lk_code lk_dataset_scan(const char *root, size_t min_images, lk_dataset **out, lk_error *err)
{
    if (!root || !out)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_dataset_scan: NULL argument");
    *out = NULL;
    char **ids;
    size_t n_ids;
    lk_code rc = list_dir(root, &ids, &n_ids, err);
    if (rc != LK_OK)
        return rc;
    lk_dataset *ds = calloc(1, sizeof *ds);
    if (ds)
        ds->identities = calloc(n_ids ? n_ids : 1, sizeof *ds->identities);
    if (!ds || !ds->identities) {
        free(ds);
        free_names(ids, n_ids);
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory scanning %s", root);
    }
    for (size_t i = 0; i < n_ids && rc == LK_OK; i++) {
        char *dir = join(root, ids[i]);
        if (!dir) {
            rc = lk_error_set(err, LK_ERR_NOMEM, "out of memory scanning %s", root);
            break;
        }
        struct stat st;
        if (stat(dir, &st) != 0 || !S_ISDIR(st.st_mode)) {
            free(dir);
            continue;
        }
        char **files;
        size_t n_files;
        rc = list_dir(dir, &files, &n_files, err);
        if (rc != LK_OK) {
            free(dir);
            break;
        }
        size_t keep = 0;
        for (size_t k = 0; k < n_files; k++) {
            if (has_image_ext(files[k])) {
                char *p = join(dir, files[k]);
                free(files[k]);
                files[keep++] = p;
                if (!p)
                    rc = lk_error_set(err, LK_ERR_NOMEM, "out of memory scanning %s", root);
            } else {
                free(files[k]);
            }
        }
        free(dir);
        if (rc != LK_OK || keep < min_images || keep == 0) {
            free_names(files, keep);
            continue;
        }
        lk_identity *id = &ds->identities[ds->count];
        id->name = dup_str(ids[i]);
        id->paths = (const char *const *)files;
        id->n_paths = keep;
        ds->count++;
        if (!id->name)
            rc = lk_error_set(err, LK_ERR_NOMEM, "out of memory scanning %s", root);
    }
    free_names(ids, n_ids);
    if (rc != LK_OK) {
        lk_dataset_free(ds);
        return rc;
    }
    if (ds->count == 0) {
        lk_dataset_free(ds);
        return lk_error_set(err, LK_ERR_DATA, "%s has no identity folder with at least %zu images; "
                            "expected <root>/<identity>/<image>.jpg", root, min_images ? min_images : 1);
    }
    *out = ds;
    return LK_OK;
}

/* ------------------------------------------------------- pair generator */

/* Open-addressing set of 128-bit keys, so no pair is drawn twice. */
typedef struct key_set {
    uint64_t *k; /* 2 words per slot; slot empty when both are ~0 */
    size_t cap;  /* power of two */
} key_set;

static int keyset_init(key_set *s, size_t n)
{
    s->cap = 16;
    while (s->cap < n * 2 + 16)
        s->cap <<= 1;
    s->k = malloc(s->cap * 2 * sizeof *s->k);
    if (!s->k)
        return 0;
    memset(s->k, 0xff, s->cap * 2 * sizeof *s->k);
    return 1;
}

static uint64_t mix64(uint64_t z)
{
    /* splitmix64 finaliser (Steele, Lea, Flood 2014) as a hash. */
    z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
    z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
    return z ^ (z >> 31);
}

/* Returns 1 when inserted, 0 when already present. The table is sized for
 * the number of insertions the caller can make, so it never fills. */
static int keyset_insert(key_set *s, uint64_t a, uint64_t b)
{
    size_t h = (size_t)(mix64(a ^ mix64(b)) & (s->cap - 1));
    for (;;) {
        uint64_t *slot = &s->k[2 * h];
        if (slot[0] == UINT64_MAX && slot[1] == UINT64_MAX) {
            slot[0] = a;
            slot[1] = b;
            return 1;
        }
        if (slot[0] == a && slot[1] == b)
            return 0;
        h = (h + 1) & (s->cap - 1);
    }
}

static lk_code add_generated(lk_pair_set *set, const lk_identity *ida, size_t ia,
                             const lk_identity *idb, size_t ib, int fold, int genuine)
{
    lk_pair *pr = &set->pairs[set->count];
    memset(pr, 0, sizeof *pr);
    set->count++;
    pr->name_a = dup_str(ida->name);
    pr->name_b = dup_str(idb->name);
    pr->path_a = dup_str(ida->paths[ia]);
    pr->path_b = dup_str(idb->paths[ib]);
    pr->index_a = (int)ia + 1;
    pr->index_b = (int)ib + 1;
    pr->fold = fold;
    pr->genuine = genuine;
    return pr->name_a && pr->name_b && pr->path_a && pr->path_b ? LK_OK : LK_ERR_NOMEM;
}

/* Draws pairs among the identities ids[part[0..np)]. */
static lk_code generate_part(const lk_identity *ids, const size_t *part, size_t np, size_t want,
                             int fold, lk_rng *rng, lk_pair_set **out, lk_error *err)
{
    size_t *elig = malloc((np ? np : 1) * sizeof *elig);
    if (!elig)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory generating pairs");
    size_t ne = 0;
    double possible = 0;
    for (size_t i = 0; i < np; i++) {
        size_t k = ids[part[i]].n_paths;
        if (k >= 2) {
            elig[ne++] = part[i];
            possible += 0.5 * (double)k * (double)(k - 1);
        }
    }
    if (ne == 0 || np < 2) {
        free(elig);
        return lk_error_set(err, LK_ERR_DATA, "a split of %zu identities has %s; use more "
                            "identities or a different calibration fraction", np,
                            ne == 0 ? "no identity with two images (no genuine pair possible)"
                                    : "fewer than two identities (no impostor pair possible)");
    }
    if ((double)want > possible)
        want = (size_t)possible;
    lk_pair_set *set = calloc(1, sizeof *set);
    key_set ks = {0};
    lk_code rc = LK_OK;
    if (!set || !(set->pairs = calloc(want ? 2 * want : 1, sizeof *set->pairs)) || !keyset_init(&ks, 2 * want)) {
        rc = lk_error_set(err, LK_ERR_NOMEM, "out of memory generating %zu pairs", 2 * want);
        goto fail;
    }
    set->n_folds = 1;
    /* Genuine: identity uniform among those with two images, then two
     * distinct images uniform; when nearly every possible pair is wanted,
     * enumerate instead so the loop cannot stall on rejections. */
    size_t n_gen = 0;
    if ((double)want * 2.0 >= possible) {
        for (size_t e = 0; e < ne && n_gen < want; e++) {
            const lk_identity *id = &ids[elig[e]];
            for (size_t a = 0; a + 1 < id->n_paths && n_gen < want; a++)
                for (size_t b = a + 1; b < id->n_paths && n_gen < want; b++) {
                    if (add_generated(set, id, a, id, b, fold, 1) != LK_OK)
                        goto nomem;
                    n_gen++;
                }
        }
    } else {
        /* The cap on attempts is common practice against pathological
         * inputs; with want <= possible/2 it is far from reached. */
        size_t attempts = 0, max_attempts = 64 * want + 1024;
        while (n_gen < want && attempts++ < max_attempts) {
            size_t e = elig[lk_rng_below(rng, ne)];
            const lk_identity *id = &ids[e];
            size_t a = (size_t)lk_rng_below(rng, id->n_paths);
            size_t b = (size_t)lk_rng_below(rng, id->n_paths - 1);
            if (b >= a)
                b++;
            else {
                size_t t = a;
                a = b;
                b = t;
            }
            if (!keyset_insert(&ks, ((uint64_t)e << 32) | a, ((uint64_t)e << 32) | b))
                continue;
            if (add_generated(set, id, a, id, b, fold, 1) != LK_OK)
                goto nomem;
            n_gen++;
        }
    }
    /* Impostor: as many as genuine, two distinct identities uniform over the
     * split, one image of each uniform. */
    size_t n_imp = 0, attempts = 0, max_attempts = 64 * n_gen + 1024;
    while (n_imp < n_gen && attempts++ < max_attempts) {
        size_t ia = (size_t)lk_rng_below(rng, np);
        size_t ib = (size_t)lk_rng_below(rng, np - 1);
        if (ib >= ia)
            ib++;
        size_t ea = part[ia], eb = part[ib];
        size_t a = (size_t)lk_rng_below(rng, ids[ea].n_paths);
        size_t b = (size_t)lk_rng_below(rng, ids[eb].n_paths);
        uint64_t ka = ((uint64_t)ea << 32) | a, kb = ((uint64_t)eb << 32) | b;
        if (!keyset_insert(&ks, ka < kb ? ka : kb, (ka < kb ? kb : ka) | (1ULL << 63)))
            continue;
        if (add_generated(set, &ids[ea], a, &ids[eb], b, fold, 0) != LK_OK)
            goto nomem;
        n_imp++;
    }
    free(ks.k);
    free(elig);
    *out = set;
    return LK_OK;
nomem:
    rc = lk_error_set(err, LK_ERR_NOMEM, "out of memory generating pairs");
fail:
    free(ks.k);
    free(elig);
    lk_pair_set_free(set);
    return rc;
}

lk_code lk_pairs_generate(const lk_identity *ids, size_t n_ids, const lk_pairgen_params *params,
                          lk_pair_set **train, lk_pair_set **calib, lk_error *err)
{
    if (!ids || !params || (!train && !calib))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "lk_pairs_generate: NULL argument");
    if (!(params->calib_fraction >= 0.0 && params->calib_fraction < 1.0))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "calibration fraction %g must be in [0, 1)",
                            params->calib_fraction);
    if (n_ids > UINT32_MAX)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "too many identities (%zu)", n_ids);
    for (size_t i = 0; i < n_ids; i++)
        if (!ids[i].name || (!ids[i].paths && ids[i].n_paths) || ids[i].n_paths > UINT32_MAX)
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "identity %zu is incomplete", i);
    if (train)
        *train = NULL;
    if (calib)
        *calib = NULL;
    size_t *order = malloc((n_ids ? n_ids : 1) * sizeof *order);
    if (!order)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory generating pairs");
    for (size_t i = 0; i < n_ids; i++)
        order[i] = i;
    lk_rng rng;
    lk_rng_seed(&rng, params->seed);
    lk_rng_shuffle(&rng, order, n_ids);
    size_t n_cal = (size_t)(params->calib_fraction * (double)n_ids + 0.5);
    /* Independent streams for the two parts, so changing the size asked of
     * one does not change the pairs drawn for the other. */
    lk_rng rng_train = rng, rng_cal;
    lk_rng_seed(&rng_cal, lk_rng_next(&rng) ^ 0x5ca1ab1eULL);
    lk_code rc = LK_OK;
    if (train)
        rc = generate_part(ids, order + n_cal, n_ids - n_cal, params->train_pairs_per_class, 0,
                           &rng_train, train, err);
    if (rc == LK_OK && calib) {
        rc = generate_part(ids, order, n_cal, params->calib_pairs_per_class, 1, &rng_cal, calib, err);
        if (rc != LK_OK && train) {
            lk_pair_set_free(*train);
            *train = NULL;
        }
    }
    free(order);
    return rc;
}
