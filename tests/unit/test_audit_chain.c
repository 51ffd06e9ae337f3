/* The audit chain verifier on chains built in memory: it accepts an intact
 * chain and, for each kind of tampering, names the first record that does not
 * hold. Checkpoints are signed here with libsodium's crypto_sign (Ed25519,
 * RFC 8032) directly, independently of the key ring; the byte-level format
 * is checked against an independent Python reader in
 * tests/ref/check_audit_chain.py. */
#include <cjson/cJSON.h>
#include <math.h>
#include <sodium.h>
#include <string.h>

#include "likeness/audit.h"
#include "lk_test.h"

#define N 20
#define INTERVAL 5

static uint8_t pk[32], sk[64];

static void make_record(lk_audit_record *r, int i)
{
    lk_audit_record_init(r, (lk_audit_op)(1 + i % 7));
    r->time_ms = 1796205600123 + i * 1000;
    snprintf(r->caller, sizeof r->caller, "key%02d", i % 3);
    snprintf(r->request_id, sizeof r->request_id, "req-%d", i);
    snprintf(r->template_id, sizeof r->template_id, "%032x", i);
    snprintf(r->decision, sizeof r->decision, "%s", i % 2 ? "match" : "non_match");
    if (i % 4 != 0) {
        r->score = 0.25 + i / 100.0;
        r->threshold = 0.5;
    }
    snprintf(r->model_id, sizeof r->model_id, "m1");
    snprintf(r->reasons, sizeof r->reasons, "%s", i % 5 == 0 ? "" : "low_quality,blur");
    r->status = 200;
}

static void chain(lk_audit_record *recs, size_t n)
{
    uint8_t prev[32] = {0};
    for (size_t i = 0; i < n; i++) {
        recs[i].seq = i + 1;
        memcpy(recs[i].prev_hash, prev, 32);
        lk_audit_chain_hash(&recs[i], prev, recs[i].hash);
        memcpy(prev, recs[i].hash, 32);
    }
}

static void sign_cp(lk_audit_checkpoint *c, const lk_audit_record *r, const uint8_t *secret,
                    const uint8_t *public)
{
    memset(c, 0, sizeof *c);
    c->seq = r->seq;
    memcpy(c->hash, r->hash, 32);
    memcpy(c->public_key, public, 32);
    uint8_t msg[68];
    lk_audit_checkpoint_message(c->seq, c->hash, msg);
    crypto_sign_detached(c->signature, NULL, msg, sizeof msg, secret);
    c->time_ms = r->time_ms;
}

static lk_audit_report run(const lk_audit_record *recs, size_t n, const lk_audit_checkpoint *cps,
                           size_t ncp)
{
    lk_audit_verifier *v = lk_audit_verifier_new(pk);
    for (size_t i = 0; i < n; i++)
        lk_audit_verifier_add_record(v, &recs[i]);
    for (size_t i = 0; i < ncp; i++)
        lk_audit_verifier_add_checkpoint(v, &cps[i]);
    lk_audit_report rep;
    lk_audit_verifier_finish(v, &rep);
    lk_audit_verifier_free(v);
    return rep;
}

#define EXPECT_BAD(rep, seq, what)                                                          \
    CHECK(!(rep).ok && (rep).first_bad_seq == (seq), "%s: ok=%d first_bad=%llu (want %d): %s", \
          what, (rep).ok, (unsigned long long)(rep).first_bad_seq, (int)(seq), (rep).reason)

