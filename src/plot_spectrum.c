/* Band-power figure: D_b with error bars against l, overlays (theory curve,
 * second table), the first peak with its 1-sigma range, legend, title. */
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "core_impl.h"
#include "plot_impl.h"

#define DEFAULT_WIDTH 900
#define DEFAULT_HEIGHT 600

/* Colours of the figure's elements (the main and theory colours are shared
 * with the figure of several pairs, plot_pairs.c). */
const plot_rgb plot_colour_main = {0.10, 0.22, 0.55};
const plot_rgb plot_colour_theory = {0.88, 0.42, 0.08};
static const plot_rgb colour_compare = {0.05, 0.55, 0.50};
static const plot_rgb colour_peak = {0.80, 0.10, 0.45};

static double font_size(const clef_plot_frame *f)
{
    const double s = 0.022 * (f->height < f->width ? f->height : f->width * 0.75);
    return s < 7 ? 7 : s;
}

int plot_check_table(const clef_bandpowers *bp, const char *what, int log_l)
{
    if (!bp || bp->nbins < 1)
        CLEF_FAIL(CLEF_EINVAL, "%s: band-power table has no bins", what);
    for (int b = 0; b < bp->nbins; b++) {
        if (!isfinite(bp->l_eff[b]) || !isfinite(bp->dl[b]) || !isfinite(bp->dl_err[b]) ||
            bp->dl_err[b] < 0)
            CLEF_FAIL(CLEF_EINVAL, "%s: bin %d has a non-finite value or negative error "
                      "(l_eff %g, D %g, err %g)", what, b, bp->l_eff[b], bp->dl[b], bp->dl_err[b]);
        if (log_l && !(bp->l_eff[b] > 0))
            CLEF_FAIL(CLEF_EINVAL, "%s: bin %d has l_eff %g, not positive: no logarithmic l axis",
                      what, b, bp->l_eff[b]);
    }
    return CLEF_OK;
}

void plot_table_x_range(const clef_bandpowers *bp, int log_l, double *lo, double *hi)
{
    for (int b = 0; b < bp->nbins; b++) {
        double a = bp->l_eff[b], z = bp->l_eff[b];
        if (bp->l_hi[b] > bp->l_lo[b]) {
            if (!log_l || bp->l_lo[b] > 0)
                a = fmin(a, bp->l_lo[b]);
            z = fmax(z, bp->l_hi[b]);
        }
        *lo = fmin(*lo, a);
        *hi = fmax(*hi, z);
    }
}

void plot_table_y_range(const clef_bandpowers *bp, double *lo, double *hi)
{
    for (int b = 0; b < bp->nbins; b++) {
        *lo = fmin(*lo, bp->dl[b] - bp->dl_err[b]);
        *hi = fmax(*hi, bp->dl[b] + bp->dl_err[b]);
    }
}

