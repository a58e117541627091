/* Figure of several band-power sets (the pairs of `clef spectrum --run`, the
 * spectra of a polarized run): one panel per set in a grid, or every set in
 * one frame with a legend.  The layout is computed first, without drawing,
 * so that tests and callers can find each panel and legend entry. */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "core_impl.h"
#include "plot_impl.h"

#define OVERLAY_WIDTH 1000
#define OVERLAY_HEIGHT 620
#define PANEL_WIDTH 300
#define PANEL_HEIGHT 230
#define GRID_MIN_WIDTH 900

/* The four filled markers the overlay cycles through: filled, so that the
 * centre pixel of each legend marker carries the set's colour. */
static const int overlay_shapes[4] = {PLOT_MARK_DISC, PLOT_MARK_SQUARE, PLOT_MARK_TRIANGLE,
                                      PLOT_MARK_DIAMOND};

static double clampd(double v, double lo, double hi)
{
    return v < lo ? lo : v > hi ? hi : v;
}

/* Font of the figure (title, axis labels, legend) and of the grid panels. */
static double figure_font(int width, int height)
{
    const double s = 0.022 * (height < width * 0.75 ? height : width * 0.75);
    return clampd(s, 7, 22);
}

static double panel_font(double cell_w, double cell_h)
{
    return clampd(0.05 * (cell_h < 0.8 * cell_w ? cell_h : 0.8 * cell_w), 6, 14);
}

static int resolve_arrange(int arrange, int n)
{
    if (arrange == CLEF_PLOT_ARRANGE_GRID || arrange == CLEF_PLOT_ARRANGE_OVERLAY)
        return arrange;
    return n <= CLEF_PLOT_OVERLAY_AUTO_MAX ? CLEF_PLOT_ARRANGE_OVERLAY : CLEF_PLOT_ARRANGE_GRID;
}

/* The l range shared by all frames, and each set's D range (0 included). */
static void data_ranges(const clef_bandpowers *const *bp, int n, const clef_plot_pairs_opts *o,
                        double *xmin, double *xmax, double *ylo, double *yhi)
{
    double xlo = INFINITY, xhi = -INFINITY;
    for (int k = 0; k < n; k++)
        plot_table_x_range(bp[k], o->log_l, &xlo, &xhi);
    for (int k = 0; k < n; k++) {
        ylo[k] = 0;
        yhi[k] = -INFINITY;
        plot_table_y_range(bp[k], &ylo[k], &yhi[k]);
        if (o->theory)
            for (size_t i = 0; i < o->theory->n; i++)
                if (o->theory->l[i] >= xlo && o->theory->l[i] <= xhi) {
                    ylo[k] = fmin(ylo[k], o->theory->dl[i]);
                    yhi[k] = fmax(yhi[k], o->theory->dl[i]);
                }
    }
    if (o->log_l) {
        *xmin = xlo / 1.15;
        *xmax = xhi * 1.15;
    } else {
        *xmin = xlo >= 0 ? 0 : xlo;
        *xmax = xhi;
        plot_nice_range(xmin, xmax, 6);
    }
}

static void frame_ranges(clef_plot_frame *p, const clef_plot_pairs_frame *f, int log_l,
                         double xmin, double xmax, double ylo, double yhi)
{
    p->width = f->width;
    p->height = f->height;
    p->log_x = log_l != 0;
    p->xmin = xmin;
    p->xmax = xmax;
    p->ymin = ylo;
    p->ymax = yhi + 0.08 * (yhi - ylo);
    if (!(p->ymax > p->ymin))
        p->ymax = p->ymin + 1;
    plot_nice_range(&p->ymin, &p->ymax, 5);
}

/* Grid cells: the figure less its margins (the title on top, the shared y
 * label at the left, the shared l label and the model key at the bottom). */
typedef struct grid_cells {
    double fs, pf;      /* figure and panel fonts */
    double x0, y0;      /* top left of the first cell */
    double cw, ch;      /* cell size */
} grid_cells;

