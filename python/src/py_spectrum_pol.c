/* clef.spectrum_pol over clef_spectrum_pol_compute of
 * include/clef/spectrum.h: one T/Q/U field or a pair -> TT, TE, TB, EE, EB,
 * BB band powers with errors, covariances and windows, the E/B leakage
 * windows and the run summary (docs/method.md, "Polarization"); the
 * numbers of `clef spectrum --polarization`. */
#include "pyclef.h"

#include <stdlib.h>
#include <string.h>

#include "clef/bins.h"
#include "clef/spectrum.h"

/* Q and U share one validity, as clef_map_read_pol makes it (map.h): a
 * pixel missing (NaN) in either is missing in both.  The estimator weights
 * Q and U by the validity of Q, so a NaN in U alone must not leave a valid
 * Q pixel beside a zeroed U. */
static int join_qu(pyclef_map *q, pyclef_map *u)
{
    pyclef_map *v[2] = {q, u};
    const int64_t np = q->m.npix;
    for (int64_t p = 0; p < np; p++) {
        if (q->valid[p] == u->valid[p])
            continue;
        pyclef_map *w = q->valid[p] ? q : u; /* the one still valid here */
        if (!w->pix_copy) {
            if (!(w->pix_copy = malloc((size_t)np * sizeof(double)))) {
                PyErr_NoMemory();
                return -1;
            }
            memcpy(w->pix_copy, w->m.pix, (size_t)np * sizeof(double));
            w->m.pix = w->pix_copy;
        }
        w->pix_copy[p] = 0.0;
        w->valid[p] = 0;
    }
    for (int k = 0; k < 2; k++) {
        int64_t n = 0;
        for (int64_t p = 0; p < np; p++)
            n += !v[k]->valid[p];
        v[k]->m.nmissing = v[k]->m.nbad = n;
    }
    return 0;
}

static PyObject *leakage_dict(const clef_spectrum_pol_result *r)
{
    npy_intp dims[2] = {r->nbins, (npy_intp)r->win_lmax + 1};
    const size_t block = (size_t)dims[0] * (size_t)dims[1];
    PyObject *d = PyDict_New();
    static const char *const names[2] = {"EE_to_BB", "BB_to_EE"};
    for (int k = 0; d && k < 2; k++) {
        PyObject *a = PyArray_SimpleNew(2, dims, NPY_DOUBLE);
        if (a && r->leak_win)
            memcpy(PyArray_DATA((PyArrayObject *)a), r->leak_win + k * block,
                   block * sizeof(double));
        if (pyclef_set(d, names[k], a) < 0)
            Py_CLEAR(d);
    }
    return d;
}

static PyObject *result_dict(const clef_spectrum_pol_result *r, double t_call, PyObject *warnings)
{
    PyObject *out = warnings ? PyDict_New() : NULL;
    for (int k = 0; out && k < CLEF_POL_NSPEC; k++)
        if (pyclef_set(out, clef_spectrum_pol_name(k), pyclef_bandpowers_dict(r->bp[k])) < 0)
            Py_CLEAR(out);
    PyObject *s = out ? pyclef_spectrum_summary(&r->tt, t_call) : NULL;
    int ok = s && pyclef_set(s, "rcond_ee_bb", PyFloat_FromDouble(r->rcond_eebb)) == 0 &&
             pyclef_set(s, "rcond_eb_be", PyFloat_FromDouble(r->rcond_ebbe)) == 0 &&
             pyclef_set(s, "pol_cache_hit", PyBool_FromLong(r->pol_cache_hit)) == 0 &&
             pyclef_set(s, "pure_b", PyBool_FromLong(r->pure_b)) == 0 &&
             (!r->pure_b ||
              pyclef_set(s, "pure_b_window_tail",
                         Py_BuildValue("(dd)", r->pure_tail[0], r->pure_tail[1])) == 0) &&
             PyDict_SetItemString(s, "warnings", warnings) == 0;
    if (!ok)
        Py_XDECREF(s);
    else
        ok = pyclef_set(out, "summary", s) == 0 && pyclef_set(out, "leakage", leakage_dict(r)) == 0;
    if (!ok)
        Py_CLEAR(out);
    Py_XDECREF(warnings);
    return out;
}

