/* lkt_crypto_seal: drives the crypto module for tests/ref/check_crypto_*.py.
 *   init KEYFILE                                   create a key file
 *   rotate KEYFILE                                 add a current key; prints its id
 *   seal KEYFILE TID MODEL CONFIG IN.f64 OUT       seal little-endian binary64 values
 *   open KEYFILE TID MODEL CONFIG RECORD OUT.f64   open; prints the code name
 *   reseal KEYFILE TID RECORD OUT                  re-seal under the current key
 *   apikey KEYFILE                                 prints a new token and its hash (hex)
 *   apihash KEYFILE TOKEN                          prints the token's hash (hex)
 *   sign KEYFILE MESSAGE_FILE                      prints public key and signature (hex)
 *   xchacha                                        draft-irtf-cfrg-xchacha-03 A.3.1 through
 *                                                  libsodium; prints ciphertext||tag (hex)
 * Exit status 0 on success, 2 with "code_name: message" on stderr. */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <sodium.h>

#include "likeness/crypto.h"

static int fail(const lk_error *e)
{
    fprintf(stderr, "%s: %s\n", lk_code_name(e->code), e->message);
    return 2;
}

static uint8_t *slurp(const char *path, size_t *n)
{
    FILE *f = fopen(path, "rb");
    if (!f)
        return NULL;
    fseek(f, 0, SEEK_END);
    long sz = ftell(f);
    fseek(f, 0, SEEK_SET);
    uint8_t *b = malloc(sz > 0 ? (size_t)sz : 1);
    *n = b ? fread(b, 1, (size_t)sz, f) : 0;
    fclose(f);
    return b;
}

static int spill(const char *path, const void *p, size_t n)
{
    FILE *f = fopen(path, "wb");
    if (!f || fwrite(p, 1, n, f) != n) {
        if (f)
            fclose(f);
        fprintf(stderr, "cannot write %s\n", path);
        return 2;
    }
    fclose(f);
    return 0;
}

static void print_hex(const uint8_t *b, size_t n)
{
    char *h = malloc(2 * n + 1);
    lk_hex_encode(b, n, h);
    puts(h);
    free(h);
}

static lk_keyring *ring(const char *path, lk_error *err)
{
    return lk_keyring_load(path, err);
}

static int binding(lk_template_binding *b, char **argv)
{
    if (strlen(argv[0]) != LK_TEMPLATE_ID_HEX || strlen(argv[1]) != 32)
        return fprintf(stderr, "template id: 32 hex, model id: 32 hex\n"), 0;
    memcpy(b->template_id, argv[0], LK_TEMPLATE_ID_HEX + 1);
    memcpy(b->model_id, argv[1], 33);
    b->feature_config = argv[2];
    return 1;
}

/* draft-irtf-cfrg-xchacha-03, Appendix A.3.1: key 80..9f, IV 40..57, AAD
 * 50515253c0c1c2c3c4c5c6c7, the "Ladies and Gentlemen" plaintext. The
 * expected output is compared in the Python check. */
static int xchacha(void)
{
    static const char pt[] = "Ladies and Gentlemen of the class of '99: If I could offer you only "
                             "one tip for the future, sunscreen would be it.";
    uint8_t key[32], nonce[24], out[sizeof pt - 1 + 16];
    static const uint8_t aad[12] = {0x50, 0x51, 0x52, 0x53, 0xc0, 0xc1,
                                    0xc2, 0xc3, 0xc4, 0xc5, 0xc6, 0xc7};
    for (int i = 0; i < 32; i++)
        key[i] = (uint8_t)(0x80 + i);
    for (int i = 0; i < 24; i++)
        nonce[i] = (uint8_t)(0x40 + i);
    unsigned long long clen = 0;
    if (sodium_init() < 0)
        return 2;
    /* The same call, argument order and constants as src/crypto/template.c. */
    crypto_aead_xchacha20poly1305_ietf_encrypt(out, &clen, (const uint8_t *)pt, sizeof pt - 1,
                                               aad, sizeof aad, NULL, nonce, key);
    print_hex(out, (size_t)clen);
    uint8_t back[sizeof pt];
    unsigned long long plen = 0;
    if (crypto_aead_xchacha20poly1305_ietf_decrypt(back, &plen, NULL, out, clen, aad, sizeof aad,
                                                   nonce, key) != 0 ||
        plen != sizeof pt - 1 || memcmp(back, pt, sizeof pt - 1) != 0) {
        fprintf(stderr, "round trip failed\n");
        return 2;
    }
    return 0;
}

