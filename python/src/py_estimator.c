/* clef.Estimator (include/clef/estimator.h, field.h): every auto- and
 * cross-spectrum of many fields with their joint covariance; and
 * clef.run_read (include/clef/run.h): a YAML run file as a dict.  The
 * Python function clef.spectrum_run (python/clef/__init__.py) joins the
 * two as `clef spectrum --run` does. */
#include "pyclef.h"

#include <stdlib.h>
#include <string.h>

#include "clef/bins.h"
#include "clef/estimator.h"
#include "clef/run.h"
#include "clef/spectrum.h"

/* A field as the estimator borrows it: the clef_field and everything its
 * pointers point into, alive until the Estimator is freed. */
typedef struct est_field {
    clef_field f;
    char name[CLEF_FIELD_NAME_MAX];
    char map_names[CLEF_FIELD_MAX_SPLITS][CLEF_FIELD_NAME_MAX + 16];
    char mask_name[CLEF_FIELD_NAME_MAX + 16];
    pyclef_map maps[CLEF_FIELD_MAX_SPLITS], mask;
    PyArrayObject *tabs[3]; /* beam, transfer, noise */
    /* Maps given as files: read by the estimator when it needs each one
     * (clef_field.load_map) and freed after its transform, as `clef
     * spectrum --run` does, so N fields never hold N maps. */
    char *paths[CLEF_FIELD_MAX_SPLITS];
    int load_failed;           /* 1 + the split whose file could not be read */
} est_field;

typedef struct {
    PyObject_HEAD
    clef_estimator *e;         /* made by the first add_field (bins need the nside) */
    clef_spectrum_opts so;
    int inited, joint, computed, busy;
    PyObject *bins_o;
    clef_bins *bins;
    PyArrayObject *theory;
    char *cache_dir;
    int nf;
    est_field *fields[CLEF_ESTIMATOR_MAX_FIELDS];
    double t_call;
    PyObject *warnings;        /* of compute() */
} EstimatorObject;

/* Releases one field's maps, mask and tables (used on add failure and dealloc). */
static void field_free(est_field *f)
{
    for (int s = 0; s < CLEF_FIELD_MAX_SPLITS; s++) {
        pyclef_map_release(&f->maps[s]);
        free(f->paths[s]);
    }
    pyclef_map_release(&f->mask);
    for (int k = 0; k < 3; k++)
        Py_XDECREF(f->tabs[k]);
    free(f);
}

static void est_dealloc(EstimatorObject *self)
{
    clef_estimator_destroy(self->e);
    for (int i = 0; i < self->nf; i++)
        field_free(self->fields[i]);
    clef_bins_destroy(self->bins);
    Py_XDECREF(self->bins_o);
    Py_XDECREF(self->theory);
    Py_XDECREF(self->warnings);
    free(self->cache_dir);
    Py_TYPE(self)->tp_free((PyObject *)self);
}

/* Calls from another thread while compute() runs without the GIL. */
static int est_free_to_use(EstimatorObject *self)
{
    if (self->busy) {
        PyErr_SetString(PyExc_RuntimeError, "clef.Estimator is computing in another thread");
        return 0;
    }
    return 1;
}

