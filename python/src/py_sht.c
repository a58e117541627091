/* clef.Sht (transform plans) and the a_lm helpers over include/clef/sht.h. */
#include "pyclef.h"

#include <complex.h>
#include <limits.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>

#include "clef/sht.h"

typedef struct {
    PyObject_HEAD
    clef_sht *p;
    int nmaps;                 /* maps per library call (the plan's scratch) */
    PyThread_type_lock lock;   /* a plan must not run two transforms at once (sht.h) */
} ShtObject;

static void sht_dealloc(ShtObject *self)
{
    clef_sht_destroy(self->p);
    if (self->lock)
        PyThread_free_lock(self->lock);
    Py_TYPE(self)->tp_free((PyObject *)self);
}

void pyclef_lock_wait(PyThread_type_lock lock)
{
    if (!PyThread_acquire_lock(lock, NOWAIT_LOCK)) {
        Py_BEGIN_ALLOW_THREADS
        PyThread_acquire_lock(lock, WAIT_LOCK);
        Py_END_ALLOW_THREADS
    }
}

int pyclef_plan_opts(int lmax, int mmax, int nmaps, int nmaps_max, int no_ring_weights,
                     clef_sht_opts *o)
{
    if (nmaps < 1 || nmaps > nmaps_max) {
        if (nmaps_max == INT_MAX)
            PyErr_Format(PyExc_ValueError, "nmaps must be at least 1, got %d", nmaps);
        else
            PyErr_Format(PyExc_ValueError, "nmaps (Q/U pairs per call) must be in 1..%d, got %d",
                         nmaps_max, nmaps);
        return -1;
    }
    if (mmax == 0) {
        /* The library reads 0 as "mmax = lmax"; m = 0 alone is not offered. */
        PyErr_SetString(PyExc_ValueError, "mmax must be at least 1 (None: mmax = lmax)");
        return -1;
    }
    if (mmax > lmax) {
        PyErr_Format(PyExc_ValueError, "mmax (%d) must not exceed lmax (%d)", mmax, lmax);
        return -1;
    }
    memset(o, 0, sizeof *o);
    o->mmax = mmax < 0 ? 0 : mmax;
    o->nmaps = nmaps;
    o->no_ring_weights = no_ring_weights;
    return 0;
}

int pyclef_plan_reset(PyThread_type_lock *lock, void (*drop)(PyObject *), PyObject *self)
{
    if (!*lock && !(*lock = PyThread_allocate_lock())) {
        PyErr_NoMemory();
        return -1;
    }
    /* __init__ called again: wait for a transform of the old plan. */
    pyclef_lock_wait(*lock);
    drop(self);
    PyThread_release_lock(*lock);
    return 0;
}

static void sht_drop(PyObject *o)
{
    ShtObject *self = (ShtObject *)o;
    clef_sht_destroy(self->p);
    self->p = NULL;
}

static int sht_init(ShtObject *self, PyObject *args, PyObject *kw)
{
    static char *kwl[] = {"nside", "lmax", "mmax", "nmaps", "no_ring_weights", NULL};
    long long nside;
    int lmax, mmax = -1, nmaps = 1, noweights = 0;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "Li|$O&ip:Sht", kwl, &nside, &lmax, pyclef_opt_int, &mmax, &nmaps,
                                     &noweights))
        return -1;
    clef_sht_opts o;
    if (pyclef_plan_opts(lmax, mmax, nmaps, INT_MAX, noweights, &o) < 0 ||
        pyclef_plan_reset(&self->lock, sht_drop, (PyObject *)self) < 0)
        return -1;
    pyclef_log_refresh();
    clef_sht *p = NULL;
    int st;
    Py_BEGIN_ALLOW_THREADS
    st = clef_sht_create(&p, nside, lmax, &o);
    Py_END_ALLOW_THREADS
    if (st != CLEF_OK) {
        pyclef_raise(st);
        return -1;
    }
    self->p = p;
    self->nmaps = nmaps;
    return 0;
}