int clef_plot_spectrum_layout(const clef_bandpowers *bp, const clef_plot_spectrum_opts *o,
                              clef_plot_frame *f)
{
    clef_plot_spectrum_opts d = {0};
    if (!o)
        o = &d;
    memset(f, 0, sizeof *f);
    f->width = o->width > 0 ? o->width : DEFAULT_WIDTH;
    f->height = o->height > 0 ? o->height : DEFAULT_HEIGHT;
    CLEF_TRY(plot_check_size("band-power figure", f->width, f->height));
    CLEF_TRY(plot_check_table(bp, "band-power figure", o->log_l));
    if (o->compare)
        CLEF_TRY(plot_check_table(o->compare, "comparison table", o->log_l));
    f->log_x = o->log_l != 0;

    double xlo = INFINITY, xhi = -INFINITY, ylo = 0, yhi = -INFINITY;
    plot_table_x_range(bp, f->log_x, &xlo, &xhi);
    if (o->compare)
        plot_table_x_range(o->compare, f->log_x, &xlo, &xhi);
    plot_table_y_range(bp, &ylo, &yhi);
    if (o->compare)
        plot_table_y_range(o->compare, &ylo, &yhi);
    if (o->theory) {
        /* The theory curve is shown over the data's l range only. */
        for (size_t i = 0; i < o->theory->n; i++) {
            const double l = o->theory->l[i], v = o->theory->dl[i];
            if (!isfinite(l) || !isfinite(v))
                CLEF_FAIL(CLEF_EINVAL, "theory curve: point %zu is not finite (l %g, D %g)", i,
                          l, v);
            if (l >= xlo && l <= xhi) {
                ylo = fmin(ylo, v);
                yhi = fmax(yhi, v);
            }
        }
    }
    if (f->log_x) {
        f->xmin = xlo / 1.15;
        f->xmax = xhi * 1.15;
    } else {
        f->xmin = xlo >= 0 ? 0 : xlo;
        f->xmax = xhi;
        plot_nice_range(&f->xmin, &f->xmax, 6);
    }
    f->ymin = ylo;
    f->ymax = yhi + 0.08 * (yhi - ylo);
    plot_nice_range(&f->ymin, &f->ymax, 5);

    const double fs = font_size(f);
    f->left = 8.0 * fs;
    f->right = f->width - 1.5 * fs;
    f->top = 3.0 * fs;
    f->bottom = f->height - 4.2 * fs;
    if (!(f->right > f->left + 10 && f->bottom > f->top + 10))
        CLEF_FAIL(CLEF_EINVAL, "band-power figure: size %d x %d leaves no room for the plot",
                  f->width, f->height);
    return CLEF_OK;
}

static void set_rgb(cairo_t *cr, plot_rgb c, double alpha)
{
    cairo_set_source_rgba(cr, c.r, c.g, c.b, alpha);
}

void plot_draw_marker(cairo_t *cr, double x, double y, double r, int shape)
{
    switch (shape) {
    case PLOT_MARK_OPEN_SQUARE:
        cairo_rectangle(cr, x - r, y - r, 2 * r, 2 * r);
        cairo_stroke(cr);
        return;
    case PLOT_MARK_SQUARE:
        cairo_rectangle(cr, x - 0.9 * r, y - 0.9 * r, 1.8 * r, 1.8 * r);
        break;
    case PLOT_MARK_TRIANGLE:
        /* Equal area to the disc's: side 2.69 r; centroid at (x, y). */
        cairo_move_to(cr, x, y - 1.55 * r);
        cairo_line_to(cr, x + 1.345 * r, y + 0.78 * r);
        cairo_line_to(cr, x - 1.345 * r, y + 0.78 * r);
        cairo_close_path(cr);
        break;
    case PLOT_MARK_DIAMOND:
        cairo_move_to(cr, x, y - 1.25 * r);
        cairo_line_to(cr, x + 1.25 * r, y);
        cairo_line_to(cr, x, y + 1.25 * r);
        cairo_line_to(cr, x - 1.25 * r, y);
        cairo_close_path(cr);
        break;
    default:
        cairo_new_sub_path(cr);
        cairo_arc(cr, x, y, r, 0, 2 * PLOT_PI);
        break;
    }
    cairo_fill(cr);
}

static void draw_point(cairo_t *cr, double x, double y, double r, int square)
{
    plot_draw_marker(cr, x, y, r, square ? PLOT_MARK_OPEN_SQUARE : PLOT_MARK_DISC);
}

