/* The key file (docs/key-file.md): reading, creating, rotating, refreshing,
 * and the uses of its fixed keys (API-key hashing, audit signing). */
#include <errno.h>
#include <fcntl.h>
#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include <sodium.h>

#include "internal.h"

/* A key file is a few hundred bytes; anything this large is not one. */
#define KEYFILE_MAX_BYTES (1u << 20)
#define KEYFILE_MAGIC "likeness-keys"

int lk__sodium_ready(void)
{
    return sodium_init() >= 0;
}

/* The lock is the one mutable part of a key ring that is otherwise used
 * through const pointers; the object itself is never defined const (it is
 * malloc'd), so casting the qualifier away is well-defined. */
const lk_keyset *lk__keyring_acquire(const lk_keyring *kr)
{
    pthread_rwlock_rdlock((pthread_rwlock_t *)&kr->lock);
    return kr->ks;
}

void lk__keyring_release(const lk_keyring *kr)
{
    pthread_rwlock_unlock((pthread_rwlock_t *)&kr->lock);
}

int lk__key_id_valid(const char *s, size_t n)
{
    if (n == 0 || n > LK_KEY_ID_MAX - 1)
        return 0;
    for (size_t i = 0; i < n; i++) {
        char c = s[i];
        if (!((c >= 'a' && c <= 'z') || (c >= '0' && c <= '9') || c == '_' || c == '-'))
            return 0;
    }
    return 1;
}

const uint8_t *lk__keyset_find(const lk_keyset *ks, const char *id, size_t id_len)
{
    for (size_t i = 0; i < ks->n; i++)
        if (strlen(ks->ids[i]) == id_len && !memcmp(ks->ids[i], id, id_len))
            return ks->secret + KS_TEMPLATE_OFF + LK_KEY_BYTES * i;
    return NULL;
}

const uint8_t *lk__keyring_find_locked(const lk_keyring *kr, const char *id, size_t id_len)
{
    const lk_dataset *ds = kr->ds;
    if (ds)
        for (size_t i = 0; i < ds->n; i++)
            if (strlen(ds->ids[i]) == id_len && !memcmp(ds->ids[i], id, id_len))
                return ds->secret + LK_KEY_BYTES * i;
    return lk__keyset_find(kr->ks, id, id_len);
}

void lk__keyring_current_locked(const lk_keyring *kr, const char **id, const uint8_t **key)
{
    const lk_dataset *ds = kr->ds;
    if (ds && ds->current >= 0) {
        *id = ds->ids[ds->current];
        *key = ds->secret + LK_KEY_BYTES * (size_t)ds->current;
        return;
    }
    *id = kr->ks->ids[kr->ks->current];
    *key = kr->ks->secret + KS_TEMPLATE_OFF + LK_KEY_BYTES * kr->ks->current;
}

static void keyset_free(lk_keyset *ks)
{
    if (!ks)
        return;
    sodium_free(ks->secret); /* wipes before unmapping */
    free(ks->ids);
    free(ks);
}

static lk_keyset *keyset_alloc(size_t n, lk_error *err)
{
    lk_keyset *ks = calloc(1, sizeof *ks);
    if (!ks) {
        lk_error_set(err, LK_ERR_NOMEM, "out of memory for the key set");
        return NULL;
    }
    ks->ids = calloc(n ? n : 1, sizeof *ks->ids);
    /* sodium_malloc places the block against a guard page and mlocks it. */
    ks->secret = sodium_malloc(KS_TEMPLATE_OFF + LK_KEY_BYTES * n);
    if (!ks->ids || !ks->secret) {
        keyset_free(ks);
        lk_error_set(err, LK_ERR_NOMEM, "out of memory for the key set (sodium_malloc)");
        return NULL;
    }
    ks->n = n;
    return ks;
}

/* Derives the Ed25519 key pair of the seed (RFC 8032 section 5.1.5, as
 * libsodium's crypto_sign_seed_keypair does it), then seals the block
 * read-only. */
