/* The analytic model and the background cosmology: include/clef/theory.h
 * and include/clef/cosmo.h.  Parameters are keyword arguments named as the
 * fields of clef_cosmo_params, defaulting to Planck 2018. */
#include "pyclef.h"

#include <stddef.h>
#include <string.h>

#include "clef/cosmo.h"
#include "clef/theory.h"

static const struct {
    const char *name;
    size_t off;
} PARAMS[] = {
    {"omega_b", offsetof(clef_cosmo_params, omega_b)}, {"omega_c", offsetof(clef_cosmo_params, omega_c)},
    {"h", offsetof(clef_cosmo_params, h)},             {"omega_k", offsetof(clef_cosmo_params, omega_k)},
    {"n_s", offsetof(clef_cosmo_params, n_s)},         {"ln10_as", offsetof(clef_cosmo_params, ln10_as)},
    {"tau", offsetof(clef_cosmo_params, tau)},         {"t_cmb", offsetof(clef_cosmo_params, t_cmb)},
    {"n_eff", offsetof(clef_cosmo_params, n_eff)},     {"m_nu", offsetof(clef_cosmo_params, m_nu)},
    {"y_he", offsetof(clef_cosmo_params, y_he)},
};
#define NPARAMS (sizeof PARAMS / sizeof *PARAMS)

/* Planck 2018 overridden by the keywords of `kw` except those in `skip`
 * (NULL-terminated); an unknown keyword is a TypeError. */
static int params_from(PyObject *kw, const char *const *skip, clef_cosmo_params *p)
{
    clef_cosmo_params_planck2018(p);
    if (!kw)
        return 0;
    PyObject *k, *v;
    Py_ssize_t pos = 0;
    while (PyDict_Next(kw, &pos, &k, &v)) {
        const char *name = PyUnicode_AsUTF8(k);
        if (!name)
            return -1;
        int skipped = 0;
        for (const char *const *s = skip; s && *s; s++)
            skipped |= !strcmp(*s, name);
        if (skipped)
            continue;
        size_t i = 0;
        while (i < NPARAMS && strcmp(PARAMS[i].name, name))
            i++;
        if (i == NPARAMS) {
            PyErr_Format(PyExc_TypeError, "unknown cosmological parameter '%s' (known: omega_b, "
                         "omega_c, h, omega_k, n_s, ln10_as, tau, t_cmb, n_eff, m_nu, y_he)", name);
            return -1;
        }
        const double d = PyFloat_AsDouble(v);
        if (d == -1.0 && PyErr_Occurred())
            return -1;
        *(double *)((char *)p + PARAMS[i].off) = d;
    }
    return 0;
}

static PyObject *params_dict(const clef_cosmo_params *p)
{
    PyObject *d = PyDict_New();
    for (size_t i = 0; d && i < NPARAMS; i++)
        if (pyclef_set(d, PARAMS[i].name, PyFloat_FromDouble(*(const double *)((const char *)p + PARAMS[i].off))) < 0)
            Py_CLEAR(d);
    return d;
}

static int no_positional(PyObject *args, const char *fn)
{
    if (PyTuple_GET_SIZE(args)) {
        PyErr_Format(PyExc_TypeError, "%s() takes keyword arguments only", fn);
        return -1;
    }
    return 0;
}

static PyObject *py_cosmo_params(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    clef_cosmo_params p;
    if (no_positional(args, "cosmo_params") < 0 || params_from(kw, NULL, &p) < 0)
        return NULL;
    const int st = clef_cosmo_check(&p, NULL);
    return st != CLEF_OK ? pyclef_raise(st) : params_dict(&p);
}

