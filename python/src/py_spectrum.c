/* clef.spectrum over clef_spectrum_compute of include/clef/spectrum.h: one
 * or two maps and their masks -> band powers, covariance, windows, the
 * first peak and the run summary; and the argument helpers the estimator
 * of many fields (py_estimator.c) and the polarized spectra (py_spectrum_pol.c)
 * share with it. */
#include "pyclef.h"

#include <stdlib.h>
#include <string.h>

#include "clef/bins.h"
#include "clef/peak.h"
#include "clef/spectrum.h"

/* An optional l-indexed table (B_l, F_l, N_l, C_l from l = 0): a finite
 * float64 1-d array; *lmax = its length - 1. */
int pyclef_table(PyObject *o, const char *what, PyArrayObject **arr, const double **v, int *lmax)
{
    *arr = NULL;
    if (!o || o == Py_None)
        return 0;
    if (!(*arr = pyclef_double_array(o, what, 1, 1)))
        return -1;
    if (PyArray_DIM(*arr, 0) < 3) {
        PyErr_Format(PyExc_ValueError, "%s must cover l = 0, 1, 2 at least (got %zd values)",
                     what, (Py_ssize_t)PyArray_DIM(*arr, 0));
        Py_CLEAR(*arr);
        return -1;
    }
    *v = PyArray_DATA(*arr);
    *lmax = (int)PyArray_DIM(*arr, 0) - 1;
    return 0;
}

/* Bins: a file path, or an (n, 2) array of inclusive l ranges. */
int pyclef_make_bins(PyObject *o, int lbins, clef_bins **out)
{
    int st;
    if (PyUnicode_Check(o) || PyObject_HasAttrString(o, "__fspath__")) {
        PyObject *p = NULL;
        if (!PyUnicode_FSConverter(o, &p))
            return -1;
        st = clef_bins_read(out, PyBytes_AS_STRING(p), lbins, CLEF_BINS_DL);
        Py_DECREF(p);
    } else {
        PyArrayObject *a = (PyArrayObject *)PyArray_FROMANY(o, NPY_INT64, 2, 2, NPY_ARRAY_CARRAY_RO);
        if (!a || PyArray_DIM(a, 1) != 2) {
            Py_XDECREF(a);
            PyErr_Clear();
            PyErr_SetString(PyExc_ValueError, "bins must be a bin-file path or an (n, 2) integer "
                            "array of inclusive ranges l_lo, l_hi");
            return -1;
        }
        const int n = (int)PyArray_DIM(a, 0);
        int *lo = malloc(sizeof(int) * (size_t)(n + 1)), *hi = malloc(sizeof(int) * (size_t)(n + 1));
        if (!lo || !hi) {
            free(lo);
            free(hi);
            Py_DECREF(a);
            PyErr_NoMemory();
            return -1;
        }
        const int64_t *d = PyArray_DATA(a);
        for (int i = 0; i < n; i++) {
            /* out-of-range values become -1: the library names the bin */
            lo[i] = d[2 * i] >= 0 && d[2 * i] < 1000000 ? (int)d[2 * i] : -1;
            hi[i] = d[2 * i + 1] >= 0 && d[2 * i + 1] < 1000000 ? (int)d[2 * i + 1] : -1;
        }
        st = clef_bins_create_ranges(out, n, lo, hi, CLEF_BINS_DL);
        free(lo);
        free(hi);
        Py_DECREF(a);
    }
    if (st != CLEF_OK) {
        pyclef_raise(st);
        return -1;
    }
    return 0;
}

/* t_call: wall seconds inside clef_spectrum_compute, for measuring the
 * wrapper's own overhead (make bench). */
