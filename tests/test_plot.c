/* Tests of the plot module: every figure renders in PNG (size as asked),
 * SVG (well-formed XML, read by Python's xml.etree) and PDF (opened by
 * pdfinfo from poppler-utils); the Mollweide view puts the sky where the
 * projection says; the band-power peak marker sits at x(l_peak); every
 * error path leaves no file behind. */
#include "check.h"

#include <cairo.h>
#include <chealpix.h>
#include <dirent.h>
#include <gsl/gsl_rng.h>

#include "clef/peak.h"
#include "clef/plot.h"
#include "clef/table.h"
#include "plot_impl.h"

static const double pi = 3.14159265358979323846;

/* ------------------------------------------------------------ fixtures */

static clef_bandpowers *make_table(int nb, double l0, double width)
{
    clef_bandpowers *bp = calloc(1, sizeof *bp);
    bp->nbins = nb;
    bp->l_lo = calloc(nb, sizeof *bp->l_lo);
    bp->l_hi = calloc(nb, sizeof *bp->l_hi);
    bp->l_eff = calloc(nb, sizeof *bp->l_eff);
    bp->cl = calloc(nb, sizeof *bp->cl);
    bp->dl = calloc(nb, sizeof *bp->dl);
    bp->dl_err = calloc(nb, sizeof *bp->dl_err);
    for (int b = 0; b < nb; b++) {
        bp->l_lo[b] = (int)(l0 + b * width);
        bp->l_hi[b] = (int)(l0 + (b + 1) * width) - 1;
        bp->l_eff[b] = 0.5 * (bp->l_lo[b] + bp->l_hi[b]);
        const double l = bp->l_eff[b];
        /* A peaked shape like the first acoustic peak (illustrative only). */
        bp->dl[b] = 1000 + 4500 * exp(-pow((l - 220) / 90, 2));
        bp->dl_err[b] = 150 + 0.3 * l;
    }
    return bp;
}

static void free_table(clef_bandpowers *bp)
{
    free(bp->l_lo);
    free(bp->l_hi);
    free(bp->l_eff);
    free(bp->cl);
    free(bp->dl);
    free(bp->dl_err);
    free(bp->meta);
    free(bp);
}

static clef_map *make_map(int64_t nside)
{
    clef_map *m = calloc(1, sizeof *m);
    m->nside = nside;
    m->npix = 12 * nside * nside;
    m->pix = calloc(m->npix, sizeof *m->pix);
    m->valid = malloc(m->npix);
    memset(m->valid, 1, m->npix);
    strcpy(m->coordsys, "G");
    return m;
}

static void free_map(clef_map *m)
{
    free(m->pix);
    free(m->valid);
    free(m);
}

/* PNG width and height from the IHDR chunk (PNG specification, ISO/IEC
 * 15948: signature, then IHDR with big-endian width and height). */
static int png_size(const char *path, int *w, int *h)
{
    unsigned char b[24];
    FILE *f = fopen(path, "rb");
    if (!f)
        return -1;
    const size_t n = fread(b, 1, sizeof b, f);
    fclose(f);
    if (n != sizeof b || memcmp(b, "\x89PNG\r\n\x1a\n", 8) || memcmp(b + 12, "IHDR", 4))
        return -1;
    *w = (b[16] << 24) | (b[17] << 16) | (b[18] << 8) | b[19];
    *h = (b[20] << 24) | (b[21] << 16) | (b[22] << 8) | b[23];
    return 0;
}

/* PNG pixels, read back through cairo's own PNG reader. */
typedef struct image {
    cairo_surface_t *s;
    const unsigned char *data;
    int w, h, stride;
} image;

static void image_load(image *im, const char *path)
{
    im->s = cairo_image_surface_create_from_png(path);
    assert_int_equal(cairo_surface_status(im->s), CAIRO_STATUS_SUCCESS);
    cairo_surface_flush(im->s);
    im->data = cairo_image_surface_get_data(im->s);
    im->w = cairo_image_surface_get_width(im->s);
    im->h = cairo_image_surface_get_height(im->s);
    im->stride = cairo_image_surface_get_stride(im->s);
}

/* Red, green, blue (0..255) of pixel (x, y); opaque images only. */
static void image_rgb(const image *im, int x, int y, int rgb[3])
{
    const uint32_t p = *(const uint32_t *)(const void *)(im->data + (size_t)y * im->stride + 4 * (size_t)x);
    rgb[0] = (p >> 16) & 255;
    rgb[1] = (p >> 8) & 255;
    rgb[2] = p & 255;
}

static int rgb_close(const int a[3], const int b[3], int tol)
{
    return abs(a[0] - b[0]) <= tol && abs(a[1] - b[1]) <= tol && abs(a[2] - b[2]) <= tol;
}

/* No temporary output (".<name>.clef-tmp.<pid>.<host>.XXXXXX") left in the scratch folder. */
static int leftover_tmp(void)
{
    char dir[1024];
    snprintf(dir, sizeof dir, "%s", test_path("x"));
    *strrchr(dir, '/') = '\0';
    DIR *d = opendir(dir);
    int found = 0;
    for (struct dirent *e; d && (e = readdir(d));)
        if (strstr(e->d_name, ".clef-tmp."))
            found = 1;
    if (d)
        closedir(d);
    return found;
}

/* XML well-formedness by Python's xml.etree, and the vertical paths stroked
 * in the peak colour (80%, 10%, 45%): one "x y0 y1" line each. */
static const char *svg_probe =
    "import sys, re, xml.etree.ElementTree as ET\n"
    "root = ET.parse(sys.argv[1]).getroot()\n"
    "for p in root.iter('{http://www.w3.org/2000/svg}path'):\n"
    "    st = p.get('style', '')\n"
    "    if 'stroke:rgb(80%,10%,45%)' not in st.replace(' ', ''):\n"
    "        continue\n"
    "    v = [float(t) for t in re.findall(r'-?[0-9.]+', p.get('d', ''))]\n"
    "    if len(v) == 4 and abs(v[0] - v[2]) < 1e-9:\n"
    "        print(v[0], v[1], v[3])\n";

/* Run the probe; returns the number of marker lines found (or -1 when the
 * file is not well-formed XML). */
static int svg_markers(const char *svg, double x[8], double y0[8], double y1[8])
{
    const char *py = test_path("svg_probe.py");
    FILE *f = fopen(py, "w");
    assert_non_null(f);
    fputs(svg_probe, f);
    fclose(f);
    char cmd[4096];
    snprintf(cmd, sizeof cmd, "%s %s %s", ref_python(), py, svg);
    FILE *p = popen(cmd, "r");
    assert_non_null(p);
    int n = 0;
    while (n < 8 && fscanf(p, "%lf %lf %lf", &x[n], &y0[n], &y1[n]) == 3)
        n++;
    const int st = pclose(p);
    return WIFEXITED(st) && WEXITSTATUS(st) == 0 ? n : -1;
}

static int svg_well_formed(const char *svg)
{
    return run_cmd("%s -c 'import sys, xml.etree.ElementTree as E; E.parse(sys.argv[1])' %s",
                   ref_python(), svg) == 0;
}

/* pdfinfo (poppler-utils) opens the file, finds one page of w x h points. */
static void check_pdf(const char *pdf, int w, int h)
{
    assert_int_equal(run_cmd("pdfinfo %s > %s 2>&1", pdf, test_path("pdfinfo.txt")), 0);
    FILE *f = fopen(test_path("pdfinfo.txt"), "r");
    assert_non_null(f);
    char line[512];
    int pages = 0;
    double pw = 0, ph = 0;
    while (fgets(line, sizeof line, f)) {
        sscanf(line, "Pages: %d", &pages);
        sscanf(line, "Page size: %lf x %lf", &pw, &ph);
    }
    fclose(f);
    assert_int_equal(pages, 1);
    check_abs(pw, w, 0.5, "pdfinfo page size");
    check_abs(ph, h, 0.5, "pdfinfo page size");
}

/* ------------------------------------------------------------- formats */

