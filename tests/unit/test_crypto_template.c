/* crypto: template records (docs/template-format.md). Round trip; every
 * flipped byte and every truncation refused with the code the format
 * document gives for that field; bindings (template id, model id, feature
 * configuration); unknown keys; re-sealing after a rotation; concurrent
 * opens while the key file rotates; data keys wrapped under a file key
 * (docs/key-file.md, "Data keys in the store"): unwrapped here with a direct
 * libsodium call and the associated data built from the document, wrong
 * KEK, altered wrappings, switching of the current key, refresh keeping them. The independent reader of the format
 * (PyNaCl, hashlib) is tests/ref/check_crypto_template.py. */
#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include <sodium.h>

#include "likeness/crypto.h"
#include "lk_test.h"

#define DIM 16
#define CONFIG "crop=64x64;hog=8x8/9;lbp=u2"
#define MODEL "00112233445566778899aabbccddeeff"

static char dir[64];

static const char *path_in(const char *name)
{
    static char p[4][160];
    static int k;
    k = (k + 1) % 4;
    snprintf(p[k], sizeof p[k], "%s/%s", dir, name);
    return p[k];
}

static lk_keyring *new_ring(const char *name)
{
    lk_error err;
    const char *p = path_in(name);
    unlink(p);
    if (lk_keyring_create(p, &err) != LK_OK)
        LK_SKIP("cannot create a key file in %s: %s", dir, err.message);
    lk_keyring *kr = lk_keyring_load(p, &err);
    if (!kr)
        LK_SKIP("cannot load %s: %s", p, err.message);
    return kr;
}

static int id_char(int c)
{
    return (c >= 'a' && c <= 'z') || (c >= '0' && c <= '9') || c == '_' || c == '-';
}

static int lower_hex(int c)
{
    return (c >= '0' && c <= '9') || (c >= 'a' && c <= 'f');
}

/* The code docs/template-format.md ("Opening") gives for a record whose byte
 * at offset off was changed to c, the key id being n bytes long. */
static lk_code expected_code(size_t off, size_t n, int c)
{
    if (off < 7)
        return LK_ERR_TEMPLATE_INVALID;          /* magic, version, key id length */
    if (off < 7 + n)
        return id_char(c) ? LK_ERR_KEY : LK_ERR_TEMPLATE_INVALID; /* another key id */
    if (off < 7 + n + 32)
        return LK_ERR_TEMPLATE_INVALID;          /* another template id */
    if (off < 7 + n + 64)
        return lower_hex(c) ? LK_ERR_TEMPLATE_MISMATCH : LK_ERR_TEMPLATE_INVALID;
    if (off < 7 + n + 96)
        return LK_ERR_TEMPLATE_MISMATCH;         /* another configuration digest */
    return LK_ERR_TEMPLATE_INVALID;              /* dim, nonce, ciphertext, tag */
}

static void fill(double *v, size_t n, unsigned seed)
{
    uint64_t s = seed * 0x9e3779b97f4a7c15ull + 1;
    for (size_t i = 0; i < n; i++) {
        s = s * 6364136223846793005ull + 1442695040888963407ull;
        v[i] = ((double)(s >> 11) / 9007199254740992.0 - 0.5) * 8;
    }
}

