/* Private helpers of the plot module: output canvases (PNG, SVG, PDF through
 * cairo, written atomically), tick placement, text, colour scales, axes. */
#ifndef CLEF_PLOT_IMPL_H
#define CLEF_PLOT_IMPL_H

#include <cairo.h>
#include <stddef.h>

#include "clef/plot.h"
#include "clef/table.h"

/* -std=c11 hides M_PI. */
#define PLOT_PI 3.14159265358979323846

/* An sRGB colour, components in [0, 1]. */
typedef struct plot_rgb {
    double r, g, b;
} plot_rgb;

/* A figure being drawn: the cairo surface writes into the temporary file of
 * `out` (vector formats) or is written there by plot_canvas_close (PNG). */
typedef struct plot_canvas {
    int format;
    int width, height;
    clef_outfile out;
    cairo_surface_t *surface;
    cairo_t *cr;
} plot_canvas;

/* Open a canvas for `path` (format from the extension) and fill it white
 * unless `transparent`.  On failure nothing is left behind. */
int plot_canvas_open(plot_canvas *c, const char *path, int width, int height, int transparent);
/* Finish drawing, write, rename onto the target.  On failure the temporary
 * file is removed.  Always releases the canvas. */
int plot_canvas_close(plot_canvas *c);
/* Drop the canvas and its temporary file (after an error while drawing). */
void plot_canvas_abort(plot_canvas *c);

/* Figure sizes accepted by the public calls. */
#define PLOT_SIZE_MIN 16
#define PLOT_SIZE_MAX 20000
int plot_check_size(const char *what, int width, int height);

/* At most PLOT_MAX_TICKS tick values inside [lo, hi]. */
#define PLOT_MAX_TICKS 64
/* Widen [lo, hi] to multiples of a "nice" step giving about `target`
 * intervals; returns the step. */
double plot_nice_range(double *lo, double *hi, int target);
/* Linear ticks: multiples of the nice step for `target` intervals. */
int plot_ticks_linear(double lo, double hi, int target, double *ticks, double *step);
/* Logarithmic ticks: decades, plus 2 and 5 times them when the range spans
 * fewer than 3.5 decades.  lo > 0 required. */
int plot_ticks_log(double lo, double hi, double *ticks);
/* Tick label with as many decimals as the step needs. */
void plot_format_tick(double v, double step, char *buf, size_t n);

/* Text through cairo's toy API: sans-serif at `size` device units. */
void plot_font(cairo_t *cr, double size, int bold);
/* Draw `s` anchored at (x, y): ha 0 = left, 0.5 = centre, 1 = right;
 * va 0 = top, 0.5 = middle, 1 = baseline. */
void plot_text(cairo_t *cr, double x, double y, const char *s, double ha, double va);
/* The same, rotated by -90 degrees (reading upwards), centred on (x, y). */
void plot_text_vertical(cairo_t *cr, double x, double y, const char *s);
double plot_text_width(cairo_t *cr, const char *s);

/* Axes box, ticks, tick labels, light grid and axis labels for frame f. */
void plot_draw_axes(cairo_t *cr, const clef_plot_frame *f, const char *xlabel,
                    const char *ylabel, double font);

/* Band-power drawing shared by the figure of one table (plot_spectrum.c)
 * and the figure of several (plot_pairs.c). */
extern const plot_rgb plot_colour_main, plot_colour_theory;
/* CLEF_EINVAL for an empty table, non-finite values, negative errors, or
 * l_eff <= 0 on a logarithmic axis; `what` names the table. */
int plot_check_table(const clef_bandpowers *bp, const char *what, int log_l);
/* Widen [lo, hi] to the table's l range (bin edges, l_eff) and D +- err. */
void plot_table_x_range(const clef_bandpowers *bp, int log_l, double *lo, double *hi);
void plot_table_y_range(const clef_bandpowers *bp, double *lo, double *hi);
enum plot_mark {
    PLOT_MARK_DISC = 0, PLOT_MARK_OPEN_SQUARE, PLOT_MARK_SQUARE, PLOT_MARK_TRIANGLE,
    PLOT_MARK_DIAMOND
};
/* A marker of radius r centred on (x, y) in the current source colour. */
void plot_draw_marker(cairo_t *cr, double x, double y, double r, int shape);
/* The table's points with error bars, moved by `shift` device units along x,
 * with the bins' l ranges as thin bars when bin_bars; fs: font size. */
void plot_draw_table(cairo_t *cr, const clef_plot_frame *f, const clef_bandpowers *bp,
                     plot_rgb c, int shape, double shift, int bin_bars, double fs);
/* A theory curve as a line in plot_colour_theory. */
void plot_draw_curve(cairo_t *cr, const clef_plot_frame *f, const clef_plot_curve *t, double fs);

/* Colour scales of our own (plot_util.c: construction; docs/figures.md):
 * a table of PLOT_SCALE_N sRGB colours at equal CIE 1976 colour
 * differences, built once per figure (no shared state). */
#define PLOT_SCALE_N 513
typedef struct plot_scale {
    plot_rgb c[PLOT_SCALE_N];
} plot_scale;
/* scale: CLEF_PLOT_SCALE_DIVERGING or _SEQUENTIAL. */
void plot_scale_build(int scale, plot_scale *s);
/* t in [0, 1] (clamped): 0 = low end, 1 = high end, 0.5 = diverging centre. */
plot_rgb plot_scale_colour(const plot_scale *s, double t);
/* Colour of series k of n in a figure of several band-power sets: hues
 * evenly spaced around the CIELAB hue circle at chroma 52, lightness
 * alternating between L* 42 and 62, so that neighbours in the legend
 * differ in lightness as well as hue (plot_util.c). */
plot_rgb plot_series_colour(int k, int n);
/* Missing pixels: hatch of these two greys. */
extern const plot_rgb plot_missing_light, plot_missing_dark;

#endif
