/* Curvature from the first acoustic peak: grid posterior of Omega_k,
 * marginalised over Gaussian priors on omega_b, omega_c and h by seeded
 * Monte Carlo (include/clef/geometry.h, docs/geometry.md). */
#define _POSIX_C_SOURCE 200809L
#define _DEFAULT_SOURCE
#include "clef/geometry.h"

#include <math.h>
#include <stdlib.h>
#include <string.h>

#include <gsl/gsl_randist.h>
#include <gsl/gsl_rng.h>
#include <gsl/gsl_spline.h>

#include "core_impl.h"
#include "clef/theory.h"
#include "cosmo_impl.h"
#include "peak_impl.h"

/* A posterior above this fraction of its peak at a grid edge means the
 * grid cuts it off. */
#define EDGE_FRACTION 1e-3
/* Draws allowed per sample to land in the physical region of the priors. */
#define MAX_REDRAWS 1000

void clef_geometry_opts_default(clef_geometry_opts *o)
{
    memset(o, 0, sizeof *o);
    /* Planck 2018 VI (A&A 641, A6) abstract: omega_b = 0.0224 +- 0.0001,
     * omega_c = 0.120 +- 0.001, H_0 = 67.4 +- 0.5; errors doubled because
     * those fits assume a flat universe. */
    o->omega_b = (clef_geometry_prior){0.0224, 0.0002};
    o->omega_c = (clef_geometry_prior){0.120, 0.002};
    o->h = (clef_geometry_prior){0.674, 0.010};
    o->model_err = CLEF_GEOMETRY_MODEL_ERR;
    o->omega_k_min = -0.3;
    o->omega_k_max = 0.3;
    o->ngrid = 1201;
    o->nsamples = 2000;
    o->nnodes = 21;
    o->seed = 1;
    clef_cosmo_params_planck2018(&o->base);
    o->forward_table = NULL;
    clef_peak_opts_default(&o->forward_peak);
}

const char *clef_geometry_class_name(int c)
{
    return c < 0 ? "closed" : c > 0 ? "open" : "flat";
}

void clef_geometry_result_free(clef_geometry_result *r)
{
    if (!r)
        return;
    free(r->omega_k);
    free(r->posterior);
    free(r);
}

static int check_prior(const char *name, const clef_geometry_prior *pr)
{
    if (!isfinite(pr->mean) || !isfinite(pr->sigma) || pr->sigma < 0)
        CLEF_FAIL(CLEF_EINVAL, "prior on %s: mean %g, sigma %g (sigma must be finite and >= 0)",
                  name, pr->mean, pr->sigma);
    return CLEF_OK;
}

static int check_measurement(double l_peak, double l_peak_err)
{
    if (!(l_peak > 0 && isfinite(l_peak)))
        CLEF_FAIL(CLEF_EINVAL, "l_peak = %g: must be a positive multipole", l_peak);
    if (!(l_peak_err > 0 && isfinite(l_peak_err)))
        CLEF_FAIL(CLEF_EINVAL, "l_peak error = %g: must be > 0", l_peak_err);
    return CLEF_OK;
}

static int check_opts(const clef_geometry_opts *o)
{
    if (o->forward_table && o->forward_table->nbins < 1)
        CLEF_FAIL(CLEF_EINVAL, "forward model: the band-power table has no bins");
    CLEF_TRY(check_prior("omega_b", &o->omega_b));
    CLEF_TRY(check_prior("omega_c", &o->omega_c));
    CLEF_TRY(check_prior("h", &o->h));
    if (!(o->model_err >= 0 && o->model_err < 1))
        CLEF_FAIL(CLEF_EINVAL, "model error = %g: must be in [0, 1)", o->model_err);
    if (!(o->omega_k_min < o->omega_k_max) || !isfinite(o->omega_k_min) ||
        !isfinite(o->omega_k_max) || o->omega_k_min < -5 || o->omega_k_max > 5)
        CLEF_FAIL(CLEF_EINVAL, "Omega_k grid [%g, %g]: need min < max within [-5, 5]",
                  o->omega_k_min, o->omega_k_max);
    if (o->ngrid < 11 || o->ngrid > 1000000)
        CLEF_FAIL(CLEF_EINVAL, "Omega_k grid points = %d: must be in [11, 1000000]", o->ngrid);
    if (o->nsamples < 1 || o->nsamples > 10000000)
        CLEF_FAIL(CLEF_EINVAL, "prior samples = %d: must be in [1, 10000000]", o->nsamples);
    if (o->nnodes < 5 || o->nnodes > 100000)
        CLEF_FAIL(CLEF_EINVAL, "spline nodes = %d: must be in [5, 100000]", o->nnodes);
    /* The prior means must make a valid cosmology (ranges, not curvature). */
    clef_cosmo_params p = o->base;
    p.omega_b = o->omega_b.mean;
    p.omega_c = o->omega_c.mean;
    p.h = o->h.mean;
    p.omega_k = 0.0;
    CLEF_TRY(clef_cosmo_check(&p, NULL));
    return CLEF_OK;
}