static PyObject *py_spectrum_pol(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"map1", "mask", "map2", "pol_mask", "unit", "coordsys",
                          "mask_coordsys", "lmax", "bin_width", "log_bins", "bins", "beam_fwhm",
                          "beam", "pixel_window", "transfer", "noise_cl", "pol_noise_cl",
                          "theory_cl", "iterations", "keep_multipoles", "cache", "cache_dir",
                          "allow_coord_mismatch", "pure_b", "second_beam_fwhm", "second_beam",
                          "second_transfer", NULL};
    PyObject *map_o[2] = {NULL, Py_None}, *mask_o[2] = {NULL, Py_None}, *pnoise_o = Py_None;
    pyclef_spectrum_kw k;
    pyclef_spectrum_kw_init(&k);
    int pure_b = 0;
    if (!PyArg_ParseTupleAndKeywords(
            args, kw, "OO|OO$sssiiiOdOpOOOOippzppdOO:spectrum_pol", kwl, &map_o[0], &mask_o[0],
            &map_o[1], &mask_o[1], &k.unit, &k.coordsys, &k.mask_coordsys, &k.lmax,
            &k.bin_width, &k.log_bins, &k.bins, &k.fwhm, &k.beam, &k.pixel_window, &k.transfer,
            &k.noise_cl, &pnoise_o, &k.theory_cl, &k.iterations, &k.keep_multipoles, &k.cache,
            &k.cache_dir, &k.allow_coord_mismatch, &pure_b, &k.fwhm2, &k.beam2, &k.transfer2))
        return NULL;
    clef_spectrum_opts so;
    clef_spectrum_opts_default(&so);
    PyArrayObject *tabs[PYCLEF_NTABS], *pnoise = NULL;
    if (pyclef_spectrum_kw_apply(&k, 0.0, &so, tabs) < 0)
        return NULL;
    so.pure_b = pure_b;
    so.find_peak = 0; /* the library leaves the peak to clef spectrum's temperature run */
    so.names[0] = "map1";
    so.names[1] = "map2";
    so.names[2] = "mask";

    pyclef_map mv[2][3], mk[2];
    memset(mv, 0, sizeof mv);
    memset(mk, 0, sizeof mk);
    clef_bins *bins = NULL;
    clef_spectrum_pol_result res;
    memset(&res, 0, sizeof res);
    PyObject *out = NULL;
    clef_map_pol f[2];
    memset(f, 0, sizeof f);
    static const char *const mnames[2] = {"map1", "map2"}, *const knames[2] = {"mask", "pol_mask"};
    const int nf = map_o[1] != Py_None ? 2 : 1;
    for (int i = 0; i < nf; i++) {
        if (pyclef_map_views3(map_o[i], mnames[i], mv[i], k.coordsys, k.unit) < 0 ||
            join_qu(&mv[i][1], &mv[i][2]) < 0)
            goto done;
        f[i].t = &mv[i][0].m;
        f[i].q = &mv[i][1].m;
        f[i].u = &mv[i][2].m;
    }
    for (int i = 0; i < 2; i++)
        if (mask_o[i] != Py_None &&
            pyclef_map_view(&mk[i], mask_o[i], knames[i], 0, k.mask_coordsys, NULL) < 0)
            goto done;
    const double *noise_p = NULL;
    int noise_p_lmax = 0;
    if (pyclef_table(pnoise_o, "pol_noise_cl", &pnoise, &noise_p, &noise_p_lmax) < 0)
        goto done;
    if (pyclef_spectrum_bins(k.bins, k.log_bins, mv[0][0].m.nside, &so, &bins) < 0)
        goto done;
    pyclef_log_refresh();
    int st;
    double t_call;
    pyclef_warnings warn;
    pyclef_warnings_begin(&warn);
    Py_BEGIN_ALLOW_THREADS
    t_call = clef_wtime();
    st = clef_spectrum_pol_compute(&f[0], nf == 2 ? &f[1] : NULL, &mk[0].m,
                                   mask_o[1] != Py_None ? &mk[1].m : NULL, &so, noise_p,
                                   noise_p_lmax, &res);
    t_call = clef_wtime() - t_call;
    Py_END_ALLOW_THREADS
    if (st != CLEF_OK) {
        pyclef_warnings_free(&warn);
        pyclef_raise(st);
        goto done;
    }
    out = result_dict(&res, t_call, pyclef_warnings_list(&warn));
