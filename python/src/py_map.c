/* clef.read_map, clef.read_map_header, clef.write_map, clef.read_map_pol, clef.write_map_pol,
 * clef.map_stats, clef.unit_to_uk over include/clef/map.h. */
#include "pyclef.h"

#include <math.h>
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

/* clef_map_read_header: the meta dict of read_map without the values. */
static PyObject *py_read_map_header(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"path", "hdu", "column", "ordering", NULL};
    PyObject *path_o, *hdu_o = NULL, *col_o = NULL;
    const char *ordering = NULL;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "O&|$OOz:read_map_header", kwl,
                                     PyUnicode_FSConverter, &path_o, &hdu_o, &col_o, &ordering))
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
    st = clef_map_read_header(&m, path, &ro);
    Py_END_ALLOW_THREADS
    Py_DECREF(path_o);
    if (st != CLEF_OK)
        return pyclef_raise(st);
    PyObject *meta = PyDict_New();
    if (meta && pyclef_set(meta, "nside", PyLong_FromLongLong(m->nside)) == 0 &&
        pyclef_set(meta, "npix", PyLong_FromLongLong(m->npix)) == 0 &&
        pyclef_set(meta, "ordering",
                   PyUnicode_FromString(m->file_ordering == CLEF_NESTED ? "NESTED" : "RING")) == 0 &&
        pyclef_set(meta, "coordsys", PyUnicode_FromString(m->coordsys)) == 0 &&
        pyclef_set(meta, "unit", PyUnicode_FromString(m->unit)) == 0 &&
        pyclef_set(meta, "column", PyUnicode_FromString(m->column)) == 0 &&
        pyclef_set(meta, "hdu", PyLong_FromLong(m->hdu)) == 0) {
        clef_map_free(m);
        return meta;
    }
    Py_XDECREF(meta);
    clef_map_free(m);
    return NULL;
}

/* clef_map_read_pol: T (optional), Q, U in the COSMO convention. */
static PyObject *py_read_map_pol(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"path", "u_path", "hdu", "t_column", "q_column", "u_column",
                          "ordering", "polcconv", "temperature", NULL};
    PyObject *path_o, *upath_o = NULL, *hdu_o = NULL, *col_o[3] = {NULL, NULL, NULL};
    const char *ordering = NULL, *conv = NULL;
    int want_t = 1;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "O&|$O&OOOOzzp:read_map_pol", kwl,
                                     PyUnicode_FSConverter, &path_o, PyUnicode_FSConverter,
                                     &upath_o, &hdu_o, &col_o[0], &col_o[1], &col_o[2], &ordering,
                                     &conv, &want_t))
        return NULL;
    char hb[64], cb[3][80];
    clef_map_pol_opts po = {0};
    const char **cols[3] = {&po.t_column, &po.q_column, &po.u_column};
    static const char *const cnames[3] = {"t_column", "q_column", "u_column"};
    PyObject *res = NULL;
    if (conv && strcmp(conv, "COSMO") && strcmp(conv, "IAU")) {
        /* as clef spectrum --polcconv */
        PyErr_Format(PyExc_ValueError, "polcconv must be 'COSMO', 'IAU' or None (from the "
                     "file), got '%s'", conv);
        goto done;
    }
    if (selector(hdu_o, hb, sizeof hb, "hdu", &po.hdu) < 0)
        goto done;
    for (int i = 0; i < 3; i++)
        if (selector(col_o[i], cb[i], sizeof cb[i], cnames[i], cols[i]) < 0)
            goto done;
    po.ordering = ordering;
    po.u_path = upath_o ? PyBytes_AS_STRING(upath_o) : NULL;
    po.polcconv = conv;
    po.want_t = want_t;
    pyclef_log_refresh();
    clef_map_pol mp;
    int st;
    const char *path = PyBytes_AS_STRING(path_o);
    Py_BEGIN_ALLOW_THREADS
    st = clef_map_read_pol(&mp, path, &po);
    Py_END_ALLOW_THREADS
    if (st != CLEF_OK) {
        pyclef_raise(st);
        goto done;
    }
    const clef_map *m[3] = {mp.t, mp.q, mp.u};
    const int first = want_t ? 0 : 1, nmap = 3 - first;
    const npy_intp npix = (npy_intp)mp.q->npix;
    npy_intp dims[2] = {nmap, npix};
    PyObject *pix = PyArray_SimpleNew(2, dims, NPY_DOUBLE), *valid = NULL, *meta = NULL;
    PyObject *units = PyTuple_New(nmap), *colnames = PyTuple_New(nmap), *nmiss = PyTuple_New(nmap);
    if (!pix || !units || !colnames || !nmiss ||
        !(valid = PyArray_SimpleNew(2, dims, NPY_BOOL)) || !(meta = PyDict_New()))
        goto fail;
    double *d = PyArray_DATA((PyArrayObject *)pix);
    unsigned char *v = PyArray_DATA((PyArrayObject *)valid);
    for (int k = 0; k < nmap; k++) {
        const clef_map *mk = m[first + k];
        for (npy_intp p = 0; p < npix; p++)
            d[k * npix + p] = mk->valid[p] ? mk->pix[p] : NAN;
        memcpy(v + k * npix, mk->valid, (size_t)npix);
        PyObject *a = PyUnicode_FromString(mk->unit), *b = PyUnicode_FromString(mk->column);
        PyObject *c = PyLong_FromLongLong(mk->nmissing);
        if (!a || !b || !c) {
            Py_XDECREF(a);
            Py_XDECREF(b);
            Py_XDECREF(c);
            goto fail;
        }
        PyTuple_SET_ITEM(units, k, a);
        PyTuple_SET_ITEM(colnames, k, b);
        PyTuple_SET_ITEM(nmiss, k, c);
    }
    const clef_map *q = mp.q;
    /* Every item is set (|, not ||): pyclef_set consumes its value even on failure. */
    const int bad =
        (pyclef_set(meta, "valid", valid) | pyclef_set(meta, "units", units) |
         pyclef_set(meta, "columns", colnames) | pyclef_set(meta, "nmissing", nmiss) |
         pyclef_set(meta, "nside", PyLong_FromLongLong(q->nside)) |
         pyclef_set(meta, "npix", PyLong_FromLongLong(q->npix)) |
         pyclef_set(meta, "ordering",
                    PyUnicode_FromString(q->file_ordering == CLEF_NESTED ? "NESTED" : "RING")) |
         pyclef_set(meta, "coordsys", PyUnicode_FromString(q->coordsys)) |
         pyclef_set(meta, "hdu", PyLong_FromLong(q->hdu)) |
         pyclef_set(meta, "polcconv", PyUnicode_FromString(q->polcconv)) |
         pyclef_set(meta, "iau", PyBool_FromLong(mp.iau)) |
         pyclef_set(meta, "polcconv_missing", PyBool_FromLong(mp.polcconv_missing))) != 0;
    valid = units = colnames = nmiss = NULL; /* consumed by pyclef_set */
    if (!bad) {
        res = Py_BuildValue("(NN)", pix, meta);
        pix = meta = NULL;
    }
