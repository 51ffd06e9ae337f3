/* PNG writing, for overlays a person looks at. */
#include "likeness/image.h"

#include <errno.h>
#include <png.h>
#include <stdio.h>
#include <string.h>

lk_code lk_image_save_png(const lk_image *img, const char *path, lk_error *err)
{
    FILE *f = fopen(path, "wb");
    if (!f)
        return lk_error_set(err, LK_ERR_IO, "cannot write %s: %s", path, strerror(errno));
    png_structp png = png_create_write_struct(PNG_LIBPNG_VER_STRING, NULL, NULL, NULL);
    png_infop info = png ? png_create_info_struct(png) : NULL;
    if (!png || !info) {
        png_destroy_write_struct(&png, &info);
        fclose(f);
        return lk_error_set(err, LK_ERR_NOMEM, "cannot start the PNG encoder");
    }
    if (setjmp(png_jmpbuf(png))) {
        png_destroy_write_struct(&png, &info);
        fclose(f);
        return lk_error_set(err, LK_ERR_IO, "cannot write %s", path);
    }
    png_init_io(png, f);
    png_set_IHDR(png, info, (png_uint_32)img->width, (png_uint_32)img->height, 8,
                 img->channels == 1 ? PNG_COLOR_TYPE_GRAY : PNG_COLOR_TYPE_RGB,
                 PNG_INTERLACE_NONE, PNG_COMPRESSION_TYPE_DEFAULT, PNG_FILTER_TYPE_DEFAULT);
    png_write_info(png, info);
    for (int y = 0; y < img->height; y++)
        png_write_row(png, img->data + (size_t)y * img->width * img->channels);
    png_write_end(png, NULL);
    png_destroy_write_struct(&png, &info);
    if (fclose(f) != 0)
        return lk_error_set(err, LK_ERR_IO, "cannot write %s: %s", path, strerror(errno));
    return LK_OK;
}
