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

/* Colour scales of our own, constructed in CIELAB (CIE 15:2004, D65 white)
 * and shown in sRGB (IEC 61966-2-1).  Each scale is made of quadratic
 * Bezier curves in L*a*b*, traversed at constant speed in the CIE 1976
 * colour difference Delta E*ab: equal steps in value give equal colour
 * steps along the scale (docs/figures.md lists the measured properties).
 *
 * Diverging ("dusk-to-brass"): a neutral near-white centre at L* = 97 for
 * zero; the negative arm runs to a deep violet (h_ab = 305 deg), the
 * positive arm to a dark brass (h_ab = 80 deg), both ending at L* = 22 and
 * both 110.6 Delta E*ab long, so +v and -v stand out equally; L* falls
 * monotonically from the centre to each end.  The two hues lie on the
 * blue-yellow opponent axis, which red-green colour-vision deficiency
 * preserves.  Sequential ("tide"): one curve from a dark indigo (L* 16)
 * through teal to a pale cream (L* 94), L* increasing throughout. */
typedef struct lab_arm {
    double p[3][3]; /* Bezier control points: L*, a*, b* */
} lab_arm;

static void lch_point(double L, double c, double h_deg, double out[3])
{
    const double h = h_deg * PLOT_PI / 180.0;
    out[0] = L;
    out[1] = c * cos(h);
    out[2] = c * sin(h);
}

/* The two diverging arms (centre -> end) and the sequential curve. */
static void scale_arms(int scale, lab_arm *arm, int *narms)
{
    memset(arm, 0, 2 * sizeof *arm);
    if (scale == CLEF_PLOT_SCALE_DIVERGING) {
        *narms = 2;
        lch_point(97, 0, 0, arm[0].p[0]);          /* negative arm: violet */
        lch_point(50, 90, 305, arm[0].p[1]);
        lch_point(22, 45, 305, arm[0].p[2]);
        lch_point(97, 0, 0, arm[1].p[0]);          /* positive arm: brass */
        lch_point(62, 84.883, 80, arm[1].p[1]);    /* chroma set for equal length */
        lch_point(22, 28, 80, arm[1].p[2]);
    } else {
        *narms = 1;
        lch_point(16, 30, 300, arm[0].p[0]);
        lch_point(55, 50, 200, arm[0].p[1]);
        lch_point(94, 16, 88, arm[0].p[2]);
    }
}

static void bezier(const lab_arm *a, double s, double out[3])
{
    const double u = 1 - s;
    for (int k = 0; k < 3; k++)
        out[k] = u * u * a->p[0][k] + 2 * s * u * a->p[1][k] + s * s * a->p[2][k];
}

/* CIELAB -> XYZ (CIE 15:2004 eq. 8.4, D65 white X_n = 0.95047, Z_n =
 * 1.08883) -> linear sRGB (IEC 61966-2-1 matrix) -> gamma-encoded sRGB,
 * clipped to [0, 1] (the curves are chosen inside the gamut). */
static plot_rgb lab_to_srgb(const double lab[3])
{
    const double d = 6.0 / 29.0;
    const double fy = (lab[0] + 16) / 116, fx = fy + lab[1] / 500, fz = fy - lab[2] / 200;
    const double f[3] = {fx, fy, fz}, white[3] = {0.95047, 1.0, 1.08883};
    double xyz[3];
    for (int k = 0; k < 3; k++)
        xyz[k] = white[k] * (f[k] > d ? f[k] * f[k] * f[k] : 3 * d * d * (f[k] - 4.0 / 29.0));
    static const double m[3][3] = {{3.2406, -1.5372, -0.4986},
                                   {-0.9689, 1.8758, 0.0415},
                                   {0.0557, -0.2040, 1.0570}};
    double c[3];
    for (int i = 0; i < 3; i++) {
        double v = m[i][0] * xyz[0] + m[i][1] * xyz[1] + m[i][2] * xyz[2];
        v = v < 0 ? 0 : v > 1 ? 1 : v;
        c[i] = v <= 0.0031308 ? 12.92 * v : 1.055 * pow(v, 1 / 2.4) - 0.055;
    }
    plot_rgb out = {c[0], c[1], c[2]};
    return out;
}

