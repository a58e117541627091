/* clef.ShtSpin: spin-2 transform plans over clef_sht_spin of
 * include/clef/sht.h (Stokes Q, U <-> a_E, a_B; Zaldarriaga & Seljak 1997
 * conventions as HEALPix uses them, docs/transforms.md).  Arrays follow
 * clef.Sht (py_sht.c): RING maps (npix,) or (n, npix), a_lm (alm_size,) or
 * (n, alm_size) in the m-major layout; Q and U, a_E and a_B come as two
 * arrays of the same shape. */
#include "pyclef.h"

#include <complex.h>
#include <string.h>

#include "clef/sht.h"

typedef struct {
    PyObject_HEAD
    clef_sht_spin *p;
    int npairs;                /* Q/U pairs per library call (the plan's scratch) */
    PyThread_type_lock lock;   /* one transform at a time per plan (sht.h) */
} ShtSpinObject;

/* The library's limit on pairs per call (src/sht_spin.c). */
#define SPIN_MAX_PAIRS 32

static void spin_dealloc(ShtSpinObject *self)
{
    clef_sht_spin_destroy(self->p);
    if (self->lock)
        PyThread_free_lock(self->lock);
    Py_TYPE(self)->tp_free((PyObject *)self);
}

static void spin_drop(PyObject *o)
{
    ShtSpinObject *self = (ShtSpinObject *)o;
    clef_sht_spin_destroy(self->p);
    self->p = NULL;
}

static int spin_init(ShtSpinObject *self, PyObject *args, PyObject *kw)
{
    static char *kwl[] = {"nside", "lmax", "mmax", "nmaps", "no_ring_weights", NULL};
    long long nside;
    int lmax, mmax = -1, nmaps = 1, noweights = 0;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "Li|$O&ip:ShtSpin", kwl, &nside, &lmax,
                                     pyclef_opt_int, &mmax, &nmaps, &noweights))
        return -1;
    clef_sht_opts o;
    if (pyclef_plan_opts(lmax, mmax, nmaps, SPIN_MAX_PAIRS, noweights, &o) < 0 ||
        pyclef_plan_reset(&self->lock, spin_drop, (PyObject *)self) < 0)
        return -1;
    pyclef_log_refresh();
    clef_sht_spin *p = NULL;
    int st;
    Py_BEGIN_ALLOW_THREADS
    st = clef_sht_spin_create(&p, nside, lmax, &o);
    Py_END_ALLOW_THREADS
    if (st != CLEF_OK) {
        pyclef_raise(st);
        return -1;
    }
    self->p = p;
    self->npairs = nmaps;
    return 0;
}

static int spin_ready(ShtSpinObject *self)
{
    if (!self->p) {
        PyErr_SetString(PyExc_RuntimeError, "clef.ShtSpin plan was not initialised");
        return 0;
    }
    return 1;
}

static int64_t spin_nside(const ShtSpinObject *self)
{
    return clef_sht_nside(clef_sht_spin_plan(self->p));
}

static npy_intp spin_nalm(const ShtSpinObject *self)
{
    return (npy_intp)clef_alm_size(clef_sht_spin_lmax(self->p), clef_sht_spin_mmax(self->p));
}

/* The two inputs of a transform (Q and U, or a_E and a_B): checked arrays
 * of the same shape, (len,) or (n, len).  Sets *n and *nd; returns 0, or
 * -1 with an exception (both references cleared). */
static int pair_inputs(PyObject *o[2], const char *const names[2], int complex_in, npy_intp len,
                       const char *len_what, PyArrayObject *a[2], npy_intp *n, int *nd)
{
    a[0] = a[1] = NULL;
    for (int i = 0; i < 2; i++)
        if (!(a[i] = complex_in ? pyclef_complex_array(o[i], names[i], 0)
                                : pyclef_double_array(o[i], names[i], 0, 1)))
            goto fail;
    *nd = PyArray_NDIM(a[0]);
    for (int i = 0; i < 2; i++) {
        const int d = PyArray_NDIM(a[i]);
        if ((d != 1 && d != 2) || PyArray_DIM(a[i], d - 1) != len) {
            PyErr_Format(PyExc_ValueError, "%s must have shape (%zd,) or (n, %zd): %s", names[i],
                         (Py_ssize_t)len, (Py_ssize_t)len, len_what);
            goto fail;
        }
    }
    if (PyArray_NDIM(a[1]) != *nd || (*nd == 2 && PyArray_DIM(a[0], 0) != PyArray_DIM(a[1], 0))) {
        PyErr_Format(PyExc_ValueError, "%s and %s must have the same shape", names[0], names[1]);
        goto fail;
    }
    *n = *nd == 2 ? PyArray_DIM(a[0], 0) : 1;
    return 0;
fail:
    Py_CLEAR(a[0]);
    Py_CLEAR(a[1]);
    return -1;
}

