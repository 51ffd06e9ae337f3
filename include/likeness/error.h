/* likeness: the one error type every module reports with.
 *
 * Every fallible call returns an lk_code and, when the caller passes an
 * lk_error, fills it with the same code and a message written for a person
 * (what went wrong and, where possible, what to do about it). Codes are
 * stable: their names (lk_code_name) appear in JSON output and API problem
 * types, so never renumber or rename one; only append. */
#ifndef LIKENESS_ERROR_H
#define LIKENESS_ERROR_H

#include <stddef.h>

#ifdef __cplusplus
extern "C" {
#endif

typedef enum lk_code {
    LK_OK = 0,
    LK_ERR_NOMEM,             /* out of memory */
    LK_ERR_INVALID_ARGUMENT,  /* a caller passed something the API does not accept */
    LK_ERR_IO,                /* a file could not be read or written */
    LK_ERR_IMAGE_UNSUPPORTED, /* not a JPEG or PNG, or a variant we do not decode */
    LK_ERR_IMAGE_CORRUPT,     /* truncated or damaged image data */
    LK_ERR_IMAGE_TOO_LARGE,   /* over the pixel budget or side limit, refused before decoding */
    LK_ERR_CASCADE,           /* a detector cascade file is missing or malformed */
    LK_ERR_NO_FACE,           /* no face found */
    LK_ERR_MODEL_FORMAT,      /* a model file is truncated, corrupt or of an unknown version */
    LK_ERR_MODEL_MISMATCH,    /* features were made with another configuration than the model's */
    LK_ERR_DATA,              /* a data set or pairs file is malformed or incomplete */
    LK_ERR_INTERNAL,          /* a bug: an invariant did not hold */
    LK_ERR_NOT_FOUND,         /* a template, key or record does not exist */
    LK_ERR_TEMPLATE_INVALID,  /* a template record failed authentication or is malformed */
    LK_ERR_TEMPLATE_MISMATCH, /* a template was made with another model or feature configuration */
    LK_ERR_KEY,               /* a key file is missing, unsafe (mode), malformed, or lacks a key id */
    LK_ERR_STORE,             /* the database refused or failed an operation */
    LK_ERR_AUDIT,             /* the audit chain does not verify */
    LK_ERR_CONFIG,            /* a configuration file or override is invalid */
    LK_ERR_BUSY,              /* a resource is temporarily unavailable; retry later */
    LK_CODE_COUNT
} lk_code;

#define LK_ERROR_MESSAGE_MAX 512

typedef struct lk_error {
    lk_code code;
    char message[LK_ERROR_MESSAGE_MAX];
} lk_error;

/* Sets *err (if err is not NULL) and returns code, so callers can write
 * `return lk_error_set(err, LK_ERR_IO, "cannot open %s: %s", p, strerror(e));` */
lk_code lk_error_set(lk_error *err, lk_code code, const char *fmt, ...)
    __attribute__((format(printf, 3, 4)));

/* Resets *err to LK_OK with an empty message. */
void lk_error_clear(lk_error *err);

/* Stable snake_case name of a code, e.g. "image_corrupt". */
const char *lk_code_name(lk_code code);

#ifdef __cplusplus
}
#endif
#endif
