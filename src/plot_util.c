/* Shared drawing helpers of the plot module: canvases written atomically,
 * ticks, text, axes and colour scales. */
#include <errno.h>
#include <cairo-pdf.h>
#include <cairo-svg.h>
#include <math.h>
#include <stdio.h>
#include <string.h>

#include "core_impl.h"
#include "plot_impl.h"

int plot_check_size(const char *what, int width, int height)
{
    if (width < PLOT_SIZE_MIN || width > PLOT_SIZE_MAX || height < PLOT_SIZE_MIN ||
        height > PLOT_SIZE_MAX)
        CLEF_FAIL(CLEF_EINVAL, "%s: figure size %d x %d outside %d..%d", what, width, height,
                  PLOT_SIZE_MIN, PLOT_SIZE_MAX);
    return CLEF_OK;
}

static int cairo_fail(const char *path, cairo_status_t st)
{
    return clef_fail(st == CAIRO_STATUS_NO_MEMORY ? CLEF_ENOMEM : CLEF_EIO,
                     "figure '%s': cairo: %s", path, cairo_status_to_string(st));
}

int plot_canvas_open(plot_canvas *c, const char *path, int width, int height, int transparent)
{
    memset(c, 0, sizeof *c);
    CLEF_TRY(clef_plot_format_from_path(path, &c->format));
    CLEF_TRY(clef_outfile_begin(&c->out, path));
    c->width = width;
    c->height = height;
    switch (c->format) {
    case CLEF_PLOT_PNG:
        c->surface = cairo_image_surface_create(CAIRO_FORMAT_ARGB32, width, height);
        break;
    case CLEF_PLOT_SVG:
        c->surface = cairo_svg_surface_create(c->out.tmp_path, width, height);
        break;
    default:
        c->surface = cairo_pdf_surface_create(c->out.tmp_path, width, height);
        break;
    }
    cairo_status_t st = cairo_surface_status(c->surface);
    if (st == CAIRO_STATUS_SUCCESS) {
        c->cr = cairo_create(c->surface);
        st = cairo_status(c->cr);
    }
    if (st != CAIRO_STATUS_SUCCESS) {
        plot_canvas_abort(c);
        return cairo_fail(path, st);
    }
    if (!transparent) {
        cairo_set_source_rgb(c->cr, 1, 1, 1);
        cairo_paint(c->cr);
    }
    cairo_set_line_join(c->cr, CAIRO_LINE_JOIN_ROUND);
    return CLEF_OK;
}

void plot_canvas_abort(plot_canvas *c)
{
    if (c->cr)
        cairo_destroy(c->cr);
    if (c->surface) {
        cairo_surface_finish(c->surface);
        cairo_surface_destroy(c->surface);
    }
    c->cr = NULL;
    c->surface = NULL;
    clef_outfile_abort(&c->out);
}

int plot_canvas_close(plot_canvas *c)
{
    cairo_status_t st = cairo_status(c->cr);
    cairo_destroy(c->cr);
    c->cr = NULL;
    if (st == CAIRO_STATUS_SUCCESS) {
        if (c->format == CLEF_PLOT_PNG)
            st = cairo_surface_write_to_png(c->surface, c->out.tmp_path);
        else {
            /* Vector surfaces write the file as they go; finishing flushes it. */
            cairo_surface_finish(c->surface);
            st = cairo_surface_status(c->surface);
        }
    }
    if (st != CAIRO_STATUS_SUCCESS) {
        char why[256];
        clef_write_reason(c->out.path, errno, why, sizeof why);
        plot_canvas_abort(c);
        if (st == CAIRO_STATUS_WRITE_ERROR && *why)
            return clef_fail(CLEF_EIO, "cannot write '%s': %s", c->out.path, why);
        return cairo_fail(c->out.path, st);
    }
    cairo_surface_destroy(c->surface);
    c->surface = NULL;
    return clef_outfile_commit(&c->out);
}

/* "Nice numbers for graph labels": Heckbert, in Graphics Gems (1990),
 * pp. 61-63.  The step is 1, 2, 5 or 10 times a power of ten. */
static double nice_number(double x, int round_it)
{
    const double e = floor(log10(x));
    const double f = x / pow(10.0, e);
    double nf;
    if (round_it)
        nf = f < 1.5 ? 1 : f < 3 ? 2 : f < 7 ? 5 : 10;
    else
        nf = f <= 1 ? 1 : f <= 2 ? 2 : f <= 5 ? 5 : 10;
    return nf * pow(10.0, e);
}

