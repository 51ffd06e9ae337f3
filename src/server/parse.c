/* Request body parsing: multipart/form-data (RFC 7578 over RFC 2046), JSON
 * with base64 images (RFC 8259, RFC 4648), UTF-8 validation (RFC 3629).
 * Every function here reads only within the buffer it is given; they are
 * fuzzed. */
#include "likeness/server.h"

#include <cjson/cJSON.h>
#include <ctype.h>
#include <errno.h>
#include <math.h>
#include <sodium.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>

bool lk_utf8_valid(const uint8_t *s, size_t n)
{
    /* RFC 3629 section 4 (the UTF8-octets grammar). */
    size_t i = 0;
    while (i < n) {
        uint8_t c = s[i];
        if (c < 0x80) {
            i++;
            continue;
        }
        size_t need;
        uint8_t lo = 0x80, hi = 0xbf;
        if (c >= 0xc2 && c <= 0xdf)
            need = 1;
        else if (c == 0xe0)
            need = 2, lo = 0xa0;
        else if ((c >= 0xe1 && c <= 0xec) || c == 0xee || c == 0xef)
            need = 2;
        else if (c == 0xed)
            need = 2, hi = 0x9f; /* no UTF-16 surrogates */
        else if (c == 0xf0)
            need = 3, lo = 0x90;
        else if (c >= 0xf1 && c <= 0xf3)
            need = 3;
        else if (c == 0xf4)
            need = 3, hi = 0x8f; /* nothing above U+10FFFF */
        else
            return false;
        if (n - i - 1 < need)
            return false;
        if (s[i + 1] < lo || s[i + 1] > hi)
            return false;
        for (size_t k = 2; k <= need; k++)
            if (s[i + k] < 0x80 || s[i + k] > 0xbf)
                return false;
        i += need + 1;
    }
    return true;
}

lk_code lk_base64_decode(const char *in, size_t len, uint8_t **out, size_t *out_len, lk_error *err)
{
    *out = NULL;
    *out_len = 0;
    if (len == 0)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "empty base64 string");
    if (len % 4)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "base64 length %zu is not a multiple of 4 (RFC 4648 section 4 "
                            "needs padding)", len);
    size_t cap = len / 4 * 3;
    uint8_t *buf = malloc(cap);
    if (!buf)
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory decoding base64");
    size_t got = 0;
    const char *end = NULL;
    if (sodium_base642bin(buf, cap, in, len, NULL, &got, &end, sodium_base64_VARIANT_ORIGINAL) != 0 ||
        end != in + len) {
        free(buf);
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "not valid base64 (RFC 4648 section 4, standard alphabet, padded, no "
                            "whitespace)");
    }
    *out = buf;
    *out_len = got;
    return LK_OK;
}

/* Case-insensitive prefix match of a media type, ignoring parameters. */
static bool media_is(const char *ct, const char *type)
{
    size_t n = strlen(type);
    if (strncasecmp(ct, type, n))
        return false;
    return ct[n] == '\0' || ct[n] == ';' || ct[n] == ' ' || ct[n] == '\t';
}

lk_code lk_multipart_boundary(const char *ct, char boundary[72], lk_error *err)
{
    boundary[0] = '\0';
    if (!ct || !media_is(ct, "multipart/form-data"))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "not multipart/form-data");
    const char *p = ct;
    while ((p = strchr(p, ';'))) {
        p++;
        while (*p == ' ' || *p == '\t')
            p++;
        if (strncasecmp(p, "boundary=", 9))
            continue;
        p += 9;
        size_t n = 0;
        if (*p == '"') {
            p++;
            while (p[n] && p[n] != '"')
                n++;
            if (p[n] != '"')
                return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "unterminated quoted boundary");
        } else {
            while (p[n] && p[n] != ';' && p[n] != ' ' && p[n] != '\t')
                n++;
        }
        /* RFC 2046 section 5.1.1: 1 to 70 characters. */
        if (n < 1 || n > 70)
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                "multipart boundary must be 1 to 70 characters (RFC 2046)");
        memcpy(boundary, p, n);
        boundary[n] = '\0';
        return LK_OK;
    }
    return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                        "multipart/form-data Content-Type without a boundary parameter");
}

