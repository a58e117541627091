/* Multipole bins and the binning operators P, Q of Hivon et al. 2002
 * (ApJ 567, 2), METHODS.md section 4. */
#define _XOPEN_SOURCE 700
#include "clef/bins.h"

#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "core_impl.h"

struct clef_bins {
    int nbins;
    int weighting;
    int *lo, *hi; /* inclusive */
};

static int check_weighting(int weighting)
{
    if (weighting != CLEF_BINS_DL && weighting != CLEF_BINS_FLAT)
        CLEF_FAIL(CLEF_EINVAL, "bins: unknown weighting %d (0 = l(l+1)/2pi, 1 = flat)",
                  weighting);
    return CLEF_OK;
}

/* Validate ranges: l_lo >= 2, lo <= hi, ascending without overlap. */
static int check_ranges(int nbins, const int *lo, const int *hi)
{
    if (nbins < 1)
        CLEF_FAIL(CLEF_EINVAL, "bins: need at least one bin (got %d)", nbins);
    for (int i = 0; i < nbins; i++) {
        if (lo[i] < 2)
            CLEF_FAIL(CLEF_EINVAL,
                      "bins: bin %d starts at l = %d; bins must start at l >= 2 (monopole "
                      "and dipole are not binned)", i, lo[i]);
        if (hi[i] < lo[i])
            CLEF_FAIL(CLEF_EINVAL, "bins: bin %d is empty (l_lo = %d > l_hi = %d)", i, lo[i],
                      hi[i]);
        if (i > 0 && lo[i] <= hi[i - 1])
            CLEF_FAIL(CLEF_EINVAL,
                      "bins: bin %d (l_lo = %d) overlaps or precedes bin %d (l_hi = %d)", i,
                      lo[i], i - 1, hi[i - 1]);
    }
    return CLEF_OK;
}

int clef_bins_create_ranges(clef_bins **out, int nbins, const int *lo, const int *hi,
                            int weighting)
{
    int status;
    clef_bins *b = NULL;
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "bins: output pointer is NULL");
    *out = NULL;
    if (!lo || !hi)
        CLEF_FAIL(CLEF_EINVAL, "bins: edge arrays are NULL");
    CLEF_TRY(check_weighting(weighting));
    CLEF_TRY(check_ranges(nbins, lo, hi));
    b = calloc(1, sizeof *b);
    if (!b)
        CLEF_FAIL(CLEF_ENOMEM, "bins: out of memory for %d bins", nbins);
    b->lo = malloc((size_t)nbins * sizeof *b->lo);
    b->hi = malloc((size_t)nbins * sizeof *b->hi);
    if (!b->lo || !b->hi) {
        status = clef_fail(CLEF_ENOMEM, "bins: out of memory for %d bins", nbins);
        goto fail;
    }
    memcpy(b->lo, lo, (size_t)nbins * sizeof *lo);
    memcpy(b->hi, hi, (size_t)nbins * sizeof *hi);
    b->nbins = nbins;
    b->weighting = weighting;
    *out = b;
    return CLEF_OK;
fail:
    clef_bins_destroy(b);
    return status;
}

/* Bins from ascending edges e[0..n] (bin i = e[i] .. e[i+1]-1). */
static int from_edges(clef_bins **out, int n, const int *e, int weighting)
{
    int *lo = malloc((size_t)(n > 0 ? n : 1) * sizeof *lo);
    int *hi = malloc((size_t)(n > 0 ? n : 1) * sizeof *hi);
    if (!lo || !hi) {
        free(lo);
        free(hi);
        CLEF_FAIL(CLEF_ENOMEM, "bins: out of memory for %d bins", n);
    }
    for (int i = 0; i < n; i++) {
        lo[i] = e[i];
        hi[i] = e[i + 1] - 1;
    }
    const int status = clef_bins_create_ranges(out, n, lo, hi, weighting);
    free(lo);
    free(hi);
    return status;
}

