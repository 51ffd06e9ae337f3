/* Loading of boosted cascades in OpenCV's XML cascade format (the format of
 * Debian's opencv-data package), and their evaluation on one window.
 *
 * Format (as written by OpenCV's traincascade and read by
 * CascadeClassifierImpl::Data::read in objdetect/src/cascadedetect.cpp):
 *   <opencv_storage><cascade>
 *     stageType BOOST, featureType HAAR|LBP, width, height,
 *     featureParams/maxCatCount (0 for Haar, 256 for LBP),
 *     stages/_ : stageThreshold, weakClassifiers/_ : internalNodes, leafValues
 *     features/_ : Haar rects/_ "x y w h weight" (+ tilted), LBP rect "x y w h"
 * internalNodes holds, per node, "left right featureIdx" then the threshold
 * (Haar) or maxCatCount/32 words of a category bit mask (LBP); left/right > 0
 * index a node of the same tree, <= 0 a leaf (-index).
 *
 * Window evaluation follows the same file's evaluators so that results agree
 * with the published detector: Haar feature values are computed in single
 * precision and multiplied by 1 / sqrt(A * sum(I^2) - sum(I)^2) = 1 / (A sigma)
 * over the inner (w-2)x(h-2) area A of the window (the variance normalisation
 * of Viola & Jones 2001, sec. 5.1, as HaarEvaluator::setWindow does it); a
 * window whose standard deviation is <= 10 grey levels is rejected outright
 * (same function); stage sums are accumulated in double and compared with the
 * stage threshold minus 1e-5 (THRESHOLD_EPS of Data::read).
 *
 * The multi-scale search reproduces OpenCV 4.6's CascadeClassifier
 * detectMultiScale (see detect_raw below); tests/ref/check_face_opencv.py
 * measures the agreement. */
#include "likeness/face.h"

#include <errno.h>
#include <limits.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <libxml/parser.h>
#include <libxml/tree.h>

typedef struct lk_stage {
    int first_tree, ntrees;
    float threshold;
} lk_stage;

typedef struct lk_tree_node {
    int left, right, feature;
    float threshold;
} lk_tree_node;

typedef struct lk_stump {
    int feature;
    float threshold, left, right;
} lk_stump;

typedef struct lk_haar_feature {
    int nrects, tilted;
    int r[3][4]; /* x y w h */
    float weight[3];
} lk_haar_feature;

typedef struct lk_lbp_feature {
    int x, y, w, h;
} lk_lbp_feature;

struct lk_cascade {
    lk_cascade_feature type;
    int win_w, win_h;
    int nstages;
    lk_stage *stages;
    int ntrees, nnodes, nleaves, max_nodes;
    int *tree_nodes, *tree_first_node;
    lk_tree_node *nodes;
    float *leaves;
    int subset_words;  /* 32-bit words per LBP category mask (8), 0 for Haar */
    int32_t *subsets;  /* one mask per node */
    lk_stump *stumps;  /* flat copy when every tree is a stump */
    int nfeatures, has_tilted;
    lk_haar_feature *haar;
    lk_lbp_feature *lbp;
};

/* A feature's corner offsets for one integral-table stride. */
typedef struct lk_haar_opt {
    int ofs[3][4];
    float weight[3];
} lk_haar_opt;

typedef struct lk_lbp_opt {
    int ofs[16];
} lk_lbp_opt;

/* A Haar stump with its feature's offsets inlined, so that the hot loop
 * walks one array in order; leaf[0] is taken when value < threshold. */
typedef struct lk_haar_stump_opt {
    int ofs[3][4];
    float weight[3];
    float threshold;
    float leaf[2];
} lk_haar_stump_opt;

/* Work state of one search: integral tables sized for the largest scale and
 * the features' offsets for their stride, allocated once per image. */
typedef struct lk_scan {
    const lk_cascade *c;
    int stride, tofs, w, h;
    int32_t *sum; /* sum table, then (tilted cascades) the tilted table at +tofs */
    uint32_t *sqsum;
    lk_haar_opt *hopt;
    lk_haar_stump_opt *hstump; /* stump cascades only */
    lk_lbp_opt *lopt;
    int nofs[4];
    double area;
} lk_scan;

/* lk_scan_run's verdict for a window the Haar variance gate refuses. */
#define LK_SCAN_FLAT INT_MIN

/* ---------------------------------------------------------------- loading */

static xmlNode *child(const xmlNode *n, const char *name)
{
    for (xmlNode *c = n ? n->children : NULL; c; c = c->next)
        if (c->type == XML_ELEMENT_NODE && strcmp((const char *)c->name, name) == 0)
            return c;
    return NULL;
}

static xmlNode *first_elem(const xmlNode *n)
{
    for (xmlNode *c = n ? n->children : NULL; c; c = c->next)
        if (c->type == XML_ELEMENT_NODE)
            return c;
    return NULL;
}

static xmlNode *next_elem(const xmlNode *n)
{
    for (xmlNode *c = n->next; c; c = c->next)
        if (c->type == XML_ELEMENT_NODE)
            return c;
    return NULL;
}

static int count_elems(const xmlNode *n)
{
    int k = 0;
    for (xmlNode *c = first_elem(n); c; c = next_elem(c))
        k++;
    return k;
}

/* Parses up to max whitespace-separated numbers of n's text; returns how many,
 * or -1 if the text holds something that is not a number or too many. */
