/* Diagnostic of the first-peak error along the fit's own direction (issue
 * 11; not a test, it asserts nothing).  Build: make diag-peak.  Runs:
 *   build/tests/diag/peak_resp sim NSKY SKY0 INPUT WIDTH FILE
 *       simulate NSKY skies of tests/test_peak_sky.c's main setting (seeds
 *       90000 + 1000 INPUT + sky; INPUT 0..2: the model at Omega_k = 0,
 *       -0.04, +0.04, 3: the invented spectrum), bins WIDTH wide, and
 *       write per sky the band powers, the peak (automatic half width and
 *       1.5 times it) and the fit's linear response a = d l_peak / d D_b;
 *   build/tests/diag/peak_resp ana FILE...
 *       pool the files (same input and binning) and compare, sky by sky,
 *       a^T C_sample a with a^T C_analytic a, and both with the skies'
 *       l_peak scatter.
 * The response a comes in two kinds: the one of the last fit (lin_resp_fill
 * of src/peak.c: fixed centre, bin set and prior width; its a^T C a is the
 * quoted first-order variance), and central finite differences of the
 * whole procedure re-centred to 1e-10 half widths (the re-centring and the
 * data-dependent prior width included).  src/peak.c is compiled in to
 * reach its static helpers. */
#include "../../src/peak.c"

#ifndef M_PI /* peak.c asks for POSIX only */
#define M_PI 3.14159265358979323846
#endif

#include "clef/bins.h"
#include "clef/cosmo.h"
#include "clef/mask.h"
#include "clef/sht.h"
#include "clef/sim.h"
#include "clef/spectrum.h"
#include "clef/theory.h"

#define NSIDE 256
#define LMAX 512
#define LSIM 767
#define NWIN 2
#define MAXF 16

/* Per sky and window: l_peak, quoted err, err_lin, found, and the two
 * responses over all nb bins. */
typedef struct rec {
    double lp[NWIN], err[NWIN], lin[NWIN];
    int found[NWIN];
} rec;

static double invented_dl(double l)
{
    const double x = l / 240.0, k = 7;
    return 900 + 4500 * pow(x, k) * exp(k * (1 - x)) + 1500 * exp(-0.5 * pow((l - 560) / 80.0, 2));
}

/* search() of src/peak.c with the re-centring carried to 1e-10 half widths,
 * so that finite differences of the whole procedure are not limited by its
 * 1e-3 stopping rule. */
static int search_tight(const clef_bandpowers *bp, const clef_peak_opts *o, double hw, int w0,
                        int w1, clef_peak_result *r, lin_resp *lr)
{
    int top = w0;
    for (int b = w0; b <= w1; b++)
        if (bp->dl[b] > bp->dl[top])
            top = b;
    if (top == w0 || top == w1) {
        result_init(r);
        return CLEF_OK;
    }
    double lc = bp->l_eff[top];
    for (int pass = 0; pass < 60; pass++) {
        CLEF_TRY(fit_at(bp, o, lc, hw, w0, w1, r, lr));
        if (!r->found)
            break;
        const double moved = fabs(r->l_peak - lc);
        lc = r->l_peak;
        if (moved < 1e-10 * hw)
            break;
    }
    return CLEF_OK;
}

/* Responses of one table: alin (last fit) and afd (whole procedure), both
 * over all nb bins (zero outside the fitted / search bins). */