/* One Gaussian draw inside (lo, hi]; the prior is truncated there. */
static double draw(gsl_rng *rng, const clef_geometry_prior *pr, double lo, double hi)
{
    if (pr->sigma == 0)
        return pr->mean;
    for (int i = 0; i < MAX_REDRAWS; i++) {
        const double v = pr->mean + gsl_ran_gaussian_ziggurat(rng, pr->sigma);
        if (v > lo && v <= hi)
            return v;
    }
    return NAN;
}


/* ---- forward model of the peak estimator (docs/geometry.md) ---- */

/* Work for one forward evaluation: the model's D_l, the band powers and a
 * shallow copy of the table with those band powers. */
typedef struct forward_work {
    int lmax;          /* multipoles of the model spectrum */
    double *cl, *pred;
    clef_bandpowers bp;
} forward_work;

static int forward_work_init(forward_work *fw, const clef_bandpowers *t)
{
    memset(fw, 0, sizeof *fw);
    int lmax = 2;
    for (int b = 0; b < t->nbins; b++)
        lmax = t->l_hi[b] > lmax ? t->l_hi[b] : lmax;
    if (t->win && t->win_lmax > lmax)
        lmax = t->win_lmax;
    if (lmax > CLEF_THEORY_LMAX_MAX)
        lmax = CLEF_THEORY_LMAX_MAX;
    fw->lmax = lmax;
    fw->cl = malloc(((size_t)lmax + 1) * sizeof *fw->cl);
    fw->pred = malloc((size_t)t->nbins * sizeof *fw->pred);
    if (!fw->cl || !fw->pred)
        CLEF_FAIL(CLEF_ENOMEM, "forward model: out of memory for %d multipoles", lmax);
    fw->bp = *t; /* only read by the estimator */
    fw->bp.dl = fw->pred;
    fw->bp.nmeta = 0;
    fw->bp.meta = NULL;
    return CLEF_OK;
}

static void forward_work_free(forward_work *fw)
{
    free(fw->cl);
    free(fw->pred);
}

/* The estimator's l_peak on the model spectrum for p, minus the model's
 * l_1 (the maximum of its D_l: clef_theory_cl places it there), in *off;
 * NaN when the model is unphysical or the estimator finds no peak on it. */
static int forward_offset(const clef_geometry_opts *o, forward_work *fw, const clef_cosmo_params *p,
                          clef_cosmo_work *cw, double *off)
{
    *off = NAN;
    double l1;
    if (clef_cosmo_check(p, NULL) != CLEF_OK || clef_cosmo_peak_quiet(p, cw, &l1, NULL) != 0)
        return CLEF_OK;
    if (clef_theory_cl(p, fw->lmax, fw->cl) != CLEF_OK)
        return CLEF_OK;
    const clef_bandpowers *t = o->forward_table;
    const size_t wl = (size_t)t->win_lmax + 1;
    for (int l = 0; l <= fw->lmax; l++) /* D_l = l (l + 1) C_l / 2 pi */
        fw->cl[l] *= l * (l + 1.0) / (2 * M_PI);
    for (int b = 0; b < t->nbins; b++) {
        double s = 0;
        if (t->win) {
            const int top = t->win_lmax < fw->lmax ? t->win_lmax : fw->lmax;
            for (int l = 0; l <= top; l++)
                s += t->win[(size_t)b * wl + (size_t)l] * fw->cl[l];
        } else {
            /* The estimator's fallback window: a uniform D average. */
            for (int l = t->l_lo[b]; l <= t->l_hi[b]; l++)
                s += fw->cl[l];
            s /= t->l_hi[b] - t->l_lo[b] + 1;
        }
        fw->pred[b] = s;
    }
    /* Only the position enters the forward model, not its error draws. */
    clef_peak_opts po = o->forward_peak;
    po.draws = 0;
    clef_peak_result r;
    const int st = clef_peak_find_quiet(&fw->bp, &po, &r);
    if (st == CLEF_EINVAL)
        return CLEF_OK; /* e.g. the model's bins carry no error in the window: no peak */
    CLEF_TRY(st);
    if (r.found)
        *off = r.l_peak - l1;
    return CLEF_OK;
}

