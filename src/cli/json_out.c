#include "json_out.h"

#include <stdio.h>
#include <stdlib.h>

void json_print(cJSON *j)
{
    char *s = cJSON_Print(j);
    if (s) {
        puts(s);
        free(s);
    }
    cJSON_Delete(j);
}
