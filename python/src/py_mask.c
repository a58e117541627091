/* Masks over include/clef/mask.h: every function takes and returns float64
 * RING arrays (values in [0, 1]; NaN refused), angles in radians.  The
 * command-line style composition (degrees) is clef.build_mask in
 * python/clef/__init__.py. */
#include "pyclef.h"

#include <stdlib.h>
#include <string.h>

#include "clef/mask.h"

/* A new array holding a copy of a mask view's pixels, as a clef_map whose
 * pix is the array's buffer (for the in-place cut functions). */
static PyObject *copy_as_map(const pyclef_map *v, clef_map *m)
{
    npy_intp n = (npy_intp)v->m.npix;
    PyObject *out = PyArray_SimpleNew(1, &n, NPY_DOUBLE);
    if (!out)
        return NULL;
    *m = v->m;
    m->pix = PyArray_DATA((PyArrayObject *)out);
    memcpy(m->pix, v->m.pix, (size_t)n * sizeof(double));
    return out;
}

static PyObject *array_of(clef_map *m)
{
    PyObject *out = pyclef_map_to_array(m);
    clef_map_free(m);
    return out;
}

static PyObject *py_mask_full(PyObject *self, PyObject *args)
{
    (void)self;
    long long nside;
    if (!PyArg_ParseTuple(args, "L:mask_full", &nside))
        return NULL;
    clef_map *m;
    const int st = clef_mask_full(&m, nside);
    return st != CLEF_OK ? pyclef_raise(st) : array_of(m);
}

static PyObject *py_mask_binarize(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"map", "threshold", "inclusive", NULL};
    PyObject *map_o;
    double thr = 0.0;
    int incl = 0;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "O|$dp:mask_binarize", kwl, &map_o, &thr, &incl))
        return NULL;
    pyclef_map v;
    if (pyclef_map_view(&v, map_o, "map", 1, NULL, NULL) < 0)
        return NULL;
    clef_map *m;
    const int st = clef_mask_binarize(&m, &v.m, thr, incl);
    pyclef_map_release(&v);
    return st != CLEF_OK ? pyclef_raise(st) : array_of(m);
}

/* mask_cut_latitude, mask_cut_disc, mask_keep_disc: a changed copy. */
enum { CUT_LAT, CUT_DISC, KEEP_DISC };
static PyObject *cut(PyObject *args, PyObject *kw, int what)
{
    static char *kwl_lat[] = {"mask", "b_cut", NULL};
    static char *kwl_disc[] = {"mask", "lon", "lat", "radius", NULL};
    PyObject *mask_o;
    double a = 0, b = 0, c = 0;
    const int ok = what == CUT_LAT
                       ? PyArg_ParseTupleAndKeywords(args, kw, "Od:mask_cut_latitude", kwl_lat,
                                                     &mask_o, &a)
                       : PyArg_ParseTupleAndKeywords(args, kw, "Oddd:mask_cut_disc", kwl_disc,
                                                     &mask_o, &a, &b, &c);
    if (!ok)
        return NULL;
    pyclef_map v;
    if (pyclef_map_view(&v, mask_o, "mask", 0, NULL, NULL) < 0)
        return NULL;
    clef_map m;
    PyObject *out = copy_as_map(&v, &m);
    int st = CLEF_OK;
    if (out) {
        Py_BEGIN_ALLOW_THREADS
        st = what == CUT_LAT    ? clef_mask_cut_latitude(&m, a)
             : what == CUT_DISC ? clef_mask_cut_disc(&m, a, b, c)
                                : clef_mask_keep_disc(&m, a, b, c);
        Py_END_ALLOW_THREADS
    }
    pyclef_map_release(&v);
    if (out && st != CLEF_OK) {
        Py_DECREF(out);
        return pyclef_raise(st);
    }
    return out;
}

