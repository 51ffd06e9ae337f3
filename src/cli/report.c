#include "report.h"

#include <math.h>
#include <string.h>

/* Plot geometry, in SVG user units. */
enum { PW = 460, PH = 360, ML = 60, MR = 16, MT = 20, MB = 48 };

static void esc(FILE *f, const char *s)
{
    for (; s && *s; s++) {
        switch (*s) {
        case '<': fputs("&lt;", f); break;
        case '>': fputs("&gt;", f); break;
        case '&': fputs("&amp;", f); break;
        case '"': fputs("&quot;", f); break;
        default: fputc(*s, f);
        }
    }
}

static double px(double u) { return ML + u * (PW - ML - MR); }
static double py(double v) { return PH - MB - v * (PH - MT - MB); }

static void axes(FILE *f, const char *xlabel, const char *ylabel)
{
    fprintf(f, "<rect x='%d' y='%d' width='%d' height='%d' fill='#fff' stroke='#888'/>\n", ML, MT,
            PW - ML - MR, PH - MT - MB);
    fprintf(f, "<text x='%d' y='%d' text-anchor='middle' class='lab'>", (PW + ML - MR) / 2, PH - 10);
    esc(f, xlabel);
    fprintf(f, "</text>\n<text x='14' y='%d' text-anchor='middle' class='lab' "
               "transform='rotate(-90 14 %d)'>", (PH - MB + MT) / 2, (PH - MB + MT) / 2);
    esc(f, ylabel);
    fputs("</text>\n", f);
}

/* ROC on a logarithmic FMR axis (1e-4 .. 1): the region where operating
 * points live is invisible on a linear axis. */
static void roc_svg(FILE *f, const report_curve *c)
{
    const double lo = -4.0;
    fprintf(f, "<svg viewBox='0 0 %d %d' width='%d' height='%d' role='img' "
               "aria-label='ROC curve'>\n", PW, PH, PW, PH);
    axes(f, "false match rate (FMR, log scale)", "true match rate (1 - FNMR)");
    for (int e = -4; e <= 0; e++) {
        double x = px((e - lo) / -lo);
        fprintf(f, "<line x1='%.1f' y1='%d' x2='%.1f' y2='%d' class='grid'/>"
                   "<text x='%.1f' y='%d' text-anchor='middle' class='tick'>1e%d</text>\n",
                x, MT, x, PH - MB, x, PH - MB + 16, e);
    }
    for (int k = 0; k <= 10; k += 2) {
        double y = py(k / 10.0);
        fprintf(f, "<line x1='%d' y1='%.1f' x2='%d' y2='%.1f' class='grid'/>"
                   "<text x='%d' y='%.1f' text-anchor='end' class='tick'>%.1f</text>\n",
                ML, y, PW - MR, y, ML - 4, y + 4, k / 10.0);
    }
    fputs("<polyline fill='none' stroke='#1f5fa8' stroke-width='2' points='", f);
    for (size_t i = 0; i < c->n; i++) {
        double l = c->fmr[i] > 0 ? log10(c->fmr[i]) : lo;
        if (l < lo)
            l = lo;
        fprintf(f, "%.1f,%.1f ", px((l - lo) / -lo), py(1.0 - c->fnmr[i]));
    }
    fputs("'/>\n</svg>\n", f);
}

/* DET: both error rates on normal-deviate axes (Martin et al., "The DET
 * curve in assessment of detection task performance", Eurospeech 1997). */
static double probit(double p)
{
    /* Acklam's rational approximation of the inverse normal CDF (relative
     * error < 1.2e-9; published by P. J. Acklam, 2003; coefficients recalled
     * from the published table). Plotting needs far less accuracy. */
    static const double a[] = {-3.969683028665376e+01, 2.209460984245205e+02,
                               -2.759285104469687e+02, 1.383577518672690e+02,
                               -3.066479806614716e+01, 2.506628277459239e+00};
    static const double b[] = {-5.447609879822406e+01, 1.615858368580409e+02,
                               -1.556989798598866e+02, 6.680131188771972e+01,
                               -1.328068155288572e+01};
    static const double c[] = {-7.784894002430293e-03, -3.223964580411365e-01,
                               -2.400758277161838e+00, -2.549732539343734e+00,
                               4.374664141464968e+00, 2.938163982698783e+00};
    static const double d[] = {7.784695709041462e-03, 3.224671290700398e-01,
                               2.445134137142996e+00, 3.754408661907416e+00};
    if (p <= 0)
        return -10;
    if (p >= 1)
        return 10;
    double q, r;
    if (p < 0.02425) {
        q = sqrt(-2 * log(p));
        return (((((c[0] * q + c[1]) * q + c[2]) * q + c[3]) * q + c[4]) * q + c[5]) /
               ((((d[0] * q + d[1]) * q + d[2]) * q + d[3]) * q + 1);
    }
    if (p > 1 - 0.02425) {
        q = sqrt(-2 * log(1 - p));
        return -(((((c[0] * q + c[1]) * q + c[2]) * q + c[3]) * q + c[4]) * q + c[5]) /
               ((((d[0] * q + d[1]) * q + d[2]) * q + d[3]) * q + 1);
    }
    q = p - 0.5;
    r = q * q;
    return (((((a[0] * r + a[1]) * r + a[2]) * r + a[3]) * r + a[4]) * r + a[5]) * q /
           (((((b[0] * r + b[1]) * r + b[2]) * r + b[3]) * r + b[4]) * r + 1);
}

