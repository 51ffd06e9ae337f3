/* Histograms of oriented gradients: N. Dalal, B. Triggs, "Histograms of
 * Oriented Gradients for Human Detection", CVPR 2005, in the variant of
 * scikit-image 0.19 (skimage/feature/_hog.py and _hoghistogram.pyx), which
 * this file reproduces operation for operation so that its output can be
 * checked against that library: centred [-1,0,1] gradient with zero at the
 * image border, unsigned orientation, each pixel voting its gradient
 * magnitude into exactly one orientation bin of its own cell (no spatial or
 * orientation interpolation, no Gaussian block window), cells averaged over
 * their pixel count, blocks of cells normalised with eps = 1e-5. */
#include "likeness/features.h"

#include <math.h>
#include <stdlib.h>

/* numpy's NPY_PI, the double nearest pi. */
#define LK_PI 3.141592653589793238462643383279502884

/* skimage.feature._hog._hog_normalize_block: eps=1e-5. */
#define HOG_EPS 1e-5
/* L2-Hys clipping value: Dalal & Triggs 2005, section 6.4 (0.2, after
 * D. Lowe, "Distinctive Image Features from Scale-Invariant Keypoints",
 * IJCV 2004), also skimage's value. */
#define HOG_HYS_CLIP 0.2

#define HOG_MAX_ORIENTATIONS 360

static int hog_params_ok(const lk_hog_params *p)
{
    return p && p->orientations >= 1 && p->orientations <= HOG_MAX_ORIENTATIONS && p->cell >= 1 &&
           p->block >= 1 && p->norm >= LK_HOG_L1 && p->norm <= LK_HOG_L2_HYS;
}

size_t lk_hog_size(int w, int h, const lk_hog_params *p)
{
    if (!hog_params_ok(p) || w <= 0 || h <= 0)
        return 0;
    const int ncx = w / p->cell, ncy = h / p->cell;
    const int nbx = ncx - p->block + 1, nby = ncy - p->block + 1;
    if (nbx <= 0 || nby <= 0)
        return 0;
    return (size_t)nbx * (size_t)nby * (size_t)p->block * (size_t)p->block *
           (size_t)p->orientations;
}

/* numpy's float remainder (npy_divmod in npymath), i.e. Python's `x % m`:
 * the result takes the sign of m. Reproduced rather than replaced by fmod so
 * that a tiny negative angle becomes 180.0 exactly as in skimage (and then
 * falls in no bin). */
static double np_remainder(double a, double b)
{
    /* fmod is exact, and equals a itself whenever |a| < |b|. */
    double mod = fabs(a) < fabs(b) ? a : fmod(a, b);
    if (mod != 0.0) {
        if ((b < 0) != (mod < 0))
            mod += b;
    } else {
        mod = copysign(0.0, b);
    }
    return mod;
}

/* Bin of an orientation in degrees, or -1 when it lies in no bin. skimage
 * counts a pixel in bin i when step*i <= o < step*(i+1) with step = 180/n,
 * all in double (_hoghistogram.pyx, cell_hog). */
static int orientation_bin(double o, int n, double step)
{
    if (!(o >= 0.0 && o < 360.0))
        return -1; /* NaN from a NaN pixel (or sqrt of a negative one) */
    int b = (int)(o / step);
    if (b < 0)
        b = 0;
    if (b > n)
        b = n;
    while (b > 0 && o < step * b)
        b--;
    while (b < n && o >= step * (b + 1))
        b++;
    return b < n ? b : -1;
}

static void normalize_block(double *v, size_t n, lk_hog_norm norm)
{
    double s = 0.0;
    switch (norm) {
    case LK_HOG_L1:
    case LK_HOG_L1_SQRT:
        for (size_t i = 0; i < n; i++)
            s += fabs(v[i]);
        s += HOG_EPS;
        for (size_t i = 0; i < n; i++)
            v[i] = norm == LK_HOG_L1 ? v[i] / s : sqrt(v[i] / s);
        break;
    case LK_HOG_L2:
    case LK_HOG_L2_HYS:
        for (size_t i = 0; i < n; i++)
            s += v[i] * v[i];
        s = sqrt(s + HOG_EPS * HOG_EPS);
        for (size_t i = 0; i < n; i++)
            v[i] /= s;
        if (norm == LK_HOG_L2_HYS) {
            s = 0.0;
            for (size_t i = 0; i < n; i++) {
                if (v[i] > HOG_HYS_CLIP)
                    v[i] = HOG_HYS_CLIP;
                s += v[i] * v[i];
            }
            s = sqrt(s + HOG_EPS * HOG_EPS);
            for (size_t i = 0; i < n; i++)
                v[i] /= s;
        }
        break;
    }
}