int clef_bins_create_linear(clef_bins **out, int l_start, int width, int lmax, int weighting)
{
    if (out)
        *out = NULL;
    if (width < 1)
        CLEF_FAIL(CLEF_EINVAL, "bins: bin width %d must be >= 1", width);
    if (l_start < 2)
        CLEF_FAIL(CLEF_EINVAL, "bins: first multipole %d must be >= 2", l_start);
    if (lmax < l_start)
        CLEF_FAIL(CLEF_EINVAL, "bins: lmax %d is below the first multipole %d", lmax, l_start);
    const int n = (lmax - l_start) / width + 1;
    int *e = malloc((size_t)(n + 1) * sizeof *e);
    if (!e)
        CLEF_FAIL(CLEF_ENOMEM, "bins: out of memory for %d bins", n);
    for (int i = 0; i <= n; i++)
        e[i] = l_start + i * width;
    if (e[n] > lmax + 1)
        e[n] = lmax + 1;
    const int status = from_edges(out, n, e, weighting);
    free(e);
    return status;
}

int clef_bins_create_log(clef_bins **out, int l_start, int lmax, int nbins, int weighting)
{
    if (out)
        *out = NULL;
    if (l_start < 2)
        CLEF_FAIL(CLEF_EINVAL, "bins: first multipole %d must be >= 2", l_start);
    if (nbins < 1 || nbins > lmax - l_start + 1)
        CLEF_FAIL(CLEF_EINVAL,
                  "bins: %d logarithmic bins do not fit in %d <= l <= %d (at most %d)", nbins,
                  l_start, lmax, lmax - l_start + 1 > 0 ? lmax - l_start + 1 : 0);
    int *e = malloc((size_t)(nbins + 1) * sizeof *e);
    if (!e)
        CLEF_FAIL(CLEF_ENOMEM, "bins: out of memory for %d bins", nbins);
    const double ratio = (double)(lmax + 1) / l_start;
    e[0] = l_start;
    for (int i = 1; i <= nbins; i++) {
        int v = (int)lround(l_start * pow(ratio, (double)i / nbins));
        /* at least one multipole per bin, and room left for the rest */
        if (v < e[i - 1] + 1)
            v = e[i - 1] + 1;
        if (v > lmax + 1 - (nbins - i))
            v = lmax + 1 - (nbins - i);
        e[i] = v;
    }
    const int status = from_edges(out, nbins, e, weighting);
    free(e);
    return status;
}

int clef_bins_create_log_ratio(clef_bins **out, int l_start, int lmax, double ratio,
                               int weighting)
{
    if (out)
        *out = NULL;
    if (!(ratio > 1.0) || !isfinite(ratio))
        CLEF_FAIL(CLEF_EINVAL, "bins: logarithmic ratio %g must be > 1", ratio);
    if (l_start < 2)
        CLEF_FAIL(CLEF_EINVAL, "bins: first multipole %d must be >= 2", l_start);
    if (lmax < l_start)
        CLEF_FAIL(CLEF_EINVAL, "bins: lmax %d is below the first multipole %d", lmax, l_start);
    const int cap = lmax - l_start + 2;
    int *e = malloc((size_t)cap * sizeof *e);
    if (!e)
        CLEF_FAIL(CLEF_ENOMEM, "bins: out of memory");
    int n = 0;
    e[0] = l_start;
    while (e[n] <= lmax) {
        double v = floor(ratio * e[n] + 0.5);
        int next = v > lmax + 1.0 ? lmax + 1 : (int)v;
        if (next < e[n] + 1)
            next = e[n] + 1;
        e[++n] = next;
    }
    const int status = from_edges(out, n, e, weighting);
    free(e);
    return status;
}

/* Parse the integers on one line (at most 3 are looked at); returns the
 * count, or -1 on a token that is not an integer. */