static PyObject *py_theory_cl(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static const char *const skip[] = {"lmax", NULL};
    int lmax = 2500; /* clef model's default (src/cli/cmd_model.c) */
    clef_cosmo_params p;
    if (no_positional(args, "theory_cl") < 0 || params_from(kw, skip, &p) < 0)
        return NULL;
    PyObject *lo = kw ? PyDict_GetItemString(kw, "lmax") : NULL;
    if (lo && !pyclef_opt_int(lo, &lmax))
        return NULL;
    if (lmax < 2 || lmax > CLEF_THEORY_LMAX_MAX)
        return PyErr_Format(PyExc_ValueError, "lmax must be in [2, %d], got %d",
                            CLEF_THEORY_LMAX_MAX, lmax);
    npy_intp n = lmax + 1;
    PyObject *a = PyArray_SimpleNew(1, &n, NPY_DOUBLE);
    if (!a)
        return NULL;
    double *cl = PyArray_DATA((PyArrayObject *)a);
    int st;
    pyclef_log_refresh();
    Py_BEGIN_ALLOW_THREADS
    st = clef_theory_cl(&p, lmax, cl);
    Py_END_ALLOW_THREADS
    if (st != CLEF_OK) {
        Py_DECREF(a);
        return pyclef_raise(st);
    }
    return a;
}

static PyObject *acoustic_dict(const clef_cosmo_acoustic *a)
{
    return Py_BuildValue("{s:d,s:d,s:d,s:d,s:d,s:d,s:d,s:d,s:d,s:d,s:d}", "z_star", a->z_star,
                         "r_s", a->r_s, "d_m", a->d_m, "eta_star", a->eta_star, "hubble_star",
                         a->hubble_star, "theta_star", a->theta_star, "l_a", a->l_a, "r_star",
                         a->r_star, "baryon_r", a->baryon_r, "phi_1", a->phi_1, "l_1", a->l_1);
}

static PyObject *py_theory_info(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    clef_cosmo_params p;
    if (no_positional(args, "theory_info") < 0 || params_from(kw, NULL, &p) < 0)
        return NULL;
    clef_theory_info t;
    const int st = clef_theory_info_get(&p, &t);
    if (st != CLEF_OK)
        return pyclef_raise(st);
    return Py_BuildValue("{s:N,s:d,s:d,s:d,s:d,s:d,s:d,s:d,s:d,s:d}", "acoustic",
                         acoustic_dict(&t.acoustic), "xi", t.xi, "varrho", t.varrho, "varrho_eff",
                         t.varrho_eff, "sigma_ls", t.sigma_ls, "k_damp", t.k_damp, "l_f", t.l_f,
                         "l_s", t.l_s, "l_pivot", t.l_pivot, "amplitude", t.amplitude);
}

static PyObject *py_first_peak(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    clef_cosmo_params p;
    if (no_positional(args, "theory_first_peak") < 0 || params_from(kw, NULL, &p) < 0)
        return NULL;
    double l, d;
    const int st = clef_theory_first_peak(&p, &l, &d);
    return st != CLEF_OK ? pyclef_raise(st) : Py_BuildValue("(dd)", l, d);
}

static PyObject *py_acoustic(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    clef_cosmo_params p;
    if (no_positional(args, "cosmo_acoustic") < 0 || params_from(kw, NULL, &p) < 0)
        return NULL;
    clef_cosmo_acoustic a;
    const int st = clef_cosmo_acoustic_scale(&p, &a);
    return st != CLEF_OK ? pyclef_raise(st) : acoustic_dict(&a);
}

/* cosmo_eval(quantity, z, **params): one of the z-functions of cosmo.h
 * (python/clef/__init__.py gives each its own name). */
static PyObject *py_cosmo_eval(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static const struct {
        const char *name;
        int (*fn)(const clef_cosmo_params *, double, double *);
    } FN[] = {{"hubble", clef_cosmo_hubble},
              {"baryon_loading", clef_cosmo_baryon_loading},
              {"sound_speed", clef_cosmo_sound_speed},
              {"sound_horizon", clef_cosmo_sound_horizon},
              {"comoving_distance", clef_cosmo_comoving_distance},
              {"transverse_distance", clef_cosmo_transverse_distance},
              {"conformal_time", clef_cosmo_conformal_time},
              {"damping_scale", clef_cosmo_damping_scale}};
    const char *q;
    double z;
    if (!PyArg_ParseTuple(args, "sd:cosmo_eval", &q, &z))
        return NULL;
    clef_cosmo_params p;
    if (params_from(kw, NULL, &p) < 0)
        return NULL;
    for (size_t i = 0; i < sizeof FN / sizeof *FN; i++)
        if (!strcmp(FN[i].name, q)) {
            double v;
            const int st = FN[i].fn(&p, z, &v);
            return st != CLEF_OK ? pyclef_raise(st) : PyFloat_FromDouble(v);
        }
    if (!strcmp(q, "zstar")) {
        double v;
        const int st = clef_cosmo_zstar(&p, &v);
        return st != CLEF_OK ? pyclef_raise(st) : PyFloat_FromDouble(v);
    }
    return PyErr_Format(PyExc_ValueError, "unknown quantity '%s'", q);
}

