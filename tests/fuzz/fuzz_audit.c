/* libFuzzer target: the audit chain verifier's bookkeeping
 * (lk_audit_verifier_*), the canonical encoding and the JSON export of
 * records (docs/audit-format.md).
 *
 * The input is a program: each operation byte adds a record (an honest one
 * in one byte, or one whose every field, seq, prev_hash and hash come from
 * the input), adds a checkpoint (honestly signed with a fixed Ed25519 key or
 * with fields from the input), encodes the last record canonically into a
 * buffer of an input-chosen size, or parses an operation name. A reference
 * verifier kept here (seq counting, hash links, hashes by seq, signatures
 * checked with libsodium against the message built from the format text)
 * says what each call must answer; the library must agree call by call and
 * in its final report. Seeds: corpus/audit. */
#include <math.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include <sodium.h>

#include "fuzz_common.h"
#include "likeness/audit.h"

int LLVMFuzzerInitialize(int *argc, char ***argv);
int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size);

#define MAX_OPS 4096

typedef struct fuzz_keys {
    uint8_t pk[32], sk[64];
} fuzz_keys;

static fuzz_keys *keys; /* the fuzzer's entry points take no context */

int LLVMFuzzerInitialize(int *argc, char ***argv)
{
    (void)argc;
    (void)argv;
    static fuzz_keys k;
    FUZZ_CHECK(sodium_init() >= 0, "libsodium cannot initialise");
    uint8_t seed[32];
    for (int i = 0; i < 32; i++)
        seed[i] = (uint8_t)(0x61 + i);
    crypto_sign_seed_keypair(k.pk, k.sk, seed);
    keys = &k;
    return 0;
}

/* Reference verifier. */
typedef struct ref {
    uint64_t next;
    uint8_t prev[32];
    uint8_t (*hashes)[32];
    size_t n, cap;
    bool failed;
    uint64_t records, checkpoints;
} ref;

static uint64_t pick_seq(fuzz_in *in, uint64_t next)
{
    switch (fuzz_u8(in) & 3) {
    case 0: return next;
    case 1: return next + 1;
    case 2: return next - 1;
    default: return fuzz_u64(in);
    }
}

static void text_field(fuzz_in *in, char out[LK_AUDIT_TEXT_MAX])
{
    uint8_t l = fuzz_u8(in);
    if (l == 255) { /* a buffer with no NUL at all */
        size_t got = fuzz_bytes(in, out, LK_AUDIT_TEXT_MAX);
        memset(out + got, 'a', LK_AUDIT_TEXT_MAX - got);
        return;
    }
    size_t got = fuzz_bytes(in, out, l);
    out[got] = '\0';
}

static double any_double(fuzz_in *in)
{
    uint64_t u = fuzz_u64(in);
    double d;
    memcpy(&d, &u, 8);
    return d;
}

static void add_record(lk_audit_verifier *v, ref *R, lk_audit_record *r, fuzz_in *in, bool full)
{
    memset(r, 0, sizeof *r);
    r->score = NAN;
    r->threshold = NAN;
    r->operation = LK_AUDIT_VERIFY;
    r->seq = R->next;
    uint8_t how = 0;
    if (full) {
        r->seq = pick_seq(in, R->next);
        r->time_ms = (int64_t)fuzz_u64(in);
        r->operation = (lk_audit_op)(int8_t)fuzz_u8(in);
        text_field(in, r->caller);
        text_field(in, r->request_id);
        text_field(in, r->template_id);
        text_field(in, r->decision);
        text_field(in, r->model_id);
        text_field(in, r->reasons);
        r->score = any_double(in);
        r->threshold = any_double(in);
        r->status = (int)(int16_t)(fuzz_u8(in) << 8 | fuzz_u8(in));
        how = fuzz_u8(in);
    }
    if (how & 1)
        fuzz_bytes(in, r->prev_hash, 32);
    else
        memcpy(r->prev_hash, R->prev, 32);
    uint8_t h[32];
    lk_audit_chain_hash(r, R->prev, h);
    if (how & 2)
        fuzz_bytes(in, r->hash, 32);
    else
        memcpy(r->hash, h, 32);

    bool expect = false;
    if (!R->failed) {
        R->records++;
        expect = r->seq == R->next && !memcmp(r->prev_hash, R->prev, 32) &&
                 !memcmp(r->hash, h, 32);
        if (expect) {
            if (R->n == R->cap) {
                R->cap = R->cap ? 2 * R->cap : 64;
                R->hashes = realloc(R->hashes, R->cap * 32);
                FUZZ_CHECK(R->hashes != NULL, "out of memory");
            }
            memcpy(R->hashes[R->n++], h, 32);
            memcpy(R->prev, h, 32);
            R->next++;
        } else {
            R->failed = true;
        }
    }
    bool got = lk_audit_verifier_add_record(v, r);
    FUZZ_CHECK(got == expect, "record seq %llu: verifier says %d, reference %d",
               (unsigned long long)r->seq, got, expect);
}