static int sht_ready(ShtObject *self)
{
    if (!self->p) {
        PyErr_SetString(PyExc_RuntimeError, "clef.Sht plan was not initialised");
        return 0;
    }
    return 1;
}

static PyObject *sht_analysis(ShtObject *self, PyObject *args, PyObject *kw)
{
    static char *kwl[] = {"maps", "iterations", NULL};
    PyObject *maps_o;
    int iterations = 3;
    if (!sht_ready(self) ||
        !PyArg_ParseTupleAndKeywords(args, kw, "O|$i:analysis", kwl, &maps_o, &iterations))
        return NULL;
    if (iterations < 0)
        return PyErr_Format(PyExc_ValueError, "iterations must be >= 0, got %d", iterations);
    PyArrayObject *a = pyclef_double_array(maps_o, "maps", 0, 1);
    if (!a)
        return NULL;
    const int nd = PyArray_NDIM(a);
    const int64_t npix = clef_nside_npix(clef_sht_nside(self->p));
    if ((nd != 1 && nd != 2) || PyArray_DIM(a, nd - 1) != npix) {
        Py_DECREF(a);
        return PyErr_Format(PyExc_ValueError, "maps must have shape (%lld,) or (nmaps, %lld) for "
                            "this plan's nside %lld", (long long)npix, (long long)npix,
                            (long long)clef_sht_nside(self->p));
    }
    const npy_intp k = nd == 2 ? PyArray_DIM(a, 0) : 1;
    const int lmax = clef_sht_lmax(self->p), mmax = clef_sht_mmax(self->p);
    const npy_intp na = (npy_intp)clef_alm_size(lmax, mmax);
    npy_intp dims[2] = {k, na};
    PyObject *out = nd == 2 ? PyArray_SimpleNew(2, dims, NPY_CDOUBLE)
                            : PyArray_SimpleNew(1, dims + 1, NPY_CDOUBLE);
    if (!out) {
        Py_DECREF(a);
        return NULL;
    }
    const double *in = PyArray_DATA(a);
    double complex *alm = PyArray_DATA((PyArrayObject *)out);
    const double *mp[64];
    double complex *ap[64];
    const int chunk = self->nmaps < 64 ? self->nmaps : 64;
    int st = CLEF_OK;
    pyclef_log_refresh();
    pyclef_lock_wait(self->lock);
    Py_BEGIN_ALLOW_THREADS
    for (npy_intp i = 0; i < k && st == CLEF_OK; i += chunk) {
        const int n = (int)(k - i < chunk ? k - i : chunk);
        for (int j = 0; j < n; j++) {
            mp[j] = in + (i + j) * npix;
            ap[j] = alm + (i + j) * na;
        }
        st = clef_sht_analysis(self->p, n, mp, ap, iterations);
    }
    Py_END_ALLOW_THREADS
    PyThread_release_lock(self->lock);
    Py_DECREF(a);
    if (st != CLEF_OK) {
        Py_DECREF(out);
        return pyclef_raise(st);
    }
    return out;
}

