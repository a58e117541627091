/* Shared helpers of the Python extension module clef._clef (docs/python.md):
 * exceptions carrying the library's status and message, numpy argument
 * checks, borrowed clef_map views of numpy arrays, and the registration
 * tables of each wrapper file.  The C library does the work; these files
 * only convert arguments and results. */
#ifndef CLEF_PYCLEF_H
#define CLEF_PYCLEF_H

#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <pythread.h>

#define NPY_NO_DEPRECATED_API NPY_1_7_API_VERSION
#define PY_ARRAY_UNIQUE_SYMBOL clef_py_ARRAY_API
#ifndef CLEF_PY_MAIN
#define NO_IMPORT_ARRAY
#endif
#include <numpy/arrayobject.h>

#include "clef/clef.h"
#include "clef/map.h"
#include "clef/table.h"

/* METH_VARARGS | METH_KEYWORDS functions in a PyMethodDef (the void cast
 * keeps -Wcast-function-type quiet; CPython calls them with three args). */
#define PYCLEF_KW(fn) ((PyCFunction)(void (*)(void))(fn))

/* Raise the clef.Error subclass of `status` with clef_last_error() (or
 * clef_strerror(status) when it is empty); returns NULL. */
PyObject *pyclef_raise(int status);

/* Refresh the log threshold from logging.getLogger("clef") (called with
 * the GIL held at the start of every wrapper that runs library code, so
 * the log hook can drop messages without taking the GIL). */
void pyclef_log_refresh(void);

/* The library's warnings (CLEF_LOG_WARN) during a wrapper's call, for the
 * "warnings" list of its summary.  begin() starts collecting on this
 * thread (with or without the GIL), list() stops, returns a new list of
 * str and frees; free() stops and frees without a list (error paths). */
typedef struct pyclef_warnings {
    char **msg;
    int n, cap;
} pyclef_warnings;
void pyclef_warnings_begin(pyclef_warnings *w);
void pyclef_warnings_end(pyclef_warnings *w);
PyObject *pyclef_warnings_list(pyclef_warnings *w);
void pyclef_warnings_free(pyclef_warnings *w);

/* A C-contiguous float64 array of `ndim` dimensions (1 or 2) from `obj`,
 * refusing anything that needs a conversion: a wrong dtype is TypeError,
 * a wrong ndim, a non-contiguous array, or NaN/inf when `finite` is set,
 * ValueError; the message names `what`.  Returns a new reference (the
 * same array) or NULL. */
PyArrayObject *pyclef_double_array(PyObject *obj, const char *what, int ndim, int finite);
/* The same for complex128 a_lm arrays (no finiteness check). */
PyArrayObject *pyclef_complex_array(PyObject *obj, const char *what, int ndim);

/* nside of a RING map of `npix` pixels, or -1 with ValueError naming
 * `what` (npix must be 12 nside^2 with nside a power of two <= 8192). */
int64_t pyclef_nside_of(npy_intp npix, const char *what);

/* A borrowed view of a 1-d float64 map array as a clef_map: NaN pixels are
 * missing (valid 0, value 0; the array is then copied, never changed).
 * `allow_nan` 0 refuses NaN (ValueError; masks); inf is always refused.
 * `coordsys`, `unit` may be NULL.  Free with pyclef_map_release. */
typedef struct pyclef_map {
    clef_map m;
    PyArrayObject *arr;      /* reference kept while the view lives */
    double *pix_copy;        /* owned copy when the array held NaN */
    unsigned char *valid;    /* owned */
} pyclef_map;
int pyclef_map_view(pyclef_map *v, PyObject *obj, const char *what, int allow_nan,
                    const char *coordsys, const char *unit);
void pyclef_map_release(pyclef_map *v);
/* Views of T, Q, U from a (3, npix) array or a sequence of three 1-d
 * arrays, named "what[k] (T)" etc. in messages; all of one nside.  On
 * failure nothing is held. */
int pyclef_map_views3(PyObject *obj, const char *what, pyclef_map v[3], const char *coordsys,
                      const char *unit);

/* A new 1-d float64 array with the pixels of a clef_map, NaN where
 * invalid. */
PyObject *pyclef_map_to_array(const clef_map *m);

/* New 1-d arrays copied from C buffers. */
PyObject *pyclef_vec_double(const double *v, npy_intp n);
PyObject *pyclef_vec_int(const int *v, npy_intp n);

/* Band-power tables: a dict with numpy arrays (l_lo, l_hi, l_eff, cl, dl,
 * dl_err, cov or None, windows or None, meta) and back (from such a dict
 * or a file path).  pyclef_bandpowers_from returns a table to free with
 * clef_bandpowers_free, or NULL with an exception set. */
PyObject *pyclef_bandpowers_dict(const clef_bandpowers *bp);
clef_bandpowers *pyclef_bandpowers_from(PyObject *obj, const char *what);

/* PyArg "O&" converters: an int (or None, leaving the default) into an
 * int; a float (or None) into a double. */
int pyclef_opt_int(PyObject *o, void *out);
int pyclef_opt_double(PyObject *o, void *out);

