/* clef.simulate, clef.simulate_pol and the a_lm / noise draws of
 * include/clef/sim.h, and the instrument transfer functions of
 * include/clef/beam.h they use. */
#include "pyclef.h"

#include <complex.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "clef/beam.h"
#include "clef/sht.h"
#include "clef/sim.h"

/* A C_l array covering l = 0..lmax (lmax < 0: its own length - 1). */
static PyArrayObject *cl_array(PyObject *o, int *lmax)
{
    PyArrayObject *a = pyclef_double_array(o, "cl", 1, 1);
    if (!a)
        return NULL;
    const npy_intp n = PyArray_DIM(a, 0);
    if (*lmax < 0)
        *lmax = (int)n - 1;
    if (n < (npy_intp)*lmax + 1 || *lmax < 0) {
        PyErr_Format(PyExc_ValueError, "cl has %zd values (l = 0..%zd), the simulation needs "
                     "l = 0..%d", (Py_ssize_t)n, (Py_ssize_t)n - 1, *lmax);
        Py_DECREF(a);
        return NULL;
    }
    return a;
}

/* B_l, l = 0..lmax, into bl: from the array beam_o, or the Gaussian beam
 * of fwhm [arcmin] when beam_o is None. */
static int beam_into(PyObject *beam_o, double fwhm, int lmax, double *bl)
{
    if (beam_o == Py_None) {
        const int st = clef_beam_gaussian(fwhm, lmax, bl);
        if (st != CLEF_OK)
            pyclef_raise(st);
        return st == CLEF_OK ? 0 : -1;
    }
    int bl_lmax = lmax;
    PyArrayObject *a = cl_array(beam_o, &bl_lmax);
    if (!a) {
        if (PyErr_ExceptionMatches(PyExc_ValueError)) {
            PyErr_Clear();
            PyErr_Format(PyExc_ValueError, "beam must cover l = 0..%d (lmax)", lmax);
        }
        return -1;
    }
    memcpy(bl, PyArray_DATA(a), sizeof(double) * ((size_t)lmax + 1));
    Py_DECREF(a);
    return 0;
}