static int numbers(const xmlNode *n, double *out, int max)
{
    if (!n)
        return -1;
    xmlChar *txt = xmlNodeGetContent(n);
    if (!txt)
        return -1;
    const char *s = (const char *)txt;
    int k = 0;
    for (;;) {
        while (*s == ' ' || *s == '\t' || *s == '\n' || *s == '\r')
            s++;
        if (!*s)
            break;
        char *end;
        errno = 0;
        double v = strtod(s, &end);
        if (end == s || errno == ERANGE || !isfinite(v) || k == max) {
            k = -1;
            break;
        }
        out[k++] = v;
        s = end;
    }
    xmlFree(txt);
    return k;
}

static int number(const xmlNode *n, double *v)
{
    return numbers(n, v, 1) == 1;
}

static int as_int(double v, int *out)
{
    if (v != floor(v) || v < INT_MIN || v > UINT32_MAX)
        return 0;
    /* Category masks are written as signed 32-bit words; accept either
     * reading of the same bits. */
    *out = v > INT_MAX ? (int)(int32_t)(uint32_t)v : (int)v;
    return 1;
}

void lk_cascade_free(lk_cascade *c)
{
    if (!c)
        return;
    free(c->stages);
    free(c->tree_first_node);
    free(c->tree_nodes);
    free(c->nodes);
    free(c->leaves);
    free(c->subsets);
    free(c->stumps);
    free(c->haar);
    free(c->lbp);
    free(c);
}

#define NODE_VALUES_MAX 4096

typedef struct loader {
    lk_cascade *c;
    const char *path;
    lk_error *err;
    int cap_nodes, cap_leaves, cap_trees;
} loader;

static lk_code fail(loader *L, const char *what)
{
    return lk_error_set(L->err, LK_ERR_CASCADE,
                        "cascade file %s is malformed (%s); use a cascade XML from the "
                        "opencv-data package (e.g. haarcascade_frontalface_alt.xml)",
                        L->path, what);
}

static int grow(void **p, int *cap, int need, size_t elem)
{
    if (need <= *cap)
        return 1;
    int ncap = *cap ? *cap : 256;
    while (ncap < need)
        ncap *= 2;
    void *np = realloc(*p, (size_t)ncap * elem);
    if (!np)
        return 0;
    *p = np;
    *cap = ncap;
    return 1;
}

static lk_code load_tree(loader *L, const xmlNode *wc, double *vals)
{
    lk_cascade *c = L->c;
    const int step = 3 + (c->subset_words > 0 ? c->subset_words : 1);
    int nv = numbers(child(wc, "internalNodes"), vals, NODE_VALUES_MAX);
    if (nv <= 0 || nv % step != 0)
        return fail(L, "a weak classifier's internalNodes has a wrong count of values");
    const int nn = nv / step;
    if (!grow((void **)&c->nodes, &L->cap_nodes, c->nnodes + nn, sizeof *c->nodes) ||
        (c->subset_words > 0 &&
         !(c->subsets = realloc(c->subsets, sizeof(int32_t) * (size_t)c->subset_words *
                                                (size_t)L->cap_nodes))))
        return lk_error_set(L->err, LK_ERR_NOMEM, "out of memory loading %s", L->path);
    for (int i = 0; i < nn; i++) {
        const double *v = vals + (size_t)i * (size_t)step;
        lk_tree_node *nd = &c->nodes[c->nnodes + i];
        if (!as_int(v[0], &nd->left) || !as_int(v[1], &nd->right) ||
            !as_int(v[2], &nd->feature) || nd->feature < 0)
            return fail(L, "a node's left/right/feature index is not a valid integer");
        /* Children must point forward inside the tree (so every walk ends)
         * or at one of its nn+1 leaves. */
        if ((nd->left > 0 && (nd->left <= i || nd->left >= nn)) || nd->left < -nn ||
            (nd->right > 0 && (nd->right <= i || nd->right >= nn)) || nd->right < -nn)
            return fail(L, "a node's child index is out of its tree");
        if (c->subset_words > 0) {
            nd->threshold = 0.f;
            for (int j = 0; j < c->subset_words; j++) {
                int w;
                if (!as_int(v[3 + j], &w))
                    return fail(L, "a category mask word is not an integer");
                c->subsets[(size_t)(c->nnodes + i) * (size_t)c->subset_words + (size_t)j] =
                    (int32_t)w;
            }
        } else {
            nd->threshold = (float)v[3];
        }
    }
    int nl = numbers(child(wc, "leafValues"), vals, NODE_VALUES_MAX);
    if (nl != nn + 1)
        return fail(L, "a weak classifier's leafValues count is not its node count + 1");
    if (!grow((void **)&c->leaves, &L->cap_leaves, c->nleaves + nl, sizeof *c->leaves))
        return lk_error_set(L->err, LK_ERR_NOMEM, "out of memory loading %s", L->path);
    for (int i = 0; i < nl; i++)
        c->leaves[c->nleaves + i] = (float)vals[i];
    if (!grow((void **)&c->tree_nodes, &L->cap_trees, c->ntrees + 1, sizeof(int)) ||
        !(c->tree_first_node = realloc(c->tree_first_node, sizeof(int) * (size_t)L->cap_trees)))
        return lk_error_set(L->err, LK_ERR_NOMEM, "out of memory loading %s", L->path);
    c->tree_nodes[c->ntrees] = nn;
    c->tree_first_node[c->ntrees] = c->nnodes;
    c->ntrees++;
    c->nnodes += nn;
    c->nleaves += nl;
    if (nn > c->max_nodes)
        c->max_nodes = nn;
    return LK_OK;
}

