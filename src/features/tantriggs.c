/* Photometric normalisation of X. Tan, B. Triggs, "Enhanced Local Texture
 * Feature Sets for Face Recognition Under Difficult Lighting Conditions",
 * IEEE Trans. Image Processing 19(6):1635-1650, 2010, the preprocessing chain
 * of its illumination normalisation section (section numbers below are
 * recalled from memory): gamma correction, difference-of-Gaussian filtering,
 * two-stage robust contrast equalisation (their eq. 1-2) and a final
 * tau*tanh(I/tau) compression (eq. 3). The optional masking step is not used:
 * our crops are already tight around the face.
 *
 * The Gaussian is scipy.ndimage.gaussian_filter's (scipy 1.10,
 * scipy/ndimage/_filters.py and ni_filters.c): kernel exp(-x^2/(2 sigma^2))
 * on [-r, r], r = int(4*sigma + 0.5), divided by its sum, border mode
 * 'reflect' (d c b a | a b c d | d c b a), rows pass (axis 0) first. */
#include "likeness/features.h"

#include <math.h>
#include <stdlib.h>
#include <string.h>

/* Tan & Triggs 2010, the default parameter settings stated with the
 * chain: gamma 0.2, sigma0 1, sigma1 2, alpha 0.1, tau 10. */
lk_tan_triggs_params lk_tan_triggs_default(void)
{
    const lk_tan_triggs_params p = {.gamma = 0.2, .sigma0 = 1.0, .sigma1 = 2.0, .alpha = 0.1,
                                    .tau = 10.0};
    return p;
}

/* scipy.ndimage: truncate=4.0 standard deviations by default. */
#define BLUR_TRUNCATE 4.0
#define BLUR_MAX_RADIUS 256
/* Largest |DoG| treated as a flat image: far above double rounding noise on
 * gamma-corrected values in [0,1], far below one 8-bit gray level (common
 * practice threshold). */
#define FLAT_DOG 1e-9

/* scipy's 'reflect' extension for any offset, including kernels longer than
 * the line (period 2n). */
static long reflect_index(long i, long n)
{
    if (i >= 0 && i < n)
        return i;
    const long period = 2 * n;
    i %= period;
    if (i < 0)
        i += period;
    return i < n ? i : period - 1 - i;
}

/* One 1-D symmetric correlation along a line read with stride `stride`,
 * summed as ni_filters.c does for symmetric weights: centre first, then the
 * pairs from the outermost inwards. */
static void blur_line(const double *in, size_t stride, long n, const double *wt, int radius,
                      double *ext, double *out, size_t ostride)
{
    for (long i = -radius; i < n + radius; i++)
        ext[i + radius] = in[(size_t)reflect_index(i, n) * stride];
    const double *line = ext + radius;
    for (long i = 0; i < n; i++) {
        double acc = line[i] * wt[0];
        for (int j = radius; j >= 1; j--)
            acc += (line[i - j] + line[i + j]) * wt[j];
        out[(size_t)i * ostride] = acc;
    }
}

/* tmp holds w*h doubles, ext max(w,h) + 2*BLUR_MAX_RADIUS doubles. */
static void blur_with(const double *img, int w, int h, double sigma, double *out, double *tmp,
                      double *ext)
{
    const int radius = (int)(BLUR_TRUNCATE * sigma + 0.5);
    double wt[BLUR_MAX_RADIUS + 1];
    double sum = 0.0;
    for (int j = -radius; j <= radius; j++)
        sum += exp(-0.5 / (sigma * sigma) * (double)j * (double)j);
    for (int j = 0; j <= radius; j++)
        wt[j] = exp(-0.5 / (sigma * sigma) * (double)j * (double)j) / sum;
    for (int x = 0; x < w; x++)
        blur_line(img + x, (size_t)w, h, wt, radius, ext, tmp + x, (size_t)w);
    for (int y = 0; y < h; y++)
        blur_line(tmp + (size_t)y * w, 1, w, wt, radius, ext, out + (size_t)y * w, 1);
}

static int sigma_ok(double sigma)
{
    return sigma > 0.0 && (int)(BLUR_TRUNCATE * sigma + 0.5) <= BLUR_MAX_RADIUS;
}

lk_code lk_gaussian_blur(const double *img, int w, int h, double sigma, double *out,
                         lk_error *err)
{
    if (!img || !out || w <= 0 || h <= 0)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "lk_gaussian_blur: need an image of positive size and an output");
    if (!sigma_ok(sigma))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "lk_gaussian_blur: sigma %g outside (0, %g]", sigma,
                            (BLUR_MAX_RADIUS - 0.5) / BLUR_TRUNCATE);
    const size_t n = (size_t)w * h;
    double *tmp = malloc((n + (size_t)(w > h ? w : h) + 2 * BLUR_MAX_RADIUS) * sizeof *tmp);
    if (!tmp)
        return lk_error_set(err, LK_ERR_NOMEM, "lk_gaussian_blur: out of memory");
    blur_with(img, w, h, sigma, out, tmp, tmp + n);
    free(tmp);
    return LK_OK;
}

