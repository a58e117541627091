/* Curvature figure: the posterior of Omega_k from `clef geometry --json`,
 * with the 68% and 95% intervals shaded, the best value and the flat
 * universe (Omega_k = 0) marked. */
#include <cjson/cJSON.h>
#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "core_impl.h"
#include "plot_impl.h"

#define DEFAULT_WIDTH 800
#define DEFAULT_HEIGHT 500

static const plot_rgb colour_curve = {0.10, 0.22, 0.55};
static const plot_rgb colour_best = {0.80, 0.10, 0.45};

static int read_file(const char *path, char **text)
{
    *text = NULL;
    FILE *fp = fopen(path, "rb");
    if (!fp)
        CLEF_FAIL(CLEF_EIO, "cannot open geometry file '%s': %s", path, strerror(errno));
    size_t cap = 1 << 16, n = 0;
    char *buf = malloc(cap);
    while (buf) {
        n += fread(buf + n, 1, cap - n - 1, fp);
        if (n < cap - 1)
            break;
        char *nb = realloc(buf, 2 * cap);
        if (!nb) {
            free(buf);
            buf = NULL;
            break;
        }
        buf = nb;
        cap *= 2;
    }
    const int err = ferror(fp);
    fclose(fp);
    if (!buf)
        CLEF_FAIL(CLEF_ENOMEM, "geometry file '%s': no memory to read it", path);
    if (err) {
        free(buf);
        CLEF_FAIL(CLEF_EIO, "cannot read geometry file '%s'", path);
    }
    buf[n] = '\0';
    *text = buf;
    return CLEF_OK;
}

static int get_number(const cJSON *obj, const char *key, const char *path, const char *where,
                      double *out)
{
    const cJSON *it = cJSON_GetObjectItemCaseSensitive(obj, key);
    if (!cJSON_IsNumber(it))
        CLEF_FAIL(CLEF_EFORMAT, "geometry file '%s': %s\"%s\" is missing or not a number", path,
                  where, key);
    *out = it->valuedouble;
    return CLEF_OK;
}

static double optional_number(const cJSON *obj, const char *key)
{
    const cJSON *it = cJSON_GetObjectItemCaseSensitive(obj, key);
    return cJSON_IsNumber(it) ? it->valuedouble : NAN;
}

static int get_array(const cJSON *curve, const char *key, const char *path, size_t n,
                     double *out)
{
    const cJSON *a = cJSON_GetObjectItemCaseSensitive(curve, key);
    size_t i = 0;
    const cJSON *it;
    cJSON_ArrayForEach(it, a)
    {
        if (!cJSON_IsNumber(it))
            CLEF_FAIL(CLEF_EFORMAT, "geometry file '%s': curve.%s[%zu] is not a number", path,
                      key, i);
        if (i < n)
            out[i] = it->valuedouble;
        i++;
    }
    return CLEF_OK;
}

