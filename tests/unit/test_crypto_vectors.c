/* crypto: audit signing against the published Ed25519 vectors, the key file
 * (mode checks, malformed files, create, rotate, refresh) and API-key tokens.
 * The keyed BLAKE2b hash of API keys is checked against Python's hashlib in
 * tests/ref/check_crypto_template.py; BLAKE2b itself is libsodium's (its own
 * test suite covers RFC 7693 Appendix A). */
#include <dirent.h>
#include <fcntl.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

#include "likeness/crypto.h"
#include "lk_test.h"

static char dir[64];

static void unhex(const char *h, uint8_t *out, size_t n)
{
    for (size_t i = 0; i < n; i++) {
        unsigned v;
        sscanf(h + 2 * i, "%2x", &v);
        out[i] = (uint8_t)v;
    }
}

static const char *path_in(const char *name)
{
    static char p[4][160];
    static int k;
    k = (k + 1) % 4;
    snprintf(p[k], sizeof p[k], "%s/%s", dir, name);
    return p[k];
}

static void write_file(const char *path, const char *text, mode_t mode)
{
    unlink(path);
    FILE *f = fopen(path, "w");
    if (!f)
        LK_SKIP("cannot write %s", path);
    fputs(text, f);
    fclose(f);
    chmod(path, mode);
}

static char *read_all(const char *path)
{
    FILE *f = fopen(path, "rb");
    if (!f)
        return NULL;
    char *buf = calloc(1, 1 << 16);
    size_t n = fread(buf, 1, (1 << 16) - 1, f);
    buf[n] = '\0';
    fclose(f);
    return buf;
}

#define K1 "1111111111111111111111111111111111111111111111111111111111111111"
#define K2 "2222222222222222222222222222222222222222222222222222222222222222"
#define K3 "3333333333333333333333333333333333333333333333333333333333333333"

/* RFC 8032 section 7.1, TEST 1, 2 and 3: SECRET KEY (the 32-byte seed),
 * PUBLIC KEY, MESSAGE, SIGNATURE. Recalled, then checked character by
 * character against several independent published copies of the RFC's
 * section 7.1. */
static const struct {
    const char *seed, *pk, *msg, *sig;
} rfc8032[] = {
    {"9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60",
     "d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a", "",
     "e5564300c360ac729086e2cc806e828a84877f1eb8e5d974d873e065224901555fb8821590a33bacc61e39701cf"
     "9b46bd25bf5f0595bbe24655141438e7a100b"},
    {"4ccd089b28ff96da9db6c346ec114e0f5b8a319f35aba624da8cf6ed4fb8a6fb",
     "3d4017c3e843895a92b70aa74d1b7ebc9c982ccf2ec4968cc0cd55f12af4660c", "72",
     "92a009a9f0d4cab8720e820b5f642540a2b27b5416503f8fb3762223ebdb69da085ac1e43e15996e458f3613d0f"
     "11d8c387b2eaeb4302aeeb00d291612bb0c00"},
    {"c5aa8df43f9f837bedb7442f31dcb7b166d38535076f094b85ce3a2e0b4458f7",
     "fc51cd8e6218a1a38da47ed00230f0580816ed13ba3303ac5deb911548908025", "af82",
     "6291d657deec24024827e69c3abe01a30ce548a284743a445e3680d7db5ac3ac18ff9b538d16f290ae67f760984"
     "dc6594a7c15e9716ed28dc027beceea1ec40a"},
};