size_t lk_tan_triggs_scratch_doubles(int w, int h)
{
    if (w <= 0 || h <= 0)
        return 0;
    return 3 * (size_t)w * h + (size_t)(w > h ? w : h) + 2 * BLUR_MAX_RADIUS;
}

lk_code lk_tan_triggs(const double *img, int w, int h, const lk_tan_triggs_params *p,
                      double *out, lk_error *err)
{
    const size_t ns = lk_tan_triggs_scratch_doubles(w, h);
    double *scratch = malloc((ns ? ns : 1) * sizeof *scratch);
    if (!scratch)
        return lk_error_set(err, LK_ERR_NOMEM, "lk_tan_triggs: out of memory for a %dx%d image",
                            w, h);
    const lk_code rc = lk_tan_triggs_with_scratch(img, w, h, p, scratch, out, err);
    free(scratch);
    return rc;
}

lk_code lk_tan_triggs_with_scratch(const double *img, int w, int h,
                                   const lk_tan_triggs_params *p, double *scratch, double *out,
                                   lk_error *err)
{
    if (!img || !out || !p || !scratch || w <= 0 || h <= 0)
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "lk_tan_triggs: need an image of positive size, parameters, scratch "
                            "and an output");
    if (!(p->gamma > 0) || !sigma_ok(p->sigma0) || !sigma_ok(p->sigma1) ||
        !(p->sigma1 > p->sigma0) || !(p->alpha > 0) || !(p->tau > 0))
        return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                            "lk_tan_triggs: need gamma > 0, 0 < sigma0 < sigma1, alpha > 0, "
                            "tau > 0 (lk_tan_triggs_default() gives the paper's values)");
    const size_t n = (size_t)w * h;
    double *g = scratch, *b1 = scratch + n, *tmp = scratch + 2 * n, *ext = scratch + 3 * n;

    /* Gamma correction I^gamma (section III-A). */
    for (size_t i = 0; i < n; i++) {
        const double v = img[i];
        if (!(v >= 0.0)) {
            return lk_error_set(err, LK_ERR_INVALID_ARGUMENT,
                                "lk_tan_triggs: pixel %zu is negative or not a number; pass "
                                "gray levels such as [0,1]",
                                i);
        }
        g[i] = pow(v, p->gamma);
    }
    /* Difference of Gaussians, inner minus outer (section III-B). */
    blur_with(g, w, h, p->sigma0, out, tmp, ext);
    blur_with(g, w, h, p->sigma1, b1, tmp, ext);
    for (size_t i = 0; i < n; i++)
        out[i] -= b1[i];

    /* Contrast equalisation (section III-D, eq. 1 and 2):
     *   I <- I / mean(|I|^alpha)^(1/alpha)
     *   I <- I / mean(min(tau, |I|)^alpha)^(1/alpha)
     * A flat image has a DoG of zero up to rounding (~1e-16); dividing
     * that by its own scale would blow rounding noise up to full contrast,
     * so a DoG below FLAT_DOG everywhere is returned as zero. */
    double peak = 0.0;
    for (size_t i = 0; i < n; i++)
        peak = fmax(peak, fabs(out[i]));
    if (peak < FLAT_DOG) {
        memset(out, 0, n * sizeof *out);
        return LK_OK;
    }
    /* Stage 2 reuses stage 1's powers: min(tau, |I|/k1)^alpha equals
     * |I|^alpha / k1^alpha below the threshold, which saves one pow per
     * pixel; the results agree to rounding. */
    double *pw = g, s1 = 0.0;
    for (size_t i = 0; i < n; i++) {
        pw[i] = pow(fabs(out[i]), p->alpha);
        s1 += pw[i];
    }
    const double k1 = pow(s1 / (double)n, 1.0 / p->alpha);
    const double k1a = s1 / (double)n; /* k1^alpha */
    const double cut = p->tau * k1, tau_a = pow(p->tau, p->alpha);
    double s2 = 0.0;
    for (size_t i = 0; i < n; i++)
        s2 += fabs(out[i]) < cut ? pw[i] / k1a : tau_a;
    const double k = k1 * pow(s2 / (double)n, 1.0 / p->alpha);
    if (!(k > 0.0) || !isfinite(k))
        return lk_error_set(err, LK_ERR_INTERNAL,
                            "lk_tan_triggs: contrast scale %g is not a positive number", k);
    /* Compression I <- tau * tanh(I / tau) (section III-D, eq. 3). */
    for (size_t i = 0; i < n; i++)
        out[i] = p->tau * tanh(out[i] / k / p->tau);
    return LK_OK;
}