static void keyset_finish(lk_keyset *ks)
{
    crypto_sign_seed_keypair(ks->audit_pk, ks->secret + KS_AUDIT_SK_OFF,
                             ks->secret + KS_SEED_OFF);
    sodium_mprotect_readonly(ks->secret);
}

/* ---- parsing ---- */

static int is_blank(char c)
{
    return c == ' ' || c == '\t' || c == '\r';
}

/* Splits line[0..n) into at most max tokens; returns the count, or max + 1
 * if there are more. */
static size_t tokenize(const char *line, size_t n, const char **tok, size_t *tlen, size_t max)
{
    size_t k = 0, i = 0;
    while (i < n) {
        while (i < n && is_blank(line[i]))
            i++;
        if (i == n)
            break;
        if (k == max)
            return max + 1;
        size_t start = i;
        while (i < n && !is_blank(line[i]))
            i++;
        tok[k] = line + start;
        tlen[k] = i - start;
        k++;
    }
    return k;
}

/* Decodes exactly 64 hex digits into 32 bytes of dst (secure memory). */
static int decode_key_hex(const char *hex, size_t n, uint8_t *dst)
{
    size_t bin_len = 0;
    const char *end = NULL;
    if (n != 2 * LK_KEY_BYTES)
        return 0;
    if (sodium_hex2bin(dst, LK_KEY_BYTES, hex, n, NULL, &bin_len, &end) != 0 ||
        bin_len != LK_KEY_BYTES || end != hex + n) {
        sodium_memzero(dst, LK_KEY_BYTES);
        return 0;
    }
    return 1;
}

#define MALFORMED(...) (lk_error_set(err, LK_ERR_KEY, __VA_ARGS__), (void)0)