fail:
    Py_XDECREF(pix);
    Py_XDECREF(valid);
    Py_XDECREF(units);
    Py_XDECREF(colnames);
    Py_XDECREF(nmiss);
    Py_XDECREF(meta);
    clef_map_pol_free(&mp);
done:
    Py_DECREF(path_o);
    Py_XDECREF(upath_o);
    return res;
}

/* Views of three maps T, Q, U from a (3, npix) array or a sequence of three
 * 1-d arrays (pyclef.h). */
int pyclef_map_views3(PyObject *obj, const char *what, pyclef_map v[3], const char *coordsys,
                      const char *unit)
{
    static const char *const comp[3] = {"T", "Q", "U"};
    memset(v, 0, 3 * sizeof *v);
    PyObject *seq = PySequence_Check(obj) ? PySequence_Fast(obj, what) : NULL;
    if (!seq || PySequence_Fast_GET_SIZE(seq) != 3) {
        Py_XDECREF(seq);
        PyErr_Clear();
        PyErr_Format(PyExc_ValueError, "%s must be a (3, npix) float64 array or three RING maps "
                     "(T, Q, U)", what);
        return -1;
    }
    for (int k = 0; k < 3; k++) {
        char name[96];
        snprintf(name, sizeof name, "%s[%d] (%s)", what, k, comp[k]);
        if (pyclef_map_view(&v[k], PySequence_Fast_GET_ITEM(seq, k), name, 1, coordsys, unit) < 0)
            goto fail;
        if (k && v[k].m.nside != v[0].m.nside) {
            PyErr_Format(PyExc_ValueError, "%s: map %s has nside %lld, T has %lld", what, comp[k],
                         (long long)v[k].m.nside, (long long)v[0].m.nside);
            goto fail;
        }
    }
    Py_DECREF(seq);
    return 0;
fail:
    Py_DECREF(seq);
    for (int k = 0; k < 3; k++)
        pyclef_map_release(&v[k]);
    return -1;
}

/* clef_map_write (pol 0: one map, a column name) or clef_map_write_pol
 * (pol 1: T, Q, U; the columns are fixed). */