void plot_draw_table(cairo_t *cr, const clef_plot_frame *f, const clef_bandpowers *bp,
                     plot_rgb c, int shape, double shift, int bin_bars, double fs)
{
    const double r = 0.28 * fs, cap = 0.3 * fs;
    set_rgb(cr, c, 1);
    cairo_set_line_width(cr, 0.09 * fs);
    for (int b = 0; b < bp->nbins; b++) {
        const double x = clef_plot_frame_x(f, bp->l_eff[b]) + shift;
        const double y = clef_plot_frame_y(f, bp->dl[b]);
        const double y0 = clef_plot_frame_y(f, bp->dl[b] - bp->dl_err[b]);
        const double y1 = clef_plot_frame_y(f, bp->dl[b] + bp->dl_err[b]);
        if (bp->dl_err[b] > 0) {
            cairo_move_to(cr, x, y0);
            cairo_line_to(cr, x, y1);
            cairo_move_to(cr, x - cap, y0);
            cairo_line_to(cr, x + cap, y0);
            cairo_move_to(cr, x - cap, y1);
            cairo_line_to(cr, x + cap, y1);
        }
        /* The bin's l range as a thin horizontal bar. */
        if (bin_bars && bp->l_hi[b] > bp->l_lo[b] && (!f->log_x || bp->l_lo[b] > 0)) {
            cairo_move_to(cr, clef_plot_frame_x(f, bp->l_lo[b]), y);
            cairo_line_to(cr, clef_plot_frame_x(f, bp->l_hi[b]), y);
        }
        cairo_stroke(cr);
        plot_draw_marker(cr, x, y, r, shape);
    }
}

static void draw_table(cairo_t *cr, const clef_plot_frame *f, const clef_bandpowers *bp,
                       plot_rgb c, int square, double fs)
{
    plot_draw_table(cr, f, bp, c, square ? PLOT_MARK_OPEN_SQUARE : PLOT_MARK_DISC, 0, 1, fs);
}

void plot_draw_curve(cairo_t *cr, const clef_plot_frame *f, const clef_plot_curve *t, double fs)
{
    set_rgb(cr, plot_colour_theory, 1);
    cairo_set_line_width(cr, 0.13 * fs);
    int started = 0;
    for (size_t i = 0; i < t->n; i++) {
        if (f->log_x && !(t->l[i] > 0))
            continue;
        const double x = clef_plot_frame_x(f, t->l[i]), y = clef_plot_frame_y(f, t->dl[i]);
        if (started)
            cairo_line_to(cr, x, y);
        else
            cairo_move_to(cr, x, y);
        started = 1;
    }
    cairo_stroke(cr);
}

/* The shaded 1-sigma band goes under the data; the line itself is drawn
 * last, as its own single-segment path from the bottom to the top of the
 * frame at x(l_peak), so that it can be found in vector output. */
static void draw_peak_band(cairo_t *cr, const clef_plot_frame *f, const clef_peak_result *p)
{
    double lo = p->l_peak - p->l_peak_err, hi = p->l_peak + p->l_peak_err;
    if (f->log_x && lo <= 0)
        lo = f->xmin;
    const double x0 = clef_plot_frame_x(f, lo), x1 = clef_plot_frame_x(f, hi);
    set_rgb(cr, colour_peak, 0.14);
    cairo_rectangle(cr, x0, f->top, x1 - x0, f->bottom - f->top);
    cairo_fill(cr);
}

static void draw_peak_line(cairo_t *cr, const clef_plot_frame *f, const clef_peak_result *p,
                           double fs)
{
    const double x = clef_plot_frame_x(f, p->l_peak);
    set_rgb(cr, colour_peak, 1);
    cairo_set_line_width(cr, 0.12 * fs);
    cairo_move_to(cr, x, f->bottom);
    cairo_line_to(cr, x, f->top);
    cairo_stroke(cr);
}

static int peak_shown(const clef_plot_frame *f, const clef_peak_result *p)
{
    return p && p->found && isfinite(p->l_peak) && isfinite(p->l_peak_err) &&
           p->l_peak > f->xmin && p->l_peak < f->xmax;
}

typedef struct legend_item {
    char text[160];
    int kind;   /* 0 main, 1 compare, 2 theory, 3 peak */
} legend_item;