int main(void)
{
    if (sodium_init() < 0)
        LK_SKIP("libsodium failed to initialise");
    /* A fixed seed: the test is reproducible. */
    uint8_t seed[32];
    for (int i = 0; i < 32; i++)
        seed[i] = (uint8_t)(i * 7 + 1);
    crypto_sign_seed_keypair(pk, sk, seed);

    lk_audit_record good[N];
    for (int i = 0; i < N; i++)
        make_record(&good[i], i);
    chain(good, N);
    lk_audit_checkpoint cps[N / INTERVAL];
    for (int i = 0; i < N / INTERVAL; i++)
        sign_cp(&cps[i], &good[(i + 1) * INTERVAL - 1], sk, pk);
    const size_t ncp = N / INTERVAL;

    lk_audit_report rep = run(good, N, cps, ncp);
    CHECK(rep.ok && rep.records == N && rep.checkpoints == ncp && rep.first_bad_seq == 0,
          "intact chain: ok=%d records=%llu checkpoints=%llu: %s", rep.ok,
          (unsigned long long)rep.records, (unsigned long long)rep.checkpoints, rep.reason);

    rep = run(NULL, 0, NULL, 0);
    CHECK(rep.ok && rep.records == 0, "empty chain verifies");

    lk_audit_record t[N];
    /* Edit one field of record 7 (index 6), for each kind of field. */
    for (int field = 0; field < 6; field++) {
        memcpy(t, good, sizeof t);
        switch (field) {
        case 0: t[6].decision[0] ^= 1; break;
        case 1: t[6].score += 1e-12; break;
        case 2: t[6].time_ms += 1; break;
        case 3: t[6].status = 500; break;
        case 4: t[6].operation = LK_AUDIT_DELETE; break;
        case 5: snprintf(t[6].reasons, sizeof t[6].reasons, "low_quality"); break;
        }
        rep = run(t, N, cps, ncp);
        EXPECT_BAD(rep, 7, "edited field");
    }
    /* A not-applicable score (record 1 = index 0 has NaN) whose NaN has
     * another payload or sign encodes alike: still valid. */
    memcpy(t, good, sizeof t);
    CHECK(isnan(t[0].score), "record 1 has no score");
    t[0].score = -NAN;
    rep = run(t, N, cps, ncp);
    CHECK(rep.ok, "a NaN of another sign encodes as the canonical NaN: %s", rep.reason);

    /* Delete record 7. */
    memcpy(t, good, sizeof t);
    memmove(&t[6], &t[7], (N - 7) * sizeof t[0]);
    rep = run(t, N - 1, cps, ncp);
    EXPECT_BAD(rep, 7, "deleted record");

    /* Delete the first record. */
    rep = run(good + 1, N - 1, cps, ncp);
    EXPECT_BAD(rep, 1, "deleted first record");

    /* Swap records 7 and 8 as read (order of rows). */
    memcpy(t, good, sizeof t);
    t[6] = good[7];
    t[7] = good[6];
    rep = run(t, N, cps, ncp);
    EXPECT_BAD(rep, 7, "swapped records");

    /* Swap the contents of records 7 and 8 but keep their seqs (what an UPDATE
     * of two rows does). */
    memcpy(t, good, sizeof t);
    t[6] = good[7];
    t[6].seq = 7;
    t[7] = good[6];
    t[7].seq = 8;
    rep = run(t, N, cps, ncp);
    EXPECT_BAD(rep, 7, "swapped contents");

    /* Edit record 7 and recompute every later hash: the links hold, the
     * checkpoint over record 10 no longer does. */
    memcpy(t, good, sizeof t);
    t[6].status = 404;
    chain(t, N);
    rep = run(t, N, cps, ncp);
    EXPECT_BAD(rep, 10, "rewritten chain");

    /* Truncate the tail after checkpoint 10: records 13..20 removed while
     * checkpoints 15 and 20 remain. */
    rep = run(good, 12, cps, ncp);
    EXPECT_BAD(rep, 13, "truncated tail");
    /* Truncate exactly after checkpoint 15. */
    rep = run(good, 15, cps, ncp);
    EXPECT_BAD(rep, 16, "truncated after a checkpoint");

    /* Forged checkpoint signature: one flipped bit at checkpoint 10. */
    lk_audit_checkpoint tc[N / INTERVAL];
    memcpy(tc, cps, sizeof tc);
    tc[1].signature[5] ^= 0x10;
    rep = run(good, N, tc, ncp);
    EXPECT_BAD(rep, 10, "flipped signature bit");

    /* A checkpoint signed with another key (an attacker's), naming that key. */
    uint8_t pk2[32], sk2[64];
    crypto_sign_keypair(pk2, sk2);
    memcpy(tc, cps, sizeof tc);
    sign_cp(&tc[2], &good[14], sk2, pk2);
    rep = run(good, N, tc, ncp);
    EXPECT_BAD(rep, 15, "checkpoint signed with another key");

    /* A checkpoint whose hash was replaced. */
    memcpy(tc, cps, sizeof tc);
    tc[0].hash[0] ^= 1;
    rep = run(good, N, tc, ncp);
    EXPECT_BAD(rep, 5, "checkpoint hash replaced");

    /* Canonical encoding: length query, no write past cap, fields bounded by
     * the text size even without a NUL. */
    uint8_t buf[4096];
    size_t need = lk_audit_canonical(&good[3], NULL, 0);
    memset(buf, 0xAA, sizeof buf);
    size_t got = lk_audit_canonical(&good[3], buf, 10);
    CHECK(got == need && buf[10] == 0xAA, "canonical: cap respected (need %zu)", need);
    CHECK(buf[0] == LK_AUDIT_FORMAT_VERSION && buf[1] == 0x01, "canonical starts with version, seq tag");
    lk_audit_record full = good[0];
    memset(full.caller, 'x', sizeof full.caller); /* no NUL */
    size_t nfull = lk_audit_canonical(&full, buf, sizeof buf);
    CHECK(nfull == lk_audit_canonical(&good[0], NULL, 0) - strlen(good[0].caller) +
                       (LK_AUDIT_TEXT_MAX - 1),
          "an unterminated text field is read up to %d bytes", LK_AUDIT_TEXT_MAX - 1);

    /* Checkpoint message layout (audit.h). */
    uint8_t msg[68];
    lk_audit_checkpoint_message(0x0102030405060708ull, good[0].hash, msg);
    CHECK(!memcmp(msg, "likeness-audit-checkpoint-v1", 28) && msg[28] == 1 && msg[35] == 8 &&
              !memcmp(msg + 36, good[0].hash, 32),
          "checkpoint message = prefix || u64be(seq) || hash");

    /* Operation names. */
    for (int op = 1; op <= 7; op++) {
        lk_audit_op back;
        CHECK(lk_audit_operation_parse(lk_audit_operation_name((lk_audit_op)op), &back, NULL) ==
                      LK_OK &&
                  back == (lk_audit_op)op,
              "operation %d round-trips", op);
    }
    lk_audit_op dummy;
    lk_error err;
    CHECK(lk_audit_operation_parse("frobnicate", &dummy, &err) == LK_ERR_INVALID_ARGUMENT &&
              strstr(err.message, "frobnicate"),
          "unknown operation refused");

    /* JSON export form. 1796205600 s is 2026-12-02T10:00:00Z (GNU date -u -d @1796205600). */
    char *js = lk_audit_record_to_json(&good[1]);
    cJSON *j = cJSON_Parse(js);
    CHECK(j != NULL, "record JSON parses");
    if (j) {
        const cJSON *tm = cJSON_GetObjectItem(j, "time");
        CHECK(cJSON_IsString(tm) && !strcmp(tm->valuestring, "2026-12-02T10:00:01.123Z"),
              "time %s", cJSON_IsString(tm) ? tm->valuestring : "?");
        const cJSON *rs = cJSON_GetObjectItem(j, "reasons");
        CHECK(cJSON_GetArraySize(rs) == 2 &&
                  !strcmp(cJSON_GetArrayItem(rs, 1)->valuestring, "blur"),
              "reasons split on commas");
        CHECK(cJSON_GetObjectItem(j, "score")->valuedouble == good[1].score, "score number");
        CHECK(!strcmp(cJSON_GetObjectItem(j, "operation")->valuestring, "enrolment"),
              "operation name");
        char hex[65];
        sodium_bin2hex(hex, sizeof hex, good[1].hash, 32);
        CHECK(!strcmp(cJSON_GetObjectItem(j, "hash")->valuestring, hex), "hash hex");
        cJSON_Delete(j);
    }
    free(js);
    js = lk_audit_record_to_json(&good[0]); /* NaN score, empty reasons */
    j = cJSON_Parse(js);
    CHECK(j && cJSON_IsNull(cJSON_GetObjectItem(j, "score")) &&
              cJSON_IsNull(cJSON_GetObjectItem(j, "threshold")) &&
              cJSON_GetArraySize(cJSON_GetObjectItem(j, "reasons")) == 0 &&
              cJSON_GetObjectItem(j, "seq")->valuedouble == 1,
          "NaN as null, empty reasons as []: %s", js);
    cJSON_Delete(j);
    free(js);
    lk_audit_record early = good[0];
    early.time_ms = -1; /* floor division: one ms before the epoch */
    js = lk_audit_record_to_json(&early);
    CHECK(js && strstr(js, "\"1969-12-31T23:59:59.999Z\""), "time before 1970: %s", js);
    free(js);

    return lk_test_done();
}
