/* Map view: full-sky Mollweide projection of a HEALPix map, a mask, or
 * their product.  clef's own layout (docs/figures.md): the sky on the
 * left, a vertical colour bar at its right with the unit above it and a
 * hatched "no data" key below it, the title and a caption line under the
 * map, a graticule of meridians every 60 and parallels every 20 degrees.
 *
 * Projection formulas: Snyder (1987), "Map Projections - A Working Manual",
 * USGS Professional Paper 1395, pp. 249-253.  With the auxiliary angle psi,
 * 2 psi + sin 2 psi = pi sin(lat), the ellipse point is
 * x = (2 sqrt2 / pi) lon cos psi, y = sqrt2 sin psi; the inverse needs no
 * iteration.  Image pixels sample equal areas of the sky, which the robust
 * colour range relies on. */
#include <chealpix.h>
#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "core_impl.h"
#include "plot_impl.h"

#define DEFAULT_WIDTH 1000
#define DEFAULT_PERCENTILE 99.5
#define MAP_WIDTH_MIN 64

static double map_font(int width)
{
    const double s = 0.018 * width;
    return s < 7 ? 7 : s;
}

/* Graticule spacing, degrees (named in the caption). */
#define GRID_LON 60
#define GRID_LAT 20

int clef_plot_map_layout(const clef_plot_map_opts *o, clef_plot_map_frame *f)
{
    clef_plot_map_opts d = {0};
    if (!o)
        o = &d;
    memset(f, 0, sizeof *f);
    f->width = o->width > 0 ? o->width : DEFAULT_WIDTH;
    if (f->width < MAP_WIDTH_MIN || f->width > PLOT_SIZE_MAX)
        CLEF_FAIL(CLEF_EINVAL, "map view: width %d outside %d..%d", f->width, MAP_WIDTH_MIN,
                  PLOT_SIZE_MAX);
    const double fs = map_font(f->width);
    const double margin = 0.02 * f->width;
    /* Right of the sky: gap, bar, ticks and their labels. */
    const double band = 1.4 * fs + 1.2 * fs + 6.0 * fs;
    f->a = 0.5 * (f->width - 2 * margin - band);
    f->b = 0.5 * f->a;
    f->cx = margin + f->a;
    f->cy = margin + 0.6 * fs + f->b;
    f->bar_left = f->cx + f->a + 1.4 * fs;
    f->bar_right = f->bar_left + 1.2 * fs;
    f->bar_top = f->cy - 0.72 * f->b;
    f->bar_bottom = f->cy + 0.50 * f->b;
    /* Under the sky: the title line (if any) and the caption line. */
    const double below = (o->title ? 1.9 * fs : 0) + 3.4 * fs;
    f->height = (int)ceil(f->cy + f->b + 0.8 * fs + below);
    return CLEF_OK;
}

int clef_plot_map_unproject(const clef_plot_map_frame *f, double x, double y, double *theta,
                            double *phi)
{
    const double s = (f->cy - y) / f->b; /* sin psi */
    if (!(fabs(s) <= 1))
        return 0;
    const double c = sqrt(1 - s * s), psi = asin(s);
    /* Longitude grows to the left: the sky seen from inside. */
    const double u = (f->cx - x) / f->a; /* lon cos(psi) / pi */
    if (!(fabs(u) <= c))
        return 0;
    const double lon = c > 0 ? PLOT_PI * u / c : 0;
    double sinlat = (2 * psi + sin(2 * psi)) / PLOT_PI;
    if (sinlat > 1)
        sinlat = 1;
    if (sinlat < -1)
        sinlat = -1;
    *theta = 0.5 * PLOT_PI - asin(sinlat);
    *phi = lon < 0 ? lon + 2 * PLOT_PI : lon;
    if (*phi >= 2 * PLOT_PI)
        *phi -= 2 * PLOT_PI;
    return 1;
}

/* Auxiliary angle psi for a latitude: Newton on 2 psi + sin 2 psi = pi sin
 * lat (Snyder 1987, eq. 31-4); near the poles psi -> lat. */
static double mollweide_psi(double lat)
{
    if (fabs(fabs(lat) - 0.5 * PLOT_PI) < 1e-9)
        return lat;
    double psi = lat;
    for (int i = 0; i < 50; i++) {
        const double dpsi = -(2 * psi + sin(2 * psi) - PLOT_PI * sin(lat)) / (2 + 2 * cos(2 * psi));
        psi += dpsi;
        if (fabs(dpsi) < 1e-12)
            break;
    }
    return psi;
}

