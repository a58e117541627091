/* Band-power tables as Python dicts of numpy arrays, and
 * clef.read_bandpowers / clef.write_bandpowers over include/clef/table.h. */
#include "pyclef.h"

#include <math.h>
#include <stdlib.h>
#include <string.h>

PyObject *pyclef_bandpowers_dict(const clef_bandpowers *bp)
{
    PyObject *d = PyDict_New();
    if (!d)
        return NULL;
    const npy_intp n = bp->nbins;
    if (pyclef_set(d, "l_lo", pyclef_vec_int(bp->l_lo, n)) < 0 ||
        pyclef_set(d, "l_hi", pyclef_vec_int(bp->l_hi, n)) < 0 ||
        pyclef_set(d, "l_eff", pyclef_vec_double(bp->l_eff, n)) < 0 ||
        pyclef_set(d, "cl", pyclef_vec_double(bp->cl, n)) < 0 ||
        pyclef_set(d, "dl", pyclef_vec_double(bp->dl, n)) < 0 ||
        pyclef_set(d, "dl_err", pyclef_vec_double(bp->dl_err, n)) < 0)
        goto fail;
    if (bp->cov) {
        npy_intp dims[2] = {n, n};
        PyObject *c = PyArray_SimpleNew(2, dims, NPY_DOUBLE);
        if (c)
            memcpy(PyArray_DATA((PyArrayObject *)c), bp->cov, (size_t)(n * n) * sizeof(double));
        if (pyclef_set(d, "cov", c) < 0)
            goto fail;
    } else if (PyDict_SetItemString(d, "cov", Py_None) < 0) {
        goto fail;
    }
    if (bp->win) {
        npy_intp dims[2] = {n, (npy_intp)bp->win_lmax + 1};
        PyObject *w = PyArray_SimpleNew(2, dims, NPY_DOUBLE);
        if (w)
            memcpy(PyArray_DATA((PyArrayObject *)w), bp->win,
                   (size_t)(dims[0] * dims[1]) * sizeof(double));
        if (pyclef_set(d, "windows", w) < 0)
            goto fail;
    } else if (PyDict_SetItemString(d, "windows", Py_None) < 0) {
        goto fail;
    }
    PyObject *meta = PyDict_New();
    if (pyclef_set(d, "meta", meta) < 0)
        goto fail;
    for (int i = 0; i < bp->nmeta; i++) {
        const clef_meta *m = &bp->meta[i];
        PyObject *v = m->is_number ? PyFloat_FromDouble(strtod(m->value, NULL))
                                   : PyUnicode_DecodeLatin1(m->value, (Py_ssize_t)strlen(m->value),
                                                            "replace");
        if (pyclef_set(meta, m->key, v) < 0)
            goto fail;
    }
    return d;
fail:
    Py_DECREF(d);
    return NULL;
}

/* Copy a 1-d float64 (or int) column of length n out of the dict. */
static int column(PyObject *d, const char *key, npy_intp n, int required, double *dv, int *iv,
                  const char *what)
{
    PyObject *o = PyDict_GetItemString(d, key); /* borrowed */
    if (!o || o == Py_None) {
        if (required)
            PyErr_Format(PyExc_ValueError, "%s: no '%s' entry", what, key);
        return required ? -1 : 0;
    }
    PyArrayObject *a = (PyArrayObject *)PyArray_FROMANY(o, NPY_DOUBLE, 1, 1, NPY_ARRAY_CARRAY_RO);
    if (!a) {
        PyErr_Clear();
        PyErr_Format(PyExc_TypeError, "%s['%s'] must be a 1-d numeric array", what, key);
        return -1;
    }
    if (PyArray_DIM(a, 0) != n) {
        PyErr_Format(PyExc_ValueError, "%s['%s'] has %zd entries, l_eff has %zd", what, key,
                     (Py_ssize_t)PyArray_DIM(a, 0), (Py_ssize_t)n);
        Py_DECREF(a);
        return -1;
    }
    const double *v = PyArray_DATA(a);
    for (npy_intp i = 0; i < n; i++) {
        if (!isfinite(v[i])) {
            PyErr_Format(PyExc_ValueError, "%s['%s'] holds a non-finite value at bin %zd", what,
                         key, (Py_ssize_t)i);
            Py_DECREF(a);
            return -1;
        }
        if (dv)
            dv[i] = v[i];
        if (iv)
            iv[i] = (int)v[i];
    }
    Py_DECREF(a);
    return 1;
}