static grid_cells grid_geometry(const clef_plot_pairs_frame *f)
{
    grid_cells g;
    g.fs = figure_font(f->width, f->height);
    g.x0 = 2.2 * g.fs;
    g.y0 = 2.8 * g.fs;
    g.cw = (f->width - 0.6 * g.fs - g.x0) / f->columns;
    g.ch = (f->height - 2.4 * g.fs - g.y0) / f->rows;
    g.pf = panel_font(g.cw, g.ch);
    return g;
}

static int layout_grid(const clef_plot_pairs_opts *o, int n, clef_plot_pairs_frame *f,
                       double xmin, double xmax, const double *ylo, const double *yhi)
{
    f->columns = o->columns > 0 ? (o->columns < n ? o->columns : n) : (int)ceil(sqrt((double)n));
    f->rows = (n + f->columns - 1) / f->columns;
    f->npanels = n;
    if (!f->width) {
        f->width = f->columns * PANEL_WIDTH + 60;
        if (f->width < GRID_MIN_WIDTH)
            f->width = GRID_MIN_WIDTH;
    }
    if (!f->height)
        f->height = f->rows * PANEL_HEIGHT + 90;
    CLEF_TRY(plot_check_size("figure of several pairs", f->width, f->height));
    const grid_cells g = grid_geometry(f);
    const double fs = g.fs, pf = g.pf, cw = g.cw, ch = g.ch;
    for (int k = 0; k < n; k++) {
        clef_plot_frame *p = &f->panel[k];
        const double cx = g.x0 + (k % f->columns) * cw, cy = g.y0 + (k / f->columns) * ch;
        frame_ranges(p, f, o->log_l, xmin, xmax, ylo[k], yhi[k]);
        p->left = cx + 4.6 * pf;
        p->right = cx + cw - 1.2 * pf;
        p->top = cy + 1.9 * pf;
        p->bottom = cy + ch - 2.3 * pf;
        if (!(p->right > p->left + 10 && p->bottom > p->top + 10))
            CLEF_FAIL(CLEF_EINVAL, "figure of several pairs: size %d x %d leaves no room for %d "
                      "x %d panels", f->width, f->height, f->rows, f->columns);
        f->rgb[k][0] = plot_colour_main.r;
        f->rgb[k][1] = plot_colour_main.g;
        f->rgb[k][2] = plot_colour_main.b;
    }
    if (o->theory) {
        f->nkeys = 1;
        f->key_x[0] = f->width - 0.6 * fs - 14 * fs;
        f->key_y[0] = f->height - 1.0 * fs;
    }
    return CLEF_OK;
}

/* Width of the widest legend text, measured with the font the figure uses. */
static double widest_text(const char *const *names, int n, const clef_plot_curve *theory,
                          double fs)
{
    cairo_surface_t *s = cairo_image_surface_create(CAIRO_FORMAT_ARGB32, 1, 1);
    cairo_t *cr = cairo_create(s);
    plot_font(cr, fs, 0);
    double w = 0;
    for (int k = 0; k < n; k++)
        w = fmax(w, plot_text_width(cr, names[k]));
    if (theory)
        w = fmax(w, plot_text_width(cr, theory->label ? theory->label : "model"));
    cairo_destroy(cr);
    cairo_surface_destroy(s);
    return w;
}

/* The legend stands to the right of the frame, one row per set, in as many
 * columns as the frame's height needs. */