static PyObject *py_read_cl(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"path", "lmax", NULL};
    PyObject *path_o;
    int lmax = -1;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "O&|$O&:read_cl", kwl, PyUnicode_FSConverter,
                                     &path_o, pyclef_opt_int, &lmax))
        return NULL;
    const char *path = PyBytes_AS_STRING(path_o);
    int st = CLEF_OK, lfile = -1;
    PyObject *a = NULL;
    if (lmax < 0 && (st = clef_theory_read_cl(path, 0, NULL, &lfile)) == CLEF_OK)
        lmax = lfile;
    if (st == CLEF_OK && lmax < 2) {
        PyErr_Format(PyExc_ValueError, "lmax must be at least 2, got %d", lmax);
        goto done;
    }
    npy_intp n = lmax + 1;
    if (st == CLEF_OK) {
        if (!(a = PyArray_SimpleNew(1, &n, NPY_DOUBLE)))
            goto done;
        double *cl = PyArray_DATA((PyArrayObject *)a);
        pyclef_log_refresh();
        Py_BEGIN_ALLOW_THREADS
        st = clef_theory_read_cl(path, lmax, cl, NULL);
        Py_END_ALLOW_THREADS
    }
    if (st != CLEF_OK) {
        Py_CLEAR(a);
        pyclef_raise(st);
    }
done:
    Py_DECREF(path_o);
    return a;
}

static PyObject *py_read_cl_pol(PyObject *self, PyObject *args)
{
    (void)self;
    PyObject *path_o;
    int lmax;
    if (!PyArg_ParseTuple(args, "O&i:read_cl_pol", PyUnicode_FSConverter, &path_o, &lmax))
        return NULL;
    PyObject *a = NULL;
    if (lmax < 2) {
        PyErr_Format(PyExc_ValueError, "lmax must be at least 2, got %d", lmax);
        goto done;
    }
    npy_intp dims[2] = {4, (npy_intp)lmax + 1};
    if (!(a = PyArray_SimpleNew(2, dims, NPY_DOUBLE)))
        goto done;
    double *c = PyArray_DATA((PyArrayObject *)a);
    const size_t n = (size_t)lmax + 1;
    const char *path = PyBytes_AS_STRING(path_o);
    int st;
    pyclef_log_refresh();
    Py_BEGIN_ALLOW_THREADS
    st = clef_theory_read_cl_pol(path, lmax, c, c + n, c + 2 * n, c + 3 * n);
    Py_END_ALLOW_THREADS
    if (st != CLEF_OK) {
        Py_CLEAR(a);
        pyclef_raise(st);
    }
done:
    Py_DECREF(path_o);
    return a;
}

static PyObject *py_write_cl(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"path", "cl", "params", NULL};
    PyObject *path_o, *cl_o, *par_o = Py_None;
    if (!PyArg_ParseTupleAndKeywords(args, kw, "O&O|$O:write_cl", kwl, PyUnicode_FSConverter,
                                     &path_o, &cl_o, &par_o))
        return NULL;
    PyArrayObject *cl = pyclef_double_array(cl_o, "cl", 1, 1);
    PyObject *res = NULL;
    clef_cosmo_params p;
    if (!cl)
        goto done;
    if (par_o != Py_None && (!PyDict_Check(par_o) || params_from(par_o, NULL, &p) < 0)) {
        if (!PyErr_Occurred())
            PyErr_SetString(PyExc_TypeError, "params must be a dict of cosmological parameters");
        goto done;
    }
    if (PyArray_DIM(cl, 0) < 3) {
        PyErr_SetString(PyExc_ValueError, "cl must cover l = 0..2 at least");
        goto done;
    }
    const int st = clef_theory_write_cl(PyBytes_AS_STRING(path_o), (int)PyArray_DIM(cl, 0) - 1,
                                        PyArray_DATA(cl), par_o != Py_None ? &p : NULL);
    res = st != CLEF_OK ? pyclef_raise(st) : Py_NewRef(Py_None);