static lk_code load_features(loader *L, const xmlNode *feats)
{
    lk_cascade *c = L->c;
    const int n = count_elems(feats);
    if (n <= 0)
        return fail(L, "no features");
    c->nfeatures = n;
    if (c->type == LK_CASCADE_HAAR)
        c->haar = calloc((size_t)n, sizeof *c->haar);
    else
        c->lbp = calloc((size_t)n, sizeof *c->lbp);
    if (!c->haar && !c->lbp)
        return lk_error_set(L->err, LK_ERR_NOMEM, "out of memory loading %s", L->path);
    const int W = c->win_w, H = c->win_h;
    int i = 0;
    for (xmlNode *f = first_elem(feats); f; f = next_elem(f), i++) {
        double v[5];
        if (c->type == LK_CASCADE_LBP) {
            lk_lbp_feature *lf = &c->lbp[i];
            if (numbers(child(f, "rect"), v, 5) != 4 || !as_int(v[0], &lf->x) ||
                !as_int(v[1], &lf->y) || !as_int(v[2], &lf->w) || !as_int(v[3], &lf->h))
                return fail(L, "an LBP feature rect is not four integers");
            /* 3x3 blocks of w x h must fit in the window. */
            if (lf->x < 0 || lf->y < 0 || lf->w <= 0 || lf->h <= 0 || lf->x + 3 * lf->w > W ||
                lf->y + 3 * lf->h > H)
                return fail(L, "an LBP feature lies outside the window");
            continue;
        }
        lk_haar_feature *hf = &c->haar[i];
        const xmlNode *rects = child(f, "rects");
        double t = 0;
        const xmlNode *tn = child(f, "tilted");
        if (tn && !number(tn, &t))
            return fail(L, "a feature's tilted flag is not a number");
        hf->tilted = t != 0;
        if (hf->tilted)
            c->has_tilted = 1;
        int k = 0;
        for (xmlNode *r = first_elem(rects); r; r = next_elem(r), k++) {
            int x, y, w, h;
            if (k >= 3)
                return fail(L, "a Haar feature has more than three rectangles");
            if (numbers(r, v, 5) != 5 || !as_int(v[0], &x) || !as_int(v[1], &y) ||
                !as_int(v[2], &w) || !as_int(v[3], &h) || w < 0 || h < 0)
                return fail(L, "a Haar rectangle is not \"x y w h weight\"");
            /* All four corners read from the integral table must lie in the
             * (W+1)x(H+1) table of the window. Tilted corners are (x,y),
             * (x-h,y+h), (x+w,y+w), (x+w-h,y+w+h) (Lienhart & Maydt 2002). */
            int ok = hf->tilted ? (x - h >= 0 && y >= 0 && x + w <= W && y + w + h <= H)
                                : (x >= 0 && y >= 0 && x + w <= W && y + h <= H);
            if (!ok)
                return fail(L, "a Haar rectangle lies outside the window");
            hf->r[k][0] = x;
            hf->r[k][1] = y;
            hf->r[k][2] = w;
            hf->r[k][3] = h;
            hf->weight[k] = (float)v[4];
        }
        if (k < 1)
            return fail(L, "a Haar feature has no rectangles");
        hf->nrects = k;
    }
    return LK_OK;
}

