/* libFuzzer target: lk_image_decode (JPEG, PNG, EXIF orientation) of
 * arbitrary bytes with the default limits, as the service decodes uploaded
 * images, then lk_image_to_gray and lk_image_gray_f64 on what decodes.
 * Seeds: corpus/image (tests/fuzz/make_seeds.py); dictionaries jpeg.dict,
 * png.dict. */
#include <stdint.h>
#include <stdlib.h>

#include "fuzz_common.h"
#include "likeness/image.h"

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size);

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    lk_image *img = (lk_image *)&img; /* must be overwritten with NULL on error */
    lk_error err;
    lk_code rc = lk_image_decode(data, size, NULL, &img, &err);
    if (rc != LK_OK) {
        fuzz_check_error(rc, &err);
        FUZZ_CHECK(img == NULL, "*out not NULL after %s", lk_code_name(rc));
        return 0;
    }
    /* include/likeness/image.h: 8-bit RGB within the default limits. */
    FUZZ_CHECK(img && img->data, "LK_OK without an image");
    FUZZ_CHECK(img->channels == 3, "decoded image has %d channels", img->channels);
    FUZZ_CHECK(img->width > 0 && img->height > 0 && img->width <= LK_DEFAULT_MAX_SIDE &&
                   img->height <= LK_DEFAULT_MAX_SIDE &&
                   (uint64_t)img->width * (uint64_t)img->height <= LK_DEFAULT_MAX_PIXELS,
               "decoded %dx%d, outside the default limits", img->width, img->height);

    lk_image *gray = lk_image_to_gray(img, LK_LUMA_BT601, &err);
    FUZZ_CHECK(gray != NULL, "lk_image_to_gray failed: %s", err.message);
    FUZZ_CHECK(gray->channels == 1 && gray->width == img->width && gray->height == img->height,
               "gray copy is %dx%dx%d for %dx%d", gray->width, gray->height, gray->channels,
               img->width, img->height);
    /* Gray of gray must be the identity (the weights sum to 1). */
    lk_image *again = lk_image_to_gray(gray, LK_LUMA_BT709, &err);
    FUZZ_CHECK(again != NULL, "lk_image_to_gray of a gray image failed: %s", err.message);
    size_t npix = (size_t)img->width * (size_t)img->height;
    FUZZ_CHECK(memcmp(again->data, gray->data, npix) == 0, "gray of gray changed the pixels");
    /* Small images only: the double buffer is 8 bytes a pixel. */
    if (npix <= (1u << 20)) {
        double *f = malloc(npix * sizeof *f);
        FUZZ_CHECK(f != NULL, "out of memory");
        lk_image_gray_f64(img, LK_LUMA_BT709, f);
        for (size_t i = 0; i < npix; i++)
            FUZZ_CHECK(f[i] >= 0.0 && f[i] <= 1.0, "gray_f64 value %g outside [0, 1]", f[i]);
        free(f);
    }
    lk_image_free(again);
    lk_image_free(gray);
    lk_image_free(img);
    return 0;
}