PyObject *pyclef_spectrum_summary(const clef_spectrum_result *r, double t_call)
{
    PyObject *s = PyDict_New();
    if (!s)
        return NULL;
    npy_intp dims[2] = {r->cross + 1, 4};
    PyObject *mp = PyArray_SimpleNew(2, dims, NPY_DOUBLE);
    if (mp)
        memcpy(PyArray_DATA((PyArrayObject *)mp), r->multipoles,
               (size_t)(dims[0] * 4) * sizeof(double));
    PyObject *t = PyDict_New();
    for (int i = 0; t && i < r->nstages; i++)
        if (pyclef_set(t, r->stage[i].name, PyFloat_FromDouble(r->stage[i].seconds)) < 0)
            Py_CLEAR(t);
    if (t && pyclef_set(t, "library_call", PyFloat_FromDouble(t_call)) < 0)
        Py_CLEAR(t);
    if (pyclef_set(s, "spectrum", PyUnicode_FromString(r->cross ? "cross" : "auto")) < 0 ||
        pyclef_set(s, "nside", PyLong_FromLongLong(r->nside)) < 0 ||
        pyclef_set(s, "lmax", PyLong_FromLong(r->lmax)) < 0 ||
        pyclef_set(s, "lmax_coupled", PyLong_FromLong(r->lmax_ext)) < 0 ||
        pyclef_set(s, "lmax_mask", PyLong_FromLong(r->lmax_mask)) < 0 ||
        pyclef_set(s, "nbins", PyLong_FromLong(r->nbins)) < 0 ||
        pyclef_set(s, "hidden_bins", PyLong_FromLong(r->nbins_hidden)) < 0 ||
        pyclef_set(s, "bin_width", PyLong_FromLong(r->bin_width)) < 0 ||
        pyclef_set(s, "removal_corrected_to_l", PyLong_FromLong(r->ldep)) < 0 ||
        pyclef_set(s, "f_sky", PyFloat_FromDouble(r->fsky)) < 0 ||
        pyclef_set(s, "w1", PyFloat_FromDouble(r->w1)) < 0 ||
        pyclef_set(s, "w2", PyFloat_FromDouble(r->w2)) < 0 ||
        pyclef_set(s, "w4", PyFloat_FromDouble(r->w4)) < 0 ||
        pyclef_set(s, "f_sky_eff", PyFloat_FromDouble(r->fsky_eff)) < 0 ||
        pyclef_set(s, "rcond", PyFloat_FromDouble(r->rcond)) < 0 ||
        pyclef_set(s, "cache_hit", PyBool_FromLong(r->cache_hit)) < 0 ||
        pyclef_set(s, "removed_multipoles_uK", mp) < 0 || pyclef_set(s, "timings_s", t) < 0) {
        Py_DECREF(s);
        return NULL;
    }
    return s;
}

int pyclef_spectrum_bins(PyObject *bins_o, int log_bins, int64_t nside, clef_spectrum_opts *so,
                         clef_bins **bins)
{
    *bins = NULL;
    if (bins_o == Py_None && log_bins <= 0)
        return 0;
    /* As the CLI: explicit bins end at the given lmax or 3 nside - 1;
     * logarithmic bins at the given or the default lmax. */
    const int lbins = so->lmax ? so->lmax : (int)(3 * nside - 1);
    int st;
    if (bins_o != Py_None) {
        if (pyclef_make_bins(bins_o, lbins, bins) < 0)
            return -1;
    } else {
        int ldef = lbins;
        if ((!so->lmax && (st = clef_spectrum_default_lmax(so, nside, &ldef)) != CLEF_OK) ||
            (st = clef_bins_create_log(bins, 2, ldef, log_bins, CLEF_BINS_DL)) != CLEF_OK) {
            pyclef_raise(st);
            return -1;
        }
    }
    if (!so->lmax)
        so->lmax = clef_bins_lmax(*bins);
    so->bins = *bins;
    return 0;
}

int pyclef_check_opts(int lmax, int bin_width, int iterations, double peak_half_width)
{
    if (lmax != 0 && lmax < 2)
        PyErr_Format(PyExc_ValueError, "lmax must be at least 2 (0: automatic), got %d", lmax);
    else if (bin_width < 0)
        PyErr_Format(PyExc_ValueError, "bin_width must not be negative, got %d", bin_width);
    else if (iterations < 0 || iterations > 20)
        PyErr_Format(PyExc_ValueError, "iterations must be in 0..20, got %d", iterations);
    else if (!(peak_half_width >= 0))
        PyErr_Format(PyExc_ValueError, "peak_half_width must be positive (0: automatic), got %g",
                     peak_half_width);
    else
        return 0;
    return -1;
}

void pyclef_spectrum_kw_init(pyclef_spectrum_kw *k)
{
    memset(k, 0, sizeof *k);
    k->unit = k->coordsys = k->mask_coordsys = "";
    k->pixel_window = 1;
    k->iterations = CLEF_SPECTRUM_ITERATIONS;
    k->cache = 1;
    k->bins = k->beam = k->transfer = k->noise_cl = k->theory_cl = Py_None;
    k->beam2 = k->transfer2 = Py_None;
    k->fwhm2 = -1;
}

