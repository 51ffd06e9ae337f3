/* likeness audit: verify the audit chain (docs/audit-format.md) or export it
 * as JSON Lines. */
#include <errno.h>
#include <inttypes.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <cjson/cJSON.h>
#include <sodium.h>

#include "cli.h"
#include "json_out.h"
#include "svc.h"

static void usage_main(FILE *f)
{
    fprintf(f, "usage: likeness audit verify|export [OPTIONS]\n\n"
               "  verify   check every record's hash, the links between records and the\n"
               "           signed checkpoints; exit 0 if the chain is intact, 1 if not\n"
               "  export   write the records as JSON Lines\n\n"
               "'likeness audit verify --help' and 'likeness audit export --help' give the "
               "options.\n");
}

static void usage_verify(FILE *f)
{
    fprintf(f,
            "usage: likeness audit verify [--config FILE | --store URL --key-file PATH]\n"
            "                             [--public-key HEX]\n\n"
            "Recomputes the hash chain and checks the Ed25519 checkpoint signatures.\n"
            "Prints a JSON report (ok, records, checkpoints, first_bad_seq, reason) and\n"
            "names the first bad record on stderr. Exit 0: intact; 1: tampered or unreadable.\n\n"
            "options:\n" CLI_SVC_HELP
            "  --public-key HEX   the audit public key (64 hex characters); with it no key\n"
            "                     file is needed, so an auditor holds no secret\n"
            "  -h, --help         this help\n");
}

static void usage_export(FILE *f)
{
    fprintf(f,
            "usage: likeness audit export [--config FILE | --store URL] [--after SEQ]\n"
            "                             [--limit N] [-o FILE]\n\n"
            "Writes one JSON object per record and line, in ascending seq (format in\n"
            "docs/audit-format.md).\n\n"
            "options:\n" CLI_SVC_HELP
            "  --after SEQ        only records with seq > SEQ (default 0: from the start)\n"
            "  --limit N          at most N records (default 0: all)\n"
            "  -o, --output FILE  write to FILE instead of standard output\n"
            "  -h, --help         this help\n");
}

static int parse_u64(const char *opt, const char *s, uint64_t *v)
{
    char *end;
    errno = 0;
    unsigned long long x = strtoull(s, &end, 10);
    if (errno || end == s || *end || s[0] == '-') {
        cli_errorf("%s wants a non-negative integer, not '%s'", opt, s);
        return -1;
    }
    *v = x;
    return 0;
}

static int cmd_verify_chain(int argc, char **argv)
{
    cli_svc_opts o = {0};
    const char *pk_hex = NULL;
    for (int i = 1; i < argc; i++) {
        int r = cli_svc_option(&o, argc, argv, &i);
        if (r < 0)
            return CLI_USAGE;
        if (r > 0)
            continue;
        if (!strcmp(argv[i], "-h") || !strcmp(argv[i], "--help")) {
            usage_verify(stdout);
            return CLI_OK;
        } else if (!strcmp(argv[i], "--public-key") && i + 1 < argc) {
            pk_hex = argv[++i];
        } else {
            cli_errorf("audit verify: unknown or incomplete option '%s'", argv[i]);
            usage_verify(stderr);
            return CLI_USAGE;
        }
    }
    uint8_t pk[32];
    if (pk_hex) {
        size_t n = 0;
        const char *end = NULL;
        if (strlen(pk_hex) != 64 ||
            sodium_hex2bin(pk, sizeof pk, pk_hex, strlen(pk_hex), NULL, &n, &end) != 0 ||
            n != 32 || *end) {
            cli_errorf("--public-key wants 64 hex characters (the audit public key)");
            return CLI_USAGE;
        }
    }
    cli_svc svc;
    if (cli_svc_open(&svc, &o, true, pk_hex == NULL) != CLI_OK)
        return CLI_FAIL;
    if (!pk_hex)
        lk_keyring_audit_public_key(svc.keys, pk);

    lk_error err;
    lk_audit_report rep;
    lk_code rc = lk_store_audit_verify(svc.store, pk, &rep, &err);
    uint64_t head = lk_store_audit_head(svc.store);
    cli_svc_close(&svc);
    if (rc != LK_OK) {
        cli_error(&err);
        return CLI_FAIL;
    }
    char hex[65];
    lk_hex_encode(pk, 32, hex);
    cJSON *j = cJSON_CreateObject();
    cJSON_AddBoolToObject(j, "ok", rep.ok);
    cJSON_AddNumberToObject(j, "records", (double)rep.records);
    cJSON_AddNumberToObject(j, "checkpoints", (double)rep.checkpoints);
    cJSON_AddNumberToObject(j, "head", (double)head);
    if (rep.ok) {
        cJSON_AddNullToObject(j, "first_bad_seq");
        cJSON_AddNullToObject(j, "reason");
    } else {
        cJSON_AddNumberToObject(j, "first_bad_seq", (double)rep.first_bad_seq);
        cJSON_AddStringToObject(j, "reason", rep.reason);
    }
    cJSON_AddStringToObject(j, "public_key", hex);
    json_print(j);
    if (!rep.ok) {
        cli_errorf("audit chain does not verify: first bad record is seq %" PRIu64 ": %s",
                   rep.first_bad_seq, rep.reason);
        return CLI_FAIL;
    }
    return CLI_OK;
}