static void project(const clef_plot_map_frame *f, double lon, double lat, double *x, double *y)
{
    const double psi = mollweide_psi(lat);
    *x = f->cx - f->a * (lon / PLOT_PI) * cos(psi);
    *y = f->cy - f->b * sin(psi);
}

/* The shown values: one per image pixel of the ellipse's bounding box,
 * with a state per pixel. */
enum { SKY_OUTSIDE = 0, SKY_MISSING = 1, SKY_SHOWN = 2 };
typedef struct sky_image {
    int x0, y0, w, h;
    double *v;
    unsigned char *state;
    size_t nshown, nmissing;
    int all_unit;  /* every shown value in [0, 1] */
    double vmin, vmax;
} sky_image;

static int sample_sky(const clef_plot_map_frame *f, const clef_map *map, const clef_map *mask,
                      sky_image *im)
{
    im->x0 = (int)floor(f->cx - f->a);
    im->y0 = (int)floor(f->cy - f->b);
    im->w = (int)ceil(f->cx + f->a) - im->x0;
    im->h = (int)ceil(f->cy + f->b) - im->y0;
    im->v = malloc((size_t)im->w * im->h * sizeof *im->v);
    im->state = malloc((size_t)im->w * im->h);
    if (!im->v || !im->state)
        CLEF_FAIL(CLEF_ENOMEM, "map view: no memory for a %d x %d image", im->w, im->h);
    im->nshown = im->nmissing = 0;
    im->all_unit = 1;
    im->vmin = INFINITY;
    im->vmax = -INFINITY;
    for (int j = 0; j < im->h; j++)
        for (int i = 0; i < im->w; i++) {
            const size_t k = (size_t)j * im->w + i;
            double theta, phi, v = 0;
            unsigned char st = SKY_OUTSIDE;
            /* Sample at the image pixel's centre. */
            if (clef_plot_map_unproject(f, im->x0 + i + 0.5, im->y0 + j + 0.5, &theta, &phi)) {
                int64_t p;
                ang2pix_ring64(map->nside, theta, phi, &p);
                st = SKY_MISSING;
                if (map->valid[p] && (!mask || (mask->valid[p] && mask->pix[p] != 0))) {
                    v = mask ? map->pix[p] * mask->pix[p] : map->pix[p];
                    st = SKY_SHOWN;
                }
            }
            im->v[k] = v;
            im->state[k] = st;
            im->nmissing += st == SKY_MISSING;
            if (st != SKY_SHOWN)
                continue;
            im->nshown++;
            im->vmin = fmin(im->vmin, v);
            im->vmax = fmax(im->vmax, v);
            if (v < 0 || v > 1)
                im->all_unit = 0;
        }
    return CLEF_OK;
}

