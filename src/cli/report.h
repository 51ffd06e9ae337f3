/* Self-contained HTML evaluation report: ROC and DET curves and score
 * histograms drawn as inline SVG, so the file opens anywhere with no
 * network and no scripts. */
#ifndef LIKENESS_CLI_REPORT_H
#define LIKENESS_CLI_REPORT_H

#include <stddef.h>
#include <stdio.h>

typedef struct report_curve {
    const double *fmr;  /* false match rate at each threshold, ascending */
    const double *fnmr; /* false non-match rate at the same thresholds */
    size_t n;
} report_curve;

typedef struct report_summary_row {
    const char *label;
    char value[128];
} report_summary_row;

typedef struct report_input {
    const char *title;
    const char *subtitle;             /* e.g. model id and pairs file */
    report_curve curve;
    const double *genuine;            /* comparison scores of mated pairs */
    size_t n_genuine;
    const double *impostor;           /* comparison scores of non-mated pairs */
    size_t n_impostor;
    double threshold;                 /* decision threshold drawn on the histogram; NaN = none */
    const report_summary_row *rows;   /* summary table */
    size_t n_rows;
    const char *notes_html;           /* trusted HTML paragraph(s) appended, or NULL */
} report_input;

/* Writes the whole HTML document to f. Returns 0 on success, -1 on a write error. */
int report_write_html(FILE *f, const report_input *in);

#endif