static PyObject *py_simulate(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"nside", "cl", "lmax", "seed", "beam_fwhm", "beam", "pixel_window",
                          "noise_depth", "hits", "splits", "return_alm", NULL};
    long long nside;
    PyObject *cl_o, *beam_o = Py_None, *hits_o = Py_None;
    int lmax = -1, with_pixel_window = 1, splits = 1, want_alm = 0;
    unsigned long long seed = 1;
    double fwhm = 0, depth = 0;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "LO|$O&KdOpdOip:simulate", kwl, &nside, &cl_o,
                                     pyclef_opt_int, &lmax, &seed, &fwhm, &beam_o,
                                     &with_pixel_window, &depth, &hits_o, &splits, &want_alm))
        return NULL;
    /* The CLI's checks (src/cli/cmd_simulate.c). */
    if (!clef_nside_valid(nside))
        return PyErr_Format(PyExc_ValueError, "nside must be a power of two in [1, %d], got %lld",
                            CLEF_NSIDE_MAX, nside);
    if (lmax < 0)
        lmax = (int)(3 * nside - 1);
    if (lmax < 2 || lmax > 4 * nside)
        return PyErr_Format(PyExc_ValueError, "lmax must be in [2, 4 nside = %lld], got %d",
                            4 * nside, lmax);
    if (splits != 1 && splits != 2)
        return PyErr_Format(PyExc_ValueError, "splits must be 1 or 2, got %d", splits);
    if (fwhm < 0 || !isfinite(fwhm))
        return PyErr_Format(PyExc_ValueError, "beam_fwhm must be >= 0, got %g", fwhm);
    if (beam_o != Py_None && fwhm > 0)
        return PyErr_Format(PyExc_ValueError, "choose one of beam_fwhm and beam");
    if (hits_o != Py_None && !(depth > 0))
        return PyErr_Format(PyExc_ValueError, "hits needs noise_depth > 0");

    PyArrayObject *cl = cl_array(cl_o, &lmax), *hits_a = NULL;
    if (!cl)
        return NULL;
    const npy_intp npix = (npy_intp)clef_nside_npix(nside);
    double *bl = malloc(sizeof(double) * ((size_t)lmax + 1));
    unsigned char *valid = malloc((size_t)npix);
    PyObject *maps = NULL, *alm = NULL, *out = NULL;
    clef_sht *sht = NULL;
    int st = CLEF_OK;
    if (!bl || !valid) {
        PyErr_NoMemory();
        goto done;
    }
    if (beam_into(beam_o, fwhm, lmax, bl) < 0)
        goto done;
    if (hits_o != Py_None) {
        if (!(hits_a = pyclef_double_array(hits_o, "hits", 1, 1)))
            goto done;
        if (PyArray_DIM(hits_a, 0) != npix) {
            PyErr_Format(PyExc_ValueError, "hits has %zd pixels, nside %lld needs %zd",
                         (Py_ssize_t)PyArray_DIM(hits_a, 0), nside, (Py_ssize_t)npix);
            goto done;
        }
    }
    npy_intp dims[2] = {splits, npix};
    maps = splits == 2 ? PyArray_SimpleNew(2, dims, NPY_DOUBLE) : PyArray_SimpleNew(1, dims + 1, NPY_DOUBLE);
    npy_intp na = (npy_intp)clef_alm_size(lmax, lmax);
    if (!maps || (want_alm && !(alm = PyArray_SimpleNew(1, &na, NPY_CDOUBLE))))
        goto done;
    double *pix = PyArray_DATA((PyArrayObject *)maps);
    double *mp[2] = {pix, splits == 2 ? pix + npix : NULL};
    clef_sim_opts so = {0};
    so.seed = seed;
    so.beam = bl;
    so.pixel_window = with_pixel_window;
    so.noise_depth = depth;
    so.hits = hits_a ? PyArray_DATA(hits_a) : NULL;
    so.nsplits = splits;
    const double *clv = PyArray_DATA(cl);
    double complex *almv = alm ? PyArray_DATA((PyArrayObject *)alm) : NULL;
    pyclef_log_refresh();
    Py_BEGIN_ALLOW_THREADS
    st = clef_sht_create(&sht, nside, lmax, NULL);
    if (st == CLEF_OK)
        st = clef_sim_map(sht, clv, &so, almv, mp, valid);
    clef_sht_destroy(sht);
    Py_END_ALLOW_THREADS
    if (st != CLEF_OK) {
        pyclef_raise(st);
        goto done;
    }
    if (hits_a)
        for (int s = 0; s < splits; s++)
            for (npy_intp p = 0; p < npix; p++)
                if (!valid[p])
                    mp[s][p] = NAN; /* no hits: a missing pixel */
    out = want_alm ? Py_BuildValue("(OO)", maps, alm) : Py_NewRef(maps);
done:
    Py_XDECREF(maps);
    Py_XDECREF(alm);
    Py_DECREF(cl);
    Py_XDECREF(hits_a);
    free(bl);
    free(valid);
    return out;
}

static PyObject *py_sim_alm(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"cl", "seed", "lmax", NULL};
    PyObject *cl_o;
    unsigned long long seed = 1;
    int lmax = -1;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "O|$KO&:sim_alm", kwl, &cl_o, &seed,
                                     pyclef_opt_int, &lmax))
        return NULL;
    PyArrayObject *cl = cl_array(cl_o, &lmax);
    if (!cl)
        return NULL;
    npy_intp na = (npy_intp)clef_alm_size(lmax, lmax);
    PyObject *alm = PyArray_SimpleNew(1, &na, NPY_CDOUBLE);
    if (alm) {
        const double *clv = PyArray_DATA(cl);
        double complex *av = PyArray_DATA((PyArrayObject *)alm);
        int st;
        Py_BEGIN_ALLOW_THREADS
        st = clef_sim_alm(lmax, clv, seed, av);
        Py_END_ALLOW_THREADS
        if (st != CLEF_OK) {
            Py_CLEAR(alm);
            pyclef_raise(st);
        }
    }
    Py_DECREF(cl);
    return alm;
}

/* ---- polarization (clef_sim_alm_pol; clef simulate --polarization) ---- */