static PyObject *write_maps(PyObject *args, PyObject *kw, int pol)
{
    static char *kw1[] = {"path",    "map",        "coordsys", "unit",    "column",
                          "extname", "row_length", "float32",  "history", NULL};
    static char *kw3[] = {"path",       "maps",    "coordsys", "unit", "extname",
                          "row_length", "float32", "history",  NULL};
    PyObject *path_o, *map_o;
    const char *coordsys = "", *unit = "", *column = NULL, *extname = NULL, *history = NULL;
    int row_length = 0, float32 = 0;
    if (!(pol ? PyArg_ParseTupleAndKeywords(args, kw, "O&O|$sszipz:write_map_pol", kw3,
                                            PyUnicode_FSConverter, &path_o, &map_o, &coordsys,
                                            &unit, &extname, &row_length, &float32, &history)
              : PyArg_ParseTupleAndKeywords(args, kw, "O&O|$sszzipz:write_map", kw1,
                                            PyUnicode_FSConverter, &path_o, &map_o, &coordsys,
                                            &unit, &column, &extname, &row_length, &float32,
                                            &history)))
        return NULL;
    pyclef_map v[3];
    memset(v, 0, sizeof v);
    PyObject *res = NULL;
    if (strlen(coordsys) > 1 || (coordsys[0] && !strchr("GEC", coordsys[0]))) {
        PyErr_Format(PyExc_ValueError, "coordsys must be 'G', 'E', 'C' or '', got '%s'",
                     coordsys);
        goto done;
    }
    if ((pol ? pyclef_map_views3(map_o, "maps", v, coordsys, unit)
             : pyclef_map_view(&v[0], map_o, "map", 1, coordsys, unit)) < 0)
        goto done;
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
    st = pol ? clef_map_write_pol(&v[0].m, &v[1].m, &v[2].m, path, &wo)
             : clef_map_write(&v[0].m, path, &wo);
    Py_END_ALLOW_THREADS
    res = st != CLEF_OK ? pyclef_raise(st) : Py_NewRef(Py_None);
done:
    Py_DECREF(path_o);
    for (int k = 0; k < 3; k++)
        pyclef_map_release(&v[k]);
    return res;
}

static PyObject *py_write_map(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    return write_maps(args, kw, 0);
}

static PyObject *py_write_map_pol(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    return write_maps(args, kw, 1);
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
    {"read_map_header", PYCLEF_KW(py_read_map_header), METH_VARARGS | METH_KEYWORDS,
     "read_map_header(path, *, hdu=None, column=None, ordering=None)\n--\n\n"
     "The header of the map read_map would read, without its values: a dict with nside,\n"
     "npix, ordering, coordsys, unit, column and hdu, as in read_map's meta.  The same\n"
     "checks as read_map short of the values (HDU, column, NSIDE, ORDERING, table size),\n"
     "with the same errors."},
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
    {"read_map_pol", PYCLEF_KW(py_read_map_pol), METH_VARARGS | METH_KEYWORDS,
     "read_map_pol(path, *, u_path=None, hdu=None, t_column=None, q_column=None,\n"
     "             u_column=None, ordering=None, polcconv=None, temperature=True)\n--\n\n"
     "Read a polarized HEALPix map: T, Q, U from the columns TEMPERATURE (or I_STOKES),\n"
     "Q_POLARISATION and U_POLARISATION (also Q_POLARIZATION, Q_STOKES and the U forms) of\n"
     "one table, or U from the file u_path; columns may be given by number or name.\n"
     "Q and U are returned in the COSMO convention, as clef computes with them: a table\n"
     "with POLCCONV = 'IAU' has U negated, a table without POLCCONV is read as COSMO with a\n"
     "library warning (logger 'clef'), any other value is clef.FormatError; polcconv\n"
     "'COSMO' or 'IAU' overrides the file.  Q and U share one validity (a pixel missing\n"
     "in either is missing in both); T keeps its own.\n\n"
     "Returns (maps, meta): maps, float64 array (3, npix) T, Q, U (or (2, npix) Q, U with\n"
     "temperature=False) in RING order and the file's units, NaN where missing; meta, a\n"
     "dict with nside, npix, ordering (of the file), coordsys, hdu, polcconv (the keyword\n"
     "as written, '' if absent), iau (U was negated), polcconv_missing, and per map\n"
     "(tuples in the order of the rows) units, columns, nmissing; valid (bool, the shape\n"
     "of maps).  Errors: clef.FileError, clef.FormatError, clef.InvalidArgumentError (a\n"
     "missing column: the message lists the columns present)."},
    {"write_map_pol", PYCLEF_KW(py_write_map_pol), METH_VARARGS | METH_KEYWORDS,
     "write_map_pol(path, maps, *, coordsys='', unit='', extname=None, row_length=0,\n"
     "              float32=False, history=None)\n--\n\n"
     "Write T, Q, U (a (3, npix) float64 array or three RING maps; NaN = missing) as one\n"
     "HEALPix table with columns TEMPERATURE, Q_POLARISATION, U_POLARISATION and\n"
     "POLCCONV = 'COSMO' (Q, U must be in that convention), atomically; options as\n"
     "clef.write_map."},
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