/* Offsets at the Omega_k nodes for the prior means (off[4 j]) and their
 * derivatives with respect to omega_b, omega_c and h (off[4 j + 1..3]),
 * by central differences of one prior sigma (0 for a fixed parameter or
 * when a side fails).  The offset is smooth and small (docs/geometry.md),
 * so a linear dependence on the nuisance parameters is enough within the
 * priors. */
static int forward_nodes(const clef_geometry_opts *o, const double *nodes, double *off,
                         clef_geometry_result *res)
{
    const int nn = o->nnodes;
    forward_work fw;
    clef_cosmo_work cw = {0};
    int status = forward_work_init(&fw, o->forward_table);
    if (status == CLEF_OK)
        status = clef_cosmo_work_alloc(&cw);
    const clef_geometry_prior *pri[3] = {&o->omega_b, &o->omega_c, &o->h};
    res->forward_nodes_failed = 0;
    res->forward_offset_min = INFINITY;
    res->forward_offset_max = -INFINITY;
    for (int j = 0; j < nn && status == CLEF_OK; j++) {
        clef_cosmo_params p = o->base;
        p.omega_b = o->omega_b.mean;
        p.omega_c = o->omega_c.mean;
        p.h = o->h.mean;
        p.omega_k = nodes[j];
        double *oj = off + 4 * (size_t)j;
        CLEF_CHECK(forward_offset(o, &fw, &p, &cw, &oj[0]));
        for (int i = 0; i < 3; i++) {
            oj[1 + i] = 0;
            if (isnan(oj[0]) || pri[i]->sigma == 0)
                continue;
            double side[2];
            for (int k = 0; k < 2; k++) {
                clef_cosmo_params q = p;
                double *v = i == 0 ? &q.omega_b : i == 1 ? &q.omega_c : &q.h;
                *v += (k ? 1 : -1) * pri[i]->sigma;
                CLEF_CHECK(forward_offset(o, &fw, &q, &cw, &side[k]));
            }
            if (!isnan(side[0]) && !isnan(side[1]))
                oj[1 + i] = (side[1] - side[0]) / (2 * pri[i]->sigma);
        }
        if (isnan(oj[0])) {
            res->forward_nodes_failed++;
        } else {
            res->forward_offset_min = fmin(res->forward_offset_min, oj[0]);
            res->forward_offset_max = fmax(res->forward_offset_max, oj[0]);
        }
    }
    if (status == CLEF_OK) {
        clef_cosmo_params p = o->base;
        p.omega_b = o->omega_b.mean;
        p.omega_c = o->omega_c.mean;
        p.h = o->h.mean;
        p.omega_k = 0;
        status = forward_offset(o, &fw, &p, &cw, &res->forward_offset);
    }
fail:
    forward_work_free(&fw);
    clef_cosmo_work_free(&cw);
    if (status == CLEF_OK && res->forward_nodes_failed == nn)
        CLEF_FAIL(CLEF_ENUMERIC, "forward model: the peak estimator finds no peak on the model "
                  "spectrum at any Omega_k node with these bins and settings");
    if (status == CLEF_OK && res->forward_nodes_failed)
        clef_log(CLEF_LOG_INFO, "forward model: no peak on the model at %d of %d Omega_k nodes "
                 "(excluded)", res->forward_nodes_failed, nn);
    return status;
}

/* Model l_1 at the coarse nodes for every sample, in parallel; node values
 * are NAN where the model is unphysical.  With the forward model (off not
 * NULL) the estimator's offset at the node is added, linear in the sample's
 * nuisance parameters. */
