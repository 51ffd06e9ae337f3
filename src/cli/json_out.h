/* JSON encodings of analysis results, shared by the CLI commands (and the
 * same field names the service returns). */
#ifndef LIKENESS_CLI_JSON_OUT_H
#define LIKENESS_CLI_JSON_OUT_H

#include <cjson/cJSON.h>

#include "likeness/engine.h"

/* {"usable", "reasons":[...], "notes":[...], "face_count", "face":{box},
 *  "eyes":{...}, measures...} */
cJSON *json_quality(const lk_analysis *a);
cJSON *json_timings(const lk_analysis *a);
/* Prints a cJSON tree to stdout, indented, and frees it. */
void json_print(cJSON *j);
/* A random RFC 9562 (RFC 4122) version 4 UUID, from libsodium's CSPRNG. */
void uuid_v4(char out[37]);

#endif