/* Two new outputs of shape (len,) or (n, len). */
static int pair_outputs(int nd, npy_intp n, npy_intp len, int type, PyObject *out[2])
{
    npy_intp dims[2] = {n, len};
    for (int i = 0; i < 2; i++)
        if (!(out[i] = nd == 2 ? PyArray_SimpleNew(2, dims, type)
                               : PyArray_SimpleNew(1, dims + 1, type))) {
            Py_CLEAR(out[0]);
            return -1;
        }
    return 0;
}

/* Analysis (Q, U -> a_E, a_B) or synthesis of the pairs in o, in chunks of
 * the plan's pairs per library call, without the GIL. */
static PyObject *spin_call(ShtSpinObject *self, PyObject *o[2], int analysis, int iterations)
{
    static const char *const names[2][2] = {{"alm_e", "alm_b"}, {"q", "u"}};
    const int lmax = clef_sht_spin_lmax(self->p), mmax = clef_sht_spin_mmax(self->p);
    const int64_t nside = spin_nside(self);
    const npy_intp npix = (npy_intp)clef_nside_npix(nside), na = spin_nalm(self);
    char what[96];
    if (analysis)
        snprintf(what, sizeof what, "RING maps of this plan's nside %lld", (long long)nside);
    else
        snprintf(what, sizeof what, "alm_size(lmax=%d, mmax=%d)", lmax, mmax);
    PyArrayObject *a[2];
    PyObject *out[2];
    npy_intp k;
    int nd;
    if (pair_inputs(o, names[analysis], !analysis, analysis ? npix : na, what, a, &k, &nd) < 0)
        return NULL;
    if (pair_outputs(nd, k, analysis ? na : npix, analysis ? NPY_CDOUBLE : NPY_DOUBLE, out) < 0) {
        Py_DECREF(a[0]);
        Py_DECREF(a[1]);
        return NULL;
    }
    double *maps[2];
    double complex *alm[2];
    for (int c = 0; c < 2; c++) {
        maps[c] = PyArray_DATA(analysis ? a[c] : (PyArrayObject *)out[c]);
        alm[c] = PyArray_DATA(analysis ? (PyArrayObject *)out[c] : a[c]);
    }
    double *mp[2][SPIN_MAX_PAIRS];
    double complex *ap[2][SPIN_MAX_PAIRS];
    const int chunk = self->npairs;
    int st = CLEF_OK;
    pyclef_log_refresh();
    pyclef_lock_wait(self->lock);
    Py_BEGIN_ALLOW_THREADS
    for (npy_intp i = 0; i < k && st == CLEF_OK; i += chunk) {
        const int n = (int)(k - i < chunk ? k - i : chunk);
        for (int j = 0; j < n; j++)
            for (int c = 0; c < 2; c++) {
                mp[c][j] = maps[c] + (i + j) * npix;
                ap[c][j] = alm[c] + (i + j) * na;
            }
        st = analysis ? clef_sht_spin_analysis(self->p, n, (const double *const *)mp[0],
                                               (const double *const *)mp[1], ap[0], ap[1],
                                               iterations)
                      : clef_sht_spin_synthesis(self->p, n, (const double complex *const *)ap[0],
                                                (const double complex *const *)ap[1], mp[0],
                                                mp[1]);
    }
    Py_END_ALLOW_THREADS
    PyThread_release_lock(self->lock);
    Py_DECREF(a[0]);
    Py_DECREF(a[1]);
    if (st != CLEF_OK) {
        Py_DECREF(out[0]);
        Py_DECREF(out[1]);
        return pyclef_raise(st);
    }
    return Py_BuildValue("(NN)", out[0], out[1]);
}

static PyObject *spin_analysis(ShtSpinObject *self, PyObject *args, PyObject *kw)
{
    static char *kwl[] = {"q", "u", "iterations", NULL};
    PyObject *o[2];
    int iterations = 3;
    if (!spin_ready(self) ||
        !PyArg_ParseTupleAndKeywords(args, kw, "OO|$i:analysis", kwl, &o[0], &o[1], &iterations))
        return NULL;
    if (iterations < 0 || iterations > 1000)
        return PyErr_Format(PyExc_ValueError, "iterations must be in 0..1000, got %d",
                            iterations);
    return spin_call(self, o, 1, iterations);
}