static int est_init(EstimatorObject *self, PyObject *args, PyObject *kw)
{
    static char *kwl[] = {"lmax", "bin_width", "bins", "pixel_window", "theory_cl", "iterations",
                          "keep_multipoles", "joint", "cache", "cache_dir", "peak", "peak_l_min",
                          "peak_l_max", "peak_half_width", "peak_curv_sigma",
                          "allow_coord_mismatch", "peak_error_draws", NULL};
    if (self->inited) {
        PyErr_SetString(PyExc_RuntimeError, "clef.Estimator cannot be initialised twice");
        return -1;
    }
    clef_spectrum_opts so;
    clef_spectrum_opts_default(&so);
    so.pixel_window = 1;
    int joint = 1;
    PyObject *bins_o = Py_None, *theory_o = Py_None;
    const char *cache_dir = NULL;
    if (!PyArg_ParseTupleAndKeywords(
            args, kw, "|$iiOpOipppzpdddO&pi:Estimator", kwl, &so.lmax, &so.bin_width, &bins_o,
            &so.pixel_window, &theory_o, &so.iterations, &so.keep_multipoles, &joint,
            &so.use_cache, &cache_dir, &so.find_peak, &so.peak.l_min, &so.peak.l_max,
            &so.peak.half_width, pyclef_opt_double, &so.peak.curv_nsigma,
            &so.allow_coord_mismatch, &so.peak.draws))
        return -1;
    if (so.peak.draws < 0 || so.peak.draws > 100000) {
        PyErr_Format(PyExc_ValueError, "peak_error_draws must be 0 to 100000, got %d",
                     so.peak.draws);
        return -1;
    }
    if (pyclef_check_opts(so.lmax, so.bin_width, so.iterations, so.peak.half_width) < 0)
        return -1;
    if (bins_o != Py_None && so.bin_width > 0) {
        PyErr_SetString(PyExc_ValueError, "choose one of bins and bin_width");
        return -1;
    }
    const double *th;
    int thl;
    if (pyclef_table(theory_o, "theory_cl", &self->theory, &th, &thl) < 0)
        return -1;
    if (self->theory) {
        so.theory_cl = th;
        so.theory_lmax = thl;
    }
    if (cache_dir && !(self->cache_dir = strdup(cache_dir))) {
        PyErr_NoMemory();
        return -1;
    }
    so.cache_dir = self->cache_dir;
    self->so = so;
    self->joint = joint;
    Py_INCREF(bins_o);
    self->bins_o = bins_o;
    self->inited = 1;
    return 0;
}

/* The C estimator, once the first field gives the nside explicit bins end at. */
static int est_create(EstimatorObject *self, int64_t nside)
{
    if (self->bins_o != Py_None) {
        const int lbins = self->so.lmax ? self->so.lmax : (int)(3 * nside - 1);
        if (pyclef_make_bins(self->bins_o, lbins, &self->bins) < 0)
            return -1;
        if (!self->so.lmax)
            self->so.lmax = clef_bins_lmax(self->bins);
        self->so.bins = self->bins;
    }
    const int st = clef_estimator_create(&self->e, &self->so, self->joint);
    if (st != CLEF_OK) {
        pyclef_raise(st);
        return -1;
    }
    return 0;
}

/* A str for every split, or one str for all. */
static const char *per_split(PyObject *o, int s, const char *what)
{
    if (PyUnicode_Check(o))
        return PyUnicode_AsUTF8(o);
    PyObject *item = PySequence_Check(o) ? PySequence_GetItem(o, s) : NULL;
    if (!item || !PyUnicode_Check(item)) {
        Py_XDECREF(item);
        PyErr_Clear();
        PyErr_Format(PyExc_TypeError, "%s must be a str or a sequence of one str per split", what);
        return NULL;
    }
    const char *v = PyUnicode_AsUTF8(item);
    Py_DECREF(item); /* the sequence keeps it alive */
    return v;
}

/* Split `split` of a field given as files, read when the estimator needs
 * it (called with the GIL released: C only). */
static int load_file(void *arg, int split, clef_map **out)
{
    est_field *f = arg;
    const int st = clef_map_read(out, f->paths[split], NULL);
    if (st != CLEF_OK)
        f->load_failed = split + 1;
    return st;
}

/* 1 when o is a path (str, bytes or os.PathLike). */
static int is_path(PyObject *o)
{
    return PyUnicode_Check(o) || PyBytes_Check(o) || PyObject_HasAttrString(o, "__fspath__");
}

