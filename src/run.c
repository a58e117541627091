/* Run files (run.h, docs/run-files.md): YAML through libyaml's document
 * API, whose nodes carry their line (start_mark), so every error names the
 * file, the line and the key. */
#define _POSIX_C_SOURCE 200809L
#include "clef/run.h"

#include <errno.h>
#include <limits.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <yaml.h>

#include "core_impl.h"

typedef struct ctx {
    yaml_document_t *doc;
    const char *name;  /* file name for messages */
    char *dir;         /* folder of relative paths ("" for the current one) */
    clef_run *run;
} ctx;

static int line_of(const yaml_node_t *n)
{
    return (int)n->start_mark.line + 1;
}

static const char *scalar(const yaml_node_t *n)
{
    return n && n->type == YAML_SCALAR_NODE ? (const char *)n->data.scalar.value : NULL;
}

#define RUN_FAIL(c, node, ...)                                                              \
    do {                                                                                    \
        char msg_[512];                                                                     \
        snprintf(msg_, sizeof msg_, __VA_ARGS__);                                           \
        return clef_fail(CLEF_EINVAL, "%s line %d: %s", (c)->name, line_of(node), msg_);  \
    } while (0)

static int get_string(ctx *c, const yaml_node_t *v, const char *key, char **out)
{
    const char *s = scalar(v);
    if (!s || !s[0])
        RUN_FAIL(c, v, "'%s' takes a text value", key);
    if (*out)
        free(*out);
    if (!(*out = strdup(s)))
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for the run file");
    return CLEF_OK;
}

/* A path: relative to the run file's folder. */
static int get_path(ctx *c, const yaml_node_t *v, const char *key, char **out)
{
    char *s = NULL;
    CLEF_TRY(get_string(c, v, key, &s));
    if (s[0] != '/' && c->dir[0]) {
        const size_t n = strlen(c->dir) + strlen(s) + 2;
        char *p = malloc(n);
        if (!p) {
            free(s);
            CLEF_FAIL(CLEF_ENOMEM, "out of memory for the run file");
        }
        snprintf(p, n, "%s/%s", c->dir, s);
        free(s);
        s = p;
    }
    free(*out);
    *out = s;
    return CLEF_OK;
}

static int get_long(ctx *c, const yaml_node_t *v, const char *key, long lo, long hi, long *out)
{
    const char *s = scalar(v);
    char *end = NULL;
    errno = 0;
    const long x = s ? strtol(s, &end, 10) : 0;
    if (!s || !s[0] || *end || errno || x < lo || x > hi)
        RUN_FAIL(c, v, "'%s' takes a whole number in %ld..%ld, got '%.40s'", key, lo, hi,
                 s ? s : "(not a value)");
    *out = x;
    return CLEF_OK;
}

static int get_double(ctx *c, const yaml_node_t *v, const char *key, double lo, double *out)
{
    const char *s = scalar(v);
    char *end = NULL;
    const double x = s ? strtod(s, &end) : 0;
    if (!s || !s[0] || *end || !isfinite(x) || x < lo)
        RUN_FAIL(c, v, "'%s' takes a number >= %g, got '%.40s'", key, lo, s ? s : "(not a value)");
    *out = x;
    return CLEF_OK;
}

static int get_bool(ctx *c, const yaml_node_t *v, const char *key, int *out)
{
    const char *s = scalar(v);
    if (s && (!strcmp(s, "true") || !strcmp(s, "yes")))
        *out = 1;
    else if (s && (!strcmp(s, "false") || !strcmp(s, "no")))
        *out = 0;
    else
        RUN_FAIL(c, v, "'%s' takes true or false, got '%.40s'", key, s ? s : "(not a value)");
    return CLEF_OK;
}

