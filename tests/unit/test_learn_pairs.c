/* Pairs: LFW protocol files (counts as the LFW README states them, path
 * layout, malformed input refused with LK_ERR_DATA naming the line), the
 * folder-per-identity scan (5,749 identities and 13,233 images, as
 * shared/README.md and the LFW site state), and the seeded generator
 * (identity-disjoint splits, balance, distinct pairs, determinism). */
#include "likeness/learn.h"
#include "lk_test.h"

#include <stdio.h>
#include <string.h>

static lk_code parse(const char *text, lk_pair_set **out, lk_error *err)
{
    return lk_pairs_parse_lfw(text, strlen(text), "test.txt", "/data", out, err);
}

static void expect_error(const char *text, const char *line_tag)
{
    lk_pair_set *s = (lk_pair_set *)1;
    lk_error err;
    lk_error_clear(&err);
    lk_code rc = parse(text, &s, &err);
    CHECK(rc == LK_ERR_DATA && err.code == LK_ERR_DATA, "malformed input refused (rc %d)", rc);
    CHECK(s == NULL, "no output on error");
    CHECK(strstr(err.message, line_tag) != NULL, "message names %s: %s", line_tag, err.message);
}

static void test_parse_small(void)
{
    lk_pair_set *s = NULL;
    lk_error err;
    /* Tabs as in the published files, CRLF line ends tolerated. */
    const char *v1 = "2\nA_B\t1\t2\r\nC\t3\t4\nA_B\t1\tC\t2\nD\t10\tE\t1234\n\n";
    CHECK(parse(v1, &s, &err) == LK_OK, "View 1 text parses: %s", err.message);
    if (s) {
        CHECK(s->count == 4 && s->n_folds == 1, "4 pairs, 1 fold");
        CHECK(s->pairs[0].genuine && s->pairs[1].genuine && !s->pairs[2].genuine && !s->pairs[3].genuine,
              "matched then mismatched");
        CHECK(strcmp(s->pairs[0].path_a, "/data/lfw-deepfunneled/A_B/A_B_0001.jpg") == 0 &&
                  strcmp(s->pairs[0].path_b, "/data/lfw-deepfunneled/A_B/A_B_0002.jpg") == 0,
              "path layout: %s", s->pairs[0].path_a);
        CHECK(strcmp(s->pairs[3].path_b, "/data/lfw-deepfunneled/E/E_1234.jpg") == 0 &&
                  strcmp(s->pairs[3].name_a, "D") == 0 && s->pairs[3].index_a == 10,
              "mismatched pair fields");
        lk_pair_set_free(s);
    }
    const char *v2 = "2 1\nA 1 2\nA 1 B 1\nC 1 3\nC 2 D 4\n";
    CHECK(parse(v2, &s, &err) == LK_OK, "View 2 text parses: %s", err.message);
    if (s) {
        CHECK(s->count == 4 && s->n_folds == 2 && s->pairs[1].fold == 0 && s->pairs[2].fold == 1 &&
                  s->pairs[3].fold == 1 && !s->pairs[3].genuine,
              "two folds");
        lk_pair_set_free(s);
    }
}

static void test_parse_errors(void)
{
    expect_error("", "line 1");
    expect_error("x\n", "line 1");
    expect_error("1 2 3\n", "line 1");
    expect_error("2\nA 1 2\nA 1 2 3\n", "line 3");            /* matched pair with 4 fields */
    expect_error("1\nA 1\nA 1 B 2\n", "line 2");              /* matched pair with 2 fields */
    expect_error("1\nA 1 2\nA 1 B\n", "line 3");              /* mismatched pair with 3 fields */
    expect_error("1\nA x 2\nA 1 B 2\n", "line 2");            /* image number not a number */
    expect_error("1\nA 0 2\nA 1 B 2\n", "line 2");            /* image numbers start at 1 */
    expect_error("1\nA 1 2\nA 1 A 2\n", "line 3");            /* mismatched, same identity */
    expect_error("1\n../x 1 2\nA 1 B 2\n", "line 2");         /* path traversal */
    expect_error("1\nA 1 2\n", "after line 2");               /* truncated */
    expect_error("1\nA 1 2\nA 1 B 2\nC 1 2\n", "line 4");     /* trailing pairs */
    expect_error("1\nA 1 2\n\nA 1 B 2\n", "line 3");          /* blank line inside */
}