static PyObject *est_add_field(EstimatorObject *self, PyObject *args, PyObject *kw)
{
    if (!self->inited)
        return PyErr_Format(PyExc_RuntimeError, "clef.Estimator was not initialised");
    static char *kwl[] = {"name", "maps", "mask", "beam_fwhm", "beam", "transfer", "noise_cl",
                          "unit", "coordsys", "mask_coordsys", NULL};
    const char *name;
    PyObject *maps_o, *mask_o, *beam_o = Py_None, *transfer_o = Py_None, *noise_o = Py_None;
    PyObject *unit_o = NULL, *coord_o = NULL;
    const char *mcoord = "";
    double fwhm = 0.0;
    if (!est_free_to_use(self) ||
        !PyArg_ParseTupleAndKeywords(args, kw, "sOO|$dOOOOOs:add_field", kwl, &name, &maps_o,
                                     &mask_o, &fwhm, &beam_o, &transfer_o, &noise_o, &unit_o,
                                     &coord_o, &mcoord))
        return NULL;
    if (self->computed)
        return PyErr_Format(PyExc_RuntimeError, "add_field after compute(): make a new "
                            "clef.Estimator");
    if (!name[0] || strlen(name) >= CLEF_FIELD_NAME_MAX)
        return PyErr_Format(PyExc_ValueError, "field name must have 1..%d bytes, got '%s'",
                            CLEF_FIELD_NAME_MAX - 1, name);
    if (self->nf == CLEF_ESTIMATOR_MAX_FIELDS)
        return PyErr_Format(PyExc_ValueError, "at most %d fields", CLEF_ESTIMATOR_MAX_FIELDS);
    if (fwhm < 0)
        return PyErr_Format(PyExc_ValueError, "beam_fwhm must not be negative, got %g", fwhm);
    if (beam_o != Py_None && fwhm > 0)
        return PyErr_Format(PyExc_ValueError, "choose one of beam_fwhm and beam");
    /* maps: one 1-d array, an (nsplits, npix) array or a sequence of 1-d
     * arrays; or one file or a sequence of files. */
    PyObject *seq;
    if ((PyArray_Check(maps_o) && PyArray_NDIM((PyArrayObject *)maps_o) == 1) || is_path(maps_o))
        seq = PyTuple_Pack(1, maps_o);
    else
        seq = PySequence_Check(maps_o) ? PySequence_Tuple(maps_o) : NULL;
    if (!seq) {
        PyErr_Clear();
        return PyErr_Format(PyExc_TypeError, "maps must be a float64 array, an (nsplits, npix) "
                            "array or a sequence of arrays, got %.80s", Py_TYPE(maps_o)->tp_name);
    }
    const Py_ssize_t ns = PyTuple_GET_SIZE(seq);
    if (ns < 1 || ns > CLEF_FIELD_MAX_SPLITS) {
        Py_DECREF(seq);
        return PyErr_Format(PyExc_ValueError, "field '%s': %zd maps; a field has 1 map or 2..%d "
                            "noise splits", name, ns, CLEF_FIELD_MAX_SPLITS);
    }
    est_field *f = calloc(1, sizeof *f);
    if (!f) {
        Py_DECREF(seq);
        return PyErr_NoMemory();
    }
    clef_field_init(&f->f);
    snprintf(f->name, sizeof f->name, "%s", name);
    f->f.name = f->name;
    f->f.nsplits = (int)ns;
    int files = 0;
    for (int s = 0; s < (int)ns; s++)
        files += is_path(PyTuple_GET_ITEM(seq, s));
    if (files && files != (int)ns) {
        PyErr_Format(PyExc_TypeError, "field '%s': maps must be all arrays or all files", name);
        goto fail;
    }
    int64_t file_nside = 0;
    for (int s = 0; s < files; s++) {
        /* The header now (nside, and a clear error naming the file before
         * any work); the pixels when the estimator asks for them. */
        PyObject *b = NULL;
        if (!PyUnicode_FSConverter(PyTuple_GET_ITEM(seq, s), &b))
            goto fail;
        f->paths[s] = strdup(PyBytes_AS_STRING(b));
        Py_DECREF(b);
        if (!f->paths[s]) {
            PyErr_NoMemory();
            goto fail;
        }
        clef_map *hdr = NULL;
        const int st = clef_map_read_header(&hdr, f->paths[s], NULL);
        if (st != CLEF_OK) {
            pyclef_raise(st);
            goto fail;
        }
        const int64_t nsd = hdr->nside;
        clef_map_free(hdr);
        if (s == 0) {
            file_nside = nsd;
        } else if (nsd != file_nside) {
            PyErr_Format(PyExc_ValueError, "field '%s': map '%s' has nside %lld, its first "
                         "map nside %lld", name, f->paths[s], (long long)nsd,
                         (long long)file_nside);
            goto fail;
        }
        f->f.map_names[s] = f->paths[s]; /* as the command names them */
    }
    if (files) {
        f->f.load_map = load_file;
        f->f.load_arg = f;
    }
    for (int s = 0; s < (int)ns && !files; s++) {
        snprintf(f->map_names[s], sizeof f->map_names[s], "%s map %d", name, s + 1);
        const char *unit = unit_o ? per_split(unit_o, s, "unit") : "";
        const char *coord = unit && coord_o ? per_split(coord_o, s, "coordsys") : "";
        if (!unit || !coord ||
            pyclef_map_view(&f->maps[s], PyTuple_GET_ITEM(seq, s), f->map_names[s], 1, coord,
                            unit) < 0)
            goto fail;
        f->f.maps[s] = &f->maps[s].m;
        f->f.map_names[s] = f->map_names[s];
    }
    snprintf(f->mask_name, sizeof f->mask_name, "%s mask", name);
    if (pyclef_map_view(&f->mask, mask_o, f->mask_name, 0, mcoord, NULL) < 0)
        goto fail;
    f->f.mask = &f->mask.m;
    f->f.mask_name = f->mask_name;
    f->f.beam_fwhm = fwhm;
    if (pyclef_table(beam_o, "beam", &f->tabs[0], &f->f.beam, &f->f.beam_lmax) < 0 ||
        pyclef_table(transfer_o, "transfer", &f->tabs[1], &f->f.transfer, &f->f.transfer_lmax) < 0 ||
        pyclef_table(noise_o, "noise_cl", &f->tabs[2], &f->f.noise_cl, &f->f.noise_lmax) < 0)
        goto fail;
    if (!self->e && est_create(self, files ? file_nside : f->maps[0].m.nside) < 0)
        goto fail;
    const int st = clef_estimator_add_field(self->e, &f->f);
    if (st != CLEF_OK) {
        pyclef_raise(st);
        goto fail;
    }
    Py_DECREF(seq);
    self->fields[self->nf++] = f;
    Py_RETURN_NONE;
fail:
    Py_DECREF(seq);
    field_free(f);
    return NULL;
}