static void test_roundtrip_and_damage(lk_keyring *kr)
{
    lk_error err;
    lk_template_binding b = {.model_id = MODEL, .feature_config = CONFIG};
    lk_template_new_id(b.template_id);
    CHECK(lk_template_id_valid(b.template_id), "new id %s", b.template_id);
    double v[DIM], out[DIM + 4];
    fill(v, DIM, 1);
    v[3] = -0.0;
    v[5] = 5e-324; /* subnormal: the bit pattern must survive */
    uint8_t *rec = NULL, *rec2 = NULL;
    size_t len = 0, len2 = 0, dim = 0;
    char kid[LK_KEY_ID_MAX], cur[LK_KEY_ID_MAX], rid[LK_KEY_ID_MAX];
    CHECK(lk_template_seal(kr, &b, v, DIM, &rec, &len, kid, &err) == LK_OK, "seal: %s",
          err.message);
    if (!rec)
        return;
    lk_keyring_current_id(kr, cur);
    CHECK(!strcmp(kid, cur), "sealed under %s, current %s", kid, cur);
    size_t n = strlen(kid);
    CHECK(len == 7 + n + 32 + 32 + 32 + 4 + 24 + 8 * DIM + 16, "record length %zu", len);
    CHECK(lk_template_record_key_id(rec, len, rid, &err) == LK_OK && !strcmp(rid, kid),
          "record key id %s", rid);
    CHECK(lk_template_open(kr, &b, rec, len, out, DIM + 4, &dim, &err) == LK_OK && dim == DIM &&
              !memcmp(out, v, sizeof v), "round trip: %s", err.message);
    CHECK(lk_template_open(kr, &b, rec, len, out, DIM, &dim, &err) == LK_OK && dim == DIM,
          "exact room");
    CHECK(lk_template_open(kr, &b, rec, len, out, DIM - 1, &dim, &err) ==
              LK_ERR_INVALID_ARGUMENT && dim == 0, "too little room not refused");
    CHECK(lk_template_seal(kr, &b, v, DIM, &rec2, &len2, NULL, &err) == LK_OK && len2 == len &&
              memcmp(rec, rec2, len) != 0, "two seals of one template are identical (nonce)");
    free(rec2);

    /* Every byte changed, three ways. */
    uint8_t *bad = malloc(len + 1);
    static const uint8_t masks[] = {0x01, 0x80, 0xff};
    size_t wrong = 0;
    for (size_t m = 0; m < sizeof masks; m++)
        for (size_t off = 0; off < len; off++) {
            memcpy(bad, rec, len);
            bad[off] ^= masks[m];
            lk_code want = expected_code(off, n, bad[off]);
            dim = 99;
            lk_code got = lk_template_open(kr, &b, bad, len, out, DIM, &dim, &err);
            if (got != want || dim != 0) {
                if (wrong++ < 10)
                    CHECK(0, "byte %zu ^ %02x: code %s, want %s (%s)", off, masks[m],
                          lk_code_name(got), lk_code_name(want), err.message);
            }
            if (want == LK_ERR_TEMPLATE_MISMATCH)
                CHECK(strstr(err.message, "enrol"), "mismatch message: %s", err.message);
        }
    CHECK(wrong == 0, "%zu of %zu changed bytes gave the wrong code", wrong, 3 * len);
    /* Every truncation, and one byte too many. */
    wrong = 0;
    for (size_t l = 0; l < len; l++) {
        memcpy(bad, rec, l);
        if (lk_template_open(kr, &b, bad, l, out, DIM, &dim, &err) != LK_ERR_TEMPLATE_INVALID)
            wrong++;
        lk_code kc = lk_template_record_key_id(bad, l, rid, NULL);
        if (l < 7 + n + 132 && kc != LK_ERR_TEMPLATE_INVALID)
            wrong++;
    }
    CHECK(wrong == 0, "%zu truncations not refused as template_invalid", wrong);
    memcpy(bad, rec, len);
    bad[len] = 0;
    CHECK(lk_template_open(kr, &b, bad, len + 1, out, DIM, &dim, &err) ==
              LK_ERR_TEMPLATE_INVALID, "trailing byte accepted");
    CHECK(lk_template_open(kr, &b, NULL, 0, out, DIM, &dim, &err) == LK_ERR_TEMPLATE_INVALID,
          "NULL record");
    free(bad);

    /* Bindings. */
    lk_template_binding o = b;
    lk_template_new_id(o.template_id);
    CHECK(lk_template_open(kr, &o, rec, len, out, DIM, &dim, &err) == LK_ERR_TEMPLATE_INVALID,
          "another template id: %s", lk_code_name(err.code));
    o = b;
    memcpy(o.model_id, "ffeeddccbbaa99887766554433221100", 33);
    CHECK(lk_template_open(kr, &o, rec, len, out, DIM, &dim, &err) ==
              LK_ERR_TEMPLATE_MISMATCH && strstr(err.message, "enrol"),
          "another model id: %s %s", lk_code_name(err.code), err.message);
    o = b;
    o.feature_config = CONFIG ";v=2";
    CHECK(lk_template_open(kr, &o, rec, len, out, DIM, &dim, &err) ==
              LK_ERR_TEMPLATE_MISMATCH && strstr(err.message, "enrol"),
          "another feature configuration: %s %s", lk_code_name(err.code), err.message);
    o = b;
    o.template_id[0] = (char)(o.template_id[0] == 'a' ? 'B' : 'A');
    CHECK(lk_template_open(kr, &o, rec, len, out, DIM, &dim, &err) == LK_ERR_INVALID_ARGUMENT,
          "malformed template id in the binding");

    /* Unknown key id: a record of another key file. */
    lk_keyring *other = new_ring("other.keys");
    CHECK(lk_template_open(other, &b, rec, len, out, DIM, &dim, &err) == LK_ERR_KEY &&
              strstr(err.message, kid), "unknown key: %s %s", lk_code_name(err.code),
          err.message);
    lk_keyring_free(other);

    /* Seal refusals. */
    uint8_t *r = NULL;
    size_t rl = 0;
    double nan_v[2] = {1, 0.0 / 0.0};
    CHECK(lk_template_seal(kr, &b, v, 0, &r, &rl, NULL, &err) == LK_ERR_INVALID_ARGUMENT,
          "dim 0");
    CHECK(lk_template_seal(kr, &b, v, LK_TEMPLATE_MAX_DIM + 1, &r, &rl, NULL, &err) ==
              LK_ERR_INVALID_ARGUMENT, "dim above the maximum");
    CHECK(lk_template_seal(kr, &b, nan_v, 2, &r, &rl, NULL, &err) == LK_ERR_INVALID_ARGUMENT,
          "NaN sealed");
    o = b;
    memcpy(o.model_id, "00112233445566778899AABBCCDDEEFF", 33);
    CHECK(lk_template_seal(kr, &o, v, DIM, &r, &rl, NULL, &err) == LK_ERR_INVALID_ARGUMENT,
          "upper-case model id sealed");
    CHECK(!r, "output set on failure");
    free(rec);
}