static int node_table(const clef_geometry_opts *o, const double *samples, const double *nodes,
                      const double *off, double *table)
{
    const int ns = o->nsamples, nn = o->nnodes;
    int fail = 0;
#pragma omp parallel reduction(| : fail)
    {
        clef_cosmo_work w = {0};
        if (clef_cosmo_work_alloc(&w) != CLEF_OK)
            fail |= 1;
#pragma omp for schedule(dynamic, 8)
        for (int i = 0; i < ns; i++) {
            clef_cosmo_params p = o->base;
            p.omega_b = samples[3 * i];
            p.omega_c = samples[3 * i + 1];
            p.h = samples[3 * i + 2];
            for (int j = 0; j < nn; j++) {
                double l1 = NAN;
                if (w.ws && !isnan(p.omega_b)) {
                    p.omega_k = nodes[j];
                    const int st = clef_cosmo_peak_quiet(&p, &w, &l1, NULL);
                    if (st < 0)
                        fail |= 2;
                    if (st != 0)
                        l1 = NAN;
                    if (off) {
                        const double *oj = off + 4 * (size_t)j;
                        l1 += oj[0] + oj[1] * (p.omega_b - o->omega_b.mean) +
                              oj[2] * (p.omega_c - o->omega_c.mean) + oj[3] * (p.h - o->h.mean);
                    }
                }
                table[(size_t)i * nn + j] = l1;
            }
        }
        clef_cosmo_work_free(&w);
    }
    if (fail & 1)
        CLEF_FAIL(CLEF_ENOMEM, "curvature inference: cannot allocate integration work spaces");
    if (fail & 2)
        CLEF_FAIL(CLEF_ENUMERIC, "curvature inference: a distance integral did not converge");
    return CLEF_OK;
}

/* For one sample, the longest run of valid nodes [*j0, *j1]. */
static void valid_run(const double *row, int nn, int *j0, int *j1)
{
    int best0 = 0, best1 = -1;
    for (int j = 0; j < nn;) {
        if (isnan(row[j])) {
            j++;
            continue;
        }
        int k = j;
        while (k + 1 < nn && !isnan(row[k + 1]))
            k++;
        if (k - j > best1 - best0) {
            best0 = j;
            best1 = k;
        }
        j = k + 1;
    }
    *j0 = best0;
    *j1 = best1;
}

/* Everything that does not depend on the measurement. */
struct clef_geometry_plan {
    clef_geometry_opts o;  /* forward_table set to NULL after creation */
    int ng, nn, ns;
    double *grid, *nodes, *table; /* table: ns x nn model l_1 */
    gsl_spline **sp;             /* one per sample with >= 3 valid nodes, else NULL */
    int *run;                    /* valid node run per sample */
    int nvalid;
    clef_geometry_result ref;    /* reference and forward-model numbers */
    double phi1;
};

void clef_geometry_plan_destroy(clef_geometry_plan *p)
{
    if (!p)
        return;
    if (p->sp)
        for (int i = 0; i < p->ns; i++)
            gsl_spline_free(p->sp[i]);
    free(p->sp);
    free(p->run);
    free(p->grid);
    free(p->nodes);
    free(p->table);
    free(p);
}

/* Variance of the l_1 residual: measurement plus model error. */
static double residual_var(double err, double model_err, double l1)
{
    return err * err + model_err * model_err * l1 * l1;
}

/* Gaussian chi^2 of a model l_1; the log(var) term matters only when the
 * model error (proportional to l_1) varies across the grid. */
static double chi2_of(double lp, double err, double model_err, double l1)
{
    const double var = residual_var(err, model_err, l1);
    const double d = l1 - lp;
    return d * d / var + log(var);
}

/* Reference numbers at the prior means: flat l_1, the l_1 range over the
 * grid, phi_1. */
static int reference(const clef_geometry_plan *pl, clef_geometry_result *r, double *phi1)
{
    const clef_geometry_opts *o = &pl->o;
    clef_cosmo_params p = o->base;
    p.omega_b = o->omega_b.mean;
    p.omega_c = o->omega_c.mean;
    p.h = o->h.mean;
    clef_cosmo_work w = {0};
    CLEF_TRY(clef_cosmo_work_alloc(&w));
    double l1;
    r->l1_min = INFINITY;
    r->l1_max = -INFINITY;
    for (int k = 0; k < pl->ng; k += (pl->ng - 1) / 10) {
        p.omega_k = pl->grid[k];
        if (clef_cosmo_peak_quiet(&p, &w, &l1, NULL) == 0) {
            r->l1_min = fmin(r->l1_min, l1);
            r->l1_max = fmax(r->l1_max, l1);
        }
    }
    p.omega_k = 0.0;
    const int st = clef_cosmo_peak_quiet(&p, &w, &r->l1_flat, phi1);
    clef_cosmo_work_free(&w);
    if (st != 0)
        CLEF_FAIL(CLEF_ENUMERIC, "curvature inference: no flat model at the prior means");
    return CLEF_OK;
}