static void test_format_from_path(void **state)
{
    (void)state;
    int f = -1;
    assert_int_equal(clef_plot_format_from_path("a/b.png", &f), CLEF_OK);
    assert_int_equal(f, CLEF_PLOT_PNG);
    assert_int_equal(clef_plot_format_from_path("B.SVG", &f), CLEF_OK);
    assert_int_equal(f, CLEF_PLOT_SVG);
    assert_int_equal(clef_plot_format_from_path("c.Pdf", &f), CLEF_OK);
    assert_int_equal(f, CLEF_PLOT_PDF);
    assert_int_equal(clef_plot_format_from_path("d.jpg", &f), CLEF_EUNSUP);
    assert_non_null(strstr(clef_last_error(), "d.jpg"));
    assert_int_equal(clef_plot_format_from_path("dir.png/noext", &f), CLEF_EUNSUP);
    assert_int_equal(clef_plot_format_from_path("", &f), CLEF_EINVAL);
    assert_int_equal(clef_plot_format_from_path("-", &f), CLEF_OK); /* stdout: PNG */
    assert_int_equal(f, CLEF_PLOT_PNG);
}

/* Tick placement: steps of 1, 2 or 5 times a power of ten (Heckbert,
 * "Nice numbers for graph labels", Graphics Gems, 1990). */
static void test_ticks(void **state)
{
    (void)state;
    double t[PLOT_MAX_TICKS], step;
    int n = plot_ticks_linear(0, 1000, 6, t, &step);
    check_abs(step, 200, 0, "Heckbert 1990: 1000/6 -> 200");
    assert_int_equal(n, 6);
    check_abs(t[5], 1000, 1e-9, "last tick");
    n = plot_ticks_linear(-0.1, 0.1, 5, t, &step);
    check_abs(step, 0.05, 1e-15, "Heckbert 1990: 0.2/5 -> 0.05");
    assert_int_equal(n, 5);
    check_abs(t[2], 0, 0, "zero exactly");
    char buf[32];
    plot_format_tick(t[2], step, buf, sizeof buf);
    assert_string_equal(buf, "0.00");
    plot_format_tick(0.05, 0.05, buf, sizeof buf);
    assert_string_equal(buf, "0.05");
    plot_format_tick(6000, 2000, buf, sizeof buf);
    assert_string_equal(buf, "6000");
    double lo = 13, hi = 4870;
    step = plot_nice_range(&lo, &hi, 5);
    check_abs(step, 1000, 0, "nice range");
    check_abs(lo, 0, 0, "nice range");
    check_abs(hi, 5000, 0, "nice range");
    /* Log axis over 2.6 decades: 1-2-5 sequence; over 5 decades: decades. */
    n = plot_ticks_log(2, 900, t);
    const double want[] = {2, 5, 10, 20, 50, 100, 200, 500};
    assert_int_equal(n, 8);
    for (int i = 0; i < n; i++)
        check_rel(t[i], want[i], 1e-12, "1-2-5 log ticks (common practice)");
    n = plot_ticks_log(1, 1e5, t);
    assert_int_equal(n, 6);
    check_rel(t[5], 1e5, 1e-12, "decade ticks");
}

/* ------------------------------------------------------------ spectrum */

static void test_spectrum_png_size(void **state)
{
    (void)state;
    clef_bandpowers *bp = make_table(20, 2, 40);
    clef_plot_spectrum_opts o = {0};
    o.width = 640;
    o.height = 430;
    const char *png = test_path("spec.png");
    assert_int_equal(clef_plot_spectrum(bp, &o, png), CLEF_OK);
    int w, h;
    assert_int_equal(png_size(png, &w, &h), 0);
    assert_int_equal(w, 640);
    assert_int_equal(h, 430);
    /* Defaults with no options: 900 x 600 (plot.h). */
    assert_int_equal(clef_plot_spectrum(bp, NULL, png), CLEF_OK);
    assert_int_equal(png_size(png, &w, &h), 0);
    assert_int_equal(w, 900);
    assert_int_equal(h, 600);
    free_table(bp);
}

static void spectrum_marker(int log_l)
{
    clef_bandpowers *bp = make_table(20, 2, 40);
    clef_bandpowers *cmp = make_table(10, 10, 80);
    double tl[400], td[400];
    for (int i = 0; i < 400; i++) {
        tl[i] = 2 + 2 * i;
        td[i] = 1000 + 4500 * exp(-pow((tl[i] - 220) / 90, 2));
    }
    clef_plot_curve th = {tl, td, 400, "model"};
    clef_peak_result pk = {0};
    pk.found = 1;
    pk.l_peak = 221.7;
    pk.l_peak_err = 6.3;
    clef_plot_spectrum_opts o = {0};
    o.log_l = log_l;
    o.theory = &th;
    o.compare = cmp;
    o.peak = &pk;
    clef_plot_frame f;
    assert_int_equal(clef_plot_spectrum_layout(bp, &o, &f), CLEF_OK);
    /* The transform itself: linear, or linear in log l (common practice). */
    const double t = log_l ? log(pk.l_peak / f.xmin) / log(f.xmax / f.xmin)
                           : (pk.l_peak - f.xmin) / (f.xmax - f.xmin);
    const double xexp = f.left + t * (f.right - f.left);
    check_abs(clef_plot_frame_x(&f, pk.l_peak), xexp, 1e-9, "axis transform");

    const char *svg = test_path(log_l ? "speclog.svg" : "spec.svg");
    assert_int_equal(clef_plot_spectrum(bp, &o, svg), CLEF_OK);
    double x[8], y0[8], y1[8];
    const int n = svg_markers(svg, x, y0, y1);
    assert_int_equal(n, 1);
    /* cairo keeps path coordinates in 24.8 fixed point: 1/256 device unit. */
    check_abs(x[0], xexp, 1.0 / 256, "peak marker x = x(l_peak)");
    check_abs(fmax(y0[0], y1[0]), f.bottom, 1.0 / 256, "marker spans the frame");
    check_abs(fmin(y0[0], y1[0]), f.top, 1.0 / 256, "marker spans the frame");

    /* The same column in the PNG is in the peak colour where no data is
     * drawn (in the upper part of the frame, under the legend's height). */
    const char *png = test_path("spec_marker.png");
    assert_int_equal(clef_plot_spectrum(bp, &o, png), CLEF_OK);
    image im;
    image_load(&im, png);
    const int want[3] = {204, 26, 115}; /* (0.80, 0.10, 0.45) x 255 */
    int rgb[3], hits = 0;
    const int col = (int)floor(xexp);
    for (int y = (int)f.top + 2; y < (int)f.bottom - 2; y++) {
        image_rgb(&im, col, y, rgb);
        hits += rgb_close(rgb, want, 40);
    }
    assert_true(hits > 0.5 * (f.bottom - f.top));
    /* ... and a column 30 device units away is not. */
    hits = 0;
    for (int y = (int)f.top + 2; y < (int)f.bottom - 2; y++) {
        image_rgb(&im, col + 30, y, rgb);
        hits += rgb_close(rgb, want, 40);
    }
    assert_int_equal(hits, 0);
    cairo_surface_destroy(im.s);

    /* Without a found peak there is no marker. */
    pk.found = 0;
    assert_int_equal(clef_plot_spectrum(bp, &o, svg), CLEF_OK);
    assert_int_equal(svg_markers(svg, x, y0, y1), 0);
    free_table(bp);
    free_table(cmp);
}

static void test_spectrum_marker_linear(void **state)
{
    (void)state;
    spectrum_marker(0);
}

static void test_spectrum_marker_log(void **state)
{
    (void)state;
    spectrum_marker(1);
}

static void test_spectrum_pdf(void **state)
{
    (void)state;
    clef_bandpowers *bp = make_table(12, 2, 50);
    clef_plot_spectrum_opts o = {0};
    o.width = 700;
    o.height = 500;
    o.title = "a title";
    const char *pdf = test_path("spec.pdf");
    assert_int_equal(clef_plot_spectrum(bp, &o, pdf), CLEF_OK);
    check_pdf(pdf, 700, 500);
    free_table(bp);
}

