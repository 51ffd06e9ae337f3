/* Local binary patterns: T. Ojala, M. Pietikainen, T. Maenpaa,
 * "Multiresolution Gray-Scale and Rotation Invariant Texture Classification
 * with Local Binary Patterns", IEEE TPAMI 24(7):971-987, 2002 — P points on
 * a circle of radius R, bilinearly interpolated (section 2, eq. 2-3), and
 * the "uniform" patterns with at most two 0/1 transitions (section 2.3) kept
 * apart by rotation (non-rotation-invariant, P*(P-1)+2 uniform labels plus
 * one for all others; 59 for P=8).
 *
 * The sampling, interpolation and label numbering follow scikit-image 0.19
 * (skimage/feature/_texture.pyx, _local_binary_pattern with method 'N', and
 * skimage/_shared/interpolation.pxd, bilinear_interpolation with mode 'C',
 * cval 0) operation for operation, so that codes can be checked against
 * skimage.feature.local_binary_pattern(image, P, R, 'nri_uniform').
 *
 * Region histograms: T. Ahonen, A. Hadid, M. Pietikainen, "Face Description
 * with Local Binary Patterns: Application to Face Recognition", IEEE TPAMI
 * 28(12):2037-2041, 2006 (section 3: the face is divided into regions, one
 * label histogram per region, concatenated). */
#include "likeness/features.h"

#include <math.h>
#include <stdlib.h>
#include <string.h>

/* numpy's NPY_PI, the double nearest pi. */
#define LK_PI 3.141592653589793238462643383279502884

#define LUT_MAX_POINTS 12

int lk_lbp_nri_uniform_labels(int points)
{
    return points * (points - 1) + 3;
}

/* Pixel with constant-0 border: get_pixel2d mode 'C', cval 0. */
static inline double px0(const double *img, int w, int h, long r, long c)
{
    return (r < 0 || r >= h || c < 0 || c >= w) ? 0.0 : img[(size_t)r * w + c];
}

/* skimage's bilinear_interpolation, in the same operation order. */
static inline double bilinear0(const double *img, int w, int h, double r, double c)
{
    const long minr = (long)floor(r), minc = (long)floor(c);
    const long maxr = (long)ceil(r), maxc = (long)ceil(c);
    const double dr = r - minr, dc = c - minc;
    const double tl = px0(img, w, h, minr, minc), tr = px0(img, w, h, minr, maxc);
    const double bl = px0(img, w, h, maxr, minc), br = px0(img, w, h, maxr, maxc);
    const double top = (1 - dc) * tl + dc * tr;
    const double bottom = (1 - dc) * bl + dc * br;
    return (1 - dr) * top + dr * bottom;
}

/* skimage's 'nri_uniform' label of a P-bit pattern (bit i = neighbour i
 * at or above the centre). */
static uint8_t nri_label(unsigned pattern, int P)
{
    int bits[LK_LBP_MAX_POINTS];
    for (int i = 0; i < P; i++)
        bits[i] = (pattern >> i) & 1u;
    /* Transitions counted along the open chain 0..P-1, as skimage
     * does. The paper's circular count U is even and at most one
     * more than the chain count, so chain <= 2 exactly when U <= 2:
     * the uniform set is the paper's. */
    int changes = 0;
    for (int i = 0; i < P - 1; i++)
        changes += bits[i] != bits[i + 1];
    int lbp;
    if (changes <= 2) {
        int n_ones = 0, first_one = -1, first_zero = -1;
        for (int i = 0; i < P; i++) {
            if (bits[i]) {
                n_ones++;
                if (first_one == -1)
                    first_one = i;
            } else if (first_zero == -1) {
                first_zero = i;
            }
        }
        if (n_ones == 0) {
            lbp = 0;
        } else if (n_ones == P) {
            lbp = P * (P - 1) + 1;
        } else {
            /* Rotation index: circular right shifts from the pattern
             * with the ones at the low end (skimage's numbering). */
            const int rot = first_one == 0 ? n_ones - first_zero : P - first_one;
            lbp = 1 + (n_ones - 1) * P + rot;
        }
    } else {
        lbp = P * (P - 1) + 2;
    }
    return (uint8_t)lbp;
}

