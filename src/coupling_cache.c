/* Coupling cache: M and K stored one file per key in a cache folder, so a
 * nightly rerun with the same mask skips the coupling computation.
 *
 * File layout (native byte order; docs/coupling.md):
 *   0   char[8]  magic "CLEFCPLC"
 *   8   u32      format version (CACHE_FORMAT)
 *   12  u32      byte-order mark 0x01020304 (as written by this machine)
 *   16  u32      kind: 1 = unbinned M, 2 = binned K, 3 = mask spectra, 4 = deprojection
 *                 correction (spectrum module), 5 = polarized matrices, 6 = ring weights
 *                 (transform)
 *   20  u32      reserved, 0
 *   24  u64      rows
 *   32  u64      columns
 *   40  char[64] key: SHA-256 (hex) of every input the matrix depends on
 *   104 char[16] clef version, NUL padded
 *   120 char[64] SHA-256 (hex) of the payload
 *   184 payload: rows x columns doubles, row-major
 * Files are written to a temporary name in the same folder and renamed,
 * so concurrent writers of one key each replace the file whole and
 * readers never see a partial file. */
#define _XOPEN_SOURCE 700
#include "coupling_impl.h"

#include <dirent.h>
#include <errno.h>
#include <fcntl.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <sys/time.h>
#include <sys/types.h>
#include <unistd.h>

#include "clef/hash.h"
#include "cache_impl.h"
#include "core_impl.h"

#define CACHE_MAGIC "CLEFCPLC"
#define CACHE_FORMAT 1u
#define CACHE_BOM 0x01020304u
#define CACHE_HEADER 184
enum { KIND_M = CLEF_CACHE_M, KIND_K = CLEF_CACHE_K };

/* The folder by the documented precedence, without reporting: the cached
 * calls treat a missing folder as a warning, not an error. */
const char *clef_cache_resolve_dir(const char *cache_dir, char *buf, size_t n)
{
    const char *env;
    int len;
    if (cache_dir && *cache_dir)
        len = snprintf(buf, n, "%s", cache_dir);
    else if ((env = getenv("CLEF_CACHE_DIR")) && *env)
        len = snprintf(buf, n, "%s", env);
    else if ((env = getenv("XDG_CACHE_HOME")) && *env)
        len = snprintf(buf, n, "%s/clef", env);
    else if ((env = getenv("HOME")) && *env)
        len = snprintf(buf, n, "%s/.cache/clef", env);
    else
        return "no folder (set CLEF_CACHE_DIR, XDG_CACHE_HOME or HOME)";
    if (len < 0 || (size_t)len >= n)
        return "folder name too long";
    return NULL;
}

int clef_coupling_cache_dir(const char *cache_dir, char *buf, size_t n)
{
    const char *why = clef_cache_resolve_dir(cache_dir, buf, n);
    if (why)
        CLEF_FAIL(CLEF_EINVAL, "coupling cache: %s", why);
    return CLEF_OK;
}

/* mkdir -p; on failure log a warning naming the folder and return 0. */
static int make_dirs(const char *dir)
{
    char tmp[4096];
    snprintf(tmp, sizeof tmp, "%s", dir);
    for (char *p = tmp + 1;; p++) {
        const int end = *p == '\0';
        if (*p != '/' && !end)
            continue;
        *p = '\0';
        if (mkdir(tmp, 0755) != 0 && errno != EEXIST) {
            clef_log(CLEF_LOG_WARN, "coupling cache: not stored: cannot create folder '%s': %s",
                     tmp, strerror(errno));
            return 0;
        }
        if (end)
            break;
        *p = '/';
    }
    if (access(dir, W_OK) != 0) {
        clef_log(CLEF_LOG_WARN, "coupling cache: not stored: folder '%s' is not writable: %s",
                 dir, strerror(errno));
        return 0;
    }
    return 1;
}