done:
    clef_spectrum_pol_result_free(&res);
    clef_bins_destroy(bins);
    for (int i = 0; i < 2; i++) {
        for (int c = 0; c < 3; c++)
            pyclef_map_release(&mv[i][c]);
        pyclef_map_release(&mk[i]);
    }
    for (int i = 0; i < PYCLEF_NTABS; i++)
        Py_XDECREF(tabs[i]);
    Py_XDECREF(pnoise);
    return out;
}

PyMethodDef pyclef_spectrum_pol_methods[] = {
    {"spectrum_pol", PYCLEF_KW(py_spectrum_pol), METH_VARARGS | METH_KEYWORDS,
     "spectrum_pol(map1, mask, map2=None, *, pol_mask=None, unit='', coordsys='',\n"
     "             mask_coordsys='', lmax=0, bin_width=0, log_bins=0, bins=None,\n"
     "             beam_fwhm=0.0, beam=None, pixel_window=True, transfer=None,\n"
     "             noise_cl=None, pol_noise_cl=None, theory_cl=None, iterations=1,\n"
     "             keep_multipoles=False, cache=True, cache_dir=None,\n"
     "             allow_coord_mismatch=False, pure_b=False, second_beam_fwhm=-1.0,\n"
     "             second_beam=None, second_transfer=None)\n--\n\n"
     "The six band powers TT, TE, TB, EE, EB, BB as `clef spectrum --polarization`\n"
     "computes them (pseudo-C_l with the spin-2 coupling, E and B decoupled jointly;\n"
     "docs/method.md), with the same defaults.  map1, map2: T, Q, U as a (3, npix)\n"
     "float64 array or three RING maps (NaN = missing; Q and U in the COSMO convention,\n"
     "as clef.read_map_pol returns them; a pixel missing in Q or U is missing in both),\n"
     "in `unit` ('' = uK); map2 given: the six cross-spectra T1 x E2, ...  mask weights T\n"
     "([0, 1], no NaN), pol_mask Q and U (default: mask).  TT is clef.spectrum of T\n"
     "(lmax, bins, beam_fwhm [arcmin] or beam, pixel_window, transfer, noise_cl and\n"
     "theory_cl [uK^2] for TT, iterations, keep_multipoles, cache as there); the other\n"
     "spectra use TT's bins and the same beam, pixel window (the temperature one) and\n"
     "transfer function; second_beam_fwhm [arcmin, -1: not given] or second_beam and\n"
     "second_transfer: map2's own (what is not given is map1's).  pol_noise_cl: N_l [uK^2] of the Q/U noise (N^EE = N^BB, from\n"
     "l = 0 to at least the coupled lmax), subtracted from the auto EE and BB (ignored\n"
     "with a warning for a pair).  pure_b: BB from pure-B multipoles (B-mode\n"
     "purification, `clef spectrum --polarization --pure-b`; the Q/U weight must be\n"
     "tapered, else clef.Error).\n\n"
     "Returns a dict: TT, TE, TB, EE, EB, BB (band-power dicts as clef.spectrum gives:\n"
     "l_lo, l_hi, l_eff, cl, dl, dl_err [uK^2], cov [uK^4], windows on D_l of the same\n"
     "spectrum, meta with SPECTRUM), leakage (EE_to_BB: the BB bands' windows on D^EE_l,\n"
     "BB_to_EE: the EE bands' windows on D^BB_l, nbins x (lmax_coupled + 1)) and summary\n"
     "(that of clef.spectrum for TT, plus rcond_ee_bb, rcond_eb_be of the joint E/B\n"
     "operators, pol_cache_hit, pure_b and with it pure_b_window_tail per field;\n"
     "warnings: the library's warnings).  Releases the GIL."},
    {NULL, NULL, 0, NULL}};