static int parse(clef_plot_geometry *g, const cJSON *root, const char *path)
{
    const cJSON *ok = cJSON_GetObjectItemCaseSensitive(root, "omega_k");
    if (!cJSON_IsObject(ok))
        CLEF_FAIL(CLEF_EFORMAT, "geometry file '%s': object \"omega_k\" is missing", path);
    CLEF_TRY(get_number(ok, "best", path, "omega_k.", &g->best));
    CLEF_TRY(get_number(ok, "lo68", path, "omega_k.", &g->lo68));
    CLEF_TRY(get_number(ok, "hi68", path, "omega_k.", &g->hi68));
    CLEF_TRY(get_number(ok, "lo95", path, "omega_k.", &g->lo95));
    CLEF_TRY(get_number(ok, "hi95", path, "omega_k.", &g->hi95));
    const cJSON *cls = cJSON_GetObjectItemCaseSensitive(root, "classification");
    if (cJSON_IsString(cls))
        snprintf(g->classification, sizeof g->classification, "%s", cls->valuestring);
    g->acoustic_scale_deg = optional_number(root, "acoustic_scale_deg");
    g->l_peak = optional_number(root, "l_peak");
    g->l_peak_err = optional_number(root, "l_peak_err");

    const cJSON *curve = cJSON_GetObjectItemCaseSensitive(root, "curve");
    const cJSON *x = cJSON_GetObjectItemCaseSensitive(curve, "omega_k");
    const cJSON *y = cJSON_GetObjectItemCaseSensitive(curve, "posterior");
    if (!cJSON_IsObject(curve) || !cJSON_IsArray(x) || !cJSON_IsArray(y))
        CLEF_FAIL(CLEF_EFORMAT,
                  "geometry file '%s': \"curve\" with arrays \"omega_k\" and \"posterior\" is "
                  "missing", path);
    const int nx = cJSON_GetArraySize(x), ny = cJSON_GetArraySize(y);
    if (nx != ny || nx < 2)
        CLEF_FAIL(CLEF_EFORMAT,
                  "geometry file '%s': curve.omega_k has %d values and curve.posterior %d "
                  "(need equal lengths of at least 2)", path, nx, ny);
    g->n = (size_t)nx;
    g->omega_k = malloc(g->n * sizeof *g->omega_k);
    g->posterior = malloc(g->n * sizeof *g->posterior);
    if (!g->omega_k || !g->posterior)
        CLEF_FAIL(CLEF_ENOMEM, "geometry file '%s': no memory for %zu curve points", path, g->n);
    CLEF_TRY(get_array(curve, "omega_k", path, g->n, g->omega_k));
    CLEF_TRY(get_array(curve, "posterior", path, g->n, g->posterior));
    return CLEF_OK;
}

int clef_plot_geometry_read(clef_plot_geometry **out, const char *path)
{
    *out = NULL;
    char *text;
    CLEF_TRY(read_file(path, &text));
    cJSON *root = cJSON_Parse(text);
    free(text);
    if (!root)
        CLEF_FAIL(CLEF_EFORMAT, "geometry file '%s' is not valid JSON", path);
    clef_plot_geometry *g = calloc(1, sizeof *g);
    int status;
    if (!g) {
        status = clef_fail(CLEF_ENOMEM, "geometry file '%s': no memory", path);
        goto fail;
    }
    CLEF_CHECK(parse(g, root, path));
    cJSON_Delete(root);
    *out = g;
    return CLEF_OK;
fail:
    cJSON_Delete(root);
    clef_plot_geometry_free(g);
    return status;
}

void clef_plot_geometry_free(clef_plot_geometry *g)
{
    if (!g)
        return;
    free(g->omega_k);
    free(g->posterior);
    free(g);
}

static double font_size(const clef_plot_frame *f)
{
    const double s = 0.024 * (f->height < f->width ? f->height : f->width * 0.75);
    return s < 7 ? 7 : s;
}

/* Posterior values below this fraction of the peak are not worth the
 * width of the figure: the x range covers where the curve is above it. */
#define SHOWN_FRACTION 1e-3

/* The x axis shows Omega_k, or Omega_total = 1 - Omega_k (flat at 1). */
static double axis_value(const clef_plot_curvature_opts *o, double omega_k)
{
    return o->omega_total ? 1.0 - omega_k : omega_k;
}

static int check_geometry(const clef_plot_geometry *g, double *ymax)
{
    if (!g || g->n < 2 || !g->omega_k || !g->posterior)
        CLEF_FAIL(CLEF_EINVAL, "curvature figure: the posterior curve has fewer than 2 points");
    *ymax = 0;
    for (size_t i = 0; i < g->n; i++) {
        if (!isfinite(g->omega_k[i]) || !isfinite(g->posterior[i]) || g->posterior[i] < 0)
            CLEF_FAIL(CLEF_EINVAL, "curvature figure: curve point %zu (Omega_k %g, posterior %g) "
                      "is not finite or negative", i, g->omega_k[i], g->posterior[i]);
        if (i > 0 && !(g->omega_k[i] > g->omega_k[i - 1]))
            CLEF_FAIL(CLEF_EINVAL, "curvature figure: Omega_k grid not increasing at point %zu "
                      "(%g after %g)", i, g->omega_k[i], g->omega_k[i - 1]);
        *ymax = fmax(*ymax, g->posterior[i]);
    }
    const double vals[] = {g->best, g->lo68, g->hi68, g->lo95, g->hi95};
    for (size_t i = 0; i < sizeof vals / sizeof *vals; i++)
        if (!isfinite(vals[i]))
            CLEF_FAIL(CLEF_EINVAL, "curvature figure: Omega_k summary value %zu is not finite", i);
    return CLEF_OK;
}

