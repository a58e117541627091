/* A field: one sky signal as observed.  Its map(s) (one map, or k >= 2
 * noise splits of the same sky with independent noise), its mask (weights
 * in [0,1]), its beam, transfer function and noise description, and its
 * spin (0: temperature; spin 2 is reserved for polarization).
 *
 * A field is a description: the estimator (estimator.h) copies the struct
 * and borrows every pointer in it until clef_estimator_destroy.  The
 * effective weights of a field are mask x validity of every split map, so
 * all splits of a field share one mask and one set of observed pixels.
 *
 * Maps in memory or read on demand: either maps[] holds the split maps
 * (borrowed), or maps[] is all NULL and load_map gives split s when the
 * estimator needs it.  The estimator then holds one such map at a time and
 * hands it back through release_map (NULL: clef_map_free) before it asks
 * for the next, so a run of N fields keeps the a_lm of N maps, not N maps.
 * A one-map field is read once; a field of k >= 2 splits 2k - 1 times (the
 * validity of every split enters the weights before any split is
 * weighted: splits 1..k-1 are read once for that and once for their
 * transform).  Each call for a split must give the same map.  A loader
 * that fails returns its status with the message set (clef_last_error);
 * the estimator stops with that status.
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

/* Reads split `split` (0-based) of the field into *out (the callee's map,
 * handed back through release_map); returns a status. */
typedef int (*clef_field_load_fn)(void *arg, int split, clef_map **out);
typedef void (*clef_field_release_fn)(void *arg, int split, clef_map *map);

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
    clef_field_load_fn load_map;       /* maps read on demand (maps[] NULL); NULL = maps[] */
    clef_field_release_fn release_map; /* NULL = clef_map_free */
    void *load_arg;
} clef_field;

/* A field with no maps, no mask, no beam: fill name, nsplits, maps, mask. */
void clef_field_init(clef_field *f);

#ifdef __cplusplus
}
#endif
#endif