static int parse_field(ctx *c, const yaml_node_t *n, clef_run_field *f)
{
    f->line = line_of(n);
    if (n->type != YAML_MAPPING_NODE)
        RUN_FAIL(c, n, "a field is a mapping of keys (name, maps, mask, ...)");
    const yaml_node_t *maps_node = NULL;
    for (yaml_node_pair_t *p = n->data.mapping.pairs.start; p < n->data.mapping.pairs.top; p++) {
        const yaml_node_t *k = yaml_document_get_node(c->doc, p->key);
        const yaml_node_t *v = yaml_document_get_node(c->doc, p->value);
        const char *key = scalar(k);
        if (!key)
            RUN_FAIL(c, k, "a key must be text");
        if (!strcmp(key, "name")) {
            CLEF_TRY(get_string(c, v, key, &f->name));
            if (strlen(f->name) >= CLEF_FIELD_NAME_MAX)
                RUN_FAIL(c, v, "field name longer than %d characters", CLEF_FIELD_NAME_MAX - 1);
        } else if (!strcmp(key, "maps")) {
            maps_node = v;
            f->maps_line = line_of(v);
            for (int s = 0; s < f->nsplits; s++) {
                free(f->maps[s]);
                f->maps[s] = NULL;
            }
            f->nsplits = 0;
            if (v->type == YAML_SCALAR_NODE) {
                CLEF_TRY(get_path(c, v, key, &f->maps[0]));
                f->nsplits = 1;
            } else if (v->type == YAML_SEQUENCE_NODE) {
                for (yaml_node_item_t *it = v->data.sequence.items.start;
                     it < v->data.sequence.items.top; it++) {
                    if (f->nsplits >= CLEF_FIELD_MAX_SPLITS)
                        RUN_FAIL(c, v, "'maps' lists more than %d maps", CLEF_FIELD_MAX_SPLITS);
                    CLEF_TRY(get_path(c, yaml_document_get_node(c->doc, *it), key,
                                      &f->maps[f->nsplits]));
                    f->nsplits++;
                }
            } else {
                RUN_FAIL(c, v, "'maps' takes a file or a list of files (noise splits)");
            }
            if (f->nsplits == 0)
                RUN_FAIL(c, v, "'maps' lists no map");
        } else if (!strcmp(key, "mask")) {
            CLEF_TRY(get_path(c, v, key, &f->mask));
        } else if (!strcmp(key, "beam-fwhm")) {
            CLEF_TRY(get_double(c, v, key, 0, &f->beam_fwhm));
        } else if (!strcmp(key, "beam-table")) {
            CLEF_TRY(get_path(c, v, key, &f->beam_table));
        } else if (!strcmp(key, "transfer")) {
            CLEF_TRY(get_path(c, v, key, &f->transfer));
        } else if (!strcmp(key, "noise-spectrum")) {
            CLEF_TRY(get_path(c, v, key, &f->noise));
        } else {
            RUN_FAIL(c, k, "unknown key '%.40s' in a field (known: name, maps, mask, beam-fwhm, "
                     "beam-table, transfer, noise-spectrum)", key);
        }
    }
    if (!f->name)
        RUN_FAIL(c, n, "the field has no 'name'");
    if (!maps_node)
        RUN_FAIL(c, n, "field '%s' has no 'maps'", f->name);
    if (!f->mask)
        RUN_FAIL(c, n, "field '%s' has no 'mask'", f->name);
    if (f->beam_table && f->beam_fwhm > 0)
        RUN_FAIL(c, n, "field '%s': choose one of 'beam-fwhm' and 'beam-table'", f->name);
    if (f->noise && f->nsplits > 1)
        RUN_FAIL(c, n, "field '%s': 'noise-spectrum' is for a single map (the split crosses "
                 "carry no noise bias)", f->name);
    return CLEF_OK;
}

static int find_field(const clef_run *r, const char *name)
{
    for (int i = 0; i < r->nfields; i++)
        if (!strcmp(r->fields[i].name, name))
            return i;
    return -1;
}

static int parse_fields(ctx *c, const yaml_node_t *v)
{
    clef_run *r = c->run;
    if (v->type != YAML_SEQUENCE_NODE)
        RUN_FAIL(c, v, "'fields' takes a list of fields");
    const int n = (int)(v->data.sequence.items.top - v->data.sequence.items.start);
    if (n < 1)
        RUN_FAIL(c, v, "'fields' lists no field");
    if (n > CLEF_FIELD_MAX_SPLITS * 8)
        RUN_FAIL(c, v, "'fields' lists %d fields, more than %d", n, CLEF_FIELD_MAX_SPLITS * 8);
    if (r->fields)
        RUN_FAIL(c, v, "'fields' is given twice");
    if (!(r->fields = calloc((size_t)n, sizeof *r->fields)))
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for the run file");
    for (int i = 0; i < n; i++) {
        const yaml_node_t *it = yaml_document_get_node(c->doc, v->data.sequence.items.start[i]);
        r->nfields = i + 1;
        CLEF_TRY(parse_field(c, it, &r->fields[i]));
        for (int j = 0; j < i; j++)
            if (!strcmp(r->fields[j].name, r->fields[i].name))
                RUN_FAIL(c, it, "field name '%s' is used twice (first at line %d)",
                         r->fields[i].name, r->fields[j].line);
    }
    return CLEF_OK;
}