static void test_spectrum_errors(void **state)
{
    (void)state;
    clef_bandpowers *bp = make_table(5, 2, 40);
    const char *bad = test_path("spec.jpg");
    assert_int_equal(clef_plot_spectrum(bp, NULL, bad), CLEF_EUNSUP);
    assert_false(file_exists(bad));
    const char *nodir = test_path("no/such/dir/spec.png");
    assert_int_equal(clef_plot_spectrum(bp, NULL, nodir), CLEF_EIO);
    assert_false(file_exists(nodir));

    clef_plot_spectrum_opts o = {0};
    o.width = 5;
    const char *png = test_path("spec_err.png");
    assert_int_equal(clef_plot_spectrum(bp, &o, png), CLEF_EINVAL);
    o.width = 0;
    o.log_l = 1;
    bp->l_eff[0] = 0;
    assert_int_equal(clef_plot_spectrum(bp, &o, png), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "bin 0"));
    o.log_l = 0;
    bp->dl[1] = NAN;
    assert_int_equal(clef_plot_spectrum(bp, &o, png), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "bin 1"));
    bp->dl[1] = 1;
    bp->nbins = 0;
    assert_int_equal(clef_plot_spectrum(bp, &o, png), CLEF_EINVAL);
    bp->nbins = 5;
    assert_false(file_exists(png));
    assert_false(leftover_tmp());
    free_table(bp);
}

/* Through the command line: the marker of `clef plot spectrum` sits at the
 * peak recorded in the table's header (clef_peak_to_meta), or, with none
 * recorded, at the peak clef_peak_find fits with its defaults. */
static void cli_marker(const char *table, const char *svg, double l_peak)
{
    assert_int_equal(run_cmd("%s plot spectrum %s -o %s --quiet", clef_bin(), table, svg), 0);
    clef_bandpowers *back;
    assert_int_equal(clef_bandpowers_read(&back, table), CLEF_OK);
    clef_plot_frame f;
    assert_int_equal(clef_plot_spectrum_layout(back, NULL, &f), CLEF_OK);
    double x[8], y0[8], y1[8];
    assert_int_equal(svg_markers(svg, x, y0, y1), 1);
    check_abs(x[0], clef_plot_frame_x(&f, l_peak), 1.0 / 256, "CLI peak marker");
    clef_bandpowers_free(back);
}

static void test_spectrum_cli_peak(void **state)
{
    (void)state;
    /* Bins of 20: enough of them near the top for the default peak fit. */
    clef_bandpowers *src = make_table(40, 2, 20), *bp;
    assert_int_equal(clef_bandpowers_alloc(&bp, src->nbins, 0), CLEF_OK);
    for (int b = 0; b < bp->nbins; b++) {
        bp->l_lo[b] = src->l_lo[b];
        bp->l_hi[b] = src->l_hi[b];
        bp->l_eff[b] = src->l_eff[b];
        bp->dl[b] = src->dl[b];
        bp->dl_err[b] = src->dl_err[b];
        bp->cl[b] = 2 * pi * bp->dl[b] / (bp->l_eff[b] * (bp->l_eff[b] + 1));
    }
    clef_peak_opts po;
    clef_peak_opts_default(&po);
    clef_peak_result fit;
    assert_int_equal(clef_peak_find(bp, &po, &fit), CLEF_OK);
    if (!fit.found)
        fail_msg("no peak in the test table: %s", fit.reason);
    const char *plain = test_path("nopeak.csv");
    assert_int_equal(clef_bandpowers_write_csv(bp, plain), CLEF_OK);
    cli_marker(plain, test_path("cli_fit.svg"), fit.l_peak);

    /* A recorded peak away from the fitted one, to tell the two apart. */
    clef_peak_result rec = fit;
    rec.l_peak = fit.l_peak + 13.7;
    rec.l_peak_err = 4.4;
    assert_int_equal(clef_peak_to_meta(&rec, NULL, bp), CLEF_OK);
    const char *fits = test_path("withpeak.fits");
    assert_int_equal(clef_bandpowers_write_fits(bp, fits), CLEF_OK);
    cli_marker(fits, test_path("cli_meta.svg"), rec.l_peak);
    clef_bandpowers_free(bp);
    free_table(src);
}

/* ------------------------------------------------------- several pairs */

/* n band-power sets of nb bins of width 12 from l = 2, as the run writer
 * makes them: set k scaled by (1 + k / 4) so that panels differ, named
 * "fK x fK+1", written to `path` by clef_bandpowers_write_fits_set. */
static clef_bandpowers **make_sets(int n, int nb, char names[][32], const char *path)
{
    clef_bandpowers **bp = calloc((size_t)n, sizeof *bp);
    const char *nm[CLEF_PLOT_PAIRS_MAX];
    for (int k = 0; k < n; k++) {
        assert_int_equal(clef_bandpowers_alloc(&bp[k], nb, 0), CLEF_OK);
        for (int b = 0; b < nb; b++) {
            bp[k]->l_lo[b] = 2 + 12 * b;
            bp[k]->l_hi[b] = 13 + 12 * b;
            bp[k]->l_eff[b] = 7.5 + 12 * b;
            bp[k]->dl[b] = (1 + 0.25 * k) * (800 + 20 * b);
            bp[k]->dl_err[b] = 60 + 5 * b;
            bp[k]->cl[b] = 2 * pi * bp[k]->dl[b] / (bp[k]->l_eff[b] * (bp[k]->l_eff[b] + 1));
        }
        snprintf(names[k], sizeof names[k], "f%d x f%d", k, k + 1);
        nm[k] = names[k];
    }
    if (path)
        assert_int_equal(clef_bandpowers_write_fits_set((const clef_bandpowers *const *)bp, nm,
                                                        n, NULL, 0, path), CLEF_OK);
    return bp;
}

static void free_sets(clef_bandpowers **bp, int n)
{
    for (int k = 0; k < n; k++)
        clef_bandpowers_free(bp[k]);
    free(bp);
}

/* Number of binary tables whose EXTNAME starts with "BANDPOWER", counted by
 * astropy (the outside reader): the exit status of the probe is 0 iff it
 * equals `expect`. */
static int astropy_count_is(const char *fits, int expect)
{
    return run_cmd("%s -c \"import sys; from astropy.io import fits; "
                   "h = fits.open(sys.argv[1]); "
                   "n = sum(1 for x in h if x.name.startswith('BANDPOWER')); "
                   "sys.exit(0 if n == int(sys.argv[2]) else 1)\" %s %d",
                   ref_python(), fits, expect);
}

static void test_pairs_read_set(void **state)
{
    (void)state;
    char names[7][32];
    const char *fits = test_path("sets7.fits");
    clef_bandpowers **bp = make_sets(7, 9, names, fits);
    assert_int_equal(astropy_count_is(fits, 7), 0);
    clef_bandpowers_set *set;
    assert_int_equal(clef_bandpowers_read_set(&set, fits), CLEF_OK);
    assert_int_equal(set->n, 7);
    for (int k = 0; k < 7; k++) {
        assert_string_equal(set->names[k], names[k]);
        assert_int_equal(set->tables[k]->nbins, 9);
        for (int b = 0; b < 9; b++)
            check_abs(set->tables[k]->dl[b], bp[k]->dl[b], 0, "FITS round trip (exact)");
    }
    clef_bandpowers_set_free(set);

    /* A single table (no EXTVER), a CSV, no file: refused, named. */
    const char *one = test_path("one.fits"), *csv = test_path("one.csv");
    assert_int_equal(clef_bandpowers_write_fits(bp[0], one), CLEF_OK);
    assert_int_equal(clef_bandpowers_write_csv(bp[0], csv), CLEF_OK);
    assert_int_equal(clef_bandpowers_read_set(&set, one), CLEF_EFORMAT);
    assert_non_null(strstr(clef_last_error(), "single band-power table"));
    assert_null(set);
    assert_int_equal(clef_bandpowers_read_set(&set, csv), CLEF_EFORMAT);
    assert_non_null(strstr(clef_last_error(), "not a FITS file"));
    assert_int_equal(clef_bandpowers_read_set(&set, test_path("absent.fits")), CLEF_EIO);
    free_sets(bp, 7);
}

/* The PNG has the size of the layout (IHDR read directly), then its pixels. */
static void load_png_of_size(image *im, const char *png, int width, int height)
{
    int w, h;
    assert_int_equal(png_size(png, &w, &h), 0);
    assert_int_equal(w, width);
    assert_int_equal(h, height);
    image_load(im, png);
}