lk_cascade *lk_cascade_load(const char *path, lk_error *err)
{
    if (!path) {
        lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "no cascade path given");
        return NULL;
    }
    FILE *probe = fopen(path, "rb");
    if (!probe) {
        lk_error_set(err, LK_ERR_CASCADE,
                     "cannot open cascade file %s: %s; install the opencv-data package or "
                     "point the cascade setting at an existing XML file",
                     path, strerror(errno));
        return NULL;
    }
    fclose(probe);
    /* No network, no external entities, quiet: a cascade is plain data. */
    xmlDoc *doc = xmlReadFile(path, NULL, XML_PARSE_NONET | XML_PARSE_NOERROR |
                                               XML_PARSE_NOWARNING | XML_PARSE_HUGE);
    if (!doc) {
        lk_error_set(err, LK_ERR_CASCADE,
                     "cascade file %s is not well-formed XML; it may be truncated or not a "
                     "cascade: reinstall it from the opencv-data package",
                     path);
        return NULL;
    }
    lk_cascade *c = calloc(1, sizeof *c);
    double *vals = malloc(sizeof(double) * NODE_VALUES_MAX);
    loader L = {c, path, err, 0, 0, 0};
    lk_code rc = LK_OK;
    if (!c || !vals) {
        rc = lk_error_set(err, LK_ERR_NOMEM, "out of memory loading %s", path);
        goto done;
    }
    const xmlNode *root = xmlDocGetRootElement(doc);
    const xmlNode *cas = root ? first_elem(root) : NULL;
    if (!root || strcmp((const char *)root->name, "opencv_storage") != 0 || !cas) {
        rc = fail(&L, "no <opencv_storage> with a cascade inside");
        goto done;
    }
    xmlChar *st = xmlNodeGetContent(child(cas, "stageType"));
    xmlChar *ft = xmlNodeGetContent(child(cas, "featureType"));
    int st_ok = st && strcmp((const char *)st, "BOOST") == 0;
    if (ft && strcmp((const char *)ft, "HAAR") == 0)
        c->type = LK_CASCADE_HAAR;
    else if (ft && strcmp((const char *)ft, "LBP") == 0)
        c->type = LK_CASCADE_LBP;
    xmlFree(st);
    xmlFree(ft);
    if (!st_ok || !c->type) {
        /* Old-format files (<haarcascade_...> with <trees>) land here too. */
        rc = fail(&L, "stageType must be BOOST and featureType HAAR or LBP (this reader "
                      "takes the current cascade format only)");
        goto done;
    }
    double w, h, cats = 0;
    if (!number(child(cas, "width"), &w) || !number(child(cas, "height"), &h) || w < 3 ||
        h < 3 || w > 1024 || h > 1024 || w != floor(w) || h != floor(h)) {
        rc = fail(&L, "missing or implausible window width/height");
        goto done;
    }
    c->win_w = (int)w;
    c->win_h = (int)h;
    const xmlNode *fp = child(cas, "featureParams");
    if (!fp || !number(child(fp, "maxCatCount"), &cats) || cats < 0 || cats > 256 ||
        (c->type == LK_CASCADE_LBP) != (cats > 0)) {
        rc = fail(&L, "featureParams/maxCatCount missing or not matching the feature type");
        goto done;
    }
    /* An LBP code has 8 bits: it indexes a 256-bit mask. */
    if (c->type == LK_CASCADE_LBP && cats != 256) {
        rc = fail(&L, "an LBP cascade must have 256 categories");
        goto done;
    }
    c->subset_words = ((int)cats + 31) / 32;
    const xmlNode *stages = child(cas, "stages");
    c->nstages = count_elems(stages);
    if (c->nstages <= 0) {
        rc = fail(&L, "no stages");
        goto done;
    }
    c->stages = calloc((size_t)c->nstages, sizeof *c->stages);
    if (!c->stages) {
        rc = lk_error_set(err, LK_ERR_NOMEM, "out of memory loading %s", path);
        goto done;
    }
    int si = 0;
    for (const xmlNode *s = first_elem(stages); s; s = next_elem(s), si++) {
        double thr;
        if (!number(child(s, "stageThreshold"), &thr)) {
            rc = fail(&L, "a stage has no stageThreshold");
            goto done;
        }
        /* THRESHOLD_EPS = 1e-5f in OpenCV's Data::read: a small slack so that
         * rounding of the stored thresholds never rejects a training
         * positive. */
        c->stages[si].threshold = (float)thr - 1e-5f;
        c->stages[si].first_tree = c->ntrees;
        const xmlNode *wcs = child(s, "weakClassifiers");
        c->stages[si].ntrees = count_elems(wcs);
        if (c->stages[si].ntrees <= 0) {
            rc = fail(&L, "a stage has no weak classifiers");
            goto done;
        }
        for (const xmlNode *wc = first_elem(wcs); wc; wc = next_elem(wc))
            if ((rc = load_tree(&L, wc, vals)) != LK_OK)
                goto done;
    }
    if ((rc = load_features(&L, child(cas, "features"))) != LK_OK)
        goto done;
    for (int i = 0; i < c->nnodes; i++)
        if (c->nodes[i].feature >= c->nfeatures) {
            rc = fail(&L, "a node refers to a feature that does not exist");
            goto done;
        }
    if (c->max_nodes == 1) {
        /* Stump cascades (all published ones but the *_tree files) get a flat
         * array: node i and leaves 2i, 2i+1 belong to weak classifier i. */
        c->stumps = malloc(sizeof *c->stumps * (size_t)c->ntrees);
        if (!c->stumps) {
            rc = lk_error_set(err, LK_ERR_NOMEM, "out of memory loading %s", path);
            goto done;
        }
        for (int i = 0; i < c->ntrees; i++) {
            const lk_tree_node *nd = &c->nodes[i];
            c->stumps[i].feature = nd->feature;
            c->stumps[i].threshold = nd->threshold;
            /* left <= 0 and right <= 0 here: leaf indices 0 and 1. */
            c->stumps[i].left = c->leaves[2 * i - nd->left];
            c->stumps[i].right = c->leaves[2 * i - nd->right];
        }
    }
done:
    free(vals);
    xmlFreeDoc(doc);
    if (rc != LK_OK) {
        lk_cascade_free(c);
        return NULL;
    }
    return c;
}

void lk_cascade_window(const lk_cascade *c, int *width, int *height)
{
    if (width)
        *width = c ? c->win_w : 0;
    if (height)
        *height = c ? c->win_h : 0;
}

void lk_cascade_get_info(const lk_cascade *c, lk_cascade_info *info)
{
    memset(info, 0, sizeof *info);
    if (!c)
        return;
    info->feature_type = c->type;
    info->window_width = c->win_w;
    info->window_height = c->win_h;
    info->stages = c->nstages;
    info->weak_classifiers = c->ntrees;
    info->features = c->nfeatures;
    info->max_nodes_per_tree = c->max_nodes;
    info->has_tilted = c->has_tilted;
}

/* ------------------------------------------------------------- evaluation */

static void lk_scan_free(lk_scan *s);