static void det_svg(FILE *f, const report_curve *c)
{
    static const double ticks[] = {0.0001, 0.001, 0.01, 0.05, 0.2, 0.5, 0.8};
    static const char *const names[] = {"0.01%", "0.1%", "1%", "5%", "20%", "50%", "80%"};
    const double lo = probit(0.0001), hi = probit(0.8);
    fprintf(f, "<svg viewBox='0 0 %d %d' width='%d' height='%d' role='img' "
               "aria-label='DET curve'>\n", PW, PH, PW, PH);
    axes(f, "false match rate (FMR)", "false non-match rate (FNMR)");
    for (size_t i = 0; i < sizeof ticks / sizeof ticks[0]; i++) {
        double u = (probit(ticks[i]) - lo) / (hi - lo);
        fprintf(f, "<line x1='%.1f' y1='%d' x2='%.1f' y2='%d' class='grid'/>"
                   "<text x='%.1f' y='%d' text-anchor='middle' class='tick'>%s</text>\n",
                px(u), MT, px(u), PH - MB, px(u), PH - MB + 16, names[i]);
        fprintf(f, "<line x1='%d' y1='%.1f' x2='%d' y2='%.1f' class='grid'/>"
                   "<text x='%d' y='%.1f' text-anchor='end' class='tick'>%s</text>\n",
                ML, py(u), PW - MR, py(u), ML - 4, py(u) + 4, names[i]);
    }
    fputs("<polyline fill='none' stroke='#b0412e' stroke-width='2' points='", f);
    for (size_t i = 0; i < c->n; i++) {
        double u = (probit(c->fmr[i]) - lo) / (hi - lo);
        double v = (probit(c->fnmr[i]) - lo) / (hi - lo);
        if (u < 0 || u > 1 || v < 0 || v > 1)
            continue;
        fprintf(f, "%.1f,%.1f ", px(u), py(v));
    }
    fputs("'/>\n", f);
    /* The EER line FMR = FNMR, for reading the equal error rate off the plot. */
    fprintf(f, "<line x1='%.1f' y1='%.1f' x2='%.1f' y2='%.1f' stroke='#999' "
               "stroke-dasharray='4 3'/>\n</svg>\n", px(0), py(0), px(1), py(1));
}