/* Parses the text of a key file (docs/key-file.md) into a new key set. */
static lk_keyset *keyset_parse(const char *text, size_t len, const char *path, lk_error *err)
{
    /* First pass: count template keys, so the secure block has its final size. */
    size_t n_keys = 0;
    for (size_t i = 0; i < len;) {
        size_t j = i;
        while (j < len && text[j] != '\n')
            j++;
        size_t k = i;
        while (k < j && is_blank(text[k]))
            k++;
        if (j - k >= 12 && !memcmp(text + k, "template-key", 12))
            n_keys++;
        i = j + 1;
    }
    if (n_keys == 0) {
        MALFORMED("key file %s has no template-key line; it is not a likeness key file or "
                  "was damaged (restore it from your backup)", path);
        return NULL;
    }
    lk_keyset *ks = keyset_alloc(n_keys, err);
    if (!ks)
        return NULL;

    size_t line_no = 0, filled = 0, currents = 0;
    int have_version = 0, have_apikey = 0, have_seed = 0;
    for (size_t i = 0; i < len;) {
        size_t j = i;
        while (j < len && text[j] != '\n')
            j++;
        const char *line = text + i;
        size_t n = j - i;
        i = j + 1;
        line_no++;
        if (memchr(line, '\0', n)) {
            MALFORMED("key file %s, line %zu: contains a NUL byte", path, line_no);
            goto fail;
        }
        const char *tok[4];
        size_t tl[4];
        size_t nt = tokenize(line, n, tok, tl, 4);
        if (line_no == 1) {
            if (nt != 2 || tl[0] != strlen(KEYFILE_MAGIC) ||
                memcmp(tok[0], KEYFILE_MAGIC, tl[0]) != 0) {
                MALFORMED("key file %s, line 1: expected '" KEYFILE_MAGIC " 1'; this is not a "
                          "likeness key file", path);
                goto fail;
            }
            if (tl[1] != 1 || tok[1][0] != '1') {
                MALFORMED("key file %s, line 1: key file version '%.*s' is not one this build "
                          "reads (1); upgrade likeness", path, (int)(tl[1] > 16 ? 16 : tl[1]),
                          tok[1]);
                goto fail;
            }
            have_version = 1;
            continue;
        }
        if (nt == 0 || tok[0][0] == '#')
            continue;
#define IS(word) (tl[0] == sizeof(word) - 1 && !memcmp(tok[0], word, sizeof(word) - 1))
        if (IS("template-key")) {
            if (nt < 3 || nt > 4) {
                MALFORMED("key file %s, line %zu: expected 'template-key ID HEX [current]'",
                          path, line_no);
                goto fail;
            }
            if (!lk__key_id_valid(tok[1], tl[1])) {
                MALFORMED("key file %s, line %zu: key id must be 1 to %d characters from "
                          "a-z, 0-9, '_' and '-'", path, line_no, LK_KEY_ID_MAX - 1);
                goto fail;
            }
            if (lk__keyset_find(ks, tok[1], tl[1])) {
                MALFORMED("key file %s, line %zu: key id %.*s appears twice", path, line_no,
                          (int)tl[1], tok[1]);
                goto fail;
            }
            if (nt == 4) {
                if (tl[3] != 7 || memcmp(tok[3], "current", 7) != 0) {
                    MALFORMED("key file %s, line %zu: the only word allowed after the key is "
                              "'current'", path, line_no);
                    goto fail;
                }
                ks->current = filled;
                currents++;
            }
            if (filled >= ks->n) { /* the first pass counted these lines */
                MALFORMED("key file %s changed while it was read; try again", path);
                goto fail;
            }
            int ok = decode_key_hex(tok[2], tl[2], ks->secret + KS_TEMPLATE_OFF +
                                                      LK_KEY_BYTES * filled);
            if (!ok) {
                MALFORMED("key file %s, line %zu: a key is exactly 64 hexadecimal digits (32 "
                          "bytes)", path, line_no);
                goto fail;
            }
            memcpy(ks->ids[filled], tok[1], tl[1]);
            ks->ids[filled][tl[1]] = '\0';
            filled++;
        } else if (IS("apikey-hash-key") || IS("audit-signing-seed")) {
            int apikey = IS("apikey-hash-key");
            if (nt != 2) {
                MALFORMED("key file %s, line %zu: expected '%.*s HEX'", path, line_no,
                          (int)tl[0], tok[0]);
                goto fail;
            }
            if (apikey ? have_apikey : have_seed) {
                MALFORMED("key file %s, line %zu: %.*s appears twice", path, line_no,
                          (int)tl[0], tok[0]);
                goto fail;
            }
            int ok = decode_key_hex(tok[1], tl[1], ks->secret +
                                                       (apikey ? KS_APIKEY_OFF : KS_SEED_OFF));
            if (!ok) {
                MALFORMED("key file %s, line %zu: a key is exactly 64 hexadecimal digits (32 "
                          "bytes)", path, line_no);
                goto fail;
            }
            if (apikey)
                have_apikey = 1;
            else
                have_seed = 1;
        } else {
            MALFORMED("key file %s, line %zu: unknown line '%.*s'; expected template-key, "
                      "apikey-hash-key, audit-signing-seed or a # comment", path, line_no,
                      (int)(tl[0] > 32 ? 32 : tl[0]), tok[0]);
            goto fail;
        }
#undef IS
    }
    if (!have_version) {
        MALFORMED("key file %s is empty", path);
        goto fail;
    }
    if (filled != ks->n) {
        MALFORMED("key file %s changed while it was read; try again", path);
        goto fail;
    }
    if (currents != 1) {
        MALFORMED("key file %s marks %zu template keys 'current'; exactly one must be", path,
                  currents);
        goto fail;
    }
    if (!have_apikey || !have_seed) {
        MALFORMED("key file %s lacks its %s line; restore the file from your backup", path,
                  !have_apikey ? "apikey-hash-key" : "audit-signing-seed");
        goto fail;
    }
    keyset_finish(ks);
    return ks;
fail:
    keyset_free(ks);
    return NULL;
}