/* The four spectra TT, EE, BB, TE as a (4, n) array covering l = 0..lmax
 * (lmax < 0: n - 1). */
static PyArrayObject *cl4_array(PyObject *o, int *lmax)
{
    PyArrayObject *a = pyclef_double_array(o, "cl", 2, 1);
    if (!a)
        return NULL;
    const npy_intp n = PyArray_DIM(a, 1);
    if (PyArray_DIM(a, 0) != 4) {
        PyErr_Format(PyExc_ValueError, "cl must have shape (4, lmax + 1): rows TT, EE, BB, TE "
                     "(as clef.read_cl_pol returns), got %zd rows", (Py_ssize_t)PyArray_DIM(a, 0));
        Py_DECREF(a);
        return NULL;
    }
    if (*lmax < 0)
        *lmax = (int)n - 1;
    if (n < (npy_intp)*lmax + 1 || *lmax < 2) {
        PyErr_Format(PyExc_ValueError, "cl has %zd multipoles (l = 0..%zd), the simulation needs "
                     "l = 0..%d (lmax >= 2)", (Py_ssize_t)n, (Py_ssize_t)n - 1, *lmax);
        Py_DECREF(a);
        return NULL;
    }
    return a;
}

/* a_T, a_E, a_B rows of a new (3, alm_size(lmax)) array from the spectra. */
static PyObject *alm_pol_draw(PyArrayObject *cl, int lmax, uint64_t seed, int *st)
{
    npy_intp dims[2] = {3, (npy_intp)clef_alm_size(lmax, lmax)};
    PyObject *alm = PyArray_SimpleNew(2, dims, NPY_CDOUBLE);
    if (!alm)
        return NULL;
    const double *c = PyArray_DATA(cl);
    const size_t n = (size_t)PyArray_DIM(cl, 1);
    double complex *a = PyArray_DATA((PyArrayObject *)alm);
    const size_t na = (size_t)dims[1];
    Py_BEGIN_ALLOW_THREADS
    *st = clef_sim_alm_pol(lmax, c, c + n, c + 2 * n, c + 3 * n, seed, a, a + na, a + 2 * na);
    Py_END_ALLOW_THREADS
    return alm;
}

static PyObject *py_sim_alm_pol(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"cl", "seed", "lmax", NULL};
    PyObject *cl_o;
    unsigned long long seed = 1;
    int lmax = -1, st = CLEF_OK;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "O|$KO&:sim_alm_pol", kwl, &cl_o, &seed,
                                     pyclef_opt_int, &lmax))
        return NULL;
    PyArrayObject *cl = cl4_array(cl_o, &lmax);
    if (!cl)
        return NULL;
    pyclef_log_refresh();
    PyObject *alm = alm_pol_draw(cl, lmax, seed, &st);
    Py_DECREF(cl);
    if (alm && st != CLEF_OK) {
        Py_CLEAR(alm);
        pyclef_raise(st);
    }
    return alm;
}