static int parse_line(char *s, long v[3])
{
    char *hash = strchr(s, '#');
    if (hash)
        *hash = '\0';
    int n = 0;
    char *p = s;
    for (;;) {
        while (*p == ' ' || *p == '\t' || *p == '\r' || *p == '\n' || *p == ',')
            p++;
        if (!*p)
            return n;
        char *end;
        errno = 0;
        const long x = strtol(p, &end, 10);
        if (end == p || errno || (*end && !strchr(" \t\r\n,", *end)))
            return -1;
        if (n < 3)
            v[n] = x;
        n++;
        p = end;
    }
}

int clef_bins_read(clef_bins **out, const char *path, int lmax, int weighting)
{
    int status = CLEF_OK;
    FILE *f = NULL;
    int *lo = NULL, *hi = NULL;
    char *line = NULL;
    size_t linecap = 0;
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "bins: output pointer is NULL");
    *out = NULL;
    if (!path)
        CLEF_FAIL(CLEF_EINVAL, "bins: file path is NULL");
    CLEF_TRY(check_weighting(weighting));
    f = fopen(path, "r");
    if (!f)
        CLEF_FAIL(CLEF_EIO, "bins: cannot open bin-edge file '%s': %s", path,
                  strerror(errno));
    int n = 0, cap = 0, columns = 0, lineno = 0, last_line = 0;
    while (getline(&line, &linecap, f) >= 0) {
        lineno++;
        long v[3];
        const int k = parse_line(line, v);
        if (k == 0)
            continue;
        if (k < 0 || k > 2) {
            status = clef_fail(CLEF_EFORMAT,
                               "bins: '%s' line %d: expected one edge or two integers "
                               "'l_lo l_hi'", path, lineno);
            goto fail;
        }
        if (columns && k != columns) {
            status = clef_fail(CLEF_EFORMAT,
                               "bins: '%s' line %d: %d value(s) where earlier lines have %d; "
                               "use either one edge per line or 'l_lo l_hi' on every line",
                               path, lineno, k, columns);
            goto fail;
        }
        columns = k;
        for (int i = 0; i < k; i++)
            if (v[i] < 0 || v[i] > 1000000000L) {
                status = clef_fail(CLEF_EFORMAT, "bins: '%s' line %d: multipole %ld out of range",
                                   path, lineno, v[i]);
                goto fail;
            }
        if (n == cap) {
            cap = cap ? 2 * cap : 64;
            int *nlo = realloc(lo, (size_t)cap * sizeof *lo);
            if (nlo)
                lo = nlo;
            int *nhi = realloc(hi, (size_t)cap * sizeof *hi);
            if (nhi)
                hi = nhi;
            if (!nlo || !nhi) {
                status = clef_fail(CLEF_ENOMEM, "bins: out of memory reading '%s'", path);
                goto fail;
            }
        }
        lo[n] = (int)v[0];
        hi[n] = k == 2 ? (int)v[1] : (int)v[0];
        /* Check each line as it comes, so the message can name it. */
        const char *what = NULL;
        char lmax_msg[64];
        snprintf(lmax_msg, sizeof lmax_msg, "bin extends beyond lmax %d", lmax);
        if (k == 2 && hi[n] < lo[n])
            what = "l_hi is below l_lo";
        else if (n > 0 && k == 2 && lo[n] <= hi[n - 1])
            what = "bin overlaps or precedes the previous bin";
        else if (n > 0 && k == 1 && lo[n] <= lo[n - 1])
            what = "edges must increase";
        else if (lo[n] < 2 && (k == 2 || n == 0))
            what = "bins must start at l >= 2 (monopole and dipole are not binned)";
        else if (lmax > 0 && ((k == 2 && hi[n] > lmax) || (k == 1 && lo[n] > lmax + 1)))
            what = lmax_msg;
        if (what) {
            status = clef_fail(CLEF_EFORMAT, "bins: '%s' line %d: %s", path, lineno, what);
            goto fail;
        }
        n++;
        last_line = lineno;
    }
    if (ferror(f)) {
        status = clef_fail(CLEF_EIO, "bins: read error on '%s'", path);
        goto fail;
    }
    if (columns == 1) {
        /* n edges make n - 1 bins: lo[i] .. lo[i+1] - 1 */
        for (int i = 0; i + 1 < n; i++)
            hi[i] = lo[i + 1] - 1;
        n--;
    }
    if (n < 1) {
        status = clef_fail(CLEF_EFORMAT, "bins: '%s' (line %d) defines no bin%s", path,
                           last_line, columns == 1 ? " (a list of edges needs at least two)" : "");
        goto fail;
    }
    status = clef_bins_create_ranges(out, n, lo, hi, weighting);
    if (status != CLEF_OK) {
        char why[1024]; /* the message is rewritten into the same buffer */
        snprintf(why, sizeof why, "%s", clef_last_error());
        status = clef_fail(status == CLEF_ENOMEM ? status : CLEF_EFORMAT, "bins: '%s': %s",
                           path, why);
    }