static double nice_step(double lo, double hi, int target)
{
    double span = hi - lo;
    if (!(span > 0))
        span = fabs(lo) > 0 ? fabs(lo) : 1.0;
    return nice_number(nice_number(span, 0) / (target > 1 ? target : 1), 1);
}

double plot_nice_range(double *lo, double *hi, int target)
{
    if (!(*hi > *lo)) {
        const double pad = fabs(*lo) > 0 ? 0.1 * fabs(*lo) : 1.0;
        *lo -= pad;
        *hi += pad;
    }
    const double step = nice_step(*lo, *hi, target);
    *lo = floor(*lo / step + 1e-9) * step;
    *hi = ceil(*hi / step - 1e-9) * step;
    return step;
}

int plot_ticks_linear(double lo, double hi, int target, double *ticks, double *step)
{
    *step = nice_step(lo, hi, target);
    const double first = ceil(lo / *step - 1e-9) * *step;
    int n = 0;
    for (double v = first; v <= hi + 1e-9 * *step && n < PLOT_MAX_TICKS; v = first + n * *step) {
        /* Snap rounding noise so that 0 prints as "0", not "-1e-17". */
        ticks[n++] = fabs(v) < 1e-9 * *step ? 0.0 : v;
    }
    return n;
}

int plot_ticks_log(double lo, double hi, double *ticks)
{
    const int d0 = (int)floor(log10(lo)), d1 = (int)ceil(log10(hi));
    static const double all[] = {1, 2, 5};
    const int nmult = log10(hi / lo) < 3.5 ? 3 : 1;
    int n = 0;
    for (int d = d0; d <= d1; d++)
        for (int k = 0; k < nmult && n < PLOT_MAX_TICKS; k++) {
            const double v = all[k] * pow(10.0, d);
            if (v >= lo * (1 - 1e-9) && v <= hi * (1 + 1e-9))
                ticks[n++] = v;
        }
    return n;
}

void plot_format_tick(double v, double step, char *buf, size_t n)
{
    const double mag = fabs(v) > fabs(step) ? fabs(v) : fabs(step);
    if (mag >= 1e6 || (mag > 0 && mag < 1e-4)) {
        snprintf(buf, n, "%g", v);
        return;
    }
    int dec = step > 0 ? (int)ceil(-log10(step) - 1e-9) : 0;
    if (dec < 0)
        dec = 0;
    if (dec > 8)
        dec = 8;
    snprintf(buf, n, "%.*f", dec, v);
}

void plot_font(cairo_t *cr, double size, int bold)
{
    cairo_select_font_face(cr, "sans-serif", CAIRO_FONT_SLANT_NORMAL,
                           bold ? CAIRO_FONT_WEIGHT_BOLD : CAIRO_FONT_WEIGHT_NORMAL);
    cairo_set_font_size(cr, size);
}

double plot_text_width(cairo_t *cr, const char *s)
{
    cairo_text_extents_t te;
    cairo_text_extents(cr, s, &te);
    return te.x_advance;
}

void plot_text(cairo_t *cr, double x, double y, const char *s, double ha, double va)
{
    cairo_text_extents_t te;
    cairo_font_extents_t fe;
    cairo_text_extents(cr, s, &te);
    cairo_font_extents(cr, &fe);
    /* Anchor on the capital height (about 3/4 of the font ascent), so that
     * labels with and without descenders line up. */
    const double cap = 0.75 * fe.ascent;
    cairo_move_to(cr, x - ha * te.x_advance, y + (1 - va) * cap);
    cairo_show_text(cr, s);
}

void plot_text_vertical(cairo_t *cr, double x, double y, const char *s)
{
    cairo_save(cr);
    cairo_translate(cr, x, y);
    cairo_rotate(cr, -PLOT_PI / 2);
    plot_text(cr, 0, 0, s, 0.5, 0.5);
    cairo_restore(cr);
}