/* Reads and parses an open key file after checking what it is and its mode. */
static lk_keyset *keyset_read_fd(int fd, const char *path, struct stat *st, lk_error *err)
{
    if (fstat(fd, st) != 0) {
        lk_error_set(err, LK_ERR_IO, "cannot stat key file %s: %s", path, strerror(errno));
        return NULL;
    }
    if (!S_ISREG(st->st_mode)) {
        lk_error_set(err, LK_ERR_KEY, "key file %s is not a regular file", path);
        return NULL;
    }
    if (st->st_mode & 077) {
        lk_error_set(err, LK_ERR_KEY,
                     "key file %s has mode %04o, which lets group or others at it; run "
                     "`chmod 600 %s` (and check who may have copied it)",
                     path, (unsigned)(st->st_mode & 07777), path);
        return NULL;
    }
    if (st->st_size > (off_t)KEYFILE_MAX_BYTES) {
        lk_error_set(err, LK_ERR_KEY, "key file %s is %lld bytes, too large to be a key file",
                     path, (long long)st->st_size);
        return NULL;
    }
    size_t cap = (size_t)st->st_size + 1;
    /* The text holds every key in hex: keep it out of swap, wipe it on free. */
    char *text = sodium_malloc(cap);
    if (!text) {
        lk_error_set(err, LK_ERR_NOMEM, "out of memory reading key file %s", path);
        return NULL;
    }
    size_t len = 0;
    while (len < cap - 1) {
        ssize_t r = read(fd, text + len, cap - 1 - len);
        if (r < 0 && errno == EINTR)
            continue;
        if (r < 0) {
            lk_error_set(err, LK_ERR_IO, "cannot read key file %s: %s", path, strerror(errno));
            sodium_free(text);
            return NULL;
        }
        if (r == 0)
            break;
        len += (size_t)r;
    }
    lk_keyset *ks = keyset_parse(text, len, path, err);
    sodium_free(text);
    return ks;
}

static lk_keyset *keyset_read(const char *path, struct stat *st, lk_error *err)
{
    /* O_NONBLOCK: opening a FIFO must not hang; fstat then refuses it. */
    int fd = open(path, O_RDONLY | O_CLOEXEC | O_NOCTTY | O_NONBLOCK);
    if (fd < 0) {
        lk_error_set(err, errno == ENOENT ? LK_ERR_KEY : LK_ERR_IO,
                     "cannot open key file %s: %s%s", path, strerror(errno),
                     errno == ENOENT ? " (create one with `likeness keys init`)" : "");
        return NULL;
    }
    lk_keyset *ks = keyset_read_fd(fd, path, st, err);
    close(fd);
    return ks;
}

/* ---- writing ---- */

/* The file's text for ks (sodium_malloc'd; the caller sodium_free's it). */
static char *keyset_format(const lk_keyset *ks, size_t *len, lk_error *err)
{
    static const char head[] =
        KEYFILE_MAGIC " 1\n"
        "# likeness key file (docs/key-file.md). Keep it secret (mode 0600) and back it up:\n"
        "# without it no stored template can be opened again.\n";
    const size_t key_line = 13 + LK_KEY_ID_MAX + 2 * LK_KEY_BYTES + 10;
    size_t cap = sizeof head + ks->n * key_line + 2 * (24 + 2 * LK_KEY_BYTES);
    char *out = sodium_malloc(cap);
    if (!out) {
        lk_error_set(err, LK_ERR_NOMEM, "out of memory writing the key file");
        return NULL;
    }
    size_t o = 0;
    memcpy(out, head, sizeof head - 1);
    o += sizeof head - 1;
    for (size_t i = 0; i < ks->n; i++) {
        o += (size_t)snprintf(out + o, cap - o, "template-key %s ", ks->ids[i]);
        sodium_bin2hex(out + o, cap - o, ks->secret + KS_TEMPLATE_OFF + LK_KEY_BYTES * i,
                       LK_KEY_BYTES);
        o += 2 * LK_KEY_BYTES;
        o += (size_t)snprintf(out + o, cap - o, "%s\n", i == ks->current ? " current" : "");
    }
    o += (size_t)snprintf(out + o, cap - o, "apikey-hash-key ");
    sodium_bin2hex(out + o, cap - o, ks->secret + KS_APIKEY_OFF, LK_KEY_BYTES);
    o += 2 * LK_KEY_BYTES;
    o += (size_t)snprintf(out + o, cap - o, "\naudit-signing-seed ");
    sodium_bin2hex(out + o, cap - o, ks->secret + KS_SEED_OFF, LK_KEY_BYTES);
    o += 2 * LK_KEY_BYTES;
    out[o++] = '\n';
    *len = o;
    return out;
}