static lk_code lk_scan_init(lk_scan *s, const lk_cascade *c, int max_w, int max_h, lk_error *err)
{
    memset(s, 0, sizeof *s);
    s->c = c;
    s->stride = max_w + 1;
    const size_t cells = (size_t)s->stride * (size_t)(max_h + 1);
    s->tofs = c->has_tilted ? (int)cells : 0;
    s->sum = malloc(sizeof(int32_t) * cells * (c->has_tilted ? 2 : 1));
    if (c->type == LK_CASCADE_HAAR) {
        s->sqsum = malloc(sizeof(uint32_t) * cells);
        s->hopt = malloc(sizeof *s->hopt * (size_t)c->nfeatures);
        if (c->stumps)
            s->hstump = malloc(sizeof *s->hstump * (size_t)c->ntrees);
    } else {
        s->lopt = malloc(sizeof *s->lopt * (size_t)c->nfeatures);
    }
    if (!s->sum || (c->type == LK_CASCADE_HAAR ? (!s->sqsum || !s->hopt || (c->stumps && !s->hstump)) : !s->lopt)) {
        lk_scan_free(s);
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory for a %dx%d search", max_w, max_h);
    }
    const int st = s->stride;
    /* Offsets of a rectangle's corners from the window's top-left entry:
     * CV_SUM_OFS / CV_TILTED_OFS of OpenCV's cascadedetect.hpp. */
#define SUM_OFS(o, x, y, w, h)                                                                   \
    do {                                                                                         \
        (o)[0] = (y) * st + (x);                                                                 \
        (o)[1] = (y) * st + (x) + (w);                                                           \
        (o)[2] = ((y) + (h)) * st + (x);                                                         \
        (o)[3] = ((y) + (h)) * st + (x) + (w);                                                   \
    } while (0)
    if (c->type == LK_CASCADE_HAAR) {
        /* Variance normalisation uses the window without its 1-pixel border
         * (normrect = (1, 1, W-2, H-2) in HaarEvaluator::read). */
        SUM_OFS(s->nofs, 1, 1, c->win_w - 2, c->win_h - 2);
        s->area = (double)(c->win_w - 2) * (c->win_h - 2);
        for (int i = 0; i < c->nfeatures; i++) {
            const lk_haar_feature *f = &c->haar[i];
            lk_haar_opt *o = &s->hopt[i];
            memset(o, 0, sizeof *o);
            for (int k = 0; k < f->nrects; k++) {
                const int x = f->r[k][0], y = f->r[k][1], w = f->r[k][2], h = f->r[k][3];
                o->weight[k] = f->weight[k];
                if (f->tilted) {
                    o->ofs[k][0] = s->tofs + y * st + x;
                    o->ofs[k][1] = s->tofs + (y + h) * st + x - h;
                    o->ofs[k][2] = s->tofs + (y + w) * st + x + w;
                    o->ofs[k][3] = s->tofs + (y + w + h) * st + x + w - h;
                } else {
                    SUM_OFS(o->ofs[k], x, y, w, h);
                }
            }
            /* A missing third rectangle reads a zero-size sum at offset 0
             * with weight 0, as OpenCV's zero-initialised Rect does. */
        }
        for (int i = 0; s->hstump && i < c->ntrees; i++) {
            const lk_stump *sp = &c->stumps[i];
            lk_haar_stump_opt *o = &s->hstump[i];
            memcpy(o->ofs, s->hopt[sp->feature].ofs, sizeof o->ofs);
            memcpy(o->weight, s->hopt[sp->feature].weight, sizeof o->weight);
            o->threshold = sp->threshold;
            o->leaf[0] = sp->left;
            o->leaf[1] = sp->right;
        }
    } else {
        for (int i = 0; i < c->nfeatures; i++) {
            const lk_lbp_feature *f = &c->lbp[i];
            int *o = s->lopt[i].ofs;
            /* 4x4 grid of corner offsets of the 3x3 blocks
             * (LBPEvaluator::OptFeature::setOffsets). */
            for (int gy = 0; gy < 4; gy++)
                for (int gx = 0; gx < 4; gx++)
                    o[gy * 4 + gx] = (f->y + gy * f->h) * st + f->x + gx * f->w;
        }
    }
#undef SUM_OFS
    return LK_OK;
}

static void lk_scan_free(lk_scan *s)
{
    free(s->sum);
    free(s->sqsum);
    free(s->hopt);
    free(s->hstump);
    free(s->lopt);
    memset(s, 0, sizeof *s);
}

static lk_code lk_scan_set_image(lk_scan *s, const uint8_t *img, int w, int h, lk_error *err)
{
    s->w = w;
    s->h = h;
    return lk_integral(img, w, h, w, s->sum, s->sqsum, s->c->has_tilted ? s->sum + s->tofs : NULL,
                       s->stride, err);
}

/* Four-corner sum; unsigned arithmetic so that wrapped tables stay defined. */
static inline int32_t rsum(const int32_t *p, const int *o)
{
    return (int32_t)((uint32_t)p[o[0]] - (uint32_t)p[o[1]] - (uint32_t)p[o[2]] +
                     (uint32_t)p[o[3]]);
}

static inline float haar_value(const lk_haar_opt *f, const int32_t *p, float vnf)
{
    /* Single precision, in OpenCV's order (HaarEvaluator::OptFeature::calc),
     * so that values near a threshold fall on the same side. */
    float ret = f->weight[0] * (float)rsum(p, f->ofs[0]) + f->weight[1] * (float)rsum(p, f->ofs[1]);
    if (f->weight[2] != 0.0f)
        ret += f->weight[2] * (float)rsum(p, f->ofs[2]);
    return ret * vnf;
}

static inline int lbp_code(const int *o, const int32_t *p)
{
    /* Multi-block LBP (Liao et al., ICB 2007) with the bit order of
     * LBPEvaluator::OptFeature::calc: clockwise from the top-left block. */
#define B(a, b, c, d) (int32_t)((uint32_t)p[o[a]] - (uint32_t)p[o[b]] - (uint32_t)p[o[c]] + (uint32_t)p[o[d]])
    const int32_t cval = B(5, 6, 9, 10);
    return (B(0, 1, 4, 5) >= cval ? 128 : 0) | (B(1, 2, 5, 6) >= cval ? 64 : 0) |
           (B(2, 3, 6, 7) >= cval ? 32 : 0) | (B(6, 7, 10, 11) >= cval ? 16 : 0) |
           (B(10, 11, 14, 15) >= cval ? 8 : 0) | (B(9, 10, 13, 14) >= cval ? 4 : 0) |
           (B(8, 9, 12, 13) >= cval ? 2 : 0) | (B(4, 5, 8, 9) >= cval ? 1 : 0);
#undef B
}

