/* The chain verifier: recomputes every hash, checks the links and the
 * signed checkpoints, and names the first record that does not hold. */
#include "likeness/audit.h"

#include <inttypes.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <sodium.h>

struct lk_audit_verifier {
    uint8_t public_key[32];
    uint64_t next_seq;      /* seq the next record must have */
    uint8_t prev_hash[32];  /* hash of the last record accepted (zeros at the start) */
    uint8_t (*hashes)[32];  /* hashes[i] = hash of record i + 1, for checkpoints */
    size_t n_hashes, cap_hashes;
    uint64_t records, checkpoints;
    bool failed;
    uint64_t first_bad_seq;
    char reason[LK_ERROR_MESSAGE_MAX];
};

lk_audit_verifier *lk_audit_verifier_new(const uint8_t public_key[32])
{
    lk_audit_verifier *v = calloc(1, sizeof *v);
    if (!v)
        return NULL;
    memcpy(v->public_key, public_key, 32);
    v->next_seq = 1;
    return v;
}

void lk_audit_verifier_free(lk_audit_verifier *v)
{
    if (!v)
        return;
    free(v->hashes);
    free(v);
}

static bool fail(lk_audit_verifier *v, uint64_t seq, const char *fmt, ...)
    __attribute__((format(printf, 3, 4)));

static bool fail(lk_audit_verifier *v, uint64_t seq, const char *fmt, ...)
{
    v->failed = true;
    v->first_bad_seq = seq;
    va_list ap;
    va_start(ap, fmt);
    vsnprintf(v->reason, sizeof v->reason, fmt, ap);
    va_end(ap);
    return false;
}

bool lk_audit_verifier_add_record(lk_audit_verifier *v, const lk_audit_record *r)
{
    if (v->failed)
        return false;
    v->records++;
    if (r->seq > v->next_seq)
        return fail(v, v->next_seq,
                    "record %" PRIu64 " is missing (the record after %" PRIu64
                    " has seq %" PRIu64 "): records were deleted or reordered",
                    v->next_seq, v->next_seq - 1, r->seq);
    if (r->seq < v->next_seq)
        return fail(v, r->seq,
                    "record %" PRIu64 " appears out of order or twice (expected seq %" PRIu64
                    ")",
                    r->seq, v->next_seq);
    if (sodium_memcmp(r->prev_hash, v->prev_hash, 32) != 0)
        return fail(v, r->seq,
                    "record %" PRIu64 ": prev_hash is not the hash of record %" PRIu64
                    ": records were reordered, inserted or replaced",
                    r->seq, r->seq - 1);
    uint8_t h[32];
    lk_audit_chain_hash(r, v->prev_hash, h);
    if (sodium_memcmp(h, r->hash, 32) != 0)
        return fail(v, r->seq,
                    "record %" PRIu64 ": stored hash differs from the hash of its content: "
                    "the record was edited",
                    r->seq);
    if (v->n_hashes == v->cap_hashes) {
        size_t cap = v->cap_hashes ? v->cap_hashes * 2 : 1024;
        void *p = realloc(v->hashes, cap * sizeof v->hashes[0]);
        if (!p)
            return fail(v, r->seq, "out of memory while verifying record %" PRIu64, r->seq);
        v->hashes = p;
        v->cap_hashes = cap;
    }
    memcpy(v->hashes[v->n_hashes++], h, 32);
    memcpy(v->prev_hash, h, 32);
    v->next_seq++;
    return true;
}

bool lk_audit_verifier_add_checkpoint(lk_audit_verifier *v, const lk_audit_checkpoint *c)
{
    if (v->failed)
        return false;
    v->checkpoints++;
    uint64_t last = v->next_seq - 1;
    if (c->seq == 0)
        return fail(v, 1, "a checkpoint names seq 0, which no record has");
    if (c->seq > last)
        return fail(v, last + 1,
                    "a checkpoint signs record %" PRIu64 " but the chain ends at %" PRIu64
                    ": records from %" PRIu64 " on were removed (truncation)",
                    c->seq, last, last + 1);
    if (sodium_memcmp(c->hash, v->hashes[c->seq - 1], 32) != 0)
        return fail(v, c->seq,
                    "checkpoint %" PRIu64 ": its hash differs from record %" PRIu64
                    "'s: the chain up to it was rewritten",
                    c->seq, c->seq);
    uint8_t msg[68];
    lk_audit_checkpoint_message(c->seq, c->hash, msg);
    if (!lk_audit_signature_valid(v->public_key, msg, sizeof msg, c->signature)) {
        bool other_key = sodium_memcmp(c->public_key, v->public_key, 32) != 0;
        return fail(v, c->seq, "checkpoint %" PRIu64 ": the signature is not valid under %s",
                    c->seq,
                    other_key ? "the given public key (the checkpoint names another key)"
                              : "the audit public key");
    }
    return true;
}

void lk_audit_verifier_finish(lk_audit_verifier *v, lk_audit_report *report)
{
    memset(report, 0, sizeof *report);
    report->records = v->records;
    report->checkpoints = v->checkpoints;
    report->ok = !v->failed;
    if (v->failed) {
        report->first_bad_seq = v->first_bad_seq;
        snprintf(report->reason, sizeof report->reason, "%s", v->reason);
    }
}