static int write_all(int fd, const char *buf, size_t len)
{
    while (len > 0) {
        ssize_t w = write(fd, buf, len);
        if (w < 0 && errno == EINTR)
            continue;
        if (w < 0)
            return -1;
        buf += w;
        len -= (size_t)w;
    }
    return 0;
}

/* The directory part of path ("." if none), malloc'd. */
static char *dir_of(const char *path)
{
    const char *slash = strrchr(path, '/');
    if (!slash)
        return strdup(".");
    size_t n = slash == path ? 1 : (size_t)(slash - path);
    char *d = malloc(n + 1);
    if (d) {
        memcpy(d, path, n);
        d[n] = '\0';
    }
    return d;
}

/* A rename or a new name is durable only once its directory is fsync'd. */
static lk_code fsync_dir(const char *path, lk_error *err)
{
    char *dir = dir_of(path);
    if (!dir)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory");
    int fd = open(dir, O_RDONLY | O_CLOEXEC | O_DIRECTORY);
    if (fd < 0 || fsync(fd) != 0) {
        int e = errno;
        if (fd >= 0)
            close(fd);
        lk_code c = lk_error_set(err, LK_ERR_IO, "cannot fsync directory %s: %s", dir,
                                 strerror(e));
        free(dir);
        return c;
    }
    close(fd);
    free(dir);
    return LK_OK;
}

static void new_key_id(char id[LK_KEY_ID_MAX])
{
    uint8_t r[8];
    randombytes_buf(r, sizeof r);
    id[0] = 't';
    sodium_bin2hex(id + 1, LK_KEY_ID_MAX - 1, r, sizeof r);
}

/* Writes text to a new file fd (mode 0600) and makes it durable. */
static lk_code write_new(int fd, const char *path, const char *text, size_t len, lk_error *err)
{
    if (write_all(fd, text, len) != 0 || fsync(fd) != 0) {
        int e = errno;
        close(fd);
        return lk_error_set(err, LK_ERR_IO, "cannot write key file %s: %s", path, strerror(e));
    }
    if (close(fd) != 0)
        return lk_error_set(err, LK_ERR_IO, "cannot write key file %s: %s", path,
                            strerror(errno));
    return LK_OK;
}