static int dark(const image *im, double x, double y)
{
    int rgb[3];
    image_rgb(im, (int)floor(x), (int)floor(y), rgb);
    return rgb[0] < 110 && rgb[1] < 110 && rgb[2] < 110;
}

static int white_at(const image *im, double x, double y)
{
    const int w[3] = {255, 255, 255};
    int rgb[3];
    image_rgb(im, (int)floor(x), (int)floor(y), rgb);
    return rgb_close(rgb, w, 0);
}

static void expect_colour(const image *im, double x, double y, const double c[3], const char *what)
{
    int rgb[3];
    image_rgb(im, (int)floor(x), (int)floor(y), rgb);
    const int want[3] = {(int)lround(255 * c[0]), (int)lround(255 * c[1]), (int)lround(255 * c[2])};
    if (!rgb_close(rgb, want, 12))
        fail_msg("%s: pixel (%.0f, %.0f) is (%d, %d, %d), expected (%d, %d, %d)", what, x, y,
                 rgb[0], rgb[1], rgb[2], want[0], want[1], want[2]);
}

/* Grid: one panel per HDU.  Each panel's frame is drawn (dark box edge) and
 * holds its set's first point in the points' colour; the grid cells past the
 * last set are empty. */
static void test_pairs_grid(void **state)
{
    (void)state;
    char names[7][32];
    const char *fits = test_path("grid7.fits"), *png = test_path("grid7.png");
    clef_bandpowers **bp = make_sets(7, 9, names, fits);
    assert_int_equal(astropy_count_is(fits, 7), 0);
    /* Through the command line: auto arrangement for 7 sets is the grid. */
    assert_int_equal(run_cmd("%s plot pairs %s -o %s --quiet", clef_bin(), fits, png), 0);
    const char *nm[7];
    for (int k = 0; k < 7; k++)
        nm[k] = names[k];
    clef_plot_pairs_frame *f = malloc(sizeof *f);
    clef_plot_pairs_opts o = {0};
    o.source = fits;
    assert_int_equal(clef_plot_pairs_layout((const clef_bandpowers *const *)bp, nm, 7, &o, f),
                     CLEF_OK);
    assert_int_equal(f->arrange, CLEF_PLOT_ARRANGE_GRID);
    assert_int_equal(f->npanels, 7);
    assert_int_equal(f->columns, 3);
    assert_int_equal(f->rows, 3);
    image im;
    load_png_of_size(&im, png, f->width, f->height);
    int drawn = 0;
    for (int k = 0; k < f->npanels; k++) {
        const clef_plot_frame *p = &f->panel[k];
        const double mid = 0.5 * (p->top + p->bottom);
        if (!dark(&im, p->left, mid) || !dark(&im, p->right, mid))
            fail_msg("panel %d: no frame at x = %.0f, %.0f", k, p->left, p->right);
        expect_colour(&im, clef_plot_frame_x(p, bp[k]->l_eff[0]),
                      clef_plot_frame_y(p, bp[k]->dl[0]), f->rgb[k], "grid point");
        drawn++;
    }
    assert_int_equal(drawn, 7);
    /* Cells 7 and 8 (row 2, columns 1 and 2): blank where a panel would be. */
    const double dx = f->panel[1].left - f->panel[0].left, dy = f->panel[3].top - f->panel[0].top;
    for (int k = 7; k < 9; k++) {
        const clef_plot_frame *p0 = &f->panel[k % 3 + 3];   /* the panel above, one row up */
        const double x = 0.5 * (p0->left + p0->right), y = 0.5 * (p0->top + p0->bottom) + dy;
        assert_true(dx > 0);
        if (!white_at(&im, x, y) || !white_at(&im, p0->left, y))
            fail_msg("cell %d is not empty", k);
    }
    cairo_surface_destroy(im.s);
    free(f);
    free_sets(bp, 7);
}

/* Overlay: one legend entry per HDU, its marker in the set's colour, nothing
 * after the last; the colours of the sets are distinct. */
static void overlay_case(int n, int arrange)
{
    char names[CLEF_PLOT_PAIRS_MAX][32];
    const char *fits = test_path("over.fits"), *png = test_path("over.png");
    clef_bandpowers **bp = make_sets(n, 10, names, fits);
    assert_int_equal(astropy_count_is(fits, n), 0);
    assert_int_equal(run_cmd("%s plot pairs %s -o %s --quiet%s", clef_bin(), fits, png,
                             arrange == CLEF_PLOT_ARRANGE_OVERLAY ? " --arrange overlay" : ""),
                     0);
    clef_bandpowers_set *set;
    assert_int_equal(clef_bandpowers_read_set(&set, fits), CLEF_OK);
    const char *nm[CLEF_PLOT_PAIRS_MAX];
    for (int k = 0; k < set->n; k++)
        nm[k] = set->names[k];
    clef_plot_pairs_frame *f = malloc(sizeof *f);
    clef_plot_pairs_opts o = {0};
    o.arrange = arrange;
    o.source = fits;
    assert_int_equal(clef_plot_pairs_layout((const clef_bandpowers *const *)set->tables, nm,
                                            set->n, &o, f), CLEF_OK);
    assert_int_equal(f->arrange, CLEF_PLOT_ARRANGE_OVERLAY);
    assert_int_equal(f->nkeys, n);
    image im;
    load_png_of_size(&im, png, f->width, f->height);
    for (int k = 0; k < f->nkeys; k++)
        expect_colour(&im, f->key_x[k], f->key_y[k], f->rgb[k], "legend marker");
    /* Where entry n would be: blank. */
    const double step = n > 1 ? f->key_y[1] - f->key_y[0] : 20;
    assert_true(white_at(&im, f->key_x[n - 1], f->key_y[n - 1] + step));
    for (int a = 0; a < n; a++)
        for (int b = a + 1; b < n; b++) {
            const double d = fabs(f->rgb[a][0] - f->rgb[b][0]) + fabs(f->rgb[a][1] - f->rgb[b][1]) +
                             fabs(f->rgb[a][2] - f->rgb[b][2]);
            if (d < 0.05)
                fail_msg("sets %d and %d share a colour", a, b);
        }
    cairo_surface_destroy(im.s);
    free(f);
    clef_bandpowers_set_free(set);
    free_sets(bp, n);
}

static void test_pairs_overlay_6(void **state)
{
    (void)state;
    overlay_case(6, CLEF_PLOT_ARRANGE_AUTO);
}

static void test_pairs_overlay_20(void **state)
{
    (void)state;
    overlay_case(20, CLEF_PLOT_ARRANGE_OVERLAY);
}

/* Bad input through the command line: documented exit codes
 * (docs/figures.md), no figure left behind. */
static void test_pairs_errors(void **state)
{
    (void)state;
    char names[2][32];
    const char *one = test_path("single.fits"), *csv = test_path("single.csv");
    const char *out = test_path("never.png");
    clef_bandpowers **bp = make_sets(2, 6, names, NULL);
    assert_int_equal(clef_bandpowers_write_fits(bp[0], one), CLEF_OK);
    assert_int_equal(clef_bandpowers_write_csv(bp[0], csv), CLEF_OK);
    const char *q = "2>/dev/null";
    assert_int_equal(run_cmd("%s plot pairs %s -o %s %s", clef_bin(), one, out, q), 5);
    assert_int_equal(run_cmd("%s plot pairs %s -o %s %s", clef_bin(), csv, out, q), 5);
    assert_int_equal(run_cmd("%s plot pairs %s -o %s %s", clef_bin(), test_path("none.fits"),
                             out, q), 4);
    assert_int_equal(run_cmd("%s plot pairs %s -o %s --arrange diagonal %s", clef_bin(), one,
                             out, q), 2);
    assert_int_equal(run_cmd("%s plot spectrum %s -o %s --arrange grid %s", clef_bin(), one,
                             out, q), 2);
    assert_int_equal(run_cmd("%s plot pairs %s -o %s --compare %s %s", clef_bin(), one, out,
                             csv, q), 2);
    assert_false(file_exists(out));
    assert_false(leftover_tmp());
    /* The library: no sets, too many, columns < 0. */
    clef_plot_pairs_frame *f = malloc(sizeof *f);
    const char *nm[2] = {names[0], names[1]};
    assert_int_equal(clef_plot_pairs_layout((const clef_bandpowers *const *)bp, nm, 0, NULL, f),
                     CLEF_EINVAL);
    assert_int_equal(clef_plot_pairs_layout((const clef_bandpowers *const *)bp, nm,
                                            CLEF_PLOT_PAIRS_MAX + 1, NULL, f), CLEF_EINVAL);
    clef_plot_pairs_opts o = {0};
    o.columns = -1;
    assert_int_equal(clef_plot_pairs_layout((const clef_bandpowers *const *)bp, nm, 2, &o, f),
                     CLEF_EINVAL);
    free(f);
    free_sets(bp, 2);
}