static inline int in_subset(const int32_t *subset, int code)
{
    return ((uint32_t)subset[code >> 5] >> (code & 31)) & 1u;
}

static int lk_scan_run(const lk_scan *s, int x, int y)
{
    const lk_cascade *c = s->c;
    const int pos = y * s->stride + x;
    const int32_t *p = s->sum + pos;
    if (c->type == LK_CASCADE_HAAR) {
        const uint32_t *q = s->sqsum + pos;
        const int *n = s->nofs;
        const int32_t valsum = (int32_t)((uint32_t)p[n[0]] - (uint32_t)p[n[1]] -
                                         (uint32_t)p[n[2]] + (uint32_t)p[n[3]]);
        const uint32_t valsq = q[n[0]] - q[n[1]] - q[n[2]] + q[n[3]];
        const double nf = s->area * valsq - (double)valsum * valsum;
        if (!(nf > 0.))
            return LK_SCAN_FLAT;
        const float vnf = (float)(1. / sqrt(nf));
        /* area / sqrt(area * sumsq - sum^2) = 1 / stddev: windows with a
         * standard deviation of 10 grey levels or less are not searched
         * (HaarEvaluator::setWindow). */
        if (!(s->area * vnf < 1e-1))
            return LK_SCAN_FLAT;
        const lk_haar_opt *ho = s->hopt;
        if (s->hstump) {
            const lk_haar_stump_opt *st = s->hstump;
            for (int si = 0; si < c->nstages; si++) {
                const lk_stage *sg = &c->stages[si];
                double tmp = 0;
                for (int i = 0; i < sg->ntrees; i++, st++) {
                    /* Same arithmetic as haar_value(); the third rectangle is
                     * always read (a missing one has weight 0 and offsets 0,
                     * so it adds exactly +0) to spare an unpredictable
                     * branch. */
                    float ret = st->weight[0] * (float)rsum(p, st->ofs[0]) +
                                st->weight[1] * (float)rsum(p, st->ofs[1]);
                    ret += st->weight[2] * (float)rsum(p, st->ofs[2]);
                    const double v = ret * vnf;
                    tmp += st->leaf[!(v < st->threshold)];
                }
                if (tmp < sg->threshold)
                    return -si;
            }
            return 1;
        }
        for (int si = 0; si < c->nstages; si++) {
            const lk_stage *sg = &c->stages[si];
            double tmp = 0;
            for (int t = sg->first_tree; t < sg->first_tree + sg->ntrees; t++) {
                const int root = c->tree_first_node[t];
                int idx = 0;
                do {
                    const lk_tree_node *nd = &c->nodes[root + idx];
                    const double v = haar_value(&ho[nd->feature], p, vnf);
                    idx = v < nd->threshold ? nd->left : nd->right;
                } while (idx > 0);
                /* Tree t's leaves start at root + t (one more leaf than nodes). */
                tmp += c->leaves[root + t - idx];
            }
            if (tmp < sg->threshold)
                return -si;
        }
        return 1;
    }
    const lk_lbp_opt *lo = s->lopt;
    const int sw = c->subset_words;
    for (int si = 0; si < c->nstages; si++) {
        const lk_stage *sg = &c->stages[si];
        double tmp = 0;
        if (c->stumps) {
            for (int t = sg->first_tree; t < sg->first_tree + sg->ntrees; t++) {
                const lk_stump *st = &c->stumps[t];
                const int code = lbp_code(lo[st->feature].ofs, p);
                tmp += in_subset(c->subsets + (size_t)t * (size_t)sw, code) ? st->left : st->right;
            }
        } else {
            for (int t = sg->first_tree; t < sg->first_tree + sg->ntrees; t++) {
                const int root = c->tree_first_node[t];
                int idx = 0;
                do {
                    const lk_tree_node *nd = &c->nodes[root + idx];
                    const int code = lbp_code(lo[nd->feature].ofs, p);
                    idx = in_subset(c->subsets + (size_t)(root + idx) * (size_t)sw, code)
                              ? nd->left
                              : nd->right;
                } while (idx > 0);
                tmp += c->leaves[root + t - idx];
            }
        }
        if (tmp < sg->threshold)
            return -si;
    }
    return 1;
}

lk_code lk_cascade_classify_window(const lk_cascade *c, const lk_image *gray, int x, int y,
                                   int *accepted, int *stages_passed, lk_error *err)
{
    if (!c || !gray || gray->channels != 1 || x < 0 || y < 0 || x + c->win_w > gray->width ||
        y + c->win_h > gray->height)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "the window must lie inside a 1-channel image");
    lk_scan s;
    lk_code rc = lk_scan_init(&s, c, c->win_w, c->win_h, err);
    if (rc != LK_OK)
        return rc;
    rc = lk_integral(gray->data + (size_t)y * (size_t)gray->width + (size_t)x, c->win_w, c->win_h,
                     gray->width, s.sum, s.sqsum, c->has_tilted ? s.sum + s.tofs : NULL, s.stride,
                     err);
    if (rc == LK_OK) {
        s.w = c->win_w;
        s.h = c->win_h;
        const int r = lk_scan_run(&s, 0, 0);
        *accepted = r > 0;
        *stages_passed = r > 0 ? c->nstages : (r == LK_SCAN_FLAT ? 0 : -r);
    }
    lk_scan_free(&s);
    return rc;
}

