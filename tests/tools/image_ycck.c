/* lkt_image_ycck: writes a YCCK JPEG for the Python checks, which have no
 * other way to make one (Pillow writes 4-component JPEGs as plain CMYK).
 *
 *   lkt_image_ycck IN.cmyk WIDTH HEIGHT QUALITY OUT.jpg
 *
 * IN.cmyk holds WIDTH*HEIGHT*4 raw bytes. TurboJPEG compresses TJPF_CMYK
 * input as YCCK with an Adobe APP14 marker, transform 2 (turbojpeg.h,
 * TJCS_YCCK). Exit 0 on success, 1 otherwise. */
#include <stdio.h>
#include <stdlib.h>
#include <turbojpeg.h>

int main(int argc, char **argv)
{
    if (argc != 6) {
        fprintf(stderr, "usage: lkt_image_ycck IN.cmyk WIDTH HEIGHT QUALITY OUT.jpg\n");
        return 1;
    }
    const int w = atoi(argv[2]), h = atoi(argv[3]), q = atoi(argv[4]);
    if (w <= 0 || h <= 0 || w > 4096 || h > 4096 || q < 1 || q > 100) {
        fprintf(stderr, "bad size or quality\n");
        return 1;
    }
    const size_t n = (size_t)w * h * 4;
    unsigned char *px = malloc(n);
    FILE *f = fopen(argv[1], "rb");
    int ok = px && f && fread(px, 1, n, f) == n;
    if (f)
        fclose(f);
    unsigned char *jpeg = NULL;
    unsigned long jlen = 0;
    tjhandle tj = ok ? tjInitCompress() : NULL;
    ok = ok && tj &&
         tjCompress2(tj, px, w, 0, h, TJPF_CMYK, &jpeg, &jlen, TJSAMP_420, q,
                     TJFLAG_ACCURATEDCT) == 0;
    if (!ok && tj)
        fprintf(stderr, "%s\n", tjGetErrorStr2(tj));
    if (ok) {
        FILE *o = fopen(argv[5], "wb");
        ok = o && fwrite(jpeg, 1, jlen, o) == jlen;
        if (o)
            ok &= fclose(o) == 0;
    }
    tjFree(jpeg);
    if (tj)
        tjDestroy(tj);
    free(px);
    return ok ? 0 : 1;
}