/* Random and half-random inputs: never a crash (ASan/UBSan watch), only
 * the documented codes. */
static void test_noise(lk_keyring *kr)
{
    lk_template_binding b = {.model_id = MODEL, .feature_config = CONFIG};
    lk_template_new_id(b.template_id);
    double v[4] = {1, 2, 3, 4}, out[8];
    uint8_t *rec = NULL;
    size_t len = 0, dim;
    lk_error err;
    if (lk_template_seal(kr, &b, v, 4, &rec, &len, NULL, &err) != LK_OK)
        return;
    uint64_t s = 42;
    uint8_t buf[512];
    size_t odd = 0;
    for (int t = 0; t < 20000; t++) {
        size_t l = (size_t)(t % 300);
        memcpy(buf, rec, len < sizeof buf ? len : sizeof buf);
        size_t from = t & 1 ? 0 : (size_t)(t % 160);
        for (size_t i = from; i < l; i++) {
            s = s * 6364136223846793005ull + 1442695040888963407ull;
            buf[i] = (uint8_t)(s >> 56);
        }
        lk_code c = lk_template_open(kr, &b, buf, l, out, 8, &dim, &err);
        if (c != LK_ERR_TEMPLATE_INVALID && c != LK_ERR_TEMPLATE_MISMATCH && c != LK_ERR_KEY)
            odd++;
        uint8_t *r2 = NULL;
        size_t l2;
        c = lk_template_reseal(kr, b.template_id, buf, l, &r2, &l2, NULL, &err);
        if (c != LK_ERR_TEMPLATE_INVALID && c != LK_ERR_KEY)
            odd++;
        free(r2);
    }
    CHECK(odd == 0, "%zu noise inputs gave an undocumented code", odd);
    free(rec);
}

