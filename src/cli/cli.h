/* Shared pieces of the likeness command-line tool. */
#ifndef LIKENESS_CLI_H
#define LIKENESS_CLI_H

#include <stddef.h>
#include <stdio.h>

#include "likeness/error.h"

typedef struct cli_command {
    const char *name;
    const char *summary;
    int (*run)(int argc, char **argv);
} cli_command;

/* Exit codes: 0 success, 1 the work failed (a reason is printed), 2 usage error. */
enum { CLI_OK = 0, CLI_FAIL = 1, CLI_USAGE = 2 };

int cmd_detect(int argc, char **argv);
int cmd_features(int argc, char **argv);
int cmd_verify(int argc, char **argv);
int cmd_train(int argc, char **argv);
int cmd_evaluate(int argc, char **argv);
int cmd_lfw(int argc, char **argv);
int cmd_keys(int argc, char **argv);
int cmd_audit(int argc, char **argv);

/* Prints "likeness: <message>" (and the error code name) to stderr. */
void cli_error(const lk_error *err);
void cli_errorf(const char *fmt, ...) __attribute__((format(printf, 1, 2)));

/* A progress bar on stderr when it is a terminal; otherwise a line every 10%. */
typedef struct cli_progress {
    const char *what;
    size_t total;
    size_t last_shown;
    double started;
    int tty;
} cli_progress;

void cli_progress_start(cli_progress *p, const char *what, size_t total);
void cli_progress_update(cli_progress *p, size_t done);
void cli_progress_end(cli_progress *p);
double cli_now(void);

#endif
