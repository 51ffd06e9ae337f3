/* JSON output shared by the CLI commands. The encodings of analysis results
 * (lk_server_quality_json, lk_server_timings_json) and decision ids
 * (lk_uuid_v4) come from the server module, so the CLI prints exactly the
 * fields the service returns. */
#ifndef LIKENESS_CLI_JSON_OUT_H
#define LIKENESS_CLI_JSON_OUT_H

#include <cjson/cJSON.h>

#include "likeness/server.h"

/* Prints a cJSON tree to stdout, indented, and frees it. */
void json_print(cJSON *j);

#endif