/* A first-peak result as a dict (py_peak.c). */
struct clef_peak_result;
PyObject *pyclef_peak_dict(const struct clef_peak_result *r);

/* Set a dict item and drop the value's reference; returns -1 on error
 * (also when value is NULL). */
int pyclef_set(PyObject *d, const char *key, PyObject *value);

/* Shared by the spectrum wrappers (py_spectrum.c). */
struct clef_bins;
struct clef_spectrum_result;
/* An optional l-indexed table (B_l, F_l, N_l, C_l from l = 0; None: none):
 * a finite float64 1-d array of 3 values at least, *lmax = its length - 1;
 * *arr keeps it alive (release with Py_XDECREF). */
int pyclef_table(PyObject *o, const char *what, PyArrayObject **arr, const double **v, int *lmax);
/* Bins from a bin-file path or an (n, 2) array of inclusive l ranges,
 * ending at most at lbins. */
int pyclef_make_bins(PyObject *o, int lbins, struct clef_bins **out);
/* Bins of the options bins (None, a path or an array) or log_bins (> 0:
 * that many logarithmic bins), as clef spectrum makes them for maps of
 * `nside`: sets so->bins (and so->lmax when it was 0, the bins' end) from
 * the other fields of so; *bins (NULL when neither is given) is the
 * caller's to destroy.  Returns 0, or -1 with an exception. */
struct clef_spectrum_opts;
int pyclef_spectrum_bins(PyObject *bins_o, int log_bins, int64_t nside,
                         struct clef_spectrum_opts *so, struct clef_bins **bins);
/* The keywords clef.spectrum and clef.spectrum_pol share, as parsed
 * (objects borrowed, Py_None when not given).  init() sets the CLI's
 * defaults; apply() makes the CLI's checks (ValueError, with
 * peak_half_width) and fills so (not bins, names, peak) with the tables
 * beam, transfer, noise_cl, theory_cl kept alive in tabs (Py_XDECREF
 * each; all NULL after a failure). */
typedef struct pyclef_spectrum_kw {
    const char *unit, *coordsys, *mask_coordsys, *cache_dir;
    int lmax, bin_width, log_bins, pixel_window, iterations, keep_multipoles, cache;
    int allow_coord_mismatch;
    double fwhm, fwhm2;        /* fwhm2 < 0: not given */
    PyObject *bins, *beam, *transfer, *noise_cl, *theory_cl, *beam2, *transfer2;
} pyclef_spectrum_kw;
/* Tables apply() keeps alive: beam, transfer, noise_cl, theory_cl and the
 * second map's beam and transfer. */
#define PYCLEF_NTABS 6
void pyclef_spectrum_kw_init(pyclef_spectrum_kw *k);
int pyclef_spectrum_kw_apply(const pyclef_spectrum_kw *k, double peak_half_width,
                             struct clef_spectrum_opts *so, PyArrayObject *tabs[PYCLEF_NTABS]);
/* The CLI's checks of lmax, bin_width, iterations and the peak half width
 * (ValueError, -1). */
int pyclef_check_opts(int lmax, int bin_width, int iterations, double peak_half_width);
/* The summary dict of one result (t_call: seconds in the library call). */
PyObject *pyclef_spectrum_summary(const struct clef_spectrum_result *r, double t_call);
/* Band powers, summary (with the list `warnings`, a reference stolen;
 * NULL = an error already set) and peak of one result as a dict. */
PyObject *pyclef_spectrum_result_dict(const struct clef_spectrum_result *r, double t_call,
                                      PyObject *warnings);

/* Take a plan's lock (one transform at a time per plan, sht.h), waiting
 * without the GIL when another thread holds it (py_sht.c). */
void pyclef_lock_wait(PyThread_type_lock lock);
/* The keywords of a plan object (clef.Sht, clef.ShtSpin): nmaps in
 * 1..nmaps_max (INT_MAX: no limit), mmax None (-1) or 1..lmax; fills o
 * (ValueError, -1).  reset(): the object's lock on first use, then
 * drop(self) (destroying a plan of an earlier __init__) once a running
 * transform of it is done. */
struct clef_sht_opts;
int pyclef_plan_opts(int lmax, int mmax, int nmaps, int nmaps_max, int no_ring_weights,
                     struct clef_sht_opts *o);
int pyclef_plan_reset(PyThread_type_lock *lock, void (*drop)(PyObject *), PyObject *self);

/* Registration of each wrapper file's functions and types. */
extern PyMethodDef pyclef_map_methods[];
extern PyMethodDef pyclef_sht_methods[];
extern PyMethodDef pyclef_mask_methods[];
extern PyMethodDef pyclef_spectrum_methods[];
extern PyMethodDef pyclef_peak_methods[];
extern PyMethodDef pyclef_sim_methods[];
extern PyMethodDef pyclef_theory_methods[];
extern PyMethodDef pyclef_table_methods[];
int pyclef_sht_register(PyObject *module);
int pyclef_sht_spin_register(PyObject *module);
int pyclef_geometry_register(PyObject *module);
int pyclef_estimator_register(PyObject *module);
extern PyMethodDef pyclef_estimator_methods[];
extern PyMethodDef pyclef_spectrum_pol_methods[];

#endif