/* A 2-d float64 matrix entry of shape (n, cols) (cols < 0: any), copied
 * into a new malloc'ed buffer; *out NULL when absent. */
static int matrix(PyObject *d, const char *key, npy_intp n, npy_intp *cols, double **out,
                  const char *what)
{
    *out = NULL;
    PyObject *o = PyDict_GetItemString(d, key);
    if (!o || o == Py_None)
        return 0;
    char name[96];
    snprintf(name, sizeof name, "%s['%s']", what, key);
    PyArrayObject *a = pyclef_double_array(o, name, 2, 1);
    if (!a)
        return -1;
    if (PyArray_DIM(a, 0) != n || (*cols >= 0 && PyArray_DIM(a, 1) != *cols)) {
        PyErr_Format(PyExc_ValueError, "%s has shape (%zd, %zd), expected %zd rows%s", name,
                     (Py_ssize_t)PyArray_DIM(a, 0), (Py_ssize_t)PyArray_DIM(a, 1), (Py_ssize_t)n,
                     *cols >= 0 ? " and as many columns" : "");
        Py_DECREF(a);
        return -1;
    }
    *cols = PyArray_DIM(a, 1);
    *out = malloc((size_t)(n * *cols) * sizeof(double));
    if (!*out) {
        Py_DECREF(a);
        PyErr_NoMemory();
        return -1;
    }
    memcpy(*out, PyArray_DATA(a), (size_t)(n * *cols) * sizeof(double));
    Py_DECREF(a);
    return 1;
}

clef_bandpowers *pyclef_bandpowers_from(PyObject *obj, const char *what)
{
    clef_bandpowers *bp = NULL;
    int st;
    if (PyUnicode_Check(obj) || PyBytes_Check(obj) || PyObject_HasAttrString(obj, "__fspath__")) {
        PyObject *p = NULL;
        if (!PyUnicode_FSConverter(obj, &p))
            return NULL;
        const char *path = PyBytes_AS_STRING(p);
        pyclef_log_refresh();
        Py_BEGIN_ALLOW_THREADS
        st = clef_bandpowers_read(&bp, path);
        Py_END_ALLOW_THREADS
        Py_DECREF(p);
        if (st != CLEF_OK)
            return (clef_bandpowers *)pyclef_raise(st);
        return bp;
    }
    if (!PyDict_Check(obj)) {
        PyErr_Format(PyExc_TypeError, "%s must be a band-power dict (as clef.spectrum or "
                     "clef.read_bandpowers return) or a file path, got %.80s", what,
                     Py_TYPE(obj)->tp_name);
        return NULL;
    }
    PyObject *le = PyDict_GetItemString(obj, "l_eff");
    if (!le) {
        PyErr_Format(PyExc_ValueError, "%s: no 'l_eff' entry", what);
        return NULL;
    }
    const Py_ssize_t n = PyObject_Length(le);
    if (n < 1) {
        if (!PyErr_Occurred())
            PyErr_Format(PyExc_ValueError, "%s: 'l_eff' is empty", what);
        return NULL;
    }
    PyObject *cov_o = PyDict_GetItemString(obj, "cov");
    if ((st = clef_bandpowers_alloc(&bp, (int)n, cov_o && cov_o != Py_None)) != CLEF_OK)
        return (clef_bandpowers *)pyclef_raise(st);
    int has_cl;
    if (column(obj, "l_lo", n, 1, NULL, bp->l_lo, what) < 0 ||
        column(obj, "l_hi", n, 1, NULL, bp->l_hi, what) < 0 ||
        column(obj, "l_eff", n, 1, bp->l_eff, NULL, what) < 0 ||
        column(obj, "dl", n, 1, bp->dl, NULL, what) < 0 ||
        column(obj, "dl_err", n, 1, bp->dl_err, NULL, what) < 0 ||
        (has_cl = column(obj, "cl", n, 0, bp->cl, NULL, what)) < 0)
        goto fail;
    if (!has_cl)
        for (Py_ssize_t b = 0; b < n; b++)
            bp->cl[b] = 2 * M_PI * bp->dl[b] / (bp->l_eff[b] * (bp->l_eff[b] + 1));
    double *m = NULL;
    npy_intp cols = n;
    int r = matrix(obj, "cov", n, &cols, &m, what);
    if (r < 0)
        goto fail;
    if (r) {
        memcpy(bp->cov, m, (size_t)(n * n) * sizeof(double));
        free(m);
    }
    cols = -1;
    if ((r = matrix(obj, "windows", n, &cols, &m, what)) < 0)
        goto fail;
    if (r) {
        if ((st = clef_bandpowers_alloc_windows(bp, (int)cols - 1)) != CLEF_OK) {
            free(m);
            pyclef_raise(st);
            goto fail;
        }
        memcpy(bp->win, m, (size_t)(n * cols) * sizeof(double));
        free(m);
    }
    return bp;
fail:
    clef_bandpowers_free(bp);
    return NULL;
}