static int cmp_double(const void *a, const void *b)
{
    const double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

/* The p-th percentile of |v| over the shown image pixels (equal sky areas). */
static int abs_percentile(const sky_image *im, double p, double *out)
{
    double *a = malloc(im->nshown * sizeof *a);
    if (!a)
        CLEF_FAIL(CLEF_ENOMEM, "map view: no memory for %zu values", im->nshown);
    size_t n = 0;
    for (size_t k = 0; k < (size_t)im->w * im->h; k++)
        if (im->state[k] == SKY_SHOWN)
            a[n++] = fabs(im->v[k]);
    qsort(a, n, sizeof *a, cmp_double);
    size_t idx = (size_t)ceil(p / 100.0 * n);
    idx = idx > 0 ? idx - 1 : 0;
    *out = a[idx < n ? idx : n - 1];
    free(a);
    return CLEF_OK;
}

static int choose_scale(const clef_plot_map_opts *o, const sky_image *im, int *scale,
                        double *lo, double *hi)
{
    *scale = o->scale;
    if (*scale == CLEF_PLOT_SCALE_AUTO)
        *scale = im->all_unit ? CLEF_PLOT_SCALE_SEQUENTIAL : CLEF_PLOT_SCALE_DIVERGING;
    if (o->have_range) {
        if (!(isfinite(o->vmin) && isfinite(o->vmax) && o->vmax > o->vmin))
            CLEF_FAIL(CLEF_EINVAL, "map view: colour range [%g, %g] is empty or not finite",
                      o->vmin, o->vmax);
        *lo = o->vmin;
        *hi = o->vmax;
        return CLEF_OK;
    }
    if (*scale == CLEF_PLOT_SCALE_DIVERGING) {
        const double p = o->percentile > 0 ? o->percentile : DEFAULT_PERCENTILE;
        if (!(p <= 100))
            CLEF_FAIL(CLEF_EINVAL, "map view: percentile %g outside (0, 100]", p);
        double r = 0;
        CLEF_TRY(abs_percentile(im, p, &r));
        /* A sky that is zero almost everywhere (a few hot pixels) still
         * gets a range that shows them. */
        if (!(r > 0))
            r = fmax(fabs(im->vmin), fabs(im->vmax));
        if (!(r > 0))
            r = 1;
        *lo = -r;
        *hi = r;
    } else if (im->all_unit) {
        *lo = 0;
        *hi = 1;
    } else {
        *lo = im->vmin;
        *hi = im->vmax;
        if (!(*hi > *lo)) {
            *lo -= 0.5;
            *hi += 0.5;
        }
    }
    return CLEF_OK;
}

static uint32_t argb(plot_rgb c)
{
    return 0xff000000u | (uint32_t)lround(255 * c.r) << 16 | (uint32_t)lround(255 * c.g) << 8 |
           (uint32_t)lround(255 * c.b);
}

/* The hatch of missing pixels: diagonal stripes, a third of each period
 * dark, anchored to device coordinates so that neighbouring regions join. */
static int hatch_period(int width)
{
    const int p = (int)lround(width / 125.0);
    return p < 4 ? 4 : p;
}

static int hatch_dark(int x, int y, int period)
{
    return ((x + y) % period + period) % period < (period + 2) / 3;
}

/* Paint the sampled sky as an image at (x0, y0), one image pixel per
 * device unit; outside the ellipse stays transparent. */
static int paint_sky(cairo_t *cr, const sky_image *im, const plot_scale *sc, double lo,
                     double hi, int period)
{
    cairo_surface_t *s = cairo_image_surface_create(CAIRO_FORMAT_ARGB32, im->w, im->h);
    if (cairo_surface_status(s) != CAIRO_STATUS_SUCCESS) {
        cairo_surface_destroy(s);
        CLEF_FAIL(CLEF_ENOMEM, "map view: cannot make a %d x %d image", im->w, im->h);
    }
    cairo_surface_flush(s);
    unsigned char *data = cairo_image_surface_get_data(s);
    const int stride = cairo_image_surface_get_stride(s);
    const uint32_t light = argb(plot_missing_light), dark = argb(plot_missing_dark);
    for (int j = 0; j < im->h; j++) {
        uint32_t *row = (uint32_t *)(void *)(data + (size_t)j * stride);
        for (int i = 0; i < im->w; i++) {
            const size_t k = (size_t)j * im->w + i;
            if (im->state[k] == SKY_SHOWN)
                row[i] = argb(plot_scale_colour(sc, (im->v[k] - lo) / (hi - lo)));
            else if (im->state[k] == SKY_MISSING)
                row[i] = hatch_dark(im->x0 + i, im->y0 + j, period) ? dark : light;
            else
                row[i] = 0;
        }
    }
    cairo_surface_mark_dirty(s);
    cairo_set_source_surface(cr, s, im->x0, im->y0);
    cairo_pattern_set_filter(cairo_get_source(cr), CAIRO_FILTER_NEAREST);
    cairo_paint(cr);
    cairo_surface_destroy(s);
    return CLEF_OK;
}

/* Meridians every GRID_LON and parallels every GRID_LAT degrees (the
 * poles excluded), and the outline. */
static void draw_graticule(cairo_t *cr, const clef_plot_map_frame *f, double fs, int lines)
{
    const double deg = PLOT_PI / 180;
    double x, y;
    cairo_save(cr);
    if (lines) {
        cairo_set_source_rgba(cr, 0.10, 0.10, 0.12, 0.40);
        cairo_set_line_width(cr, 0.05 * fs);
        for (int lat = -GRID_LAT * ((90 - 1) / GRID_LAT); lat < 90; lat += GRID_LAT) {
            project(f, PLOT_PI, lat * deg, &x, &y);
            cairo_move_to(cr, x, y);
            project(f, -PLOT_PI, lat * deg, &x, &y);
            cairo_line_to(cr, x, y);
        }
        for (int lon = -180 + GRID_LON; lon < 180; lon += GRID_LON)
            for (int k = 0; k <= 180; k++) {
                project(f, lon * deg, (k - 90) * deg, &x, &y);
                if (k == 0)
                    cairo_move_to(cr, x, y);
                else
                    cairo_line_to(cr, x, y);
            }
        cairo_stroke(cr);
    }
    cairo_set_source_rgb(cr, 0.2, 0.2, 0.2);
    cairo_set_line_width(cr, 0.08 * fs);
    cairo_save(cr);
    cairo_translate(cr, f->cx, f->cy);
    cairo_scale(cr, f->a, f->b);
    cairo_arc(cr, 0, 0, 1, 0, 2 * PLOT_PI);
    cairo_restore(cr);
    cairo_stroke(cr);
    cairo_restore(cr);
}

/* The vertical colour bar: low values at the bottom, ticks and labels on
 * its right, the unit centred above it; under it, when the view shows
 * missing pixels, a hatched key labelled "no data". */
static void draw_colour_bar(cairo_t *cr, const clef_plot_map_frame *f, const plot_scale *sc,
                            double lo, double hi, const char *unit, double fs, int missing,
                            int period)
{
    const double w = f->bar_right - f->bar_left, h = f->bar_bottom - f->bar_top;
    cairo_pattern_t *g = cairo_pattern_create_linear(0, f->bar_bottom, 0, f->bar_top);
    for (int k = 0; k <= 128; k++) {
        const double t = k / 128.0;
        const plot_rgb c = plot_scale_colour(sc, t);
        cairo_pattern_add_color_stop_rgb(g, t, c.r, c.g, c.b);
    }
    cairo_rectangle(cr, f->bar_left, f->bar_top, w, h);
    cairo_set_source(cr, g);
    cairo_fill(cr);
    cairo_pattern_destroy(g);

    cairo_set_source_rgb(cr, 0.15, 0.15, 0.15);
    cairo_set_line_width(cr, 0.06 * fs);
    cairo_rectangle(cr, f->bar_left, f->bar_top, w, h);
    cairo_stroke(cr);
    double ticks[PLOT_MAX_TICKS], step;
    const int n = plot_ticks_linear(lo, hi, 5, ticks, &step);
    char buf[64];
    plot_font(cr, 0.9 * fs, 0);
    for (int i = 0; i < n; i++) {
        const double y = f->bar_bottom - (ticks[i] - lo) / (hi - lo) * h;
        cairo_move_to(cr, f->bar_right, y);
        cairo_line_to(cr, f->bar_right + 0.45 * fs, y);
        cairo_stroke(cr);
        plot_format_tick(ticks[i], step, buf, sizeof buf);
        plot_text(cr, f->bar_right + 0.7 * fs, y, buf, 0, 0.5);
    }
    if (unit && *unit) {
        plot_font(cr, fs, 1);
        plot_text(cr, 0.5 * (f->bar_left + f->bar_right), f->bar_top - 0.8 * fs, unit, 0.5, 1);
    }
    if (missing) {
        const double top = f->bar_bottom + 1.2 * fs, side = w;
        cairo_save(cr);
        cairo_rectangle(cr, f->bar_left, top, side, side);
        cairo_clip_preserve(cr);
        cairo_set_source_rgb(cr, plot_missing_light.r, plot_missing_light.g, plot_missing_light.b);
        cairo_fill(cr);
        cairo_set_source_rgb(cr, plot_missing_dark.r, plot_missing_dark.g, plot_missing_dark.b);
        cairo_set_line_width(cr, period / 3.0);
        /* Stripes along x + y = const, as in the sky image. */
        for (double c = -side; c <= 2 * side; c += period) {
            cairo_move_to(cr, f->bar_left + c, top);
            cairo_line_to(cr, f->bar_left + c - side, top + side);
        }
        cairo_stroke(cr);
        cairo_restore(cr);
        cairo_set_source_rgb(cr, 0.15, 0.15, 0.15);
        cairo_rectangle(cr, f->bar_left, top, side, side);
        cairo_stroke(cr);
        plot_font(cr, 0.9 * fs, 0);
        plot_text(cr, f->bar_right + 0.7 * fs, top + 0.5 * side, "no data", 0, 0.5);
    }
}

static const char *coord_name(const char *c)
{
    switch (c[0]) {
    case 'G': case 'g': return "Galactic";
    case 'E': case 'e': return "Ecliptic";
    case 'C': case 'c': case 'Q': case 'q': return "Celestial (equatorial)";
    default: return NULL;
    }
}

static void unit_text(const clef_plot_map_opts *o, const clef_map *map, int scale, char *buf,
                      size_t n)
{
    const char *u = o->unit ? o->unit : map->unit[0] ? map->unit : NULL;
    if (!u)
        u = scale == CLEF_PLOT_SCALE_DIVERGING ? "uK" : "";
    /* The micro sign reads better than the ASCII "u" of FITS units. */
    if (u[0] == 'u' && u[1] == 'K')
        snprintf(buf, n, "\xc2\xb5%s", u + 1);
    else
        snprintf(buf, n, "%s", u);
}

static int check_maps(const clef_map *map, const clef_map *mask)
{
    if (!map || !map->pix || !map->valid || map->nside < 1 ||
        map->npix != 12 * map->nside * map->nside)
        CLEF_FAIL(CLEF_EINVAL, "map view: the map is empty or inconsistent (nside %lld)",
                  map ? (long long)map->nside : 0LL);
    if (mask && (!mask->pix || !mask->valid || mask->nside != map->nside ||
                 mask->npix != map->npix))
        CLEF_FAIL(CLEF_EINVAL, "map view: mask nside %lld differs from map nside %lld",
                  (long long)mask->nside, (long long)map->nside);
    return CLEF_OK;
}

int clef_plot_map(const clef_map *map, const clef_map *mask, const clef_plot_map_opts *o,
                  const char *path)
{
    clef_plot_map_opts d = {0};
    if (!o)
        o = &d;
    clef_plot_map_frame f;
    CLEF_TRY(check_maps(map, mask));
    CLEF_TRY(clef_plot_map_layout(o, &f));
    /* Refuse an unknown extension before the sky is sampled. */
    int format;
    CLEF_TRY(clef_plot_format_from_path(path, &format));

    int status, scale;
    double lo = 0, hi = 1;
    plot_canvas c = {0};
    sky_image im = {0};
    CLEF_CHECK(sample_sky(&f, map, mask, &im));
    if (im.nshown == 0) {
        status = clef_fail(CLEF_EINVAL, "map view: no valid pixel to show%s",
                           mask ? " (the mask removes every valid pixel)" : "");
        goto fail;
    }
    CLEF_CHECK(choose_scale(o, &im, &scale, &lo, &hi));
    plot_scale sc;
    plot_scale_build(scale, &sc);
    CLEF_CHECK(plot_canvas_open(&c, path, f.width, f.height, o->transparent));
    const double fs = map_font(f.width);
    const int period = hatch_period(f.width);
    CLEF_CHECK(paint_sky(c.cr, &im, &sc, lo, hi, period));
    draw_graticule(c.cr, &f, fs, o->graticule >= 0);

    char unit[80], caption[2][200];
    unit_text(o, map, scale, unit, sizeof unit);
    draw_colour_bar(c.cr, &f, &sc, lo, hi, unit, fs, im.nmissing > 0, period);
    const char *coord = coord_name(map->coordsys);
    snprintf(caption[0], sizeof caption[0], "Mollweide equal-area view \xc2\xb7 %s%s",
             coord ? coord : "coordinate system unknown", coord ? " coordinates" : "");
    snprintf(caption[1], sizeof caption[1],
             "longitude 0 at the centre, increasing to the left%s",
             o->graticule >= 0 ? " \xc2\xb7 meridians every 60\xc2\xb0, parallels every 20\xc2\xb0"
                               : "");
    const double left = f.cx - f.a;
    double y = f.cy + f.b + 0.8 * fs;
    if (o->title) {
        cairo_set_source_rgb(c.cr, 0, 0, 0);
        plot_font(c.cr, 1.15 * fs, 1);
        plot_text(c.cr, left, y + 1.15 * fs, o->title, 0, 1);
        y += 1.9 * fs;
    }
    cairo_set_source_rgb(c.cr, 0.25, 0.25, 0.25);
    plot_font(c.cr, 0.85 * fs, 0);
    plot_text(c.cr, left, y + 1.0 * fs, caption[0], 0, 1);
    plot_text(c.cr, left, y + 2.3 * fs, caption[1], 0, 1);
    free(im.v);
    free(im.state);
    return plot_canvas_close(&c);
fail:
    plot_canvas_abort(&c);
    free(im.v);
    free(im.state);
    return status;
}