static void hash_int(clef_sha256 *h, int64_t v) { clef_sha256_update(h, &v, sizeof v); }
static void hash_str(clef_sha256 *h, const char *s) { clef_sha256_update(h, s, strlen(s) + 1); }

/* Key of M: everything M depends on.  W_l above 2 lmax never enters M. */
static void key_m(int lmax, const double *wl, int wl_lmax, char hex[65])
{
    const int wtop = wl_lmax < 2 * lmax ? wl_lmax : 2 * lmax;
    clef_sha256 h;
    unsigned char d[CLEF_SHA256_BYTES];
    clef_sha256_init(&h);
    hash_str(&h, "clef coupling matrix M");
    hash_str(&h, CLEF_VERSION);
    hash_int(&h, CACHE_FORMAT);
    hash_int(&h, lmax);
    hash_int(&h, wtop);
    clef_sha256_update(&h, wl, ((size_t)wtop + 1) * sizeof *wl);
    clef_sha256_final(&h, d);
    clef_sha256_hex(d, hex);
}

/* Key of K: the key of M plus the bins and the transfer array. */
static void key_k(const char *mkey, int lmax, const clef_bins *bins, const double *transfer,
                  char hex[65])
{
    clef_sha256 h;
    unsigned char d[CLEF_SHA256_BYTES];
    clef_sha256_init(&h);
    hash_str(&h, "clef binned coupling K");
    hash_str(&h, mkey);
    hash_int(&h, clef_bins_count(bins));
    hash_int(&h, clef_bins_weighting(bins));
    for (int b = 0; b < clef_bins_count(bins); b++) {
        hash_int(&h, clef_bins_l_lo(bins, b));
        hash_int(&h, clef_bins_l_hi(bins, b));
    }
    hash_int(&h, transfer != NULL);
    if (transfer)
        clef_sha256_update(&h, transfer, ((size_t)lmax + 1) * sizeof *transfer);
    clef_sha256_final(&h, d);
    clef_sha256_hex(d, hex);
}

int clef_cache_path(char *buf, size_t n, const char *dir, int kind, const char *key)
{
    const int len =
        snprintf(buf, n, "%s/%s-%s.bin", dir,
                 kind == KIND_M   ? "coupling-M"
                 : kind == KIND_K ? "coupling-K"
                 : kind == CLEF_CACHE_MASK_SPECTRA ? "mask-spectra"
                 : kind == CLEF_CACHE_POL          ? "coupling-pol"
                 : kind == CLEF_CACHE_RING_WEIGHTS ? "ring-weights"
                                                   : "deprojection",
                 key);
    return len >= 0 && (size_t)len < n;
}

static void payload_hex(const double *p, size_t count, char hex[65])
{
    clef_sha256_buffer(p, count * sizeof *p, hex);
}

/* Read a cached matrix into `out` (rows x cols).  Returns 1 on a valid hit,
 * 0 otherwise; every problem except an absent file is logged as a warning
 * and treated as a miss. */
int clef_cache_load(const char *path, int kind, const char *key, size_t rows, size_t cols,
                      double *out)
{
    return clef_cache_load_parts(path, kind, key, rows, cols, 1, &out);
}

/* The same with the payload's rows split evenly over `nparts` buffers (the
 * polarized entry's three matrices, read in place).  The payload is read
 * and hashed in slices, each while it is still in the processor's cache. */