static void draw_legend(cairo_t *cr, const clef_plot_frame *f, const legend_item *it, int n,
                        double fs)
{
    plot_font(cr, fs, 0);
    double w = 0;
    for (int i = 0; i < n; i++)
        w = fmax(w, plot_text_width(cr, it[i].text));
    const double row = 1.5 * fs, sample = 2.4 * fs, pad = 0.6 * fs;
    const double bw = pad + sample + 0.6 * fs + w + pad, bh = 2 * pad + n * row - 0.5 * fs;
    const double bx = f->right - bw - 0.8 * fs, by = f->top + 0.8 * fs;
    cairo_set_source_rgba(cr, 1, 1, 1, 0.9);
    cairo_rectangle(cr, bx, by, bw, bh);
    cairo_fill_preserve(cr);
    cairo_set_source_rgb(cr, 0.6, 0.6, 0.6);
    cairo_set_line_width(cr, 0.06 * fs);
    cairo_stroke(cr);
    for (int i = 0; i < n; i++) {
        const double cy = by + pad + 0.5 * fs + i * row, sx = bx + pad;
        switch (it[i].kind) {
        case 0:
        case 1:
            set_rgb(cr, it[i].kind ? colour_compare : plot_colour_main, 1);
            cairo_set_line_width(cr, 0.09 * fs);
            cairo_move_to(cr, sx, cy);
            cairo_line_to(cr, sx + sample, cy);
            cairo_stroke(cr);
            draw_point(cr, sx + 0.5 * sample, cy, 0.28 * fs, it[i].kind);
            break;
        case 2:
            set_rgb(cr, plot_colour_theory, 1);
            cairo_set_line_width(cr, 0.13 * fs);
            cairo_move_to(cr, sx, cy);
            cairo_line_to(cr, sx + sample, cy);
            cairo_stroke(cr);
            break;
        default:
            /* A filled swatch, not a line: the only peak-coloured stroke in
             * the figure stays the marker itself. */
            set_rgb(cr, colour_peak, 0.14);
            cairo_rectangle(cr, sx, cy - 0.5 * fs, sample, fs);
            cairo_fill(cr);
            set_rgb(cr, colour_peak, 1);
            cairo_rectangle(cr, sx + 0.5 * sample - 0.06 * fs, cy - 0.5 * fs, 0.12 * fs, fs);
            cairo_fill(cr);
            break;
        }
        cairo_set_source_rgb(cr, 0, 0, 0);
        plot_text(cr, sx + sample + 0.6 * fs, cy, it[i].text, 0, 0.5);
    }
}

static const char *base_name(const char *path)
{
    const char *s = strrchr(path, '/');
    return s ? s + 1 : path;
}

/* Title from the table's metadata: the input maps and mask and the nside,
 * when the table records them; else the table's file name. */
/* First non-empty value among the keys, or NULL. */
static const char *first_meta(const clef_bandpowers *bp, const char *const *keys, size_t nkeys)
{
    for (size_t i = 0; i < nkeys; i++) {
        const char *v = clef_bandpowers_meta_get(bp, keys[i]);
        if (v && *v)
            return v;
    }
    return NULL;
}

#define FIRST_META(bp, keys) first_meta((bp), (keys), sizeof(keys) / sizeof *(keys))