void plot_draw_axes(cairo_t *cr, const clef_plot_frame *f, const char *xlabel,
                    const char *ylabel, double font)
{
    double xt[PLOT_MAX_TICKS], yt[PLOT_MAX_TICKS], xstep = 0, ystep;
    const int nx = f->log_x ? plot_ticks_log(f->xmin, f->xmax, xt)
                            : plot_ticks_linear(f->xmin, f->xmax, 6, xt, &xstep);
    const int ny = plot_ticks_linear(f->ymin, f->ymax, 5, yt, &ystep);
    const double tick = 0.6 * font;
    char buf[64];

    cairo_save(cr);
    cairo_set_line_width(cr, 0.08 * font);
    cairo_set_source_rgb(cr, 0.88, 0.88, 0.88);
    for (int i = 0; i < nx; i++) {
        const double x = clef_plot_frame_x(f, xt[i]);
        cairo_move_to(cr, x, f->top);
        cairo_line_to(cr, x, f->bottom);
    }
    for (int i = 0; i < ny; i++) {
        const double y = clef_plot_frame_y(f, yt[i]);
        cairo_move_to(cr, f->left, y);
        cairo_line_to(cr, f->right, y);
    }
    cairo_stroke(cr);

    cairo_set_source_rgb(cr, 0, 0, 0);
    cairo_set_line_width(cr, 0.1 * font);
    cairo_rectangle(cr, f->left, f->top, f->right - f->left, f->bottom - f->top);
    cairo_stroke(cr);
    plot_font(cr, font, 0);
    for (int i = 0; i < nx; i++) {
        const double x = clef_plot_frame_x(f, xt[i]);
        cairo_move_to(cr, x, f->bottom);
        cairo_line_to(cr, x, f->bottom + tick);
        cairo_stroke(cr);
        if (f->log_x)
            snprintf(buf, sizeof buf, "%g", xt[i]);
        else
            plot_format_tick(xt[i], xstep, buf, sizeof buf);
        plot_text(cr, x, f->bottom + tick + 0.2 * font, buf, 0.5, 0);
    }
    for (int i = 0; i < ny; i++) {
        const double y = clef_plot_frame_y(f, yt[i]);
        cairo_move_to(cr, f->left - tick, y);
        cairo_line_to(cr, f->left, y);
        cairo_stroke(cr);
        plot_format_tick(yt[i], ystep, buf, sizeof buf);
        plot_text(cr, f->left - tick - 0.3 * font, y, buf, 1, 0.5);
    }
    plot_font(cr, 1.1 * font, 0);
    plot_text(cr, 0.5 * (f->left + f->right), f->bottom + tick + 1.6 * font, xlabel, 0.5, 0);
    plot_text_vertical(cr, f->left - tick - 4.2 * font, 0.5 * (f->top + f->bottom), ylabel);
    cairo_restore(cr);
}

/* Our colour stops.  Diverging: deep blue through a warm off-white at the
 * centre (zero) to dark red, light enough in the middle that small values
 * recede; sequential: dark navy through teal and green to pale yellow,
 * monotonic in lightness so that a mask's 0 reads dark and 1 light. */
typedef struct colour_stop {
    double t, r, g, b;
} colour_stop;

static const colour_stop diverging[] = {
    {0.00, 0.12, 0.19, 0.48}, {0.22, 0.27, 0.49, 0.76}, {0.50, 0.96, 0.95, 0.92},
    {0.78, 0.91, 0.52, 0.25}, {1.00, 0.52, 0.06, 0.09},
};
static const colour_stop sequential[] = {
    {0.00, 0.07, 0.08, 0.22}, {0.33, 0.16, 0.36, 0.53}, {0.66, 0.36, 0.69, 0.53},
    {1.00, 0.98, 0.93, 0.55},
};
const plot_rgb plot_missing_grey = {0.62, 0.62, 0.62};

static plot_rgb interpolate(const colour_stop *s, int n, double t)
{
    if (!(t > 0))
        t = 0;
    if (t > 1)
        t = 1;
    int i = 0;
    while (i < n - 2 && t > s[i + 1].t)
        i++;
    const double u = (t - s[i].t) / (s[i + 1].t - s[i].t);
    plot_rgb c = {s[i].r + u * (s[i + 1].r - s[i].r), s[i].g + u * (s[i + 1].g - s[i].g),
                  s[i].b + u * (s[i + 1].b - s[i].b)};
    return c;
}

plot_rgb plot_scale_diverging(double t)
{
    return interpolate(diverging, (int)(sizeof diverging / sizeof *diverging), t);
}

plot_rgb plot_scale_sequential(double t)
{
    return interpolate(sequential, (int)(sizeof sequential / sizeof *sequential), t);
}
