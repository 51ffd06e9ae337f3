/* Grouping of raw cascade windows and the primary-face rule.
 *
 * The grouping reproduces OpenCV's groupRectangles (objdetect,
 * cascadedetect.cpp, 4.x), the rule every published cascade was tuned with:
 * a window is similar to another when all four edges differ by at most
 * eps * (mean of the smaller width and smaller height); classes are the
 * connected components of that relation (cv::partition); a class with
 * <= min_neighbors members is dropped; the rest are averaged; a box is then
 * dropped when it lies (with an eps margin) inside another surviving box that
 * has more support (n2 > max(3, n1), or n1 < 3). */
#include "likeness/face.h"

#include <math.h>
#include <stdlib.h>

static int similar(const lk_rect *a, const lk_rect *b, double eps)
{
    const int mw = a->width < b->width ? a->width : b->width;
    const int mh = a->height < b->height ? a->height : b->height;
    const double delta = eps * (mw + mh) * 0.5;
    return abs(a->x - b->x) <= delta && abs(a->y - b->y) <= delta &&
           abs(a->x + a->width - b->x - b->width) <= delta &&
           abs(a->y + a->height - b->y - b->height) <= delta;
}

static int find_root(const int *parent, int i)
{
    while (parent[i] >= 0)
        i = parent[i];
    return i;
}

/* cv::partition's union-find (union by rank, path compression). The classes
 * it yields are the connected components, independent of the order. */
static int partition(const lk_rect *r, int n, double eps, int *parent, int *rank, int *labels)
{
    for (int i = 0; i < n; i++) {
        parent[i] = -1;
        rank[i] = 0;
    }
    for (int i = 0; i < n; i++) {
        int root = find_root(parent, i);
        for (int j = 0; j < n; j++) {
            if (i == j || !similar(&r[i], &r[j], eps))
                continue;
            int root2 = find_root(parent, j);
            if (root2 == root)
                continue;
            if (rank[root] > rank[root2]) {
                parent[root2] = root;
            } else {
                parent[root] = root2;
                rank[root2] += rank[root] == rank[root2];
                root = root2;
            }
            for (int k = j, p; (p = parent[k]) >= 0; k = p)
                parent[k] = root;
            for (int k = i, p; (p = parent[k]) >= 0; k = p)
                parent[k] = root;
        }
    }
    int nclasses = 0;
    for (int i = 0; i < n; i++) {
        int root = find_root(parent, i);
        if (rank[root] >= 0)
            rank[root] = ~nclasses++;
        labels[i] = ~rank[root];
    }
    return nclasses;
}

lk_code lk_group_rects(lk_rect *rects, int *count, int min_neighbors, double eps, lk_error *err)
{
    const int n = *count;
    if (n < 0 || (n > 0 && !rects))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT, "group: bad rectangle list");
    if (min_neighbors <= 0 || n == 0) {
        for (int i = 0; i < n; i++)
            rects[i].neighbors = 1;
        return LK_OK;
    }
    int *ibuf = malloc(sizeof(int) * 4 * (size_t)n);
    long long *sums = calloc((size_t)n * 4, sizeof *sums);
    lk_rect *avg = malloc(sizeof *avg * (size_t)n);
    if (!ibuf || !sums || !avg) {
        free(ibuf);
        free(sums);
        free(avg);
        return lk_error_set(err, LK_ERR_NOMEM, "out of memory grouping %d windows", n);
    }
    int *parent = ibuf, *rank = ibuf + n, *labels = ibuf + 2 * n, *members = ibuf + 3 * n;
    const int nclasses = partition(rects, n, eps, parent, rank, labels);
    for (int c = 0; c < nclasses; c++)
        members[c] = 0;
    for (int i = 0; i < n; i++) {
        long long *s = sums + 4 * (size_t)labels[i];
        s[0] += rects[i].x;
        s[1] += rects[i].y;
        s[2] += rects[i].width;
        s[3] += rects[i].height;
        members[labels[i]]++;
    }
    for (int c = 0; c < nclasses; c++) {
        /* OpenCV averages in float: saturate_cast<int>(sum * (1.f / n)),
         * i.e. round-half-even of a single-precision product. */
        const float s = 1.f / (float)members[c];
        const long long *t = sums + 4 * (size_t)c;
        avg[c].x = (int)lrintf((float)t[0] * s);
        avg[c].y = (int)lrintf((float)t[1] * s);
        avg[c].width = (int)lrintf((float)t[2] * s);
        avg[c].height = (int)lrintf((float)t[3] * s);
        avg[c].neighbors = members[c];
    }
    int out = 0;
    for (int i = 0; i < nclasses; i++) {
        const lk_rect r1 = avg[i];
        const int n1 = members[i];
        if (n1 <= min_neighbors)
            continue;
        int j;
        for (j = 0; j < nclasses; j++) {
            const int n2 = members[j];
            if (j == i || n2 <= min_neighbors)
                continue;
            const lk_rect r2 = avg[j];
            const int dx = (int)lrint(r2.width * eps), dy = (int)lrint(r2.height * eps);
            if (r1.x >= r2.x - dx && r1.y >= r2.y - dy &&
                r1.x + r1.width <= r2.x + r2.width + dx &&
                r1.y + r1.height <= r2.y + r2.height + dy && (n2 > (n1 > 3 ? n1 : 3) || n1 < 3))
                break;
        }
        if (j == nclasses)
            rects[out++] = r1;
    }
    *count = out;
    free(ibuf);
    free(sums);
    free(avg);
    return LK_OK;
}

typedef struct rank_ctx {
    double cx2, cy2; /* twice the image centre, to compare in integers */
} rank_ctx;

static double centre_dist2(const lk_rect *r, const rank_ctx *c)
{
    const double dx = 2.0 * r->x + r->width - c->cx2, dy = 2.0 * r->y + r->height - c->cy2;
    return dx * dx + dy * dy;
}

static int primary_before(const lk_rect *a, const lk_rect *b, const rank_ctx *c)
{
    const long long aa = (long long)a->width * a->height, ab = (long long)b->width * b->height;
    if (aa != ab)
        return aa > ab;
    const double da = centre_dist2(a, c), db = centre_dist2(b, c);
    if (da != db)
        return da < db;
    if (a->neighbors != b->neighbors)
        return a->neighbors > b->neighbors;
    if (a->y != b->y)
        return a->y < b->y;
    return a->x < b->x;
}

void lk_primary_rank(lk_rect *rects, int count, int image_width, int image_height)
{
    /* The subject of a verification photo is normally the largest face: the
     * closest to the camera. Equal sizes are resolved towards the centre of
     * the frame, where a subject is usually placed (common practice). Counts
     * are small (a handful of boxes), so insertion sort keeps it stable. */
    const rank_ctx c = {(double)image_width, (double)image_height};
    for (int i = 1; i < count; i++) {
        const lk_rect key = rects[i];
        int j = i - 1;
        while (j >= 0 && primary_before(&key, &rects[j], &c)) {
            rects[j + 1] = rects[j];
            j--;
        }
        rects[j + 1] = key;
    }
}
