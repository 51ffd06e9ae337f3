/* The error type: codes keep their stable names and messages are formatted
 * and bounded (a long message is cut, never overflows). */
#include "likeness/error.h"
#include "lk_test.h"
#include <string.h>

int main(void)
{
    lk_error e;
    lk_error_clear(&e);
    CHECK(e.code == LK_OK && e.message[0] == '\0', "clear");
    lk_code c = lk_error_set(&e, LK_ERR_IO, "cannot open %s", "x.jpg");
    CHECK(c == LK_ERR_IO && e.code == LK_ERR_IO, "code returned and stored");
    CHECK(strcmp(e.message, "cannot open x.jpg") == 0, "message: %s", e.message);
    char big[2000];
    memset(big, 'a', sizeof big - 1);
    big[sizeof big - 1] = '\0';
    lk_error_set(&e, LK_ERR_DATA, "%s", big);
    CHECK(strlen(e.message) == LK_ERROR_MESSAGE_MAX - 1, "bounded message");
    CHECK(lk_error_set(NULL, LK_ERR_NOMEM, "x") == LK_ERR_NOMEM, "NULL err allowed");
    for (int i = 0; i < LK_CODE_COUNT; i++)
        CHECK(strcmp(lk_code_name((lk_code)i), "unknown") != 0, "code %d has a name", i);
    CHECK(strcmp(lk_code_name(LK_ERR_IMAGE_CORRUPT), "image_corrupt") == 0, "stable name");
    CHECK(strcmp(lk_code_name((lk_code)999), "unknown") == 0, "out of range");
    return lk_test_done();
}