/* ----------------------------------------------------------------- map */

/* Forward Mollweide projection, written here independently of the module
 * (Snyder 1987, USGS PP 1395, eqs. 31-1 to 31-4): theta, phi -> device x, y
 * in frame f, longitude increasing to the left. */
static void mollweide(const clef_plot_map_frame *f, double theta, double phi, double *x,
                      double *y)
{
    const double lat = pi / 2 - theta;
    double lon = phi > pi ? phi - 2 * pi : phi;
    double t = lat;
    for (int i = 0; i < 100 && fabs(fabs(lat) - pi / 2) > 1e-12; i++)
        t -= (2 * t + sin(2 * t) - pi * sin(lat)) / (2 + 2 * cos(2 * t));
    *x = f->cx - f->a * (lon / pi) * cos(t);
    *y = f->cy - f->b * sin(t);
}

static void test_map_unproject_roundtrip(void **state)
{
    (void)state;
    clef_plot_map_opts o = {0};
    o.width = 1000;
    clef_plot_map_frame f;
    assert_int_equal(clef_plot_map_layout(&o, &f), CLEF_OK);
    gsl_rng *r = gsl_rng_alloc(gsl_rng_mt19937);
    gsl_rng_set(r, 8);
    for (int i = 0; i < 2000; i++) {
        /* Uniform on the sphere, away from the poles and the lon = 180 seam. */
        const double theta = acos(0.98 * (2 * gsl_rng_uniform(r) - 1));
        const double phi = fmod(0.01 + 6.26 * gsl_rng_uniform(r) + pi, 2 * pi);
        double x, y, th, ph;
        mollweide(&f, theta, phi, &x, &y);
        assert_int_equal(clef_plot_map_unproject(&f, x, y, &th, &ph), 1);
        check_abs(th, theta, 1e-9, "Mollweide inverse of forward (Snyder 1987)");
        check_abs(ph, phi, 1e-9, "Mollweide inverse of forward (Snyder 1987)");
    }
    gsl_rng_free(r);
    double th, ph;
    /* Outside the ellipse: the corners of the bounding box. */
    assert_int_equal(clef_plot_map_unproject(&f, f.cx - f.a + 1, f.cy - f.b + 1, &th, &ph), 0);
    assert_int_equal(clef_plot_map_unproject(&f, f.cx + f.a - 1, f.cy + f.b - 1, &th, &ph), 0);
    /* The centre is (l, b) = (0, 0); a quarter of the width to the left is l = 90 deg. */
    assert_int_equal(clef_plot_map_unproject(&f, f.cx, f.cy, &th, &ph), 1);
    check_abs(th, pi / 2, 1e-12, "centre");
    check_abs(ph, 0, 1e-12, "centre");
    assert_int_equal(clef_plot_map_unproject(&f, f.cx - 0.5 * f.a, f.cy, &th, &ph), 1);
    check_abs(ph, pi / 2, 1e-12, "longitude to the left");
}

/* The colour bar's two ends in the PNG: the scale's low colour at the
 * bottom of the vertical bar, the high colour at its top. */
static void bar_ends(const image *im, const clef_plot_map_frame *f, int lo[3], int hi[3])
{
    const int x = (int)(0.5 * (f->bar_left + f->bar_right));
    image_rgb(im, x, (int)floor(f->bar_bottom) - 2, lo);
    image_rgb(im, x, (int)ceil(f->bar_top) + 1, hi);
}

static void test_map_hemispheres(void **state)
{
    (void)state;
    clef_map *m = make_map(32);
    for (int64_t p = 0; p < m->npix; p++) {
        double th, ph;
        pix2ang_ring64(m->nside, p, &th, &ph);
        m->pix[p] = th < pi / 2 ? 1.0 : 0.0;
    }
    clef_plot_map_opts o = {0};
    o.width = 600;
    o.graticule = -1;
    clef_plot_map_frame f;
    assert_int_equal(clef_plot_map_layout(&o, &f), CLEF_OK);
    const char *png = test_path("hemi.png");
    assert_int_equal(clef_plot_map(m, NULL, &o, png), CLEF_OK);
    int w, h;
    assert_int_equal(png_size(png, &w, &h), 0);
    assert_int_equal(w, 600);
    assert_int_equal(h, f.height);
    check_abs(h, 600 / 2, 0.25 * 600, "height = width/2 + colour-bar room");
    image im;
    image_load(&im, png);
    int lo[3], hi[3], rgb[3];
    bar_ends(&im, &f, lo, hi);
    assert_false(rgb_close(lo, hi, 60));
    /* Every image pixel well inside the ellipse and more than one HEALPix
     * ring (nside 32: 1.2 deg at the equator, ~3 px here) from the equator. */
    int n_top = 0, n_bot = 0;
    for (int y = (int)(f.cy - f.b); y < (int)(f.cy + f.b); y++)
        for (int x = (int)(f.cx - f.a); x < (int)(f.cx + f.a); x++) {
            const double u = (x + 0.5 - f.cx) / f.a, v = (y + 0.5 - f.cy) / f.b;
            if (u * u + v * v > 0.95 || fabs(y + 0.5 - f.cy) < 5)
                continue;
            image_rgb(&im, x, y, rgb);
            if (y < f.cy) {
                assert_true(rgb_close(rgb, hi, 6));
                n_top++;
            } else {
                assert_true(rgb_close(rgb, lo, 6));
                n_bot++;
            }
        }
    assert_true(n_top > 10000 && n_bot > 10000);
    cairo_surface_destroy(im.s);
    free_map(m);
}

/* Centroid of the image pixels in the high colour of a diverging scale. */
static int hot_centroid(const char *png, const clef_plot_map_frame *f, double *x, double *y)
{
    image im;
    image_load(&im, png);
    int lo[3], hi[3], rgb[3];
    bar_ends(&im, f, lo, hi);
    double sx = 0, sy = 0;
    int n = 0;
    for (int j = (int)(f->cy - f->b); j < (int)(f->cy + f->b); j++)
        for (int i = (int)(f->cx - f->a); i < (int)(f->cx + f->a); i++) {
            image_rgb(&im, i, j, rgb);
            if (rgb_close(rgb, hi, 8)) {
                sx += i + 0.5;
                sy += j + 0.5;
                n++;
            }
        }
    cairo_surface_destroy(im.s);
    *x = n ? sx / n : NAN;
    *y = n ? sy / n : NAN;
    return n;
}

