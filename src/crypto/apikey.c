/* API-key tokens, hex, and checking audit signatures. */
#include <string.h>

#include <sodium.h>

#include "internal.h"

#define TOKEN_PREFIX "lkk_"
#define TOKEN_SECRET_BYTES 32u
/* base64url without padding (RFC 4648 section 5) of 32 bytes: ceil(256 / 6) */
#define TOKEN_SECRET_CHARS 43u
#define TOKEN_LEN (4u + LK_APIKEY_ID_HEX + 1u + TOKEN_SECRET_CHARS)

_Static_assert(TOKEN_LEN < LK_APIKEY_TOKEN_MAX, "token buffer");

void lk_hex_encode(const uint8_t *bytes, size_t n, char *out)
{
    static const char digits[] = "0123456789abcdef";
    for (size_t i = 0; i < n; i++) {
        out[2 * i] = digits[bytes[i] >> 4];
        out[2 * i + 1] = digits[bytes[i] & 15];
    }
    out[2 * n] = '\0';
}

static int b64url_char(char c)
{
    return (c >= 'A' && c <= 'Z') || (c >= 'a' && c <= 'z') || (c >= '0' && c <= '9') ||
           c == '-' || c == '_';
}

lk_code lk_apikey_parse(const char *token, char id[LK_APIKEY_ID_HEX + 1], lk_error *err)
{
    static const char shape[] = "an API key looks like lkk_<16 hex>_<43 base64url characters>";
    if (!token)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no API key given; %s", shape);
    size_t n = strnlen(token, TOKEN_LEN + 1);
    if (n != TOKEN_LEN || memcmp(token, TOKEN_PREFIX, 4) != 0 ||
        token[4 + LK_APIKEY_ID_HEX] != '_')
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "malformed API key: %s", shape);
    for (size_t i = 4; i < 4 + LK_APIKEY_ID_HEX; i++) {
        char c = token[i];
        if (!((c >= '0' && c <= '9') || (c >= 'a' && c <= 'f')))
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "malformed API key: %s", shape);
    }
    const char *sec = token + 5 + LK_APIKEY_ID_HEX;
    for (size_t i = 0; i < TOKEN_SECRET_CHARS; i++)
        if (!b64url_char(sec[i]))
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "malformed API key: %s", shape);
    /* 43 characters carry 258 bits: the last one's two low bits must be 0
     * (the canonical encoding), else two tokens would name one secret. */
    uint8_t bin[TOKEN_SECRET_BYTES];
    size_t bin_len = 0;
    (void)lk__sodium_ready();
    int r = sodium_base642bin(bin, sizeof bin, sec, TOKEN_SECRET_CHARS, NULL, &bin_len, NULL,
                              sodium_base64_VARIANT_URLSAFE_NO_PADDING);
    sodium_memzero(bin, sizeof bin);
    if (r != 0 || bin_len != TOKEN_SECRET_BYTES)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "malformed API key: %s", shape);
    if (id) {
        memcpy(id, token + 4, LK_APIKEY_ID_HEX);
        id[LK_APIKEY_ID_HEX] = '\0';
    }
    return LK_OK;
}

lk_code lk_apikey_generate(const lk_keyring *kr, char token[LK_APIKEY_TOKEN_MAX],
                           char id[LK_APIKEY_ID_HEX + 1], uint8_t hash[32], lk_error *err)
{
    if (!kr || !token || !id || !hash)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no key ring or output");
    if (!lk__sodium_ready())
        return lk_error_set(err, LK_ERR_INTERNAL, "libsodium failed to initialise");
    uint8_t rid[LK_APIKEY_ID_HEX / 2], secret[TOKEN_SECRET_BYTES];
    randombytes_buf(rid, sizeof rid);
    randombytes_buf(secret, sizeof secret);
    memcpy(token, TOKEN_PREFIX, 4);
    lk_hex_encode(rid, sizeof rid, token + 4);
    token[4 + LK_APIKEY_ID_HEX] = '_';
    sodium_bin2base64(token + 5 + LK_APIKEY_ID_HEX, LK_APIKEY_TOKEN_MAX - 5 - LK_APIKEY_ID_HEX,
                      secret, sizeof secret, sodium_base64_VARIANT_URLSAFE_NO_PADDING);
    sodium_memzero(secret, sizeof secret);
    memcpy(id, token + 4, LK_APIKEY_ID_HEX);
    id[LK_APIKEY_ID_HEX] = '\0';
    lk_code c = lk_apikey_hash(kr, token, hash, err);
    if (c != LK_OK)
        sodium_memzero(token, LK_APIKEY_TOKEN_MAX);
    return c;
}

bool lk_apikey_hash_equal(const uint8_t a[32], const uint8_t b[32])
{
    return sodium_memcmp(a, b, 32) == 0;
}

bool lk_audit_signature_valid(const uint8_t pk[32], const uint8_t *msg, size_t len,
                              const uint8_t sig[64])
{
    static const uint8_t empty[1] = {0};
    if (!pk || !sig || (!msg && len))
        return false;
    if (!lk__sodium_ready())
        return false;
    /* Ed25519 verification, RFC 8032 section 5.1.7 (libsodium also refuses
     * non-canonical S and small-order keys). */
    return crypto_sign_verify_detached(sig, msg ? msg : empty, len, pk) == 0;
}