int clef_plot_curvature_layout(const clef_plot_geometry *g, const clef_plot_curvature_opts *o,
                               clef_plot_frame *f)
{
    clef_plot_curvature_opts d = {0};
    if (!o)
        o = &d;
    memset(f, 0, sizeof *f);
    f->width = o->width > 0 ? o->width : DEFAULT_WIDTH;
    f->height = o->height > 0 ? o->height : DEFAULT_HEIGHT;
    CLEF_TRY(plot_check_size("curvature figure", f->width, f->height));
    double ymax = 0;
    CLEF_TRY(check_geometry(g, &ymax));
    /* Where the posterior matters, the intervals and the flat value. */
    double lo = fmin(g->lo95, 0.0), hi = fmax(g->hi95, 0.0);
    for (size_t i = 0; i < g->n; i++)
        if (g->posterior[i] > SHOWN_FRACTION * ymax) {
            lo = fmin(lo, g->omega_k[i]);
            hi = fmax(hi, g->omega_k[i]);
        }
    const double pad = 0.08 * (hi - lo);
    lo = fmax(lo - pad, g->omega_k[0]);
    hi = fmin(hi + pad, g->omega_k[g->n - 1]);
    lo = fmin(lo, 0.0);
    hi = fmax(hi, 0.0);
    f->xmin = fmin(axis_value(o, lo), axis_value(o, hi));
    f->xmax = fmax(axis_value(o, lo), axis_value(o, hi));
    plot_nice_range(&f->xmin, &f->xmax, 6);
    f->ymin = 0;
    f->ymax = ymax > 0 ? 1.1 * ymax : 1;
    plot_nice_range(&f->ymin, &f->ymax, 5);
    const double fs = font_size(f);
    f->left = 6.5 * fs;
    f->right = f->width - 1.5 * fs;
    f->top = 3.0 * fs;
    f->bottom = f->height - 4.2 * fs;
    if (!(f->right > f->left + 10 && f->bottom > f->top + 10))
        CLEF_FAIL(CLEF_EINVAL, "curvature figure: size %d x %d leaves no room for the plot",
                  f->width, f->height);
    return CLEF_OK;
}

/* Posterior at Omega_k = x by linear interpolation on the grid (0 outside). */
static double posterior_at(const clef_plot_geometry *g, double x)
{
    if (x < g->omega_k[0] || x > g->omega_k[g->n - 1])
        return 0;
    size_t i = 1;
    while (i < g->n - 1 && g->omega_k[i] < x)
        i++;
    const double u = (x - g->omega_k[i - 1]) / (g->omega_k[i] - g->omega_k[i - 1]);
    return g->posterior[i - 1] + u * (g->posterior[i] - g->posterior[i - 1]);
}

typedef struct curv_ctx {
    cairo_t *cr;
    const clef_plot_frame *f;
    const clef_plot_geometry *g;
    const clef_plot_curvature_opts *o;
    double fs;
} curv_ctx;

/* Device x of an Omega_k value. */
static double dev_x(const curv_ctx *c, double omega_k)
{
    return clef_plot_frame_x(c->f, axis_value(c->o, omega_k));
}