int clef_cache_load_parts(const char *path, int kind, const char *key, size_t rows, size_t cols,
                          int nparts, double *const *parts)
{
    FILE *f = fopen(path, "rb");
    if (!f) {
        if (errno != ENOENT)
            clef_log(CLEF_LOG_WARN, "coupling cache: cannot open '%s' (%s); recomputing", path,
                     strerror(errno));
        return 0;
    }
    unsigned char h[CACHE_HEADER];
    const char *why = NULL;
    char whybuf[160];
    uint32_t format, bom, k;
    uint64_t r, c;
    if (fread(h, 1, sizeof h, f) != sizeof h) {
        why = "file shorter than its header";
        goto bad;
    }
    memcpy(&format, h + 8, 4);
    memcpy(&bom, h + 12, 4);
    memcpy(&k, h + 16, 4);
    memcpy(&r, h + 24, 8);
    memcpy(&c, h + 32, 8);
    if (memcmp(h, CACHE_MAGIC, 8) != 0) {
        why = "not a clef coupling cache file (bad magic)";
    } else if (bom != CACHE_BOM) {
        why = "written on a machine of another byte order";
    } else if (format != CACHE_FORMAT) {
        snprintf(whybuf, sizeof whybuf, "format version %u, expected %u", format, CACHE_FORMAT);
        why = whybuf;
    } else if (k != (uint32_t)kind || r != rows || c != cols) {
        snprintf(whybuf, sizeof whybuf,
                 "holds a %llu x %llu matrix of kind %u, expected %zu x %zu of kind %d",
                 (unsigned long long)r, (unsigned long long)c, k, rows, cols, kind);
        why = whybuf;
    } else if (memcmp(h + 40, key, 64) != 0) {
        why = "key mismatch (the file belongs to other inputs)";
    } else if (strncmp((const char *)h + 104, CLEF_VERSION, 16) != 0) {
        why = "written by another clef version";
    }
    if (why)
        goto bad;
    if (nparts < 1 || rows % (size_t)nparts != 0) {
        why = "internal error: payload split unevenly";
        goto bad;
    }
    /* The checksum is that of the whole payload (payload_hex), taken slice
     * by slice. */
    clef_sha256 hs;
    clef_sha256_init(&hs);
    const size_t per = rows / (size_t)nparts * cols, slice = (size_t)1 << 18; /* 2 MiB */
    for (int i = 0; i < nparts && !why; i++)
        for (size_t o = 0; o < per; o += slice) {
            const size_t cnt = per - o < slice ? per - o : slice;
            if (fread(parts[i] + o, sizeof(double), cnt, f) != cnt) {
                why = "payload has the wrong length (truncated or padded)";
                break;
            }
            clef_sha256_update(&hs, parts[i] + o, cnt * sizeof(double));
        }
    if (!why && fgetc(f) != EOF)
        why = "payload has the wrong length (truncated or padded)";
    if (why)
        goto bad;
    fclose(f);
    char hex[65];
    unsigned char dg[CLEF_SHA256_BYTES];
    clef_sha256_final(&hs, dg);
    clef_sha256_hex(dg, hex);
    if (memcmp(hex, h + 120, 64) != 0) {
        clef_log(CLEF_LOG_WARN,
                 "coupling cache: '%s' is corrupted (payload checksum mismatch); recomputing",
                 path);
        return 0;
    }
    clef_log(CLEF_LOG_INFO, "coupling cache: hit '%s'", path);
    /* A hit makes the entry the youngest: pruning removes the least
     * recently used first.  A read-only cache simply keeps its times. */
    utimensat(AT_FDCWD, path, NULL, 0);
    return 1;
bad:
    fclose(f);
    clef_log(CLEF_LOG_WARN, "coupling cache: ignoring '%s': %s; recomputing", path, why);
    return 0;
}

/* ---- size limit ---------------------------------------------------- */

#define DEFAULT_LIMIT (4LL << 30) /* 4 GiB */
static long long limit_set = -1;  /* clef_cache_set_limit; -1: not set */