static int layout_overlay(const clef_bandpowers *const *bp, const char *const *names, int n,
                          const clef_plot_pairs_opts *o, clef_plot_pairs_frame *f, double xmin,
                          double xmax, const double *ylo, const double *yhi)
{
    f->rows = f->columns = f->npanels = 1;
    if (!f->width)
        f->width = OVERLAY_WIDTH;
    if (!f->height)
        f->height = OVERLAY_HEIGHT;
    CLEF_TRY(plot_check_size("figure of several pairs", f->width, f->height));
    const double fs = figure_font(f->width, f->height);
    double lo = INFINITY, hi = -INFINITY;
    for (int k = 0; k < n; k++) {
        lo = fmin(lo, ylo[k]);
        hi = fmax(hi, yhi[k]);
    }
    clef_plot_frame *p = &f->panel[0];
    frame_ranges(p, f, o->log_l, xmin, xmax, lo, hi);
    p->top = 3.0 * fs;
    p->bottom = f->height - 4.2 * fs;
    f->nkeys = n + (o->theory != NULL);
    const double row = 1.5 * fs, sample = 2.4 * fs;
    const int per_col = (int)floor((p->bottom - p->top - 1.2 * fs) / row);
    if (per_col < 1)
        CLEF_FAIL(CLEF_EINVAL, "figure of several pairs: height %d leaves no room for the "
                  "legend", f->height);
    const int ncol = (f->nkeys + per_col - 1) / per_col;
    const double colw = sample + 0.6 * fs + widest_text(names, n, o->theory, fs) + 1.2 * fs;
    p->left = 8.0 * fs;
    p->right = f->width - 1.5 * fs - ncol * colw - 0.6 * fs;
    if (!(p->right > p->left + 10 && p->bottom > p->top + 10))
        CLEF_FAIL(CLEF_EINVAL, "figure of several pairs: size %d x %d leaves no room for the "
                  "plot beside a legend of %d entries", f->width, f->height, f->nkeys);
    for (int k = 0; k < f->nkeys; k++) {
        f->key_x[k] = p->right + 1.5 * fs + (k / per_col) * colw + 0.5 * sample;
        f->key_y[k] = p->top + 0.6 * fs + 0.5 * fs + (k % per_col) * row;
    }
    /* Sideways offsets: the sets share each bin's width, spread over 60% of
     * the narrowest bin (at least a marker's width apart when it fits). */
    double narrow = INFINITY;
    for (int k = 0; k < n; k++)
        for (int b = 0; b < bp[k]->nbins; b++) {
            const double a = bp[k]->l_hi[b] > bp[k]->l_lo[b] ? bp[k]->l_lo[b] : bp[k]->l_eff[b] - 0.5;
            const double z = bp[k]->l_hi[b] > bp[k]->l_lo[b] ? bp[k]->l_hi[b] : bp[k]->l_eff[b] + 0.5;
            if (!o->log_l || a > 0)
                narrow = fmin(narrow, clef_plot_frame_x(p, z) - clef_plot_frame_x(p, a));
        }
    const double step = n > 1 && isfinite(narrow) ? 0.6 * narrow / (n - 1) : 0;
    for (int k = 0; k < n; k++) {
        const plot_rgb c = plot_series_colour(k, n);
        f->rgb[k][0] = c.r;
        f->rgb[k][1] = c.g;
        f->rgb[k][2] = c.b;
        f->shift[k] = (k - 0.5 * (n - 1)) * step;
    }
    return CLEF_OK;
}

