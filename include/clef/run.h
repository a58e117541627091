/* Run files: a small YAML file that describes the fields, pairs and
 * settings of one run of the estimator of many fields (estimator.h);
 * layout in docs/run-files.md.  Parsed with libyaml; every error names the
 * file, the line and the key at fault.  Relative paths are taken from the
 * run file's folder. */
#ifndef CLEF_RUN_H
#define CLEF_RUN_H

#include <stddef.h>

#include "clef/field.h"

#ifdef __cplusplus
extern "C" {
#endif

/* Largest run file read, bytes. */
#define CLEF_RUN_MAX_BYTES (1 << 20)

typedef struct clef_run_field {
    char *name;
    int line;                          /* line of the field's entry */
    int nsplits;
    char *maps[CLEF_FIELD_MAX_SPLITS]; /* paths, resolved */
    int maps_line;
    char *mask;
    double beam_fwhm;                  /* arcmin, 0: none */
    char *beam_table, *transfer, *noise; /* paths or NULL */
} clef_run_field;

typedef struct clef_run_pair {
    int a, b;                          /* field indices */
    int line;
} clef_run_pair;

typedef struct clef_run {
    char *path;
    int nfields, npairs;               /* npairs 0: every pair */
    clef_run_field *fields;
    clef_run_pair *pairs;
    long lmax, bin_width, iterations;  /* 0 / 0 / -1: defaults */
    int pixel_window;                  /* -1: default (corrected) */
    int keep_multipoles;
    int joint;                         /* -1: default (1) */
    char *model;                       /* C_l for the covariance, or NULL */
    char *output;                      /* output prefix, or NULL */
} clef_run;

/* Parse `len` bytes of YAML; `name` is the file name for messages and the
 * folder relative paths start from.  Errors: CLEF_EINVAL (not YAML, an
 * unknown key, a missing or ill-typed value, a field without maps or mask,
 * duplicated field names, a pair naming an unknown field), CLEF_ENOMEM. */
int clef_run_parse(clef_run **out, const char *text, size_t len, const char *name);
/* Read and parse a file (at most CLEF_RUN_MAX_BYTES): CLEF_EIO as well. */
int clef_run_read(clef_run **out, const char *path);
void clef_run_free(clef_run *r); /* NULL is a no-op */

#ifdef __cplusplus
}
#endif
#endif