static void test_rfc8032(void)
{
    for (size_t t = 0; t < 3; t++) {
        char text[512];
        snprintf(text, sizeof text,
                 "likeness-keys 1\ntemplate-key t0000000000000001 " K1 " current\n"
                 "apikey-hash-key " K2 "\naudit-signing-seed %s\n", rfc8032[t].seed);
        const char *p = path_in("rfc.keys");
        write_file(p, text, 0600);
        lk_error err;
        lk_keyring *kr = lk_keyring_load(p, &err);
        CHECK(kr, "RFC 8032 TEST %zu: key file refused: %s", t + 1, err.message);
        if (!kr)
            continue;
        uint8_t pk[32], want_pk[32], sig[64], want_sig[64], msg[2] = {0, 0};
        size_t mlen = strlen(rfc8032[t].msg) / 2;
        unhex(rfc8032[t].pk, want_pk, 32);
        unhex(rfc8032[t].sig, want_sig, 64);
        unhex(rfc8032[t].msg, msg, mlen);
        lk_keyring_audit_public_key(kr, pk);
        CHECK(!memcmp(pk, want_pk, 32), "RFC 8032 TEST %zu: public key", t + 1);
        CHECK(lk_keyring_audit_sign(kr, msg, mlen, sig, &err) == LK_OK, "sign: %s", err.message);
        CHECK(!memcmp(sig, want_sig, 64), "RFC 8032 TEST %zu: signature", t + 1);
        CHECK(lk_audit_signature_valid(want_pk, msg, mlen, want_sig),
              "RFC 8032 TEST %zu: published signature not accepted", t + 1);
        for (int bit = 0; bit < 512; bit += 37) {
            uint8_t bad[64];
            memcpy(bad, want_sig, 64);
            bad[bit / 8] ^= (uint8_t)(1u << (bit % 8));
            CHECK(!lk_audit_signature_valid(want_pk, msg, mlen, bad),
                  "RFC 8032 TEST %zu: signature with bit %d flipped accepted", t + 1, bit);
        }
        uint8_t other[3] = {msg[0] ^ 1, 0, 0};
        CHECK(!lk_audit_signature_valid(want_pk, other, mlen ? mlen : 1, want_sig),
              "RFC 8032 TEST %zu: signature accepted for another message", t + 1);
        lk_keyring_free(kr);
    }
}

static const char *good_text =
    "likeness-keys 1\n"
    "# a comment\n"
    "\n"
    "   # an indented comment\n"
    "template-key t00000000000000aa " K1 "\n"
    "template-key\tt00000000000000bb  " K3 "  current  \n"
    "apikey-hash-key " K2 "\n"
    "audit-signing-seed 9D61B19DEFFD5A60BA844AF492EC2CC44449C5697B326919703BAC031CAE7F60\n";

static void test_modes(void)
{
    const char *p = path_in("mode.keys");
    lk_error err;
    mode_t refused[] = {0644, 0640, 0604, 0660, 0601, 0610};
    for (size_t i = 0; i < sizeof refused / sizeof refused[0]; i++) {
        write_file(p, good_text, refused[i]);
        lk_keyring *kr = lk_keyring_load(p, &err);
        CHECK(!kr && err.code == LK_ERR_KEY, "mode %04o not refused", (unsigned)refused[i]);
        CHECK(!kr && strstr(err.message, "chmod 600") && strstr(err.message, p),
              "mode %04o: message does not say what to run: %s", (unsigned)refused[i],
              err.message);
        lk_keyring_free(kr);
    }
    write_file(p, good_text, 0600);
    lk_keyring *kr = lk_keyring_load(p, &err);
    CHECK(kr, "mode 0600 refused: %s", err.message);
    if (kr) {
        char id[LK_KEY_ID_MAX];
        lk_keyring_current_id(kr, id);
        CHECK(!strcmp(id, "t00000000000000bb"), "current id %s", id);
        CHECK(lk_keyring_has_key(kr, "t00000000000000aa") && lk_keyring_has_key(kr, id) &&
                  !lk_keyring_has_key(kr, "t00000000000000cc") && !lk_keyring_has_key(kr, "t"),
              "has_key");
        uint8_t pk[32], want[32];
        lk_keyring_audit_public_key(kr, pk);
        unhex(rfc8032[0].pk, want, 32); /* upper-case hex seed read as the same bytes */
        CHECK(!memcmp(pk, want, 32), "upper-case hex seed");
        lk_keyring_free(kr);
    }
    write_file(p, good_text, 0400);
    kr = lk_keyring_load(p, &err);
    CHECK(kr, "mode 0400 refused: %s", err.message);
    lk_keyring_free(kr);
    /* Not a regular file; absent. */
    kr = lk_keyring_load(dir, &err);
    CHECK(!kr && err.code == LK_ERR_KEY, "a directory accepted as key file");
    kr = lk_keyring_load(path_in("absent.keys"), &err);
    CHECK(!kr && err.code == LK_ERR_KEY && strstr(err.message, "likeness keys init"),
          "absent key file: %d %s", err.code, err.message);
    unlink(p);
}

