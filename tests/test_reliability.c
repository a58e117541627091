/* Reliability of the core (docs/reliability.md): temporary names and their
 * registry, the sweep of stale temporaries, write-failure reasons, and the
 * library run many times in one process without growth in memory or open
 * files (/proc/self), with bit-identical results.  The command-level fault
 * and load tests are tests/cli/faults.sh and tests/cli/load.sh. */
#include "check.h"

#include <dirent.h>
#include <errno.h>
#include <signal.h>
#include <chealpix.h>
#include <omp.h>

#include "clef/coupling.h"
#include "clef/map.h"
#include "clef/spectrum.h"

static int count_temps(const char *dir)
{
    DIR *d = opendir(dir);
    int n = 0;
    struct dirent *e;
    while (d && (e = readdir(d)))
        n += strstr(e->d_name, ".clef-tmp.") != NULL;
    if (d)
        closedir(d);
    return n;
}

static void host_tag(char *out, size_t n)
{
    char h[256] = "";
    gethostname(h, sizeof h - 1);
    size_t k = 0;
    for (size_t i = 0; h[i] && k + 1 < n && k < 40; i++) {
        const char c = h[i];
        out[k++] = ((c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || (c >= '0' && c <= '9') ||
                    c == '-') ? c : '-';
    }
    out[k] = '\0';
    if (!k)
        snprintf(out, n, "localhost");
}

static void test_temp_names(void **state)
{
    (void)state;
    char dir[1024], target[1100], tmp[4200], host[64], me[64];
    snprintf(dir, sizeof dir, "%s", test_path("temps"));
    assert_int_equal(mkdir(dir, 0755), 0);
    snprintf(target, sizeof target, "%s/map.fits.gz", dir);
    assert_int_equal(clef_temp_make(tmp, sizeof tmp, target, "map.fits.gz", NULL), CLEF_OK);
    assert_true(file_exists(tmp));
    long pid = 0;
    const char *base = strrchr(tmp, '/') + 1;
    assert_int_equal(clef_temp_parse(base, &pid, host, sizeof host), 1);
    host_tag(me, sizeof me);
    assert_int_equal(pid, (long)getpid());
    assert_string_equal(host, me);
    assert_non_null(strstr(base, ".map.fits.gz.clef-tmp."));
    /* gzip scratch: no label, ".gz" only at the end (CFITSIO compresses on
     * the first ".gz" in a name) */
    char gz[4200];
    assert_int_equal(clef_temp_make(gz, sizeof gz, target, NULL, ".gz"), CLEF_OK);
    const char *gzb = strrchr(gz, '/') + 1;
    assert_int_equal(strncmp(gzb, ".clef-tmp.", 10), 0);
    assert_ptr_equal(strstr(gzb, ".gz"), gzb + strlen(gzb) - 3);
    assert_int_equal(clef_temp_parse(gzb, &pid, host, sizeof host), 1);
    /* names that are not clef temporaries */
    const char *bad[] = {"map.fits", ".map.fits.tmp-ABCDEF", ".x.clef-tmp.12.h.ABC",
                         ".x.clef-tmp.0.h.ABCDEF", ".x.clef-tmp.12.h_x.ABCDEF",
                         ".x.clef-tmp.12.h.ABCDEF.bak", ".x.clef-tmp.abc.h.ABCDEF"};
    for (size_t i = 0; i < sizeof bad / sizeof *bad; i++)
        assert_int_equal(clef_temp_parse(bad[i], &pid, host, sizeof host), 0);
    /* a very long base name still fits in one file name (NAME_MAX 255) */
    char longname[300];
    memset(longname, 'x', 250);
    longname[250] = '\0';
    char longtarget[1400], lt[4200];
    snprintf(longtarget, sizeof longtarget, "%s/%s", dir, longname);
    assert_int_equal(clef_temp_make(lt, sizeof lt, longtarget, longname, NULL), CLEF_OK);
    assert_true(strlen(strrchr(lt, '/') + 1) <= 255);
    /* the registry: remove_all (what the CLI's signal handler calls)
     * unlinks every live temporary; forgotten ones stay */
    clef_temp_forget(lt);
    assert_int_equal(count_temps(dir), 3);
    clef_temp_remove_all();
    assert_int_equal(count_temps(dir), 1);
    assert_true(file_exists(lt));
    unlink(lt);
    clef_temp_forget(tmp);
    clef_temp_forget(gz);
    /* a folder that does not exist */
    char nodir[1200];
    snprintf(nodir, sizeof nodir, "%s/none/out.fits", dir);
    assert_int_equal(clef_temp_make(tmp, sizeof tmp, nodir, "out.fits", NULL), CLEF_EIO);
    assert_non_null(strstr(clef_last_error(), nodir));
}

static void touch(const char *path)
{
    FILE *f = fopen(path, "w");
    assert_non_null(f);
    fclose(f);
}

static void test_sweep(void **state)
{
    (void)state;
    char dir[1024], p[1300], me[64];
    snprintf(dir, sizeof dir, "%s", test_path("sweep"));
    assert_int_equal(mkdir(dir, 0755), 0);
    host_tag(me, sizeof me);
    /* a pid that has ended: a reaped child */
    const pid_t child = fork();
    if (child == 0)
        _exit(0);
    int ws;
    waitpid(child, &ws, 0);
    snprintf(p, sizeof p, "%s/.a.fits.clef-tmp.%d.%s.AAAAAA", dir, (int)child, me);
    touch(p);
    snprintf(p, sizeof p, "%s/.clef-tmp.%d.%s.BBBBBB.gz", dir, (int)child, me);
    touch(p);
    snprintf(p, sizeof p, "%s/.a.fits.clef-tmp.%d.%s.CCCCCC", dir, (int)getppid(), me);
    touch(p); /* a live process */
    snprintf(p, sizeof p, "%s/.a.fits.clef-tmp.%d.another-host.DDDDDD", dir, (int)child);
    touch(p); /* another host */
    snprintf(p, sizeof p, "%s/.a.fits.tmp-EEEEEE", dir);
    touch(p); /* not ours */
    assert_int_equal(clef_temp_sweep(dir), 2);
    assert_int_equal(count_temps(dir), 2);
    assert_true(file_exists(p));
    /* the first temporary made in a folder sweeps it */
    char dir2[1024], t[4200], tgt[1100];
    snprintf(dir2, sizeof dir2, "%s", test_path("sweep2"));
    assert_int_equal(mkdir(dir2, 0755), 0);
    snprintf(p, sizeof p, "%s/.b.csv.clef-tmp.%d.%s.FFFFFF", dir2, (int)child, me);
    touch(p);
    snprintf(tgt, sizeof tgt, "%s/b.csv", dir2);
    assert_int_equal(clef_temp_make(t, sizeof t, tgt, "b.csv", NULL), CLEF_OK);
    assert_false(file_exists(p));
    unlink(t);
    clef_temp_forget(t);
}

static void test_write_reason(void **state)
{
    (void)state;
    char buf[256];
    assert_string_equal(clef_write_reason("/tmp/x", ENOSPC, buf, sizeof buf),
                        "no space left on device"); /* glibc strerror(ENOSPC), lower-cased */
    assert_string_equal(clef_write_reason("/tmp/x", EDQUOT, buf, sizeof buf),
                        "disk quota exceeded");
    char gone[1200];
    snprintf(gone, sizeof gone, "%s/no-such-folder/out.fits", test_path("r"));
    assert_non_null(strstr(clef_write_reason(gone, 0, buf, sizeof buf), "no longer exists"));
    /* nothing known: empty (the caller then gives the library's text) */
    assert_string_equal(clef_write_reason(test_path("fine"), 0, buf, sizeof buf), "");
    /* /dev/full always fails with ENOSPC (Linux): a write error through a
     * table writer whose temporary cannot be made is still named */
}

/* /proc/self: resident pages (statm field 2) and open descriptors. */
static long rss_kb(void)
{
    FILE *f = fopen("/proc/self/statm", "r");
    long size = 0, res = 0;
    assert_non_null(f);
    assert_int_equal(fscanf(f, "%ld %ld", &size, &res), 2);
    fclose(f);
    return res * (sysconf(_SC_PAGESIZE) / 1024);
}

static int open_fds(void)
{
    DIR *d = opendir("/proc/self/fd");
    int n = 0;
    struct dirent *e;
    while ((e = readdir(d)))
        n += e->d_name[0] != '.';
    closedir(d);
    return n;
}

/* 200 runs of the whole estimator (nside 16, apodized cut, cache on) in one
 * process: bit-identical band powers and errors every time; resident
 * memory after the last run within 1 MB of that after run 20 (the first
 * ones fill allocator arenas, FFTW and pixel-window caches); the same
 * number of open descriptors.  Under the sanitizer build, 30 runs and no
 * memory figure (AddressSanitizer's quarantine grows by design; its leak
 * check covers leaks). */
static void test_repeated_runs(void **state)
{
    (void)state;
    const int64_t nside = 16;
    clef_map *map = NULL, *mask = NULL;
    assert_int_equal(clef_map_alloc(&map, nside), CLEF_OK);
    assert_int_equal(clef_map_alloc(&mask, nside), CLEF_OK);
    uint64_t x = 88172645463325252ull; /* Marsaglia 2003 xorshift64, fixed seed */
    for (int64_t p = 0; p < map->npix; p++) {
        x ^= x << 13;
        x ^= x >> 7;
        x ^= x << 17;
        map->pix[p] = (double)(x >> 11) / 9007199254740992.0 - 0.5;
        double th, ph;
        pix2ang_ring64(nside, p, &th, &ph);
        const double b = fabs(90.0 - th * 180.0 / M_PI);
        mask->pix[p] = b < 15 ? 0.0 : b > 30 ? 1.0 : 0.5 * (1 - cos(M_PI * (b - 15) / 15));
    }
    clef_spectrum_opts o;
    clef_spectrum_opts_default(&o);
    o.cache_dir = test_path("repeat-cache");
    const int runs = test_sanitize() ? 30 : 200;
    omp_set_num_threads(1);
    double *dl0 = NULL, *err0 = NULL;
    int nb = 0, fd20 = 0;
    long rss20 = 0;
    for (int i = 0; i < runs; i++) {
        clef_spectrum_result r;
        assert_int_equal(clef_spectrum_compute(map, NULL, mask, NULL, &o, &r), CLEF_OK);
        if (i == 0) {
            nb = r.nbins;
            dl0 = malloc((size_t)nb * sizeof *dl0);
            err0 = malloc((size_t)nb * sizeof *err0);
            memcpy(dl0, r.bp->dl, (size_t)nb * sizeof *dl0);
            memcpy(err0, r.bp->dl_err, (size_t)nb * sizeof *err0);
        } else {
            assert_int_equal(r.nbins, nb);
            assert_memory_equal(r.bp->dl, dl0, (size_t)nb * sizeof *dl0);
            assert_memory_equal(r.bp->dl_err, err0, (size_t)nb * sizeof *err0);
        }
        clef_spectrum_result_free(&r);
        if (i == 19) {
            rss20 = rss_kb();
            fd20 = open_fds();
        }
    }
    const long rss_end = rss_kb();
    const int fd_end = open_fds();
    fprintf(stderr, "%d runs: RSS %ld kB after run 20, %ld kB after run %d; open fds %d, %d\n",
            runs, rss20, rss_end, runs, fd20, fd_end);
    assert_int_equal(fd_end, fd20);
    if (!test_sanitize() && rss_end > rss20 + 1024)
        fail_msg("resident memory grew by %ld kB over %d runs", rss_end - rss20, runs - 20);
    free(dl0);
    free(err0);
    clef_map_free(map);
    clef_map_free(mask);
}

int main(void)
{
    const struct CMUnitTest tests[] = {
        cmocka_unit_test(test_temp_names),
        cmocka_unit_test(test_sweep),
        cmocka_unit_test(test_write_reason),
        cmocka_unit_test(test_repeated_runs),
    };
    return cmocka_run_group_tests(tests, NULL, NULL);
}
