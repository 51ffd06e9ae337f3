/* Minimal test harness for likeness C tests: CHECK counts failures and keeps
 * going; lk_test_done() prints the tally and returns the process exit code.
 * LK_SKIP prints why and exits 77, which CTest reports as skipped. */
#ifndef LK_TEST_H
#define LK_TEST_H
#include <stdio.h>
#include <stdlib.h>

static int lk_test_failures;
static int lk_test_checks;

#define CHECK(cond, ...) do { \
    lk_test_checks++; \
    if (!(cond)) { \
        lk_test_failures++; \
        fprintf(stderr, "FAIL %s:%d: %s: ", __FILE__, __LINE__, #cond); \
        fprintf(stderr, __VA_ARGS__); \
        fputc('\n', stderr); \
    } \
} while (0)

#define LK_SKIP(...) do { \
    fprintf(stderr, "SKIPPED: "); fprintf(stderr, __VA_ARGS__); fputc('\n', stderr); \
    exit(77); \
} while (0)

/* Path of the shared reference data (LIKENESS_SHARED, else ../shared). */
static inline const char *lk_test_shared(void)
{
    const char *s = getenv("LIKENESS_SHARED");
    return s && *s ? s : "../shared";
}

static inline int lk_test_done(void)
{
    if (lk_test_checks == 0) {
        fprintf(stderr, "FAIL: no checks ran\n");
        return 1;
    }
    printf("%d checks, %d failed\n", lk_test_checks, lk_test_failures);
    return lk_test_failures ? 1 : 0;
}
#endif