lk_code lk_keyring_create(const char *path, lk_error *err)
{
    if (!path || !*path)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no key file path given");
    if (!lk__sodium_ready())
        return lk_error_set(err, LK_ERR_INTERNAL, "libsodium failed to initialise");
    lk_keyset *ks = keyset_alloc(1, err);
    if (!ks)
        return err ? err->code : LK_ERR_NOMEM;
    new_key_id(ks->ids[0]);
    ks->current = 0;
    randombytes_buf(ks->secret, KS_SEED_OFF + LK_KEY_BYTES); /* hashing key and seed */
    randombytes_buf(ks->secret + KS_TEMPLATE_OFF, LK_KEY_BYTES);
    keyset_finish(ks);
    size_t len = 0;
    char *text = keyset_format(ks, &len, err);
    keyset_free(ks);
    if (!text)
        return err ? err->code : LK_ERR_NOMEM;

    int fd = open(path, O_CREAT | O_EXCL | O_WRONLY | O_CLOEXEC | O_NOCTTY, 0600);
    if (fd < 0) {
        int e = errno;
        sodium_free(text);
        if (e == EEXIST)
            return lk_error_set(err, LK_ERR_KEY,
                                "key file %s already exists and was left as it is (to add a "
                                "key use `likeness keys rotate`)", path);
        return lk_error_set(err, LK_ERR_IO, "cannot create key file %s: %s", path, strerror(e));
    }
    lk_code c = write_new(fd, path, text, len, err);
    sodium_free(text);
    if (c == LK_OK)
        c = fsync_dir(path, err);
    if (c != LK_OK)
        unlink(path); /* a half-written key file must not look usable */
    return c;
}

lk_keyring *lk_keyring_load(const char *path, lk_error *err)
{
    if (!path || !*path) {
        lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no key file path given");
        return NULL;
    }
    if (!lk__sodium_ready()) {
        lk_error_set(err, LK_ERR_INTERNAL, "libsodium failed to initialise");
        return NULL;
    }
    struct stat st;
    lk_keyset *ks = keyset_read(path, &st, err);
    if (!ks)
        return NULL;
    lk_keyring *kr = calloc(1, sizeof *kr);
    if (!kr || !(kr->path = strdup(path)) || pthread_rwlock_init(&kr->lock, NULL) != 0) {
        if (kr)
            free(kr->path);
        free(kr);
        keyset_free(ks);
        lk_error_set(err, LK_ERR_NOMEM, "out of memory for the key ring");
        return NULL;
    }
    kr->ks = ks;
    kr->dev = st.st_dev;
    kr->ino = st.st_ino;
    kr->size = st.st_size;
    kr->mtim = st.st_mtim;
    return kr;
}

void lk_keyring_free(lk_keyring *kr)
{
    if (!kr)
        return;
    keyset_free(kr->ks);
    lk__dataset_free(kr->ds);
    pthread_rwlock_destroy(&kr->lock);
    free(kr->path);
    free(kr);
}

lk_code lk_keyring_refresh(lk_keyring *kr, bool *changed, lk_error *err)
{
    if (changed)
        *changed = false;
    if (!kr)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no key ring");
    struct stat st;
    if (stat(kr->path, &st) != 0)
        return lk_error_set(err, LK_ERR_IO, "cannot stat key file %s: %s; the keys already "
                            "loaded stay in use", kr->path, strerror(errno));
    /* The identity is read under the lock: several threads may refresh. */
    pthread_rwlock_rdlock(&kr->lock);
    bool same = st.st_dev == kr->dev && st.st_ino == kr->ino && st.st_size == kr->size &&
                st.st_mtim.tv_sec == kr->mtim.tv_sec && st.st_mtim.tv_nsec == kr->mtim.tv_nsec;
    pthread_rwlock_unlock(&kr->lock);
    if (same)
        return LK_OK;
    lk_keyset *ks = keyset_read(kr->path, &st, err);
    if (!ks)
        return err ? err->code : LK_ERR_KEY;
    pthread_rwlock_wrlock(&kr->lock);
    lk_keyset *old = kr->ks;
    kr->ks = ks;
    kr->dev = st.st_dev;
    kr->ino = st.st_ino;
    kr->size = st.st_size;
    kr->mtim = st.st_mtim;
    pthread_rwlock_unlock(&kr->lock);
    keyset_free(old);
    if (changed)
        *changed = true;
    return LK_OK;
}

/* Opens path for writing and takes an exclusive POSIX lock on it, so that
 * two rotations cannot both read the old file and the second drop the
 * first's new key. A rotation replaces the file (rename), so once the lock
 * is granted the path must still name the locked inode; otherwise retry.
 * The lock goes with the descriptor's close (POSIX record locks), so the
 * file is read through this same descriptor. */