static void test_lfw_files(const char *shared)
{
    char root[1024], path[1100];
    snprintf(root, sizeof root, "%s/datasets/lfw", shared);
    lk_pair_set *s;
    lk_error err;
    /* Counts from the LFW README: View 1 has 1,100 + 1,100 training and
     * 500 + 500 test pairs; View 2 ten folds of 300 + 300. */
    static const struct {
        const char *file;
        size_t count;
        int folds;
    } files[] = {{"pairsDevTrain.txt", 2200, 1}, {"pairsDevTest.txt", 1000, 1}, {"pairs.txt", 6000, 10}};
    for (size_t f = 0; f < 3; f++) {
        snprintf(path, sizeof path, "%s/%s", root, files[f].file);
        FILE *probe = fopen(path, "r");
        if (!probe)
            LK_SKIP("%s is missing: set LIKENESS_SHARED to the shared data folder", path);
        fclose(probe);
        lk_code rc = lk_pairs_load_lfw(path, root, &s, &err);
        CHECK(rc == LK_OK, "%s loads: %s", files[f].file, err.message);
        if (rc != LK_OK)
            continue;
        size_t gen = 0, missing = 0;
        for (size_t i = 0; i < s->count; i++) {
            gen += (size_t)s->pairs[i].genuine;
            if (i % 97 == 0) { /* a sample of paths must name real images */
                FILE *img = fopen(s->pairs[i].path_b, "rb");
                missing += img == NULL;
                if (img)
                    fclose(img);
            }
        }
        CHECK(s->count == files[f].count && s->n_folds == files[f].folds && gen * 2 == s->count,
              "%s: %zu pairs, %d folds, %zu genuine", files[f].file, s->count, s->n_folds, gen);
        CHECK(missing == 0, "%s: %zu sampled image paths do not exist", files[f].file, missing);
        lk_pair_set_free(s);
    }
    CHECK(lk_pairs_load_lfw("/nonexistent/pairs.txt", root, &s, &err) == LK_ERR_IO, "missing file");

    /* Folder-per-identity scan of the whole set. */
    snprintf(path, sizeof path, "%s/lfw-deepfunneled", root);
    lk_dataset *ds;
    lk_code rc = lk_dataset_scan(path, 1, &ds, &err);
    CHECK(rc == LK_OK, "scan: %s", err.message);
    if (rc != LK_OK)
        return;
    size_t images = 0, multi = 0;
    for (size_t i = 0; i < ds->count; i++) {
        images += ds->identities[i].n_paths;
        multi += ds->identities[i].n_paths >= 2;
    }
    /* 5,749 people, 13,233 images (shared/README.md, LFW site); 1,680
     * people have two or more images (LFW site; recalled from memory). */
    CHECK(ds->count == 5749 && images == 13233, "scan: %zu identities, %zu images", ds->count, images);
    CHECK(multi == 1680, "identities with >= 2 images: %zu", multi);

    lk_pairgen_params gp = {.seed = 2024, .calib_fraction = 0.2, .train_pairs_per_class = 3000,
                            .calib_pairs_per_class = 800};
    lk_pair_set *tr, *ca, *tr2, *ca2;
    rc = lk_pairs_generate(ds->identities, ds->count, &gp, &tr, &ca, &err);
    CHECK(rc == LK_OK, "generate: %s", err.message);
    if (rc == LK_OK) {
        /* Identity-disjoint: no name of the calibration part in training. */
        size_t overlap = 0;
        for (size_t i = 0; i < ca->count; i++)
            for (size_t j = 0; j < tr->count; j++) {
                const lk_pair *a = &ca->pairs[i], *b = &tr->pairs[j];
                overlap += !strcmp(a->name_a, b->name_a) || !strcmp(a->name_a, b->name_b) ||
                           !strcmp(a->name_b, b->name_a) || !strcmp(a->name_b, b->name_b);
            }
        CHECK(overlap == 0, "train and calibration share identities (%zu hits)", overlap);
        size_t gt = 0, bad = 0, dup = 0;
        for (size_t i = 0; i < tr->count; i++) {
            const lk_pair *p = &tr->pairs[i];
            gt += (size_t)p->genuine;
            bad += p->genuine ? (strcmp(p->name_a, p->name_b) != 0 || p->index_a == p->index_b)
                              : strcmp(p->name_a, p->name_b) == 0;
            if (i + 1 < tr->count && i % 50 == 0)
                for (size_t j = i + 1; j < tr->count; j++) {
                    const lk_pair *q = &tr->pairs[j];
                    dup += !strcmp(p->path_a, q->path_a) && !strcmp(p->path_b, q->path_b);
                }
        }
        CHECK(gt == 3000 && tr->count == 6000, "train balanced: %zu genuine of %zu", gt, tr->count);
        CHECK(ca->count == 1600, "calibration: %zu pairs", ca->count);
        CHECK(bad == 0, "%zu pairs with wrong genuine flag", bad);
        CHECK(dup == 0, "%zu duplicate pairs in the sample checked", dup);
        rc = lk_pairs_generate(ds->identities, ds->count, &gp, &tr2, &ca2, &err);
        CHECK(rc == LK_OK, "generate again");
        if (rc == LK_OK) {
            int same = tr2->count == tr->count && ca2->count == ca->count;
            for (size_t i = 0; same && i < tr->count; i++)
                same = !strcmp(tr->pairs[i].path_a, tr2->pairs[i].path_a) &&
                       !strcmp(tr->pairs[i].path_b, tr2->pairs[i].path_b);
            CHECK(same, "same seed, same pairs");
            lk_pair_set_free(tr2);
            lk_pair_set_free(ca2);
        }
        gp.seed = 2025;
        rc = lk_pairs_generate(ds->identities, ds->count, &gp, &tr2, NULL, &err);
        CHECK(rc == LK_OK, "generate with another seed");
        if (rc == LK_OK) {
            size_t diff = 0;
            for (size_t i = 0; i < tr->count && i < tr2->count; i++)
                diff += strcmp(tr->pairs[i].path_a, tr2->pairs[i].path_a) != 0;
            CHECK(diff > tr->count / 2, "another seed, other pairs (%zu differ)", diff);
            lk_pair_set_free(tr2);
        }
        lk_pair_set_free(tr);
        lk_pair_set_free(ca);
    }
    lk_dataset_free(ds);
}