static PyObject *est_add_pair(EstimatorObject *self, PyObject *args)
{
    const char *a, *b;
    if (!est_free_to_use(self) || !PyArg_ParseTuple(args, "ss:add_pair", &a, &b))
        return NULL;
    if (self->computed)
        return PyErr_Format(PyExc_RuntimeError, "add_pair after compute(): make a new "
                            "clef.Estimator");
    if (!self->e)
        return PyErr_Format(PyExc_ValueError, "add_pair('%s', '%s'): no field added yet", a, b);
    const int st = clef_estimator_add_pair(self->e, a, b);
    if (st != CLEF_OK)
        return pyclef_raise(st);
    Py_RETURN_NONE;
}

/* The dict compute() returns, from the estimator's results. */
static PyObject *est_results(EstimatorObject *self)
{
    const clef_estimator *e = self->e;
    const int np = clef_estimator_npairs(e);
    PyObject *out = PyDict_New(), *pairs = PyDict_New(), *summ = PyDict_New();
    if (!out || !pairs || !summ)
        goto fail;
    for (int k = 0; k < np; k++) {
        int a, b;
        clef_estimator_pair_fields(e, k, &a, &b);
        const char *na = clef_estimator_field_name(e, a), *nb = clef_estimator_field_name(e, b);
        char name[2 * CLEF_FIELD_NAME_MAX + 4];
        snprintf(name, sizeof name, "%s x %s", na, nb);
        PyObject *w = PySequence_List(self->warnings);
        PyObject *d = w ? pyclef_spectrum_result_dict(clef_estimator_result(e, k), self->t_call,
                                                      w) : NULL;
        if (!d)
            goto fail;
        if (pyclef_set(d, "name", PyUnicode_FromString(name)) < 0 ||
            pyclef_set(d, "field1", PyUnicode_FromString(na)) < 0 ||
            pyclef_set(d, "field2", PyUnicode_FromString(nb)) < 0 ||
            pyclef_set(d, "nsplit1", PyLong_FromLong(self->fields[a]->f.nsplits)) < 0 ||
            pyclef_set(d, "nsplit2", PyLong_FromLong(self->fields[b]->f.nsplits)) < 0 ||
            PyDict_SetItemString(pairs, name, d) < 0) {
            Py_DECREF(d);
            goto fail;
        }
        Py_DECREF(d);
    }
    int n = 0;
    const double *cov = clef_estimator_covariance(e, &n);
    npy_intp dims[2] = {n, n};
    PyObject *c = PyArray_SimpleNew(2, dims, NPY_DOUBLE);
    if (!c)
        goto fail;
    if (n)
        memcpy(PyArray_DATA((PyArrayObject *)c), cov, (size_t)n * (size_t)n * sizeof(double));
    const clef_spectrum_result *r0 = clef_estimator_result(e, 0);
    int nm = 0, nk = 0;
    clef_estimator_transforms(e, &nm, &nk);
    PyObject *t = Py_BuildValue("{s:d}", "library_call", self->t_call);
    if (pyclef_set(out, "cov", c) < 0 ||
        pyclef_set(summ, "nfields", PyLong_FromLong(clef_estimator_nfields(e))) < 0 ||
        pyclef_set(summ, "npairs", PyLong_FromLong(np)) < 0 ||
        pyclef_set(summ, "nside", PyLong_FromLongLong(r0->nside)) < 0 ||
        pyclef_set(summ, "lmax", PyLong_FromLong(r0->lmax)) < 0 ||
        pyclef_set(summ, "lmax_coupled", PyLong_FromLong(r0->lmax_ext)) < 0 ||
        pyclef_set(summ, "nbins", PyLong_FromLong(r0->nbins)) < 0 ||
        pyclef_set(summ, "map_transforms", PyLong_FromLong(nm)) < 0 ||
        pyclef_set(summ, "mask_transforms", PyLong_FromLong(nk)) < 0 ||
        pyclef_set(summ, "joint", PyBool_FromLong(self->joint)) < 0 ||
        pyclef_set(summ, "warnings", PySequence_List(self->warnings)) < 0 ||
        pyclef_set(summ, "timings_s", t) < 0 || PyDict_SetItemString(out, "pairs", pairs) < 0 ||
        PyDict_SetItemString(out, "summary", summ) < 0)
        goto fail;
    Py_DECREF(pairs);
    Py_DECREF(summ);
    return out;
fail:
    Py_XDECREF(out);
    Py_XDECREF(pairs);
    Py_XDECREF(summ);
    return NULL;
}