static PyObject *py_simulate_pol(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"nside", "cl", "lmax", "seed", "beam_fwhm", "beam", "pixel_window",
                          "noise_depth", "pol_noise_depth", "return_alm", NULL};
    long long nside;
    PyObject *cl_o, *beam_o = Py_None, *pdepth_o = Py_None;
    int lmax = -1, with_pixel_window = 1, want_alm = 0;
    unsigned long long seed = 1;
    double fwhm = 0, depth = 0, pdepth = 0;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "LO|$O&KdOpdOp:simulate_pol", kwl, &nside, &cl_o,
                                     pyclef_opt_int, &lmax, &seed, &fwhm, &beam_o,
                                     &with_pixel_window, &depth, &pdepth_o, &want_alm))
        return NULL;
    /* The CLI's checks (src/cli/cmd_simulate_pol.c). */
    if (!clef_nside_valid(nside))
        return PyErr_Format(PyExc_ValueError, "nside must be a power of two in [1, %d], got %lld",
                            CLEF_NSIDE_MAX, nside);
    if (lmax < 0)
        lmax = (int)(3 * nside - 1);
    if (lmax < 2 || lmax > 3 * nside - 1)
        return PyErr_Format(PyExc_ValueError, "lmax must be in [2, 3 nside - 1 = %lld], got %d",
                            3 * nside - 1, lmax);
    if (fwhm < 0 || !isfinite(fwhm))
        return PyErr_Format(PyExc_ValueError, "beam_fwhm must be >= 0 [arcmin], got %g", fwhm);
    if (beam_o != Py_None && fwhm > 0)
        return PyErr_Format(PyExc_ValueError, "choose one of beam_fwhm and beam");
    if (!(depth >= 0) || !isfinite(depth))
        return PyErr_Format(PyExc_ValueError, "noise_depth must be >= 0 [uK-arcmin], got %g",
                            depth);
    if (pdepth_o == Py_None)
        pdepth = sqrt(2.0) * depth; /* the CLI's default: one detector set split in two */
    else if (!pyclef_opt_double(pdepth_o, &pdepth))
        return NULL;
    else if (!(pdepth >= 0) || !isfinite(pdepth))
        return PyErr_Format(PyExc_ValueError, "pol_noise_depth must be >= 0 [uK-arcmin], got %g",
                            pdepth);

    PyArrayObject *cl = cl4_array(cl_o, &lmax);
    if (!cl)
        return NULL;
    const npy_intp npix = (npy_intp)clef_nside_npix(nside);
    const size_t n = (size_t)lmax + 1, na = clef_alm_size(lmax, lmax);
    double *bl = malloc(n * sizeof *bl), *pl = malloc(n * sizeof *pl);
    double complex *work = malloc(3 * na * sizeof *work);
    PyObject *maps = NULL, *alm = NULL, *out = NULL;
    clef_sht *p0 = NULL;
    clef_sht_spin *p2 = NULL;
    int st = CLEF_OK;
    if (!bl || !pl || !work) {
        PyErr_NoMemory();
        goto done;
    }
    if (beam_into(beam_o, fwhm, lmax, bl) < 0)
        goto done;
    pyclef_log_refresh();
    if (!(alm = alm_pol_draw(cl, lmax, seed, &st)))
        goto done;
    if (st != CLEF_OK) {
        pyclef_raise(st);
        goto done;
    }
    npy_intp dims[2] = {3, npix};
    if (!(maps = PyArray_SimpleNew(2, dims, NPY_DOUBLE)))
        goto done;
    memcpy(work, PyArray_DATA((PyArrayObject *)alm), 3 * na * sizeof *work);
    double *pix = PyArray_DATA((PyArrayObject *)maps);
    double *t = pix, *q = pix + npix, *u = pix + 2 * npix;
    const double complex *at = work, *ae = work + na, *ab = work + 2 * na;
    /* The steps of clef simulate --polarization, in its order. */
    Py_BEGIN_ALLOW_THREADS
    if (with_pixel_window)
        st = clef_beam_pixel_window(nside, lmax, pl);
    for (int k = 0; k < 3 && st == CLEF_OK; k++)
        clef_sim_alm_scale(lmax, bl, with_pixel_window ? pl : NULL, work + (size_t)k * na);
    if (st == CLEF_OK)
        st = clef_sht_create(&p0, nside, lmax, NULL);
    if (st == CLEF_OK)
        st = clef_sht_synthesis(p0, 1, &at, &t);
    if (st == CLEF_OK)
        st = clef_sht_spin_create(&p2, nside, lmax, NULL);
    if (st == CLEF_OK)
        st = clef_sht_spin_synthesis(p2, 1, &ae, &ab, &q, &u);
    if (st == CLEF_OK && depth > 0)
        st = clef_sim_noise(nside, depth, NULL, seed, CLEF_SIM_STREAM_NOISE1, t, NULL);
    if (st == CLEF_OK && pdepth > 0)
        st = clef_sim_noise(nside, pdepth, NULL, seed, CLEF_SIM_STREAM_NOISE_Q, q, NULL);
    if (st == CLEF_OK && pdepth > 0)
        st = clef_sim_noise(nside, pdepth, NULL, seed, CLEF_SIM_STREAM_NOISE_U, u, NULL);
    clef_sht_destroy(p0);
    clef_sht_spin_destroy(p2);
    Py_END_ALLOW_THREADS
    if (st != CLEF_OK) {
        pyclef_raise(st);
        goto done;
    }
    out = want_alm ? Py_BuildValue("(OO)", maps, alm) : Py_NewRef(maps);