static void test_reseal(void)
{
    lk_error err;
    const char *p = path_in("rot.keys");
    lk_keyring *kr = new_ring("rot.keys");
    char k0[LK_KEY_ID_MAX], k1[LK_KEY_ID_MAX], rid[LK_KEY_ID_MAX], nid[LK_KEY_ID_MAX];
    lk_keyring_current_id(kr, k0);
    lk_template_binding b = {.model_id = MODEL, .feature_config = CONFIG};
    lk_template_new_id(b.template_id);
    double v[DIM], out[DIM];
    fill(v, DIM, 7);
    uint8_t *rec = NULL, *re = NULL;
    size_t len = 0, rlen = 0, dim = 0;
    CHECK(lk_template_seal(kr, &b, v, DIM, &rec, &len, NULL, &err) == LK_OK, "seal");
    CHECK(lk_keyring_rotate_file(p, k1, &err) == LK_OK, "rotate: %s", err.message);
    bool changed;
    CHECK(lk_keyring_refresh(kr, &changed, &err) == LK_OK && changed, "refresh");
    CHECK(lk_template_reseal(kr, b.template_id, rec, len, &re, &rlen, nid, &err) == LK_OK,
          "reseal: %s", err.message);
    CHECK(!strcmp(nid, k1), "resealed under %s, want %s", nid, k1);
    CHECK(re && lk_template_record_key_id(re, rlen, rid, &err) == LK_OK && !strcmp(rid, k1),
          "record key id after reseal %s", rid);
    CHECK(re && lk_template_open(kr, &b, re, rlen, out, DIM, &dim, &err) == LK_OK &&
              dim == DIM && !memcmp(out, v, sizeof v), "resealed record: %s", err.message);
    CHECK(lk_template_open(kr, &b, rec, len, out, DIM, &dim, &err) == LK_OK &&
              !memcmp(out, v, sizeof v), "old record no longer opens: %s", err.message);
    /* The binding carries over. */
    lk_template_binding o = b;
    o.feature_config = "another";
    CHECK(re && lk_template_open(kr, &o, re, rlen, out, DIM, &dim, &err) ==
              LK_ERR_TEMPLATE_MISMATCH, "resealed record lost its configuration binding");
    o = b;
    memcpy(o.model_id, "ffeeddccbbaa99887766554433221100", 33);
    CHECK(re && lk_template_open(kr, &o, re, rlen, out, DIM, &dim, &err) ==
              LK_ERR_TEMPLATE_MISMATCH, "resealed record lost its model binding");
    /* Reseal refusals. */
    uint8_t *x = NULL;
    size_t xl = 0;
    lk_template_new_id(o.template_id);
    CHECK(lk_template_reseal(kr, o.template_id, rec, len, &x, &xl, NULL, &err) ==
              LK_ERR_TEMPLATE_INVALID && !x, "reseal under another template id");
    rec[len - 1] ^= 1;
    CHECK(lk_template_reseal(kr, b.template_id, rec, len, &x, &xl, NULL, &err) ==
              LK_ERR_TEMPLATE_INVALID && !x, "reseal of a damaged record");
    rec[len - 1] ^= 1;
    lk_keyring *other = new_ring("other2.keys");
    CHECK(lk_template_reseal(other, b.template_id, rec, len, &x, &xl, NULL, &err) == LK_ERR_KEY &&
              !x, "reseal without the key");
    lk_keyring_free(other);

    /* Drop the old key from the file (what an operator does once every
     * record is re-sealed): the old record then fails with LK_ERR_KEY and the
     * re-sealed one still opens. */
    FILE *f = fopen(p, "r");
    char text[4096] = "", line[512];
    while (f && fgets(line, sizeof line, f))
        if (!strstr(line, k0))
            strcat(text, line);
    if (f)
        fclose(f);
    FILE *w = fopen(p, "w");
    if (w) {
        fputs(text, w);
        fclose(w);
    }
    chmod(p, 0600);
    CHECK(lk_keyring_refresh(kr, &changed, &err) == LK_OK && changed, "refresh: %s",
          err.message);
    CHECK(!lk_keyring_has_key(kr, k0) && lk_keyring_has_key(kr, k1), "old key dropped");
    CHECK(lk_template_open(kr, &b, rec, len, out, DIM, &dim, &err) == LK_ERR_KEY,
          "record under a dropped key: %s", lk_code_name(err.code));
    CHECK(re && lk_template_open(kr, &b, re, rlen, out, DIM, &dim, &err) == LK_OK,
          "resealed record after dropping the old key: %s", err.message);
    free(rec);
    free(re);
    lk_keyring_free(kr);
}