static void test_map_hot_pixel(void **state)
{
    (void)state;
    clef_plot_map_opts o = {0};
    o.width = 800;
    o.scale = CLEF_PLOT_SCALE_DIVERGING;
    clef_plot_map_frame f;
    assert_int_equal(clef_plot_map_layout(&o, &f), CLEF_OK);
    const char *png = test_path("hot.png");
    double x, y;

    /* nside 1: pixel 4 is centred on (theta, phi) = (90 deg, 0), i.e.
     * (l, b) = (0, 0) (HEALPix C library pix2ang_ring64); its diamond is
     * symmetric about that point, so its image is centred on the ellipse. */
    clef_map *m = make_map(1);
    double th, ph;
    pix2ang_ring64(1, 4, &th, &ph);
    check_abs(th, pi / 2, 1e-12, "HEALPix C library");
    check_abs(ph, 0, 1e-12, "HEALPix C library");
    m->pix[4] = 1;
    assert_int_equal(clef_plot_map(m, NULL, &o, png), CLEF_OK);
    assert_true(hot_centroid(png, &f, &x, &y) > 100);
    check_abs(x, f.cx, 0.5, "hot pixel at (l, b) = (0, 0) at the centre");
    check_abs(y, f.cy, 0.5, "hot pixel at (l, b) = (0, 0) at the centre");
    free_map(m);

    /* nside 64: the four pixels that meet at (l, b) = (0, 0) (found with
     * ang2pix_ring64 just off the point) make a spot centred there.  The
     * graticule crosses there too and would hide the small spot: off. */
    o.graticule = -1;
    m = make_map(64);
    for (int k = 0; k < 4; k++) {
        int64_t p;
        ang2pix_ring64(64, pi / 2 + (k & 1 ? 1e-6 : -1e-6), k & 2 ? 1e-6 : 2 * pi - 1e-6, &p);
        m->pix[p] = 1;
    }
    assert_int_equal(clef_plot_map(m, NULL, &o, png), CLEF_OK);
    assert_true(hot_centroid(png, &f, &x, &y) > 4);
    check_abs(x, f.cx, 1.0, "hot spot at (l, b) = (0, 0) at the centre");
    check_abs(y, f.cy, 1.0, "hot spot at (l, b) = (0, 0) at the centre");
    free_map(m);

    /* nside 32, one pixel north-east of the centre at l ~ 60 deg, b ~ 30 deg:
     * lands where the forward projection of its centre says, left of the
     * centre (longitude grows to the left) and above it. */
    m = make_map(32);
    int64_t p;
    ang2pix_ring64(32, pi / 3, pi / 3, &p);
    pix2ang_ring64(32, p, &th, &ph);
    m->pix[p] = 1;
    double xe, ye;
    mollweide(&f, th, ph, &xe, &ye);
    assert_int_equal(clef_plot_map(m, NULL, &o, png), CLEF_OK);
    assert_true(hot_centroid(png, &f, &x, &y) > 4);
    check_abs(x, xe, 1.0, "hot pixel at its projected centre");
    check_abs(y, ye, 1.0, "hot pixel at its projected centre");
    assert_true(x < f.cx && y < f.cy);
    free_map(m);
}

/* Missing pixels are hatched (plot_util.c): within a few pixels of (x, y)
 * both greys of the hatch appear, and nothing else. */
static int hatched(const image *im, int x, int y)
{
    const int light[3] = {204, 204, 204}, dark[3] = {143, 143, 143}; /* 0.80, 0.56 x 255 */
    int nl = 0, nd = 0;
    for (int j = y - 2; j <= y + 2; j++)
        for (int i = x - 2; i <= x + 2; i++) {
            int rgb[3];
            image_rgb(im, i, j, rgb);
            if (rgb_close(rgb, light, 2))
                nl++;
            else if (rgb_close(rgb, dark, 2))
                nd++;
            else
                return 0;
        }
    return nl > 0 && nd > 0;
}

static void test_map_missing_and_mask(void **state)
{
    (void)state;
    clef_map *m = make_map(16), *mask = make_map(16);
    for (int64_t p = 0; p < m->npix; p++) {
        double th, ph;
        pix2ang_ring64(16, p, &th, &ph);
        m->pix[p] = 50 * cos(th) + 20 * sin(3 * ph);
        mask->pix[p] = th > pi / 2 ? 0.0 : 1.0;
        /* A missing patch around l = 90 deg, b = 0. */
        if (fabs(th - pi / 2) < 0.2 && fabs(ph - pi / 2) < 0.3)
            m->valid[p] = 0;
    }
    clef_plot_map_opts o = {0};
    o.width = 500;
    clef_plot_map_frame f;
    assert_int_equal(clef_plot_map_layout(&o, &f), CLEF_OK);
    const char *png = test_path("missing.png");
    assert_int_equal(clef_plot_map(m, NULL, &o, png), CLEF_OK);
    image im;
    image_load(&im, png);
    int rgb[3];
    double x, y;
    mollweide(&f, pi / 2 + 0.05, pi / 2 + 0.12, &x, &y); /* inside the missing patch */
    assert_true(hatched(&im, (int)x, (int)y));
    /* Outside the ellipse: the white background. */
    image_rgb(&im, 2, (int)f.cy, rgb);
    assert_true(rgb[0] == 255 && rgb[1] == 255 && rgb[2] == 255);
    cairo_surface_destroy(im.s);

    /* Map x mask: the southern half, masked out, is grey too; the north is not. */
    assert_int_equal(clef_plot_map(m, mask, &o, png), CLEF_OK);
    image_load(&im, png);
    mollweide(&f, 2.5, 4.0, &x, &y); /* between the parallels at -40 and -60 deg */
    assert_true(hatched(&im, (int)x, (int)y));
    mollweide(&f, 0.8, 4.0, &x, &y);
    assert_false(hatched(&im, (int)x, (int)y));
    cairo_surface_destroy(im.s);

    /* Transparent background: alpha 0 outside the ellipse. */
    o.transparent = 1;
    assert_int_equal(clef_plot_map(m, NULL, &o, png), CLEF_OK);
    image_load(&im, png);
    assert_int_equal(cairo_image_surface_get_format(im.s), CAIRO_FORMAT_ARGB32);
    const uint32_t corner = *(const uint32_t *)(const void *)(im.data + (size_t)((int)f.cy) * im.stride + 8);
    assert_int_equal(corner >> 24, 0);
    cairo_surface_destroy(im.s);
    free_map(m);
    free_map(mask);
}

static void test_map_svg_pdf(void **state)
{
    (void)state;
    clef_map *m = make_map(8);
    for (int64_t p = 0; p < m->npix; p++)
        m->pix[p] = (double)(p % 7) - 3;
    clef_plot_map_opts o = {0};
    o.width = 400;
    o.title = "map <&> \"quoted\"";
    clef_plot_map_frame f;
    assert_int_equal(clef_plot_map_layout(&o, &f), CLEF_OK);
    const char *svg = test_path("map.svg"), *pdf = test_path("map.pdf");
    assert_int_equal(clef_plot_map(m, NULL, &o, svg), CLEF_OK);
    assert_true(svg_well_formed(svg));
    assert_int_equal(clef_plot_map(m, NULL, &o, pdf), CLEF_OK);
    check_pdf(pdf, 400, f.height);
    free_map(m);
}

/* The map view's colour scales against an outside colour library:
 * colorspacious (Debian python3-colorspacious; sRGB IEC 61966-2-1, CIELAB
 * CIE 15:2004, CAM02-UCS of Luo, Cui & Li 2006, colour-vision deficiency
 * of Machado, Oliveira & Fernandes 2009) checks the properties that
 * docs/figures.md states: equal CIE76 steps along each arm, equal arm
 * lengths, a neutral centre at L* 97, L* monotonic to ends at 22 (diverging)
 * or from 16 to 94 (sequential), every colour inside the sRGB gamut, and the
 * two arms kept apart under full deuteranomaly and protanomaly. */