done:
    Py_XDECREF(maps);
    Py_XDECREF(alm);
    Py_DECREF(cl);
    free(bl);
    free(pl);
    free(work);
    return out;
}

static PyObject *py_sigma_pix(PyObject *self, PyObject *args)
{
    (void)self;
    long long nside;
    double depth;
    if (!PyArg_ParseTuple(args, "Ld:sim_sigma_pix", &nside, &depth))
        return NULL;
    if (!clef_nside_valid(nside))
        return PyErr_Format(PyExc_ValueError, "nside must be a power of two in [1, %d], got %lld",
                            CLEF_NSIDE_MAX, nside);
    return PyFloat_FromDouble(clef_sim_sigma_pix(nside, depth));
}

static PyObject *vec_or_raise(PyObject *a, int st)
{
    if (st != CLEF_OK) {
        Py_XDECREF(a);
        return pyclef_raise(st);
    }
    return a;
}

static PyObject *py_beam_gaussian(PyObject *self, PyObject *args)
{
    (void)self;
    double fwhm;
    int lmax;
    if (!PyArg_ParseTuple(args, "di:beam_gaussian", &fwhm, &lmax))
        return NULL;
    if (lmax < 0)
        return PyErr_Format(PyExc_ValueError, "lmax must be >= 0, got %d", lmax);
    npy_intp n = lmax + 1;
    PyObject *a = PyArray_SimpleNew(1, &n, NPY_DOUBLE);
    return a ? vec_or_raise(a, clef_beam_gaussian(fwhm, lmax, PyArray_DATA((PyArrayObject *)a)))
             : NULL;
}

static PyObject *py_pixel_window(PyObject *self, PyObject *args)
{
    (void)self;
    long long nside;
    int lmax;
    if (!PyArg_ParseTuple(args, "Li:pixel_window", &nside, &lmax))
        return NULL;
    if (lmax < 0)
        return PyErr_Format(PyExc_ValueError, "lmax must be >= 0, got %d", lmax);
    npy_intp n = lmax + 1;
    PyObject *a = PyArray_SimpleNew(1, &n, NPY_DOUBLE);
    if (!a)
        return NULL;
    double *pl = PyArray_DATA((PyArrayObject *)a);
    int st;
    pyclef_log_refresh();
    Py_BEGIN_ALLOW_THREADS
    st = clef_beam_pixel_window(nside, lmax, pl);
    Py_END_ALLOW_THREADS
    return vec_or_raise(a, st);
}

static PyObject *py_read_beam(PyObject *self, PyObject *args)
{
    (void)self;
    PyObject *path_o;
    int lmax;
    if (!PyArg_ParseTuple(args, "O&i:read_beam", PyUnicode_FSConverter, &path_o, &lmax))
        return NULL;
    npy_intp n = lmax >= 0 ? lmax + 1 : 0;
    PyObject *a = lmax >= 0 ? PyArray_SimpleNew(1, &n, NPY_DOUBLE)
                            : PyErr_Format(PyExc_ValueError, "lmax must be >= 0, got %d", lmax);
    if (a)
        a = vec_or_raise(a, clef_beam_read(PyBytes_AS_STRING(path_o), lmax,
                                           PyArray_DATA((PyArrayObject *)a)));
    Py_DECREF(path_o);
    return a;
}