static PyObject *sht_synthesis(ShtObject *self, PyObject *args, PyObject *kw)
{
    static char *kwl[] = {"alm", NULL};
    PyObject *alm_o;
    if (!sht_ready(self) || !PyArg_ParseTupleAndKeywords(args, kw, "O:synthesis", kwl, &alm_o))
        return NULL;
    PyArrayObject *a = pyclef_complex_array(alm_o, "alm", 0);
    if (!a)
        return NULL;
    const int nd = PyArray_NDIM(a);
    const int lmax = clef_sht_lmax(self->p), mmax = clef_sht_mmax(self->p);
    const npy_intp na = (npy_intp)clef_alm_size(lmax, mmax);
    if ((nd != 1 && nd != 2) || PyArray_DIM(a, nd - 1) != na) {
        Py_DECREF(a);
        return PyErr_Format(PyExc_ValueError, "alm must have shape (%zd,) or (nmaps, %zd): "
                            "alm_size(lmax=%d, mmax=%d)", (Py_ssize_t)na, (Py_ssize_t)na, lmax,
                            mmax);
    }
    const npy_intp k = nd == 2 ? PyArray_DIM(a, 0) : 1;
    const npy_intp npix = (npy_intp)clef_nside_npix(clef_sht_nside(self->p));
    npy_intp dims[2] = {k, npix};
    PyObject *out = nd == 2 ? PyArray_SimpleNew(2, dims, NPY_DOUBLE)
                            : PyArray_SimpleNew(1, dims + 1, NPY_DOUBLE);
    if (!out) {
        Py_DECREF(a);
        return NULL;
    }
    const double complex *in = PyArray_DATA(a);
    double *maps = PyArray_DATA((PyArrayObject *)out);
    const double complex *ap[64];
    double *mp[64];
    const int chunk = self->nmaps < 64 ? self->nmaps : 64;
    int st = CLEF_OK;
    pyclef_log_refresh();
    pyclef_lock_wait(self->lock);
    Py_BEGIN_ALLOW_THREADS
    for (npy_intp i = 0; i < k && st == CLEF_OK; i += chunk) {
        const int n = (int)(k - i < chunk ? k - i : chunk);
        for (int j = 0; j < n; j++) {
            ap[j] = in + (i + j) * na;
            mp[j] = maps + (i + j) * npix;
        }
        st = clef_sht_synthesis(self->p, n, ap, mp);
    }
    Py_END_ALLOW_THREADS
    PyThread_release_lock(self->lock);
    Py_DECREF(a);
    if (st != CLEF_OK) {
        Py_DECREF(out);
        return pyclef_raise(st);
    }
    return out;
}

static PyObject *sht_ring_info(ShtObject *self, PyObject *args)
{
    int ring;
    if (!sht_ready(self) || !PyArg_ParseTuple(args, "i:ring_info", &ring))
        return NULL;
    double z, phi0, w;
    int64_t n, first;
    const int st = clef_sht_ring_info(self->p, ring, &z, &phi0, &n, &first, &w);
    if (st != CLEF_OK)
        return pyclef_raise(st);
    return Py_BuildValue("{s:d,s:d,s:L,s:L,s:d}", "z", z, "phi0", phi0, "npix", (long long)n,
                         "first", (long long)first, "weight", w);
}

static PyObject *sht_get(ShtObject *self, void *what)
{
    if (!sht_ready(self))
        return NULL;
    switch ((int)(intptr_t)what) {
    case 0: return PyLong_FromLongLong(clef_sht_nside(self->p));
    case 1: return PyLong_FromLong(clef_sht_lmax(self->p));
    case 2: return PyLong_FromLong(clef_sht_mmax(self->p));
    case 3: return PyLong_FromLong(clef_sht_nrings(self->p));
    case 4: return PyLong_FromSize_t(clef_alm_size(clef_sht_lmax(self->p), clef_sht_mmax(self->p)));
    default: return PyLong_FromLongLong(clef_nside_npix(clef_sht_nside(self->p)));
    }
}

static PyGetSetDef sht_getset[] = {
    {"nside", (getter)sht_get, NULL, "HEALPix nside of the maps.", (void *)0},
    {"lmax", (getter)sht_get, NULL, "Highest multipole.", (void *)1},
    {"mmax", (getter)sht_get, NULL, "Highest m.", (void *)2},
    {"nrings", (getter)sht_get, NULL, "Rings of the map, 4 nside - 1.", (void *)3},
    {"alm_size", (getter)sht_get, NULL, "Entries of an a_lm array.", (void *)4},
    {"npix", (getter)sht_get, NULL, "Pixels of a map, 12 nside^2.", (void *)5},
    {NULL, NULL, NULL, NULL, NULL}};