static void test_colour_scales(void **state)
{
    (void)state;
    const char *path = test_path("scales.txt");
    FILE *f = fopen(path, "w");
    assert_non_null(f);
    const int scales[2] = {CLEF_PLOT_SCALE_DIVERGING, CLEF_PLOT_SCALE_SEQUENTIAL};
    for (int k = 0; k < 2; k++)
        for (int i = 0; i <= 400; i++) {
            double c[3];
            assert_int_equal(clef_plot_scale_rgb(scales[k], i / 400.0, c), CLEF_OK);
            fprintf(f, "%d %.12f %.12f %.12f\n", k, c[0], c[1], c[2]);
        }
    fclose(f);
    double c[3];
    assert_int_equal(clef_plot_scale_rgb(CLEF_PLOT_SCALE_AUTO, 0.5, c), CLEF_EINVAL);
    assert_int_equal(clef_plot_scale_rgb(CLEF_PLOT_SCALE_DIVERGING, NAN, c), CLEF_EINVAL);
    const char *py = test_path("scales.py");
    f = fopen(py, "w");
    assert_non_null(f);
    fputs("import sys\n"
          "import numpy as np\n"
          "from colorspacious import cspace_convert\n"
          "d = np.loadtxt(sys.argv[1])\n"
          "def steps(x): return np.sqrt((np.diff(x, axis=0) ** 2).sum(1))\n"
          "div = d[d[:, 0] == 0, 1:]; seq = d[d[:, 0] == 1, 1:]\n"
          "assert div.min() > 0.005 and div.max() < 0.995 and seq.min() > 0.005 and seq.max() < 0.995\n"
          "lab = cspace_convert(div, 'sRGB1', 'CIELab')\n"
          "L = lab[:, 0]\n"
          "assert abs(L[200] - 97) < 0.3 and np.hypot(*lab[200, 1:]) < 1, lab[200]\n"
          "assert abs(L[0] - 22) < 0.5 and abs(L[400] - 22) < 0.5, (L[0], L[400])\n"
          "assert (np.diff(L[:201]) > 0).all() and (np.diff(L[200:]) < 0).all()\n"
          "neg, pos = steps(lab[:201]), steps(lab[200:])\n"
          "for a in (neg, pos): assert a.std() / a.mean() < 0.01, a.std() / a.mean()\n"
          "assert abs(neg.sum() / pos.sum() - 1) < 0.01, (neg.sum(), pos.sum())\n"
          "u = steps(cspace_convert(div, 'sRGB1', 'CAM02-UCS'))\n"
          "assert u.std() / u.mean() < 0.3, u.std() / u.mean()\n"
          "k = np.arange(30, 201)\n"
          "for kind in ('deuteranomaly', 'protanomaly'):\n"
          "    cvd = {'name': 'sRGB1+CVD', 'cvd_type': kind, 'severity': 100}\n"
          "    sim = cspace_convert(div, cvd, 'sRGB1').clip(0, 1)\n"
          "    ucs = cspace_convert(sim, 'sRGB1', 'CAM02-UCS')\n"
          "    sep = np.sqrt(((ucs[200 - k] - ucs[200 + k]) ** 2).sum(1))\n"
          "    assert sep.min() > 15, (kind, sep.min())\n"
          "lab = cspace_convert(seq, 'sRGB1', 'CIELab')\n"
          "assert abs(lab[0, 0] - 16) < 0.5 and abs(lab[-1, 0] - 94) < 0.5\n"
          "assert (np.diff(lab[:, 0]) > 0).all()\n"
          "a = steps(lab)\n"
          "assert a.std() / a.mean() < 0.01\n",
          f);
    fclose(f);
    assert_int_equal(run_cmd("%s %s %s", ref_python(), py, path), 0);
}

static void test_map_errors(void **state)
{
    (void)state;
    clef_map *m = make_map(8), *mask = make_map(4);
    clef_plot_map_opts o = {0};
    const char *png = test_path("map_err.png");
    assert_int_equal(clef_plot_map(m, mask, &o, png), CLEF_EINVAL);
    assert_non_null(strstr(clef_last_error(), "nside"));
    assert_int_equal(clef_plot_map(m, NULL, &o, test_path("map.gif")), CLEF_EUNSUP);
    assert_int_equal(clef_plot_map(m, NULL, &o, test_path("none/map.png")), CLEF_EIO);
    o.width = 20;
    assert_int_equal(clef_plot_map(m, NULL, &o, png), CLEF_EINVAL);
    o.width = 300;
    o.have_range = 1;
    o.vmin = 2;
    o.vmax = 1;
    assert_int_equal(clef_plot_map(m, NULL, &o, png), CLEF_EINVAL);
    o.have_range = 0;
    o.percentile = 150;
    o.scale = CLEF_PLOT_SCALE_DIVERGING;
    assert_int_equal(clef_plot_map(m, NULL, &o, png), CLEF_EINVAL);
    o.percentile = 0;
    memset(m->valid, 0, m->npix);
    assert_int_equal(clef_plot_map(m, NULL, &o, png), CLEF_EINVAL);
    assert_false(file_exists(png));
    assert_false(file_exists(test_path("map.gif")));
    assert_false(leftover_tmp());
    free_map(m);
    free_map(mask);
}

/* Text of a PDF page by pdftotext (poppler-utils); cairo embeds fonts with
 * a Unicode map, so the drawn labels come back as text. */
static char *pdf_text(const char *pdf)
{
    const char *txt = test_path("pdftext.txt");
    if (run_cmd("pdftotext %s %s", pdf, txt) != 0)
        return NULL;
    FILE *f = fopen(txt, "r");
    if (!f)
        return NULL;
    char *buf = calloc(1, 65536);
    const size_t n = fread(buf, 1, 65535, f);
    buf[n] = '\0';
    fclose(f);
    return buf;
}

static void test_titles_and_captions(void **state)
{
    (void)state;
    /* Band powers: title from the table's metadata (docs/formats.md keys). */
    clef_bandpowers *bp;
    assert_int_equal(clef_bandpowers_alloc(&bp, 4, 0), CLEF_OK);
    for (int b = 0; b < 4; b++) {
        bp->l_lo[b] = 2 + 50 * b;
        bp->l_hi[b] = 51 + 50 * b;
        bp->l_eff[b] = 26.5 + 50 * b;
        bp->dl[b] = 1000 + 100 * b;
        bp->dl_err[b] = 50;
    }
    /* The keys `clef spectrum` records (src/spectrum.c). */
    assert_int_equal(clef_bandpowers_meta_text(bp, "MAP1", "maps/sky.fits", NULL), CLEF_OK);
    assert_int_equal(clef_bandpowers_meta_text(bp, "MAP2", "maps/sky2.fits", NULL), CLEF_OK);
    assert_int_equal(clef_bandpowers_meta_text(bp, "MASK1", "masks/gal20.fits", NULL), CLEF_OK);
    assert_int_equal(clef_bandpowers_meta_number(bp, "NSIDE", 512, NULL), CLEF_OK);
    const char *pdf = test_path("titles.pdf");
    clef_plot_spectrum_opts so = {0};
    so.source = "tables/bp.fits";
    assert_int_equal(clef_plot_spectrum(bp, &so, pdf), CLEF_OK);
    char *t = pdf_text(pdf);
    assert_non_null(t);
    assert_non_null(strstr(t, "sky.fits"));
    assert_non_null(strstr(t, "sky2.fits"));
    assert_non_null(strstr(t, "mask gal20.fits"));
    assert_non_null(strstr(t, "nside 512"));
    assert_null(strstr(t, "bp.fits"));
    free(t);
    clef_bandpowers_free(bp);
    /* Without metadata: the file name. */
    clef_bandpowers *plain = make_table(4, 2, 50);
    assert_int_equal(clef_plot_spectrum(plain, &so, pdf), CLEF_OK);
    t = pdf_text(pdf);
    assert_non_null(t);
    assert_non_null(strstr(t, "bp.fits"));
    free(t);
    free_table(plain);

    /* Map: the coordinate system and the longitude direction in the caption. */
    clef_map *m = make_map(4);
    strcpy(m->coordsys, "E");
    assert_int_equal(clef_plot_map(m, NULL, NULL, pdf), CLEF_OK);
    t = pdf_text(pdf);
    assert_non_null(t);
    assert_non_null(strstr(t, "Ecliptic"));
    assert_non_null(strstr(t, "increasing to the left"));
    free(t);
    free_map(m);
}

/* ----------------------------------------------------------- curvature */

static const char *write_text(const char *name, const char *text)
{
    const char *p = test_path(name);
    FILE *f = fopen(p, "w");
    assert_non_null(f);
    fputs(text, f);
    fclose(f);
    return p;
}

/* A geometry result as `clef geometry --json` writes it: a Gaussian
 * posterior of Omega_k, mean -0.01, sigma 0.02, on 201 points over
 * [-0.3, 0.3]. */
static const char *write_geometry(const char *name)
{
    char *buf = malloc(1 << 16);
    size_t k = 0;
    k += sprintf(buf + k, "{\"omega_k\": {\"best\": -0.01, \"lo68\": -0.03, \"hi68\": 0.01, "
                          "\"lo95\": -0.0492, \"hi95\": 0.0292},\n \"classification\": \"flat\",\n"
                          " \"acoustic_scale_deg\": 0.81, \"l_peak\": 221.7, \"l_peak_err\": 6.3,\n"
                          " \"curve\": {\"omega_k\": [");
    for (int i = 0; i <= 200; i++)
        k += sprintf(buf + k, "%s%.6f", i ? ", " : "", -0.3 + 0.003 * i);
    k += sprintf(buf + k, "], \"posterior\": [");
    for (int i = 0; i <= 200; i++) {
        const double x = -0.3 + 0.003 * i;
        k += sprintf(buf + k, "%s%.9f", i ? ", " : "", exp(-0.5 * pow((x + 0.01) / 0.02, 2)));
    }
    sprintf(buf + k, "]}}\n");
    const char *p = write_text(name, buf);
    free(buf);
    return p;
}

