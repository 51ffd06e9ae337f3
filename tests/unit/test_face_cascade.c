/* Cascade loading: missing, malformed, truncated and inconsistent files give
 * LK_ERR_CASCADE with a message naming the file; the published cascades of
 * Debian's opencv-data load with the sizes their XML declares (read here with
 * a plain text scan of <stageNum>, <width>, <height>, independent of our
 * parser). Argument errors of the detection entry points. */
#include "likeness/face.h"
#include "lk_test.h"

#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

static char tmpdir[] = "/tmp/lk_face_cascade_XXXXXX";

static const char *write_tmp(const char *name, const char *text, size_t len)
{
    static char path[512];
    snprintf(path, sizeof path, "%s/%s", tmpdir, name);
    FILE *f = fopen(path, "wb");
    if (!f)
        return NULL;
    fwrite(text, 1, len, f);
    fclose(f);
    return path;
}

static void expect_cascade_error(const char *what, const char *path)
{
    lk_error e = {0};
    lk_cascade *c = lk_cascade_load(path, &e);
    CHECK(c == NULL, "%s: loaded although it should not", what);
    CHECK(e.code == LK_ERR_CASCADE, "%s: code %s", what, lk_code_name(e.code));
    CHECK(strstr(e.message, path) != NULL, "%s: message does not name the file: %s", what,
          e.message);
    lk_cascade_free(c);
}

static const char *good =
    "<?xml version=\"1.0\"?>\n<opencv_storage>\n<cascade type_id=\"opencv-cascade-classifier\">"
    "<stageType>BOOST</stageType><featureType>HAAR</featureType><height>4</height>"
    "<width>4</width><featureParams><maxCatCount>0</maxCatCount></featureParams>"
    "<stageNum>1</stageNum><stages><_><maxWeakCount>1</maxWeakCount>"
    "<stageThreshold>-1.</stageThreshold><weakClassifiers><_><internalNodes>0 -1 0 0.5"
    "</internalNodes><leafValues>-1. 1.</leafValues></_></weakClassifiers></_></stages>"
    "<features><_><rects><_>0 0 2 4 -1.</_><_>2 0 2 4 1.</_></rects><tilted>0</tilted></_>"
    "</features></cascade>\n</opencv_storage>\n";

static void variant(const char *what, const char *from, const char *to)
{
    char buf[4096];
    const char *at = strstr(good, from);
    if (!at) {
        CHECK(0, "test bug: '%s' not in template", from);
        return;
    }
    snprintf(buf, sizeof buf, "%.*s%s%s", (int)(at - good), good, to, at + strlen(from));
    expect_cascade_error(what, write_tmp("variant.xml", buf, strlen(buf)));
}

static int declared(const char *path, const char *tag)
{
    FILE *f = fopen(path, "rb");
    if (!f)
        return -1;
    char line[4096];
    int v = -1;
    char open_tag[64];
    snprintf(open_tag, sizeof open_tag, "<%s>", tag);
    while (v < 0 && fgets(line, sizeof line, f)) {
        const char *p = strstr(line, open_tag);
        if (p)
            v = atoi(p + strlen(open_tag));
    }
    fclose(f);
    return v;
}

