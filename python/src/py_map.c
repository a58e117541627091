/* clef.read_map, clef.write_map, clef.map_stats, clef.unit_to_uk over
 * include/clef/map.h. */
#include "pyclef.h"

#include <string.h>

/* An HDU or column selector: None, an int (1-based) or a str. */
static int selector(PyObject *o, char *buf, size_t n, const char *what, const char **out)
{
    *out = NULL;
    if (!o || o == Py_None)
        return 0;
    if (PyLong_Check(o)) {
        const long v = PyLong_AsLong(o);
        if (v < 1) {
            PyErr_Format(PyExc_ValueError, "%s must be a positive number (1 = first) or a name, "
                         "got %ld", what, v);
            return -1;
        }
        snprintf(buf, n, "%ld", v);
    } else if (PyUnicode_Check(o)) {
        const char *s = PyUnicode_AsUTF8(o);
        if (!s)
            return -1;
        snprintf(buf, n, "%s", s);
    } else {
        PyErr_Format(PyExc_TypeError, "%s must be an int, a str or None, got %.80s", what,
                     Py_TYPE(o)->tp_name);
        return -1;
    }
    *out = buf;
    return 0;
}

static PyObject *py_read_map(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"path", "hdu", "column", "ordering", NULL};
    PyObject *path_o, *hdu_o = NULL, *col_o = NULL;
    const char *ordering = NULL;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "O&|$OOz:read_map", kwl, PyUnicode_FSConverter,
                                     &path_o, &hdu_o, &col_o, &ordering))
        return NULL;
    char hb[64], cb[80];
    clef_map_read_opts ro = {0};
    ro.ordering = ordering;
    if (selector(hdu_o, hb, sizeof hb, "hdu", &ro.hdu) < 0 ||
        selector(col_o, cb, sizeof cb, "column", &ro.column) < 0) {
        Py_DECREF(path_o);
        return NULL;
    }
    pyclef_log_refresh();
    clef_map *m = NULL;
    int st;
    const char *path = PyBytes_AS_STRING(path_o);
    Py_BEGIN_ALLOW_THREADS
    st = clef_map_read(&m, path, &ro);
    Py_END_ALLOW_THREADS
    Py_DECREF(path_o);
    if (st != CLEF_OK)
        return pyclef_raise(st);
    PyObject *pix = pyclef_map_to_array(m), *meta = PyDict_New(), *valid = NULL;
    npy_intp n = (npy_intp)m->npix;
    if (pix && meta && (valid = PyArray_SimpleNew(1, &n, NPY_BOOL))) {
        memcpy(PyArray_DATA((PyArrayObject *)valid), m->valid, (size_t)n);
        const int ok_valid = pyclef_set(meta, "valid", valid) == 0;
        valid = NULL; /* consumed by pyclef_set */
        if (ok_valid && pyclef_set(meta, "nside", PyLong_FromLongLong(m->nside)) == 0 &&
            pyclef_set(meta, "npix", PyLong_FromLongLong(m->npix)) == 0 &&
            pyclef_set(meta, "ordering",
                       PyUnicode_FromString(m->file_ordering == CLEF_NESTED ? "NESTED" : "RING")) == 0 &&
            pyclef_set(meta, "coordsys", PyUnicode_FromString(m->coordsys)) == 0 &&
            pyclef_set(meta, "unit", PyUnicode_FromString(m->unit)) == 0 &&
            pyclef_set(meta, "column", PyUnicode_FromString(m->column)) == 0 &&
            pyclef_set(meta, "hdu", PyLong_FromLong(m->hdu)) == 0 &&
            pyclef_set(meta, "nmissing", PyLong_FromLongLong(m->nmissing)) == 0 &&
            pyclef_set(meta, "nbad", PyLong_FromLongLong(m->nbad)) == 0) {
            clef_map_free(m);
            return Py_BuildValue("(NN)", pix, meta);
        }
    }
    Py_XDECREF(valid);
    Py_XDECREF(pix);
    Py_XDECREF(meta);
    clef_map_free(m);
    return NULL;
}

static PyObject *py_write_map(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"path",      "map",     "coordsys", "unit",    "column",
                          "extname",   "row_length", "float32", "history", NULL};
    PyObject *path_o, *map_o;
    const char *coordsys = "", *unit = "", *column = NULL, *extname = NULL, *history = NULL;
    int row_length = 0, float32 = 0;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "O&O|$sszzipz:write_map", kwl,
                                     PyUnicode_FSConverter, &path_o, &map_o, &coordsys, &unit,
                                     &column, &extname, &row_length, &float32, &history))
        return NULL;
    if (strlen(coordsys) > 1 || (coordsys[0] && !strchr("GEC", coordsys[0]))) {
        Py_DECREF(path_o);
        return PyErr_Format(PyExc_ValueError, "coordsys must be 'G', 'E', 'C' or '', got '%s'",
                            coordsys);
    }
    pyclef_map v;
    if (pyclef_map_view(&v, map_o, "map", 1, coordsys, unit) < 0) {
        Py_DECREF(path_o);
        return NULL;
    }
    clef_map_write_opts wo = {0};
    wo.row_length = row_length;
    wo.single_precision = float32;
    wo.column = column;
    wo.extname = extname;
    wo.history = history;
    pyclef_log_refresh();
    int st;
    const char *path = PyBytes_AS_STRING(path_o);
    Py_BEGIN_ALLOW_THREADS
    st = clef_map_write(&v.m, path, &wo);
    Py_END_ALLOW_THREADS
    Py_DECREF(path_o);
    pyclef_map_release(&v);
    if (st != CLEF_OK)
        return pyclef_raise(st);
    Py_RETURN_NONE;
}