static const uint8_t *find(const uint8_t *hay, size_t n, const uint8_t *needle, size_t m)
{
    if (m == 0 || n < m)
        return NULL;
    const uint8_t *end = hay + n - m;
    for (const uint8_t *p = hay; p <= end; p++) {
        p = memchr(p, needle[0], (size_t)(end - p) + 1);
        if (!p)
            return NULL;
        if (!memcmp(p, needle, m))
            return p;
    }
    return NULL;
}

/* Reads a parameter (name="value" or name=value) from a header value. */
static bool header_param(const char *v, size_t vlen, const char *param, char *out, size_t cap)
{
    size_t plen = strlen(param);
    for (size_t i = 0; i + plen + 1 <= vlen; i++) {
        if ((i == 0 || v[i - 1] == ';' || v[i - 1] == ' ' || v[i - 1] == '\t') &&
            !strncasecmp(v + i, param, plen) && v[i + plen] == '=') {
            size_t j = i + plen + 1, k = 0;
            bool quoted = j < vlen && v[j] == '"';
            if (quoted)
                j++;
            while (j < vlen && (quoted ? v[j] != '"' : (v[j] != ';' && v[j] != ' '))) {
                if (quoted && v[j] == '\\' && j + 1 < vlen)
                    j++;
                if (k + 1 >= cap)
                    return false;
                out[k++] = v[j++];
            }
            if (quoted && (j >= vlen || v[j] != '"'))
                return false;
            out[k] = '\0';
            return true;
        }
    }
    return false;
}

static lk_code parse_part_headers(const uint8_t *h, size_t n, lk_part *part, lk_error *err)
{
    bool disposition = false;
    size_t i = 0;
    while (i < n) {
        const uint8_t *eol = find(h + i, n - i, (const uint8_t *)"\r\n", 2);
        size_t llen = eol ? (size_t)(eol - (h + i)) : n - i;
        const char *line = (const char *)h + i;
        const char *colon = memchr(line, ':', llen);
        if (!colon)
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "multipart part header without ':'");
        size_t nlen = (size_t)(colon - line);
        const char *v = colon + 1;
        size_t vlen = llen - nlen - 1;
        while (vlen && (*v == ' ' || *v == '\t'))
            v++, vlen--;
        if (nlen == 19 && !strncasecmp(line, "Content-Disposition", 19)) {
            if (vlen < 9 || strncasecmp(v, "form-data", 9))
                return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                    "multipart part is not Content-Disposition: form-data");
            if (!header_param(v, vlen, "name", part->name, sizeof part->name) || !part->name[0])
                return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                    "multipart part without a usable name parameter");
            char fname[256];
            part->has_filename = header_param(v, vlen, "filename", fname, sizeof fname);
            disposition = true;
        } else if (nlen == 12 && !strncasecmp(line, "Content-Type", 12)) {
            if (vlen >= sizeof part->content_type)
                return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "part Content-Type too long");
            memcpy(part->content_type, v, vlen);
            part->content_type[vlen] = '\0';
        }
        i += llen + 2;
    }
    if (!disposition)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "multipart part without Content-Disposition (RFC 7578 section 4.2)");
    return LK_OK;
}

