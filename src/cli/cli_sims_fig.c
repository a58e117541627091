/* clef sims: the covariance figure.  Left: the ratio of the Monte Carlo to
 * the analytic variance per bin against l_eff, with the +/-15% band of the
 * project's criterion (dashed) and the ratio's own sampling error sqrt(2/(n-1));
 * right: r_MC - r_analytic for every pair of bins, on a diverging scale
 * (blue negative, red positive, white zero). */
#define _GNU_SOURCE
#include <cairo.h>
#include <math.h>
#include <stdio.h>

#include "cli.h"
#include "cli_sims.h"

static void text(cairo_t *c, double x, double y, const char *s, double align)
{
    cairo_text_extents_t e;
    cairo_text_extents(c, s, &e);
    cairo_move_to(c, x - align * e.width, y);
    cairo_show_text(c, s);
}

int sims_cov_figure(int nb, const double *l_eff, const double *ratio, const double *corr_diff,
                    int nreal, const char *path)
{
    const int W = 1000, H = 440;
    cairo_surface_t *s = cairo_image_surface_create(CAIRO_FORMAT_RGB24, W, H);
    cairo_t *c = cairo_create(s);
    cairo_set_source_rgb(c, 1, 1, 1);
    cairo_paint(c);
    cairo_select_font_face(c, "sans-serif", CAIRO_FONT_SLANT_NORMAL, CAIRO_FONT_WEIGHT_NORMAL);
    cairo_set_font_size(c, 13);
    /* left panel */
    const double x0 = 70, x1 = 520, y0 = 40, y1 = 380;
    double lmax = l_eff[nb - 1] * 1.05, rlo = 0.6, rhi = 1.4;
    for (int b = 0; b < nb; b++) {
        if (isfinite(ratio[b]) && ratio[b] < rlo + 0.05)
            rlo = ratio[b] - 0.05;
        if (isfinite(ratio[b]) && ratio[b] > rhi - 0.05)
            rhi = ratio[b] + 0.05;
    }
#define PX(l) (x0 + (x1 - x0) * (l) / lmax)
#define PY(v) (y1 - (y1 - y0) * ((v) - rlo) / (rhi - rlo))
    const double se = sqrt(2.0 / (nreal - 1));
    cairo_set_source_rgb(c, 0.85, 0.85, 0.85);
    cairo_rectangle(c, x0, PY(1 + se), x1 - x0, PY(1 - se) - PY(1 + se));
    cairo_fill(c);
    const double dash[1] = {5.0};
    cairo_set_source_rgb(c, 0.6, 0.1, 0.1);
    cairo_set_dash(c, dash, 1, 0);
    for (int k = -1; k <= 1; k += 2) {
        cairo_move_to(c, x0, PY(1 + 0.15 * k));
        cairo_line_to(c, x1, PY(1 + 0.15 * k));
        cairo_stroke(c);
    }
    cairo_set_dash(c, NULL, 0, 0);
    cairo_set_source_rgb(c, 0, 0, 0);
    cairo_set_line_width(c, 1);
    cairo_rectangle(c, x0, y0, x1 - x0, y1 - y0);
    cairo_stroke(c);
    cairo_move_to(c, x0, PY(1.0));
    cairo_line_to(c, x1, PY(1.0));
    cairo_stroke(c);
    cairo_set_source_rgb(c, 0.1, 0.3, 0.6);
    for (int b = 0; b < nb; b++)
        if (isfinite(ratio[b])) {
            cairo_arc(c, PX(l_eff[b]), PY(ratio[b]), 3.5, 0, 2 * M_PI);
            cairo_fill(c);
        }
    cairo_set_source_rgb(c, 0, 0, 0);
    char buf[64];
    for (int k = 0; k <= 4; k++) {
        const double v = rlo + (rhi - rlo) * k / 4;
        snprintf(buf, sizeof buf, "%.2f", v);
        text(c, x0 - 6, PY(v) + 4, buf, 1.0);
        const double l = lmax * k / 4;
        snprintf(buf, sizeof buf, "%.0f", l);
        text(c, PX(l), y1 + 18, buf, 0.5);
    }
    text(c, (x0 + x1) / 2, y1 + 40, "multipole l (bin centre)", 0.5);
    snprintf(buf, sizeof buf, "variance ratio MC / analytic, %d realisations", nreal);
    text(c, (x0 + x1) / 2, y0 - 14, buf, 0.5);
    text(c, x1 - 4, y0 + 16, "dashed: +/-15%, grey: sampling error", 1.0);
    /* right panel: correlation differences */
    const double m0 = 600, m1 = 920, n0 = 40, cell = (m1 - m0) / nb;
    double dmax = 0.05;
    for (int i = 0; i < nb * nb; i++)
        if (isfinite(corr_diff[i]) && fabs(corr_diff[i]) > dmax && i / nb != i % nb)
            dmax = fabs(corr_diff[i]);
    for (int a = 0; a < nb; a++)
        for (int b = 0; b < nb; b++) {
            double v = a == b ? 0.0 : corr_diff[a * nb + b] / dmax;
            v = isfinite(v) ? fmax(-1, fmin(1, v)) : 0;
            if (v >= 0)
                cairo_set_source_rgb(c, 1, 1 - v, 1 - v);
            else
                cairo_set_source_rgb(c, 1 + v, 1 + v, 1);
            cairo_rectangle(c, m0 + b * cell, n0 + a * cell, cell + 0.5, cell + 0.5);
            cairo_fill(c);
        }
    cairo_set_source_rgb(c, 0, 0, 0);
    cairo_rectangle(c, m0, n0, m1 - m0, m1 - m0);
    cairo_stroke(c);
    snprintf(buf, sizeof buf, "r(MC) - r(analytic), scale +/-%.2f", dmax);
    text(c, (m0 + m1) / 2, n0 - 14, buf, 0.5);
    text(c, (m0 + m1) / 2, n0 + (m1 - m0) + 20, "bin", 0.5);
    cairo_destroy(c);
    const cairo_status_t st = cairo_surface_write_to_png(s, path);
    cairo_surface_destroy(s);
    if (st != CAIRO_STATUS_SUCCESS) {
        fprintf(stderr, "clef: error: cannot write the figure '%s': %s\n", path,
                cairo_status_to_string(st));
        return CLI_EXIT_IO;
    }
    return CLI_EXIT_OK;
#undef PX
#undef PY
}
