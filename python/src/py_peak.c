/* clef.peak_find (include/clef/peak.h) and clef.geometry_infer
 * (include/clef/geometry.h): the first acoustic peak of a band-power table
 * and the curvature posterior it implies. */
#include "pyclef.h"

#include <math.h>

#include "clef/geometry.h"
#include "clef/peak.h"

PyObject *pyclef_peak_dict(const clef_peak_result *r)
{
    static const char *const win[] = {"table", "top-hat", "point"};
    return Py_BuildValue(
        "{s:O,s:s,s:d,s:d,s:d,s:d,s:d,s:d,s:d,s:d,s:d,s:d,s:d,s:i,s:d,s:i,s:i,s:i,s:d,s:d,s:d,"
        "s:s,s:d,s:i,s:i}",
        "found", r->found ? Py_True : Py_False, "reason", r->reason, "l_peak", r->l_peak,
        "l_peak_err", r->l_peak_err, "l_peak_err_stat", r->l_peak_err_stat, "l_peak_err_shape",
        r->l_peak_err_shape, "d_peak", r->d_peak, "d_peak_err", r->d_peak_err, "corr", r->corr,
        "theta_deg", r->theta_deg, "theta_deg_err", r->theta_deg_err, "width", r->width, "chi2",
        r->chi2, "dof", r->dof, "p_value", r->p_value, "nbins_used", r->nbins_used, "bin_first",
        r->bin_first, "bin_last", r->bin_last, "curv_signif", r->curv_signif, "half_width",
        r->half_width, "shape_prior", r->shape_prior, "windows",
        r->windows >= 0 && r->windows <= 2 ? win[r->windows] : "", "l_peak_err_first_order",
        r->l_peak_err_lin, "error_draws", r->draws, "error_draws_found", r->draws_found);
}

static PyObject *py_peak_find(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    static char *kwl[] = {"table", "l_min", "l_max", "half_width", "curv_sigma", "shape_prior",
                          "error_draws", NULL};
    PyObject *tab;
    clef_peak_opts o;
    clef_peak_opts_default(&o);
    if (!PyArg_ParseTupleAndKeywords(args, kw, "O|$dddddi:peak_find", kwl, &tab, &o.l_min,
                                     &o.l_max, &o.half_width, &o.curv_nsigma, &o.shape_prior,
                                     &o.draws))
        return NULL;
    /* The CLI's checks (src/cli/cmd_peak.c). */
    if (!(o.l_min < o.l_max))
        return PyErr_Format(PyExc_ValueError, "l_min %g must be below l_max %g", o.l_min, o.l_max);
    if (o.half_width < 0)
        return PyErr_Format(PyExc_ValueError, "half_width must be positive (0: automatic), got %g",
                            o.half_width);
    if (o.curv_nsigma < 0)
        return PyErr_Format(PyExc_ValueError, "curv_sigma must be >= 0, got %g", o.curv_nsigma);
    if (o.draws < 0 || o.draws > 100000)
        return PyErr_Format(PyExc_ValueError, "error_draws must be 0 to 100000, got %d", o.draws);
    clef_bandpowers *bp = pyclef_bandpowers_from(tab, "table");
    if (!bp)
        return NULL;
    clef_peak_result r;
    int st;
    pyclef_log_refresh();
    Py_BEGIN_ALLOW_THREADS
    st = clef_peak_find(bp, &o, &r);
    Py_END_ALLOW_THREADS
    clef_bandpowers_free(bp);
    if (st != CLEF_OK)
        return pyclef_raise(st);
    return pyclef_peak_dict(&r);
}

/* The options of clef.geometry_infer and clef.GeometryPlan.  The plan takes
 * the same keywords without l_peak and l_peak_err (placeholders are parsed
 * in their place and not used: clef_geometry_plan_create ignores them).
 * *bp is the forward table (NULL when none), to free after the call. */
static int geometry_opts(PyObject *args, PyObject *kw, int with_peak, const char *name,
                         clef_geometry_opts *o, clef_bandpowers **bp)
{
    static char *kwl[] = {"l_peak", "l_peak_err", "omega_b", "omega_b_err", "omega_c",
                          "omega_c_err", "h", "h_err", "model_err", "n_eff", "m_nu", "t_cmb",
                          "omega_k_min", "omega_k_max", "ngrid", "nsamples", "nnodes", "seed",
                          "forward_table", "peak_l_min", "peak_l_max", "peak_half_width",
                          "peak_curv_sigma", NULL};
    clef_geometry_opts_default(o);
    *bp = NULL;
    unsigned long long seed = o->seed;
    PyObject *ftab = Py_None, *pargs = args;
    if (!with_peak) {
        if (PyTuple_GET_SIZE(args) > 0 ||
            (kw && (PyDict_GetItemString(kw, "l_peak") || PyDict_GetItemString(kw, "l_peak_err")))) {
            PyErr_Format(PyExc_TypeError, "%s takes keyword options only, without l_peak and "
                         "l_peak_err (give those to execute())", name);
            return -1;
        }
        if (!(pargs = Py_BuildValue("(dd)", 1.0, 1.0)))
            return -1;
    }
    char fmt[64];
    snprintf(fmt, sizeof fmt, "dd|$ddddddddddddiiiKOdddd:%s", name);
    const int ok = PyArg_ParseTupleAndKeywords(
        pargs, kw, fmt, kwl, &o->l_peak, &o->l_peak_err, &o->omega_b.mean, &o->omega_b.sigma,
        &o->omega_c.mean, &o->omega_c.sigma, &o->h.mean, &o->h.sigma, &o->model_err,
        &o->base.n_eff, &o->base.m_nu, &o->base.t_cmb, &o->omega_k_min, &o->omega_k_max,
        &o->ngrid, &o->nsamples, &o->nnodes, &seed, &ftab, &o->forward_peak.l_min,
        &o->forward_peak.l_max, &o->forward_peak.half_width, &o->forward_peak.curv_nsigma);
    if (pargs != args)
        Py_DECREF(pargs);
    if (!ok)
        return -1;
    o->seed = (unsigned long)seed;
    if (ftab != Py_None && !(*bp = pyclef_bandpowers_from(ftab, "forward_table")))
        return -1;
    o->forward_table = *bp;
    return 0;
}