static void hist_svg(FILE *f, const report_input *in)
{
    enum { NB = 40 };
    double lo = INFINITY, hi = -INFINITY;
    for (size_t i = 0; i < in->n_genuine; i++) {
        lo = fmin(lo, in->genuine[i]);
        hi = fmax(hi, in->genuine[i]);
    }
    for (size_t i = 0; i < in->n_impostor; i++) {
        lo = fmin(lo, in->impostor[i]);
        hi = fmax(hi, in->impostor[i]);
    }
    if (!(hi > lo)) {
        lo = 0;
        hi = 1;
    }
    double g[NB] = {0}, m[NB] = {0}, top = 0;
    for (size_t i = 0; i < in->n_genuine; i++) {
        int b = (int)((in->genuine[i] - lo) / (hi - lo) * NB);
        g[b >= NB ? NB - 1 : b] += 1.0 / (double)in->n_genuine;
    }
    for (size_t i = 0; i < in->n_impostor; i++) {
        int b = (int)((in->impostor[i] - lo) / (hi - lo) * NB);
        m[b >= NB ? NB - 1 : b] += 1.0 / (double)in->n_impostor;
    }
    for (int b = 0; b < NB; b++)
        top = fmax(top, fmax(g[b], m[b]));
    if (top <= 0)
        top = 1;
    fprintf(f, "<svg viewBox='0 0 %d %d' width='%d' height='%d' role='img' "
               "aria-label='score histograms'>\n", PW, PH, PW, PH);
    axes(f, "comparison score (SVM decision value, before calibration)", "fraction of comparisons");
    for (int k = 0; k <= 4; k++) {
        double v = lo + (hi - lo) * k / 4.0;
        fprintf(f, "<text x='%.1f' y='%d' text-anchor='middle' class='tick'>%.3g</text>\n",
                px(k / 4.0), PH - MB + 16, v);
    }
    fprintf(f, "<text x='%d' y='%.1f' text-anchor='end' class='tick'>%.2f</text>\n", ML - 4,
            py(1) + 4, top);
    double bw = 1.0 / NB;
    for (int b = 0; b < NB; b++) {
        fprintf(f, "<rect x='%.1f' y='%.1f' width='%.1f' height='%.1f' fill='#b0412e' "
                   "fill-opacity='0.45'/>", px(b * bw), py(m[b] / top), px(bw) - ML,
                py(0) - py(m[b] / top));
        fprintf(f, "<rect x='%.1f' y='%.1f' width='%.1f' height='%.1f' fill='#1f5fa8' "
                   "fill-opacity='0.45'/>\n", px(b * bw), py(g[b] / top), px(bw) - ML,
                py(0) - py(g[b] / top));
    }
    if (!isnan(in->threshold) && in->threshold >= lo && in->threshold <= hi) {
        double x = px((in->threshold - lo) / (hi - lo));
        fprintf(f, "<line x1='%.1f' y1='%d' x2='%.1f' y2='%d' stroke='#222' "
                   "stroke-dasharray='5 3'/><text x='%.1f' y='%d' class='tick'>threshold</text>\n",
                x, MT, x, PH - MB, x + 3, MT + 12);
    }
    fprintf(f, "<rect x='%d' y='%d' width='10' height='10' fill='#1f5fa8' fill-opacity='0.6'/>"
               "<text x='%d' y='%d' class='tick'>mated (genuine)</text>"
               "<rect x='%d' y='%d' width='10' height='10' fill='#b0412e' fill-opacity='0.6'/>"
               "<text x='%d' y='%d' class='tick'>non-mated (impostor)</text>\n</svg>\n",
            ML + 8, MT + 8, ML + 22, MT + 17, ML + 8, MT + 24, ML + 22, MT + 33);
}

int report_write_html(FILE *f, const report_input *in)
{
    fputs("<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'><title>", f);
    esc(f, in->title);
    fputs("</title>\n<style>body{font-family:system-ui,sans-serif;margin:2em auto;max-width:1000px;"
          "color:#222}h1{font-size:1.5em}table{border-collapse:collapse}td,th{padding:4px 10px;"
          "border-bottom:1px solid #ddd;text-align:left}.plots{display:flex;flex-wrap:wrap;gap:16px}"
          "figure{margin:0}figcaption{font-size:.9em;color:#555}.grid{stroke:#eee}"
          ".tick{font-size:11px;fill:#555}.lab{font-size:12px;fill:#222}"
          ".muted{color:#666;font-size:.9em}</style></head><body>\n<h1>", f);
    esc(f, in->title);
    fputs("</h1>\n<p class='muted'>", f);
    esc(f, in->subtitle);
    fputs("</p>\n<table>\n", f);
    for (size_t i = 0; i < in->n_rows; i++) {
        fputs("<tr><th>", f);
        esc(f, in->rows[i].label);
        fputs("</th><td>", f);
        esc(f, in->rows[i].value);
        fputs("</td></tr>\n", f);
    }
    fputs("</table>\n<div class='plots'>\n<figure>", f);
    roc_svg(f, &in->curve);
    fputs("<figcaption>ROC: true match rate against FMR (log scale).</figcaption></figure>\n"
          "<figure>", f);
    det_svg(f, &in->curve);
    fputs("<figcaption>DET: FNMR against FMR on normal-deviate axes; the dashed line is "
          "FMR = FNMR (the EER lies where the curve crosses it).</figcaption></figure>\n<figure>",
          f);
    hist_svg(f, in);
    fputs("<figcaption>Comparison-score distributions of mated and non-mated pairs, each "
          "normalised to its own count.</figcaption></figure>\n</div>\n", f);
    if (in->notes_html)
        fputs(in->notes_html, f);
    fputs("<p class='muted'>Error rates follow ISO/IEC 19795-1: FMR is the fraction of "
          "non-mated comparisons at or above the threshold, FNMR the fraction of mated "
          "comparisons below it. Results on a public data set do not establish fitness for "
          "any particular use; measure on your own population.</p>\n</body></html>\n", f);
    return ferror(f) ? -1 : 0;
}
