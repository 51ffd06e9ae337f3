/* X.509 work with OpenSSL: start-up checks of the service certificate and
 * the subject of a client certificate; and small clock helpers. */
#include <errno.h>
#include <openssl/bio.h>
#include <openssl/evp.h>
#include <openssl/pem.h>
#include <openssl/x509.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <time.h>

#include "internal.h"

double srv_now(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + ts.tv_nsec * 1e-9;
}

int64_t srv_unix_ms(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_REALTIME, &ts);
    return (int64_t)ts.tv_sec * 1000 + ts.tv_nsec / 1000000;
}

void srv_rfc3339_ms(int64_t ms, char out[32])
{
    /* RFC 3339 section 5.6, UTC with "Z". */
    time_t t = (time_t)(ms / 1000);
    struct tm tm;
    gmtime_r(&t, &tm);
    int ms3 = (int)(ms % 1000);
    if (ms3 < 0)
        ms3 += 1000;
    snprintf(out, 32, "%04d-%02d-%02dT%02d:%02d:%02d.%03dZ", (tm.tm_year + 1900) % 10000,
             (tm.tm_mon + 1) % 100, tm.tm_mday % 100, tm.tm_hour % 100, tm.tm_min % 100,
             tm.tm_sec % 100, ms3 % 1000);
}

lk_code srv_read_file(const char *path, size_t max, char **out, size_t *len, lk_error *err)
{
    *out = NULL;
    FILE *f = fopen(path, "rb");
    if (!f)
        return lk_error_set(err, LK_ERR_IO, "cannot read %s: %s", path, strerror(errno));
    struct stat st;
    if (fstat(fileno(f), &st) || st.st_size < 0 || (size_t)st.st_size > max) {
        fclose(f);
        return lk_error_set(err, LK_ERR_IO, "%s is not a regular file of at most %zu bytes", path, max);
    }
    char *buf = malloc((size_t)st.st_size + 1);
    if (!buf) {
        fclose(f);
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory reading %s", path);
    }
    size_t n = fread(buf, 1, (size_t)st.st_size, f);
    fclose(f);
    buf[n] = '\0';
    *out = buf;
    if (len)
        *len = n;
    return LK_OK;
}

static void name_to_string(const X509_NAME *name, char *out, size_t cap)
{
    out[0] = '\0';
    BIO *b = BIO_new(BIO_s_mem());
    if (!b)
        return;
    /* RFC 2253 (= RFC 4514) order and escaping, UTF-8 kept as is. */
    if (X509_NAME_print_ex(b, name, 0, XN_FLAG_RFC2253 & ~ASN1_STRFLGS_ESC_MSB) >= 0) {
        int n = BIO_read(b, out, (int)cap - 1);
        out[n > 0 ? n : 0] = '\0';
    }
    BIO_free(b);
}

bool srv_der_subject(const uint8_t *der, size_t len, char *out, size_t cap)
{
    const unsigned char *p = der;
    X509 *x = d2i_X509(NULL, &p, (long)len);
    if (!x)
        return false;
    name_to_string(X509_get_subject_name(x), out, cap);
    X509_free(x);
    return out[0] != '\0';
}

lk_code srv_check_certificate(const char *cert_pem, const char *key_pem, char fingerprint[96],
                              char *subject, size_t subject_cap, double *days_left,
                              lk_error *err)
{
    lk_code rc = LK_OK;
    BIO *cb = BIO_new_mem_buf(cert_pem, -1), *kb = BIO_new_mem_buf(key_pem, -1);
    X509 *x = cb ? PEM_read_bio_X509(cb, NULL, NULL, NULL) : NULL;
    EVP_PKEY *k = kb ? PEM_read_bio_PrivateKey(kb, NULL, NULL, NULL) : NULL;
    if (!x) {
        rc = lk_error_set(err, LK_ERR_CONFIG, "the certificate file holds no PEM certificate");
        goto out;
    }
    if (!k) {
        rc = lk_error_set(err, LK_ERR_CONFIG,
                          "the key file holds no PEM private key (an encrypted key is not supported)");
        goto out;
    }
    if (X509_check_private_key(x, k) != 1) {
        rc = lk_error_set(err, LK_ERR_CONFIG,
                          "the private key does not match the certificate's public key");
        goto out;
    }
    if (X509_cmp_current_time(X509_get0_notBefore(x)) > 0) {
        rc = lk_error_set(err, LK_ERR_CONFIG, "the certificate is not valid yet (notBefore in the future)");
        goto out;
    }
    if (X509_cmp_current_time(X509_get0_notAfter(x)) < 0) {
        rc = lk_error_set(err, LK_ERR_CONFIG, "the certificate has expired; make a new one");
        goto out;
    }
    int days = 0, secs = 0;
    if (ASN1_TIME_diff(&days, &secs, NULL, X509_get0_notAfter(x)))
        *days_left = days + secs / 86400.0;
    else
        *days_left = 0;
    unsigned char md[EVP_MAX_MD_SIZE];
    unsigned int mdlen = 0;
    X509_digest(x, EVP_sha256(), md, &mdlen);
    for (unsigned i = 0; i < mdlen && i < 32; i++)
        snprintf(fingerprint + 3 * i, 4, i + 1 < mdlen ? "%02X:" : "%02X", md[i]);
    name_to_string(X509_get_subject_name(x), subject, subject_cap);
out:
    X509_free(x);
    EVP_PKEY_free(k);
    BIO_free(cb);
    BIO_free(kb);
    return rc;
}