size_t lk_hog_scratch_doubles(int w, int h, const lk_hog_params *p)
{
    if (lk_hog_size(w, h, p) == 0)
        return 0;
    const size_t cells = (size_t)(w / p->cell) * (size_t)(h / p->cell) * (size_t)p->orientations;
    return cells + (p->transform_sqrt ? (size_t)w * h : 0);
}

lk_code lk_hog(const double *img, int w, int h, const lk_hog_params *p, double *out,
               lk_error *err)
{
    const size_t ns = lk_hog_scratch_doubles(w, h, p);
    double *scratch = malloc((ns ? ns : 1) * sizeof *scratch);
    if (!scratch)
        return lk_error_set(err, LK_ERR_NOMEM, "lk_hog: out of memory for a %dx%d image", w, h);
    const lk_code rc = lk_hog_with_scratch(img, w, h, p, scratch, out, err);
    free(scratch);
    return rc;
}

lk_code lk_hog_with_scratch(const double *img, int w, int h, const lk_hog_params *p,
                            double *scratch, double *out, lk_error *err)
{
    if (!img || !out || !scratch)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "lk_hog: image, scratch and output are required");
    if (!hog_params_ok(p))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "lk_hog: invalid parameters (need orientations 1..%d, cell >= 1, "
                            "block >= 1, a known norm)",
                            HOG_MAX_ORIENTATIONS);
    if (lk_hog_size(w, h, p) == 0)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "lk_hog: a %dx%d image holds no %dx%d block of %d-pixel cells", w, h,
                            p->block, p->block, p->cell);

    const int nor = p->orientations, cs = p->cell, bs = p->block;
    const int ncx = w / cs, ncy = h / cs;
    const int nbx = ncx - bs + 1, nby = ncy - bs + 1;
    const double step = 180.0 / nor;
    /* skimage's cell_hog sums in a C float ("cdef float total") and divides
     * by the cell's pixel count in float; kept so values match bit for bit. */
    float acc[HOG_MAX_ORIENTATIONS];
    double *hist = scratch;
    double *sq = p->transform_sqrt ? scratch + (size_t)ncx * ncy * nor : NULL;
    /* skimage applies np.sqrt to the whole image before the gradient. */
    if (sq)
        for (size_t i = 0; i < (size_t)w * h; i++)
            sq[i] = sqrt(img[i]);
    const double *im = sq ? sq : img;

    /* Only the pixels of whole cells count: skimage's cells cover
     * [0, ncx*cell) x [0, ncy*cell), the remainder at the right and bottom is
     * ignored, but gradients there still use the neighbours. */
    for (int cy = 0; cy < ncy; cy++) {
        for (int cx = 0; cx < ncx; cx++) {
            for (int o = 0; o < nor; o++)
                acc[o] = 0.0f;
            for (int y = cy * cs; y < (cy + 1) * cs; y++) {
                for (int x = cx * cs; x < (cx + 1) * cs; x++) {
                    const double *row = im + (size_t)y * w;
                    const double l = x > 0 ? row[x - 1] : 0.0;
                    const double r = x < w - 1 ? row[x + 1] : 0.0;
                    const double u = y > 0 ? row[x - w] : 0.0;
                    const double d = y < h - 1 ? row[x + w] : 0.0;
                    /* _hog_channel_gradient: central difference, 0 on the
                     * first and last row (column). */
                    const double gx = (x > 0 && x < w - 1) ? r - l : 0.0;
                    const double gy = (y > 0 && y < h - 1) ? d - u : 0.0;
                    if (gx == 0.0 && gy == 0.0)
                        continue; /* votes +0 into bin 0: no change */
                    const double mag = hypot(gx, gy);
                    /* np.rad2deg(x) is x * (180/pi) in npymath. */
                    const double a = np_remainder(atan2(gy, gx) * (180.0 / LK_PI), 180.0);
                    const int b = orientation_bin(a, nor, step);
                    if (b >= 0)
                        acc[b] += mag;
                }
            }
            double *hc = hist + ((size_t)cy * ncx + cx) * nor;
            for (int o = 0; o < nor; o++)
                hc[o] = (double)(acc[o] / (float)(cs * cs));
        }
    }

    const size_t bn = (size_t)bs * bs * nor;
    for (int by = 0; by < nby; by++) {
        for (int bx = 0; bx < nbx; bx++) {
            double *v = out + ((size_t)by * nbx + bx) * bn;
            for (int i = 0; i < bs; i++)
                for (int j = 0; j < bs; j++)
                    for (int o = 0; o < nor; o++)
                        v[((size_t)i * bs + j) * nor + o] =
                            hist[((size_t)(by + i) * ncx + bx + j) * nor + o];
            normalize_block(v, bn, p->norm);
        }
    }
    return LK_OK;
}