static void responses(const clef_bandpowers *bp, double hw, rec *rc, int w, double *alin,
                      double *afd)
{
    const int nb = bp->nbins;
    clef_peak_opts po;
    clef_peak_opts_default(&po);
    po.half_width = hw;
    int w0, w1;
    if (check_input(bp, &po, &w0, &w1)) {
        fprintf(stderr, "check_input: %s\n", clef_last_error());
        exit(1);
    }
    clef_peak_result r;
    lin_resp lr = {0};
    search(bp, &po, hw, w0, w1, &r, &lr);
    rc->found[w] = r.found;
    rc->lp[w] = r.l_peak;
    rc->err[w] = r.l_peak_err;
    rc->lin[w] = r.l_peak_err_lin;
    for (int b = 0; b < nb; b++)
        alin[b] = afd[b] = 0;
    if (!r.found) {
        lin_resp_free(&lr);
        return;
    }
    for (int i = 0; i < lr.n; i++)
        alin[lr.b0 + i] = lr.a[i];
    lin_resp_free(&lr);
    double *dl = malloc(sizeof(double) * nb);
    memcpy(dl, bp->dl, sizeof(double) * nb);
    clef_bandpowers t = *bp;
    t.dl = dl;
    for (int b = w0; b <= w1; b++) {
        const double h = 0.02 * sqrt(bp->cov[(size_t)b * nb + b]);
        clef_peak_result rp, rm;
        dl[b] = bp->dl[b] + h;
        search_tight(&t, &po, hw, w0, w1, &rp, NULL);
        dl[b] = bp->dl[b] - h;
        search_tight(&t, &po, hw, w0, w1, &rm, NULL);
        dl[b] = bp->dl[b];
        afd[b] = rp.found && rm.found ? (rp.l_peak - rm.l_peak) / (2 * h) : NAN;
    }
    free(dl);
}