/* Fill the area under the curve for Omega_k between lo and hi. */
static void shade(const curv_ctx *c, double lo, double hi)
{
    if (!(hi > lo))
        return;
    cairo_t *cr = c->cr;
    const clef_plot_frame *f = c->f;
    cairo_move_to(cr, dev_x(c, lo), clef_plot_frame_y(f, 0));
    cairo_line_to(cr, dev_x(c, lo), clef_plot_frame_y(f, posterior_at(c->g, lo)));
    for (size_t i = 0; i < c->g->n; i++)
        if (c->g->omega_k[i] > lo && c->g->omega_k[i] < hi)
            cairo_line_to(cr, dev_x(c, c->g->omega_k[i]), clef_plot_frame_y(f, c->g->posterior[i]));
    cairo_line_to(cr, dev_x(c, hi), clef_plot_frame_y(f, posterior_at(c->g, hi)));
    cairo_line_to(cr, dev_x(c, hi), clef_plot_frame_y(f, 0));
    cairo_close_path(cr);
    cairo_fill(cr);
}

/* A vertical line over the frame at Omega_k = v. */
static void vline(const curv_ctx *c, double v)
{
    cairo_move_to(c->cr, dev_x(c, v), c->f->bottom);
    cairo_line_to(c->cr, dev_x(c, v), c->f->top);
    cairo_stroke(c->cr);
}

static const char *symbol(const clef_plot_curvature_opts *o)
{
    return o->omega_total ? "\xce\xa9tot" : "\xce\xa9k";
}

/* Interval [lo, hi] of Omega_k as shown on the axis. */
static void interval_text(const clef_plot_curvature_opts *o, const char *what, double lo,
                          double hi, char *buf, size_t n)
{
    const double a = axis_value(o, lo), b = axis_value(o, hi);
    snprintf(buf, n, "%s: [%.4f, %.4f]", what, fmin(a, b), fmax(a, b));
}

static void legend(const curv_ctx *c)
{
    cairo_t *cr = c->cr;
    const clef_plot_geometry *g = c->g;
    const double fs = c->fs;
    char lines[4][128];
    snprintf(lines[0], sizeof lines[0], "best %s = %.4f", symbol(c->o), axis_value(c->o, g->best));
    interval_text(c->o, "68%", g->lo68, g->hi68, lines[1], sizeof lines[1]);
    interval_text(c->o, "95%", g->lo95, g->hi95, lines[2], sizeof lines[2]);
    snprintf(lines[3], sizeof lines[3], "flat (%s = %d)", symbol(c->o), c->o->omega_total ? 1 : 0);
    plot_font(cr, fs, 0);
    double w = 0;
    for (int i = 0; i < 4; i++)
        w = fmax(w, plot_text_width(cr, lines[i]));
    const double row = 1.5 * fs, sample = 2.2 * fs, pad = 0.6 * fs;
    const double bw = 2 * pad + sample + 0.6 * fs + w, bh = 2 * pad + 4 * row - 0.5 * fs;
    const double bx = c->f->right - bw - 0.8 * fs, by = c->f->top + 0.8 * fs;
    cairo_set_source_rgba(cr, 1, 1, 1, 0.9);
    cairo_rectangle(cr, bx, by, bw, bh);
    cairo_fill_preserve(cr);
    cairo_set_source_rgb(cr, 0.6, 0.6, 0.6);
    cairo_set_line_width(cr, 0.06 * fs);
    cairo_stroke(cr);
    for (int i = 0; i < 4; i++) {
        const double cy = by + pad + 0.5 * fs + i * row, sx = bx + pad;
        cairo_save(cr);
        if (i == 0) {
            cairo_set_source_rgb(cr, colour_best.r, colour_best.g, colour_best.b);
            cairo_set_line_width(cr, 0.12 * fs);
            cairo_move_to(cr, sx, cy);
            cairo_line_to(cr, sx + sample, cy);
            cairo_stroke(cr);
        } else if (i < 3) {
            cairo_set_source_rgba(cr, colour_curve.r, colour_curve.g, colour_curve.b,
                                  i == 1 ? 0.40 : 0.18);
            cairo_rectangle(cr, sx, cy - 0.5 * fs, sample, fs);
            cairo_fill(cr);
        } else {
            const double dash[] = {0.5 * fs, 0.3 * fs};
            cairo_set_source_rgb(cr, 0.2, 0.2, 0.2);
            cairo_set_line_width(cr, 0.1 * fs);
            cairo_set_dash(cr, dash, 2, 0);
            cairo_move_to(cr, sx, cy);
            cairo_line_to(cr, sx + sample, cy);
            cairo_stroke(cr);
        }
        cairo_restore(cr);
        cairo_set_source_rgb(cr, 0, 0, 0);
        plot_text(cr, sx + sample + 0.6 * fs, cy, lines[i], 0, 0.5);
    }
}