done:
    Py_XDECREF(cl);
    Py_DECREF(path_o);
    return res;
}

#define KW METH_VARARGS | METH_KEYWORDS
#define PARAMS_DOC                                                                             \
    "Parameters (keywords; default Planck 2018, A&A 641, A6): omega_b = Omega_b h^2, omega_c =\n" \
    "Omega_c h^2, h, omega_k (Omega_k), n_s, ln10_as = ln(10^10 A_s), tau, t_cmb [K], n_eff,\n"   \
    "m_nu [eV], y_he."
PyMethodDef pyclef_theory_methods[] = {
    {"cosmo_params", PYCLEF_KW(py_cosmo_params), KW,
     "cosmo_params(**params)\n--\n\nThe parameter set as a dict, checked. " PARAMS_DOC},
    {"theory_cl", PYCLEF_KW(py_theory_cl), KW,
     "theory_cl(*, lmax=2500, **params)\n--\n\n"
     "The analytic model's C_l [uK^2], l = 0..lmax (docs/theory.md; Mukhanov 2004), as\n"
     "`clef model` writes it. " PARAMS_DOC},
    {"theory_info", PYCLEF_KW(py_theory_info), KW,
     "theory_info(**params)\n--\n\nThe scales the model derives (acoustic dict, xi, l_f, l_s, ...). " PARAMS_DOC},
    {"theory_first_peak", PYCLEF_KW(py_first_peak), KW,
     "theory_first_peak(**params)\n--\n\n(l_peak, D_peak [uK^2]) of the model's first acoustic peak. " PARAMS_DOC},
    {"cosmo_acoustic", PYCLEF_KW(py_acoustic), KW,
     "cosmo_acoustic(**params)\n--\n\n"
     "z_star, r_s [Mpc], d_m [Mpc], eta_star [Mpc], hubble_star [km/s/Mpc], theta_star [rad],\n"
     "l_a, r_star, baryon_r, phi_1, l_1 (Hu & Sugiyama 1996; Doran & Lilley 2002). " PARAMS_DOC},
    {"cosmo_eval", PYCLEF_KW(py_cosmo_eval), KW,
     "cosmo_eval(quantity, z, /, **params)\n--\n\n"
     "A background quantity at redshift z: 'hubble' [km/s/Mpc], 'baryon_loading',\n"
     "'sound_speed' [c], 'sound_horizon', 'comoving_distance', 'transverse_distance',\n"
     "'conformal_time' [Mpc], 'damping_scale' [1/Mpc], 'zstar' (z ignored). " PARAMS_DOC},
    {"read_cl_pol", py_read_cl_pol, METH_VARARGS,
     "read_cl_pol(path, lmax, /)\n--\n\n"
     "The polarized spectra of a text file of rows 'l TT EE BB TE' (C_l [uK^2];\n"
     "docs/formats-spectrum.md, as clef simulate --polarization --cl reads it): a float64\n"
     "array (4, lmax + 1), rows TT, EE, BB, TE for l = 0..lmax (zero above the file's\n"
     "last l, with a library warning).  Errors name the file and line."},
    {"read_cl", PYCLEF_KW(py_read_cl), KW,
     "read_cl(path, *, lmax=None)\n--\n\n"
     "C_l [uK^2], l = 0..lmax (default the file's last l), from a spectrum file (text with a\n"
     "'# columns: l C_l' or 'l D_l' line, or clef's FITS; docs/formats-spectrum.md)."},
    {"write_cl", PYCLEF_KW(py_write_cl), KW,
     "write_cl(path, cl, *, params=None)\n--\n\n"
     "Write C_l [uK^2] from l = 0, atomically: FITS for .fits/.fit/.fits.gz, else text;\n"
     "params (a dict) recorded in the header."},
    {NULL, NULL, 0, NULL}};