int clef_geometry_plan_create(clef_geometry_plan **out, const clef_geometry_opts *o)
{
    int status = CLEF_OK;
    double *samples = NULL, *off = NULL;
    gsl_rng *rng = NULL;
    clef_geometry_plan *pl = NULL;
    if (!out || !o)
        CLEF_FAIL(CLEF_EINVAL, "curvature inference: NULL options or plan");
    *out = NULL;
    CLEF_TRY(check_opts(o));
    const int ng = o->ngrid, nn = o->nnodes, ns = o->nsamples;
    pl = calloc(1, sizeof *pl);
    if (!pl)
        CLEF_FAIL(CLEF_ENOMEM, "curvature inference: out of memory");
    pl->o = *o;
    pl->ng = ng;
    pl->nn = nn;
    pl->ns = ns;
    pl->grid = malloc((size_t)ng * sizeof *pl->grid);
    pl->nodes = malloc((size_t)nn * sizeof *pl->nodes);
    pl->table = malloc((size_t)ns * nn * sizeof *pl->table);
    pl->sp = calloc((size_t)ns, sizeof *pl->sp);
    pl->run = malloc((size_t)ns * 2 * sizeof *pl->run);
    samples = malloc((size_t)ns * 3 * sizeof *samples);
    rng = gsl_rng_alloc(gsl_rng_mt19937);
    if (!pl->grid || !pl->nodes || !pl->table || !pl->sp || !pl->run || !samples || !rng) {
        status = clef_fail(CLEF_ENOMEM, "curvature inference: out of memory (%d samples)", ns);
        goto fail;
    }
    const double lo = o->omega_k_min, hi = o->omega_k_max;
    for (int k = 0; k < ng; k++)
        pl->grid[k] = lo + (hi - lo) * k / (ng - 1.0);
    for (int j = 0; j < nn; j++)
        pl->nodes[j] = lo + (hi - lo) * j / (nn - 1.0);
    /* Draw all samples serially from one seeded stream: the same seed gives
     * the same samples whatever the thread count.  Priors are truncated to
     * the physical region (omega_b > 0, omega_c > 0, 0 < h <= 2). */
    gsl_rng_set(rng, o->seed);
    for (int i = 0; i < ns; i++) {
        samples[3 * i] = draw(rng, &o->omega_b, 0.0, INFINITY);
        samples[3 * i + 1] = draw(rng, &o->omega_c, 0.0, INFINITY);
        samples[3 * i + 2] = draw(rng, &o->h, 0.0, 2.0);
        if (isnan(samples[3 * i + 1]) || isnan(samples[3 * i + 2]))
            samples[3 * i] = NAN;
    }
    clef_progress("curvature", 0.0);
    clef_geometry_result *r = &pl->ref;
    r->forward = o->forward_table != NULL;
    r->forward_offset = r->forward_offset_min = r->forward_offset_max = NAN;
    if (r->forward) {
        if (!(off = malloc((size_t)nn * 4 * sizeof *off))) {
            status = clef_fail(CLEF_ENOMEM, "curvature inference: out of memory");
            goto fail;
        }
        CLEF_CHECK(forward_nodes(o, pl->nodes, off, r));
    }
    clef_progress("curvature", 0.5);
    CLEF_CHECK(node_table(o, samples, pl->nodes, off, pl->table));
    clef_progress("curvature", 0.9);
    for (int i = 0; i < ns; i++) {
        const double *row = pl->table + (size_t)i * nn;
        int j0, j1;
        valid_run(row, nn, &j0, &j1);
        pl->run[2 * i] = j0;
        pl->run[2 * i + 1] = j1;
        if (j1 - j0 + 1 < 3)
            continue;
        pl->nvalid++;
        pl->sp[i] = gsl_spline_alloc(gsl_interp_cspline, (size_t)(j1 - j0 + 1));
        if (!pl->sp[i]) {
            status = clef_fail(CLEF_ENOMEM, "curvature inference: out of memory for the splines");
            goto fail;
        }
        gsl_spline_init(pl->sp[i], pl->nodes + j0, row + j0, (size_t)(j1 - j0 + 1));
    }
    CLEF_CHECK(reference(pl, r, &pl->phi1));
    r->l1_flat_forward = r->l1_flat + r->forward_offset;
    clef_progress("curvature", 1.0);
    pl->o.forward_table = NULL; /* not kept: the caller may free it */
    gsl_rng_free(rng);
    free(samples);
    free(off);
    *out = pl;
    return CLEF_OK;
fail:
    gsl_rng_free(rng);
    free(samples);
    free(off);
    clef_geometry_plan_destroy(pl);
    return status;
}

