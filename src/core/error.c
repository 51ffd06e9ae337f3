#include "likeness/error.h"

#include <stdarg.h>
#include <stdio.h>

lk_code lk_error_set(lk_error *err, lk_code code, const char *fmt, ...)
{
    if (err) {
        err->code = code;
        va_list ap;
        va_start(ap, fmt);
        vsnprintf(err->message, sizeof err->message, fmt, ap);
        va_end(ap);
    }
    return code;
}

void lk_error_clear(lk_error *err)
{
    if (err) {
        err->code = LK_OK;
        err->message[0] = '\0';
    }
}

const char *lk_code_name(lk_code code)
{
    /* Names are part of the public interface (JSON output, API problem types). */
    static const char *const names[LK_CODE_COUNT] = {
        [LK_OK] = "ok",
        [LK_ERR_NOMEM] = "out_of_memory",
        [LK_ERR_INVALID_ARGUMENT] = "invalid_argument",
        [LK_ERR_IO] = "io_error",
        [LK_ERR_IMAGE_UNSUPPORTED] = "image_unsupported",
        [LK_ERR_IMAGE_CORRUPT] = "image_corrupt",
        [LK_ERR_IMAGE_TOO_LARGE] = "image_too_large",
        [LK_ERR_CASCADE] = "cascade_error",
        [LK_ERR_NO_FACE] = "no_face",
        [LK_ERR_MODEL_FORMAT] = "model_format",
        [LK_ERR_MODEL_MISMATCH] = "model_mismatch",
        [LK_ERR_DATA] = "data_error",
        [LK_ERR_INTERNAL] = "internal_error",
        [LK_ERR_NOT_FOUND] = "not_found",
        [LK_ERR_TEMPLATE_INVALID] = "template_invalid",
        [LK_ERR_TEMPLATE_MISMATCH] = "template_mismatch",
        [LK_ERR_KEY] = "key_error",
        [LK_ERR_STORE] = "store_error",
        [LK_ERR_AUDIT] = "audit_error",
        [LK_ERR_CONFIG] = "config_error",
        [LK_ERR_BUSY] = "busy",
    };
    if ((int)code < 0 || code >= LK_CODE_COUNT || !names[code])
        return "unknown";
    return names[code];
}