static PyObject *py_cut_lat(PyObject *s, PyObject *a, PyObject *k) { (void)s; return cut(a, k, CUT_LAT); }
static PyObject *py_cut_disc(PyObject *s, PyObject *a, PyObject *k) { (void)s; return cut(a, k, CUT_DISC); }
static PyObject *py_keep_disc(PyObject *s, PyObject *a, PyObject *k) { (void)s; return cut(a, k, KEEP_DISC); }

static PyObject *py_query_disc(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"nside", "lon", "lat", "radius", NULL};
    long long nside;
    double lon, lat, r;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "Lddd:mask_query_disc", kwl, &nside, &lon, &lat, &r))
        return NULL;
    int64_t *pix = NULL;
    size_t n = 0;
    int st;
    Py_BEGIN_ALLOW_THREADS
    st = clef_mask_query_disc(nside, lon, lat, r, &pix, &n);
    Py_END_ALLOW_THREADS
    if (st != CLEF_OK)
        return pyclef_raise(st);
    npy_intp dn = (npy_intp)n;
    PyObject *out = PyArray_SimpleNew(1, &dn, NPY_INT64);
    if (out && n)
        memcpy(PyArray_DATA((PyArrayObject *)out), pix, n * sizeof *pix);
    free(pix);
    return out;
}

static PyObject *py_holes_read(PyObject *self, PyObject *args)
{
    (void)self;
    PyObject *path_o;
    if (!PyArg_ParseTuple(args, "O&:mask_holes_read", PyUnicode_FSConverter, &path_o))
        return NULL;
    clef_mask_hole *h = NULL;
    size_t n = 0;
    const int st = clef_mask_holes_read(PyBytes_AS_STRING(path_o), &h, &n);
    Py_DECREF(path_o);
    if (st != CLEF_OK)
        return pyclef_raise(st);
    npy_intp dims[2] = {(npy_intp)n, 3};
    PyObject *out = PyArray_SimpleNew(2, dims, NPY_DOUBLE);
    if (out)
        for (size_t i = 0; i < n; i++) {
            double *row = (double *)PyArray_GETPTR2((PyArrayObject *)out, (npy_intp)i, 0);
            row[0] = h[i].lon;
            row[1] = h[i].lat;
            row[2] = h[i].radius;
        }
    free(h);
    return out;
}

static PyObject *py_cut_holes(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"mask", "holes", NULL};
    PyObject *mask_o, *holes_o;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "OO:mask_cut_holes", kwl, &mask_o, &holes_o))
        return NULL;
    PyArrayObject *ha = pyclef_double_array(holes_o, "holes", 2, 1);
    if (!ha)
        return NULL;
    if (PyArray_DIM(ha, 1) != 3) {
        Py_DECREF(ha);
        return PyErr_Format(PyExc_ValueError, "holes must have shape (n, 3): lon, lat, radius "
                            "in radians");
    }
    pyclef_map v;
    if (pyclef_map_view(&v, mask_o, "mask", 0, NULL, NULL) < 0) {
        Py_DECREF(ha);
        return NULL;
    }
    const npy_intp n = PyArray_DIM(ha, 0);
    clef_mask_hole *h = malloc((size_t)(n ? n : 1) * sizeof *h);
    clef_map m;
    PyObject *out = h ? copy_as_map(&v, &m) : PyErr_NoMemory();
    int st = CLEF_OK;
    if (out) {
        const double *d = PyArray_DATA(ha);
        for (npy_intp i = 0; i < n; i++)
            h[i] = (clef_mask_hole){d[3 * i], d[3 * i + 1], d[3 * i + 2]};
        Py_BEGIN_ALLOW_THREADS
        st = clef_mask_cut_holes(&m, h, (size_t)n);
        Py_END_ALLOW_THREADS
    }
    free(h);
    Py_DECREF(ha);
    pyclef_map_release(&v);
    if (out && st != CLEF_OK) {
        Py_DECREF(out);
        return pyclef_raise(st);
    }
    return out;
}