/* Quantile q of the posterior by the trapezoid-rule CDF, linear within a cell. */
static double quantile(const double *x, const double *cdf, int n, double q)
{
    const double target = q * cdf[n - 1];
    for (int k = 1; k < n; k++)
        if (cdf[k] >= target) {
            const double span = cdf[k] - cdf[k - 1];
            const double t = span > 0 ? (target - cdf[k - 1]) / span : 0.0;
            return x[k - 1] + t * (x[k] - x[k - 1]);
        }
    return x[n - 1];
}

static int summarise(clef_geometry_result *r)
{
    const int n = r->n;
    const double *x = r->omega_k;
    double *post = r->posterior;
    int kmax = 0;
    for (int k = 1; k < n; k++)
        if (post[k] > post[kmax])
            kmax = k;
    const double peak = post[kmax];
    for (int k = 0; k < n; k++)
        post[k] /= peak;
    /* Mode: vertex of the parabola through the top point and its neighbours. */
    r->best = x[kmax];
    if (kmax > 0 && kmax < n - 1) {
        const double a = post[kmax - 1], b = post[kmax], c = post[kmax + 1];
        const double den = a - 2 * b + c;
        if (den < 0)
            r->best = x[kmax] + 0.5 * (a - c) / den * (x[kmax + 1] - x[kmax]);
    }
    double *cdf = malloc((size_t)n * sizeof *cdf);
    if (!cdf)
        CLEF_FAIL(CLEF_ENOMEM, "curvature inference: out of memory (%d grid points)", n);
    cdf[0] = 0;
    double m1 = 0, m2 = 0, mass = 0;
    for (int k = 1; k < n; k++) {
        const double dx = x[k] - x[k - 1];
        const double w = 0.5 * dx * (post[k] + post[k - 1]);
        mass += w;
        m1 += 0.5 * dx * (x[k] * post[k] + x[k - 1] * post[k - 1]);
        m2 += 0.5 * dx * (x[k] * x[k] * post[k] + x[k - 1] * x[k - 1] * post[k - 1]);
        cdf[k] = mass;
    }
    r->mean = m1 / mass;
    r->sd = sqrt(fmax(m2 / mass - r->mean * r->mean, 0.0));
    /* Central intervals of the Gaussian 1 and 2 sigma probabilities. */
    r->lo68 = quantile(x, cdf, n, 0.5 * (1 - 0.682689492137086));
    r->hi68 = quantile(x, cdf, n, 0.5 * (1 + 0.682689492137086));
    r->lo95 = quantile(x, cdf, n, 0.5 * (1 - 0.954499736103642));
    r->hi95 = quantile(x, cdf, n, 0.5 * (1 + 0.954499736103642));
    free(cdf);
    r->classification = r->hi95 < 0 ? CLEF_GEOMETRY_CLOSED : r->lo95 > 0 ? CLEF_GEOMETRY_OPEN
                                                                      : CLEF_GEOMETRY_FLAT;
    r->truncated = post[0] > EDGE_FRACTION || post[n - 1] > EDGE_FRACTION;
    return CLEF_OK;
}