static int open_locked(const char *path, lk_error *err)
{
    for (int attempt = 0; attempt < 100; attempt++) {
        int fd = open(path, O_RDWR | O_CLOEXEC | O_NOCTTY | O_NONBLOCK);
        if (fd < 0) {
            lk_error_set(err, errno == ENOENT ? LK_ERR_KEY : LK_ERR_IO,
                         "cannot open key file %s: %s", path, strerror(errno));
            return -1;
        }
        struct stat a, b;
        if (fstat(fd, &a) != 0 || !S_ISREG(a.st_mode)) {
            close(fd);
            lk_error_set(err, LK_ERR_KEY, "key file %s is not a regular file", path);
            return -1;
        }
        struct flock fl = {.l_type = F_WRLCK, .l_whence = SEEK_SET, .l_start = 0, .l_len = 0};
        int r;
        while ((r = fcntl(fd, F_SETLKW, &fl)) != 0 && errno == EINTR)
            ;
        if (r != 0) {
            int e = errno;
            close(fd);
            lk_error_set(err, LK_ERR_IO, "cannot lock key file %s: %s", path, strerror(e));
            return -1;
        }
        if (stat(path, &b) == 0 && b.st_dev == a.st_dev && b.st_ino == a.st_ino)
            return fd;
        close(fd);
    }
    lk_error_set(err, LK_ERR_BUSY, "key file %s keeps being replaced; try again", path);
    return -1;
}

lk_code lk_keyring_rotate_file(const char *path, char new_id[LK_KEY_ID_MAX], lk_error *err)
{
    if (!path || !*path)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no key file path given");
    if (!lk__sodium_ready())
        return lk_error_set(err, LK_ERR_INTERNAL, "libsodium failed to initialise");
    int lfd = open_locked(path, err);
    if (lfd < 0)
        return err ? err->code : LK_ERR_IO;
    struct stat st;
    lk_keyset *old = keyset_read_fd(lfd, path, &st, err);
    if (!old) {
        close(lfd);
        return err ? err->code : LK_ERR_KEY;
    }
    lk_keyset *ks = keyset_alloc(old->n + 1, err);
    if (!ks) {
        keyset_free(old);
        close(lfd);
        return err ? err->code : LK_ERR_NOMEM;
    }
    memcpy(ks->ids, old->ids, old->n * sizeof *old->ids);
    memcpy(ks->secret, old->secret, KS_TEMPLATE_OFF + LK_KEY_BYTES * old->n);
    do
        new_key_id(ks->ids[old->n]);
    while (lk__keyset_find(old, ks->ids[old->n], strlen(ks->ids[old->n])));
    randombytes_buf(ks->secret + KS_TEMPLATE_OFF + LK_KEY_BYTES * old->n, LK_KEY_BYTES);
    ks->current = old->n;
    keyset_free(old);
    keyset_finish(ks);

    size_t len = 0;
    char *text = keyset_format(ks, &len, err);
    char id[LK_KEY_ID_MAX];
    memcpy(id, ks->ids[ks->current], LK_KEY_ID_MAX);
    keyset_free(ks);
    if (!text) {
        close(lfd);
        return err ? err->code : LK_ERR_NOMEM;
    }

    /* The temporary file sits in the same directory, so rename is atomic. */
    char *dir = dir_of(path);
    const char *base = strrchr(path, '/');
    base = base ? base + 1 : path;
    size_t tlen = (dir ? strlen(dir) : 0) + strlen(base) + 32;
    char *tmp = dir ? malloc(tlen) : NULL;
    if (!tmp) {
        free(dir);
        sodium_free(text);
        close(lfd);
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory");
    }
    uint8_t r[6];
    char rhex[13];
    randombytes_buf(r, sizeof r);
    sodium_bin2hex(rhex, sizeof rhex, r, sizeof r);
    snprintf(tmp, tlen, "%s/.%s.%s.tmp", dir, base, rhex);
    free(dir);
    lk_code c = LK_OK;
    int fd = open(tmp, O_CREAT | O_EXCL | O_WRONLY | O_CLOEXEC | O_NOCTTY, 0600);
    if (fd < 0)
        c = lk_error_set(err, LK_ERR_IO, "cannot create temporary key file %s: %s", tmp,
                         strerror(errno));
    else
        c = write_new(fd, tmp, text, len, err);
    sodium_free(text);
    if (c == LK_OK && rename(tmp, path) != 0)
        c = lk_error_set(err, LK_ERR_IO, "cannot replace key file %s: %s", path,
                         strerror(errno));
    if (c != LK_OK && fd >= 0)
        unlink(tmp);
    if (c == LK_OK)
        c = fsync_dir(path, err);
    free(tmp);
    close(lfd);
    if (c == LK_OK && new_id)
        memcpy(new_id, id, LK_KEY_ID_MAX);
    return c;
}