int clef_plot_pairs_layout(const clef_bandpowers *const *bp, const char *const *names, int n,
                           const clef_plot_pairs_opts *o, clef_plot_pairs_frame *f)
{
    clef_plot_pairs_opts d = {0};
    if (!o)
        o = &d;
    memset(f, 0, sizeof *f);
    if (n < 1 || n > CLEF_PLOT_PAIRS_MAX)
        CLEF_FAIL(CLEF_EINVAL, "figure of several pairs: %d sets (1..%d)", n, CLEF_PLOT_PAIRS_MAX);
    if (o->columns < 0)
        CLEF_FAIL(CLEF_EINVAL, "figure of several pairs: %d columns", o->columns);
    for (int k = 0; k < n; k++) {
        char what[120];
        snprintf(what, sizeof what, "set %d ('%s')", k + 1, names && names[k] ? names[k] : "");
        CLEF_TRY(plot_check_table(bp[k], what, o->log_l));
    }
    if (o->theory)
        for (size_t i = 0; i < o->theory->n; i++)
            if (!isfinite(o->theory->l[i]) || !isfinite(o->theory->dl[i]))
                CLEF_FAIL(CLEF_EINVAL, "theory curve: point %zu is not finite (l %g, D %g)", i,
                          o->theory->l[i], o->theory->dl[i]);
    f->n = n;
    f->width = o->width > 0 ? o->width : 0;
    f->height = o->height > 0 ? o->height : 0;
    f->arrange = resolve_arrange(o->arrange, n);
    double xmin, xmax, ylo[CLEF_PLOT_PAIRS_MAX], yhi[CLEF_PLOT_PAIRS_MAX];
    data_ranges(bp, n, o, &xmin, &xmax, ylo, yhi);
    if (f->arrange == CLEF_PLOT_ARRANGE_GRID)
        return layout_grid(o, n, f, xmin, xmax, ylo, yhi);
    return layout_overlay(bp, names, n, o, f, xmin, xmax, ylo, yhi);
}

static plot_rgb set_colour(const clef_plot_pairs_frame *f, int k)
{
    const plot_rgb c = {f->rgb[k][0], f->rgb[k][1], f->rgb[k][2]};
    return c;
}

static void draw_title(cairo_t *cr, const clef_plot_pairs_frame *f, int n,
                       const clef_plot_pairs_opts *o, double fs)
{
    char title[512];
    if (o->title) {
        snprintf(title, sizeof title, "%s", o->title);
    } else {
        const char *src = o->source ? strrchr(o->source, '/') : NULL;
        src = src ? src + 1 : o->source;
        snprintf(title, sizeof title, "%d spectra%s%s", n, src ? ", " : "", src ? src : "");
    }
    cairo_set_source_rgb(cr, 0, 0, 0);
    plot_font(cr, 1.2 * fs, 1);
    plot_text(cr, 0.5 * f->width, 1.4 * fs, title, 0.5, 0.5);
}

static const char xlabel[] = "multipole \xe2\x84\x93";
static const char ylabel[] = "D\xe2\x84\x93 = \xe2\x84\x93(\xe2\x84\x93+1) C\xe2\x84\x93 / 2\xcf\x80  "
                             "[\xc2\xb5K\xc2\xb2]";

static void curve_key(cairo_t *cr, double x, double y, double sample, const char *label,
                      double fs)
{
    cairo_set_source_rgb(cr, plot_colour_theory.r, plot_colour_theory.g, plot_colour_theory.b);
    cairo_set_line_width(cr, 0.13 * fs);
    cairo_move_to(cr, x - 0.5 * sample, y);
    cairo_line_to(cr, x + 0.5 * sample, y);
    cairo_stroke(cr);
    cairo_set_source_rgb(cr, 0, 0, 0);
    plot_font(cr, fs, 0);
    plot_text(cr, x + 0.5 * sample + 0.6 * fs, y, label, 0, 0.5);
}

static void draw_grid(cairo_t *cr, const clef_plot_pairs_frame *f, const clef_bandpowers *const *bp,
                      const char *const *names, const clef_plot_pairs_opts *o)
{
    const grid_cells g = grid_geometry(f);
    const double fs = g.fs, pf = g.pf;
    for (int k = 0; k < f->n; k++) {
        const clef_plot_frame *p = &f->panel[k];
        plot_draw_axes(cr, p, "", "", pf);
        cairo_save(cr);
        cairo_rectangle(cr, p->left, p->top, p->right - p->left, p->bottom - p->top);
        cairo_clip(cr);
        if (o->theory && o->theory->n > 1)
            plot_draw_curve(cr, p, o->theory, pf);
        plot_draw_table(cr, p, bp[k], set_colour(f, k), PLOT_MARK_DISC, 0, 1, pf);
        cairo_restore(cr);
        char name[96];
        snprintf(name, sizeof name, "%s", names && names[k] ? names[k] : "");
        cairo_set_source_rgb(cr, 0, 0, 0);
        plot_font(cr, 1.05 * pf, 1);
        plot_text(cr, p->left, p->top - 0.55 * pf, name, 0, 1);
    }
    /* One l label under the grid, one D label at its left. */
    cairo_set_source_rgb(cr, 0, 0, 0);
    plot_font(cr, fs, 0);
    plot_text(cr, 0.5 * f->width, f->height - 1.0 * fs, xlabel, 0.5, 0.5);
    plot_text_vertical(cr, 1.0 * fs, 0.5 * f->height, ylabel);
    if (f->nkeys)
        curve_key(cr, f->key_x[0], f->key_y[0], 2.4 * fs,
                  o->theory->label ? o->theory->label : "model", fs);
}