/* The 32 bytes of template key id from the key file's text (docs/key-file.md:
 * "template-key ID HEX [current]"); false if absent. */
static bool file_key(const char *path, const char *id, uint8_t key[32])
{
    FILE *f = fopen(path, "r");
    char line[512], want[64];
    bool ok = false;
    snprintf(want, sizeof want, "template-key %s ", id);
    while (f && !ok && fgets(line, sizeof line, f))
        if (!strncmp(line, want, strlen(want)))
            ok = sodium_hex2bin(key, 32, line + strlen(want), 64, NULL, NULL, NULL) == 0;
    if (f)
        fclose(f);
    return ok;
}

/* Unwraps as docs/key-file.md says: nonce = wrapped[0..24), AD =
 * "likeness-key-wrap-v1" || u8 len || key_id || u8 len || kek_id. */
static bool doc_unwrap(const char *key_id, const char *kek_id, const uint8_t kek[32],
                       const uint8_t *w, size_t wlen, uint8_t key[32])
{
    uint8_t ad[128];
    size_t o = 0, a = strlen(key_id), b = strlen(kek_id);
    memcpy(ad, "likeness-key-wrap-v1", 20);
    o = 20;
    ad[o++] = (uint8_t)a;
    memcpy(ad + o, key_id, a);
    o += a;
    ad[o++] = (uint8_t)b;
    memcpy(ad + o, kek_id, b);
    o += b;
    unsigned long long n = 0;
    return wlen == 72 &&
           crypto_aead_xchacha20poly1305_ietf_decrypt(key, &n, NULL, w + 24, wlen - 24, ad, o, w,
                                                      kek) == 0 &&
           n == 32;
}

/* Opens a record with a raw key as docs/template-format.md says (AD: the
 * header [0, 131+n); nonce at 107+n). */
static bool doc_open(const uint8_t *rec, size_t len, const uint8_t key[32], double *out, size_t dim)
{
    size_t n = rec[6], h = 131 + n;
    unsigned long long pl = 0;
    uint8_t pt[8 * DIM];
    if (len != h + 8 * dim + 16 || dim > DIM ||
        crypto_aead_xchacha20poly1305_ietf_decrypt(pt, &pl, NULL, rec + h, len - h, rec, h,
                                                   rec + 107 + n, key) != 0)
        return false;
    memcpy(out, pt, 8 * dim); /* little-endian host assumed, as the x86-64/arm64 builds are */
    return pl == 8 * dim;
}