typedef struct export_ctx {
    FILE *out;
    uint64_t done;
    cli_progress *progress;
    bool failed;
} export_ctx;

static bool export_one(const lk_audit_record *r, void *arg)
{
    export_ctx *x = arg;
    char *s = lk_audit_record_to_json(r);
    if (!s || fputs(s, x->out) < 0 || fputc('\n', x->out) == EOF) {
        free(s);
        x->failed = true;
        return false;
    }
    free(s);
    x->done++;
    if (x->progress)
        cli_progress_update(x->progress, (size_t)x->done);
    return true;
}

/* Exports above this many records report progress on stderr. */
#define EXPORT_PROGRESS_MIN 10000

static int cmd_export(int argc, char **argv)
{
    cli_svc_opts o = {0};
    uint64_t after = 0, limit = 0;
    const char *outp = NULL;
    for (int i = 1; i < argc; i++) {
        int r = cli_svc_option(&o, argc, argv, &i);
        if (r < 0)
            return CLI_USAGE;
        if (r > 0)
            continue;
        if (!strcmp(argv[i], "-h") || !strcmp(argv[i], "--help")) {
            usage_export(stdout);
            return CLI_OK;
        } else if (!strcmp(argv[i], "--after") && i + 1 < argc) {
            if (parse_u64("--after", argv[++i], &after))
                return CLI_USAGE;
        } else if (!strcmp(argv[i], "--limit") && i + 1 < argc) {
            if (parse_u64("--limit", argv[++i], &limit))
                return CLI_USAGE;
        } else if ((!strcmp(argv[i], "-o") || !strcmp(argv[i], "--output")) && i + 1 < argc) {
            outp = argv[++i];
        } else {
            cli_errorf("audit export: unknown or incomplete option '%s'", argv[i]);
            usage_export(stderr);
            return CLI_USAGE;
        }
    }
    cli_svc svc;
    if (cli_svc_open(&svc, &o, true, false) != CLI_OK)
        return CLI_FAIL;
    FILE *out = stdout;
    if (outp) {
        out = fopen(outp, "w");
        if (!out) {
            cli_errorf("cannot write %s: %s", outp, strerror(errno));
            cli_svc_close(&svc);
            return CLI_FAIL;
        }
    }
    uint64_t head = lk_store_audit_head(svc.store);
    uint64_t total = head > after ? head - after : 0;
    if (limit && total > limit)
        total = limit;
    cli_progress prog;
    export_ctx x = {out, 0, NULL, false};
    if (total >= EXPORT_PROGRESS_MIN) {
        cli_progress_start(&prog, "exporting audit records", (size_t)total);
        x.progress = &prog;
    }
    lk_error err;
    lk_code rc = lk_store_audit_list(svc.store, after, limit, export_one, &x, &err);
    cli_svc_close(&svc);
    if (x.progress)
        cli_progress_end(x.progress);
    int bad_close = outp ? fclose(out) != 0 : fflush(out) != 0;
    if (rc != LK_OK) {
        cli_error(&err);
        return CLI_FAIL;
    }
    if (x.failed || bad_close) {
        cli_errorf("writing %s failed: %s", outp ? outp : "standard output", strerror(errno));
        return CLI_FAIL;
    }
    if (outp)
        fprintf(stderr, "likeness: %" PRIu64 " audit records written to %s\n", x.done, outp);
    return CLI_OK;
}

int cmd_audit(int argc, char **argv)
{
    if (argc < 2) {
        usage_main(stderr);
        return CLI_USAGE;
    }
    if (!strcmp(argv[1], "-h") || !strcmp(argv[1], "--help")) {
        usage_main(stdout);
        return CLI_OK;
    }
    if (!strcmp(argv[1], "verify"))
        return cmd_verify_chain(argc - 1, argv + 1);
    if (!strcmp(argv[1], "export"))
        return cmd_export(argc - 1, argv + 1);
    cli_errorf("audit: unknown subcommand '%s' (verify or export)", argv[1]);
    return CLI_USAGE;
}