/* Pairs refer to fields, so they are read after every field. */
static int parse_pairs(ctx *c, const yaml_node_t *v)
{
    clef_run *r = c->run;
    if (v->type != YAML_SEQUENCE_NODE)
        RUN_FAIL(c, v, "'pairs' takes a list of [field, field]");
    const int n = (int)(v->data.sequence.items.top - v->data.sequence.items.start);
    if (n < 1)
        RUN_FAIL(c, v, "'pairs' lists no pair (leave it out for every pair)");
    if (!(r->pairs = calloc((size_t)n, sizeof *r->pairs)))
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for the run file");
    for (int i = 0; i < n; i++) {
        const yaml_node_t *it = yaml_document_get_node(c->doc, v->data.sequence.items.start[i]);
        if (it->type != YAML_SEQUENCE_NODE ||
            it->data.sequence.items.top - it->data.sequence.items.start != 2)
            RUN_FAIL(c, it, "a pair is a list of two field names, e.g. [a, b]");
        int idx[2];
        for (int k = 0; k < 2; k++) {
            const yaml_node_t *s =
                yaml_document_get_node(c->doc, it->data.sequence.items.start[k]);
            const char *nm = scalar(s);
            if (!nm)
                RUN_FAIL(c, s, "a pair names fields by text");
            if ((idx[k] = find_field(r, nm)) < 0)
                RUN_FAIL(c, s, "'pairs' names field '%.60s', which 'fields' does not define", nm);
        }
        for (int j = 0; j < i; j++)
            if ((r->pairs[j].a == idx[0] && r->pairs[j].b == idx[1]) ||
                (r->pairs[j].a == idx[1] && r->pairs[j].b == idx[0]))
                RUN_FAIL(c, it, "pair [%s, %s] is listed twice (first at line %d)",
                         r->fields[idx[0]].name, r->fields[idx[1]].name, r->pairs[j].line);
        r->pairs[i].a = idx[0];
        r->pairs[i].b = idx[1];
        r->pairs[i].line = line_of(it);
        r->npairs = i + 1;
    }
    return CLEF_OK;
}

static int parse_settings(ctx *c, const yaml_node_t *v)
{
    clef_run *r = c->run;
    if (v->type != YAML_MAPPING_NODE)
        RUN_FAIL(c, v, "'spectrum' takes a mapping of settings");
    for (yaml_node_pair_t *p = v->data.mapping.pairs.start; p < v->data.mapping.pairs.top; p++) {
        const yaml_node_t *k = yaml_document_get_node(c->doc, p->key);
        const yaml_node_t *x = yaml_document_get_node(c->doc, p->value);
        const char *key = scalar(k);
        if (!key)
            RUN_FAIL(c, k, "a key must be text");
        if (!strcmp(key, "lmax"))
            CLEF_TRY(get_long(c, x, key, 2, 1 << 20, &r->lmax));
        else if (!strcmp(key, "bin-width"))
            CLEF_TRY(get_long(c, x, key, 1, 1 << 20, &r->bin_width));
        else if (!strcmp(key, "iterations"))
            CLEF_TRY(get_long(c, x, key, 0, 20, &r->iterations));
        else if (!strcmp(key, "pixel-window"))
            CLEF_TRY(get_bool(c, x, key, &r->pixel_window));
        else if (!strcmp(key, "keep-multipoles"))
            CLEF_TRY(get_bool(c, x, key, &r->keep_multipoles));
        else if (!strcmp(key, "joint-covariance"))
            CLEF_TRY(get_bool(c, x, key, &r->joint));
        else if (!strcmp(key, "covariance-model"))
            CLEF_TRY(get_path(c, x, key, &r->model));
        else if (!strcmp(key, "output"))
            CLEF_TRY(get_path(c, x, key, &r->output));
        else
            RUN_FAIL(c, k, "unknown key '%.40s' in 'spectrum' (known: lmax, bin-width, "
                     "iterations, pixel-window, keep-multipoles, joint-covariance, "
                     "covariance-model, output)", key);
    }
    return CLEF_OK;
}