static void draw_overlay(cairo_t *cr, const clef_plot_pairs_frame *f,
                         const clef_bandpowers *const *bp, const char *const *names,
                         const clef_plot_pairs_opts *o)
{
    const double fs = figure_font(f->width, f->height);
    const clef_plot_frame *p = &f->panel[0];
    plot_draw_axes(cr, p, xlabel, ylabel, fs);
    cairo_save(cr);
    cairo_rectangle(cr, p->left, p->top, p->right - p->left, p->bottom - p->top);
    cairo_clip(cr);
    if (o->theory && o->theory->n > 1)
        plot_draw_curve(cr, p, o->theory, fs);
    /* No bin bars: with many sets they would cover each other. */
    for (int k = 0; k < f->n; k++)
        plot_draw_table(cr, p, bp[k], set_colour(f, k), overlay_shapes[k % 4], f->shift[k], 0,
                        fs);
    cairo_restore(cr);
    const double sample = 2.4 * fs;
    for (int k = 0; k < f->n; k++) {
        const plot_rgb c = set_colour(f, k);
        cairo_set_source_rgb(cr, c.r, c.g, c.b);
        cairo_set_line_width(cr, 0.09 * fs);
        cairo_move_to(cr, f->key_x[k], f->key_y[k] - 0.45 * fs);
        cairo_line_to(cr, f->key_x[k], f->key_y[k] + 0.45 * fs);
        cairo_stroke(cr);
        plot_draw_marker(cr, f->key_x[k], f->key_y[k], 0.3 * fs, overlay_shapes[k % 4]);
        cairo_set_source_rgb(cr, 0, 0, 0);
        plot_font(cr, fs, 0);
        plot_text(cr, f->key_x[k] + 0.5 * sample + 0.6 * fs, f->key_y[k],
                  names && names[k] ? names[k] : "", 0, 0.5);
    }
    if (o->theory)
        curve_key(cr, f->key_x[f->n], f->key_y[f->n], sample,
                  o->theory->label ? o->theory->label : "model", fs);
}

int clef_plot_pairs(const clef_bandpowers *const *bp, const char *const *names, int n,
                    const clef_plot_pairs_opts *o, const char *path)
{
    clef_plot_pairs_opts d = {0};
    if (!o)
        o = &d;
    clef_plot_pairs_frame *f = malloc(sizeof *f);
    if (!f)
        CLEF_FAIL(CLEF_ENOMEM, "figure of several pairs: out of memory");
    int status = clef_plot_pairs_layout(bp, names, n, o, f);
    plot_canvas c;
    if (status == CLEF_OK)
        status = plot_canvas_open(&c, path, f->width, f->height, 0);
    if (status == CLEF_OK) {
        if (f->arrange == CLEF_PLOT_ARRANGE_GRID)
            draw_grid(c.cr, f, bp, names, o);
        else
            draw_overlay(c.cr, f, bp, names, o);
        draw_title(c.cr, f, n, o, figure_font(f->width, f->height));
        status = plot_canvas_close(&c);
    }
    free(f);
    return status;
}
