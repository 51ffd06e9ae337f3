/* Shared by the features test tools: a minimal binary PGM (P5, 8-bit)
 * reader (Netpbm format specification) and a raw file writer. */
#ifndef LK_TOOLS_PGM_IO_H
#define LK_TOOLS_PGM_IO_H

#include <stdio.h>
#include <stdlib.h>
#include <string.h>

static int skip_ws(FILE *f)
{
    int ch;
    while ((ch = fgetc(f)) != EOF) {
        if (ch == '#') {
            while ((ch = fgetc(f)) != EOF && ch != '\n')
                ;
        } else if (ch != ' ' && ch != '\t' && ch != '\r' && ch != '\n') {
            ungetc(ch, f);
            return 1;
        }
    }
    return 0;
}

/* Netpbm binary gray map, maxval 255. */
static unsigned char *read_pgm(const char *path, int *w, int *h)
{
    FILE *f = fopen(path, "rb");
    if (!f)
        return NULL;
    int maxval = 0;
    unsigned char *px = NULL;
    if (fgetc(f) != 'P' || fgetc(f) != '5' || !skip_ws(f) || fscanf(f, "%d", w) != 1 ||
        !skip_ws(f) || fscanf(f, "%d", h) != 1 || !skip_ws(f) ||
        fscanf(f, "%d", &maxval) != 1 || maxval != 255 || fgetc(f) == EOF || *w <= 0 ||
        *h <= 0 || *w > 8192 || *h > 8192)
        goto done;
    px = malloc((size_t)*w * *h);
    if (px && fread(px, 1, (size_t)*w * *h, f) != (size_t)*w * *h) {
        free(px);
        px = NULL;
    }
done:
    fclose(f);
    return px;
}

static int write_file(const char *prefix, const char *suffix, const void *data, size_t bytes)
{
    char path[4096];
    snprintf(path, sizeof path, "%s%s", prefix, suffix);
    FILE *f = fopen(path, "wb");
    if (!f)
        return 0;
    const int ok = fwrite(data, 1, bytes, f) == bytes;
    return fclose(f) == 0 && ok;
}

#endif