int clef_cache_parse_size(const char *s, long long *bytes)
{
    if (!s || !*s)
        CLEF_FAIL(CLEF_EINVAL, "cache size limit: empty value");
    char *end;
    errno = 0;
    const double v = strtod(s, &end);
    if (errno || end == s || !(v >= 0) || v > 9e18)
        CLEF_FAIL(CLEF_EINVAL, "cache size limit '%s' is not a size (e.g. 500M, 4G, 0 for none)",
                  s);
    double mult = 1;
    switch (*end) {
    case 'k': case 'K': mult = 1024.0; end++; break;
    case 'm': case 'M': mult = 1024.0 * 1024; end++; break;
    case 'g': case 'G': mult = 1024.0 * 1024 * 1024; end++; break;
    case 't': case 'T': mult = 1024.0 * 1024 * 1024 * 1024; end++; break;
    default: break;
    }
    if (*end == 'i' && mult > 1)
        end++;
    if (*end == 'B' || *end == 'b')
        end++;
    if (*end || v * mult > 9e18)
        CLEF_FAIL(CLEF_EINVAL, "cache size limit '%s' is not a size (e.g. 500M, 4G, 0 for none)",
                  s);
    *bytes = (long long)(v * mult);
    return CLEF_OK;
}

void clef_cache_set_limit(long long bytes) { limit_set = bytes < 0 ? -1 : bytes; }

long long clef_cache_limit(void)
{
    if (limit_set >= 0)
        return limit_set;
    const char *env = getenv("CLEF_CACHE_LIMIT");
    long long v;
    if (env && *env) {
        if (clef_cache_parse_size(env, &v) == CLEF_OK)
            return v;
        clef_log(CLEF_LOG_WARN, "CLEF_CACHE_LIMIT: %s; using the default 4G", clef_last_error());
    }
    return DEFAULT_LIMIT;
}

/* "<name>-<64 hex digits>.bin": a cache entry of any kind (the names of
 * clef_cache_path), so new kinds are pruned without a list here. */
static int is_entry_name(const char *n)
{
    const size_t len = strlen(n);
    if (len < 1 + 1 + 64 + 4 || strcmp(n + len - 4, ".bin") || n[0] == '.')
        return 0;
    const char *hex = n + len - 4 - 64;
    if (hex[-1] != '-')
        return 0;
    for (int i = 0; i < 64; i++)
        if (!((hex[i] >= '0' && hex[i] <= '9') || (hex[i] >= 'a' && hex[i] <= 'f')))
            return 0;
    return 1;
}

typedef struct entry {
    char name[256];
    long long size;
    struct timespec mtime;
} entry;

static int older_first(const void *a, const void *b)
{
    const entry *x = a, *y = b;
    if (x->mtime.tv_sec != y->mtime.tv_sec)
        return x->mtime.tv_sec < y->mtime.tv_sec ? -1 : 1;
    if (x->mtime.tv_nsec != y->mtime.tv_nsec)
        return x->mtime.tv_nsec < y->mtime.tv_nsec ? -1 : 1;
    return strcmp(x->name, y->name);
}

int clef_cache_prune(const char *dir, long long limit, const char *keep)
{
    if (limit <= 0)
        return 0;
    DIR *d = opendir(dir);
    if (!d)
        return 0;
    entry *e = NULL;
    size_t n = 0, cap = 0;
    long long total = 0;
    struct dirent *de;
    char path[4096 + 300];
    while ((de = readdir(d))) {
        if (!is_entry_name(de->d_name) || strlen(de->d_name) >= sizeof e->name)
            continue;
        snprintf(path, sizeof path, "%s/%s", dir, de->d_name);
        struct stat st;
        if (lstat(path, &st) != 0 || !S_ISREG(st.st_mode))
            continue;
        if (n == cap) {
            cap = cap ? 2 * cap : 64;
            entry *ne = realloc(e, cap * sizeof *e);
            if (!ne)
                break;
            e = ne;
        }
        snprintf(e[n].name, sizeof e[n].name, "%s", de->d_name);
        e[n].size = (long long)st.st_size;
        e[n].mtime = st.st_mtim;
        total += e[n].size;
        n++;
    }
    closedir(d);
    int removed = 0;
    if (total > limit) {
        qsort(e, n, sizeof *e, older_first);
        const char *keep_base = keep ? strrchr(keep, '/') : NULL;
        keep_base = keep_base ? keep_base + 1 : keep;
        for (size_t i = 0; i < n && total > limit; i++) {
            if (keep_base && !strcmp(e[i].name, keep_base))
                continue;
            snprintf(path, sizeof path, "%s/%s", dir, e[i].name);
            /* Another run may have pruned it already, or still be reading
             * it: an open file stays readable after unlink (POSIX). */
            if (unlink(path) == 0 || errno == ENOENT) {
                total -= e[i].size;
                removed++;
                clef_log(CLEF_LOG_INFO,
                         "cache: removed the least recently used entry '%s' (%.1f MB) to stay "
                         "under the limit of %.1f MB", path, 1e-6 * (double)e[i].size,
                         1e-6 * (double)limit);
            }
        }
    }
    free(e);
    return removed;
}