/* -------------------------------------------------------------- detection */

void lk_detect_params_default(lk_detect_params *p)
{
    /* scale 1.1 and 3 neighbours: OpenCV's detectMultiScale defaults. 640:
     * long side of the working copy; a face of 1/10 of the frame is then
     * still 64 px, well above the 20-24 px windows (common practice). */
    p->scale_factor = 1.1;
    p->min_neighbors = 3;
    p->min_size = 0;
    p->max_size = 0;
    p->max_long_side = 640;
}

typedef struct rect_list {
    lk_rect *r;
    int n, cap;
} rect_list;

/* Makes room for `more` rects. Called once per row of windows (never per
 * window); growth is geometric, so an image costs O(log n) reallocations. */
static int rect_reserve(rect_list *l, int more)
{
    if (l->n + more <= l->cap)
        return 1;
    int ncap = l->cap ? l->cap : 256;
    while (ncap < l->n + more)
        ncap *= 2;
    lk_rect *nr = realloc(l->r, sizeof *nr * (size_t)ncap);
    if (!nr)
        return 0;
    l->r = nr;
    l->cap = ncap;
    return 1;
}

#define LK_MAX_SCALES 1024

/* Raw (ungrouped) windows of the multi-scale search, with the scheme of
 * OpenCV 4's CascadeClassifierImpl::detectMultiScaleNoGrouping and its
 * CascadeClassifierInvoker: the cascade keeps its training size and the
 * image is shrunk by factor = scale_factor^k (bilinear), scales whose window
 * (rounded) falls outside [min_size, max_size] or exceeds the image are
 * skipped; positions step by 2 pixels below factor 2 and by 1 above; after a
 * window fails the first stage the next position is skipped as well. */
static lk_code detect_raw(const lk_cascade *c, const lk_image *g, double scale_factor,
                          int min_w, int min_h, int max_w, int max_h, rect_list *out,
                          lk_error *err)
{
    float scales[LK_MAX_SCALES];
    int nscales = 0;
    if (max_w <= 0 || max_h <= 0) {
        max_w = g->width;
        max_h = g->height;
    }
    for (double factor = 1; nscales < LK_MAX_SCALES; factor *= scale_factor) {
        const int ww = (int)lrint(c->win_w * factor), wh = (int)lrint(c->win_h * factor);
        if (ww > max_w || wh > max_h || ww > g->width || wh > g->height)
            break;
        if (ww < min_w || wh < min_h)
            continue;
        scales[nscales++] = (float)factor;
    }
    if (nscales == 0)
        return LK_OK;
    /* OpenCV divides in single precision: cvRound(imgsz.width / sc). */
    const int w0 = (int)lrintf((float)g->width / scales[0]);
    const int h0 = (int)lrintf((float)g->height / scales[0]);
    lk_scan s;
    lk_code rc = lk_scan_init(&s, c, w0, h0, err);
    if (rc != LK_OK)
        return rc;
    uint8_t *buf = malloc((size_t)w0 * (size_t)h0);
    if (!buf) {
        lk_scan_free(&s);
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory for a %dx%d search", w0, h0);
    }
    /* OpenCV splits rows into stripes sized from the first scale's width;
     * their union can stop short of the last row when the row count is odd
     * at step 2, and that is reproduced. */
    const int szw0 = w0 + 1 - c->win_w;
    const int nstripes = szw0 > 0 ? (szw0 + 31) / 32 : 0;
    for (int si = 0; si < nscales && rc == LK_OK; si++) {
        const float sc = scales[si];
        const int sw = (int)lrintf((float)g->width / sc), sh = (int)lrintf((float)g->height / sc);
        const int ystep = sc >= 2 ? 1 : 2;
        const int wx = sw + 1 - c->win_w, wy = sh + 1 - c->win_h;
        if (wx <= 0 || wy <= 0 || nstripes == 0)
            continue;
        lk_image view = {sw, sh, 1, buf};
        if ((rc = lk_resize_linear_u8(g, &view, err)) != LK_OK)
            break;
        if ((rc = lk_scan_set_image(&s, buf, sw, sh, err)) != LK_OK)
            break;
        int stripe = (wy / ystep + nstripes - 1) / nstripes;
        stripe = (stripe > 1 ? stripe : 1) * ystep;
        const int ylim = nstripes * stripe < wy ? nstripes * stripe : wy;
        const int rw = (int)lrintf((float)c->win_w * sc), rh = (int)lrintf((float)c->win_h * sc);
        for (int y = 0; y < ylim; y += ystep) {
            if (!rect_reserve(out, wx / ystep + 1)) {
                rc = lk_error_set(err, LK_ERR_NOMEM, "out of memory collecting detections");
                break;
            }
            for (int x = 0; x < wx; x += ystep) {
                const int r = lk_scan_run(&s, x, y);
                if (r > 0)
                    out->r[out->n++] = (lk_rect){(int)lrintf((float)x * sc),
                                                 (int)lrintf((float)y * sc), rw, rh, 1};
                if (r == 0)
                    x += ystep;
            }
        }
    }
    free(buf);
    lk_scan_free(&s);
    return rc;
}