int pyclef_spectrum_kw_apply(const pyclef_spectrum_kw *k, double peak_half_width,
                             clef_spectrum_opts *so, PyArrayObject *tabs[PYCLEF_NTABS])
{
    for (int i = 0; i < PYCLEF_NTABS; i++)
        tabs[i] = NULL;
    /* The CLI's own argument checks (src/cli/cmd_spectrum.c), as ValueError. */
    if (pyclef_check_opts(k->lmax, k->bin_width, k->iterations, peak_half_width) < 0)
        return -1;
    if (k->log_bins < 0) {
        PyErr_SetString(PyExc_ValueError, "log_bins must not be negative");
        return -1;
    }
    if ((k->bins != Py_None) + (k->log_bins > 0) + (k->bin_width > 0) > 1) {
        PyErr_SetString(PyExc_ValueError, "choose one of bins, log_bins and bin_width");
        return -1;
    }
    if (!(k->fwhm >= 0)) {
        PyErr_Format(PyExc_ValueError, "beam_fwhm must not be negative, got %g", k->fwhm);
        return -1;
    }
    if (k->beam != Py_None && k->fwhm > 0) {
        PyErr_SetString(PyExc_ValueError, "choose one of beam_fwhm and beam");
        return -1;
    }
    if (k->fwhm2 < 0 && k->fwhm2 != -1) {
        PyErr_Format(PyExc_ValueError, "second_beam_fwhm must not be negative, got %g",
                     k->fwhm2);
        return -1;
    }
    if (k->beam2 != Py_None && k->fwhm2 >= 0) {
        PyErr_SetString(PyExc_ValueError, "choose one of second_beam_fwhm and second_beam");
        return -1;
    }
    so->lmax = k->lmax;
    so->bin_width = k->bin_width;
    so->beam_fwhm = k->fwhm;
    so->pixel_window = k->pixel_window;
    so->iterations = k->iterations;
    so->keep_multipoles = k->keep_multipoles;
    so->use_cache = k->cache;
    so->cache_dir = k->cache_dir;
    so->allow_coord_mismatch = k->allow_coord_mismatch;
    if (pyclef_table(k->beam, "beam", &tabs[0], &so->beam, &so->beam_lmax) < 0 ||
        pyclef_table(k->transfer, "transfer", &tabs[1], &so->transfer, &so->transfer_lmax) < 0 ||
        pyclef_table(k->noise_cl, "noise_cl", &tabs[2], &so->noise_cl, &so->noise_lmax) < 0 ||
        pyclef_table(k->theory_cl, "theory_cl", &tabs[3], &so->theory_cl, &so->theory_lmax) < 0)
        goto fail;
    if (k->fwhm2 >= 0 || k->beam2 != Py_None || k->transfer2 != Py_None) {
        /* The second map's instrument; what is not given is the first's. */
        so->second_instrument = 1;
        so->beam2_fwhm = k->fwhm2 >= 0 ? k->fwhm2 : so->beam_fwhm;
        so->beam2 = k->fwhm2 >= 0 ? NULL : so->beam;
        so->beam2_lmax = k->fwhm2 >= 0 ? 0 : so->beam_lmax;
        so->transfer2 = so->transfer;
        so->transfer2_lmax = so->transfer_lmax;
        if (k->beam2 != Py_None) {
            so->beam2_fwhm = 0;
            if (pyclef_table(k->beam2, "second_beam", &tabs[4], &so->beam2, &so->beam2_lmax) < 0)
                goto fail;
        }
        if (k->transfer2 != Py_None &&
            pyclef_table(k->transfer2, "second_transfer", &tabs[5], &so->transfer2,
                         &so->transfer2_lmax) < 0)
            goto fail;
    }
    return 0;
fail:
    for (int i = 0; i < PYCLEF_NTABS; i++)
        Py_CLEAR(tabs[i]);
    return -1;
}

