#include "json_out.h"

#include <sodium.h>
#include <stdio.h>
#include <stdlib.h>

static cJSON *point(lk_point p)
{
    cJSON *o = cJSON_CreateObject();
    cJSON_AddNumberToObject(o, "x", p.x);
    cJSON_AddNumberToObject(o, "y", p.y);
    return o;
}

cJSON *json_quality(const lk_analysis *a)
{
    const lk_quality *q = &a->quality;
    cJSON *o = cJSON_CreateObject();
    cJSON_AddBoolToObject(o, "usable", q->usable);
    cJSON *reasons = cJSON_AddArrayToObject(o, "reasons");
    cJSON *notes = cJSON_AddArrayToObject(o, "notes");
    for (int i = 0; i < LK_QR_COUNT; i++) {
        uint32_t bit = 1u << i;
        if (!(q->reasons & bit))
            continue;
        cJSON_AddItemToArray((bit & LK_QR_BLOCKING) ? reasons : notes,
                             cJSON_CreateString(lk_quality_reason_name(bit)));
    }
    if (a->center_fallback)
        cJSON_AddItemToArray(notes, cJSON_CreateString("center_fallback"));
    cJSON_AddNumberToObject(o, "face_count", q->face_count);
    if (a->find.face_count > 0 || a->center_fallback) {
        cJSON *box = cJSON_AddObjectToObject(o, "face");
        const lk_rect *r = &a->find.primary;
        cJSON_AddNumberToObject(box, "x", r->x);
        cJSON_AddNumberToObject(box, "y", r->y);
        cJSON_AddNumberToObject(box, "width", r->width);
        cJSON_AddNumberToObject(box, "height", r->height);
        if (a->find.search_angle_deg != 0)
            cJSON_AddNumberToObject(box, "search_angle_deg", a->find.search_angle_deg);
        cJSON *eyes = cJSON_AddObjectToObject(o, "eyes");
        cJSON_AddItemToObject(eyes, "left", point(a->find.eyes.left));
        cJSON_AddItemToObject(eyes, "right", point(a->find.eyes.right));
        cJSON_AddBoolToObject(eyes, "estimated", a->find.eyes.eyes_estimated);
        cJSON_AddNumberToObject(o, "face_size", q->face_size);
        cJSON_AddNumberToObject(o, "eye_distance", q->eye_distance);
        cJSON_AddNumberToObject(o, "roll_deg", q->roll_deg);
        cJSON_AddNumberToObject(o, "sharpness", q->sharpness);
        cJSON_AddNumberToObject(o, "mean_gray", q->mean_gray);
        cJSON_AddNumberToObject(o, "clipped_fraction", q->clipped);
    }
    cJSON_AddNumberToObject(o, "image_width", a->width);
    cJSON_AddNumberToObject(o, "image_height", a->height);
    return o;
}

cJSON *json_timings(const lk_analysis *a)
{
    static const char *const names[LK_STAGE_COUNT] = {"decode_ms", "detect_ms", "align_ms",
                                                      "features_ms"};
    cJSON *o = cJSON_CreateObject();
    for (int i = 0; i < LK_STAGE_COUNT; i++)
        cJSON_AddNumberToObject(o, names[i], a->stage_ms[i]);
    return o;
}

void json_print(cJSON *j)
{
    char *s = cJSON_Print(j);
    if (s) {
        puts(s);
        free(s);
    }
    cJSON_Delete(j);
}

void uuid_v4(char out[37])
{
    unsigned char b[16];
    if (sodium_init() < 0)
        abort(); /* libsodium cannot start only if the system RNG is missing */
    randombytes_buf(b, sizeof b);
    b[6] = (unsigned char)((b[6] & 0x0F) | 0x40); /* version 4 (RFC 9562 section 5.4) */
    b[8] = (unsigned char)((b[8] & 0x3F) | 0x80); /* variant 10xx */
    snprintf(out, 37, "%02x%02x%02x%02x-%02x%02x-%02x%02x-%02x%02x-%02x%02x%02x%02x%02x%02x",
             b[0], b[1], b[2], b[3], b[4], b[5], b[6], b[7], b[8], b[9], b[10], b[11], b[12],
             b[13], b[14], b[15]);
}