void lk_keyring_current_id(const lk_keyring *kr, char id[LK_KEY_ID_MAX])
{
    const char *kid;
    const uint8_t *key;
    (void)lk__keyring_acquire(kr);
    lk__keyring_current_locked(kr, &kid, &key);
    memcpy(id, kid, LK_KEY_ID_MAX);
    lk__keyring_release(kr);
}

void lk_keyring_file_current_id(const lk_keyring *kr, char id[LK_KEY_ID_MAX])
{
    const lk_keyset *ks = lk__keyring_acquire(kr);
    memcpy(id, ks->ids[ks->current], LK_KEY_ID_MAX);
    lk__keyring_release(kr);
}

bool lk_keyring_has_key(const lk_keyring *kr, const char *key_id)
{
    if (!kr || !key_id)
        return false;
    (void)lk__keyring_acquire(kr);
    bool has = lk__keyring_find_locked(kr, key_id, strlen(key_id)) != NULL;
    lk__keyring_release(kr);
    return has;
}

/* ---- the fixed keys ---- */

lk_code lk_apikey_hash(const lk_keyring *kr, const char *token, uint8_t hash[32], lk_error *err)
{
    char id[LK_APIKEY_ID_HEX + 1];
    if (!kr || !hash)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no key ring or output");
    lk_code c = lk_apikey_parse(token, id, err);
    if (c != LK_OK)
        return c;
    /* Keyed BLAKE2b (RFC 7693 section 2.5), 32-byte digest, over the whole token. */
    const lk_keyset *ks = lk__keyring_acquire(kr);
    crypto_generichash(hash, 32, (const unsigned char *)token, strlen(token),
                       ks->secret + KS_APIKEY_OFF, LK_KEY_BYTES);
    lk__keyring_release(kr);
    return LK_OK;
}

void lk_keyring_audit_public_key(const lk_keyring *kr, uint8_t pk[32])
{
    const lk_keyset *ks = lk__keyring_acquire(kr);
    memcpy(pk, ks->audit_pk, 32);
    lk__keyring_release(kr);
}

lk_code lk_keyring_audit_sign(const lk_keyring *kr, const uint8_t *msg, size_t len,
                              uint8_t sig[64], lk_error *err)
{
    if (!kr || !sig || (!msg && len))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no key ring, message or output");
    static const uint8_t empty[1] = {0};
    const lk_keyset *ks = lk__keyring_acquire(kr);
    /* Ed25519, RFC 8032 section 5.1.6 (pure, no context). */
    int r = crypto_sign_detached(sig, NULL, msg ? msg : empty, len, ks->secret + KS_AUDIT_SK_OFF);
    lk__keyring_release(kr);
    if (r != 0)
        return lk_error_set(err, LK_ERR_INTERNAL, "Ed25519 signing failed");
    return LK_OK;
}