static PyMethodDef sht_methods[] = {
    {"analysis", PYCLEF_KW(sht_analysis), METH_VARARGS | METH_KEYWORDS,
     "analysis(maps, *, iterations=3)\n--\n\n"
     "Map(s) -> a_lm: maps is a float64 array (npix,) or (nmaps, npix) in RING order (no\n"
     "NaN: pixels to exclude must already be zero); returns complex128 a_lm (alm_size,) or\n"
     "(nmaps, alm_size), m-major, index(l, m) = m (2 lmax + 1 - m) / 2 + l, m >= 0 only\n"
     "(a_{l,-m} = (-1)^m conj(a_lm)), in the map's unit.  Ring quadrature weights and\n"
     "`iterations` Jacobi refinement steps (0: one pass).  Releases the GIL."},
    {"synthesis", PYCLEF_KW(sht_synthesis), METH_VARARGS | METH_KEYWORDS,
     "synthesis(alm)\n--\n\n"
     "a_lm -> map(s): alm is complex128 (alm_size,) or (nmaps, alm_size) in the layout of\n"
     "analysis(); returns float64 RING maps (npix,) or (nmaps, npix).  Releases the GIL."},
    {"ring_info", (PyCFunction)sht_ring_info, METH_VARARGS,
     "ring_info(ring, /)\n--\n\n"
     "Ring 1 .. 4 nside - 1 (north to south): dict z (cos theta), phi0 [rad], npix, first\n"
     "(RING index of its first pixel) and weight (analysis quadrature weight)."},
    {NULL, NULL, 0, NULL}};

static PyTypeObject ShtType = {
    PyVarObject_HEAD_INIT(NULL, 0)
    .tp_name = "clef.Sht",
    .tp_basicsize = sizeof(ShtObject),
    .tp_dealloc = (destructor)sht_dealloc,
    .tp_flags = Py_TPFLAGS_DEFAULT,
    .tp_doc = "Sht(nside, lmax, *, mmax=None, nmaps=1, no_ring_weights=False)\n--\n\n"
              "A spherical harmonic transform plan for RING maps of `nside` and multipoles up\n"
              "to lmax (and m up to mmax, default lmax).  Planning is the slow part; analysis\n"
              "and synthesis then allocate nothing in the library.  nmaps: maps transformed\n"
              "together per library call (scratch is sized for it).  no_ring_weights: plain\n"
              "pixel sums in analysis.  A plan runs one transform at a time (calls from\n"
              "several threads wait for each other); use one plan per thread for parallel\n"
              "work.  Conventions: Y_lm with the Condon-Shortley phase (Gorski et al. 2005).",
    .tp_methods = sht_methods,
    .tp_getset = sht_getset,
    .tp_init = (initproc)sht_init,
    .tp_new = PyType_GenericNew,
};

int pyclef_sht_register(PyObject *module)
{
    if (PyType_Ready(&ShtType) < 0)
        return -1;
    return PyModule_AddObjectRef(module, "Sht", (PyObject *)&ShtType);
}

/* ---- module functions --------------------------------------------------- */

/* lmax of a full (mmax = lmax) a_lm array of n entries, or -1. */
static int lmax_of_size(npy_intp n)
{
    const int l = (int)floor((sqrt(8.0 * (double)n + 1.0) - 3.0) / 2.0 + 0.5);
    return l >= 0 && (npy_intp)clef_alm_size(l, l) == n ? l : -1;
}

static PyObject *py_alm_size(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"lmax", "mmax", NULL};
    int lmax, mmax = -1;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "i|O&:alm_size", kwl, &lmax, pyclef_opt_int, &mmax))
        return NULL;
    if (mmax < 0)
        mmax = lmax;
    if (lmax < 0 || mmax > lmax)
        return PyErr_Format(PyExc_ValueError, "need 0 <= mmax <= lmax, got lmax %d, mmax %d",
                            lmax, mmax);
    return PyLong_FromSize_t(clef_alm_size(lmax, mmax));
}