static PyObject *py_map_stats(PyObject *self, PyObject *args)
{
    (void)self;
    PyObject *map_o;
    if (!PyArg_ParseTuple(args, "O:map_stats", &map_o))
        return NULL;
    pyclef_map v;
    if (pyclef_map_view(&v, map_o, "map", 1, NULL, NULL) < 0)
        return NULL;
    clef_map_stats s;
    const int st = clef_map_stats_compute(&v.m, &s);
    pyclef_map_release(&v);
    if (st != CLEF_OK)
        return pyclef_raise(st);
    return Py_BuildValue("{s:L,s:L,s:d,s:d,s:d,s:d,s:d,s:d}", "nvalid", (long long)s.nvalid,
                         "nmissing", (long long)s.nmissing, "fsky", s.fsky, "min", s.min, "max",
                         s.max, "mean", s.mean, "rms", s.rms, "stddev", s.stddev);
}

static PyObject *py_unit_to_uk(PyObject *self, PyObject *args)
{
    (void)self;
    const char *unit;
    if (!PyArg_ParseTuple(args, "s:unit_to_uk", &unit))
        return NULL;
    return PyFloat_FromDouble(clef_unit_to_uk(unit));
}

static PyObject *py_nside_npix(PyObject *self, PyObject *args)
{
    (void)self;
    long long nside;
    if (!PyArg_ParseTuple(args, "L:nside_npix", &nside))
        return NULL;
    if (!clef_nside_valid(nside))
        return PyErr_Format(PyExc_ValueError, "nside must be a power of two in [1, %d], got %lld",
                            CLEF_NSIDE_MAX, nside);
    return PyLong_FromLongLong(clef_nside_npix(nside));
}

PyMethodDef pyclef_map_methods[] = {
    {"read_map", PYCLEF_KW(py_read_map), METH_VARARGS | METH_KEYWORDS,
     "read_map(path, *, hdu=None, column=None, ordering=None)\n--\n\n"
     "Read a HEALPix map from a FITS file (plain or gzip).\n\n"
     "Returns (pix, meta): pix, float64 array of 12 nside^2 values in RING order (converted\n"
     "from NESTED if the file is), in the file's unit, NaN where a pixel is missing (absent\n"
     "from a partial-sky table, the bad-pixel value -1.6375e30, or NaN in the file); meta, a\n"
     "dict with nside, npix, ordering (of the file: 'RING' or 'NESTED'), coordsys ('G', 'E',\n"
     "'C' or ''), unit (TUNIT or ''), column, hdu (extension number), nmissing, nbad and\n"
     "valid (bool array, False where missing).\n\n"
     "hdu: extension number (1 = first after the primary) or EXTNAME (default: the first\n"
     "binary table); column: number (1-based) or name (default: the first value column);\n"
     "ordering: 'RING' or 'NESTED' for files without an ORDERING keyword (default: such a\n"
     "file is refused).  Errors: clef.FileError (cannot open), clef.FormatError (not a\n"
     "HEALPix table), clef.InvalidArgumentError (unknown HDU or column)."},
    {"write_map", PYCLEF_KW(py_write_map), METH_VARARGS | METH_KEYWORDS,
     "write_map(path, map, *, coordsys='', unit='', column=None, extname=None, row_length=0, "
     "float32=False, history=None)\n--\n\n"
     "Write a full-sky RING map (float64 array of 12 nside^2 values; NaN = missing, written\n"
     "as the HEALPix bad-pixel value) as a HEALPix FITS table, atomically (a failure leaves\n"
     "nothing; an existing file is replaced).  A path ending in .gz is gzip-compressed.\n"
     "coordsys: 'G', 'E', 'C' or '' (not recorded); unit: TUNIT (e.g. 'uK'); column: TTYPE\n"
     "(default 'TEMPERATURE'); extname (default 'SKYMAP'); row_length: values per row\n"
     "(0 = one pixel per row, e.g. 1024; must divide npix); float32: write 32-bit floats;\n"
     "history: a HISTORY line."},
    {"map_stats", py_map_stats, METH_VARARGS,
     "map_stats(map, /)\n--\n\n"
     "Summary of the valid (non-NaN) pixels: dict nvalid, nmissing, fsky, min, max, mean,\n"
     "rms = sqrt(mean(x^2)), stddev (population convention), in the map's unit."},
    {"unit_to_uk", py_unit_to_uk, METH_VARARGS,
     "unit_to_uk(unit, /)\n--\n\n"
     "Factor converting values in `unit` (a TUNIT string: K, mK, uK, with or without _CMB)\n"
     "to micro-kelvin; 0.0 for an empty or unknown unit."},
    {"nside_npix", py_nside_npix, METH_VARARGS,
     "nside_npix(nside, /)\n--\n\nNumber of pixels 12 nside^2 of a HEALPix map."},
    {NULL, NULL, 0, NULL}};