static PyObject *py_read_bandpowers(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"path", "cov", "windows", NULL};
    PyObject *path, *cov_o = NULL, *win_o = NULL;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "O|$O&O&:read_bandpowers", kwl, &path,
                                     PyUnicode_FSConverter, &cov_o, PyUnicode_FSConverter, &win_o))
        return NULL;
    PyObject *res = NULL;
    if (!PyUnicode_Check(path) && !PyObject_HasAttrString(path, "__fspath__")) {
        PyErr_SetString(PyExc_TypeError, "path must be a str or path-like");
        goto done;
    }
    clef_bandpowers *bp = pyclef_bandpowers_from(path, "path");
    if (!bp)
        goto done;
    int st = CLEF_OK;
    if (cov_o)
        st = clef_bandpowers_read_cov(bp, PyBytes_AS_STRING(cov_o));
    if (st == CLEF_OK && win_o)
        st = clef_bandpowers_read_windows(bp, PyBytes_AS_STRING(win_o));
    if (st != CLEF_OK)
        pyclef_raise(st);
    else
        res = pyclef_bandpowers_dict(bp);
    clef_bandpowers_free(bp);
done:
    Py_XDECREF(cov_o);
    Py_XDECREF(win_o);
    return res;
}

static PyObject *py_write_bandpowers(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"path", "table", NULL};
    PyObject *path_o, *tab;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "O&O:write_bandpowers", kwl, PyUnicode_FSConverter,
                                     &path_o, &tab))
        return NULL;
    clef_bandpowers *bp = pyclef_bandpowers_from(tab, "table");
    if (!bp) {
        Py_DECREF(path_o);
        return NULL;
    }
    const char *path = PyBytes_AS_STRING(path_o);
    const size_t len = strlen(path);
    const int csv = len > 4 && !strcmp(path + len - 4, ".csv");
    int st;
    Py_BEGIN_ALLOW_THREADS
    st = csv ? clef_bandpowers_write_csv(bp, path) : clef_bandpowers_write_fits(bp, path);
    Py_END_ALLOW_THREADS
    clef_bandpowers_free(bp);
    Py_DECREF(path_o);
    if (st != CLEF_OK)
        return pyclef_raise(st);
    Py_RETURN_NONE;
}

PyMethodDef pyclef_table_methods[] = {
    {"read_bandpowers", PYCLEF_KW(py_read_bandpowers), METH_VARARGS | METH_KEYWORDS,
     "read_bandpowers(path, *, cov=None, windows=None)\n--\n\n"
     "Read a band-power table (clef's FITS or CSV, or a plain text table; docs/formats.md).\n"
     "Returns a dict: l_lo, l_hi (int arrays, inclusive bin ranges), l_eff, cl [uK^2],\n"
     "dl = l(l+1)C/2pi [uK^2], dl_err [uK^2], cov (nbins x nbins covariance of D [uK^4], or\n"
     "None), windows (nbins x (win_lmax+1) band-power windows, or None) and meta (header\n"
     "keywords).  cov, windows: text files replacing the table's own (as clef peak --cov)."},
    {"write_bandpowers", PYCLEF_KW(py_write_bandpowers), METH_VARARGS | METH_KEYWORDS,
     "write_bandpowers(path, table)\n--\n\n"
     "Write a band-power dict as clef's FITS table (CSV when path ends in .csv), atomically."},
    {NULL, NULL, 0, NULL}};