static PyObject *est_compute(EstimatorObject *self, PyObject *unused)
{
    (void)unused;
    if (!est_free_to_use(self))
        return NULL;
    if (!self->e)
        return PyErr_Format(PyExc_ValueError, "compute(): no field added");
    if (!self->computed) {
        int st;
        double t;
        pyclef_warnings warn;
        pyclef_log_refresh();
        pyclef_warnings_begin(&warn);
        self->busy = 1;
        Py_BEGIN_ALLOW_THREADS
        t = clef_wtime();
        st = clef_estimator_compute(self->e);
        t = clef_wtime() - t;
        Py_END_ALLOW_THREADS
        self->busy = 0;
        if (st != CLEF_OK) {
            pyclef_warnings_free(&warn);
            return pyclef_raise(st);
        }
        if (!(self->warnings = pyclef_warnings_list(&warn)))
            return NULL;
        self->t_call = t;
        self->computed = 1;
    }
    return est_results(self);
}

static PyObject *est_get(EstimatorObject *self, void *what)
{
    const int w = (int)(intptr_t)what;
    if (w == 0)
        return PyLong_FromLong(self->nf);
    if (w == 1)
        return PyBool_FromLong(self->computed);
    if (w == 3) {
        for (int i = 0; i < self->nf; i++)
            if (self->fields[i]->load_failed)
                return Py_BuildValue("(si)", self->fields[i]->name,
                                     self->fields[i]->load_failed - 1);
        Py_RETURN_NONE;
    }
    PyObject *t = PyTuple_New(self->nf);
    for (int i = 0; t && i < self->nf; i++)
        PyTuple_SET_ITEM(t, i, PyUnicode_FromString(self->fields[i]->name));
    return t;
}

static PyGetSetDef est_getset[] = {
    {"nfields", (getter)est_get, NULL, "Fields added.", (void *)0},
    {"computed", (getter)est_get, NULL, "True once compute() has run.", (void *)1},
    {"field_names", (getter)est_get, NULL, "Names of the fields, in order.", (void *)2},
    {"load_failed", (getter)est_get, NULL,
     "(field name, split) of the map file that compute() could not read, or None.",
     (void *)3},
    {NULL, NULL, NULL, NULL, NULL}};

