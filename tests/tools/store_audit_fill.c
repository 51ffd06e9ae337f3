/* Test helper for the audit checks (tests/ref/check_audit_*.py).
 *
 *   lkt_store_audit_fill fill DB KEYFILE N INTERVAL
 *       creates KEYFILE if absent, appends N records of varied content
 *       (NaN and signed-zero numbers, empty and full-length texts, UTF-8,
 *       commas in reasons, times before 1970) with a checkpoint every
 *       INTERVAL records, then a checkpoint of the head; prints
 *       "public_key HEX".
 *   lkt_store_audit_fill canonical DB
 *       prints "SEQ CANONICAL_HEX" per record, as lk_audit_canonical encodes it.
 *   lkt_store_audit_fill keygen KEYFILE
 *       creates KEYFILE, so that several fill processes can share it.
 *   lkt_store_audit_fill outage DB KEYFILE
 *       for a database server that goes away and comes back: opens the store,
 *       pings, prints "up", then for each line read on standard input
 *       ("ping" or "append") does that once and prints "ok" or "error CODE
 *       MESSAGE". Exits 0 at the end of input.
 * DB is a store URL (sqlite:PATH, a path, or postgres://...). */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "likeness/store.h"

static void fill(lk_audit_record *r, int i)
{
    static const char *const decisions[] = {"match", "non_match", "refused", "ok", ""};
    static const char *const reasons[] = {"", "low_quality", "no_face,low_quality", ",x,",
                                          "eyes_closed"};
    lk_audit_record_init(r, (lk_audit_op)(1 + i % 7));
    /* Mostly 2026, some before 1970 (negative times). */
    r->time_ms = i % 11 == 3 ? -86400000LL * i - 7 : 1796205600000LL + 1237LL * i;
    snprintf(r->caller, sizeof r->caller, "%s", i % 4 == 0 ? "cli:root" : "a1b2c3d4e5f60718");
    if (i % 3)
        snprintf(r->request_id, sizeof r->request_id, "%08x-req-%d", (unsigned)i * 2654435761u, i);
    if (i % 2)
        snprintf(r->template_id, sizeof r->template_id, "%032x", (unsigned)i);
    snprintf(r->decision, sizeof r->decision, "%s", decisions[i % 5]);
    switch (i % 6) {
    case 0: break; /* NaN: not applicable */
    case 1: r->score = 0.8125; r->threshold = 0.5; break;
    case 2: r->score = -0.0; r->threshold = 1.0; break;
    case 3: r->score = 1.0 / 3.0; r->threshold = 2e-300; break;
    case 4: r->score = -1234.5678e10; r->threshold = NAN; break;
    case 5: r->score = 0.1 * i; r->threshold = 0.0; break;
    }
    snprintf(r->model_id, sizeof r->model_id, "%s",
             i % 5 == 4 ? "" : "0123456789abcdef0123456789abcdef");
    snprintf(r->reasons, sizeof r->reasons, "%s", reasons[i % 5]);
    if (i == 7) /* UTF-8 text */
        snprintf(r->caller, sizeof r->caller, "cli:J\xc3\xb6rg \xe2\x9c\x93");
    if (i == 9) /* the longest text a field holds: 255 bytes */
        memset(r->request_id, 'q', LK_AUDIT_TEXT_MAX - 1);
    r->status = i % 7 == 5 ? 0 : (i % 9 == 2 ? -1 : 200 + i % 300);
}

static bool print_canonical(const lk_audit_record *r, void *ctx)
{
    (void)ctx;
    uint8_t buf[4096];
    size_t n = lk_audit_canonical(r, buf, sizeof buf);
    char *hex = malloc(2 * n + 1);
    if (!hex)
        return false;
    lk_hex_encode(buf, n, hex);
    printf("%llu %s\n", (unsigned long long)r->seq, hex);
    free(hex);
    return true;
}

static int outage(const char *url, const char *keyfile)
{
    lk_error err;
    lk_keyring *kr = lk_keyring_load(keyfile, &err);
    lk_store *s = kr ? lk_store_open(url, &err) : NULL;
    if (!s || lk_store_ping(s, &err) != LK_OK) {
        fprintf(stderr, "%s\n", err.message);
        lk_store_close(s);
        lk_keyring_free(kr);
        return 1;
    }
    printf("up\n");
    fflush(stdout);
    char line[64];
    int i = 0;
    while (fgets(line, sizeof line, stdin)) {
        lk_code rc;
        if (!strncmp(line, "ping", 4)) {
            rc = lk_store_ping(s, &err);
        } else {
            lk_audit_record r;
            fill(&r, i++);
            rc = lk_store_audit_append(s, &r, kr, 0, &err);
        }
        if (rc == LK_OK)
            printf("ok\n");
        else
            printf("error %s %s\n", lk_code_name(rc), err.message);
        fflush(stdout);
    }
    lk_store_close(s);
    lk_keyring_free(kr);
    return 0;
}

int main(int argc, char **argv)
{
    lk_error err;
    if (argc == 3 && !strcmp(argv[1], "canonical")) {
        lk_store *s = lk_store_open(argv[2], &err);
        if (!s) {
            fprintf(stderr, "%s\n", err.message);
            return 1;
        }
        lk_code rc = lk_store_audit_list(s, 0, 0, print_canonical, NULL, &err);
        lk_store_close(s);
        if (rc != LK_OK)
            fprintf(stderr, "%s\n", err.message);
        return rc == LK_OK ? 0 : 1;
    }
    if (argc == 3 && !strcmp(argv[1], "keygen")) {
        if (lk_keyring_create(argv[2], &err) != LK_OK) {
            fprintf(stderr, "%s\n", err.message);
            return 1;
        }
        return 0;
    }
    if (argc == 4 && !strcmp(argv[1], "outage"))
        return outage(argv[2], argv[3]);
    if (argc != 6 || strcmp(argv[1], "fill")) {
        fprintf(stderr,
                "usage: %s fill DB KEYFILE N INTERVAL | canonical DB | keygen KEYFILE | "
                "outage DB KEYFILE\n",
                argv[0]);
        return 2;
    }
    if (access(argv[3], F_OK) != 0 && lk_keyring_create(argv[3], &err) != LK_OK) {
        fprintf(stderr, "%s\n", err.message);
        return 1;
    }
    lk_keyring *kr = lk_keyring_load(argv[3], &err);
    if (!kr) {
        fprintf(stderr, "%s\n", err.message);
        return 1;
    }
    lk_store *s = lk_store_open(argv[2], &err);
    if (!s) {
        fprintf(stderr, "%s\n", err.message);
        lk_keyring_free(kr);
        return 1;
    }
    int n = atoi(argv[4]);
    unsigned interval = (unsigned)atoi(argv[5]);
    lk_code rc = LK_OK;
    uint64_t start = lk_store_audit_head(s);
    for (int i = 0; i < n && rc == LK_OK; i++) {
        lk_audit_record r;
        fill(&r, (int)start + i);
        rc = lk_store_audit_append(s, &r, kr, interval, &err);
    }
    if (rc == LK_OK)
        rc = lk_store_audit_checkpoint(s, kr, &err);
    if (rc == LK_OK) {
        uint8_t pk[32];
        char hex[65];
        lk_keyring_audit_public_key(kr, pk);
        lk_hex_encode(pk, 32, hex);
        printf("public_key %s\n", hex);
    } else {
        fprintf(stderr, "%s\n", err.message);
    }
    lk_store_close(s);
    lk_keyring_free(kr);
    return rc == LK_OK ? 0 : 1;
}
