/* Plot module: output format by extension and the axis transform shared by
 * the figures.  The figures themselves are in plot_spectrum.c, plot_map.c
 * and plot_curvature.c; shared drawing helpers in plot_util.c. */
#define _POSIX_C_SOURCE 200809L
#include <math.h>
#include <string.h>
#include <strings.h>

#include "clef/plot.h"
#include "core_impl.h"

int clef_plot_format_from_path(const char *path, int *format)
{
    if (!path || !*path)
        CLEF_FAIL(CLEF_EINVAL, "figure path is empty");
    if (!strcmp(path, "-")) { /* standard output: PNG */
        *format = CLEF_PLOT_PNG;
        return CLEF_OK;
    }
    const char *slash = strrchr(path, '/');
    const char *dot = strrchr(slash ? slash + 1 : path, '.');
    if (dot && !strcasecmp(dot, ".png"))
        *format = CLEF_PLOT_PNG;
    else if (dot && !strcasecmp(dot, ".svg"))
        *format = CLEF_PLOT_SVG;
    else if (dot && !strcasecmp(dot, ".pdf"))
        *format = CLEF_PLOT_PDF;
    else
        CLEF_FAIL(CLEF_EUNSUP, "figure '%s': unknown extension '%s' (use .png, .svg or .pdf)",
                  path, dot ? dot : "");
    return CLEF_OK;
}

double clef_plot_frame_x(const clef_plot_frame *f, double x)
{
    double t;
    if (f->log_x)
        t = (log(x) - log(f->xmin)) / (log(f->xmax) - log(f->xmin));
    else
        t = (x - f->xmin) / (f->xmax - f->xmin);
    return f->left + t * (f->right - f->left);
}

double clef_plot_frame_y(const clef_plot_frame *f, double y)
{
    const double t = (y - f->ymin) / (f->ymax - f->ymin);
    return f->bottom - t * (f->bottom - f->top);
}