static void test_generate_small(void)
{
    /* Three identities, one with a single image: at most 1 + 3 genuine
     * pairs exist, so asking for 100 gives all 4 and 4 impostors. */
    const char *pa[] = {"a1", "a2"}, *pb[] = {"b1", "b2", "b3"}, *pc[] = {"c1"};
    const lk_identity ids[3] = {{"A", pa, 2}, {"B", pb, 3}, {"C", pc, 1}};
    lk_pairgen_params gp = {.seed = 1, .calib_fraction = 0.0, .train_pairs_per_class = 100};
    lk_pair_set *tr;
    lk_error err;
    CHECK(lk_pairs_generate(ids, 3, &gp, &tr, NULL, &err) == LK_OK, "small: %s", err.message);
    if (tr) {
        size_t g = 0;
        for (size_t i = 0; i < tr->count; i++)
            g += (size_t)tr->pairs[i].genuine;
        CHECK(g == 4 && tr->count == 8, "all 4 genuine pairs and 4 impostors (%zu, %zu)", g, tr->count);
        lk_pair_set_free(tr);
    }
    const lk_identity lone[1] = {{"A", pa, 2}};
    CHECK(lk_pairs_generate(lone, 1, &gp, &tr, NULL, &err) == LK_ERR_DATA, "one identity refused");
    gp.calib_fraction = 1.0;
    CHECK(lk_pairs_generate(ids, 3, &gp, &tr, NULL, &err) == LK_ERR_INVALID_ARGUMENT, "fraction 1 refused");
}

int main(void)
{
    test_parse_small();
    test_parse_errors();
    test_generate_small();
    test_lfw_files(lk_test_shared());
    return lk_test_done();
}