lk_code lk_multipart_parse(const uint8_t *body, size_t len, const char *boundary, lk_part *parts,
                           size_t max, size_t *n, lk_error *err)
{
    *n = 0;
    uint8_t delim[76]; /* "\r\n--" + boundary */
    size_t blen = strlen(boundary);
    if (blen < 1 || blen > 70)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "bad multipart boundary");
    memcpy(delim, "\r\n--", 4);
    memcpy(delim + 4, boundary, blen);
    size_t dlen = blen + 4;
    /* The first delimiter may open the body without the leading CRLF. */
    const uint8_t *p;
    if (len >= dlen - 2 && !memcmp(body, delim + 2, dlen - 2))
        p = body + dlen - 2;
    else {
        p = find(body, len, delim, dlen);
        if (!p)
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                "multipart body does not contain its boundary");
        p += dlen;
    }
    const uint8_t *end = body + len;
    for (;;) {
        /* After a delimiter: "--" closes, CRLF opens a part (transport
         * padding of spaces and tabs is allowed before it, RFC 2046). */
        if (end - p >= 2 && p[0] == '-' && p[1] == '-')
            return *n ? LK_OK
                      : lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "multipart body has no parts");
        while (p < end && (*p == ' ' || *p == '\t'))
            p++;
        if (end - p < 2 || p[0] != '\r' || p[1] != '\n')
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                "multipart delimiter not followed by CRLF or '--' (truncated or "
                                "broken body)");
        p += 2;
        if (*n == max)
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "more than %zu multipart parts", max);
        const uint8_t *hend;
        if (end - p >= 2 && p[0] == '\r' && p[1] == '\n')
            hend = p; /* no headers at all */
        else {
            hend = find(p, (size_t)(end - p), (const uint8_t *)"\r\n\r\n", 4);
            if (!hend)
                return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                    "multipart part headers not terminated by an empty line");
        }
        if (hend - p > 8192)
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "multipart part headers over 8 KiB");
        lk_part *part = &parts[*n];
        memset(part, 0, sizeof *part);
        lk_code c = parse_part_headers(p, (size_t)(hend - p), part, err);
        if (c)
            return c;
        const uint8_t *data = hend + (hend == p ? 2 : 4);
        if (data > end)
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "truncated multipart part");
        const uint8_t *next = find(data, (size_t)(end - data), delim, dlen);
        if (!next)
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                "multipart part '%s' is not closed by the boundary (truncated body?)",
                                part->name);
        part->data = data;
        part->len = (size_t)(next - data);
        (*n)++;
        p = next + dlen;
    }
}

/* ---- API requests ---- */

static lk_code bad(lk_api_request *req, const char *field, lk_error *err, const char *msg)
{
    snprintf(req->field, sizeof req->field, "%.31s", field ? field : "");
    return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "%s", msg);
}