lk_code lk_lbp_nri_uniform(const double *img, int w, int h, int points, double radius,
                           uint8_t *codes, lk_error *err)
{
    if (!img || !codes || w <= 0 || h <= 0 || w > (1 << 20) || h > (1 << 20))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "lk_lbp_nri_uniform: need an image of 1..2^20 pixels a side and an "
                            "output");
    if (points < 2 || points > LK_LBP_MAX_POINTS || !(radius > 0.0) || !isfinite(radius))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "lk_lbp_nri_uniform: need 2 <= points <= %d and a positive radius "
                            "(got P=%d, R=%g)",
                            LK_LBP_MAX_POINTS, points, radius);

    /* skimage declares R as a C float, so the radius is rounded to single
     * precision before use; sampling offsets are rounded to 5 decimals
     * (np.round(rr, 5), which numpy computes as rint(x*1e5)/1e5). */
    const double R = (double)(float)radius;
    double rp[LK_LBP_MAX_POINTS], cp[LK_LBP_MAX_POINTS];
    for (int i = 0; i < points; i++) {
        const double ang = 2 * LK_PI * (double)i / points;
        rp[i] = rint(-R * sin(ang) * 1e5) / 1e5;
        cp[i] = rint(R * cos(ang) * 1e5) / 1e5;
    }
    const int P = points;
    /* Label per pattern, up to 2^LUT_MAX_POINTS entries on the stack. */
    uint8_t lut[1u << LUT_MAX_POINTS];
    if (P <= LUT_MAX_POINTS)
        for (unsigned pat = 0; pat < (1u << P); pat++)
            lut[pat] = nri_label(pat, P);
    /* Integer parts of the offsets: floor(r + rp) = r + floor(rp) because
     * a 5-decimal fraction cannot round away at image coordinates
     * (|r| < 2^20 leaves ulps below 1e-9), so only dr, dc, which carry the
     * rounding of r + rp that skimage's values carry, are formed per pixel. */
    long fr[LK_LBP_MAX_POINTS], cr[LK_LBP_MAX_POINTS], fc[LK_LBP_MAX_POINTS],
        cc[LK_LBP_MAX_POINTS];
    long margin = 0;
    for (int i = 0; i < P; i++) {
        fr[i] = (long)floor(rp[i]);
        cr[i] = (long)ceil(rp[i]);
        fc[i] = (long)floor(cp[i]);
        cc[i] = (long)ceil(cp[i]);
        const long m = labs(fr[i]) > labs(cr[i]) ? labs(fr[i]) : labs(cr[i]);
        const long mc = labs(fc[i]) > labs(cc[i]) ? labs(fc[i]) : labs(cc[i]);
        margin = m > margin ? m : margin;
        margin = mc > margin ? mc : margin;
    }
    for (int r = 0; r < h; r++) {
        const int row_inside = r >= margin && r < h - margin;
        for (int c = 0; c < w; c++) {
            const double centre = img[(size_t)r * w + c];
            int bits[LK_LBP_MAX_POINTS];
            if (row_inside && c >= margin && c < w - margin) {
                for (int i = 0; i < P; i++) {
                    /* bilinear0 with every corner inside the image. */
                    const long minr = r + fr[i], minc = c + fc[i];
                    const double dr = (r + rp[i]) - minr, dc = (c + cp[i]) - minc;
                    const double *t = img + (size_t)minr * w, *b = img + (size_t)(r + cr[i]) * w;
                    const double top = (1 - dc) * t[minc] + dc * t[c + cc[i]];
                    const double bottom = (1 - dc) * b[minc] + dc * b[c + cc[i]];
                    bits[i] = ((1 - dr) * top + dr * bottom) - centre >= 0;
                }
            } else {
                for (int i = 0; i < P; i++)
                    bits[i] = bilinear0(img, w, h, r + rp[i], c + cp[i]) - centre >= 0;
            }
            unsigned pattern = 0;
            for (int i = 0; i < P; i++)
                pattern |= (unsigned)bits[i] << i;
            codes[(size_t)r * w + c] = P <= LUT_MAX_POINTS ? lut[pattern] : nri_label(pattern, P);
        }
    }
    return LK_OK;
}

lk_code lk_lbp_histograms(const uint8_t *codes, int w, int h, int n_labels, int grid_x,
                          int grid_y, double *out, lk_error *err)
{
    if (!codes || !out || w <= 0 || h <= 0 || n_labels <= 0 || n_labels > 256)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "lk_lbp_histograms: need codes, an output and 1..256 labels");
    if (grid_x < 1 || grid_y < 1 || grid_x > w || grid_y > h)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "lk_lbp_histograms: a %dx%d grid does not fit a %dx%d image", grid_x,
                            grid_y, w, h);
    for (int gy = 0; gy < grid_y; gy++) {
        const int y0 = (int)((long)gy * h / grid_y), y1 = (int)((long)(gy + 1) * h / grid_y);
        for (int gx = 0; gx < grid_x; gx++) {
            const int x0 = (int)((long)gx * w / grid_x), x1 = (int)((long)(gx + 1) * w / grid_x);
            double *hist = out + ((size_t)gy * grid_x + gx) * n_labels;
            memset(hist, 0, (size_t)n_labels * sizeof *hist);
            for (int y = y0; y < y1; y++) {
                const uint8_t *row = codes + (size_t)y * w;
                for (int x = x0; x < x1; x++) {
                    if (row[x] >= n_labels)
                        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                            "lk_lbp_histograms: code %d at (%d,%d) is not below "
                                            "the %d labels; were the codes made with another P?",
                                            row[x], x, y, n_labels);
                    hist[row[x]] += 1.0;
                }
            }
            /* Normalised to unit sum so regions of unequal size weigh alike
             * (Ahonen et al. 2006 compare histograms of equal-size regions). */
            const double npx = (double)(y1 - y0) * (double)(x1 - x0);
            for (int k = 0; k < n_labels; k++)
                hist[k] /= npx;
        }
    }
    return LK_OK;
}