static PyObject *py_distance(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"mask", "max_dist", NULL};
    PyObject *mask_o;
    double maxd;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "Od:mask_distance", kwl, &mask_o, &maxd))
        return NULL;
    pyclef_map v;
    if (pyclef_map_view(&v, mask_o, "mask", 0, NULL, NULL) < 0)
        return NULL;
    npy_intp n = (npy_intp)v.m.npix;
    PyObject *out = PyArray_SimpleNew(1, &n, NPY_DOUBLE);
    int st = CLEF_OK;
    if (out) {
        double *d = PyArray_DATA((PyArrayObject *)out);
        pyclef_log_refresh();
        Py_BEGIN_ALLOW_THREADS
        st = clef_mask_distance(&v.m, maxd, d);
        Py_END_ALLOW_THREADS
    }
    pyclef_map_release(&v);
    if (out && st != CLEF_OK) {
        Py_DECREF(out);
        return pyclef_raise(st);
    }
    return out;
}

static PyObject *py_apodize(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"mask", "kind", "scale", "erode", NULL};
    PyObject *mask_o;
    const char *kind;
    double scale, erode = 0.0;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "Osd|$d:mask_apodize", kwl, &mask_o, &kind, &scale,
                                     &erode))
        return NULL;
    clef_mask_apod_opts o = {0};
    o.kind = !strcmp(kind, "c1") ? CLEF_MASK_APOD_C1 : !strcmp(kind, "c2") ? CLEF_MASK_APOD_C2
             : !strcmp(kind, "gauss") ? CLEF_MASK_APOD_GAUSS : 0;
    if (!o.kind)
        return PyErr_Format(PyExc_ValueError, "kind must be 'c1', 'c2' or 'gauss', got '%s'", kind);
    o.scale = scale;
    o.erode = erode;
    pyclef_map v;
    if (pyclef_map_view(&v, mask_o, "mask", 0, NULL, NULL) < 0)
        return NULL;
    clef_map *m = NULL;
    int st;
    pyclef_log_refresh();
    Py_BEGIN_ALLOW_THREADS
    st = clef_mask_apodize(&m, &v.m, &o);
    Py_END_ALLOW_THREADS
    pyclef_map_release(&v);
    return st != CLEF_OK ? pyclef_raise(st) : array_of(m);
}

static PyObject *py_moments(PyObject *self, PyObject *args)
{
    (void)self;
    PyObject *mask_o;
    if (!PyArg_ParseTuple(args, "O:mask_moments", &mask_o))
        return NULL;
    pyclef_map v;
    if (pyclef_map_view(&v, mask_o, "mask", 0, NULL, NULL) < 0)
        return NULL;
    clef_mask_moments mo;
    const int st = clef_mask_moments_compute(&v.m, &mo);
    pyclef_map_release(&v);
    if (st != CLEF_OK)
        return pyclef_raise(st);
    return Py_BuildValue("{s:L,s:L,s:d,s:d,s:d,s:d,s:d}", "nside", (long long)mo.nside,
                         "nobserved", (long long)mo.nobserved, "fsky", mo.fsky, "w1", mo.w1, "w2",
                         mo.w2, "w4", mo.w4, "fsky_eff", mo.fsky_eff);
}

static PyObject *py_mask_spectrum(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"mask", "lmax", "iterations", NULL};
    PyObject *mask_o;
    int lmax, iterations = 3;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "Oi|$i:mask_spectrum", kwl, &mask_o, &lmax,
                                     &iterations))
        return NULL;
    if (lmax < 1)
        return PyErr_Format(PyExc_ValueError, "lmax must be at least 1, got %d", lmax);
    pyclef_map v;
    if (pyclef_map_view(&v, mask_o, "mask", 0, NULL, NULL) < 0)
        return NULL;
    npy_intp n = lmax + 1;
    PyObject *out = PyArray_SimpleNew(1, &n, NPY_DOUBLE);
    int st = CLEF_OK;
    if (out) {
        double *wl = PyArray_DATA((PyArrayObject *)out);
        pyclef_log_refresh();
        Py_BEGIN_ALLOW_THREADS
        st = clef_mask_spectrum_lmax(&v.m, lmax, iterations, wl);
        Py_END_ALLOW_THREADS
    }
    pyclef_map_release(&v);
    if (out && st != CLEF_OK) {
        Py_DECREF(out);
        return pyclef_raise(st);
    }
    return out;
}