static lk_code set_text(lk_api_request *req, lk_api_kind kind, const char *name, const uint8_t *v,
                        size_t n, lk_error *err)
{
    char msg[200];
    if (!lk_utf8_valid(v, n))
        return bad(req, name, err, "field is not valid UTF-8");
    if (kind == LK_API_VERIFY && !strcmp(name, "template_id")) {
        if (req->template_id[0])
            return bad(req, name, err, "template_id given twice");
        if (n != 32)
            return bad(req, name, err, "template_id must be 32 lowercase hexadecimal characters");
        for (size_t i = 0; i < n; i++)
            if (!((v[i] >= '0' && v[i] <= '9') || (v[i] >= 'a' && v[i] <= 'f')))
                return bad(req, name, err,
                           "template_id must be 32 lowercase hexadecimal characters");
        memcpy(req->template_id, v, n);
        req->template_id[n] = '\0';
        return LK_OK;
    }
    if (kind == LK_API_VERIFY && !strcmp(name, "target_fmr")) {
        char num[64];
        if (n == 0 || n >= sizeof num)
            return bad(req, name, err, "target_fmr must be a number in (0, 1)");
        memcpy(num, v, n);
        num[n] = '\0';
        /* Decimal notation only (strtod also reads hex floats, inf, nan). */
        if (strspn(num, "0123456789.eE+-") != n)
            return bad(req, name, err, "target_fmr must be a decimal number in (0, 1)");
        char *e;
        errno = 0;
        double x = strtod(num, &e);
        if (errno || *e || !(x > 0 && x < 1))
            return bad(req, name, err, "target_fmr must be a number in (0, 1)");
        req->target_fmr = x;
        return LK_OK;
    }
    if (kind == LK_API_ENROL && !strcmp(name, "subject_ref")) {
        if (req->has_subject_ref)
            return bad(req, name, err, "subject_ref given twice");
        if (n >= sizeof req->subject_ref)
            return bad(req, name, err, "subject_ref is longer than 255 bytes");
        memcpy(req->subject_ref, v, n);
        req->subject_ref[n] = '\0';
        if (strlen(req->subject_ref) != n)
            return bad(req, name, err, "subject_ref contains a NUL character");
        req->has_subject_ref = true;
        return LK_OK;
    }
    if (kind == LK_API_ENROL && !strcmp(name, "ttl_seconds")) {
        char num[32];
        if (n == 0 || n >= sizeof num)
            return bad(req, name, err, "ttl_seconds must be a positive integer");
        memcpy(num, v, n);
        num[n] = '\0';
        for (size_t i = 0; i < n; i++)
            if (!isdigit((unsigned char)num[i]))
                return bad(req, name, err, "ttl_seconds must be a positive integer");
        errno = 0;
        long long t = strtoll(num, NULL, 10);
        if (errno || t <= 0 || t > 100LL * 365 * 86400)
            return bad(req, name, err, "ttl_seconds must be a positive integer of at most 100 years");
        req->ttl_seconds = t;
        return LK_OK;
    }
    snprintf(msg, sizeof msg, "unexpected field '%.40s'", name);
    return bad(req, "", err, msg);
}

static lk_code set_image(lk_api_request *req, lk_api_kind kind, const char *name,
                         const uint8_t *v, size_t n, lk_error *err)
{
    char msg[120];
    if (n == 0) {
        snprintf(msg, sizeof msg, "image field '%.40s' is empty", name);
        return bad(req, name, err, msg);
    }
    if (kind == LK_API_VERIFY && !strcmp(name, "probe")) {
        if (req->probe)
            return bad(req, name, err, "probe given twice");
        req->probe = v, req->probe_len = n;
        return LK_OK;
    }
    if (kind == LK_API_VERIFY && !strcmp(name, "reference")) {
        if (req->reference)
            return bad(req, name, err, "reference given twice");
        req->reference = v, req->reference_len = n;
        return LK_OK;
    }
    if (kind == LK_API_ENROL && (!strcmp(name, "image") || !strcmp(name, "images"))) {
        if (req->n_images == LK_API_MAX_IMAGES)
            return bad(req, req->n_owned ? "images" : "image", err, "at most 10 images per enrolment");
        req->images[req->n_images] = v;
        req->image_len[req->n_images++] = n;
        return LK_OK;
    }
    snprintf(msg, sizeof msg, "unexpected file field '%.40s'", name);
    return bad(req, "", err, msg);
}

static lk_code finish(lk_api_request *req, lk_api_kind kind, bool json, lk_error *err)
{
    if (kind == LK_API_VERIFY) {
        if (!req->probe)
            return bad(req, "probe", err, "a probe image is required");
        if (!req->reference && !req->template_id[0])
            return bad(req, "reference", err, "give either a reference image or a template_id");
        if (req->reference && req->template_id[0])
            return bad(req, "template_id", err,
                       "give either a reference image or a template_id, not both");
    } else if (req->n_images == 0) {
        return bad(req, json ? "images" : "image", err, "at least one image is required");
    }
    return LK_OK;
}

