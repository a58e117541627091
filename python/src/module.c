/* clef._clef: module set-up, exceptions, the log hook, and the argument
 * helpers every wrapper file uses (python/src/pyclef.h). */
#define CLEF_PY_MAIN
#include "pyclef.h"

#include <limits.h>
#include <math.h>
#include <stdlib.h>
#include <string.h>

/* ---- exceptions --------------------------------------------------------- */

static PyObject *err_base;     /* clef.Error */
static PyObject *err_by_status[7];

PyObject *pyclef_raise(int status)
{
    const char *msg = clef_last_error();
    if (!msg || !msg[0])
        msg = clef_strerror(status);
    PyObject *cls = (status > 0 && status < 7 && err_by_status[status]) ? err_by_status[status]
                                                                          : err_base;
    PyObject *exc = PyObject_CallFunction(cls, "s", msg);
    if (!exc)
        return NULL;
    PyObject *st = PyLong_FromLong(status);
    PyObject *m = PyUnicode_FromString(msg);
    if (st && m && PyObject_SetAttrString(exc, "status", st) == 0 &&
        PyObject_SetAttrString(exc, "message", m) == 0)
        PyErr_SetObject(cls, exc);
    Py_XDECREF(st);
    Py_XDECREF(m);
    Py_DECREF(exc);
    return NULL;
}

static int make_errors(PyObject *mod)
{
    err_base = PyErr_NewExceptionWithDoc(
        "clef.Error",
        "A failure reported by the clef library.  Attributes: status (the library's status\n"
        "code, include/clef/clef.h: 1 invalid argument, 2 out of memory, 3 file I/O,\n"
        "4 file format, 5 numerical failure, 6 unsupported) and message (the library's\n"
        "message, naming the file, HDU, keyword or value at fault).",
        PyExc_Exception, NULL);
    if (!err_base || PyModule_AddObjectRef(mod, "Error", err_base) < 0)
        return -1;
    static const struct {
        int status;
        const char *name, *doc;
        PyObject **extra;
    } sub[] = {
        {CLEF_EINVAL, "InvalidArgumentError", "An argument or option value is invalid (status 1).",
         &PyExc_ValueError},
        {CLEF_ENOMEM, "OutOfMemoryError", "Memory allocation failed (status 2).", &PyExc_MemoryError},
        {CLEF_EIO, "FileError", "A file could not be opened, read, written or renamed (status 3).",
         &PyExc_OSError},
        {CLEF_EFORMAT, "FormatError", "A file's content breaks the expected format (status 4).",
         &PyExc_ValueError},
        {CLEF_ENUMERIC, "NumericalError",
         "A numerical failure: singular or ill-conditioned system, no convergence (status 5).",
         &PyExc_ArithmeticError},
        {CLEF_EUNSUP, "UnsupportedError", "A valid request clef does not support (status 6).",
         &PyExc_NotImplementedError},
    };
    for (size_t i = 0; i < sizeof sub / sizeof *sub; i++) {
        char full[64];
        snprintf(full, sizeof full, "clef.%s", sub[i].name);
        PyObject *bases = PyTuple_Pack(2, err_base, *sub[i].extra);
        if (!bases)
            return -1;
        PyObject *cls = PyErr_NewExceptionWithDoc(full, sub[i].doc, bases, NULL);
        Py_DECREF(bases);
        if (!cls || PyModule_AddObjectRef(mod, sub[i].name, cls) < 0)
            return -1;
        err_by_status[sub[i].status] = cls;
    }
    return 0;
}

/* ---- logging ------------------------------------------------------------ */

static PyObject *logger;              /* logging.getLogger("clef") */
static volatile int log_threshold = -1; /* highest clef level forwarded; -1: none */

void pyclef_log_refresh(void)
{
    if (!logger)
        return;
    PyObject *lv = PyObject_CallMethod(logger, "getEffectiveLevel", NULL);
    if (!lv) {
        PyErr_Clear();
        return;
    }
    const long l = PyLong_AsLong(lv);
    Py_DECREF(lv);
    /* logging: DEBUG 10, INFO 20, WARNING 30.  Library errors are raised as
     * exceptions, never logged (they would be reported twice). */
    log_threshold = l <= 10 ? CLEF_LOG_DEBUG : l <= 20 ? CLEF_LOG_INFO : l <= 30 ? CLEF_LOG_WARN : -1;
}

/* The library's log hook: may run on any thread with or without the GIL
 * (wrappers release it around library calls), so it takes it. */