int main(void)
{
    if (!mkdtemp(tmpdir))
        LK_SKIP("cannot create a temporary directory");
    lk_error e = {0};

    /* The minimal cascade itself loads: the variants below fail for the
     * one thing each changes. */
    lk_cascade *c = lk_cascade_load(write_tmp("good.xml", good, strlen(good)), &e);
    CHECK(c != NULL, "minimal cascade: %s", e.message);
    if (c) {
        int w = 0, h = 0;
        lk_cascade_window(c, &w, &h);
        CHECK(w == 4 && h == 4, "window %dx%d", w, h);
        lk_cascade_free(c);
    }

    expect_cascade_error("missing file", "/nonexistent/dir/cascade.xml");
    expect_cascade_error("empty file", write_tmp("empty.xml", "", 0));
    expect_cascade_error("not XML", write_tmp("junk.xml", "\x89PNG\r\n\x1a\n", 8));
    expect_cascade_error("truncated", write_tmp("trunc.xml", good, strlen(good) / 2));
    variant("wrong root", "<opencv_storage>", "<storage>");
    variant("unknown feature type", "<featureType>HAAR", "<featureType>HOG");
    variant("not boosted", "<stageType>BOOST", "<stageType>CART");
    variant("feature out of range", "0 -1 0 0.5", "0 -1 7 0.5");
    variant("bad child index", "0 -1 0 0.5", "3 -1 0 0.5");
    variant("leaf count", "<leafValues>-1. 1.", "<leafValues>-1.");
    variant("rect outside window", "2 0 2 4 1.", "3 0 2 4 1.");
    variant("non-numeric", "<stageThreshold>-1.", "<stageThreshold>abc");
    variant("four rects", "<_>2 0 2 4 1.</_>",
            "<_>2 0 2 4 1.</_><_>0 0 1 1 1.</_><_>0 0 1 1 1.</_>");
    variant("LBP with Haar params", "<featureType>HAAR", "<featureType>LBP");

    /* Argument errors. */
    lk_rect *r = NULL;
    int n = -1;
    CHECK(lk_detect(NULL, NULL, NULL, &r, &n, &e) == LK_ERR_INVALID_ARGUMENT, "NULL cascade");

    /* Published cascades, when the package is installed. */
    const char *dir = getenv("LIKENESS_CASCADE_DIR");
    if (!dir || !*dir)
        dir = LIKENESS_CASCADE_DIR;
    const char *names[] = {"haarcascades/haarcascade_frontalface_alt.xml",
                           "haarcascades/haarcascade_frontalface_default.xml",
                           "haarcascades/haarcascade_eye.xml",
                           "haarcascades/haarcascade_eye_tree_eyeglasses.xml",
                           "lbpcascades/lbpcascade_frontalface_improved.xml"};
    int loaded = 0;
    for (size_t i = 0; i < sizeof names / sizeof names[0]; i++) {
        char path[1024];
        snprintf(path, sizeof path, "%s/%s", dir, names[i]);
        if (access(path, R_OK) != 0) {
            fprintf(stderr, "note: %s not installed, not checked\n", path);
            continue;
        }
        c = lk_cascade_load(path, &e);
        CHECK(c != NULL, "%s: %s", path, e.message);
        if (!c)
            continue;
        loaded++;
        lk_cascade_info info;
        lk_cascade_get_info(c, &info);
        CHECK(info.stages == declared(path, "stageNum"), "%s: %d stages", path, info.stages);
        CHECK(info.window_width == declared(path, "width") &&
                  info.window_height == declared(path, "height"),
              "%s: window %dx%d", path, info.window_width, info.window_height);

        lk_image *blank = lk_image_new(info.window_width * 3, info.window_height * 3, 1, &e);
        if (blank) {
            /* A uniform image has no contrast: the Haar variance gate and any
             * sane cascade refuse it. */
            CHECK(lk_detect(c, blank, NULL, &r, &n, &e) == LK_OK && n == 0,
                  "%s: %d boxes on a blank image", path, n);
            free(r);
            r = NULL;
            lk_image *rgb = lk_image_new(40, 40, 3, &e);
            CHECK(rgb && lk_detect(c, rgb, NULL, &r, &n, &e) == LK_ERR_INVALID_ARGUMENT,
                  "%s: an RGB image must be refused", path);
            lk_image_free(rgb);
            int acc = -1, passed = -1;
            CHECK(lk_cascade_classify_window(c, blank, blank->width, 0, &acc, &passed, &e) ==
                      LK_ERR_INVALID_ARGUMENT,
                  "a window outside the image must be refused");
            lk_image_free(blank);
        }
        lk_cascade_free(c);
    }
    if (loaded == 0)
        fprintf(stderr, "note: no published cascade found under %s\n", dir);

    /* Clean up the temporary files. */
    const char *files[] = {"good.xml", "empty.xml", "junk.xml", "trunc.xml", "variant.xml"};
    for (size_t i = 0; i < sizeof files / sizeof files[0]; i++) {
        char p[512];
        snprintf(p, sizeof p, "%s/%s", tmpdir, files[i]);
        unlink(p);
    }
    rmdir(tmpdir);
    return lk_test_done();
}
