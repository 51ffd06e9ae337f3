/* Tan & Triggs photometric normalisation: properties that follow from the
 * chain's definition in X. Tan, B. Triggs, IEEE TIP 19(6), 2010 (gamma, DoG,
 * two-stage contrast equalisation, tau*tanh(x/tau)):
 *  1. every output lies in [-tau, tau] (tanh is bounded by 1);
 *  2. the output is tau*tanh(D/k) for the DoG image D of I^gamma and one
 *     global k, with k as the paper's two equalisation formulas give it;
 *  3. it is invariant to a global brightness scale a*I: gamma turns it into
 *     a^gamma, the DoG is linear, and equalisation divides any scale out;
 *  4. a flat image has no texture and maps to 0.
 * The DoG uses lk_gaussian_blur, which tests/ref/check_features_filter.py
 * compares with scipy.ndimage.gaussian_filter. Input: an LFW image (gray,
 * central 96x112), else the astronaut reference image. */
#include "likeness/features.h"
#include "likeness/image.h"
#include "lk_test.h"

#include <math.h>
#include <string.h>

#define CW 96
#define CH 112

static int load_crop(double *out)
{
    char path[1024];
    const char *candidates[] = {"datasets/lfw/lfw-deepfunneled/Aaron_Eckhart/Aaron_Eckhart_0001.jpg",
                                "reference/hog/astronaut.png"};
    for (size_t c = 0; c < sizeof candidates / sizeof *candidates; c++) {
        snprintf(path, sizeof path, "%s/%s", lk_test_shared(), candidates[c]);
        lk_image *img = NULL;
        if (lk_image_load(path, NULL, &img, NULL) != LK_OK)
            continue;
        if (img->width < CW || img->height < CH) {
            lk_image_free(img);
            continue;
        }
        double *g = malloc((size_t)img->width * img->height * sizeof *g);
        lk_image_gray_f64(img, LK_LUMA_BT709, g);
        const int x0 = (img->width - CW) / 2, y0 = (img->height - CH) / 2;
        for (int y = 0; y < CH; y++)
            memcpy(out + (size_t)y * CW, g + (size_t)(y + y0) * img->width + x0,
                   CW * sizeof *out);
        free(g);
        lk_image_free(img);
        printf("input: %s\n", path);
        return 1;
    }
    return 0;
}

int main(void)
{
    const size_t n = (size_t)CW * CH;
    double *img = malloc(n * sizeof *img), *out = malloc(n * sizeof *out);
    double *scaled = malloc(n * sizeof *scaled), *out2 = malloc(n * sizeof *out2);
    double *gam = malloc(n * sizeof *gam), *b0 = malloc(n * sizeof *b0), *b1 = malloc(n * sizeof *b1);
    if (!load_crop(img))
        LK_SKIP("no input image under %s (LFW or reference/hog/astronaut.png)", lk_test_shared());
    const lk_tan_triggs_params p = lk_tan_triggs_default();
    /* The paper's stated defaults. */
    CHECK(p.gamma == 0.2 && p.sigma0 == 1.0 && p.sigma1 == 2.0 && p.alpha == 0.1 && p.tau == 10.0,
          "defaults differ from Tan & Triggs 2010");
    lk_error err;
    CHECK(lk_tan_triggs(img, CW, CH, &p, out, &err) == LK_OK, "%s", err.message);

    /* 1. bounded by tau, and not degenerate. */
    double lo = 0, hi = 0;
    for (size_t i = 0; i < n; i++) {
        lo = fmin(lo, out[i]);
        hi = fmax(hi, out[i]);
    }
    printf("output range [%g, %g]\n", lo, hi);
    CHECK(lo >= -p.tau && hi <= p.tau, "range [%g,%g] exceeds tau %g", lo, hi, p.tau);
    CHECK(lo < -0.5 && hi > 0.5, "output nearly flat: [%g,%g]", lo, hi);

    /* 2. out = tau*tanh(D/k), D = G_sigma0*I^g - G_sigma1*I^g, with
     * k = k1*k2, k1 = mean(|D|^a)^(1/a), k2 = mean(min(tau,|D/k1|)^a)^(1/a)
     * (paper eq. for the two equalisation stages). */
    for (size_t i = 0; i < n; i++)
        gam[i] = pow(img[i], p.gamma);
    CHECK(lk_gaussian_blur(gam, CW, CH, p.sigma0, b0, &err) == LK_OK, "%s", err.message);
    CHECK(lk_gaussian_blur(gam, CW, CH, p.sigma1, b1, &err) == LK_OK, "%s", err.message);
    double s1 = 0, s2 = 0;
    for (size_t i = 0; i < n; i++)
        s1 += pow(fabs(b0[i] - b1[i]), p.alpha);
    const double k1 = pow(s1 / n, 1 / p.alpha);
    for (size_t i = 0; i < n; i++)
        s2 += pow(fmin(p.tau, fabs((b0[i] - b1[i]) / k1)), p.alpha);
    const double k = k1 * pow(s2 / n, 1 / p.alpha);
    double worst = 0;
    for (size_t i = 0; i < n; i++)
        worst = fmax(worst, fabs(out[i] - p.tau * tanh((b0[i] - b1[i]) / k / p.tau)));
    printf("max |out - tau*tanh(DoG/k/tau)| = %.3g\n", worst);
    CHECK(worst < 1e-9, "output departs from the paper's formula by %g", worst);

    /* 3. brightness scale invariance. */
    const double scales[] = {0.25, 0.6, 3.0};
    for (size_t s = 0; s < 3; s++) {
        for (size_t i = 0; i < n; i++)
            scaled[i] = scales[s] * img[i];
        CHECK(lk_tan_triggs(scaled, CW, CH, &p, out2, &err) == LK_OK, "%s", err.message);
        double d = 0;
        for (size_t i = 0; i < n; i++)
            d = fmax(d, fabs(out2[i] - out[i]));
        CHECK(d < 1e-9, "scale %g changes the output by %g", scales[s], d);
    }

    /* 4. flat image. */
    for (size_t i = 0; i < n; i++)
        scaled[i] = 0.37;
    CHECK(lk_tan_triggs(scaled, CW, CH, &p, out2, &err) == LK_OK, "%s", err.message);
    double m = 0;
    for (size_t i = 0; i < n; i++)
        m = fmax(m, fabs(out2[i]));
    CHECK(m == 0.0, "flat image gives |out| up to %g", m);

    /* Contract: negative input and bad parameters are refused. */
    scaled[5] = -1.0;
    CHECK(lk_tan_triggs(scaled, CW, CH, &p, out2, &err) == LK_ERR_INVALID_ARGUMENT,
          "negative pixel accepted");
    lk_tan_triggs_params bad = p;
    bad.sigma1 = 0.5;
    CHECK(lk_tan_triggs(img, CW, CH, &bad, out2, &err) == LK_ERR_INVALID_ARGUMENT,
          "sigma1 < sigma0 accepted");

    free(img);
    free(out);
    free(scaled);
    free(out2);
    free(gam);
    free(b0);
    free(b1);
    return lk_test_done();
}