PyObject *pyclef_spectrum_result_dict(const clef_spectrum_result *r, double t_call,
                                      PyObject *warnings)
{
    PyObject *out = warnings ? pyclef_bandpowers_dict(r->bp) : NULL;
    PyObject *s = out ? pyclef_spectrum_summary(r, t_call) : NULL;
    int ok = s && PyDict_SetItemString(s, "warnings", warnings) == 0;
    if (!ok)
        Py_XDECREF(s);
    else
        ok = pyclef_set(out, "summary", s) == 0 &&
             (r->peak_done ? pyclef_set(out, "peak", pyclef_peak_dict(&r->peak))
                           : PyDict_SetItemString(out, "peak", Py_None)) == 0;
    if (!ok)
        Py_CLEAR(out);
    Py_XDECREF(warnings);
    return out;
}

static PyObject *py_spectrum(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"map1", "mask1", "map2", "mask2", "unit", "coordsys", "mask_coordsys",
                          "lmax", "bin_width", "log_bins", "bins", "beam_fwhm", "beam",
                          "pixel_window", "transfer", "noise_cl", "theory_cl", "iterations",
                          "keep_multipoles", "cache", "cache_dir", "peak", "peak_l_min",
                          "peak_l_max", "peak_half_width", "peak_curv_sigma",
                          "allow_coord_mismatch", "peak_error_draws", "second_beam_fwhm",
                          "second_beam", "second_transfer", NULL};
    PyObject *map_o[2] = {NULL, Py_None}, *mask_o[2] = {NULL, Py_None};
    pyclef_spectrum_kw k;
    pyclef_spectrum_kw_init(&k);
    int peak = 1;
    clef_spectrum_opts so;
    clef_spectrum_opts_default(&so);
    double plmin = so.peak.l_min, plmax = so.peak.l_max, phw = so.peak.half_width;
    double pcurv = so.peak.curv_nsigma;
    int pdraws = so.peak.draws;
    if (!PyArg_ParseTupleAndKeywords(
            args, kw, "OO|OO$sssiiiOdOpOOOippzpdddO&pidOO:spectrum", kwl, &map_o[0], &mask_o[0],
            &map_o[1], &mask_o[1], &k.unit, &k.coordsys, &k.mask_coordsys, &k.lmax,
            &k.bin_width, &k.log_bins, &k.bins, &k.fwhm, &k.beam, &k.pixel_window, &k.transfer,
            &k.noise_cl, &k.theory_cl, &k.iterations, &k.keep_multipoles, &k.cache, &k.cache_dir,
            &peak, &plmin, &plmax, &phw, pyclef_opt_double, &pcurv, &k.allow_coord_mismatch,
            &pdraws, &k.fwhm2, &k.beam2, &k.transfer2))
        return NULL;
    if (pdraws < 0 || pdraws > 100000)
        return PyErr_Format(PyExc_ValueError, "peak_error_draws must be 0 to 100000, got %d",
                            pdraws);
    if (mask_o[1] != Py_None && map_o[1] == Py_None)
        return PyErr_Format(PyExc_ValueError, "mask2 needs a second map (map2)");
    PyArrayObject *tabs[PYCLEF_NTABS];
    if (pyclef_spectrum_kw_apply(&k, phw, &so, tabs) < 0)
        return NULL;

    pyclef_map mv[4];
    memset(mv, 0, sizeof mv);
    clef_bins *bins = NULL;
    clef_spectrum_result res;
    memset(&res, 0, sizeof res);
    PyObject *out = NULL;
    static const char *names[4] = {"map1", "map2", "mask1", "mask2"};
    PyObject *objs[4] = {map_o[0], map_o[1], mask_o[0], mask_o[1]};
    for (int i = 0; i < 4; i++) {
        if (objs[i] == Py_None)
            continue;
        if (pyclef_map_view(&mv[i], objs[i], names[i], i < 2,
                            i < 2 ? k.coordsys : k.mask_coordsys, i < 2 ? k.unit : NULL) < 0)
            goto done;
    }
    so.find_peak = peak;
    so.peak.l_min = plmin;
    so.peak.l_max = plmax;
    so.peak.half_width = phw;
    so.peak.curv_nsigma = pcurv;
    so.peak.draws = pdraws;
    for (int i = 0; i < 4; i++)
        so.names[i] = names[i];
    if (pyclef_spectrum_bins(k.bins, k.log_bins, mv[0].m.nside, &so, &bins) < 0)
        goto done;
    pyclef_log_refresh();
    int st;
    double t_call;
    pyclef_warnings warn;
    pyclef_warnings_begin(&warn);
    Py_BEGIN_ALLOW_THREADS
    t_call = clef_wtime();
    st = clef_spectrum_compute(&mv[0].m, map_o[1] != Py_None ? &mv[1].m : NULL, &mv[2].m,
                               mask_o[1] != Py_None ? &mv[3].m : NULL, &so, &res);
    t_call = clef_wtime() - t_call;
    Py_END_ALLOW_THREADS
    if (st != CLEF_OK) {
        pyclef_warnings_free(&warn);
        pyclef_raise(st);
        goto done;
    }
    out = pyclef_spectrum_result_dict(&res, t_call, pyclef_warnings_list(&warn));