static int do_sim(int nsky, int sky0, int input, int width, const char *file)
{
    double *cl = calloc(LSIM + 1, sizeof(double)), lt;
    if (input < 3) {
        const double oks[3] = {0, -0.04, 0.04};
        clef_cosmo_params cp;
        clef_cosmo_params_planck2018(&cp);
        cp.omega_k = oks[input];
        clef_theory_cl(&cp, LSIM, cl);
        clef_theory_first_peak(&cp, &lt, NULL);
    } else {
        for (int l = 2; l <= LSIM; l++)
            cl[l] = 2 * M_PI * invented_dl(l) / (l * (l + 1.0));
        lt = NAN; /* not needed here */
    }
    clef_map *full = NULL, *mask = NULL;
    clef_mask_full(&full, NSIDE);
    clef_mask_cut_latitude(full, 20 * M_PI / 180);
    clef_mask_apod_opts ao = {CLEF_MASK_APOD_C2, 8 * M_PI / 180, 0};
    clef_mask_apodize(&mask, full, &ao);
    double nl[LSIM + 1];
    const double sig = clef_sim_sigma_pix(NSIDE, 30.0);
    for (int l = 0; l <= LSIM; l++)
        nl[l] = sig * sig * 4 * M_PI / (12.0 * NSIDE * NSIDE);
    clef_bins *bins;
    clef_bins_create_linear(&bins, 2, width, LMAX, CLEF_BINS_DL);
    clef_map *map = NULL;
    clef_map_alloc(&map, NSIDE);
    clef_sht *sht = NULL;
    clef_sht_create(&sht, NSIDE, LSIM, NULL);
    clef_spectrum_opts so;
    clef_spectrum_opts_default(&so);
    so.lmax = LMAX;
    so.beam_fwhm = 10;
    so.pixel_window = 1;
    so.noise_cl = nl;
    so.noise_lmax = LSIM;
    so.find_peak = 0;
    so.theory_lmax = LSIM;
    so.bins = bins;
    so.theory_cl = cl;
    FILE *fp = fopen(file, "wb");
    if (!fp) {
        perror(file);
        return 1;
    }
    quiet = 1;
    double *alin = NULL, *afd = NULL;
    for (int s = sky0; s < sky0 + nsky; s++) {
        clef_sim_opts sim = {0};
        sim.seed = 90000 + 1000 * (uint64_t)input + (uint64_t)s;
        sim.beam_fwhm = 10;
        sim.pixel_window = 1;
        sim.noise_depth = 30;
        double *maps[1] = {map->pix};
        clef_sim_map(sht, cl, &sim, NULL, maps, NULL);
        clef_spectrum_result res;
        if (clef_spectrum_compute(map, NULL, mask, NULL, &so, &res)) {
            fprintf(stderr, "spectrum: %s\n", clef_last_error());
            return 1;
        }
        const clef_bandpowers *bp = res.bp;
        const int nb = bp->nbins;
        if (s == sky0) {
            /* header: nsky, nb, input, width, truth; l_eff; analytic cov;
             * mean band powers sum_l W_bl D_l; their responses */
            alin = malloc(sizeof(double) * nb * NWIN);
            afd = malloc(sizeof(double) * nb * NWIN);
            int hd[4] = {nsky, nb, input, width};
            fwrite(hd, sizeof hd, 1, fp);
            fwrite(&lt, sizeof lt, 1, fp);
            fwrite(bp->l_eff, sizeof(double), nb, fp);
            fwrite(bp->cov, sizeof(double), (size_t)nb * nb, fp);
            const int wl = bp->win_lmax + 1;
            double *mean = calloc(nb, sizeof(double));
            for (int b = 0; b < nb; b++)
                for (int l = 2; l < wl && l <= LSIM; l++)
                    mean[b] += bp->win[(size_t)b * wl + l] * cl[l] * l * (l + 1.0) / (2 * M_PI);
            fwrite(mean, sizeof(double), nb, fp);
            clef_bandpowers nf = *bp;
            nf.dl = mean;
            rec r0;
            for (int w = 0; w < NWIN; w++) {
                clef_peak_opts po;
                clef_peak_opts_default(&po);
                const double hw = w ? 1.5 * clef_peak_half_width(&nf, &po) : clef_peak_half_width(&nf, &po);
                responses(&nf, hw, &r0, w, alin + w * nb, afd + w * nb);
            }
            fwrite(&r0, sizeof r0, 1, fp);
            fwrite(alin, sizeof(double), (size_t)nb * NWIN, fp);
            fwrite(afd, sizeof(double), (size_t)nb * NWIN, fp);
            free(mean);
        }
        rec rc;
        for (int w = 0; w < NWIN; w++) {
            clef_peak_opts po;
            clef_peak_opts_default(&po);
            const double hw = w ? 1.5 * clef_peak_half_width(bp, &po) : clef_peak_half_width(bp, &po);
            responses(bp, hw, &rc, w, alin + w * nb, afd + w * nb);
        }
        fwrite(bp->dl, sizeof(double), nb, fp);
        fwrite(&rc, sizeof rc, 1, fp);
        fwrite(alin, sizeof(double), (size_t)nb * NWIN, fp);
        fwrite(afd, sizeof(double), (size_t)nb * NWIN, fp);
        fflush(fp);
        fprintf(stderr, "sky %d: l_peak %.2f +- %.2f\n", s, rc.lp[0], rc.err[0]);
        clef_spectrum_result_free(&res);
    }
    fclose(fp);
    return 0;
}

static double quad(const double *a, const double *c, int nb)
{
    double s = 0;
    for (int i = 0; i < nb; i++)
        for (int j = 0; j < nb; j++)
            s += a[i] * c[(size_t)i * nb + j] * a[j];
    return s;
}