static void make_title(const clef_bandpowers *bp, const clef_plot_spectrum_opts *o, char *buf,
                       size_t n)
{
    if (o->title) {
        snprintf(buf, n, "%s", o->title);
        return;
    }
    /* `clef spectrum` records MAP1, MAP2, MASK1, MASK2 and NSIDE; the
     * MAPFILE spelling of docs/formats.md and plain MAP/MASK are accepted
     * for tables assembled by hand. */
    static const char *const map_keys[] = {"MAP1", "MAPFILE", "MAPFILE1", "MAP"};
    static const char *const map2_keys[] = {"MAP2", "MAPFILE2"};
    static const char *const mask_keys[] = {"MASK1", "MASK", "MASKFILE"};
    static const char *const mask2_keys[] = {"MASK2"};
    const char *map = FIRST_META(bp, map_keys), *map2 = FIRST_META(bp, map2_keys);
    const char *mask = FIRST_META(bp, mask_keys), *mask2 = FIRST_META(bp, mask2_keys);
    const char *nside = clef_bandpowers_meta_get(bp, "NSIDE");
    if (mask && mask2 && !strcmp(mask, mask2))
        mask2 = NULL;
    size_t k = 0;
    buf[0] = '\0';
    if (map) {
        k += snprintf(buf + k, n - k, "%s", base_name(map));
        if (map2 && k < n)
            k += snprintf(buf + k, n - k, " \xc3\x97 %s", base_name(map2));
    } else {
        k += snprintf(buf + k, n - k, "%s", o->source ? base_name(o->source) : "band powers");
    }
    if (mask && k < n)
        k += snprintf(buf + k, n - k, ", mask %s", base_name(mask));
    if (mask2 && k < n)
        k += snprintf(buf + k, n - k, " / %s", base_name(mask2));
    if (nside && k < n)
        snprintf(buf + k, n - k, ", nside %s", nside);
}

int clef_plot_spectrum(const clef_bandpowers *bp, const clef_plot_spectrum_opts *o,
                       const char *path)
{
    clef_plot_spectrum_opts d = {0};
    if (!o)
        o = &d;
    clef_plot_frame f;
    CLEF_TRY(clef_plot_spectrum_layout(bp, o, &f));
    plot_canvas c;
    CLEF_TRY(plot_canvas_open(&c, path, f.width, f.height, 0));
    cairo_t *cr = c.cr;
    const double fs = font_size(&f);
    const int peak = peak_shown(&f, o->peak);

    plot_draw_axes(cr, &f, "multipole \xe2\x84\x93",
                   "D\xe2\x84\x93 = \xe2\x84\x93(\xe2\x84\x93+1) C\xe2\x84\x93 / 2\xcf\x80  "
                   "[\xc2\xb5K\xc2\xb2]",
                   fs);
    cairo_save(cr);
    cairo_rectangle(cr, f.left, f.top, f.right - f.left, f.bottom - f.top);
    cairo_clip(cr);
    if (peak)
        draw_peak_band(cr, &f, o->peak);
    if (o->theory && o->theory->n > 1)
        plot_draw_curve(cr, &f, o->theory, fs);
    if (o->compare)
        draw_table(cr, &f, o->compare, colour_compare, 1, fs);
    draw_table(cr, &f, bp, plot_colour_main, 0, fs);
    cairo_restore(cr);
    if (peak)
        draw_peak_line(cr, &f, o->peak, fs);

    legend_item items[4];
    int n = 0;
    snprintf(items[n].text, sizeof items[n].text, "%s", o->label ? o->label : "band powers");
    items[n++].kind = 0;
    if (o->compare) {
        snprintf(items[n].text, sizeof items[n].text, "%s",
                 o->compare_label ? o->compare_label : "comparison");
        items[n++].kind = 1;
    }
    if (o->theory && o->theory->n > 1) {
        snprintf(items[n].text, sizeof items[n].text, "%s",
                 o->theory->label ? o->theory->label : "theory");
        items[n++].kind = 2;
    }
    if (peak) {
        snprintf(items[n].text, sizeof items[n].text, "first peak \xe2\x84\x93 = %.1f \xc2\xb1 %.1f",
                 o->peak->l_peak, o->peak->l_peak_err);
        items[n++].kind = 3;
    }
    draw_legend(cr, &f, items, n, fs);

    char title[512];
    make_title(bp, o, title, sizeof title);
    cairo_set_source_rgb(cr, 0, 0, 0);
    plot_font(cr, 1.2 * fs, 1);
    plot_text(cr, 0.5 * (f.left + f.right), 1.5 * fs, title, 0.5, 0.5);
    return plot_canvas_close(&c);
}
