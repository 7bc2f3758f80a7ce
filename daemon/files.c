/* files.c: recursive, sorted listing of regular files. */
#include "files.h"

#include <ctype.h>
#include <errno.h>
#include <stdio.h>
#include <ftw.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

static int add(wd_paths *p, const char *path, int named)
{
    if (p->n == p->cap) {
        size_t cap = p->cap ? p->cap * 2 : 64;
        char **v = realloc(p->v, cap * sizeof *v);
        if (!v)
            return -1;
        p->v = v;
        unsigned char *f = realloc(p->named, cap);
        if (!f)
            return -1;
        p->named = f;
        p->cap = cap;
    }
    char *s = strdup(path);
    if (!s)
        return -1;
    p->named[p->n] = (unsigned char)named;
    p->v[p->n++] = s;
    return 0;
}

/* nftw offers no user pointer; the walk is single-threaded, so a file-scope cursor is safe here. */
static wd_paths *walk_target;
static int walk_failed;

static int visit(const char *path, const struct stat *st, int type, struct FTW *ftw)
{
    const char *base = path + ftw->base;
    if (ftw->level > 0 && base[0] == '.')
        return type == FTW_D ? FTW_SKIP_SUBTREE : FTW_CONTINUE;
    if (type == FTW_F && S_ISREG(st->st_mode) && add(walk_target, path, 0)) {
        walk_failed = ENOMEM;
        return FTW_STOP;
    }
    return FTW_CONTINUE;
}

static int cmp_str(const void *a, const void *b)
{
    return strcmp(*(char *const *)a, *(char *const *)b);
}

sw_status wd_paths_collect(wd_paths *p, const char *path, sw_error *err)
{
    struct stat st;
    if (stat(path, &st) != 0)
        return sw_error_set(err, SW_EIO, "%s: %s", path, strerror(errno));
    size_t first = p->n;
    if (S_ISREG(st.st_mode)) {
        if (add(p, path, 1))
            return sw_error_set(err, SW_ENOMEM, "%s: out of memory", path);
        return SW_OK;
    }
    if (!S_ISDIR(st.st_mode))
        return sw_error_set(err, SW_EINVAL, "%s: not a file or folder", path);
    walk_target = p;
    walk_failed = 0;
    int rc = nftw(path, visit, 32, FTW_PHYS | FTW_ACTIONRETVAL);
    walk_target = NULL;
    if (walk_failed)
        return sw_error_set(err, SW_ENOMEM, "%s: out of memory", path);
    if (rc != 0)
        return sw_error_set(err, SW_EIO, "%s: %s", path, strerror(errno));
    if (p->n > first) /* named[] is all 0 there */
        qsort(p->v + first, p->n - first, sizeof *p->v, cmp_str);
    return SW_OK;
}

void wd_paths_free(wd_paths *p)
{
    if (!p)
        return;
    for (size_t i = 0; i < p->n; i++)
        free(p->v[i]);
    free(p->v);
    free(p->named);
    p->v = NULL;
    p->named = NULL;
    p->n = p->cap = 0;
}

char *wd_safe_component(const char *in, const char *fallback, char *out, size_t n)
{
    if (!in || !*in)
        in = fallback && *fallback ? fallback : "unnamed";
    size_t k = 0;
    for (; in[k] && k + 1 < n; k++) {
        unsigned char c = (unsigned char)in[k];
        int ok = isascii(c) && (isalnum(c) || c == '.' || c == '_' || c == '-');
        out[k] = ok ? (char)c : '_';
    }
    out[k] = '\0';
    if (out[0] == '.' || out[0] == '-')
        out[0] = '_';
    /* ".." became "_." above; a name of dots only is not possible any more. */
    return out;
}

int wd_has_dicom_magic(const char *path)
{
    unsigned char b[132];
    FILE *f = fopen(path, "rb");
    if (!f)
        return 0;
    size_t got = fread(b, 1, sizeof b, f);
    fclose(f);
    return got == sizeof b && !memcmp(b + 128, "DICM", 4);
}

int wd_mkdir_p(const char *path)
{
    char buf[4096];
    if (sw_strlcpy(buf, path, sizeof buf) >= sizeof buf - 1) {
        errno = ENAMETOOLONG;
        return -1;
    }
    for (char *c = buf + 1; *c; c++) {
        if (*c != '/')
            continue;
        *c = '\0';
        if (mkdir(buf, 0750) != 0 && errno != EEXIST)
            return -1;
        *c = '/';
    }
    if (mkdir(buf, 0750) != 0 && errno != EEXIST)
        return -1;
    struct stat st;
    if (stat(buf, &st) != 0)
        return -1;
    if (!S_ISDIR(st.st_mode)) {
        errno = ENOTDIR;
        return -1;
    }
    return 0;
}

static int remove_entry(const char *path, const struct stat *st, int type, struct FTW *ftw)
{
    (void)st;
    (void)ftw;
    return (type == FTW_DP ? rmdir(path) : unlink(path)) == 0 ? 0 : -1;
}

int wd_remove_tree(const char *path)
{
    return nftw(path, remove_entry, 16, FTW_DEPTH | FTW_PHYS);
}