static PyMethodDef est_methods[] = {
    {"add_field", PYCLEF_KW(est_add_field), METH_VARARGS | METH_KEYWORDS,
     "add_field(name, maps, mask, *, beam_fwhm=0.0, beam=None, transfer=None, noise_cl=None,\n"
     "          unit='', coordsys='', mask_coordsys='')\n--\n\n"
     "Add a field (include/clef/field.h): `name` (unique, names the pairs), `maps` one\n"
     "float64 RING map or 2..8 noise splits of one sky (an (nsplits, npix) array or a list\n"
     "of maps; NaN = missing pixel; or one map file or a list of them, each read when\n"
     "compute() transforms it and freed after, unit and coordsys from the file), `mask`\n"
     "(weights in [0, 1], no NaN; every split shares it), beam_fwhm [arcmin] or beam\n"
     "(B_l from l = 0), transfer (F_l in power), noise_cl (N_l [uK^2] of the single map,\n"
     "subtracted from its auto-spectrum; refused with splits), unit and coordsys of the\n"
     "maps given as arrays (a str, or one per split) and of the mask.  The arrays are kept\n"
     "(not copied) until the estimator is freed."},
    {"add_pair", (PyCFunction)est_add_pair, METH_VARARGS,
     "add_pair(a, b, /)\n--\n\n"
     "Request the spectrum of the fields named a and b (a may equal b).  Without any pair\n"
     "every pair a <= b in field order is computed."},
    {"compute", (PyCFunction)est_compute, METH_NOARGS,
     "compute()\n--\n\n"
     "Every requested spectrum, each map transformed once (releases the GIL).  Returns a\n"
     "dict: pairs (a dict 'a x b' -> the band powers of that pair as clef.spectrum returns\n"
     "them, with name, field1, field2, nsplit1, nsplit2; its cov is the pair's own block),\n"
     "cov (the joint covariance of all pairs' D_b [uK^4], pairs in order; cross-pair blocks\n"
     "0 with joint=False) and summary (nfields, npairs, nside, lmax, lmax_coupled, nbins,\n"
     "map_transforms, mask_transforms, joint, warnings, timings_s).  A second call returns\n"
     "the same results without computing again."},
    {NULL, NULL, 0, NULL}};

static PyTypeObject EstimatorType = {
    PyVarObject_HEAD_INIT(NULL, 0)
    .tp_name = "clef.Estimator",
    .tp_basicsize = sizeof(EstimatorObject),
    .tp_dealloc = (destructor)est_dealloc,
    .tp_flags = Py_TPFLAGS_DEFAULT,
    .tp_doc =
        "Estimator(*, lmax=0, bin_width=0, bins=None, pixel_window=True, theory_cl=None,\n"
        "          iterations=1, keep_multipoles=False, joint=True, cache=True, cache_dir=None,\n"
        "          peak=True, peak_l_min=100.0, peak_l_max=400.0, peak_half_width=0.0,\n"
        "          peak_curv_sigma=2.0, allow_coord_mismatch=False, peak_error_draws=0)\n--\n\n"
        "The estimator of many fields (include/clef/estimator.h; docs/run-files.md), with the\n"
        "run-wide settings of `clef spectrum --run` and its defaults: lmax (0: 2 nside,\n"
        "lowered by the beams and tables), bin_width (0: automatic) or bins (a bin file or an\n"
        "(n, 2) array of inclusive l ranges), pixel_window, theory_cl (C_l [uK^2] from l = 0\n"
        "for the covariance instead of the measured spectra), iterations, keep_multipoles,\n"
        "joint (the cross-pair covariance blocks), the coupling cache, and the first-peak\n"
        "fit of each pair.  Then add_field() per field, add_pair() (optional), compute().",
    .tp_methods = est_methods,
    .tp_getset = est_getset,
    .tp_init = (initproc)est_init,
    .tp_new = PyType_GenericNew,
};

int pyclef_estimator_register(PyObject *module)
{
    if (PyType_Ready(&EstimatorType) < 0)
        return -1;
    return PyModule_AddObjectRef(module, "Estimator", (PyObject *)&EstimatorType);
}