/* Write atomically; failures are warnings (the result is still good). */
void clef_cache_store(const char *dir, const char *path, int kind, const char *key,
                        size_t rows, size_t cols, const double *data)
{
    const long long limit = clef_cache_limit();
    const long long bytes = (long long)(CACHE_HEADER + rows * cols * sizeof *data);
    if (limit > 0 && bytes > limit) {
        clef_log(CLEF_LOG_WARN, "cache: not stored: the entry (%.1f MB) is larger than the cache "
                 "limit (%.1f MB; --cache-limit, CLEF_CACHE_LIMIT)", 1e-6 * (double)bytes,
                 1e-6 * (double)limit);
        return;
    }
    if (!make_dirs(dir))
        return;
    clef_outfile o;
    if (clef_outfile_begin(&o, path) != CLEF_OK) {
        clef_log(CLEF_LOG_WARN, "coupling cache: not stored: %s", clef_last_error());
        return;
    }
    unsigned char h[CACHE_HEADER] = {0};
    const uint32_t format = CACHE_FORMAT, bom = CACHE_BOM, k = (uint32_t)kind;
    const uint64_t r = rows, c = cols;
    memcpy(h, CACHE_MAGIC, 8);
    memcpy(h + 8, &format, 4);
    memcpy(h + 12, &bom, 4);
    memcpy(h + 16, &k, 4);
    memcpy(h + 24, &r, 8);
    memcpy(h + 32, &c, 8);
    memcpy(h + 40, key, 64);
    strncpy((char *)h + 104, CLEF_VERSION, 16);
    char hex[65];
    payload_hex(data, rows * cols, hex);
    memcpy(h + 120, hex, 64);
    FILE *f = fopen(o.tmp_path, "wb");
    int ok = f != NULL;
    if (ok) {
        ok = fwrite(h, 1, sizeof h, f) == sizeof h &&
             fwrite(data, sizeof *data, rows * cols, f) == rows * cols;
        ok = (fclose(f) == 0) && ok;
    }
    if (!ok) {
        char why[256];
        clef_write_reason(path, errno, why, sizeof why);
        clef_log(CLEF_LOG_WARN, "coupling cache: not stored: cannot write '%s': %s", path, why);
        clef_outfile_abort(&o);
        return;
    }
    if (clef_outfile_commit(&o) != CLEF_OK) {
        clef_log(CLEF_LOG_WARN, "coupling cache: not stored: %s", clef_last_error());
        return;
    }
    clef_cache_prune(dir, limit, path);
}

int clef_coupling_create_cached(clef_coupling **out, int lmax, const double *wl, int wl_lmax,
                                const char *cache_dir, int *hit)
{
    return clef_coupling_create_cached_with(out, lmax, wl, wl_lmax, cache_dir, hit, NULL, NULL);
}