fail:
    free(line);
    free(lo);
    free(hi);
    if (f)
        fclose(f);
    return status;
}

void clef_bins_destroy(clef_bins *b)
{
    if (!b)
        return;
    free(b->lo);
    free(b->hi);
    free(b);
}

int clef_bins_count(const clef_bins *b) { return b->nbins; }
int clef_bins_l_lo(const clef_bins *b, int bin) { return b->lo[bin]; }
int clef_bins_l_hi(const clef_bins *b, int bin) { return b->hi[bin]; }
double clef_bins_l_eff(const clef_bins *b, int bin) { return 0.5 * (b->lo[bin] + b->hi[bin]); }
int clef_bins_weighting(const clef_bins *b) { return b->weighting; }
int clef_bins_lmax(const clef_bins *b) { return b->hi[b->nbins - 1]; }

double clef_bins_p(const clef_bins *b, int bin, int l)
{
    if (bin < 0 || bin >= b->nbins || l < b->lo[bin] || l > b->hi[bin])
        return 0.0;
    const double nb = b->hi[bin] - b->lo[bin] + 1.0;
    /* Hivon et al. 2002: P_bl = l(l+1) / (2 pi (l_{b+1} - l_b)) */
    if (b->weighting == CLEF_BINS_DL)
        return (double)l * (l + 1.0) / (2.0 * M_PI * nb);
    return 1.0 / nb;
}

double clef_bins_q(const clef_bins *b, int bin, int l)
{
    if (bin < 0 || bin >= b->nbins || l < b->lo[bin] || l > b->hi[bin])
        return 0.0;
    /* Hivon et al. 2002: Q_lb = 2 pi / (l(l+1)) */
    if (b->weighting == CLEF_BINS_DL)
        return 2.0 * M_PI / ((double)l * (l + 1.0));
    return 1.0;
}

int clef_bins_apply(const clef_bins *b, const double *cl, int lmax, double *out)
{
    if (!b || !cl || !out)
        CLEF_FAIL(CLEF_EINVAL, "bins: NULL argument to clef_bins_apply");
    if (lmax < clef_bins_lmax(b))
        CLEF_FAIL(CLEF_EINVAL, "bins: spectrum ends at l = %d but the last bin ends at %d",
                  lmax, clef_bins_lmax(b));
    for (int i = 0; i < b->nbins; i++) {
        double s = 0.0;
        for (int l = b->lo[i]; l <= b->hi[i]; l++)
            s += clef_bins_p(b, i, l) * cl[l];
        out[i] = s;
    }
    return CLEF_OK;
}

int clef_bins_expand(const clef_bins *b, const double *band, int lmax, double *out)
{
    if (!b || !band || !out || lmax < 0)
        CLEF_FAIL(CLEF_EINVAL, "bins: bad argument to clef_bins_expand (lmax %d)", lmax);
    for (int l = 0; l <= lmax; l++)
        out[l] = 0.0;
    for (int i = 0; i < b->nbins; i++)
        for (int l = b->lo[i]; l <= b->hi[i] && l <= lmax; l++)
            out[l] = clef_bins_q(b, i, l) * band[i];
    return CLEF_OK;
}