static PyObject *spin_synthesis(ShtSpinObject *self, PyObject *args, PyObject *kw)
{
    static char *kwl[] = {"alm_e", "alm_b", NULL};
    PyObject *o[2];
    if (!spin_ready(self) ||
        !PyArg_ParseTupleAndKeywords(args, kw, "OO:synthesis", kwl, &o[0], &o[1]))
        return NULL;
    return spin_call(self, o, 0, 0);
}

static PyObject *spin_get(ShtSpinObject *self, void *what)
{
    if (!spin_ready(self))
        return NULL;
    switch ((int)(intptr_t)what) {
    case 0: return PyLong_FromLongLong(spin_nside(self));
    case 1: return PyLong_FromLong(clef_sht_spin_lmax(self->p));
    case 2: return PyLong_FromLong(clef_sht_spin_mmax(self->p));
    case 3: return PyLong_FromLong(clef_sht_nrings(clef_sht_spin_plan(self->p)));
    case 4: return PyLong_FromSsize_t((Py_ssize_t)spin_nalm(self));
    default: return PyLong_FromLongLong(clef_nside_npix(spin_nside(self)));
    }
}

static PyGetSetDef spin_getset[] = {
    {"nside", (getter)spin_get, NULL, "HEALPix nside of the maps.", (void *)0},
    {"lmax", (getter)spin_get, NULL, "Highest multipole.", (void *)1},
    {"mmax", (getter)spin_get, NULL, "Highest m.", (void *)2},
    {"nrings", (getter)spin_get, NULL, "Rings of the map, 4 nside - 1.", (void *)3},
    {"alm_size", (getter)spin_get, NULL, "Entries of an a_E or a_B array.", (void *)4},
    {"npix", (getter)spin_get, NULL, "Pixels of a map, 12 nside^2.", (void *)5},
    {NULL, NULL, NULL, NULL, NULL}};

static PyMethodDef spin_methods[] = {
    {"analysis", PYCLEF_KW(spin_analysis), METH_VARARGS | METH_KEYWORDS,
     "analysis(q, u, *, iterations=3)\n--\n\n"
     "Stokes Q, U -> (alm_e, alm_b): q and u are float64 arrays of one shape, (npix,) or\n"
     "(n, npix), RING order, COSMO convention (as clef.read_map_pol returns them; no NaN:\n"
     "pixels to exclude must already be zero in both).  Returns two complex128 arrays\n"
     "(alm_size,) or (n, alm_size) in the layout of clef.Sht (m >= 0, l = 0, 1 entries\n"
     "zero), in the maps' unit.  Ring quadrature weights and `iterations` Jacobi\n"
     "refinement steps (0: one pass).  Releases the GIL."},
    {"synthesis", PYCLEF_KW(spin_synthesis), METH_VARARGS | METH_KEYWORDS,
     "synthesis(alm_e, alm_b)\n--\n\n"
     "(a_E, a_B) -> (q, u): complex128 arrays of one shape, (alm_size,) or (n, alm_size);\n"
     "returns two float64 RING maps (npix,) or (n, npix), COSMO convention.  Releases\n"
     "the GIL."},
    {NULL, NULL, 0, NULL}};

static PyTypeObject ShtSpinType = {
    PyVarObject_HEAD_INIT(NULL, 0)
    .tp_name = "clef.ShtSpin",
    .tp_basicsize = sizeof(ShtSpinObject),
    .tp_dealloc = (destructor)spin_dealloc,
    .tp_flags = Py_TPFLAGS_DEFAULT,
    .tp_doc = "ShtSpin(nside, lmax, *, mmax=None, nmaps=1, no_ring_weights=False)\n--\n\n"
              "A spin-2 transform plan (polarization) for RING maps of `nside` and multipoles\n"
              "2..lmax (m up to mmax, default lmax).  Conventions of Zaldarriaga & Seljak 1997\n"
              "as HEALPix uses them (docs/transforms.md):\n"
              "    Q +- iU = sum_lm a_{+-2,lm} _{+-2}Y_lm,  a_{+-2,lm} = -(a_E,lm +- i a_B,lm),\n"
              "with Q, U in the COSMO convention.  nmaps: Q/U pairs transformed together per\n"
              "library call (1..32).  no_ring_weights: plain pixel sums in analysis.  Like\n"
              "clef.Sht, a plan runs one transform at a time.",
    .tp_methods = spin_methods,
    .tp_getset = spin_getset,
    .tp_init = (initproc)spin_init,
    .tp_new = PyType_GenericNew,
};

int pyclef_sht_spin_register(PyObject *module)
{
    if (PyType_Ready(&ShtSpinType) < 0)
        return -1;
    return PyModule_AddObjectRef(module, "ShtSpin", (PyObject *)&ShtSpinType);
}