static void draw_curve(const curv_ctx *c)
{
    cairo_t *cr = c->cr;
    const clef_plot_frame *f = c->f;
    cairo_save(cr);
    cairo_rectangle(cr, f->left, f->top, f->right - f->left, f->bottom - f->top);
    cairo_clip(cr);
    cairo_set_source_rgba(cr, colour_curve.r, colour_curve.g, colour_curve.b, 0.18);
    shade(c, c->g->lo95, c->g->hi95);
    cairo_set_source_rgba(cr, colour_curve.r, colour_curve.g, colour_curve.b, 0.40);
    shade(c, c->g->lo68, c->g->hi68);
    cairo_set_source_rgb(cr, colour_curve.r, colour_curve.g, colour_curve.b);
    cairo_set_line_width(cr, 0.13 * c->fs);
    for (size_t i = 0; i < c->g->n; i++) {
        const double x = dev_x(c, c->g->omega_k[i]);
        const double y = clef_plot_frame_y(f, c->g->posterior[i]);
        if (i == 0)
            cairo_move_to(cr, x, y);
        else
            cairo_line_to(cr, x, y);
    }
    cairo_stroke(cr);
    cairo_restore(cr);
}

int clef_plot_curvature(const clef_plot_geometry *g, const clef_plot_curvature_opts *o,
                        const char *path)
{
    clef_plot_curvature_opts d = {0};
    if (!o)
        o = &d;
    clef_plot_frame f;
    CLEF_TRY(clef_plot_curvature_layout(g, o, &f));
    plot_canvas cv;
    CLEF_TRY(plot_canvas_open(&cv, path, f.width, f.height, 0));
    const curv_ctx c = {cv.cr, &f, g, o, font_size(&f)};
    cairo_t *cr = cv.cr;
    char xlabel[64];
    snprintf(xlabel, sizeof xlabel, "%s %s",
             o->omega_total ? "total density" : "curvature density", symbol(o));
    plot_draw_axes(cr, &f, xlabel, "posterior (peak = 1)", c.fs);
    draw_curve(&c);

    cairo_save(cr);
    const double dash[] = {0.5 * c.fs, 0.3 * c.fs};
    cairo_set_source_rgb(cr, 0.2, 0.2, 0.2);
    cairo_set_line_width(cr, 0.1 * c.fs);
    cairo_set_dash(cr, dash, 2, 0);
    vline(&c, 0.0);
    cairo_restore(cr);
    /* The best value: the one vertical stroke in the marker colour. */
    cairo_set_source_rgb(cr, colour_best.r, colour_best.g, colour_best.b);
    cairo_set_line_width(cr, 0.12 * c.fs);
    vline(&c, g->best);
    legend(&c);

    char title[256];
    const double best = axis_value(o, g->best);
    const double up = o->omega_total ? g->best - g->lo68 : g->hi68 - g->best;
    const double down = o->omega_total ? g->hi68 - g->best : g->best - g->lo68;
    if (o->title)
        snprintf(title, sizeof title, "%s", o->title);
    else
        snprintf(title, sizeof title, "Curvature: %s  (%s = %.4f, +%.4f / \xe2\x88\x92%.4f at 68%%)",
                 g->classification[0] ? g->classification : "unclassified", symbol(o), best, up,
                 down);
    cairo_set_source_rgb(cr, 0, 0, 0);
    plot_font(cr, 1.15 * c.fs, 1);
    plot_text(cr, 0.5 * (f.left + f.right), 1.5 * c.fs, title, 0.5, 0.5);
    return plot_canvas_close(&cv);
}
