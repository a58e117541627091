/* Polarized maps: T, Q, U from one HEALPix table (TEMPERATURE,
 * Q_POLARISATION, U_POLARISATION columns; Gorski et al. 2005 and the
 * HEALPix FITS format specification, Hivon et al. 2020), or Q and U from
 * separate files, in every layout clef_map_read reads.
 *
 * Internal convention: COSMO (the HEALPix default, the one of the spin-2
 * transform, docs/transforms.md).  A table marked POLCCONV = 'IAU' has the
 * opposite sign of U (the IAU 1973 convention measures the polarization
 * angle from north through east, HEALPix's COSMO from north through west
 * as seen from inside; Hamaker & Bregman 1996; the HEALPix FITS format
 * specification, section on POLCCONV), so U is negated on reading.  A
 * table without POLCCONV is read as COSMO with a warning; any other value
 * is refused. */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>

#include "core_impl.h"
#include "map_impl.h"

/* Column selection: the given name/number, else the first of the HEALPix
 * names present (the American spelling is accepted too). */
static int read_column(clef_map **out, const char *path, const clef_map_pol_opts *o,
                       const char *given, const char *const *names, const char *what)
{
    clef_map_read_opts ro = {.hdu = o ? o->hdu : NULL, .ordering = o ? o->ordering : NULL};
    *out = NULL;
    if (given && *given) {
        ro.column = given;
        return clef_map_read(out, path, &ro);
    }
    /* Try the conventional names in turn: a missing column is
     * CLEF_EINVAL naming the file, HDU and the columns it has. */
    int status = CLEF_EINVAL;
    char first_msg[1024] = "";
    for (int k = 0; names[k]; k++) {
        ro.column = names[k];
        status = clef_map_read(out, path, &ro);
        if (status == CLEF_OK)
            return CLEF_OK;
        if (status != CLEF_EINVAL || !strstr(clef_last_error(), "no column named"))
            return status;
        if (!first_msg[0])
            snprintf(first_msg, sizeof first_msg, "%s", clef_last_error());
    }
    CLEF_FAIL(CLEF_EINVAL, "%s column missing: %s (give the %s column by name or number)", what,
              first_msg, what);
}

/* POLCCONV of a table -> sign of U (+1 COSMO, -1 IAU). */
static int polcconv_sign(const clef_map *m, const char *path, const char *override, int *sign,
                         int *missing)
{
    const char *v = override && *override ? override : m->polcconv;
    *missing = 0;
    if (!v[0]) {
        *missing = 1;
        clef_log(CLEF_LOG_WARN,
                 "'%s' HDU %d: keyword POLCCONV is missing; Q/U read as COSMO (the HEALPix "
                 "default)",
                 path, m->hdu);
        *sign = 1;
        return CLEF_OK;
    }
    if (!strcasecmp(v, "COSMO"))
        *sign = 1;
    else if (!strcasecmp(v, "IAU"))
        *sign = -1;
    else if (override && *override)
        CLEF_FAIL(CLEF_EINVAL, "polarization convention '%s' requested for '%s': expected COSMO or "
                  "IAU", v, path);
    else
        CLEF_FAIL(CLEF_EFORMAT,
                  "'%s' HDU %d: keyword POLCCONV = '%s' (expected COSMO or IAU)", path, m->hdu, v);
    return CLEF_OK;
}

static int same_grid(const clef_map *a, const char *pa, const clef_map *b, const char *pb)
{
    if (a->nside != b->nside)
        CLEF_FAIL(CLEF_EINVAL, "Q map '%s' (column %s) has nside %lld but U map '%s' (column %s) "
                  "has nside %lld", pa, a->column, (long long)a->nside, pb, b->column,
                  (long long)b->nside);
    if (a->coordsys[0] && b->coordsys[0] && strcmp(a->coordsys, b->coordsys))
        CLEF_FAIL(CLEF_EINVAL, "Q map '%s' has COORDSYS %s but U map '%s' has %s", pa,
                  a->coordsys, pb, b->coordsys);
    return CLEF_OK;
}

int clef_map_read_pol(clef_map_pol *out, const char *path, const clef_map_pol_opts *o)
{
    static const char *const tnames[] = {"TEMPERATURE", "I_STOKES", NULL};
    static const char *const qnames[] = {"Q_POLARISATION", "Q_POLARIZATION", "Q_STOKES", NULL};
    static const char *const unames[] = {"U_POLARISATION", "U_POLARIZATION", "U_STOKES", NULL};
    int status = CLEF_OK;
    if (!out || !path)
        CLEF_FAIL(CLEF_EINVAL, "clef_map_read_pol: NULL argument");
    memset(out, 0, sizeof *out);
    const char *upath = o && o->u_path && *o->u_path ? o->u_path : path;
    const int want_t = o ? o->want_t : 0;
    CLEF_CHECK(read_column(&out->q, path, o, o ? o->q_column : NULL, qnames, "Q"));
    CLEF_CHECK(read_column(&out->u, upath, o, o ? o->u_column : NULL, unames, "U"));
    CLEF_CHECK(same_grid(out->q, path, out->u, upath));
    int sq, su, mq, mu;
    CLEF_CHECK(polcconv_sign(out->q, path, o ? o->polcconv : NULL, &sq, &mq));
    if (upath != path) {
        CLEF_CHECK(polcconv_sign(out->u, upath, o ? o->polcconv : NULL, &su, &mu));
        if (su != sq && !(o && o->polcconv && *o->polcconv)) {
            status = clef_fail(CLEF_EINVAL, "Q file '%s' HDU %d has POLCCONV %s but U file '%s' "
                               "HDU %d has POLCCONV %s", path, out->q->hdu,
                               mq ? "(missing: COSMO)" : out->q->polcconv, upath, out->u->hdu,
                               mu ? "(missing: COSMO)" : out->u->polcconv);
            goto fail;
        }
    } else {
        su = sq;
        mu = mq;
    }
    out->iau = sq < 0;
    out->polcconv_missing = mq || mu;
    /* One validity for Q and U: a pixel is usable only where both are. */
    const int64_t np = out->q->npix;
    int64_t nmiss = 0;
    for (int64_t i = 0; i < np; i++) {
        const int v = out->q->valid[i] && out->u->valid[i];
        out->q->valid[i] = out->u->valid[i] = (unsigned char)v;
        if (!v) {
            out->q->pix[i] = out->u->pix[i] = 0.0;
            nmiss++;
        } else if (su < 0) {
            out->u->pix[i] = -out->u->pix[i];
        }
    }
    out->q->nmissing = out->u->nmissing = nmiss;
    if (want_t) {
        CLEF_CHECK(read_column(&out->t, path, o, o ? o->t_column : NULL, tnames, "T"));
        if (out->t->nside != out->q->nside) {
            status = clef_fail(CLEF_EINVAL, "T map '%s' (column %s) has nside %lld but Q has "
                               "%lld", path, out->t->column, (long long)out->t->nside,
                               (long long)out->q->nside);
            goto fail;
        }
    }
    return CLEF_OK;
fail:
    clef_map_pol_free(out);
    return status;
}

void clef_map_pol_free(clef_map_pol *p)
{
    if (!p)
        return;
    clef_map_free(p->t);
    clef_map_free(p->q);
    clef_map_free(p->u);
    p->t = p->q = p->u = NULL;
}

int clef_map_column_is_pol(const char *name)
{
    if (!name)
        return 0;
    return !strncasecmp(name, "Q_POLARI", 8) || !strncasecmp(name, "U_POLARI", 8) ||
           !strcasecmp(name, "Q_STOKES") || !strcasecmp(name, "U_STOKES");
}