int clef_geometry_plan_execute(const clef_geometry_plan *pl, double l_peak, double l_peak_err,
                               clef_geometry_result **out)
{
    if (!pl || !out)
        CLEF_FAIL(CLEF_EINVAL, "curvature inference: NULL plan or result");
    *out = NULL;
    CLEF_TRY(check_measurement(l_peak, l_peak_err));
    const int ng = pl->ng, nn = pl->nn, ns = pl->ns;
    const double merr = pl->o.model_err;
    clef_geometry_result *r = malloc(sizeof *r);
    if (!r)
        CLEF_FAIL(CLEF_ENOMEM, "curvature inference: out of memory");
    *r = pl->ref;
    r->n = ng;
    r->omega_k = malloc((size_t)ng * sizeof *r->omega_k);
    r->posterior = calloc((size_t)ng, sizeof *r->posterior);
    int status = CLEF_OK;
    if (!r->omega_k || !r->posterior) {
        status = clef_fail(CLEF_ENOMEM, "curvature inference: out of memory (%d grid points)", ng);
        goto fail;
    }
    memcpy(r->omega_k, pl->grid, (size_t)ng * sizeof *r->omega_k);
    r->nsamples_valid = pl->nvalid;
    /* chi^2 relative to the smallest node value, so a measurement far from
     * every model does not underflow; reachable when some sample comes
     * within 5 sigma of l_peak. */
    double ref = INFINITY;
    int reachable = 0;
    for (int i = 0; i < ns; i++) {
        if (!pl->sp[i])
            continue;
        const double *row = pl->table + (size_t)i * nn;
        double lmin = INFINITY, lmax = -INFINITY;
        for (int j = pl->run[2 * i]; j <= pl->run[2 * i + 1]; j++) {
            ref = fmin(ref, chi2_of(l_peak, l_peak_err, merr, row[j]));
            lmin = fmin(lmin, row[j]);
            lmax = fmax(lmax, row[j]);
        }
        if (l_peak >= lmin - 5.0 * sqrt(residual_var(l_peak_err, merr, lmin)) &&
            l_peak <= lmax + 5.0 * sqrt(residual_var(l_peak_err, merr, lmax)))
            reachable = 1;
    }
    /* Marginal likelihood on the fine grid: for every grid point the sum
     * over samples in sample order (parallel over grid points, so the
     * result does not depend on the thread count). */
#pragma omp parallel for schedule(static)
    for (int k = 0; k < ng; k++) {
        double sum = 0;
        gsl_interp_accel *acc = NULL;
        for (int i = 0; i < ns; i++) {
            const gsl_spline *sp = pl->sp[i];
            if (!sp || pl->grid[k] < pl->nodes[pl->run[2 * i]] ||
                pl->grid[k] > pl->nodes[pl->run[2 * i + 1]])
                continue;
            const double l1 = gsl_spline_eval(sp, pl->grid[k], acc);
            sum += exp(-0.5 * (chi2_of(l_peak, l_peak_err, merr, l1) - ref));
        }
        r->posterior[k] = sum;
    }
    double top = 0;
    for (int k = 0; k < ng; k++)
        top = fmax(top, r->posterior[k]);
    if (!reachable || pl->nvalid == 0 || !(top > 0) || !isfinite(top)) {
        status = clef_fail(CLEF_ENUMERIC,
                           "l_peak = %g +- %g is out of reach (more than 5 sigma from every model): for Omega_k in [%g, %g] the "
                           "model gives l_1 in [%.1f, %.1f] at the prior means",
                           l_peak, l_peak_err, pl->o.omega_k_min, pl->o.omega_k_max, r->l1_min,
                           r->l1_max);
        goto fail;
    }
    CLEF_CHECK(summarise(r));
    r->acoustic_scale_deg = 180.0 / l_peak;
    r->acoustic_scale_err_deg = 180.0 * l_peak_err / (l_peak * l_peak);
    r->theta_star_deg = 180.0 * (1.0 - pl->phi1) / l_peak;
    if (r->truncated)
        clef_log(CLEF_LOG_WARN,
                 "the Omega_k posterior is cut off by the grid [%g, %g]; widen the grid",
                 pl->o.omega_k_min, pl->o.omega_k_max);
    if (r->hi68 - r->lo68 < 4.0 * (pl->o.omega_k_max - pl->o.omega_k_min) / (ng - 1.0))
        clef_log(CLEF_LOG_WARN,
                 "the 68%% interval spans fewer than 4 grid steps; use a finer grid");
    *out = r;
    return CLEF_OK;
fail:
    clef_geometry_result_free(r);
    return status;
}

int clef_geometry_infer(const clef_geometry_opts *o, clef_geometry_result **out)
{
    if (!o || !out)
        CLEF_FAIL(CLEF_EINVAL, "curvature inference: NULL options");
    *out = NULL;
    CLEF_TRY(check_measurement(o->l_peak, o->l_peak_err));
    clef_geometry_plan *pl = NULL;
    CLEF_TRY(clef_geometry_plan_create(&pl, o));
    const int status = clef_geometry_plan_execute(pl, o->l_peak, o->l_peak_err, out);
    clef_geometry_plan_destroy(pl);
    return status;
}
