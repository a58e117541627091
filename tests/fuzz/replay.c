/* Replays fuzz inputs through a harness without libFuzzer, so that every
 * corpus file (seeds and the regress-* inputs of fixed findings) runs in
 * `make check` and under `make sanitize` with the project's own compiler:
 * replay_<harness> FILE|DIR...  Prints "N inputs" and exits 0 unless an
 * input crashes the harness (the sanitizer build then reports it). */
#define _GNU_SOURCE
#include <dirent.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>

int LLVMFuzzerInitialize(int *argc, char ***argv);
int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size);

static long ninputs;

static int run_file(const char *path)
{
    FILE *f = fopen(path, "rb");
    if (!f) {
        perror(path);
        return 1;
    }
    size_t cap = 1 << 16, n = 0;
    uint8_t *buf = malloc(cap);
    size_t got;
    while (buf && (got = fread(buf + n, 1, cap - n, f)) > 0) {
        n += got;
        if (n == cap)
            buf = realloc(buf, cap *= 2);
    }
    fclose(f);
    if (!buf)
        return 1;
    /* an exact-size copy, so reads past the end are caught */
    uint8_t *exact = malloc(n ? n : 1);
    memcpy(exact, buf, n);
    free(buf);
    LLVMFuzzerTestOneInput(exact, n);
    free(exact);
    ninputs++;
    return 0;
}

static int cmp(const void *a, const void *b)
{
    return strcmp(*(char *const *)a, *(char *const *)b);
}

static int run_path(const char *path)
{
    struct stat st;
    if (stat(path, &st) != 0) {
        perror(path);
        return 1;
    }
    if (!S_ISDIR(st.st_mode))
        return run_file(path);
    DIR *d = opendir(path);
    if (!d)
        return 1;
    char **names = NULL;
    size_t n = 0;
    struct dirent *e;
    while ((e = readdir(d)))
        if (e->d_name[0] != '.') {
            names = realloc(names, (n + 1) * sizeof *names);
            names[n++] = strdup(e->d_name);
        }
    closedir(d);
    qsort(names, n, sizeof *names, cmp);
    int bad = 0;
    for (size_t i = 0; i < n; i++) {
        char p[4096];
        snprintf(p, sizeof p, "%s/%s", path, names[i]);
        bad |= run_path(p);
        free(names[i]);
    }
    free(names);
    return bad;
}

int main(int argc, char **argv)
{
    LLVMFuzzerInitialize(&argc, &argv);
    int bad = 0;
    for (int i = 1; i < argc; i++)
        bad |= run_path(argv[i]);
    printf("%ld inputs\n", ninputs);
    return bad;
}
