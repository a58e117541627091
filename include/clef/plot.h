/* Figures from clef's outputs, drawn with cairo: band powers with errors
 * and the first peak, full-sky map views (Mollweide projection), and the
 * curvature posterior from the geometry results.
 *
 * Output format follows the file extension: ".png" (raster, sizes in
 * pixels), ".svg" and ".pdf" (vector, sizes in points; the map view embeds
 * its sky image as a raster of the same size).  Every figure is written to a
 * temporary file next to the target and renamed on success, so a failure
 * never leaves a partial file.
 *
 * Each figure has a layout function that returns, without drawing, the
 * device coordinates the figure will use (plot frame, axis transform, map
 * ellipse), so that callers and tests can locate drawn features.
 *
 * Thread safety: the functions keep no shared state; distinct figures may be
 * drawn concurrently (cairo and fontconfig are thread-safe).
 */
#ifndef CLEF_PLOT_H
#define CLEF_PLOT_H

#include <stddef.h>

#include "clef/clef.h"
#include "clef/map.h"
#include "clef/peak.h"
#include "clef/table.h"

#ifdef __cplusplus
extern "C" {
#endif

enum clef_plot_format { CLEF_PLOT_PNG = 0, CLEF_PLOT_SVG = 1, CLEF_PLOT_PDF = 2 };

/* Output format from the file name's extension (case-insensitive .png,
 * .svg, .pdf; "-", standard output, is PNG).  CLEF_EUNSUP (naming the
 * file) for any other extension. */
int clef_plot_format_from_path(const char *path, int *format);

/* ---------------------------------------------------------------- spectrum */

/* A curve drawn as a line: n points (l, D_l in uK^2), l increasing. */
typedef struct clef_plot_curve {
    const double *l;
    const double *dl;
    size_t n;
    const char *label;          /* legend text; NULL = "theory" */
} clef_plot_curve;

typedef struct clef_plot_spectrum_opts {
    int width, height;          /* pixels (PNG) or points; 0 = 900 x 600 */
    int log_l;                  /* 1: logarithmic l axis */
    const char *title;          /* NULL: from the table's metadata, else `source` */
    const char *source;         /* name of the table's file (title fallback), may be NULL */
    const char *label;          /* legend text of the main table; NULL = "band powers" */
    const clef_bandpowers *compare;  /* optional second table, overlaid */
    const char *compare_label;       /* NULL = "comparison" */
    const clef_plot_curve *theory;   /* optional theory curve */
    const clef_peak_result *peak;    /* optional first peak (drawn when found = 1) */
} clef_plot_spectrum_opts;

/* Device coordinates of a plot frame and its axis transform.  x grows to
 * the right, y downwards (cairo's convention), units are pixels or points. */
typedef struct clef_plot_frame {
    int width, height;          /* whole figure */
    double left, right, top, bottom;   /* plot area in device units */
    double xmin, xmax, ymin, ymax;     /* data range shown */
    int log_x;
} clef_plot_frame;

/* Device x of data value x (l) and device y of data value y. */
double clef_plot_frame_x(const clef_plot_frame *f, double x);
double clef_plot_frame_y(const clef_plot_frame *f, double y);

/* Frame the band-power figure will use for this table and these options.
 * CLEF_EINVAL: empty table, non-finite values, log axis with l <= 0, size
 * out of range (16..20000). */
int clef_plot_spectrum_layout(const clef_bandpowers *bp, const clef_plot_spectrum_opts *o,
                              clef_plot_frame *f);

/* Draw D_b with error bars (vertical: dl_err; horizontal: bin range) against
 * l, the optional overlays, the first peak (a vertical line at l_peak from
 * the bottom to the top of the frame, drawn as its own path and the only
 * stroked path in the peak colour, sRGB (0.80, 0.10, 0.45), over a shaded
 * band l_peak +- l_peak_err), axes with labels and units, a legend and a
 * title.  The peak is drawn when found = 1 and l_peak is inside the frame.
 * o may be NULL for defaults.
 * Errors: CLEF_EINVAL (as for the layout), CLEF_EUNSUP (extension),
 * CLEF_EIO (cannot write `path`, message names it), CLEF_ENOMEM. */
int clef_plot_spectrum(const clef_bandpowers *bp, const clef_plot_spectrum_opts *o,
                       const char *path);

/* ------------------------------------------------------ several pairs */

/* The band powers of several pairs of fields (or spectra) in one figure:
 * one panel per set in a grid, or all sets overlaid in one frame with a
 * legend (docs/figures.md, "Several pairs"). */
enum clef_plot_arrange {
    CLEF_PLOT_ARRANGE_AUTO = 0,     /* overlay up to CLEF_PLOT_OVERLAY_AUTO_MAX sets, else grid */
    CLEF_PLOT_ARRANGE_GRID = 1,
    CLEF_PLOT_ARRANGE_OVERLAY = 2
};
#define CLEF_PLOT_OVERLAY_AUTO_MAX 6
/* At most this many sets in one figure (the 78 pairs of 12 fields). */
#define CLEF_PLOT_PAIRS_MAX 78

typedef struct clef_plot_pairs_opts {
    int width, height;          /* 0: grid 300 x 230 per panel (at least 900 wide) plus the
                                   margins; overlay 1000 x 620 */
    int arrange;                /* enum clef_plot_arrange */
    int columns;                /* grid columns; 0 = ceil(sqrt(n)) */
    int log_l;                  /* 1: logarithmic l axis */
    const char *title;          /* NULL: "<n> spectra" and the file name `source` */
    const char *source;         /* name of the file the sets come from, may be NULL */
    const clef_plot_curve *theory;   /* optional model curve, drawn in every panel */
} clef_plot_pairs_opts;

/* Where everything goes.  Panel k (grid) sits in row k / columns, column
 * k % columns; the overlay has one frame, panel[0].  Every frame has the
 * same l range. */
typedef struct clef_plot_pairs_frame {
    int width, height;          /* whole figure */
    int arrange;                /* CLEF_PLOT_ARRANGE_GRID or _OVERLAY, as drawn */
    int n;                      /* sets drawn */
    int rows, columns;          /* grid shape (1 x 1 for the overlay) */
    int npanels;                /* n (grid) or 1 (overlay) */
    clef_plot_frame panel[CLEF_PLOT_PAIRS_MAX];
    double rgb[CLEF_PLOT_PAIRS_MAX][3];   /* sRGB colour of set k's points */
    double shift[CLEF_PLOT_PAIRS_MAX];    /* overlay: x offset of set k's points (device units) */
    int nkeys;                  /* legend entries: overlay n (+ 1 with a model curve);
                                   grid 1 with a model curve, else 0 */
    double key_x[CLEF_PLOT_PAIRS_MAX + 1], key_y[CLEF_PLOT_PAIRS_MAX + 1];
                                /* centre of legend entry k's marker (the curve's: its line) */
} clef_plot_pairs_frame;

/* Layout of clef_plot_pairs for these n sets.  Errors: CLEF_EINVAL (n outside
 * 1..CLEF_PLOT_PAIRS_MAX, a table as for clef_plot_spectrum_layout, size
 * out of range or too small for the panels, columns < 0), CLEF_ENOMEM. */
int clef_plot_pairs_layout(const clef_bandpowers *const *bp, const char *const *names, int n,
                           const clef_plot_pairs_opts *o, clef_plot_pairs_frame *f);

/* Draw the n sets: D_b with error bars against l.  Grid: each panel titled
 * with the set's name, the points in the main colour with the bins' l
 * ranges, shared l axis, its own D range (including 0).  Overlay: set k in
 * colour rgb[k] and one of four filled markers (disc, square, triangle,
 * diamond, in turn), moved sideways by shift[k] so that error bars do not
 * cover each other, and a legend to the right of the frame naming every
 * set (in more columns when it would not fit).  o may be NULL.  Errors:
 * as for the layout, CLEF_EUNSUP (extension), CLEF_EIO, CLEF_ENOMEM. */
int clef_plot_pairs(const clef_bandpowers *const *bp, const char *const *names, int n,
                    const clef_plot_pairs_opts *o, const char *path);

/* -------------------------------------------------------------------- map */

enum clef_plot_scale {
    CLEF_PLOT_SCALE_AUTO = 0,       /* sequential if every shown value is in [0, 1], else diverging */
    CLEF_PLOT_SCALE_DIVERGING = 1,  /* symmetric around zero: [-r, r] */
    CLEF_PLOT_SCALE_SEQUENTIAL = 2  /* [min, max]; [0, 1] for values within it */
};

typedef struct clef_plot_map_opts {
    int width;                  /* figure width; 0 = 1000.  Height follows: clef_plot_map_layout */
    int scale;                  /* enum clef_plot_scale */
    int have_range;             /* 1: use [vmin, vmax] as given */
    double vmin, vmax;
    double percentile;          /* diverging range r = this percentile of |value|; 0 = 99.5 */
    const char *title;          /* NULL: none (drawn in bold under the map, above the caption) */
    const char *unit;           /* colour-bar unit; NULL: the map's unit, else "uK" (or none for a mask) */
    int transparent;            /* 1: no background outside the ellipse (PNG alpha, no page fill) */
    int graticule;              /* 0 = draw (default), -1 = do not draw */
} clef_plot_map_opts;

/* Where the sky ellipse and the colour bar sit: the sky at the left, the
 * colour bar vertical at its right (low values at the bottom, the unit
 * above it, a hatched "no data" key below it when pixels are missing), the
 * title and a two-line caption under the sky. */
typedef struct clef_plot_map_frame {
    int width, height;          /* whole figure: height = sky + the band under it */
    double cx, cy;              /* centre of the ellipse: (l, b) = (0, 0), i.e. theta = 90 deg, phi = 0 */
    double a, b;                /* semi-axes (a = 2 b): longitude +-180 deg at cx -+ a */
    double bar_left, bar_right, bar_top, bar_bottom;   /* colour bar */
} clef_plot_map_frame;

int clef_plot_map_layout(const clef_plot_map_opts *o, clef_plot_map_frame *f);

/* The map view's colour scales, clef's own (docs/figures.md): the sRGB
 * colour (components in [0, 1]) at position t in [0, 1] (clamped; 0 the
 * low end, 0.5 the centre of the diverging scale, 1 the high end) of
 * CLEF_PLOT_SCALE_DIVERGING or CLEF_PLOT_SCALE_SEQUENTIAL.  CLEF_EINVAL for
 * another scale or a non-finite t. */
int clef_plot_scale_rgb(int scale, double t, double rgb[3]);

/* Inverse Mollweide projection (Snyder 1987, "Map Projections - A Working
 * Manual", USGS PP 1395, p. 251-253) of device point (x, y) in frame f:
 * returns 1 and the HEALPix angles theta (colatitude) and phi in radians,
 * [0, pi] x [0, 2 pi), when the point lies inside the ellipse, else 0.
 * Longitude increases to the LEFT, as is usual for sky maps. */
int clef_plot_map_unproject(const clef_plot_map_frame *f, double x, double y, double *theta,
                            double *phi);

/* Draw a map (mask == NULL), a mask (pass it as `map`), or map x mask (pixels
 * where the mask is 0 or invalid are drawn hatched grey, as missing ones).
 * Graticule: meridians every 60 deg, parallels every 20 deg.  Pixel
 * lookup by ang2pix_ring64 (HEALPix C library) at each image pixel centre.
 * The colour-bar range: opts range if given; else for a diverging scale
 * +-(percentile of |value| over the image pixels, which sample equal sky
 * areas); for a sequential scale [0, 1] if all values are in [0, 1], else
 * [min, max].  Caption: coordinate system (from COORDSYS) and the longitude
 * direction.  Errors: CLEF_EINVAL (mask of a different nside, empty range,
 * no valid pixel, width out of 64..20000), CLEF_EUNSUP, CLEF_EIO, CLEF_ENOMEM. */
int clef_plot_map(const clef_map *map, const clef_map *mask, const clef_plot_map_opts *o,
                  const char *path);

/* -------------------------------------------------------------- curvature */

/* The curvature constraint written by `clef geometry --json`. */
typedef struct clef_plot_geometry {
    double best, lo68, hi68, lo95, hi95;   /* Omega_k */
    char classification[16];               /* "closed", "flat", "open" or "" */
    size_t n;
    double *omega_k;                       /* n grid values, increasing */
    double *posterior;                     /* n values, peak normalised to 1 */
    double acoustic_scale_deg, l_peak, l_peak_err;   /* NaN when absent */
} clef_plot_geometry;

/* Read the geometry JSON file (cJSON).  Requires "omega_k" {best, lo68,
 * hi68, lo95, hi95} and "curve" {omega_k: [...], posterior: [...]} of equal
 * length >= 2; "classification", "acoustic_scale_deg", "l_peak",
 * "l_peak_err" are optional.  Errors: CLEF_EIO (cannot read), CLEF_EFORMAT
 * (not JSON, a key missing or of the wrong type: message names the key),
 * CLEF_ENOMEM.  Free with clef_plot_geometry_free. */
int clef_plot_geometry_read(clef_plot_geometry **out, const char *path);
void clef_plot_geometry_free(clef_plot_geometry *g); /* NULL is a no-op */

typedef struct clef_plot_curvature_opts {
    int width, height;          /* 0 = 800 x 500 */
    const char *title;          /* NULL: "Curvature: <classification>" with the best value */
    int omega_total;            /* 1: x axis Omega_total = 1 - Omega_k (flat at 1) */
} clef_plot_curvature_opts;

/* Frame of the curvature figure: x covers the 95% interval, the flat value
 * and the part of the grid where the posterior exceeds 1e-3 of its peak. */
int clef_plot_curvature_layout(const clef_plot_geometry *g, const clef_plot_curvature_opts *o,
                               clef_plot_frame *f);

/* Draw the posterior of Omega_k against Omega_k (or Omega_total), the 95%
 * and 68% intervals shaded under the curve, the best value (solid line, the
 * one vertical stroke in the marker colour (0.80, 0.10, 0.45)) and the flat
 * value (dashed line) marked, the classification in the title.
 * Errors: CLEF_EINVAL (grid not increasing, non-finite values, size out of
 * range), CLEF_EUNSUP, CLEF_EIO, CLEF_ENOMEM. */
int clef_plot_curvature(const clef_plot_geometry *g, const clef_plot_curvature_opts *o,
                        const char *path);

#ifdef __cplusplus
}
#endif
#endif