static void test_curvature(void **state)
{
    (void)state;
    clef_plot_geometry *g;
    assert_int_equal(clef_plot_geometry_read(&g, write_geometry("geo.json")), CLEF_OK);
    assert_int_equal(g->n, 201);
    check_abs(g->best, -0.01, 0, "file value");
    check_abs(g->hi95, 0.0292, 0, "file value");
    check_abs(g->l_peak, 221.7, 0, "file value");
    check_abs(g->omega_k[200], 0.3, 1e-12, "file value");
    assert_string_equal(g->classification, "flat");

    clef_plot_curvature_opts o = {0};
    o.width = 720;
    o.height = 450;
    const char *png = test_path("curv.png"), *svg = test_path("curv.svg"),
               *pdf = test_path("curv.pdf");
    assert_int_equal(clef_plot_curvature(g, &o, png), CLEF_OK);
    int w, h;
    assert_int_equal(png_size(png, &w, &h), 0);
    assert_int_equal(w, 720);
    assert_int_equal(h, 450);
    assert_int_equal(clef_plot_curvature(g, &o, svg), CLEF_OK);
    /* The best-value line is the one vertical path in the marker colour. */
    clef_plot_frame f;
    assert_int_equal(clef_plot_curvature_layout(g, &o, &f), CLEF_OK);
    double x[8], y0[8], y1[8];
    assert_int_equal(svg_markers(svg, x, y0, y1), 1);
    check_abs(x[0], clef_plot_frame_x(&f, -0.01), 1.0 / 256, "best-value marker");
    assert_true(f.xmin <= 0 && f.xmax >= 0);
    /* The x range is where the posterior lives (above 1e-3 of the peak:
     * within 3.7 sigma = 0.074 of -0.01), not the whole grid [-0.3, 0.3]. */
    assert_true(f.xmin <= -0.084 && f.xmax >= 0.064 && f.xmax - f.xmin <= 0.25);
    /* Against Omega_total = 1 - Omega_k the best value sits at 1.01. */
    o.omega_total = 1;
    assert_int_equal(clef_plot_curvature_layout(g, &o, &f), CLEF_OK);
    assert_true(f.xmin <= 1 && f.xmax >= 1.0292);
    assert_int_equal(clef_plot_curvature(g, &o, svg), CLEF_OK);
    assert_int_equal(svg_markers(svg, x, y0, y1), 1);
    check_abs(x[0], clef_plot_frame_x(&f, 1.01), 1.0 / 256, "best-value marker, Omega_total");
    assert_int_equal(clef_plot_curvature(g, NULL, pdf), CLEF_OK);
    check_pdf(pdf, 800, 500);
    char *t = pdf_text(pdf);
    assert_non_null(t);
    assert_non_null(strstr(t, "Curvature: flat"));
    free(t);
    clef_plot_geometry_free(g);
}

static void test_curvature_errors(void **state)
{
    (void)state;
    clef_plot_geometry *g = (clef_plot_geometry *)1;
    assert_int_equal(clef_plot_geometry_read(&g, test_path("absent.json")), CLEF_EIO);
    assert_null(g);
    assert_int_equal(clef_plot_geometry_read(&g, write_text("bad.json", "{\"omega_k\": ")),
                     CLEF_EFORMAT);
    assert_int_equal(
        clef_plot_geometry_read(&g, write_text("nobest.json", "{\"omega_k\": {\"lo68\": 0}}")),
        CLEF_EFORMAT);
    assert_non_null(strstr(clef_last_error(), "best"));
    assert_int_equal(
        clef_plot_geometry_read(
            &g, write_text("len.json",
                           "{\"omega_k\": {\"best\": 0, \"lo68\": 0, \"hi68\": 0, \"lo95\": 0, "
                           "\"hi95\": 0}, \"curve\": {\"omega_k\": [0, 1, 2], "
                           "\"posterior\": [1, 0]}}")),
        CLEF_EFORMAT);
    assert_non_null(strstr(clef_last_error(), "curve"));
    assert_int_equal(
        clef_plot_geometry_read(
            &g, write_text("str.json",
                           "{\"omega_k\": {\"best\": 0, \"lo68\": 0, \"hi68\": 0, \"lo95\": 0, "
                           "\"hi95\": 0}, \"curve\": {\"omega_k\": [0, \"x\"], "
                           "\"posterior\": [1, 0]}}")),
        CLEF_EFORMAT);
    assert_non_null(strstr(clef_last_error(), "curve.omega_k[1]"));

    /* A grid that is not increasing is refused when drawing. */
    double xs[3] = {0, 0.1, 0.05}, ps[3] = {1, 0.5, 0.2};
    clef_plot_geometry bad = {0};
    bad.n = 3;
    bad.omega_k = xs;
    bad.posterior = ps;
    const char *png = test_path("curv_err.png");
    assert_int_equal(clef_plot_curvature(&bad, NULL, png), CLEF_EINVAL);
    xs[2] = 0.2;
    bad.best = NAN;
    assert_int_equal(clef_plot_curvature(&bad, NULL, png), CLEF_EINVAL);
    bad.best = 0;
    assert_int_equal(clef_plot_curvature(&bad, NULL, test_path("curv.tiff")), CLEF_EUNSUP);
    assert_false(file_exists(png));
    assert_false(leftover_tmp());
}

/* Under the leak checker (make sanitize): fontconfig, which cairo's text
 * calls use, keeps a few hundred bytes from parsing its configuration that
 * it never frees; that is not ours to fix.  Hook read by LeakSanitizer. */
const char *__lsan_default_suppressions(void);
const char *__lsan_default_suppressions(void)
{
    return "leak:libfontconfig.so\n";
}

int main(void)
{
    /* The clef binary run by test_spectrum_cli_peak has the same fontconfig
     * leak; its leak checker reads suppressions from a file. */
    const char *supp = test_path("lsan.supp");
    FILE *f = fopen(supp, "w");
    if (f) {
        fputs("leak:libfontconfig.so\n", f);
        fclose(f);
        char opt[1200];
        const char *old = getenv("LSAN_OPTIONS");
        snprintf(opt, sizeof opt, "suppressions=%s%s%s", supp, old && *old ? ":" : "",
                 old ? old : "");
        setenv("LSAN_OPTIONS", opt, 1);
    }
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_format_from_path),
        cmocka_unit_test(test_ticks),
        cmocka_unit_test(test_spectrum_png_size),
        cmocka_unit_test(test_spectrum_marker_linear),
        cmocka_unit_test(test_spectrum_marker_log),
        cmocka_unit_test(test_spectrum_pdf),
        cmocka_unit_test(test_spectrum_errors),
        cmocka_unit_test(test_spectrum_cli_peak),
        cmocka_unit_test(test_pairs_read_set),
        cmocka_unit_test(test_pairs_grid),
        cmocka_unit_test(test_pairs_overlay_6),
        cmocka_unit_test(test_pairs_overlay_20),
        cmocka_unit_test(test_pairs_errors),
        cmocka_unit_test(test_map_unproject_roundtrip),
        cmocka_unit_test(test_map_hemispheres),
        cmocka_unit_test(test_map_hot_pixel),
        cmocka_unit_test(test_map_missing_and_mask),
        cmocka_unit_test(test_map_svg_pdf),
        cmocka_unit_test(test_map_errors),
        cmocka_unit_test(test_colour_scales),
        cmocka_unit_test(test_titles_and_captions),
        cmocka_unit_test(test_curvature),
        cmocka_unit_test(test_curvature_errors),
    };
    const int failed = cmocka_run_group_tests(tests, NULL, NULL);
    /* Release cairo's font caches so that the leak checker sees only what
     * is really lost. */
    cairo_debug_reset_static_data();
    return failed;
}