static void test_malformed(void)
{
    static const struct {
        const char *text;
        const char *needle; /* expected in the message */
    } bad[] = {
        {"", "template-key"},
        {"template-key t1 " K1 " current\napikey-hash-key " K2 "\naudit-signing-seed " K3 "\n",
         "line 1"},
        {"# comment first\nlikeness-keys 1\ntemplate-key t1 " K1 " current\napikey-hash-key " K2
         "\naudit-signing-seed " K3 "\n", "line 1"},
        {"likeness-keys 2\ntemplate-key t1 " K1 " current\napikey-hash-key " K2
         "\naudit-signing-seed " K3 "\n", "upgrade"},
        {"likeness-keys 1\ntemplate-key t1 " K1 "1 current\napikey-hash-key " K2
         "\naudit-signing-seed " K3 "\n", "line 2"},
        {"likeness-keys 1\ntemplate-key t1 " K1 " current\napikey-hash-key 1234\n"
         "audit-signing-seed " K3 "\n", "line 3"},
        {"likeness-keys 1\ntemplate-key t1 " K1 " current\napikey-hash-key " K2 "\n"
         "audit-signing-seed 3333333333333333333333333333333333333333333333333333333333333g33\n",
         "line 4"},
        {"likeness-keys 1\ntemplate-key t1 " K1 " current\napikey-hash-key " K2
         "\naudit-signing-seed " K3 "\nsomething-else 12\n", "line 5"},
        {"likeness-keys 1\ntemplate-key t1 " K1 "\napikey-hash-key " K2 "\naudit-signing-seed " K3
         "\n", "current"},
        {"likeness-keys 1\ntemplate-key t1 " K1 " current\ntemplate-key t2 " K3 " current\n"
         "apikey-hash-key " K2 "\naudit-signing-seed " K3 "\n", "current"},
        {"likeness-keys 1\ntemplate-key t1 " K1 " current\ntemplate-key t1 " K3 "\n"
         "apikey-hash-key " K2 "\naudit-signing-seed " K3 "\n", "line 3"},
        {"likeness-keys 1\ntemplate-key T1 " K1 " current\napikey-hash-key " K2
         "\naudit-signing-seed " K3 "\n", "line 2"},
        {"likeness-keys 1\ntemplate-key t1 " K1 " current\naudit-signing-seed " K3 "\n",
         "apikey-hash-key"},
        {"likeness-keys 1\ntemplate-key t1 " K1 " current\napikey-hash-key " K2 "\n",
         "audit-signing-seed"},
        {"likeness-keys 1\ntemplate-key t1 " K1 " current\napikey-hash-key " K2
         "\napikey-hash-key " K2 "\naudit-signing-seed " K3 "\n", "line 4"},
        {"likeness-keys 1\ntemplate-key t1 " K1 " newest\napikey-hash-key " K2
         "\naudit-signing-seed " K3 "\n", "line 2"},
        {"likeness-keys 1\ntemplate-key t1 " K1 " current extra\napikey-hash-key " K2
         "\naudit-signing-seed " K3 "\n", "line 2"},
        {"likeness-keys 1\ntemplate-key t1\napikey-hash-key " K2 "\naudit-signing-seed " K3 "\n",
         "line 2"},
        {"likeness-keys 1\ntemplate-key t123456789012345678901234567890123 " K1
         " current\napikey-hash-key " K2 "\naudit-signing-seed " K3 "\n", "line 2"},
        {"likeness-keys 1\ntemplate-key t1 " K1 " current\napikey-hash-key " K2 " " K2
         "\naudit-signing-seed " K3 "\n", "line 3"},
    };
    const char *p = path_in("bad.keys");
    for (size_t i = 0; i < sizeof bad / sizeof bad[0]; i++) {
        write_file(p, bad[i].text, 0600);
        lk_error err = {0};
        lk_keyring *kr = lk_keyring_load(p, &err);
        CHECK(!kr && err.code == LK_ERR_KEY, "malformed file %zu accepted", i);
        CHECK(!kr && strstr(err.message, bad[i].needle), "malformed file %zu: message '%s' "
              "lacks '%s'", i, err.message, bad[i].needle);
        CHECK(!strstr(err.message, "1111111111") && !strstr(err.message, "2222222222") &&
                  !strstr(err.message, "3333333333"),
              "malformed file %zu: key material in the message: %s", i, err.message);
        lk_keyring_free(kr);
    }
    /* A NUL byte inside a line. */
    FILE *f = fopen(p, "wb");
    fputs("likeness-keys 1\ntemplate-key t1 " K1 " current\n", f);
    fputc(0, f);
    fputs("apikey-hash-key " K2 "\naudit-signing-seed " K3 "\n", f);
    fclose(f);
    chmod(p, 0600);
    lk_error err;
    lk_keyring *kr = lk_keyring_load(p, &err);
    CHECK(!kr && err.code == LK_ERR_KEY, "NUL byte accepted");
    lk_keyring_free(kr);
    unlink(p);
}

