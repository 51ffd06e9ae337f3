#include "cli.h"

#include <stdarg.h>
#include <time.h>
#include <unistd.h>

void cli_error(const lk_error *err)
{
    fprintf(stderr, "likeness: %s [%s]\n", err->message, lk_code_name(err->code));
}

void cli_errorf(const char *fmt, ...)
{
    va_list ap;
    va_start(ap, fmt);
    fputs("likeness: ", stderr);
    vfprintf(stderr, fmt, ap);
    fputc('\n', stderr);
    va_end(ap);
}

double cli_now(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + ts.tv_nsec * 1e-9;
}

void cli_progress_start(cli_progress *p, const char *what, size_t total)
{
    p->what = what;
    p->total = total;
    p->last_shown = (size_t)-1;
    p->started = cli_now();
    p->tty = isatty(2);
    cli_progress_update(p, 0);
}

void cli_progress_update(cli_progress *p, size_t done)
{
    if (p->total == 0)
        return;
    size_t pct = done * 100 / p->total;
    if (p->tty) {
        size_t step = done * 40 / p->total;
        if (step == p->last_shown && done != p->total)
            return;
        p->last_shown = step;
        double el = cli_now() - p->started;
        double eta = done ? el * (double)(p->total - done) / (double)done : 0;
        fprintf(stderr, "\r%-22s [", p->what);
        for (size_t i = 0; i < 40; i++)
            fputc(i < step ? '#' : '.', stderr);
        fprintf(stderr, "] %3zu%% %zu/%zu  %.0fs left ", pct, done, p->total, eta);
        fflush(stderr);
    } else {
        size_t decile = pct / 10;
        if (decile == p->last_shown)
            return;
        p->last_shown = decile;
        fprintf(stderr, "%s: %zu%% (%zu/%zu)\n", p->what, pct, done, p->total);
    }
}

void cli_progress_end(cli_progress *p)
{
    if (p->tty)
        fprintf(stderr, "\n");
    fprintf(stderr, "%s: done in %.1f s\n", p->what, cli_now() - p->started);
}