/* Fill n entries along one arm at equal Delta E*ab spacing: the curve is
 * sampled finely, its arc length accumulated, and inverted linearly. */
#define ARC_SAMPLES 2048
static void arm_table(const lab_arm *a, plot_rgb *out, int n)
{
    double len[ARC_SAMPLES + 1], prev[3], cur[3];
    bezier(a, 0, prev);
    len[0] = 0;
    for (int i = 1; i <= ARC_SAMPLES; i++) {
        bezier(a, (double)i / ARC_SAMPLES, cur);
        const double dl = cur[0] - prev[0], da = cur[1] - prev[1], db = cur[2] - prev[2];
        len[i] = len[i - 1] + sqrt(dl * dl + da * da + db * db);
        memcpy(prev, cur, sizeof prev);
    }
    int i = 0;
    for (int k = 0; k < n; k++) {
        const double target = len[ARC_SAMPLES] * k / (n - 1);
        while (i < ARC_SAMPLES - 1 && len[i + 1] < target)
            i++;
        const double span = len[i + 1] - len[i];
        const double u = span > 0 ? (target - len[i]) / span : 0;
        bezier(a, (i + (u < 0 ? 0 : u > 1 ? 1 : u)) / ARC_SAMPLES, cur);
        out[k] = lab_to_srgb(cur);
    }
}

void plot_scale_build(int scale, plot_scale *s)
{
    lab_arm arm[2];
    int narms;
    scale_arms(scale, arm, &narms);
    if (narms == 2) {
        /* Entry 0 is the negative end, PLOT_SCALE_N / 2 the centre. */
        const int h = PLOT_SCALE_N / 2 + 1;
        plot_rgb neg[PLOT_SCALE_N / 2 + 1];
        arm_table(&arm[0], neg, h);
        for (int k = 0; k < h; k++)
            s->c[k] = neg[h - 1 - k];
        arm_table(&arm[1], s->c + h - 1, h);
    } else {
        arm_table(&arm[0], s->c, PLOT_SCALE_N);
    }
}

plot_rgb plot_scale_colour(const plot_scale *s, double t)
{
    if (!(t > 0))
        t = 0;
    if (t > 1)
        t = 1;
    const double x = t * (PLOT_SCALE_N - 1);
    int i = (int)x;
    if (i > PLOT_SCALE_N - 2)
        i = PLOT_SCALE_N - 2;
    const double u = x - i;
    const plot_rgb a = s->c[i], b = s->c[i + 1];
    plot_rgb c = {a.r + u * (b.r - a.r), a.g + u * (b.g - a.g), a.b + u * (b.b - a.b)};
    return c;
}

int clef_plot_scale_rgb(int scale, double t, double rgb[3])
{
    if (scale != CLEF_PLOT_SCALE_DIVERGING && scale != CLEF_PLOT_SCALE_SEQUENTIAL)
        CLEF_FAIL(CLEF_EINVAL, "colour scale %d is neither diverging nor sequential", scale);
    if (!rgb || !isfinite(t))
        CLEF_FAIL(CLEF_EINVAL, "colour scale: no output or t not finite");
    plot_scale s;
    plot_scale_build(scale, &s);
    const plot_rgb c = plot_scale_colour(&s, t);
    rgb[0] = c.r;
    rgb[1] = c.g;
    rgb[2] = c.b;
    return CLEF_OK;
}

plot_rgb plot_series_colour(int k, int n)
{
    double lab[3];
    /* An odd count spaces the hues for n + 1, so that the last set (of the
     * lightness of the first) is two steps round the circle from it. */
    const double h = 20.0 + 360.0 * k / (n > 0 ? n + n % 2 : 1);
    lch_point(k % 2 ? 62 : 42, 52, fmod(h, 360.0), lab);
    return lab_to_srgb(lab);
}

/* Missing pixels: light grey hatched with a darker grey, so that they are
 * told apart from the scale's near-white centre and from any value. */
const plot_rgb plot_missing_light = {0.80, 0.80, 0.80};
const plot_rgb plot_missing_dark = {0.56, 0.56, 0.56};