static void test_create_rotate_refresh(void)
{
    const char *p = path_in("new.keys");
    lk_error err;
    unlink(p);
    CHECK(lk_keyring_create(p, &err) == LK_OK, "create: %s", err.message);
    struct stat st;
    CHECK(stat(p, &st) == 0 && S_ISREG(st.st_mode) && (st.st_mode & 0777) == 0600,
          "created key file mode %04o", (unsigned)(st.st_mode & 07777));
    char *before = read_all(p);
    CHECK(lk_keyring_create(p, &err) == LK_ERR_KEY && strstr(err.message, "exists"),
          "create over an existing file: %d %s", err.code, err.message);
    char *after = read_all(p);
    CHECK(before && after && !strcmp(before, after), "existing key file changed by create");
    free(after);

    lk_keyring *kr = lk_keyring_load(p, &err);
    CHECK(kr, "load the created file: %s", err.message);
    if (!kr) {
        free(before);
        return;
    }
    char id0[LK_KEY_ID_MAX];
    lk_keyring_current_id(kr, id0);
    CHECK(strlen(id0) == 17 && id0[0] == 't' && strspn(id0 + 1, "0123456789abcdef") == 16,
          "key id shape: %s", id0);
    CHECK(before && strstr(before, id0), "key id not in the file");

    /* Something sealed under the first key, and the fixed keys' products. */
    lk_template_binding b = {.feature_config = "crop=64x64;lbp=u2"};
    lk_template_new_id(b.template_id);
    memcpy(b.model_id, "0123456789abcdef0123456789abcdef", 33);
    double v[5] = {1.5, -2.25, 0, 1e-300, 3e300};
    uint8_t *rec = NULL;
    size_t rlen = 0;
    CHECK(lk_template_seal(kr, &b, v, 5, &rec, &rlen, NULL, &err) == LK_OK, "seal: %s",
          err.message);
    char token[LK_APIKEY_TOKEN_MAX], kid[LK_APIKEY_ID_HEX + 1];
    uint8_t h0[32], h1[32], pk0[32], pk1[32];
    CHECK(lk_apikey_generate(kr, token, kid, h0, &err) == LK_OK, "apikey: %s", err.message);
    lk_keyring_audit_public_key(kr, pk0);

    /* Rotation: the file gets a new current key, keeps the old one. */
    char id1[LK_KEY_ID_MAX];
    CHECK(lk_keyring_rotate_file(p, id1, &err) == LK_OK, "rotate: %s", err.message);
    CHECK(strcmp(id0, id1) != 0 && strlen(id1) == 17 && id1[0] == 't', "new id %s", id1);
    CHECK(stat(p, &st) == 0 && (st.st_mode & 0777) == 0600, "rotated file mode %04o",
          (unsigned)(st.st_mode & 07777));
    /* No temporary file left behind. */
    DIR *d = opendir(dir);
    int stray = 0;
    for (struct dirent *e; d && (e = readdir(d));)
        if (strstr(e->d_name, ".tmp"))
            stray++;
    if (d)
        closedir(d);
    CHECK(stray == 0, "%d temporary files left after rotation", stray);

    lk_keyring *k2 = lk_keyring_load(p, &err);
    CHECK(k2, "load rotated file: %s", err.message);
    if (k2) {
        char cur[LK_KEY_ID_MAX];
        lk_keyring_current_id(k2, cur);
        CHECK(!strcmp(cur, id1), "current after rotation %s, want %s", cur, id1);
        CHECK(lk_keyring_has_key(k2, id0), "old key dropped by rotation");
        double out[5];
        size_t dim = 0;
        CHECK(rec && lk_template_open(k2, &b, rec, rlen, out, 5, &dim, &err) == LK_OK &&
                  dim == 5 && !memcmp(out, v, sizeof v),
              "record of the old key does not open after rotation: %s", err.message);
        CHECK(lk_apikey_hash(k2, token, h1, &err) == LK_OK && lk_apikey_hash_equal(h0, h1),
              "API-key hashing key changed by rotation");
        lk_keyring_audit_public_key(k2, pk1);
        CHECK(!memcmp(pk0, pk1, 32), "audit key changed by rotation");
        lk_keyring_free(k2);
    }

    /* Refresh picks up the rotation; a second refresh sees no change. */
    bool changed = false;
    CHECK(lk_keyring_refresh(kr, &changed, &err) == LK_OK && changed, "refresh: %s",
          err.message);
    char cur[LK_KEY_ID_MAX];
    lk_keyring_current_id(kr, cur);
    CHECK(!strcmp(cur, id1), "current after refresh %s, want %s", cur, id1);
    CHECK(lk_keyring_refresh(kr, &changed, &err) == LK_OK && !changed, "second refresh changed");
    /* Two more rotations: the file keeps all four keys. */
    char id2[LK_KEY_ID_MAX], id3[LK_KEY_ID_MAX];
    CHECK(lk_keyring_rotate_file(p, id2, &err) == LK_OK &&
              lk_keyring_rotate_file(p, id3, &err) == LK_OK, "rotate twice: %s", err.message);
    CHECK(lk_keyring_refresh(kr, &changed, &err) == LK_OK && changed, "refresh 2");
    lk_keyring_current_id(kr, cur);
    CHECK(!strcmp(cur, id3) && lk_keyring_has_key(kr, id0) && lk_keyring_has_key(kr, id1) &&
              lk_keyring_has_key(kr, id2), "keys after three rotations");
    /* An unsafe mode makes refresh fail, and the old keys stay. */
    chmod(p, 0644);
    char id4[LK_KEY_ID_MAX];
    CHECK(lk_keyring_rotate_file(p, id4, &err) == LK_ERR_KEY && strstr(err.message, "chmod 600"),
          "rotate accepted a 0644 file: %d", err.code);
    /* Touch the file so refresh re-reads it. */
    write_file(p, good_text, 0644);
    CHECK(lk_keyring_refresh(kr, &changed, &err) == LK_ERR_KEY && !changed,
          "refresh accepted a 0644 file");
    lk_keyring_current_id(kr, cur);
    CHECK(!strcmp(cur, id3), "keys lost after a failed refresh");
    chmod(p, 0600);
    CHECK(lk_keyring_refresh(kr, &changed, &err) == LK_OK && changed, "refresh after chmod");
    lk_keyring_current_id(kr, cur);
    CHECK(!strcmp(cur, "t00000000000000bb"), "refresh to a replaced file: %s", cur);
    /* Rotation of a malformed file fails and leaves it alone. */
    write_file(p, "likeness-keys 1\n", 0600);
    CHECK(lk_keyring_rotate_file(p, id4, &err) == LK_ERR_KEY, "rotate of a malformed file");
    after = read_all(p);
    CHECK(after && !strcmp(after, "likeness-keys 1\n"), "malformed file changed by rotate");
    free(after);
    free(rec);
    free(before);
    lk_keyring_free(kr);
    unlink(p);
}