static int parse_doc(ctx *c)
{
    yaml_node_t *root = yaml_document_get_root_node(c->doc);
    if (!root)
        return clef_fail(CLEF_EINVAL, "%s: empty run file (it needs 'fields')", c->name);
    if (root->type != YAML_MAPPING_NODE)
        RUN_FAIL(c, root, "a run file is a mapping with 'fields' (and 'pairs', 'spectrum')");
    const yaml_node_t *pairs = NULL;
    for (yaml_node_pair_t *p = root->data.mapping.pairs.start; p < root->data.mapping.pairs.top;
         p++) {
        const yaml_node_t *k = yaml_document_get_node(c->doc, p->key);
        const yaml_node_t *v = yaml_document_get_node(c->doc, p->value);
        const char *key = scalar(k);
        if (!key)
            RUN_FAIL(c, k, "a key must be text");
        if (!strcmp(key, "fields"))
            CLEF_TRY(parse_fields(c, v));
        else if (!strcmp(key, "pairs"))
            pairs = v;
        else if (!strcmp(key, "spectrum"))
            CLEF_TRY(parse_settings(c, v));
        else
            RUN_FAIL(c, k, "unknown key '%.40s' (known: fields, pairs, spectrum)", key);
    }
    if (!c->run->fields)
        RUN_FAIL(c, root, "the run file has no 'fields'");
    if (pairs)
        CLEF_TRY(parse_pairs(c, pairs));
    return CLEF_OK;
}

void clef_run_free(clef_run *r)
{
    if (!r)
        return;
    for (int i = 0; i < r->nfields; i++) {
        clef_run_field *f = &r->fields[i];
        free(f->name);
        for (int s = 0; s < CLEF_FIELD_MAX_SPLITS; s++)
            free(f->maps[s]);
        free(f->mask);
        free(f->beam_table);
        free(f->transfer);
        free(f->noise);
    }
    free(r->fields);
    free(r->pairs);
    free(r->model);
    free(r->output);
    free(r->path);
    free(r);
}

int clef_run_parse(clef_run **out, const char *text, size_t len, const char *name)
{
    *out = NULL;
    if (!name)
        name = "run file";
    if (len > CLEF_RUN_MAX_BYTES)
        CLEF_FAIL(CLEF_EINVAL, "%s: %zu bytes, more than a run file's %d", name, len,
                  CLEF_RUN_MAX_BYTES);
    clef_run *r = calloc(1, sizeof *r);
    char *dir = strdup(name);
    if (!r || !dir || !(r->path = strdup(name))) {
        free(r);
        free(dir);
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for the run file");
    }
    char *slash = strrchr(dir, '/');
    if (slash)
        *(slash == dir ? slash + 1 : slash) = '\0';
    else
        dir[0] = '\0';
    r->iterations = -1;
    r->pixel_window = -1;
    r->joint = -1;
    yaml_parser_t parser;
    yaml_document_t doc;
    int status = CLEF_OK, have_doc = 0;
    if (!yaml_parser_initialize(&parser)) {
        status = clef_fail(CLEF_ENOMEM, "out of memory for the YAML parser");
        goto done;
    }
    yaml_parser_set_input_string(&parser, (const unsigned char *)text, len);
    if (!yaml_parser_load(&parser, &doc)) {
        status = clef_fail(CLEF_EINVAL, "%s line %d: not valid YAML: %s", name,
                           (int)parser.problem_mark.line + 1,
                           parser.problem ? parser.problem : "parse error");
        yaml_parser_delete(&parser);
        goto done;
    }
    have_doc = 1;
    ctx c = {&doc, name, dir, r};
    status = parse_doc(&c);
    yaml_parser_delete(&parser);
done:
    if (have_doc)
        yaml_document_delete(&doc);
    free(dir);
    if (status != CLEF_OK) {
        clef_run_free(r);
        return status;
    }
    *out = r;
    return CLEF_OK;
}

int clef_run_read(clef_run **out, const char *path)
{
    *out = NULL;
    FILE *f = fopen(path, "rb");
    if (!f)
        CLEF_FAIL(CLEF_EIO, "cannot open run file '%s': %s", path, strerror(errno));
    char *buf = malloc(CLEF_RUN_MAX_BYTES + 1);
    if (!buf) {
        fclose(f);
        CLEF_FAIL(CLEF_ENOMEM, "out of memory for the run file");
    }
    const size_t n = fread(buf, 1, CLEF_RUN_MAX_BYTES + 1, f);
    const int err = ferror(f);
    fclose(f);
    if (err) {
        free(buf);
        CLEF_FAIL(CLEF_EIO, "cannot read run file '%s'", path);
    }
    const int status = clef_run_parse(out, buf, n, path);
    free(buf);
    return status;
}
