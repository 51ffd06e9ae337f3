/* Drives the request parsers for tests/ref/check_server_parse.py.
 *   lkt_server_parse multipart CONTENT-TYPE FILE  -> one line per part: name, flag, type, length, hex
 *   lkt_server_parse utf8 FILE                    -> "1" or "0"
 *   lkt_server_parse base64 FILE                  -> hex of the decoded bytes, or "error"
 *   lkt_server_parse request verify|enrol CONTENT-TYPE FILE -> a summary line, or "error <field>" */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "likeness/server.h"

static uint8_t *slurp(const char *path, size_t *n)
{
    FILE *f = fopen(path, "rb");
    if (!f)
        return NULL;
    size_t cap = 1 << 16, len = 0;
    uint8_t *b = malloc(cap);
    size_t got;
    while (b && (got = fread(b + len, 1, cap - len, f)) > 0) {
        len += got;
        if (len == cap) {
            uint8_t *nb = realloc(b, cap *= 2);
            if (!nb) {
                free(b);
                b = NULL;
            }
            b = nb;
        }
    }
    fclose(f);
    *n = len;
    return b;
}

static void hex(const uint8_t *p, size_t n)
{
    for (size_t i = 0; i < n; i++)
        printf("%02x", p[i]);
}

int main(int argc, char **argv)
{
    if (argc < 3) {
        fprintf(stderr, "usage: see the comment at the top of tests/tools/server_parse.c\n");
        return 2;
    }
    size_t n = 0;
    uint8_t *buf = slurp(argv[argc - 1], &n);
    if (!buf)
        return 2;
    lk_error e;
    int rc = 0;
    if (!strcmp(argv[1], "multipart") && argc == 4) {
        char boundary[72];
        lk_part parts[LK_MULTIPART_MAX_PARTS];
        size_t np = 0;
        if (lk_multipart_boundary(argv[2], boundary, &e) ||
            lk_multipart_parse(buf, n, boundary, parts, LK_MULTIPART_MAX_PARTS, &np, &e)) {
            printf("error %s\n", e.message);
        } else {
            for (size_t i = 0; i < np; i++) {
                /* Blanks in the part's Content-Type become '_' so fields split on ' '. */
                for (char *c = parts[i].content_type; *c; c++)
                    if (*c == ' ')
                        *c = '_';
                printf("%s %d %s %zu ", parts[i].name, parts[i].has_filename,
                       parts[i].content_type[0] ? parts[i].content_type : "-", parts[i].len);
                hex(parts[i].data, parts[i].len);
                printf("\n");
            }
        }
    } else if (!strcmp(argv[1], "utf8")) {
        printf("%d\n", lk_utf8_valid(buf, n));
    } else if (!strcmp(argv[1], "base64")) {
        uint8_t *out;
        size_t len;
        if (lk_base64_decode((const char *)buf, n, &out, &len, &e))
            printf("error\n");
        else {
            hex(out, len);
            printf("\n");
            free(out);
        }
    } else if (!strcmp(argv[1], "request") && argc == 5) {
        lk_api_request q;
        lk_api_kind kind = !strcmp(argv[2], "enrol") ? LK_API_ENROL : LK_API_VERIFY;
        if (lk_api_request_parse(kind, argv[3], buf, n, &q, &e)) {
            printf("error %s%s\n", q.unsupported_media ? "media" : "field:",
                   q.unsupported_media ? "" : q.field);
        } else {
            printf("probe=%zu reference=%zu template=%s fmr=%g images=%zu subject=%s ttl=%lld\n",
                   q.probe_len, q.reference_len, q.template_id[0] ? q.template_id : "-",
                   q.target_fmr, q.n_images, q.has_subject_ref ? q.subject_ref : "-",
                   (long long)q.ttl_seconds);
        }
        lk_api_request_clear(&q);
    } else {
        rc = 2;
    }
    free(buf);
    return rc;
}
