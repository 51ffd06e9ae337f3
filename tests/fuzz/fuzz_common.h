/* Helpers shared by the libFuzzer targets in tests/fuzz (see README.md).
 *
 * FUZZ_CHECK turns a broken contract into a crash that libFuzzer records,
 * with the contract named on stderr: the targets check what the public
 * headers promise (outputs inside the input buffer, codes matching the
 * lk_error, round trips), not only that nothing overflows. */
#ifndef LIKENESS_FUZZ_COMMON_H
#define LIKENESS_FUZZ_COMMON_H

#include <stdbool.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "likeness/error.h"

#define FUZZ_CHECK(cond, ...)                                                    \
    do {                                                                         \
        if (!(cond)) {                                                           \
            fprintf(stderr, "fuzz contract broken at %s:%d: ", __FILE__, __LINE__); \
            fprintf(stderr, __VA_ARGS__);                                        \
            fputc('\n', stderr);                                                 \
            abort();                                                             \
        }                                                                        \
    } while (0)

/* Every failing call must return the code it stores and leave a message a
 * person can read (include/likeness/error.h). */
static inline void fuzz_check_error(lk_code rc, const lk_error *e)
{
    FUZZ_CHECK(rc > LK_OK && rc < LK_CODE_COUNT, "code %d out of range", (int)rc);
    FUZZ_CHECK(e->code == rc, "returned %s but the error says %s", lk_code_name(rc),
               lk_code_name(e->code));
    FUZZ_CHECK(memchr(e->message, '\0', sizeof e->message) != NULL, "message not terminated");
    FUZZ_CHECK(e->message[0] != '\0', "%s with an empty message", lk_code_name(rc));
}

/* A cursor over the fuzzer's bytes; reads past the end give zeros. */
typedef struct fuzz_in {
    const uint8_t *p;
    size_t n;
} fuzz_in;

static inline uint8_t fuzz_u8(fuzz_in *in)
{
    if (!in->n)
        return 0;
    in->n--;
    return *in->p++;
}

static inline uint64_t fuzz_u64(fuzz_in *in)
{
    uint64_t v = 0;
    for (int i = 0; i < 8; i++)
        v = v << 8 | fuzz_u8(in);
    return v;
}

/* Copies up to want bytes; returns how many were there. */
static inline size_t fuzz_bytes(fuzz_in *in, void *out, size_t want)
{
    size_t k = want < in->n ? want : in->n;
    memcpy(out, in->p, k);
    in->p += k;
    in->n -= k;
    return k;
}

#endif
