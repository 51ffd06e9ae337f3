/* libFuzzer target: lk_multipart_boundary + lk_multipart_parse.
 * Input: a Content-Type line (up to the first LF, at most 255 bytes), then
 * the body. The body is the tail of libFuzzer's own exactly-sized buffer, so
 * AddressSanitizer sees any read past its end. Seeds: corpus/multipart;
 * dictionary multipart.dict. */
#include <stdint.h>
#include <string.h>

#include "fuzz_common.h"
#include "likeness/server.h"

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size);

static void check_parts(const uint8_t *body, size_t len, const lk_part *parts, size_t n,
                        size_t max)
{
    FUZZ_CHECK(n >= 1 && n <= max, "%zu parts with max %zu", n, max);
    for (size_t i = 0; i < n; i++) {
        const lk_part *p = &parts[i];
        FUZZ_CHECK(memchr(p->name, '\0', sizeof p->name) && p->name[0], "part %zu: bad name", i);
        FUZZ_CHECK(memchr(p->content_type, '\0', sizeof p->content_type),
                   "part %zu: content type not terminated", i);
        FUZZ_CHECK(p->data >= body && p->data <= body + len && p->len <= (size_t)(body + len - p->data),
                   "part %zu: data outside the body", i);
        if (i)
            FUZZ_CHECK(p->data >= parts[i - 1].data + parts[i - 1].len,
                       "part %zu overlaps part %zu", i, i - 1);
    }
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    const uint8_t *lf = memchr(data, '\n', size < 256 ? size : 256);
    if (!lf)
        return 0;
    char ct[256];
    size_t ctlen = (size_t)(lf - data);
    memcpy(ct, data, ctlen);
    ct[ctlen] = '\0';
    const uint8_t *body = lf + 1;
    size_t len = size - ctlen - 1;

    char boundary[72];
    memset(boundary, 'x', sizeof boundary);
    lk_error err;
    lk_code rc = lk_multipart_boundary(ct, boundary, &err);
    if (rc != LK_OK) {
        fuzz_check_error(rc, &err);
        return 0;
    }
    size_t blen = strnlen(boundary, sizeof boundary);
    FUZZ_CHECK(blen >= 1 && blen <= 70, "boundary of %zu characters (RFC 2046: 1 to 70)", blen);

    lk_part parts[LK_MULTIPART_MAX_PARTS];
    size_t n = 99;
    rc = lk_multipart_parse(body, len, boundary, parts, LK_MULTIPART_MAX_PARTS, &n, &err);
    if (rc == LK_OK)
        check_parts(body, len, parts, n, LK_MULTIPART_MAX_PARTS);
    else
        fuzz_check_error(rc, &err);

    /* A smaller part budget must refuse, never overrun, a body with more. */
    lk_part few[2];
    size_t m = 99;
    lk_code rc2 = lk_multipart_parse(body, len, boundary, few, 2, &m, &err);
    if (rc2 == LK_OK) {
        check_parts(body, len, few, m, 2);
        FUZZ_CHECK(rc == LK_OK && n == m, "2-part budget accepted %zu parts, full budget %s/%zu",
                   m, lk_code_name(rc), n);
    } else {
        fuzz_check_error(rc2, &err);
    }
    return 0;
}