static PyObject *geometry_dict(clef_geometry_result *r)
{
    PyObject *out = Py_BuildValue(
        "{s:N,s:N,s:d,s:d,s:d,s:d,s:d,s:d,s:d,s:s,s:O,s:d,s:d,s:d,s:d,s:d,s:d,s:i,s:O,s:d,s:d,"
        "s:d,s:d,s:i}",
        "omega_k", pyclef_vec_double(r->omega_k, r->n), "posterior",
        pyclef_vec_double(r->posterior, r->n), "best", r->best, "mean", r->mean, "sd", r->sd,
        "lo68", r->lo68, "hi68", r->hi68, "lo95", r->lo95, "hi95", r->hi95, "classification",
        clef_geometry_class_name(r->classification), "truncated",
        r->truncated ? Py_True : Py_False, "acoustic_scale_deg", r->acoustic_scale_deg,
        "acoustic_scale_err_deg", r->acoustic_scale_err_deg, "theta_star_deg", r->theta_star_deg,
        "l1_flat", r->l1_flat, "l1_min", r->l1_min, "l1_max", r->l1_max, "nsamples_valid",
        r->nsamples_valid, "forward", r->forward ? Py_True : Py_False, "forward_offset",
        r->forward_offset, "forward_offset_min", r->forward_offset_min, "forward_offset_max",
        r->forward_offset_max, "l1_flat_forward", r->l1_flat_forward, "forward_nodes_failed",
        r->forward_nodes_failed);
    clef_geometry_result_free(r);
    return out;
}

static PyObject *py_geometry_infer(PyObject *self, PyObject *args, PyObject *kw)
{
    (void)self;
    clef_geometry_opts o;
    clef_bandpowers *bp;
    if (geometry_opts(args, kw, 1, "geometry_infer", &o, &bp) < 0)
        return NULL;
    clef_geometry_result *r = NULL;
    int st;
    pyclef_log_refresh();
    Py_BEGIN_ALLOW_THREADS
    st = clef_geometry_infer(&o, &r);
    Py_END_ALLOW_THREADS
    clef_bandpowers_free(bp);
    if (st != CLEF_OK)
        return pyclef_raise(st);
    return geometry_dict(r);
}

/* clef.GeometryPlan: clef_geometry_plan_create once (prior samples and the
 * forward-modelled model l_1 at the nodes), then execute(l_peak,
 * l_peak_err) per measurement; a plan may be executed from several threads
 * (geometry.h), so no lock. */
typedef struct {
    PyObject_HEAD
    clef_geometry_plan *p;
} GeometryPlanObject;

static void gplan_dealloc(GeometryPlanObject *self)
{
    clef_geometry_plan_destroy(self->p);
    Py_TYPE(self)->tp_free((PyObject *)self);
}

static int gplan_init(GeometryPlanObject *self, PyObject *args, PyObject *kw)
{
    clef_geometry_opts o;
    clef_bandpowers *bp;
    if (geometry_opts(args, kw, 0, "GeometryPlan", &o, &bp) < 0)
        return -1;
    clef_geometry_plan *p = NULL;
    int st;
    pyclef_log_refresh();
    Py_BEGIN_ALLOW_THREADS
    st = clef_geometry_plan_create(&p, &o);
    Py_END_ALLOW_THREADS
    clef_bandpowers_free(bp);
    if (st != CLEF_OK) {
        pyclef_raise(st);
        return -1;
    }
    clef_geometry_plan_destroy(self->p);
    self->p = p;
    return 0;
}

static PyObject *gplan_execute(GeometryPlanObject *self, PyObject *args)
{
    double lp, le;
    if (!PyArg_ParseTuple(args, "dd:execute", &lp, &le))
        return NULL;
    if (!self->p) {
        PyErr_SetString(PyExc_RuntimeError, "clef.GeometryPlan was not initialised");
        return NULL;
    }
    clef_geometry_result *r = NULL;
    int st;
    pyclef_log_refresh();
    Py_BEGIN_ALLOW_THREADS
    st = clef_geometry_plan_execute(self->p, lp, le, &r);
    Py_END_ALLOW_THREADS
    if (st != CLEF_OK)
        return pyclef_raise(st);
    return geometry_dict(r);
}