static PyObject *py_alm_index(PyObject *self, PyObject *args)
{
    (void)self;
    int lmax, l, m;
    if (!PyArg_ParseTuple(args, "iii:alm_index", &lmax, &l, &m))
        return NULL;
    if (m < 0 || l < m || l > lmax)
        return PyErr_Format(PyExc_ValueError, "need 0 <= m <= l <= lmax, got l %d, m %d, lmax %d",
                            l, m, lmax);
    return PyLong_FromSize_t(clef_alm_index(lmax, l, m));
}

/* lmax, mmax of an a_lm array: given, or inferred for mmax = lmax. */
static int alm_dims(PyArrayObject *a, int *lmax, int *mmax)
{
    const npy_intp n = PyArray_DIM(a, 0);
    if (*lmax < 0) {
        if ((*lmax = lmax_of_size(n)) < 0) {
            PyErr_Format(PyExc_ValueError, "alm has %zd entries, not (lmax+1)(lmax+2)/2 for any "
                         "lmax: give lmax and mmax", (Py_ssize_t)n);
            return -1;
        }
        if (*mmax < 0)
            *mmax = *lmax;
    }
    if (*mmax < 0)
        *mmax = *lmax;
    if (*mmax > *lmax || (npy_intp)clef_alm_size(*lmax, *mmax) != n) {
        PyErr_Format(PyExc_ValueError, "alm has %zd entries; lmax %d, mmax %d need %zu",
                     (Py_ssize_t)n, *lmax, *mmax, clef_alm_size(*lmax, *mmax));
        return -1;
    }
    return 0;
}

static PyObject *py_alm_cl(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"alm", "alm2", "lmax", "mmax", NULL};
    PyObject *a_o, *b_o = Py_None;
    int lmax = -1, mmax = -1;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "O|O$O&O&:alm_cl", kwl, &a_o, &b_o, pyclef_opt_int, &lmax,
                                     pyclef_opt_int, &mmax))
        return NULL;
    PyArrayObject *a = pyclef_complex_array(a_o, "alm", 1), *b = NULL;
    if (!a)
        return NULL;
    PyObject *out = NULL;
    if (alm_dims(a, &lmax, &mmax) < 0)
        goto done;
    if (b_o != Py_None) {
        if (!(b = pyclef_complex_array(b_o, "alm2", 1)))
            goto done;
        if (PyArray_DIM(b, 0) != PyArray_DIM(a, 0)) {
            PyErr_Format(PyExc_ValueError, "alm2 has %zd entries, alm %zd",
                         (Py_ssize_t)PyArray_DIM(b, 0), (Py_ssize_t)PyArray_DIM(a, 0));
            goto done;
        }
    }
    npy_intp n = lmax + 1;
    if (!(out = PyArray_SimpleNew(1, &n, NPY_DOUBLE)))
        goto done;
    const int st = clef_alm_cl(lmax, mmax, PyArray_DATA(a), b ? PyArray_DATA(b) : NULL,
                               PyArray_DATA((PyArrayObject *)out));
    if (st != CLEF_OK) {
        Py_CLEAR(out);
        pyclef_raise(st);
    }
done:
    Py_DECREF(a);
    Py_XDECREF(b);
    return out;
}

static PyObject *py_legendre_lambda(PyObject *self, PyObject *args)
{
    (void)self;
    int lmax, m;
    double z;
    if (!PyArg_ParseTuple(args, "iid:legendre_lambda", &lmax, &m, &z))
        return NULL;
    npy_intp n = lmax - m + 1 > 0 ? lmax - m + 1 : 0;
    PyObject *out = PyArray_SimpleNew(1, &n, NPY_DOUBLE);
    if (!out)
        return NULL;
    const int st = clef_legendre_lambda(lmax, m, z, PyArray_DATA((PyArrayObject *)out));
    if (st != CLEF_OK) {
        Py_DECREF(out);
        return pyclef_raise(st);
    }
    return out;
}