int clef_coupling_create_cached_with(clef_coupling **out, int lmax, const double *wl,
                                     int wl_lmax, const char *cache_dir, int *hit,
                                     clef_coupling_create_fn *make, void *arg)
{
    char dir[4096], path[4096 + 160], key[65];
    clef_coupling *c = NULL;
    if (hit)
        *hit = 0;
    CLEF_TRY(clef_coupling_alloc_empty(&c, lmax, wl, wl_lmax));
    const size_t n = (size_t)lmax + 1;
    const char *why = clef_cache_resolve_dir(cache_dir, dir, sizeof dir);
    if (!why) {
        key_m(lmax, wl, wl_lmax, key);
        if (!clef_cache_path(path, sizeof path, dir, KIND_M, key))
            why = "path too long";
    }
    const int have_path = why == NULL;
    if (why)
        clef_log(CLEF_LOG_WARN, "coupling cache: disabled: %s", why);
    if (have_path && clef_cache_load(path, KIND_M, key, n, n, c->m)) {
        if (hit)
            *hit = 1;
        *out = c;
        return CLEF_OK;
    }
    clef_coupling_destroy(c);
    if (make)
        CLEF_TRY(make(arg, out, lmax, wl, wl_lmax));
    else
        CLEF_TRY(clef_coupling_create(out, lmax, wl, wl_lmax));
    if (have_path)
        clef_cache_store(dir, path, KIND_M, key, n, n, (*out)->m);
    return CLEF_OK;
}

int clef_coupling_binned_create_cached(clef_coupling_binned **out, int lmax, const double *wl,
                                       int wl_lmax, const clef_bins *bins,
                                       const double *transfer, const clef_coupling_opts *opts,
                                       const char *cache_dir, int *hit)
{
    char dir[4096], path[4096 + 160], mkey[65], key[65];
    if (hit)
        *hit = 0;
    if (!out)
        CLEF_FAIL(CLEF_EINVAL, "coupling: output pointer is NULL");
    *out = NULL;
    CLEF_TRY(clef_coupling_check_wl(lmax, wl, wl_lmax));
    if (!bins)
        CLEF_FAIL(CLEF_EINVAL, "coupling: bins are NULL");
    if (clef_bins_lmax(bins) > lmax)
        CLEF_FAIL(CLEF_EINVAL,
                  "coupling: the last bin ends at l = %d, above the coupling matrix lmax %d",
                  clef_bins_lmax(bins), lmax);
    CLEF_TRY(clef_coupling_check_transfer(transfer, lmax));
    const int nb = clef_bins_count(bins);
    double *k = malloc((size_t)nb * nb * sizeof *k);
    if (!k)
        CLEF_FAIL(CLEF_ENOMEM, "coupling: out of memory for %d bins", nb);
    const char *why = clef_cache_resolve_dir(cache_dir, dir, sizeof dir);
    if (!why) {
        key_m(lmax, wl, wl_lmax, mkey);
        key_k(mkey, lmax, bins, transfer, key);
        if (!clef_cache_path(path, sizeof path, dir, KIND_K, key))
            why = "path too long";
    }
    const int have_path = why == NULL;
    if (why)
        clef_log(CLEF_LOG_WARN, "coupling cache: disabled: %s", why);
    int status, loaded = 0;
    if (have_path && clef_cache_load(path, KIND_K, key, (size_t)nb, (size_t)nb, k)) {
        loaded = 1;
    } else {
        clef_coupling *m = NULL;
        status = clef_coupling_create_cached(&m, lmax, wl, wl_lmax, cache_dir, NULL);
        if (status == CLEF_OK)
            status = clef_coupling_build_k(m, bins, transfer, k);
        clef_coupling_destroy(m);
        if (status != CLEF_OK) {
            free(k);
            return status;
        }
    }
    /* Only a usable K is stored; a cached K is checked again against the
     * caller's conditioning threshold. */
    status = clef_coupling_binned_from_k(out, k, bins, lmax, wl, wl_lmax, opts);
    if (status == CLEF_OK && !loaded && have_path)
        clef_cache_store(dir, path, KIND_K, key, (size_t)nb, (size_t)nb, k);
    if (status == CLEF_OK && hit)
        *hit = loaded;
    free(k);
    return status;
}