static PyMethodDef gplan_methods[] = {
    {"execute", (PyCFunction)gplan_execute, METH_VARARGS,
     "execute(l_peak, l_peak_err)\n--\n\n"
     "The curvature posterior for one measured first peak [multipoles], as\n"
     "clef.geometry_infer returns it for the plan's options.  Releases the GIL; one plan\n"
     "may be executed from several threads."},
    {NULL, NULL, 0, NULL}};

static PyTypeObject GeometryPlanType = {
    PyVarObject_HEAD_INIT(NULL, 0)
    .tp_name = "clef.GeometryPlan",
    .tp_basicsize = sizeof(GeometryPlanObject),
    .tp_dealloc = (destructor)gplan_dealloc,
    .tp_flags = Py_TPFLAGS_DEFAULT,
    .tp_doc = "GeometryPlan(*, omega_b=0.0224, ..., peak_curv_sigma=2.0)\n--\n\n"
              "The curvature inference of clef.geometry_infer in two steps, for many measured\n"
              "peaks with one set of bins and options (e.g. an ensemble of skies): the keywords\n"
              "are those of clef.geometry_infer without l_peak and l_peak_err; the prior samples\n"
              "and the model l_1 at the nodes (forward-modelled through forward_table when given)\n"
              "are computed once here (include/clef/geometry.h, clef_geometry_plan_create).",
    .tp_methods = gplan_methods,
    .tp_init = (initproc)gplan_init,
    .tp_new = PyType_GenericNew,
};

int pyclef_geometry_register(PyObject *module)
{
    if (PyType_Ready(&GeometryPlanType) < 0)
        return -1;
    return PyModule_AddObjectRef(module, "GeometryPlan", (PyObject *)&GeometryPlanType);
}

PyMethodDef pyclef_peak_methods[] = {
    {"peak_find", PYCLEF_KW(py_peak_find), METH_VARARGS | METH_KEYWORDS,
     "peak_find(table, *, l_min=100.0, l_max=400.0, half_width=0.0, curv_sigma=2.0, "
     "shape_prior=0.0, error_draws=0)\n--\n\n"
     "The first acoustic peak of a band-power table (a dict as clef.spectrum or\n"
     "clef.read_bandpowers return, or a file path), as `clef peak` fits it (docs/peak.md):\n"
     "search window l_min..l_max [multipoles], half_width of the fit [multipoles, 0 =\n"
     "automatic], curv_sigma (required significance of the curvature), shape_prior (rms of\n"
     "the higher-order terms of ln D, 0 = default), error_draws (refitted draws for the\n"
     "statistical error; 0 = first-order propagation, docs/peak.md suggests 200).  Returns a dict: found, reason, l_peak,\n"
     "l_peak_err (stat and shape parts, l_peak_err_first_order, error_draws,\n"
     "error_draws_found), d_peak, d_peak_err [uK^2], corr, theta_deg,\n"
     "theta_deg_err [deg], width [multipoles], chi2, dof, p_value, nbins_used, bin_first,\n"
     "bin_last, curv_signif, half_width, shape_prior, windows.  No peak is not an error\n"
     "(found False, a reason, NaN numbers)."},
    {"geometry_infer", PYCLEF_KW(py_geometry_infer), METH_VARARGS | METH_KEYWORDS,
     "geometry_infer(l_peak, l_peak_err, *, omega_b=0.0224, omega_b_err=0.0002, omega_c=0.120,\n"
     "               omega_c_err=0.002, h=0.674, h_err=0.010, model_err=0.004, n_eff=3.046,\n"
     "               m_nu=0.06, t_cmb=2.7255, omega_k_min=-0.3, omega_k_max=0.3, ngrid=1201,\n"
     "               nsamples=2000, nnodes=21, seed=1, forward_table=None, peak_l_min=100.0,\n"
     "               peak_l_max=400.0, peak_half_width=0.0, peak_curv_sigma=2.0)\n--\n\n"
     "Posterior of the curvature Omega_k from a first-peak multipole l_peak +- l_peak_err, as\n"
     "`clef geometry` computes it (docs/geometry.md): Gaussian priors (mean, sigma; sigma 0\n"
     "fixes) on omega_b = Omega_b h^2, omega_c = Omega_c h^2 and h, marginalised by seeded\n"
     "Monte Carlo; model_err: fractional error of the l_1 model; n_eff, m_nu [eV], t_cmb\n"
     "[K].  forward_table: the band-power table the peak was measured on (dict or path):\n"
     "the model's l_1 is then what peak_find (with the peak_* settings) reports on the\n"
     "model through its windows.  Returns a dict: omega_k (grid), posterior (peak 1), best,\n"
     "mean, sd, lo68, hi68, lo95, hi95, classification ('closed', 'flat', 'open'),\n"
     "truncated, acoustic_scale_deg, theta_star_deg, l1_flat, forward, forward_offset, ..."},
    {NULL, NULL, 0, NULL}};