/* Warnings of the library call in progress on this thread (library
 * warnings come from the calling thread, clef.h), kept for the result's
 * summary without needing the GIL. */
static _Thread_local pyclef_warnings *warn_capture;

void pyclef_warnings_begin(pyclef_warnings *w)
{
    memset(w, 0, sizeof *w);
    warn_capture = w;
}

void pyclef_warnings_end(pyclef_warnings *w)
{
    if (warn_capture == w)
        warn_capture = NULL;
}

PyObject *pyclef_warnings_list(pyclef_warnings *w)
{
    pyclef_warnings_end(w);
    PyObject *l = PyList_New(0);
    for (int i = 0; l && i < w->n; i++) {
        PyObject *s = PyUnicode_DecodeUTF8(w->msg[i], (Py_ssize_t)strlen(w->msg[i]), "replace");
        if (!s || PyList_Append(l, s) < 0)
            Py_CLEAR(l);
        Py_XDECREF(s);
    }
    pyclef_warnings_free(w);
    return l;
}

void pyclef_warnings_free(pyclef_warnings *w)
{
    pyclef_warnings_end(w);
    for (int i = 0; i < w->n; i++)
        free(w->msg[i]);
    free(w->msg);
    memset(w, 0, sizeof *w);
}

static void capture(int level, const char *msg)
{
    pyclef_warnings *w = warn_capture;
    if (level != CLEF_LOG_WARN || !w)
        return;
    if (w->n == w->cap) {
        const int cap = w->cap ? 2 * w->cap : 8;
        char **m = realloc(w->msg, (size_t)cap * sizeof *m);
        if (!m)
            return;
        w->msg = m;
        w->cap = cap;
    }
    const size_t len = strlen(msg) + 1;
    char *c = malloc(len);
    if (c) {
        memcpy(c, msg, len);
        w->msg[w->n++] = c;
    }
}

static void log_hook(void *user, int level, const char *msg)
{
    (void)user;
    capture(level, msg);
    if (level == CLEF_LOG_ERROR || level > log_threshold || !logger || !Py_IsInitialized())
        return;
    PyGILState_STATE g = PyGILState_Ensure();
    PyObject *et, *ev, *tb;
    PyErr_Fetch(&et, &ev, &tb);
    const int pylevel = level == CLEF_LOG_WARN ? 30 : level == CLEF_LOG_INFO ? 20 : 10;
    PyObject *r = PyObject_CallMethod(logger, "log", "is", pylevel, msg);
    if (!r)
        PyErr_Clear();
    Py_XDECREF(r);
    PyErr_Restore(et, ev, tb);
    PyGILState_Release(g);
}

/* ---- arrays ------------------------------------------------------------- */

static PyArrayObject *checked_array(PyObject *obj, const char *what, int ndim, int type,
                                    const char *tname)
{
    PyArrayObject *a;
    if (PyArray_Check(obj)) {
        a = (PyArrayObject *)obj;
        if (PyArray_TYPE(a) != type) {
            PyErr_Format(PyExc_TypeError, "%s must be a %s array, got dtype %S (convert it with "
                         ".astype(numpy.%s))", what, tname, (PyObject *)PyArray_DESCR(a), tname);
            return NULL;
        }
        Py_INCREF(a);
    } else {
        /* Lists and other sequences are converted (a new array). */
        a = (PyArrayObject *)PyArray_FROMANY(obj, type, 0, 0, NPY_ARRAY_CARRAY_RO);
        if (!a) {
            PyErr_Clear();
            PyErr_Format(PyExc_TypeError, "%s must be a numpy %s array, got %.80s", what, tname,
                         Py_TYPE(obj)->tp_name);
            return NULL;
        }
    }
    if (ndim > 0 && PyArray_NDIM(a) != ndim) {
        PyErr_Format(PyExc_ValueError, "%s must have %d dimension%s, got shape with %d", what,
                     ndim, ndim > 1 ? "s" : "", PyArray_NDIM(a));
        Py_DECREF(a);
        return NULL;
    }
    if (!PyArray_ISCARRAY_RO(a)) {
        PyErr_Format(PyExc_ValueError, "%s must be a C-contiguous, aligned, native-byte-order "
                     "array (use numpy.ascontiguousarray)", what);
        Py_DECREF(a);
        return NULL;
    }
    return a;
}