done:
    clef_spectrum_result_free(&res);
    clef_bins_destroy(bins);
    for (int i = 0; i < 4; i++)
        pyclef_map_release(&mv[i]);
    for (int i = 0; i < PYCLEF_NTABS; i++)
        Py_XDECREF(tabs[i]);
    return out;
}

PyMethodDef pyclef_spectrum_methods[] = {
    {"spectrum", PYCLEF_KW(py_spectrum), METH_VARARGS | METH_KEYWORDS,
     "spectrum(map1, mask1, map2=None, mask2=None, *, unit='', coordsys='', mask_coordsys='',\n"
     "         lmax=0, bin_width=0, log_bins=0, bins=None, beam_fwhm=0.0, beam=None,\n"
     "         pixel_window=True, transfer=None, noise_cl=None, theory_cl=None, iterations=1,\n"
     "         keep_multipoles=False, cache=True, cache_dir=None, peak=True, peak_l_min=100.0,\n"
     "         peak_l_max=400.0, peak_half_width=0.0, peak_curv_sigma=2.0,\n"
     "         allow_coord_mismatch=False, peak_error_draws=0, second_beam_fwhm=-1.0,\n"
     "         second_beam=None, second_transfer=None)\n--\n\n"
     "Decoupled band powers (pseudo-C_l, Hivon et al. 2002) as `clef spectrum` computes them,\n"
     "with the same defaults.  map1, map2: float64 RING arrays (NaN = missing pixel), in\n"
     "`unit` (K, mK or uK with or without _CMB; '' = uK); map2 given: the cross-spectrum.\n"
     "mask1 (weights in [0, 1], no NaN) serves both maps unless mask2 is given.\n"
     "coordsys, mask_coordsys: 'G', 'E', 'C' or '' (unknown) for the consistency check.\n"
     "lmax: highest multipole reported (0: 2 nside, lowered by the beam and tables).\n"
     "Bins (one of): bin_width [multipoles, 0 = automatic], log_bins (count), bins (a bin\n"
     "file path or an (n, 2) array of inclusive l ranges).  beam_fwhm [arcmin] or beam\n"
     "(B_l array from l = 0); pixel_window: correct for the HEALPix pixel window;\n"
     "transfer (F_l), noise_cl (N_l [uK^2], subtracted from auto-spectra), theory_cl (C_l\n"
     "[uK^2] for the covariance): arrays from l = 0.  second_beam_fwhm [arcmin, -1: not\n"
     "given] or second_beam, second_transfer: map2 from another instrument (what is not\n"
     "given is map1's).  iterations: analysis Jacobi steps;\n"
     "keep_multipoles: do not remove the monopole and dipole; cache, cache_dir: the coupling\n"
     "cache.  peak: fit the first peak in [peak_l_min, peak_l_max] (peak_half_width 0 =\n"
     "automatic; docs/peak.md).\n\n"
     "Returns a dict: l_lo, l_hi, l_eff, cl [uK^2], dl [uK^2], dl_err [uK^2], cov [uK^4],\n"
     "windows (band-power windows, nbins x (win_lmax+1)), meta (the table keywords), peak\n"
     "(a dict as clef.peak_find returns, or None) and summary (nside, lmax, lmax_coupled,\n"
     "nbins, hidden_bins, bin_width, f_sky, w1, w2, w4, f_sky_eff, rcond, cache_hit,\n"
     "removed_multipoles_uK, timings_s (the library's stages, and library_call: wall seconds\n"
     "inside the library call), warnings (the library's warnings, as the CLI's summary\n"
     "lists them), ...).  Releases the GIL while computing."},
    {NULL, NULL, 0, NULL}};