static void test_data_keys(void)
{
    lk_error err;
    const char *p = path_in("dk.keys");
    lk_keyring *kr = new_ring("dk.keys");
    char f0[LK_KEY_ID_MAX], k1[LK_KEY_ID_MAX], k2[LK_KEY_ID_MAX], kek[LK_KEY_ID_MAX],
        kek2[LK_KEY_ID_MAX], cur[LK_KEY_ID_MAX], rid[LK_KEY_ID_MAX];
    lk_keyring_current_id(kr, f0);
    uint8_t *w1 = NULL, *w2 = NULL;
    size_t l1 = 0, l2 = 0;
    CHECK(lk_keyring_wrap_new_key(kr, k1, kek, &w1, &l1, &err) == LK_OK, "wrap: %s",
          err.message);
    CHECK(strlen(k1) == 17 && k1[0] == 'd' && strspn(k1 + 1, "0123456789abcdef") == 16 &&
              !strcmp(kek, f0) && l1 == LK_WRAPPED_KEY_BYTES,
          "data key id %s under %s, %zu bytes", k1, kek, l1);
    CHECK(lk_keyring_wrap_new_key(kr, k2, kek2, &w2, &l2, &err) == LK_OK && strcmp(k1, k2) &&
              !strcmp(kek2, f0), "second data key");
    CHECK(!lk_keyring_has_key(kr, k1), "not installed before lk_keyring_install");

    uint8_t fk[32], d1[32], d2[32];
    CHECK(file_key(p, f0, fk), "file key %s read from the file", f0);
    CHECK(doc_unwrap(k1, f0, fk, w1, l1, d1) && doc_unwrap(k2, f0, fk, w2, l2, d2) &&
              memcmp(d1, d2, 32) && memcmp(d1, fk, 32),
          "wrapped keys open as docs/key-file.md describes, two different keys");
    uint8_t scratch[32];
    CHECK(!doc_unwrap(k2, f0, fk, w1, l1, scratch),
          "a wrapping does not open under another key id");

    lk_wrapped_key ks[2] = {{.wrapped = w1, .len = l1, .is_current = true},
                            {.wrapped = w2, .len = l2}};
    memcpy(ks[0].key_id, k1, LK_KEY_ID_MAX);
    memcpy(ks[0].kek_id, kek, LK_KEY_ID_MAX);
    memcpy(ks[1].key_id, k2, LK_KEY_ID_MAX);
    memcpy(ks[1].kek_id, kek2, LK_KEY_ID_MAX);
    CHECK(lk_keyring_install(kr, ks, 2, &err) == LK_OK, "install: %s", err.message);
    lk_keyring_current_id(kr, cur);
    CHECK(!strcmp(cur, k1) && lk_keyring_has_key(kr, k1) && lk_keyring_has_key(kr, k2) &&
              lk_keyring_has_key(kr, f0), "current %s, want the store's current %s", cur, k1);
    lk_keyring_file_current_id(kr, cur);
    CHECK(!strcmp(cur, f0), "file's current key unchanged");

    lk_template_binding b = {.model_id = MODEL, .feature_config = CONFIG};
    lk_template_new_id(b.template_id);
    double v[DIM], out[DIM];
    fill(v, DIM, 11);
    uint8_t *rec = NULL, *rec2 = NULL;
    size_t len = 0, len2 = 0, dim = 0;
    CHECK(lk_template_seal(kr, &b, v, DIM, &rec, &len, rid, &err) == LK_OK && !strcmp(rid, k1),
          "sealed under the data key %s: %s", rid, err.message);
    CHECK(rec && doc_open(rec, len, d1, out, DIM) && !memcmp(out, v, sizeof v),
          "record opens with the unwrapped data key (libsodium, docs/template-format.md)");

    /* Another key file: the KEK is absent; a wrapping relabelled with its
     * key id fails authentication. Both name the data key. */
    lk_keyring *other = new_ring("dk-other.keys");
    CHECK(lk_keyring_install(other, ks, 2, &err) == LK_ERR_KEY && strstr(err.message, k1) &&
              strstr(err.message, f0), "absent KEK refused: %s", err.message);
    lk_wrapped_key forged = ks[0];
    lk_keyring_current_id(other, forged.kek_id);
    CHECK(lk_keyring_install(other, &forged, 1, &err) == LK_ERR_KEY && strstr(err.message, k1) &&
              strstr(err.message, "authentication"), "wrong KEK refused: %s", err.message);
    CHECK(!lk_keyring_has_key(other, k1), "nothing installed after a refusal");
    CHECK(lk_template_open(other, &b, rec, len, out, DIM, &dim, &err) == LK_ERR_KEY,
          "record under a data key the ring lacks: LK_ERR_KEY");
    lk_keyring_free(other);

    /* Every altered byte of a wrapping is refused, all or nothing: the keys
     * installed before stay. */
    int refused = 0;
    uint8_t t[LK_WRAPPED_KEY_BYTES];
    for (size_t i = 0; i < l2; i++) {
        memcpy(t, w2, l2);
        t[i] ^= 0x01;
        lk_wrapped_key bad[2] = {ks[0], ks[1]};
        bad[1].wrapped = t;
        refused += lk_keyring_install(kr, bad, 2, &err) == LK_ERR_KEY &&
                   strstr(err.message, k2) != NULL;
    }
    CHECK(refused == (int)l2, "%d of %zu altered wrappings refused", refused, l2);
    lk_wrapped_key swapped[2] = {ks[0], ks[1]};
    memcpy(swapped[0].key_id, k2, LK_KEY_ID_MAX);
    memcpy(swapped[1].key_id, k1, LK_KEY_ID_MAX);
    CHECK(lk_keyring_install(kr, swapped, 2, &err) == LK_ERR_KEY, "swapped key ids refused");
    lk_wrapped_key dup[2] = {ks[0], ks[0]};
    dup[1].is_current = false;
    CHECK(lk_keyring_install(kr, dup, 2, &err) == LK_ERR_KEY && strstr(err.message, "twice"),
          "repeated key id refused: %s", err.message);
    lk_wrapped_key two[2] = {ks[0], ks[1]};
    two[1].is_current = true;
    CHECK(lk_keyring_install(kr, two, 2, &err) == LK_ERR_KEY, "two current keys refused");
    lk_wrapped_key shortw = ks[1];
    shortw.len = 40;
    CHECK(lk_keyring_install(kr, &shortw, 1, &err) == LK_ERR_KEY, "short wrapping refused");
    lk_wrapped_key clash = ks[1];
    memcpy(clash.key_id, f0, LK_KEY_ID_MAX);
    CHECK(lk_keyring_install(kr, &clash, 1, &err) == LK_ERR_KEY, "a file key's id refused");
    lk_keyring_current_id(kr, cur);
    CHECK(!strcmp(cur, k1) && lk_keyring_has_key(kr, k2) &&
              lk_template_open(kr, &b, rec, len, out, DIM, &dim, &err) == LK_OK,
          "after the refusals the installed keys stay (current %s)", cur);

    /* Current switching: the store's mark decides; none marked: the file's. */
    ks[0].is_current = false;
    ks[1].is_current = true;
    CHECK(lk_keyring_install(kr, ks, 2, &err) == LK_OK, "install: %s", err.message);
    lk_keyring_current_id(kr, cur);
    CHECK(!strcmp(cur, k2), "current switched to %s", cur);
    CHECK(lk_template_seal(kr, &b, v, DIM, &rec2, &len2, rid, &err) == LK_OK &&
              !strcmp(rid, k2) && doc_open(rec2, len2, d2, out, DIM) && !memcmp(out, v, sizeof v),
          "sealed under the new current key %s", rid);
    CHECK(lk_template_open(kr, &b, rec, len, out, DIM, &dim, &err) == LK_OK &&
              !memcmp(out, v, sizeof v), "record under the previous data key still opens");
    ks[1].is_current = false;
    CHECK(lk_keyring_install(kr, ks, 2, &err) == LK_OK, "install, none current");
    lk_keyring_current_id(kr, cur);
    CHECK(!strcmp(cur, f0), "no current data key: the file's current key %s", cur);
    ks[1].is_current = true;
    CHECK(lk_keyring_install(kr, ks, 2, &err) == LK_OK, "install again");

    /* A new file key: refresh keeps the data keys; re-wrapping moves them
     * under it. */
    char f1[LK_KEY_ID_MAX];
    bool changed = false;
    CHECK(lk_keyring_rotate_file(p, f1, &err) == LK_OK &&
              lk_keyring_refresh(kr, &changed, &err) == LK_OK && changed,
          "file rotated and re-read: %s", err.message);
    lk_keyring_current_id(kr, cur);
    CHECK(!strcmp(cur, k2) && lk_keyring_has_key(kr, k1) &&
              lk_template_open(kr, &b, rec, len, out, DIM, &dim, &err) == LK_OK,
          "refresh keeps the installed data keys (current %s)", cur);
    uint8_t *rw = NULL;
    size_t rwl = 0;
    char rkek[LK_KEY_ID_MAX];
    uint8_t fk1[32], d1b[32];
    CHECK(lk_keyring_rewrap_key(kr, k1, rkek, &rw, &rwl, &err) == LK_OK && !strcmp(rkek, f1),
          "re-wrapped under %s: %s", rkek, err.message);
    CHECK(rw && file_key(p, f1, fk1) && doc_unwrap(k1, f1, fk1, rw, rwl, d1b) &&
              !memcmp(d1b, d1, 32), "the re-wrapped key is the same key under the new KEK");
    uint8_t *none = NULL;
    size_t nl = 0;
    CHECK(lk_keyring_rewrap_key(kr, f0, rkek, &none, &nl, &err) == LK_ERR_KEY && !none,
          "a file key is not a data key to re-wrap");
    free(w1);
    w1 = rw;
    l1 = rwl;
    ks[0].wrapped = w1;
    memcpy(ks[0].kek_id, f1, LK_KEY_ID_MAX);
    CHECK(lk_keyring_install(kr, ks, 2, &err) == LK_OK && lk_keyring_has_key(kr, k1),
          "install of the re-wrapped key: %s", err.message);
    CHECK(lk_keyring_install(kr, NULL, 0, &err) == LK_OK && !lk_keyring_has_key(kr, k1),
          "an empty list removes the data keys");
    lk_keyring_current_id(kr, cur);
    CHECK(!strcmp(cur, f1), "and the file's current key seals again (%s)", cur);
    sodium_memzero(d1, 32);
    sodium_memzero(d2, 32);
    free(w1);
    free(w2);
    free(rec);
    free(rec2);
    lk_keyring_free(kr);
    unlink(p);
    unlink(path_in("dk-other.keys"));
}