int main(int argc, char **argv)
{
    lk_error err = {0};
    if (argc < 2) {
        fprintf(stderr, "usage: see the comment at the top of tests/tools/crypto_seal.c\n");
        return 2;
    }
    const char *cmd = argv[1];
    if (!strcmp(cmd, "xchacha"))
        return xchacha();
    if (!strcmp(cmd, "init") && argc == 3)
        return lk_keyring_create(argv[2], &err) == LK_OK ? 0 : fail(&err);
    if (!strcmp(cmd, "rotate") && argc == 3) {
        char id[LK_KEY_ID_MAX];
        if (lk_keyring_rotate_file(argv[2], id, &err) != LK_OK)
            return fail(&err);
        puts(id);
        return 0;
    }
    if (argc < 3)
        return 2;
    lk_keyring *kr = ring(argv[2], &err);
    if (!kr)
        return fail(&err);
    int rc = 2;
    if (!strcmp(cmd, "seal") && argc == 8) {
        lk_template_binding b;
        size_t n = 0;
        uint8_t *in = binding(&b, argv + 3) ? slurp(argv[6], &n) : NULL;
        if (in && n % 8 == 0) {
            double *v = malloc(n ? n : 8);
            for (size_t i = 0; i < n / 8; i++) {
                uint64_t u = 0;
                for (int k = 7; k >= 0; k--)
                    u = u << 8 | in[8 * i + (size_t)k];
                memcpy(&v[i], &u, 8);
            }
            uint8_t *rec = NULL;
            size_t len = 0;
            char kid[LK_KEY_ID_MAX];
            if (lk_template_seal(kr, &b, v, n / 8, &rec, &len, kid, &err) == LK_OK) {
                rc = spill(argv[7], rec, len);
                puts(kid);
            } else {
                rc = fail(&err);
            }
            free(rec);
            free(v);
        }
        free(in);
    } else if (!strcmp(cmd, "open") && argc == 8) {
        lk_template_binding b;
        size_t n = 0, dim = 0;
        uint8_t *rec = binding(&b, argv + 3) ? slurp(argv[6], &n) : NULL;
        if (rec) {
            double *v = malloc(LK_TEMPLATE_MAX_DIM * sizeof *v);
            lk_code c = lk_template_open(kr, &b, rec, n, v, LK_TEMPLATE_MAX_DIM, &dim, &err);
            puts(lk_code_name(c));
            if (c == LK_OK) {
                uint8_t *o = malloc(8 * dim + 1);
                for (size_t i = 0; i < dim; i++) {
                    uint64_t u;
                    memcpy(&u, &v[i], 8);
                    for (int k = 0; k < 8; k++)
                        o[8 * i + (size_t)k] = (uint8_t)(u >> (8 * k));
                }
                rc = spill(argv[7], o, 8 * dim);
                free(o);
            } else {
                fprintf(stderr, "%s\n", err.message);
                rc = 0; /* the code is the answer */
            }
            free(v);
        }
        free(rec);
    } else if (!strcmp(cmd, "reseal") && argc == 6) {
        size_t n = 0, len = 0;
        uint8_t *rec = slurp(argv[4], &n), *out = NULL;
        char kid[LK_KEY_ID_MAX];
        if (rec && lk_template_reseal(kr, argv[3], rec, n, &out, &len, kid, &err) == LK_OK) {
            rc = spill(argv[5], out, len);
            puts(kid);
        } else if (rec) {
            rc = fail(&err);
        }
        free(out);
        free(rec);
    } else if (!strcmp(cmd, "apikey") && argc == 3) {
        char token[LK_APIKEY_TOKEN_MAX], id[LK_APIKEY_ID_HEX + 1];
        uint8_t h[32];
        if (lk_apikey_generate(kr, token, id, h, &err) == LK_OK) {
            puts(token);
            print_hex(h, 32);
            rc = 0;
        } else {
            rc = fail(&err);
        }
    } else if (!strcmp(cmd, "apihash") && argc == 4) {
        uint8_t h[32];
        if (lk_apikey_hash(kr, argv[3], h, &err) == LK_OK) {
            print_hex(h, 32);
            rc = 0;
        } else {
            rc = fail(&err);
        }
    } else if (!strcmp(cmd, "sign") && argc == 4) {
        size_t n = 0;
        uint8_t *msg = slurp(argv[3], &n), pk[32], sig[64];
        if (msg && lk_keyring_audit_sign(kr, msg, n, sig, &err) == LK_OK) {
            lk_keyring_audit_public_key(kr, pk);
            print_hex(pk, 32);
            print_hex(sig, 64);
            rc = 0;
        } else if (msg) {
            rc = fail(&err);
        }
        free(msg);
    } else {
        fprintf(stderr, "unknown command or wrong arguments: %s\n", cmd);
    }
    lk_keyring_free(kr);
    return rc;
}
