/* A fixed pool of worker threads over a bounded FIFO ring. The bound is the
 * back-pressure: a request that finds the ring full is answered 503 at once
 * instead of waiting without limit. */
#include <pthread.h>
#include <stdlib.h>

#include "internal.h"

struct srv_pool {
    pthread_mutex_t mu;
    pthread_cond_t nonempty;
    void **ring;
    int cap, head, count, busy;
    bool stopping;
    int n_threads;
    int n_states; /* slots in states */
    pthread_t *threads;
    void **states;
    srv_job_fn run;
    void (*free_state)(void *);
};

typedef struct worker_arg {
    srv_pool *p;
    int index;
} worker_arg;

static void *worker_main(void *arg)
{
    worker_arg *wa = arg;
    srv_pool *p = wa->p;
    void *state = p->states[wa->index];
    free(wa);
    pthread_mutex_lock(&p->mu);
    for (;;) {
        while (!p->count && !p->stopping)
            pthread_cond_wait(&p->nonempty, &p->mu);
        if (!p->count && p->stopping)
            break;
        void *job = p->ring[p->head];
        p->head = (p->head + 1) % p->cap;
        p->count--;
        p->busy++;
        pthread_mutex_unlock(&p->mu);
        p->run(job, state);
        pthread_mutex_lock(&p->mu);
        p->busy--;
    }
    pthread_mutex_unlock(&p->mu);
    return NULL;
}

srv_pool *srv_pool_new(int workers, int depth, srv_job_fn run, void *(*make_state)(void *arg),
                       void (*free_state)(void *state), void *arg, lk_error *err)
{
    srv_pool *p = calloc(1, sizeof *p);
    if (!p || workers < 1 || depth < 1) {
        free(p);
        lk_error_set(err, p ? LK_ERR_INVALID_ARGUMENT : LK_ERR_NOMEM, "bad worker pool size");
        return NULL;
    }
    pthread_mutex_init(&p->mu, NULL);
    pthread_cond_init(&p->nonempty, NULL);
    p->cap = depth;
    p->run = run;
    p->free_state = free_state;
    p->ring = calloc((size_t)depth, sizeof *p->ring);
    p->threads = calloc((size_t)workers, sizeof *p->threads);
    p->states = calloc((size_t)workers, sizeof *p->states);
    p->n_states = p->states ? workers : 0;
    if (!p->ring || !p->threads || !p->states)
        goto nomem;
    for (int i = 0; i < workers; i++) {
        if (make_state && !(p->states[i] = make_state(arg)))
            goto nomem;
        worker_arg *wa = malloc(sizeof *wa);
        if (!wa)
            goto nomem;
        wa->p = p;
        wa->index = i;
        if (pthread_create(&p->threads[i], NULL, worker_main, wa)) {
            free(wa);
            lk_error_set(err, LK_ERR_INTERNAL, "cannot start worker thread %d", i);
            srv_pool_free(p);
            return NULL;
        }
        p->n_threads++;
    }
    return p;
nomem:
    lk_error_set(err, LK_ERR_NOMEM, "out of memory starting the worker pool");
    srv_pool_free(p);
    return NULL;
}

bool srv_pool_submit(srv_pool *p, void *job)
{
    pthread_mutex_lock(&p->mu);
    bool ok = p->count < p->cap && !p->stopping;
    if (ok) {
        p->ring[(p->head + p->count) % p->cap] = job;
        p->count++;
        pthread_cond_signal(&p->nonempty);
    }
    pthread_mutex_unlock(&p->mu);
    return ok;
}

int srv_pool_queued(srv_pool *p)
{
    pthread_mutex_lock(&p->mu);
    int n = p->count;
    pthread_mutex_unlock(&p->mu);
    return n;
}

int srv_pool_busy(srv_pool *p)
{
    pthread_mutex_lock(&p->mu);
    int n = p->busy;
    pthread_mutex_unlock(&p->mu);
    return n;
}

int srv_pool_workers(const srv_pool *p)
{
    return p->n_threads;
}

void srv_pool_free(srv_pool *p)
{
    if (!p)
        return;
    pthread_mutex_lock(&p->mu);
    p->stopping = true;
    pthread_cond_broadcast(&p->nonempty);
    pthread_mutex_unlock(&p->mu);
    for (int i = 0; i < p->n_threads; i++)
        pthread_join(p->threads[i], NULL);
    if (p->states && p->free_state)
        for (int i = 0; i < p->n_states; i++)
            if (p->states[i])
                p->free_state(p->states[i]);
    pthread_mutex_destroy(&p->mu);
    pthread_cond_destroy(&p->nonempty);
    free(p->ring);
    free(p->threads);
    free(p->states);
    free(p);
}