PyArrayObject *pyclef_double_array(PyObject *obj, const char *what, int ndim, int finite)
{
    PyArrayObject *a = checked_array(obj, what, ndim, NPY_DOUBLE, "float64");
    if (!a || !finite)
        return a;
    const double *v = PyArray_DATA(a);
    const npy_intp n = PyArray_SIZE(a);
    for (npy_intp i = 0; i < n; i++)
        if (!isfinite(v[i])) {
            PyErr_Format(PyExc_ValueError, "%s holds a non-finite value (%s) at flat index %zd",
                         what, isnan(v[i]) ? "nan" : v[i] > 0 ? "inf" : "-inf", (Py_ssize_t)i);
            Py_DECREF(a);
            return NULL;
        }
    return a;
}

PyArrayObject *pyclef_complex_array(PyObject *obj, const char *what, int ndim)
{
    return checked_array(obj, what, ndim, NPY_CDOUBLE, "complex128");
}

int64_t pyclef_nside_of(npy_intp npix, const char *what)
{
    int64_t nside = 1;
    while (nside <= CLEF_NSIDE_MAX && 12 * nside * nside < (int64_t)npix)
        nside *= 2;
    if (nside > CLEF_NSIDE_MAX || 12 * nside * nside != (int64_t)npix) {
        PyErr_Format(PyExc_ValueError, "%s has %zd pixels, not 12 nside^2 for an nside that is a "
                     "power of two up to %d", what, (Py_ssize_t)npix, CLEF_NSIDE_MAX);
        return -1;
    }
    return nside;
}

int pyclef_map_view(pyclef_map *v, PyObject *obj, const char *what, int allow_nan,
                    const char *coordsys, const char *unit)
{
    memset(v, 0, sizeof *v);
    v->arr = pyclef_double_array(obj, what, 1, 0);
    if (!v->arr)
        return -1;
    const npy_intp npix = PyArray_DIM(v->arr, 0);
    const int64_t nside = pyclef_nside_of(npix, what);
    if (nside < 0)
        goto fail;
    const double *pix = PyArray_DATA(v->arr);
    v->valid = malloc((size_t)npix);
    if (!v->valid) {
        PyErr_NoMemory();
        goto fail;
    }
    int64_t nmiss = 0;
    for (npy_intp p = 0; p < npix; p++) {
        if (isnan(pix[p])) {
            if (!allow_nan) {
                PyErr_Format(PyExc_ValueError, "%s holds NaN at RING pixel %zd (NaN is allowed "
                             "only in maps, where it marks a missing pixel)", what, (Py_ssize_t)p);
                goto fail;
            }
            v->valid[p] = 0;
            nmiss++;
        } else if (isinf(pix[p])) {
            PyErr_Format(PyExc_ValueError, "%s holds an infinite value at RING pixel %zd", what,
                         (Py_ssize_t)p);
            goto fail;
        } else {
            v->valid[p] = 1;
        }
    }
    v->m.pix = (double *)pix; /* only read: every wrapper passes a const clef_map */
    if (nmiss) {
        /* clef_map's invariant: invalid pixels hold 0.  Copy, never write
         * into the caller's array. */
        v->pix_copy = malloc((size_t)npix * sizeof(double));
        if (!v->pix_copy) {
            PyErr_NoMemory();
            goto fail;
        }
        for (npy_intp p = 0; p < npix; p++)
            v->pix_copy[p] = v->valid[p] ? pix[p] : 0.0;
        v->m.pix = v->pix_copy;
    }
    v->m.nside = nside;
    v->m.npix = npix;
    v->m.valid = v->valid;
    v->m.nmissing = nmiss;
    v->m.nbad = nmiss;
    v->m.file_ordering = CLEF_RING;
    snprintf(v->m.coordsys, sizeof v->m.coordsys, "%s", coordsys ? coordsys : "");
    snprintf(v->m.unit, sizeof v->m.unit, "%s", unit ? unit : "");
    return 0;
fail:
    pyclef_map_release(v);
    return -1;
}

void pyclef_map_release(pyclef_map *v)
{
    Py_CLEAR(v->arr);
    free(v->pix_copy);
    free(v->valid);
    v->pix_copy = NULL;
    v->valid = NULL;
}

PyObject *pyclef_map_to_array(const clef_map *m)
{
    npy_intp n = (npy_intp)m->npix;
    PyObject *a = PyArray_SimpleNew(1, &n, NPY_DOUBLE);
    if (!a)
        return NULL;
    double *d = PyArray_DATA((PyArrayObject *)a);
    for (npy_intp p = 0; p < n; p++)
        d[p] = m->valid[p] ? m->pix[p] : NAN;
    return a;
}