#define KW METH_VARARGS | METH_KEYWORDS
PyMethodDef pyclef_mask_methods[] = {
    {"mask_full", py_mask_full, METH_VARARGS,
     "mask_full(nside, /)\n--\n\nA mask of 12 nside^2 pixels, all observed (1.0)."},
    {"mask_binarize", PYCLEF_KW(py_mask_binarize), KW,
     "mask_binarize(map, *, threshold=0.0, inclusive=False)\n--\n\n"
     "Binary mask from a map: 1 where the value is > threshold (>= with inclusive), else 0;\n"
     "NaN (missing) pixels give 0."},
    {"mask_cut_latitude", PYCLEF_KW(py_cut_lat), KW,
     "mask_cut_latitude(mask, b_cut)\n--\n\n"
     "Copy of `mask` with pixels of |latitude| < b_cut [rad, 0..pi/2] set to 0 (latitude\n"
     "of the mask's own frame: pi/2 - theta)."},
    {"mask_cut_disc", PYCLEF_KW(py_cut_disc), KW,
     "mask_cut_disc(mask, lon, lat, radius)\n--\n\n"
     "Copy of `mask` with the pixels whose centres lie within `radius` of (lon, lat) set\n"
     "to 0; radians."},
    {"mask_keep_disc", PYCLEF_KW(py_keep_disc), KW,
     "mask_keep_disc(mask, lon, lat, radius)\n--\n\n"
     "Copy of `mask` keeping only the disc of centre (lon, lat) and `radius`; radians."},
    {"mask_query_disc", PYCLEF_KW(py_query_disc), KW,
     "mask_query_disc(nside, lon, lat, radius)\n--\n\n"
     "RING pixel indices (int64, increasing) whose centres lie within `radius` [rad] of\n"
     "(lon, lat) [rad]."},
    {"mask_holes_read", py_holes_read, METH_VARARGS,
     "mask_holes_read(path, /)\n--\n\n"
     "Read a source list (docs/masks.md: lon [deg], lat [deg], radius [arcmin] per line);\n"
     "returns an (n, 3) array lon, lat, radius in radians."},
    {"mask_cut_holes", PYCLEF_KW(py_cut_holes), KW,
     "mask_cut_holes(mask, holes)\n--\n\n"
     "Copy of `mask` with every hole (an (n, 3) array lon, lat, radius in radians) cut."},
    {"mask_distance", PYCLEF_KW(py_distance), KW,
     "mask_distance(mask, max_dist)\n--\n\n"
     "Angular distance [rad] of each pixel centre to the masked region, capped at max_dist\n"
     "[rad]; 0 for masked pixels."},
    {"mask_apodize", PYCLEF_KW(py_apodize), KW,
     "mask_apodize(mask, kind, scale, *, erode=0.0)\n--\n\n"
     "Apodized mask: kind 'c1' or 'c2' (Grain, Tristram & Stompor 2009 kernels of the\n"
     "distance to the masked region, apodization length `scale` [rad]) or 'gauss'\n"
     "(Gaussian smoothing of FWHM `scale` [rad] after eroding by `erode` [rad])."},
    {"mask_moments", py_moments, METH_VARARGS,
     "mask_moments(mask, /)\n--\n\n"
     "Moments over the whole sphere (Hivon et al. 2002): dict nside, nobserved, fsky,\n"
     "w1, w2, w4 (means of w^i) and fsky_eff = w2^2 / w4."},
    {"mask_spectrum", PYCLEF_KW(py_mask_spectrum), KW,
     "mask_spectrum(mask, lmax, *, iterations=3)\n--\n\n"
     "Mask power spectrum W_l = sum_m |w_lm|^2 / (2l+1), l = 0..lmax."},
    {NULL, NULL, 0, NULL}};