static PyObject *py_read_alm(PyObject *self, PyObject *args)
{
    (void)self;
    PyObject *path_o;
    if (!PyArg_ParseTuple(args, "O&:read_alm", PyUnicode_FSConverter, &path_o))
        return NULL;
    int lmax, mmax, st;
    double complex *alm = NULL;
    const char *path = PyBytes_AS_STRING(path_o);
    Py_BEGIN_ALLOW_THREADS
    st = clef_alm_read(path, &lmax, &mmax, &alm);
    Py_END_ALLOW_THREADS
    Py_DECREF(path_o);
    if (st != CLEF_OK)
        return pyclef_raise(st);
    npy_intp n = (npy_intp)clef_alm_size(lmax, mmax);
    PyObject *out = PyArray_SimpleNew(1, &n, NPY_CDOUBLE);
    if (out)
        memcpy(PyArray_DATA((PyArrayObject *)out), alm, (size_t)n * sizeof *alm);
    free(alm);
    return out ? Py_BuildValue("(Nii)", out, lmax, mmax) : NULL;
}

static PyObject *py_write_alm(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"path", "alm", "lmax", "mmax", NULL};
    PyObject *path_o, *a_o;
    int lmax = -1, mmax = -1;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "O&O|$O&O&:write_alm", kwl, PyUnicode_FSConverter,
                                     &path_o, &a_o, pyclef_opt_int, &lmax, pyclef_opt_int, &mmax))
        return NULL;
    PyArrayObject *a = pyclef_complex_array(a_o, "alm", 1);
    PyObject *res = NULL;
    if (a && alm_dims(a, &lmax, &mmax) == 0) {
        int st;
        const char *path = PyBytes_AS_STRING(path_o);
        const double complex *d = PyArray_DATA(a);
        Py_BEGIN_ALLOW_THREADS
        st = clef_alm_write(path, lmax, mmax, d);
        Py_END_ALLOW_THREADS
        if (st != CLEF_OK)
            pyclef_raise(st);
        else
            res = Py_NewRef(Py_None);
    }
    Py_XDECREF(a);
    Py_DECREF(path_o);
    return res;
}

PyMethodDef pyclef_sht_methods[] = {
    {"alm_size", PYCLEF_KW(py_alm_size), METH_VARARGS | METH_KEYWORDS,
     "alm_size(lmax, mmax=None)\n--\n\n"
     "Entries of an a_lm array: (mmax+1)(lmax+1) - mmax(mmax+1)/2 (mmax default lmax)."},
    {"alm_index", py_alm_index, METH_VARARGS,
     "alm_index(lmax, l, m, /)\n--\n\nIndex of a_lm in the m-major layout: m (2 lmax + 1 - m) / 2 + l."},
    {"alm_cl", PYCLEF_KW(py_alm_cl), METH_VARARGS | METH_KEYWORDS,
     "alm_cl(alm, alm2=None, *, lmax=None, mmax=None)\n--\n\n"
     "Angular power spectrum C_l = (Re a_l0 b_l0* + 2 sum_{m>0} Re a_lm b_lm*) / (2l+1),\n"
     "l = 0..lmax, in the a_lm unit squared; alm2 None: auto spectrum.  lmax/mmax default\n"
     "to those of a full (mmax = lmax) array of that size."},
    {"legendre_lambda", py_legendre_lambda, METH_VARARGS,
     "legendre_lambda(lmax, m, z, /)\n--\n\n"
     "Normalised associated Legendre functions lambda_lm(z) = Y_lm(theta, 0), z = cos theta,\n"
     "for l = m..lmax (Condon-Shortley phase), with the transform's own recurrence."},
    {"read_alm", py_read_alm, METH_VARARGS,
     "read_alm(path, /)\n--\n\nRead an a_lm FITS table (docs/formats-alm.md): returns (alm, lmax, mmax)."},
    {"write_alm", PYCLEF_KW(py_write_alm), METH_VARARGS | METH_KEYWORDS,
     "write_alm(path, alm, *, lmax=None, mmax=None)\n--\n\n"
     "Write a_lm as clef's FITS table (docs/formats-alm.md), atomically."},
    {NULL, NULL, 0, NULL}};