/* Readers open records while the key file is rotated and refreshed. */
typedef struct reader {
    lk_keyring *kr;
    const lk_template_binding *b;
    const uint8_t *rec;
    size_t len;
    const double *v;
    int failures;
} reader;

static void *read_loop(void *arg)
{
    reader *r = arg;
    double out[DIM];
    size_t dim;
    for (int i = 0; i < 300; i++) {
        uint8_t *s = NULL;
        size_t sl;
        if (lk_template_open(r->kr, r->b, r->rec, r->len, out, DIM, &dim, NULL) != LK_OK ||
            memcmp(out, r->v, sizeof out))
            r->failures++;
        if (lk_template_seal(r->kr, r->b, r->v, DIM, &s, &sl, NULL, NULL) != LK_OK ||
            lk_template_open(r->kr, r->b, s, sl, out, DIM, &dim, NULL) != LK_OK)
            r->failures++;
        free(s);
    }
    return NULL;
}

static void test_threads(void)
{
    const char *p = path_in("thr.keys");
    lk_keyring *kr = new_ring("thr.keys");
    lk_template_binding b = {.model_id = MODEL, .feature_config = CONFIG};
    lk_template_new_id(b.template_id);
    double v[DIM];
    fill(v, DIM, 3);
    uint8_t *rec = NULL;
    size_t len = 0;
    lk_error err;
    CHECK(lk_template_seal(kr, &b, v, DIM, &rec, &len, NULL, &err) == LK_OK, "seal");
    reader rd[4];
    pthread_t th[4];
    for (int i = 0; i < 4; i++) {
        rd[i] = (reader){kr, &b, rec, len, v, 0};
        pthread_create(&th[i], NULL, read_loop, &rd[i]);
    }
    int rot_fail = 0;
    for (int i = 0; i < 6; i++) {
        char id[LK_KEY_ID_MAX];
        bool changed;
        if (lk_keyring_rotate_file(p, id, &err) != LK_OK ||
            lk_keyring_refresh(kr, &changed, &err) != LK_OK)
            rot_fail++;
    }
    int fails = 0;
    for (int i = 0; i < 4; i++) {
        pthread_join(th[i], NULL);
        fails += rd[i].failures;
    }
    CHECK(rot_fail == 0, "rotation during reads failed: %s", err.message);
    CHECK(fails == 0, "%d opens or seals failed during rotation", fails);
    free(rec);
    lk_keyring_free(kr);
}

int main(void)
{
    snprintf(dir, sizeof dir, "/tmp/lk-crypto-XXXXXX");
    if (!mkdtemp(dir))
        LK_SKIP("cannot create a temporary directory");
    lk_keyring *kr = new_ring("main.keys");
    test_roundtrip_and_damage(kr);
    test_noise(kr);
    lk_keyring_free(kr);
    test_reseal();
    test_data_keys();
    test_threads();
    const char *names[] = {"main.keys", "other.keys", "other2.keys", "rot.keys", "thr.keys"};
    for (size_t i = 0; i < 5; i++)
        unlink(path_in(names[i]));
    rmdir(dir);
    return lk_test_done();
}