/* ---- run files ---------------------------------------------------------- */

static PyObject *str_or_none(const char *s)
{
    if (s)
        return PyUnicode_DecodeFSDefault(s);
    Py_RETURN_NONE;
}

static PyObject *run_dict(const clef_run *r)
{
    PyObject *fields = PyList_New(r->nfields), *pairs = NULL;
    for (int i = 0; fields && i < r->nfields; i++) {
        const clef_run_field *f = &r->fields[i];
        PyObject *maps = PyList_New(f->nsplits);
        for (int s = 0; maps && s < f->nsplits; s++) {
            PyObject *p = PyUnicode_DecodeFSDefault(f->maps[s]);
            if (!p)
                Py_CLEAR(maps);
            else
                PyList_SET_ITEM(maps, s, p);
        }
        PyObject *d = maps ? Py_BuildValue("{s:s,s:i,s:N,s:i,s:N,s:d,s:N,s:N,s:N}", "name",
                                           f->name, "line", f->line, "maps", maps, "maps_line",
                                           f->maps_line, "mask", str_or_none(f->mask),
                                           "beam_fwhm", f->beam_fwhm, "beam_table",
                                           str_or_none(f->beam_table), "transfer",
                                           str_or_none(f->transfer), "noise_spectrum",
                                           str_or_none(f->noise))
                           : NULL;
        if (!d) {
            Py_CLEAR(fields);
            break;
        }
        PyList_SET_ITEM(fields, i, d);
    }
    if (!fields)
        return NULL;
    if (r->npairs) {
        pairs = PyList_New(r->npairs);
        for (int k = 0; pairs && k < r->npairs; k++) {
            PyObject *t = Py_BuildValue("(ss)", r->fields[r->pairs[k].a].name,
                                        r->fields[r->pairs[k].b].name);
            if (!t)
                Py_CLEAR(pairs);
            else
                PyList_SET_ITEM(pairs, k, t);
        }
        if (!pairs) {
            Py_DECREF(fields);
            return NULL;
        }
    } else {
        pairs = Py_None;
        Py_INCREF(pairs);
    }
    return Py_BuildValue("{s:N,s:N,s:N,s:l,s:l,s:l,s:i,s:O,s:i,s:N,s:N}", "path",
                         str_or_none(r->path), "fields", fields, "pairs", pairs, "lmax", r->lmax,
                         "bin_width", r->bin_width, "iterations", r->iterations, "pixel_window",
                         r->pixel_window, "keep_multipoles",
                         r->keep_multipoles ? Py_True : Py_False, "joint", r->joint,
                         "covariance_model", str_or_none(r->model), "output",
                         str_or_none(r->output));
}

static PyObject *py_run_read(PyObject *self, PyObject *args)
{
    (void)self;
    PyObject *path_o;
    if (!PyArg_ParseTuple(args, "O&:run_read", PyUnicode_FSConverter, &path_o))
        return NULL;
    clef_run *r = NULL;
    int st;
    const char *path = PyBytes_AS_STRING(path_o);
    pyclef_log_refresh();
    Py_BEGIN_ALLOW_THREADS
    st = clef_run_read(&r, path);
    Py_END_ALLOW_THREADS
    Py_DECREF(path_o);
    if (st != CLEF_OK)
        return pyclef_raise(st);
    PyObject *d = run_dict(r);
    clef_run_free(r);
    return d;
}

PyMethodDef pyclef_estimator_methods[] = {
    {"run_read", py_run_read, METH_VARARGS,
     "run_read(path, /)\n--\n\n"
     "A YAML run file (docs/run-files.md) as a dict, paths resolved from its folder:\n"
     "path, fields (list of dicts: name, line, maps (list of paths), maps_line, mask,\n"
     "beam_fwhm [arcmin, 0 = none], beam_table, transfer, noise_spectrum (paths or None)),\n"
     "pairs (list of (a, b) names, or None: every pair), lmax, bin_width (0: default),\n"
     "iterations (-1: default), pixel_window, joint (-1: default), keep_multipoles,\n"
     "covariance_model, output (paths or None).  Errors name the file, line and key\n"
     "(clef.InvalidArgumentError; clef.FileError when it cannot be read)."},
    {NULL, NULL, 0, NULL}};