#define KW METH_VARARGS | METH_KEYWORDS
PyMethodDef pyclef_sim_methods[] = {
    {"simulate", PYCLEF_KW(py_simulate), KW,
     "simulate(nside, cl, *, lmax=None, seed=1, beam_fwhm=0.0, beam=None, pixel_window=True,\n"
     "         noise_depth=0.0, hits=None, splits=1, return_alm=False)\n--\n\n"
     "A Gaussian sky as `clef simulate` draws it (docs/simulation.md): a_lm from `cl`\n"
     "(C_l [uK^2] from l = 0, covering lmax; lmax default 3 nside - 1, at most 4 nside),\n"
     "times the beam (beam_fwhm [arcmin], or a B_l array `beam`) and the pixel window,\n"
     "synthesised, plus white pixel noise of noise_depth [uK-arcmin] per split (scaled by\n"
     "1/sqrt(hits / mean hits) with a hit-count array `hits`; pixels without hits are NaN).\n"
     "The same seed gives the same sky whatever the thread count.  Returns the map [uK]\n"
     "(npix,) or, with splits=2, (2, npix); with return_alm, (maps, alm) where alm are the\n"
     "sky's a_lm before beam and pixel window.  Releases the GIL."},
    {"sim_alm", PYCLEF_KW(py_sim_alm), KW,
     "sim_alm(cl, *, seed=1, lmax=None)\n--\n\n"
     "Gaussian a_lm with <|a_lm|^2> = C_l (mmax = lmax; lmax default len(cl) - 1), seeded\n"
     "streams as simulate uses them."},
    {"simulate_pol", PYCLEF_KW(py_simulate_pol), KW,
     "simulate_pol(nside, cl, *, lmax=None, seed=1, beam_fwhm=0.0, beam=None,\n"
     "             pixel_window=True, noise_depth=0.0, pol_noise_depth=None,\n"
     "             return_alm=False)\n--\n\n"
     "A Gaussian T, Q, U sky as `clef simulate --polarization` draws it\n"
     "(docs/simulation.md): a_T, a_E, a_B from `cl`, a (4, n) array of C_l [uK^2] rows\n"
     "TT, EE, BB, TE from l = 0 covering lmax (default 3 nside - 1, at most that; T and E\n"
     "correlated through TE, TE^2 <= TT EE), times the beam (beam_fwhm [arcmin], or a B_l\n"
     "array `beam`) and the temperature pixel window (for Q and U too), synthesised (Q, U\n"
     "by the spin-2 transform, COSMO convention), plus white noise of noise_depth\n"
     "[uK-arcmin] in T and pol_noise_depth [uK-arcmin] in Q and U each (default\n"
     "sqrt(2) noise_depth).  T is the temperature-only sky of clef.simulate with the same\n"
     "seed (to rounding, ~1e-15 relative).  Returns maps [uK] (3, npix) T, Q, U; with\n"
     "return_alm, (maps, alm) where alm (3, alm_size) holds a_T, a_E, a_B before beam\n"
     "and pixel window.  Releases the GIL."},
    {"sim_alm_pol", PYCLEF_KW(py_sim_alm_pol), KW,
     "sim_alm_pol(cl, *, seed=1, lmax=None)\n--\n\n"
     "Gaussian a_T, a_E, a_B (a (3, alm_size) complex128 array, mmax = lmax) from `cl`\n"
     "(4, n) rows TT, EE, BB, TE [uK^2] (lmax default n - 1): a_T = sqrt(TT) g1,\n"
     "a_E = TE/sqrt(TT) g1 + sqrt(EE - TE^2/TT) g2, a_B = sqrt(BB) g3, seeded streams as\n"
     "simulate_pol uses them (g1 those of sim_alm); E, B zero for l < 2."},
    {"sim_sigma_pix", py_sigma_pix, METH_VARARGS,
     "sim_sigma_pix(nside, depth, /)\n--\n\n"
     "Pixel noise rms [uK] for a depth [uK-arcmin]: depth / sqrt(pixel area in arcmin^2)."},
    {"beam_gaussian", py_beam_gaussian, METH_VARARGS,
     "beam_gaussian(fwhm, lmax, /)\n--\n\n"
     "Gaussian beam B_l = exp(-l(l+1) sigma^2 / 2), sigma = FWHM / sqrt(8 ln 2), FWHM in\n"
     "arcmin, l = 0..lmax."},
    {"pixel_window", py_pixel_window, METH_VARARGS,
     "pixel_window(nside, lmax, /)\n--\n\n"
     "HEALPix pixel window p_l, l = 0..lmax, computed by clef from the definition (cached)."},
    {"read_beam", py_read_beam, METH_VARARGS,
     "read_beam(path, lmax, /)\n--\n\nB_l, l = 0..lmax, from a beam text file of rows 'l B_l'."},
    {NULL, NULL, 0, NULL}};