static void add_checkpoint(lk_audit_verifier *v, ref *R, fuzz_in *in)
{
    lk_audit_checkpoint c;
    memset(&c, 0, sizeof c);
    uint64_t last = R->next - 1;
    uint8_t how = fuzz_u8(in);
    switch (how & 3) {
    case 0: c.seq = last; break;
    case 1: c.seq = last ? 1 + fuzz_u8(in) % last : 0; break;
    case 2: c.seq = last + 1; break;
    default: c.seq = fuzz_u64(in); break;
    }
    if ((how & 4) || c.seq == 0 || c.seq > R->n)
        fuzz_bytes(in, c.hash, 32);
    else
        memcpy(c.hash, R->hashes[c.seq - 1], 32);
    /* docs/audit-format.md: "likeness-audit-checkpoint-v1" || u64be(seq) || hash */
    uint8_t msg[68], lib[68];
    memcpy(msg, "likeness-audit-checkpoint-v1", 28);
    for (int i = 0; i < 8; i++)
        msg[28 + i] = (uint8_t)(c.seq >> (56 - 8 * i));
    memcpy(msg + 36, c.hash, 32);
    lk_audit_checkpoint_message(c.seq, c.hash, lib);
    FUZZ_CHECK(memcmp(msg, lib, sizeof msg) == 0, "checkpoint message differs from the format");
    if (how & 8)
        fuzz_bytes(in, c.signature, 64);
    else
        crypto_sign_detached(c.signature, NULL, msg, sizeof msg, keys->sk);
    if (how & 16)
        fuzz_bytes(in, c.public_key, 32);
    else
        memcpy(c.public_key, keys->pk, 32);
    c.time_ms = (int64_t)fuzz_u64(in);

    bool expect = false;
    if (!R->failed) {
        R->checkpoints++;
        expect = c.seq >= 1 && c.seq <= R->n && !memcmp(c.hash, R->hashes[c.seq - 1], 32) &&
                 crypto_sign_verify_detached(c.signature, msg, sizeof msg, keys->pk) == 0;
        R->failed = !expect;
    }
    bool got = lk_audit_verifier_add_checkpoint(v, &c);
    FUZZ_CHECK(got == expect, "checkpoint seq %llu: verifier says %d, reference %d",
               (unsigned long long)c.seq, got, expect);
}

static void encode(const lk_audit_record *r, fuzz_in *in)
{
    size_t full = lk_audit_canonical(r, NULL, 0);
    FUZZ_CHECK(full > 0, "empty canonical encoding");
    size_t cap = fuzz_u8(in) * 4u;
    uint8_t *buf = malloc(cap + 1), *whole = malloc(full);
    FUZZ_CHECK(buf && whole, "out of memory");
    FUZZ_CHECK(lk_audit_canonical(r, buf, cap) == full, "length depends on the room given");
    FUZZ_CHECK(lk_audit_canonical(r, whole, full) == full, "length changed");
    FUZZ_CHECK(memcmp(buf, whole, cap < full ? cap : full) == 0, "a short buffer got other bytes");
    free(buf);
    free(whole);
    char *json = lk_audit_record_to_json(r);
    FUZZ_CHECK(json != NULL, "lk_audit_record_to_json returned NULL");
    free(json);
}

static void parse_name(fuzz_in *in)
{
    char name[64];
    size_t got = fuzz_bytes(in, name, fuzz_u8(in) % sizeof name);
    name[got < sizeof name ? got : sizeof name - 1] = '\0';
    lk_audit_op op = (lk_audit_op)0;
    lk_error err;
    lk_code rc = lk_audit_operation_parse(name, &op, &err);
    if (rc == LK_OK)
        FUZZ_CHECK(strcmp(lk_audit_operation_name(op), name) == 0, "name round trip");
    else
        fuzz_check_error(rc, &err);
}

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    lk_audit_verifier *v = lk_audit_verifier_new(keys->pk);
    FUZZ_CHECK(v != NULL, "out of memory");
    ref R = {.next = 1};
    lk_audit_record *last = calloc(1, sizeof *last);
    FUZZ_CHECK(last != NULL, "out of memory");
    fuzz_in in = {data, size};
    for (int ops = 0; in.n && ops < MAX_OPS; ops++) {
        uint8_t op = fuzz_u8(&in);
        switch (op % 5) {
        case 0: add_record(v, &R, last, &in, false); break;
        case 1: add_record(v, &R, last, &in, true); break;
        case 2: add_checkpoint(v, &R, &in); break;
        case 3: encode(last, &in); break;
        default: parse_name(&in); break;
        }
    }
    lk_audit_report rep;
    lk_audit_verifier_finish(v, &rep);
    FUZZ_CHECK(rep.ok == !R.failed, "report ok %d, reference %d", rep.ok, !R.failed);
    FUZZ_CHECK(rep.records == R.records && rep.checkpoints == R.checkpoints,
               "report counts %llu/%llu, reference %llu/%llu",
               (unsigned long long)rep.records, (unsigned long long)rep.checkpoints,
               (unsigned long long)R.records, (unsigned long long)R.checkpoints);
    FUZZ_CHECK(rep.ok ? rep.first_bad_seq == 0 && !rep.reason[0] : rep.reason[0] != '\0',
               "report reason/first_bad_seq inconsistent");
    lk_audit_verifier_free(v);
    free(R.hashes);
    free(last);
    return 0;
}
