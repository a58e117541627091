/* Private state of the estimator of many fields (estimator.h), shared by
 * its stages: estimator.c (plan, lmax, driver), estimator_prepare.c
 * (weights, monopole/dipole, transforms, pseudo-spectra), estimator_bins.c
 * (reported and hidden bins), estimator_decouple.c (mask-pair products,
 * coupling, decoupling, windows), spectrum_cov.c (joint covariance),
 * estimator_result.c (tables, keywords, peak). */
#ifndef CLEF_ESTIMATOR_IMPL_H
#define CLEF_ESTIMATOR_IMPL_H

#include <complex.h>

#include "clef/coupling.h"
#include "clef/estimator.h"
#include "spectrum_deproj.h"

/* One distinct set of effective weights (mask x validity of the maps). */
typedef struct est_weights {
    double *w;                 /* npix */
    int nf;                    /* templates removed from the maps with these weights (0, 1, 4) */
    double fsky, w1, w2, w4;   /* moments */
    int field;                 /* first field with these weights (messages) */
    /* SHA-256 of w's npix doubles: an imported estimator (clef_estimator_import)
     * carries it instead of w; made for this estimator's weights only when
     * compared with one (estimator_reuse.c). */
    unsigned char sha[32];
    int has_sha;
} est_weights;

typedef struct est_field {
    clef_field f;
    char name[CLEF_FIELD_NAME_MAX];
    int wid;                   /* its weights */
    double *filter;            /* F B^2 p^2, l = 0..lmax_ext */
    double complex *alm[CLEF_FIELD_MAX_SPLITS]; /* weighted split maps, to lmax_ext */
    double multipoles[CLEF_FIELD_MAX_SPLITS][4];
} est_field;

/* What depends on the weights of a pair of fields alone. */
typedef struct est_masks {
    int wa, wb;                /* weights ids */
    double *wl;                /* W_l of the mask pair (cross for two masks), 0..lmax_t, then
                                  the kernel spectra k1 = W[w_a^2, w_b^2] and k2 = W[w_a w_b]
                                  (one mask: k1 = k2, stored once) */
    int nrows;                 /* 2 (one mask) or 3 */
    char key[65];              /* cache key of the mask spectra ("" without the cache) */
    clef_spectrum_deproj_out dep;
    clef_coupling *m;          /* M to lmax_ext, corrected for the removal */
    int cache_hit;             /* M from the cache */
    int cw;                    /* coupling width of W_l */
    double wab;                /* mean of w_a w_b */
    int from;                  /* the earlier estimator's mask pair it was taken from, or -1 */
} est_masks;

/* What depends on a pair of weights and the pair filter alone: the hidden
 * bins, the binned operator K and the band-power windows.  One per distinct
 * (weights pair, filter), shared by every pair of fields that has them (the
 * N(N+1)/2 pairs of N fields with a few masks and one beam need a few). */
typedef struct est_op {
    int mp;                    /* its est_masks */
    const double *tl;          /* the filter (the first pair's, borrowed) */
    double *tl_own;            /* an imported estimator's filter (tl points to it), owned */
    clef_bins *all_bins;       /* reported and hidden bins */
    int *rep, nb_all;
    clef_coupling_binned *kb;  /* K over all_bins */
    double *win;               /* windows on D_l, nb x (lmax_ext + 1), once computed */
} est_op;

typedef struct est_pair {
    int a, b;                  /* fields */
    int mp;                    /* its est_masks */
    int op;                    /* its est_op */
    double *tl;                /* pair filter sqrt(F_a F_b) B_a B_b p^2, l = 0..lmax_ext */
    double *pcl;               /* pseudo-spectrum to decouple (split mean), before the noise */
    int noise_sub;             /* the field's noise spectrum was subtracted */
    /* Borrowed from ops[op] (which owns them), for the stages that read them. */
    const clef_bins *all_bins; /* reported and hidden bins */
    const int *rep;
    int nb_all;
    const clef_coupling_binned *kb;  /* K over all_bins */
    double *band;              /* decoupled band powers of all_bins */
    double *cov_all;           /* the pair's own covariance block over the reported bins (nb x nb) */
    clef_spectrum_result res;
} est_pair;

/* Kernel couplings M[w_x w_y, w_z w_u] for the covariance, computed once. */
typedef struct est_kernel {
    int p[4];                  /* weights ids, normalised (x <= y, z <= u, (x,y) <= (z,u)) */
    clef_coupling *m;
} est_kernel;