static lk_code parse_multipart(lk_api_request *req, lk_api_kind kind, const char *ct,
                               const uint8_t *body, size_t len, lk_error *err)
{
    char boundary[72];
    lk_error e;
    lk_code c = lk_multipart_boundary(ct, boundary, &e);
    if (c)
        return bad(req, "", err, e.message);
    lk_part parts[LK_MULTIPART_MAX_PARTS];
    size_t n;
    c = lk_multipart_parse(body, len, boundary, parts, LK_MULTIPART_MAX_PARTS, &n, &e);
    if (c)
        return bad(req, "", err, e.message);
    for (size_t i = 0; i < n; i++) {
        const lk_part *p = &parts[i];
        bool image_field = !strcmp(p->name, "probe") || !strcmp(p->name, "reference") ||
                           !strcmp(p->name, "image") || !strcmp(p->name, "images");
        c = image_field ? set_image(req, kind, p->name, p->data, p->len, err)
                        : set_text(req, kind, p->name, p->data, p->len, err);
        if (c)
            return c;
    }
    return finish(req, kind, false, err);
}

static lk_code json_image(lk_api_request *req, lk_api_kind kind, const char *name,
                          const cJSON *item, lk_error *err)
{
    char msg[240];
    if (!cJSON_IsString(item)) {
        snprintf(msg, sizeof msg, "'%.40s' must be a base64 string", name);
        return bad(req, name, err, msg);
    }
    uint8_t *bytes;
    size_t n;
    lk_error e;
    const char *s = item->valuestring;
    if (req->n_owned == sizeof req->owned / sizeof req->owned[0])
        return bad(req, name, err, "too many images");
    if (lk_base64_decode(s, strlen(s), &bytes, &n, &e)) {
        snprintf(msg, sizeof msg, "'%.40s': %.180s", name, e.message);
        return bad(req, name, err, msg);
    }
    req->owned[req->n_owned++] = bytes;
    return set_image(req, kind, name, bytes, n, err);
}

/* true if a JSON text holds the escape \u0000 in a string; field gets the
 * top-level member it is in ("" if none). cJSON decodes the escape to a NUL
 * and keeps no length, so everything after it would silently be dropped
 * from the value: such strings are refused instead. The scan follows
 * strings and nesting only (the text is parsed properly afterwards). */
static bool json_nul_escape(const uint8_t *b, size_t n, char field[32])
{
    int depth = 0;
    bool in_str = false;
    size_t start = 0;
    char key[32] = "";
    for (size_t i = 0; i < n; i++) {
        const uint8_t c = b[i];
        if (in_str) {
            if (c == '\\') {
                if (i + 5 < n && b[i + 1] == 'u' && b[i + 2] == '0' && b[i + 3] == '0' &&
                    b[i + 4] == '0' && b[i + 5] == '0') {
                    snprintf(field, 32, "%s", key);
                    return true;
                }
                i++; /* the escaped character: "\\u0000" is not an escape of U+0000 */
            } else if (c == '"') {
                in_str = false;
                size_t j = i + 1;
                while (j < n && (b[j] == ' ' || b[j] == '\t' || b[j] == '\r' || b[j] == '\n'))
                    j++;
                if (depth == 1 && j < n && b[j] == ':') {
                    size_t len = i - start < sizeof key - 1 ? i - start : sizeof key - 1;
                    memcpy(key, b + start, len);
                    key[len] = '\0';
                }
            }
            continue;
        }
        if (c == '"') {
            in_str = true;
            start = i + 1;
        } else if (c == '{' || c == '[') {
            depth++;
        } else if (c == '}' || c == ']') {
            depth--;
        }
    }
    return false;
}

