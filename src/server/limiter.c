/* Token buckets keyed by caller (Turner 1986, "New directions in
 * communications"; the token-bucket shaper of RFC 2697 in spirit): each
 * caller may make `burst` requests at once and `rate` per second after. */
#include <pthread.h>
#include <stdlib.h>
#include <string.h>

#include "internal.h"

#define SLOTS 4096 /* callers tracked; authenticated callers only, so bounded by the keys issued */

typedef struct bucket {
    char caller[128];
    double tokens;
    double stamp;
} bucket;

struct srv_limiter {
    pthread_mutex_t mu;
    double rate, burst;
    bucket b[SLOTS];
};

srv_limiter *srv_limiter_new(double rate, double burst)
{
    srv_limiter *l = calloc(1, sizeof *l);
    if (!l)
        return NULL;
    pthread_mutex_init(&l->mu, NULL);
    l->rate = rate;
    l->burst = burst;
    return l;
}

void srv_limiter_free(srv_limiter *l)
{
    if (!l)
        return;
    pthread_mutex_destroy(&l->mu);
    free(l);
}

static uint64_t fnv1a(const char *s)
{
    /* FNV-1a 64-bit (Fowler, Noll, Vo; offset basis and prime as published). */
    uint64_t h = 14695981039346656037ull;
    for (; *s; s++)
        h = (h ^ (uint8_t)*s) * 1099511628211ull;
    return h;
}

bool srv_limiter_take(srv_limiter *l, const char *caller, double now, double *retry_after)
{
    char key[128];
    size_t n = strlen(caller);
    if (n >= sizeof key)
        n = sizeof key - 1;
    memcpy(key, caller, n);
    key[n] = '\0';
    pthread_mutex_lock(&l->mu);
    size_t i = fnv1a(key) % SLOTS, oldest = i;
    bucket *b = NULL;
    for (size_t probe = 0; probe < 16; probe++, i = (i + 1) % SLOTS) {
        if (!l->b[i].caller[0] || !strcmp(l->b[i].caller, key)) {
            b = &l->b[i];
            break;
        }
        if (l->b[i].stamp < l->b[oldest].stamp)
            oldest = i;
    }
    if (!b || !b->caller[0]) {
        /* New caller (or a full neighbourhood: reuse the stalest bucket). */
        if (!b)
            b = &l->b[oldest];
        memcpy(b->caller, key, n + 1);
        b->tokens = l->burst;
        b->stamp = now;
    }
    b->tokens += (now - b->stamp) * l->rate;
    if (b->tokens > l->burst)
        b->tokens = l->burst;
    b->stamp = now;
    bool ok = b->tokens >= 1;
    if (ok)
        b->tokens -= 1;
    else if (retry_after)
        *retry_after = (1 - b->tokens) / l->rate;
    pthread_mutex_unlock(&l->mu);
    return ok;
}
