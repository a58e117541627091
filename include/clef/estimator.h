/* The estimator of many fields: every requested auto- and cross-spectrum
 * of a list of fields (field.h) as decoupled band powers, with the joint
 * Gaussian covariance of all of them (pseudo-C_l method, Hivon et al.
 * 2002, ApJ 567, 2; covariance after Garcia-Garcia, Alonso & Bellini 2019,
 * JCAP 10, 043, generalised to four fields: docs/method.md section 10).
 *
 * Plan, then execute:
 *   clef_estimator_create(&e, &opts);      run-wide options (spectrum.h)
 *   clef_estimator_add_field(e, &field);   as many as needed
 *   clef_estimator_add_pair(e, "a", "b");  optional: default is every pair a <= b
 *   clef_estimator_compute(e);             each map is transformed once
 *   clef_estimator_result(e, k)            band powers of pair k (its table's
 *                                          covariance is the pair's own block)
 *   clef_estimator_covariance(e, &n)       joint covariance, n = sum of the pairs' bins
 *   clef_estimator_destroy(e);
 *
 * The run-wide options are those of clef_spectrum_opts except the beam,
 * transfer and noise entries, which belong to each field.  What depends on
 * two masks (mask spectra, coupling, deprojection correction, covariance
 * kernels) is computed once per distinct pair of effective weights (in
 * either order), the binned operator K and the band-power windows once per
 * distinct pair of weights and pair filter, and the coupling and mask
 * spectra go through the cache folder as for one pair.
 *
 * Memory: the estimator keeps the a_lm of every map, the distinct weights
 * and one weighted-map buffer; maps the caller holds stay the caller's,
 * and fields whose maps are read on demand (clef_field.load_map) have one
 * map read at a time (field.h).
 *
 * The pair (a, a) of a field with k >= 2 splits is the mean of its
 * k (k - 1) / 2 split crosses; a pair (a, b) of two fields the mean of all
 * k_a k_b cross-split spectra.  Neither carries a noise bias.
 *
 * clef_spectrum_compute (spectrum.h) is this estimator with one field (an
 * auto-spectrum) or two (a cross-spectrum) and one pair.
 */
#ifndef CLEF_ESTIMATOR_H
#define CLEF_ESTIMATOR_H

#include "clef/field.h"
#include "clef/spectrum.h"

#ifdef __cplusplus
extern "C" {
#endif

/* Most fields of one estimator (pairs: up to n (n + 1) / 2). */
#define CLEF_ESTIMATOR_MAX_FIELDS 64

typedef struct clef_estimator clef_estimator;

/* opts may be NULL (defaults); it is copied (its bins and theory pointers are
 * borrowed).  joint = 1 also computes the cross-pair blocks of the joint
 * covariance (each pair's own block is always computed). */
int clef_estimator_create(clef_estimator **out, const clef_spectrum_opts *opts, int joint);
void clef_estimator_destroy(clef_estimator *e); /* NULL is a no-op */

/* Errors: CLEF_EINVAL (no name, a duplicated name, nsplits outside
 * 1..CLEF_FIELD_MAX_SPLITS, a missing map or mask, maps given together
 * with a loader, spin other than 0, too many fields). */
int clef_estimator_add_field(clef_estimator *e, const clef_field *f);
/* Request the pair of the fields named a and b (a may equal b).  Errors:
 * CLEF_EINVAL (a name no field has, a pair requested twice). */
int clef_estimator_add_pair(clef_estimator *e, const char *a, const char *b);

/* Errors: those of clef_spectrum_compute, naming the field at fault. */
int clef_estimator_compute(clef_estimator *e);

int clef_estimator_nfields(const clef_estimator *e);
int clef_estimator_npairs(const clef_estimator *e);
/* Field indices of pair k. */
void clef_estimator_pair_fields(const clef_estimator *e, int k, int *a, int *b);
const char *clef_estimator_field_name(const clef_estimator *e, int i);
/* The result of pair k (owned by the estimator). */
const clef_spectrum_result *clef_estimator_result(const clef_estimator *e, int k);
/* Move the result of pair k to *out (the estimator keeps an empty one). */
void clef_estimator_take_result(clef_estimator *e, int k, clef_spectrum_result *out);
/* Joint covariance of the reported band powers D_b of all pairs, pairs in
 * order, n x n row-major (n = npairs x nbins); NULL before compute.
 * Cross-pair blocks are 0 unless the estimator was created with joint = 1. */
const double *clef_estimator_covariance(const clef_estimator *e, int *n);
/* Reuse, for ensembles of maps with the same masks: before compute, hand
 * e an estimator computed before (prev, or NULL for the first of a
 * series); e takes from it what depends on the masks alone wherever
 * everything that piece depends on is equal in value (the effective
 * weights pixel by pixel, nside, the multipole ranges, iterations and the
 * options that enter it; for a pair's binned operator and windows also its
 * bins and filter): the analysis plan, mask spectra, deprojection
 * correction, coupling matrix, covariance kernels, binned operator and
 * windows.  Results are the same bits as without reuse; what does not
 * match is computed as usual.  e owns prev from this call on, also when it
 * fails (it frees
 * prev's map transforms at once and the rest during compute or destroy),
 * and e keeps its own pieces for the next estimator of the series.
 * Errors: CLEF_EINVAL (e already computed, prev not computed). */
int clef_estimator_reuse(clef_estimator *e, clef_estimator *prev);
/* Pieces e took from its earlier estimator. */
int clef_estimator_reused(const clef_estimator *e);
/* The mask pieces of a computed estimator (those clef_estimator_reuse
 * takes, with what it compares before taking them: the settings, the bins,
 * the SHA-256 of each set of weights) as one malloc'ed block of *n bytes in
 * native byte order, for another process of the same machine family
 * (clef sims sends it over MPI; src/estimator_share.c has the layout).
 * Call it before the estimator is handed to clef_estimator_reuse (which
 * moves the pieces).  Errors: CLEF_EINVAL (not computed, pieces already
 * moved, an imported estimator), CLEF_ENOMEM. */
int clef_estimator_export(const clef_estimator *e, void **buf, size_t *n);
/* An estimator holding the pieces of such bytes and nothing else: it is
 * "computed" for clef_estimator_reuse, which takes from it what matches
 * (weights compared by their SHA-256), the same bits as on the process
 * that made them; any other use returns no results.  Errors: CLEF_EFORMAT
 * (bytes not written by clef_estimator_export of this build, truncated or
 * altered), CLEF_ENOMEM. */
int clef_estimator_import(clef_estimator **out, const void *buf, size_t n);
/* Coupling matrices (M of each mask pair, covariance kernels) this
 * estimator computed, and read from the cache folder; those taken from an
 * earlier estimator count in neither.  Either pointer may be NULL. */
void clef_estimator_couplings(const clef_estimator *e, int *computed, int *read);
/* Spherical-harmonic analyses of maps (each split map once) and of
 * weights and weight products (0 when the mask spectra came from the cache). */
void clef_estimator_transforms(const clef_estimator *e, int *maps, int *masks);

/* How much work the pairs shared: the distinct pairs of weights (mask
 * spectra, deprojection correction, coupling M; a pair and its reverse are
 * one) and the distinct (weights pair, pair filter) behind the binned
 * operators K and the windows.  0 before compute. */
void clef_estimator_shared(const clef_estimator *e, int *mask_pairs, int *operators);

#ifdef __cplusplus
}
#endif
#endif
