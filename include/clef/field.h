/* A field: one sky signal as observed.  Its map(s) (one map, or k >= 2
 * noise splits of the same sky with independent noise), its mask (weights
 * in [0,1]), its beam, transfer function and noise description, and its
 * spin (0: temperature; spin 2 is reserved for polarization).
 *
 * A field is a description: the estimator (estimator.h) copies the struct
 * and borrows every pointer in it until clef_estimator_destroy.  The
 * effective weights of a field are mask x validity of every split map, so
 * all splits of a field share one mask and one set of observed pixels.
 */
#ifndef CLEF_FIELD_H
#define CLEF_FIELD_H

#include "clef/map.h"

#ifdef __cplusplus
extern "C" {
#endif

/* Most noise splits of one field. */
#define CLEF_FIELD_MAX_SPLITS 8
/* Longest field name, bytes including the terminating 0. */
#define CLEF_FIELD_NAME_MAX 64

typedef struct clef_field {
    const char *name;          /* unique among the estimator's fields (pair and HDU names) */
    int nsplits;               /* maps[0..nsplits-1]: 1 map, or 2..CLEF_FIELD_MAX_SPLITS splits */
    const clef_map *maps[CLEF_FIELD_MAX_SPLITS];
    const char *map_names[CLEF_FIELD_MAX_SPLITS]; /* for messages and keywords (may be NULL) */
    const clef_map *mask;      /* weights in [0,1], same nside as the maps */
    const char *mask_name;
    double beam_fwhm;          /* Gaussian beam FWHM, arcmin; 0 = none */
    const double *beam;        /* tabulated B_l, l = 0..beam_lmax, instead; NULL = none */
    int beam_lmax;
    const double *transfer;    /* F_l (in power), l = 0..transfer_lmax; NULL = 1 */
    int transfer_lmax;
    const double *noise_cl;    /* N_l (uK^2, unbeamed) of the single map: subtracted from the
                                  field's auto-spectrum (unused with splits, whose crosses carry
                                  no noise bias) */
    int noise_lmax;
    int spin;                  /* 0 (the only spin supported for now) */
} clef_field;

/* A field with no maps, no mask, no beam: fill name, nsplits, maps, mask. */
void clef_field_init(clef_field *f);

#ifdef __cplusplus
}
#endif
#endif
