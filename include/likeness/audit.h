/* likeness audit: the tamper-evident record of every decision.
 *
 * Every verification, enrolment, deletion, key rotation and failed
 * authentication becomes one lk_audit_record. Records are hash-chained:
 *   hash_n = BLAKE2b-256( "likeness-audit-v1" || hash_{n-1} || canonical(record_n) )
 * with hash_0 = 32 zero bytes, and every checkpoint_interval records (and on
 * demand) an Ed25519 signature (RFC 8032, libsodium) over
 *   "likeness-audit-checkpoint-v1" || u64be(seq) || hash_seq
 * is stored as a checkpoint. The canonical encoding and both formulas are
 * specified in docs/audit-format.md. Images and features are never part of a
 * record: only identifiers, outcomes and numbers. */
#ifndef LIKENESS_AUDIT_H
#define LIKENESS_AUDIT_H

#include <stdbool.h>
#include <stddef.h>
#include <stdint.h>

#include "likeness/crypto.h"
#include "likeness/error.h"

#ifdef __cplusplus
extern "C" {
#endif

#define LK_AUDIT_FORMAT_VERSION 1u
#define LK_AUDIT_TEXT_MAX 256 /* bytes of each text field, with its NUL */

/* Operations; their names (lk_audit_operation_name) are stable. */
typedef enum lk_audit_op {
    LK_AUDIT_VERIFY = 1,       /* "verification" */
    LK_AUDIT_ENROL = 2,        /* "enrolment" */
    LK_AUDIT_DELETE = 3,       /* "deletion" */
    LK_AUDIT_KEY_ROTATION = 4, /* "key_rotation" */
    LK_AUDIT_AUTH_FAILURE = 5, /* "authentication_failure" */
    LK_AUDIT_TEMPLATE_REFUSED = 6, /* "template_refused": a stored record failed to open */
    LK_AUDIT_PURGE = 7,        /* "purge": expired templates removed */
} lk_audit_op;

/* One record. Text fields are UTF-8, "" when not applicable; numbers are NaN
 * when not applicable (score, threshold). */
typedef struct lk_audit_record {
    uint64_t seq;          /* 1, 2, 3, ... assigned by the store on append */
    int64_t time_ms;       /* Unix time in milliseconds, UTC */
    lk_audit_op operation;
    char caller[LK_AUDIT_TEXT_MAX];      /* API key id, mTLS subject, or "cli:<user>" */
    char request_id[LK_AUDIT_TEXT_MAX];
    char template_id[LK_AUDIT_TEXT_MAX];
    char decision[LK_AUDIT_TEXT_MAX];    /* "match", "non_match", "refused", "ok", ... */
    double score;
    double threshold;
    char model_id[LK_AUDIT_TEXT_MAX];
    char reasons[LK_AUDIT_TEXT_MAX];     /* comma-separated reason codes */
    int status;                          /* HTTP status answered, 0 for CLI work */
    uint8_t prev_hash[32];
    uint8_t hash[32];
} lk_audit_record;

typedef struct lk_audit_checkpoint {
    uint64_t seq;
    uint8_t hash[32];      /* hash of record seq */
    uint8_t public_key[32];
    uint8_t signature[64];
    int64_t time_ms;
} lk_audit_checkpoint;

const char *lk_audit_operation_name(lk_audit_op op);
/* LK_ERR_INVALID_ARGUMENT for an unknown name. */
lk_code lk_audit_operation_parse(const char *name, lk_audit_op *op, lk_error *err);

/* Fills a record with empty text, NaN numbers, the current time. */
void lk_audit_record_init(lk_audit_record *r, lk_audit_op op);

/* Canonical encoding of a record's content fields (everything but prev_hash
 * and hash). Writes at most cap bytes, returns the full length needed. */
size_t lk_audit_canonical(const lk_audit_record *r, uint8_t *out, size_t cap);

/* hash = BLAKE2b-256("likeness-audit-v1" || prev_hash || canonical(r)). */
void lk_audit_chain_hash(const lk_audit_record *r, const uint8_t prev_hash[32],
                         uint8_t hash[32]);

/* The 68-byte message a checkpoint signs. */
void lk_audit_checkpoint_message(uint64_t seq, const uint8_t hash[32], uint8_t msg[68]);

/* One record as a JSON object (malloc'd string; free()): the export format
 * of `likeness audit export` and of GET /v1/audit/records. NULL if out of memory. */
char *lk_audit_record_to_json(const lk_audit_record *r);

/* Result of a chain verification. */
typedef struct lk_audit_report {
    bool ok;
    uint64_t records;          /* records read */
    uint64_t checkpoints;      /* checkpoints checked */
    uint64_t first_bad_seq;    /* 0 if ok */
    char reason[LK_ERROR_MESSAGE_MAX]; /* what is wrong at first_bad_seq */
} lk_audit_report;

/* Incremental verifier: feed records in the order read (ascending seq), then
 * checkpoints, then finish. Detects edits (hash mismatch), deletions and
 * reordering (seq gaps or prev_hash mismatch), truncation (a checkpoint or
 * the expected head names a record that is missing) and bad signatures. */
typedef struct lk_audit_verifier lk_audit_verifier;
lk_audit_verifier *lk_audit_verifier_new(const uint8_t public_key[32]);
void lk_audit_verifier_free(lk_audit_verifier *v);
/* false once a problem is found (later calls are no-ops). */
bool lk_audit_verifier_add_record(lk_audit_verifier *v, const lk_audit_record *r);
bool lk_audit_verifier_add_checkpoint(lk_audit_verifier *v, const lk_audit_checkpoint *c);
void lk_audit_verifier_finish(lk_audit_verifier *v, lk_audit_report *report);

#ifdef __cplusplus
}
#endif
#endif