PyObject *pyclef_vec_double(const double *v, npy_intp n)
{
    PyObject *a = PyArray_SimpleNew(1, &n, NPY_DOUBLE);
    if (a && n)
        memcpy(PyArray_DATA((PyArrayObject *)a), v, (size_t)n * sizeof(double));
    return a;
}

PyObject *pyclef_vec_int(const int *v, npy_intp n)
{
    PyObject *a = PyArray_SimpleNew(1, &n, NPY_INT);
    if (a && n)
        memcpy(PyArray_DATA((PyArrayObject *)a), v, (size_t)n * sizeof(int));
    return a;
}

int pyclef_opt_int(PyObject *o, void *out)
{
    if (o == Py_None)
        return 1;
    if (!PyLong_Check(o)) {
        PyErr_Format(PyExc_TypeError, "expected an int or None, got %.80s", Py_TYPE(o)->tp_name);
        return 0;
    }
    const long v = PyLong_AsLong(o);
    if (v == -1 && PyErr_Occurred())
        return 0;
    if (v < INT_MIN || v > INT_MAX) {
        PyErr_Format(PyExc_OverflowError, "%ld does not fit in a C int", v);
        return 0;
    }
    *(int *)out = (int)v;
    return 1;
}

int pyclef_opt_double(PyObject *o, void *out)
{
    if (o == Py_None)
        return 1;
    const double v = PyFloat_AsDouble(o);
    if (v == -1.0 && PyErr_Occurred())
        return 0;
    *(double *)out = v;
    return 1;
}

int pyclef_set(PyObject *d, const char *key, PyObject *value)
{
    if (!value)
        return -1;
    const int rc = PyDict_SetItemString(d, key, value);
    Py_DECREF(value);
    return rc;
}

/* ---- module ------------------------------------------------------------- */

static PyObject *py_strerror(PyObject *self, PyObject *args)
{
    (void)self;
    int status;
    if (!PyArg_ParseTuple(args, "i:strerror", &status))
        return NULL;
    return PyUnicode_FromString(clef_strerror(status));
}

static PyMethodDef core_methods[] = {
    {"strerror", py_strerror, METH_VARARGS,
     "strerror(status, /)\n--\n\nShort text for a library status code (\"invalid argument\", ...)."},
    {NULL, NULL, 0, NULL}};

static struct PyModuleDef moddef = {
    PyModuleDef_HEAD_INIT, "clef._clef",
    "The C part of the clef Python module (use `import clef`; docs/python.md).", -1, core_methods,
    NULL, NULL, NULL, NULL};

static int add_methods(PyObject *mod, PyMethodDef *defs)
{
    return PyModule_AddFunctions(mod, defs);
}

PyMODINIT_FUNC PyInit__clef(void)
{
    import_array();
    PyObject *mod = PyModule_Create(&moddef);
    if (!mod)
        return NULL;
    if (make_errors(mod) < 0)
        goto fail;
    PyObject *logging = PyImport_ImportModule("logging");
    if (!logging)
        goto fail;
    logger = PyObject_CallMethod(logging, "getLogger", "s", "clef");
    Py_DECREF(logging);
    if (!logger)
        goto fail;
    PyMethodDef *tables[] = {pyclef_map_methods,      pyclef_sht_methods,  pyclef_mask_methods,
                             pyclef_spectrum_methods, pyclef_peak_methods, pyclef_sim_methods,
                             pyclef_theory_methods,   pyclef_table_methods, pyclef_estimator_methods,
                             pyclef_spectrum_pol_methods};
    for (size_t i = 0; i < sizeof tables / sizeof *tables; i++)
        if (add_methods(mod, tables[i]) < 0)
            goto fail;
    if (pyclef_sht_register(mod) < 0 || pyclef_sht_spin_register(mod) < 0 ||
        pyclef_estimator_register(mod) < 0 || pyclef_geometry_register(mod) < 0)
        goto fail;
    if (PyModule_AddStringConstant(mod, "__version__", CLEF_VERSION) < 0 ||
        PyModule_AddIntConstant(mod, "NSIDE_MAX", CLEF_NSIDE_MAX) < 0)
        goto fail;
    /* Installed once, before any library code runs (clef.h). */
    clef_set_log(log_hook, NULL);
    return mod;
fail:
    Py_DECREF(mod);
    return NULL;
}