static int do_ana(int nf, char **files)
{
    int nb = 0, input = -1, width = 0, ntot = 0;
    double lt = 0, *leff = NULL, *cova = NULL, *mean = NULL, *a0 = NULL;
    rec r0;
    double *D = NULL, *AL = NULL, *AF = NULL; /* per sky */
    rec *R = NULL;
    for (int f = 0; f < nf; f++) {
        FILE *fp = fopen(files[f], "rb");
        if (!fp) {
            perror(files[f]);
            return 1;
        }
        int hd[4];
        if (fread(hd, sizeof hd, 1, fp) != 1)
            return 1;
        if (f == 0) {
            nb = hd[1];
            input = hd[2];
            width = hd[3];
            leff = malloc(sizeof(double) * nb);
            cova = malloc(sizeof(double) * nb * nb);
            mean = malloc(sizeof(double) * nb);
            a0 = malloc(sizeof(double) * nb * NWIN * 2);
        } else if (hd[1] != nb || hd[2] != input || hd[3] != width) {
            fprintf(stderr, "%s: other input or binning\n", files[f]);
            return 1;
        }
        size_t ok = fread(&lt, sizeof lt, 1, fp);
        ok += fread(leff, sizeof(double), nb, fp);
        ok += fread(cova, sizeof(double), (size_t)nb * nb, fp);
        ok += fread(mean, sizeof(double), nb, fp);
        ok += fread(&r0, sizeof r0, 1, fp);
        ok += fread(a0, sizeof(double), (size_t)nb * NWIN * 2, fp);
        (void)ok;
        for (;;) {
            D = realloc(D, sizeof(double) * nb * (ntot + 1));
            AL = realloc(AL, sizeof(double) * nb * NWIN * (ntot + 1));
            AF = realloc(AF, sizeof(double) * nb * NWIN * (ntot + 1));
            R = realloc(R, sizeof(rec) * (ntot + 1));
            if (fread(D + (size_t)ntot * nb, sizeof(double), nb, fp) != (size_t)nb)
                break;
            if (fread(R + ntot, sizeof(rec), 1, fp) != 1)
                break;
            if (fread(AL + (size_t)ntot * nb * NWIN, sizeof(double), (size_t)nb * NWIN, fp) != (size_t)nb * NWIN)
                break;
            if (fread(AF + (size_t)ntot * nb * NWIN, sizeof(double), (size_t)nb * NWIN, fp) != (size_t)nb * NWIN)
                break;
            ntot++;
        }
        fclose(fp);
    }
    const int n = ntot;
    printf("input %d, bins %d, %d skies; truth %.3f; noise-free l_peak %.3f / %.3f, err_lin %.3f / %.3f\n",
           input, width, n, lt, r0.lp[0], r0.lp[1], r0.lin[0], r0.lin[1]);
    /* sample covariance about the sample mean, and about the window mean */
    double *cs = calloc((size_t)nb * nb, sizeof(double)), *ct = calloc((size_t)nb * nb, sizeof(double));
    double *em = calloc(nb, sizeof(double));
    for (int s = 0; s < n; s++)
        for (int b = 0; b < nb; b++)
            em[b] += D[(size_t)s * nb + b] / n;
    for (int s = 0; s < n; s++)
        for (int i = 0; i < nb; i++)
            for (int j = 0; j < nb; j++) {
                const double *d = D + (size_t)s * nb;
                cs[(size_t)i * nb + j] += (d[i] - em[i]) * (d[j] - em[j]) / (n - 1);
                ct[(size_t)i * nb + j] += (d[i] - mean[i]) * (d[j] - mean[j]) / n;
            }
    double *csd = calloc((size_t)nb * nb, sizeof(double)); /* sample diagonal, analytic correlations */
    for (int i = 0; i < nb; i++)
        for (int j = 0; j < nb; j++)
            csd[(size_t)i * nb + j] = cova[(size_t)i * nb + j] *
                sqrt(cs[(size_t)i * nb + i] * cs[(size_t)j * nb + j] / (cova[(size_t)i * nb + i] * cova[(size_t)j * nb + j]));
    for (int w = 0; w < NWIN; w++) {
        const double *a0l = a0 + (size_t)w * nb, *a0f = a0 + (size_t)(NWIN + w) * nb;
        printf("--- window %s ---\n", w ? "1.5 x auto" : "auto");
        printf("a0 (mean band powers): sqrt(a C_ana a) lin %.3f fd %.3f | sqrt(a C_samp a) lin %.3f fd %.3f | "
               "sample diag + analytic corr: lin %.3f | about window mean: lin %.3f\n",
               sqrt(quad(a0l, cova, nb)), sqrt(quad(a0f, cova, nb)), sqrt(quad(a0l, cs, nb)),
               sqrt(quad(a0f, cs, nb)), sqrt(quad(a0l, csd, nb)), sqrt(quad(a0l, ct, nb)));
        /* per sky */
        double sva = 0, svs = 0, svaf = 0, svsf = 0, svd = 0, sl = 0, sl2 = 0, serr = 0, slin = 0;
        double sx = 0, sx2 = 0, sxy = 0, sy = 0, sy2 = 0;
        int m = 0, cov1 = 0, nfdbad = 0;
        double sz2 = 0, sz4 = 0; /* moments of the standardised linear shift */
        int nz3 = 0;
        for (int s = 0; s < n; s++) {
            if (!R[s].found[w])
                continue;
            const double *al = AL + ((size_t)s * NWIN + w) * nb, *af = AF + ((size_t)s * NWIN + w) * nb;
            int bad = 0;
            for (int b = 0; b < nb; b++)
                bad |= !isfinite(af[b]);
            m++;
            sva += quad(al, cova, nb);
            svs += quad(al, cs, nb);
            svd += quad(al, csd, nb);
            bad |= fabs(sqrt(quad(af, cova, nb) / quad(al, cova, nb)) - 1) > 0.2;
            svaf += bad ? quad(al, cova, nb) : quad(af, cova, nb);
            svsf += bad ? quad(al, cs, nb) : quad(af, cs, nb);
            sl += R[s].lp[w];
            sl2 += R[s].lp[w] * R[s].lp[w];
            serr += R[s].err[w];
            slin += R[s].lin[w];
            cov1 += fabs(R[s].lp[w] - lt) <= R[s].err[w];
            /* finite differences that disagree with the linear response by
             * more than 20% (a bin entering or leaving under the step) */
            nfdbad += bad || fabs(sqrt(quad(af, cova, nb) / quad(al, cova, nb)) - 1) > 0.2;
            /* first-order prediction from the mean band powers' response */
            double x = 0;
            for (int b = 0; b < nb; b++)
                x += a0l[b] * (D[(size_t)s * nb + b] - mean[b]);
            const double y = R[s].lp[w] - r0.lp[w];
            const double z = x / sqrt(quad(a0l, cova, nb));
            sz2 += z * z;
            sz4 += z * z * z * z;
            nz3 += fabs(z) > 3;
            sx += x; sx2 += x * x; sy += y; sy2 += y * y; sxy += x * y;
        }
        const double ml = sl / m, sd = sqrt((sl2 / m - ml * ml) * m / (m - 1));
        const double vx = sx2 / m - sx * sx / m / m, vy = sy2 / m - sy * sy / m / m;
        const double cxy = sxy / m - sx * sy / m / m;
        printf("skies (%d found): l_peak mean-truth %+.3f scatter %.3f | quoted err %.3f, err_lin %.3f, coverage %.1f%%\n",
               m, ml - lt, sd, serr / m, slin / m, 100.0 * cov1 / m);
        printf("  per-sky a: rms sqrt(a C_ana a) lin %.3f fd %.3f | sqrt(a C_samp a) lin %.3f fd %.3f | "
               "samp diag + ana corr lin %.3f\n", sqrt(sva / m), sqrt(svaf / m), sqrt(svs / m),
               sqrt(svsf / m), sqrt(svd / m));
        printf("  ratios: samp/ana (lin) %.3f, (fd) %.3f; fd/lin (ana) %.3f; scatter/sqrt(a C_ana a) %.3f; "
               "scatter/sqrt(a C_samp a) %.3f\n", sqrt(svs / sva), sqrt(svsf / svaf), sqrt(svaf / sva),
               sd / sqrt(sva / m), sd / sqrt(svs / m));
        printf("  x = a0.(D - mean): sd %.3f (mean %+.3f); y = l_peak - l_peak(mean): sd %.3f (mean %+.3f); "
               "corr %.3f, slope y/x %.3f, rms(y - x) %.3f\n", sqrt(vx), sx / m, sqrt(vy), sy / m,
               cxy / sqrt(vx * vy), cxy / vx, sqrt((sy2 - 2 * sxy + sx2) / m));
        printf("  row: | %s | %d | %.2f | %.2f | %.2f | %.2f | %.3f | %.3f | %.3f | %.3f +- %.3f | %.1f%% |\n",
               w ? "1.5 x auto" : "auto", m, sd, serr / m, sqrt(sva / m), sqrt(svs / m), sqrt(svs / sva),
               sqrt(svd / sva), sd / sqrt(svs / m), sz2 / m, sqrt(2.0 / m), 100.0 * cov1 / m);
        printf("  z = x / sqrt(a0 C_ana a0): mean z^2 %.3f (under C_ana: 1 +- %.3f), kurtosis %.2f, |z| > 3: %d; "
               "fd replaced by lin on %d skies\n", sz2 / m, sqrt(2.0 / m), sz4 / m / (sz2 / m * sz2 / m), nz3, nfdbad);
    }
    /* Bin by bin: where does a C_samp a - a C_ana a come from?  With a0 of
     * the automatic window: the diagonal part sum_b a_b^2 (Cs - Ca)_bb and
     * the off-diagonal by lag. */
    const double *a = a0;
    double diag = 0, lag[8] = {0};
    for (int i = 0; i < nb; i++)
        for (int j = 0; j < nb; j++) {
            const double d = a[i] * (cs[(size_t)i * nb + j] - cova[(size_t)i * nb + j]) * a[j];
            const int k = abs(i - j);
            if (k == 0)
                diag += d;
            else if (k < 8)
                lag[k] += d;
        }
    printf("a0 (auto): a C_ana a %.3f; a (C_samp - C_ana) a: diagonal %+.3f, lag 1..7:", quad(a, cova, nb), diag);
    for (int k = 1; k < 8; k++)
        printf(" %+.3f", lag[k]);
    printf("\n bin l_eff a0 var_s/var_a corr1_s corr1_a corr2_s corr2_a\n");
    for (int b = 0; b < nb; b++) {
        if (a[b] == 0)
            continue;
        const double va = cova[(size_t)b * nb + b], vs = cs[(size_t)b * nb + b];
        double c1s = 0, c1a = 0, c2s = 0, c2a = 0;
        if (b + 1 < nb) {
            c1s = cs[(size_t)b * nb + b + 1] / sqrt(vs * cs[(size_t)(b + 1) * nb + b + 1]);
            c1a = cova[(size_t)b * nb + b + 1] / sqrt(va * cova[(size_t)(b + 1) * nb + b + 1]);
        }
        if (b + 2 < nb) {
            c2s = cs[(size_t)b * nb + b + 2] / sqrt(vs * cs[(size_t)(b + 2) * nb + b + 2]);
            c2a = cova[(size_t)b * nb + b + 2] / sqrt(va * cova[(size_t)(b + 2) * nb + b + 2]);
        }
        printf(" %3d %6.1f %+8.5f %6.3f %+6.3f %+6.3f %+6.3f %+6.3f  (mean-win)/se %+5.2f\n", b, leff[b],
               a[b], vs / va, c1s, c1a, c2s, c2a, (em[b] - mean[b]) / sqrt(va / n));
    }
    return 0;
}

int main(int argc, char **argv)
{
    if (argc >= 7 && !strcmp(argv[1], "sim"))
        return do_sim(atoi(argv[2]), atoi(argv[3]), atoi(argv[4]), atoi(argv[5]), argv[6]);
    if (argc >= 3 && !strcmp(argv[1], "ana"))
        return do_ana(argc - 2, argv + 2);
    fprintf(stderr, "usage: peak_resp sim NSKY SKY0 INPUT WIDTH FILE | peak_resp ana FILE...\n");
    return 2;
}