static void test_apikeys(void)
{
    const char *p = path_in("api.keys");
    write_file(p, good_text, 0600);
    lk_error err;
    lk_keyring *kr = lk_keyring_load(p, &err);
    CHECK(kr, "load: %s", err.message);
    if (!kr)
        return;
    char token[LK_APIKEY_TOKEN_MAX], id[LK_APIKEY_ID_HEX + 1], id2[LK_APIKEY_ID_HEX + 1];
    uint8_t h[32], h2[32];
    CHECK(lk_apikey_generate(kr, token, id, h, &err) == LK_OK, "generate: %s", err.message);
    /* docs/key-file.md: ^lkk_[0-9a-f]{16}_[A-Za-z0-9_-]{43}$ */
    CHECK(strlen(token) == 64 && !strncmp(token, "lkk_", 4) && token[20] == '_' &&
              strspn(token + 4, "0123456789abcdef") == 16 &&
              strspn(token + 21, "ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789-_") ==
                  43,
          "token shape: %s", token);
    CHECK(lk_apikey_parse(token, id2, &err) == LK_OK && !strcmp(id, id2) &&
              !strncmp(token + 4, id, 16), "parse");
    CHECK(lk_apikey_hash(kr, token, h2, &err) == LK_OK && lk_apikey_hash_equal(h, h2),
          "hash not reproducible");
    char t2[LK_APIKEY_TOKEN_MAX];
    memcpy(t2, token, sizeof t2);
    t2[30] = t2[30] == 'A' ? 'B' : 'A';
    CHECK(lk_apikey_hash(kr, t2, h2, &err) == LK_OK && !lk_apikey_hash_equal(h, h2),
          "another token, same hash");
    memcpy(h2, h, 32);
    h2[31] ^= 1;
    CHECK(!lk_apikey_hash_equal(h, h2), "hash_equal ignores the last byte");
    const char *bad[] = {
        "",
        "lkk_",
        "lkk_0123456789abcdef_AAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAA",    /* 42 */
        "lkk_0123456789abcdef_AAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAA",  /* 44 */
        "lkx_0123456789abcdef_AAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAA",
        "lkk_0123456789ABCDEF_AAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAA",
        "lkk_0123456789abcdef-AAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAA",
        "lkk_0123456789abcdef_AAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAA+",
        "lkk_0123456789abcdef_AAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAA=",
        /* 43rd character with non-zero low bits: not canonical base64url */
        "lkk_0123456789abcdef_AAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAB",
    };
    for (size_t i = 0; i < sizeof bad / sizeof bad[0]; i++)
        CHECK(lk_apikey_parse(bad[i], id2, &err) == LK_ERR_INVALID_ARGUMENT &&
                  lk_apikey_hash(kr, bad[i], h2, NULL) == LK_ERR_INVALID_ARGUMENT,
              "malformed token %zu accepted", i);
    CHECK(lk_apikey_parse("lkk_0123456789abcdef_AAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAE", id2,
                          &err) == LK_OK && !strcmp(id2, "0123456789abcdef"),
          "canonical token refused: %s", err.message);
    /* Hex: lowercase, as Python's bytes.hex() writes it. */
    char hex[9];
    lk_hex_encode((const uint8_t *)"\x00\xff\x10\xab", 4, hex);
    CHECK(!strcmp(hex, "00ff10ab"), "hex %s", hex);
    lk_keyring_free(kr);
    unlink(p);
}

int main(void)
{
    snprintf(dir, sizeof dir, "/tmp/lk-crypto-XXXXXX");
    if (!mkdtemp(dir))
        LK_SKIP("cannot create a temporary directory");
    test_rfc8032();
    test_modes();
    test_malformed();
    test_create_rotate_refresh();
    test_apikeys();
    unlink(path_in("rfc.keys"));
    rmdir(dir);
    return lk_test_done();
}
