/* Beam transfer functions: Gaussian and tabulated beams.  The pixel window
 * lives in beam_window.c. */
#define _GNU_SOURCE
#include "clef/beam.h"

#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "core_impl.h"

double clef_beam_sigma(double fwhm_arcmin)
{
    /* sigma = FWHM / sqrt(8 ln 2) (common practice; Knox 1995, PRD 52, 4307
     * writes sigma_b = 0.00742 (FWHM / 1 deg)). */
    return fwhm_arcmin * (M_PI / (180.0 * 60.0)) / sqrt(8.0 * log(2.0));
}

int clef_beam_gaussian(double fwhm_arcmin, int lmax, double *bl)
{
    if (!isfinite(fwhm_arcmin) || fwhm_arcmin < 0)
        CLEF_FAIL(CLEF_EINVAL, "beam FWHM must be a finite number >= 0 arcmin, got %g",
                  fwhm_arcmin);
    if (lmax < 0)
        CLEF_FAIL(CLEF_EINVAL, "beam lmax must be >= 0, got %d", lmax);
    const double s = clef_beam_sigma(fwhm_arcmin);
    for (int l = 0; l <= lmax; l++)
        bl[l] = exp(-0.5 * (double)l * (l + 1.0) * s * s);
    return CLEF_OK;
}

/* Parse "l B_l [more columns]" from one line; 0 = data, 1 = blank or
 * comment, -1 = malformed. */
static int parse_beam_row(char *line, double *l, double *b)
{
    char *hash = strchr(line, '#');
    if (hash)
        *hash = '\0';
    char *p = line;
    while (*p == ' ' || *p == '\t' || *p == '\r' || *p == '\n')
        p++;
    if (!*p)
        return 1;
    char *end;
    errno = 0;
    *l = strtod(p, &end);
    if (end == p || errno)
        return -1;
    p = end;
    while (*p == ' ' || *p == '\t' || *p == ',')
        p++;
    if (*p == '\0' || *p == '\n' || *p == '\r')
        return -1;
    *b = strtod(p, &end);
    if (end == p || errno)
        return -1;
    /* Further columns are allowed and ignored, but must be separated. */
    if (*end && *end != ' ' && *end != '\t' && *end != '\r' && *end != '\n' && *end != ',')
        return -1;
    return 0;
}

int clef_beam_read(const char *path, int lmax, double *bl)
{
    if (lmax < 0)
        CLEF_FAIL(CLEF_EINVAL, "beam lmax must be >= 0, got %d", lmax);
    FILE *f = fopen(path, "r");
    if (!f)
        CLEF_FAIL(CLEF_EIO, "cannot open beam file '%s': %s", path, strerror(errno));
    int status = CLEF_OK;
    char *line = NULL;
    size_t cap = 0;
    long lineno = 0;
    unsigned char *seen = calloc((size_t)lmax + 1, 1);
    if (!seen) {
        fclose(f);
        CLEF_FAIL(CLEF_ENOMEM, "no memory for beam file '%s'", path);
    }
    while (getline(&line, &cap, f) != -1) {
        lineno++;
        double l, b;
        const int r = parse_beam_row(line, &l, &b);
        if (r == 1)
            continue;
        if (r < 0) {
            status = clef_fail(CLEF_EFORMAT, "beam file '%s' line %ld: expected two numbers, l and B_l",
                               path, lineno);
            goto done;
        }
        if (l < 0 || l != floor(l) || l > 1e9) {
            status = clef_fail(CLEF_EFORMAT, "beam file '%s' line %ld: l = %g is not an integer >= 0",
                               path, lineno, l);
            goto done;
        }
        if (!isfinite(b) || b < 0) {
            status = clef_fail(CLEF_EFORMAT, "beam file '%s' line %ld: B_l = %g must be finite and >= 0",
                               path, lineno, b);
            goto done;
        }
        if (l > lmax)
            continue;
        const int il = (int)l;
        if (seen[il]) {
            status = clef_fail(CLEF_EFORMAT, "beam file '%s' line %ld: l = %d appears twice", path,
                               lineno, il);
            goto done;
        }
        seen[il] = 1;
        bl[il] = b;
    }
    if (ferror(f)) {
        status = clef_fail(CLEF_EIO, "cannot read beam file '%s': %s", path, strerror(errno));
        goto done;
    }
    for (int l = 0; l <= lmax; l++) {
        if (!seen[l]) {
            status = clef_fail(CLEF_EINVAL, "beam file '%s' has no row for l = %d (needed up to lmax = %d)",
                               path, l, lmax);
            goto done;
        }
    }
    if (fabs(bl[0] - 1.0) > 1e-3)
        clef_log(CLEF_LOG_WARN, "beam file '%s': B_0 = %g, not 1; used as given", path, bl[0]);
done:
    free(seen);
    free(line);
    fclose(f);
    return status;
}