static lk_code parse_json(lk_api_request *req, lk_api_kind kind, const uint8_t *body, size_t len,
                          lk_error *err)
{
    if (!lk_utf8_valid(body, len))
        return bad(req, "", err, "request body is not valid UTF-8 (RFC 8259 section 8.1)");
    char nul_field[32];
    if (json_nul_escape(body, len, nul_field))
        return bad(req, nul_field, err, "JSON strings may not contain U+0000 (\\u0000)");
    const char *endp = NULL;
    cJSON *root = cJSON_ParseWithLengthOpts((const char *)body, len, &endp, false);
    if (!root)
        return bad(req, "", err, "request body is not valid JSON");
    /* Trailing whitespace is allowed, anything else after the value is not. */
    for (const char *q = endp; q && q < (const char *)body + len; q++)
        if (!memchr(" \t\r\n", *q, 4)) { /* not strchr: it would match a NUL byte */
            cJSON_Delete(root);
            return bad(req, "", err, "text after the JSON value");
        }
    lk_code c = LK_OK;
    if (!cJSON_IsObject(root)) {
        c = bad(req, "", err, "request body must be a JSON object");
        goto out;
    }
    for (const cJSON *it = root->child; it && !c; it = it->next) {
        const char *k = it->string;
        if (kind == LK_API_ENROL && !strcmp(k, "images")) {
            if (!cJSON_IsArray(it)) {
                c = bad(req, k, err, "'images' must be an array of base64 strings");
                break;
            }
            if (cJSON_GetArraySize(it) > LK_API_MAX_IMAGES) {
                c = bad(req, k, err, "at most 10 images per enrolment");
                break;
            }
            for (const cJSON *im = it->child; im && !c; im = im->next)
                c = json_image(req, kind, "images", im, err);
        } else if (kind == LK_API_VERIFY && (!strcmp(k, "probe") || !strcmp(k, "reference"))) {
            c = json_image(req, kind, k, it, err);
        } else if (kind == LK_API_VERIFY && !strcmp(k, "target_fmr")) {
            if (!cJSON_IsNumber(it) || !(it->valuedouble > 0 && it->valuedouble < 1))
                c = bad(req, k, err, "target_fmr must be a number in (0, 1)");
            else
                req->target_fmr = it->valuedouble;
        } else if (kind == LK_API_ENROL && !strcmp(k, "ttl_seconds")) {
            double t = cJSON_IsNumber(it) ? it->valuedouble : -1;
            if (!(t >= 1 && t <= 100.0 * 365 * 86400) || t != floor(t))
                c = bad(req, k, err, "ttl_seconds must be a positive integer of at most 100 years");
            else
                req->ttl_seconds = (int64_t)t;
        } else if (kind == LK_API_ENROL && !strcmp(k, "subject_ref") && cJSON_IsNull(it)) {
            continue;
        } else if ((kind == LK_API_VERIFY && !strcmp(k, "template_id")) ||
                   (kind == LK_API_ENROL && !strcmp(k, "subject_ref"))) {
            if (!cJSON_IsString(it)) {
                char msg[80];
                snprintf(msg, sizeof msg, "'%s' must be a string", k);
                c = bad(req, k, err, msg);
            } else {
                c = set_text(req, kind, k, (const uint8_t *)it->valuestring,
                             strlen(it->valuestring), err);
            }
        } else {
            char msg[120];
            snprintf(msg, sizeof msg, "unexpected field '%.40s'", k);
            c = bad(req, "", err, msg);
        }
    }
    if (!c)
        c = finish(req, kind, true, err);
out:
    cJSON_Delete(root);
    return c;
}

lk_code lk_api_request_parse(lk_api_kind kind, const char *content_type, const uint8_t *body,
                             size_t len, lk_api_request *req, lk_error *err)
{
    memset(req, 0, sizeof *req);
    if (content_type && media_is(content_type, "multipart/form-data"))
        return parse_multipart(req, kind, content_type, body, len, err);
    if (content_type && media_is(content_type, "application/json"))
        return parse_json(req, kind, body, len, err);
    req->unsupported_media = true;
    return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                        "Content-Type must be multipart/form-data or application/json");
}

void lk_api_request_clear(lk_api_request *req)
{
    for (size_t i = 0; i < req->n_owned; i++)
        free(req->owned[i]);
    memset(req, 0, sizeof *req);
}