static lk_code check_args(const lk_cascade *c, const lk_image *gray, const lk_detect_params *p,
                          lk_rect **rects, int *count, lk_error *err)
{
    if (!rects || !count)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "detect: no output given");
    *rects = NULL;
    *count = 0;
    if (!c || !gray || !gray->data || gray->width <= 0 || gray->height <= 0)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "detect: no cascade or no image");
    if (gray->channels != 1)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "detect needs an 8-bit gray image (convert with lk_image_to_gray)");
    if (!(p->scale_factor > 1.0) || p->scale_factor > 4.0 || p->min_size < 0 || p->max_size < 0 ||
        p->max_long_side < 0 || p->min_neighbors < 0)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "detect: scale_factor must be in (1, 4], sizes and neighbours >= 0");
    return LK_OK;
}

lk_code lk_detect(const lk_cascade *c, const lk_image *gray, const lk_detect_params *p,
                  lk_rect **rects, int *count, lk_error *err)
{
    lk_detect_params defaults;
    if (!p) {
        lk_detect_params_default(&defaults);
        p = &defaults;
    }
    lk_code rc = check_args(c, gray, p, rects, count, err);
    if (rc != LK_OK)
        return rc;
    const lk_image *g = gray;
    lk_image *small = NULL;
    const int W = gray->width, H = gray->height, longest = W > H ? W : H;
    double f = 1.0; /* input pixels per searched pixel */
    if (p->max_long_side > 0 && longest > p->max_long_side) {
        f = (double)longest / p->max_long_side;
        int sw = (int)lrint(W / f), sh = (int)lrint(H / f);
        small = lk_image_new(sw > 0 ? sw : 1, sh > 0 ? sh : 1, 1, err);
        if (!small)
            return err ? err->code : LK_ERR_NOMEM;
        if ((rc = lk_resize_area_u8(gray, small, err)) != LK_OK) {
            lk_image_free(small);
            return rc;
        }
        g = small;
    }
    /* Size limits are given in input pixels; the searched copy is f times
     * smaller (a minimum rounds up, a maximum down, so neither widens). */
    const int min_s = p->min_size > 0 ? (int)ceil(p->min_size / f - 1e-9) : 0;
    const int max_s = p->max_size > 0 ? (int)floor(p->max_size / f + 1e-9) : 0;
    rect_list raw = {0};
    rc = detect_raw(c, g, p->scale_factor, min_s, min_s, max_s > 0 ? max_s : 0,
                    max_s > 0 ? max_s : 0, &raw, err);
    if (rc == LK_OK) {
        /* eps 0.2: GROUP_EPS of OpenCV's detectMultiScale. */
        rc = lk_group_rects(raw.r, &raw.n, p->min_neighbors, 0.2, err);
    }
    if (rc != LK_OK) {
        free(raw.r);
        lk_image_free(small);
        return rc;
    }
    int n = 0;
    for (int i = 0; i < raw.n; i++) {
        lk_rect r = raw.r[i];
        if (small) {
            const double fx = (double)W / small->width, fy = (double)H / small->height;
            const int x0 = (int)lrint(r.x * fx), y0 = (int)lrint(r.y * fy);
            const int x1 = (int)lrint((r.x + r.width) * fx), y1 = (int)lrint((r.y + r.height) * fy);
            r.x = x0;
            r.y = y0;
            r.width = x1 - x0;
            r.height = y1 - y0;
        }
        /* Clip to the image and drop empty boxes (cv::clipObjects). */
        int x0 = r.x < 0 ? 0 : r.x, y0 = r.y < 0 ? 0 : r.y;
        int x1 = r.x + r.width > W ? W : r.x + r.width, y1 = r.y + r.height > H ? H : r.y + r.height;
        if (x1 <= x0 || y1 <= y0)
            continue;
        raw.r[n++] = (lk_rect){x0, y0, x1 - x0, y1 - y0, r.neighbors};
    }
    lk_image_free(small);
    lk_primary_rank(raw.r, n, W, H);
    if (n == 0) {
        free(raw.r);
        raw.r = NULL;
    }
    *rects = raw.r;
    *count = n;
    return LK_OK;
}

lk_code lk_detect_roi(const lk_cascade *c, const lk_image *gray, const lk_rect *roi,
                      const lk_detect_params *p, lk_rect **rects, int *count, lk_error *err)
{
    lk_detect_params defaults;
    if (!p) {
        lk_detect_params_default(&defaults);
        p = &defaults;
    }
    lk_code rc = check_args(c, gray, p, rects, count, err);
    if (rc != LK_OK)
        return rc;
    if (!roi)
        return lk_detect(c, gray, p, rects, count, err);
    int x0 = roi->x < 0 ? 0 : roi->x, y0 = roi->y < 0 ? 0 : roi->y;
    int x1 = roi->x + roi->width > gray->width ? gray->width : roi->x + roi->width;
    int y1 = roi->y + roi->height > gray->height ? gray->height : roi->y + roi->height;
    if (x1 <= x0 || y1 <= y0)
        return LK_OK; /* nothing of the region is inside the image */
    lk_image *crop = lk_image_new(x1 - x0, y1 - y0, 1, err);
    if (!crop)
        return err ? err->code : LK_ERR_NOMEM;
    for (int y = y0; y < y1; y++)
        memcpy(crop->data + (size_t)(y - y0) * (size_t)crop->width,
               gray->data + (size_t)y * (size_t)gray->width + (size_t)x0, (size_t)(x1 - x0));
    rc = lk_detect(c, crop, p, rects, count, err);
    lk_image_free(crop);
    for (int i = 0; rc == LK_OK && i < *count; i++) {
        (*rects)[i].x += x0;
        (*rects)[i].y += y0;
    }
    return rc;
}