struct clef_estimator {
    clef_spectrum_opts o;
    int joint;
    int nfields, npairs, nweights, nmasks, nkernels, nops, user_pairs;
    est_field *fields;
    est_pair *pairs;
    est_weights *weights;
    est_masks *masks;
    est_kernel *kernels;
    est_op *ops;
    int64_t nside, npix;
    int lmax, lmax_ext, lmax_t, lmax_auto;
    const clef_bins *bins;     /* reported bins (common to all pairs) */
    clef_bins *own_bins;
    int nb, bin_width;
    double complex **walm;     /* weights and products w_x w_y to lmax_t (joint covariance) */
    int n_map_sht, n_mask_sht;
    double *cov;               /* joint covariance */
    int ncov;
    int nstages;
    struct { char name[24]; double seconds; } stage[CLEF_SPECTRUM_MAX_STAGES];
    double t0;
    int computed;
    /* Reuse between estimators of the same masks (estimator_reuse.c). */
    clef_estimator *prev;      /* the earlier estimator pieces are taken from (owned) */
    int *prev_wid;             /* this run's weights k equal prev's prev_wid[k] (-1: none) */
    int keep;                  /* keep the plan, kernels and windows for a later estimator */
    int nreused;               /* pieces taken from prev */
    struct clef_sht *sht;      /* the maps' analysis plan, kept with keep */
    /* Called once after the map transforms (may be NULL); a non-NULL return
     * is an estimator to take the mask pieces from (an imported one,
     * estimator_share.c), adopted as prev from then on. */
    struct clef_estimator *(*after_maps)(void *arg);
    void *after_maps_arg;
    int imported;              /* made by clef_estimator_import: mask pieces only */
    char *own_cache_dir;       /* an imported estimator's o.cache_dir, owned */
    int n_coupling_made;       /* coupling matrices (M, kernels) computed by this estimator */
    int n_coupling_read;       /* ... read from the cache folder */
};

/* spectrum.c: the limits the options of one field put on lmax, and its
 * signal filter. */
int clef_est_field_opts(const clef_estimator *e, const est_field *f, clef_spectrum_opts *o);
int clef_est_limits(const clef_spectrum_opts *o, int64_t nside, int *l_tab, int *l_beam,
                    char *why, size_t nwhy);
int clef_est_signal_filter(const clef_spectrum_opts *o, int64_t nside, int lmax, double *tl);
/* The options of the second map of a cross-spectrum: o with its beam and
 * transfer entries replaced by the second instrument's (o itself when
 * second_instrument is 0). */
void clef_est_second_opts(const clef_spectrum_opts *o, clef_spectrum_opts *o2);

void clef_est_stage_done(clef_estimator *e, const char *name);
/* A stage of the given length (one measured in pieces); the next starts now. */
void clef_est_stage_add(clef_estimator *e, const char *name, double seconds);
const char *clef_est_map_name(const est_field *f, int split);

/* estimator_prepare.c */
int clef_est_prepare(clef_estimator *e);
int clef_est_pseudo(const clef_estimator *e, int x, int y, int total, double *cl);
int clef_est_weight_alms(clef_estimator *e);
int clef_est_product_index(const clef_estimator *e, int x, int y);

/* estimator_bins.c */
int clef_est_bins(clef_estimator *e);
int clef_est_pair_bins(clef_estimator *e, est_pair *p);

/* estimator_decouple.c */
int clef_est_mask_pairs(clef_estimator *e);
int clef_est_couplings(clef_estimator *e);
int clef_est_decouple(clef_estimator *e, est_pair *p);
int clef_est_windows(clef_estimator *e, est_pair *p);
int clef_est_kernel(clef_estimator *e, int x, int y, int z, int u, const clef_coupling **m);
int clef_est_make_coupling(clef_estimator *e, clef_coupling **m, const double *wl, int *hit);
void clef_est_kernel_key(int x, int y, int z, int u, int k[4]); /* normalised kernel ids */

/* estimator_reuse.c: NULL / 0 when nothing matches.  reuse_weights maps
 * this estimator's weights to prev's and frees prev's (npix doubles each):
 * called as soon as the weights are made, so that the two sets are not
 * held together through the map transforms. */
int clef_est_reuse_weights(clef_estimator *e);
struct clef_sht *clef_est_reuse_sht(clef_estimator *e);
int clef_est_reuse_masks(clef_estimator *e, est_masks *mk, int *taken);
clef_coupling *clef_est_reuse_kernel(clef_estimator *e, const int key[4]);
void clef_est_reuse_op(clef_estimator *e, est_op *op);

/* spectrum_cov.c */
int clef_est_covariance(clef_estimator *e);

/* estimator_result.c */
int clef_est_tables(clef_estimator *e);
int clef_est_results(clef_estimator *e);

#endif
